"""A small SVG builder: scales, nice ticks, escaped text, accessible wrappers.

Charts are drawn on the server as inline SVG so the pages need no script and no
external asset. Colours are presentation attributes (``fill="..."``), never
``style`` attributes, so a Content-Security-Policy without ``'unsafe-inline'``
still lets them through. Every piece of text goes through :func:`esc`.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

from markupsafe import Markup, escape

from plumbwatch.web import palette


def esc(text: object) -> str:
    return str(escape(str(text)))


def num(x: float) -> str:
    """Coordinates to 0.1 px: short output, no visible loss."""
    if not math.isfinite(x):
        raise ValueError(f"non-finite coordinate {x!r}")
    value = round(x, 1)
    return str(int(value)) if value == int(value) else f"{value:.1f}"


@dataclass(frozen=True)
class Linear:
    """Maps ``[d0, d1]`` onto ``[r0, r1]`` (either may be descending)."""

    d0: float
    d1: float
    r0: float
    r1: float

    def __call__(self, x: float) -> float:
        span = self.d1 - self.d0
        t = (x - self.d0) / span if span else 0.5
        return self.r0 + t * (self.r1 - self.r0)

    def clamp(self, x: float) -> float:
        lo, hi = sorted((self.d0, self.d1))
        return self(min(max(x, lo), hi))


@dataclass(frozen=True)
class Log:
    """A log scale (base 10 ticks) for ratios such as O/E."""

    d0: float
    d1: float
    r0: float
    r1: float

    def __call__(self, x: float) -> float:
        a, b = math.log(self.d0), math.log(self.d1)
        t = (math.log(max(x, 1e-300)) - a) / (b - a) if b != a else 0.5
        return self.r0 + t * (self.r1 - self.r0)

    def clamp(self, x: float) -> float:
        return self(min(max(x, self.d0), self.d1))


def nice_step(span: float, count: int) -> float:
    """A step of 1, 2 or 5 times a power of ten giving about ``count`` intervals
    (Heckbert, "Nice numbers for graph labels", Graphics Gems, 1990)."""
    raw = span / max(count, 1)
    if raw <= 0 or not math.isfinite(raw):
        return 1.0
    power = 10 ** math.floor(math.log10(raw))
    for m in (1, 2, 2.5, 5, 10):
        if raw <= m * power:
            return m * power
    return 10 * power


def nice_range(lo: float, hi: float, count: int = 5) -> tuple[float, float, list[float]]:
    """Rounded outward bounds and ticks covering ``[lo, hi]``."""
    if not (math.isfinite(lo) and math.isfinite(hi)):
        lo, hi = 0.0, 1.0
    if hi <= lo:
        pad = abs(lo) * 0.1 or 1.0
        lo, hi = lo - pad, hi + pad
    step = nice_step(hi - lo, count)
    start = math.floor(lo / step + 1e-9) * step
    stop = math.ceil(hi / step - 1e-9) * step
    ticks = []
    k = 0
    while start + k * step <= stop + step * 1e-9:
        ticks.append(round(start + k * step, 12))
        k += 1
    return start, stop, ticks


def log_ticks(lo: float, hi: float) -> list[float]:
    """Ticks at 1, 2 and 5 times powers of ten inside ``[lo, hi]``."""
    out = []
    for e in range(math.floor(math.log10(lo)), math.ceil(math.log10(hi)) + 1):
        for m in (1, 2, 5):
            v = m * 10.0**e
            if lo * (1 - 1e-9) <= v <= hi * (1 + 1e-9):
                out.append(v)
    return out


def tick_label(v: float, step: float | None = None) -> str:
    if step is not None and step > 0:
        decimals = max(0, -math.floor(math.log10(step) + 1e-9))
        if decimals == 0 and step % 1:
            decimals = 1
        return f"{v:.{decimals}f}"
    return f"{v:g}"


def marker(shape: str, x: float, y: float, colour: str, size: float = 3.5) -> str:
    """A point marker; the shape tells the series apart without colour."""
    s = size
    if shape == "square":
        return (
            f'<rect x="{num(x - s)}" y="{num(y - s)}" width="{num(2 * s)}" '
            f'height="{num(2 * s)}" fill="{colour}"/>'
        )
    if shape == "triangle":
        pts = (
            f"{num(x)},{num(y - s * 1.2)} {num(x - s * 1.1)},{num(y + s)} "
            f"{num(x + s * 1.1)},{num(y + s)}"
        )
        return f'<polygon points="{pts}" fill="{colour}"/>'
    if shape == "diamond":
        pts = (
            f"{num(x)},{num(y - s * 1.3)} {num(x + s * 1.3)},{num(y)} "
            f"{num(x)},{num(y + s * 1.3)} {num(x - s * 1.3)},{num(y)}"
        )
        return f'<polygon points="{pts}" fill="{colour}"/>'
    return f'<circle cx="{num(x)}" cy="{num(y)}" r="{num(s)}" fill="{colour}"/>'


@dataclass
class Canvas:
    """Collects SVG elements; :meth:`render` wraps them with a title and description
    that screen readers announce (``role="img"`` with ``aria-labelledby``)."""

    width: int
    height: int
    ident: str
    title: str
    description: str
    parts: list[str] = field(default_factory=list)

    def add(self, element: str) -> None:
        self.parts.append(element)

    def line(
        self,
        x1: float,
        y1: float,
        x2: float,
        y2: float,
        colour: str = palette.AXIS,
        width: float = 1,
        dash: str = "",
    ) -> None:
        extra = f' stroke-dasharray="{dash}"' if dash else ""
        self.add(
            f'<line x1="{num(x1)}" y1="{num(y1)}" x2="{num(x2)}" y2="{num(y2)}" '
            f'stroke="{colour}" stroke-width="{width}"{extra}/>'
        )

    def polyline(
        self,
        points: Sequence[tuple[float, float]],
        colour: str,
        width: float = 2,
        dash: str = "",
    ) -> None:
        if len(points) < 2:
            return
        pts = " ".join(f"{num(x)},{num(y)}" for x, y in points)
        extra = f' stroke-dasharray="{dash}"' if dash else ""
        self.add(
            f'<polyline points="{pts}" fill="none" stroke="{colour}" '
            f'stroke-width="{width}" stroke-linejoin="round"{extra}/>'
        )

    def polygon(self, points: Sequence[tuple[float, float]], fill: str, opacity: float = 1) -> None:
        if len(points) < 3:
            return
        pts = " ".join(f"{num(x)},{num(y)}" for x, y in points)
        extra = f' fill-opacity="{opacity}"' if opacity < 1 else ""
        self.add(f'<polygon points="{pts}" fill="{fill}"{extra}/>')

    def rect(
        self,
        x: float,
        y: float,
        w: float,
        h: float,
        fill: str,
        stroke: str = "",
        label: str = "",
    ) -> None:
        extra = f' stroke="{stroke}" stroke-width="1"' if stroke else ""
        body = f"<title>{esc(label)}</title>" if label else ""
        end = f">{body}</rect>" if body else "/>"
        self.add(
            f'<rect x="{num(x)}" y="{num(y)}" width="{num(max(w, 0))}" '
            f'height="{num(max(h, 0))}" fill="{fill}"{extra}{end}'
        )

    def text(
        self,
        x: float,
        y: float,
        content: str,
        anchor: str = "start",
        size: int = 12,
        colour: str = palette.MUTED,
        rotate: bool = False,
        weight: str = "",
    ) -> None:
        transform = f' transform="rotate(-90 {num(x)} {num(y)})"' if rotate else ""
        bold = f' font-weight="{weight}"' if weight else ""
        self.add(
            f'<text x="{num(x)}" y="{num(y)}" text-anchor="{anchor}" font-size="{size}" '
            f'fill="{colour}"{bold}{transform}>{esc(content)}</text>'
        )

    def render(self) -> Markup:
        t, d = f"{self.ident}-title", f"{self.ident}-desc"
        head = (
            f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {self.width} {self.height}" '
            f'width="{self.width}" height="{self.height}" role="img" '
            f'aria-labelledby="{esc(t)} {esc(d)}" class="chart" font-family="inherit">'
            f'<title id="{esc(t)}">{esc(self.title)}</title>'
            f'<desc id="{esc(d)}">{esc(self.description)}</desc>'
        )
        return Markup(head + "".join(self.parts) + "</svg>")


@dataclass(frozen=True)
class Frame:
    """The plotting area inside a canvas."""

    left: float
    top: float
    right: float
    bottom: float

    @property
    def width(self) -> float:
        return self.right - self.left

    @property
    def height(self) -> float:
        return self.bottom - self.top


def axes(
    c: Canvas,
    f: Frame,
    *,
    x_ticks: Iterable[tuple[float, str]],
    y_ticks: Iterable[tuple[float, str]],
    x_label: str,
    y_label: str,
    grid: bool = True,
) -> None:
    """Grid lines, tick labels and axis titles (the labels carry units)."""
    for y, label in y_ticks:
        if grid:
            c.line(f.left, y, f.right, y, colour=palette.GRID)
        c.text(f.left - 6, y + 4, label, anchor="end", size=11)
    for x, label in x_ticks:
        if grid:
            c.line(x, f.top, x, f.bottom, colour=palette.GRID)
        c.text(x, f.bottom + 15, label, anchor="middle", size=11)
    c.line(f.left, f.bottom, f.right, f.bottom)
    c.line(f.left, f.top, f.left, f.bottom)
    if x_label:
        c.text((f.left + f.right) / 2, f.bottom + 32, x_label, anchor="middle", colour=palette.INK)
    if y_label:
        c.text(
            14, (f.top + f.bottom) / 2, y_label, anchor="middle", colour=palette.INK, rotate=True
        )


def legend(c: Canvas, x: float, y: float, items: Sequence[tuple[str, str, str, str]]) -> None:
    """Items of (label, colour, dash, marker shape) in a row from (x, y)."""
    for label, colour, dash, shape in items:
        c.line(x, y, x + 22, y, colour=colour, width=2, dash=dash)
        if shape:
            c.add(marker(shape, x + 11, y, colour, size=3))
        c.text(x + 27, y + 4, label, size=11, colour=palette.INK)
        x += 34 + 6.5 * len(label)
