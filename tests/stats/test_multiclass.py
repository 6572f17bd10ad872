"""Multiclass scores, ECEs and the multiclass sketch (plumbwatch.stats.multiclass)."""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pytest
from sklearn.metrics import brier_score_loss, log_loss

from plumbwatch.stats._result import Undefined
from plumbwatch.stats.multiclass import (
    MulticlassSketch,
    classwise_ece,
    multiclass_brier,
    multiclass_log_loss,
    multiclass_metrics,
    top_label,
    top_label_ece,
)

DATA = Path(__file__).resolve().parent.parent / "data"
A3_Y = [0, 1, 2, 2]
A3_P = [[0.7, 0.2, 0.1], [0.1, 0.6, 0.3], [0.2, 0.2, 0.6], [0.3, 0.4, 0.3]]


@pytest.fixture(scope="module")
def c4() -> tuple[np.ndarray, np.ndarray]:
    d = np.loadtxt(DATA / "C4_multiclass.csv", delimiter=",", skiprows=1)
    return d[:, 4].astype(int), d[:, :4]


def test_a3_log_loss_and_brier() -> None:
    # METHODS.md §15 row A3 (sklearn log_loss / brier_score_loss = hand).
    assert multiclass_log_loss(A3_Y, A3_P) == pytest.approx(0.6455747489491626, rel=1e-12)
    assert multiclass_brier(A3_Y, A3_P) == pytest.approx(0.345, rel=1e-12)
    assert multiclass_log_loss(A3_Y, A3_P) == pytest.approx(log_loss(A3_Y, A3_P), rel=1e-12)
    # sklearn 1.9's multiclass default (scale_by_half='auto') is the unhalved sum.
    assert multiclass_brier(A3_Y, A3_P) == pytest.approx(
        brier_score_loss(A3_Y, A3_P, scale_by_half=False), rel=1e-12
    )


def test_c4_top_label_and_classwise_ece(c4: tuple[np.ndarray, np.ndarray]) -> None:
    # METHODS.md §15 rows C4: top-label ECE15 (netcal = hand), classwise ECE15 (hand).
    y, p = c4
    assert top_label_ece(y, p) == pytest.approx(0.12539247955307398, rel=1e-12)
    assert classwise_ece(y, p) == pytest.approx(0.06485458560156207, rel=1e-12)


def test_digits_logistic_regression_log_loss_matches_sklearn() -> None:
    from sklearn.datasets import load_digits
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import train_test_split

    x, y = load_digits(return_X_y=True)
    x_tr, x_te, y_tr, y_te = train_test_split(x / 16.0, y, test_size=0.4, random_state=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # lbfgs may warn about iterations; not our concern
        model = LogisticRegression(max_iter=300).fit(x_tr, y_tr)
    p = model.predict_proba(x_te)
    assert multiclass_log_loss(y_te, p) == pytest.approx(log_loss(y_te, p), rel=1e-12)
    assert multiclass_brier(y_te, p) == pytest.approx(
        brier_score_loss(y_te, p, scale_by_half=False), rel=1e-10
    )
    assert 0.0 <= top_label_ece(y_te, p) <= 1.0


def test_argmax_ties_go_to_lowest_index() -> None:
    conf, hit = top_label([1, 0], [[0.4, 0.4, 0.2], [0.5, 0.5, 0.0]])
    np.testing.assert_allclose(conf, [0.4, 0.5])
    assert hit.tolist() == [0.0, 1.0]


def test_log_loss_clips_impossible_events() -> None:
    value = multiclass_log_loss([0], [[0.0, 1.0]])
    assert value == pytest.approx(-np.log(np.finfo(float).eps), rel=1e-12)
    assert value == pytest.approx(log_loss([0], [[0.0, 1.0]], labels=[0, 1]), rel=1e-12)


def test_sketch_metrics_equal_array_metrics(c4: tuple[np.ndarray, np.ndarray]) -> None:
    y, p = c4
    s = MulticlassSketch.from_arrays(y, p)
    metrics, reasons = multiclass_metrics(s)
    assert reasons == {}
    assert metrics["n"] == 4000
    assert s.events_by_class == tuple(float(v) for v in np.bincount(y, minlength=4))
    assert metrics["log_loss"] == pytest.approx(multiclass_log_loss(y, p), rel=1e-12)
    assert metrics["brier"] == pytest.approx(multiclass_brier(y, p), rel=1e-12)
    assert metrics["ece_top_label"] == pytest.approx(0.12539247955307398, rel=1e-12)
    assert metrics["ece_classwise"] == pytest.approx(0.06485458560156207, rel=1e-12)
    m10, _ = multiclass_metrics(s, n_bins=10)
    assert m10["ece_top_label"] == pytest.approx(top_label_ece(y, p, n_bins=10), rel=1e-12)


def test_sketch_add_sub_and_round_trip(c4: tuple[np.ndarray, np.ndarray]) -> None:
    y, p = c4
    a = MulticlassSketch.from_arrays(y[:1500], p[:1500])
    b = MulticlassSketch.from_arrays(y[1500:], p[1500:])
    whole = MulticlassSketch.from_arrays(y, p)
    merged = a + b
    assert merged.top.allclose(whole.top)
    assert all(x.allclose(z) for x, z in zip(merged.per_class, whole.per_class, strict=True))
    assert merged.sum_log_loss == pytest.approx(whole.sum_log_loss, rel=1e-12)
    back = whole - b
    assert back.top.allclose(a.top) and back.n == 1500
    assert MulticlassSketch.from_bytes(whole.to_bytes()) == whole
    with pytest.raises(ValueError, match="data"):
        MulticlassSketch.from_bytes(whole.to_bytes()[:-3])
    with pytest.raises(ValueError, match="classes"):
        _ = whole + MulticlassSketch.from_arrays([0], [[0.5, 0.5]])


def test_empty_sketch_reports_reasons() -> None:
    s = MulticlassSketch.from_arrays(np.zeros(0, int), np.zeros((0, 3)))
    metrics, reasons = multiclass_metrics(s)
    assert metrics["log_loss"] is None and reasons["log_loss"] == "no_rows"
    with pytest.raises(Undefined):
        multiclass_log_loss(np.zeros(0, int), np.zeros((0, 3)))


def test_bad_input() -> None:
    with pytest.raises(ValueError, match="y_true"):
        multiclass_log_loss([0, 3], A3_P[:2])
    with pytest.raises(ValueError, match="y_true"):
        multiclass_log_loss([0.5, 1.0], A3_P[:2])
    with pytest.raises(ValueError, match="rows summing to 1"):
        multiclass_brier([0], [[0.5, 0.6]])
    with pytest.raises(ValueError, match="y_prob"):
        top_label_ece([0], [0.5, 0.5])
    with pytest.raises(ValueError, match="length"):
        classwise_ece([0, 1], A3_P)
