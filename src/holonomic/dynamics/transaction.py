r"""The step transaction: every integrator step, whatever kernels compute it, runs here.

A step of a holonomic integrator is all or nothing::

    snapshot the generator states
    for each parameter, in parameter order (groups, then parameters):
        draw the scheme's noise for it            (fixed order: the same numbers whatever
                                                    kernel later uses them)
    each kernel computes its parameters' new positions and momenta and an ok flag,
        writing nothing                            (kernels: holonomic.dynamics.kernels)
    read every ok flag with one host synchronisation
    all ok      -> commit: write positions, store momenta and group state
    some failed -> recompute those parameters on the reference kernel, same inputs and
                   noise (a fast kernel may decline a case the reference handles);
                   still failing -> restore the generators and raise IntegrationError
                   naming the first failing parameter (non-finite gradients first),
                   with nothing changed

:class:`StepInfo` records, per parameter, which kernel took the step.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Callable, Iterable, Sequence

import torch
from torch import Tensor

from holonomic.geometry.base import Constraint

if TYPE_CHECKING:  # pragma: no cover
    from holonomic.dynamics.operators import Settings
    from holonomic.dynamics.schemes import Scheme

__all__ = [
    "IntegrationError",
    "ParameterStepInfo",
    "StepInfo",
    "StepInput",
    "StepResult",
    "GroupResult",
    "NoiseBuffers",
    "Transaction",
    "run_step",
]


class IntegrationError(RuntimeError):
    """A step could not be taken; no weight, momentum or generator state was changed.

    Attributes:
        parameter: readable name of the offending parameter.
        reason: ``"non-finite gradient"``, ``"projection failed"`` or
            ``"non-finite result"``.
        group: index of the param group of the parameter (``None`` if unknown).
    """

    def __init__(self, message: str, *, parameter: str, reason: str, group: int | None = None) -> None:
        super().__init__(message)
        self.parameter = parameter
        self.reason = reason
        self.group = group


@dataclass(frozen=True)
class ParameterStepInfo:
    """Diagnostics of one parameter for the last step (not checkpointed).

    ``kernel`` names the kernel that computed the step (``"reference"``,
    ``"fused"``, ``"native"``, ``"square-orthonormal"``; see
    :mod:`holonomic.dynamics.kernels`)."""

    label: str
    group: int
    index: int
    projection_iterations: int
    kinetic_energy: Tensor | None
    tangent_dof: int
    kernel: str = "reference"


class StepInfo:
    """Diagnostics of the last step, one entry per parameter that moved.

    ``parameters`` is the tuple of :class:`ParameterStepInfo`, or a function
    that builds it; it is then built on first access (so that a step pays
    nothing for diagnostics nobody reads).  :attr:`kernels` lists each
    parameter's label with the kernel that took its step.

    ``retried_substeps`` maps the index of each param group whose step was
    retried with more substeps (``retry_substeps``, see
    :class:`holonomic.Langevin`) to the factor ``k`` that succeeded.  Empty
    when the step succeeded at the first attempt.
    """

    __slots__ = ("_parameters", "_build", "retried_substeps")

    def __init__(self, parameters: tuple[ParameterStepInfo, ...] | Callable[[], Iterable[ParameterStepInfo]],
                 retried_substeps: dict[int, int] | None = None) -> None:
        if callable(parameters):
            self._parameters, self._build = None, parameters
        else:
            self._parameters, self._build = tuple(parameters), None
        self.retried_substeps: dict[int, int] = dict(retried_substeps or {})

    @property
    def parameters(self) -> tuple[ParameterStepInfo, ...]:
        if self._parameters is None:
            self._parameters, self._build = tuple(self._build()), None
        return self._parameters

    @property
    def kernels(self) -> tuple[tuple[str, str], ...]:
        """``(parameter label, kernel name)`` of each parameter that moved, in parameter order."""
        return tuple((p.label, p.kernel) for p in self.parameters)

    def __eq__(self, other: object) -> bool:
        return (isinstance(other, StepInfo) and self.parameters == other.parameters
                and self.retried_substeps == other.retried_substeps)

    def __hash__(self) -> int:
        return hash((self.parameters, tuple(sorted(self.retried_substeps.items()))))

    def __repr__(self) -> str:
        retried = f", retried_substeps={self.retried_substeps!r}" if self.retried_substeps else ""
        return f"StepInfo(parameters={self.parameters!r}{retried})"

    def __reduce__(self) -> tuple[Any, ...]:  # pickles the built tuple, not the function
        return (StepInfo, (self.parameters, self.retried_substeps))


@dataclass
class StepInput:
    """Plain inputs of one parameter's step (what a kernel sees; never the optimizer).

    ``force = grad_scale * grad + weight_decay * position`` is the gradient of
    the potential (an optimizer whose force is not of this form passes its force
    as ``grad`` with ``grad_scale = 1`` and ``weight_decay = 0``).  ``noise``
    holds the standard normal draws of the scheme for this parameter, in the
    order the scheme uses them.  ``param`` is the parameter itself: kernels
    read ``position`` and write ``param`` only in :attr:`StepResult.apply`.
    """

    param: Tensor
    label: str
    group: int
    index: int
    position: Tensor
    grad: Tensor
    grad_scale: float
    weight_decay: float
    momentum: Tensor | None
    noise: tuple[Tensor, ...]
    constraint: Constraint
    settings: "Settings"
    scheme: "Scheme"

    def force(self) -> Tensor:
        """``grad_scale * grad + weight_decay * position`` (new tensor unless both are trivial)."""
        f = self.grad if self.grad_scale == 1.0 else self.grad * self.grad_scale
        if self.weight_decay:
            f = f + self.weight_decay * self.position
        return f


@dataclass
class StepResult:
    """A kernel's computed, not yet written, step of one parameter.

    ``ok`` is a 0-d bool tensor or a Python bool (a host value: no
    synchronisation).  ``apply()`` writes the new position into the parameter
    and returns ``(momentum to store or None, kinetic energy or None)``; the
    transaction calls it only when every flag of the step holds.
    """

    ok: Tensor | bool
    iterations: int
    apply: Callable[[], tuple[Tensor | None, Tensor | float | None]]
    kernel: str = "reference"


@dataclass
class GroupResult:
    """New values of a param group's state (e.g. a thermostat friction), stored at commit."""

    ok: Tensor | bool
    state: dict[str, Tensor] = field(default_factory=dict)


class NoiseBuffers:
    """One reusable buffer per parameter for its first draw, kept outside the optimizer's
    state (not checkpointed): a buffer is only read within the step that filled it.  Further
    draws of a step (substeps of the overdamped scheme) get fresh tensors, so that the memory
    kept does not grow with the number of substeps."""

    def __init__(self) -> None:
        self._buffers: dict[int, Tensor] = {}

    def draw(self, like: Tensor, slot: int, generator: torch.Generator) -> Tensor:
        """Standard normal noise shaped like ``like`` (the values of ``torch.randn``)."""
        if slot:
            return torch.empty_like(like, memory_format=torch.contiguous_format).normal_(generator=generator)
        key = id(like)
        buf = self._buffers.get(key)
        if buf is None or buf.shape != like.shape or buf.dtype != like.dtype or buf.device != like.device:
            buf = self._buffers[key] = torch.empty_like(like, memory_format=torch.contiguous_format)
        return buf.normal_(generator=generator)


class Transaction:
    """Generator snapshot and restore for one step.

    ``generators`` is the optimizer's dict of generators (by device),
    ``generator(device)`` its function that returns (and creates) one.
    """

    def __init__(self, generators: dict[str, torch.Generator],
                 generator: Callable[[torch.device], torch.Generator]) -> None:
        self._generators = generators
        self._generator = generator
        self._saved = {k: g.get_state() for k, g in generators.items()}

    def generator(self, device: torch.device) -> torch.Generator:
        return self._generator(device)

    def rollback(self) -> None:
        """Restore the generator states of the snapshot (and forget generators made since)."""
        for key, state in self._saved.items():
            self._generators[key].set_state(state)
        for key in list(self._generators):
            if key not in self._saved:
                del self._generators[key]


def _all_true(flags: Sequence[Tensor | bool]) -> list[bool]:
    """The flags as host booleans, with one synchronisation for all tensor flags."""
    tensors = [f for f in flags if isinstance(f, Tensor)]
    values = iter(torch.stack([t.reshape(()) for t in tensors]).cpu().tolist()) if tensors else iter(())
    return [bool(next(values)) if isinstance(f, Tensor) else bool(f) for f in flags]


def run_step(
    inputs: Sequence[StepInput],
    assignment: Sequence[Any],
    reference: Any,
    *,
    transaction: Transaction,
    group_states: Sequence[dict[str, Tensor]] = (),
    store_momentum: Callable[[Tensor, Tensor | None], None],
    tangent_dof: Callable[[StepInput], int] = lambda u: u.constraint.tangent_dof(u.param.shape),
) -> StepInfo:
    """Compute, check and commit one step of ``inputs`` (noise already drawn).

    ``assignment[i]`` is the kernel object (with ``name`` and ``run``) that
    computes ``inputs[i]``; ``reference`` the reference kernel.  Inputs of
    one kernel are handed to it together (so that it can batch them).
    ``store_momentum(param, momentum)`` stores a committed momentum.

    Raises:
        IntegrationError: a non-finite gradient or a failed projection;
            the generators are rolled back and nothing was written.
    """
    if not inputs:
        return StepInfo(())
    results: list[StepResult | None] = [None] * len(inputs)
    group_results: dict[int, GroupResult] = {}
    states = {g: dict(s) for g, s in enumerate(group_states)}
    by_kernel: dict[int, tuple[Any, list[int]]] = {}
    for i, kernel in enumerate(assignment):
        by_kernel.setdefault(id(kernel), (kernel, []))[1].append(i)
    try:
        declined: list[int] = []
        # one kernel for the whole step: its flags are all the step's flags, so a kernel that
        # can (``can_commit``) writes in the same call when they all hold
        whole = len(by_kernel) == 1
        for kernel, members in by_kernel.values():
            if whole and getattr(kernel, "can_commit", False):
                out, groups = kernel.run(inputs, states, commit=True)
            else:
                out, groups = kernel.run([inputs[i] for i in members], states)
            group_results.update(groups)
            for i, r in zip(members, out):
                if r is None:
                    declined.append(i)
                results[i] = r
        if declined:
            _rerun(reference, inputs, sorted(declined), results, states, group_results)
        flags = [r.ok for r in results] + [g.ok for g in group_results.values()]
        ok = _all_true(flags)  # the one host synchronisation
        if not all(ok):
            failed = [i for i in range(len(inputs)) if not ok[i] and results[i].kernel != reference.name]
            if failed:  # a fast kernel's alarm: recompute those on the reference, same noise
                _rerun(reference, inputs, failed, results, states, group_results)
                ok = _all_true([r.ok for r in results] + [g.ok for g in group_results.values()])
            if not all(ok):
                _raise(inputs, results, ok, list(group_results))
    except BaseException:
        transaction.rollback()
        raise
    kinetic: list[Tensor | float | None] = []
    for u, r in zip(inputs, results):
        momentum, energy = r.apply()
        store_momentum(u.param, momentum)
        kinetic.append(energy)
    for g, result in group_results.items():
        group_states[g].update(result.state)
    labels = [(u.label, u.group, u.index, r.iterations, r.kernel) for u, r in zip(inputs, results)]
    moved = list(inputs)

    def build() -> list[ParameterStepInfo]:
        return [ParameterStepInfo(label, g, index, iterations, _as_tensor(energy, u.position.dtype),
                                  tangent_dof(u), kernel)
                for (label, g, index, iterations, kernel), energy, u in zip(labels, kinetic, moved)]

    return StepInfo(build)


def _as_tensor(energy: Tensor | float | None, dtype: torch.dtype) -> Tensor | None:
    if energy is None or isinstance(energy, Tensor):
        return energy
    return torch.tensor(energy, dtype=dtype)


def _rerun(reference: Any, inputs: Sequence[StepInput], members: list[int], results: list,
           states: dict[int, dict[str, Tensor]], group_results: dict[int, GroupResult]) -> None:
    out, groups = reference.run([inputs[i] for i in members], states)
    group_results.update(groups)
    for i, r in zip(members, out):
        results[i] = r


def _raise(inputs: Sequence[StepInput], results: list[StepResult], ok: list[bool],
           groups: Sequence[int] = ()) -> None:
    """Raise the step's IntegrationError. ``ok``: the parameters' flags, then one per group
    state, in the order of ``groups`` (the param-group indices of the group results)."""
    failed = [i for i in range(len(inputs)) if not ok[i]]
    if not failed:  # a group's state (e.g. the thermostat friction) became non-finite
        bad = [g for g, good in zip(groups, ok[len(inputs):]) if not good]
        group = bad[0] if bad else inputs[0].group
        u = next((x for x in inputs if x.group == group), inputs[0])
        raise IntegrationError(f"the step gave a non-finite group state in param group {group}; nothing was "
                               "changed. Use a smaller step or a larger thermostat mass.",
                               parameter=u.label, reason="non-finite result", group=group)
    grad_ok = _all_true([torch.isfinite(inputs[i].param.grad).all() for i in failed])
    for i, good in zip(failed, grad_ok):  # non-finite gradients first: never retried
        if not good:
            u = inputs[i]
            raise IntegrationError(
                f"non-finite gradient in {u.label} (param group {u.group}); nothing was "
                "changed. Check the loss for NaN/inf, or lower the step or the data scale.",
                parameter=u.label, reason="non-finite gradient", group=u.group)
    u, r = inputs[failed[0]], results[failed[0]]
    raise IntegrationError(
        f"the projection back onto the constraint set of {u.label} (param group "
        f"{u.group}, {u.constraint!r}) failed or gave a non-finite value after "
        f"{r.iterations} iterations; nothing was changed. Use a smaller step "
        "(a lower 'lr'), a lower temperature, projection='geodesic' or retry_substeps.",
        parameter=u.label, reason="projection failed", group=u.group)
