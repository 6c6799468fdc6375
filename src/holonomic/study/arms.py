"""The arms of a study: how each regulariser is applied to a model.

All arms train with the same integrator (``holonomic.Langevin``) and the same budget; they
differ only in what is done to the weights:

==============  ===========================================================================
arm             what it does (strength), and to which parameters
==============  ===========================================================================
none            nothing
weight_decay    L2 prior through the integrator's ``weight_decay`` option, on **every**
                parameter, biases and output layer included, whatever the layer selection
                (force ``+= lambda * w``, like ``torch.optim.SGD(weight_decay=)``)
max_norm        after every step, each output unit's incoming weight vector of the
                selected weights (a row of a ``Linear`` weight; an output channel's
                kernel, flattened, of a convolution) is scaled back into the ball
                ``|w| <= c`` (Srivastava et al., JMLR 15 (2014) 1929-1958); the initial
                weights too
fixed_norm      ``holonomic.constrain(model, **{name: FixedNorm(r, over="rows")})`` on each
                selected weight: each output unit's incoming weights (row; conv kernel
                per output channel) held at ``|w| = r``
orthonormal     ``holonomic.constrain(model, **{name: Orthonormal(over, scale=s)})`` on each
                selected weight, viewed as the matrix ``M = W.reshape(out, -1)`` (a conv
                kernel as ``out x (in * k * k)``); ``over="rows"`` (``M M^T = s^2 I``) when
                ``out <= in * k * k``, else ``over="columns"`` (``M^T M = s^2 I``). The
                start is the nearest orthonormal point of the initial weights, found in
                float64. A ``(1, d)`` output layer (regression) becomes one row of norm s
==============  ===========================================================================

Which weights the last three act on is the layer selection (``[model] constrain``, default
``"hidden"``, overridden per arm by ``[arms.NAME] constrain``; see
:class:`holonomic.study.config.ModelConfig`): by default the weight of every ``nn.Linear``
and ``nn.Conv1d/2d/3d`` layer except the output layer (the last ``Linear``), so for an MLP
every ``Linear`` but the last. Biases and normalisation-layer weights are never selected.
A selection that matches nothing is refused (:class:`StudyConfigError`).

:attr:`ArmSetup.layers` (stored in each run record as ``"layers"``) lists the qualified
parameter names an arm acted on: ``[]`` for ``none``, ``["(all parameters)"]`` for
``weight_decay``, the selected weights otherwise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Callable

import torch
from torch import nn

import holonomic as hn
from holonomic.study.config import StudyConfigError
from holonomic.study.models import build_model, output_layer, select_weights

if TYPE_CHECKING:
    from holonomic.study.config import StudyConfig

__all__ = ["ArmSetup", "check_layer_selections", "prepare_arm", "constraint_residual",
           "weight_norms"]

_ARMS = ("none", "weight_decay", "max_norm", "fixed_norm", "orthonormal")


@dataclass
class ArmSetup:
    """What an arm did to a model, and what the training loop must do for it.

    Attributes:
        weight_decay: passed to the integrator (0 except for the weight-decay arm).
        after_step: called after every optimizer step (max-norm clipping), or None.
        layers: qualified names of the parameters the arm acts on (``[]`` for ``none``,
            ``["(all parameters)"]`` for ``weight_decay``).
        radius: the max-norm ball radius, used for its residual (``nan`` otherwise).
        measured: qualified names of the weights :func:`weight_norms` measures: the arm's
            selection for the constraint and max-norm arms, the study's default selection
            (``[model] constrain``) for ``none`` and ``weight_decay``.
    """

    weight_decay: float = 0.0
    after_step: Callable[[], None] | None = None
    layers: list[str] = field(default_factory=list)
    radius: float = math.nan
    measured: list[str] = field(default_factory=list)


def _unit_norms(w: torch.Tensor) -> torch.Tensor:
    """Norm of each output unit's incoming weights: the rows of ``w.reshape(out, -1)``."""
    return w.reshape(w.shape[0], -1).norm(dim=1)


def _clip_rows(weights: list[torch.Tensor], radius: float) -> None:
    """Scale each output unit's weights ``w`` (a row of ``W.reshape(out, -1)``) with
    ``|w| > radius`` to ``radius * w / |w|`` (in place)."""
    with torch.no_grad():
        for w in weights:
            norms = _unit_norms(w).clamp_min(1e-30)
            factor = torch.clamp(radius / norms, max=1.0)
            w.mul_(factor.reshape((-1,) + (1,) * (w.dim() - 1)))


def _refuse(key: str, name: str, arm: str, exc: ValueError) -> StudyConfigError:
    return StudyConfigError(f"study config: '{key}': the {arm} arm cannot act on {name!r}: "
                            f"{exc}; leave it out of the selection")


def prepare_arm(name: str, strength: float, model: nn.Module,
                config: "StudyConfig | None" = None) -> ArmSetup:
    """Apply arm ``name`` at ``strength`` to ``model`` (in place) and describe it.

    The weights it acts on are the arm's layer selection from ``config``
    (``[arms.NAME] constrain``, else ``[model] constrain``); without a config, ``"hidden"``.

    Raises:
        StudyConfigError: the selection matches nothing or only ineligible parameters
            (naming the key and the eligible parameters), or a selected weight cannot hold
            the constraint (naming it).
        ValueError: an unknown arm name.
    """
    if name not in _ARMS:
        raise ValueError(f"unknown arm {name!r}; allowed: {', '.join(_ARMS)}")
    default, default_key = ("hidden", "model.constrain") if config is None else (
        config.model.constrain, "model.constrain")
    if name in ("none", "weight_decay"):
        measured = [n for n, _ in select_weights(model, default, default_key)]
        if name == "none":
            return ArmSetup(measured=measured)
        return ArmSetup(weight_decay=float(strength), layers=["(all parameters)"],
                        measured=measured)
    selection, key = (default, default_key) if config is None else (
        config.arm(name).layer_selection(config.model))
    chosen = select_weights(model, selection, key)
    names = [n for n, _ in chosen]
    strength = float(strength)
    if name == "max_norm":
        weights = [model.get_parameter(n) for n in names]
        _clip_rows(weights, strength)
        return ArmSetup(after_step=lambda: _clip_rows(weights, strength), layers=names,
                        radius=strength, measured=names)
    for weight_name in names:
        weight = model.get_parameter(weight_name)
        try:
            if name == "fixed_norm":
                constraint = hn.FixedNorm(radius=strength, over="rows")
            else:
                rows, length = weight.shape[0], weight[0].numel()
                constraint = hn.Orthonormal(over="rows" if rows <= length else "columns",
                                            scale=strength)
                constraint.validate_shape(weight.shape, weight_name)
                # Start from the nearest orthonormal point of the initial weights, found in
                # float64: a random square init can be too ill-conditioned for a float32
                # SVD (ratio of singular values ~1e-5 happens), though its nearest point is
                # unique.
                with torch.no_grad():
                    weight.copy_(constraint.project(weight.detach().double()))
            hn.constrain(model, **{weight_name: constraint})
        except ValueError as exc:
            raise _refuse(key, weight_name, name, exc) from exc
    return ArmSetup(layers=names, measured=names)


def check_layer_selections(config: "StudyConfig", in_features: int, n_outputs: int) -> None:
    """Check every arm's layer selection against the model before any run (fail fast).

    The model is built on the ``meta`` device (shapes and names only: no memory, no
    computation, so a parent process stays safe to fork). Raises :class:`StudyConfigError`
    as :func:`prepare_arm` would. A factory that cannot build on the ``meta`` device (it
    reads values, e.g. ``.item()``) is not checked here; its first run checks it.
    """
    try:
        with torch.device("meta"):
            model = build_model(config.model, in_features, n_outputs, config.seeds[0])
    except StudyConfigError:
        raise
    except Exception:  # noqa: BLE001 - any other failure: leave the check to the first run
        return
    select_weights(model, config.model.constrain, "model.constrain")
    for arm in config.arms:
        if arm.name not in ("none", "weight_decay"):
            select_weights(model, *arm.layer_selection(config.model))


def _measured(model: nn.Module, setup: ArmSetup | None) -> list[torch.Tensor]:
    if setup is None:
        return [m.weight for _, m in select_weights(model, "hidden")]
    return [model.get_parameter(n) for n in setup.measured]


def constraint_residual(model: nn.Module, setup: ArmSetup) -> float:
    """Largest relative constraint violation of the arm's weights; ``nan`` if it has none.

    Constraint arms: ``max(holonomic.residuals(model).values())`` (the selected weights are
    the constrained ones). Max-norm arm: ``max(0, max_unit |w| / c - 1)`` over the output
    units of the selected weights.
    """
    if not math.isnan(setup.radius):
        with torch.no_grad():
            largest = max(float(_unit_norms(model.get_parameter(n)).max())
                          for n in setup.layers)
        return max(0.0, largest / setup.radius - 1.0)
    values = hn.residuals(model)
    return float(max(values.values())) if values else math.nan


def weight_norms(model: nn.Module, setup: ArmSetup | None = None) -> dict[str, float]:
    """Weight norms of the measured weights (``setup.measured``; the ``"hidden"`` selection
    without a setup) and of the output layer.

    ``weight_norm_hidden``: Frobenius norm of all measured weights together;
    ``mean_row_norm_hidden``: mean over their output units (rows of ``W.reshape(out, -1)``:
    a ``Linear`` row, a conv output channel's kernel) of the unit's norm; the keys keep
    their names from when only hidden ``Linear`` layers were measured.
    ``weight_norm_output``: Frobenius norm of the output layer's weight (the last
    ``Linear``; :func:`holonomic.study.models.output_layer`).
    """
    measured = _measured(model, setup)
    output = output_layer(model)
    with torch.no_grad():
        squares = sum(float(w.pow(2).sum()) for w in measured)
        rows = torch.cat([_unit_norms(w) for w in measured]) if measured else torch.zeros(0)
        return {
            "weight_norm_hidden": math.sqrt(squares),
            "mean_row_norm_hidden": float(rows.mean()) if len(rows) else math.nan,
            "weight_norm_output": float(output[1].weight.norm()) if output else math.nan,
        }
