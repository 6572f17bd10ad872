"""GET /metrics parses as OpenMetrics and its values equal the status JSON."""

from __future__ import annotations

import math
from typing import Any

from prometheus_client.openmetrics.parser import text_string_to_metric_families

from plumbwatch.api.openmetrics import SLICE_METRICS
from plumbwatch.timefmt import parse_instant
from tests.web.seed import Seeded


def _families(text: str) -> dict[str, Any]:
    # prometheus_client's own OpenMetrics parser is the reference for the format.
    return {f.name: f for f in text_string_to_metric_families(text)}


def _samples(family: Any) -> dict[tuple[str, ...], float]:
    return {
        (s.labels["model"], s.labels["window"], s.labels["slice"], s.labels["version"]): s.value
        for s in family.samples
    }


def test_metrics_parse_and_equal_the_status_json(pages: Seeded) -> None:
    r = pages.get("/metrics")
    assert r.status_code == 200
    assert r.headers["content-type"].startswith("application/openmetrics-text")
    assert r.text.endswith("# EOF\n")
    families = _families(r.text)
    checked = 0
    for model in pages.model_ids:
        status = pages.get(f"/v1/models/{model}/status").json()
        for window in status["windows"]:
            for entry in window["slices"]:
                key = (model, window["window"], entry["slice"], entry["version"] or "")
                for name, suffix, _ in SLICE_METRICS:
                    family = families.get(f"plumbwatch_slice_{suffix}")
                    value = entry["metrics"].get(name)
                    found = _samples(family).get(key) if family else None
                    if isinstance(value, int | float) and math.isfinite(value):
                        assert found == float(value), (key, name)
                        checked += 1
                    else:
                        assert found is None, (key, name)  # null metrics have no sample
        as_of = families["plumbwatch_model_as_of_timestamp_seconds"]
        value = next(s.value for s in as_of.samples if s.labels["model"] == model)
        assert value == parse_instant(status["as_of"]).timestamp()
        health = families["plumbwatch_model_health"]
        states = {
            s.labels["plumbwatch_model_health"]: s.value
            for s in health.samples
            if s.labels["model"] == model
        }
        assert states[status["health"]] == 1 and sum(states.values()) == 1
    assert checked > 300


def test_slice_health_is_a_state_set(pages: Seeded) -> None:
    families = _families(pages.get("/metrics").text)
    health = families["plumbwatch_slice_health"]
    assert health.type == "stateset"
    overall = [
        s
        for s in health.samples
        if s.labels["model"] == "late-delivery" and s.labels["slice"] == "overall"
    ]
    assert sum(s.value for s in overall) == 2  # one state set per window


def test_cardinality_is_capped(pages: Seeded) -> None:
    app = pages.svc.client.app
    settings = app.state.settings  # type: ignore[attr-defined]
    old = settings.metrics_slice_cap
    settings.metrics_slice_cap = 3
    try:
        families = _families(pages.get("/metrics").text)
    finally:
        settings.metrics_slice_cap = old
    rows = _samples(families["plumbwatch_slice_rows"])
    late = [k for k in rows if k[0] == "late-delivery" and k[1] == "P7D"]
    assert len(late) == 3 and ("late-delivery", "P7D", "overall", "") in late
    exported = families["plumbwatch_model_slices_exported"]
    total = families["plumbwatch_model_slices"]
    pick = {"model": "late-delivery", "window": "P7D"}
    assert next(s.value for s in exported.samples if s.labels == pick) == 3
    assert next(s.value for s in total.samples if s.labels == pick) > 3


def test_service_counters(pages: Seeded) -> None:
    families = _families(pages.get("/metrics").text)
    accepted = {
        s.labels["kind"]: s.value
        for s in families["plumbwatch_rows_accepted"].samples
        if s.name.endswith("_total")
    }
    # The seed posted every prediction and outcome in 2xx batches through this app.
    assert accepted["predictions"] > 10_000 and accepted["outcomes"] > 5_000
    durations = families["plumbwatch_evaluation_duration_seconds"]
    counts = {s.labels["model"]: s.value for s in durations.samples if s.name.endswith("_count")}
    assert counts == {"late-delivery": 4, "damage-claim": 4, "route-outcome": 4}


def test_rejected_rows_are_counted(pages: Seeded) -> None:
    def rejected() -> tuple[float, float]:
        families = _families(pages.get("/metrics").text)
        rows = families["plumbwatch_rows_rejected"].samples
        batches = families["plumbwatch_batches_rejected"].samples
        pick = [
            next(
                s.value
                for s in f
                if s.labels["kind"] == "predictions" and s.name.endswith("_total")
            )
            for f in (rows, batches)
        ]
        return pick[0], pick[1]

    before = rejected()
    bad = {"predictions": [{"id": "x1", "probability": 2.0}, {"id": "x2", "probability": 0.5}]}
    assert (
        pages.svc.post("/v1/models/late-delivery/predictions", bad, who="ingest").status_code == 422
    )
    unparsable = pages.svc.client.post(
        "/v1/models/late-delivery/predictions", content=b"{", headers=pages.svc.headers("ingest")
    )
    assert unparsable.status_code == 422
    after = rejected()
    assert after[0] - before[0] == 2  # rows of the parsed batch
    assert after[1] - before[1] == 2  # both batches, the unparsable one too
