"""Pure calibration statistics: arrays in, numbers out.

Nothing in this package touches a database, a clock, a file or the network
(``tests/stats/test_purity.py`` checks it). Functions take ``y_true`` and
``y_prob`` first, options keyword-only; bad input raises ``ValueError``; a
statistic undefined for valid input raises :class:`Undefined` with a reason.
Every metric that the service reports can be computed from a :class:`Sketch`
as well as from raw arrays. Methods and sources: ``shared/METHODS.md``.
"""

from plumbwatch.stats._result import Undefined
from plumbwatch.stats.calibration import (
    expected_calibration_error,
    hosmer_lemeshow,
    l2_calibration_error,
    observed_expected,
    spiegelhalter_z,
)
from plumbwatch.stats.corp import corp_decomposition, isotonic_calibration, reliability_curve
from plumbwatch.stats.cox import calibration_in_the_large, cox_calibration, recalibration_lr_test
from plumbwatch.stats.cusum import RiskAdjustedCusum, cusum_threshold_by_simulation
from plumbwatch.stats.discrimination import average_precision, roc_auc
from plumbwatch.stats.drift import jensen_shannon, ks_from_counts, ks_test, psi, psi_from_counts
from plumbwatch.stats.evidence import MixtureEvidence, TemperatureEvidence, log_threshold
from plumbwatch.stats.logistic import fit_logistic
from plumbwatch.stats.multiclass import (
    MulticlassSketch,
    classwise_ece,
    multiclass_brier,
    multiclass_log_loss,
    multiclass_metrics,
    top_label_ece,
)
from plumbwatch.stats.multiple import benjamini_hochberg, benjamini_yekutieli, e_bh
from plumbwatch.stats.recalibration import (
    cross_fitted_gain,
    fit_beta,
    fit_isotonic,
    fit_platt,
    fit_recalibration,
    fit_temperature,
)
from plumbwatch.stats.scores import brier_decomposition, brier_score, log_loss
from plumbwatch.stats.sketch import Sketch
from plumbwatch.stats.smooth import smooth_ece, smooth_ece_from_sketch
from plumbwatch.stats.summary import binary_metrics, grid_bounds

__all__ = [
    "MixtureEvidence",
    "MulticlassSketch",
    "RiskAdjustedCusum",
    "Sketch",
    "TemperatureEvidence",
    "Undefined",
    "average_precision",
    "benjamini_hochberg",
    "benjamini_yekutieli",
    "binary_metrics",
    "brier_decomposition",
    "brier_score",
    "calibration_in_the_large",
    "classwise_ece",
    "corp_decomposition",
    "cox_calibration",
    "cross_fitted_gain",
    "cusum_threshold_by_simulation",
    "e_bh",
    "expected_calibration_error",
    "fit_beta",
    "fit_isotonic",
    "fit_logistic",
    "fit_platt",
    "fit_recalibration",
    "fit_temperature",
    "grid_bounds",
    "hosmer_lemeshow",
    "isotonic_calibration",
    "jensen_shannon",
    "ks_from_counts",
    "ks_test",
    "l2_calibration_error",
    "log_loss",
    "log_threshold",
    "multiclass_brier",
    "multiclass_log_loss",
    "multiclass_metrics",
    "observed_expected",
    "psi",
    "psi_from_counts",
    "recalibration_lr_test",
    "reliability_curve",
    "roc_auc",
    "smooth_ece",
    "smooth_ece_from_sketch",
    "spiegelhalter_z",
    "top_label_ece",
]
