r"""Optional compiled BAOAB step for fixed-norm and unconstrained parameters.

``Langevin(..., compiled=True)`` runs the whole step of every parameter in one
function compiled with ``torch.compile`` (TorchInductor).  The arithmetic is
that of the eager fast path (:mod:`holonomic.dynamics.fast`): per vector the
Gram entries of ``w``, ``q = p - h f`` (and the noise ``xi``), the closed-form
SHAKE/RATTLE coefficients, and one write of the new position and momentum.
The compiler fuses the reductions into one pass over ``w``, ``p``, ``.grad``
and the writes into another, so the step reads and writes memory about as
often as ``torch.optim.SGD`` does; the eager fast path needs about twice as
many passes (one per torch operation).

**Transactions without an early synchronisation.**  The function computes one
flag for the whole step (finite Gram entries and coefficients, real SHAKE
roots, finite unconstrained results) and writes every tensor as
``where(ok, new, old)``.  After it returns, the flag is read once; if it is
false nothing has changed, the generators are restored and the caller runs the
eager path, which raises the documented error (or takes the step when the
alarm was false).

**When it applies.**  Every parameter with a gradient must be dense and
contiguous, of one floating dtype and one device, with ``FixedNorm`` or no
constraint, in groups with ``projection="rattle"``, ``substeps=1`` and a
positive step.  Otherwise (an ``Orthonormal`` parameter, a geodesic group, ...)
the step goes to the eager fast path, which handles everything.

**Costs.**  The first step compiles (tens of seconds on a small CPU; a C++
compiler must be installed), and so does every new structure: another number
of parameters, dtype, device, or switching between zero and positive
temperature.  Shapes are compiled dynamically and step sizes, decays, noise
scales and weight decays are passed as tensors, so learning-rate schedules
and new layer sizes do not recompile.  All optimizers share one compiled
function, and torch keeps a limited number of compiled versions of it
(``torch._dynamo.config.recompile_limit``); past that limit torch logs a
warning and runs the function uncompiled, which is slower than the eager
fast path, so raise the limit if many differently built models step in one
process.  If compilation fails, a warning says why and the optimizer stays
on the eager path.

The step function itself is plain torch code: :func:`baoab_kernel` run
eagerly gives the same numbers, and ``tests/speed`` checks both against the
plain reference path in float64.
"""

from __future__ import annotations

import math
import warnings
from typing import TYPE_CHECKING, Any, Callable, Sequence

import torch
from torch import Tensor

from holonomic.dynamics.base import ParameterStepInfo, StepInfo, step_label
from holonomic.dynamics.fast import _abandon, _noise, _vectors, sphere_baoab_coefficients
from holonomic.geometry import UNCONSTRAINED, FixedNorm, Unconstrained, constraint_of

if TYPE_CHECKING:  # pragma: no cover
    from holonomic.dynamics.langevin import Langevin

__all__ = ["baoab_kernel", "compiled_baoab_step"]

# Columns of the per-parameter scalar table passed to the kernel.
_H, _DECAY, _SIGMA, _SCALE, _WD, _R2 = range(6)


def baoab_kernel(
    ws: Sequence[Tensor],
    ms: Sequence[Tensor],
    gs: Sequence[Tensor],
    xs: Sequence[Tensor],
    scalars: Tensor,
    kinds: tuple[str, ...],
) -> tuple[Tensor, Tensor]:
    r"""One BAOAB-RATTLE step of several parameters, written in place only if
    the whole step is valid.

    Args:
        ws: positions, 2-D views with one constrained vector per row
            (``kind == "sphere"``) or any shape (``kind == "free"``).
        ms: momenta (same views; zeros before the first step).
        gs: gradients (same views).
        xs: standard normal noise (same views), empty at ``T = 0``.
        scalars: ``(len(ws), 6)`` table of ``h, e^{-gamma h}, sigma,
            dataset_size, weight_decay, r^2`` per parameter, with
            ``sigma = sqrt(T (1 - e^{-2 gamma h}))``.
        kinds: ``"sphere"`` or ``"free"`` per parameter.

    The force is ``f = dataset_size * g + weight_decay * w`` and
    ``q = m - h f`` (without the weight-decay term on spheres, where the
    tangent projection removes it exactly).  Spheres: the closed form of
    :func:`holonomic.dynamics.fast.sphere_baoab_coefficients`.  Free
    parameters: ``w1 = w + s q``, ``p = e^{-gamma h} q + sigma xi``,
    ``w2 = w1 + s p`` with ``s = h/2``.

    Returns:
        ``(ok, kinetic)``: the 0-d flag of the whole step and the kinetic
        energy ``|p|^2 / 2`` of each parameter's new momentum.  If ``ok`` is
        false, no tensor was changed.
    """
    noisy = len(xs) > 0
    oks: list[Tensor] = []
    plans: list[tuple[Any, ...]] = []
    kinetic: list[Tensor] = []
    for i, (w, m, g, kind) in enumerate(zip(ws, ms, gs, kinds)):
        h, decay, sigma, scale, wd, r2 = (scalars[i, k] for k in range(6))
        q = _kicked(w, m, g, h, scale, wd, kind)
        x = xs[i] if noisy else None
        if kind == "sphere":
            gram = {"ww": (w * w).sum(1), "wq": (w * q).sum(1), "qq": (q * q).sum(1)}
            if x is not None:
                gram.update(wx=(w * x).sum(1), qx=(q * x).sum(1), xx=(x * x).sum(1))
            new_w, new_p, p_norm2, ok = sphere_baoab_coefficients(
                gram, r2.expand_as(gram["ww"]), step=h, decay=decay, sigma=sigma)
            plans.append((new_w, new_p))
            kinetic.append(0.5 * p_norm2.sum())
        else:
            s = 0.5 * h
            p = decay * q if x is None else decay * q + sigma * x
            w2 = (w + s * q) + s * p
            ok = torch.isfinite(p).all() & torch.isfinite(w2).all()
            plans.append((w2, p))
            kinetic.append(0.5 * (p * p).sum())
        oks.append(ok)
    ok_all = torch.stack(oks).all()
    for i, (w, m, g, kind) in enumerate(zip(ws, ms, gs, kinds)):
        if kind == "sphere":
            q = _kicked(w, m, g, scalars[i, _H], scalars[i, _SCALE], scalars[i, _WD], kind)
            (a_w, a_q, a_x), (c_w, c_q, c_x) = plans[i]
            new_w = a_w[:, None] * w + a_q[:, None] * q
            new_m = c_w[:, None] * w + c_q[:, None] * q
            if noisy:
                new_w = new_w + a_x[:, None] * xs[i]
                new_m = new_m + c_x[:, None] * xs[i]
        else:
            new_w, new_m = plans[i]
        m.copy_(torch.where(ok_all, new_m, m))
        w.copy_(torch.where(ok_all, new_w, w))
    return ok_all, torch.stack(kinetic)


def _kicked(w: Tensor, m: Tensor, g: Tensor, h: Tensor, scale: Tensor, wd: Tensor, kind: str) -> Tensor:
    """``q = m - h f`` with ``f = scale g + wd w``.  On a sphere ``wd w`` is
    normal to the sphere and the B projection removes it exactly, so it is
    left out there (which also lets the compiler fuse the row reductions
    into one pass; with it the compiled step was measured 3-4x slower)."""
    if kind == "sphere":
        return m - (h * scale) * g
    return m - h * (scale * g + wd * w)


_compiled: Callable[..., tuple[Tensor, Tensor]] | None = None


def _compiled_kernel() -> Callable[..., tuple[Tensor, Tensor]]:
    global _compiled
    if _compiled is None:
        _compiled = torch.compile(baoab_kernel, dynamic=True, fullgraph=True)
    return _compiled


def compiled_baoab_step(opt: "Langevin", kernel: Callable[..., tuple[Tensor, Tensor]] | None = None) -> bool:
    """Take one step of ``opt`` with the compiled kernel; ``False`` (nothing
    changed, generators restored) when it does not apply or a check failed.

    ``kernel`` replaces the compiled function (tests pass :func:`baoab_kernel`
    to run the same code eagerly)."""
    items = _collect(opt)
    if items is None:
        return False
    if not items:
        opt.last_info = StepInfo(())
        return True
    saved = {k: g.get_state() for k, g in opt._generators.items()}
    fresh: dict[Tensor, Tensor] = {}
    ws, ms, gs, xs, rows, kinds = [], [], [], [], [], []
    noisy = any(group["temperature"] > 0 for _, _, group, _ in items)
    for p, geometry, group, _ in items:
        h = group["lr"]
        gh = group["friction"] * h
        decay = math.exp(-gh)
        sigma = math.sqrt(group["temperature"] * -math.expm1(-2.0 * gh)) if group["temperature"] > 0 else 0.0
        momentum = opt.state[p].get("momentum")
        if momentum is None:
            momentum = fresh[p] = torch.zeros_like(p, memory_format=torch.contiguous_format)
        w = p.detach()
        if isinstance(geometry, FixedNorm):
            view = lambda t, over=geometry.over: _rows(t, over)  # noqa: E731
            kinds.append("sphere")
            r2 = geometry.radius ** 2
        else:
            view = lambda t: t  # noqa: E731
            kinds.append("free")
            r2 = 1.0
        ws.append(view(w))
        ms.append(view(momentum))
        gs.append(view(p.grad))
        if noisy:  # every parameter draws, in parameter order, as the eager paths do
            xs.append(view(_noise(opt, p)) if group["temperature"] > 0 else view(torch.zeros_like(p)))
        scale = group["dataset_size"] if group["dataset_size"] is not None else 1.0
        rows.append((h, decay, sigma, scale, group["weight_decay"], r2))
    scalars = torch.tensor(rows, dtype=ws[0].dtype, device=ws[0].device)
    if kernel is None:
        if opt.__dict__.get("_compile_failed"):
            return _abandon(opt, saved)
        try:
            kernel = _compiled_kernel()
            ok, kinetic = kernel(ws, ms, gs, xs, scalars, tuple(kinds))
        except Exception as exc:  # compilation failed (no C++ compiler, unsupported platform, ...)
            opt._compile_failed = True
            warnings.warn(f"Langevin(compiled=True): torch.compile failed ({type(exc).__name__}: {exc}); "
                          "using the eager fast path from now on", RuntimeWarning, stacklevel=3)
            return _abandon(opt, saved)
    else:
        ok, kinetic = kernel(ws, ms, gs, xs, scalars, tuple(kinds))
    if not bool(ok):  # the one host synchronisation; nothing was written
        return _abandon(opt, saved)
    for p, momentum in fresh.items():
        opt.state[p]["momentum"] = momentum
    infos = []
    for (p, geometry, group, (g_index, index)), kind, energy in zip(items, kinds, kinetic.unbind()):
        label = step_label(p, group.get("param_names"), g_index, index)
        infos.append(ParameterStepInfo(label, g_index, index, int(kind == "sphere"), energy,
                                       geometry.tangent_dof(p.shape)))
    opt.last_info = StepInfo(tuple(infos))
    return True


def _rows(t: Tensor, over: str) -> Tensor:
    """2-D view of ``t`` with one constrained vector per row."""
    m, dim = _vectors(t, over)
    return m if dim == 1 else m.t()


def _collect(opt: "Langevin") -> list[tuple[Tensor, Any, dict[str, Any], tuple[int, int]]] | None:
    """The parameters of the step, or ``None`` if the compiled kernel does not
    cover one of them (module docstring)."""
    items = []
    dtypes, devices = set(), set()
    for g_index, group in enumerate(opt.param_groups):
        if group["projection"] != "rattle" or group["substeps"] != 1 or not group["lr"] > 0:
            return None
        for index, p in enumerate(group["params"]):
            if p.grad is None:
                continue
            grad = p.grad
            if grad.is_sparse or not (p.is_floating_point() and p.is_contiguous() and grad.is_contiguous()):
                return None
            if grad.dtype != p.dtype:
                return None
            momentum = opt.state[p].get("momentum")
            if momentum is not None and not (momentum.is_contiguous() and momentum.dtype == p.dtype):
                return None
            geometry = constraint_of(p) or UNCONSTRAINED
            if not (isinstance(geometry, Unconstrained) or (isinstance(geometry, FixedNorm) and p.dim() >= 1)):
                return None
            dtypes.add(p.dtype)
            devices.add(p.device)
            items.append((p, geometry, group, (g_index, index)))
    if len(dtypes) > 1 or len(devices) > 1:
        return None
    return items
