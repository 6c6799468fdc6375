"""Kernels: the implementations of a step, behind one protocol.

=======================  ===========================================================
``reference``            any scheme, constraint, dtype, device (the operators, one by one)
``fused``                BAOAB-RATTLE, ``FixedNorm`` and free parameters, eager torch
``square-orthonormal``   BAOAB-RATTLE, square ``Orthonormal`` parameters, closed form
``native``               BAOAB-RATTLE, ``FixedNorm`` and free parameters, C++ on the CPU
=======================  ===========================================================

Each parameter runs on the first kernel of its backend's list that supports
it (:func:`kernels_for`); the step transaction (:mod:`holonomic.dynamics.transaction`)
runs them all within one commit.
"""

from __future__ import annotations

import warnings

from holonomic.dynamics.kernels.fused import FusedKernel
from holonomic.dynamics.kernels.native import NativeBuildError, NativeKernel, native_available, native_kernel
from holonomic.dynamics.kernels.protocol import Kernel, Layout, layout_of
from holonomic.dynamics.kernels.reference import ReferenceKernel
from holonomic.dynamics.kernels.square_orthonormal import SquareOrthonormalKernel

__all__ = [
    "BACKENDS",
    "Kernel",
    "Layout",
    "layout_of",
    "kernels_for",
    "ReferenceKernel",
    "FusedKernel",
    "SquareOrthonormalKernel",
    "NativeKernel",
    "NativeBuildError",
    "native_kernel",
    "native_available",
    "check_backend",
]

#: The backend switch of the integrators: which kernels a step may use.
BACKENDS = ("auto", "reference", "eager", "native")


def check_backend(value: object) -> str:
    if value not in BACKENDS:
        raise ValueError(f"backend must be one of {BACKENDS} ('auto': the native C++ kernel where it can be "
                         f"built, else the eager kernels), got {value!r}")
    return str(value)


def kernels_for(backend: str, *, warn: bool = True) -> list[Kernel]:
    """Kernels in order of preference for ``backend`` (fresh objects: a kernel may
    keep caches of its own, so each optimizer has its own).

    ``"reference"``: the reference kernel only.  ``"eager"``: the square-orthonormal
    and fused kernels, then the reference.  ``"native"``: the native kernel first
    (a warning, once per optimizer, when it cannot be built here), then as
    ``"eager"``.  ``"auto"``: as ``"native"`` without the warning.
    """
    check_backend(backend)
    reference = ReferenceKernel()
    if backend == "reference":
        return [reference]
    eager: list[Kernel] = [SquareOrthonormalKernel(), FusedKernel(), reference]
    if backend == "eager":
        return eager
    try:
        native_kernel()
    except NativeBuildError as exc:
        if backend == "native" and warn and "HOLONOMIC_NATIVE=0" not in str(exc):
            warnings.warn(f"backend='native': the native CPU kernel is not available ({exc}); using the eager "
                          "kernels", RuntimeWarning, stacklevel=4)
        return eager
    return [NativeKernel(), *eager]
