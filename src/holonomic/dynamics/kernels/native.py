r"""Native CPU kernel: BAOAB-RATTLE for fixed-norm and unconstrained parameters in C++.

The same closed form as :mod:`holonomic.dynamics.kernels.fused`, in a small C++
library (``baoab_kernel.cpp``, shipped with the package) loaded with ctypes;
Gram entries and coefficients are accumulated in double precision for float32
parameters too.  A step is two calls: ``check`` reads the weights, momenta,
gradients (and noise) once and computes the per-vector coefficients, kinetic
energies and ok flags, writing nothing else; ``write`` reads them again and
writes the new weights and momenta in place.  When this kernel's parameters
are the whole step (``run(..., commit=True)``, see
:func:`holonomic.dynamics.transaction.run_step`) both passes are one call that
writes only if every flag holds; otherwise the transaction calls ``write`` at
commit.  Both passes run on ``torch.get_num_threads()`` OpenMP threads (serially
below 32768 numbers).

**Building.**  Compiled at first use with ``$CXX`` or the first of ``c++``,
``g++``, ``clang++`` (about two seconds), cached in ``$HOLONOMIC_CACHE_DIR``
(default ``~/.cache/holonomic``) under a hash of the source, compiler, flags
and CPU.  ``HOLONOMIC_NATIVE=0`` switches it off.  When it cannot be built the
backend ``"auto"`` silently uses the eager kernels (``"native"`` warns once).
Performance notes: ``docs/kernels.md``.
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
from typing import Mapping, Sequence

import torch
from torch import Tensor

from holonomic.dynamics.kernels.fused import constrained_vectors
from holonomic.dynamics.kernels.protocol import Layout, is_plain_baoab
from holonomic.dynamics.operators import ou_coefficients
from holonomic.dynamics.transaction import GroupResult, StepInput, StepResult
from holonomic.geometry import FixedNorm, Unconstrained
from holonomic.geometry.base import Constraint

__all__ = ["NativeKernel", "native_kernel", "NativeBuildError"]

_SOURCE = Path(__file__).with_name("baoab_kernel.cpp")
_LOCK = threading.Lock()
_ABI_VERSION = 3
_PARALLEL_MIN = 32768
_DTYPES = {torch.float32: "float", torch.float64: "double"}


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
        lib.holonomic_items.argtypes = [ctypes.c_void_p, ctypes.c_int64]
        lib.holonomic_items.restype = ctypes.c_int64
        for name in _DTYPES.values():
            check = getattr(lib, f"holonomic_step_{name}")
            check.argtypes = [ctypes.c_void_p, ctypes.c_int64, ctypes.c_void_p, ctypes.c_void_p, ctypes.c_void_p,
                              ctypes.c_int64, ctypes.c_int64, ctypes.c_int64]
            check.restype = ctypes.c_int
            write = getattr(lib, f"holonomic_write_{name}")
            write.argtypes = [ctypes.c_void_p, ctypes.c_int64, ctypes.c_void_p, ctypes.c_void_p, ctypes.c_int64,
                              ctypes.c_int64]
            write.restype = ctypes.c_int
        return lib
    except NativeBuildError as exc:
        return exc
    except Exception as exc:  # anything else that stops the build must not stop training
        return NativeBuildError(f"{type(exc).__name__}: {exc}")


native_kernel.cache_clear = _load.cache_clear  # type: ignore[attr-defined]


def native_available() -> bool:
    """Whether the kernel is built (or can be built) here."""
    try:
        native_kernel()
    except NativeBuildError:
        return False
    return True


class NativeKernel:
    """BAOAB-RATTLE for ``FixedNorm`` and unconstrained parameters on the CPU in
    float32 or float64 (dense layout), in C++.

    The argument table is kept between steps while every pointer, shape,
    constraint and setting in it stays the same (a cache of this kernel
    object, which belongs to one optimizer and is not copied with it).

    ``can_commit``: :meth:`run` accepts ``commit=True`` (see
    :class:`holonomic.dynamics.kernels.protocol.Kernel`)."""

    name = "native"
    can_commit = True

    def __init__(self) -> None:
        self._cache: tuple | None = None

    def supports(self, scheme: object, settings: object, constraint: Constraint, dtype: torch.dtype,
                 device: torch.device, layout: Layout) -> bool:
        return (device.type == "cpu" and dtype in _DTYPES and layout.dense and is_plain_baoab(scheme, settings)
                and (isinstance(constraint, Unconstrained)
                     or (isinstance(constraint, FixedNorm) and len(layout.shape) >= 1)))

    def run(self, inputs: Sequence[StepInput], group_states: Mapping[int, Mapping[str, Tensor]], *,
            commit: bool = False) -> tuple[list[StepResult | None], dict[int, GroupResult]]:
        """Compute every input (none is declined).  ``commit=True``: ``inputs`` are the
        whole step, so when every flag holds the new values are written in the same
        native call (the results' ``apply`` then only returns them); when a flag fails
        nothing is written, as with ``commit=False``."""
        results: list[StepResult | None] = [None] * len(inputs)
        first = inputs[0].position.dtype if inputs else None
        if all(u.position.dtype == first for u in inputs):  # the usual case: one dtype, one table
            self._run(first, list(inputs), list(range(len(inputs))), results, commit)
            return results, {}
        by_dtype: dict[torch.dtype, list[int]] = {}
        for i, u in enumerate(inputs):
            by_dtype.setdefault(u.position.dtype, []).append(i)
        for dtype, members in by_dtype.items():  # several tables: their flags are not all the step's
            self._run(dtype, [inputs[i] for i in members], members, results, False)
        return results, {}

    def _run(self, dtype: torch.dtype, items: list[StepInput], members: list[int], results: list,
             commit: bool) -> None:
        momenta = [u.momentum if u.momentum is not None
                   else torch.zeros_like(u.position, memory_format=torch.contiguous_format) for u in items]
        key = [(u.position.data_ptr(), m.data_ptr(), not u.noise, u.position.shape, u.constraint, u.settings,
                u.grad_scale, u.weight_decay) for u, m in zip(items, momenta)]
        cached = self._cache
        if cached is None or cached[0] != key or cached[1] != dtype:
            lib = native_kernel()
            table = _table(items, momenta)
            n_items = lib.holonomic_items(table, len(items))
            n = len(items)
            cached = self._cache = (key, dtype, table, (ctypes.c_double * (6 * max(n_items, 1)))(),
                                    int(sum(u.position.numel() for u in items) >= _PARALLEL_MIN),
                                    getattr(lib, f"holonomic_step_{_DTYPES[dtype]}"),
                                    getattr(lib, f"holonomic_write_{_DTYPES[dtype]}"),
                                    # flags and energies: read within the step that fills them
                                    (ctypes.c_int8 * n)(), (ctypes.c_double * n)())
        _, _, table, coef, parallel, check, write, ok, kinetic = cached
        for slot, u in zip(table, items):  # new tensors each step after zero_grad(set_to_none=True)
            slot.g = u.grad.data_ptr()
            slot.x = u.noise[0].data_ptr() if u.noise else None
        n = len(items)
        threads = torch.get_num_threads()
        status = check(table, n, coef, ok, kinetic, threads, parallel, int(commit))
        if status < 0:
            raise MemoryError("the native BAOAB kernel could not allocate its per-row scratch")
        # keep the inputs alive until the write (the table holds raw pointers into them)
        held = (items, momenta)
        written = [held] if status == 2 else []  # 2: every flag held and the step was written

        def write_all() -> None:
            if not written:
                if write(table, n, coef, ok, threads, parallel) < 0:
                    raise MemoryError("the native BAOAB kernel could not allocate its work list")
                written.append(held)

        for k, (i, m) in enumerate(zip(members, momenta)):
            def apply(m=m, k=k) -> tuple[Tensor, float]:
                write_all()
                return m, kinetic[k]

            results[i] = StepResult(bool(ok[k]), 1 if isinstance(items[k].constraint, FixedNorm) else 0, apply,
                                    self.name)


def _table(items: list[StepInput], momenta: list[Tensor]) -> ctypes.Array:
    """The kernel's argument table (one ``_Param`` per parameter); the
    gradient and noise pointers are set by the caller on every step."""
    table = (_Param * len(items))()
    for slot, u, momentum in zip(table, items, momenta):
        s = u.settings
        decay, sigma = ou_coefficients(s.friction, s.step, s.temperature)
        if isinstance(u.constraint, FixedNorm):
            view, dim = constrained_vectors(u.position, u.constraint.over)
            rows, length = (view.shape[0], view.shape[1]) if dim == 1 else (view.shape[1], view.shape[0])
            row_stride, elem_stride = (view.shape[1], 1) if dim == 1 else (1, view.shape[1])
            sphere, r2 = 1, u.constraint.radius ** 2
        else:
            rows, length, row_stride, elem_stride, sphere, r2 = 1, u.position.numel(), 0, 1, 0, 1.0
        slot.w, slot.m = u.position.data_ptr(), momentum.data_ptr()
        slot.rows, slot.len, slot.row_stride, slot.elem_stride, slot.sphere = rows, length, row_stride, elem_stride, sphere
        slot.h, slot.decay, slot.sigma, slot.scale, slot.wd, slot.r2 = (
            s.step, decay, sigma, u.grad_scale, u.weight_decay, r2)
    return table
