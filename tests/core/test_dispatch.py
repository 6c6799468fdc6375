"""Per-parameter dispatch within one transaction, and the backend switch.

A model that mixes FixedNorm, square Orthonormal and free parameters runs each parameter
on the best kernel that supports it, in one transaction.  The outside reference is the
reference kernel (the scheme's operators one by one, ``backend="reference"``): the mixed
step equals it to float64 roundoff, and a failure in any one parameter changes nothing.
"""

import copy
import warnings

import pytest
import torch
from torch import nn

import holonomic as hn
from holonomic.dynamics.kernels import native_available

TOL = dict(rtol=1e-10, atol=1e-11)  # float64 roundoff over a few dozen steps (common practice, no source)
FAST = "native" if native_available() else "fused"


def _mixed(seed=0):
    """Quick-start-like MLP: first weight FixedNorm, square hidden weight Orthonormal, rest free."""
    g = torch.Generator().manual_seed(seed)
    net = nn.Sequential(nn.Linear(7, 6), nn.Tanh(), nn.Linear(6, 6), nn.Tanh(), nn.Linear(6, 3)).double()
    with torch.no_grad():
        for p in net.parameters():
            p.copy_(0.5 * torch.randn(p.shape, generator=g, dtype=torch.float64))
    hn.constrain(net[0], weight=hn.FixedNorm(1.5))
    hn.constrain(net[2], weight=hn.Orthonormal(scale=0.8))
    return net


def _data():
    g = torch.Generator().manual_seed(1)
    return torch.randn(24, 7, generator=g, dtype=torch.float64), torch.randn(24, 3, generator=g, dtype=torch.float64)


def _run(net, opt, steps, data=None):
    x, y = data or _data()
    for _ in range(steps):
        opt.zero_grad()
        ((net(x) - y) ** 2).mean().backward()
        opt.step()


def _pair(temperature, **kwargs):
    nets = [_mixed(), _mixed()]
    opts = [hn.Langevin(nets[0].named_parameters(), lr=0.02, momentum=0.9, temperature=temperature, seed=5,
                        **kwargs),
            hn.Langevin(nets[1].named_parameters(), lr=0.02, momentum=0.9, temperature=temperature, seed=5,
                        backend="reference", **kwargs)]
    return nets, opts


@pytest.mark.parametrize("temperature", [0.0, 0.3])
def test_mixed_model_over_several_kernels_equals_the_reference_step(temperature):
    nets, opts = _pair(temperature, weight_decay=0.01)
    for net, opt in zip(nets, opts):
        _run(net, opt, 30)
    kernels = dict(opts[0].last_info.kernels)
    assert kernels == {"0.weight": FAST, "0.bias": FAST, "2.weight": "square-orthonormal", "2.bias": FAST,
                       "4.weight": FAST, "4.bias": FAST}
    assert set(dict(opts[1].last_info.kernels).values()) == {"reference"}
    for (name, a), b in zip(nets[0].named_parameters(), nets[1].parameters()):
        torch.testing.assert_close(a, b, **TOL, msg=name)
        torch.testing.assert_close(opts[0].state[a]["momentum"], opts[1].state[b]["momentum"], rtol=1e-9,
                                   atol=1e-10, msg=name)
    assert max(hn.residuals(nets[0]).values()) < 1e-13


def _snapshot(net, opt):
    return copy.deepcopy((net.state_dict(), opt.state_dict()))


def _assert_unchanged(before, net, opt):
    after = (net.state_dict(), opt.state_dict())
    for k, v in before[0].items():
        assert torch.equal(v, after[0][k]), k
    assert before[1]["state"].keys() == after[1]["state"].keys()
    for p, s in before[1]["state"].items():
        for k, v in s.items():
            assert torch.equal(v, after[1]["state"][p][k])
    assert before[1]["generators"].keys() == after[1]["generators"].keys()
    for k, v in before[1]["generators"].items():
        assert torch.equal(v, after[1]["generators"][k])


@pytest.mark.parametrize("backend", ["auto", "eager", "reference"])
@pytest.mark.parametrize("bad", ["0.weight", "2.weight", "4.bias"])
def test_mixed_step_fails_atomically_naming_the_parameter(bad, backend):
    net = _mixed()
    opt = hn.Langevin(net.named_parameters(), lr=0.02, momentum=0.9, temperature=0.3, backend=backend)
    _run(net, opt, 3)
    before = _snapshot(net, opt)
    x, y = _data()
    opt.zero_grad()
    ((net(x) - y) ** 2).mean().backward()
    dict(net.named_parameters())[bad].grad.view(-1)[0] = float("nan")  # earlier parameters were computed
    with pytest.raises(hn.IntegrationError, match="non-finite gradient") as err:
        opt.step()
    assert err.value.reason == "non-finite gradient" and err.value.parameter == bad
    _assert_unchanged(before, net, opt)
    _run(net, opt, 1)  # and the optimizer goes on


@pytest.mark.parametrize("backend", ["auto", "eager", "reference"])
def test_unprojectable_first_step_changes_nothing(backend):
    layer = nn.Linear(4, 3).double()
    hn.constrain(layer, weight=hn.FixedNorm(1.0))
    opt = hn.Langevin(layer.parameters(), step=1.0, temperature=0.0, backend=backend)
    layer.weight.grad = torch.full_like(layer.weight, 50.0)  # s |p| >> r: SHAKE has no real root
    layer.bias.grad = torch.zeros_like(layer.bias)
    before = _snapshot(layer, opt)
    with pytest.raises(hn.IntegrationError, match="projection") as err:
        opt.step()
    assert err.value.reason == "projection failed"
    _assert_unchanged(before, layer, opt)
    assert not opt.state  # no momentum was stored


def test_a_declined_parameter_runs_on_the_reference_in_the_same_step():
    # a large step puts ||Z|| above the closed form's range: the square kernel declines and the
    # reference kernel takes that parameter, with the same noise (equal to an all-reference run)
    nets = [_mixed(), _mixed()]
    opts = [hn.Langevin(net.parameters(), lr=0.3, momentum=0.5, temperature=0.2, seed=2, backend=b)
            for net, b in zip(nets, ("eager", "reference"))]
    for net, opt in zip(nets, opts):
        x, y = _data()
        opt.zero_grad()
        (10 * (net(x) - y) ** 2).mean().backward()
        opt.step()
    assert [k for _, k in opts[0].last_info.kernels][2] == "reference"
    for a, b in zip(nets[0].parameters(), nets[1].parameters()):
        torch.testing.assert_close(a, b, **TOL)


def test_backend_switch_and_the_deprecated_flag():
    params = nn.Linear(3, 2).parameters
    assert hn.Langevin(params(), lr=0.1).backend == "auto"
    for compiled, backend in ((None, "auto"), (True, "native"), (False, "eager")):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            opt = hn.Langevin(params(), lr=0.1, compiled=compiled)
        assert opt.backend == backend and opt.compiled is compiled
        deprecations = [w for w in caught if issubclass(w.category, DeprecationWarning)]
        assert len(deprecations) == (compiled is not None)
        if compiled is not None:
            assert f"backend={backend!r}" in str(deprecations[0].message)
    with pytest.raises(ValueError, match="backend must be one of"):
        hn.Langevin(params(), lr=0.1, backend="compiled")
    with pytest.raises(ValueError, match="not both"):
        hn.Langevin(params(), lr=0.1, backend="eager", compiled=False)
    with pytest.raises(ValueError, match="compiled"):
        hn.Langevin(params(), lr=0.1, compiled="yes")
    opt = hn.AdaptiveLangevin(params(), lr=0.1, backend="reference")
    assert [k.name for k in opt.kernels] == ["reference"]
    opt.backend = "eager"  # takes effect at the next step
    assert [k.name for k in opt.kernels] == ["square-orthonormal", "fused", "reference"]


def test_adaptive_groups_run_on_the_reference_kernel():
    # the friction update couples the parameters of a group: one kernel for all of them
    net = _mixed()
    opt = hn.AdaptiveLangevin(net.named_parameters(), lr=0.02, temperature=0.3)
    _run(net, opt, 2)
    assert set(dict(opt.last_info.kernels).values()) == {"reference"}


@pytest.mark.parametrize("bad", ["0.weight", "4.bias"])
def test_adaptive_failure_names_the_parameter_with_the_bad_gradient(bad):
    # the thermostat couples a group's parameters (a NaN reaches every momentum through xi);
    # the error names the parameter whose gradient was not finite, not the first constrained one
    net = _mixed()
    opt = hn.AdaptiveLangevin(net.named_parameters(), lr=0.02, temperature=0.3)
    _run(net, opt, 2)
    before = _snapshot(net, opt)
    friction = opt.thermostat_friction()
    x, y = _data()
    opt.zero_grad()
    ((net(x) - y) ** 2).mean().backward()
    dict(net.named_parameters())[bad].grad.view(-1)[0] = float("nan")
    with pytest.raises(hn.IntegrationError, match="non-finite gradient") as err:
        opt.step()
    assert err.value.parameter == bad
    _assert_unchanged(before, net, opt)
    assert opt.thermostat_friction() == friction


def test_a_non_finite_group_state_names_its_own_group():
    # the second group's thermostat mass is so small that its friction overflows: the error
    # names group 1 and one of its parameters, and nothing changes
    torch.manual_seed(0)
    first, second = torch.nn.Linear(3, 3), torch.nn.Linear(3, 3)
    opt = hn.AdaptiveLangevin([{"params": first.parameters()},
                               {"params": second.parameters(), "thermostat_mass": 1e-320}],
                              lr=0.01, momentum=0.9, temperature=1e-3)
    x = torch.randn(4, 3)
    (first(x).sum() + second(x).pow(2).sum()).backward()
    before = [p.detach().clone() for p in [*first.parameters(), *second.parameters()]]
    with pytest.raises(hn.IntegrationError) as caught:
        opt.step()
    assert caught.value.group == 1 and caught.value.parameter.startswith("group 1")
    after = [*first.parameters(), *second.parameters()]
    assert all(torch.equal(a, b) for a, b in zip(before, after))
    assert not opt.state[next(second.parameters())]
