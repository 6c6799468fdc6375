"""Paired comparisons and calibration error against scipy.stats and closed forms."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from holonomic.study.stats import expected_calibration_error, paired_comparison, wilcoxon_min_p


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
