"""Constraint residuals stay at roundoff over long runs, without growth."""

import pytest
import torch
from torch import nn

import holonomic as hn


@pytest.mark.slow
@pytest.mark.parametrize("dtype,eps", [(torch.float32, 1.19e-7), (torch.float64, 2.22e-16)])
def test_residual_stays_at_roundoff_without_growth(dtype, eps):
    # Each step solves the constraint equation afresh (SHAKE uses the actual
    # |w|^2 or X^T X of the current point), so errors do not accumulate.
    # benchmarks/long_run_residual.py runs the same for 10^5 steps.
    g = torch.Generator().manual_seed(0)
    model = nn.Module()
    model.a = nn.Parameter(torch.randn(16, 8, generator=g, dtype=dtype))
    model.b = nn.Parameter(torch.randn(4, 8, generator=g, dtype=dtype))
    hn.constrain(model, a=hn.FixedNorm(1.0), b=hn.Orthonormal(over="rows"))
    target = torch.randn(16, 8, generator=g, dtype=dtype), torch.randn(4, 8, generator=g, dtype=dtype)
    opt = hn.Langevin(model.parameters(), step=0.1, friction=1.0, temperature=0.05, seed=1)
    history = []
    steps = 10_000
    for i in range(steps):
        model.a.grad = -target[0]
        model.b.grad = -target[1]
        opt.step()
        if i % 250 == 0 or i == steps - 1:
            history.append(max(hn.residuals(model).values()))
    history = torch.tensor(history, dtype=torch.float64)
    assert float(history.max()) < 16 * eps, float(history.max())  # roundoff: a few eps
    half = len(history) // 2
    # no growth: the second half is no worse than the first, up to roundoff jitter
    assert float(history[half:].max()) <= 2 * float(history[:half].max()) + 2 * eps
