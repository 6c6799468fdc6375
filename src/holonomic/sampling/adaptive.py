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

from holonomic.dynamics.langevin import Langevin
from holonomic.dynamics import operators
from holonomic.dynamics.operators import Phase, Settings
from holonomic.dynamics.schemes import ADAPTIVE_FRICTION, Scheme
from holonomic.dynamics.settings import integrator_step_and_friction
from holonomic.geometry import Constraint
from holonomic.geometry.base import check_positive

__all__ = ["AdaptiveLangevin", "adaptive_thermostat", "update_thermostat_friction"]


def adaptive_thermostat(phase: Phase, *, xi: Tensor, noise_friction: float, temperature: float,
                        step: float, geometry: Constraint,
                        generator: torch.Generator | None) -> None:
    r"""O step with friction :math:`\xi` and injected noise of fixed strength :math:`2AT`
    (the scheme's ``adaptive_thermostat`` operator, :mod:`holonomic.dynamics.operators`,
    with its noise drawn from ``generator``)::

        P <- Pi_W ( e^{-xi h} P + sqrt(2 A T (1 - e^{-2 xi h}) / (2 xi)) eta ),  eta ~ N(0, I)
    """
    settings = Settings(step=step, friction=noise_friction, temperature=temperature)
    operators.adaptive_thermostat(phase, 1.0, force=phase.p, geometry=geometry, settings=settings,
                noise=lambda: torch.randn(phase.p.shape, generator=generator, dtype=phase.p.dtype,
                                          device=phase.p.device),
                state={"friction": xi})


def update_thermostat_friction(xi: Tensor, momenta: list[Tensor], *, dof: int, temperature: float,
                               thermostat_mass: float, duration: float) -> Tensor:
    r"""D step: :math:`\xi \leftarrow \xi + \frac{t}{m}\bigl(\frac{\sum |P|^2}{N_f T} - 1\bigr)`.

    Returns a new 0-d float64 tensor (``xi`` is not modified).
    """
    state = {"friction": xi}
    phases = [Phase(w=p, p=p, ok=torch.ones((), dtype=torch.bool)) for p in momenta]
    operators.friction_update(phases, 1.0, dof=dof, settings=Settings(step=duration, temperature=temperature,
                                                            thermostat_mass=thermostat_mass), state=state)
    return state["friction"]


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
        backend: which kernels compute the step, as for :class:`holonomic.Langevin`
            (``"auto"``, ``"reference"``, ``"eager"``, ``"native"``); the
            adaptive-friction scheme runs on the reference kernel whatever the choice.

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
        backend: str | None = None,
    ) -> None:
        super().__init__(params, lr, momentum, step=step, friction=friction, temperature=temperature,
                         projection=projection, seed=seed, dataset_size=dataset_size,
                         weight_decay=weight_decay, substeps=substeps, retry_substeps=retry_substeps,
                         backend=backend,
                         group_defaults=dict(thermostat_mass=thermostat_mass, adaptive=adaptive))

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

    def _initial_group_state(self, group: dict[str, Any]) -> dict[str, Tensor]:
        r""":math:`\xi` starts at the friction ``A`` of the group's settings."""
        device = group["params"][0].device if group["params"] else torch.device("cpu")
        _, friction = integrator_step_and_friction(group)
        return {"friction": torch.tensor(friction, dtype=torch.float64, device=device)}

    def scheme_for(self, group: dict[str, Any]) -> Scheme:
        """The adaptive-friction table (BADODAB) for every group."""
        return ADAPTIVE_FRICTION

    def settings_for(self, group: dict[str, Any]) -> Settings:
        h, friction = integrator_step_and_friction(group)
        return Settings(step=h, friction=friction, temperature=group["temperature"],
                        projection=group["projection"], substeps=group["substeps"],
                        thermostat_mass=group["thermostat_mass"], adaptive=group["adaptive"])

    def thermostat_friction(self) -> list[float]:
        r"""Current thermostat friction :math:`\xi` of each param group (host sync)."""
        return [float(s["friction"]) for s in self.group_states]

    def _follow_settings(self) -> Callable[[], None]:
        """No rescaling of the momenta when lr or momentum change (class docstring)."""
        return lambda: None

    # -- checkpointing -------------------------------------------------------------------
    def state_dict(self) -> dict[str, Any]:
        """Core state dict plus ``"thermostat_friction"``: one 0-d tensor per group."""
        sd = super().state_dict()
        sd["thermostat_friction"] = [s["friction"].detach().cpu().clone() for s in self.group_states]
        return sd

    #: ``adaptive`` (per group) came after the first release: a dict without it adapted.
    _SETTINGS_ADDED_LATER = {"adaptive": True}

    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        state_dict = self._with_later_settings(state_dict)
        self._check_state_dict(state_dict)  # the class, groups and shapes first
        state_dict = dict(state_dict)
        frictions = state_dict.pop("thermostat_friction", None)
        if frictions is None or len(frictions) != len(self.param_groups):
            raise ValueError("state_dict has no 'thermostat_friction' entry with one value per "
                             f"param group ({len(self.param_groups)}); was it saved by "
                             "AdaptiveLangevin?")
        super().load_state_dict(state_dict)
        for x, s in zip(frictions, self.group_states):
            s["friction"] = torch.as_tensor(x, dtype=torch.float64).to(s["friction"].device).clone()
