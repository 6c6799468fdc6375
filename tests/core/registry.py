"""One table of integrators and constraints that feeds the generic tests, so a
new scheme or constraint gets them for free."""

from __future__ import annotations

import torch
from torch import nn

import holonomic as hn

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
}

CONSTRAINTS = {
    "fixednorm-rows": lambda: hn.FixedNorm(1.5, over="rows"),
    "fixednorm-columns": lambda: hn.FixedNorm(0.8, over="columns"),
    "fixednorm-all": lambda: hn.FixedNorm(3.0, over="all"),
    "orthonormal-rows": lambda: hn.Orthonormal(over="rows", scale=1.0),
    "orthonormal-columns": lambda: hn.Orthonormal(over="columns", scale=0.5),
}


class Toy(nn.Module):
    """A tiny regression network; the first layer carries the constraint."""

    def __init__(self, constraint, dtype=torch.float64, seed=0):
        super().__init__()
        g = torch.Generator().manual_seed(seed)
        # 6 inputs -> 4 hidden (wide: rows orthonormal) or 6 -> 8 (tall: columns orthonormal)
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
