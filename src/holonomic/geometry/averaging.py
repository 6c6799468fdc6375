r"""Averages of constrained weights: the extrinsic mean.

Weight averaging (``torch.optim.swa_utils.AveragedModel`` for SWA and EMA,
Lightning's weight-averaging callback) keeps the arithmetic mean
``W_bar = sum_i a_i W_i`` (weights ``a_i >= 0`` summing to 1) of points
``W_i`` of a constraint set ``M``.  ``M`` is curved (spheres, Stiefel
manifolds), so ``W_bar`` is off ``M``: a mean of unit rows is shorter than 1,
a mean of orthonormal frames is not orthonormal.

The **extrinsic mean** is the point of ``M`` closest to all the ``W_i`` in
the Euclidean (Frobenius) norm of the parameter's own space::

    argmin_{X in M} sum_i a_i |X - W_i|^2
      = argmin_{X in M} ( |X - W_bar|^2 + sum_i a_i |W_i - W_bar|^2 )
      = argmin_{X in M} |X - W_bar|                   (second term constant)
      = project(W_bar)

so it is the nearest point of ``M`` to the arithmetic mean, the projection
each constraint already has: ``r W_bar_i / |W_bar_i|`` per row for
:class:`~holonomic.FixedNorm`; the polar factor ``s U V^T`` of the SVD
``W_bar / s = U Sigma V^T`` for :class:`~holonomic.Orthonormal`.  It exists
and is unique where the mean has no zero row (full rank for Orthonormal).

The projection must be applied when the average is **read**, not at each
update: the running mean ``W_bar_{n+1} = W_bar_n + (W_{n+1} - W_bar_n)/(n+1)``
(or the EMA) is only the arithmetic mean if ``W_bar_n`` is stored
unprojected.  That is why this module offers a read-time helper
(:func:`project_average`) and no ``avg_fn`` for ``AveragedModel``: torch
stores the value ``avg_fn`` returns as the running average, so a projecting
``avg_fn`` would average projected averages -- a different, order-dependent
quantity (tests/core/test_averaging.py shows the difference).

References:
    Bhattacharya & Patrangenaru, Ann. Statist. 31 (2003) 1-29 (extrinsic
    means on manifolds); Higham, Accuracy and Stability of Numerical
    Algorithms, 2nd ed. (2002), sec. 8 / Fan & Hoffman (1955) (the polar
    factor is the nearest orthonormal matrix).
"""

from __future__ import annotations

import copy
from collections.abc import Sequence

import torch
from torch import Tensor, nn

from holonomic.geometry.base import Constraint
from holonomic.geometry.registry import constraint_of, residuals

__all__ = ["extrinsic_mean", "project_average"]


@torch.no_grad()
def extrinsic_mean(constraint: Constraint, points: Sequence[Tensor], weights: Sequence[float] | None = None) -> Tensor:
    r"""The extrinsic mean of ``points`` on ``constraint``'s set: the
    projection of their (weighted) arithmetic mean (module docstring).

    ``weights`` default to ``1/n`` each; they must be non-negative with a
    positive sum and are normalised to sum 1.

    Raises:
        ValueError: no points, shapes that differ, bad weights, or a mean
            with no nearest point (a zero row, a rank-deficient matrix).
    """
    if not isinstance(constraint, Constraint):
        raise ValueError(f"constraint must be a Constraint such as FixedNorm(), got {type(constraint).__name__}")
    points = list(points)
    if not points:
        raise ValueError("extrinsic_mean needs at least one point, got none")
    shape = points[0].shape
    for i, p in enumerate(points):
        if p.shape != shape:
            raise ValueError(f"point {i} has shape {tuple(p.shape)}, point 0 has {tuple(shape)}")
    if weights is None:
        a = torch.full((len(points),), 1.0 / len(points), dtype=torch.float64)
    else:
        a = torch.as_tensor(list(weights), dtype=torch.float64)
        if a.shape != (len(points),) or not bool(torch.isfinite(a).all()) or bool((a < 0).any()) or not a.sum() > 0:
            raise ValueError(f"weights must be {len(points)} non-negative finite numbers with a positive sum, "
                             f"got {list(weights)!r}")
        a = a / a.sum()
    stacked = torch.stack([p.detach() for p in points])
    mean = torch.tensordot(a.to(stacked.dtype).to(stacked.device), stacked, dims=1)
    constraint.validate_shape(mean.shape, "the mean")
    return constraint.project(mean)


@torch.no_grad()
def project_average(model: nn.Module, *, inplace: bool = False) -> nn.Module:
    r"""The extrinsic mean of an averaged model: every constrained parameter
    replaced by the nearest point of its set (module docstring).

    ``model`` is typically a ``torch.optim.swa_utils.AveragedModel`` (SWA or
    EMA) of a model with constraints declared by :func:`holonomic.constrain`
    (``AveragedModel`` deep-copies the model, and the copy keeps the
    declarations), or a model into which a callback copied averaged weights.
    Unconstrained parameters and buffers are left as they are.

    By default a **deep copy** is returned and ``model`` -- the running
    arithmetic average -- is untouched, so averaging can continue (read the
    projection whenever you evaluate).  ``inplace=True`` projects ``model``
    itself and returns it: use it only after the last update, since further
    updates would then average from a projected value.

    Batch-norm statistics depend on the weights: call
    ``torch.optim.swa_utils.update_bn(loader, projected)`` on the *returned*
    model, after the projection.

    Raises:
        ValueError: ``model`` has no constrained parameter (declare them on
            the model before wrapping it), or an average has no nearest
            point (a zero row, a rank-deficient matrix); the message names
            the parameter, and ``model`` is unchanged.
    """
    if not isinstance(model, nn.Module):
        raise ValueError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    if not residuals(model):
        raise ValueError(
            f"{type(model).__name__} has no constrained parameters, so there is nothing to project; "
            "declare the constraints with holonomic.constrain(model, ...) before wrapping the model in "
            "AveragedModel (its deep copy keeps them)")
    projected: list[tuple[Tensor, Tensor]] = []
    for name, p in model.named_parameters():
        c = constraint_of(p)
        if c is None:
            continue
        try:
            projected.append((p, c.project(p.detach())))
        except ValueError as exc:
            raise ValueError(f"project_average: the average of {name} has no nearest point on its set "
                             f"({c!r}): {exc}") from None
    if inplace:
        for p, value in projected:
            p.copy_(value)
        return model
    values = {id(p): value for p, value in projected}
    memo: dict[int, object] = {}
    out = copy.deepcopy(model, memo)
    for p, _ in projected:
        memo[id(p)].copy_(values[id(p)])  # type: ignore[attr-defined]
    return out
