"""AUROC and average precision, raw and from sketches with their bounds."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import average_precision_score, roc_auc_score

from plumbwatch.stats._result import Undefined
from plumbwatch.stats.discrimination import (
    average_precision,
    average_precision_from_sketch,
    roc_auc,
    roc_auc_from_sketch,
)
from plumbwatch.stats.sketch import Sketch

A1_Y = [0, 0, 1, 1, 0, 1, 1, 0]
A1_P = [0.1, 0.4, 0.35, 0.8, 0.4, 0.9, 0.4, 0.05]


def test_a1_values() -> None:
    # METHODS.md §15 A1: AUROC 0.8125 (tie 0.4 in both classes), AP 0.8166666666666667.
    assert roc_auc(A1_Y, A1_P) == pytest.approx(0.8125, rel=1e-12)
    assert average_precision(A1_Y, A1_P) == pytest.approx(0.8166666666666667, rel=1e-12)


def test_against_sklearn_with_ties_and_weights(simulate, breast_cancer_probs) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(5000, 50)
    p = np.round(p, 2)  # many ties
    w = np.random.default_rng(50).random(5000)
    for yy, pp in ((y, p), breast_cancer_probs):
        assert roc_auc(yy, pp) == pytest.approx(roc_auc_score(yy, pp), rel=1e-12)
        assert average_precision(yy, pp) == pytest.approx(
            average_precision_score(yy, pp), rel=1e-12
        )
    assert roc_auc(y, p, sample_weight=w) == pytest.approx(
        roc_auc_score(y, p, sample_weight=w), rel=1e-12
    )
    assert average_precision(y, p, sample_weight=w) == pytest.approx(
        average_precision_score(y, p, sample_weight=w), rel=1e-12
    )


@pytest.mark.parametrize(("seed", "sd"), [(51, 1.5), (52, 0.7), (53, 3.0)])
def test_sketch_values_within_bounds(simulate, seed: int, sd: float) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(50_000, seed, a=0.1, b=0.9, sd=sd)
    s = Sketch.from_arrays(y, p)
    auc, ap = roc_auc_from_sketch(s), average_precision_from_sketch(s)
    exact_auc, exact_ap = roc_auc_score(y, p), average_precision_score(y, p)
    assert abs(auc.value - exact_auc) <= auc.bound
    assert abs(ap.value - exact_ap) <= ap.bound
    # DESIGN.md "Metric names": AUROC within 1e-3 of the exact value on realistic data.
    assert abs(auc.value - exact_auc) < 1e-3


def test_breast_cancer_sketch_auroc(breast_cancer_probs) -> None:  # type: ignore[no-untyped-def]
    y, p = breast_cancer_probs
    auc = roc_auc_from_sketch(Sketch.from_arrays(y, p))
    assert abs(auc.value - roc_auc_score(y, p)) <= min(auc.bound, 1e-3)


def test_one_class_is_undefined() -> None:
    for f in (roc_auc, average_precision):
        with pytest.raises(Undefined) as info:
            f([1, 1], [0.2, 0.3])
        assert info.value.reason == "one_class_only"
    with pytest.raises(Undefined):
        roc_auc_from_sketch(Sketch.from_arrays([0, 0], [0.2, 0.3]))
