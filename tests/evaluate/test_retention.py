"""Retention prunes raw rows past the cut-off in batches; sketches and records stay."""

from __future__ import annotations

from datetime import timedelta

import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.jobs.tick import Evaluator
from plumbwatch.store.models import get
from plumbwatch.store.tables import outcomes, predictions, row_keys, row_keys_recent, sketches
from plumbwatch.timefmt import to_micros
from tests.evaluate.test_incremental import T0, evaluate, model_body, post, simulate
from tests.factories import running_service


def count(engine: Engine, table: sa.Table) -> int:
    with engine.connect() as conn:
        return int(conn.execute(sa.select(sa.func.count()).select_from(table)).scalar_one())


def test_prune_keeps_sketches_and_unapplied_rows(engine: Engine) -> None:
    preds, outs = simulate(10, 30, seed=9)
    with running_service(engine) as svc:
        svc.put_model("m", model_body())
        post(svc, preds, outs)
        record = evaluate(svc, T0 + timedelta(days=8))  # frontier: day 5
        before = {t.name: count(engine, t) for t in (sketches, predictions)}
        with engine.connect() as conn:
            model = get(conn=conn, name="m")
        assert model is not None
        evaluator = Evaluator(engine, "test", retention_days=2)
        now = to_micros(T0 + timedelta(days=30))
        pruned = evaluator.prune(model, now_us=now, batch=25)
        # Only rows the evidence has been fed go, however old the cut-off: the maturity
        # frontier (day 5) less the evidence grace (one day) is day 4.
        assert pruned == 4 * 30
        assert count(engine, predictions) == before["predictions"] - 120
        assert count(engine, outcomes) == 10 * 30 - 120
        keys = count(engine, row_keys) + count(engine, row_keys_recent)
        assert keys == 2 * (10 * 30 - 120)
        assert count(engine, sketches) == before["sketches"]
        later = evaluate(svc, T0 + timedelta(days=8, hours=1))
    assert record["raw_rows_from"].startswith("2026-05-01")
    assert later["raw_rows_from"].startswith("2026-05-05")  # how far back raw rows reach


def test_rows_older_than_retention_are_refused(engine: Engine) -> None:
    # A pruned id sent again would be counted twice; such old rows are refused instead.
    with running_service(engine, retention_days=30) as svc:
        svc.put_model("m", model_body())
        old = {"id": "x", "predicted_at": "2026-04-01T00:00:00Z", "probability": 0.2}
        recent = {"id": "y", "predicted_at": "2026-05-20T00:00:00Z", "probability": 0.2}
        r = svc.post("/v1/models/m/predictions", {"predictions": [recent, old]})
        assert r.status_code == 422
        assert r.json()["error"]["details"] == [
            {
                "index": 1,
                "field": "predicted_at",
                "reason": "is older than the retention_days setting keeps",
            }
        ]
