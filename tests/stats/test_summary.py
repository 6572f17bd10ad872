"""binary_metrics(sketch): names, equality with raw metrics, bounds, reasons, invariances."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from plumbwatch.stats import calibration as cal
from plumbwatch.stats import corp, cox, discrimination, scores
from plumbwatch.stats._result import Undefined
from plumbwatch.stats.sketch import Sketch
from plumbwatch.stats.summary import METRIC_NAMES, binary_metrics, grid_bounds

EXPECTED_NAMES = {
    "n", "events", "mean_predicted", "observed_rate", "log_loss", "brier",
    "brier_reliability", "brier_resolution", "brier_uncertainty", "ece", "ece_15",
    "ece_equal_mass", "ece_debiased", "hl_statistic", "hl_df", "hl_p_value",
    "spiegelhalter_z", "spiegelhalter_p_value", "calibration_intercept", "calibration_slope",
    "cox_intercept", "oe_ratio", "oe_ratio_low", "oe_ratio_high", "auroc",
    "average_precision", "mcb", "dsc", "unc", "mcb_log", "dsc_log", "unc_log",
}  # fmt: skip


def raw_exact(y: np.ndarray, p: np.ndarray) -> dict[str, float]:
    """The sum-based metrics straight from raw rows (the sketch must equal these)."""
    d = scores.brier_decomposition(y, p, n_bins=10)
    sp = cal.spiegelhalter_z(y, p)
    oe = cal.observed_expected(y, p)
    cd = corp.corp_decomposition(y, p)
    return {
        "n": float(y.size), "events": float(y.sum()), "mean_predicted": float(p.mean()),
        "observed_rate": float(y.mean()), "log_loss": scores.log_loss(y, p),
        "brier": scores.brier_score(y, p), "brier_reliability": d.reliability,
        "brier_resolution": d.resolution, "brier_uncertainty": d.uncertainty,
        "ece": cal.expected_calibration_error(y, p),
        "ece_15": cal.expected_calibration_error(y, p, n_bins=15),
        "ece_debiased": cal.l2_calibration_error(y, p),
        "spiegelhalter_z": sp.z, "spiegelhalter_p_value": sp.p_value,
        "oe_ratio": oe.ratio, "oe_ratio_low": oe.low, "oe_ratio_high": oe.high,
        "unc": cd.brier.unc, "unc_log": cd.log.unc,
    }  # fmt: skip


def raw_approx(y: np.ndarray, p: np.ndarray) -> dict[str, float]:
    """Raw values of the grid-computed metrics."""
    joint = cox.cox_calibration(y, p)
    return {
        "auroc": discrimination.roc_auc(y, p),
        "average_precision": discrimination.average_precision(y, p),
        "ece_equal_mass": cal.expected_calibration_error(y, p, strategy="quantile"),
        "hl_statistic": cal.hosmer_lemeshow(y, p).statistic,
        "calibration_intercept": cox.calibration_in_the_large(y, p).intercept,
        "cox_intercept": joint.intercept,
        "calibration_slope": joint.slope,
    }


def test_names_are_the_design_list() -> None:
    assert set(METRIC_NAMES) == EXPECTED_NAMES and len(METRIC_NAMES) == len(EXPECTED_NAMES)
    values, reasons = binary_metrics(Sketch.from_arrays([0, 1, 1, 0], [0.2, 0.7, 0.9, 0.4]))
    assert set(values) == EXPECTED_NAMES
    assert all(values[k] is None for k in reasons)


def _datasets(simulate, d2, c3):  # type: ignore[no-untyped-def]
    y, p = simulate(20_000, 60, a=0.2, b=0.85)
    # Values on every equal-width threshold and at 0 and 1.
    edges = np.r_[np.arange(11) / 10, np.arange(16) / 15, 0.8999999999999999, 0.3]
    ye = np.resize([0, 1, 1], edges.size)
    return [
        ("simulated", y, p),
        ("d2", d2["y"], d2["p"]),
        ("c3", c3["y_miscal"], c3["p"]),
        ("edges", np.r_[ye, y[:500]], np.r_[edges, p[:500]]),
    ]


def test_sum_based_metrics_equal_raw(simulate, d2, c3) -> None:  # type: ignore[no-untyped-def]
    # DESIGN.md "Storage": sums of per-row terms keep these exact (here to 1e-9).
    for name, y, p in _datasets(simulate, d2, c3):
        values, _ = binary_metrics(Sketch.from_arrays(y, p))
        for key, want in raw_exact(y, p).items():
            assert values[key] == pytest.approx(want, rel=1e-9, abs=1e-12), (name, key)


def test_grid_metrics_within_bounds(simulate, d2, c3) -> None:  # type: ignore[no-untyped-def]
    for name, y, p in _datasets(simulate, d2, c3)[:3]:
        s = Sketch.from_arrays(y, p)
        values, _ = binary_metrics(s)
        bounds = grid_bounds(s)
        for key, want in raw_approx(y, p).items():
            got = values[key]
            assert got is not None
            assert abs(got - want) <= bounds[key] + 1e-12, (name, key, got, want, bounds[key])


def test_d2_through_the_sketch(d2) -> None:  # type: ignore[no-untyped-def]
    # METHODS.md §15 D2 values that stay exact through a sketch.
    values, _ = binary_metrics(Sketch.from_arrays(d2["y"], d2["p"]))
    assert values["spiegelhalter_z"] == pytest.approx(2.5232264887977487, rel=1e-12)
    assert values["oe_ratio"] == pytest.approx(1.1578968932333544, rel=1e-12)
    assert values["unc_log"] == pytest.approx(0.6573397035288463, rel=1e-12)
    assert values["hl_df"] == 10


def test_merged_sketch_equals_whole(simulate) -> None:  # type: ignore[no-untyped-def]
    y, p = simulate(10_000, 61, a=-0.2)
    days = np.random.default_rng(61).integers(0, 28, y.size)
    merged = Sketch.sum(Sketch.from_arrays_grouped(y, p, days, 28))
    a, _ = binary_metrics(merged)
    b, _ = binary_metrics(Sketch.from_arrays(y, p))
    for k in METRIC_NAMES:
        assert a[k] == pytest.approx(b[k], rel=1e-9, abs=1e-12), k


def test_reasons() -> None:
    values, reasons = binary_metrics(Sketch.empty())
    assert values["n"] == 0 and values["log_loss"] is None and reasons["log_loss"] == "no_rows"
    assert set(reasons) == EXPECTED_NAMES - {"n", "events"}
    values, reasons = binary_metrics(Sketch.from_arrays([1, 1, 1], [0.2, 0.5, 0.7]))
    for k in (
        "auroc",
        "average_precision",
        "calibration_slope",
        "cox_intercept",
        "calibration_intercept",
    ):
        assert values[k] is None and reasons[k] == "one_class_only"
    values, reasons = binary_metrics(Sketch.from_arrays([0, 1, 1], [0.5, 0.5, 0.5]))
    assert reasons["spiegelhalter_z"] == "zero_variance"
    assert values["log_loss"] is not None


def test_grid_hosmer_lemeshow_is_valid_under_the_null() -> None:
    # Grid groups depend on p only, so under a calibrated null (external data) the
    # grid statistic's p-values are uniform as for exact deciles.
    from scipy import stats as sps

    from plumbwatch.stats.quantile_bins import hosmer_lemeshow_from_sketch

    rng = np.random.default_rng(20240603)
    pv = np.empty(800)
    for r in range(pv.size):
        p = rng.beta(2.0, 5.0, 1000)
        y = (rng.random(1000) < p).astype(np.int64)
        pv[r] = hosmer_lemeshow_from_sketch(Sketch.from_arrays(y, p)).result.p_value
    assert sps.kstest(pv, "uniform").pvalue > 0.01


def test_sketch_arrays_are_read_only() -> None:
    s = Sketch.from_arrays([0, 1], [0.2, 0.7])
    with pytest.raises(ValueError, match="read-only"):
        s.count[0] = 5.0


# Registry of raw metrics for the invariance checks (a metric per entry).
RAW_METRICS: dict[str, Callable[[np.ndarray, np.ndarray], float]] = {
    "log_loss": scores.log_loss,
    "brier": scores.brier_score,
    "ece": cal.expected_calibration_error,
    "ece_equal_mass": lambda y, p: cal.expected_calibration_error(y, p, strategy="quantile"),
    "ece_debiased": cal.l2_calibration_error,
    "hl_statistic": lambda y, p: cal.hosmer_lemeshow(y, p).statistic,
    "spiegelhalter_z": lambda y, p: cal.spiegelhalter_z(y, p).z,
    "oe_ratio": lambda y, p: cal.observed_expected(y, p).ratio,
    "auroc": discrimination.roc_auc,
    "average_precision": discrimination.average_precision,
    "mcb": lambda y, p: corp.corp_decomposition(y, p).brier.mcb,
    "dsc_log": lambda y, p: corp.corp_decomposition(y, p).log.dsc,
    "cox_slope": lambda y, p: cox.cox_calibration(y, p).slope,
}


def _value(f: Callable[[np.ndarray, np.ndarray], float], y: np.ndarray, p: np.ndarray):  # type: ignore[no-untyped-def]
    try:
        return f(y, p)
    except Undefined as exc:
        return exc.reason


@settings(deadline=None, max_examples=50)
@given(
    st.integers(5, 80).flatmap(
        lambda n: st.tuples(
            st.lists(st.integers(0, 1), min_size=n, max_size=n),
            st.lists(
                st.sampled_from([0.05, 0.2, 0.3, 0.5, 0.77, 0.9]) | st.floats(0.01, 0.99),
                min_size=n,
                max_size=n,
            ),
            st.randoms(use_true_random=False),
        )
    )
)
def test_permutation_invariance(case) -> None:  # type: ignore[no-untyped-def]
    y_list, p_list, rnd = case
    y, p = np.array(y_list, dtype=np.int64), np.array(p_list)
    perm = np.array(rnd.sample(range(y.size), y.size))
    for name, f in RAW_METRICS.items():
        a, b = _value(f, y, p), _value(f, y[perm], p[perm])
        if isinstance(a, str):
            assert a == b, name
        else:
            assert b == pytest.approx(a, rel=1e-9, abs=1e-12), name
    sa, _ = binary_metrics(Sketch.from_arrays(y, p))
    sb, _ = binary_metrics(Sketch.from_arrays(y[perm], p[perm]))
    for k in METRIC_NAMES:
        assert (sa[k] is None) == (sb[k] is None)
        if sa[k] is not None:
            assert sb[k] == pytest.approx(sa[k], rel=1e-9, abs=1e-12), k
