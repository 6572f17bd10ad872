"""Discrimination: AUROC (ties count one half) and average precision.

Both are computed from per-group positive and negative weights, groups taken
in ascending score order: distinct values of p for raw data, grid bins for a
sketch. On a sketch every bin acts as one tied score, so the values are the
exact statistics of the grid-rounded forecasts; the ``bound`` fields give
the worst case distance to the statistics of the unrounded forecasts.

AUROC bound. Pairs (positive, negative) in different bins are ordered
correctly; a pair inside one bin counts 1/2 but is truly 0, 1/2 or 1, so
``|AUROC_grid − AUROC| ≤ Σ_b pos_b·neg_b / (2·P·N)``.

AP bound. Walking bins from the top, let ``TP_a``, ``FP_a`` be the weights above
bin b. Whatever the order inside the bin, the precision credited to each of
its positives lies in ``[TP_a/(TP_a+FP_a+neg_b), (TP_a+pos_b)/(TP_a+FP_a+pos_b)]``
(both ends are monotone in the within-bin rank), while the grid credits
``(TP_a+pos_b)/(TP_a+FP_a+pos_b+neg_b)``; the bin's error is at most
``pos_b/P`` times the larger gap.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from plumbwatch.stats._result import Undefined
from plumbwatch.stats._validate import check_binary_pair
from plumbwatch.stats.sketch import Sketch

FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class GridValue:
    """A statistic computed on the grid and its worst-case distance to the exact one."""

    value: float
    bound: float


def _grouped(
    y_true: ArrayLike, y_prob: ArrayLike, sample_weight: ArrayLike | None
) -> tuple[FloatArray, FloatArray]:
    y, p, w = check_binary_pair(y_true, y_prob, sample_weight)
    ww = np.ones(y.size) if w is None else w
    _, g = np.unique(p, return_inverse=True)
    size = int(g.max()) + 1 if g.size else 0
    pos = np.asarray(np.bincount(g, weights=ww * y, minlength=size), dtype=np.float64)
    neg = np.asarray(np.bincount(g, weights=ww * (1.0 - y), minlength=size), dtype=np.float64)
    return pos, neg


def _check_classes(pos: FloatArray, neg: FloatArray) -> tuple[float, float]:
    n_pos, n_neg = float(pos.sum()), float(neg.sum())
    if n_pos <= 0.0 or n_neg <= 0.0:
        raise Undefined("one_class_only", "AUROC and AP need both outcomes present")
    return n_pos, n_neg


def auroc_from_groups(pos: ArrayLike, neg: ArrayLike) -> float:
    """AUROC from per-group weights in ascending score order (ties within a group: 1/2)."""
    pa, na = np.asarray(pos, dtype=np.float64), np.asarray(neg, dtype=np.float64)
    n_pos, n_neg = _check_classes(pa, na)
    neg_below = np.cumsum(na) - na
    return float(np.sum(pa * (neg_below + 0.5 * na)) / (n_pos * n_neg))


def average_precision_from_groups(pos: ArrayLike, neg: ArrayLike) -> float:
    """``Σ_k (R_k − R_{k−1}) P_k`` over groups from the top score down (as scikit-learn)."""
    pa, na = np.asarray(pos, dtype=np.float64)[::-1], np.asarray(neg, dtype=np.float64)[::-1]
    n_pos, _ = _check_classes(pa, na)
    tp, fp = np.cumsum(pa), np.cumsum(na)
    keep = pa > 0
    return float(np.sum(pa[keep] * tp[keep] / (tp[keep] + fp[keep])) / n_pos)


def roc_auc(
    y_true: ArrayLike, y_prob: ArrayLike, *, sample_weight: ArrayLike | None = None
) -> float:
    """Area under the ROC curve, the Mann–Whitney probability P(p⁺ > p⁻) + ½P(tie).

    References
    ----------
    Hanley, J. A. & McNeil, B. J. (1982). The meaning and use of the area under
    a receiver operating characteristic (ROC) curve. *Radiology* 143(1), §2.

    Examples
    --------
    >>> roc_auc([0, 0, 1, 1, 0, 1, 1, 0], [.1, .4, .35, .8, .4, .9, .4, .05])
    0.8125
    """
    return auroc_from_groups(*_grouped(y_true, y_prob, sample_weight))


def average_precision(
    y_true: ArrayLike, y_prob: ArrayLike, *, sample_weight: ArrayLike | None = None
) -> float:
    """Average precision, the step-wise area under the precision–recall curve.

    References
    ----------
    Zhu, M. (2004). Recall, precision and average precision. Technical report
    2004-09, Dept. of Statistics, University of Waterloo (from memory).
    """
    return average_precision_from_groups(*_grouped(y_true, y_prob, sample_weight))


def roc_auc_from_sketch(sketch: Sketch) -> GridValue:
    """AUROC of the grid-rounded forecasts, with the bound of the module docstring."""
    pos = sketch.sum_y
    neg = np.maximum(sketch.count - sketch.sum_y, 0.0)
    value = auroc_from_groups(pos, neg)
    bound = float(np.sum(pos * neg) / (2.0 * pos.sum() * neg.sum()))
    return GridValue(value, bound)


def average_precision_from_sketch(sketch: Sketch) -> GridValue:
    """Average precision of the grid-rounded forecasts, with its worst-case bound."""
    pos = sketch.sum_y
    neg = np.maximum(sketch.count - sketch.sum_y, 0.0)
    value = average_precision_from_groups(pos, neg)
    pa, na = pos[::-1], neg[::-1]
    tp_above = np.cumsum(pa) - pa
    fp_above = np.cumsum(na) - na
    keep = pa > 0
    tpa, fpa, pb, nb = tp_above[keep], fp_above[keep], pa[keep], na[keep]
    grid_prec = (tpa + pb) / (tpa + fpa + pb + nb)
    hi = (tpa + pb) / (tpa + fpa + pb)
    denom = tpa + fpa + nb
    lo = np.where(denom > 0, tpa / np.where(denom > 0, denom, 1.0), 1.0)
    gap = np.maximum(hi - grid_prec, grid_prec - lo)
    return GridValue(value, float(np.sum(pb * gap) / pos.sum()))
