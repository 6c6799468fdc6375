"""Mixing diagnostics against closed forms and simple constructed chains."""

import warnings

import numpy as np
import pytest
from scipy import signal, stats

from holonomic.sampling import (
    MixingWarning,
    effective_sample_size,
    integrated_autocorrelation_time,
    mixing_diagnostics,
    rank_normalized_split_rhat,
    split_rhat,
)


def ar1(rho: float, chains: int, draws: int, seed: int) -> np.ndarray:
    """Stationary AR(1) chains x_t = rho x_{t-1} + e_t, e_t ~ N(0, 1)."""
    rng = np.random.default_rng(seed)
    e = rng.standard_normal((chains, draws))
    e[:, 0] /= np.sqrt(1.0 - rho**2)  # start in the stationary law
    return signal.lfilter([1.0], [1.0, -rho], e, axis=1)


@pytest.mark.parametrize("rho, chains, draws", [(0.9, 20, 20000), (0.5, 4, 20000),
                                                (0.3, 4, 20000)])
def test_ar1_autocorrelation_time_matches_closed_form(rho, chains, draws):
    # Closed form for AR(1): tau = (1 + rho)/(1 - rho) (docs/math.md section 5; any time-series text,
    # e.g. Sokal 1997, section 3). Error bar: Madras-Sokal formula returned as stderr.
    x = ar1(rho, chains, draws, seed=11)
    est = integrated_autocorrelation_time(x)
    truth = (1 + rho) / (1 - rho)
    assert est.window_found
    assert abs(est.tau - truth) < 4.0 * est.stderr, (est, truth)
    # The same data must not pass as Sokal's half-size convention (checks the test has teeth).
    assert abs(est.tau / 2 - truth) > 4.0 * est.stderr or truth < 1.5


def test_single_chain_autocorrelation_time_within_error():
    # tau = 19 for rho = 0.9 (closed form as above), one chain only: larger error bar.
    x = ar1(0.9, 1, 50000, seed=3)[0]
    est = integrated_autocorrelation_time(x)
    assert abs(est.tau - 19.0) < 4.0 * est.stderr


def test_ess_of_independent_draws_is_their_number():
    # Independent draws: tau = 1, so ESS = N (definition); tolerance from the returned stderr.
    rng = np.random.default_rng(5)
    x = rng.standard_normal((4, 2000))
    est = integrated_autocorrelation_time(x)
    ess = effective_sample_size(x)
    assert abs(ess / x.size - 1.0) < 4.0 * est.stderr / est.tau
    # heavy-tailed iid draws: the rank-normalised ESS is still about N
    y = stats.cauchy.rvs(size=(4, 2000), random_state=6)
    ess_bulk = effective_sample_size(y, rank_normalize=True)
    assert abs(ess_bulk / y.size - 1.0) < 4.0 * est.stderr / est.tau


def test_ess_of_ar1_is_n_over_tau():
    x = ar1(0.8, 8, 10000, seed=9)
    est = integrated_autocorrelation_time(x)
    ess = effective_sample_size(x)
    truth = x.size * (1 - 0.8) / (1 + 0.8)  # N / tau, closed-form tau of AR(1)
    assert abs(ess - truth) < 4.0 * truth * est.stderr / est.tau


@pytest.mark.parametrize("seed", range(5))
def test_rhat_near_one_for_chains_of_one_distribution(seed):
    # Chains of the same stationary law: R-hat -> 1 as draws grow (Vehtari et al. 2021);
    # with 4 x 2000 AR(1) draws (tau = 3) the statistic stays below their 1.01 threshold.
    x = ar1(0.5, 4, 2000, seed=100 + seed)
    assert rank_normalized_split_rhat(x) < 1.01
    assert split_rhat(x) < 1.01


def test_rhat_large_for_chains_stuck_in_different_modes():
    # Bimodal target; two chains stuck at each mode (Vehtari et al. 2021, section 3).
    rng = np.random.default_rng(1)
    x = rng.standard_normal((4, 1000)) * 0.5
    x[:2] -= 2.0
    x[2:] += 2.0
    assert rank_normalized_split_rhat(x) > 1.1
    assert split_rhat(x) > 1.1


def test_tail_rhat_catches_different_scales():
    # Same location, different scales: the bulk R-hat misses it, the folded (tail) one does not
    # (Vehtari et al. 2021, section 4.2).
    rng = np.random.default_rng(2)
    x = rng.standard_normal((4, 1000))
    x[:2] *= 3.0
    assert split_rhat(x) < 1.01
    assert rank_normalized_split_rhat(x) > 1.1


def test_split_rhat_sees_a_trend_within_one_chain():
    x = np.linspace(0.0, 5.0, 2000) + np.random.default_rng(4).standard_normal(2000)
    assert rank_normalized_split_rhat(x) > 1.1


def test_mixing_diagnostics_warns_only_when_unmixed():
    good = ar1(0.5, 4, 2000, seed=21)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        summary = mixing_diagnostics({"loss": good})
    assert summary["loss"].warnings == ()
    assert summary["loss"].chains == 4
    stuck = good.copy()
    stuck[:2] += 5.0
    with pytest.warns(MixingWarning) as record:
        summary = mixing_diagnostics({"norm": stuck})
    assert summary["norm"].rhat > 1.1
    assert any("R-hat" in str(r.message) for r in record)
    slow = ar1(0.995, 4, 500, seed=22)
    with pytest.warns(MixingWarning) as record:
        mixing_diagnostics({"slow": slow})
    assert any("ESS" in str(r.message) for r in record)


def test_bad_input_names_the_parameter():
    with pytest.raises(ValueError, match="c must"):
        integrated_autocorrelation_time(np.zeros(10) + np.arange(10), c=0.0)
    with pytest.raises(ValueError, match="shape"):
        split_rhat(np.zeros((2, 3, 4)))
    with pytest.raises(ValueError, match="non-finite"):
        effective_sample_size(np.array([1.0, np.nan, 2.0, 3.0, 4.0]))
    with pytest.raises(ValueError, match="rhat_threshold"):
        mixing_diagnostics({"a": np.arange(10.0)}, rhat_threshold=0.5)
