"""Declaring constraints on module parameters and finding them again."""

from __future__ import annotations

import copy
import warnings
import weakref
from collections.abc import Iterable
from typing import Any

import torch
from torch import Tensor, nn

from holonomic.geometry.base import Constraint, default_residual_tolerance

__all__ = ["constrain", "constraint_of", "residuals", "parameter_label", "check_not_replaced"]

# Attribute names set on constrained Parameter objects and on their modules.
_CONSTRAINT_ATTR = "_holonomic_constraint"
_LABEL_ATTR = "_holonomic_label"
_RECORD_ATTR = "_holonomic_constraints"


_REPLACED_ATTR = "_holonomic_replaced"

# id(parameter) -> (record token, weak reference to the record that holds the
# parameter).  ``torch.utils.swap_tensors`` (``Module.to``/``load_state_dict``
# under ``torch.__future__.set_swap_module_params_on_conversion(True)``) keeps
# the Python object of a parameter but swaps its ``__dict__`` away, so the
# attribute set by :func:`_attach` is lost; the record still holds the same
# object, and this map finds it again.  The record holds its parameters
# strongly, so an id here cannot be reused while its record lives (no weak
# reference to a parameter is taken: ``swap_tensors`` refuses tensors that
# have one).
_OWNERS: dict[int, tuple[object, "weakref.ref[_ConstraintRecord]"]] = {}
_HOOK: Any = None
_ANY_REPLACED = False


def _attach(param: Tensor, constraint: Constraint, label: str) -> None:
    setattr(param, _CONSTRAINT_ATTR, constraint)
    setattr(param, _LABEL_ATTR, label)
    if _REPLACED_ATTR in getattr(param, "__dict__", {}):
        delattr(param, _REPLACED_ATTR)


def _forget(token: object, ids: set[int]) -> None:
    for i in ids:
        item = _OWNERS.get(i)
        if item is not None and item[0] is token:
            del _OWNERS[i]


def _install_hook() -> None:
    """Register (once per process) the torch hook that carries a declared
    constraint over to a parameter that replaces a constrained one."""
    global _HOOK
    if _HOOK is None:
        _HOOK = torch.nn.modules.module.register_module_parameter_registration_hook(_on_register)


class _ConstraintRecord:
    """Per-module record ``{name: (parameter, constraint, label)}`` of the
    declarations made by :func:`constrain`.

    The declaration belongs to the module's parameter *name*, so it outlives
    the parameter object: when ``module.<name>`` is replaced
    (``module.weight = nn.Parameter(...)``, ``load_state_dict(...,
    assign=True)``, ``swap_tensors``) the constraint is attached to the new
    parameter (see :func:`_on_register`, :func:`constraint_of`).

    ``nn.Parameter.__deepcopy__`` does not copy attributes set on the
    parameter, so the record re-attaches the constraints to the copied
    parameters when the module is deep-copied (the memo maps each original
    parameter to its copy).  ``Module.to``/``state_dict`` keep the Parameter
    objects, so the attributes survive those without help.
    """

    def __init__(self) -> None:
        self.entries: dict[str, tuple[Tensor, Constraint, str]] = {}
        self._start()

    def _start(self) -> None:
        self._token = object()
        self._ids: set[int] = set()
        weakref.finalize(self, _forget, self._token, self._ids)
        _install_hook()

    def set(self, name: str, param: Tensor, constraint: Constraint, label: str) -> None:
        """Record ``param`` as the module's parameter ``name`` under ``constraint``."""
        previous = self.entries.get(name)
        if previous is not None and previous[0] is not param:
            _forget(self._token, {id(previous[0])})
            self._ids.discard(id(previous[0]))
        _attach(param, constraint, label)
        self.entries[name] = (param, constraint, label)
        _OWNERS[id(param)] = (self._token, weakref.ref(self))
        self._ids.add(id(param))

    def drop(self, name: str) -> None:
        param = self.entries.pop(name)[0]
        _forget(self._token, {id(param)})
        self._ids.discard(id(param))

    def __deepcopy__(self, memo: dict[int, Any]) -> "_ConstraintRecord":
        new = _ConstraintRecord()
        memo[id(self)] = new
        for name, (param, constraint, label) in self.entries.items():
            new.set(name, copy.deepcopy(param, memo), copy.deepcopy(constraint, memo), label)
        return new

    def __getstate__(self) -> dict[str, Any]:
        return {"entries": self.entries}

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.entries = {}
        self._start()
        for name, (param, constraint, label) in state["entries"].items():
            self.set(name, param, constraint, label)


def _on_register(module: nn.Module, name: str, param: Tensor | None) -> None:
    """Module parameter registration hook: ``module.<name>`` was declared
    constrained and is being replaced by ``param``; carry the declaration over.

    The new parameter keeps the constraint.  Its values are not changed: one
    that is off the set (residual above ``100 eps`` of its dtype) gives a
    ``UserWarning`` and shows in :func:`residuals` and the audit; one whose
    shape the constraint cannot hold drops the declaration with a
    ``UserWarning``.  The replaced parameter is marked, so an optimizer that
    still holds it refuses to step (:func:`check_not_replaced`).
    """
    record = module.__dict__.get(_RECORD_ATTR)
    if record is None or param is None or name not in record.entries:
        return None
    global _ANY_REPLACED
    old, constraint, label = record.entries[name]
    if param is old:
        _attach(param, constraint, label)
        return None
    setattr(old, _REPLACED_ATTR, label)
    _ANY_REPLACED = True
    try:
        constraint.validate_shape(param.shape, label)
    except ValueError as exc:
        record.drop(name)
        warnings.warn(f"{label} was replaced by a parameter of shape {tuple(param.shape)}; its "
                      f"constraint {constraint!r} cannot hold it and was dropped ({exc}); declare a "
                      "new one with holonomic.constrain", UserWarning, stacklevel=4)
        return None
    record.set(name, param, constraint, label)
    if not param.is_meta and param.numel() and param.dtype.is_floating_point:
        residual = float(constraint.residual(param.detach()))
        tol = default_residual_tolerance(param.dtype)
        if not residual <= tol:
            warnings.warn(f"{label} was replaced by a value off its constraint set ({constraint!r}): "
                          f"relative residual {residual:.3g} > {tol:.3g}; the constraint is kept, the "
                          "value is not changed; call holonomic.repair(model) to project it onto the set",
                          UserWarning, stacklevel=4)
    return None


def _sync(module: nn.Module) -> None:
    """Carry declarations over to parameters replaced without
    ``register_parameter`` (a direct write to ``module._parameters``)."""
    for sub in module.modules():
        record = sub.__dict__.get(_RECORD_ATTR)
        if record is None:
            continue
        for name, (param, _, _) in list(record.entries.items()):
            current = sub._parameters.get(name)
            if current is not None and current is not param:
                _on_register(sub, name, current)


def check_not_replaced(param_groups: Iterable[dict[str, Any]]) -> None:
    """Raise ``ValueError`` naming the first parameter in ``param_groups``
    that its module no longer holds because a constrained parameter was
    replaced (``module.weight = nn.Parameter(...)``,
    ``load_state_dict(..., assign=True)``) after the optimizer was built.

    Stepping such a parameter would train a tensor the model no longer uses.
    Free (one global flag) until some constrained parameter is replaced.
    """
    if not _ANY_REPLACED:
        return
    for g_index, group in enumerate(param_groups):
        for index, p in enumerate(group["params"]):
            label = getattr(p, _REPLACED_ATTR, None)
            if label is not None:
                raise ValueError(
                    f"{label} (param group {g_index}, parameter {index}) is no longer its module's "
                    "parameter: it was replaced (module.<name> = nn.Parameter(...) or "
                    "load_state_dict(..., assign=True)) after this optimizer was built, so a step "
                    "would not train the model. Build the optimizer from model.parameters() after "
                    "replacing parameters, or load with assign=False (copies into the same parameters)")


def _resolve(module: nn.Module, dotted: str) -> tuple[nn.Module, str]:
    owner_path, _, leaf = dotted.rpartition(".")
    try:
        owner = module.get_submodule(owner_path) if owner_path else module
    except AttributeError:
        raise ValueError(f"{dotted!r}: {type(module).__name__} has no submodule {owner_path!r}") from None
    return owner, leaf


def constrain(module: nn.Module, *, replace: bool = False, **constraints: Constraint) -> nn.Module:
    r"""Declare constraints on parameters of ``module`` and return the module.

    ``constrain(layer, weight=FixedNorm(1.0))`` for a parameter of the module
    itself; a dotted name reaches a submodule:
    ``constrain(model, **{"0.weight": Orthonormal()})``.

    For each parameter this (1) validates its shape against the constraint,
    (2) replaces its value in place by the **nearest point** of the
    constraint set in the Euclidean (Frobenius) norm -- row normalisation for
    :class:`FixedNorm`, the polar factor for :class:`Orthonormal` -- and
    (3) records the constraint on the parameter so that every holonomic
    integrator, :func:`constraint_of` and :func:`residuals` find it.

    Works for ``nn.Linear``, ``nn.Conv*d``, ``nn.Embedding`` and any module
    attribute that is an ``nn.Parameter``.  The declaration is kept on the
    module (under the parameter's name), so it survives ``module.to(...)``,
    ``copy.deepcopy``, pickling and ``state_dict`` round trips, and it
    carries over to a parameter that **replaces** the declared one:
    ``module.weight = nn.Parameter(...)``, ``load_state_dict(...,
    assign=True)``, and the tensor swaps of
    ``torch.__future__.set_swap_module_params_on_conversion(True)``.  A
    replacement keeps its values; one that is off the set warns (check
    :func:`residuals`, or call :func:`holonomic.repair`), and an optimizer
    built before the replacement refuses to step the old parameter.

    Declaring a second, different constraint on a constrained parameter
    warns (``UserWarning`` naming both) and replaces the first; pass
    ``replace=True`` to replace it without the warning.  (A parameter cannot
    be called ``replace``.)

    Raises:
        ValueError: a name that is not a parameter, an object that is not a
            constraint, a shape the constraint cannot hold, or a value with no
            nearest point (a zero row, a rank-deficient matrix).
    """
    if not isinstance(module, nn.Module):
        raise ValueError(f"module must be a torch.nn.Module, got {type(module).__name__}")
    if not constraints:
        raise ValueError("constrain() needs at least one name=constraint pair, e.g. weight=FixedNorm()")
    for name, constraint in constraints.items():
        if not isinstance(constraint, Constraint):
            raise ValueError(
                f"{name}: expected a constraint such as FixedNorm() or Orthonormal(), "
                f"got {type(constraint).__name__}"
            )
        owner, leaf = _resolve(module, name)
        param = owner._parameters.get(leaf) if leaf in owner._parameters else None
        if param is None:
            available = ", ".join(n for n, _ in owner.named_parameters(recurse=False)) or "none"
            raise ValueError(
                f"{name!r} is not a parameter of {type(owner).__name__} (its parameters: {available})"
            )
        # the qualified name when the module was reached through its parent
        # (``constrain(model, **{"encoder.fc1.weight": ...})``); error
        # messages of the integrators use it for optimizers built from
        # ``model.parameters()`` (``model.named_parameters()`` gives it anyway)
        label = name if "." in name else f"{type(owner).__name__}.{leaf}"
        constraint.validate_shape(param.shape, label)
        previous = constraint_of(param)
        if previous is not None and previous != constraint and not replace:
            warnings.warn(f"{label} ({name!r}) is already constrained to {previous!r}; {constraint!r} "
                          "replaces it. Pass constrain(..., replace=True) to replace a constraint "
                          "without this warning", UserWarning, stacklevel=2)
        if param.is_sparse:
            raise ValueError(f"{label}: sparse parameters cannot be constrained")
        try:
            projected = constraint.project(param.detach())
        except ValueError as exc:
            raise ValueError(f"{label}: {exc}") from None
        with torch.no_grad():
            param.copy_(projected)
        record = owner.__dict__.get(_RECORD_ATTR)
        if record is None:
            record = _ConstraintRecord()
            owner.__dict__[_RECORD_ATTR] = record
        record.set(leaf, param, constraint, label)
    return module


def constraint_of(tensor: Tensor) -> Constraint | None:
    """The constraint recorded on ``tensor`` by :func:`constrain`, or ``None``.

    Also finds the constraint of a parameter whose attributes were swapped
    away by ``torch.utils.swap_tensors`` (the module's record still holds it)."""
    constraint = getattr(tensor, _CONSTRAINT_ATTR, None)
    if constraint is not None or not _OWNERS:
        return constraint
    item = _OWNERS.get(id(tensor))
    record = item[1]() if item is not None else None
    if record is not None:
        for param, constraint, label in record.entries.values():
            if param is tensor:
                _attach(param, constraint, label)
                return constraint
    return None


def parameter_label(tensor: Tensor, default: str) -> str:
    """A readable name for error messages (``Linear.weight`` for constrained
    parameters), or ``default``."""
    return getattr(tensor, _LABEL_ATTR, default)


@torch.no_grad()
def residuals(module: nn.Module) -> dict[str, float]:
    """``{qualified parameter name: max relative constraint violation}`` for
    every constrained parameter of ``module``, whatever moved it.

    The violation is ``max_i | |w_i| / r - 1 |`` for :class:`FixedNorm` and
    ``max | X^T X / s^2 - I |`` (entrywise) for :class:`Orthonormal`.

    Reports replaced parameters under their declared constraint, and the
    copy inside ``torch.optim.swa_utils.AveragedModel`` (names
    ``module.<name>``): an average of points of a curved set is off the set
    (see :func:`holonomic.project_average`).
    """
    if not isinstance(module, nn.Module):
        raise ValueError(f"module must be a torch.nn.Module, got {type(module).__name__}")
    _sync(module)
    out: dict[str, float] = {}
    for name, param in module.named_parameters():
        constraint = constraint_of(param)
        if constraint is not None:
            out[name] = float(constraint.residual(param.detach()))
    return out
