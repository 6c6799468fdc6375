r"""The audit: per-step checks that constraints hold and that the dynamics run
at the temperature asked for.

See :class:`Audit`.
"""

from __future__ import annotations

import math
import os
import warnings
from collections import Counter
from dataclasses import asdict, dataclass
from typing import Any

import torch
from torch import Tensor, nn

from holonomic.audit.records import SCHEMA, SCHEMA_VERSION, JsonLinesWriter
from holonomic.audit.stats import (
    constraint_violations,
    default_residual_tolerance,
    default_tangency_tolerance,
    kinetic_fluctuation,
    kinetic_interval,
)
from holonomic.dynamics import Langevin
from holonomic.dynamics.settings import integrator_step_and_friction
from holonomic.geometry import UNCONSTRAINED, constraint_of
from holonomic.geometry.base import check_positive

__all__ = ["Audit", "AuditWarning", "AuditThresholds"]


class AuditWarning(UserWarning):
    """Issued during training the first time an audit alarm fires for a given
    kind and parameter (or group); later ones are counted in the records and
    the summary."""


@dataclass(frozen=True)
class AuditThresholds:
    """Alarm thresholds (see :class:`Audit` for their meaning).

    ``None`` tolerances mean "by the parameter's dtype": ``100 eps`` for
    positions, ``sqrt(eps)`` for the (relative) momentum tangency.
    """

    residual_tolerance: float | None = None
    tangency_tolerance: float | None = None
    kinetic_sigmas: float = 5.0
    iteration_limit: int | None = None
    burn_in: float = 10.0

    def __post_init__(self) -> None:
        for name in ("residual_tolerance", "tangency_tolerance"):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name, check_positive(name, value))
        object.__setattr__(self, "kinetic_sigmas", check_positive("kinetic_sigmas", self.kinetic_sigmas))
        object.__setattr__(self, "burn_in", check_positive("burn_in", self.burn_in, allow_zero=True))
        limit = self.iteration_limit
        if limit is not None and (isinstance(limit, bool) or not isinstance(limit, int) or limit < 1):
            raise ValueError(f"iteration_limit must be a positive integer or None, got {limit!r}")


class Audit:
    r"""Check constraints and kinetic temperature during training; write JSON Lines.

    Call it after each ``optimizer.step()`` (``audit()`` or
    ``audit.on_step(model, optimizer, step)``), or let the optimizer call it
    (``audit.attach()`` registers a step post-hook).  Every ``every``-th
    call writes one record; the calls in between only accumulate the
    projection-iteration counts of the integrator (no host synchronisation).

    Each record holds, **per constrained parameter** (``W`` the weight,
    ``P = optimizer.state[W]["momentum"]`` for the holonomic integrators,
    ``g = W.grad``, ``Pi_W`` the tangent projection):

    ============================  ==========================================
    ``residual_max``/``_rms``     max / RMS of the relative violations
                                  (``|w_i|/r - 1`` per row for FixedNorm,
                                  entries of ``X^T X/s^2 - I`` for
                                  Orthonormal); max = ``constraint.residual``
    ``tangency_residual``         ``constraint.tangent_residual(W, P)``
    ``iterations_mean``/``_max``  SHAKE iterations over the steps since the
                                  last record (``optimizer.last_info``)
    ``kinetic_temperature``       ``T_kin = |P|^2 / N_f``, ``N_f`` the tangent
                                  degrees of freedom (docs/math.md 3)
    ``kinetic_z``                 ``(T_kin - T) / (T sqrt(2 / N_f))``
    ``grad_norm_tangent/normal``  ``|Pi_W g|``, ``|g - Pi_W g|``
    ``weight_norm``, ``row_norm_*``  Frobenius norm; min/mean/max row norm
    ============================  ==========================================

    and **per param group**: step ``h`` and friction ``gamma`` (from the
    group's ``lr`` and ``momentum``: ``Langevin.step_and_friction``; for
    other optimizers ``h`` is their ``lr``), target ``T``, thermostat time ``sum gamma h`` seen so far, and the
    pooled kinetic temperature ``sum |P|^2 / sum N_f`` over all of the
    group's parameters (unconstrained ones count ``numel`` each).

    **Alarms** (a :class:`AuditWarning` the first time per kind and place,
    an entry in the record's ``"alarms"``, a line in :meth:`summary`):

    * ``residual``: ``residual_max > residual_tolerance`` (default ``100 eps``
      of the parameter's dtype);
    * ``tangency``: ``tangency_residual > tangency_tolerance`` (default
      ``sqrt(eps)``);
    * ``iterations``: SHAKE iterations reached ``iteration_limit`` (default:
      the constraint's ``max_iterations``, where it has one);
    * ``kinetic``: ``T_kin`` outside the central interval of its equilibrium
      law with the coverage of ``+-kinetic_sigmas`` normal standard
      deviations (default 5).  The law is ``T chi2(N_f) / N_f``: standard
      deviation ``T sqrt(2/N_f)``.

    What the kinetic alarm assumes: unit mass (as in the integrators),
    equilibrium (positions and momenta at the target law), and a momentum
    taken at a point of the step where its law is exact.  The state holds
    the momentum after the O and the second A step, before the closing half
    kick; for BAOAB that momentum has exactly variance ``T`` on a harmonic
    potential at any stable step (a closed-form calculation: the stationary
    covariance of the linear BAOAB map), whereas the momentum after the
    closing half kick is low by the factor ``1 - h^2 omega^2 / 4``.  For
    other potentials and on curved constraint sets a bias of higher order in
    ``h`` may remain; the tests measure it on a von Mises-Fisher target.
    Checks are armed after ``burn_in`` friction times (``sum gamma h >=
    burn_in``; the momentum starts at zero), skipped at ``T = 0`` (recorded
    as ``"skipped: temperature 0"``), at zero friction, and for optimizers
    without holonomic momenta (AdamW, SGD, OverdampedLangevin: drift only).
    One record is one draw; a run of many records tests many times, so the
    default of 5 sigma keeps false alarms rare (two-sided rate 5.7e-7 per
    check); averaging records (the summary does) tightens the estimate by the
    square root of the effective number of records, not of the records.
    Large layers have small ``sqrt(2/N_f)``, so systematic departures --
    minibatch gradient noise heating the momenta, a step too large -- fire
    the alarm even when they are a few percent: the dynamics are then not at
    the asked temperature.

    Args:
        model: the module whose constrained parameters are audited (may be
            ``None`` until :meth:`on_step` supplies it).
        optimizer: any ``torch.optim.Optimizer``; the holonomic integrators
            add iterations and kinetic temperatures.  ``None``: drift only.
        every: record every ``every``-th call (>= 1).
        path: JSON Lines file to write (a header line, then one record per
            line, flushed), or ``None`` to keep records in memory only.
        residual_tolerance, tangency_tolerance, kinetic_sigmas,
        iteration_limit, burn_in: alarm thresholds (above).
        warn: issue :class:`AuditWarning` on alarms.

    Attributes:
        records: the records written so far (plain dicts, as in the file).
        alarms: every alarm raised so far (dicts with ``kind``, ``where``,
            ``step``, ``value``, ``threshold``, ``message``).
    """

    name = "audit"

    def __init__(
        self,
        model: nn.Module | None = None,
        optimizer: torch.optim.Optimizer | None = None,
        every: int = 1,
        path: str | os.PathLike[str] | None = None,
        *,
        residual_tolerance: float | None = None,
        tangency_tolerance: float | None = None,
        kinetic_sigmas: float = 5.0,
        iteration_limit: int | None = None,
        burn_in: float = 10.0,
        warn: bool = True,
    ) -> None:
        if model is not None and not isinstance(model, nn.Module):
            raise ValueError(f"model must be a torch.nn.Module or None, got {type(model).__name__}")
        if optimizer is not None and not isinstance(optimizer, torch.optim.Optimizer):
            raise ValueError(f"optimizer must be a torch.optim.Optimizer or None, got {type(optimizer).__name__}")
        if isinstance(every, bool) or not isinstance(every, int) or every < 1:
            raise ValueError(f"every must be a positive integer (record every n-th step), got {every!r}")
        self.model = model
        self.optimizer = optimizer
        self.every = every
        self.path = None if path is None else str(path)
        self.thresholds = AuditThresholds(residual_tolerance, tangency_tolerance, kinetic_sigmas,
                                          iteration_limit, burn_in)
        self.warn = bool(warn)
        self.records: list[dict[str, Any]] = []
        self.alarms: list[dict[str, Any]] = []
        self._alarm_counts: Counter[tuple[str, str]] = Counter()
        self._writer: JsonLinesWriter | None = None
        self._calls = 0
        self._last_info: Any = None
        self._iterations: dict[tuple[int, int], list[int]] = {}  # (group, index) -> [sum, max, count]
        self._thermostat_time: dict[int, float] = {}

    # -- wiring ------------------------------------------------------------------
    def attach(self) -> Any:
        """Register :meth:`__call__` as a step post-hook of the optimizer and
        return the removable handle."""
        if self.optimizer is None:
            raise ValueError("attach() needs the optimizer: pass Audit(model, optimizer, ...)")
        return self.optimizer.register_step_post_hook(lambda opt, args, kwargs: self())

    def on_step(self, model: nn.Module, optimizer: torch.optim.Optimizer, step: int) -> None:
        """Hook form (``on_step(model, optimizer, step)``): binds the model and
        optimizer on first use, then audits ``step``."""
        if self.model is None:
            self.model = model
        if self.optimizer is None:
            self.optimizer = optimizer
        self(step)

    def __enter__(self) -> "Audit":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def close(self) -> None:
        """Close the JSON Lines file (records stay in memory)."""
        if self._writer is not None:
            self._writer.close()

    # -- per step ----------------------------------------------------------------
    def _holonomic(self) -> bool:
        return isinstance(self.optimizer, Langevin)

    def _accumulate(self) -> None:
        opt = self.optimizer
        info = getattr(opt, "last_info", None)
        if info is None or info is self._last_info:
            return
        self._last_info = info
        for item in info.parameters:
            acc = self._iterations.setdefault((item.group, item.index), [0, 0, 0])
            acc[0] += item.projection_iterations
            acc[1] = max(acc[1], item.projection_iterations)
            acc[2] += 1
        if self._holonomic():
            for g_index, group in enumerate(opt.param_groups):
                h, gamma = integrator_step_and_friction(group)
                inc = 0.0 if h == 0 else (math.inf if gamma == math.inf else gamma * h)
                self._thermostat_time[g_index] = self._thermostat_time.get(g_index, 0.0) + inc

    @torch.no_grad()
    def __call__(self, step: int | None = None) -> dict[str, Any] | None:
        """Audit the state after one optimizer step; return the record if one
        was written (every ``every``-th call), else ``None``."""
        if self.model is None:
            raise ValueError("Audit has no model: pass Audit(model, ...) or call on_step(model, optimizer, step)")
        self._calls += 1
        step = self._calls if step is None else int(step)
        self._accumulate()
        if self._calls % self.every:
            return None
        record = self._record(step)
        self.records.append(record)
        if self.path is not None:
            if self._writer is None:
                self._writer = JsonLinesWriter(self.path)
                self._writer.write(self._header())
            self._writer.write(record)
        return record

    def _header(self) -> dict[str, Any]:
        return {"type": "header", "schema": SCHEMA, "version": SCHEMA_VERSION,
                "optimizer": type(self.optimizer).__name__ if self.optimizer is not None else None,
                "every": self.every, "thresholds": asdict(self.thresholds)}

    def _locations(self) -> dict[int, tuple[int, int]]:
        loc: dict[int, tuple[int, int]] = {}
        if self.optimizer is not None:
            for g_index, group in enumerate(self.optimizer.param_groups):
                for index, p in enumerate(group["params"]):
                    loc[id(p)] = (g_index, index)
        return loc

    def _kinetic_status(self, group_index: int | None) -> tuple[str, float | None]:
        """(check status, target temperature) for a param group."""
        if group_index is None or not self._holonomic():
            return "skipped: no holonomic momentum (drift only)", None
        group = self.optimizer.param_groups[group_index]
        temperature = float(group["temperature"])
        if temperature == 0.0:
            return "skipped: temperature 0", temperature
        if integrator_step_and_friction(group)[1] == 0.0:
            return "skipped: friction 0 (no thermostat)", temperature
        if self._thermostat_time.get(group_index, 0.0) < self.thresholds.burn_in:
            return "skipped: burn-in", temperature
        return "checked", temperature

    def _record(self, step: int) -> dict[str, Any]:
        opt = self.optimizer
        holonomic = self._holonomic()
        loc = self._locations()
        scalars: list[Tensor] = []

        def slot(t: Tensor | None) -> int | None:
            if t is None:
                return None
            scalars.append(t.reshape(()).to(torch.float64))
            return len(scalars) - 1

        entries = []
        group_sums: dict[int, list[Any]] = {}  # group -> [slots of |P|^2, dof]
        if holonomic:
            for g_index, group in enumerate(opt.param_groups):
                for p in group["params"]:
                    mom = opt.state.get(p, {}).get("momentum")
                    if mom is not None:
                        acc = group_sums.setdefault(g_index, [[], 0])
                        acc[0].append(slot((mom * mom).sum()))
                        acc[1] += (constraint_of(p) or UNCONSTRAINED).tangent_dof(p.shape)
        for name, p in self.model.named_parameters():
            c = constraint_of(p)
            if c is None:
                continue
            w = p.detach()
            group_index, index = loc.get(id(p), (None, None))
            viol = constraint_violations(c, w)
            mom = opt.state.get(p, {}).get("momentum") if holonomic and group_index is not None else None
            grad = p.grad
            grad_t = c.tangent(w, grad) if grad is not None else None
            rows = w.reshape(w.shape[0], -1).norm(dim=1) if w.dim() > 0 else w.abs().reshape(1)
            acc = self._iterations.pop((group_index, index), None) if group_index is not None else None
            entries.append({
                "name": name, "p": p, "constraint": repr(c), "group": group_index,
                "shape": list(w.shape), "tangent_dof": c.tangent_dof(w.shape),
                "iterations": acc,
                "slots": {
                    "residual_max": slot(viol.abs().max()),
                    "residual_rms": slot(viol.pow(2).mean().sqrt()),
                    "tangency_residual": slot(c.tangent_residual(w, mom)) if mom is not None else None,
                    "momentum_sq": slot((mom * mom).sum()) if mom is not None else None,
                    "grad_norm_tangent": slot(grad_t.norm()) if grad_t is not None else None,
                    "grad_norm_normal": slot((grad - grad_t).norm()) if grad_t is not None else None,
                    "weight_norm": slot(w.norm()),
                    "row_norm_min": slot(rows.min()),
                    "row_norm_mean": slot(rows.mean()),
                    "row_norm_max": slot(rows.max()),
                },
            })
        values = _fetch(scalars)
        alarms: list[dict[str, Any]] = []
        params_out = []
        for e in entries:
            v = {k: (values[s] if s is not None else None) for k, s in e["slots"].items()}
            p = e["p"]
            out: dict[str, Any] = {"name": e["name"], "constraint": e["constraint"], "group": e["group"],
                                   "shape": e["shape"], "tangent_dof": e["tangent_dof"]}
            out["residual_max"] = v["residual_max"]
            out["residual_rms"] = v["residual_rms"]
            out["tangency_residual"] = v["tangency_residual"]
            acc = e["iterations"]
            out["iterations_mean"] = acc[0] / acc[2] if acc else None
            out["iterations_max"] = acc[1] if acc else None
            status, temperature = self._kinetic_status(e["group"])
            if v["momentum_sq"] is not None:
                self._kinetic(out, v["momentum_sq"], e["tangent_dof"], temperature, status, e["name"],
                              step, alarms)
            else:
                out.update(kinetic_temperature=None, kinetic_z=None, kinetic_interval=None,
                           kinetic_check="skipped: no holonomic momentum (drift only)")
            for key in ("grad_norm_tangent", "grad_norm_normal", "weight_norm", "row_norm_min",
                        "row_norm_mean", "row_norm_max"):
                out[key] = v[key]
            self._position_alarms(out, p, constraint_of(p), step, alarms)
            params_out.append(out)
        groups_out = []
        if opt is not None:
            for g_index, group in enumerate(opt.param_groups):
                h = gamma = None
                if holonomic:
                    h, gamma = integrator_step_and_friction(group)
                elif "lr" in group:
                    h = float(group["lr"])
                g_out: dict[str, Any] = {
                    "group": g_index, "optimizer": type(opt).__name__,
                    "step_size": h,
                    "temperature": float(group["temperature"]) if "temperature" in group else None,
                    "friction": gamma,
                    "thermostat_time": self._thermostat_time.get(g_index) if holonomic else None,
                }
                status, temperature = self._kinetic_status(g_index if holonomic else None)
                sums = group_sums.get(g_index)
                if sums is not None and sums[1] > 0:
                    g_out["tangent_dof"] = sums[1]
                    self._kinetic(g_out, sum(values[s] for s in sums[0]), sums[1], temperature, status,
                                  f"group {g_index}", step, alarms)
                else:
                    g_out.update(tangent_dof=None, kinetic_temperature=None, kinetic_z=None, kinetic_interval=None,
                                 kinetic_check=status if not holonomic else "skipped: no momentum yet")
                groups_out.append(g_out)
        for alarm in alarms:
            self._raise(alarm)
        return {"type": "record", "schema": SCHEMA, "version": SCHEMA_VERSION, "step": step,
                "parameters": params_out, "groups": groups_out, "alarms": alarms}

    def _kinetic(self, out: dict[str, Any], momentum_sq: float, dof: int, temperature: float | None,
                 status: str, where: str, step: int, alarms: list[dict[str, Any]]) -> None:
        t_kin = momentum_sq / dof
        out["kinetic_temperature"] = t_kin
        out["kinetic_z"] = ((t_kin - temperature) / kinetic_fluctuation(temperature, dof)
                            if temperature else None)
        out["kinetic_check"] = status
        out["kinetic_interval"] = None
        if status != "checked":
            return
        lo, hi = kinetic_interval(temperature, dof, self.thresholds.kinetic_sigmas)
        out["kinetic_interval"] = [lo, hi]
        if not lo <= t_kin <= hi:
            alarms.append(_alarm(
                "kinetic", where, step, t_kin, [lo, hi],
                f"kinetic temperature of {where} is {t_kin:.6g} at step {step}, outside "
                f"[{lo:.6g}, {hi:.6g}] (target {temperature:g} +- {self.thresholds.kinetic_sigmas:g} sd, "
                f"{dof} tangent dof, z = {out['kinetic_z']:.3g}); the dynamics are not at the target "
                "temperature (step too large, gradient noise, or not yet equilibrated: raise burn_in)"))

    def _position_alarms(self, out: dict[str, Any], p: Tensor, c: Any, step: int,
                         alarms: list[dict[str, Any]]) -> None:
        name = out["name"]
        th = self.thresholds
        tol = th.residual_tolerance if th.residual_tolerance is not None else default_residual_tolerance(p.dtype)
        if not out["residual_max"] <= tol:  # NaN alarms too
            alarms.append(_alarm(
                "residual", name, step, out["residual_max"], tol,
                f"{name} ({out['constraint']}) is off its constraint set by {out['residual_max']:.3g} "
                f"(relative) at step {step}, above {tol:.3g}; whatever moved it does not keep the "
                "constraint (an optimizer such as AdamW, a weight average, a replaced parameter) -- use a "
                "holonomic integrator, call holonomic.repair(model), or read an averaged model through "
                "holonomic.project_average"))
        tan = out["tangency_residual"]
        ttol = th.tangency_tolerance if th.tangency_tolerance is not None else default_tangency_tolerance(p.dtype)
        if tan is not None and not tan <= ttol:
            alarms.append(_alarm(
                "tangency", name, step, tan, ttol,
                f"momentum of {name} has a relative normal component {tan:.3g} at step {step}, above "
                f"{ttol:.3g}; the momentum is not tangent to the constraint set"))
        limit = th.iteration_limit if th.iteration_limit is not None else getattr(c, "max_iterations", None)
        it = out["iterations_max"]
        if limit is not None and it is not None and it >= limit:
            alarms.append(_alarm(
                "iterations", name, step, it, limit,
                f"SHAKE for {name} needed {it} iterations (limit {limit}) in the steps up to {step}; "
                "lower the step or the temperature, or use projection='geodesic'"))

    def _raise(self, alarm: dict[str, Any]) -> None:
        key = (alarm["kind"], alarm["where"])
        self._alarm_counts[key] += 1
        self.alarms.append(alarm)
        if self.warn and self._alarm_counts[key] == 1:
            warnings.warn(AuditWarning(alarm["message"]), stacklevel=4)

    # -- results -----------------------------------------------------------------
    @property
    def ok(self) -> bool:
        """``True`` while no alarm has fired."""
        return not self.alarms

    def summary(self) -> dict[str, Any]:
        """A small JSON-ready digest: number of records, the largest residual
        per parameter, alarm counts per kind and place, the first alarm
        messages, and ``ok``."""
        residual_max: dict[str, float] = {}
        for rec in self.records:
            for p in rec["parameters"]:
                value = p["residual_max"]
                prev = residual_max.get(p["name"])
                residual_max[p["name"]] = value if prev is None or not value <= prev else prev
        return {
            "records": len(self.records),
            "last_step": self.records[-1]["step"] if self.records else None,
            "path": self.path,
            "residual_max": residual_max,
            "alarm_count": len(self.alarms),
            "alarms": {f"{kind} {where}": n for (kind, where), n in sorted(self._alarm_counts.items())},
            "first_alarms": [a["message"] for a in self.alarms[:5]],
            "ok": self.ok,
        }


def _alarm(kind: str, where: str, step: int, value: float, threshold: Any, message: str) -> dict[str, Any]:
    return {"kind": kind, "where": where, "step": step, "value": value, "threshold": threshold,
            "message": message}


def _fetch(scalars: list[Tensor]) -> list[float]:
    """All 0-d tensors to Python floats with one transfer per device."""
    if not scalars:
        return []
    by_device: dict[torch.device, list[int]] = {}
    for i, t in enumerate(scalars):
        by_device.setdefault(t.device, []).append(i)
    out = [0.0] * len(scalars)
    for idx in by_device.values():
        for i, value in zip(idx, torch.stack([scalars[i] for i in idx]).tolist()):
            out[i] = value
    return out
