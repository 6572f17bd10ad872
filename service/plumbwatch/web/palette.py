"""The pages' colours and the way health is shown.

A palette of our own, chosen to stay apart under the common colour-vision
deficiencies (``tests/web/test_palette.py`` simulates them) and dark enough for
text on white. Colour never carries meaning alone: every health state has a word
and a symbol, and every chart series a line style and a marker shape.
"""

from __future__ import annotations

from dataclasses import dataclass

INK = "#1c2430"
MUTED = "#545e6b"
GRID = "#dfe3e8"
AXIS = "#8a939e"
PANEL = "#f4f6f8"
BAND = "#c7d3e3"  # the consistency band and interval shading
DIAGONAL = "#8a939e"

# Series colours in the order charts use them: every pair stays apart for protan,
# deutan and tritan readers (blue against orange is the backbone, then a near-black
# and a light blue apart in lightness), each at least 3:1 against white.
SERIES = ("#1f5b99", "#b25400", "#1a1a1a", "#3399ee")
# Line styles and markers that go with the series, so that print and
# colour-blind readers can still tell them apart.
DASHES = ("", "6 3", "2 3", "8 3 2 3")
MARKERS = ("circle", "square", "triangle", "diamond")


@dataclass(frozen=True)
class HealthStyle:
    label: str  # the words shown
    symbol: str  # shown beside the words, never alone
    colour: str  # text colour on the badge (contrast >= 4.5:1 on its tint)
    tint: str  # background of the badge
    border: str  # outline of the badge


# The alarm state is a solid badge, the others tinted: they differ in fill as well as
# in hue, which holds under every colour-vision deficiency and in greyscale print.
HEALTH = {
    "drifting": HealthStyle("drifting", "▲", "#ffffff", "#a63a00", "#a63a00"),
    "watch": HealthStyle("watch", "◆", "#6b4e00", "#fbf2d3", "#8a6a00"),
    "ok": HealthStyle("ok", "✓", "#1f5b99", "#e2ecf7", "#1f5b99"),
    "insufficient_data": HealthStyle("insufficient data", "–", "#545e6b", "#eceef1", "#8a939e"),
    "awaiting_labels": HealthStyle("awaiting labels", "…", "#545e6b", "#eceef1", "#8a939e"),
}
UNKNOWN = HealthStyle("unknown", "?", "#545e6b", "#eceef1", "#8a939e")

# Worst first, as the evaluation ranks them (plumbwatch.evaluate.metrics.HEALTH_ORDER).
HEALTH_ORDER = ("drifting", "watch", "ok", "insufficient_data", "awaiting_labels")


def health_style(state: str | None) -> HealthStyle:
    return HEALTH.get(state or "", UNKNOWN)


def health_rank(state: str | None) -> int:
    """0 for the worst state; unknown states sort last."""
    return HEALTH_ORDER.index(state) if state in HEALTH_ORDER else len(HEALTH_ORDER)


# Severity is shown as coloured text with a symbol (on white).
SEVERITY = {
    "critical": HealthStyle("critical", "▲", "#a63a00", "#ffffff", "#a63a00"),
    "warning": HealthStyle("warning", "◆", "#6b4e00", "#ffffff", "#6b4e00"),
    "info": HealthStyle("info", "●", "#1f5b99", "#ffffff", "#1f5b99"),
}


def severity_style(severity: str | None) -> HealthStyle:
    fallback = HealthStyle(severity or "unknown", "●", MUTED, "#ffffff", MUTED)
    return SEVERITY.get(severity or "", fallback)
