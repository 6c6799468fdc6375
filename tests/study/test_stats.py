"""Paired comparisons and calibration error against scipy.stats and closed forms."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from holonomic.study.stats import (
    cohens_dz, detectable_difference, expected_calibration_error, holm_adjust, paired_comparison,
    paired_t_power, seeds_needed, wilcoxon_min_p)


def test_interval_and_p_equal_scipy():
    rng = np.random.default_rng(3)
    a = rng.normal(0.8, 0.02, size=7)
    b = a - rng.normal(0.01, 0.01, size=7)
    result = paired_comparison(a, b)
    # reference: scipy.stats.ttest_rel(...).confidence_interval (an independent code path
    # from the scipy.stats.t.interval the harness uses) and scipy.stats.wilcoxon
    ci = stats.ttest_rel(a, b).confidence_interval(0.95)
    assert result.ci_low == pytest.approx(ci.low, rel=1e-12)
    assert result.ci_high == pytest.approx(ci.high, rel=1e-12)
    assert result.p_wilcoxon == pytest.approx(stats.wilcoxon(a - b).pvalue, rel=1e-12)
    assert result.mean_difference == pytest.approx(np.mean(a - b), rel=1e-12)


def test_wilcoxon_floor_with_five_pairs():
    # exact null distribution: all 2^5 sign patterns equally likely, so the smallest
    # two-sided p is 2/32 (closed form); scipy.stats.wilcoxon agrees
    d = np.array([0.01, 0.02, 0.03, 0.04, 0.05])
    result = paired_comparison(d, np.zeros(5))
    assert wilcoxon_min_p(5) == 0.0625
    assert result.p_wilcoxon == pytest.approx(0.0625, rel=1e-12)
    assert not result.includes_zero


def test_interval_that_includes_zero_is_flagged():
    result = paired_comparison(np.array([0.1, -0.1, 0.05, -0.04, 0.0]), np.zeros(5))
    assert result.includes_zero
    same = paired_comparison(np.ones(4), np.ones(4))
    assert same.ci_low == same.ci_high == 0.0 and same.p_wilcoxon == 1.0


def test_ece_closed_forms():
    # closed form: every confidence 0.8 with 60% correct gives ECE = |0.6 - 0.8| = 0.2
    n = 1000
    probs = np.tile([0.8, 0.2], (n, 1))
    labels = np.where(np.arange(n) < 600, 0, 1)
    assert expected_calibration_error(probs, labels) == pytest.approx(0.2, abs=1e-12)
    # two bins: weighted average of per-bin |acc - conf|: 0.5*|1-0.9| + 0.5*|0-0.6| = 0.35
    probs = np.vstack([np.tile([0.9, 0.1], (50, 1)), np.tile([0.6, 0.4], (50, 1))])
    labels = np.r_[np.zeros(50), np.ones(50)]
    assert expected_calibration_error(probs, labels) == pytest.approx(0.35, abs=1e-12)


def test_errors_name_the_argument():
    with pytest.raises(ValueError, match="at least 2 pairs"):
        paired_comparison(np.ones(1), np.ones(1))
    with pytest.raises(ValueError, match="n_bins must be >= 1, got 0"):
        expected_calibration_error(np.ones((2, 2)) / 2, np.zeros(2), n_bins=0)


# --- issue 14: Holm adjustment, effect size, power -----------------------------------

def test_holm_adjust_worked_example():
    # Holm's step-down procedure (Holm, "A simple sequentially rejective multiple test
    # procedure", Scand. J. Statist. 6 (1979) 65-70), computed by hand for m = 4:
    # p = [0.01, 0.04, 0.03, 0.005] sorted: 0.005, 0.01, 0.03, 0.04
    # times (m - j + 1) = 4, 3, 2, 1:       0.02,  0.03, 0.06, 0.04
    # running maximum:                       0.02,  0.03, 0.06, 0.06
    # back in the original order:            0.03,  0.06, 0.06, 0.02
    # (statsmodels' multipletests(method="holm") is not installed here; the hand
    # computation is the reference.) The same four p-values are, as recalled, the worked
    # example of the Wikipedia article "Holm-Bonferroni method": at alpha = 0.05 Holm
    # rejects H1 (0.01) and H4 (0.005) and keeps H2 (0.04) and H3 (0.03), where plain
    # Bonferroni (0.05 / 4 = 0.0125) would also reject H1 and H4 only.
    adjusted = holm_adjust([0.01, 0.04, 0.03, 0.005])
    np.testing.assert_allclose(adjusted, [0.03, 0.06, 0.06, 0.02], rtol=1e-12)
    assert list(adjusted <= 0.05) == [True, False, False, True]
    # capped at 1: 0.6 * 2 = 1.2 -> 1; the running max keeps the second at 1
    np.testing.assert_allclose(holm_adjust([0.6, 0.7]), [1.0, 1.0])
    # a single hypothesis is not adjusted; a missing p stays missing and is not counted
    assert holm_adjust([0.2])[0] == pytest.approx(0.2)
    out = holm_adjust([0.01, float("nan"), 0.02])
    assert math.isnan(out[1]) and out[0] == pytest.approx(0.02) and out[2] == pytest.approx(0.02)


def test_cohens_dz_and_zero_spread():
    # by hand: d = [1, 2, 3]: mean 2, sd (ddof 1) = sqrt((1 + 0 + 1) / 2) = 1 -> d_z = 2
    assert cohens_dz(np.array([1.0, 2.0, 3.0])) == pytest.approx(2.0)
    result = paired_comparison(np.array([2.0, 3.0, 4.0]), np.array([1.0, 1.0, 1.0]))
    assert result.d_z == pytest.approx(2.0) and result.sd_difference == pytest.approx(1.0)
    # zero spread: d_z and the detectable difference are undefined
    flat = paired_comparison(np.array([1.5, 2.5, 3.5]), np.array([1.0, 2.0, 3.0]))
    assert flat.zero_spread and math.isnan(flat.d_z)
    assert math.isnan(flat.detectable_difference)
    assert math.isnan(flat.to_dict()["d_z"])


def _scipy_power(delta, sd, n):
    # reference: scipy.stats.nct directly (power of the two-sided paired t test at 0.05)
    t_crit = stats.t.ppf(0.975, n - 1)
    nc = delta * math.sqrt(n) / sd
    return stats.nct.sf(t_crit, n - 1, nc) + stats.nct.cdf(-t_crit, n - 1, nc)


def test_detectable_difference_against_scipy_nct():
    # sd = 1, n = 10 by hand: the normal approximation (z_0.975 + z_0.8) sd / sqrt(n) =
    # (1.960 + 0.842) / 3.162 = 0.886 ignores the t tails and is too small; with t
    # quantiles (t_9,0.975 + t_9,0.8) / sqrt(10) = (2.262 + 0.883) / 3.162 = 0.995 (a
    # standard approximation). The exact noncentral-t answer is delta = 0.9960.
    delta = detectable_difference(1.0, 10)
    assert delta == pytest.approx(0.9960, abs=5e-4)
    assert 0.886 < delta < 1.01
    assert _scipy_power(delta, 1.0, 10) == pytest.approx(0.8, abs=1e-6)
    # it scales with the sd, and a larger sd gives a larger detectable difference
    assert detectable_difference(2.5, 10) == pytest.approx(2.5 * delta, rel=1e-9)
    assert detectable_difference(0.02, 5) > detectable_difference(0.01, 5)
    # more seeds detect smaller differences; n = 2 still solvable (scipy's nct.cdf is NaN
    # far in the lower tail there: paired_t_power uses the sf with -nc)
    assert detectable_difference(1.0, 2) > detectable_difference(1.0, 5) > delta
    assert paired_t_power(detectable_difference(1.0, 2), 1.0, 2) == pytest.approx(0.8, abs=1e-6)
    assert math.isnan(detectable_difference(0.0, 10))


def test_seeds_needed_against_scipy_nct():
    # d_z = 0.5 at 80% power, two-sided 0.05: 34 pairs (recalled from memory as the
    # G*Power answer for a paired t test; checked here against scipy.stats.nct directly)
    assert seeds_needed(0.5, 1.0) == 34
    assert _scipy_power(0.5, 1.0, 33) < 0.8 <= _scipy_power(0.5, 1.0, 34)
    # at the detectable difference of n seeds, n seeds are exactly enough
    assert seeds_needed(detectable_difference(0.03, 7) * (1 + 1e-9), 0.03) == 7
    # beyond the cap: None (the report says "more than 1000")
    assert seeds_needed(0.001, 1.0) is None
    assert seeds_needed(0.5, 0.0) is None
