"""Pure evaluation metrics for the crack screener: counts, intervals, thresholds, calibration.

One package, one module per family; every name is re-exported here, so
``from trainkit import metrics as M`` and ``M.recall_interval`` keep working.
"""

from trainkit.metrics._checks import INTERVAL_METHODS, MetricsError
from trainkit.metrics.agreement import cohen_kappa, mcnemar_test
from trainkit.metrics.breakdowns import breakdown, scale_bands
from trainkit.metrics.calibration import (
    expected_calibration_error,
    fit_temperature,
    negative_log_likelihood,
    reliability_bins,
    softmax,
)
from trainkit.metrics.classification import (
    Interval,
    confusion_matrix,
    per_class_report,
    recall_interval,
    row_normalise,
)
from trainkit.metrics.screening import (
    RecallPromise,
    cracks_needed_for_promise,
    photo_design_effect,
    recall_at_false_alarm,
    screening_scores,
    threshold_for_false_alarms,
    threshold_for_recall,
    threshold_with_recall_promise,
    weighted_thresholds,
)

__all__ = [
    "Interval",
    "RecallPromise",
    "INTERVAL_METHODS",
    "MetricsError",
    "breakdown",
    "cohen_kappa",
    "confusion_matrix",
    "cracks_needed_for_promise",
    "expected_calibration_error",
    "fit_temperature",
    "mcnemar_test",
    "negative_log_likelihood",
    "photo_design_effect",
    "weighted_thresholds",
    "per_class_report",
    "recall_at_false_alarm",
    "recall_interval",
    "reliability_bins",
    "row_normalise",
    "scale_bands",
    "screening_scores",
    "softmax",
    "threshold_for_false_alarms",
    "threshold_for_recall",
    "threshold_with_recall_promise",
]
