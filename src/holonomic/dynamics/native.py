r"""Native CPU kernel of the compiled BAOAB step (``Langevin``'s default on the CPU).

On the CPU, ``Langevin`` (unless ``compiled=False``) runs the step of
fixed-norm and unconstrained parameters in a small C++ kernel
(``baoab_kernel.cpp``, shipped with the package) instead of the eager fast
path or a ``torch.compile`` function.  The arithmetic is the
same closed form (:func:`holonomic.dynamics.fast.sphere_baoab_coefficients`);
the Gram entries and the per-vector coefficients are computed in double
precision for float32 parameters as well.  The kernel makes two passes over
memory in one OpenMP parallel region:

1. per constrained vector (row, column or whole tensor) the Gram entries of
   ``w``, ``q = m - h scale g`` (and the noise), the coefficients, the
   kinetic energy and a validity flag; per chunk of an unconstrained
   parameter its new values, checked and not stored;
2. only if every flag holds, the new positions and momenta, written in place.

So a step reads the weights, momenta and gradients twice and writes weights
and momenta once (6 reads and 2 writes per number; the three foreach
operations of ``torch.optim.SGD(momentum, foreach=True)`` make about 5 and 3),
and it costs one call from Python, with no guard checks or buffer
allocations around it (the ``torch.compile`` function spent about 0.4 ms per
call on those on a 2-core machine, against 1 ms for the whole SGD step of the
benchmark MLP).  If a flag fails nothing is written, the generators are
restored and the eager path runs the step or raises the documented error,
as for the ``torch.compile`` function.

**Building.**  The kernel is compiled at first use with the C++ compiler
named by ``$CXX``, else the first of ``c++``, ``g++``, ``clang++`` on the
``PATH`` (about two seconds), with ``-O3 -march=native`` and OpenMP where the
compiler accepts them, and kept in ``$HOLONOMIC_CACHE_DIR`` (default
``~/.cache/holonomic``) under a name that hashes the source, the compiler,
its flags and this CPU's model and feature flags, so that a home directory
shared by different machines never loads code built for another CPU.  Set
``HOLONOMIC_NATIVE=0`` to skip it.  When it cannot be built (no compiler, a
read-only file system and no temporary directory, ...) the default optimizer
silently takes the eager fast path, and one with ``compiled=True`` warns once
and uses the ``torch.compile`` function.

**Threads.**  The kernel runs on ``torch.get_num_threads()`` OpenMP threads
and runs serially for steps of fewer than 32768 numbers, where starting the
threads costs more than it saves.
"""

from __future__ import annotations

import ctypes
import hashlib
import os
import platform
import shutil
import subprocess
import tempfile
import threading
from functools import lru_cache
from pathlib import Path
from typing import TYPE_CHECKING, Any

import torch
from torch import Tensor

from holonomic.dynamics.base import step_label
from holonomic.dynamics.fast import _noise, _vectors
from holonomic.dynamics.operators import ou_coefficients
from holonomic.dynamics.settings import integrator_step_and_friction
from holonomic.geometry import FixedNorm

if TYPE_CHECKING:  # pragma: no cover
    from holonomic.dynamics.langevin import Langevin

__all__ = ["native_kernel", "NativeBuildError"]

_SOURCE = Path(__file__).with_name("baoab_kernel.cpp")
_LOCK = threading.Lock()
_ABI_VERSION = 1
_PARALLEL_MIN = 32768
_DTYPES = {torch.float32: "holonomic_baoab_float", torch.float64: "holonomic_baoab_double"}


class NativeBuildError(RuntimeError):
    """The native kernel could not be built or loaded here."""


class _Param(ctypes.Structure):
    """Mirror of ``struct Param`` in ``baoab_kernel.cpp`` (checked at load)."""

    _fields_ = [("w", ctypes.c_void_p), ("m", ctypes.c_void_p), ("g", ctypes.c_void_p), ("x", ctypes.c_void_p),
                ("rows", ctypes.c_int64), ("len", ctypes.c_int64), ("row_stride", ctypes.c_int64),
                ("elem_stride", ctypes.c_int64), ("sphere", ctypes.c_int64),
                ("h", ctypes.c_double), ("decay", ctypes.c_double), ("sigma", ctypes.c_double),
                ("scale", ctypes.c_double), ("wd", ctypes.c_double), ("r2", ctypes.c_double)]


def _compiler() -> str:
    named = os.environ.get("CXX")
    if named:
        return named
    for candidate in ("c++", "g++", "clang++"):
        found = shutil.which(candidate)
        if found:
            return found
    raise NativeBuildError("no C++ compiler found: install g++ or clang++, or name one in $CXX")


def _cpu_identity() -> str:
    """Model and feature flags of this CPU (Linux), else what ``platform`` knows."""
    try:
        text = Path("/proc/cpuinfo").read_text()
    except OSError:
        text = ""
    keys = ("model name", "flags", "Features", "CPU implementer", "CPU part")
    lines = [line for line in text.splitlines() if line.split(":")[0].strip() in keys]
    return "\n".join(sorted(set(lines))) or f"{platform.machine()} {platform.processor()}"


def _cache_dir() -> Path:
    root = os.environ.get("HOLONOMIC_CACHE_DIR")
    if root:
        return Path(root)
    xdg = os.environ.get("XDG_CACHE_HOME")
    try:
        base = Path(xdg) if xdg else Path.home() / ".cache"
    except RuntimeError as exc:  # no home directory: let the caller build in a temporary one
        raise OSError(f"no cache directory: {exc}") from exc
    return base / "holonomic"


_FLAG_SETS = (["-O3", "-march=native", "-fopenmp"], ["-O3", "-fopenmp"], ["-O3"])


def _build(compiler: str, directory: Path) -> Path:
    """Compile the kernel into ``directory`` (reusing an earlier build there)."""
    source = _SOURCE.read_bytes()
    try:
        version = subprocess.run([compiler, "--version"], capture_output=True, text=True, timeout=60).stdout
    except (OSError, subprocess.SubprocessError) as exc:
        raise NativeBuildError(f"cannot run the C++ compiler {compiler!r}: {exc}") from exc
    targets = []
    for flags in _FLAG_SETS:
        key = hashlib.sha256(b"\0".join([source, compiler.encode(), version.encode(), " ".join(flags).encode(),
                                         platform.machine().encode(), _cpu_identity().encode()])).hexdigest()
        targets.append((flags, directory / f"baoab-{key[:20]}.so"))
    for _, target in targets:  # an earlier build, perhaps with fewer flags
        if target.exists():
            return target
    directory.mkdir(parents=True, exist_ok=True)
    errors = []
    for flags, target in targets:
        # a unique scratch name in the cache itself: raises OSError there if it is not writable
        handle, name = tempfile.mkstemp(dir=directory, prefix=f".{target.name}.", suffix=".tmp")
        os.close(handle)
        scratch = Path(name)
        cmd = [compiler, *flags, "-std=c++17", "-shared", "-fPIC", str(_SOURCE), "-o", str(scratch)]
        try:
            done = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
        except (OSError, subprocess.SubprocessError) as exc:
            scratch.unlink(missing_ok=True)
            raise NativeBuildError(f"cannot run the C++ compiler {compiler!r}: {exc}") from exc
        if done.returncode == 0:
            os.replace(scratch, target)  # atomic: concurrent processes may build the same file
            return target
        scratch.unlink(missing_ok=True)
        errors.append(f"{' '.join(cmd)}\n{done.stderr.strip()[-2000:]}")
    raise NativeBuildError("the C++ compiler failed:\n" + "\n\n".join(errors))


def native_kernel() -> ctypes.CDLL:
    """The loaded kernel library (built on first use; see the module docstring).

    The outcome is kept for the process: after a failure every later call
    raises the same error at once (``native_kernel.cache_clear()`` retries).

    Raises:
        NativeBuildError: when it is switched off (``HOLONOMIC_NATIVE=0``) or
            cannot be built or loaded; the reason is in the message.
    """
    with _LOCK:  # one build at a time from the threads of this process
        outcome = _load()
    if isinstance(outcome, NativeBuildError):
        raise outcome
    return outcome


@lru_cache(maxsize=None)
def _load() -> ctypes.CDLL | NativeBuildError:
    if os.environ.get("HOLONOMIC_NATIVE", "1").strip() in ("0", "false", "no", "off"):
        return NativeBuildError("switched off by HOLONOMIC_NATIVE=0")
    try:
        compiler = _compiler()
        try:
            path = _build(compiler, _cache_dir())
        except OSError:  # the cache is not writable: build for this process only
            path = _build(compiler, Path(tempfile.mkdtemp(prefix="holonomic-")))
        lib = ctypes.CDLL(str(path))
        lib.holonomic_param_size.restype = ctypes.c_int64
        if lib.holonomic_abi_version() != _ABI_VERSION or lib.holonomic_param_size() != ctypes.sizeof(_Param):
            return NativeBuildError(f"the kernel at {path} does not match this version of holonomic; delete it")
        for name in _DTYPES.values():
            fn = getattr(lib, name)
            fn.argtypes = [ctypes.c_void_p, ctypes.c_int64, ctypes.c_void_p, ctypes.c_int64, ctypes.c_int64]
            fn.restype = ctypes.c_int
        return lib
    except NativeBuildError as exc:
        return exc
    except Exception as exc:  # anything else that stops the build must not stop training
        return NativeBuildError(f"{type(exc).__name__}: {exc}")


native_kernel.cache_clear = _load.cache_clear  # type: ignore[attr-defined]


def covers(items: list[tuple[Tensor, Any, dict[str, Any], tuple[int, int]]]) -> bool:
    """Whether the native kernel takes this step: CPU tensors of float32 or
    float64 (the compiled path's ``_collect`` checked the rest)."""
    p = items[0][0]
    return p.device.type == "cpu" and p.dtype in _DTYPES


def native_step(opt: "Langevin", items: list, fresh: dict[Tensor, Tensor]) -> tuple[bool, list[float], list]:
    """Run the kernel on ``items`` (as collected by the compiled path).

    Draws the noise in parameter order, allocates zero momenta of a first
    step into ``fresh`` (stored by the caller on success only), and returns
    ``(ok, kinetic energies, per-parameter labels)``, the labels as tuples
    ``(label, group, index, projection iterations, tangent dof)``; nothing
    was written when ``ok`` is false.  The kernel's argument table and the
    labels are kept between steps while every pointer, shape, constraint,
    position and group setting in them stays the same (after a step moved
    megabytes the caches are cold, and rebuilding them costs several times
    what it costs in a microbenchmark)."""
    key: list[Any] = []
    tensors = []
    for p, geometry, group, where in items:
        momentum = opt.state[p].get("momentum")
        if momentum is None:
            momentum = fresh[p] = torch.zeros_like(p, memory_format=torch.contiguous_format)
        noise = _noise(opt, p) if group["temperature"] > 0 else None
        tensors.append((p.grad, noise, momentum))
        names = group.get("param_names")
        key.append((p.data_ptr(), momentum.data_ptr(), noise is None, id(p), p.shape, geometry, where,
                    tuple(names) if names else None, group["lr"], group["momentum"], group["temperature"],
                    group["dataset_size"], group["weight_decay"]))
    cached = opt.__dict__.get("_native_table")
    if cached is None or cached[0] != key:
        numbers = sum(p.numel() for p, *_ in items)
        cached = opt.__dict__["_native_table"] = (
            key, _table(items, [m for *_, m in tensors]), (ctypes.c_double * len(items))(),
            getattr(native_kernel(), _DTYPES[items[0][0].dtype]), int(numbers >= _PARALLEL_MIN), step_labels(items))
    _, table, kinetic, fn, parallel, labels = cached
    for slot, (grad, noise, _) in zip(table, tensors):  # new tensors each step after zero_grad(set_to_none=True)
        slot.g = grad.data_ptr()
        slot.x = noise.data_ptr() if noise is not None else None
    ok = fn(table, len(items), kinetic, torch.get_num_threads(), parallel)
    if ok < 0:  # nothing was written
        raise MemoryError("the native BAOAB kernel could not allocate its per-row scratch")
    return bool(ok), list(kinetic), labels


def step_labels(items: list) -> list[tuple[str, int, int, int, int]]:
    """``(label, group, index, projection iterations, tangent dof)`` of each
    parameter of a compiled step (one projection for a fixed norm, none for a
    free parameter)."""
    return [(step_label(p, group.get("param_names"), g_index, index), g_index, index,
             int(isinstance(geometry, FixedNorm)), geometry.tangent_dof(p.shape))
            for p, geometry, group, (g_index, index) in items]


def _table(items: list, momenta: list[Tensor]) -> ctypes.Array:
    """The kernel's argument table (one ``_Param`` per parameter); the
    gradient and noise pointers are set by the caller on every step."""
    table = (_Param * len(items))()
    for slot, (p, geometry, group, _), momentum in zip(table, items, momenta):
        h, gamma = integrator_step_and_friction(group)
        decay, sigma = ou_coefficients(gamma, h, group["temperature"])
        if isinstance(geometry, FixedNorm):
            view, dim = _vectors(p, geometry.over)
            rows, length = (view.shape[0], view.shape[1]) if dim == 1 else (view.shape[1], view.shape[0])
            row_stride, elem_stride = (view.shape[1], 1) if dim == 1 else (1, view.shape[1])
            sphere, r2 = 1, geometry.radius ** 2
        else:
            rows, length, row_stride, elem_stride, sphere, r2 = 1, p.numel(), 0, 1, 0, 1.0
        slot.w, slot.m = p.data_ptr(), momentum.data_ptr()
        slot.rows, slot.len, slot.row_stride, slot.elem_stride, slot.sphere = rows, length, row_stride, elem_stride, sphere
        scale = group["dataset_size"] if group["dataset_size"] is not None else 1.0
        slot.h, slot.decay, slot.sigma, slot.scale, slot.wd, slot.r2 = (
            h, decay, sigma, scale, group["weight_decay"], r2)
    return table
