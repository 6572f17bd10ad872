"""Every binary metric that one sketch can give, by its DESIGN.md name.

Exact from sums (equal to the raw-row values up to float rounding): ``n``,
``events``, ``mean_predicted``, ``observed_rate``, ``log_loss``, ``brier``,
``brier_*`` (Murphy terms on 10 equal-width bins), ``ece``, ``ece_15``,
``ece_debiased``, ``spiegelhalter_*``, ``oe_ratio*``, ``unc``, ``unc_log``.

On the grid, with bounds from :func:`grid_bounds`: ``ece_equal_mass`` and
``hl_*`` (quantile cuts on bin boundaries), ``auroc`` and
``average_precision`` (bins as tied scores), ``calibration_intercept``,
``calibration_slope`` and ``cox_intercept`` (pseudo-row fits, second-order
error), ``mcb``/``dsc`` for both scores (PAV over bins; each ≤ its raw value).

``ece_smooth``, ``psi`` and ``ks_*`` come from other modules; the evaluation
engine merges them.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from plumbwatch.stats._result import Undefined
from plumbwatch.stats.calibration import (
    ece_from_bins,
    l2_calibration_error_from_bins,
    observed_expected_from_sums,
    spiegelhalter_from_sums,
)
from plumbwatch.stats.corp import corp_decomposition_from_sketch
from plumbwatch.stats.cox import (
    calibration_in_the_large_from_sketch,
    cox_calibration_from_sketch,
    recalibration_from_sketch,
)
from plumbwatch.stats.discrimination import average_precision_from_sketch, roc_auc_from_sketch
from plumbwatch.stats.quantile_bins import ece_equal_mass_from_sketch, hosmer_lemeshow_from_sketch
from plumbwatch.stats.scores import decomposition_from_bins
from plumbwatch.stats.sketch import Sketch

METRIC_NAMES = (
    "n", "events", "mean_predicted", "observed_rate", "log_loss", "brier",
    "brier_reliability", "brier_resolution", "brier_uncertainty", "ece", "ece_15",
    "ece_equal_mass", "ece_debiased", "hl_statistic", "hl_df", "hl_p_value",
    "spiegelhalter_z", "spiegelhalter_p_value", "calibration_intercept",
    "calibration_slope", "cox_intercept", "oe_ratio", "oe_ratio_low", "oe_ratio_high",
    "auroc", "average_precision", "mcb", "dsc", "unc", "mcb_log", "dsc_log", "unc_log",
)  # fmt: skip

Values = dict[str, float | None]


def _groups(sketch: Sketch) -> list[tuple[tuple[str, ...], Callable[[], dict[str, Any]]]]:
    n = sketch.n

    def murphy() -> dict[str, Any]:
        c = sketch.coarse_sums(10)
        # Σ p·y from the stored sums: Σ(p − y)² = Σp² − 2Σpy + Σy (y² = y).
        spy = (c["sum_p2"] + c["sum_y"] - c["sum_brier"]) / 2.0
        d = decomposition_from_bins(c["count"], c["sum_y"], c["sum_p"], c["sum_p2"], spy)
        return {
            "brier_reliability": d.reliability,
            "brier_resolution": d.resolution,
            "brier_uncertainty": d.uncertainty,
        }

    def ece() -> dict[str, Any]:
        c10, c15 = sketch.coarse_sums(10), sketch.coarse_sums(15)
        return {
            "ece": ece_from_bins(c10["count"], c10["sum_y"], c10["sum_p"]),
            "ece_15": ece_from_bins(c15["count"], c15["sum_y"], c15["sum_p"]),
            "ece_debiased": l2_calibration_error_from_bins(
                c10["count"], c10["sum_y"], c10["sum_p"], debiased=True
            ),
        }

    def hl() -> dict[str, Any]:
        r = hosmer_lemeshow_from_sketch(sketch).result
        return {"hl_statistic": r.statistic, "hl_df": float(r.df), "hl_p_value": r.p_value}

    def spiegelhalter() -> dict[str, Any]:
        r = spiegelhalter_from_sums(
            sketch.total("sum_spiegelhalter_num"), sketch.total("sum_spiegelhalter_var")
        )
        return {"spiegelhalter_z": r.z, "spiegelhalter_p_value": r.p_value}

    def oe() -> dict[str, Any]:
        sp = sketch.total("sum_p")
        r = observed_expected_from_sums(sketch.events, sp, n, sp - sketch.total("sum_p2"))
        return {"oe_ratio": r.ratio, "oe_ratio_low": r.low, "oe_ratio_high": r.high}

    def cox() -> dict[str, Any]:
        joint, citl = recalibration_from_sketch(sketch)
        return {
            "calibration_slope": joint.slope,
            "cox_intercept": joint.intercept,
            "calibration_intercept": citl.intercept,
        }

    def corp() -> dict[str, Any]:
        r = corp_decomposition_from_sketch(sketch)
        return {
            "mcb": r.brier.mcb,
            "dsc": r.brier.dsc,
            "unc": r.brier.unc,
            "mcb_log": r.log.mcb,
            "dsc_log": r.log.dsc,
            "unc_log": r.log.unc,
        }

    return [
        (("brier_reliability", "brier_resolution", "brier_uncertainty"), murphy),
        (("ece", "ece_15", "ece_debiased"), ece),
        (("ece_equal_mass",), lambda: {"ece_equal_mass": ece_equal_mass_from_sketch(sketch).value}),
        (("hl_statistic", "hl_df", "hl_p_value"), hl),
        (("spiegelhalter_z", "spiegelhalter_p_value"), spiegelhalter),
        (("calibration_intercept", "calibration_slope", "cox_intercept"), cox),
        (("oe_ratio", "oe_ratio_low", "oe_ratio_high"), oe),
        (("auroc",), lambda: {"auroc": roc_auc_from_sketch(sketch).value}),
        (
            ("average_precision",),
            lambda: {"average_precision": average_precision_from_sketch(sketch).value},
        ),
        (("mcb", "dsc", "unc", "mcb_log", "dsc_log", "unc_log"), corp),
    ]


def binary_metrics(sketch: Sketch) -> tuple[Values, dict[str, str]]:
    """All sketch-computable binary metrics, and a reason code for each null one.

    Returns
    -------
    values : dict
        Every name in :data:`METRIC_NAMES`; ``None`` where undefined.
    reasons : dict
        ``name -> reason`` for the ``None`` values (``"no_rows"``,
        ``"one_class_only"``, ``"zero_variance"``, ``"no_mle"``, ...).

    Examples
    --------
    >>> values, reasons = binary_metrics(Sketch.from_arrays([0, 1, 1], [0.2, 0.6, 0.9]))
    >>> values["n"], reasons["auroc"] if values["auroc"] is None else "ok"
    (3.0, 'ok')
    """
    values: Values = dict.fromkeys(METRIC_NAMES)
    reasons: dict[str, str] = {}
    n = sketch.n
    values["n"] = n
    values["events"] = sketch.events
    if n <= 0.0:
        for name in METRIC_NAMES[2:]:
            reasons[name] = "no_rows"
        return values, reasons
    values["mean_predicted"] = sketch.total("sum_p") / n
    values["observed_rate"] = sketch.events / n
    values["log_loss"] = sketch.total("sum_log_loss") / n
    values["brier"] = sketch.total("sum_brier") / n
    for names, compute in _groups(sketch):
        try:
            values.update({k: float(v) for k, v in compute().items()})
        except Undefined as exc:
            for name in names:
                reasons[name] = exc.reason
    return values, reasons


def grid_bounds(sketch: Sketch) -> dict[str, float]:
    """Worst-case distance of each grid-computed metric to its raw-data value.

    ``hl_statistic`` and ``ece_equal_mass`` compare with tie-free exact cuts;
    the three logistic coefficients' bounds are first-order (see ``cox``).
    Metrics that are undefined for this sketch are left out.
    """
    out: dict[str, float] = {}
    checks: list[tuple[str, Callable[[], float]]] = [
        ("auroc", lambda: roc_auc_from_sketch(sketch).bound),
        ("average_precision", lambda: average_precision_from_sketch(sketch).bound),
        ("ece_equal_mass", lambda: ece_equal_mass_from_sketch(sketch).bound),
        ("hl_statistic", lambda: hosmer_lemeshow_from_sketch(sketch).bound),
        ("calibration_intercept", lambda: calibration_in_the_large_from_sketch(sketch).bound),
        ("cox_intercept", lambda: cox_calibration_from_sketch(sketch).bound[0]),
        ("calibration_slope", lambda: cox_calibration_from_sketch(sketch).bound[1]),
    ]
    for name, f in checks:
        try:
            out[name] = float(f())
        except Undefined:
            continue
    return out
