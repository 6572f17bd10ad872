"""Trend lines over the evaluation history, the score distribution against the
baseline, label coverage by cohort age, and the recalibration map."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime, timedelta
from typing import Any

from plumbwatch.web import fmt, palette
from plumbwatch.web.chart import Chart, Table, empty, finite, ident, thin
from plumbwatch.web.svg import (
    Canvas,
    Frame,
    Linear,
    Log,
    axes,
    legend,
    log_ticks,
    marker,
    nice_range,
    tick_label,
)

WIDTH, HEIGHT = 460, 250


def _time_ticks(t0: float, t1: float) -> list[tuple[float, str]]:
    """Day-aligned ticks (epoch seconds) for a span, labelled month-day."""
    days = max((t1 - t0) / 86400, 1e-9)
    step = next((s for s in (1, 2, 7, 14, 30, 60, 90) if days / s <= 6), 180)
    start = datetime.fromtimestamp(t0, UTC).replace(hour=0, minute=0, second=0, microsecond=0)
    out = []
    t = start
    while t.timestamp() <= t1:
        if t.timestamp() >= t0:
            out.append((t.timestamp(), t.strftime("%m-%d")))
        t += timedelta(days=step)
    if not out:
        out.append((t0, datetime.fromtimestamp(t0, UTC).strftime("%m-%d %H:%M")))
    return out


def trend_chart(
    *,
    key: str,
    title: str,
    y_label: str,
    series: Sequence[Mapping[str, Any]],
    log_scale: bool = False,
    reference: float | None = None,
    reference_label: str = "",
    digits: int = 3,
) -> Chart:
    """Series of ``{"label", "points": [(epoch_s, y)], "low": [..], "high": [..],
    "threshold": [..]}``; ``low``/``high`` draw an interval band, ``threshold`` a
    dotted line in the series' colour."""
    drawn = [s for s in series if any(finite(y) for _, y in s["points"])]
    if not drawn:
        return empty(key, title, f"No values of {y_label} in the evaluation history yet.")
    xs = [t for s in drawn for t, y in s["points"] if finite(y)]
    ys = [y for s in drawn for _, y in s["points"] if finite(y)]
    for s in drawn:
        ys += [v for v in list(s.get("low") or []) + list(s.get("high") or []) if finite(v)]
        ys += [v for v in s.get("threshold") or [] if finite(v)]
    if reference is not None:
        ys.append(reference)
    t0, t1 = min(xs), max(xs)
    if t1 - t0 < 3600:
        t0, t1 = t0 - 43200, t1 + 43200
    f = Frame(62, 30, WIDTH - 14, HEIGHT - 44)
    x = Linear(t0, t1, f.left, f.right)
    if log_scale:
        positive = [v for v in ys if v > 0]
        lo = min(positive, default=0.5)
        hi = max(positive, default=2.0)
        lo, hi = min(lo, 1 / max(hi, 1.0)) * 0.9, max(hi, 1 / max(lo, 1e-9)) * 1.1
        lo, hi = max(lo, 1e-3), min(hi, 1e3)
        ticks = log_ticks(lo, hi)
        if len(ticks) < 3:  # a narrow range: evenly spaced values read better
            ticks = [v for v in nice_range(lo, hi, 4)[2] if lo <= v <= hi and v > 0]
        y: Linear | Log = Log(lo, hi, f.bottom, f.top)
        y_ticks = [(y(v), f"{v:g}") for v in ticks]
    else:
        lo, hi, ticks = nice_range(min(ys), max(ys), 4)
        y = Linear(lo, hi, f.bottom, f.top)
        step = ticks[1] - ticks[0] if len(ticks) > 1 else None
        y_ticks = [(y(v), tick_label(v, step)) for v in ticks]
    last_t, first_t = datetime.fromtimestamp(t1, UTC), datetime.fromtimestamp(t0, UTC)
    summary = [f"{title} from {first_t:%Y-%m-%d} to {last_t:%Y-%m-%d}."]
    c = Canvas(WIDTH, HEIGHT, key, title, "")
    axes(
        c,
        f,
        x_ticks=[(x(t), label) for t, label in _time_ticks(t0, t1)],
        y_ticks=y_ticks,
        x_label="as of (UTC date)",
        y_label=y_label,
    )
    if reference is not None:
        c.line(
            f.left,
            y.clamp(reference),
            f.right,
            y.clamp(reference),
            colour=palette.DIAGONAL,
            dash="4 4",
        )
    items = []
    for i, s in enumerate(drawn):
        colour = palette.SERIES[i % len(palette.SERIES)]
        dash = palette.DASHES[i % len(palette.DASHES)]
        shape = palette.MARKERS[i % len(palette.MARKERS)]
        pts = s["points"]
        low, high = s.get("low"), s.get("high")
        if low and high:
            band = [(x(t), y.clamp(v)) for (t, _), v in zip(pts, high, strict=True) if finite(v)]
            band += [
                (x(t), y.clamp(v))
                for (t, _), v in reversed(list(zip(pts, low, strict=True)))
                if finite(v)
            ]
            c.polygon(band, colour, opacity=0.15)
        if s.get("threshold"):
            tl = [
                (x(t), y.clamp(v))
                for (t, _), v in zip(pts, s["threshold"], strict=True)
                if finite(v)
            ]
            c.polyline(tl, colour, width=1, dash="1 3")
        line = [(x(t), y.clamp(v)) for t, v in pts if finite(v)]
        c.polyline(line, colour, width=2, dash=dash)
        for px, py in thin(line, 40):
            c.add(marker(shape, px, py, colour, size=2.6))
        items.append((str(s["label"]), colour, dash, shape))
        last = next(((t, v) for t, v in reversed(pts) if finite(v)), None)
        if last is not None:
            summary.append(f"{s['label']}: latest {fmt.number(last[1], digits)}")
            firsts = next((v for _, v in pts if finite(v)), None)
            if firsts is not None and len(line) > 1:
                summary[-1] += f", first {fmt.number(firsts, digits)}"
            summary[-1] += "."
    if reference is not None and reference_label:
        items.append((reference_label, palette.DIAGONAL, "4 4", ""))
    legend(c, f.left, 14, items)
    c.description = " ".join(summary)
    rows = []
    times = sorted({t for s in drawn for t, _ in s["points"]})
    by_series = [{t: (v, i) for i, (t, v) in enumerate(s["points"])} for s in drawn]
    columns = ["as of"]
    for s in drawn:
        columns.append(str(s["label"]))
        if s.get("low"):
            columns.append(f"{s['label']} interval")
        if s.get("threshold"):
            columns.append(f"{s['label']} threshold")
    for t in reversed(times):
        row = [datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%d %H:%M")]
        for s, lookup in zip(drawn, by_series, strict=True):
            v, i = lookup.get(t, (None, -1))
            row.append(fmt.number(v, digits))
            if s.get("low"):
                row.append(fmt.interval(s["low"][i], s["high"][i], digits) if i >= 0 else "")
            if s.get("threshold"):
                row.append(fmt.number(s["threshold"][i], digits) if i >= 0 else "")
        rows.append(row)
    table = Table(
        caption=f"{title}: values by evaluation, newest first", columns=columns, rows=rows
    )
    return Chart(key, title, c.description, c.render(), table)


def distribution_chart(data: Mapping[str, Any] | None, *, model: str, slice_name: str) -> Chart:
    """Share of forecasts per bin, current window against the baseline window."""
    key = ident("distribution", model, slice_name)
    title = f"Score distribution, {fmt.slice_label(slice_name)}"
    if not data or not data.get("current"):
        return empty(key, title, (data or {}).get("why") or "No forecasts in the window yet.")
    edges = [float(e) for e in data["edges"]]
    cur = [float(v) for v in data["current"]]
    base = [float(v) for v in data["baseline"]] if data.get("baseline") else None
    share_cur = _shares(cur)
    share_base = _shares(base) if base else None
    top = max(share_cur + (share_base or []))
    _, top, ticks = nice_range(0.0, top, 4)
    f = Frame(62, 30, WIDTH - 14, HEIGHT - 44)
    x = Linear(edges[0], edges[-1], f.left, f.right)
    y = Linear(0.0, top, f.bottom, f.top)
    c = Canvas(WIDTH, HEIGHT, key, title, "")
    xt = nice_range(edges[0], edges[-1], 5)[2]
    xstep = xt[1] - xt[0] if len(xt) > 1 else None
    ystep = ticks[1] - ticks[0] if len(ticks) > 1 else None
    axes(
        c,
        f,
        x_ticks=[(x(t), tick_label(t, xstep)) for t in xt if t <= edges[-1] + 1e-12],
        y_ticks=[(y(t), f"{100 * t:.{max(0, _decimals(100 * (ystep or 1)))}f}") for t in ticks],
        x_label="predicted probability",
        y_label="share of rows (%)",
    )
    if share_base:
        for k, s in enumerate(share_base):
            if s > 0:
                c.rect(
                    x(edges[k]) + 0.5,
                    y(s),
                    x(edges[k + 1]) - x(edges[k]) - 1,
                    f.bottom - y(s),
                    palette.BAND,
                )
    line: list[tuple[float, float]] = []
    for k, s in enumerate(share_cur):
        line += [(x(edges[k]), y(s)), (x(edges[k + 1]), y(s))]
    c.polyline(line, palette.SERIES[0], width=2)
    for k, s in enumerate(share_cur):
        c.add(
            marker("circle", (x(edges[k]) + x(edges[k + 1])) / 2, y(s), palette.SERIES[0], size=2.6)
        )
    items = [(f"current ({data.get('window', '')})", palette.SERIES[0], "", "circle")]
    legend(c, f.left, 14, items)
    if share_base:
        lx = f.left + 60 + 6.5 * len(items[0][0])
        c.rect(lx, 9, 14, 10, palette.BAND)
        c.text(lx + 18, 18, "baseline", size=11, colour=palette.INK)
    summary = [f"{title}: share of forecasts per bin in window {data.get('window', '')}"]
    if share_base:
        summary.append(
            f"against the baseline {fmt.day(data.get('baseline_start'))} "
            f"to {fmt.day(data.get('baseline_end'))}"
        )
        moved = sum(abs(a - b) for a, b in zip(share_cur, share_base, strict=True)) / 2
        summary.append(f"({fmt.percent(moved)} of the mass moved between bins).")
    else:
        summary.append("(no baseline window yet).")
    for name, words in (("psi", "PSI"), ("ks_statistic", "KS statistic")):
        value = (data.get("metrics") or {}).get(name)
        if finite(value):
            summary.append(f"{words} {fmt.number(value)}.")
    c.description = " ".join(summary)
    rows = [
        (
            f"{fmt.number(edges[k], 2)}–{fmt.number(edges[k + 1], 2)}",
            fmt.count(cur[k]),
            fmt.percent(share_cur[k]),
            fmt.count(base[k]) if base else fmt.DASH,
            fmt.percent(share_base[k]) if share_base else fmt.DASH,
        )
        for k in range(len(cur))
    ]
    table = Table(
        caption=f"{title}: rows per bin",
        columns=(
            "predicted range",
            "rows now",
            "share now",
            "rows in baseline",
            "share in baseline",
        ),
        rows=rows,
    )
    return Chart(key, title, c.description, c.render(), table)


def _shares(values: Sequence[float]) -> list[float]:
    total = sum(values)
    return [v / total if total > 0 else 0.0 for v in values]


def _decimals(step: float) -> int:
    return 0 if step >= 1 else max(0, -math.floor(math.log10(step) + 1e-9))


def coverage_chart(rows: Sequence[Mapping[str, Any]], *, model: str, horizon: str) -> Chart:
    """Label coverage per cohort, by age in days (matured days from the sketches,
    the immature cohorts together)."""
    key = ident("coverage", model)
    title = "Label coverage by cohort age"
    if not rows:
        return empty(key, title, "No cohorts in the window yet.")
    f = Frame(62, 30, WIDTH - 14, HEIGHT - 44)
    ordered = sorted(rows, key=lambda r: -r["age_days"])
    slots = len(ordered)
    x = Linear(0, slots, f.left, f.right)
    y = Linear(0.0, 1.0, f.bottom, f.top)
    c = Canvas(WIDTH, HEIGHT, key, title, "")
    every = max(1, math.ceil(slots / 8))
    axes(
        c,
        f,
        x_ticks=[
            (x(i + 0.5), r["tick"])
            for i, r in enumerate(ordered)
            if i % every == 0 or r.get("immature")
        ],
        y_ticks=[(y(t), f"{100 * t:.0f}") for t in (0, 0.25, 0.5, 0.75, 1.0)],
        x_label="cohort age (days since prediction)",
        y_label="labelled (%)",
    )
    for i, r in enumerate(ordered):
        v = r.get("coverage")
        if isinstance(v, int | float) and finite(v):
            fill = palette.BAND if r.get("immature") else palette.SERIES[0]
            label = f"{r['label']}: {fmt.percent(v)} labelled of {fmt.count(r.get('rows'))} rows"
            c.rect(
                x(i) + 1,
                y(v),
                x(i + 1) - x(i) - 2,
                f.bottom - y(v),
                fill,
                stroke=palette.SERIES[0] if r.get("immature") else "",
                label=label,
            )
    legend(c, f.left, 14, [("matured cohort day", palette.SERIES[0], "", "")])
    c.rect(f.left + 170, 9, 14, 10, palette.BAND, stroke=palette.SERIES[0])
    c.text(f.left + 188, 18, f"not matured yet (horizon {horizon})", size=11, colour=palette.INK)
    matured = [r for r in ordered if not r.get("immature") and finite(r.get("coverage"))]
    summary = [f"{title}: {len(matured)} matured cohort days"]
    if matured:
        low = min(matured, key=lambda r: r["coverage"])
        summary.append(
            f"with coverage from {fmt.percent(low['coverage'])} ({low['label']}) "
            f"to {fmt.percent(max(r['coverage'] for r in matured))}"
        )
    imm = next((r for r in ordered if r.get("immature")), None)
    if imm is not None:
        summary.append(
            f"cohorts younger than the horizon are {fmt.percent(imm.get('coverage'))} "
            "labelled so far"
        )
    c.description = "; ".join([" ".join(summary[:2]), *summary[2:]]) + "."
    table = Table(
        caption=f"{title}: rows and labelled share per cohort",
        columns=("cohort", "age (days)", "rows", "labelled"),
        rows=[
            (r["label"], r["age_text"], fmt.count(r.get("rows")), fmt.percent(r.get("coverage")))
            for r in reversed(ordered)
        ],
    )
    return Chart(key, title, c.description, c.render(), table)


def recalibration_chart(advice: Mapping[str, Any] | None, *, model: str) -> Chart:
    key = ident("recalibration", model)
    title = "Suggested recalibration map"
    knots = [
        (float(p), float(q))
        for p, q in (advice or {}).get("knots") or []
        if finite(p) and finite(q)
    ]
    if not knots:
        return empty(key, title, "No map to show.")
    f = Frame(62, 30, 330 - 14, 330 - 44)
    x = Linear(0.0, 1.0, f.left, f.right)
    y = Linear(0.0, 1.0, f.bottom, f.top)
    c = Canvas(330, 330, key, title, "")
    ticks = [0.0, 0.25, 0.5, 0.75, 1.0]
    axes(
        c,
        f,
        x_ticks=[(x(t), f"{t:g}") for t in ticks],
        y_ticks=[(y(t), f"{t:g}") for t in ticks],
        x_label="current probability",
        y_label="recalibrated probability",
    )
    c.line(x(0), y(0), x(1), y(1), colour=palette.DIAGONAL, dash="4 4")
    line = [(x(p), y(q)) for p, q in knots]
    c.polyline(line, palette.SERIES[1], width=2)
    for px, py in thin(line, 30):
        c.add(marker("square", px, py, palette.SERIES[1], size=2.6))
    legend(
        c,
        f.left,
        14,
        [
            (
                str(advice.get("method") or "map") if advice else "map",
                palette.SERIES[1],
                "",
                "square",
            ),
            ("unchanged", palette.DIAGONAL, "4 4", ""),
        ],
    )
    mid = min(knots, key=lambda k: abs(k[0] - 0.5))
    c.description = (
        f"{title} ({advice.get('method') if advice else ''}) with {len(knots)} knots; "
        f"a forecast of {fmt.number(mid[0], 2)} becomes {fmt.number(mid[1], 2)}."
    )
    table = Table(
        caption=f"{title}: knots (interpolate linearly in logit)",
        columns=("current", "recalibrated"),
        rows=[(fmt.number(p, 4), fmt.number(q, 4)) for p, q in knots],
    )
    return Chart(key, title, c.description, c.render(), table)
