"""One table of integrators, constraints and kernels that feeds the generic tests, so a
new scheme, constraint or kernel gets them for free."""

from __future__ import annotations

import torch
from torch import nn

import holonomic as hn
from holonomic.dynamics.kernels import (
    FusedKernel,
    NativeKernel,
    ReferenceKernel,
    SquareOrthonormalKernel,
    layout_of,
    native_available,
)

# name -> factory(params, temperature, seed) ; step sizes chosen stable for the toy models
INTEGRATORS = {
    "langevin-rattle": lambda params, temperature, seed=0: hn.Langevin(
        params, step=0.05, friction=1.0, temperature=temperature, seed=seed),
    "langevin-geodesic": lambda params, temperature, seed=0: hn.Langevin(
        params, step=0.05, friction=1.0, temperature=temperature, seed=seed, projection="geodesic"),
    "langevin-rattle-substeps": lambda params, temperature, seed=0: hn.Langevin(
        params, step=0.05, friction=2.0, temperature=temperature, seed=seed, substeps=3),
    "overdamped": lambda params, temperature, seed=0: hn.OverdampedLangevin(
        params, step=0.002, temperature=temperature, seed=seed),
    # the thermostat needs T > 0: at T = 0 its groups run with adaptive=False (plain Langevin)
    "adaptive": lambda params, temperature, seed=0: hn.AdaptiveLangevin(
        params, step=0.05, friction=1.0, temperature=temperature, seed=seed, thermostat_mass=2.0,
        adaptive=temperature > 0),
}

#: Kernels by name (a fresh object per optimizer: kernels may keep caches).  The native
#: kernel is listed where it can be built here (CI has a compiler).
KERNELS = {"reference": ReferenceKernel, "fused": FusedKernel, "square-orthonormal": SquareOrthonormalKernel}
if native_available():
    KERNELS["native"] = NativeKernel

CONSTRAINTS = {
    "fixednorm-rows": lambda: hn.FixedNorm(1.5, over="rows"),
    "fixednorm-columns": lambda: hn.FixedNorm(0.8, over="columns"),
    "fixednorm-all": lambda: hn.FixedNorm(3.0, over="all"),
    "orthonormal-rows": lambda: hn.Orthonormal(over="rows", scale=1.0),
    "orthonormal-columns": lambda: hn.Orthonormal(over="columns", scale=0.5),
    "orthonormal-square": lambda: hn.Orthonormal(over="rows", scale=0.8),
}
#: Hidden width of the toy per constraint (default 4: 6 -> 4 is wide).
HIDDEN = {"orthonormal-columns": 8, "orthonormal-square": 6}


class Toy(nn.Module):
    """A tiny regression network; the first layer carries the constraint."""

    def __init__(self, constraint, dtype=torch.float64, seed=0, hidden=None):
        super().__init__()
        g = torch.Generator().manual_seed(seed)
        # 6 inputs -> 4 hidden (wide: rows orthonormal) or 6 -> 8 (tall: columns orthonormal)
        if hidden is None:
            hidden = 8 if getattr(constraint, "over", "") == "columns" and isinstance(constraint, hn.Orthonormal) else 4
        self.hidden = nn.Linear(6, hidden).to(dtype)
        self.out = nn.Linear(hidden, 1).to(dtype)
        with torch.no_grad():
            for p in self.parameters():
                p.copy_(0.5 * torch.randn(p.shape, generator=g, dtype=dtype))
        hn.constrain(self.hidden, weight=constraint)

    def forward(self, x):
        return self.out(torch.tanh(self.hidden(x)))


def toy_data(dtype=torch.float64, n=32):
    g = torch.Generator().manual_seed(123)
    x = torch.randn(n, 6, generator=g, dtype=dtype)
    y = torch.sin(x[:, :1]) + 0.1 * torch.randn(n, 1, generator=g, dtype=dtype)
    return x, y


def train(model, optimizer, steps, data):
    x, y = data
    for _ in range(steps):
        optimizer.zero_grad()
        loss = ((model(x) - y) ** 2).mean()
        loss.backward()
        optimizer.step()
    return model


def toy(constraint_name, dtype=torch.float64, seed=0):
    """The toy network of a registry constraint."""
    return Toy(CONSTRAINTS[constraint_name](), dtype=dtype, seed=seed, hidden=HIDDEN.get(constraint_name))


def pin(optimizer, kernel_name):
    """Pin ``optimizer`` to one kernel (the reference takes what it does not support)."""
    optimizer.kernels = [KERNELS[kernel_name]()]
    return optimizer


def kernel_supports(integrator, constraint, kernel_name, dtype=torch.float64):
    """Whether the kernel computes the toy's constrained weight for this integrator."""
    model = toy(constraint, dtype=dtype)
    opt = INTEGRATORS[integrator](model.parameters(), temperature=0.5)
    group = opt.param_groups[0]
    w = model.hidden.weight
    scheme, settings = opt.scheme_for(group), opt.settings_for(group)
    return not scheme.group_level and KERNELS[kernel_name]().supports(
        scheme, settings, hn.constraint_of(w), w.dtype, w.device, layout_of(w, w, None))


#: (integrator, constraint, kernel) of every generic case: each kernel that supports the case.
CASES = [(i, c, k) for i in INTEGRATORS for c in CONSTRAINTS for k in KERNELS if kernel_supports(i, c, k)]
CASE_IDS = [f"{i}-{c}-{k}" for i, c, k in CASES]
