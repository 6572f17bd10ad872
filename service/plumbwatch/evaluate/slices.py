"""Slice names and the value cap per segment key.

A slice is ``overall``, ``key:value`` for each declared segment key, or a cross
``key1:value1,key2:value2`` with keys sorted. Inside a name, ``%``, ``,`` and
``:`` in values are percent-encoded, so every name parses back unambiguously.
A key keeps its first ``cap`` values in order of appearance; later values fold
into ``other`` (the set of kept values then freezes).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from urllib.parse import quote, unquote

OVERALL = "overall"
OTHER = "other"
_SAFE = "".join(c for c in map(chr, range(32, 127)) if c not in "%,:")


def encode_value(value: str) -> str:
    return quote(value, safe=_SAFE)


def slice_name(parts: Iterable[tuple[str, str]]) -> str:
    """The name of the slice with these (key, value) parts; no parts is ``overall``."""
    items = sorted(parts)
    if not items:
        return OVERALL
    return ",".join(f"{k}:{encode_value(v)}" for k, v in items)


def parse_slice(name: str) -> list[tuple[str, str]]:
    """Inverse of :func:`slice_name`; raises ValueError for a malformed name."""
    if name == OVERALL:
        return []
    parts = []
    for piece in name.split(","):
        key, sep, value = piece.partition(":")
        if not sep or not key or not value:
            raise ValueError(f"slice {name!r}: expected key:value[,key:value...] or 'overall'")
        parts.append((key, unquote(value)))
    if [k for k, _ in parts] != sorted(k for k, _ in parts):
        raise ValueError(f"slice {name!r}: keys of a cross are sorted")
    return parts


@dataclass
class ValueCap:
    """Which values of each key are kept; the rest read as ``other``."""

    cap: int
    kept: dict[str, dict[str, int]] = field(default_factory=dict)  # key -> value -> position
    added: list[tuple[str, str, int]] = field(default_factory=list)  # new since loading

    def resolve(self, key: str, value: str) -> str:
        values = self.kept.setdefault(key, {})
        if value in values:
            return value
        if len(values) < self.cap:
            values[value] = len(values)
            self.added.append((key, value, values[value]))
            return value
        return OTHER

    def capped_keys(self) -> list[str]:
        return sorted(k for k, v in self.kept.items() if len(v) >= self.cap)


@dataclass(frozen=True)
class SliceSpec:
    """A model's slicing: its segment keys and declared crosses."""

    keys: Sequence[str]
    crosses: Sequence[Sequence[str]]

    def names(self, segments: dict[str, str], cap: ValueCap) -> list[str]:
        """Every slice a row with these segments belongs to (``overall`` first)."""
        values = {k: cap.resolve(k, v) for k, v in sorted(segments.items()) if k in self.keys}
        out = [OVERALL]
        out += [slice_name([(k, v)]) for k, v in values.items()]
        for cross in self.crosses:
            if all(k in values for k in cross):
                out.append(slice_name((k, values[k]) for k in cross))
        return out
