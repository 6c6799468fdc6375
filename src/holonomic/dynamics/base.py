"""The stateful shell shared by the holonomic integrators.

The optimizer classes keep ``param_groups``, ``state``, the seeded random
generators and checkpointing.  A step gathers each parameter's plain inputs
(:class:`holonomic.dynamics.transaction.StepInput`), picks per parameter the
first kernel of the backend that supports it
(:mod:`holonomic.dynamics.kernels`) and runs them all in one transaction
(:mod:`holonomic.dynamics.transaction`): one host synchronisation for every
ok flag, then one commit or one rollback.  The schemes are tables
(:mod:`holonomic.dynamics.schemes`).
"""

from __future__ import annotations

import math
from typing import Any, Callable, Iterable

import torch
from torch import Tensor

from holonomic.dynamics.kernels import Kernel, check_backend, kernels_for, layout_of
from holonomic.dynamics.operators import Settings
from holonomic.dynamics.schemes import Scheme
from holonomic.dynamics.settings import check_lr, integrator_step_and_friction
from holonomic.dynamics.transaction import (
    IntegrationError,
    NoiseBuffers,
    ParameterStepInfo,
    StepInfo,
    StepInput,
    Transaction,
    run_step,
)
from holonomic.geometry import UNCONSTRAINED, constraint_of, parameter_label
from holonomic.geometry.base import check_positive
from holonomic.geometry.registry import check_not_replaced

__all__ = ["IntegrationError", "ParameterStepInfo", "StepInfo", "HolonomicIntegrator"]


def step_label(p: Tensor, names: list[str] | None, group: int, index: int) -> str:
    """Readable name of a parameter for step diagnostics and error messages."""
    if names:
        return names[index]
    return parameter_label(p, f"group {group} parameter {index} {tuple(p.shape)}")


def check_temperature(value: Any) -> float:
    return check_positive("temperature", value, allow_zero=True)


def check_friction(value: Any) -> float:
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"friction must be a real number, got {value!r}") from None
    if math.isnan(x) or x < 0:
        raise ValueError(f"friction must be non-negative (math.inf allowed), got {value!r}")
    return x


def check_dataset_size(value: Any) -> float | None:
    if value is None:
        return None
    return check_positive("dataset_size", value)


#: Why ``step()`` is excluded from ``torch.compile`` tracing (``torch.compiler.disable``).
NOT_TRACED = ("a holonomic step is a transaction: it reads its failure flags on the host (one "
              "synchronisation) before it writes anything, and may retry; it runs eagerly. Compile "
              "the model (forward and backward), not optimizer.step()")


def check_retry_substeps(value: Any) -> int | None:
    """``None`` (no retry) or the largest substep factor of a retried step, an int >= 2."""
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int) or value < 2:
        raise ValueError("retry_substeps must be None (a failed projection raises) or an integer >= 2 "
                         f"(the largest factor by which a failed step's substeps are multiplied), got {value!r}")
    return value


def _settings_snapshot(settings: dict[str, Any]) -> tuple | None:
    """A comparable copy of a group's settings (numbers, strings, None), or None when a
    value is not a plain scalar (e.g. a tensor lr): then the settings are validated at
    every step instead of only when they change."""
    items = []
    for key in sorted(settings):
        value = settings[key]
        if not (value is None or isinstance(value, (bool, int, float, str))):
            return None
        items.append((key, type(value), value))
    return tuple(items)


class HolonomicIntegrator(torch.optim.Optimizer):
    """Bookkeeping common to all holonomic integrators (see module docstring).

    Subclasses define ``_validate_group(group)``, :meth:`scheme_for` and
    :meth:`settings_for`; :attr:`group_states` holds per-group state that a
    scheme's group operators update (e.g. a thermostat friction).
    Param groups hold ``"lr"`` (and ``"momentum"``) with ``torch.optim.SGD``'s
    meaning; the integrator's step and friction follow from them
    (:meth:`step_and_friction`).
    """

    def __init__(self, params: Iterable[Any], defaults: dict[str, Any], *, seed: int = 0,
                 retry_substeps: int | None = None) -> None:
        if isinstance(seed, bool) or not isinstance(seed, int):
            raise ValueError(f"seed must be an int, got {seed!r}")
        retry_substeps = check_retry_substeps(retry_substeps)
        if retry_substeps is not None and "substeps" not in defaults:
            raise ValueError(f"retry_substeps: {type(self).__name__} has no 'substeps' setting to "
                             f"multiply; use retry_substeps=None, got {retry_substeps!r}")
        self.seed = seed
        #: Largest factor by which a step whose projection failed is retried
        #: with more substeps (``None``: the step raises at once).
        self.retry_substeps = retry_substeps
        #: Number of steps that succeeded only after a retry with more substeps.
        self.retried_steps = 0
        self._generators: dict[str, torch.Generator] = {}
        self.last_info: StepInfo | None = None
        #: Per param group: state of the scheme's group operators (plain tensors).
        self.group_states: list[dict[str, Tensor]] = []
        super().__init__(params, defaults)

    # -- groups ----------------------------------------------------------------
    def add_param_group(self, param_group: dict[str, Any]) -> None:
        """As ``torch.optim.Optimizer.add_param_group``; a group may give the
        integrator's ``step`` (and, for :class:`holonomic.Langevin`,
        ``friction``) instead of ``lr`` (and ``momentum``): it is converted and
        stored as ``lr``/``momentum`` (see :mod:`holonomic.dynamics.settings`)."""
        param_group = self._convert_group(param_group)
        super().add_param_group(param_group)
        group = self.param_groups[-1]
        group["lr"] = check_lr(group["lr"])
        self._validate_group(group)
        self.__dict__.setdefault("group_states", [])
        self.group_states.append(self._initial_group_state(group))
        for p in group["params"]:
            if p.is_sparse:
                raise ValueError("sparse parameters are not supported; use a dense nn.Embedding")
            constraint = constraint_of(p)
            if constraint is not None:
                constraint.validate_shape(p.shape, parameter_label(p, "parameter"))

    def _initial_group_state(self, group: dict[str, Any]) -> dict[str, Tensor]:
        """The state of a new group's scheme operators (none by default)."""
        return {}

    def _convert_group(self, param_group: dict[str, Any]) -> dict[str, Any]:
        """Without momentum (overdamped): ``step`` is ``lr``."""
        if "step" in param_group:
            if "lr" in param_group:
                raise ValueError("give the step size as 'step' or 'lr', not both")
            param_group = dict(param_group)
            param_group["lr"] = param_group.pop("step")
        return param_group

    def step_and_friction(self, group_index: int = 0) -> tuple[float, float]:
        """The integrator's step ``h`` and friction ``gamma`` of a param group,
        computed from its current ``lr`` and ``momentum`` (so they follow a
        scheduler): ``h = sqrt(2 lr / (1 + momentum))``, ``gamma = -ln(momentum) / h``
        (:func:`holonomic.dynamics.settings.integrator_step_and_friction`).
        Without momentum (:class:`holonomic.OverdampedLangevin`): ``(lr, inf)``."""
        return integrator_step_and_friction(self.param_groups[group_index])

    def _validate_group(self, group: dict[str, Any]) -> None:  # pragma: no cover - abstract
        raise NotImplementedError

    # -- randomness ---------------------------------------------------------------
    def generator(self, device: torch.device) -> torch.Generator:
        """The integrator's own generator for ``device`` (created from ``seed``)."""
        key = str(device)
        gen = self._generators.get(key)
        if gen is None:
            gen = torch.Generator(device=device)
            gen.manual_seed(self.seed)
            self._generators[key] = gen
        return gen

    def device_generators(self) -> dict[str, torch.Generator]:
        """The integrator's generators made so far, by device (``str(device)``, e.g.
        ``"cpu"``, ``"cuda:0"``): the live generators in a new dict (adding to or
        removing from it changes nothing here).  A device's generator is made, from
        ``seed``, at the first step that draws noise on it (:meth:`generator`)."""
        return dict(self._generators)

    def state_dict(self) -> dict[str, Any]:
        """As ``torch.optim.Optimizer.state_dict`` plus ``"integrator"`` (the
        class name, checked by :meth:`load_state_dict`), ``"seed"`` and the
        generator states, so a resumed run draws the same noise.  Loadable
        with ``torch.load(weights_only=True)``."""
        sd = super().state_dict()
        sd["integrator"] = type(self).__name__
        sd["seed"] = self.seed
        sd["generators"] = {k: g.get_state() for k, g in self._generators.items()}
        sd["retried_steps"] = getattr(self, "retried_steps", 0)
        return sd

    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        """Load a dict saved by :meth:`state_dict` of the same class for the
        same parameters.

        Raises:
            ValueError: the dict was saved by another optimizer class (another
                integrator, ``torch.optim.SGD``, ...), for other param groups
                or parameters, or holds a momentum of another shape than its
                parameter; the message names the parameter and the mismatch,
                and nothing is loaded.
        """
        state_dict = self._with_later_settings(state_dict)
        self._check_state_dict(state_dict)
        state_dict = dict(state_dict)
        state_dict.pop("integrator", None)
        seed = state_dict.pop("seed", self.seed)
        generators = state_dict.pop("generators", {})
        retried_steps = int(state_dict.pop("retried_steps", 0))
        super().load_state_dict(state_dict)
        self.seed = int(seed)
        self.retried_steps = retried_steps
        self._generators = {}
        for key, gen_state in generators.items():
            self.generator(torch.device(key)).set_state(gen_state.to("cpu", torch.uint8))

    #: Group settings a class gained after state dicts were first saved, with the value an
    #: older dict implies (filled in by :meth:`_with_later_settings` when loading).
    _SETTINGS_ADDED_LATER: dict[str, Any] = {}

    def _with_later_settings(self, state_dict: Any) -> Any:
        """``state_dict`` with each saved param group given the settings of
        :attr:`_SETTINGS_ADDED_LATER` it lacks (a dict saved before they existed), so it
        loads with the behaviour it was saved with; anything else is returned unchanged."""
        groups = state_dict.get("param_groups") if isinstance(state_dict, dict) else None
        if not self._SETTINGS_ADDED_LATER or not isinstance(groups, list):
            return state_dict
        filled = [{**self._SETTINGS_ADDED_LATER, **g} if isinstance(g, dict) else g
                  for g in groups]
        return {**state_dict, "param_groups": filled}

    #: Keys of the per-parameter state (``self.state[p]``) that this class
    #: keeps; a loaded state with other keys comes from another optimizer.
    _state_keys: tuple[str, ...] = ("momentum",)

    def _check_state_dict(self, state_dict: Any) -> None:
        """Refuse a state dict this optimizer cannot continue from (see
        :meth:`load_state_dict`); changes nothing."""
        me = type(self).__name__
        if not isinstance(state_dict, dict) or "state" not in state_dict or "param_groups" not in state_dict:
            raise ValueError(f"{me}.load_state_dict: expected a dict with 'state' and 'param_groups' as "
                             f"returned by state_dict(), got {type(state_dict).__name__}")
        saved_class = state_dict.get("integrator")
        if saved_class is not None and saved_class != me:
            raise ValueError(f"{me}.load_state_dict: the state dict was saved by {saved_class}, not by {me}; "
                             f"build the {saved_class} to resume it, or start {me} from fresh state")
        saved_groups = state_dict["param_groups"]
        if len(saved_groups) != len(self.param_groups):
            raise ValueError(f"{me}.load_state_dict: the state dict has {len(saved_groups)} param group(s), "
                             f"this optimizer {len(self.param_groups)}; build the optimizer with the same "
                             "param groups as the one that was saved")
        # torch adds "differentiable" to the defaults when it loads a state dict
        required = set(self.defaults) - {"params", "param_names", "differentiable"}
        id_map: dict[Any, tuple[Tensor, str, int]] = {}
        for g_index, (group, saved) in enumerate(zip(self.param_groups, saved_groups)):
            if len(saved["params"]) != len(group["params"]):
                raise ValueError(f"{me}.load_state_dict: param group {g_index} has {len(saved['params'])} "
                                 f"parameter(s) in the state dict and {len(group['params'])} here; build the "
                                 "optimizer with the same parameters as the one that was saved")
            keys = set(saved) - {"params", "param_names"}
            mine = set(group) - {"params", "param_names"}
            missing = sorted(required - keys)
            if saved_class is None and keys != mine:  # an older dict: its settings must be exactly ours
                missing = sorted(mine - keys)
                extra = sorted(keys - mine)
                if extra and not missing:
                    raise ValueError(f"{me}.load_state_dict: param group {g_index} of the state dict has "
                                     f"settings {extra} that {me} does not use; was it saved by another "
                                     "optimizer?")
            if missing:
                raise ValueError(f"{me}.load_state_dict: param group {g_index} of the state dict lacks the "
                                 f"settings {missing} of {me}; was it saved by another optimizer (e.g. "
                                 "torch.optim.SGD) or another integrator?")
            candidate = {k: v for k, v in saved.items() if k not in ("params", "param_names")}
            try:
                self._validate_group(candidate)
            except ValueError as exc:
                raise ValueError(f"{me}.load_state_dict: param group {g_index} of the state dict: {exc}") from None
            names = group.get("param_names") or saved.get("param_names")
            for index, (key, p) in enumerate(zip(saved["params"], group["params"])):
                id_map[key] = (p, step_label(p, names, g_index, index), g_index)
        for key, entry in state_dict["state"].items():
            if key not in id_map:
                continue  # torch keeps state of unknown ids as it is
            p, label, g_index = id_map[key]
            unknown = sorted(set(entry) - set(self._state_keys))
            if unknown:
                keeps = ", ".join(repr(k) for k in self._state_keys) or "nothing"
                raise ValueError(f"{me}.load_state_dict: the state of {label} (param group {g_index}) has "
                                 f"keys {unknown}, but {me} keeps {keeps}; was it saved by another optimizer?")
            for name, value in entry.items():
                if isinstance(value, Tensor) and value.shape != p.shape:
                    raise ValueError(f"{me}.load_state_dict: {name} of {label} (param group {g_index}) has "
                                     f"shape {tuple(value.shape)} in the state dict, but the parameter has shape "
                                     f"{tuple(p.shape)}; load a checkpoint of the same model")

    # -- copies -------------------------------------------------------------------
    #: Attributes that ``copy.deepcopy`` and ``pickle`` leave out: the kernels
    #: and noise buffers, rebuilt on the next step (the native kernel's table
    #: holds raw pointers into the original's tensors), and torch's hook
    #: registries, which torch's own ``__getstate__`` leaves out too.
    _transient: tuple[str, ...] = (
        "_kernels", "_noise_buffers", "_labels", "_dispatch",
        "_first_step_checked", "_checked_settings", "_optimizer_step_pre_hooks", "_optimizer_step_post_hooks",
        "_optimizer_state_dict_pre_hooks", "_optimizer_state_dict_post_hooks",
        "_optimizer_load_state_dict_pre_hooks", "_optimizer_load_state_dict_post_hooks",
    )

    def __getstate__(self) -> dict[str, Any]:
        """Everything a copy needs to continue exactly as this optimizer
        would (torch's own ``__getstate__`` keeps only ``defaults``, ``state``
        and ``param_groups``): settings, the seed, the generator states and
        any subclass state, less the caches in ``_transient``."""
        state = {k: v for k, v in self.__dict__.items() if k not in self._transient}
        state["_generators"] = {k: g.get_state() for k, g in self._generators.items()}
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        """Restore a copy made by :meth:`__getstate__` (also called by torch's
        ``load_state_dict`` with ``state`` and ``param_groups`` only)."""
        state = dict(state)
        generator_states = state.pop("_generators", None)
        super().__setstate__(state)
        if generator_states is not None:
            self._generators = {}
            for key, gen_state in generator_states.items():
                gen = torch.Generator(device=torch.device(key))
                gen.set_state(gen_state)
                self._generators[key] = gen

    # -- stepping -------------------------------------------------------------
    @staticmethod
    def force(p: Tensor, group: dict[str, Any]) -> Tensor:
        """``dataset_size * grad + weight_decay * w`` (gradient of the potential)."""
        grad = p.grad
        n = group.get("dataset_size")
        f = grad if n is None else grad * n
        wd = group.get("weight_decay", 0.0)
        if wd:
            f = f + wd * p
        return f

    @property
    def backend(self) -> str:
        """The backend switch: ``"auto"``, ``"reference"``, ``"eager"`` or ``"native"``
        (:mod:`holonomic.dynamics.kernels`); setting it takes effect at the next step."""
        return self.__dict__.get("_backend", "auto")

    @backend.setter
    def backend(self, value: str) -> None:
        self.__dict__["_backend"] = check_backend(value)
        self.__dict__.pop("_kernels", None)
        self.__dict__.pop("_dispatch", None)

    def scheme_for(self, group: dict[str, Any]) -> Scheme:  # pragma: no cover - abstract
        """The scheme table a param group runs."""
        raise NotImplementedError

    def settings_for(self, group: dict[str, Any]) -> Settings:  # pragma: no cover - abstract
        """The integrator settings of a param group (step, friction, temperature, ...)."""
        raise NotImplementedError

    @property
    def kernels(self) -> list[Kernel]:
        """The kernels a step may use, in order of preference (from :attr:`backend`;
        assign a list to pin kernels, e.g. in tests; the reference kernel is always
        added last)."""
        kernels = self.__dict__.get("_kernels")
        if kernels is None:
            kernels = self.__dict__["_kernels"] = kernels_for(check_backend(self.backend))
        return kernels

    @kernels.setter
    def kernels(self, value: list[Kernel]) -> None:
        self.__dict__.pop("_dispatch", None)
        value = list(value)
        if not value or value[-1].name != "reference":
            from holonomic.dynamics.kernels import ReferenceKernel

            value.append(ReferenceKernel())
        self.__dict__["_kernels"] = value

    @torch.compiler.disable(reason=NOT_TRACED)
    @torch.no_grad()
    def step(self, closure: Callable[[], Tensor] | None = None) -> Tensor | None:  # type: ignore[override]
        """Take one step using the gradients in ``.grad``.

        With ``retry_substeps`` set, a step whose projection failed is
        retried inside this call with more substeps (see
        :meth:`_take_step_with_retries`); schedulers and hooks see one step.

        Raises:
            IntegrationError: a non-finite gradient or a failed projection;
                nothing (weights, momenta, generator states) is changed.
            ValueError: a parameter was replaced in its module after this
                optimizer was built (nothing is changed).

        ``torch.compile`` does not trace a step (:data:`NOT_TRACED`): under
        ``torch.compile(optimizer.step)`` or a compiled training function the
        step runs eagerly (a graph break), with the same result; a compiled
        training function with ``fullgraph=True`` cannot contain it (torch raises).
        """
        check_not_replaced(self.param_groups)
        if not getattr(self, "_first_step_checked", False):
            from holonomic.distributed import on_first_step  # lazy: only runs checks under torch.distributed

            on_first_step(self)  # ranks agree (seed, weights), no FSDP shards; raises with nothing changed
            self._first_step_checked = True
        loss = None
        if closure is not None:
            with torch.enable_grad():
                loss = closure()
        self._check_step_inputs()
        self._take_step_with_retries()
        return loss

    def _check_step_inputs(self) -> None:
        """Refuse, before any work, group settings changed after construction
        to invalid values (the constructor's checks, run on a copy of each
        group) and momenta whose shape no longer matches their parameter
        (a parameter resized under the optimizer).

        Raises:
            ValueError: naming the param group and setting, or the parameter;
                nothing is changed.
        """
        checked = self.__dict__.setdefault("_checked_settings", {})
        for g_index, group in enumerate(self.param_groups):
            settings = {k: v for k, v in group.items() if k not in ("params", "param_names")}
            snapshot = _settings_snapshot(settings)
            if snapshot is not None and checked.get(g_index) == snapshot:
                self._check_momentum_shapes(g_index, group)  # settings as last validated
                continue
            stale = sorted(k for k in ("step", "friction") if k in settings)
            if stale:
                raise ValueError(f"param group {g_index}: {', '.join(repr(k) for k in stale)} set after "
                                 "construction would be ignored: the group holds SGD's 'lr' and 'momentum' "
                                 "(step and friction are converted when the group is added); set those "
                                 "instead; nothing was changed")
            if "lr" in settings:
                h = settings["lr"]
                if isinstance(h, Tensor):
                    h = h.item()
                if isinstance(h, (bool, str)) or not isinstance(h, (int, float)):
                    raise ValueError(f"param group {g_index}: 'lr' must be a real number, got {h!r}; "
                                     "nothing was changed")
                try:
                    h = float(h)
                except (TypeError, ValueError):
                    raise ValueError(f"param group {g_index}: 'lr' must be a real number, got {h!r}") from None
                if not h >= 0 or math.isinf(h):
                    raise ValueError(f"param group {g_index}: 'lr' must be >= 0 and finite, got {h!r}")
                # lr = 0 is a valid state (a schedule that decays to zero: nothing moves),
                # though the constructor refuses it: validate the other settings with lr 1.
                settings["lr"] = h if h > 0 else 1.0
            try:
                self._validate_group(settings)
            except (ValueError, KeyError) as exc:
                raise ValueError(f"param group {g_index}: {exc} (changed after construction?); nothing "
                                 "was changed") from None
            if snapshot is not None:
                checked[g_index] = snapshot
            self._check_momentum_shapes(g_index, group)

    def _check_momentum_shapes(self, g_index: int, group: dict[str, Any]) -> None:
        """Refuse a momentum whose shape differs from its parameter's (resized)."""
        names = group.get("param_names")
        for index, p in enumerate(group["params"]):
            momentum = self.state[p].get("momentum") if p in self.state else None
            if momentum is not None and momentum.shape != p.shape:
                label = step_label(p, names, g_index, index)
                raise ValueError(
                    f"{label} (param group {g_index}) has shape {tuple(p.shape)} but its momentum has shape "
                    f"{tuple(momentum.shape)}: the parameter was resized after the optimizer took steps; "
                    "nothing was changed. Build a new optimizer for the new shapes.")

    def _take_step(self) -> None:
        """One step from the gradients in ``.grad``: inputs in parameter order (the
        noise drawn here, in that order), one kernel per parameter, one transaction."""
        transaction = Transaction(self._generators, self.generator)
        try:
            inputs, assignment = self._step_inputs(transaction)
        except BaseException:
            transaction.rollback()
            raise
        kernels = self.kernels
        self.last_info = run_step(inputs, assignment, kernels[-1], transaction=transaction,
                                  group_states=self.group_states, store_momentum=self._store_momentum)

    def _store_momentum(self, p: Tensor, momentum: Tensor | None) -> None:
        if momentum is not None:
            self.state[p]["momentum"] = momentum

    def _step_inputs(self, transaction: Transaction) -> tuple[list[StepInput], list[Kernel]]:
        """Each moving parameter's :class:`StepInput` and the kernel that computes it."""
        kernels = self.kernels
        reference = kernels[-1]
        buffers = self.__dict__.get("_noise_buffers")
        if buffers is None:
            buffers = self.__dict__["_noise_buffers"] = NoiseBuffers()
        own_force = type(self).force is HolonomicIntegrator.force
        labels = self.__dict__.setdefault("_labels", {})
        dispatch = self.__dict__.setdefault("_dispatch", {})
        inputs: list[StepInput] = []
        assignment: list[Kernel] = []
        seen: set[int] = set()
        for g_index, group in enumerate(self.param_groups):
            lr = group["lr"]
            if not lr >= 0:
                raise ValueError(f"param group {g_index}: lr must be >= 0, got {lr!r}")
            if lr == 0:  # e.g. a schedule that decays to zero: nothing moves
                continue
            scheme = self.scheme_for(group)
            settings = self.settings_for(group)
            draws = scheme.noise_draws(settings)
            group_level = scheme.group_level
            cached = dispatch.get(g_index)
            if cached is None or cached[0] is not scheme or cached[1] != settings:
                cached = dispatch[g_index] = (scheme, settings, {})
            settings = cached[1]  # the same object while unchanged: kernels' caches compare it by identity first
            chosen = cached[2]  # per parameter: (constraint, dtype, device, layout, kernel), for these settings
            names = group.get("param_names")
            names_key = tuple(names) if names else None
            scale = group.get("dataset_size")
            scale = 1.0 if scale is None else float(scale)
            decay = float(group.get("weight_decay", 0.0))
            for index, p in enumerate(group["params"]):
                if p.grad is None:
                    continue
                if p.grad.is_sparse:
                    raise ValueError("sparse gradients are not supported; use a dense nn.Embedding")
                geometry = constraint_of(p) or UNCONSTRAINED
                momentum = self.state[p].get("momentum") if scheme.momentum and p in self.state else None
                generator = transaction.generator(p.device) if draws else None
                if not draws:
                    noise: tuple[Tensor, ...] = ()
                elif id(p) in seen:  # listed twice: its own noise, and the reference kernel
                    noise = tuple(torch.randn(p.shape, generator=generator, dtype=p.dtype, device=p.device)
                                  for _ in range(draws))
                else:
                    noise = tuple(buffers.draw(p, j, generator) for j in range(draws))
                grad, g_scale, g_decay = (p.grad, scale, decay) if own_force else (self.force(p, group), 1.0, 0.0)
                key = (g_index, index, id(p), names_key)
                label = labels.get(key)
                if label is None:
                    label = labels[key] = step_label(p, names, g_index, index)
                inputs.append(StepInput(p, label, g_index, index, p.detach(), grad,
                                        g_scale, g_decay, momentum, noise, geometry, settings, scheme))
                if group_level or id(p) in seen:
                    assignment.append(reference)
                else:
                    layout = layout_of(p, grad, momentum)
                    entry = chosen.get(id(p))
                    if (entry is None or entry[0] is not geometry or entry[3] != layout or entry[1] != p.dtype
                            or entry[2] != p.device):
                        kernel = next(k for k in kernels if k.supports(
                            scheme, settings, geometry, p.dtype, p.device, layout))
                        entry = chosen[id(p)] = (geometry, p.dtype, p.device, layout, kernel)
                    assignment.append(entry[4])
                seen.add(id(p))
        return inputs, assignment

    def _take_step_with_retries(self) -> None:
        r""":meth:`_take_step`, retried with more substeps where a projection failed.

        Without ``retry_substeps`` this is :meth:`_take_step`.  With it, when
        the step raises :class:`IntegrationError` with reason
        ``"projection failed"`` in param group ``g`` (never for a non-finite
        gradient), the transaction has changed nothing (weights, momenta,
        generator states), so the step is taken again from the same state
        with the same noise, with group ``g``'s ``substeps`` multiplied by
        ``k = 2, 4, 8, ...`` (doubling, capped at ``retry_substeps``)::

            k_g = 1 for every group
            loop:  take the step with substeps_g * k_g
                   success -> done
                   projection failed in group g:
                       k_g = retry_substeps -> raise (saying so)
                       else k_g <- min(2 k_g, retry_substeps)

        A retried step with factor ``k`` is exactly the step that an optimizer
        built with ``substeps * k`` for that group would take from the same
        state and generator state.  The groups' ``substeps`` are restored
        afterwards; ``last_info.retried_substeps`` records ``{g: k_g}`` and
        ``retried_steps`` counts the steps that needed a retry.
        """
        limit = getattr(self, "retry_substeps", None)
        if limit is None:
            self._take_step()
            return
        factors: dict[int, int] = {}
        original: dict[int, int] = {}
        try:
            while True:
                try:
                    self._take_step()
                    break
                except IntegrationError as err:
                    g = err.group
                    if err.reason != "projection failed" or g is None:
                        raise
                    k = factors.get(g, 1)
                    if k >= limit:
                        raise IntegrationError(
                            f"{err} The step was retried with up to {k} times more substeps in param group "
                            f"{g} (retry_substeps={limit}); a larger retry_substeps or a smaller step may "
                            "help.", parameter=err.parameter, reason=err.reason, group=g) from err
                    group = self.param_groups[g]
                    original.setdefault(g, group.get("substeps", 1))
                    factors[g] = min(2 * k, limit)
                    group["substeps"] = original[g] * factors[g]
        finally:
            for g, substeps in original.items():
                self.param_groups[g]["substeps"] = substeps
        if factors:
            self.retried_steps = getattr(self, "retried_steps", 0) + 1
            if self.last_info is not None:
                self.last_info.retried_substeps = dict(factors)
