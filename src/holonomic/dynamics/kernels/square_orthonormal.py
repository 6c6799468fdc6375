r"""Closed-form kernel: BAOAB-RATTLE for square orthonormal parameters (``O(n)``).

With ``X`` square, ``X^T X = I`` (the scale divided out) and ``P = X Omega``
tangent (``Omega`` skew), the SHAKE drift of length ``s`` has the closed form::

    X' = X K,   K = R + s Omega,   R = sqrt(I + s^2 Omega^2) = sum_j binom(1/2, j) Z^j,
    Z = s^2 Omega^2,  P' = X' Omega

(it exists for ``s ||Omega||_2 <= 1``).  One BAOAB step in the body frame,
``V = P - h f``, ``d = e^{-gamma h}``::

    B   Omega1 = skew(X^T V)
    A   X1 = X K(Omega1)
    O   Omega2 = d Omega1 + sigma skew(X1^T xi)
    A   X2 = X1 K(Omega2),   P2 = X2 Omega2

The series are cut where their tail bound is below the constraint's tolerance
(the degree is reported as the projection iteration count); at ``T = 0`` the
two drifts are evaluated from the products ``W A^k``.  The kernel declines
(the reference kernel takes the step) when ``||Z||_F > 1/4``, when no degree
up to ``MAX_DEGREE`` suffices or when a value is not finite.  Derivations,
truncation budgets and the roundoff-drift correction: ``docs/kernels.md``.
"""

from __future__ import annotations

import math
from functools import lru_cache
from typing import Mapping, Sequence

import torch
from torch import Tensor

from holonomic.dynamics.kernels.protocol import Layout, fusable_dtype, is_plain_baoab
from holonomic.dynamics.operators import ou_coefficients
from holonomic.dynamics.transaction import GroupResult, StepInput, StepResult
from holonomic.geometry import Orthonormal
from holonomic.geometry.base import Constraint, default_tolerance

__all__ = [
    "SquareOrthonormalKernel",
    "MAX_DEGREE",
    "sqrt_series",
    "series_degree",
    "matrix_series",
    "square_orthonormal_baoab",
]

#: Highest series degree tried before the kernel declines (the reference kernel takes the step).
MAX_DEGREE = 24
_TERMS = 48  # coefficients kept for tail bounds (zeta <= 1/4: 4^-48 is negligible)
_ZETA_MAX = 0.25
#: Tail budget of the odd series at T = 0, as a fraction of the tolerance (docs/kernels.md).
_ODD_BUDGET = 0.5
#: Tail budget of the momentum at T = 0, as a fraction of the tolerance (docs/kernels.md).
_MOMENTUM_BUDGET = 0.5
#: Highest power of A that the T = 0 step reaches by products W A^k (docs/kernels.md).
_PRODUCTS_MAX = 4


@lru_cache(maxsize=None)
def sqrt_series(terms: int = _TERMS) -> tuple[float, ...]:
    """Taylor coefficients ``binom(1/2, j)`` of ``sqrt(1 + z)``, ``j < terms``."""
    c = [1.0]
    for j in range(terms - 1):
        c.append(c[-1] * (0.5 - j) / (j + 1))
    return tuple(c)


@lru_cache(maxsize=64)
def _combined_series(decay: float) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """``E`` and ``O`` of docs/kernels.md (two drifts at ``T = 0``)."""
    r = sqrt_series()
    rd = [c * decay ** (2 * j) for j, c in enumerate(r)]
    e = [sum(r[i] * rd[j - i] for i in range(j + 1)) for j in range(_TERMS)]
    e[1] += decay
    o = [decay * a + b for a, b in zip(r, rd)]
    return tuple(e), tuple(o)


def series_degree(coefs: tuple[float, ...], zeta: float, target: float, weight: float = 1.0) -> int | None:
    """Smallest ``m`` with ``weight * sum_{j > m} |c_j| zeta^j <= target``;
    ``None`` when ``zeta`` is too large or ``MAX_DEGREE`` does not suffice."""
    if not 0.0 <= zeta <= _ZETA_MAX:
        return None
    terms = [abs(c) * zeta**j for j, c in enumerate(coefs)]
    tail = weight * sum(terms)
    for m, t in enumerate(terms):
        tail -= weight * t
        if tail <= target:
            return m if m <= MAX_DEGREE else None
    return None


def _block_size(degree: int) -> int:
    """Powers ``Z^1..Z^q`` for Paterson-Stockmeyer evaluation: minimise
    ``(q - 1) + (ceil(degree / q) - 1)`` matrix products."""
    if degree <= 1:
        return 1
    return min(range(1, degree + 1), key=lambda q: (q - 1) + (-(-degree // q) - 1))


def _powers(z: Tensor, q: int) -> list[Tensor]:
    out = [z]
    for _ in range(q - 1):
        out.append(out[-1] @ z)
    return out


def matrix_series(coefs: tuple[float, ...], powers: list[Tensor]) -> Tensor:
    r"""``sum_j c_j Z^j`` from ``powers = [Z, ..., Z^q]`` (Paterson-Stockmeyer)::

        p(Z) = B_0 + Z^q (B_1 + Z^q (... B_last)),  B_i = sum_{j<q} c_{iq+j} Z^j

    (the last block may also use ``Z^q``); ``ceil(m / q) - 1`` products.
    Returns a new tensor.
    """
    m = len(coefs) - 1
    q = len(powers)

    def block(cs: tuple[float, ...]) -> Tensor:
        out = torch.zeros_like(powers[0]) if len(cs) == 1 else powers[0].mul(cs[1])
        for j, c in enumerate(cs[2:], start=1):
            out.add_(powers[j], alpha=c)
        out.diagonal(dim1=-2, dim2=-1).add_(cs[0])
        return out

    n_blocks = max(1, -(-m // q))
    acc = block(coefs[(n_blocks - 1) * q:])
    for i in range(n_blocks - 2, -1, -1):
        acc = torch.baddbmm(block(coefs[i * q:(i + 1) * q]), powers[-1], acc)
    return acc


def _scaled_skew(a: Tensor, b: Tensor, alpha: float) -> Tensor:
    """``alpha (a^T b - b^T a)``, batched (one product and one pass)."""
    m = torch.baddbmm(a.new_zeros(()), a.transpose(-1, -2), b, beta=0, alpha=alpha)
    return m - m.transpose(-1, -2)


@lru_cache(maxsize=16)
def _probe(n: int, device: str) -> Tensor:
    """Four fixed unit probe vectors (float64) for the drift check, from a
    private seeded generator (the global RNG is not touched)."""
    g = torch.Generator().manual_seed(12345)
    v = torch.randn(n, 4, generator=g, dtype=torch.float64)
    return (v / v.norm(dim=0)).to(device)


def _zeta(z: Tensor) -> Tensor:
    """``||Z||_F``, an upper bound of ``||Z||_2`` (one fused pass), batch max."""
    return torch.linalg.vector_norm(z, dim=(-2, -1)).amax()


def _drift_error(w: Tensor, scale2: float) -> Tensor:
    """``max |v^T (X^T X - I) v| = max | |X v|^2 - 1 |`` over the unit probe
    vectors and the batch, ``X = W / scale``, computed in float64 from
    matrix-vector products (for random symmetric ``X^T X - I`` it is about
    the size of a typical entry, for ``eps I`` it is ``eps``)."""
    xv = w.to(torch.float64) @ _probe(w.shape[-1], str(w.device))
    return (xv.square().sum(-2) / scale2 - 1.0).abs().amax()


def _drift_factor(coefs: tuple[float, ...], odd: tuple[float, ...], z: Tensor, a: Tensor,
                  m_e: int, m_o: int) -> Tensor:
    """``E(Z) + A O(Z)`` with the series cut at degrees ``m_e``, ``m_o``."""
    powers = _powers(z, _block_size(max(m_e, m_o, 1)))
    k = matrix_series(coefs[:m_e + 1], powers)
    if m_o == 0:
        return k.add_(a, alpha=odd[0])
    return torch.baddbmm(k, a, matrix_series(odd[:m_o + 1], powers))


def square_orthonormal_baoab(
    w: Tensor,
    v: Tensor,
    noise: Tensor | None,
    *,
    scale: float,
    step: float,
    decay: float,
    sigma: float,
    tolerance: float,
) -> tuple[Tensor, Tensor, Tensor, Tensor, int] | None:
    r"""One BAOAB step for a batch of square orthonormal matrices.

    ``w`` (b, n, n) with ``W^T W = scale^2 I``, ``v = P - h f`` (the momentum
    after the full kick, not yet projected), ``noise`` the standard normal
    noise (``sigma`` its scale) or ``None`` at ``T = 0``, all in the
    parameter's units; the unit frame of docs/kernels.md is
    ``X = W / scale``, and the scale is folded into the products.  Returns
    ``(W2, P2, kinetic, ok, degree)`` (``kinetic`` = ``|P2|^2 / 2`` per
    matrix, ``ok`` a 0-d flag of finite results) or ``None`` when the closed
    form does not apply (docs/kernels.md).  Nothing is modified in place.
    """
    s = 0.5 * step
    scale2 = scale * scale
    if noise is None:
        return _cold_step(w, v, scale=scale, s=s, decay=decay, tolerance=tolerance)
    target = 0.25 * tolerance
    a = _scaled_skew(w, v, 0.5 * s / scale2)  # A = s Omega1 = s skew(X^T V)
    z = torch.bmm(a, a)  # Z = s^2 Omega^2
    zeta, drift = (float(t) for t in torch.stack([_zeta(z), _drift_error(w, scale2)]).cpu())  # one sync
    if not math.isfinite(zeta):
        return None
    w = _correct_drift(w, drift, scale2, tolerance)
    if w is None:
        return None
    r = sqrt_series()
    m1 = series_degree(r, zeta, target)
    if m1 is None:
        return None
    w1 = torch.bmm(w, _drift_factor(r, (1.0,), z, a, m1, 0))
    a2 = _scaled_skew(w1, noise, 0.5 * s * sigma / scale2).add_(a, alpha=decay)
    z2 = torch.bmm(a2, a2)
    zeta2 = float(_zeta(z2))  # the second drift has its own degree (one more sync)
    m2 = series_degree(r, zeta2, target) if math.isfinite(zeta2) else None
    if m2 is None:
        return None
    w2 = torch.bmm(w1, _drift_factor(r, (1.0,), z2, a2, m2, 0))
    p2 = torch.baddbmm(w2.new_zeros(()), w2, a2, beta=0, alpha=1.0 / s)  # P2 = scale X2 Omega2 = W2 A2 / s
    return _finish(w2, p2, max(m1, m2, 1))


def _correct_drift(w: Tensor, drift: float, scale2: float, tolerance: float) -> Tensor | None:
    """``w`` itself, ``w`` after one Newton-Schulz step when its measured
    roundoff drift exceeds an eighth of the tolerance, or ``None`` (plain
    path) when the drift is not finite or too large for one step to reach
    roundoff (e.g. a weight projected in float32 and then cast to float64)."""
    if not math.isfinite(drift) or drift > math.sqrt(0.125 * tolerance):
        return None
    if drift <= 0.125 * tolerance:
        return w
    g = torch.bmm(w.transpose(-1, -2), w).mul_(-0.5 / scale2)  # X <- X (3 I - X^T X) / 2
    g.diagonal(dim1=-2, dim2=-1).add_(1.5)
    return torch.bmm(w, g)


def _finish(w2: Tensor, p2: Tensor, degree: int) -> tuple[Tensor, Tensor, Tensor, Tensor, int]:
    kinetic = 0.5 * torch.linalg.vector_norm(p2, dim=(-2, -1)) ** 2
    # W2 is finite when W, Z and A are (their bounds were read finite above); a
    # finite kinetic energy shows P2 is too
    ok = torch.isfinite(kinetic).all()
    return w2, p2, kinetic, ok, degree


@lru_cache(maxsize=64)
def power_coefficients(decay: float, count: int) -> tuple[float, ...]:
    """``kappa_k``, ``k < count``, of ``K = sum_k kappa_k A^k`` at ``T = 0``:
    ``kappa_{2j} = e_j`` and ``kappa_{2j+1} = o_j`` (docs/kernels.md)."""
    e, o = _combined_series(decay)
    return tuple(e[k // 2] if k % 2 == 0 else o[k // 2] for k in range(count))


def momentum_tail(decay: float, zeta: float, first: int) -> float:
    """``tau = sum_{k >= first} |kappa_k| zeta^{(k+1)/2}``, a bound of
    ``|| sum_{k >= first} kappa_k A^{k+1} ||_2`` for ``||A||_2^2 <= zeta``:
    what ``X K A`` loses (unit frame) when the momentum keeps only the
    products ``W A^j``, ``j <= first`` (docs/kernels.md)."""
    kappa = power_coefficients(decay, 2 * _TERMS)
    return sum(abs(c) * zeta ** ((k + 1) / 2) for k, c in enumerate(kappa) if k >= first)


def _cold_degrees(decay: float, zeta: float, tolerance: float) -> tuple[int, int, int] | None:
    """``(m_e, m_o, N)`` at ``T = 0``: the degrees of the series ``E`` and
    ``O`` for ``||Z||_2 <= zeta`` and the highest power of ``A`` in ``K``,
    rounded up to an even number (docs/kernels.md); ``None`` when no degree
    suffices."""
    if not math.isfinite(zeta):
        return None
    e, o = _combined_series(decay)
    m_e = series_degree(e, zeta, 0.125 * tolerance)
    # the odd part's truncation error is skew: it moves K off O(n) only at second order
    # (docs/kernels.md), so it gets the looser budget of a trajectory error
    m_o = series_degree(o, zeta, _ODD_BUDGET * tolerance, weight=math.sqrt(zeta))
    if m_e is None or m_o is None:
        return None
    top = max(2 * m_e, 2 * m_o + 1)
    return m_e, m_o, top + top % 2


def _cold_step(w: Tensor, v: Tensor, *, scale: float, s: float, decay: float,
               tolerance: float) -> tuple[Tensor, Tensor, Tensor, Tensor, int] | None:
    """The ``T = 0`` step from the products ``U_k = W A^k`` (docs/kernels.md)."""
    scale2 = scale * scale
    a = _scaled_skew(w, v, 0.5 * s / scale2)  # A = s Omega1 = s skew(X^T V)
    # ||Z||_F <= ||A||_F^2 bounds zeta without a product (first sync, with the drift check)
    rough, drift = (float(t) for t in torch.stack([_zeta(a).square(), _drift_error(w, scale2)]).cpu())
    w = _correct_drift(w, drift, scale2, tolerance)
    if w is None or not math.isfinite(rough):
        return None
    rough_degrees = _cold_degrees(decay, rough, tolerance)
    if rough_degrees is not None and rough_degrees[2] <= _PRODUCTS_MAX:
        z = None
        u = [w, torch.bmm(w, a)]
        u.append(torch.bmm(u[1], a))
        zeta = float(_zeta(u[2])) / scale  # ||W Z||_F = scale ||Z||_F (second sync)
    else:  # even the bound needs the series in Z: form Z first
        z = torch.bmm(a, a)
        u = None  # formed below only if the exact zeta allows the products
        zeta = float(_zeta(z))  # second sync
    degrees = _cold_degrees(decay, zeta, tolerance)
    if degrees is None:
        return None
    m_e, m_o, top = degrees
    degree = max(m_e, m_o, 1)
    p_alpha = decay / s
    if top > _PRODUCTS_MAX:  # large zeta (early, or large steps): Z's series is cheaper
        e, o = _combined_series(decay)
        w2 = torch.bmm(w, _drift_factor(e, o, torch.bmm(a, a) if z is None else z, a, m_e, m_o))
        return _finish(w2, torch.baddbmm(w2.new_zeros(()), w2, a, beta=0, alpha=p_alpha), degree)
    if u is None:
        u = [w, torch.bmm(w, a), torch.bmm(w, z)]
    while len(u) <= top:
        u.append(torch.bmm(u[-1], a))
    # at decay 0 the momentum is zero: nothing to add
    cut = decay == 0 or momentum_tail(decay, zeta, top) <= _MOMENTUM_BUDGET * tolerance
    last = top if cut else top + 1
    if len(u) <= last:
        u.append(torch.bmm(u[-1], a))
    kappa = power_coefficients(decay, top + 1)  # kappa_0 = e_0 = 1
    w2 = torch.add(u[0], u[1], alpha=kappa[1])
    for k in range(2, top + 1):
        w2.add_(u[k], alpha=kappa[k])
    p2 = u[1] * p_alpha
    for k in range(1, last):
        p2.add_(u[k + 1], alpha=p_alpha * kappa[k])
    return _finish(w2, p2, degree)


class SquareOrthonormalKernel:
    """BAOAB-RATTLE for square ``Orthonormal`` parameters in closed form, batched
    over the parameters of one shape, dtype, device, tolerance and settings."""

    name = "square-orthonormal"

    def supports(self, scheme: object, settings: object, constraint: Constraint, dtype: torch.dtype,
                 device: torch.device, layout: Layout) -> bool:
        shape = layout.shape
        return (isinstance(constraint, Orthonormal) and layout.dense and is_plain_baoab(scheme, settings)
                and fusable_dtype(dtype, True) and len(shape) >= 2 and shape[0] == math.prod(shape[1:]))

    def run(self, inputs: Sequence[StepInput], group_states: Mapping[int, Mapping[str, Tensor]]
            ) -> tuple[list[StepResult | None], dict[int, GroupResult]]:
        results: list[StepResult | None] = [None] * len(inputs)
        batches: dict[tuple, list[int]] = {}
        for i, u in enumerate(inputs):
            s, w, c = u.settings, u.position, u.constraint
            tol = c.tolerance if c.tolerance is not None else default_tolerance(w.dtype)
            batches.setdefault((s.step, s.friction, s.temperature, w.shape, w.dtype, w.device, tol), []).append(i)
        for (h, friction, temperature, shape, _, _, tol), members in batches.items():
            decay, sigma = ou_coefficients(friction, h, temperature)
            _batch(inputs, members, results, shape[0], h, decay, sigma, tol)
        return results, {}


def _batch(inputs: Sequence[StepInput], members: list[int], results: list, n: int, h: float, decay: float,
           sigma: float, tol: float) -> None:
    """One batched closed-form step; leaves ``results`` at ``None`` (declined) when
    the closed form does not apply."""
    items = [inputs[i] for i in members]
    scales = {u.constraint.scale for u in items}
    if len(scales) > 1:  # different scales in one batch: one unit scale, folded per matrix
        def stacked(ts: list[Tensor]) -> Tensor:
            return torch.stack([t.reshape(n, n) / u.constraint.scale for t, u in zip(ts, items)])
        scale = 1.0
    else:
        def stacked(ts: list[Tensor]) -> Tensor:
            mats = [t.reshape(n, n) for t in ts]
            return mats[0].unsqueeze(0) if len(mats) == 1 else torch.stack(mats)
        scale = scales.pop()
    kicked = [u.force().mul(-h) if u.momentum is None else torch.add(u.momentum, u.force(), alpha=-h)
              for u in items]
    noise = None if sigma <= 0 else stacked([u.noise[0] for u in items])
    out = square_orthonormal_baoab(stacked([u.position for u in items]), stacked(kicked), noise, scale=scale,
                                   step=h, decay=decay, sigma=sigma, tolerance=tol)
    if out is None:
        return
    w2, p2, kinetic, ok, degree = out
    for k, (i, u) in enumerate(zip(members, items)):
        factor = u.constraint.scale / scale

        def apply(u=u, w2=w2[k], p2=p2[k], kinetic=kinetic[k], factor=factor):
            momentum = p2.view(u.position.shape)
            if factor != 1.0:
                w2, momentum, kinetic = w2 * factor, momentum * factor, kinetic * factor**2
            u.position.copy_(w2.view(u.position.shape))
            return momentum, kinetic

        results[i] = StepResult(ok, degree, apply, SquareOrthonormalKernel.name)
