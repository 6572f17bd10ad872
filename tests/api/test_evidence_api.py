"""Evidence reset and recalibration advice over HTTP: scopes, errors, shapes."""

from __future__ import annotations

from datetime import timedelta

import numpy as np
from scipy.special import expit, logit

from plumbwatch.timefmt import format_instant, parse_instant
from tests.factories import Service, binary_model

T0 = parse_instant("2026-05-01T00:00:00Z")


def load(service: Service, *, days: int = 14, per_day: int = 300) -> None:
    """A model miscalibrated from the start (true odds lower than predicted)."""
    service.put_model("late", binary_model(label_horizon="P2D", windows=["P7D"]))
    rng = np.random.default_rng(31)
    preds, outs = [], []
    for d in range(days):
        p = np.clip(rng.beta(2, 5, per_day), 1e-3, 1 - 1e-3)
        y = rng.random(per_day) < expit(-0.5 + 0.8 * logit(p))
        for i in range(per_day):
            at = T0 + timedelta(days=d, minutes=int(i * 4))
            preds.append(
                {
                    "id": f"{d}-{i}",
                    "predicted_at": format_instant(at),
                    "probability": float(p[i]),
                    "segments": {"region": ["coast", "inland"][i % 2], "tier": "express"},
                }
            )
            outs.append(
                {
                    "id": f"{d}-{i}",
                    "outcome": int(y[i]),
                    "observed_at": format_instant(at + timedelta(hours=6)),
                }
            )
    for k in range(0, len(preds), 2000):
        assert service.post("/v1/models/late/predictions", {"predictions": preds[k : k + 2000]})
        assert service.post("/v1/models/late/outcomes", {"outcomes": outs[k : k + 2000]})


def evaluate(service: Service, days: float) -> dict:
    r = service.post(
        "/v1/models/late/evaluations", {"as_of": format_instant(T0 + timedelta(days=days))}
    )
    assert r.status_code == 200, r.text
    return r.json()


def test_recalibration_advice_is_served(service: Service) -> None:
    r = service.client.get("/v1/models/late/recalibration", headers=service.headers("read"))
    assert r.status_code == 404 and r.json()["error"]["code"] == "not_found"
    load(service)
    r = service.client.get("/v1/models/late/recalibration", headers=service.headers("read"))
    assert r.status_code == 404  # not evaluated yet
    record = evaluate(service, 16)
    r = service.client.get("/v1/models/late/recalibration", headers=service.headers("read"))
    assert r.status_code == 200, r.text
    advice = r.json()
    assert advice == record["recalibration"]
    assert advice["verdict"] == "recalibrate", advice["explanation"]
    assert advice["slice"] == "overall" and advice["version"] == "unversioned"
    assert advice["window"] == {
        "window": "P7D",
        "start": "2026-05-08T00:00:00Z",
        "end": "2026-05-15T00:00:00Z",
    }
    assert {c["method"] for c in advice["candidates"]} == {"platt", "beta", "isotonic"}
    knots = np.array(advice["knots"])
    assert knots.shape[1] == 2 and (np.diff(knots[:, 0]) > 0).all()
    assert (np.diff(knots[:, 1]) >= 0).all()  # every map here is monotone
    assert {s["slice"] for s in advice["slices"]} >= {"region:coast", "region:inland"}
    forbidden = service.client.get(
        "/v1/models/late/recalibration", headers=service.headers("ingest")
    )
    assert forbidden.status_code == 403


def test_reset_restarts_the_streams(service: Service) -> None:
    load(service, days=8, per_day=100)
    before = {e["slice"]: e for e in evaluate(service, 9)["evidence"]}
    assert before["overall"]["n"] > 0
    url = "/v1/models/late/evidence/reset"
    assert service.client.post(url, json={"reason": "x"}).status_code == 401
    assert service.post(url, {"reason": "x"}, who="read").status_code == 403
    assert service.post("/v1/models/nope/evidence/reset", {"reason": "x"}).status_code == 404
    for bad in ({}, {"reason": "  "}, {"reason": 3}, {"reason": "x", "more": 1}, []):
        r = service.post(url, bad)
        assert r.status_code == 422, bad
        assert r.json()["error"]["code"] == "invalid"
    r = service.post(url, {"reason": "applied the Platt map of 2026-05-10"})
    assert r.status_code == 200, r.text
    assert r.json() == {
        "model": "late",
        "reset_at": "2026-06-01T12:00:00Z",
        "reason": "applied the Platt map of 2026-05-10",
        "by": "t-admin",
        "streams_reset": len(before),
    }
    after = {e["slice"]: e for e in evaluate(service, 10)["evidence"]}
    # One more day reached the frontier: the new streams hold that day alone.
    assert after["overall"]["n"] == 100
    assert after["overall"]["started_at"] == "2026-05-11T00:00:00Z"
    assert after["overall"]["corrections"] == 0
