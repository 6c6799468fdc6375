"""Bad configuration raises ValueError at once; schedulers and param groups work."""

import math

import pytest
import torch
from torch import nn

import holonomic as hn


def _params():
    return [nn.Parameter(torch.randn(3, 4))]


@pytest.mark.parametrize(
    "kwargs,match",
    [
        (dict(step=0.0), "step"),
        (dict(step=-0.1), "step"),
        (dict(step=float("nan")), "step"),
        (dict(step=0.1, friction=-1.0), "friction"),
        (dict(step=0.1, friction=float("nan")), "friction"),
        (dict(step=0.1, temperature=-1e-3), "temperature"),
        (dict(step=0.1, temperature=float("nan")), "temperature"),
        (dict(step=0.1, projection="exact"), "projection"),
        (dict(step=0.1, dataset_size=0), "dataset_size"),
        (dict(step=0.1, weight_decay=-1.0), "weight_decay"),
        (dict(step=0.1, substeps=0), "substeps"),
        (dict(step=0.1, seed=1.5), "seed"),
    ],
)
def test_langevin_rejects_bad_settings(kwargs, match):
    with pytest.raises(ValueError, match=match):
        hn.Langevin(_params(), **kwargs)


@pytest.mark.parametrize(
    "kwargs,match",
    [(dict(step=0.0), "step"), (dict(step=0.1, temperature=-1.0), "temperature"),
     (dict(step=0.1, dataset_size=-5), "dataset_size")],
)
def test_overdamped_rejects_bad_settings(kwargs, match):
    with pytest.raises(ValueError, match=match):
        hn.OverdampedLangevin(_params(), **kwargs)


def test_from_sgd_rejects_bad_settings():
    with pytest.raises(ValueError, match="momentum"):
        hn.Langevin.from_sgd(_params(), lr=0.1, momentum=1.5)
    with pytest.raises(ValueError, match="lr"):
        hn.Langevin.from_sgd(_params(), lr=-0.1)


def test_bad_param_group_is_rejected_and_step_key_accepted():
    a, b = nn.Parameter(torch.randn(3)), nn.Parameter(torch.randn(3))
    opt = hn.Langevin([{"params": [a]}, {"params": [b], "step": 0.5, "temperature": 2.0}], step=0.1)
    h, gamma = opt.step_and_friction(1)  # the default friction 1.0 with the group's step
    assert math.isclose(h, 0.5, rel_tol=1e-14) and math.isclose(gamma, 1.0, rel_tol=1e-14)
    assert "step" not in opt.param_groups[1] and "friction" not in opt.param_groups[1]
    assert opt.param_groups[1]["temperature"] == 2.0
    with pytest.raises(ValueError, match="friction"):
        opt.add_param_group({"params": [nn.Parameter(torch.randn(2))], "friction": -1})


def test_param_groups_run_at_their_own_temperature():
    # a temperature-0 group is unaffected by the noise drawn for a hot group
    torch.manual_seed(0)
    cold, hot = nn.Parameter(torch.randn(4, 3)), nn.Parameter(torch.randn(4, 3))
    alone = nn.Parameter(cold.detach().clone())
    opt = hn.Langevin([{"params": [cold], "temperature": 0.0}, {"params": [hot], "temperature": 1.0}], step=0.1)
    ref = hn.Langevin([alone], step=0.1, temperature=0.0)
    for _ in range(20):
        for p in (cold, hot, alone):
            p.grad = p.detach().clone()
        opt.step()
        ref.step()
    assert torch.equal(cold, alone)
    assert not torch.equal(hot.detach(), cold.detach())


def test_lr_scheduler_scales_the_step():
    p = nn.Parameter(torch.randn(5, 3))
    holder = nn.Module()
    holder.p = p
    hn.constrain(holder, p=hn.FixedNorm())
    opt = hn.Langevin([p], lr=0.2, momentum=0.8, temperature=0.1)
    sched = torch.optim.lr_scheduler.StepLR(opt, step_size=2, gamma=0.5)
    seen = []
    for _ in range(6):
        p.grad = torch.randn(5, 3)
        opt.step()
        sched.step()
        seen.append(opt.param_groups[0]["lr"])
    assert seen == [0.2, 0.1, 0.1, 0.05, 0.05, 0.025]
    # h follows sqrt(lr), the friction 1/sqrt(lr) (momentum fixed): docstring of Langevin
    h, gamma = opt.step_and_friction(0)
    assert math.isclose(h, math.sqrt(2 * 0.025 / 1.8), rel_tol=1e-14)
    assert math.isclose(gamma * h, -math.log(0.8), rel_tol=1e-14)
    assert hn.residuals(holder)["p"] < 1e-6
    # a schedule that reaches zero leaves the weights where they are
    opt.param_groups[0]["lr"] = 0.0
    before = p.detach().clone()
    p.grad = torch.randn(5, 3)
    opt.step()
    assert torch.equal(before, p.detach())


def test_failed_projection_names_the_parameter_and_changes_nothing():
    layer = nn.Linear(3, 2).double()
    hn.constrain(layer, weight=hn.FixedNorm(1.0))
    opt = hn.Langevin(layer.parameters(), step=1.0, friction=0.0)
    layer.weight.grad = torch.full((2, 3), 1e3, dtype=torch.float64)  # a kick far beyond the sphere
    layer.bias.grad = torch.zeros(2, dtype=torch.float64)
    before = layer.weight.detach().clone()
    with pytest.raises(hn.IntegrationError, match="Linear.weight.*smaller step") as err:
        opt.step()
    assert err.value.reason == "projection failed"
    assert torch.equal(before, layer.weight.detach())
    assert "momentum" not in opt.state[layer.weight]


def test_dataset_size_scales_the_force():
    a, b = nn.Parameter(torch.zeros(3)), nn.Parameter(torch.zeros(3))
    opt_a = hn.Langevin([a], step=0.1, dataset_size=50)
    opt_b = hn.Langevin([b], step=0.1)
    a.grad = torch.ones(3)
    b.grad = 50 * torch.ones(3)
    opt_a.step()
    opt_b.step()
    torch.testing.assert_close(a, b)
    assert math.isfinite(float(a.detach().sum()))
