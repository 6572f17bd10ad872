"""How numbers, times and names are written on the pages (one place, so the tables,
the charts' text alternatives and the tests agree)."""

from __future__ import annotations

import math
from datetime import UTC, datetime
from typing import TypeGuard
from urllib.parse import unquote

DASH = "—"


def is_number(x: object) -> TypeGuard[int | float]:
    return isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x)


def number(x: object, digits: int = 3) -> str:
    """Fixed decimals for values below 1000, thousands separators above; a dash for
    null. Integers (counts) never get decimals."""
    if not is_number(x):
        return DASH
    if isinstance(x, int):
        return f"{x:,}"
    if abs(x) >= 1000:
        return f"{x:,.0f}"
    return f"{x:.{digits}f}"


def count(x: object) -> str:
    if not is_number(x):
        return DASH
    return f"{round(x):,}"


def percent(x: object, digits: int = 1) -> str:
    if not is_number(x):
        return DASH
    return f"{100 * x:.{digits}f} %"


def signed(x: object, digits: int = 3) -> str:
    """A change, with its sign and a true minus sign."""
    if not is_number(x):
        return DASH
    text = f"{x:+.{digits}f}"
    return text.replace("-", "−")


def interval(low: object, high: object, digits: int = 2) -> str:
    if not (is_number(low) and is_number(high)):
        return ""
    return f"{number(low, digits)}–{number(high, digits)}"


def parse_time(text: object) -> datetime | None:
    if not isinstance(text, str):
        return None
    try:
        value = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        return None
    return value.astimezone(UTC) if value.tzinfo else None


def when(text: object) -> str:
    """``2026-05-20 14:05 UTC`` from an RFC 3339 instant; the text itself if unparsable."""
    value = parse_time(text)
    if value is None:
        return DASH if text in (None, "") else str(text)
    return value.strftime("%Y-%m-%d %H:%M UTC")


def day(text: object) -> str:
    value = parse_time(text)
    return value.strftime("%Y-%m-%d") if value else DASH


def ago(text: object, now: datetime) -> str:
    """Rough age: ``3 h ago``, ``2 d ago``."""
    value = parse_time(text)
    if value is None:
        return ""
    seconds = (now - value).total_seconds()
    if seconds < 0:
        return "in the future"
    if seconds < 90 * 60:
        return f"{max(1, round(seconds / 60))} min ago"
    if seconds < 48 * 3600:
        return f"{round(seconds / 3600)} h ago"
    return f"{round(seconds / 86400)} d ago"


def slice_label(name: object) -> str:
    """``region:coast,tier:express`` reads as ``region = coast · tier = express``
    (values are percent-encoded inside names; shown decoded, and escaped by the
    template like any text)."""
    if not isinstance(name, str) or not name:
        return DASH
    if name == "overall":
        return "overall"
    parts = []
    for part in name.split(","):
        key, sep, value = part.partition(":")
        parts.append(f"{key} = {unquote(value)}" if sep else part)
    return " · ".join(parts)


def health_words(state: object) -> str:
    return str(state).replace("_", " ") if state else "unknown"
