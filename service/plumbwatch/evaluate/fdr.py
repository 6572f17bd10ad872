"""False-discovery control across slices at one run: it sets ``watch``, never pages.

* Evidence: e-BH (Wang & Ramdas 2022) over the *current* e-values of each
  version's streams, one family per version, at ``fdr_alpha``. Valid under any
  dependence; running maxima are not e-values and are never fed (METHODS.md §7.4).
* p-values: per window and version (``null`` = across versions), one family of
  the Hosmer–Lemeshow and Spiegelhalter p-values of every slice with enough events
  for a verdict (both tests of a slice are members; a slice is a discovery if
  either is). Slices nest (``overall`` holds every key's slices, a key's slice holds
  its crosses), and nested tests are dependent in ways BH does not cover, so a
  family with a slice and one of its parts uses Benjamini–Yekutieli, and a family
  without nesting (a model with no segment keys: ``overall`` alone) uses BH.

The guarantee is per run, not for "ever discovered over many runs"; that is why a
discovery only sets ``watch``.
"""

from __future__ import annotations

from itertools import combinations
from typing import Any

import numpy as np

from plumbwatch.evaluate.slices import parse_slice
from plumbwatch.stats.multiple import benjamini_hochberg, benjamini_yekutieli, e_bh

TESTS = (("hl", "hl_p_value"), ("spiegelhalter", "spiegelhalter_p_value"))


def evidence_discoveries(
    log_evidence: dict[str, dict[str, float]], *, alpha: float
) -> list[dict[str, Any]]:
    """e-BH per version; ``log_evidence``: version -> slice -> current log e-value."""
    out = []
    for version, by_slice in sorted(log_evidence.items()):
        names = sorted(by_slice)
        # Overflow is harmless: an infinite e-value is a discovery in any case.
        with np.errstate(over="ignore"):
            e = np.exp(np.array([by_slice[n] for n in names], dtype=np.float64))
        result = e_bh(e, alpha=alpha)
        out.append(
            {
                "version": version,
                "method": "e_bh",
                "m": len(names),
                "discoveries": [n for n, hit in zip(names, result.rejected, strict=True) if hit],
            }
        )
    return out


def nested(slices: list[str]) -> bool:
    """Whether some slice of the list contains another (``overall`` contains all)."""
    present = {frozenset(parse_slice(s)) for s in slices}
    for parts in present:
        for k in range(len(parts)):
            if any(frozenset(sub) in present for sub in combinations(parts, k)):
                return True
    return False


def p_value_discoveries(
    entries: list[dict[str, Any]], *, alpha: float, window: str, version: str | None
) -> dict[str, Any]:
    """BH or BY over the HL and Spiegelhalter p-values of ``entries`` (slice entries of one
    window and version whose base health allows a verdict)."""
    members = [
        (e["slice"], test, float(e["metrics"][name]))
        for e in entries
        for test, name in TESTS
        if e["metrics"].get(name) is not None
    ]
    family = sorted({s for s, _, _ in members})
    method = "by" if nested(family) else "bh"
    out: dict[str, Any] = {"window": window, "version": version, "method": method}
    out["m"] = len(members)
    if not members:
        out["discoveries"] = []
        return out
    p = np.array([v for _, _, v in members], dtype=np.float64)
    procedure = benjamini_yekutieli if method == "by" else benjamini_hochberg
    result = procedure(p, alpha=alpha)
    out["discoveries"] = [
        {"slice": s, "test": t, "p_value": v, "adjusted": float(a)}
        for (s, t, v), a, hit in zip(members, result.adjusted, result.rejected, strict=True)
        if hit
    ]
    return out


__all__ = ["evidence_discoveries", "nested", "p_value_discoveries"]
