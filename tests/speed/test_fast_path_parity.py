"""Parity of the fast BAOAB path (holonomic.dynamics.fast) with the plain
per-parameter reference path, in float64, plus failure behaviour.

The reference is the plain path of the same class (``opt._reference = True``);
one outside check compares the fast path with ``torch.optim.SGD``.  No timing
assertions here: speed is measured by ``python -m holonomic.bench``.
"""

import copy
import math

import pytest
import torch
from torch import nn

import holonomic as hn

TOL = 1e-11  # float64 roundoff over a few dozen steps (common practice, no source)


def _net(seed=0, orthonormal_last=True):
    g = torch.Generator().manual_seed(seed)
    net = nn.Sequential(nn.Linear(7, 6), nn.Tanh(), nn.Linear(6, 5), nn.Tanh(), nn.Linear(5, 4), nn.Tanh(),
                        nn.Linear(4, 3)).double()
    with torch.no_grad():
        for p in net.parameters():
            p.copy_(0.5 * torch.randn(p.shape, generator=g, dtype=torch.float64))
    hn.constrain(net[0], weight=hn.FixedNorm(1.5, over="rows"))
    hn.constrain(net[2], weight=hn.FixedNorm(0.7, over="columns"))
    hn.constrain(net[4], weight=hn.FixedNorm(2.0, over="all"))
    if orthonormal_last:
        hn.constrain(net[6], weight=hn.Orthonormal(over="rows"))  # not on the fast path: plain inside it
    return net


def _data():
    g = torch.Generator().manual_seed(1)
    return torch.randn(24, 7, generator=g, dtype=torch.float64), torch.randn(24, 3, generator=g, dtype=torch.float64)


def _groups(net, temperature, friction):
    params = list(net.parameters())
    # two groups with different settings; group 1 carries dataset_size and weight decay
    return [{"params": params[:4]},
            {"params": params[4:], "temperature": 0.5 * temperature, "friction": 2 * friction,
             "dataset_size": 3.0, "weight_decay": 0.1}]


def _run(net, opt, steps, data):
    x, y = data
    for _ in range(steps):
        opt.zero_grad()
        ((net(x) - y) ** 2).mean().backward()
        opt.step()


@pytest.mark.parametrize("temperature", [0.0, 0.4])
@pytest.mark.parametrize("friction", [1.0, math.inf])
def test_fast_path_matches_reference(temperature, friction):
    fast_net = _net()
    ref_net = copy.deepcopy(fast_net)
    fast = hn.Langevin(_groups(fast_net, temperature, friction), step=0.1, friction=friction,
                       temperature=temperature, seed=5, compiled=False)
    ref = hn.Langevin(_groups(ref_net, temperature, friction), step=0.1, friction=friction,
                      temperature=temperature, seed=5)
    ref._reference = True
    data = _data()
    _run(fast_net, fast, 40, data)
    _run(ref_net, ref, 40, data)
    assert_same_run(fast_net, fast, ref_net, ref)


def assert_same_run(fast_net, fast, ref_net, ref, same_iterations=lambda a, b: a == b):
    """Weights, momenta, generator states and step info of the fast and the
    reference run agree to float64 roundoff."""
    for a, b in zip(fast_net.parameters(), ref_net.parameters()):
        assert torch.allclose(a, b, rtol=0, atol=TOL)
        assert torch.allclose(fast.state[a]["momentum"], ref.state[b]["momentum"], rtol=0, atol=TOL)
    # same noise stream: the generators advanced identically
    assert all(torch.equal(fast._generators[k].get_state(), ref._generators[k].get_state())
               for k in ref._generators)
    for a, b in zip(fast.last_info.parameters, ref.last_info.parameters):
        assert (a.label, a.group, a.index, a.tangent_dof) == (b.label, b.group, b.index, b.tangent_dof)
        assert same_iterations(a.projection_iterations, b.projection_iterations)
        assert abs(float(a.kinetic_energy) - float(b.kinetic_energy)) <= TOL * max(1.0, float(b.kinetic_energy))
    assert max(hn.residuals(fast_net).values()) < 1e-13


def check_unconstrained_equals_torch_sgd(n_in=5, n_out=3, **kwargs):
    """Outside reference: torch.optim.SGD.  ``Langevin.from_sgd`` at T = 0 is
    heavy-ball SGD exactly for unconstrained parameters (30 steps, float64)."""
    g = torch.Generator().manual_seed(2)
    ours = nn.Linear(n_in, n_out).double()
    with torch.no_grad():
        for p in ours.parameters():
            p.copy_(torch.randn(p.shape, generator=g, dtype=torch.float64))
    theirs = copy.deepcopy(ours)
    opt = hn.Langevin.from_sgd(ours.parameters(), lr=0.05, momentum=0.9, weight_decay=0.01, **kwargs)
    sgd = torch.optim.SGD(theirs.parameters(), lr=0.05, momentum=0.9, weight_decay=0.01)
    x = torch.randn(16, n_in, generator=g, dtype=torch.float64)
    y = torch.randn(16, n_out, generator=g, dtype=torch.float64)
    for _ in range(30):
        for net, o in ((ours, opt), (theirs, sgd)):
            o.zero_grad()
            ((net(x) - y) ** 2).mean().backward()
            o.step()
    for a, b in zip(ours.parameters(), theirs.parameters()):
        assert torch.allclose(a, b, rtol=1e-12, atol=1e-12)


def test_fast_path_unconstrained_equals_torch_sgd():
    check_unconstrained_equals_torch_sgd(compiled=False)


def _snapshot(net, opt):
    return copy.deepcopy((net.state_dict(), opt.state_dict()))


def _assert_unchanged(before, after):
    for k, v in before[0].items():
        assert torch.equal(v, after[0][k])
    for p, s in before[1]["state"].items():
        for k, v in s.items():
            assert torch.equal(v, after[1]["state"][p][k])
    assert before[1]["generators"].keys() == after[1]["generators"].keys()
    for k, v in before[1]["generators"].items():
        assert torch.equal(v, after[1]["generators"][k])


def check_bad_gradient_changes_nothing(net, opt, value):
    """After three steps, a step whose gradient of ``net[2].weight`` holds ``value`` (inf or
    nan) raises, names that parameter and changes nothing."""
    data = _data()
    _run(net, opt, 3, data)
    before = _snapshot(net, opt)
    x, y = data
    opt.zero_grad()
    ((net(x) - y) ** 2).mean().backward()
    net[2].weight.grad[0, 0] = value
    with pytest.raises(hn.IntegrationError, match="non-finite gradient") as err:
        opt.step()
    assert err.value.reason == "non-finite gradient" and err.value.parameter == "Linear.weight"
    _assert_unchanged(before, (net.state_dict(), opt.state_dict()))


def test_fast_path_failure_changes_nothing_and_reports_like_reference():
    net = _net()
    opt = hn.Langevin(net.parameters(), step=0.1, temperature=0.3, compiled=False)
    check_bad_gradient_changes_nothing(net, opt, float("inf"))  # net[2].weight: a fast-path parameter


def check_unprojectable_first_step_changes_nothing(**kwargs):
    """A first step SHAKE cannot take raises and changes nothing; returns the optimizer."""
    layer = nn.Linear(4, 3).double()
    hn.constrain(layer, weight=hn.FixedNorm(1.0))
    opt = hn.Langevin(layer.parameters(), step=1.0, temperature=0.0, **kwargs)
    layer.weight.grad = torch.full_like(layer.weight, 50.0)  # s |p| >> r: SHAKE has no real root
    layer.bias.grad = torch.zeros_like(layer.bias)
    before = _snapshot(layer, opt)
    with pytest.raises(hn.IntegrationError, match="projection") as err:
        opt.step()
    assert err.value.reason == "projection failed"
    _assert_unchanged(before, (layer.state_dict(), opt.state_dict()))
    return opt


def test_fast_path_projection_failure_changes_nothing():
    check_unprojectable_first_step_changes_nothing(compiled=False)
