"""Statistics for studies: calibration error and paired comparisons across seeds."""

from __future__ import annotations

import functools
import math
import warnings
from dataclasses import asdict, dataclass

import numpy as np
from scipy import optimize, stats

__all__ = ["PairedComparison", "bonferroni_interval", "cohens_dz", "comparison_note",
           "detectable_difference", "expected_calibration_error", "holm_adjust",
           "paired_comparison", "paired_t_power", "seeds_needed", "wilcoxon_min_p"]

#: Power and two-sided level of the power figures (detectable difference, seeds needed).
POWER = 0.8
ALPHA = 0.05
#: Most seeds :func:`seeds_needed` searches; beyond it it returns None ("more than this").
MAX_SEEDS = 1000


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
    #: Standard deviation of the differences (ddof = 1).
    sd_difference: float = math.nan
    #: Cohen's d_z = mean / sd of the differences; NaN with zero spread.
    d_z: float = math.nan
    #: Smallest true mean difference a paired t test at two-sided level :data:`ALPHA`
    #: detects with power :data:`POWER` given ``sd_difference`` and ``n``
    #: (:func:`detectable_difference`); NaN with zero spread.
    detectable_difference: float = math.nan

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
                            tuple(float(x) for x in d), zero_spread, sd,
                            cohens_dz(d), math.nan if zero_spread else
                            detectable_difference(sd, n))


def cohens_dz(differences: np.ndarray) -> float:
    r"""Cohen's :math:`d_z = \bar d / s_d` of paired differences (``s_d`` with ddof 1).

    NaN when the differences have no spread (as in :func:`paired_comparison`: ``s_d <=``
    :data:`ZERO_SPREAD_TOLERANCE` ``* max(1, |mean|)``) or fewer than 2 are given.

    Reference: Cohen, *Statistical Power Analysis for the Behavioral Sciences*, 2nd ed.
    (1988), section 2.3.5 (d for paired observations; the name ``d_z`` is common usage).
    """
    d = np.asarray(differences, dtype=np.float64)
    if d.size < 2 or not np.all(np.isfinite(d)):
        return math.nan
    mean, sd = float(d.mean()), float(d.std(ddof=1))
    if sd <= ZERO_SPREAD_TOLERANCE * max(1.0, abs(mean)):
        return math.nan
    return mean / sd


def bonferroni_interval(differences, m: int, alpha: float = ALPHA
                        ) -> tuple[float, float, float]:
    r"""Simultaneous (Bonferroni) t interval for the mean of paired ``differences`` when
    ``m`` such intervals are read together: ``(low, high, level)`` with level
    :math:`1 - \alpha / m` and :math:`\bar d \pm t_{n-1, 1 - \alpha/(2m)}\, s_d/\sqrt n`
    (scipy.stats.t). All ``m`` intervals cover their true means together with probability
    at least :math:`1 - \alpha` under any dependence (Bonferroni's inequality); ``m = 1``
    is the plain :math:`1 - \alpha` interval. With no spread (as in
    :func:`paired_comparison`) the interval is ``[d, d]``; NaN with fewer than 2 values.

    Reference: Bonferroni simultaneous confidence intervals, e.g. Miller, *Simultaneous
    Statistical Inference*, 2nd ed. (1981), ch. 1 (from memory).
    """
    d = np.asarray(differences, dtype=np.float64)
    if m < 1:
        raise ValueError(f"m must be >= 1, got {m}")
    level = 1.0 - alpha / m
    n = d.size
    if n < 2:
        return math.nan, math.nan, level
    mean, sd = float(d.mean()), float(d.std(ddof=1))
    if sd <= ZERO_SPREAD_TOLERANCE * max(1.0, abs(mean)):
        return mean, mean, level
    low, high = stats.t.interval(level, n - 1, loc=mean, scale=sd / math.sqrt(n))
    return float(low), float(high), level


def holm_adjust(p_values) -> np.ndarray:
    r"""Holm's step-down adjusted p-values, in the order given.

    With the ``m`` p-values sorted ascending, :math:`p_{(1)} \le \dots \le p_{(m)}`,
    :math:`\tilde p_{(i)} = \max_{j \le i} \min(1, (m - j + 1)\, p_{(j)})`. Rejecting the
    hypotheses with :math:`\tilde p \le \alpha` controls the family-wise error rate (the
    chance of any false rejection) at :math:`\alpha` under any dependence.
    Non-finite entries (no p-value) stay NaN and are not counted in ``m``.

    Reference: Holm, "A simple sequentially rejective multiple test procedure",
    Scand. J. Statist. 6 (1979) 65-70.
    """
    p = np.asarray(p_values, dtype=np.float64).ravel()
    out = np.full(p.shape, math.nan)
    valid = np.flatnonzero(np.isfinite(p))
    m = len(valid)
    running = 0.0
    for j, idx in enumerate(valid[np.argsort(p[valid], kind="stable")]):
        running = max(running, min(1.0, (m - j) * p[idx]))  # j from 0: factor m - j
        out[idx] = running
    return out


def paired_t_power(delta: float, sd: float, n: int, alpha: float = ALPHA) -> float:
    r"""Power of the two-sided paired t test at level ``alpha`` with ``n`` pairs when the
    true mean difference is ``delta`` and the differences' sd is ``sd``:

    .. math:: 1 - F_{nct}(t_c; n-1, \lambda) + F_{nct}(-t_c; n-1, \lambda),\quad
              \lambda = \delta \sqrt n / sd,\ t_c = t_{n-1, 1-\alpha/2}

    (``scipy.stats.nct``).
    """
    df = n - 1
    t_crit = stats.t.ppf(1.0 - alpha / 2.0, df)
    nc = delta * math.sqrt(n) / sd
    # lower tail F_nct(-t_c; df, nc) as sf_nct(t_c; df, -nc) (T with -nc is distributed as
    # -T with nc): scipy 1.17's nct.cdf returns NaN far in that tail, its sf does not
    lower = stats.nct.sf(t_crit, df, -nc)
    if not math.isfinite(lower):
        lower = stats.nct.cdf(-t_crit, df, nc)
    return float(stats.nct.sf(t_crit, df, nc) + lower)


@functools.lru_cache(maxsize=256)
def _detectable_in_sd(n: int, power: float, alpha: float) -> float:
    """:func:`detectable_difference` for ``sd = 1`` (it scales with sd)."""
    high = 1.0
    while paired_t_power(high, 1.0, n, alpha) < power:
        high *= 2.0
        if high > 1e6:
            return math.inf
    return float(optimize.brentq(lambda k: paired_t_power(k, 1.0, n, alpha) - power,
                                 0.0, high, xtol=1e-12, rtol=1e-12))


def detectable_difference(sd: float, n: int, power: float = POWER,
                          alpha: float = ALPHA) -> float:
    """Smallest true mean difference ``delta > 0`` that a two-sided paired t test at level
    ``alpha`` with ``n`` pairs detects with probability ``power`` when the differences' sd
    is ``sd`` (:func:`paired_t_power` solved for ``delta`` by ``scipy.optimize.brentq``).

    With the *observed* sd of a few seeds this is rough: the sd is itself uncertain.
    NaN when ``sd`` is not a positive finite number or ``n < 2``.
    """
    if n < 2 or not (math.isfinite(sd) and sd > 0.0):
        return math.nan
    return sd * _detectable_in_sd(int(n), float(power), float(alpha))


def seeds_needed(min_effect: float, sd: float, power: float = POWER, alpha: float = ALPHA,
                 cap: int = MAX_SEEDS) -> int | None:
    """Smallest number of seeds ``n >= 2`` whose two-sided paired t test at level ``alpha``
    detects a true mean difference ``min_effect`` with probability ``>= power`` when the
    differences' sd is ``sd`` (:func:`paired_t_power`, which grows with ``n``; bisection).

    None when even ``cap`` seeds are not enough, or ``sd`` / ``min_effect`` are not
    positive finite numbers.
    """
    if not (math.isfinite(sd) and sd > 0.0 and math.isfinite(min_effect) and min_effect > 0):
        return None
    if paired_t_power(min_effect, sd, cap, alpha) < power:
        return None
    low, high = 1, cap  # power(low) < power (n = 1 has no test), power(high) >= power
    while high - low > 1:
        mid = (low + high) // 2
        if paired_t_power(min_effect, sd, mid, alpha) >= power:
            high = mid
        else:
            low = mid
    return high
