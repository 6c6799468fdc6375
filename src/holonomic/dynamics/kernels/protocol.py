"""What a kernel is: the protocol every implementation of a step follows."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Protocol, Sequence, runtime_checkable

import torch
from torch import Tensor

from holonomic.dynamics.schemes import BAOAB
from holonomic.dynamics.transaction import GroupResult, StepInput, StepResult
from holonomic.geometry.base import HALF_DTYPES, Constraint

__all__ = ["Layout", "Kernel", "layout_of", "is_plain_baoab", "fusable_dtype"]


@dataclass(frozen=True)
class Layout:
    """Memory layout of one parameter's step inputs.

    ``dense``: weight, gradient and momentum (if any) are contiguous, of one
    dtype, shape and device (what the fused, native and closed-form kernels
    need to treat them as flat buffers)."""

    shape: tuple[int, ...]
    dense: bool


_LAYOUTS: dict[tuple[torch.Size, bool], Layout] = {}


def layout_of(p: Tensor, grad: Tensor, momentum: Tensor | None) -> Layout:
    """The :class:`Layout` of one parameter's step inputs (one shared object per shape and
    density: a step asks for it per parameter)."""
    dense = (p.is_contiguous() and grad.is_contiguous() and grad.dtype == p.dtype and grad.shape == p.shape
             and (momentum is None or (momentum.is_contiguous() and momentum.dtype == p.dtype
                                       and momentum.shape == p.shape and momentum.device == p.device)))
    key = (p.shape, dense)
    layout = _LAYOUTS.get(key)
    if layout is None:
        if len(_LAYOUTS) >= 4096:  # many shapes (e.g. a shape per step): keep the memory bounded
            _LAYOUTS.clear()
        layout = _LAYOUTS[key] = Layout(tuple(p.shape), dense)
    return layout


@runtime_checkable
class Kernel(Protocol):
    """One implementation of (part of) a step.

    ``supports`` says whether the kernel computes a parameter with this
    scheme and settings, constraint, dtype, device and layout.  ``run``
    computes the new positions and momenta and an ok flag of each input from
    the plain inputs, writing nothing (the writes are the results' ``apply``,
    called by the transaction at commit), and never sees the optimizer; it
    may return ``None`` for an input it declines after all (the reference
    kernel then computes it).  ``group_states`` holds the param groups'
    state (e.g. the thermostat friction); new values come back as
    :class:`GroupResult` by group index.

    A kernel with a true ``can_commit`` attribute also accepts
    ``run(inputs, group_states, commit=True)``, which the transaction passes
    only when ``inputs`` are the whole step: the kernel then computes every
    input (declining none) and, when every flag holds, may write the step
    at once (its results' ``apply`` then only returns the stored values);
    when a flag fails it writes nothing.
    """

    name: str

    def supports(self, scheme: object, settings: object, constraint: Constraint, dtype: torch.dtype,
                 device: torch.device, layout: Layout) -> bool: ...

    def run(self, inputs: Sequence[StepInput], group_states: Mapping[int, Mapping[str, Tensor]]
            ) -> tuple[list[StepResult | None], dict[int, GroupResult]]: ...


def is_plain_baoab(scheme: object, settings: object) -> bool:
    """The BAOAB-RATTLE table in one drift per half step: what the fast kernels implement."""
    return scheme is BAOAB and getattr(settings, "substeps", 1) == 1


def fusable_dtype(dtype: torch.dtype, constrained: bool) -> bool:
    """Floating dtypes; half precision only without a constraint (the reference
    projects half-precision weights in float32)."""
    return dtype.is_floating_point and not (constrained and dtype in HALF_DTYPES)
