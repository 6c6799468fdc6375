r"""Adaptive-friction constrained Langevin dynamics (Nose-Hoover-Langevin type thermostat).

Mini-batch gradients carry noise of unknown size. In plain Langevin dynamics that noise
adds to the injected noise and heats the system above the requested temperature. Here the
friction of each param group is a dynamical variable :math:`\xi` that is pushed up while the
kinetic temperature is too high and down while it is too low, so that at equilibrium it has
absorbed the unknown noise:

.. math::

    dW &= P\,dt, \qquad
    dP = -f(W)\,dt - \xi P\,dt + \sqrt{2 A T}\,dB + \Sigma_G\,dB' + G(W)^\top d\Lambda, \\
    d\xi &= \frac{1}{m}\Bigl(\frac{|P|^2}{N_f T} - 1\Bigr) dt,

with :math:`g(W) = 0` and :math:`P` tangent at :math:`W`; :math:`f` the force from ``.grad``,
:math:`\Sigma_G` the unknown gradient noise, :math:`A` the friction of the injected noise
(``friction``), :math:`m` the thermostat mass (``thermostat_mass``, units time squared) and
:math:`N_f` the number of **tangent** degrees of freedom of the group (the sum of
``constraint.tangent_dof(shape)``: ``rows (d - 1)`` for fixed-norm rows, not ``rows d``).
With isotropic gradient noise of diffusion :math:`\sigma_G^2` per unit time the equation for
:math:`\xi` settles where :math:`|P|^2 = N_f T`, i.e. :math:`\xi \approx A + \sigma_G^2/(2T)`,
and :math:`W` follows :math:`\exp(-U/T)` on the constraint set. This is the MATH.md form
:math:`d\xi = (|P|^2 - N_f T)/\mu\,dt` with :math:`\mu = N_f T m`; scaling by
:math:`N_f T` makes ``thermostat_mass`` independent of the layer size and of the
temperature.

What the thermostat can and cannot correct: it matches *one* scalar per param group (the
kinetic energy). Gradient noise that is strongly anisotropic, or that changes faster than
the thermostat relaxes (about ``sqrt(thermostat_mass)`` time units), is corrected only on
average; the stationary law is then approximate. In SGD terms, the noise of a kick is
:math:`h` times the gradient noise, so its diffusion is :math:`\sigma_G^2 = h\,\sigma_g^2`
for a per-step gradient noise of standard deviation :math:`\sigma_g`.
"""

from __future__ import annotations

import math
from typing import Any, Iterable

import torch
from torch import Tensor

from holonomic.dynamics.base import (
    ConstrainedOptimizer,
    Pending,
    check_dataset_size,
    check_friction,
    check_temperature,
)
from holonomic.dynamics.operators import Phase, Settings, run_scheme
from holonomic.geometry import UNCONSTRAINED, Constraint, constraint_of, parameter_label
from holonomic.geometry.base import check_positive

__all__ = ["AdaptiveLangevin", "adaptive_thermostat", "update_thermostat_friction"]

_PROJECTIONS = ("rattle", "geodesic")

#: Opening part of a step: fused kick and first half drift (core operators).
_KICK_DRIFT: tuple[tuple[str, float], ...] = (("kick", 1.0), ("drift", 0.5))
#: Closing half drift.
_DRIFT: tuple[tuple[str, float], ...] = (("drift", 0.5),)


def adaptive_thermostat(phase: Phase, *, xi: Tensor, noise_friction: float, temperature: float,
                        step: float, geometry: Constraint,
                        generator: torch.Generator | None) -> None:
    r"""O step with friction :math:`\xi` and injected noise of fixed strength :math:`2AT`.

    Exact Ornstein-Uhlenbeck update for time ``h`` (any sign of :math:`\xi`)::

        P <- Pi_W ( e^{-xi h} P + sqrt(2 A T (1 - e^{-2 xi h}) / (2 xi)) eta ),  eta ~ N(0, I)

    (the variance tends to ``2 A T h`` as ``xi -> 0``). Unlike the core's thermostat the
    noise does *not* scale with the friction: the friction adapts, the injected noise stays.
    ``xi`` is a 0-d float64 tensor, so no host synchronisation is needed.
    """
    xh = xi * step
    decay = torch.exp(-xh).to(phase.p.dtype)
    if temperature == 0.0 or noise_friction == 0.0:
        phase.p = phase.p * decay
        return
    small = xh.abs() < 1e-8
    # (1 - e^{-2 xi h}) / (2 xi), with its limit h at xi = 0
    factor = torch.where(small, torch.full_like(xh, step),
                         -torch.expm1(-2.0 * xh) / (2.0 * torch.where(small, torch.ones_like(xi), xi)))
    scale = torch.sqrt(2.0 * noise_friction * temperature * factor).to(phase.p.dtype)
    noise = torch.randn(phase.p.shape, generator=generator, dtype=phase.p.dtype,
                        device=phase.p.device)
    phase.p = geometry.tangent(phase.w, phase.p * decay + scale * noise)


def update_thermostat_friction(xi: Tensor, momenta: list[Tensor], *, dof: int, temperature: float,
                               thermostat_mass: float, duration: float) -> Tensor:
    r"""D step: :math:`\xi \leftarrow \xi + \frac{t}{m}\bigl(\frac{\sum |P|^2}{N_f T} - 1\bigr)`.

    Returns a new 0-d float64 tensor (``xi`` is not modified).
    """
    twice_kinetic = sum((p.to(torch.float64) ** 2).sum().to(xi.device) for p in momenta)
    return xi + (duration / thermostat_mass) * (twice_kinetic / (dof * temperature) - 1.0)


class AdaptiveLangevin(ConstrainedOptimizer):
    r"""Constrained Langevin dynamics whose friction adapts to unknown gradient noise.

    One ``step()`` with step ``h``, per param group (B, A from the core; D the thermostat
    update; O the adaptive Ornstein-Uhlenbeck step), following the BADODAB splitting of
    Leimkuhler & Shang (2016) with the two half kicks of consecutive steps fused::

        for each parameter:   P <- Pi_W (P - h f(W))                         B (fused)
                              W, P <- drift(W, P, h/2)   (RATTLE or geodesic) A
        xi <- xi + (h/2)/m (sum |P|^2 / (N_f T) - 1)                           D
        for each parameter:   P <- Pi_W (e^{-xi h} P + sqrt(2AT(1-e^{-2 xi h})/(2 xi)) eta)  O
        xi <- xi + (h/2)/m (sum |P|^2 / (N_f T) - 1)                           D
        for each parameter:   W, P <- drift(W, P, h/2)                         A

    :math:`\xi` starts at ``friction`` (= A). As in :class:`holonomic.Langevin`,
    ``state[p]["momentum"]`` holds P before the closing half kick; ``f = dataset_size *
    grad + weight_decay * W``; the temperature is in the units of the loss (see
    :class:`holonomic.Langevin` for ``dataset_size``). The thermostat frictions (one 0-d
    float64 tensor per group) are checkpointed in ``state_dict()["thermostat_friction"]``
    along with the generator state, so a resumed run is bit-identical. A failed step
    (non-finite gradient, failed projection) raises :class:`holonomic.IntegrationError`
    and changes nothing, the frictions included. Parameters without ``.grad`` do not move
    and do not count in :math:`N_f` for that step.

    Args:
        params: parameters or param groups.
        step: step size ``h > 0`` (stored as group ``"lr"`` so schedulers scale it).
        temperature: ``T > 0`` (the thermostat targets :math:`|P|^2 = N_f T`; use
            :class:`holonomic.Langevin` for ``T = 0`` optimisation).
        friction: ``A >= 0``, friction of the injected noise and initial :math:`\xi`.
            ``A = 0`` gives a pure Nose-Hoover thermostat driven by the gradient noise alone
            (not ergodic without that noise).
        thermostat_mass: ``m > 0``; larger is slower and smoother.
        projection: ``"rattle"`` or ``"geodesic"``, as for :class:`holonomic.Langevin`.
        seed: seed of the integrator's own generator.
        dataset_size: multiplies the gradient.
        weight_decay: Gaussian prior precision for unconstrained parameters.
        substeps: RATTLE/geodesic substeps per half drift.

    Raises:
        ValueError: at construction (or ``add_param_group``) for bad hyperparameters.
        IntegrationError: from ``step()``; nothing is changed then.

    References:
        B. Leimkuhler and X. Shang, Adaptive thermostats for noisy gradient systems,
        SIAM J. Sci. Comput. 38 (2016) A712-A736 (Ad-Langevin, BADODAB);
        A. Jones and B. Leimkuhler, J. Chem. Phys. 135 (2011) 084125 (Nose-Hoover-Langevin);
        N. Ding et al., Bayesian sampling using stochastic gradient thermostats, NeurIPS 2014
        (recalled from memory).
    """

    def __init__(
        self,
        params: Iterable[Any],
        step: float,
        temperature: float,
        friction: float = 1.0,
        thermostat_mass: float = 1.0,
        projection: str = "rattle",
        seed: int = 0,
        dataset_size: float | None = None,
        weight_decay: float = 0.0,
        substeps: int = 1,
    ) -> None:
        defaults = dict(lr=check_positive("step", step), temperature=temperature,
                        friction=friction, thermostat_mass=thermostat_mass,
                        projection=projection, dataset_size=dataset_size,
                        weight_decay=weight_decay, substeps=substeps)
        self._validate_group(defaults)
        self._xi: list[Tensor] = []
        super().__init__(params, defaults, seed=seed)

    # -- groups ------------------------------------------------------------------------
    def _validate_group(self, group: dict[str, Any]) -> None:
        group["temperature"] = check_positive("temperature", group["temperature"])
        friction = check_friction(group["friction"])
        if math.isinf(friction):
            raise ValueError("friction must be finite for AdaptiveLangevin (it is the initial "
                             f"thermostat friction), got {group['friction']!r}")
        group["friction"] = friction
        group["thermostat_mass"] = check_positive("thermostat_mass", group["thermostat_mass"])
        group["dataset_size"] = check_dataset_size(group["dataset_size"])
        group["weight_decay"] = check_positive("weight_decay", group["weight_decay"],
                                               allow_zero=True)
        if group["projection"] not in _PROJECTIONS:
            raise ValueError(f"projection must be one of {_PROJECTIONS}, "
                             f"got {group['projection']!r}")
        substeps = group["substeps"]
        if isinstance(substeps, bool) or not isinstance(substeps, int) or substeps < 1:
            raise ValueError(f"substeps must be a positive integer, got {substeps!r}")

    def add_param_group(self, param_group: dict[str, Any]) -> None:
        super().add_param_group(param_group)
        group = self.param_groups[-1]
        device = group["params"][0].device if group["params"] else torch.device("cpu")
        self._xi.append(torch.tensor(group["friction"], dtype=torch.float64, device=device))

    def thermostat_friction(self) -> list[float]:
        """Current thermostat friction :math:`\\xi` of each param group (host sync)."""
        return [float(x) for x in self._xi]

    # -- checkpointing -------------------------------------------------------------------
    def state_dict(self) -> dict[str, Any]:
        """Core state dict plus ``"thermostat_friction"``: one 0-d tensor per group."""
        sd = super().state_dict()
        sd["thermostat_friction"] = [x.detach().cpu().clone() for x in self._xi]
        return sd

    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        state_dict = dict(state_dict)
        frictions = state_dict.pop("thermostat_friction", None)
        if frictions is None or len(frictions) != len(self.param_groups):
            raise ValueError("state_dict has no 'thermostat_friction' entry with one value per "
                             f"param group ({len(self.param_groups)}); was it saved by "
                             "AdaptiveLangevin?")
        super().load_state_dict(state_dict)
        self._xi = [torch.as_tensor(x, dtype=torch.float64).to(old.device).clone()
                    for x, old in zip(frictions, self._xi)]

    # -- stepping ----------------------------------------------------------------------
    def _update(self, p, force, group, geometry):  # per-parameter hook is not used
        raise NotImplementedError("AdaptiveLangevin steps whole param groups; see step()")

    @torch.no_grad()
    def step(self, closure=None):  # type: ignore[override]
        """Take one step using the gradients in ``.grad`` (see the class docstring).

        Raises:
            IntegrationError: non-finite gradient or failed projection; nothing changed.
        """
        loss = None
        if closure is not None:
            with torch.enable_grad():
                loss = closure()
        saved_generators = {k: g.get_state() for k, g in self._generators.items()}
        pending: list[Pending] = []
        new_xi = list(self._xi)
        for g_index, group in enumerate(self.param_groups):
            h = group["lr"]
            if not h >= 0:
                raise ValueError(f"param group {g_index}: step (group 'lr') must be >= 0, "
                                 f"got {h!r}")
            if h == 0:
                continue
            settings = Settings(step=h, friction=group["friction"],
                                temperature=group["temperature"],
                                projection=group["projection"], substeps=group["substeps"])
            members = []  # (index, param, label, geometry, force, grad_ok, phase)
            names = group.get("param_names")
            for index, p in enumerate(group["params"]):
                if p.grad is None:
                    continue
                if p.grad.is_sparse:
                    raise ValueError("sparse gradients are not supported; use a dense nn.Embedding")
                default = names[index] if names else f"group {g_index} parameter {index} {tuple(p.shape)}"
                label = parameter_label(p, default) if not names else default
                geometry = constraint_of(p) or UNCONSTRAINED
                force = self.force(p, group)
                momentum = self.state[p].get("momentum")
                if momentum is None:
                    momentum = torch.zeros_like(p)
                phase = Phase(w=p.detach(), p=momentum, ok=torch.isfinite(force).all())
                members.append((index, p, label, geometry, force, torch.isfinite(p.grad).all(), phase))
            if not members:
                continue
            dof = sum(geo.tangent_dof(p.shape) for _, p, _, geo, _, _, _ in members)
            thermo = dict(dof=dof, temperature=settings.temperature,
                          thermostat_mass=group["thermostat_mass"], duration=0.5 * h)
            for _, p, _, geometry, force, _, phase in members:  # B A
                run_scheme(_KICK_DRIFT, phase, force=force, geometry=geometry,
                           settings=settings, generator=None)
            xi = update_thermostat_friction(new_xi[g_index], [m[-1].p for m in members], **thermo)
            for _, p, _, geometry, _, _, phase in members:  # O
                adaptive_thermostat(phase, xi=xi, noise_friction=settings.friction,
                                    temperature=settings.temperature, step=h,
                                    geometry=geometry, generator=self.generator(p.device))
            xi = update_thermostat_friction(xi, [m[-1].p for m in members], **thermo)  # D
            new_xi[g_index] = xi
            for index, p, label, geometry, force, grad_ok, phase in members:  # A
                run_scheme(_DRIFT, phase, force=force, geometry=geometry, settings=settings,
                           generator=None)
                ok = phase.ok & torch.isfinite(phase.p).all() & torch.isfinite(xi)
                pending.append(Pending(p, label, g_index, index, geometry, grad_ok, ok,
                                       phase.w, phase.p, phase.iterations))
        self._commit(pending, saved_generators)  # raises, changing nothing, on failure
        self._xi = new_xi
        return loss
