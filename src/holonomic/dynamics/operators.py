r"""Named operators that integrators are composed of.

Each operator acts on one parameter's :class:`Phase` (position ``w``,
momentum ``p``) in place of the phase object, never on the parameter itself,
so that a step can be abandoned without changing anything.  Group operators
act on the phases of all parameters of a param group and on the group's
state (e.g. a thermostat friction).  The schemes
(:mod:`holonomic.dynamics.schemes`) are tables of ``(operator name,
fraction of the step)`` pairs; the reference kernel
(:mod:`holonomic.dynamics.kernels.reference`) runs a table over a whole param
group, group operators included; :func:`run_scheme` applies the per-parameter
operators of a table to one phase (for use outside an optimizer).

Noise is never drawn here: each operator that needs it declares how many
standard normal tensors it takes (``NOISE_DRAWS``), the step transaction
draws them for every parameter in parameter order, and the operator takes
them from ``noise()`` in order.

Operators (``h`` the step, ``c h`` the sub-step, ``Pi_w`` the tangent
projection, ``f`` the force = gradient of the potential):

``kick`` (B)
    ``p <- Pi_w (p - c h f)``
``rattle_drift`` (A)
    ``y = w + c h p``; SHAKE ``w' = y + N(w) lam`` on the set;
    ``p <- Pi_{w'} ((w' - w) / (c h))``; split into ``substeps`` equal pieces.
``geodesic_drift`` (A)
    the exact geodesic flow for time ``c h`` (in ``substeps`` pieces).
``drift`` (A)
    ``rattle_drift`` or ``geodesic_drift`` as the group's ``projection`` says.
``thermostat`` (O)
    ``p <- Pi_w (e^{-gamma c h} p + sqrt(T (1 - e^{-2 gamma c h})) xi)``,
    ``xi ~ N(0, I)``; nothing is drawn at ``T = 0``.
``adaptive_thermostat`` (O with friction ``xi`` from the group state)
    ``p <- Pi_w (e^{-xi c h} p + sqrt(2 A T (1 - e^{-2 xi c h}) / (2 xi)) eta)``.
``friction_update`` (D, a group operator)
    ``xi <- xi + (c h / m) (sum |p|^2 / (N_f T) - 1)``; ``xi = A`` in a group
    with ``adaptive=False``.
``overdamped`` (projected Euler-Maruyama, no momentum)
    ``w <- SHAKE(w, w + Pi_w (-c h f + sqrt(2 T c h) xi))``.

References:
    Leimkuhler & Matthews, Proc. R. Soc. A 472 (2016) 20160138 (g-BAOAB);
    Andersen, J. Comput. Phys. 52 (1983) 24-34 (RATTLE);
    Leimkuhler & Shang, SIAM J. Sci. Comput. 38 (2016) A712-A736 (adaptive friction).
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
    "rattle_drift",
    "geodesic_drift",
    "thermostat",
    "adaptive_thermostat",
    "friction_update",
    "overdamped",
    "register_operator",
    "run_scheme",
    "overdamped_move",
    "ou_coefficients",
    "OPERATORS",
    "GROUP_OPERATORS",
    "NOISE_DRAWS",
]

Noise = Callable[[], Tensor]


@dataclass
class Phase:
    """Position and momentum of one parameter during a step, plus the
    running outcome of its projections (``p`` is ``None`` for a scheme
    without momentum)."""

    w: Tensor
    p: Tensor | None
    ok: Tensor
    iterations: int = 0


@dataclass(frozen=True)
class Settings:
    """Integrator settings of one parameter group (plain data).

    ``thermostat_mass`` and ``adaptive`` are read by the adaptive-friction
    operators only."""

    step: float
    friction: float = 1.0
    temperature: float = 0.0
    projection: str = "rattle"
    substeps: int = 1
    thermostat_mass: float = 1.0
    adaptive: bool = True


def kick(phase: Phase, fraction: float, *, force: Tensor, geometry: Constraint, settings: Settings,
         noise: Noise, state: dict[str, Tensor]) -> None:
    """B: ``p <- Pi_w (p - c h f)``."""
    phase.p = geometry.tangent(phase.w, phase.p - (fraction * settings.step) * force)


def rattle_drift(phase: Phase, fraction: float, *, force: Tensor, geometry: Constraint, settings: Settings,
                 noise: Noise, state: dict[str, Tensor]) -> None:
    """A (RATTLE): constrained free flight for ``c h`` in ``substeps`` pieces."""
    dt = fraction * settings.step / settings.substeps
    for _ in range(settings.substeps):
        y = phase.w + dt * phase.p
        result = geometry.shake(phase.w, y)
        if result.iterations == 0:  # no constraint: straight line, velocity unchanged
            phase.w = result.position
        else:
            phase.p = geometry.tangent(result.position, (result.position - phase.w) / dt)
            phase.w = result.position
        phase.ok = phase.ok & result.ok
        phase.iterations = max(phase.iterations, result.iterations)


def geodesic_drift(phase: Phase, fraction: float, *, force: Tensor, geometry: Constraint, settings: Settings,
                   noise: Noise, state: dict[str, Tensor]) -> None:
    """A (geodesic): the exact geodesic flow for ``c h`` in ``substeps`` pieces."""
    dt = fraction * settings.step / settings.substeps
    for _ in range(settings.substeps):
        phase.w, phase.p = geometry.geodesic(phase.w, phase.p, dt)


def drift(phase: Phase, fraction: float, **kwargs: object) -> None:
    """A: :func:`rattle_drift` or :func:`geodesic_drift`, as ``settings.projection`` says."""
    settings = kwargs["settings"]
    (geodesic_drift if settings.projection == "geodesic" else rattle_drift)(phase, fraction, **kwargs)


def ou_coefficients(friction: float, duration: float, temperature: float) -> tuple[float, float]:
    r"""``(e^{-gamma t}, sqrt(T (1 - e^{-2 gamma t})))``: the decay and noise scale
    of the exact Ornstein-Uhlenbeck step ``p <- decay p + scale xi`` over time ``t``
    (the noise scale is 0 at ``T = 0``)."""
    gh = friction * duration
    scale = math.sqrt(temperature * -math.expm1(-2.0 * gh)) if temperature > 0 else 0.0
    return math.exp(-gh), scale


def thermostat(phase: Phase, fraction: float, *, force: Tensor, geometry: Constraint,
               settings: Settings, noise: Noise, state: dict[str, Tensor]) -> None:
    """O: exact Ornstein-Uhlenbeck update of the tangent momentum."""
    decay, scale = ou_coefficients(settings.friction, fraction * settings.step, settings.temperature)
    if settings.temperature == 0.0:
        phase.p = phase.p * decay
        return
    phase.p = geometry.tangent(phase.w, phase.p * decay + scale * noise())


def adaptive_thermostat(phase: Phase, fraction: float, *, force: Tensor, geometry: Constraint,
                        settings: Settings, noise: Noise, state: dict[str, Tensor]) -> None:
    r"""O with the group's friction ``xi = state["friction"]`` and injected noise of
    fixed strength ``2 A T`` (``A = settings.friction``); exact for any sign of ``xi``::

        P <- Pi_W ( e^{-xi t} P + sqrt(2 A T (1 - e^{-2 xi t}) / (2 xi)) eta ),  t = c h

    (the variance tends to ``2 A T t`` as ``xi -> 0``).  ``xi`` is a 0-d float64
    tensor, so no host synchronisation is needed."""
    xi = state["friction"]
    duration = fraction * settings.step
    xh = xi * duration
    decay = torch.exp(-xh).to(phase.p.device, phase.p.dtype)
    if settings.temperature == 0.0 or settings.friction == 0.0:
        phase.p = phase.p * decay
        return
    small = xh.abs() < 1e-8
    # (1 - e^{-2 xi t}) / (2 xi), with its limit t at xi = 0
    factor = torch.where(small, torch.full_like(xh, duration),
                         -torch.expm1(-2.0 * xh) / (2.0 * torch.where(small, torch.ones_like(xi), xi)))
    scale = torch.sqrt(2.0 * settings.friction * settings.temperature * factor).to(phase.p.device, phase.p.dtype)
    phase.p = geometry.tangent(phase.w, phase.p * decay + scale * noise())


def friction_update(phases: Sequence[Phase], fraction: float, *, dof: int, settings: Settings,
                    state: dict[str, Tensor]) -> None:
    r"""D (group): ``xi <- xi + (c h / m) (sum |P|^2 / (N_f T) - 1)`` over the group's
    phases (``N_f`` = ``dof`` tangent degrees of freedom); a group with
    ``adaptive=False`` keeps ``xi = A`` (its friction setting).  Stores a new 0-d
    float64 tensor in ``state["friction"]``."""
    xi = state["friction"]
    if not settings.adaptive:
        state["friction"] = torch.full_like(xi, settings.friction)
        return
    twice_kinetic = sum((ph.p.to(torch.float64) ** 2).sum().to(xi.device) for ph in phases)
    duration = fraction * settings.step
    state["friction"] = xi + (duration / settings.thermostat_mass) * (
        twice_kinetic / (dof * settings.temperature) - 1.0)


def overdamped(phase: Phase, fraction: float, *, force: Tensor, geometry: Constraint, settings: Settings,
               noise: Noise, state: dict[str, Tensor]) -> None:
    """Projected Euler-Maruyama move for ``c h`` (:func:`overdamped_move`); ``phase.p``
    becomes the move (not a momentum)."""
    out = overdamped_move(phase.w, force, geometry=geometry, step=fraction * settings.step,
                          temperature=settings.temperature, noise=noise, substeps=settings.substeps)
    phase.w, phase.p, phase.iterations = out.w, out.p, max(phase.iterations, out.iterations)
    phase.ok = phase.ok & out.ok


Operator = Callable[..., None]

OPERATORS: dict[str, Operator] = {
    "kick": kick, "drift": drift, "rattle_drift": rattle_drift, "geodesic_drift": geodesic_drift,
    "thermostat": thermostat, "adaptive_thermostat": adaptive_thermostat, "overdamped": overdamped,
}
GROUP_OPERATORS: dict[str, Callable[..., None]] = {"friction_update": friction_update}

#: Standard normal tensors (shaped like the parameter) each operator takes, by settings.
NOISE_DRAWS: dict[str, Callable[[Settings], int]] = {
    "thermostat": lambda s: int(s.temperature > 0),
    "adaptive_thermostat": lambda s: int(s.temperature > 0 and s.friction != 0),
    "overdamped": lambda s: s.substeps if s.temperature > 0 else 0,
}


def register_operator(name: str, operator: Operator, *, draws: Callable[[Settings], int] | None = None) -> None:
    """Make ``operator`` usable in scheme tables as ``name``; ``draws(settings)``
    says how many noise tensors it takes per parameter and step (default none)."""
    OPERATORS[name] = operator
    if draws is not None:
        NOISE_DRAWS[name] = draws


def run_scheme(scheme: Sequence[tuple[str, float]], phase: Phase, *, force: Tensor, geometry: Constraint,
               settings: Settings, noise: Noise | None = None, state: dict[str, Tensor] | None = None) -> Phase:
    """Apply the per-parameter operators of ``scheme`` in order to ``phase`` and
    return it (group operators need the whole group: see the reference kernel)."""
    for name, fraction in scheme:
        OPERATORS[name](phase, fraction, force=force, geometry=geometry, settings=settings,
                        noise=noise, state=state if state is not None else {})
    return phase


def overdamped_move(w: Tensor, force: Tensor, *, geometry: Constraint, step: float, temperature: float,
                    noise: Noise | None = None, generator: torch.Generator | None = None,
                    substeps: int = 1) -> Phase:
    r"""Projected Euler-Maruyama step (no momentum)::

        y  = w + Pi_w (-h f + sqrt(2 T h) xi)
        w' = SHAKE(w, y)   (along the normal at the old point)

    With ``substeps = K > 1``: ``K`` such moves of ``h/K`` with the same
    force, the Brownian increment ``B = sqrt(2 T h) xi`` split along its
    bridge (the ``K`` increments, each of variance ``2 T h/K``, sum to ``B``;
    ``xi`` is drawn first, then one ``z_j`` per increment but the last)::

        dB_j = B / m + sqrt(2 T (h/K) (m - 1)/m) z_j,  B <- B - dB_j   (m = K - j)
        w_{j+1} = SHAKE(w_j, w_j + Pi_{w_j} (-(h/K) f + dB_j))

    The draws come from ``noise()`` (or, without it, ``torch.randn`` with ``generator``).
    """
    if noise is None:
        def noise() -> Tensor:
            return torch.randn(w.shape, generator=generator, dtype=w.dtype, device=w.device)
    dt = step / substeps
    left = None  # the Brownian increment not yet used
    if temperature > 0.0:
        left = math.sqrt(2.0 * temperature * step) * noise()
    position, move, ok, iterations = w, None, None, 0
    for j in range(substeps):
        move = -dt * force
        if left is not None:
            m = substeps - j
            if m == 1:
                increment = left
            else:
                z = noise()
                increment = left / m + math.sqrt(2.0 * temperature * dt * (m - 1) / m) * z
                left = left - increment
            move = move + increment
        result = geometry.shake(position, position + geometry.tangent(position, move))
        position = result.position
        ok = result.ok if ok is None else ok & result.ok
        iterations = max(iterations, result.iterations)
    return Phase(w=position, p=move, ok=ok, iterations=iterations)
