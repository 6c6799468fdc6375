"""Putting constrained weights back on their constraint sets."""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import nn

from holonomic.geometry import constraint_of

__all__ = ["RepairReport", "repair"]


@dataclass(frozen=True)
class RepairReport:
    """How far one parameter moved when projected back.

    ``distance = |W_before - W_after|_F``, ``relative = distance / |W_after|_F``;
    residuals are ``constraint.residual`` before and after.
    """

    distance: float
    relative: float
    residual_before: float
    residual_after: float


@torch.no_grad()
def repair(model: nn.Module) -> dict[str, RepairReport]:
    r"""Project every constrained parameter of ``model`` onto its constraint
    set, in place, and report how far each moved.

    ``W <- constraint.project(W)``: the nearest point of the set in the
    Frobenius norm (row normalisation for FixedNorm, the polar factor for
    Orthonormal), the same projection :func:`holonomic.constrain` applies.
    Use it after steps of an optimizer that does not keep the constraints
    (e.g. ``torch.optim.AdamW``).  Optimizer state is not touched: the
    holonomic integrators project their momenta onto the new tangent space
    at the next kick; other optimizers' moment estimates stay as they are.

    Returns:
        ``{qualified parameter name: RepairReport}``.

    Raises:
        ValueError: a parameter has no nearest point (a zero row, a
            rank-deficient matrix, non-finite values); that parameter and
            the ones after it are left unchanged and the message names it.
    """
    if not isinstance(model, nn.Module):
        raise ValueError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    out: dict[str, RepairReport] = {}
    for name, p in model.named_parameters():
        c = constraint_of(p)
        if c is None:
            continue
        before = p.detach().clone()
        residual_before = float(c.residual(before))
        try:
            projected = c.project(before)
        except ValueError as exc:
            raise ValueError(f"repair: cannot project {name}: {exc}") from None
        p.copy_(projected)
        distance = float((before - projected).norm())
        norm = float(projected.norm())
        out[name] = RepairReport(distance=distance, relative=distance / norm if norm else float("inf"),
                                 residual_before=residual_before,
                                 residual_after=float(c.residual(p.detach())))
    return out
