r"""Optional compiled BAOAB step for fixed-norm and unconstrained parameters.

``Langevin`` runs the whole step of every parameter in one compiled function
unless ``compiled=False``.  **On the CPU** (float32 and float64) that is a
small C++ kernel built at first use with the system compiler
(:mod:`holonomic.dynamics.native`); this is the default (``compiled=None``).
**Elsewhere**, or where that kernel cannot be built, ``compiled=True`` uses
:func:`baoab_kernel` compiled with ``torch.compile`` (TorchInductor),
described below, and the default uses the eager fast path.  Both compute the arithmetic of the eager
fast path (:mod:`holonomic.dynamics.fast`): per vector the Gram entries of
``w``, ``q = p - h f`` (and the noise ``xi``), the closed-form SHAKE/RATTLE
coefficients, and one write of the new position and momentum.  The
reductions take one pass over ``w``, ``p``, ``.grad`` and the writes
another, so the step reads and writes memory about as often as
``torch.optim.SGD`` does; the eager fast path needs about twice as many
passes (one per torch operation).  The native kernel also avoids the
``torch.compile`` function's fixed cost per call (about 0.4 ms of guards,
buffer allocations and views on a 2-core machine, against 1 ms for SGD's
whole step on the benchmark MLP) and its compile time (tens of seconds,
against about two seconds to build the kernel once).

**Transactions without an early synchronisation.**  The function computes one
flag for the whole step (finite Gram entries and coefficients, real SHAKE
roots, finite unconstrained results) and writes every tensor as
``where(ok, new, old)``.  After it returns, the flag is read once; if it is
false nothing has changed, the generators are restored and the caller runs the
eager path, which raises the documented error (or takes the step when the
alarm was false).

**When it applies.**  All or nothing: every parameter with a gradient must be
dense and contiguous, listed once, of one floating dtype and one device, with
``FixedNorm`` or no constraint, in groups with ``projection="rattle"``,
``substeps=1`` and a positive step, and the optimizer must not override
``force``.  Otherwise (one ``Orthonormal`` parameter, a geodesic group, ...)
the whole step goes to the eager fast path, which handles everything.

**Costs.**  The first step compiles (tens of seconds on a small CPU; a C++
compiler must be installed), and so does every new structure: another set
of parameters with gradients or of their shapes, dtype, device, a switch
between zero and positive temperature.  Shapes are compiled statically: with
symbolic sizes (``dynamic=True``) the compiler chooses which loops to run in
parallel from the sizes it first sees, so a kernel first compiled for a tiny
model ran the benchmark MLP with serial loops, 2.6-2.7x SGD's time against
1.7-1.9x when compiled for it (two runs each, one process per order, fresh
caches); static shapes gave 1.7-2.1x in either order.  Step sizes, decays,
noise scales and weight decays are passed as a tensor, so learning-rate
schedules do not recompile.
All optimizers share one compiled function, and torch keeps a limited number
of compiled versions of it (``torch._dynamo.config.recompile_limit``, 8 by
default); past that limit, as for any failure to compile, the optimizer warns
once and stays on the eager path.  Errors that are not failures to compile
are raised after the generators are restored; an error inside the compiled
function (say, running out of device memory) could in principle come after
some of its writes.

The step function itself is plain torch code: :func:`baoab_kernel` run
eagerly gives the same numbers, and ``tests/speed`` checks both against the
plain reference path in float64.
"""

from __future__ import annotations

import warnings
from functools import lru_cache
from typing import TYPE_CHECKING, Any, Callable, Sequence

import torch
from torch import Tensor

from holonomic.dynamics import native
from holonomic.dynamics.base import ParameterStepInfo, StepInfo
from holonomic.dynamics.fast import (
    _abandon,
    _geometry_eligible,
    _group_eligible,
    _tensors_eligible,
    _noise,
    _vectors,
    scratch_buffer,
    sphere_baoab_coefficients,
)
from holonomic.dynamics.operators import ou_coefficients
from holonomic.dynamics.settings import integrator_step_and_friction
from holonomic.geometry import UNCONSTRAINED, FixedNorm, Orthonormal, constraint_of

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
                gram, r2.to(gram["ww"].dtype).expand_as(gram["ww"]), step=h, decay=decay, sigma=sigma)
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
    left out there.  This also lets the compiler fuse the row reductions
    into one pass: with the term, one measurement here (three FixedNorm
    matrices of the benchmark MLP, float32) gave 6.8 ms per step against
    1.8 ms without."""
    if kind == "sphere":
        return m - (h * scale) * g
    return m - h * (scale * g + wd * w)


#: Inductor options for the kernel only.  By default the C++ backend runs
#: every loop of 1024 or more elements in parallel (OpenMP), so the per-vector
#: arithmetic between the two passes (closed form, flags, kinetic energies;
#: one element per row or per bias entry) became about a dozen parallel loops,
#: each ending in a barrier that costs more than the loop.  A larger minimum
#: chunk keeps loops under 2 * 4096 elements serial; the passes over the
#: weight matrices stay parallel.  (One measurement, MLP 784-1024-1024-10,
#: float32, 2 threads: 15 parallel regions became 4, and the kernel call
#: 5-9 % faster.)
_INDUCTOR_OPTIONS = {"cpp.min_chunk_size": 4096}


@lru_cache(maxsize=None)
def _compiled_kernel() -> Callable[..., tuple[Tensor, Tensor]]:
    """The compiled kernel, shared by all optimizers (made on first use)."""
    return torch.compile(baoab_kernel, dynamic=False, fullgraph=True, options=_INDUCTOR_OPTIONS)


@lru_cache(maxsize=None)
def _compile_errors() -> tuple[type[BaseException], ...]:
    """Exception types that mean "could not compile" (private torch modules,
    looked up defensively: their names move between releases); looked up once."""
    found: list[type[BaseException]] = []
    for module, names in (("torch._dynamo.exc", ("TorchDynamoException", "FailOnRecompileLimitHit")),
                          ("torch._inductor.exc", ("InductorError", "CppCompileError"))):
        try:
            mod = __import__(module, fromlist=list(names))
        except ImportError:  # pragma: no cover - depends on the torch build
            continue
        found += [getattr(mod, n) for n in names if isinstance(getattr(mod, n, None), type)]
    return tuple(found)


def compiled_baoab_step(opt: "Langevin", kernel: Callable[..., tuple[Tensor, Tensor]] | None = None) -> bool:
    """Take one step of ``opt`` with the compiled kernel; ``False`` (nothing
    changed, generators restored) when it does not apply or a check failed.

    On the CPU the native kernel (:mod:`holonomic.dynamics.native`) takes the
    step when it can be built; otherwise the ``torch.compile`` function.
    ``kernel`` replaces the compiled function (tests pass :func:`baoab_kernel`
    to run the same code eagerly; the native kernel is not used then).
    Errors other than failures to compile are re-raised after the generators
    are restored."""
    items = _collect(opt)
    if items is None:
        return False
    if not items:
        opt.last_info = StepInfo(())
        return True
    if kernel is None and _native_available(opt, items):
        return _native_step(opt, items)
    if kernel is None and getattr(opt, "compiled", None) is None:
        return False  # automatic: no torch.compile (slow to compile), the eager path instead
    saved = {k: g.get_state() for k, g in opt._generators.items()}
    try:
        if kernel is None:
            try:
                kernel = _compiled_kernel()
            except Exception as exc:  # torch.compile itself unavailable
                return _give_up(opt, saved, exc)
        fresh: dict[Tensor, Tensor] = {}
        ws, ms, gs, xs, kinds, table = _arguments(opt, items, fresh)
        try:
            ok, kinetic = kernel(ws, ms, gs, xs, table, kinds)
        except _compile_errors() as exc:
            return _give_up(opt, saved, exc)
        if not bool(ok):  # the one host synchronisation; nothing was written
            return _abandon(opt, saved)
    except BaseException:
        _abandon(opt, saved)
        raise
    _commit(opt, items, fresh, kinetic.unbind())
    return True


def _native_available(opt: "Langevin", items: list) -> bool:
    """The native kernel covers these parameters and could be built (with
    ``compiled=True``, a failure to build is warned about once per optimizer;
    by default it is silent and the step runs eagerly)."""
    if not native.covers(items) or opt.__dict__.get("_native_failed"):
        return False
    try:
        native.native_kernel()
    except native.NativeBuildError as exc:
        opt._native_failed = True
        if getattr(opt, "compiled", None) is True and "HOLONOMIC_NATIVE=0" not in str(exc):
            warnings.warn(f"Langevin(compiled=True): the native CPU kernel is not available ({exc}); "
                          "using torch.compile instead", RuntimeWarning, stacklevel=5)
        return False
    return True


def _native_step(opt: "Langevin", items: list) -> bool:
    saved = {k: g.get_state() for k, g in opt._generators.items()}
    fresh: dict[Tensor, Tensor] = {}
    try:
        ok, kinetic, labels = native.native_step(opt, items, fresh)
    except BaseException:
        _abandon(opt, saved)
        raise
    if not ok:  # nothing was written
        return _abandon(opt, saved)
    for p, momentum in fresh.items():
        opt.state[p]["momentum"] = momentum
    dtype = items[0][0].dtype
    opt.last_info = StepInfo(lambda: _infos(labels, torch.tensor(kinetic, dtype=dtype).unbind()))
    return True


def _infos(labels: list, kinetic: Sequence[Tensor]) -> tuple[ParameterStepInfo, ...]:
    return tuple(ParameterStepInfo(label, g_index, index, iterations, energy, dof)
                 for (label, g_index, index, iterations, dof), energy in zip(labels, kinetic))


def _commit(opt: "Langevin", items: list, fresh: dict[Tensor, Tensor], kinetic: Sequence[Tensor]) -> None:
    """Store the momenta of a first step and the step's diagnostics."""
    for p, momentum in fresh.items():
        opt.state[p]["momentum"] = momentum
    opt.last_info = StepInfo(_infos(native.step_labels(items), kinetic))


def _give_up(opt: "Langevin", saved: dict[str, Tensor], exc: BaseException) -> bool:
    opt._compile_failed = True
    warnings.warn(f"Langevin(compiled=True): could not compile the step ({type(exc).__name__}: {exc}); "
                  "using the eager path from now on", RuntimeWarning, stacklevel=4)
    return _abandon(opt, saved)


def _arguments(opt: "Langevin", items: list, fresh: dict[Tensor, Tensor]) -> tuple[
    list[Tensor], list[Tensor], list[Tensor], list[Tensor], tuple[str, ...], Tensor
]:
    """The kernel's arguments; draws the noise (in parameter order, as the
    eager paths do) and allocates zero momenta for a first step into ``fresh``."""
    ws: list[Tensor] = []
    ms: list[Tensor] = []
    gs: list[Tensor] = []
    xs: list[Tensor] = []
    kinds: list[str] = []
    rows = []
    noisy = any(group["temperature"] > 0 for _, _, group, _ in items)
    for p, geometry, group, _ in items:
        h, gamma = integrator_step_and_friction(group)
        decay, sigma = ou_coefficients(gamma, h, group["temperature"])
        momentum = opt.state[p].get("momentum")
        if momentum is None:
            momentum = fresh[p] = torch.zeros_like(p, memory_format=torch.contiguous_format)
        if isinstance(geometry, FixedNorm):
            view = lambda t, over=geometry.over: _rows(t, over)  # noqa: E731
            kinds.append("sphere")
            r2 = geometry.radius ** 2
        else:
            view = lambda t: t  # noqa: E731
            kinds.append("free")
            r2 = 1.0
        ws.append(view(p.detach()))
        ms.append(view(momentum))
        gs.append(view(p.grad))
        if noisy:
            # a cold parameter in a step where others are hot reads zeros (never written)
            xs.append(view(_noise(opt, p) if group["temperature"] > 0 else scratch_buffer(opt, "zeros", p, 0.0)))
        scale = group["dataset_size"] if group["dataset_size"] is not None else 1.0
        rows.append((h, decay, sigma, scale, group["weight_decay"], r2))
    return ws, ms, gs, xs, tuple(kinds), _scalar_table(opt, rows, ws[0])


def _scalar_table(opt: "Langevin", rows: list[tuple[float, ...]], like: Tensor) -> Tensor:
    """The per-parameter scalars as a tensor on the parameters' device, in at
    least float32 (a float16 table would overflow at ``dataset_size`` 65520).
    Kept between steps while the values stay the same, so that a CUDA step
    does not wait for a host-to-device copy."""
    dtype = torch.promote_types(like.dtype, torch.float32)
    key = (tuple(rows), dtype, like.device)
    cached = opt.__dict__.get("_scalar_table")
    if cached is None or cached[0] != key:
        cached = opt.__dict__["_scalar_table"] = (key, torch.tensor(rows, dtype=dtype, device=like.device))
    return cached[1]


def _rows(t: Tensor, over: str) -> Tensor:
    """2-D view of ``t`` with one constrained vector per row."""
    m, dim = _vectors(t, over)
    return m if dim == 1 else m.t()


def _collect(opt: "Langevin") -> list[tuple[Tensor, Any, dict[str, Any], tuple[int, int]]] | None:
    """The parameters of the step, or ``None`` if the compiled kernel does not
    cover one of them (module docstring)."""
    items = []
    seen: set[int] = set()
    first = None
    state = opt.state
    for g_index, group in enumerate(opt.param_groups):
        if not group["lr"] > 0:
            return None
        eligible = _group_eligible(group)
        for index, p in enumerate(group["params"]):
            if p.grad is None:
                continue
            if not eligible:
                return None
            if id(p) in seen:  # listed twice: the second update would see the first's writes
                return None
            seen.add(id(p))
            geometry = constraint_of(p) or UNCONSTRAINED
            # the eager fast path's conditions, less the square orthonormal case it adds
            if isinstance(geometry, Orthonormal) or not (_tensors_eligible(p, state[p])
                                                         and _geometry_eligible(p, geometry)):
                return None
            if first is None:
                first = p
            elif p.dtype != first.dtype or p.device != first.device:
                return None
            items.append((p, geometry, group, (g_index, index)))
    return items
