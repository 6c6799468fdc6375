"""The interface every constraint set implements.

A constraint belongs to one parameter tensor ``W`` and describes a smooth
manifold ``M = {W : g(W) = 0}`` embedded in the parameter's own Euclidean
space.  The integrators in :mod:`holonomic.dynamics` only talk to a constraint
through the operations below, all in the parameter's own shape:

``project(w)``
    the nearest point of ``M`` (Euclidean distance);
``tangent(w, v)``
    the orthogonal projection of ``v`` onto the tangent space ``T_w M``;
``shake(w, y)``
    the SHAKE position correction: the point ``w' = y + N(w) lam`` on ``M``
    reached from ``y`` along the normal space at the *old* point ``w``;
``geodesic(w, p, t)``
    the exact geodesic flow of ``M`` (position and velocity after time ``t``);
``residual(w)``
    the largest relative violation of the constraint;
``tangent_dof(shape)``
    the dimension of ``T_w M`` (used for kinetic temperatures).
"""

from __future__ import annotations

import functools
import math
from abc import ABC, abstractmethod
from typing import Any, Callable, NamedTuple, TypeVar

import torch
from torch import Tensor

__all__ = ["Constraint", "ShakeResult", "check_positive", "default_tolerance", "matrix_shape",
           "HALF_DTYPES", "in_float32"]


class ShakeResult(NamedTuple):
    """Outcome of a SHAKE position correction.

    ``ok`` is a 0-d boolean tensor (no host synchronisation is forced);
    ``iterations`` is the number of solver iterations used (1 for closed
    forms).
    """

    position: Tensor
    ok: Tensor
    iterations: int


#: Dtypes whose constraint operations run in float32 (:func:`in_float32`).
HALF_DTYPES: tuple[torch.dtype, ...] = (torch.float16, torch.bfloat16)

_Method = TypeVar("_Method", bound=Callable[..., Any])


def _cast_back(out: Any, dtype: torch.dtype) -> Any:
    if isinstance(out, ShakeResult):
        position = out.position.to(dtype)
        return ShakeResult(position, out.ok & torch.isfinite(position).all(), out.iterations)
    if isinstance(out, tuple):
        return tuple(_cast_back(t, dtype) for t in out)
    if isinstance(out, Tensor) and out.is_floating_point():
        return out.to(dtype)
    return out


def in_float32(keep_float32: bool = False) -> Callable[[_Method], _Method]:
    """Decorator for constraint operations ``method(self, w, *tensors)``:
    for float16/bfloat16 ``w`` the operation runs on float32 copies of its
    tensor arguments and its tensor results are rounded back to ``w``'s
    dtype (unless ``keep_float32``, used for residuals, which are then
    measured exactly on the half-precision values).

    The linear algebra (SVD, matrix exponential) has no half-precision
    kernels, and SHAKE in half precision cannot meet a useful tolerance;
    computed in float32 and rounded once, a point is on its set to the
    rounding error of its dtype (about ``eps`` of the dtype, relative).
    """

    def decorate(method: _Method) -> _Method:
        @functools.wraps(method)
        def wrapper(self: Any, w: Tensor, *args: Any, **kwargs: Any) -> Any:
            dtype = w.dtype
            if dtype not in HALF_DTYPES:
                return method(self, w, *args, **kwargs)
            up = [a.float() if isinstance(a, Tensor) and a.dtype in HALF_DTYPES else a for a in args]
            out = method(self, w.float(), *up, **kwargs)
            return out if keep_float32 else _cast_back(out, dtype)

        return wrapper  # type: ignore[return-value]

    return decorate


def default_tolerance(dtype: torch.dtype) -> float:
    """Convergence tolerance for iterative projections, set by the dtype.

    A small multiple of the machine epsilon: ``8 eps`` (about 1e-6 in float32
    and 2e-15 in float64).  Common practice, no source.
    """
    return 8.0 * torch.finfo(dtype).eps


def default_residual_tolerance(dtype: torch.dtype) -> float:
    """``100 eps`` of ``dtype`` (1.2e-5 in float32, 2.2e-14 in float64): how far off its
    constraint set a parameter may be before the audit alarms (and a replaced parameter
    warns); 0 for non-floating dtypes.

    Roundoff in one projection is a few ``eps`` times a modest factor; 100 is
    a margin (common practice, no source)."""
    return 100.0 * torch.finfo(dtype).eps if dtype.is_floating_point else 0.0


def matrix_shape(shape: torch.Size | tuple[int, ...]) -> tuple[int, int]:
    """``(rows, row length)`` of a tensor viewed as ``W.reshape(W.shape[0], -1)``."""
    return shape[0], math.prod(shape[1:])


def check_positive(name: str, value: float, *, allow_zero: bool = False) -> float:
    """Return ``float(value)`` or raise a ``ValueError`` naming ``name``."""
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a real number, got {value!r}") from None
    if math.isnan(x) or math.isinf(x) or x < 0 or (x == 0 and not allow_zero):
        need = "non-negative and finite" if allow_zero else "positive and finite"
        raise ValueError(f"{name} must be {need}, got {value!r}")
    return x


class Constraint(ABC):
    """A constraint set for one parameter tensor (see module docstring)."""

    @abstractmethod
    def validate_shape(self, shape: torch.Size | tuple[int, ...], name: str = "parameter") -> None:
        """Raise ``ValueError`` (naming ``name``) if the set is empty or
        degenerate for tensors of this shape."""

    @abstractmethod
    def project(self, w: Tensor) -> Tensor:
        """Nearest point of the constraint set to ``w`` (a new tensor)."""

    @abstractmethod
    def tangent(self, w: Tensor, v: Tensor) -> Tensor:
        """Orthogonal projection of ``v`` onto the tangent space at ``w``."""

    @abstractmethod
    def shake(self, w: Tensor, y: Tensor) -> ShakeResult:
        """Solve ``g(y + N(w) lam) = 0`` for the multiplier and return the point."""

    @abstractmethod
    def geodesic(self, w: Tensor, p: Tensor, t: float) -> tuple[Tensor, Tensor]:
        """Position and velocity after following the geodesic from ``(w, p)``
        for time ``t`` (``p`` tangent at ``w``)."""

    def violations(self, w: Tensor) -> Tensor:
        """The signed relative violations, as a 1-D tensor, whose largest
        absolute value is :meth:`residual` (default: the residual alone)."""
        return self.residual(w).reshape(1)

    @abstractmethod
    def residual(self, w: Tensor) -> Tensor:
        """Largest relative constraint violation (0-d tensor)."""

    @abstractmethod
    def tangent_residual(self, w: Tensor, v: Tensor) -> Tensor:
        """Largest relative size of the normal component of ``v`` at ``w``."""

    @abstractmethod
    def tangent_dof(self, shape: torch.Size | tuple[int, ...]) -> int:
        """Number of tangent degrees of freedom for a tensor of this shape."""
