"""The stateful shell shared by the holonomic integrators.

The optimizer classes keep ``param_groups``, ``state``, the seeded random
generators and checkpointing; the arithmetic lives in
:mod:`holonomic.dynamics.operators`.  Every step is transactional: new
positions and momenta are computed into fresh tensors, all failure flags are
checked with one host synchronisation, and only then are the parameters and
the state written.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable, Iterable

import torch
from torch import Tensor

from holonomic.geometry import UNCONSTRAINED, Constraint, constraint_of, parameter_label
from holonomic.dynamics.settings import check_lr, integrator_step_and_friction
from holonomic.geometry.base import check_positive

__all__ = ["IntegrationError", "ParameterStepInfo", "StepInfo", "ConstrainedOptimizer", "Pending"]


class IntegrationError(RuntimeError):
    """A step could not be taken; no weight, momentum or generator state was changed.

    Attributes:
        parameter: readable name of the offending parameter.
        reason: ``"non-finite gradient"``, ``"projection failed"`` or
            ``"non-finite result"``.
    """

    def __init__(self, message: str, *, parameter: str, reason: str) -> None:
        super().__init__(message)
        self.parameter = parameter
        self.reason = reason


@dataclass(frozen=True)
class ParameterStepInfo:
    """Diagnostics of one parameter for the last step (not checkpointed)."""

    label: str
    group: int
    index: int
    projection_iterations: int
    kinetic_energy: Tensor | None
    tangent_dof: int


class StepInfo:
    """Diagnostics of the last step, one entry per parameter that moved.

    ``parameters`` is the tuple of :class:`ParameterStepInfo`, or a function
    that builds it; it is then built on first access (the compiled step
    defers this, so that a step pays nothing for diagnostics nobody reads).
    """

    __slots__ = ("_parameters", "_build")

    def __init__(self, parameters: tuple[ParameterStepInfo, ...] | Callable[[], tuple[ParameterStepInfo, ...]]
                 ) -> None:
        if callable(parameters):
            self._parameters, self._build = None, parameters
        else:
            self._parameters, self._build = tuple(parameters), None

    @property
    def parameters(self) -> tuple[ParameterStepInfo, ...]:
        if self._parameters is None:
            self._parameters, self._build = tuple(self._build()), None
        return self._parameters

    def __eq__(self, other: object) -> bool:
        return isinstance(other, StepInfo) and self.parameters == other.parameters

    def __hash__(self) -> int:
        return hash(self.parameters)

    def __repr__(self) -> str:
        return f"StepInfo(parameters={self.parameters!r})"

    def __reduce__(self) -> tuple[Any, ...]:  # pickles the built tuple, not the function
        return (StepInfo, (self.parameters,))


@dataclass
class Pending:
    """A computed but not yet committed update of one parameter."""

    param: Tensor
    label: str
    group: int
    index: int
    geometry: Constraint
    grad_ok: Tensor
    ok: Tensor
    position: Tensor
    momentum: Tensor | None
    iterations: int


def step_label(p: Tensor, names: list[str] | None, group: int, index: int) -> str:
    """Readable name of a parameter for step diagnostics and error messages."""
    if names:
        return names[index]
    return parameter_label(p, f"group {group} parameter {index} {tuple(p.shape)}")


def check_temperature(value: Any) -> float:
    return check_positive("temperature", value, allow_zero=True)


def check_friction(value: Any) -> float:
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"friction must be a real number, got {value!r}") from None
    if math.isnan(x) or x < 0:
        raise ValueError(f"friction must be non-negative (math.inf allowed), got {value!r}")
    return x


def check_dataset_size(value: Any) -> float | None:
    if value is None:
        return None
    return check_positive("dataset_size", value)


class ConstrainedOptimizer(torch.optim.Optimizer):
    """Bookkeeping common to all holonomic integrators (see module docstring).

    Subclasses define ``_validate_group(group)`` and ``_update(...)``.
    Param groups hold ``"lr"`` (and ``"momentum"``) with ``torch.optim.SGD``'s
    meaning; the integrator's step and friction follow from them
    (:meth:`step_and_friction`).
    """

    def __init__(self, params: Iterable[Any], defaults: dict[str, Any], *, seed: int = 0) -> None:
        if isinstance(seed, bool) or not isinstance(seed, int):
            raise ValueError(f"seed must be an int, got {seed!r}")
        self.seed = seed
        self._generators: dict[str, torch.Generator] = {}
        self.last_info: StepInfo | None = None
        super().__init__(params, defaults)

    # -- groups ----------------------------------------------------------------
    def add_param_group(self, param_group: dict[str, Any]) -> None:
        """As ``torch.optim.Optimizer.add_param_group``; a group may give the
        integrator's ``step`` (and, for :class:`holonomic.Langevin`,
        ``friction``) instead of ``lr`` (and ``momentum``): it is converted and
        stored as ``lr``/``momentum`` (see :mod:`holonomic.dynamics.settings`)."""
        param_group = self._convert_group(param_group)
        super().add_param_group(param_group)
        group = self.param_groups[-1]
        group["lr"] = check_lr(group["lr"])
        self._validate_group(group)
        for p in group["params"]:
            if p.is_sparse:
                raise ValueError("sparse parameters are not supported; use a dense nn.Embedding")
            constraint = constraint_of(p)
            if constraint is not None:
                constraint.validate_shape(p.shape, parameter_label(p, "parameter"))

    def _convert_group(self, param_group: dict[str, Any]) -> dict[str, Any]:
        """Without momentum (overdamped): ``step`` is ``lr``."""
        if "step" in param_group:
            if "lr" in param_group:
                raise ValueError("give the step size as 'step' or 'lr', not both")
            param_group = dict(param_group)
            param_group["lr"] = param_group.pop("step")
        return param_group

    def step_and_friction(self, group_index: int = 0) -> tuple[float, float]:
        """The integrator's step ``h`` and friction ``gamma`` of a param group,
        computed from its current ``lr`` and ``momentum`` (so they follow a
        scheduler): ``h = sqrt(2 lr / (1 + momentum))``, ``gamma = -ln(momentum) / h``
        (:func:`holonomic.dynamics.settings.integrator_step_and_friction`).
        Without momentum (:class:`holonomic.OverdampedLangevin`): ``(lr, inf)``."""
        return integrator_step_and_friction(self.param_groups[group_index])

    def _validate_group(self, group: dict[str, Any]) -> None:  # pragma: no cover - abstract
        raise NotImplementedError

    # -- randomness ---------------------------------------------------------------
    def generator(self, device: torch.device) -> torch.Generator:
        """The integrator's own generator for ``device`` (created from ``seed``)."""
        key = str(device)
        gen = self._generators.get(key)
        if gen is None:
            gen = torch.Generator(device=device)
            gen.manual_seed(self.seed)
            self._generators[key] = gen
        return gen

    def state_dict(self) -> dict[str, Any]:
        """As ``torch.optim.Optimizer.state_dict`` plus ``"seed"`` and the
        generator states, so a resumed run draws the same noise.  Loadable
        with ``torch.load(weights_only=True)``."""
        sd = super().state_dict()
        sd["seed"] = self.seed
        sd["generators"] = {k: g.get_state() for k, g in self._generators.items()}
        return sd

    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        state_dict = dict(state_dict)
        seed = state_dict.pop("seed", self.seed)
        generators = state_dict.pop("generators", {})
        super().load_state_dict(state_dict)
        self.seed = int(seed)
        self._generators = {}
        for key, gen_state in generators.items():
            self.generator(torch.device(key)).set_state(gen_state.to("cpu", torch.uint8))

    # -- stepping -------------------------------------------------------------
    @staticmethod
    def force(p: Tensor, group: dict[str, Any]) -> Tensor:
        """``dataset_size * grad + weight_decay * w`` (gradient of the potential)."""
        grad = p.grad
        n = group.get("dataset_size")
        f = grad if n is None else grad * n
        wd = group.get("weight_decay", 0.0)
        if wd:
            f = f + wd * p
        return f

    def _update(self, p: Tensor, force: Tensor, group: dict[str, Any], geometry: Constraint) -> tuple[
        Tensor, Tensor | None, Tensor, int
    ]:  # pragma: no cover - abstract
        """Return (new position, new momentum or None, ok flag, iterations)."""
        raise NotImplementedError

    @torch.no_grad()
    def step(self, closure: Callable[[], Tensor] | None = None) -> Tensor | None:  # type: ignore[override]
        """Take one step using the gradients in ``.grad``.

        Raises:
            IntegrationError: a non-finite gradient or a failed projection;
                nothing (weights, momenta, generator states) is changed.
        """
        if not getattr(self, "_first_step_checked", False):
            from holonomic.distributed import on_first_step  # lazy: only runs checks under torch.distributed

            on_first_step(self)  # ranks agree (seed, weights), no FSDP shards; raises with nothing changed
            self._first_step_checked = True
        loss = None
        if closure is not None:
            with torch.enable_grad():
                loss = closure()
        self._take_step()
        return loss

    #: Internal switch: ``True`` forces the plain per-parameter path, the
    #: reference that every fast path is tested against (tests/speed).
    _reference: bool = False

    def _take_step(self) -> None:
        """One step from the gradients in ``.grad`` (subclasses may add fast paths
        that fall back to :meth:`_reference_step`)."""
        self._reference_step()

    def _reference_step(self) -> None:
        """The plain path: one :meth:`_update` per parameter, then one commit."""
        saved_generators = {k: g.get_state() for k, g in self._generators.items()}
        pending: list[Pending] = []
        for g_index, group in enumerate(self.param_groups):
            lr = group["lr"]
            if not lr >= 0:
                raise ValueError(f"param group {g_index}: lr must be >= 0, got {lr!r}")
            if lr == 0:  # e.g. a schedule that decays to zero: nothing moves
                continue
            names = group.get("param_names")
            for index, p in enumerate(group["params"]):
                if p.grad is None:
                    continue
                if p.grad.is_sparse:
                    raise ValueError("sparse gradients are not supported; use a dense nn.Embedding")
                label = step_label(p, names, g_index, index)
                geometry = constraint_of(p) or UNCONSTRAINED
                grad_ok = torch.isfinite(p.grad).all()
                position, momentum, ok, iterations = self._update(p, self.force(p, group), group, geometry)
                pending.append(Pending(p, label, g_index, index, geometry, grad_ok, ok, position,
                                       momentum, iterations))
        self._commit(pending, saved_generators)

    def _commit(self, pending: list[Pending], saved_generators: dict[str, Tensor]) -> None:
        if not pending:
            self.last_info = StepInfo(())
            return
        flags = torch.stack([torch.stack([u.grad_ok, u.ok]) for u in pending]).cpu()  # one sync
        if not bool(flags.all()):
            for key, state in saved_generators.items():
                self._generators[key].set_state(state)
            for key in list(self._generators):
                if key not in saved_generators:
                    del self._generators[key]
            for u, (grad_ok, ok) in zip(pending, flags.tolist()):
                if not grad_ok:
                    raise IntegrationError(
                        f"non-finite gradient in {u.label} (param group {u.group}); nothing was "
                        "changed. Check the loss for NaN/inf, or lower the step or the data scale.",
                        parameter=u.label, reason="non-finite gradient")
                if not ok:
                    raise IntegrationError(
                        f"the projection back onto the constraint set of {u.label} (param group "
                        f"{u.group}, {u.geometry!r}) failed or gave a non-finite value after "
                        f"{u.iterations} iterations; nothing was changed. Use a smaller step "
                        "(a lower 'lr'), a lower temperature, or projection='geodesic'.",
                        parameter=u.label, reason="projection failed")
        infos = []
        for u in pending:
            u.param.copy_(u.position)
            kinetic = None
            if u.momentum is not None:
                self.state[u.param]["momentum"] = u.momentum
                kinetic = 0.5 * (u.momentum * u.momentum).sum()
            infos.append(ParameterStepInfo(u.label, u.group, u.index, u.iterations, kinetic,
                                           u.geometry.tangent_dof(u.param.shape)))
        self.last_info = StepInfo(tuple(infos))
