"""``lr`` and ``momentum`` mean what they mean for ``torch.optim.SGD`` (issue 16, item 1).

Outside reference: ``torch.optim.SGD`` and the schedulers of ``torch.optim.lr_scheduler``
and ``torch.optim.swa_utils``.  At temperature 0 without constraints, ``Langevin`` with
the same ``lr``/``momentum``/``weight_decay`` and the same scheduler must follow SGD's
trajectory to roundoff (float64), on every code path (the native kernel, the default on
the CPU; the eager fast path; the plain reference path).
"""

import copy
import math

import pytest
import torch
from torch import nn

import holonomic as hn
from holonomic.dynamics.settings import (
    integrator_step_and_friction,
    sgd_from_step_and_friction,
    step_and_friction_from_sgd,
)

DTYPE = torch.float64
STEPS = 14


def _net() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(4, 6), nn.Tanh(), nn.Linear(6, 2)).to(DTYPE)


def _data():
    gen = torch.Generator().manual_seed(1)
    return torch.randn(16, 4, generator=gen, dtype=DTYPE), torch.randn(16, 2, generator=gen, dtype=DTYPE)


SCHEDULERS = {
    "StepLR": lambda opt: torch.optim.lr_scheduler.StepLR(opt, step_size=3, gamma=0.5),
    # cycle_momentum=True (the default) needs group["momentum"]
    "OneCycleLR": lambda opt: torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=0.2, total_steps=STEPS + 1),
    "CyclicLR": lambda opt: torch.optim.lr_scheduler.CyclicLR(opt, base_lr=0.01, max_lr=0.2, step_size_up=4,
                                                              cycle_momentum=True),
    "ReduceLROnPlateau": lambda opt: torch.optim.lr_scheduler.ReduceLROnPlateau(opt, factor=0.5, patience=1),
    "SWALR": lambda opt: torch.optim.swa_utils.SWALR(opt, swa_lr=0.02, anneal_epochs=4),
}

PATHS = {
    "native": dict(),  # the default on the CPU (falls back to the eager kernels without a compiler)
    "eager": dict(backend="eager"),
    "reference": dict(backend="reference"),
}


def _run(make_opt, scheduler_name, path=None):
    net = _net()
    x, y = _data()
    opt = make_opt(net.parameters())
    sched = SCHEDULERS[scheduler_name](opt)
    trajectory, lrs = [], []
    for _ in range(STEPS):
        opt.zero_grad()
        loss = ((net(x) - y) ** 2).mean()
        loss.backward()
        opt.step()
        if scheduler_name == "ReduceLROnPlateau":
            sched.step(1.0)  # a metric that never improves: lr halves every other step
        else:
            sched.step()
        trajectory.append([p.detach().clone() for p in net.parameters()])
        lrs.append(opt.param_groups[0]["lr"])
    return trajectory, lrs


@pytest.mark.parametrize("path", list(PATHS))
@pytest.mark.parametrize("scheduler_name", list(SCHEDULERS))
def test_temperature_zero_follows_torch_sgd_under_schedulers(scheduler_name, path):
    # reference: torch.optim.SGD with the same lr, momentum, weight_decay and scheduler
    settings = dict(lr=0.1, momentum=0.9, weight_decay=1e-2)
    ref, ref_lrs = _run(lambda ps: torch.optim.SGD(ps, **settings), scheduler_name)
    ours, lrs = _run(lambda ps: hn.Langevin(ps, **settings, **PATHS[path]), scheduler_name, path)
    assert lrs == ref_lrs
    assert len(set(lrs)) > 1  # the scheduler did change lr
    for step, (a, b) in enumerate(zip(ours, ref)):
        for pa, pb in zip(a, b):
            torch.testing.assert_close(pa, pb, rtol=1e-12, atol=1e-13, msg=f"step {step}")


def test_momentum_cycling_changes_the_group_momentum():
    net = _net()
    opt = hn.Langevin(net.parameters(), lr=0.1)
    torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=0.2, total_steps=10)
    assert opt.param_groups[0]["momentum"] == 0.95  # OneCycleLR's max_momentum at the start


@pytest.mark.parametrize("cls", [hn.Langevin, hn.AdaptiveLangevin, hn.OverdampedLangevin])
def test_constructs_from_lr_alone(cls):
    # as frameworks build optimizers: cls(params, lr=...)
    opt = cls(_net().parameters(), lr=0.01)
    assert opt.param_groups[0]["lr"] == 0.01
    h, _ = opt.step_and_friction(0)
    if cls is hn.OverdampedLangevin:
        assert h == 0.01 and "momentum" not in opt.param_groups[0]
    else:
        assert opt.param_groups[0]["momentum"] == 0.9
        assert math.isclose(h, math.sqrt(2 * 0.01 / 1.9), rel_tol=1e-15)


def test_lr_and_momentum_are_the_first_positional_arguments():
    opt = hn.Langevin(_net().parameters(), 0.05, 0.5)
    assert opt.param_groups[0]["lr"] == 0.05 and opt.param_groups[0]["momentum"] == 0.5
    adaptive = hn.AdaptiveLangevin(_net().parameters(), 0.05, 0.5, temperature=0.2)
    assert adaptive.param_groups[0]["lr"] == 0.05 and adaptive.param_groups[0]["momentum"] == 0.5


@pytest.mark.parametrize("kwargs,match", [
    (dict(), "lr is required"),
    (dict(lr=0.1, step=0.1), "not both"),
    (dict(lr=0.1, momentum=0.5, friction=1.0), "not both"),
    (dict(step=0.1, momentum=0.5), "momentum goes with lr"),
    (dict(lr=0.1, friction=1.0), "friction goes with step"),
    (dict(lr=0.0), "lr"),
    (dict(lr=float("nan")), "lr"),
    (dict(lr=0.1, momentum=1.5), "momentum"),
    (dict(lr=0.1, momentum=-0.1), "momentum"),
])
def test_settings_are_refused_with_the_parameter_named(kwargs, match):
    with pytest.raises(ValueError, match=match):
        hn.Langevin(_net().parameters(), **kwargs)


def test_adaptive_refuses_momentum_zero_and_takes_xi_from_momentum():
    with pytest.raises(ValueError, match="momentum must be > 0"):
        hn.AdaptiveLangevin(_net().parameters(), lr=0.01, momentum=0.0)
    with pytest.raises(ValueError, match="momentum must be > 0"):
        hn.AdaptiveLangevin(_net().parameters(), step=0.1, friction=math.inf)
    opt = hn.AdaptiveLangevin(_net().parameters(), lr=0.01, momentum=0.8, temperature=0.5)
    _, friction = opt.step_and_friction(0)
    assert opt.thermostat_friction() == [friction]
    assert math.isclose(friction, -math.log(0.8) / math.sqrt(2 * 0.01 / 1.8), rel_tol=1e-15)


def test_physics_settings_convert_to_lr_and_momentum_and_back():
    # inverse of Langevin.from_sgd's mapping: mu = exp(-gamma h), lr = h^2 (1 + mu) / 2
    lr, mu = sgd_from_step_and_friction(0.3, 2.0)
    assert math.isclose(mu, math.exp(-0.6), rel_tol=1e-15)
    assert math.isclose(lr, 0.09 * (1 + math.exp(-0.6)) / 2, rel_tol=1e-15)
    h, gamma = step_and_friction_from_sgd(lr, mu)
    assert math.isclose(h, 0.3, rel_tol=1e-14) and math.isclose(gamma, 2.0, rel_tol=1e-14)
    assert sgd_from_step_and_friction(0.3, math.inf) == (0.045, 0.0)
    assert step_and_friction_from_sgd(0.045, 0.0) == (math.sqrt(0.09), math.inf)
    assert integrator_step_and_friction({"lr": 0.01}) == (0.01, math.inf)  # overdamped: h = lr
    opt = hn.Langevin(_net().parameters(), step=0.3, friction=2.0)
    assert opt.param_groups[0]["lr"] == lr and opt.param_groups[0]["momentum"] == mu
    assert "step" not in opt.defaults and "friction" not in opt.defaults


def test_param_groups_take_either_parametrisation():
    net = _net()
    a, b, c = list(net.parameters())[:3]
    opt = hn.Langevin([{"params": [a]}, {"params": [b], "friction": 3.0},
                       {"params": [c], "lr": 0.02}], step=0.2, friction=1.0)
    assert math.isclose(opt.step_and_friction(1)[0], 0.2, rel_tol=1e-14)  # the default's step
    assert math.isclose(opt.step_and_friction(1)[1], 3.0, rel_tol=1e-14)
    assert opt.param_groups[2]["lr"] == 0.02
    assert opt.param_groups[2]["momentum"] == opt.param_groups[0]["momentum"]  # torch's rule
    with pytest.raises(ValueError, match="either 'lr'/'momentum'"):
        opt.add_param_group({"params": [nn.Parameter(torch.zeros(2))], "lr": 0.1, "step": 0.1})
    with pytest.raises(ValueError, match="either 'lr'/'momentum'"):
        opt.add_param_group({"params": [nn.Parameter(torch.zeros(2))], "momentum": 0.5, "friction": 1.0})


def test_scheduled_state_dict_round_trip_is_bit_identical():
    x, y = _data()

    def steps(net, opt, sched, n):
        for _ in range(n):
            opt.zero_grad()
            ((net(x) - y) ** 2).mean().backward()
            opt.step()
            sched.step()

    net = _net()
    opt = hn.Langevin(net.parameters(), lr=0.1, temperature=0.01, seed=4)
    sched = torch.optim.lr_scheduler.StepLR(opt, step_size=2, gamma=0.5)
    steps(net, opt, sched, 3)
    saved = (copy.deepcopy(net.state_dict()), copy.deepcopy(opt.state_dict()), sched.state_dict())
    assert opt.state_dict()["param_groups"][0]["momentum_scale"] is not None
    steps(net, opt, sched, 4)
    net2 = _net()
    net2.load_state_dict(saved[0])
    opt2 = hn.Langevin(net2.parameters(), lr=0.1, temperature=0.01, seed=4)
    sched2 = torch.optim.lr_scheduler.StepLR(opt2, step_size=2, gamma=0.5)
    opt2.load_state_dict(saved[1])
    sched2.load_state_dict(saved[2])
    steps(net2, opt2, sched2, 4)
    for pa, pb in zip(net.parameters(), net2.parameters()):
        assert torch.equal(pa, pb)


def test_failed_step_after_an_lr_change_leaves_the_momenta_alone():
    net = _net()
    x, y = _data()
    opt = hn.Langevin(net.parameters(), lr=0.1)
    ((net(x) - y) ** 2).mean().backward()
    opt.step()
    before = {p: opt.state[p]["momentum"].clone() for p in net.parameters()}
    scale = opt.param_groups[0]["momentum_scale"]
    opt.param_groups[0]["lr"] = 0.05
    next(net.parameters()).grad[0, 0] = math.nan
    with pytest.raises(hn.IntegrationError):
        opt.step()
    assert opt.param_groups[0]["momentum_scale"] == scale
    for p in net.parameters():
        assert torch.equal(opt.state[p]["momentum"], before[p])


@pytest.mark.parametrize("path", ["native", "eager", "reference"])
@pytest.mark.parametrize("schedule", ["warm-up from 0", "cosine through 0"])
def test_zero_lr_steps_follow_sgd(path, schedule):
    # Reference library: torch.optim.SGD. At lr = 0 SGD moves nothing but its momentum
    # buffer keeps accumulating gradients (buf <- mu buf + g); a temperature-0 Langevin step
    # at lr = 0 does the same, so a warm-up from lr 0 (LambdaLR) and a cosine schedule that
    # reaches 0 and rises again follow SGD (found by a user-style review: they drifted apart).
    torch.manual_seed(0)

    def net():
        return nn.Sequential(nn.Linear(6, 5), nn.Tanh(), nn.Linear(5, 3)).double()

    ours, theirs = net(), net()
    theirs.load_state_dict(ours.state_dict())
    x = torch.randn(16, 6, dtype=torch.float64)
    opt = hn.Langevin(ours.parameters(), lr=0.05, momentum=0.9, weight_decay=1e-3,
                      backend={"eager": "eager", "reference": "reference"}.get(path, "auto"))
    sgd = torch.optim.SGD(theirs.parameters(), lr=0.05, momentum=0.9, weight_decay=1e-3)

    def make(o):
        if schedule == "warm-up from 0":
            return torch.optim.lr_scheduler.LambdaLR(o, lambda e: min(1.0, e / 5))
        return torch.optim.lr_scheduler.CosineAnnealingLR(o, 10)

    schedulers = make(opt), make(sgd)
    for _ in range(30):
        for model, o, s in ((ours, opt, schedulers[0]), (theirs, sgd, schedulers[1])):
            o.zero_grad()
            model(x).square().mean().backward()
            o.step()
            s.step()
    for p, q in zip(ours.parameters(), theirs.parameters()):
        assert torch.allclose(p, q, rtol=0, atol=1e-12)


def test_zero_lr_at_positive_temperature_keeps_the_momentum():
    # At T > 0 an lr of 0 is a step of zero time: nothing moves and the momentum is kept.
    layer = nn.Linear(4, 3).double()
    opt = hn.Langevin(layer.parameters(), lr=0.01, temperature=0.5, seed=1)
    layer(torch.ones(2, 4, dtype=torch.float64)).sum().backward()
    opt.step()
    before = {p: opt.state[p]["momentum"].clone() for p in layer.parameters()}
    weights = [p.detach().clone() for p in layer.parameters()]
    opt.param_groups[0]["lr"] = 0.0
    opt.step()
    assert all(torch.equal(opt.state[p]["momentum"], before[p]) for p in layer.parameters())
    assert all(torch.equal(a, b) for a, b in zip(weights, layer.parameters()))
