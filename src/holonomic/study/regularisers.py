"""The regularisers an arm may use (``[arms.NAME] regulariser``), in one registry.

=======================  ==================================================================
regulariser              what it does at strength s, and to which parameters
=======================  ==================================================================
none                     nothing (no strength)
weight_decay             L2 in the potential, on **every** parameter: force ``+= s w``
                         (the integrator's ``weight_decay``; ``torch.optim.SGD(weight_decay=s)``).
                         Not with ``adamw``: AdamW decays decoupled (use
                         ``decoupled_weight_decay`` there)
decoupled_weight_decay   ``w <- w (1 - lr_t s)`` on every parameter after each step
                         (``lr_t`` the group's current lr); with ``adamw``
                         ``torch.optim.AdamW(weight_decay=s)``, which applies the same decay
                         before its update (Loshchilov & Hutter, ICLR 2019)
max_norm                 after every step each selected unit's incoming weights (a row; a
                         conv output channel's kernel) scaled back into ``|w| <= s``
                         (Srivastava et al., JMLR 15 (2014) 1929-1958); the initial weights
                         too. A projection after the step: works with every optimiser
fixed_norm               ``holonomic.FixedNorm(s, over="rows")`` on each selected weight
                         (holonomic optimisers only)
orthonormal              ``holonomic.Orthonormal(scale=s)`` on each selected weight, viewed as
                         ``W.reshape(out, -1)``, over rows or columns whichever is shorter;
                         the start is the nearest orthonormal point (float64). Holonomic
                         optimisers only
dropout                  rate s in ``[0, 1)``: the built-in MLP gets ``nn.Dropout(s)`` after
                         each hidden activation; a factory model's ``nn.Dropout`` modules get
                         ``p = s`` (refused when it has none)
=======================  ==================================================================

Which weights ``max_norm``, ``fixed_norm`` and ``orthonormal`` act on is the arm's layer
selection (``[arms.NAME] constrain``, else ``[model] constrain``; see
:func:`holonomic.study.models.select_weights`). Adding a regulariser: one entry in
:data:`REGULARISERS` (a :class:`RegulariserSpec`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import torch
from torch import nn

import holonomic as hn
from holonomic.study.config import StudyConfigError
from holonomic.study.models import select_weights

__all__ = ["ArmSetup", "REGULARISERS", "RegulariserSpec", "clip_rows", "unit_norms"]

#: Optimisers that integrate on constraint sets (``holonomic``'s own).
HOLONOMIC_OPTIMISERS = ("langevin", "adaptive_langevin", "overdamped_langevin")


@dataclass
class ArmSetup:
    """What a regulariser did to a model, and what the training loop must do for it.

    Attributes:
        weight_decay: L2 coefficient in the potential, passed to the optimiser (0 unless
            the regulariser is ``weight_decay``).
        decoupled_weight_decay: decoupled decay per unit lr (``decoupled_weight_decay``).
        after_step: called after every optimizer step (max-norm clipping), or None.
        layers: qualified names of the parameters it acts on (``[]`` for ``none`` and
            ``dropout``, ``["(all parameters)"]`` for the two weight decays).
        radius: the max-norm ball radius, used for its residual (``nan`` otherwise).
        measured: qualified names of the weights whose norms are reported: the selection.
    """

    weight_decay: float = 0.0
    decoupled_weight_decay: float = 0.0
    after_step: Callable[[], None] | None = None
    layers: list[str] = field(default_factory=list)
    radius: float = math.nan
    measured: list[str] = field(default_factory=list)


def unit_norms(w: torch.Tensor) -> torch.Tensor:
    """Norm of each output unit's incoming weights: the rows of ``w.reshape(out, -1)``."""
    return w.reshape(w.shape[0], -1).norm(dim=1)


def clip_rows(weights: Sequence[torch.Tensor], radius: float) -> None:
    """Scale each output unit's weights ``w`` (a row of ``W.reshape(out, -1)``) with
    ``|w| > radius`` to ``radius * w / |w|`` (in place)."""
    with torch.no_grad():
        for w in weights:
            norms = unit_norms(w).clamp_min(1e-30)
            factor = torch.clamp(radius / norms, max=1.0)
            w.mul_(factor.reshape((-1,) + (1,) * (w.dim() - 1)))


Selection = "str | tuple[str, ...]"


def _none(model: nn.Module, strength: float, selection: Any, key: str) -> ArmSetup:
    return ArmSetup(measured=[n for n, _ in select_weights(model, selection, key)])


def _weight_decay(model: nn.Module, strength: float, selection: Any, key: str) -> ArmSetup:
    return ArmSetup(weight_decay=float(strength), layers=["(all parameters)"],
                    measured=[n for n, _ in select_weights(model, selection, key)])


def _decoupled(model: nn.Module, strength: float, selection: Any, key: str) -> ArmSetup:
    return ArmSetup(decoupled_weight_decay=float(strength), layers=["(all parameters)"],
                    measured=[n for n, _ in select_weights(model, selection, key)])


def _max_norm(model: nn.Module, strength: float, selection: Any, key: str) -> ArmSetup:
    names = [n for n, _ in select_weights(model, selection, key)]
    weights = [model.get_parameter(n) for n in names]
    radius = float(strength)
    clip_rows(weights, radius)
    return ArmSetup(after_step=lambda: clip_rows(weights, radius), layers=names,
                    radius=radius, measured=names)


def _constrain(kind: str) -> Callable[[nn.Module, float, Any, str], ArmSetup]:
    def apply(model: nn.Module, strength: float, selection: Any, key: str) -> ArmSetup:
        names = [n for n, _ in select_weights(model, selection, key)]
        strength = float(strength)
        for weight_name in names:
            weight = model.get_parameter(weight_name)
            try:
                if kind == "fixed_norm":
                    constraint = hn.FixedNorm(radius=strength, over="rows")
                else:
                    rows, length = weight.shape[0], weight[0].numel()
                    constraint = hn.Orthonormal(over="rows" if rows <= length else "columns",
                                                scale=strength)
                    constraint.validate_shape(weight.shape, weight_name)
                    # Start from the nearest orthonormal point of the initial weights, in
                    # float64: a random square init can be too ill-conditioned for a
                    # float32 SVD, though its nearest point is unique.
                    with torch.no_grad():
                        weight.copy_(constraint.project(weight.detach().double()))
                hn.constrain(model, **{weight_name: constraint})
            except ValueError as exc:
                raise StudyConfigError(
                    f"study config: '{key}': the {kind} arm cannot act on {weight_name!r}: "
                    f"{exc}; leave it out of the selection") from exc
        return ArmSetup(layers=names, measured=names)
    return apply


@dataclass(frozen=True)
class RegulariserSpec:
    """One regulariser of :data:`REGULARISERS`.

    Attributes:
        name: the value of ``[arms.NAME] regulariser``.
        meaning: what its strength is (``""``: it has none).
        default_range: ``(low, high)`` searched on a log scale when an arm searches
            nothing explicitly; None: no strength.
        minimum: smallest allowed strength; ``minimum_open``: the minimum itself excluded.
        maximum: largest allowed strength (None: no bound); ``maximum_open`` likewise.
        optimisers: optimisers it works with (None: every one); ``instead``: what to use
            instead with the others (quoted in the refusal).
        selects_layers: acts on the layer selection (``constrain``).
        apply: ``apply(model, strength, selection, key) -> ArmSetup``: applies it to the
            model in place (``key``: the config key the selection came from).
        model_options: keyword arguments for :func:`holonomic.study.models.build_model`
            at a strength (``dropout``: ``{"dropout": s}``).
    """

    name: str
    meaning: str
    default_range: tuple[float, float] | None
    apply: Callable[[nn.Module, float, Any, str], ArmSetup]
    minimum: float = 0.0
    minimum_open: bool = True
    maximum: float | None = None
    maximum_open: bool = False
    optimisers: tuple[str, ...] | None = None
    instead: str = ""
    selects_layers: bool = False
    model_options: Callable[[float], dict[str, Any]] = lambda strength: {}

    @property
    def has_strength(self) -> bool:
        return self.default_range is not None

    def check_strength(self, value: float, key: str) -> float:
        """``value`` as a float, or a :class:`StudyConfigError` naming ``key`` and the
        allowed range."""
        low_ok = value > self.minimum if self.minimum_open else value >= self.minimum
        high_ok = (self.maximum is None or
                   (value < self.maximum if self.maximum_open else value <= self.maximum))
        if not (math.isfinite(value) and low_ok and high_ok):
            raise StudyConfigError(f"study config: '{key}' = {value!r}: {self.name} strength "
                                   f"({self.meaning}) must be {self.allowed()}")
        return float(value)

    def allowed(self) -> str:
        low = f"{'>' if self.minimum_open else '>='} {self.minimum:g}"
        if self.maximum is None:
            return low
        return f"{low} and {'<' if self.maximum_open else '<='} {self.maximum:g}"


_SELECTING_INSTEAD = ("Use optimiser = \"langevin\", \"adaptive_langevin\" or "
                      "\"overdamped_langevin\" (they hold the weights on the constraint set), "
                      "or regulariser = \"max_norm\" (a projection after each step) with {opt}")

#: Every regulariser an arm may name, in the order reports list them.
REGULARISERS: dict[str, RegulariserSpec] = {spec.name: spec for spec in (
    RegulariserSpec("none", "no strength (one setting)", None, _none),
    RegulariserSpec("weight_decay", "L2 coefficient lambda: force += lambda * w (all "
                    "parameters)", (1e-5, 1e-1), _weight_decay, minimum_open=False,
                    optimisers=("langevin", "adaptive_langevin", "overdamped_langevin", "sgd"),
                    instead="AdamW decays decoupled from the gradient: use regulariser = "
                            "\"decoupled_weight_decay\" with {opt}"),
    RegulariserSpec("decoupled_weight_decay", "decay per unit lr: w <- w (1 - lr * s) after "
                    "each step (all parameters; AdamW's weight_decay)", (1e-4, 1e-1),
                    _decoupled, minimum_open=False),
    RegulariserSpec("max_norm", "ball radius c: each selected unit's incoming weights (a row; "
                    "a conv output channel's kernel) clipped to |w| <= c", (0.25, 4.0), _max_norm,
                    selects_layers=True),
    RegulariserSpec("fixed_norm", "row radius r: each selected unit's incoming weights (a row; "
                    "a conv output channel's kernel) held at |w| = r", (0.25, 4.0),
                    _constrain("fixed_norm"),
                    optimisers=HOLONOMIC_OPTIMISERS, instead=_SELECTING_INSTEAD,
                    selects_layers=True),
    RegulariserSpec("orthonormal", "scale s: selected weights (conv kernels as out x in*k "
                    "matrices) held at W W^T = s^2 I (rows) or W^T W = s^2 I", (0.25, 4.0),
                    _constrain("orthonormal"),
                    optimisers=HOLONOMIC_OPTIMISERS, instead=_SELECTING_INSTEAD,
                    selects_layers=True),
    RegulariserSpec("dropout", "dropout rate p in [0, 1): after each hidden activation of the "
                    "built-in MLP; a factory model's nn.Dropout modules get p",
                    (0.05, 0.5), _none, minimum_open=False, maximum=1.0, maximum_open=True,
                    model_options=lambda strength: {"dropout": float(strength)}),
)}
