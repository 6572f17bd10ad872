"""The model page from plain data: every field of the shared record contract shows,
and a record with fields absent, null or empty still renders."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import pytest

from plumbwatch.web import views
from plumbwatch.web.model_page import model_page, sort_rows
from plumbwatch.web.render import render
from tests.web.html_tree import parse

NOW = datetime(2026, 6, 1, 12, tzinfo=UTC)
PAYLOAD = '<script>window.__xss=1</script>"><img src=x onerror=alert(1)>'


def _entry(name: str, health: str, version: str | None = None, **metrics: Any) -> dict[str, Any]:
    base = {
        "n": 1200,
        "events": 300,
        "log_loss": 0.51,
        "ece": 0.02,
        "oe_ratio": 1.05,
        "oe_ratio_low": 0.95,
        "oe_ratio_high": 1.16,
        "calibration_slope": 0.97,
        "auroc": 0.74,
        "psi": 0.04,
        "label_coverage": 0.93,
        "log_evidence": 1.2,
        "log_threshold": 7.6,
    }
    base.update(metrics)
    return {
        "slice": name,
        "version": version,
        "health": health,
        "metrics": base,
        "reasons": {},
        "signals": {"evidence": health == "drifting", "material": health != "ok", "fdr": False},
    }


def full_record() -> dict[str, Any]:
    """Every field of the contract in helper-brief.md, filled."""
    slices = [
        _entry("overall", "watch"),
        _entry("region:north-coast", "drifting", ece=0.09, oe_ratio=1.6, log_evidence=11.3),
        _entry(f"region:{PAYLOAD.replace(':', '%3A').replace(',', '%2C')}", "ok", log_evidence=0.1),
        _entry("region:inland", "insufficient_data", n=40, events=3, log_loss=None, ece=None),
        _entry("overall", "watch", version=f"v2{PAYLOAD}"),
    ]
    return {
        "model": "late-delivery",
        "as_of": "2026-06-01T00:00:00Z",
        "evaluated_at": "2026-06-01T00:05:00Z",
        "health": "drifting",
        "windows": [
            {
                "window": "P7D",
                "start": "2026-05-20T00:00:00Z",
                "end": "2026-05-27T00:00:00Z",
                "slices": slices,
            }
        ],
        "immature": [
            {
                "slice": "overall",
                "start": "2026-05-27T00:00:00Z",
                "end": "2026-06-01T00:00:00Z",
                "n": 800,
                "label_coverage": 0.41,
                "metrics": {
                    "psi": 0.02,
                    "ks_statistic": 0.03,
                    "ks_p_value": 0.4,
                    "mean_predicted": 0.27,
                },
            }
        ],
        "evidence": [
            {
                "slice": "region:north-coast",
                "version": None,
                "log_evidence": 11.3,
                "log_threshold": 7.6,
                "n": 5000,
                "crossed": True,
                "started_at": "2026-05-01T00:00:00Z",
                "corrections": 2,
                "cusum": {"up": 5.1, "down": 0.0, "threshold": 4.0, "signalled": True},
            }
        ],
        "fdr": {"e_bh": {"discoveries": ["region:north-coast"]}},
        "baseline": {
            "v2": {
                "start": "2026-03-01T00:00:00Z",
                "end": "2026-03-29T00:00:00Z",
                "source": "first window",
                "metrics": {"log_loss": 0.49, "ece": 0.015, "oe_ratio": 1.0, "auroc": 0.76},
            }
        },
        "recalibration": {
            "method": "platt",
            "window": {
                "window": "P28D",
                "start": "2026-04-29T00:00:00Z",
                "end": "2026-05-27T00:00:00Z",
            },
            "gain_log_loss": 0.0123,
            "gain_interval": [0.008, 0.016],
            "in_sample_gain": 0.014,
            "knots": [[0.05, 0.07], [0.3, 0.38], [0.7, 0.74]],
            "verdict": "recalibrate",
            "explanation": f"Probabilities run low in one region {PAYLOAD}",
            "auroc": 0.74,
            "baseline_auroc": 0.76,
            "candidates": [
                {"method": "platt", "gain_log_loss": 0.0123, "gain_interval": [0.008, 0.016]},
                {"method": "isotonic", "gain_log_loss": 0.011},
            ],
            "slices": [
                {
                    "slice": "region:north-coast",
                    "verdict": "recalibrate",
                    "method": "beta",
                    "gain_log_loss": 0.05,
                }
            ],
        },
        "alerts": [{"id": 7, "rule": "calibration", "slice": "region:north-coast"}],
        "slice_cap": {"cap": 50, "capped_keys": ["depot"]},
        "rows_applied": 10,
        "raw_rows_from": None,
    }


def _render(data: dict[str, Any], can_act: bool = False) -> str:
    user = {
        "via": "cookie",
        "name": "me",
        "scope": "admin" if can_act else "read",
        "csrf": "token-123",
        "can_act": can_act,
    }
    return render(
        "model.html",
        title="m",
        nav="overview",
        user=user,
        v=model_page(data, now=NOW),
        shelve_choices=views.SHELVE_CHOICES,
    )


def _data(record: dict[str, Any] | None, **extra: Any) -> dict[str, Any]:
    return {
        "model": {
            "name": "late-delivery",
            "kind": "binary",
            "label_horizon": "P5D",
            "missing_outcome": "wait",
            "version": "v2",
            "description": PAYLOAD,
        },
        "record": record,
        **extra,
    }


def test_every_contract_field_shows() -> None:
    alert = {
        "id": 7,
        "model": "late-delivery",
        "rule": "calibration",
        "slice": "region:north-coast",
        "version": None,
        "window": "P7D",
        "state": "active",
        "severity": "critical",
        "raised_at": "2026-05-30T00:00:00Z",
        "since": "2026-05-29T00:00:00Z",
        "acknowledged_by": None,
        "shelved_until": None,
        "cleared_at": None,
        "values": {"ece": 0.09, "note": PAYLOAD},
    }
    record = full_record()
    html = _render(
        _data(
            record,
            alerts=[alert],
            baseline={
                "start": "2026-03-01T00:00:00Z",
                "end": "2026-03-29T00:00:00Z",
                "version": "v2",
                "metrics": record["baseline"]["v2"]["metrics"],
            },
        ),
        can_act=True,
    )
    root = parse(html)
    text = root.text
    assert "Recalibrate" in text and "best map: platt" in text and "0.0123" in text
    assert "0.0080–0.0160" in text and "0.740 / 0.760" in text
    assert "Probabilities run low in one region" in text
    assert "region = north-coast" in text and "drifting" in text
    # Evidence from the metrics, with its threshold; the change against the baseline.
    row = next(tr for tr in root.by("tr") if tr.attrs.get("data-slice") == "region:north-coast")
    ev = next(td for td in row.walk() if td.attrs.get("data-metric") == "log_evidence")
    assert ev.attrs["data-value"] == "11.3" and "threshold 7.60" in ev.text
    assert "+0.0200" in text  # log loss 0.51 against 0.49 at the baseline
    assert "Keys depot reached the cap of 50" in text
    assert root.by("form", action="/alerts/7/acknowledge") and root.by(
        "input", name="csrf", value="token-123"
    )
    assert "41.0 %" in text  # immature cohorts' label coverage
    # User text stays text.
    assert "<script>window.__xss" not in html and "<img src=x" not in html
    assert [n.attrs.get("src") for n in root.by("script")] == ["/static/sort.js"]
    assert not [a for n in root.walk() for a in n.attrs if a.startswith("on")]


@pytest.mark.parametrize(
    "record",
    [
        None,
        {"model": "late-delivery"},
        {
            "model": "late-delivery",
            "health": None,
            "windows": [],
            "evidence": None,
            "recalibration": None,
            "alerts": None,
            "immature": None,
            "baseline": None,
            "slice_cap": None,
        },
        {
            "model": "late-delivery",
            "health": "mystery",
            "windows": [
                {
                    "window": "P7D",
                    "slices": [
                        {"slice": "overall"},
                        {"slice": "region:x", "metrics": None, "health": None},
                    ],
                }
            ],
        },
    ],
)
def test_sparse_records_still_render(record: dict[str, Any] | None) -> None:
    html = _render(_data(record, history=[], coverage=[], reliability={}, distribution=None))
    assert "late-delivery" in html and "Cautions." in html


def test_sorting_keeps_blanks_last() -> None:
    record = full_record()
    rows = model_page(_data(record), now=NOW)["rows"]
    by_ece = sort_rows(rows, "ece", descending=True)
    assert [r["cells"]["ece"].value for r in by_ece][-1] is None
    assert by_ece[0]["slice"] == "region:north-coast"
    by_health = sort_rows(rows, "health", descending=False)
    assert by_health[0]["health"]["state"] == "drifting"
    assert sort_rows(rows, "no-such-column", descending=False)[0]["health"]["state"] == "drifting"


def test_overview_lists_the_slices_that_need_attention() -> None:
    view = views.overview(
        [
            {
                "name": "late-delivery",
                "record": full_record(),
                "active_alerts": [{"rule": "calibration"}],
            }
        ],
        now=NOW,
    )
    row = view["rows"][0]
    assert [a["slice"] for a in row["attention"]["items"]][:2] == ["region:north-coast", "overall"]
    assert row["alerts"] == 1 and row["alert_rules"] == ["calibration"]
    html = render(
        "overview.html",
        title="Models",
        nav="overview",
        user={"via": "public", "name": "", "scope": "public", "csrf": "", "can_act": False},
        view=view,
    )
    assert "drifting" in parse(html).text


def test_evidence_comes_from_the_metrics_or_the_records_streams() -> None:
    entry = {"slice": "region:x", "version": None, "metrics": {}}
    one_stream = {
        "evidence": [
            {
                "slice": "region:x",
                "version": "v3",
                "log_evidence": 4.0,
                "log_threshold": 8.0,
                "started_at": "2026-05-01T00:00:00Z",
            }
        ]
    }
    assert views.evidence_of(one_stream, entry)["log_evidence"] == 4.0
    two_streams = {
        "evidence": [*one_stream["evidence"], {**one_stream["evidence"][0], "version": "v4"}]
    }
    assert views.evidence_of(two_streams, entry)["log_evidence"] is None  # which one? neither
    with_metrics = {**entry, "metrics": {"log_evidence": 1.5, "log_threshold": 8.0}}
    assert views.evidence_of(one_stream, with_metrics)["log_evidence"] == 1.5
