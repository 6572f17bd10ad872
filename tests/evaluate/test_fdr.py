"""Per-run false-discovery control across slices: e-BH on current e-values, BH or BY on
the Hosmer–Lemeshow and Spiegelhalter p-values, against hand values and statsmodels."""

from __future__ import annotations

import math

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from plumbwatch.evaluate.fdr import evidence_discoveries, nested, p_value_discoveries

# METHODS.md section 15, H6.
H6_E = (50, 30, 8, 2, 1, 0.5)
H6_P = (0.001, 0.008, 0.039, 0.041, 0.042, 0.060, 0.074, 0.205)
H6_ADJUSTED = (0.008, 0.032, 0.0672, 0.0672, 0.0672, 0.08, 0.0845714, 0.205)


def test_e_bh_matches_the_hand_computed_h6_decision() -> None:
    # e = (50, 30, 8, 2, 1, 0.5) at alpha 0.1 rejects the first two (METHODS.md H6): with
    # m = 6, k* = max{k : e_(k) >= 6 / (0.1 k)} = 2 (30 >= 30, 8 < 20).
    names = [f"zone:z{i}" for i in range(6)]
    found = evidence_discoveries(
        {"v1": {n: math.log(e) for n, e in zip(names, H6_E, strict=True)}}, alpha=0.1
    )
    assert found == [{"version": "v1", "method": "e_bh", "m": 6, "discoveries": names[:2]}]


def test_e_bh_copes_with_huge_evidence() -> None:
    found = evidence_discoveries({"v1": {"overall": 5000.0, "zone:a": 0.0}}, alpha=0.05)
    assert found[0]["discoveries"] == ["overall"]


def entries(names: list[str], p: list[float]) -> list[dict]:
    """Slice entries holding the p-values in order: HL then Spiegelhalter per slice."""
    out = []
    for i, name in enumerate(names):
        out.append(
            {
                "slice": name,
                "metrics": {"hl_p_value": p[2 * i], "spiegelhalter_p_value": p[2 * i + 1]},
            }
        )
    return out


def test_bh_on_disjoint_slices_matches_statsmodels_and_h6() -> None:
    # Four zones of one key do not nest: BH (valid for independent tests).
    names = ["zone:a", "zone:b", "zone:c", "zone:d"]
    fam = p_value_discoveries(entries(names, list(H6_P)), alpha=0.05, window="P7D", version=None)
    assert fam["method"] == "bh" and fam["m"] == 8
    reject, adjusted, _, _ = multipletests(H6_P, alpha=0.05, method="fdr_bh")
    found = {(d["slice"], d["test"]): d["adjusted"] for d in fam["discoveries"]}
    order = [(n, t) for n in names for t in ("hl", "spiegelhalter")]
    assert [key in found for key in order] == list(reject) == [True, True] + [False] * 6
    for key, value in found.items():
        assert value == pytest.approx(adjusted[order.index(key)], rel=1e-12)
        assert value == pytest.approx(H6_ADJUSTED[order.index(key)], rel=1e-6)


def test_by_on_nested_slices_matches_statsmodels() -> None:
    names = ["overall", "region:coast", "region:inland", "region:coast,tier:express"]
    rng = np.random.default_rng(4)
    p = list(np.sort(rng.uniform(0, 0.02, 8)))
    p[3] = 0.0004
    fam = p_value_discoveries(entries(names, p), alpha=0.05, window="P28D", version="v2")
    assert (fam["method"], fam["window"], fam["version"]) == ("by", "P28D", "v2")
    reject, adjusted, _, _ = multipletests(p, alpha=0.05, method="fdr_by")
    order = [(n, t) for n in names for t in ("hl", "spiegelhalter")]
    found = {(d["slice"], d["test"]): d["adjusted"] for d in fam["discoveries"]}
    assert [key in found for key in order] == list(reject)
    assert 0 < len(found) < 8
    for key, value in found.items():
        assert value == pytest.approx(adjusted[order.index(key)], rel=1e-12)


def test_missing_p_values_leave_the_family() -> None:
    rows = entries(["overall"], [0.001, 0.5])
    rows.append({"slice": "zone:a", "metrics": {"hl_p_value": None, "spiegelhalter_p_value": None}})
    fam = p_value_discoveries(rows, alpha=0.05, window="P7D", version=None)
    assert fam["m"] == 2 and fam["method"] == "bh"  # overall alone: nothing nests
    assert p_value_discoveries([], alpha=0.05, window="P7D", version=None)["discoveries"] == []


@pytest.mark.parametrize(
    ("slices", "expected"),
    [
        (["overall"], False),
        (["overall", "zone:a"], True),
        (["zone:a", "zone:b", "tier:x"], False),
        (["region:a,tier:x", "region:b,tier:x"], False),
        (["region:a", "region:a,tier:x"], True),
        (["tier:x", "region:b,tier:x"], True),
        (["region:b", "region:a,tier:x"], False),
    ],
)
def test_nesting(slices: list[str], expected: bool) -> None:
    assert nested(slices) is expected
