"""Fixed-norm constraints: every row, every column, or the whole tensor on a sphere."""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor

from holonomic.geometry.base import Constraint, ShakeResult, check_positive, in_float32, matrix_shape

__all__ = ["FixedNorm"]

_OVER = ("rows", "columns", "all")


@dataclass(frozen=True)
class FixedNorm(Constraint):
    r"""Hold vectors of a parameter at Euclidean norm ``radius``.

    ``over="rows"``: each row ``W[i]`` (one output unit's incoming weights;
    a convolution kernel is flattened per output channel) satisfies
    ``|W[i]| = r``.  ``over="columns"``: each column of the tensor viewed as
    ``W.reshape(W.shape[0], -1)``.  ``over="all"``: ``|W|_F = r``.

    Geometry of one vector ``w`` on the sphere of radius ``r``::

        normal space   N_w = span{w}
        tangent proj.  Pi_w p = p - (w.p / |w|^2) w
        SHAKE          w' = y + lam w,   |w'|^2 = r^2
                       |w|^2 lam^2 + 2 (w.y) lam + (|y|^2 - r^2) = 0,
                       lam = -(|y|^2 - r^2) / (w.y + sqrt((w.y)^2 - |w|^2 (|y|^2 - r^2)))
                       (the root that vanishes with the step, in a
                       cancellation-free form; no real root when the
                       discriminant is negative, i.e. s|p| > r for y = w + s p)
        geodesic       w(t) = w cos(vt/r) + (r p / v) sin(vt/r),   v = |p|
                       p(t) = -(v/r) w sin(vt/r) + p cos(vt/r)
        tangent dof    d - 1 per vector of length d

    The geodesic is followed by a renormalisation of ``w`` and a tangent
    projection of ``p``, so roundoff does not accumulate over many steps.

    Args:
        radius: the norm ``r > 0``.
        over: ``"rows"``, ``"columns"`` or ``"all"``.

    References:
        Edelman, Arias & Smith, SIAM J. Matrix Anal. Appl. 20 (1998) 303-353
        (geometry); Andersen, J. Comput. Phys. 52 (1983) 24-34 (RATTLE).
    """

    radius: float = 1.0
    over: str = "rows"

    def __post_init__(self) -> None:
        object.__setattr__(self, "radius", check_positive("radius", self.radius))
        if self.over not in _OVER:
            raise ValueError(f"over must be one of {_OVER}, got {self.over!r}")

    # -- views ---------------------------------------------------------------
    def _vectors(self, w: Tensor) -> Tensor:
        """A 2-D view (or copy) whose rows are the constrained vectors."""
        if self.over == "all":
            return w.reshape(1, -1)
        m = w.reshape(w.shape[0], -1)
        return m if self.over == "rows" else m.t()

    def _unvectors(self, v: Tensor, shape: torch.Size) -> Tensor:
        if self.over == "columns":
            v = v.t()
        return v.reshape(shape)

    # -- Constraint interface -----------------------------------------------
    def validate_shape(self, shape: torch.Size | tuple[int, ...], name: str = "parameter") -> None:
        shape = tuple(shape)
        if self.over == "all":
            n = 1
            for s in shape:
                n *= s
            if n < 2:
                raise ValueError(
                    f"FixedNorm(over='all') on {name} of shape {shape}: needs at least 2 entries"
                )
            return
        if len(shape) < 2:
            raise ValueError(
                f"FixedNorm(over={self.over!r}) on {name} of shape {shape}: needs a tensor with "
                "at least 2 dimensions; use over='all' for a vector"
            )
        rows, length = matrix_shape(shape)
        d = length if self.over == "rows" else rows
        if d < 2:
            raise ValueError(
                f"FixedNorm(over={self.over!r}) on {name} of shape {shape}: each constrained "
                f"vector has length {d}, which leaves no freedom; use over='all' or the other axis"
            )

    @in_float32()
    def project(self, w: Tensor) -> Tensor:
        v = self._vectors(w)
        n = v.norm(dim=1, keepdim=True)
        if bool((n == 0).any()) or not bool(torch.isfinite(n).all()):
            raise ValueError(
                f"FixedNorm(over={self.over!r}): a {self.over[:-1] if self.over != 'all' else 'tensor'}"
                " is zero or not finite and has no nearest point on the sphere; initialise it "
                "with non-zero finite values"
            )
        return self._unvectors(v * (self.radius / n), w.shape)

    @in_float32()
    def tangent(self, w: Tensor, v: Tensor) -> Tensor:
        a = self._vectors(w)
        b = self._vectors(v)
        coef = (a * b).sum(dim=1, keepdim=True) / (a * a).sum(dim=1, keepdim=True)
        return self._unvectors(b - coef * a, w.shape)

    @in_float32()
    def shake(self, w: Tensor, y: Tensor) -> ShakeResult:
        a_v = self._vectors(w)
        y_v = self._vectors(y)
        a = (a_v * a_v).sum(dim=1, keepdim=True)
        b = (a_v * y_v).sum(dim=1, keepdim=True)
        c = (y_v * y_v).sum(dim=1, keepdim=True) - self.radius**2
        disc = b * b - a * c
        denom = b + disc.clamp_min(0).sqrt()
        ok = (disc >= 0) & (b > 0)
        lam = -c / torch.where(ok, denom, torch.ones_like(denom))
        new = y_v + lam * a_v
        ok_all = ok.all() & torch.isfinite(new).all()
        return ShakeResult(self._unvectors(new, w.shape), ok_all, 1)

    @in_float32()
    def geodesic(self, w: Tensor, p: Tensor, t: float) -> tuple[Tensor, Tensor]:
        r = self.radius
        wv = self._vectors(w)
        pv = self._vectors(p)
        speed = pv.norm(dim=1, keepdim=True)
        angle = speed * (t / r)
        cos = torch.cos(angle)
        # r sin(v t / r) / v = t * sin(angle) / angle, finite as v -> 0
        sinc = torch.sinc(angle / torch.pi)
        new_w = wv * cos + pv * (t * sinc)
        new_p = pv * cos - wv * (speed / r) * torch.sin(angle)
        new_w = new_w * (r / new_w.norm(dim=1, keepdim=True))
        coef = (new_w * new_p).sum(dim=1, keepdim=True) / (r * r)
        new_p = new_p - coef * new_w
        return self._unvectors(new_w, w.shape), self._unvectors(new_p, w.shape)

    @in_float32(keep_float32=True)
    def violations(self, w: Tensor) -> Tensor:
        """``|w_i| / r - 1`` for every constrained vector."""
        return self._vectors(w).norm(dim=1) / self.radius - 1

    @in_float32(keep_float32=True)
    def residual(self, w: Tensor) -> Tensor:
        return self.violations(w).abs().max()

    @in_float32(keep_float32=True)
    def tangent_residual(self, w: Tensor, v: Tensor) -> Tensor:
        a = self._vectors(w)
        b = self._vectors(v)
        dot = (a * b).sum(dim=1).abs()
        # relative to the largest row of v: a row of v that is pure roundoff
        # (a dead unit) must not read as a large violation
        scale = a.norm(dim=1) * b.norm(dim=1).max()
        tiny = torch.finfo(w.dtype).tiny
        return (dot / scale.clamp_min(tiny)).max()

    def tangent_dof(self, shape: torch.Size | tuple[int, ...]) -> int:
        shape = tuple(shape)
        numel = 1
        for s in shape:
            numel *= s
        if self.over == "all":
            return numel - 1
        count = shape[0] if self.over == "rows" else numel // shape[0]
        return numel - count
