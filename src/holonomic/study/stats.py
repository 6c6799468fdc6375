"""Statistics for studies: calibration error and paired comparisons across seeds."""

from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass

import numpy as np
from scipy import stats

__all__ = ["PairedComparison", "comparison_note", "expected_calibration_error",
           "paired_comparison", "wilcoxon_min_p"]


def expected_calibration_error(probabilities: np.ndarray, labels: np.ndarray,
                               n_bins: int = 15) -> float:
    r"""Expected calibration error with equal-width confidence bins.

    .. math::  \mathrm{ECE} = \sum_b \frac{|B_b|}{n} \left| \mathrm{acc}(B_b)
               - \mathrm{conf}(B_b) \right|

    where the confidence is the largest predicted probability and bin ``b`` holds the
    confidences in ``((b-1)/B, b/B]`` (the first bin also holds 0).

    References:
        Naeini, Cooper & Hauskrecht, AAAI 2015; Guo, Pleiss, Sun & Weinberger, ICML 2017.
    """
    probabilities = np.asarray(probabilities, dtype=np.float64)
    labels = np.asarray(labels)
    if probabilities.ndim != 2 or len(probabilities) != len(labels):
        raise ValueError("probabilities must be (n, k) and labels (n,), got "
                         f"{probabilities.shape} and {labels.shape}")
    if n_bins < 1:
        raise ValueError(f"n_bins must be >= 1, got {n_bins}")
    confidence = probabilities.max(axis=1)
    correct = (probabilities.argmax(axis=1) == labels).astype(np.float64)
    bins = np.clip(np.ceil(confidence * n_bins).astype(int) - 1, 0, n_bins - 1)
    total = 0.0
    for b in range(n_bins):
        mask = bins == b
        if mask.any():
            total += mask.sum() * abs(correct[mask].mean() - confidence[mask].mean())
    return float(total / len(labels))


def wilcoxon_min_p(n: int) -> float:
    """Smallest two-sided exact Wilcoxon signed-rank p-value with ``n`` pairs: ``2 / 2^n``.

    All ``2^n`` sign patterns are equally likely under the null; the two extreme ones give
    the smallest two-sided p. With 5 seeds this is 0.0625, so ``p < 0.05`` is impossible.
    """
    return min(1.0, 2.0 / 2.0 ** n)


@dataclass(frozen=True)
class PairedComparison:
    """Mean of paired differences ``arm - baseline`` over seeds, with a t interval and a
    Wilcoxon signed-rank p-value."""

    n: int
    mean_difference: float
    ci_low: float
    ci_high: float
    confidence: float
    p_wilcoxon: float
    differences: tuple[float, ...]
    zero_spread: bool = False

    @property
    def includes_zero(self) -> bool:
        """Whether the interval fails to exclude 0. With zero spread (all differences equal
        up to roundoff) the t interval is undefined, so it excludes nothing: True."""
        return self.zero_spread or self.ci_low <= 0.0 <= self.ci_high

    @property
    def note(self) -> str:
        """Why the interval says nothing ("" when it is an ordinary t interval)."""
        if self.zero_spread:
            return (f"all {self.n} paired differences equal: no spread to build an interval "
                    "from")
        return ""

    def to_dict(self) -> dict:
        out = asdict(self)
        out["differences"] = list(self.differences)
        out["includes_zero"] = self.includes_zero
        out["note"] = self.note
        return out


#: Relative size below which the sd of the differences counts as zero (roundoff).
ZERO_SPREAD_TOLERANCE = 1e-12


def comparison_note(comp: dict) -> str:
    """The note of a comparison dict (``""`` for dicts made before ``zero_spread``)."""
    if comp.get("zero_spread"):
        return comp.get("note") or (f"all {comp.get('n', '?')} paired differences equal: "
                                    "no spread to build an interval from")
    return ""


def paired_comparison(values: np.ndarray, baseline: np.ndarray,
                      confidence: float = 0.95) -> PairedComparison:
    r"""Compare paired samples (same seeds) by their differences ``d = values - baseline``.

    Interval: :math:`\bar d \pm t_{n-1, (1+c)/2}\, s_d / \sqrt{n}` from
    ``scipy.stats.t.interval``. When the differences have no spread (``s_d <=``
    :data:`ZERO_SPREAD_TOLERANCE` ``* max(1, |mean|)``, i.e. all equal up to roundoff) the
    t interval is undefined: it is ``[d, d]``, ``zero_spread`` is set and ``includes_zero``
    is True, so no reader calls such a difference better or worse.
    p-value: two-sided ``scipy.stats.wilcoxon(d)``; 1.0 when every difference is zero.
    """
    values = np.asarray(values, dtype=np.float64)
    baseline = np.asarray(baseline, dtype=np.float64)
    if values.shape != baseline.shape or values.ndim != 1:
        raise ValueError("values and baseline must be 1-d arrays of the same length, got "
                         f"{values.shape} and {baseline.shape}")
    n = len(values)
    if n < 2:
        raise ValueError(f"a paired comparison needs at least 2 pairs, got {n}")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be in (0, 1), got {confidence}")
    d = values - baseline
    mean = float(d.mean())
    sd = float(d.std(ddof=1))
    zero_spread = bool(sd <= ZERO_SPREAD_TOLERANCE * max(1.0, abs(mean)))
    if not zero_spread:
        low, high = stats.t.interval(confidence, n - 1, loc=mean, scale=sd / math.sqrt(n))
    else:
        low = high = mean
    if np.all(d == 0.0):
        p = 1.0
    else:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            p = float(stats.wilcoxon(d).pvalue)
    return PairedComparison(n, mean, float(low), float(high), confidence, p,
                            tuple(float(x) for x in d), zero_spread)
