r"""Estimators behind the audit: constraint violations and kinetic temperature.

Kinetic temperature (unit mass, docs/math.md section 3).  At equilibrium the
momentum ``P`` of a parameter on a constraint set is a Gaussian with variance
``T`` on the tangent space, which has ``N_f`` dimensions
(``Constraint.tangent_dof``), so ``|P|^2 / T`` is chi-square with ``N_f``
degrees of freedom and

.. math::

    \hat T = |P|^2 / N_f, \qquad E[\hat T] = T, \qquad
    \operatorname{sd}(\hat T) = T \sqrt{2 / N_f}.

Dividing by the ambient size ``numel`` instead of ``N_f`` biases the estimate
low by the factor ``N_f / numel`` (``(d - 1)/d`` for fixed-norm rows of length
``d``).  Pooling several parameters adds their ``|P|^2`` and their ``N_f``.
"""

from __future__ import annotations

import math
from functools import lru_cache

import torch
from scipy import stats
from torch import Tensor

from holonomic.geometry import Constraint
from holonomic.geometry.base import default_residual_tolerance

__all__ = [
    "kinetic_temperature",
    "kinetic_fluctuation",
    "kinetic_interval",
    "constraint_violations",
    "default_residual_tolerance",
    "default_tangency_tolerance",
]


def kinetic_temperature(momentum: Tensor, dof: int) -> float:
    r"""``|P|^2 / N_f``: the kinetic temperature of ``momentum`` with ``dof``
    tangent degrees of freedom (unit mass).

    Raises:
        ValueError: ``dof`` is not a positive integer.
    """
    if isinstance(dof, bool) or not isinstance(dof, int) or dof < 1:
        raise ValueError(f"dof must be a positive integer (the tangent degrees of freedom), got {dof!r}")
    return float((momentum.detach().double() ** 2).sum()) / dof


def kinetic_fluctuation(temperature: float, dof: int) -> float:
    r"""Standard deviation ``T sqrt(2 / N_f)`` of one kinetic-temperature
    estimate at equilibrium (chi-square with ``N_f`` degrees of freedom has
    variance ``2 N_f``)."""
    if dof < 1:
        raise ValueError(f"dof must be a positive integer, got {dof!r}")
    return temperature * math.sqrt(2.0 / dof)


@lru_cache(maxsize=4096)
def _interval_factors(dof: int, sigmas: float) -> tuple[float, float]:
    tail = stats.norm.sf(sigmas)  # one-sided tail of +-sigmas of a normal
    return (float(stats.chi2.ppf(tail, dof)) / dof, float(stats.chi2.isf(tail, dof)) / dof)


def kinetic_interval(temperature: float, dof: int, sigmas: float) -> tuple[float, float]:
    r"""Central interval of ``\hat T`` at equilibrium with the coverage of
    ``+-sigmas`` standard deviations of a normal law.

    Uses the exact chi-square quantiles (``T chi2_{N_f}(q) / N_f``), so the
    false-alarm rate is right for small ``N_f`` too, where ``T +- k T
    sqrt(2/N_f)`` would be skewed; for large ``N_f`` the two agree.
    """
    lo, hi = _interval_factors(int(dof), float(sigmas))
    return temperature * lo, temperature * hi


def constraint_violations(constraint: Constraint, w: Tensor) -> Tensor:
    r"""The relative violations whose largest absolute value is
    ``constraint.residual(w)``, as a 1-D tensor.

    :meth:`Constraint.violations`: for FixedNorm ``|w_i| / r - 1`` for every constrained vector;
    for Orthonormal the entries of ``X^T X / s^2 - I``; any other
    constraint: its residual alone (so the RMS equals the maximum).
    """
    return constraint.violations(w)


def default_tangency_tolerance(dtype: torch.dtype) -> float:
    """``sqrt(eps)`` of ``dtype`` (3.5e-4 in float32, 1.5e-8 in float64).

    The tangency residual is *relative* to ``|P|``; when the last projection
    removed a normal part much larger than what is left, roundoff is
    amplified by that ratio, so the tolerance is looser than for positions
    (common practice, no source)."""
    return math.sqrt(torch.finfo(dtype).eps)
