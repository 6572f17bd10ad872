"""The palette stays readable: WCAG contrast, and distinct under simulated
colour-vision deficiencies (colorspacious, Machado et al. 2009 at full severity)."""

from __future__ import annotations

import itertools
from importlib import resources

import numpy as np
import pytest
from colorspacious import cspace_convert

from plumbwatch.web import palette

CVD = (None, "deuteranomaly", "protanomaly", "tritanomaly")
# Our own bar for "clearly different" in CAM02-UCS (not a standard): about twice
# the difference between the tints of neighbouring table rows.
APART = 20.0


def _rgb(hex_colour: str) -> list[float]:
    return [int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5)]


def _luminance(hex_colour: str) -> float:
    # WCAG 2.1 relative luminance (sRGB linearisation, Rec. 709 weights).
    c = [v / 12.92 if v <= 0.04045 else ((v + 0.055) / 1.055) ** 2.4 for v in _rgb(hex_colour)]
    return 0.2126 * c[0] + 0.7152 * c[1] + 0.0722 * c[2]


def contrast(a: str, b: str) -> float:
    hi, lo = sorted((_luminance(a), _luminance(b)), reverse=True)
    return (hi + 0.05) / (lo + 0.05)


def _seen(hex_colour: str, cvd: str | None) -> np.ndarray:
    rgb = _rgb(hex_colour)
    if cvd is not None:
        space = {"name": "sRGB1+CVD", "cvd_type": cvd, "severity": 100}
        rgb = np.clip(cspace_convert(rgb, space, "sRGB1"), 0, 1)
    return np.asarray(cspace_convert(rgb, "sRGB1", "CAM02-UCS"))


def _distance(a: str, b: str, cvd: str | None) -> float:
    return float(np.linalg.norm(_seen(a, cvd) - _seen(b, cvd)))


def test_contrast_formula_matches_known_values() -> None:
    # WCAG's definition gives exactly 21:1 for black on white; #767676 is the
    # often-quoted lightest grey that passes 4.5:1 on white (4.54:1, from memory).
    assert contrast("#000000", "#ffffff") == pytest.approx(21.0)
    assert contrast("#767676", "#ffffff") == pytest.approx(4.54, abs=0.01)
    assert contrast("#777777", "#ffffff") < 4.5


@pytest.mark.parametrize("state", sorted(palette.HEALTH))
def test_health_badges_have_readable_text(state: str) -> None:
    style = palette.HEALTH[state]
    assert contrast(style.colour, style.tint) >= 4.5  # WCAG 2.1 SC 1.4.3 (AA)


def test_text_and_series_colours_on_white() -> None:
    for colour in (palette.INK, palette.MUTED, *(s.colour for s in palette.SEVERITY.values())):
        assert contrast(colour, "#ffffff") >= 4.5
    for colour in palette.SERIES:
        assert contrast(colour, "#ffffff") >= 3.0  # WCAG 2.1 SC 1.4.11, graphics


@pytest.mark.parametrize("cvd", CVD)
def test_series_stay_apart(cvd: str | None) -> None:
    for a, b in itertools.combinations(palette.SERIES, 2):
        assert _distance(a, b, cvd) >= APART, (a, b, cvd)


@pytest.mark.parametrize("cvd", CVD)
def test_alarm_states_stay_apart(cvd: str | None) -> None:
    # A badge differs from another if its fill or its outline does.
    states = ("drifting", "watch", "ok")
    for a, b in itertools.combinations(states, 2):
        sa, sb = palette.HEALTH[a], palette.HEALTH[b]
        best = max(_distance(sa.tint, sb.tint, cvd), _distance(sa.border, sb.border, cvd))
        assert best >= APART, (a, b, cvd)


def test_health_never_relies_on_colour_alone() -> None:
    words = [s.label for s in palette.HEALTH.values()]
    symbols = [s.symbol for s in palette.HEALTH.values()]
    assert len(set(words)) == len(words)
    assert len(set(symbols[:3])) == 3  # the three verdicts have distinct symbols too


def test_the_stylesheet_uses_the_palette() -> None:
    css = resources.files("plumbwatch.web").joinpath("static/plumbwatch.css").read_text()
    for style in (palette.HEALTH["ok"], palette.HEALTH["watch"]):
        for colour in (style.colour, style.tint, style.border):
            assert colour.lower() in css.lower()
    assert palette.HEALTH["drifting"].tint.lower() in css.lower()
