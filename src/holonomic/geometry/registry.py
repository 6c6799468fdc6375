"""Declaring constraints on module parameters and finding them again."""

from __future__ import annotations

import copy
from typing import Any

import torch
from torch import Tensor, nn

from holonomic.geometry.base import Constraint

__all__ = ["constrain", "constraint_of", "residuals", "parameter_label"]

# Attribute names set on constrained Parameter objects and on their modules.
_CONSTRAINT_ATTR = "_holonomic_constraint"
_LABEL_ATTR = "_holonomic_label"
_RECORD_ATTR = "_holonomic_constraints"


def _attach(param: Tensor, constraint: Constraint, label: str) -> None:
    setattr(param, _CONSTRAINT_ATTR, constraint)
    setattr(param, _LABEL_ATTR, label)


class _ConstraintRecord:
    """Per-module record ``{name: (parameter, constraint, label)}``.

    ``nn.Parameter.__deepcopy__`` does not copy attributes set on the
    parameter, so the record re-attaches the constraints to the copied
    parameters when the module is deep-copied (the memo maps each original
    parameter to its copy).  ``Module.to``/``state_dict`` keep the Parameter
    objects, so the attributes survive those without help.
    """

    def __init__(self) -> None:
        self.entries: dict[str, tuple[Tensor, Constraint, str]] = {}

    def __deepcopy__(self, memo: dict[int, Any]) -> "_ConstraintRecord":
        new = _ConstraintRecord()
        memo[id(self)] = new
        for name, (param, constraint, label) in self.entries.items():
            new_param = copy.deepcopy(param, memo)
            new_constraint = copy.deepcopy(constraint, memo)
            _attach(new_param, new_constraint, label)
            new.entries[name] = (new_param, new_constraint, label)
        return new

    def __getstate__(self) -> dict[str, Any]:
        return {"entries": self.entries}

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.entries = state["entries"]
        for param, constraint, label in self.entries.values():
            _attach(param, constraint, label)


def _resolve(module: nn.Module, dotted: str) -> tuple[nn.Module, str]:
    owner_path, _, leaf = dotted.rpartition(".")
    try:
        owner = module.get_submodule(owner_path) if owner_path else module
    except AttributeError:
        raise ValueError(f"{dotted!r}: {type(module).__name__} has no submodule {owner_path!r}") from None
    return owner, leaf


def constrain(module: nn.Module, **constraints: Constraint) -> nn.Module:
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
    attribute that is an ``nn.Parameter``.  The record survives
    ``module.to(...)``, ``copy.deepcopy`` and ``state_dict`` round trips
    (loading copies values into the same parameter objects; check
    :func:`residuals` after loading values from elsewhere).

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
        if param.is_sparse:
            raise ValueError(f"{label}: sparse parameters cannot be constrained")
        try:
            projected = constraint.project(param.detach())
        except ValueError as exc:
            raise ValueError(f"{label}: {exc}") from None
        with torch.no_grad():
            param.copy_(projected)
        _attach(param, constraint, label)
        record = owner.__dict__.get(_RECORD_ATTR)
        if record is None:
            record = _ConstraintRecord()
            owner.__dict__[_RECORD_ATTR] = record
        record.entries[leaf] = (param, constraint, label)
    return module


def constraint_of(tensor: Tensor) -> Constraint | None:
    """The constraint recorded on ``tensor`` by :func:`constrain`, or ``None``."""
    return getattr(tensor, _CONSTRAINT_ATTR, None)


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
    """
    out: dict[str, float] = {}
    for name, param in module.named_parameters():
        constraint = constraint_of(param)
        if constraint is not None:
            out[name] = float(constraint.residual(param.detach()))
    return out
