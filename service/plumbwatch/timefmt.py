"""RFC 3339 instants and ISO 8601 day/time durations, as the interface uses them.

Instants are stored as integer microseconds since the Unix epoch (UTC): exact,
cheap to compare, and the same on SQLite and PostgreSQL.
"""

from __future__ import annotations

import re
from datetime import UTC, date, datetime, timedelta
from typing import Any

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


_MICROSECOND = timedelta(microseconds=1)


# The form pipelines send: 'Z', upper-case 'T', at most 6 fraction digits, ASCII digits.
_PLAIN_UTC = re.compile(
    r"([0-9]{4}-[0-9]{2}-[0-9]{2})T([0-9]{2}):([0-9]{2}):([0-9]{2})(?:\.([0-9]{1,6}))?Z"
)
_FRACTION_SCALE = (0, 100_000, 10_000, 1_000, 100, 10, 1)
_EPOCH_ORDINAL = date(1970, 1, 1).toordinal()
_MINUTES: dict[tuple[str, str, str], int | None] = {}  # (day, hour, minute) -> its start


def _minute_start_us(day: str, hour: str, minute: str) -> int | None:
    """Microseconds at the start of a valid UTC minute, else None (take the slow path)."""
    key = (day, hour, minute)
    start = _MINUTES.get(key, -1)
    if start != -1:
        return start
    try:
        parsed = date.fromisoformat(day)
    except ValueError:
        parsed = None
    h, m = int(hour), int(minute)
    # Years at the calendar's edges go the slow way, which words their errors.
    if parsed is None or parsed.year in (1, 9999) or h > 23 or m > 59:
        start = None
    else:
        start = ((parsed.toordinal() - _EPOCH_ORDINAL) * 1_440 + h * 60 + m) * 60_000_000
    if len(_MINUTES) >= 4_096:  # bounded: a hostile batch cannot grow it
        _MINUTES.clear()
    _MINUTES[key] = start
    return start


def fast_micros(value: Any) -> int | None:
    """Microseconds of a plainly well-formed RFC 3339 text, or None to take the slow path.

    Accepts only what ``to_micros(parse_instant(value))`` accepts, with the same
    value: anything unusual (no match, more than 6 fraction digits, years at the
    edge of the calendar where the conversion to UTC can overflow) returns None, and
    the caller's slow path words the error. The common UTC form is read field by
    field, each minute once: ingest reads one instant per row.
    """
    if type(value) is not str:
        return None
    plain = _PLAIN_UTC.fullmatch(value)
    if plain is not None:
        day, hour, minute, second, fraction = plain.groups()
        start = _minute_start_us(day, hour, minute)
        s = int(second)
        if start is None or s > 59:  # a leap second goes the slow way (refused there)
            return None
        if fraction:
            return start + s * 1_000_000 + int(fraction) * _FRACTION_SCALE[len(fraction)]
        return start + s * 1_000_000
    match = _RFC3339.match(value)
    if match is None or len(match.group("frac") or "") > 7:
        return None
    text = value[:-1] + "+00:00" if value[-1] in "zZ" else value
    try:
        parsed = datetime.fromisoformat(text)
    except ValueError:
        return None
    if parsed.year in (1, 9999):
        return None
    return (parsed - _EPOCH) // _MICROSECOND
