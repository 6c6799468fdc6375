"""torch.optim step hooks fire once per step for every integrator class.

Reference: torch.optim.Optimizer.register_step_pre_hook / register_step_post_hook (each
hook is called once per ``optimizer.step()``), the behaviour of every torch optimizer.
Before AdaptiveLangevin stopped overriding ``step()``, its hooks fired twice per step once
any Langevin existed in the process (torch patches each class's ``step`` separately).
"""

from __future__ import annotations

import pytest
import torch
from torch import nn

import holonomic as hn

CLASSES = {
    "Langevin": lambda params: hn.Langevin(params, lr=0.01, temperature=0.1),
    "AdaptiveLangevin": lambda params: hn.AdaptiveLangevin(params, lr=0.01, temperature=0.1),
    "OverdampedLangevin": lambda params: hn.OverdampedLangevin(params, lr=0.001, temperature=0.1),
}


@pytest.mark.parametrize("name", list(CLASSES))
def test_step_hooks_fire_once_per_step(name):
    for other in CLASSES.values():  # every class has stepped in this process
        layer = nn.Linear(3, 2)
        opt = other(layer.parameters())
        layer(torch.ones(1, 3)).sum().backward()
        opt.step()
    model = nn.Sequential(nn.Linear(4, 3), nn.Tanh(), nn.Linear(3, 2))
    hn.constrain(model[0], weight=hn.FixedNorm(1.0))
    opt = CLASSES[name](model.parameters())
    calls = {"pre": 0, "post": 0}
    opt.register_step_pre_hook(lambda *args: calls.__setitem__("pre", calls["pre"] + 1))
    opt.register_step_post_hook(lambda *args: calls.__setitem__("post", calls["post"] + 1))
    x = torch.randn(8, 4, generator=torch.Generator().manual_seed(0))
    for _ in range(5):
        opt.zero_grad()
        model(x).square().sum().backward()
        opt.step()
    assert calls == {"pre": 5, "post": 5}
