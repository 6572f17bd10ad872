"""The view model of ``/models/{model}`` from plain data gathered by the API."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from datetime import datetime
from typing import Any

from plumbwatch.web import fmt, palette
from plumbwatch.web.chart import Chart, ident
from plumbwatch.web.figures import (
    coverage_chart,
    distribution_chart,
    recalibration_chart,
    trend_chart,
)
from plumbwatch.web.reliability import reliability_chart
from plumbwatch.web.views import (
    Cell,
    alert_groups,
    cell,
    evidence_of,
    evidence_text,
    find_slice,
    first_window,
    health_view,
    key_metric_cells,
    model_url,
)

# Slice table: (key, heading, what the heading's tooltip says).
COLUMNS = (
    ("slice", "Slice", "segment key = value; crosses join with ·"),
    ("version", "Version", "blank: across versions"),
    ("health", "Health", "worst first when sorted"),
    ("n", "n", "matured, labelled rows"),
    ("events", "Events", "rows with outcome 1"),
    ("log_loss", "Log loss", "nats per row"),
    ("ece", "ECE", "equal-width, 10 bins"),
    ("oe_ratio", "O/E", "observed over expected events, 95 % interval beneath"),
    ("calibration_slope", "Slope", "calibration slope (1 is ideal)"),
    ("psi", "PSI", "score drift against the baseline"),
    ("evidence", "Evidence", "log e-value (nats) against its paging threshold"),
)


def _sort_value(row: Mapping[str, Any], key: str) -> tuple[int, Any]:
    if key == "slice":
        return (0, (row["slice"] != "overall", row["slice"]))
    if key == "version":
        return (0, row["version"] or "")
    if key == "health":
        return (0, (row["health_rank"], -(row["evidence"].value or 0.0), row["slice"]))
    c = row["evidence"] if key == "evidence" else row["cells"].get(key)
    v = c.value if c is not None else None
    return (0, v) if isinstance(v, int | float) else (1, 0)


def slice_rows(
    record: Mapping[str, Any], window: Mapping[str, Any], *, model: str
) -> list[dict[str, Any]]:
    rows = []
    for s in window.get("slices") or []:
        metrics = s.get("metrics") or {}
        name = s.get("slice") or ""
        ev = evidence_of(record, s)
        oe = cell(metrics, "oe_ratio")
        oe = Cell(
            oe.text,
            oe.value,
            fmt.interval(metrics.get("oe_ratio_low"), metrics.get("oe_ratio_high")),
        )
        signals = s.get("signals") or {}
        rows.append(
            {
                "slice": name,
                "label": fmt.slice_label(name),
                "url": model_url(model, slice=name, window=str(window.get("window") or "")),
                "version": s.get("version"),
                "health": health_view(s.get("health")),
                "health_rank": palette.health_rank(s.get("health")),
                "cells": {
                    "n": cell(metrics, "n"),
                    "events": cell(metrics, "events"),
                    "log_loss": cell(metrics, "log_loss", 4),
                    "ece": cell(metrics, "ece", 4),
                    "oe_ratio": oe,
                    "calibration_slope": cell(metrics, "calibration_slope"),
                    "psi": cell(metrics, "psi"),
                },
                "evidence": evidence_text(ev),
                "signals": [k for k in ("evidence", "material", "fdr") if signals.get(k)],
                "reasons": s.get("reasons") or {},
            }
        )
    return rows


def sort_rows(rows: list[dict[str, Any]], key: str, descending: bool) -> list[dict[str, Any]]:
    known = [k for k, *_ in COLUMNS]
    key = key if key in known else "health"
    present = [r for r in rows if _sort_value(r, key)[0] == 0]
    missing = [r for r in rows if _sort_value(r, key)[0] == 1]
    present.sort(key=lambda r: _sort_value(r, key)[1], reverse=descending)
    return present + missing  # blanks last either way


def _history_series(
    history: Sequence[Mapping[str, Any]],
    windows: Sequence[str],
    metric: str,
    *,
    interval: bool = False,
    threshold: bool = False,
) -> list[dict[str, Any]]:
    series = []
    for w in windows:
        pts, low, high, thr = [], [], [], []
        for h in history:
            when = fmt.parse_time(h.get("as_of"))
            if when is None:
                continue
            values = (h.get("windows") or {}).get(w) or {}
            pts.append((when.timestamp(), values.get(metric)))
            low.append(values.get(f"{metric}_low"))
            high.append(values.get(f"{metric}_high"))
            thr.append(values.get("log_threshold"))
        s: dict[str, Any] = {"label": w, "points": pts}
        if interval:
            s["low"], s["high"] = low, high
        if threshold:
            s["threshold"] = thr
        series.append(s)
    return series


def trend_charts(
    history: Sequence[Mapping[str, Any]], windows: Sequence[str], *, model: str, slice_name: str
) -> list[Chart]:
    label = fmt.slice_label(slice_name)
    specs: list[tuple[str, str, str, Callable[[], list[dict[str, Any]]], dict[str, Any]]] = [
        (
            "log_loss",
            f"Log loss, {label}",
            "log loss (nats per row)",
            lambda: _history_series(history, windows, "log_loss"),
            {"digits": 4},
        ),
        (
            "ece",
            f"ECE, {label}",
            "ECE (probability)",
            lambda: _history_series(history, windows, "ece"),
            {"digits": 4},
        ),
        (
            "oe_ratio",
            f"O/E with 95 % interval, {label}",
            "observed / expected (log scale)",
            lambda: _history_series(history, windows, "oe_ratio", interval=True),
            {"log_scale": True, "reference": 1.0, "reference_label": "O/E = 1"},
        ),
        (
            "log_evidence",
            f"Evidence of miscalibration, {label}",
            "log e-value (nats)",
            lambda: _history_series(history, windows, "log_evidence", threshold=True),
            {"reference": 0.0, "digits": 2},
        ),
    ]
    return [
        trend_chart(
            key=ident("trend", metric, model, slice_name),
            title=title,
            y_label=y_label,
            series=make(),
            **kw,
        )
        for metric, title, y_label, make, kw in specs
    ]


def _pair(values: Any) -> tuple[Any, Any]:
    items = [*(values or []), None, None]
    return items[0], items[1]


def advice_view(advice: Mapping[str, Any] | None) -> dict[str, Any] | None:
    if not advice:
        return None
    verdict = str(advice.get("verdict") or "no action")
    window = advice.get("window") or {}
    candidates = [
        {
            "method": c.get("method") or fmt.DASH,
            "gain": fmt.number(c.get("gain_log_loss"), 4),
            "interval": fmt.interval(*_pair(c.get("gain_interval")), 4),
        }
        for c in advice.get("candidates") or []
    ]
    slices = [
        {
            "slice": fmt.slice_label(s.get("slice")),
            "verdict": s.get("verdict") or fmt.DASH,
            "method": s.get("method") or fmt.DASH,
            "gain": fmt.number(s.get("gain_log_loss"), 4),
        }
        for s in advice.get("slices") or []
    ]
    gi = _pair(advice.get("gain_interval"))
    span = f"{fmt.day(window.get('start'))} to {fmt.day(window.get('end'))}"
    return {
        "verdict": verdict,
        "verdict_css": "verdict-" + verdict.replace(" ", "-"),
        "method": advice.get("method") or fmt.DASH,
        "window": f"{window.get('window', '')} ({span})" if window else fmt.DASH,
        "gain": fmt.number(advice.get("gain_log_loss"), 4),
        "gain_interval": fmt.interval(gi[0], gi[1], 4),
        "in_sample_gain": fmt.number(advice.get("in_sample_gain"), 4),
        "explanation": advice.get("explanation") or "",
        "auroc": fmt.number(advice.get("auroc")),
        "baseline_auroc": fmt.number(advice.get("baseline_auroc")),
        "candidates": candidates,
        "slices": slices,
    }


def immature_rows(record: Mapping[str, Any]) -> list[dict[str, Any]]:
    return [
        {
            "slice": fmt.slice_label(i.get("slice")),
            "range": f"{fmt.when(i.get('start'))} to {fmt.when(i.get('end'))}",
            "n": Cell(fmt.count(i.get("n")), i.get("n")),
            "label_coverage": Cell(fmt.percent(i.get("label_coverage")), i.get("label_coverage")),
            "psi": cell(i.get("metrics") or {}, "psi"),
            "mean_predicted": cell(i.get("metrics") or {}, "mean_predicted"),
        }
        for i in record.get("immature") or []
    ]


def coverage_rows(
    coverage: Sequence[Mapping[str, Any]], record: Mapping[str, Any], slice_name: str
) -> list[dict[str, Any]]:
    """Matured cohort days by age, then the cohorts not matured yet as one bar."""
    rows: list[dict[str, Any]] = [
        {
            "label": str(c.get("date") or c.get("day")),
            "tick": str(c.get("age_days")),
            "age_days": c.get("age_days") or 0,
            "age_text": str(c.get("age_days")),
            "rows": c.get("rows"),
            "coverage": c.get("coverage"),
            "immature": False,
        }
        for c in coverage
    ]
    young = next((i for i in record.get("immature") or [] if i.get("slice") == slice_name), None)
    if young is not None:
        rows.append(
            {
                "label": "not matured yet",
                "tick": "young",
                "age_days": -1,
                "age_text": "under the horizon",
                "rows": young.get("n"),
                "coverage": young.get("label_coverage"),
                "immature": True,
            }
        )
    return rows


def _selection(data: Mapping[str, Any]) -> tuple[dict[str, Any], list[str], str | None, str]:
    record = data.get("record") or {}
    windows = [w.get("window") for w in record.get("windows") or [] if w.get("window")]
    chosen = data.get("window")
    selected = chosen if chosen in windows else (windows[0] if windows else None)
    return record, windows, selected, data.get("slice") or "overall"


def charts(data: Mapping[str, Any]) -> dict[str, Any]:
    """Every chart of the page. They depend only on the evaluation and the slice, so
    the caller may keep them for later views of the same pair."""
    name = data["model"]["name"]
    record, windows, _, slice_name = _selection(data)
    return {
        "reliability": [
            reliability_chart(
                (data.get("reliability") or {}).get(w), model=name, window=w, slice_name=slice_name
            )
            for w in windows
        ],
        "trends": trend_charts(
            data.get("history") or [], windows, model=name, slice_name=slice_name
        ),
        "distribution": distribution_chart(
            data.get("distribution"), model=name, slice_name=slice_name
        ),
        "coverage": coverage_chart(
            coverage_rows(data.get("coverage") or [], record, slice_name),
            model=name,
            horizon=str(data["model"].get("label_horizon") or ""),
        ),
        "advice_chart": recalibration_chart(record.get("recalibration"), model=name),
    }


def model_page(data: Mapping[str, Any], *, now: datetime) -> dict[str, Any]:
    model = data["model"]
    name = model["name"]
    record, windows, selected_window, slice_name = _selection(data)
    drawn = data.get("charts") or charts(data)
    window = first_window(record, selected_window)
    baseline = data.get("baseline") or {}
    cards = []
    for w in record.get("windows") or []:
        entry = find_slice(w, slice_name)
        metrics = entry.get("metrics") or {}
        cards.append(
            {
                "window": w.get("window"),
                "range": f"{fmt.day(w.get('start'))} to {fmt.day(w.get('end'))}",
                "health": health_view(entry.get("health")) if entry else health_view(None),
                "n": fmt.count(metrics.get("n")),
                "events": fmt.count(metrics.get("events")),
                "label_coverage": fmt.percent(metrics.get("label_coverage")),
                "metrics": key_metric_cells(
                    metrics, baseline.get("metrics") if slice_name == "overall" else None
                ),
                "evidence": evidence_text(evidence_of(record, entry)) if entry else Cell(fmt.DASH),
                "present": bool(entry),
            }
        )
    rows = slice_rows(record, window, model=name) if window else []
    sort_key = data.get("sort") or "health"
    descending = data.get("dir") == "desc"
    rows = sort_rows(rows, sort_key, descending)
    headers = []
    for key, heading, hint in COLUMNS:
        active = key == sort_key
        next_dir = "asc" if active and descending else "desc" if active else "asc"
        headers.append(
            {
                "key": key,
                "heading": heading,
                "hint": hint,
                "url": model_url(
                    name,
                    slice=slice_name if slice_name != "overall" else "",
                    window=selected_window or "",
                    sort=key,
                    dir=next_dir,
                )
                + "#slices",
                "aria_sort": ("descending" if descending else "ascending") if active else "none",
                "numeric": key not in ("slice", "version", "health"),
            }
        )
    cap = record.get("slice_cap") or {}
    return {
        "name": name,
        "url": model_url(name),
        "description": model.get("description") or "",
        "kind": model.get("kind"),
        "label_horizon": model.get("label_horizon"),
        "missing_outcome": model.get("missing_outcome"),
        "version": model.get("version") or fmt.DASH,
        "has_record": bool(record),
        "health": health_view(record.get("health") if record else None),
        "as_of": fmt.when(record.get("as_of")),
        "evaluated": fmt.when(record.get("evaluated_at")),
        "evaluated_ago": fmt.ago(record.get("evaluated_at"), now),
        "windows": [
            {
                "name": w,
                "url": model_url(
                    name, slice=slice_name if slice_name != "overall" else "", window=w
                )
                + "#slices",
                "current": w == selected_window,
            }
            for w in windows
        ],
        "window": selected_window,
        "slice": slice_name,
        "slice_label": fmt.slice_label(slice_name),
        "overall_url": model_url(name, window=selected_window or ""),
        "cards": cards,
        "baseline": {
            "range": f"{fmt.day(baseline.get('start'))} to {fmt.day(baseline.get('end'))}",
            "version": baseline.get("version") or "",
        }
        if baseline.get("metrics")
        else None,
        "reliability": drawn["reliability"],
        "trends": drawn["trends"],
        "history_points": len(data.get("history") or []),
        "headers": headers,
        "rows": rows,
        "distribution": drawn["distribution"],
        "coverage": drawn["coverage"],
        "advice": advice_view(record.get("recalibration")),
        "advice_chart": drawn["advice_chart"],
        "immature": immature_rows(record),
        "alert_groups": alert_groups(data.get("alerts") or [], now=now),
        "capped_keys": list(cap.get("capped_keys") or []),
        "cap": cap.get("cap"),
        "raw_rows_from": fmt.when(record.get("raw_rows_from"))
        if record.get("raw_rows_from")
        else "",
    }
