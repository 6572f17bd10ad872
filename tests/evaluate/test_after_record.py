"""The seam later layers plug into: a hook inside the evaluation's write transaction."""

from __future__ import annotations

from typing import Any

import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.evaluate.run import evaluate_model
from plumbwatch.store import evaluations as store_evaluations
from plumbwatch.store.models import MonitoredModel, get
from plumbwatch.store.tables import evaluations
from tests.factories import NOW_US, binary_model, prediction, running_service


def _model(engine: Engine) -> MonitoredModel:
    with running_service(engine) as svc:
        svc.put_model("m", binary_model())
        r = svc.post("/v1/models/m/predictions", {"predictions": [prediction(1)]})
        assert r.status_code == 200, r.text
    with engine.connect() as conn:
        found = get(conn=conn, name="m")
    assert found is not None
    return found


def test_hook_sees_the_stored_id_and_its_changes_are_kept(engine: Engine) -> None:
    model = _model(engine)
    seen: list[tuple[int, bool]] = []

    def hook(
        conn: sa.Connection,
        m: MonitoredModel,
        evaluation_id: int,
        record: dict[str, Any],
        notify: bool,
    ) -> None:
        stored = conn.execute(
            sa.select(evaluations.c.id).where(evaluations.c.id == evaluation_id)
        ).scalar_one()
        seen.append((stored, notify))
        record["health"] = "watch"
        record["alerts"] = [{"marker": m.name}]

    record = evaluate_model(
        engine, model, as_of_us=NOW_US, now_us=NOW_US, notify=False, after_record=hook
    )
    assert seen and seen[0][1] is False
    with engine.connect() as conn:
        latest = store_evaluations.latest(conn, model_id=model.id)
        health = conn.execute(sa.select(evaluations.c.health)).scalar_one()
    assert latest == record
    assert latest["alerts"] == [{"marker": "m"}]
    assert health == "watch"


def test_a_failing_hook_leaves_no_evaluation(engine: Engine) -> None:
    model = _model(engine)

    def hook(*_: Any) -> None:
        raise RuntimeError("sink layer broke")

    with pytest.raises(RuntimeError):
        evaluate_model(engine, model, as_of_us=NOW_US, now_us=NOW_US, after_record=hook)
    with engine.connect() as conn:
        assert store_evaluations.latest(conn, model_id=model.id) is None
