"""The optimisers an arm may use (``[arms.NAME] optimiser``), in one registry.

===================  ==========================================================  ===============
optimiser            built as                                                    hyperparameters
===================  ==========================================================  ===============
langevin             ``holonomic.Langevin(lr, momentum, temperature=T)``         lr, momentum,
                     (T = 0: heavy-ball SGD exactly)                             temperature
adaptive_langevin    ``holonomic.AdaptiveLangevin(lr, momentum, temperature=T)``  lr, momentum,
                     (T > 0 in every group but those with ``adaptive = false``)  temperature
overdamped_langevin  ``holonomic.OverdampedLangevin(lr, temperature=T)``         lr, temperature
sgd                  ``torch.optim.SGD(lr, momentum, weight_decay)``             lr, momentum
adamw                ``torch.optim.AdamW(lr, weight_decay)`` (torch's betas, eps;  lr
                     ``weight_decay = 0`` unless decoupled decay is asked: torch's
                     default 0.01 is never used silently)
===================  ==========================================================  ===============

Each arm's hyperparameters default to the budget's (``[budget] lr``, ``momentum``,
``temperature``; a budget given as ``step`` and ``friction`` gives ``lr = h^2 (1 + mu) / 2``
and ``mu = exp(-gamma h)``). The holonomic optimisers get the budget's ``projection``. Every
optimiser makes one gradient evaluation per step, so equal epochs are equal budgets.

Per-layer settings (``[[arms.NAME.groups]]``) become torch param groups with the keys of
:attr:`OptimiserSpec.group_keys`. Adding an optimiser: one entry in :data:`OPTIMISERS`.
"""

from __future__ import annotations

import fnmatch
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable, Mapping, Sequence

import torch
from torch import nn

import holonomic as hn
from holonomic.study.config import StudyConfigError
from holonomic.study.models import output_layer, select_weights

if TYPE_CHECKING:
    from holonomic.study.config import ArmConfig, BudgetConfig

__all__ = ["HYPERPARAMETERS", "OPTIMISERS", "Hyperparameter", "OptimiserSpec",
           "budget_defaults", "check_thermostat", "decoupled_decay", "group_settings",
           "param_groups"]


@dataclass(frozen=True)
class Hyperparameter:
    """A searchable hyperparameter: its allowed interval (for error messages and checks)."""

    name: str
    low: float
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    meaning: str = ""

    def ok(self, value: float) -> bool:
        if not math.isfinite(value):
            return False
        if value < self.low or (self.low_open and value == self.low):
            return False
        if self.high is not None and (value > self.high or (self.high_open and value == self.high)):
            return False
        return True

    def allowed(self) -> str:
        low = f"{'>' if self.low_open else '>='} {self.low:g}"
        if self.high is None:
            return low
        return f"{low} and {'<' if self.high_open else '<='} {self.high:g}"


#: Hyperparameters an optimiser may have (strength belongs to the regulariser).
HYPERPARAMETERS = {
    "lr": Hyperparameter("lr", 0.0, None, low_open=True, meaning="learning rate"),
    "momentum": Hyperparameter("momentum", 0.0, 1.0, high_open=True,
                               meaning="SGD momentum mu = exp(-gamma h)"),
    "temperature": Hyperparameter("temperature", 0.0, None,
                                  meaning="temperature in units of the mean minibatch loss"),
}


def budget_defaults(budget: "BudgetConfig") -> dict[str, float]:
    """``lr``, ``momentum`` and ``temperature`` of the budget (SGD view of a step/friction
    budget: ``lr = h^2 (1 + mu) / 2``, ``mu = exp(-gamma h)``)."""
    if budget.lr is not None:
        lr, momentum = float(budget.lr), float(budget.momentum)
    else:
        h, gamma = float(budget.step), float(budget.friction)
        momentum = math.exp(-gamma * h)
        lr = h * h * (1.0 + momentum) / 2.0
    return {"lr": lr, "momentum": momentum, "temperature": float(budget.temperature)}


def _physics(settings: Mapping[str, float], budget: "BudgetConfig") -> dict[str, float]:
    """The step-size keywords of a Langevin-type constructor: the budget's ``step`` and
    ``friction`` when it is given that way and the arm uses its lr and momentum unchanged
    (the same numbers as before recipes existed), else ``lr`` and ``momentum``."""
    if budget.lr is None:
        default = budget_defaults(budget)
        if settings["lr"] == default["lr"] and settings["momentum"] == default["momentum"]:
            return {"step": float(budget.step), "friction": float(budget.friction)}
    return {"lr": float(settings["lr"]), "momentum": float(settings["momentum"])}


def _langevin(params: Any, settings: Mapping[str, float], seed: int, budget: "BudgetConfig",
              weight_decay: float) -> torch.optim.Optimizer:
    return hn.Langevin(params, **_physics(settings, budget),
                       temperature=float(settings["temperature"]),
                       projection=budget.projection, seed=seed, weight_decay=weight_decay)


def _adaptive(params: Any, settings: Mapping[str, float], seed: int, budget: "BudgetConfig",
              weight_decay: float) -> torch.optim.Optimizer:
    temperature = float(settings["temperature"])
    if isinstance(params, list) and params and isinstance(params[0], dict):
        # groups adapt unless they say adaptive = false; the constructor's default (which
        # validates the default temperature) is then only a default for no group
        params = [{"adaptive": True, **group} for group in params]
    return hn.AdaptiveLangevin(params, **_physics(settings, budget), temperature=temperature,
                               adaptive=temperature > 0, projection=budget.projection,
                               seed=seed, weight_decay=weight_decay)


def _overdamped(params: Any, settings: Mapping[str, float], seed: int,
                budget: "BudgetConfig", weight_decay: float) -> torch.optim.Optimizer:
    return hn.OverdampedLangevin(params, lr=float(settings["lr"]),
                                 temperature=float(settings["temperature"]), seed=seed,
                                 weight_decay=weight_decay)


def _sgd(params: Any, settings: Mapping[str, float], seed: int, budget: "BudgetConfig",
         weight_decay: float) -> torch.optim.Optimizer:
    return torch.optim.SGD(params, lr=float(settings["lr"]),
                           momentum=float(settings["momentum"]), weight_decay=weight_decay)


def _adamw(params: Any, settings: Mapping[str, float], seed: int, budget: "BudgetConfig",
           weight_decay: float) -> torch.optim.Optimizer:
    # weight_decay here is the decoupled decay (0 unless asked: torch's default is 0.01)
    return torch.optim.AdamW(params, lr=float(settings["lr"]), weight_decay=weight_decay)


@dataclass(frozen=True)
class OptimiserSpec:
    """One optimiser of :data:`OPTIMISERS`.

    Attributes:
        name: the value of ``[arms.NAME] optimiser``.
        built_as: what it builds (for messages and the README).
        hyperparameters: the names of :data:`HYPERPARAMETERS` it takes.
        holonomic: integrates on constraint sets (``fixed_norm``, ``orthonormal`` need it).
        group_keys: keys a ``[[arms.NAME.groups]]`` entry may set for it.
        native_decoupled_decay: it applies decoupled weight decay itself (``adamw``: its
            ``weight_decay``); otherwise the runner decays after each step
            (:func:`decoupled_decay`).
        build: ``build(params, settings, seed, budget, weight_decay)``: ``params`` a list
            of parameters or of param-group dicts (keys of ``group_keys`` resolved);
            ``settings`` the trial's hyperparameters; ``weight_decay`` the L2 coefficient
            in the potential, or the decoupled decay when ``native_decoupled_decay``.
    """

    name: str
    built_as: str
    hyperparameters: tuple[str, ...]
    holonomic: bool
    group_keys: tuple[str, ...]
    build: Callable[..., torch.optim.Optimizer]
    native_decoupled_decay: bool = False


_LANGEVIN_GROUP = ("lr", "lr_scale", "momentum", "temperature", "temperature_scale")

#: Every optimiser an arm may name.
OPTIMISERS: dict[str, OptimiserSpec] = {spec.name: spec for spec in (
    OptimiserSpec("langevin", "holonomic.Langevin", ("lr", "momentum", "temperature"), True,
                  _LANGEVIN_GROUP, _langevin),
    OptimiserSpec("adaptive_langevin", "holonomic.AdaptiveLangevin",
                  ("lr", "momentum", "temperature"), True, _LANGEVIN_GROUP + ("adaptive",),
                  _adaptive),
    OptimiserSpec("overdamped_langevin", "holonomic.OverdampedLangevin", ("lr", "temperature"),
                  True, ("lr", "lr_scale", "temperature", "temperature_scale"), _overdamped),
    OptimiserSpec("sgd", "torch.optim.SGD", ("lr", "momentum"), False,
                  ("lr", "lr_scale", "momentum"), _sgd),
    OptimiserSpec("adamw", "torch.optim.AdamW", ("lr",), False, ("lr", "lr_scale"), _adamw,
                  native_decoupled_decay=True),
)}


def decoupled_decay(optimizer: torch.optim.Optimizer, strength: float) -> Callable[[], None]:
    """After-step hook of decoupled weight decay for an optimiser without it:
    ``w <- w (1 - lr_t * strength)`` for every parameter of every group, ``lr_t`` the
    group's current ``lr`` (so a schedule scales the decay as AdamW's)."""
    def decay() -> None:
        with torch.no_grad():
            for group in optimizer.param_groups:
                factor = 1.0 - float(group["lr"]) * strength
                for p in group["params"]:
                    p.mul_(factor)
    return decay


def check_thermostat(params: Any, settings: Mapping[str, float], optimiser: str,
                     arm: str = "NAME") -> None:
    """Refuse ``adaptive_langevin`` with a param group that adapts at temperature 0 (the
    thermostat targets ``T > 0``). ``params``: a list of parameters (one group at the
    trial's temperature) or of param-group dicts (:func:`param_groups`).

    Raises:
        StudyConfigError: naming ``arms.ARM.temperature`` and the allowed values.
    """
    if optimiser != "adaptive_langevin":
        return
    groups = params if isinstance(params, list) and params and all(
        isinstance(g, dict) for g in params) else [{}]
    for group in groups:
        temperature = group.get("temperature", settings["temperature"])
        if group.get("adaptive", True) and not temperature > 0:
            raise StudyConfigError(
                f"study config: 'arms.{arm}.temperature' = {temperature!r} for a group that "
                "adapts: optimiser 'adaptive_langevin' needs temperature > 0 there (the "
                "thermostat targets it); allowed: > 0 (fix or search it), or give that "
                "group adaptive = false in [[arms." + arm + ".groups]]")


def group_settings(base: Mapping[str, float], group: Mapping[str, Any],
                   hyperparameters: Sequence[str]) -> dict[str, Any]:
    """The settings of one param group: ``base`` (the trial's settings) with the group's
    absolute values (``lr``, ``momentum``, ``temperature``), scales (``lr_scale``,
    ``temperature_scale``: times the trial's value) and ``adaptive`` applied; only the keys
    the optimiser has (and ``adaptive``)."""
    out: dict[str, Any] = {}
    for name in hyperparameters:
        value = float(base[name])
        if name in group:
            value = float(group[name])
        elif f"{name}_scale" in group:
            value = value * float(group[f"{name}_scale"])
        out[name] = value
    if "adaptive" in group:
        out["adaptive"] = bool(group["adaptive"])
    return out


def _group_selection(model: nn.Module, layers: str | Sequence[str], key: str) -> list[str]:
    """Qualified parameter names of a ``[[arms.NAME.groups]]`` entry: ``"hidden"`` /
    ``"hidden+output"`` / ``"output"`` take those layers' weights and biases; patterns
    match any parameter (weights and biases)."""
    names = [name for name, _ in model.named_parameters()]
    if isinstance(layers, str):
        if layers == "output":
            output = output_layer(model)
            chosen = [] if output is None else [output[0]]
        else:
            chosen = [name for name, _ in select_weights(model, layers, key)]
        prefixes = {name.rpartition(".")[0] for name in chosen}
        return [name for name in names if name.rpartition(".")[0] in prefixes]
    out = []
    for pattern in layers:
        matched = [name for name in names if fnmatch.fnmatchcase(name, pattern)]
        if not matched:
            raise StudyConfigError(f"study config: '{key}' pattern {pattern!r} matches no "
                                   f"parameter of the model; parameters: {', '.join(names)}")
        out += [name for name in matched if name not in out]
    return out


def param_groups(model: nn.Module, arm: "ArmConfig", settings: Mapping[str, float],
                 ) -> tuple[list[Any], list[dict[str, Any]]]:
    """``(params for the optimiser, recorded groups)``: ``model.parameters()`` as a list
    when the arm has no groups; else one param-group dict per ``[[arms.NAME.groups]]``
    entry (the first entry that matches a parameter takes it) with its resolved settings
    (:func:`holonomic.study.optimisers.group_settings`), then the arm's default group of
    the remaining parameters. Recorded groups: ``{"layers": [names], ...settings}``."""
    if not arm.groups:
        return list(model.parameters()), []
    opt = OPTIMISERS[arm.optimiser]
    by_name = dict(model.named_parameters())
    taken: set[str] = set()
    groups, recorded = [], []
    for i, group in enumerate(arm.groups):
        key = f"arms.{arm.name}.groups[{i}].layers"
        names = [n for n in _group_selection(model, group.layers, key) if n not in taken]
        if not names:
            raise StudyConfigError(f"study config: '{key}' takes no parameter (an earlier "
                                   "group took them, or the selection is empty); change "
                                   "the layers or remove the group")
        taken.update(names)
        resolved = group_settings(settings, group.as_dict(), opt.hyperparameters)
        groups.append({"params": [by_name[n] for n in names], **resolved})
        recorded.append({"layers": names, **resolved})
    rest = [n for n in by_name if n not in taken]
    if rest:
        groups.append({"params": [by_name[n] for n in rest]})
        recorded.append({"layers": rest, **{k: float(settings[k])
                                            for k in opt.hyperparameters}})
    return groups, recorded
