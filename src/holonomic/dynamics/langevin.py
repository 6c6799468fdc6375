"""Constrained Langevin integrators: underdamped (BAOAB with RATTLE or
geodesic drifts) and overdamped (projected Euler-Maruyama)."""

from __future__ import annotations

import warnings
from typing import Any, Callable, Iterable, Mapping

from torch import Tensor

from holonomic.dynamics.base import (
    HolonomicIntegrator,
    check_dataset_size,
    check_temperature,
)
from holonomic.dynamics.kernels import check_backend
from holonomic.dynamics.operators import Settings
from holonomic.dynamics.schemes import BAOAB, GEODESIC_BAOAB, OVERDAMPED, Scheme, as_scheme
from holonomic.dynamics.settings import (
    check_lr,
    check_momentum,
    integrator_step_and_friction,
    physics_group_to_sgd,
    sgd_settings,
)
from holonomic.geometry import constraint_of
from holonomic.geometry.base import check_positive

__all__ = ["Langevin", "OverdampedLangevin"]

_PROJECTIONS = ("rattle", "geodesic")

#: What the deprecated ``compiled=`` flag meant, as a backend.
_COMPILED_TO_BACKEND = {None: "auto", True: "native", False: "eager"}


def backend_from_compiled(compiled: Any, backend: str | None) -> str:
    """The backend for a constructor given the deprecated ``compiled`` flag
    (``None``/``True``/``False``: ``"auto"``/``"native"``/``"eager"``; warns)."""
    if compiled is None:
        return check_backend("auto" if backend is None else backend)
    if backend is not None:
        raise ValueError(f"give backend= (compiled= is deprecated), not both; got compiled={compiled!r} and "
                         f"backend={backend!r}")
    if not isinstance(compiled, bool):
        raise ValueError(f"compiled (deprecated) must be None, True or False, got {compiled!r}; use backend= "
                         "'auto', 'reference', 'eager' or 'native'")
    new = _COMPILED_TO_BACKEND[compiled]
    warnings.warn(f"compiled={compiled!r} is deprecated and will be removed in the next release; use "
                  f"backend={new!r} (torch.compile is no longer used: the native C++ kernel and the eager "
                  "kernels cover what it did)", DeprecationWarning, stacklevel=3)
    return new


def _check_weight_decay(value: Any) -> float:
    return check_positive("weight_decay", value, allow_zero=True)


class Langevin(HolonomicIntegrator):
    r"""Underdamped Langevin dynamics on the constraint sets of the parameters.

    Samples, at temperature ``T > 0``, the density proportional to
    ``exp(-U(W)/T)`` with respect to the surface measure of the constraint
    set (times a Gaussian in the tangent momenta), where ``grad U`` is the
    *force* ``f = dataset_size * W.grad + weight_decay * W``.  At ``T = 0``
    it is deterministic constrained heavy-ball optimisation.

    SDE (unit mass, friction ``gamma``)::

        dW = P dt,  dP = -f dt - gamma P dt + sqrt(2 gamma T) dB + G(W)^T dLambda,
        g(W) = 0,   P tangent at W

    One ``step()`` with step ``h`` (BAOAB; ``Pi_w`` the tangent projection)::

        B   P <- Pi_W (P - h f(W))               (closing half kick of the
                                                  previous step + opening half
                                                  kick of this one; both use
                                                  the same gradient)
        A   W, P <- drift(W, P, h/2)              RATTLE: y = W + (h/2) P,
                                                  SHAKE W' = y + N(W) lam,
                                                  P <- Pi_W' (W' - W)/(h/2);
                                                  or the exact geodesic flow
        O   P <- Pi_W (e^{-gamma h} P + sqrt(T (1 - e^{-2 gamma h})) xi)
        A   W, P <- drift(W, P, h/2)

    ``state[p]["momentum"]`` holds ``P`` at the end of the step, **before**
    the closing half kick (which the next step applies together with its
    opening half kick).  It starts at zero, and the first step applies a full
    kick, so that at ``T = 0`` without constraints the trajectory is exactly
    heavy-ball SGD (below).  Parameters without a constraint follow the same
    scheme with identity projections (plain BAOAB).

    **Settings: SGD's lr and momentum.**  ``group["lr"]`` and
    ``group["momentum"]`` mean exactly what they mean for
    ``torch.optim.SGD``; the integrator's step ``h`` and friction ``gamma``
    follow from them (:func:`holonomic.dynamics.settings.integrator_step_and_friction`,
    readable with :meth:`step_and_friction`)::

        h = sqrt(2 lr / (1 + mu)),   gamma = -ln(mu) / h
        (mu = 0: gamma = inf, no momentum memory; mu = 1: gamma = 0)

    With ``mu = exp(-gamma h)`` and no constraint, the scheme at ``T = 0`` is
    ``v <- mu v - lr f``, ``W <- W + v`` with ``lr = h^2 (1 + mu) / 2`` and
    ``v = (h/2)(1 + mu) P``, i.e.
    ``torch.optim.SGD(lr=lr, momentum=mu, weight_decay=weight_decay)``
    exactly (to roundoff).  (To leading order this is the ``lr = h^2`` of
    Chen, Fox & Guestrin 2014, sec. 3.3; the factor ``(1 + mu)/2`` is exact
    for this splitting.)  The noise then adds variance ``lr (1 - mu) T`` per
    coordinate and step to ``v``.

    **Changing lr or momentum** (a scheduler, ``set_params``, a hand edit of
    the group) takes effect at the next step.  With ``mu`` fixed, ``h``
    scales as ``sqrt(lr)`` and ``gamma`` as ``1/sqrt(lr)`` (``gamma h = -ln mu``
    stays), so halving ``lr`` divides ``h`` by ``sqrt 2`` and multiplies the
    friction by ``sqrt 2``; the noise variance per step, ``lr (1 - mu) T``,
    halves; the sampled law ``exp(-U/T)`` does not change, only the
    discretisation error and the time per step.  SGD keeps its momentum buffer
    ``P / (mu h)`` when lr or momentum change, so that the stored momenta of a
    group are rescaled by ``(mu' h') / (mu h)`` (new over old settings) at the
    first step with new settings (not after a step with ``mu = 0``).  At
    ``lr = 0`` nothing moves; at ``T = 0`` the momentum then accumulates the
    force as SGD's buffer does (``buf <- mu buf + f``), and at ``T > 0`` it is
    kept as it is (no time passes).  At ``T = 0`` without constraints the
    trajectory therefore equals ``torch.optim.SGD`` under any scheduler
    (StepLR, OneCycleLR and CyclicLR with momentum cycling,
    ReduceLROnPlateau, SWALR, a warm-up from lr 0).  At ``T > 0`` a large change moves the
    kinetic temperature by the square of that factor for a while; the
    thermostat restores it in a time of order ``1/gamma``.  The settings of
    the momenta are kept in the group as ``"momentum_scale"`` (``mu h`` of
    the last step that moved; ``None`` before), saved in ``state_dict``.

    **Units.**  ``T`` is in the units of the loss.  If ``.grad`` is the
    gradient of a *mean* loss over ``N`` examples, the Bayesian posterior at
    ``T = 1`` needs ``dataset_size=N``; omitting it samples at an effective
    temperature ``N T`` on the summed loss.  ``weight_decay`` is the
    precision of a Gaussian prior on unconstrained parameters (it has no
    effect on fixed-norm or orthonormal parameters, whose norm is fixed).

    Param groups may override ``lr`` and ``momentum`` (or ``step`` and
    ``friction``, converted to ``lr``/``momentum`` when the group is added;
    a missing partner takes the default's step or friction), ``temperature``,
    ``dataset_size``, ``weight_decay``, ``projection`` and ``substeps``.

    Args:
        params: parameters or param groups, as for any torch optimizer.
        lr: SGD's learning rate ``lr > 0`` (required unless ``step`` is given).
        momentum: SGD's momentum ``mu`` in ``[0, 1]`` (default ``0.9``; only
            with ``lr``).
        step: the integrator's step ``h > 0``, instead of ``lr``.
        friction: ``gamma >= 0`` (``math.inf`` allowed: no momentum memory;
            default ``1.0``; only with ``step``), instead of ``momentum``.
        temperature: ``T >= 0``.
        projection: ``"rattle"`` (SHAKE/RATTLE A-steps) or ``"geodesic"``
            (the exact geodesic flow: g-BAOAB).
        seed: seed of the integrator's own ``torch.Generator`` (saved in
            ``state_dict``; the global RNG is never used).
        dataset_size: multiplies the gradient (see Units).
        weight_decay: Gaussian prior precision for unconstrained parameters.
        substeps: split each A step into this many equal drifts (g-BAOAB
            with ``K`` RATTLE substeps when ``projection="rattle"``).
        backend: which kernels compute the step, chosen per parameter
            (:mod:`holonomic.dynamics.kernels`; every kernel is tested against
            the reference).  ``"auto"`` (default): the native C++ kernel for
            fixed-norm and free parameters on the CPU in float32/float64
            (built once with the system compiler; silently skipped where it
            cannot be built), the closed-form kernel for square orthonormal
            parameters, the fused eager kernel for fixed-norm and free
            parameters elsewhere, and the reference kernel for the rest.
            ``"native"``: the same, warning once if the C++ kernel cannot be
            built.  ``"eager"``: no C++ kernel.  ``"reference"``: the plain
            operators for every parameter.  ``last_info.kernels`` says which
            kernel took each parameter's step.
        compiled: deprecated (one release): ``None``/``True``/``False`` mean
            ``backend="auto"``/``"native"``/``"eager"``, with a
            ``DeprecationWarning``.
        retry_substeps: what a step does when a projection has no solution
            (SHAKE finds no point of the set along the normal: the drift
            ``(h/2) |P|`` of a row exceeds its radius, typically at a large
            step or temperature).  ``None`` (default): the step raises
            :class:`IntegrationError` and changes nothing.  An integer
            ``K >= 2``: the step is retried inside the same ``step()`` call,
            from the same state and with the same noise (the failed attempt
            changed nothing, generators included), with the failing group's
            A-steps split into ``k`` times more substeps, ``k = 2, 4, 8, ...``
            capped at ``K``; a retried step with factor ``k`` equals the step
            of an optimizer built with ``substeps * k`` for that group.  Each
            drift then moves ``k`` times less, so SHAKE has a solution where
            ``(h / 2k) |P|`` is below the radius; the cost is ``k`` times the
            A-step work for that step only.  ``optimizer.last_info.retried_substeps``
            gives ``{group: k}`` for the last step and ``optimizer.retried_steps``
            (saved in ``state_dict``) counts the retried steps.  If ``k = K``
            still fails, the step raises :class:`IntegrationError` saying so,
            with nothing changed.  Non-finite gradients are never retried.
        group_defaults: further param-group defaults of a subclass (e.g. the
            thermostat settings of :class:`holonomic.AdaptiveLangevin`).

    Raises:
        ValueError: at construction, for a non-positive or NaN lr or step,
            a momentum outside [0, 1], negative friction or temperature,
            unknown projection, neither or both of ``lr`` and ``step``,
            ``momentum`` with ``step`` or ``friction`` with ``lr``, ...
        IntegrationError: from ``step()``, if a gradient is not finite or a
            projection fails (after the retries of ``retry_substeps``);
            nothing is changed then.

    ``torch.compile`` does not trace ``step()`` (a transaction that reads its
    failure flags on the host): ``torch.compile(optimizer.step)`` or a compiled
    training function runs the step eagerly, with the same result; a compiled
    training function with ``fullgraph=True`` cannot contain it (torch raises).
    Compile the model instead.

    References:
        Leimkuhler & Matthews, Proc. R. Soc. A 472 (2016) 20160138;
        Leimkuhler, Matthews & Stoltz, IMA J. Numer. Anal. 36 (2016) 13-79;
        Lelievre, Rousset & Stoltz, Math. Comp. 81 (2012) 2071-2125;
        Andersen, J. Comput. Phys. 52 (1983) 24-34.
    """

    #: A scheme table for every group (``None``: BAOAB, or g-BAOAB for groups
    #: with ``projection="geodesic"``); subclasses may set another table.
    scheme: Scheme | tuple[tuple[str, float], ...] | None = None

    def __init__(
        self,
        params: Iterable[Any],
        lr: float | None = None,
        momentum: float | None = None,
        *,
        step: float | None = None,
        friction: float | None = None,
        temperature: float = 0.0,
        projection: str = "rattle",
        seed: int = 0,
        dataset_size: float | None = None,
        weight_decay: float = 0.0,
        substeps: int = 1,
        backend: str | None = None,
        compiled: bool | None = None,
        retry_substeps: int | None = None,
        group_defaults: Mapping[str, Any] | None = None,
    ) -> None:
        self.backend = backend_from_compiled(compiled, backend)
        lr, momentum = sgd_settings(lr, momentum, step, friction)
        defaults = dict(lr=lr, momentum=momentum, temperature=temperature,
                        projection=projection, dataset_size=dataset_size, weight_decay=weight_decay,
                        substeps=substeps, momentum_scale=None, **(group_defaults or {}))
        self._validate_group(defaults)
        super().__init__(params, defaults, seed=seed, retry_substeps=retry_substeps)

    @property
    def compiled(self) -> bool | None:
        """Deprecated: the ``compiled`` flag that maps to :attr:`backend`."""
        return {"auto": None, "native": True, "eager": False}.get(self.backend)

    @classmethod
    def from_sgd(
        cls,
        params: Iterable[Any],
        lr: float,
        momentum: float = 0.9,
        temperature: float = 0.0,
        weight_decay: float = 0.0,
        **kwargs: Any,
    ) -> "Langevin":
        r"""Build from SGD-style ``lr`` and ``momentum``: the same as
        ``cls(params, lr, momentum, temperature=..., weight_decay=..., **kwargs)``
        (kept for old code; the constructor takes ``lr`` and ``momentum`` itself).

        ``h = sqrt(2 lr / (1 + momentum))``, ``gamma = -ln(momentum) / h``
        (``momentum = 0`` gives ``gamma = inf``).  At ``T = 0`` and without
        constraints the trajectory equals
        ``torch.optim.SGD(params, lr, momentum=momentum, weight_decay=weight_decay)``,
        under schedulers too.
        """
        return cls(params, lr, momentum, temperature=temperature, weight_decay=weight_decay, **kwargs)

    def _convert_group(self, param_group: dict[str, Any]) -> dict[str, Any]:
        """``step``/``friction`` in a group become ``lr``/``momentum``."""
        return physics_group_to_sgd(param_group, self.defaults)

    def _validate_group(self, group: dict[str, Any]) -> None:
        group["lr"] = check_lr(group["lr"])
        group["momentum"] = check_momentum(group["momentum"])
        group["temperature"] = check_temperature(group["temperature"])
        group["dataset_size"] = check_dataset_size(group["dataset_size"])
        group["weight_decay"] = _check_weight_decay(group["weight_decay"])
        if group["projection"] not in _PROJECTIONS:
            raise ValueError(f"projection must be one of {_PROJECTIONS}, got {group['projection']!r}")
        substeps = group["substeps"]
        if isinstance(substeps, bool) or not isinstance(substeps, int) or substeps < 1:
            raise ValueError(f"substeps must be a positive integer, got {substeps!r}")
        group.setdefault("momentum_scale", None)

    def _follow_settings(self) -> Callable[[], None]:
        """Rescale the stored momenta of every group whose ``lr`` or ``momentum``
        changed since its last step by ``(mu' h') / (mu h)`` (class docstring:
        SGD keeps its buffer ``P / (mu h)``).  New tensors are stored (nothing is
        written in place); returns the function that undoes it (for a failed step)."""
        undo: list[tuple[dict[str, Any], Any, list[tuple[Tensor, Tensor]]]] = []
        for group in self.param_groups:
            if group["lr"] == 0 and group["temperature"] == 0:
                undo.append(self._accumulate_at_zero_lr(group))
                continue
            if not group["lr"] > 0:
                continue  # nothing moves; the base step reports a negative lr
            h, _ = integrator_step_and_friction(group)
            scale = group["momentum"] * h
            old = group.get("momentum_scale")
            if old == scale:
                continue
            saved: list[tuple[Tensor, Tensor]] = []
            if old:  # None: no step yet; 0: the last step kept no momentum (mu = 0)
                factor = scale / old
                for p in group["params"]:
                    state = self.state.get(p)
                    momentum = state.get("momentum") if state else None
                    if momentum is not None:
                        saved.append((p, momentum))
                        state["momentum"] = momentum * factor
            undo.append((group, old, saved))
            group["momentum_scale"] = scale

        def restore() -> None:
            for group, old, saved in undo:
                group["momentum_scale"] = old
                for p, momentum in saved:
                    if momentum is None:
                        self.state[p].pop("momentum", None)
                    else:
                        self.state[p]["momentum"] = momentum

        return restore

    def _accumulate_at_zero_lr(self, group: dict[str, Any]
                               ) -> tuple[dict[str, Any], Any, list[tuple[Tensor, Tensor]]]:
        """A temperature-0 step at ``lr = 0``, as ``torch.optim.SGD`` takes it: nothing moves
        and the momentum buffer accumulates the force, ``buf <- mu buf + f``. The stored
        momentum is ``P = -s buf`` with ``s`` the group's ``momentum_scale`` (``mu h`` of the
        last step that moved; 1 before any), so ``P <- mu P - s f``, projected onto the
        tangent space of constrained parameters. Returns the undo record of
        :meth:`_follow_settings` (new tensors are stored; nothing is written in place)."""
        old = group.get("momentum_scale")
        scale = old if old else 1.0
        saved: list[tuple[Tensor, Tensor]] = []
        for p in group["params"]:
            if p.grad is None:
                continue
            state = self.state[p]
            momentum = state.get("momentum")
            saved.append((p, momentum))
            force = self.force(p, group)
            new = -scale * force if momentum is None else group["momentum"] * momentum - scale * force
            geometry = constraint_of(p)
            if geometry is not None:
                new = geometry.tangent(p.detach(), new)
            state["momentum"] = new
        group["momentum_scale"] = scale
        return group, old, saved

    def scheme_for(self, group: dict[str, Any]) -> Scheme:
        """BAOAB, or g-BAOAB for ``projection="geodesic"`` (or the class's own table)."""
        if self.scheme is not None:
            return as_scheme(self.scheme)
        return GEODESIC_BAOAB if group["projection"] == "geodesic" else BAOAB

    def settings_for(self, group: dict[str, Any]) -> Settings:
        h, gamma = integrator_step_and_friction(group)
        return Settings(step=h, friction=gamma, temperature=group["temperature"],
                        projection=group["projection"], substeps=group["substeps"])

    def _take_step(self) -> None:
        """Follow changed settings (momentum rescaling), then the transaction; a
        failed step undoes the rescaling too."""
        restore = self._follow_settings()
        try:
            super()._take_step()
        except BaseException:
            restore()  # a failed step changes nothing, the momenta and their settings included
            raise


class OverdampedLangevin(HolonomicIntegrator):
    r"""Overdamped (Brownian) Langevin dynamics on the constraint sets.

    Projected Euler-Maruyama with a SHAKE-type projection along the normal
    at the old point::

        y  = W + Pi_W (-h f(W) + sqrt(2 T h) xi),   xi ~ N(0, I)
        W' = y + N(W) lam  with  g(W') = 0

    with ``f = dataset_size * W.grad + weight_decay * W``.  Samples
    ``exp(-U/T)`` (surface measure) with weak order 1; at ``T = 0`` it is
    projected gradient descent with learning rate ``h``: here ``lr = h``
    (``torch.optim.SGD`` without momentum at ``T = 0`` and without
    constraints; ``step`` is accepted as another name for ``lr``).  No
    momentum is kept (no ``momentum`` key, so momentum-cycling schedulers
    refuse it, as for any optimizer without momentum).  Units and param-group
    keys as for :class:`Langevin` (``lr``/``step``, ``temperature``,
    ``dataset_size``, ``weight_decay``, ``substeps``).

    **Substeps.**  With ``substeps = K`` the move is split into ``K``
    projected moves of ``h/K`` with the same force ``f(W)`` (one gradient per
    step) and the Brownian increment ``B = sqrt(2 T h) xi`` split along its
    bridge, so that the ``K`` increments sum to the same ``B``::

        W_0 = W;  B = sqrt(2 T h) xi          (the draw of K = 1)
        for j = 0 .. K-1 (m = K - j increments left):
            dB_j = B / m + sqrt(2 T (h/K) (m-1)/m) z_j    (z_j ~ N(0, I), drawn in order; dB = B at j = K-1)
            B   <- B - dB_j
            W_{j+1} = SHAKE(W_j, W_j + Pi_{W_j}(-(h/K) f + dB_j))

    Each ``dB_j`` has variance ``2 T h/K`` per coordinate; ``K = 1`` is the
    scheme above, bit for bit.  ``retry_substeps`` (as for
    :class:`Langevin`) retries a step whose projection failed with ``k``
    times more substeps, ``k = 2, 4, ...``: the same first draw ``xi``, so
    the retried step refines the Brownian path of the failed one.

    Args:
        params: parameters or param groups.
        lr: the step ``h > 0`` (SGD's learning rate at ``T = 0``); required
            unless ``step`` is given.
        step: another name for ``lr``.
        temperature: ``T >= 0``.
        seed: seed of the integrator's own generator.
        dataset_size: multiplies the gradient.
        weight_decay: Gaussian prior precision for unconstrained parameters.

    References:
        Ciccotti, Lelievre & Vanden-Eijnden, Comm. Pure Appl. Math. 61 (2008)
        371-408 (recalled from memory); Lelievre, Rousset & Stoltz, Free
        Energy Computations (2010).
    """

    _state_keys: tuple[str, ...] = ()  # no momentum is kept

    def __init__(
        self,
        params: Iterable[Any],
        lr: float | None = None,
        *,
        step: float | None = None,
        temperature: float = 0.0,
        seed: int = 0,
        dataset_size: float | None = None,
        weight_decay: float = 0.0,
        substeps: int = 1,
        retry_substeps: int | None = None,
    ) -> None:
        if lr is not None and step is not None:
            raise ValueError(f"give lr or step (the same thing here: lr = h), not both; got lr={lr!r} "
                             f"and step={step!r}")
        if lr is None and step is None:
            raise ValueError("lr is required (the step h of the Euler-Maruyama scheme, e.g. lr=1e-3)")
        defaults = dict(lr=check_lr(lr) if step is None else check_positive("step", step),
                        temperature=temperature,
                        dataset_size=dataset_size, weight_decay=weight_decay, substeps=substeps)
        self._validate_group(defaults)
        super().__init__(params, defaults, seed=seed, retry_substeps=retry_substeps)

    def _validate_group(self, group: dict[str, Any]) -> None:
        group["lr"] = check_lr(group["lr"])
        group["temperature"] = check_temperature(group["temperature"])
        group["dataset_size"] = check_dataset_size(group["dataset_size"])
        group["weight_decay"] = _check_weight_decay(group["weight_decay"])
        substeps = group.setdefault("substeps", 1)
        if isinstance(substeps, bool) or not isinstance(substeps, int) or substeps < 1:
            raise ValueError(f"substeps must be a positive integer, got {substeps!r}")

    def scheme_for(self, group: dict[str, Any]) -> Scheme:
        return OVERDAMPED

    def settings_for(self, group: dict[str, Any]) -> Settings:
        h, _ = integrator_step_and_friction(group)  # h = lr
        return Settings(step=h, friction=float("inf"), temperature=group["temperature"],
                        substeps=group.get("substeps", 1))
