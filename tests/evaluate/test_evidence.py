"""Evidence streams through the real evaluation path: each row once, at maturity plus the
grace, with its value then; replay equals live; corrections are counted, never folded in;
backwards replays leave streams alone; versions and resets start new streams."""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np
import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.evaluate.run import Options, evaluate_model
from plumbwatch.store import evidence as store_evidence
from plumbwatch.store.engine import BEGIN_OPTION, create_engine
from plumbwatch.store.ingest import write_outcomes, write_predictions
from plumbwatch.store.migrate import upgrade
from plumbwatch.store.tables import evidence_streams
from plumbwatch.validation import OutcomeRow, PredictionRow
from tests.simulation import (
    DAY_US,
    T0_US,
    Scenario,
    _ingest_rows,
    day_rows,
    declare,
    reference_log_evidence,
    run_scenario,
    zone,
)

SMALL = Scenario(
    seed=3,
    n_slices=3,
    rows_per_slice_day=40,
    days=12,
    positives_first=True,
    drift_slice="zone:z01",
    drift_from_day=3,
    odds=3.0,
)


def by_slice(record: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {e["slice"]: e for e in record["evidence"]}


def reference_columns(s: Scenario) -> list[str]:
    return ["overall"] + [f"zone:{zone(i)}" for i in range(s.n_slices)]


@pytest.mark.parametrize("grace", ["P1D", "PT0S"])
def test_streams_equal_the_reference_e_process(engine: Engine, grace: str) -> None:
    # The stream of every slice equals the mixture e-process computed directly on the same
    # rows fed at maturity plus the grace (METHODS.md 7.2 and 7.5), run by run.
    records = run_scenario(engine, SMALL, settings={"evidence_grace": grace})
    grace_days = 1 if grace == "P1D" else 0
    expected = reference_log_evidence(SMALL, grace_days=grace_days)
    names = reference_columns(SMALL)
    lag = SMALL.horizon_days + grace_days
    for day, record in enumerate(records):
        found = by_slice(record)
        if day < lag:  # nothing has reached the evidence frontier yet
            assert found == {}, day
            continue
        for col, name in enumerate(names):
            assert found[name]["log_evidence"] == pytest.approx(
                expected[day, col], rel=1e-9, abs=1e-9
            ), (day, name)
            assert found[name]["max_log_evidence"] == pytest.approx(
                max(0.0, expected[: day + 1, col].max()), rel=1e-9, abs=1e-9
            )
        rows = SMALL.rows_per_slice_day * SMALL.n_slices * (day - lag + 1)
        assert found["overall"]["n"] == rows
        assert record["evidence_feed"]["skipped_unlabelled"] == 0
    # K = 4 slices of version v1: the paging threshold ln(K / alpha) of METHODS.md 7.4.
    last = by_slice(records[-1])
    assert last["overall"]["log_threshold"] == pytest.approx(np.log(4 / 0.01))
    # The drifting zone (odds x3) crosses; the model's health says so.
    assert last["zone:z01"]["crossed"]
    assert records[-1]["health"] in ("watch", "drifting")


def _replay(engine: Engine, s: Scenario) -> list[dict[str, Any]]:
    """Everything ingested first, then one evaluation per day through as_of."""
    model = declare(engine, s)
    write = engine.connect().execution_options(**{BEGIN_OPTION: "IMMEDIATE"})
    with write, write.begin():
        for day in range(s.days):
            preds, outs = _ingest_rows(s, day)
            write_predictions(write, model_id=model.id, rows=preds, now_us=T0_US)
            rows = [OutcomeRow(0, cid, y, observed) for observed, cid, y in outs]
            write_outcomes(write, model_id=model.id, rows=rows, now_us=T0_US, correction=False)
    return [
        evaluate_model(engine, model, as_of_us=T0_US + (d + 1) * DAY_US, now_us=T0_US)
        for d in range(s.days)
    ]


def test_replay_equals_live_and_backwards_leaves_streams(engine: Engine, tmp_path) -> None:
    live = run_scenario(engine, SMALL)
    other = create_engine(f"sqlite:///{tmp_path / 'replay.db'}")
    upgrade(other)
    try:
        replay = _replay(other, SMALL)
    finally:
        other.dispose()
    for a, b in zip(live, replay, strict=True):
        assert [(e["slice"], e["n"], e["corrections"]) for e in a["evidence"]] == [
            (e["slice"], e["n"], e["corrections"]) for e in b["evidence"]
        ]
        for e, f in zip(a["evidence"], b["evidence"], strict=True):
            assert e["log_evidence"] == pytest.approx(f["log_evidence"], rel=1e-12, abs=1e-12)
    # An as_of before the last run is answered from raw rows and moves no evidence.
    with engine.connect() as conn:
        before = conn.execute(sa.select(evidence_streams)).all()
        model_id = conn.execute(sa.select(evidence_streams.c.model_id)).scalars().first()
    from plumbwatch.store.models import get

    with engine.connect() as conn:
        model = get(conn=conn, name="sim")
    assert model is not None and model.id == model_id
    back = evaluate_model(engine, model, as_of_us=T0_US + 6 * DAY_US, now_us=T0_US)
    with engine.connect() as conn:
        assert conn.execute(sa.select(evidence_streams)).all() == before
    assert back["evidence"] == []
    overall = next(s for s in back["windows"][0]["slices"] if s["slice"] == "overall")
    assert overall["metrics"]["log_evidence"] is None
    assert overall["reasons"]["log_evidence"] == "backwards_replay"


def test_corrections_and_late_labels_are_counted_not_fed(engine: Engine) -> None:
    s = Scenario(seed=5, n_slices=2, rows_per_slice_day=30, days=7)
    run_scenario(engine, s)  # runs 4, 5, 6 fed days 0, 1, 2
    from plumbwatch.store.models import get

    with engine.connect() as conn:
        model = get(conn=conn, name="sim")
    assert model is not None
    # Correct an outcome fed at run 4, and add a prediction of day 1 (a backfill) that
    # has no outcome yet: it reaches the stream unlabelled and is skipped.
    observed, cid, y = _ingest_rows(s, 0)[1][0]
    first_zone = f"zone:{zone(int(day_rows(s, 0).zone[0]))}"
    as_of = T0_US + 8 * DAY_US  # the run of day 7: feeds day 3
    write = engine.connect().execution_options(**{BEGIN_OPTION: "IMMEDIATE"})
    with write, write.begin():
        write_outcomes(
            write,
            model_id=model.id,
            rows=[OutcomeRow(0, cid, 1 - y, observed)],
            now_us=as_of,
            correction=True,
        )
        late = PredictionRow(0, "backfill", T0_US + DAY_US + 7, 0.3, None, "v1", '{"zone":"z00"}')
        write_predictions(write, model_id=model.id, rows=[late], now_us=as_of)
    after = evaluate_model(engine, model, as_of_us=as_of, now_us=as_of)
    write = engine.connect().execution_options(**{BEGIN_OPTION: "IMMEDIATE"})
    with write, write.begin():
        write_outcomes(
            write,
            model_id=model.id,
            rows=[OutcomeRow(0, "backfill", 1, T0_US + DAY_US + 3_600_000_000)],
            now_us=as_of,
            correction=False,
        )
    later = evaluate_model(engine, model, as_of_us=as_of + 3_600_000_000, now_us=as_of)
    ev, ev2 = by_slice(after), by_slice(later)
    assert ev["overall"]["corrections"] == 1 and ev[first_zone]["corrections"] == 1
    assert sum(e["corrections"] for e in ev.values()) == 2  # overall and the row's zone
    assert after["evidence_feed"]["backfilled"] == 1
    assert after["evidence_feed"]["skipped_unlabelled"] == 1
    assert ev2["overall"]["late_labels"] == 1 and ev2["zone:z00"]["late_labels"] == 1
    # The streams are the reference process on the values the rows had when fed: the
    # correction is not folded in, the backfill was skipped.
    expected = reference_log_evidence(replace(s, days=8))[7]
    for col, name in enumerate(reference_columns(s)):
        assert ev[name]["log_evidence"] == pytest.approx(expected[col], rel=1e-9, abs=1e-9)


def test_a_reset_and_a_new_version_start_new_streams(engine: Engine) -> None:
    s = Scenario(seed=7, n_slices=2, rows_per_slice_day=20, days=6)
    records = run_scenario(engine, s)  # runs 4 and 5 fed days 0 and 1
    assert by_slice(records[-1])["overall"]["n"] == 2 * 40
    from plumbwatch.store.models import get

    with engine.connect() as conn:
        model = get(conn=conn, name="sim")
    assert model is not None
    # The reset drops every stream; the next run starts them from the rows it feeds.
    with engine.begin() as conn:
        store_evidence.reset(conn, model_id=model.id, reason="recalibrated", actor="t", now_us=1)
    again = evaluate_model(engine, model, as_of_us=T0_US + 7 * DAY_US, now_us=T0_US)
    restarted = by_slice(again)
    assert restarted["overall"]["n"] == 40  # day 2 only
    assert restarted["overall"]["started_at"] == "2027-01-11T00:00:00Z"
    # Version v2 from day 6 on: its own streams, its own K.
    write = engine.connect().execution_options(**{BEGIN_OPTION: "IMMEDIATE"})
    with write, write.begin():
        rows = [
            PredictionRow(i, f"v2-{i}", T0_US + 6 * DAY_US + i, 0.2, None, "v2", '{"zone":"z00"}')
            for i in range(10)
        ]
        write_predictions(write, model_id=model.id, rows=rows, now_us=T0_US)
        write_outcomes(
            write,
            model_id=model.id,
            rows=[OutcomeRow(0, f"v2-{i}", 0, T0_US + 6 * DAY_US + 10**9) for i in range(10)],
            now_us=T0_US,
            correction=False,
        )
    record = evaluate_model(
        engine, model, as_of_us=T0_US + 11 * DAY_US, now_us=T0_US, options=Options()
    )
    v2 = {e["slice"]: e for e in record["evidence"] if e["version"] == "v2"}
    assert set(v2) == {"overall", "zone:z00"}
    assert v2["overall"]["n"] == 10
    assert v2["overall"]["log_threshold"] == pytest.approx(np.log(2 / 0.01))
    v1 = {e["slice"]: e for e in record["evidence"] if e["version"] == "v1"}
    assert v1["overall"]["log_threshold"] == pytest.approx(np.log(3 / 0.01))
    # Days 2 to 5 since the reset; of days 3 to 5 only the rows whose outcome was observed
    # (so ingested) by the end of day 5, the last simulated day: the rest are skipped.
    labelled = sum(
        int((day_rows(s, d).observed_at_us < T0_US + 6 * DAY_US).sum()) for d in (3, 4, 5)
    )
    assert v1["overall"]["n"] == 40 + labelled
    assert record["evidence_feed"]["skipped_unlabelled"] == 3 * 40 - labelled


def test_a_reset_during_a_run_makes_it_write_nothing(
    engine: Engine, monkeypatch: pytest.MonkeyPatch
) -> None:
    import plumbwatch.evaluate.run as run_mod
    from plumbwatch.errors import Conflict
    from plumbwatch.store.models import get
    from plumbwatch.store.tables import evaluations

    s = Scenario(seed=9, n_slices=2, rows_per_slice_day=20, days=6)
    run_scenario(engine, s)
    with engine.connect() as conn:
        model = get(conn=conn, name="sim")
        runs = conn.execute(sa.select(sa.func.count()).select_from(evaluations)).scalar_one()
    assert model is not None
    advance = run_mod.evidence_mod.advance

    def racing(*args: Any, **kwargs: Any) -> Any:
        # An admin resets the streams while this run is computing.
        with engine.begin() as conn:
            store_evidence.reset(conn, model_id=model.id, reason="race", actor="t", now_us=1)
        return advance(*args, **kwargs)

    monkeypatch.setattr(run_mod.evidence_mod, "advance", racing)
    with pytest.raises(Conflict, match="reset during this run"):
        evaluate_model(engine, model, as_of_us=T0_US + 7 * DAY_US, now_us=T0_US)
    with engine.connect() as conn:
        assert (
            conn.execute(sa.select(sa.func.count()).select_from(evaluations)).scalar_one() == runs
        )
        assert conn.execute(sa.select(evidence_streams)).all() == []  # the reset stands
