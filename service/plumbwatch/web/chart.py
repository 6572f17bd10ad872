"""What every chart hands the template: the SVG, a text alternative, and the numbers."""

from __future__ import annotations

import math
import re
import zlib
from collections.abc import Sequence
from dataclasses import dataclass, field

from markupsafe import Markup


@dataclass(frozen=True)
class Table:
    """The numbers behind a chart, shown under it (cells are plain text, escaped)."""

    caption: str
    columns: Sequence[str]
    rows: Sequence[Sequence[str]]


@dataclass(frozen=True)
class Chart:
    ident: str
    title: str
    summary: str  # the text alternative; also the SVG's <desc>
    svg: Markup | None  # None: nothing to draw (the summary says why)
    table: Table | None = None
    notes: Sequence[str] = field(default_factory=tuple)


def empty(ident: str, title: str, why: str) -> Chart:
    return Chart(ident=ident, title=title, summary=why, svg=None)


def ident(*parts: object) -> str:
    """An id safe for HTML and SVG from arbitrary parts (slice names are user text)."""
    text = "-".join(str(p) for p in parts)
    slug = re.sub(r"[^a-zA-Z0-9]+", "-", text).strip("-").lower()
    # Distinct inputs that slug alike still get distinct ids.
    return f"{slug[:40]}-{zlib.crc32(text.encode()):08x}" if slug != text else slug


def finite(x: object) -> bool:
    return isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x)


def thin(points: Sequence[tuple[float, ...]], max_points: int) -> list[tuple[float, ...]]:
    """At most about ``max_points`` points, keeping the first and last."""
    if len(points) <= max_points:
        return list(points)
    step = len(points) / max_points
    kept = [points[int(i * step)] for i in range(max_points)]
    if kept[-1] != points[-1]:
        kept.append(points[-1])
    return kept
