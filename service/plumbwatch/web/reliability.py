"""The reliability diagram: binned rates with intervals, the CORP curve with its
consistency band, and a histogram of the forecasts beneath, on one x axis."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from plumbwatch.web import fmt, palette
from plumbwatch.web.chart import Chart, Table, empty, finite, ident, thin
from plumbwatch.web.svg import Canvas, Frame, Linear, axes, legend, marker, nice_range, tick_label

WIDTH, MAIN, HIST = 460, 330, 80
LEFT, RIGHT, TOP = 60, 14, 34


def _floats(values: Sequence[Any]) -> list[float]:
    return [float(v) if finite(v) else float("nan") for v in values]


def _band(curve: Mapping[str, Any], x: Linear, y: Linear) -> list[tuple[float, float]]:
    """The band as one polygon, at most one column per pixel (the outer limits)."""
    columns: dict[int, list[float]] = {}
    for f, lo, hi in zip(
        _floats(curve["forecast"]),
        _floats(curve["band_low"]),
        _floats(curve["band_high"]),
        strict=True,
    ):
        if not (finite(f) and finite(lo) and finite(hi)):
            continue
        px = round(x.clamp(f))
        col = columns.setdefault(px, [hi, lo])
        col[0], col[1] = max(col[0], hi), min(col[1], lo)
    keys = sorted(columns)
    upper = [(float(k), y.clamp(columns[k][0])) for k in keys]
    lower = [(float(k), y.clamp(columns[k][1])) for k in reversed(keys)]
    return upper + lower


def _steps(curve: Mapping[str, Any], x: Linear, y: Linear) -> list[tuple[float, float]]:
    """The PAV fit as a step function through the forecasts, vertices only where it moves."""
    pts: list[tuple[float, float]] = []
    last = None
    for f, q in zip(_floats(curve["forecast"]), _floats(curve["fitted"]), strict=True):
        if not (finite(f) and finite(q)):
            continue
        px, py = x.clamp(f), y.clamp(q)
        if last is not None and abs(py - last) > 0.05:
            pts.append((px, last))
        if last is None or abs(py - last) > 0.05:
            pts.append((px, py))
        last = py
    if pts and last is not None:
        final = x.clamp(_floats(curve["forecast"])[-1])
        if final > pts[-1][0]:
            pts.append((final, last))
    return [(a, b) for a, b in thin(pts, 600)]


def _outside_band(curve: Mapping[str, Any]) -> tuple[int, int]:
    inside = outside = 0
    for q, lo, hi in zip(
        _floats(curve["fitted"]),
        _floats(curve["band_low"]),
        _floats(curve["band_high"]),
        strict=True,
    ):
        if finite(q) and finite(lo) and finite(hi):
            if lo - 1e-12 <= q <= hi + 1e-12:
                inside += 1
            else:
                outside += 1
    return outside, inside + outside


def reliability_chart(
    data: Mapping[str, Any] | None, *, model: str, window: str, slice_name: str
) -> Chart:
    key = ident("reliability", model, window, slice_name)
    title = f"Reliability, {fmt.slice_label(slice_name)}, window {window}"
    if not data or not data.get("bins"):
        why = (data or {}).get("why") or "No matured, labelled rows in this window yet."
        return empty(key, title, why)
    bins = [b for b in data["bins"]]
    upper = float(data.get("upper") or 1.0)
    curve = data.get("curve")
    tops = [upper] + [
        float(b["ci_high"])
        for b in bins
        if finite(b.get("ci_high")) and b["mean_predicted"] <= upper
    ]
    y_hi = min(1.0, nice_range(0.0, max(tops), 5)[1])
    x_lo, x_hi, x_ticks = nice_range(0.0, upper, 5)
    _, y_hi, y_ticks = nice_range(0.0, y_hi, 5)
    f = Frame(LEFT, TOP, WIDTH - RIGHT, TOP + MAIN)
    h = Frame(LEFT, f.bottom + 44, WIDTH - RIGHT, f.bottom + 44 + HIST)
    x = Linear(x_lo, x_hi, f.left, f.right)
    y = Linear(0.0, y_hi, f.bottom, f.top)

    n, events = data.get("n"), data.get("events")
    filled = [b for b in bins if b["count"] > 0]
    worst = max(
        filled,
        key=lambda b: abs(b["observed_rate"] - b["mean_predicted"]) * b["count"],
        default=None,
    )
    summary = [
        f"Reliability diagram of slice {fmt.slice_label(slice_name)} over window {window}: "
        f"{fmt.count(n)} rows, {fmt.count(events)} events, in {len(filled)} of {len(bins)} "
        "equal-width bins."
    ]
    if worst is not None:
        summary.append(
            f"The bin contributing most to the ECE is {fmt.number(worst['low'], 1)}–"
            f"{fmt.number(worst['high'], 1)}: observed {fmt.number(worst['observed_rate'])} "
            f"against {fmt.number(worst['mean_predicted'])} predicted "
            f"({fmt.count(worst['count'])} rows)."
        )
    if curve and curve.get("forecast"):
        outside, total = _outside_band(curve)
        summary.append(
            f"The CORP curve leaves its {fmt.percent(curve.get('level'), 0)} consistency band "
            f"at {outside} of {total} forecast values."
        )
    c = Canvas(WIDTH, int(h.bottom + 40), key, title, " ".join(summary))
    step = x_ticks[1] - x_ticks[0] if len(x_ticks) > 1 else None
    ystep = y_ticks[1] - y_ticks[0] if len(y_ticks) > 1 else None
    axes(
        c,
        f,
        x_ticks=[(x(t), tick_label(t, step)) for t in x_ticks],
        y_ticks=[(y(t), tick_label(t, ystep)) for t in y_ticks],
        x_label="",
        y_label="observed event rate",
    )
    if curve and curve.get("forecast"):
        c.polygon(_band(curve, x, y), palette.BAND, opacity=0.8)
    diag_end = min(x_hi, y_hi)
    c.line(x(0), y(0), x(diag_end), y(diag_end), colour=palette.DIAGONAL, dash="4 4")
    if curve and curve.get("forecast"):
        c.polyline(_steps(curve, x, y), palette.SERIES[0], width=2)
    for b in filled:
        if b["mean_predicted"] > x_hi:
            continue
        px = x(b["mean_predicted"])
        if finite(b.get("ci_low")) and finite(b.get("ci_high")):
            lo, hi = y.clamp(b["ci_low"]), y.clamp(b["ci_high"])
            c.line(px, lo, px, hi, colour=palette.SERIES[1], width=1.5)
            c.line(px - 4, lo, px + 4, lo, colour=palette.SERIES[1], width=1.5)
            c.line(px - 4, hi, px + 4, hi, colour=palette.SERIES[1], width=1.5)
        c.add(marker("square", px, y.clamp(b["observed_rate"]), palette.SERIES[1], size=4))
    level = fmt.percent(curve.get("level"), 0) if curve else ""
    items = [("CORP curve", palette.SERIES[0], "", "")]
    items.append(("binned rate, 95 % interval", palette.SERIES[1], "", "square"))
    items.append(("calibrated", palette.DIAGONAL, "4 4", ""))
    legend(c, f.left, 14, items)
    if curve:
        c.rect(f.left + 2, f.top + 6, 14, 10, palette.BAND)
        c.text(f.left + 20, f.top + 15, f"{level} consistency band", size=11, colour=palette.INK)

    hist = data.get("histogram") or {}
    counts = _floats(hist.get("counts") or [])
    edges = _floats(hist.get("edges") or [])
    if counts and len(edges) == len(counts) + 1:
        top = max(counts) or 1.0
        _, top, h_ticks = nice_range(0.0, top, 2)
        hy = Linear(0.0, top, h.bottom, h.top)
        hstep = h_ticks[1] - h_ticks[0] if len(h_ticks) > 1 else None
        axes(
            c,
            h,
            x_ticks=[(x(t), tick_label(t, step)) for t in x_ticks],
            y_ticks=[
                (hy(t), fmt.count(t) if hstep and hstep >= 1 else tick_label(t, hstep))
                for t in h_ticks
            ],
            x_label="predicted probability",
            y_label="",
        )
        c.text(12, (h.top + h.bottom) / 2, "rows", anchor="middle", colour=palette.INK, rotate=True)
        for k, count in enumerate(counts):
            if count > 0 and edges[k] < x_hi:
                x0, x1 = x.clamp(edges[k]), x.clamp(edges[k + 1])
                c.rect(
                    x0 + 0.5,
                    hy(count),
                    x1 - x0 - 1,
                    h.bottom - hy(count),
                    palette.SERIES[0],
                    label=(
                        f"{fmt.number(edges[k], 2)}–{fmt.number(edges[k + 1], 2)}: "
                        f"{fmt.count(count)} rows"
                    ),
                )
    table = Table(
        caption=f"Equal-width bins behind the diagram ({fmt.slice_label(slice_name)}, {window})",
        columns=(
            "predicted range",
            "rows",
            "events",
            "mean predicted",
            "observed rate",
            "95 % interval",
        ),
        rows=[
            (
                f"{fmt.number(b['low'], 1)}–{fmt.number(b['high'], 1)}",
                fmt.count(b["count"]),
                fmt.count(b["events"]),
                fmt.number(b["mean_predicted"]),
                fmt.number(b["observed_rate"]),
                fmt.interval(b.get("ci_low"), b.get("ci_high"), 3),
            )
            for b in bins
        ],
    )
    notes = []
    if upper < 1.0:
        notes.append(
            f"Axes zoomed to 0–{fmt.number(x_hi, 2)}, where 99.5 % of the forecasts lie; "
            "the table lists every bin."
        )
    return Chart(key, title, " ".join(summary), c.render(), table, tuple(notes))
