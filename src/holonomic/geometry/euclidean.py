"""The trivial geometry of an unconstrained parameter (used internally so that
the integrators treat constrained and free parameters alike)."""

from __future__ import annotations

import torch
from torch import Tensor

from holonomic.geometry.base import Constraint, ShakeResult

__all__ = ["Unconstrained"]


class Unconstrained(Constraint):
    """All of R^n: projections are identities, geodesics are straight lines."""

    def validate_shape(self, shape: torch.Size | tuple[int, ...], name: str = "parameter") -> None:
        return None

    def project(self, w: Tensor) -> Tensor:
        return w.clone()

    def tangent(self, w: Tensor, v: Tensor) -> Tensor:
        return v

    def shake(self, w: Tensor, y: Tensor) -> ShakeResult:
        return ShakeResult(y, torch.isfinite(y).all(), 0)

    def geodesic(self, w: Tensor, p: Tensor, t: float) -> tuple[Tensor, Tensor]:
        return w + t * p, p

    def residual(self, w: Tensor) -> Tensor:
        return torch.zeros((), dtype=w.dtype, device=w.device)

    def tangent_residual(self, w: Tensor, v: Tensor) -> Tensor:
        return torch.zeros((), dtype=w.dtype, device=w.device)

    def tangent_dof(self, shape: torch.Size | tuple[int, ...]) -> int:
        n = 1
        for s in shape:
            n *= s
        return n

    def __repr__(self) -> str:
        return "Unconstrained()"


UNCONSTRAINED = Unconstrained()
