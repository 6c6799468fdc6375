"""Orthonormal rows or columns: the (scaled) Stiefel manifold and orthogonal group."""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor

from holonomic.geometry.base import (Constraint, ShakeResult, check_positive, default_tolerance, in_float32,
                                     matrix_shape)

__all__ = ["Orthonormal", "stiefel_shake", "stiefel_tangent", "stiefel_geodesic"]

_OVER = ("rows", "columns")


def _sym(a: Tensor) -> Tensor:
    return 0.5 * (a + a.transpose(-1, -2))


def stiefel_tangent(x: Tensor, v: Tensor) -> Tensor:
    """``v - x sym(x^T v)`` for ``x`` with orthonormal columns, batched over
    leading dimensions."""
    return v - x @ _sym(x.transpose(-1, -2) @ v)


def stiefel_shake(
    x: Tensor, y: Tensor, *, tolerance: float, max_iterations: int
) -> tuple[Tensor, Tensor, int]:
    r"""SHAKE on the unit Stiefel manifold, batched.

    Find symmetric ``S`` with ``x' = y + x S`` and ``x'^T x' = I``::

        input: x (n x k, x^T x ~ I), y
        B = x^T y,  G = x^T x,  C = y^T y - I,  S = 0
        repeat:  F = C + B^T S + S B + S G S      (symmetric)
                 stop when max|F| <= tolerance
                 S <- S - F / 2                    (Richardson step; dF ~ 2 Id
                                                    near S = 0, B = I)
        return x' = y + x S

    For ``y = x + s p`` with ``p`` tangent, ``B = I + s x^T p`` and
    ``S = O(s^2)``, and the iteration contracts at rate ``O(s |p|_2)``; it
    fails to converge roughly when ``s |p|_2`` approaches 1 (docs/math.md 3).
    Using the actual ``G`` rather than ``I`` keeps the result on the manifold
    to roundoff even if ``x`` carries roundoff error.

    Returns ``(x', ok, iterations)`` with ``ok`` a 0-d boolean tensor.
    """
    xt = x.transpose(-1, -2)
    b = xt @ y
    g = xt @ x
    eye = torch.eye(x.shape[-1], dtype=x.dtype, device=x.device)
    c = y.transpose(-1, -2) @ y - eye
    s = torch.zeros_like(c)
    ok = torch.zeros((), dtype=torch.bool, device=x.device)
    iterations = 0
    previous = float("inf")
    for iterations in range(1, max_iterations + 1):
        sb = s @ b
        f = c + sb + sb.transpose(-1, -2) + s @ g @ s
        err = float(f.abs().max())  # host sync: convergence must be detected
        if err <= tolerance:
            ok = torch.ones((), dtype=torch.bool, device=x.device)
            break
        if not err < 1e6 or (iterations > 8 and err > 2.0 * previous):
            break  # diverging: the step moved too far for the normal-space correction
        previous = err
        s = s - 0.5 * _sym(f)
    new = y + x @ s
    ok = ok & torch.isfinite(new).all()
    return new, ok, iterations


def stiefel_geodesic(x: Tensor, v: Tensor, t: float) -> tuple[Tensor, Tensor]:
    r"""Exact geodesic on the unit Stiefel manifold, batched.

    With ``A = x^T v`` (skew) and ``Q = v^T v``::

        E(t) = expm(t [[A, -Q], [I, A]])
        x(t) = [x v] E(t) [I; 0] expm(-t A)
        v(t) = [x v] E(t) [0; I] expm(-t A)

    (Edelman, Arias & Smith 1998, eq. 2.45).  For square ``x`` this reduces to
    ``x(t) = x expm(t A)``, ``v(t) = x(t) A``.  A final Newton-Schulz polar
    step ``x <- x (3I - x^T x)/2`` and a tangent projection of ``v`` remove
    roundoff so that it does not accumulate over many steps.
    """
    n, k = x.shape[-2], x.shape[-1]
    a = x.transpose(-1, -2) @ v
    a = 0.5 * (a - a.transpose(-1, -2))
    eye = torch.eye(k, dtype=x.dtype, device=x.device).expand_as(a)
    if n == k:
        new_x = x @ torch.linalg.matrix_exp(t * a)
        new_v = new_x @ a
    else:
        q = v.transpose(-1, -2) @ v
        top = torch.cat([a, -q], dim=-1)
        bottom = torch.cat([eye, a], dim=-1)
        e = torch.linalg.matrix_exp(t * torch.cat([top, bottom], dim=-2))
        back = torch.linalg.matrix_exp(-t * a)
        xv = torch.cat([x, v], dim=-1)
        new_x = xv @ e[..., :, :k] @ back
        new_v = xv @ e[..., :, k:] @ back
    new_x = new_x @ (1.5 * eye - 0.5 * new_x.transpose(-1, -2) @ new_x)
    return new_x, stiefel_tangent(new_x, new_v)


@dataclass(frozen=True)
class Orthonormal(Constraint):
    r"""Hold the rows or columns of a parameter orthonormal, up to a scale.

    The parameter is viewed as a matrix ``M = W.reshape(W.shape[0], -1)``.
    ``over="rows"``: ``M M^T = scale^2 I`` (needs rows <= row length).
    ``over="columns"``: ``M^T M = scale^2 I`` (needs columns <= column
    length).  A square weight gives the orthogonal group ``O(n)``.

    Internally the matrix is a point ``X`` (n x k) of the Stiefel manifold,
    ``X^T X = I`` after division by ``scale`` (``X = M^T`` for rows)::

        normal space   {X S : S symmetric}
        tangent proj.  V - X sym(X^T V)
        SHAKE          X' = Y + X S, X'^T X' = I  (see stiefel_shake; iterates
                       to a tolerance set by the dtype and reports its count)
        geodesic       closed form with matrix exponentials (stiefel_geodesic)
        nearest point  the polar factor U V^T of the SVD X = U Sigma V^T
        tangent dof    n k - k (k + 1) / 2

    Args:
        over: ``"rows"`` or ``"columns"``.
        scale: ``s > 0`` in ``X^T X = s^2 I``.
        tolerance: SHAKE stops when the constraint equation is met to this
            (relative) accuracy; default ``8 eps`` of the parameter's dtype.
        max_iterations: SHAKE gives up (the step fails cleanly) after this many.

    References:
        Edelman, Arias & Smith, SIAM J. Matrix Anal. Appl. 20 (1998) 303-353;
        Ryckaert, Ciccotti & Berendsen, J. Comput. Phys. 23 (1977) 327-341 (SHAKE).
    """

    over: str = "rows"
    scale: float = 1.0
    tolerance: float | None = None
    max_iterations: int = 100

    def __post_init__(self) -> None:
        if self.over not in _OVER:
            raise ValueError(f"over must be one of {_OVER}, got {self.over!r}")
        object.__setattr__(self, "scale", check_positive("scale", self.scale))
        if self.tolerance is not None:
            object.__setattr__(self, "tolerance", check_positive("tolerance", self.tolerance))
        if not isinstance(self.max_iterations, int) or self.max_iterations < 1:
            raise ValueError(f"max_iterations must be a positive integer, got {self.max_iterations!r}")

    # -- views ---------------------------------------------------------------
    def _frame(self, w: Tensor) -> Tensor:
        """The unit Stiefel point ``X`` (n x k) for ``w``."""
        m = w.reshape(w.shape[0], -1)
        x = m.t() if self.over == "rows" else m
        return x / self.scale

    def _unframe(self, x: Tensor, shape: torch.Size) -> Tensor:
        m = x * self.scale
        if self.over == "rows":
            m = m.t()
        return m.reshape(shape)

    def _tol(self, dtype: torch.dtype) -> float:
        return self.tolerance if self.tolerance is not None else default_tolerance(dtype)

    # -- Constraint interface -----------------------------------------------
    def validate_shape(self, shape: torch.Size | tuple[int, ...], name: str = "parameter") -> None:
        shape = tuple(shape)
        if len(shape) < 2:
            raise ValueError(
                f"Orthonormal on {name} of shape {shape}: needs a tensor with at least 2 "
                "dimensions; use FixedNorm(over='all') for a vector"
            )
        rows, length = matrix_shape(shape)
        if self.over == "rows" and rows > length:
            raise ValueError(
                f"Orthonormal(over='rows') on {name} of shape {shape}: {rows} rows cannot be "
                f"orthonormal in dimension {length}; use over='columns' for a tall matrix"
            )
        if self.over == "columns" and length > rows:
            raise ValueError(
                f"Orthonormal(over='columns') on {name} of shape {shape}: {length} columns "
                f"cannot be orthonormal in dimension {rows}; use over='rows' for a wide matrix"
            )

    @in_float32()
    def project(self, w: Tensor) -> Tensor:
        x = self._frame(w)
        if not bool(torch.isfinite(x).all()):  # the SVD would fail with a linear-algebra error
            raise ValueError(
                "Orthonormal: the matrix has non-finite values (NaN or inf) and no nearest "
                "orthonormal point; initialise it with finite values (a NaN weight usually "
                "comes from a diverged loss)"
            )
        u, sig, vh = torch.linalg.svd(x, full_matrices=False)
        # numerical rank test (as in numpy.linalg.matrix_rank): the polar factor
        # is unique exactly when the matrix has full rank
        cutoff = float(sig.max()) * max(x.shape) * torch.finfo(w.dtype).eps
        if not bool(torch.isfinite(sig).all()) or float(sig.min()) <= cutoff:
            raise ValueError(
                "Orthonormal: the matrix is rank deficient or not finite, so its nearest "
                "orthonormal point is not unique; initialise it with a full-rank matrix"
            )
        return self._unframe(u @ vh, w.shape)

    @in_float32()
    def tangent(self, w: Tensor, v: Tensor) -> Tensor:
        return self._unframe(stiefel_tangent(self._frame(w), self._frame(v)), w.shape)

    @in_float32()
    def shake(self, w: Tensor, y: Tensor) -> ShakeResult:
        new, ok, it = stiefel_shake(
            self._frame(w), self._frame(y), tolerance=self._tol(w.dtype), max_iterations=self.max_iterations
        )
        return ShakeResult(self._unframe(new, w.shape), ok, it)

    @in_float32()
    def geodesic(self, w: Tensor, p: Tensor, t: float) -> tuple[Tensor, Tensor]:
        x, v = stiefel_geodesic(self._frame(w), self._frame(p), t)
        return self._unframe(x, w.shape), self._unframe(v, w.shape)

    @in_float32(keep_float32=True)
    def violations(self, w: Tensor) -> Tensor:
        """The entries of ``X^T X / s^2 - I``."""
        x = self._frame(w)
        eye = torch.eye(x.shape[-1], dtype=x.dtype, device=x.device)
        return (x.t() @ x - eye).reshape(-1)

    @in_float32(keep_float32=True)
    def residual(self, w: Tensor) -> Tensor:
        return self.violations(w).abs().max()

    @in_float32(keep_float32=True)
    def tangent_residual(self, w: Tensor, v: Tensor) -> Tensor:
        x = self._frame(w)
        u = self._frame(v)
        normal = _sym(x.t() @ u)
        tiny = torch.finfo(w.dtype).tiny
        return normal.norm() / u.norm().clamp_min(tiny)

    def tangent_dof(self, shape: torch.Size | tuple[int, ...]) -> int:
        shape = tuple(shape)
        rows, length = matrix_shape(shape)
        n, k = (length, rows) if self.over == "rows" else (rows, length)
        return n * k - k * (k + 1) // 2
