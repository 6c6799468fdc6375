r"""Mixing diagnostics for traced scalar observables.

A *trace* is a sequence of values of one scalar observable (the loss, a weight norm, one
predicted probability) recorded along a chain. Several chains run with different seeds are
passed as a 2-d array of shape ``(chains, draws)``; a 1-d array is one chain.

Conventions
-----------
* The integrated autocorrelation time is
  :math:`\tau = 1 + 2 \sum_{t \ge 1} \rho(t)`, so that the effective sample size is
  :math:`n / \tau` and an AR(1) series with coefficient :math:`\rho` has
  :math:`\tau = (1 + \rho)/(1 - \rho)`. Sokal's notes define
  :math:`\tau_{\mathrm{int}} = 1/2 + \sum_{t \ge 1} \rho(t)`, half of ours.
* The sum is cut at Sokal's automatic window: the smallest :math:`M` with
  :math:`M \ge c\, \tau(M)` (``c = 5`` by default; Sokal suggests ``c`` between 4 and 10
  for roughly exponential decay). Its standard error is the Madras-Sokal formula
  :math:`\sigma(\tau) \approx \tau \sqrt{2 (2M + 1)/N}` with :math:`N` the number of draws.
  The error bar covers the statistical error only, not the truncation bias
  :math:`2\sum_{t > M}\rho(t)`, which is small for slowly decaying positive correlation
  (the case that matters) but can be noticeable for anticorrelated series, where the window
  is only a few lags long (AR(1) with rho = -0.4: estimate about 0.40 against 0.43).
* With several chains the autocorrelation is the multi-chain combination of Vehtari et al.
  (2021, eq. 10 of the preprint), which also counts between-chain
  disagreement as correlation: :math:`\rho(t) = 1 - (W - \bar C(t)) / \widehat{\mathrm{var}}^+`,
  where :math:`\bar C(t)` is the mean over chains of the (1/n normalised) autocovariance.
  Vehtari et al. truncate the sum with Geyer's (1992) initial monotone sequence; here
  Sokal's window is used instead, as in the rest of this module.
* Split R-hat halves each chain (dropping the middle draw of odd-length chains) and
  compares within- and between-half variances. The rank-normalised version replaces the
  pooled draws by normal scores of their ranks,
  :math:`z = \Phi^{-1}((r - 3/8)/(S - 1/4))` (Blom's offset), and the reported value is the
  larger of the R-hat of these scores ("bulk") and of the scores of the folded draws
  :math:`|x - \mathrm{median}(x)|` ("tail").

References
----------
* A. D. Sokal, *Monte Carlo methods in statistical mechanics: foundations and new
  algorithms*, lecture notes (Cargese 1996), 1997, section 3.
* N. Madras and A. D. Sokal, J. Stat. Phys. 50 (1988) 109-186 (window and error formula).
* A. Vehtari, A. Gelman, D. Simpson, B. Carpenter and P.-C. Buerkner, Rank-normalization,
  folding, and localization: an improved R-hat for assessing convergence of MCMC,
  Bayesian Analysis 16 (2021) 667-718 (rank-normalised R-hat and ESS, multi-chain
  autocorrelation).
* C. J. Geyer, Practical Markov chain Monte Carlo, Statistical Science 7 (1992) 473-483
  (initial positive and initial monotone sequence estimators).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Mapping

import numpy as np
from scipy import special, stats

__all__ = [
    "MixingWarning",
    "AutocorrelationTime",
    "MixingSummary",
    "autocorrelation",
    "integrated_autocorrelation_time",
    "effective_sample_size",
    "split_rhat",
    "rank_normalized_split_rhat",
    "mixing_diagnostics",
]


class MixingWarning(UserWarning):
    """Chains look unmixed: R-hat above its threshold or too few effective samples."""


@dataclass(frozen=True)
class AutocorrelationTime:
    """Integrated autocorrelation time with its window and Madras-Sokal standard error.

    Attributes:
        tau: :math:`1 + 2\\sum_{t=1}^{M}\\rho(t)`, floored at :math:`1/\\log_{10} N`.
        window: the cut-off :math:`M` chosen by Sokal's rule.
        stderr: :math:`\\tau\\sqrt{2(2M+1)/N}`, N the total number of draws.
        window_found: False when no :math:`M < n` satisfied :math:`M \\ge c\\,\\tau(M)`;
            then the chain is too short for a reliable estimate.
        draws: total number of draws N.
    """

    tau: float
    window: int
    stderr: float
    window_found: bool
    draws: int


@dataclass(frozen=True)
class MixingSummary:
    """Diagnostics of one observable over several chains (see :func:`mixing_diagnostics`)."""

    name: str
    rhat: float
    ess: float
    tau: float
    chains: int
    draws_per_chain: int
    mean: float
    sd: float
    warnings: tuple[str, ...]


def _as_chains(x, name: str = "chains") -> np.ndarray:
    """Return a float64 array of shape (chains, draws) from a 1-d or 2-d array-like."""
    if hasattr(x, "detach"):  # torch tensor
        x = x.detach().cpu().numpy()
    arr = np.asarray(x, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[None, :]
    if arr.ndim != 2:
        raise ValueError(
            f"{name} must be 1-d (one chain) or 2-d (chains, draws); got shape {arr.shape}"
        )
    if arr.shape[1] < 4:
        raise ValueError(f"{name} needs at least 4 draws per chain; got {arr.shape[1]}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} contains non-finite values; drop or fix those draws")
    return arr


def _autocovariance(x: np.ndarray) -> np.ndarray:
    """Autocovariance of each row with the 1/n normalisation, lags 0..n-1 (by FFT)."""
    n = x.shape[-1]
    centred = x - x.mean(axis=-1, keepdims=True)
    size = 1 << (2 * n - 1).bit_length()  # zero padding avoids circular wrap-around
    spectrum = np.fft.rfft(centred, n=size, axis=-1)
    acov = np.fft.irfft(spectrum * np.conj(spectrum), n=size, axis=-1)[..., :n]
    return acov / n


def autocorrelation(chains) -> np.ndarray:
    r"""Autocorrelation :math:`\rho(t)`, t = 0..n-1, of one chain or combined over chains.

    One chain: :math:`\rho(t) = C(t)/C(0)` with :math:`C(t) = \frac1n\sum_{i}(x_i-\bar x)
    (x_{i+t}-\bar x)`. Several chains: the Vehtari et al. (2021) combination described in
    the module docstring, which lowers :math:`\rho` when the chains disagree.

    Args:
        chains: array-like of shape (draws,) or (chains, draws).

    Returns:
        1-d float64 array of length ``draws``.
    """
    x = _as_chains(chains)
    m, n = x.shape
    acov = _autocovariance(x)
    if m == 1:
        if acov[0, 0] <= 0.0:
            raise ValueError("chains is constant; its autocorrelation is undefined")
        return acov[0] / acov[0, 0]
    within = acov[:, 0].mean() * n / (n - 1)  # W: mean of unbiased chain variances
    between_over_n = x.mean(axis=1).var(ddof=1)  # B / n
    var_plus = within * (n - 1) / n + between_over_n
    if var_plus <= 0.0:
        raise ValueError("chains are constant; their autocorrelation is undefined")
    return 1.0 - (within - acov.mean(axis=0)) / var_plus


def integrated_autocorrelation_time(chains, c: float = 5.0) -> AutocorrelationTime:
    r"""Integrated autocorrelation time with Sokal's automatic window.

    .. math::

        \tau(M) = 1 + 2\sum_{t=1}^{M}\rho(t), \qquad
        M^\star = \min\{M : M \ge c\,\tau(M)\}, \qquad
        \sigma(\tau) \approx \tau(M^\star)\sqrt{2(2M^\star+1)/N}.

    Args:
        chains: array-like of shape (draws,) or (chains, draws).
        c: window constant; Sokal recommends 4 to 10 (default 5).

    Returns:
        :class:`AutocorrelationTime`. If no window is found (chain shorter than about
        ``c * tau``), the largest window is used and ``window_found`` is False.
    """
    if not (c > 0 and math.isfinite(c)):
        raise ValueError(f"c must be a positive window constant (Sokal: 4 to 10); got {c}")
    x = _as_chains(chains)
    m, n = x.shape
    rho = autocorrelation(x)
    taus = 1.0 + 2.0 * np.cumsum(rho[1:])  # taus[M-1] = tau(M), M = 1..n-1
    lags = np.arange(1, n)
    ok = lags >= c * taus
    found = bool(ok.any())
    window = int(lags[np.argmax(ok)]) if found else n - 1
    # Short or strongly disagreeing chains can make the sum negative; cap the implied ESS at
    # N log10(N), the bound used with the estimator of Vehtari et al. (2021) (recalled from
    # memory, not checked against the paper), so tau >= 1 / log10(N).
    tau = max(float(taus[window - 1]), 1.0 / math.log10(max(m * n, 10)))
    stderr = abs(tau) * math.sqrt(2.0 * (2 * window + 1) / (m * n))
    return AutocorrelationTime(tau=tau, window=window, stderr=stderr, window_found=found,
                               draws=m * n)


def effective_sample_size(chains, c: float = 5.0, rank_normalize: bool = False) -> float:
    r"""Effective sample size :math:`N/\tau` over all chains.

    Args:
        chains: array-like of shape (draws,) or (chains, draws).
        c: Sokal window constant, see :func:`integrated_autocorrelation_time`.
        rank_normalize: if True, replace the pooled draws by normal scores of their ranks
            first ("bulk" ESS of Vehtari et al. 2021, robust to heavy tails).

    Returns:
        The effective number of independent draws (a float; may slightly exceed N for
        anticorrelated or independent draws because :math:`\tau` is estimated).
    """
    x = _as_chains(chains)
    if rank_normalize:
        x = _rank_normal_scores(x)
    result = integrated_autocorrelation_time(x, c=c)
    return x.size / result.tau


def _split(x: np.ndarray) -> np.ndarray:
    """Halve every chain; the middle draw of an odd-length chain is dropped."""
    half = x.shape[1] // 2
    return np.concatenate([x[:, :half], x[:, x.shape[1] - half:]], axis=0)


def _rank_normal_scores(x: np.ndarray) -> np.ndarray:
    """Normal scores of pooled ranks, Phi^{-1}((r - 3/8)/(S - 1/4)); ties get average ranks."""
    ranks = stats.rankdata(x, method="average").reshape(x.shape)
    return special.ndtri((ranks - 0.375) / (x.size + 0.25))


def _rhat(x: np.ndarray) -> float:
    """Classic R-hat of already split chains: sqrt(var_plus / W)."""
    n = x.shape[1]
    within = x.var(axis=1, ddof=1).mean()
    between_over_n = x.mean(axis=1).var(ddof=1)
    if within <= 0.0:
        return math.inf if between_over_n > 0.0 else math.nan
    return math.sqrt(((n - 1) / n * within + between_over_n) / within)


def split_rhat(chains) -> float:
    r"""Split R-hat without rank normalisation (Gelman et al., BDA3, section 11.4).

    .. math::

        \hat R = \sqrt{\frac{\frac{n-1}{n} W + B/n}{W}}

    over the 2m half-chains of length n, W the mean within-half variance and B/n the
    variance of the half-chain means.
    """
    x = _as_chains(chains)
    return _rhat(_split(x))


def rank_normalized_split_rhat(chains) -> float:
    r"""Rank-normalised split R-hat of Vehtari et al. (2021): max of bulk and tail R-hat.

    Algorithm::

        split each of the m chains into halves              -> 2m chains of length n
        bulk = Rhat(z(x))                  z: normal scores of pooled ranks
        tail = Rhat(z(|x - median(x)|))    folded draws
        return max(bulk, tail)

    Values above 1.01 suggest the chains have not mixed (Vehtari et al., section 4).
    Needs at least 2 chains (or 1 chain, which is split into 2).
    """
    x = _split(_as_chains(chains))
    bulk = _rhat(_rank_normal_scores(x))
    folded = np.abs(x - np.median(x))
    tail = _rhat(_rank_normal_scores(folded))
    return max(bulk, tail)


def mixing_diagnostics(
    traces: Mapping[str, object],
    *,
    rhat_threshold: float = 1.01,
    min_ess_per_chain: float = 100.0,
    c: float = 5.0,
    warn: bool = True,
) -> dict[str, MixingSummary]:
    r"""R-hat, ESS and autocorrelation time for each named observable, with warnings.

    Args:
        traces: name -> array-like of shape (chains, draws) (one row per seed).
        rhat_threshold: warn when the rank-normalised split R-hat exceeds this
            (1.01, Vehtari et al. 2021, section 4).
        min_ess_per_chain: warn when the bulk ESS is below this times the number of chains
            (100 per chain: Vehtari et al. 2021 recommend bulk-ESS above about 400 for four
            chains -- recalled from memory).
        c: Sokal window constant.
        warn: emit :class:`MixingWarning` for each problem found (the messages are also in
            each summary's ``warnings`` field).

    Returns:
        name -> :class:`MixingSummary`.
    """
    if not rhat_threshold >= 1.0:
        raise ValueError(f"rhat_threshold must be >= 1 (1.01 is usual); got {rhat_threshold}")
    if not min_ess_per_chain >= 0.0:
        raise ValueError(f"min_ess_per_chain must be >= 0; got {min_ess_per_chain}")
    out: dict[str, MixingSummary] = {}
    for name, trace in traces.items():
        x = _as_chains(trace, name=f"traces[{name!r}]")
        m, n = x.shape
        problems: list[str] = []
        rhat = rank_normalized_split_rhat(x)
        bulk = _rank_normal_scores(x)
        iat = integrated_autocorrelation_time(bulk, c=c)
        ess = x.size / iat.tau
        if m < 2:
            problems.append(f"{name}: only one chain; run several seeds for a trustworthy R-hat")
        if not rhat <= rhat_threshold:
            problems.append(f"{name}: R-hat {rhat:.3f} > {rhat_threshold} (chains not mixed)")
        if not ess >= min_ess_per_chain * m:
            problems.append(
                f"{name}: bulk ESS {ess:.0f} < {min_ess_per_chain * m:.0f} "
                f"({min_ess_per_chain:g} per chain); run longer or thin less"
            )
        if not iat.window_found:
            problems.append(f"{name}: chains shorter than {c:g} autocorrelation times; "
                            "the ESS estimate is unreliable")
        if warn:
            for msg in problems:
                warnings.warn(msg, MixingWarning, stacklevel=2)
        out[name] = MixingSummary(
            name=name, rhat=rhat, ess=ess, tau=iat.tau, chains=m, draws_per_chain=n,
            mean=float(x.mean()), sd=float(x.std(ddof=1)), warnings=tuple(problems),
        )
    return out
