"""The arms of a study: applying an arm's regulariser to a model, and what is measured.

The regularisers themselves (what each does, with which optimisers) are the registry
:data:`holonomic.study.regularisers.REGULARISERS`; this module keeps the entry points
studies used before recipes (:func:`prepare_arm`), the check of layer selections before a
study starts (:func:`check_layer_selections`) and the weight measurements of a run
(:func:`constraint_residual`, :func:`weight_norms`).

Which weights ``max_norm``, ``fixed_norm`` and ``orthonormal`` act on is the layer
selection (``[model] constrain``, default ``"hidden"``, overridden per arm by
``[arms.NAME] constrain``; see :class:`holonomic.study.config.ModelConfig`): by default the
weight of every ``nn.Linear`` and ``nn.Conv1d/2d/3d`` layer except the output layer (the
last ``Linear``). Biases and normalisation-layer weights are never selected. A selection
that matches nothing is refused (:class:`StudyConfigError`).

:attr:`ArmSetup.layers` (stored in each run record as ``"layers"``) lists the qualified
parameter names an arm acted on: ``[]`` for ``none`` and ``dropout``,
``["(all parameters)"]`` for the weight decays, the selected weights otherwise.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import torch
from torch import nn

import holonomic as hn
from holonomic.study.config import StudyConfigError
from holonomic.study.models import build_model, output_layer, select_weights
from holonomic.study.regularisers import REGULARISERS, ArmSetup, unit_norms

if TYPE_CHECKING:
    from holonomic.study.config import StudyConfig

__all__ = ["ArmSetup", "check_layer_selections", "prepare_arm", "constraint_residual",
           "weight_norms"]


def prepare_arm(name: str, strength: float, model: nn.Module,
                config: "StudyConfig | None" = None) -> ArmSetup:
    """Apply arm ``name``'s regulariser at ``strength`` to ``model`` (in place) and
    describe it (:data:`holonomic.study.regularisers.REGULARISERS`).

    With ``config`` the arm's regulariser and layer selection come from it
    (``[arms.NAME] constrain``, else ``[model] constrain``); without, ``name`` is the
    regulariser and the selection ``"hidden"``.

    Raises:
        StudyConfigError: the selection matches nothing or only ineligible parameters
            (naming the key and the eligible parameters), or a selected weight cannot hold
            the constraint (naming it).
        ValueError: an unknown arm name.
    """
    if config is None:
        regulariser, selection, key = name, "hidden", "model.constrain"
    else:
        try:
            arm = config.arm(name)
        except KeyError:
            arm = None
        if arm is None:
            regulariser, selection, key = name, config.model.constrain, "model.constrain"
        else:
            regulariser = arm.regulariser
            selection, key = arm.layer_selection(config.model)
    if regulariser not in REGULARISERS:
        raise ValueError(f"unknown arm {name!r}; allowed: {', '.join(REGULARISERS)}")
    return REGULARISERS[regulariser].apply(model, strength, selection, key)


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
        options = REGULARISERS[arm.regulariser].model_options(
            float(arm.trials[0].settings.get("strength", 0.0)))
        if options:  # e.g. dropout: a factory's model must have nn.Dropout modules
            with torch.device("meta"):
                build_model(config.model, in_features, n_outputs, config.seeds[0], **options)
        if REGULARISERS[arm.regulariser].selects_layers:
            select_weights(model, *arm.layer_selection(config.model))
        from holonomic.study.optimisers import check_thermostat, param_groups

        for trial in arm.trials:  # groups match, thermostats have a temperature
            settings = _defaults(config) | dict(trial.settings)
            params = param_groups(model, arm, settings)[0] if arm.groups else []
            check_thermostat(params, settings, arm.optimiser, arm.name)


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
            largest = max(float(unit_norms(model.get_parameter(n)).max())
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
        rows = torch.cat([unit_norms(w) for w in measured]) if measured else torch.zeros(0)
        return {
            "weight_norm_hidden": math.sqrt(squares),
            "mean_row_norm_hidden": float(rows.mean()) if len(rows) else math.nan,
            "weight_norm_output": float(output[1].weight.norm()) if output else math.nan,
        }


def _defaults(config: "StudyConfig") -> dict[str, float]:
    from holonomic.study.optimisers import budget_defaults

    return budget_defaults(config.budget)
