"""Page view models: plain data (evaluation records, alerts) in, what templates show out.

Every field of a record is optional here: a page renders whatever the record
carries and says "not available" for the rest, so older records and records
from before a feature existed still show.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any
from urllib.parse import quote, urlencode

from plumbwatch.web import fmt, palette

# The figures the overview and the cards show, in order: (metric, label, digits).
KEY_METRICS = (
    ("log_loss", "Log loss", 4),
    ("ece", "ECE", 4),
    ("oe_ratio", "O/E", 3),
    ("auroc", "AUROC", 3),
)


@dataclass(frozen=True)
class Cell:
    """A table cell: the text shown, and the raw value (for sorting and for tests)."""

    text: str
    value: float | str | None = None
    sub: str = ""  # a second, smaller line (an interval)

    @property
    def sort_key(self) -> str:
        v = self.value
        if isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v):
            return repr(float(v))
        return "" if v is None else str(v)


def cell(metrics: Mapping[str, Any], name: str, digits: int = 3) -> Cell:
    v = metrics.get(name)
    if name in ("n", "events", "late"):
        return Cell(fmt.count(v), v if fmt.is_number(v) else None)
    return Cell(fmt.number(v, digits), v if fmt.is_number(v) else None)


def health_view(state: str | None) -> dict[str, str]:
    style = palette.health_style(state)
    return {
        "state": state or "unknown",
        "label": style.label,
        "symbol": style.symbol,
        "css": f"health-{(state or 'unknown').replace('_', '-')}",
    }


def model_url(name: str, **query: str) -> str:
    base = f"/models/{quote(name, safe='')}"
    params = {k: v for k, v in query.items() if v}
    return f"{base}?{urlencode(params)}" if params else base


def first_window(record: Mapping[str, Any] | None, name: str | None = None) -> Mapping[str, Any]:
    windows = (record or {}).get("windows") or []
    if name is not None:
        for w in windows:
            if w.get("window") == name:
                return w
    return windows[0] if windows else {}


def find_slice(
    window: Mapping[str, Any], name: str, version: str | None = None
) -> Mapping[str, Any]:
    for s in window.get("slices") or []:
        if s.get("slice") == name and s.get("version") == version:
            return s
    return {}


def evidence_of(record: Mapping[str, Any], entry: Mapping[str, Any]) -> dict[str, Any]:
    """The evidence of a slice entry: from its metrics, else from the record's list."""
    metrics = entry.get("metrics") or {}
    out: dict[str, Any] = {
        "log_evidence": metrics.get("log_evidence"),
        "log_threshold": metrics.get("log_threshold"),
    }
    streams = [e for e in record.get("evidence") or [] if e.get("slice") == entry.get("slice")]
    exact = [e for e in streams if e.get("version") == entry.get("version")]
    # Streams run per model version; an across-versions entry borrows the stream of
    # its slice when the model has only one.
    chosen = exact or (streams if entry.get("version") is None and len(streams) == 1 else [])
    if chosen:
        e = chosen[0]
        for k in ("log_evidence", "log_threshold"):
            if out[k] is None:
                out[k] = e.get(k)
        out["started_at"] = e.get("started_at")
        out["crossed"] = e.get("crossed")
    return out


def evidence_text(ev: Mapping[str, Any]) -> Cell:
    le, lt = ev.get("log_evidence"), ev.get("log_threshold")
    if not fmt.is_number(le):
        return Cell(fmt.DASH)
    text = fmt.number(le, 2)
    sub = f"threshold {fmt.number(lt, 2)}" if fmt.is_number(lt) else ""
    return Cell(text, le, sub)


def key_metric_cells(
    metrics: Mapping[str, Any], baseline: Mapping[str, Any] | None
) -> list[dict[str, Any]]:
    out = []
    for name, label, digits in KEY_METRICS:
        value = metrics.get(name)
        base = (baseline or {}).get(name)
        change = (
            float(value) - float(base) if fmt.is_number(value) and fmt.is_number(base) else None
        )
        item = {
            "name": name,
            "label": label,
            "value": value if fmt.is_number(value) else None,
            "text": fmt.number(value, digits),
            "baseline_text": fmt.number(base, digits),
            "change": change,
            "change_text": fmt.signed(change, digits) if change is not None else "",
            "interval": "",
        }
        if name == "oe_ratio":
            item["interval"] = fmt.interval(
                metrics.get("oe_ratio_low"), metrics.get("oe_ratio_high")
            )
        out.append(item)
    return out


def attention(record: Mapping[str, Any] | None, limit: int = 3) -> dict[str, Any]:
    """The worst slices of the first window (drifting, then watch), most evidence first."""
    w = first_window(record)
    flagged = [s for s in w.get("slices") or [] if s.get("health") in ("drifting", "watch")]
    flagged.sort(
        key=lambda s: (
            palette.health_rank(s.get("health")),
            -(evidence_of(record or {}, s).get("log_evidence") or 0.0),
            s.get("slice") or "",
        )
    )
    items = [
        {
            "slice": s.get("slice"),
            "url": model_url(str((record or {}).get("model") or ""), slice=str(s.get("slice"))),
            "label": fmt.slice_label(s.get("slice")),
            "version": s.get("version"),
            "health": health_view(s.get("health")),
        }
        for s in flagged[:limit]
    ]
    return {"items": items, "more": max(len(flagged) - limit, 0)}


def overview(models: Sequence[Mapping[str, Any]], *, now: datetime) -> dict[str, Any]:
    rows = []
    for m in models:
        record = m.get("record")
        w = first_window(record)
        overall = find_slice(w, "overall")
        metrics = overall.get("metrics") or {}
        baseline = m.get("baseline") or {}
        alerts = m.get("active_alerts") or []
        rows.append(
            {
                "name": m["name"],
                "url": model_url(m["name"]),
                "description": m.get("description") or "",
                "health": health_view(record.get("health") if record else None),
                "health_rank": palette.health_rank(record.get("health") if record else None),
                "version": m.get("version") or fmt.DASH,
                "evaluated": fmt.when(record.get("evaluated_at")) if record else "never",
                "evaluated_ago": fmt.ago(record.get("evaluated_at"), now) if record else "",
                "as_of": fmt.when(record.get("as_of")) if record else fmt.DASH,
                "window": w.get("window") or fmt.DASH,
                "n": cell(metrics, "n"),
                "label_coverage": Cell(
                    fmt.percent(metrics.get("label_coverage")), metrics.get("label_coverage")
                ),
                "metrics": key_metric_cells(metrics, baseline.get("metrics")),
                "has_baseline": bool(baseline.get("metrics")),
                "alerts": len(alerts),
                "alert_rules": sorted({str(a.get("rule")) for a in alerts if a.get("rule")}),
                "attention": attention(record),
            }
        )
    rows.sort(key=lambda r: (r["health_rank"], r["name"]))
    counts: dict[str, int] = {}
    for r in rows:
        counts[r["health"]["state"]] = counts.get(r["health"]["state"], 0) + 1
    summary = [
        {"health": health_view(state), "count": counts[state]}
        for state in (*palette.HEALTH_ORDER, "unknown")
        if counts.get(state)
    ]
    return {"rows": rows, "summary": summary, "metric_labels": [m[1] for m in KEY_METRICS]}


def alert_row(a: Mapping[str, Any], *, now: datetime) -> dict[str, Any]:
    values = a.get("values") or {}
    shown = ", ".join(
        f"{k} {fmt.number(v) if fmt.is_number(v) else v}" for k, v in list(values.items())[:6]
    )
    sev = palette.severity_style(a.get("severity"))
    return {
        "id": a.get("id"),
        "model": a.get("model") or "",
        "model_url": model_url(str(a.get("model") or "")) if a.get("model") else "",
        "rule": a.get("rule") or fmt.DASH,
        "slice": a.get("slice") or "overall",
        "slice_label": fmt.slice_label(a.get("slice") or "overall"),
        "version": a.get("version") or "",
        "window": a.get("window") or "",
        "state": a.get("state") or "unknown",
        "severity": {"label": sev.label, "symbol": sev.symbol, "css": f"sev-{sev.label}"},
        "raised": fmt.when(a.get("raised_at")),
        "since": fmt.when(a.get("since") or a.get("raised_at")),
        "since_ago": fmt.ago(a.get("since") or a.get("raised_at"), now),
        "acknowledged_by": a.get("acknowledged_by") or "",
        "shelved_until": fmt.when(a.get("shelved_until")) if a.get("shelved_until") else "",
        "cleared": fmt.when(a.get("cleared_at")) if a.get("cleared_at") else "",
        "shown_values": shown,
        "can_acknowledge": a.get("state") == "active",
        "can_shelve": a.get("state") in ("active", "acknowledged"),
    }


ALERT_GROUPS = (
    ("active", "Active"),
    ("acknowledged", "Acknowledged"),
    ("shelved", "Shelved"),
    ("cleared", "Recently cleared"),
)

SHELVE_CHOICES = (("PT1H", "1 hour"), ("PT4H", "4 hours"), ("P1D", "1 day"), ("P7D", "7 days"))


def alert_groups(alerts: Sequence[Mapping[str, Any]], *, now: datetime) -> list[dict[str, Any]]:
    rows = [alert_row(a, now=now) for a in alerts]
    return [
        {"state": state, "title": title, "rows": [r for r in rows if r["state"] == state]}
        for state, title in ALERT_GROUPS
    ]
