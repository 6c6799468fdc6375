r"""Fast path of the BAOAB step for square orthonormal parameters (``O(n)``).

The plain path (:func:`holonomic.dynamics.operators.run_scheme` with
:func:`holonomic.geometry.stiefel.stiefel_shake`) is the reference; the
parity tests in ``tests/speed`` compare the two in float64.

**The RATTLE drift on O(n) in closed form.**  Let ``X`` be square with
``X^T X = I`` (unit frame, the scale divided out) and ``P`` tangent, so
``P = X Omega`` with ``Omega = X^T P`` skew.  SHAKE looks for symmetric
``S`` with ``X' = Y + X S``, ``Y = X + s P``, ``X'^T X' = I``.  Write
``X' = X K`` with ``K = M + s Omega`` and ``M = I + S`` symmetric.  Then::

    K^T K = (M - s Omega)(M + s Omega) = M^2 + s (M Omega - Omega M) - s^2 Omega^2 = I.

If ``M`` commutes with ``Omega`` the bracket vanishes and
``M^2 = I + s^2 Omega^2``.  ``Omega^2 = -Omega^T Omega`` is symmetric with
eigenvalues ``-omega_j^2``, so ``I + s^2 Omega^2`` is symmetric positive
semi-definite exactly when ``s ||Omega||_2 <= 1``, and its principal square
root ``R = sqrt(I + s^2 Omega^2)`` is a power series in ``Omega^2``: it is
symmetric, commutes with ``Omega``, and tends to ``I`` as ``s -> 0``.  So
``S = R - I`` solves the SHAKE equation; it is the root that vanishes with
the step, the one the reference iteration started at ``S = 0`` converges to
(the root near 0 is unique for small ``s`` by the implicit function
theorem).  With ``Z = s^2 Omega^2`` (``||Z||_2 = s^2 ||Omega||_2^2``)::

    X' = X K,   K = R + s Omega,   R = sum_j binom(1/2, j) Z^j.

The velocity projection of RATTLE keeps ``Omega``: ``X'^T (X' - X) / s =
(I - K^T) / s = (I - R)/s + Omega``, whose symmetric part ``(I - R)/s`` is
removed by the tangent projection at ``X'``, leaving ``P' = X' Omega``.

**One step in the body frame.**  With ``V = P - h f`` (``f`` the force in
the unit frame), ``d = e^{-gamma h}``, ``sigma`` the noise scale and
``xi`` the noise, one BAOAB step is::

    B   Omega1 = skew(X^T V)                      (tangent projection at X)
    A   X1 = X K(Omega1)                          (Omega unchanged)
    O   Omega2 = d Omega1 + sigma skew(X1^T xi)   (tangent projection at X1)
    A   X2 = X1 K(Omega2),   P2 = X2 Omega2

The drift's input is the tangent momentum *after* the kick (first A) or
the thermostat (second A).  At ``T = 0``, ``Omega2 = d Omega1``, so both
drifts are series in the same ``Z``: ``K1 K2 = E(Z) + s Omega O(Z)`` with
``E(z) = r(z) r(d^2 z) + d z`` and ``O(z) = d r(z) + r(d^2 z)``,
``r(z) = sqrt(1 + z)``.

**T = 0 from the products ``U_k = W A^k``.**  With ``A = s Omega1``,
``K = sum_k kappa_k A^k`` (``kappa_{2j} = e_j``, ``kappa_{2j+1} = o_j``), so::

    W2 = sum_{k <= N} kappa_k U_k,     s P2 = d W2 A = d sum_{k <= N} kappa_k U_{k+1}

and ``U_{k+1} = U_k A`` is one n x n product.  ``N`` is the highest power
the series cuts below (``Truncation`` below) need, rounded up to an even
number.  For the small ``A`` of training ``N = 2`` suffices, and in
float32 the step costs three products (``W^T V``, ``U_1``, ``U_2``) instead
of four (``W^T V``, ``Z = A A``, ``W K`` and ``W2 A``; five when ``O`` needs
its linear term).  In float64 the momentum's term below is cut only for
``zeta`` below about ``1e-10``, so four products are usual there.  ``zeta``
is read from ``||U_2||_F = scale ||Z||_F``.

The momentum's last term ``d kappa_N U_{N+1}`` would cost one more
product.  It is left out when ``tau = sum_{k >= N} |kappa_k|
zeta^{(k+1)/2}`` (:func:`momentum_tail`, a bound of everything it and the
higher powers add) is at most half the tolerance.  What that changes,
against RATTLE's ``P2 = X2 Omega2`` (unit frame, ``s P2`` being the next
drift's displacement): (1) the trajectory, by at most ``d tau <= tol / 2``,
on top of the odd series' ``tol / 2`` and the even series' ``tol / 8`` below
(at most ``1.125 tol`` per step in all); (2) the momentum's tangency: ``N`` is
even, so the cut power ``A^{N+1}`` is skew, a tangent direction in the body
frame, and its normal part (the symmetric part of ``K^T A^{N+1}``, led by
``o_0 A^{N+2}``) is of relative size ``<= o_0 tau <= (1 + d) tol / 2 <=
tol``; an odd ``N`` would cut an even power, which is normal, at first
order.  The next kick projects onto the tangent space anyway.  Beyond
``N = 4`` (large ``zeta``: early in training or at large steps) the step
forms ``Z`` and uses the series in ``Z`` (Paterson-Stockmeyer), as the
``T > 0`` step always does.

**Truncation, existence, failure.**  ``zeta = ||Z||_F`` bounds ``||Z||_2``
(loosely: for a random skew ``A`` of size n, by a factor of about
``sqrt(n) / 3``).  The series are cut at the smallest
degree whose tail bound ``sum_{j > m} |c_j| zeta^j`` is below a quarter of
the constraint's tolerance (set by the dtype, as for the iterative SHAKE);
the degree is reported as the projection iteration count.  At ``T = 0`` the odd
series ``O`` gets a looser budget, half the tolerance: its truncation error
``delta = A (O - O_m)(Z)`` is an odd function of the skew ``A`` and so skew
itself, and a skew error moves ``K`` off the orthogonal group only at second
order (``K^T K - I = -(K - I)^T delta - delta^T (K - I) + delta^T delta``,
of size ``2 ||K - I|| ||delta||``, about ``4 ||A|| ||delta||``, and
``||A||_2 <= sqrt(zeta)`` was about ``6e-3`` in the benchmark's training), so it
changes where the step lands by at most
half the tolerance (the plain path's SHAKE iteration stops within about the
same distance of the exact root) without loosening the constraint.  At the
benchmark's width 1024 this drops the cubic term (one more product).  Reading
``zeta`` is one host synchronisation per drift.  At ``T = 0`` there are
two: first the drift check below together with ``||A||_F^2``, a bound of
``||Z||_F`` that needs no product (it picks the products ``U_k`` or, when
even the bound is too large for them, ``Z`` first), then ``zeta`` itself.
When ``zeta > 1/4`` (``s ||Omega||_2`` may exceed ``1/2``), when no degree
up to ``MAX_DEGREE`` suffices, or when a value is not finite, the fast path
is abandoned (nothing changed) and the plain path takes the step or raises
the documented error; a solution exists only for ``s ||Omega||_2 <= 1``.

**Roundoff drift.**  The closed form assumes ``X^T X = I``; the reference
uses the measured ``G = X^T X`` and so corrects drift every step.  Here four
fixed unit probe vectors ``v`` measure ``|v^T (X^T X - I) v| = ||X v|^2 - 1|``
(matrix-vector products in float64); when it exceeds an eighth of the
tolerance, ``X`` is first moved along the normal at ``X`` by one
Newton-Schulz step ``X <- X (3 I - X^T X) / 2``, which squares the error.
In float32 this happened on one step in five (measured, n = 256); where float64
matrix-vector roundoff exceeds the threshold (float64 parameters, large
``n``), it happens every step.
"""

from __future__ import annotations

import math
from functools import lru_cache

import torch
from torch import Tensor

__all__ = [
    "MAX_DEGREE",
    "sqrt_series",
    "series_degree",
    "matrix_series",
    "square_orthonormal_baoab",
]

#: Highest series degree tried before the fast path gives way to the plain one.
MAX_DEGREE = 24
_TERMS = 48  # coefficients kept for tail bounds (zeta <= 1/4: 4^-48 is negligible)
_ZETA_MAX = 0.25
#: Tail budget of the odd series at T = 0, as a fraction of the tolerance (module docstring).
_ODD_BUDGET = 0.5
#: Tail budget of the momentum at T = 0, as a fraction of the tolerance (module docstring).
_MOMENTUM_BUDGET = 0.5
#: Highest power of A that the T = 0 step reaches by products W A^k (module docstring).
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
    """``E`` and ``O`` of the module docstring (two drifts at ``T = 0``)."""
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
    parameter's units; the unit frame of the module docstring is
    ``X = W / scale``, and the scale is folded into the products.  Returns
    ``(W2, P2, kinetic, ok, degree)`` (``kinetic`` = ``|P2|^2 / 2`` per
    matrix, ``ok`` a 0-d flag of finite results) or ``None`` when the closed
    form does not apply (module docstring).  Nothing is modified in place.
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
    ``kappa_{2j} = e_j`` and ``kappa_{2j+1} = o_j`` (module docstring)."""
    e, o = _combined_series(decay)
    return tuple(e[k // 2] if k % 2 == 0 else o[k // 2] for k in range(count))


def momentum_tail(decay: float, zeta: float, first: int) -> float:
    """``tau = sum_{k >= first} |kappa_k| zeta^{(k+1)/2}``, a bound of
    ``|| sum_{k >= first} kappa_k A^{k+1} ||_2`` for ``||A||_2^2 <= zeta``:
    what ``X K A`` loses (unit frame) when the momentum keeps only the
    products ``W A^j``, ``j <= first`` (module docstring)."""
    kappa = power_coefficients(decay, 2 * _TERMS)
    return sum(abs(c) * zeta ** ((k + 1) / 2) for k, c in enumerate(kappa) if k >= first)


def _cold_degrees(decay: float, zeta: float, tolerance: float) -> tuple[int, int, int] | None:
    """``(m_e, m_o, N)`` at ``T = 0``: the degrees of the series ``E`` and
    ``O`` for ``||Z||_2 <= zeta`` and the highest power of ``A`` in ``K``,
    rounded up to an even number (module docstring); ``None`` when no degree
    suffices."""
    if not math.isfinite(zeta):
        return None
    e, o = _combined_series(decay)
    m_e = series_degree(e, zeta, 0.125 * tolerance)
    # the odd part's truncation error is skew: it moves K off O(n) only at second order
    # (module docstring), so it gets the looser budget of a trajectory error
    m_o = series_degree(o, zeta, _ODD_BUDGET * tolerance, weight=math.sqrt(zeta))
    if m_e is None or m_o is None:
        return None
    top = max(2 * m_e, 2 * m_o + 1)
    return m_e, m_o, top + top % 2


def _cold_step(w: Tensor, v: Tensor, *, scale: float, s: float, decay: float,
               tolerance: float) -> tuple[Tensor, Tensor, Tensor, Tensor, int] | None:
    """The ``T = 0`` step from the products ``U_k = W A^k`` (module docstring)."""
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
