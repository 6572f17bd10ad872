"""RFC 3339 instants and ISO 8601 day/time durations, as the interface uses them.

Instants are stored as integer microseconds since the Unix epoch (UTC): exact,
cheap to compare, and the same on SQLite and PostgreSQL.
"""

from __future__ import annotations

import re
from datetime import UTC, datetime, timedelta

_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)
_RFC3339 = re.compile(
    r"^\d{4}-\d{2}-\d{2}[Tt ]\d{2}:\d{2}:\d{2}(?P<frac>\.\d+)?(?:[Zz]|[+-]\d{2}:\d{2})$"
)
_DURATION = re.compile(
    r"^P(?:(?P<days>\d+)D)?(?:T(?:(?P<hours>\d+)H)?(?:(?P<minutes>\d+)M)?"
    r"(?:(?P<seconds>\d+(?:\.\d+)?)S)?)?$"
)


def parse_instant(text: str) -> datetime:
    """Parse an RFC 3339 timestamp that carries an offset; return it in UTC.

    Raises ValueError for naive timestamps or malformed text.
    """
    if not isinstance(text, str):
        raise ValueError("expected an RFC 3339 timestamp string")
    match = _RFC3339.match(text)
    if match is None:
        if _RFC3339.match(text + "Z"):
            raise ValueError(f"timestamp {text!r} has no UTC offset (add Z or +hh:mm)")
        raise ValueError(f"not an RFC 3339 timestamp: {text!r}")
    frac = match.group("frac")
    if frac and len(frac) > 7:
        # Finer than a microsecond: keep microseconds (stored precision), drop the rest.
        text = text.replace(frac, frac[:7], 1)
    if text[-1] in "zZ":
        text = text[:-1] + "+00:00"
    try:
        value = datetime.fromisoformat(text)
    except ValueError as exc:
        raise ValueError(f"not a valid RFC 3339 timestamp: {exc}") from None
    return value.astimezone(UTC)


def to_micros(value: datetime) -> int:
    """Microseconds since the epoch of an aware datetime (exact integer arithmetic)."""
    if value.tzinfo is None:
        raise ValueError("naive datetime")
    delta = value - _EPOCH
    return (delta.days * 86_400 + delta.seconds) * 1_000_000 + delta.microseconds


def from_micros(micros: int) -> datetime:
    return _EPOCH + timedelta(microseconds=micros)


def format_instant(value: datetime | int) -> str:
    """RFC 3339 in UTC with a ``Z`` suffix; microseconds only when present."""
    if isinstance(value, int):
        value = from_micros(value)
    value = value.astimezone(UTC)
    text = value.isoformat(timespec="microseconds" if value.microsecond else "seconds")
    return text.replace("+00:00", "Z")


def parse_duration(text: str) -> timedelta:
    """Parse an ISO 8601 day/time duration such as ``P7D``, ``PT36H``, ``P1DT12H``.

    Years, months and weeks are refused: their length in days is ambiguous.
    """
    match = _DURATION.match(text) if isinstance(text, str) else None
    if not match or text in ("P", "PT") or text.endswith("T"):
        raise ValueError(
            f"not an ISO 8601 day/time duration: {text!r} (examples: P7D, PT36H, P1DT12H)"
        )
    parts = {k: float(v) for k, v in match.groupdict().items() if v is not None}
    return timedelta(
        days=parts.get("days", 0),
        hours=parts.get("hours", 0),
        minutes=parts.get("minutes", 0),
        seconds=parts.get("seconds", 0),
    )
