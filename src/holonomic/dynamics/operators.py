r"""Named operators that integrators are composed of.

Each operator acts on one parameter's :class:`Phase` (position ``w``,
momentum ``p``) in place of the phase object, never on the parameter itself,
so that a step can be abandoned without changing anything.  A splitting
scheme is a sequence of ``(operator name, fraction of the step)`` pairs run by
:func:`run_scheme`; BAOAB is ``B(1) A(1/2) O(1) A(1/2)`` (the two half kicks
of consecutive steps fused into one full kick, see
:class:`holonomic.Langevin`).

Operators (``h`` the step, ``c h`` the sub-step, ``Pi_w`` the tangent
projection, ``f`` the force = gradient of the potential):

``kick`` (B)
    ``p <- Pi_w (p - c h f)``
``drift`` (A)
    RATTLE: ``y = w + c h p``; SHAKE ``w' = y + N(w) lam`` on the set;
    ``p <- Pi_{w'} ((w' - w) / (c h))``; or the exact geodesic flow for time
    ``c h``.  Optionally split into ``substeps`` equal pieces (g-BAOAB).
``thermostat`` (O)
    ``p <- Pi_w (e^{-gamma c h} p + sqrt(T (1 - e^{-2 gamma c h})) xi)``,
    ``xi ~ N(0, I)`` from the integrator's generator; nothing is drawn at
    ``T = 0``.

References:
    Leimkuhler & Matthews, Proc. R. Soc. A 472 (2016) 20160138 (g-BAOAB);
    Andersen, J. Comput. Phys. 52 (1983) 24-34 (RATTLE).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, Sequence

import torch
from torch import Tensor

from holonomic.geometry.base import Constraint

__all__ = [
    "Phase",
    "Settings",
    "kick",
    "drift",
    "thermostat",
    "run_scheme",
    "BAOAB",
    "overdamped_move",
    "ou_coefficients",
]


@dataclass
class Phase:
    """Position and momentum of one parameter during a step, plus the
    running outcome of its projections."""

    w: Tensor
    p: Tensor
    ok: Tensor
    iterations: int = 0


@dataclass(frozen=True)
class Settings:
    """Integrator settings of one parameter group (plain data)."""

    step: float
    friction: float = 1.0
    temperature: float = 0.0
    projection: str = "rattle"
    substeps: int = 1


def kick(phase: Phase, fraction: float, *, force: Tensor, geometry: Constraint, settings: Settings,
         generator: torch.Generator | None) -> None:
    """B: ``p <- Pi_w (p - c h f)``."""
    phase.p = geometry.tangent(phase.w, phase.p - (fraction * settings.step) * force)


def drift(phase: Phase, fraction: float, *, force: Tensor, geometry: Constraint, settings: Settings,
          generator: torch.Generator | None) -> None:
    """A: constrained free flight for ``c h`` (RATTLE or exact geodesic)."""
    dt = fraction * settings.step / settings.substeps
    for _ in range(settings.substeps):
        if settings.projection == "geodesic":
            phase.w, phase.p = geometry.geodesic(phase.w, phase.p, dt)
            continue
        y = phase.w + dt * phase.p
        result = geometry.shake(phase.w, y)
        if result.iterations == 0:  # no constraint: straight line, velocity unchanged
            phase.w = result.position
        else:
            phase.p = geometry.tangent(result.position, (result.position - phase.w) / dt)
            phase.w = result.position
        phase.ok = phase.ok & result.ok
        phase.iterations = max(phase.iterations, result.iterations)


def ou_coefficients(friction: float, duration: float, temperature: float) -> tuple[float, float]:
    r"""``(e^{-gamma t}, sqrt(T (1 - e^{-2 gamma t})))``: the decay and noise scale
    of the exact Ornstein-Uhlenbeck step ``p <- decay p + scale xi`` over time ``t``
    (the noise scale is 0 at ``T = 0``)."""
    gh = friction * duration
    scale = math.sqrt(temperature * -math.expm1(-2.0 * gh)) if temperature > 0 else 0.0
    return math.exp(-gh), scale


def thermostat(phase: Phase, fraction: float, *, force: Tensor, geometry: Constraint,
               settings: Settings, generator: torch.Generator | None) -> None:
    """O: exact Ornstein-Uhlenbeck update of the tangent momentum."""
    decay, scale = ou_coefficients(settings.friction, fraction * settings.step, settings.temperature)
    if settings.temperature == 0.0:
        phase.p = phase.p * decay
        return
    noise = torch.randn(phase.p.shape, generator=generator, dtype=phase.p.dtype, device=phase.p.device)
    phase.p = geometry.tangent(phase.w, phase.p * decay + scale * noise)


Operator = Callable[..., None]

OPERATORS: dict[str, Operator] = {"kick": kick, "drift": drift, "thermostat": thermostat}

#: BAOAB with the closing half kick of one step fused with the opening half
#: kick of the next into one full kick at the start of each step.
BAOAB: tuple[tuple[str, float], ...] = (("kick", 1.0), ("drift", 0.5), ("thermostat", 1.0), ("drift", 0.5))


def run_scheme(scheme: Sequence[tuple[str, float]], phase: Phase, *, force: Tensor, geometry: Constraint,
               settings: Settings, generator: torch.Generator | None) -> Phase:
    """Apply the operators of ``scheme`` in order to ``phase`` and return it."""
    for name, fraction in scheme:
        OPERATORS[name](phase, fraction, force=force, geometry=geometry, settings=settings,
                        generator=generator)
    return phase


def overdamped_move(w: Tensor, force: Tensor, *, geometry: Constraint, step: float, temperature: float,
                    generator: torch.Generator | None, substeps: int = 1) -> Phase:
    r"""Projected Euler-Maruyama step (no momentum)::

        y  = w + Pi_w (-h f + sqrt(2 T h) xi)
        w' = SHAKE(w, y)   (along the normal at the old point)

    With ``substeps = K > 1``: ``K`` such moves of ``h/K`` with the same
    force, the Brownian increment ``B = sqrt(2 T h) xi`` split along its
    bridge (the ``K`` increments, each of variance ``2 T h/K``, sum to ``B``;
    ``xi`` is drawn first, then one ``z_j`` per increment but the last)::

        dB_j = B / m + sqrt(2 T (h/K) (m - 1)/m) z_j,  B <- B - dB_j   (m = K - j)
        w_{j+1} = SHAKE(w_j, w_j + Pi_{w_j} (-(h/K) f + dB_j))
    """
    dt = step / substeps
    left = None  # the Brownian increment not yet used
    if temperature > 0.0:
        noise = torch.randn(w.shape, generator=generator, dtype=w.dtype, device=w.device)
        left = math.sqrt(2.0 * temperature * step) * noise
    position, move, ok, iterations = w, None, None, 0
    for j in range(substeps):
        move = -dt * force
        if left is not None:
            m = substeps - j
            if m == 1:
                increment = left
            else:
                z = torch.randn(w.shape, generator=generator, dtype=w.dtype, device=w.device)
                increment = left / m + math.sqrt(2.0 * temperature * dt * (m - 1) / m) * z
                left = left - increment
            move = move + increment
        result = geometry.shake(position, position + geometry.tangent(position, move))
        position = result.position
        ok = result.ok if ok is None else ok & result.ok
        iterations = max(iterations, result.iterations)
    return Phase(w=position, p=move, ok=ok, iterations=iterations)
