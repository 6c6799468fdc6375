r"""SGD-style settings (``lr``, ``momentum``) and the integrator's step and friction.

The param groups of the holonomic integrators hold ``lr`` and ``momentum`` with exactly the
meaning they have for ``torch.optim.SGD`` (so torch's schedulers, skorch, Lightning and
logged learning rates work unchanged).  The BAOAB integrator runs on the step ``h`` and
the friction ``gamma``; :func:`integrator_step_and_friction` is the one place where the
integrator reads them, from a group::

    h     = sqrt(2 lr / (1 + mu))
    gamma = -ln(mu) / h            (mu = 0: gamma = inf; mu = 1: gamma = 0)

and :func:`sgd_from_step_and_friction` the inverse (``mu = exp(-gamma h)``,
``lr = h^2 (1 + mu) / 2``).  With these, BAOAB at temperature 0 without constraints is
``torch.optim.SGD(lr=lr, momentum=mu)`` step for step (see :class:`holonomic.Langevin`).

Groups without a ``"momentum"`` key (:class:`holonomic.OverdampedLangevin`) have
``h = lr`` and no momentum (reported as friction ``inf``).
"""

from __future__ import annotations

import math
from typing import Any, Mapping

__all__ = [
    "check_lr",
    "check_momentum",
    "integrator_step_and_friction",
    "sgd_from_step_and_friction",
    "step_and_friction_from_sgd",
]


def _real(name: str, value: Any) -> float:
    try:
        x = float(value)
    except (TypeError, ValueError, RuntimeError):
        raise ValueError(f"{name} must be a real number, got {value!r}") from None
    return x


def check_lr(value: Any, *, allow_zero: bool = False) -> float:
    """``lr`` as a float; ``ValueError`` naming ``lr`` unless it is ``> 0`` (or ``>= 0``)."""
    x = _real("lr", value)
    if math.isnan(x) or math.isinf(x) or x < 0 or (x == 0 and not allow_zero):
        bound = ">= 0" if allow_zero else "> 0"
        raise ValueError(f"lr must be a finite number {bound}, got {value!r}")
    return x


def check_momentum(value: Any) -> float:
    """``momentum`` as a float; ``ValueError`` naming ``momentum`` unless it is in [0, 1]."""
    x = _real("momentum", value)
    if not 0.0 <= x <= 1.0:
        raise ValueError(f"momentum must be in [0, 1] (0: no memory, 1: no friction), got {value!r}")
    return x


def step_and_friction_from_sgd(lr: float, momentum: float) -> tuple[float, float]:
    r"""``(h, gamma)`` for SGD's ``lr >= 0`` and ``momentum`` ``mu`` in [0, 1].

    ``h = sqrt(2 lr / (1 + mu))``, ``gamma = -ln(mu) / h`` (``mu = 0``: ``inf``;
    ``mu = 1``: ``0``).  At ``lr = 0`` (nothing moves) ``h = 0`` and ``gamma`` is
    ``0`` for ``mu = 1``, else ``inf``.
    """
    lr = check_lr(lr, allow_zero=True)
    mu = check_momentum(momentum)
    h = math.sqrt(2.0 * lr / (1.0 + mu))
    if mu == 1.0:
        return h, 0.0
    if mu == 0.0 or h == 0.0:
        return h, math.inf
    return h, -math.log(mu) / h


def sgd_from_step_and_friction(step: float, friction: float) -> tuple[float, float]:
    r"""``(lr, momentum)`` for the step ``h > 0`` and friction ``gamma >= 0`` (``inf`` allowed).

    ``mu = exp(-gamma h)``, ``lr = h^2 (1 + mu) / 2``: the inverse of
    :func:`step_and_friction_from_sgd` (to roundoff).
    """
    from holonomic.dynamics.base import check_friction  # base imports this module
    from holonomic.geometry.base import check_positive

    h = check_positive("step", step)
    if math.isinf(h):
        raise ValueError(f"step must be finite, got {step!r}")
    gamma = check_friction(friction)
    mu = math.exp(-gamma * h) if math.isfinite(gamma) else 0.0
    return 0.5 * h * h * (1.0 + mu), mu


def integrator_step_and_friction(group: Mapping[str, Any]) -> tuple[float, float]:
    """The integrator's ``(h, gamma)`` of a param group, from its ``lr`` and ``momentum``.

    Every reader of the integrator step and friction goes through this function (the
    integrators' ``settings_for``, the bench, the audit).  A group
    without ``"momentum"`` (:class:`holonomic.OverdampedLangevin`) gives ``(lr, inf)``.
    Raises ``ValueError`` naming ``lr`` or ``momentum`` for values out of range (a
    scheduler or a hand edit of the group).
    """
    if "momentum" not in group:
        return check_lr(group["lr"], allow_zero=True), math.inf
    return step_and_friction_from_sgd(group["lr"], group["momentum"])


def physics_group_to_sgd(param_group: dict[str, Any], defaults: Mapping[str, Any]) -> dict[str, Any]:
    """A param group given with ``step``/``friction`` rewritten with ``lr``/``momentum``.

    A missing partner takes the defaults' value (the defaults' step or friction);
    ``lr`` with ``step`` or ``momentum`` with ``friction`` in one group, or a mix of the
    two parametrisations, is refused.  Groups without ``step``/``friction`` are returned
    unchanged.
    """
    physics = [k for k in ("step", "friction") if k in param_group]
    if not physics:
        return param_group
    sgd = [k for k in ("lr", "momentum") if k in param_group]
    if sgd:
        raise ValueError(f"a param group gives {physics + sgd}: give either 'lr'/'momentum' "
                         "(SGD's meaning) or 'step'/'friction' (the integrator's), not both")
    h_default, gamma_default = integrator_step_and_friction(defaults)
    group = dict(param_group)
    h = group.pop("step", h_default)
    gamma = group.pop("friction", gamma_default)
    group["lr"], group["momentum"] = sgd_from_step_and_friction(h, gamma)
    return group


def sgd_settings(lr: float | None, momentum: float | None, step: float | None,
                 friction: float | None, *, default_momentum: float = 0.9,
                 default_friction: float = 1.0) -> tuple[float, float]:
    """``(lr, momentum)`` from a constructor's ``lr``/``momentum`` or ``step``/``friction``.

    ``lr`` is required unless ``step`` is given; ``momentum`` defaults to
    ``default_momentum`` with ``lr``, ``friction`` to ``default_friction`` with ``step``.
    ``lr`` with ``step``, ``momentum`` with ``friction``, ``momentum`` with ``step`` and
    ``friction`` with ``lr`` are refused (each pair is one parametrisation).
    """
    if lr is not None and step is not None:
        raise ValueError(f"give lr (SGD's learning rate) or step (the integrator's h), not both; "
                         f"got lr={lr!r} and step={step!r}")
    if momentum is not None and friction is not None:
        raise ValueError(f"give momentum (SGD's) or friction (the integrator's gamma), not both; "
                         f"got momentum={momentum!r} and friction={friction!r}")
    if step is not None:
        if momentum is not None:
            raise ValueError(f"momentum goes with lr, friction with step; got step={step!r} and "
                             f"momentum={momentum!r}: pass lr= instead of step=, or friction=")
        return sgd_from_step_and_friction(step, default_friction if friction is None else friction)
    if lr is None:
        raise ValueError("lr is required (SGD's learning rate, e.g. lr=0.01), or give the "
                         "integrator's step= (and friction=) instead")
    if friction is not None:
        raise ValueError(f"friction goes with step, momentum with lr; got lr={lr!r} and "
                         f"friction={friction!r}: pass momentum= instead, or step= instead of lr=")
    return check_lr(lr), check_momentum(default_momentum if momentum is None else momentum)
