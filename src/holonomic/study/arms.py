"""The arms of a study: how each regulariser is applied to a model.

All arms train with the same integrator (``holonomic.Langevin``) and the same budget; they
differ only in what is done to the weights:

==============  ===========================================================================
arm             what it does (strength)
==============  ===========================================================================
none            nothing
weight_decay    L2 prior through the integrator's ``weight_decay`` option, on every
                parameter (force ``+= lambda * w``, like ``torch.optim.SGD(weight_decay=)``)
max_norm        after every step, each hidden unit's incoming weight vector (a row of a
                hidden ``Linear`` weight) is scaled back into the ball ``|w| <= c``
                (Srivastava et al., JMLR 15 (2014) 1929-1958); the initial weights too
fixed_norm      ``holonomic.constrain(layer, weight=FixedNorm(r, over="rows"))`` on every
                hidden ``Linear``: each unit's incoming weights held at ``|w| = r``
orthonormal     ``holonomic.constrain(layer, weight=Orthonormal(over, scale=s))`` on every
                hidden ``Linear``; ``over="rows"`` (``W W^T = s^2 I``) when
                ``out <= in``, else ``over="columns"`` (``W^T W = s^2 I``)
==============  ===========================================================================

Hidden layers are every ``nn.Linear`` except the last (the output layer); biases and the
output layer are left free in every arm except ``weight_decay``, which decays all
parameters.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import torch
from torch import nn

import holonomic as hn
from holonomic.study.models import hidden_layers

__all__ = ["ArmSetup", "prepare_arm", "constraint_residual", "weight_norms"]


@dataclass
class ArmSetup:
    """What an arm did to a model, and what the training loop must do for it.

    Attributes:
        weight_decay: passed to the integrator (0 except for the weight-decay arm).
        after_step: called after every optimizer step (max-norm clipping), or None.
        layers: qualified names of the weights the arm acts on.
        radius: the max-norm ball radius, used for its residual (``nan`` otherwise).
    """

    weight_decay: float = 0.0
    after_step: Callable[[], None] | None = None
    layers: list[str] = field(default_factory=list)
    radius: float = math.nan


def _clip_rows(weights: list[torch.Tensor], radius: float) -> None:
    """Scale each row ``w`` with ``|w| > radius`` to ``radius * w / |w|`` (in place)."""
    with torch.no_grad():
        for w in weights:
            norms = w.norm(dim=1, keepdim=True)
            w.mul_(torch.clamp(radius / norms.clamp_min(1e-30), max=1.0))


def prepare_arm(name: str, strength: float, model: nn.Module) -> ArmSetup:
    """Apply arm ``name`` at ``strength`` to ``model`` (in place) and describe it."""
    hidden = hidden_layers(model)
    names = [f"{layer_name}.weight" for layer_name, _ in hidden]
    if name == "none":
        return ArmSetup()
    if name == "weight_decay":
        return ArmSetup(weight_decay=float(strength), layers=["(all parameters)"])
    if name == "max_norm":
        weights = [layer.weight for _, layer in hidden]
        _clip_rows(weights, strength)
        return ArmSetup(after_step=lambda: _clip_rows(weights, strength), layers=names,
                        radius=float(strength))
    if name == "fixed_norm":
        for _, layer in hidden:
            hn.constrain(layer, weight=hn.FixedNorm(radius=float(strength), over="rows"))
        return ArmSetup(layers=names)
    if name == "orthonormal":
        for _, layer in hidden:
            over = "rows" if layer.out_features <= layer.in_features else "columns"
            constraint = hn.Orthonormal(over=over, scale=float(strength))
            # Start from the nearest orthonormal point of the initial weights, found in
            # float64: a random square init can be too ill-conditioned for a float32 SVD
            # (ratio of singular values ~1e-5 happens), though its nearest point is unique.
            with torch.no_grad():
                layer.weight.copy_(constraint.project(layer.weight.double()))
            hn.constrain(layer, weight=constraint)
        return ArmSetup(layers=names)
    raise ValueError(f"unknown arm {name!r}; allowed: none, weight_decay, max_norm, "
                     "fixed_norm, orthonormal")


def constraint_residual(model: nn.Module, setup: ArmSetup) -> float:
    """Largest relative constraint violation of the arm's weights; ``nan`` if it has none.

    Constraint arms: ``max(holonomic.residuals(model).values())``. Max-norm arm:
    ``max(0, max_row |w| / c - 1)``.
    """
    if not math.isnan(setup.radius):
        hidden = hidden_layers(model)
        with torch.no_grad():
            largest = max(float(layer.weight.norm(dim=1).max()) for _, layer in hidden)
        return max(0.0, largest / setup.radius - 1.0)
    values = hn.residuals(model)
    return float(max(values.values())) if values else math.nan


def weight_norms(model: nn.Module) -> dict[str, float]:
    """Final weight norms: hidden weights (Frobenius and mean row norm) and output layer."""
    hidden = hidden_layers(model)
    output = [m for m in model.modules() if isinstance(m, nn.Linear)][-1]
    with torch.no_grad():
        squares = sum(float(layer.weight.pow(2).sum()) for _, layer in hidden)
        rows = torch.cat([layer.weight.norm(dim=1) for _, layer in hidden])
        return {
            "weight_norm_hidden": math.sqrt(squares),
            "mean_row_norm_hidden": float(rows.mean()),
            "weight_norm_output": float(output.weight.norm()),
        }
