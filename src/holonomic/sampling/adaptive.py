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
and :math:`W` follows :math:`\exp(-U/T)` on the constraint set. This is the docs/math.md form
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

from typing import Any, Callable, Iterable

import torch
from torch import Tensor

from holonomic.dynamics.base import HolonomicIntegrator
from holonomic.dynamics.langevin import Langevin
from holonomic.dynamics.operators import Phase, Settings, run_scheme
from holonomic.dynamics.settings import integrator_step_and_friction, sgd_settings
from holonomic.geometry import UNCONSTRAINED, Constraint, constraint_of
from holonomic.geometry.base import check_positive

__all__ = ["AdaptiveLangevin", "adaptive_thermostat", "update_thermostat_friction"]

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
    decay = torch.exp(-xh).to(phase.p.device, phase.p.dtype)
    if temperature == 0.0 or noise_friction == 0.0:
        phase.p = phase.p * decay
        return
    small = xh.abs() < 1e-8
    # (1 - e^{-2 xi h}) / (2 xi), with its limit h at xi = 0
    factor = torch.where(small, torch.full_like(xh, step),
                         -torch.expm1(-2.0 * xh) / (2.0 * torch.where(small, torch.ones_like(xi), xi)))
    scale = torch.sqrt(2.0 * noise_friction * temperature * factor).to(phase.p.device,
                                                                       phase.p.dtype)
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


class AdaptiveLangevin(Langevin):
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

    Settings as for :class:`holonomic.Langevin` (same argument order): ``lr`` and
    ``momentum`` with ``torch.optim.SGD``'s meaning, or the integrator's ``step`` and
    ``friction``; ``h = sqrt(2 lr / (1 + momentum))`` and the noise friction
    ``A = -ln(momentum) / h`` (:func:`holonomic.dynamics.settings.integrator_step_and_friction`,
    readable with :meth:`step_and_friction`), so a scheduler that changes ``lr`` changes
    ``h`` as ``sqrt(lr)`` and ``A`` as ``1/sqrt(lr)``. :math:`\xi` starts at ``A``
    implied by the group's settings when the group is added; afterwards it evolves by
    itself (a later change of ``lr`` or ``momentum`` changes ``A`` and ``h``, not
    :math:`\xi`). Unlike :class:`holonomic.Langevin`, the stored momenta are not
    rescaled when ``lr`` or ``momentum`` change (there is no SGD equivalent at
    ``T > 0``: they stay the physical momenta). ``momentum`` must be > 0 (``A`` finite).
    ``temperature`` defaults to 1 (use :class:`holonomic.Langevin` for ``T = 0``). As in
    :class:`holonomic.Langevin`, ``state[p]["momentum"]`` holds P before the closing half kick; ``f = dataset_size *
    grad + weight_decay * W``; the temperature is in the units of the loss (see
    :class:`holonomic.Langevin` for ``dataset_size``). The thermostat frictions (one 0-d
    float64 tensor per group) are checkpointed in ``state_dict()["thermostat_friction"]``
    along with the generator state, so a resumed run is bit-identical. A failed step
    (non-finite gradient, failed projection) raises :class:`holonomic.IntegrationError`
    and changes nothing, the frictions included. Parameters without ``.grad`` do not move
    and do not count in :math:`N_f` for that step.

    Args:
        params: parameters or param groups.
        lr: SGD's learning rate ``> 0`` (required unless ``step`` is given).
        momentum: SGD's momentum in ``(0, 1]`` (default ``0.9``; only with ``lr``).
        step: the integrator's step ``h > 0``, instead of ``lr``.
        friction: ``A >= 0`` (finite), friction of the injected noise and initial
            :math:`\xi` (default ``1.0``; only with ``step``), instead of ``momentum``.
            ``A = 0`` (``momentum = 1``) gives a pure Nose-Hoover thermostat driven by the
            gradient noise alone (not ergodic without that noise).
        temperature: ``T > 0`` (default 1; the thermostat targets :math:`|P|^2 = N_f T`;
            use :class:`holonomic.Langevin` for ``T = 0`` optimisation). A group with
            ``adaptive=False`` may have ``T = 0``.
        thermostat_mass: ``m > 0``; larger is slower and smoother.
        adaptive: ``True`` (default): the group's friction adapts as above. ``False``
            (usually set per param group): the group's friction stays at ``A`` (D is
            skipped, :math:`\xi = A` follows ``lr`` and ``momentum``), so the O step is
            the exact Ornstein-Uhlenbeck step of :class:`holonomic.Langevin`,
            ``P <- Pi_W(e^{-Ah} P + sqrt(T (1 - e^{-2Ah})) eta)``: plain Langevin dynamics
            for that group (e.g. the output layer) while the thermostat adapts elsewhere.
        projection: ``"rattle"`` or ``"geodesic"``, as for :class:`holonomic.Langevin`.
        seed: seed of the integrator's own generator.
        dataset_size: multiplies the gradient.
        weight_decay: Gaussian prior precision for unconstrained parameters.
        substeps: RATTLE/geodesic substeps per half drift.
        retry_substeps: retry a step whose projection failed with more substeps
            (``None``: raise), as for :class:`holonomic.Langevin`; the retry
            re-runs the whole step (B, A, D, O, D, A), the thermostat included.

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
        lr: float | None = None,
        momentum: float | None = None,
        *,
        step: float | None = None,
        friction: float | None = None,
        temperature: float = 1.0,
        thermostat_mass: float = 1.0,
        adaptive: bool = True,
        projection: str = "rattle",
        seed: int = 0,
        dataset_size: float | None = None,
        weight_decay: float = 0.0,
        substeps: int = 1,
        retry_substeps: int | None = None,
    ) -> None:
        lr, momentum = sgd_settings(lr, momentum, step, friction)
        defaults = dict(lr=lr, momentum=momentum, temperature=temperature,
                        thermostat_mass=thermostat_mass, adaptive=adaptive,
                        projection=projection, dataset_size=dataset_size,
                        weight_decay=weight_decay, substeps=substeps)
        self._validate_group(defaults)
        self._xi: list[Tensor] = []
        self._scratch: dict[str, Any] | None = None
        # Langevin.__init__ would validate defaults without the thermostat keys; the
        # bookkeeping lives in HolonomicIntegrator.
        HolonomicIntegrator.__init__(self, params, defaults, seed=seed, retry_substeps=retry_substeps)

    # -- groups ------------------------------------------------------------------------
    def _validate_group(self, group: dict[str, Any]) -> None:
        super()._validate_group(group)  # Langevin's checks (lr, momentum, projection, ...)
        adaptive = group.setdefault("adaptive", True)
        if not isinstance(adaptive, bool):
            raise ValueError(f"adaptive must be True (the friction adapts) or False (fixed "
                             f"friction: plain Langevin for the group), got {adaptive!r}")
        if adaptive:
            group["temperature"] = check_positive("temperature", group["temperature"])
        if group["momentum"] == 0.0:
            raise ValueError("momentum must be > 0 for AdaptiveLangevin (momentum 0 is an "
                             "infinite friction; the friction is the initial thermostat "
                             "friction and must be finite), got 0.0 (or friction=inf)")
        group["thermostat_mass"] = check_positive("thermostat_mass", group["thermostat_mass"])

    def add_param_group(self, param_group: dict[str, Any]) -> None:
        super().add_param_group(param_group)
        group = self.param_groups[-1]
        device = group["params"][0].device if group["params"] else torch.device("cpu")
        _, friction = integrator_step_and_friction(group)
        self._xi.append(torch.tensor(friction, dtype=torch.float64, device=device))

    def thermostat_friction(self) -> list[float]:
        """Current thermostat friction :math:`\\xi` of each param group (host sync)."""
        return [float(x) for x in self._xi]

    def _follow_settings(self) -> Callable[[], None]:
        """No rescaling of the momenta when lr or momentum change (class docstring)."""
        return lambda: None

    # -- checkpointing -------------------------------------------------------------------
    def state_dict(self) -> dict[str, Any]:
        """Core state dict plus ``"thermostat_friction"``: one 0-d tensor per group."""
        sd = super().state_dict()
        sd["thermostat_friction"] = [x.detach().cpu().clone() for x in self._xi]
        return sd

    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        self._check_state_dict(state_dict)  # the class, groups and shapes first
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
    # The base class's step() runs the per-parameter hook _update and commits all updates
    # transactionally. The thermostat couples the parameters of a group (it needs their
    # summed kinetic energy between the first drift and the O step), so step() first runs
    # the opening B A D of every group (_open_step: it only computes, nothing is written),
    # then the base step() calls _update for O and the closing A of each parameter; the
    # closing D is applied only once the base class has committed.

    def _open_step(self) -> dict[str, Any]:
        """B, A and the first D for every group; returns scratch data (nothing written)."""
        phases: dict[Tensor, tuple[int, Phase]] = {}
        xi_half: list[Tensor | None] = [None] * len(self.param_groups)
        dof = [0] * len(self.param_groups)
        for g_index, group in enumerate(self.param_groups):
            if not group["lr"] > 0:  # lr == 0 skips the group; lr < 0 is reported by the base step()
                continue
            h = self._settings(group).step
            if group["adaptive"] and not group["temperature"] > 0:
                raise ValueError(f"param group {g_index}: AdaptiveLangevin needs temperature "
                                 f"> 0, got {group['temperature']!r}; use Langevin for T = 0")
            settings = self._settings(group)
            members = [p for p in group["params"]
                       if p.grad is not None and not p.grad.is_sparse]
            if not members:
                continue
            for p in members:
                geometry = constraint_of(p) or UNCONSTRAINED
                force = self.force(p, group)
                momentum = self.state[p].get("momentum")
                if momentum is None:
                    momentum = torch.zeros_like(p)
                phase = Phase(w=p.detach(), p=momentum, ok=torch.isfinite(force).all())
                run_scheme(_KICK_DRIFT, phase, force=force, geometry=geometry,
                           settings=settings, generator=None)
                phases[p] = (g_index, phase)
                dof[g_index] += geometry.tangent_dof(p.shape)
            if not group["adaptive"]:  # fixed friction A, following lr and momentum
                self._xi[g_index] = torch.full_like(self._xi[g_index], settings.friction)
                xi_half[g_index] = self._xi[g_index]
                continue
            xi_half[g_index] = update_thermostat_friction(
                self._xi[g_index], [phases[p][1].p for p in members], dof=dof[g_index],
                temperature=settings.temperature, thermostat_mass=group["thermostat_mass"],
                duration=0.5 * h)
        return {"phases": phases, "xi_half": xi_half, "dof": dof,
                "kinetic": [[] for _ in self.param_groups]}

    @staticmethod
    def _settings(group: dict[str, Any]) -> Settings:
        h, friction = integrator_step_and_friction(group)
        return Settings(step=h, friction=friction,
                        temperature=group["temperature"], projection=group["projection"],
                        substeps=group["substeps"])

    def _update(self, p: Tensor, force: Tensor, group: dict[str, Any], geometry: Constraint):
        """O and the closing A for one parameter (B and A were run by _open_step)."""
        scratch = self._scratch
        if scratch is None or p not in scratch["phases"]:
            raise RuntimeError("AdaptiveLangevin._update is only called from step()")
        g_index, phase = scratch["phases"][p]
        settings = self._settings(group)
        xi = scratch["xi_half"][g_index]
        adaptive_thermostat(phase, xi=xi, noise_friction=settings.friction,
                            temperature=settings.temperature, step=settings.step,
                            geometry=geometry, generator=self.generator(p.device))
        scratch["kinetic"][g_index].append(phase.p)
        run_scheme(_DRIFT, phase, force=force, geometry=geometry, settings=settings,
                   generator=None)
        ok = phase.ok & torch.isfinite(phase.p).all() & torch.isfinite(xi)
        return phase.w, phase.p, ok, phase.iterations

    def _take_step(self) -> None:
        """The opening B A D of every group, then O and the closing A per parameter
        (one attempt: a retry with more substeps re-runs both), then, after the commit,
        the closing D of every group. ``step()`` itself is the base class's, so torch's
        step hooks fire once per step.

        Raises:
            IntegrationError: non-finite gradient or failed projection; nothing changed
                (weights, momenta, generator states, thermostat frictions).
        """
        self._scratch = self._open_step()
        try:
            super()._take_step()  # O, A per parameter; commits, or raises having changed nothing
            scratch = self._scratch
        finally:
            self._scratch = None
        for g_index, group in enumerate(self.param_groups):  # closing D, after the commit
            if scratch["kinetic"][g_index] and group["adaptive"]:
                self._xi[g_index] = update_thermostat_friction(
                    scratch["xi_half"][g_index], scratch["kinetic"][g_index],
                    dof=scratch["dof"][g_index], temperature=group["temperature"],
                    thermostat_mass=group["thermostat_mass"],
                    duration=0.5 * integrator_step_and_friction(group)[0])
