"""A seeded service for the page tests: three models of the fictional parcel courier,
posted and evaluated through the real API, with hand-built alerts.

One region value is a script tag and another an attribute-breaking payload: the
pages must show both as text.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import timedelta
from typing import Any

import numpy as np
import pytest
from sqlalchemy.engine import Engine

from plumbwatch.api import alerts_source
from plumbwatch.store import models as store_models
from plumbwatch.timefmt import format_instant, parse_instant
from tests.factories import NOW, Service, running_service

XSS_SCRIPT = "<script>window.__xss = 1</script>"
XSS_ATTRIBUTE = '"><img src=x onerror="window.__xss = 2">'
REGIONS = ("north-coast", "inland", XSS_SCRIPT, XSS_ATTRIBUTE)
START = parse_instant("2026-03-25T00:00:00Z")
DAYS = 66  # up to 2026-05-30, before NOW (2026-06-01T12:00Z)
AS_OFS = ("2026-05-12T00:00:00Z", "2026-05-18T00:00:00Z", "2026-05-24T00:00:00Z", NOW)


@dataclass
class Seeded:
    svc: Service
    model_ids: dict[str, int]
    alerts: list[dict[str, Any]] = field(default_factory=list)

    def get(self, path: str, who: str = "read", **kw: Any) -> Any:
        return self.svc.client.get(path, headers=self.svc.headers(who), **kw)


def _post(svc: Service, model: str, kind: str, rows: list[dict[str, Any]]) -> None:
    for start in range(0, len(rows), 5000):
        r = svc.post(f"/v1/models/{model}/{kind}", {kind: rows[start : start + 5000]})
        assert r.status_code == 200, r.text


def _binary(
    svc: Service,
    model: str,
    *,
    per_day: int,
    segments: dict[str, tuple[str, ...]],
    seed: int,
    drift_key: tuple[str, str] | None = None,
    label_rate: float = 0.9,
) -> None:
    rng = np.random.default_rng(seed)
    preds, outs = [], []
    for day in range(DAYS):
        for j in range(per_day):
            at = START + timedelta(days=day, minutes=int(rng.integers(0, 1440)))
            p = float(rng.beta(2, 6))
            seg = {k: str(rng.choice(v)) for k, v in segments.items()}
            rate = p
            if drift_key and seg.get(drift_key[0]) == drift_key[1] and day >= 40:
                rate = min(1.0, p * 1.8)  # the storm season: lateness rises in one region
            rid = f"{model}-{day}-{j}"
            preds.append(
                {
                    "id": rid,
                    "predicted_at": format_instant(at),
                    "probability": round(p, 6),
                    "version": "v1" if day < 30 else "v2",
                    "segments": seg,
                }
            )
            if rng.random() < label_rate:
                delay = timedelta(hours=int(rng.integers(2, 90)))
                outs.append(
                    {
                        "id": rid,
                        "outcome": int(rng.random() < rate),
                        "observed_at": format_instant(min(at + delay, parse_instant(NOW))),
                    }
                )
    _post(svc, model, "predictions", preds)
    _post(svc, model, "outcomes", outs)


def _multiclass(svc: Service, model: str, seed: int) -> None:
    rng = np.random.default_rng(seed)
    classes = ("on_time", "late", "lost")
    preds, outs = [], []
    for day in range(DAYS - 30, DAYS):
        for j in range(40):
            at = START + timedelta(days=day, hours=int(rng.integers(0, 24)))
            probs = rng.dirichlet([6, 2, 0.5])
            rid = f"{model}-{day}-{j}"
            preds.append(
                {
                    "id": rid,
                    "predicted_at": format_instant(at),
                    "probabilities": {c: float(v) for c, v in zip(classes, probs, strict=True)},
                    "version": "v1",
                    "segments": {"region": str(rng.choice(REGIONS[:2]))},
                }
            )
            outs.append(
                {
                    "id": rid,
                    "outcome": str(rng.choice(classes, p=probs)),
                    "observed_at": format_instant(at + timedelta(days=2)),
                }
            )
    _post(svc, model, "predictions", preds)
    _post(svc, model, "outcomes", outs)


def hand_built_alerts() -> list[dict[str, Any]]:
    base = {
        "version": None,
        "window": "P7D",
        "acknowledged_by": None,
        "shelved_until": None,
        "cleared_at": None,
        "values": {"ece": 0.061, "log_evidence": 9.8},
    }
    return [
        {
            **base,
            "id": 1,
            "model": "late-delivery",
            "rule": "calibration",
            "slice": "region:north-coast",
            "state": "active",
            "severity": "critical",
            "raised_at": "2026-05-24T00:00:00Z",
            "since": "2026-05-23T00:00:00Z",
        },
        {
            **base,
            "id": 2,
            "model": "late-delivery",
            "rule": "calibration",
            "slice": "region:" + XSS_SCRIPT.replace(":", "%3A").replace(",", "%2C"),
            "state": "acknowledged",
            "severity": "warning",
            "raised_at": "2026-05-20T00:00:00Z",
            "since": "2026-05-20T00:00:00Z",
            "acknowledged_by": "t-admin",
        },
        {
            **base,
            "id": 3,
            "model": "damage-claim",
            "rule": "score_drift",
            "slice": "overall",
            "state": "shelved",
            "severity": "warning",
            "raised_at": "2026-05-18T00:00:00Z",
            "since": "2026-05-18T00:00:00Z",
            "shelved_until": "2026-06-02T00:00:00Z",
        },
        {
            **base,
            "id": 4,
            "model": "damage-claim",
            "rule": "calibration",
            "slice": "depot:west",
            "state": "cleared",
            "severity": "critical",
            "raised_at": "2026-05-10T00:00:00Z",
            "since": "2026-05-10T00:00:00Z",
            "cleared_at": "2026-05-16T00:00:00Z",
        },
    ]


def fake_list_alerts(seeded: Seeded):  # type: ignore[no-untyped-def]
    names = {v: k for k, v in seeded.model_ids.items()}

    def list_alerts(conn, *, state=None, model_id=None, limit=100, after_id=None):  # type: ignore[no-untyped-def]
        out = [
            a
            for a in seeded.alerts
            if (state is None or a["state"] == state)
            and (model_id is None or a["model"] == names.get(model_id))
            and (after_id is None or a["id"] > after_id)
        ]
        return sorted(out, key=lambda a: a["id"])[:limit]

    return list_alerts


@contextmanager
def seeded_service(engine: Engine, **settings: Any) -> Iterator[Seeded]:
    settings.setdefault("min_events", 20)
    with running_service(engine, **settings) as svc:
        svc.put_model(
            "late-delivery",
            {
                "kind": "binary",
                "label_horizon": "P5D",
                "segment_keys": ["region", "tier"],
                "crosses": [["region", "tier"]],
                "windows": ["P7D", "P28D"],
                "description": "Chance a parcel arrives late <em>(not bold)</em>",
            },
        )
        svc.put_model(
            "damage-claim",
            {
                "kind": "binary",
                "label_horizon": "P10D",
                "missing_outcome": "negative",
                "segment_keys": ["depot"],
                "windows": ["P14D"],
                "description": "Chance of a damage claim within 10 days",
            },
        )
        svc.put_model(
            "route-outcome",
            {
                "kind": "multiclass",
                "classes": ["on_time", "late", "lost"],
                "label_horizon": "P3D",
                "segment_keys": ["region"],
                "windows": ["P7D"],
            },
        )
        _binary(
            svc,
            "late-delivery",
            per_day=160,
            seed=1,
            segments={"region": REGIONS, "tier": ("express", "standard")},
            drift_key=("region", "north-coast"),
        )
        _binary(
            svc,
            "damage-claim",
            per_day=60,
            seed=2,
            segments={"depot": ("east", "west", "south")},
            label_rate=0.3,
        )
        _multiclass(svc, "route-outcome", seed=3)
        for as_of in AS_OFS:
            for model in ("late-delivery", "damage-claim", "route-outcome"):
                r = svc.post(f"/v1/models/{model}/evaluations", {"as_of": as_of})
                assert r.status_code == 200, r.text
        with engine.connect() as conn:
            ids = {m.name: m.id for m in store_models.list_models(conn=conn)}
        yield Seeded(svc, ids, hand_built_alerts())


def patch_alerts(monkeypatch: pytest.MonkeyPatch, seeded: Seeded) -> None:
    """Serve the hand-built alerts through the pages' alert seam."""
    monkeypatch.setattr(alerts_source, "list_alerts", fake_list_alerts(seeded))
