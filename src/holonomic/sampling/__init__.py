"""Sampling tools: ensembles, predictive metrics and mixing diagnostics.

Built on the core integrators; the core never imports this package.
"""

from holonomic.sampling.adaptive import AdaptiveLangevin
from holonomic.sampling.diagnostics import (
    AutocorrelationTime,
    MixingSummary,
    MixingWarning,
    autocorrelation,
    effective_sample_size,
    integrated_autocorrelation_time,
    mixing_diagnostics,
    rank_normalized_split_rhat,
    split_rhat,
)
from holonomic.sampling.ensemble import (
    PredictiveEnsemble,
    load_snapshot,
    predict_from_snapshots,
    predict_probabilities,
)
from holonomic.sampling.metrics import (
    accuracy,
    calibration_bins,
    classification_metrics,
    expected_calibration_error,
    negative_log_likelihood,
    predictive_entropy,
)

__all__ = [
    "AdaptiveLangevin",
    "AutocorrelationTime",
    "MixingSummary",
    "MixingWarning",
    "PredictiveEnsemble",
    "accuracy",
    "autocorrelation",
    "calibration_bins",
    "classification_metrics",
    "effective_sample_size",
    "expected_calibration_error",
    "integrated_autocorrelation_time",
    "load_snapshot",
    "mixing_diagnostics",
    "negative_log_likelihood",
    "predict_from_snapshots",
    "predict_probabilities",
    "predictive_entropy",
    "rank_normalized_split_rhat",
    "split_rhat",
]
