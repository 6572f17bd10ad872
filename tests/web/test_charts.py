"""The SVG chart module: well-formed, escaped, accessible, and honest about gaps."""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET

import pytest

from plumbwatch.web.chart import ident
from plumbwatch.web.figures import (
    coverage_chart,
    distribution_chart,
    recalibration_chart,
    trend_chart,
)
from plumbwatch.web.reliability import reliability_chart
from plumbwatch.web.svg import log_ticks, nice_range, nice_step

NS = "{http://www.w3.org/2000/svg}"
HOSTILE = '<script>alert(1)</script> & "quoted"'


def _svg(markup: str) -> ET.Element:
    return ET.fromstring(markup)  # raises on anything that is not well-formed XML


def _reliability_data() -> dict:
    bins = []
    for k in range(10):
        count = 0.0 if k == 9 else 100.0 + k
        rate = float("nan") if count == 0 else min(1.0, 0.1 * k + 0.07)
        bins.append(
            {
                "low": k / 10,
                "high": (k + 1) / 10,
                "count": count,
                "events": rate * count if count else 0.0,
                "mean_predicted": float("nan") if count == 0 else k / 10 + 0.05,
                "observed_rate": rate,
                "ci_low": rate - 0.05 if count else float("nan"),
                "ci_high": rate + 0.05 if count else float("nan"),
            }
        )
    xs = [i / 50 + 0.01 for i in range(50)]
    curve = {
        "forecast": xs,
        "fitted": [min(1.0, x + 0.03) for x in xs],
        "band_low": [max(0.0, x - 0.04) for x in xs],
        "band_high": [min(1.0, x + 0.04) for x in xs],
        "level": 0.9,
    }
    return {
        "n": 945,
        "events": 300,
        "upper": 1.0,
        "bins": bins,
        "curve": curve,
        "histogram": {
            "edges": [i / 20 for i in range(21)],
            "counts": [float(i) for i in range(20)],
        },
    }


@pytest.mark.parametrize(
    ("lo", "hi", "expected"),
    [(0.0, 1.0, [0.0, 0.2, 0.4, 0.6, 0.8, 1.0]), (0.48, 0.56, [0.48, 0.5, 0.52, 0.54, 0.56])],
)
def test_nice_ticks(lo: float, hi: float, expected: list[float]) -> None:
    # Heckbert's "nice numbers" (Graphics Gems, 1990): steps of 1, 2, 2.5 or 5 x 10^k.
    assert nice_range(lo, hi, 5)[2] == pytest.approx(expected)
    assert nice_step(1.0, 5) == 0.2


def test_log_ticks() -> None:
    assert log_ticks(0.3, 6.0) == pytest.approx([0.5, 1.0, 2.0, 5.0])


def test_reliability_chart_is_accessible_and_escapes_names() -> None:
    chart = reliability_chart(
        _reliability_data(), model="m", window="P7D", slice_name=f"region:{HOSTILE}"
    )
    assert chart.svg is not None
    root = _svg(str(chart.svg))
    assert root.get("role") == "img"
    title_id, desc_id = root.get("aria-labelledby", "").split()
    assert root.find(f"{NS}title").get("id") == title_id and HOSTILE in root.find(f"{NS}title").text
    assert root.find(f"{NS}desc").get("id") == desc_id
    assert "945 rows" in chart.summary and "9 of 10" in chart.summary
    assert "<script>" not in str(chart.svg)
    texts = [t.text for t in root.iter(f"{NS}text")]
    assert "observed event rate" in texts and "predicted probability" in texts and "rows" in texts
    assert chart.table is not None and len(chart.table.rows) == 10
    assert chart.table.rows[9][4] == "—"  # the empty bin says so instead of inventing a rate
    assert chart.ident == ident("reliability", "m", "P7D", f"region:{HOSTILE}")
    assert all(c.isalnum() or c == "-" for c in chart.ident)


def test_empty_and_missing_data_explain_themselves() -> None:
    assert reliability_chart(None, model="m", window="P7D", slice_name="overall").svg is None
    why = {"why": "drawn for binary models only"}
    assert (
        reliability_chart(why, model="m", window="P7D", slice_name="overall").summary == why["why"]
    )
    empty = trend_chart(
        key="t", title="Log loss", y_label="nats", series=[{"label": "P7D", "points": [(0, None)]}]
    )
    assert empty.svg is None and "No values" in empty.summary
    assert distribution_chart(None, model="m", slice_name="overall").svg is None
    assert coverage_chart([], model="m", horizon="P5D").svg is None
    assert recalibration_chart(None, model="m").svg is None


def test_trend_chart_handles_gaps_a_single_point_and_log_scale() -> None:
    day = 86400.0
    series = [
        {
            "label": "P7D",
            "points": [(0.0, 1.1), (day, None), (2 * day, 1.3)],
            "low": [0.9, None, 1.1],
            "high": [1.3, None, 1.5],
        },
        {"label": "P28D", "points": [(0.0, 1.0)], "low": [0.95], "high": [1.05]},
    ]
    chart = trend_chart(
        key="oe",
        title="O/E",
        y_label="O/E",
        series=series,
        log_scale=True,
        reference=1.0,
        reference_label="O/E = 1",
    )
    root = _svg(str(chart.svg))
    labels = [t.text for t in root.iter(f"{NS}text")]
    assert "P7D" in labels and "P28D" in labels and "O/E = 1" in labels
    assert chart.table is not None and len(chart.table.rows) == 3
    assert chart.table.rows[0][1:3] == ["1.300", "1.100–1.500"]
    assert chart.table.rows[1][1] == "—"  # the gap stays a gap
    single = trend_chart(
        key="one", title="t", y_label="y", series=[{"label": "a", "points": [(0.0, 2.0)]}]
    )
    assert single.svg is not None


def test_distribution_and_coverage_charts() -> None:
    edges = [i / 4 for i in range(5)]
    dist = distribution_chart(
        {
            "window": "P7D",
            "edges": edges,
            "current": [10, 30, 40, 20],
            "baseline": [25, 25, 25, 25],
            "baseline_start": "2026-01-01T00:00:00Z",
            "baseline_end": "2026-01-29T00:00:00Z",
            "metrics": {"psi": 0.1234},
        },
        model="m",
        slice_name="overall",
    )
    _svg(str(dist.svg))
    assert "PSI 0.123" in dist.summary and "20.0 %" in dist.summary  # half the L1 distance
    rows = [
        {
            "label": f"2026-05-{d:02d}",
            "tick": str(30 - d),
            "age_days": 30 - d,
            "age_text": str(30 - d),
            "rows": 100,
            "coverage": 0.9,
            "immature": False,
        }
        for d in range(1, 8)
    ]
    rows.append(
        {
            "label": "not matured yet",
            "tick": "young",
            "age_days": -1,
            "age_text": "under the horizon",
            "rows": 50,
            "coverage": 0.4,
            "immature": True,
        }
    )
    cov = coverage_chart(rows, model="m", horizon="P5D")
    _svg(str(cov.svg))
    assert "40.0 % labelled so far" in cov.summary
    assert cov.table is not None and cov.table.rows[0][0] == "not matured yet"


def test_recalibration_map() -> None:
    chart = recalibration_chart(
        {"method": "platt", "knots": [[0.1, 0.15], [0.5, 0.6], [0.9, 0.93]]}, model="m"
    )
    _svg(str(chart.svg))
    assert "becomes 0.60" in chart.summary and chart.table is not None


def test_coordinates_are_finite() -> None:
    chart = reliability_chart(_reliability_data(), model="m", window="P7D", slice_name="overall")
    for el in _svg(str(chart.svg)).iter():
        for name in ("x", "y", "x1", "x2", "y1", "y2", "cx", "cy", "width", "height"):
            if el.get(name) is not None:
                assert math.isfinite(float(el.get(name)))
