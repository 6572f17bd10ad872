"""Incremental sketches: equal to a rebuild, replay equals live, corrections touch only
their bucket, late outcomes are counted and excluded, label delay does not bias."""

from __future__ import annotations

import zlib
from datetime import timedelta

import numpy as np
import pytest
import sqlalchemy as sa
from sqlalchemy.engine import Engine

from plumbwatch.evaluate.rebuild import rebuild_model
from plumbwatch.store import sketches as store_sketches
from plumbwatch.store.models import get
from plumbwatch.store.sketches import load_buckets
from plumbwatch.store.tables import sketch_patches
from plumbwatch.timefmt import format_instant, parse_instant
from tests.factories import Service, running_service

T0 = parse_instant("2026-05-01T00:00:00Z")
HORIZON_DAYS = 3


def model_body(**kw) -> dict:
    body = {
        "kind": "binary",
        "label_horizon": f"P{HORIZON_DAYS}D",
        "segment_keys": ["region", "tier"],
        "crosses": [["region", "tier"]],
        "windows": ["P7D", "P14D"],
    }
    body.update(kw)
    return body


def simulate(
    n_days: int, per_day: int, seed: int, *, odds: float = 1.0, positives_first: bool = False
) -> tuple[list[dict], list[dict]]:
    """A calibrated model (odds multiplier 1), outcomes within the horizon."""
    rng = np.random.default_rng(seed)
    preds, outs = [], []
    for d in range(n_days):
        p = rng.beta(2, 5, size=per_day)
        q = 1 / (1 + (1 - p) / (p * odds))
        y = rng.random(per_day) < q
        for i in range(per_day):
            at = T0 + timedelta(days=d, seconds=int(rng.integers(0, 86_400)))
            rid = f"d{d}-{i}"
            preds.append(
                {
                    "id": rid,
                    "predicted_at": format_instant(at),
                    "probability": float(p[i]),
                    "version": "v1",
                    "segments": {
                        "region": str(rng.choice(["north", "south", "coast"])),
                        "tier": str(rng.choice(["express", "standard"])),
                    },
                }
            )
            if positives_first:
                delay = timedelta(hours=2) if y[i] else timedelta(days=HORIZON_DAYS)
            else:
                delay = timedelta(hours=int(rng.integers(1, HORIZON_DAYS * 24)))
            outs.append(
                {"id": rid, "outcome": int(y[i]), "observed_at": format_instant(at + delay)}
            )
    return preds, outs


def post(svc: Service, preds: list[dict], outs: list[dict], *, correction: bool = False) -> None:
    for i in range(0, len(preds), 2000):
        assert (
            svc.post("/v1/models/m/predictions", {"predictions": preds[i : i + 2000]}).status_code
            == 200
        )
    url = "/v1/models/m/outcomes" + ("?correction=true" if correction else "")
    for i in range(0, len(outs), 2000):
        r = svc.post(url, {"outcomes": outs[i : i + 2000]})
        assert r.status_code == 200, r.text


def evaluate(svc: Service, as_of) -> dict:
    r = svc.post("/v1/models/m/evaluations", {"as_of": format_instant(as_of)})
    assert r.status_code == 200, r.text
    return r.json()


def stored(engine: Engine) -> dict[tuple, tuple]:
    """Every stored bucket of model m, read as the runs read them (patches applied)."""
    with engine.connect() as conn:
        model = get(conn=conn, name="m")
        assert model is not None
        return {
            key: (b.matured, b.late, b.unlabelled, b.sketch)
            for key, b in load_buckets(conn, model_id=model.id).items()
        }


def patch_rows(engine: Engine) -> int:
    with engine.connect() as conn:
        return int(conn.execute(sa.select(sa.func.count()).select_from(sketch_patches)).scalar())


def assert_same_sketches(a: dict, b: dict) -> None:
    assert set(a) == set(b)
    for key in a:
        assert a[key][:3] == b[key][:3], key
        assert a[key][3].allclose(b[key][3], rtol=1e-9, atol=1e-9), key


def windows_metrics(record: dict) -> dict:
    return {
        (w["window"], s["slice"], s["version"]): s["metrics"]
        for w in record["windows"]
        for s in w["slices"]
    }


def test_incremental_equals_rebuild_with_late_rows_and_corrections(
    engine: Engine, monkeypatch: pytest.MonkeyPatch
) -> None:
    import plumbwatch.evaluate.rebuild as rebuild

    monkeypatch.setattr(rebuild, "_FLUSH_ROWS", 97)  # several partial flushes
    # These small buckets would mostly be rewritten whole; save half of them as
    # patches whenever they change, so both ways of saving are checked.
    monkeypatch.setattr(
        store_sketches, "_fold_share", lambda key: float(zlib.crc32(repr(key).encode()) % 2)
    )
    preds, outs = simulate(12, 60, seed=1)
    with running_service(engine) as svc:
        svc.put_model("m", model_body())
        half = len(preds) // 2
        post(svc, preds[:half], outs[: half // 2])
        evaluate(svc, T0 + timedelta(days=6))
        # Late arrivals: the rest of the outcomes of matured rows, new predictions,
        # backfilled predictions of matured days, and corrections.
        post(svc, preds[half:], outs[half // 2 :])
        evaluate(svc, T0 + timedelta(days=9))
        flipped = [dict(o, outcome=1 - o["outcome"]) for o in outs[:40]]
        post(svc, [], flipped, correction=True)
        evaluate(svc, T0 + timedelta(days=15, hours=7))
        incremental = stored(engine)
        # Later runs changed a few bins of stored buckets: written as patches.
        assert patch_rows(engine) > 0
        with engine.connect() as conn:
            model = get(conn=conn, name="m")
        assert model is not None
        assert rebuild_model(engine, model, now_us=0, slice_cap=50) > 0
        assert_same_sketches(incremental, stored(engine))


def test_replay_equals_live(engine: Engine, tmp_path) -> None:
    from plumbwatch.store.engine import create_engine
    from plumbwatch.store.migrate import upgrade

    preds, outs = simulate(10, 40, seed=2)
    days = [T0 + timedelta(days=d + 1) for d in range(10)]
    # Live: each day's rows arrive that day, then the day's evaluation runs.
    live_records = []
    with running_service(engine) as svc:
        svc.put_model("m", model_body())
        for day in days:
            todays = [
                p
                for p in preds
                if parse_instant(p["predicted_at"]) < day
                and parse_instant(p["predicted_at"]) >= day - timedelta(days=1)
            ]
            seen = [
                o for o in outs if day - timedelta(days=1) <= parse_instant(o["observed_at"]) < day
            ]
            post(svc, todays, seen)
            live_records.append(evaluate(svc, day))
    # Replay: everything first, then one evaluation per day through as_of.
    replay_url = f"sqlite:///{tmp_path / 'replay.db'}"
    replay_engine = create_engine(replay_url)
    upgrade(replay_engine)
    with running_service(replay_engine) as svc:
        svc.put_model("m", model_body())
        post(svc, preds, outs)
        replay_records = [evaluate(svc, day) for day in days]
    replay_engine.dispose()
    for live, replay in zip(live_records, replay_records, strict=True):
        a, b = windows_metrics(live), windows_metrics(replay)
        assert a.keys() == b.keys()
        for key in a:
            for name, value in a[key].items():
                if value is None or b[key][name] is None:
                    assert value == b[key][name], (key, name)
                else:
                    assert value == pytest.approx(b[key][name], rel=1e-9, abs=1e-12), (key, name)


def test_a_correction_changes_its_bucket_only(engine: Engine) -> None:
    preds, outs = simulate(6, 30, seed=3)
    with running_service(engine) as svc:
        svc.put_model("m", model_body())
        post(svc, preds, outs)
        evaluate(svc, T0 + timedelta(days=12))
        before = stored(engine)
        target = outs[5]
        post(svc, [], [dict(target, outcome=1 - target["outcome"])], correction=True)
        record = evaluate(svc, T0 + timedelta(days=12, hours=1))
        after = stored(engine)
    assert record["rows_applied"] == 1
    changed = {k for k in before if not before[k][3].allclose(after[k][3], rtol=0, atol=0)}
    row = preds[5]
    day = (parse_instant(row["predicted_at"]) - parse_instant("1970-01-01T00:00:00Z")).days
    seg = row["segments"]
    assert changed == {
        ("v1", day, "overall"),
        ("v1", day, f"region:{seg['region']}"),
        ("v1", day, f"tier:{seg['tier']}"),
        ("v1", day, f"region:{seg['region']},tier:{seg['tier']}"),
    }


def test_late_outcomes_are_counted_not_folded_in(engine: Engine) -> None:
    with running_service(engine) as svc:
        svc.put_model("m", model_body(windows=["P7D"]))
        rows = [
            {
                "id": f"r{i}",
                "predicted_at": "2026-05-02T10:00:00Z",
                "probability": 0.3,
                "segments": {"region": "north"},
            }
            for i in range(4)
        ]
        outs = [
            {"id": "r0", "outcome": 1, "observed_at": "2026-05-03T10:00:00Z"},
            {"id": "r1", "outcome": 0, "observed_at": "2026-05-05T10:00:00Z"},  # at horizon
            {"id": "r2", "outcome": 1, "observed_at": "2026-05-05T10:00:01Z"},
        ]  # late
        post(svc, rows, outs)
        record = evaluate(svc, parse_instant("2026-05-09T00:00:00Z"))
        overall = windows_metrics(record)[("P7D", "overall", None)]
        assert (overall["n"], overall["events"], overall["late"]) == (2, 1, 1)
        assert overall["label_coverage"] == pytest.approx(0.5)
        # missing_outcome = negative: the late and the missing row count as 0.
        svc.put_model("m", model_body(windows=["P7D"], missing_outcome="negative"))
        with engine.connect() as conn:
            model = get(conn=conn, name="m")
        assert model is not None
        rebuild_model(engine, model, now_us=0, slice_cap=50)
        record = evaluate(svc, parse_instant("2026-05-09T01:00:00Z"))
        overall = windows_metrics(record)[("P7D", "overall", None)]
        assert (overall["n"], overall["events"], overall["late"]) == (4, 1, 1)


def test_positives_labelled_first_do_not_bias_matured_windows(engine: Engine) -> None:
    # METHODS.md section 13: keeping only labelled rows of recent cohorts over-counts
    # events when positives are confirmed first; matured cohorts give O/E about 1.
    preds, outs = simulate(20, 150, seed=4, positives_first=True)
    as_of = T0 + timedelta(days=20)
    known = [o for o in outs if parse_instant(o["observed_at"]) <= as_of]
    with running_service(engine) as svc:
        svc.put_model("m", model_body())
        post(svc, preds, known)
        record = evaluate(svc, as_of)
    overall = windows_metrics(record)[("P14D", "overall", None)]
    assert overall["oe_ratio_low"] <= 1.0 <= overall["oe_ratio_high"]
    assert overall["label_coverage"] == 1.0
    immature = {e["slice"]: e for e in record["immature"]}
    assert set(immature["overall"]["metrics"]) == {
        "psi",
        "psi_threshold",
        "ks_statistic",
        "ks_p_value",
        "mean_predicted",
    }
    assert immature["overall"]["label_coverage"] < 0.5  # mostly negatives, not labelled yet
    assert immature["overall"]["n"] == 3 * 150


def test_edge_cases_give_states_not_errors(engine: Engine) -> None:
    with running_service(engine) as svc:
        svc.put_model("m", model_body())
        empty = evaluate(svc, T0)
        assert empty["health"] == "awaiting_labels"
        rows = [
            {"id": f"r{i}", "predicted_at": "2026-05-02T10:00:00Z", "probability": 0.3}
            for i in range(3)
        ]
        post(
            svc,
            rows,
            [
                {"id": f"r{i}", "outcome": 1, "observed_at": "2026-05-02T12:00:00Z"}
                for i in range(3)
            ],
        )
        record = evaluate(svc, parse_instant("2026-05-09T00:00:00Z"))
        overall = windows_metrics(record)[("P7D", "overall", None)]
        assert overall["n"] == 3 and overall["auroc"] is None
        slice_ = next(s for s in record["windows"][0]["slices"] if s["slice"] == "overall")
        assert slice_["reasons"]["auroc"] == "one_class_only"
        assert slice_["health"] == "insufficient_data"


def test_range_metrics_are_exact_at_any_bounds(engine: Engine) -> None:
    from sklearn.metrics import brier_score_loss, log_loss

    preds, outs = simulate(8, 80, seed=5)
    start, end = T0 + timedelta(days=1, hours=7, minutes=13), T0 + timedelta(days=5, hours=19)
    with running_service(engine) as svc:
        svc.put_model("m", model_body())
        post(svc, preds, outs)
        evaluate(svc, T0 + timedelta(days=12))
        r = svc.client.get(
            "/v1/models/m/metrics",
            headers=svc.headers("read"),
            params={
                "start": format_instant(start),
                "end": format_instant(end),
                "slice": "region:coast,tier:express",
            },
        )
        assert r.status_code == 200, r.text
        bad = svc.client.get(
            "/v1/models/m/metrics",
            headers=svc.headers("read"),
            params={"start": format_instant(end), "end": format_instant(start)},
        )
        assert bad.status_code == 422
    body = r.json()
    by_id = {o["id"]: o["outcome"] for o in outs}
    rows = [
        p
        for p in preds
        if start <= parse_instant(p["predicted_at"]) < end
        and p["segments"] == {"region": "coast", "tier": "express"}
    ]
    y = np.array([by_id[p["id"]] for p in rows])
    p = np.array([p["probability"] for p in rows])
    # scikit-learn on exactly the rows in range (every outcome is within the horizon).
    assert body["metrics"]["n"] == len(rows)
    assert body["metrics"]["log_loss"] == pytest.approx(log_loss(y, p, labels=[0, 1]), rel=1e-9)
    assert body["metrics"]["brier"] == pytest.approx(brier_score_loss(y, p), rel=1e-9)


def test_range_metrics_count_late_and_missing_outcomes_at_inner_bounds(engine: Engine) -> None:
    from sklearn.metrics import log_loss

    preds, outs = simulate(6, 60, seed=9)
    # Every 7th outcome comes after the horizon (late), every 11th never comes.
    for i, o in enumerate(outs):
        if i % 7 == 0:
            at = parse_instant(preds[i]["predicted_at"])
            o["observed_at"] = format_instant(at + timedelta(days=HORIZON_DAYS, hours=1))
    kept = [o for i, o in enumerate(outs) if i % 11]
    start, end = T0 + timedelta(days=1, hours=3), T0 + timedelta(days=3, hours=21)
    with running_service(engine) as svc:
        svc.put_model("m", model_body())
        post(svc, preds, kept)
        evaluate(svc, T0 + timedelta(days=12))
        r = svc.client.get(
            "/v1/models/m/metrics",
            headers=svc.headers("read"),
            params={"start": format_instant(start), "end": format_instant(end)},
        )
        assert r.status_code == 200, r.text
    metrics = r.json()["metrics"]
    in_range = [i for i, p in enumerate(preds) if start <= parse_instant(p["predicted_at"]) < end]
    late = [i for i in in_range if i % 7 == 0 and i % 11]
    on_time = [i for i in in_range if i % 7 and i % 11]
    # Hand count from the rules of DESIGN.md: late outcomes are counted, not folded
    # in; with missing_outcome = wait, unlabelled matured rows are left out.
    assert metrics["late"] == len(late)
    assert metrics["n"] == len(on_time)
    assert metrics["label_coverage"] == pytest.approx(len(on_time) / len(in_range))
    y = np.array([outs[i]["outcome"] for i in on_time])
    p = np.array([preds[i]["probability"] for i in on_time])
    # scikit-learn on exactly the on-time rows in range.
    assert metrics["log_loss"] == pytest.approx(log_loss(y, p, labels=[0, 1]), rel=1e-9)
