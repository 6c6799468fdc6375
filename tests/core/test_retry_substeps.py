"""Steps whose projection has no solution (issue 16, item 6): the opt-in
``retry_substeps`` policy, the substeps of OverdampedLangevin, and
``torch.compile`` around ``optimizer.step``."""

from __future__ import annotations

import copy
import io
import math

import pytest
import torch
from torch import nn

import holonomic as hn
from holonomic.dynamics.operators import overdamped_move
from holonomic.geometry.euclidean import Unconstrained


def rows(n: int, d: int = 4, seed: int = 0, radius: float = 1.0) -> nn.Linear:
    """``n`` fixed-norm rows of length ``d`` (float64)."""
    torch.manual_seed(seed)
    layer = nn.Linear(d, n, bias=False).double()
    hn.constrain(layer, weight=hn.FixedNorm(radius, over="rows"))
    return layer


def zero_grads(*layers: nn.Module) -> None:
    for layer in layers:
        for p in layer.parameters():
            p.grad = torch.zeros_like(p)


def snapshot(opt: hn.dynamics.HolonomicIntegrator, *layers: nn.Module) -> tuple:
    weights = [p.detach().clone() for layer in layers for p in layer.parameters()]
    momenta = {id(p): s["momentum"].clone() for p, s in opt.state.items() if "momentum" in s}
    gens = {k: g.get_state().clone() for k, g in opt._generators.items()}
    return weights, momenta, gens


def assert_same(a: tuple, b: tuple) -> None:
    assert len(a[0]) == len(b[0]) and all(torch.equal(x, y) for x, y in zip(a[0], b[0]))
    assert a[1].keys() == b[1].keys() and all(torch.equal(a[1][k], b[1][k]) for k in a[1])
    assert a[2].keys() == b[2].keys() and all(torch.equal(a[2][k], b[2][k]) for k in a[2])


def row_residual(layer: nn.Linear, radius: float = 1.0) -> float:
    return float((layer.weight.detach().norm(dim=1) - radius).abs().max())


# -- (a) the case: 20000 rows of length 4, T = 1, overdamped h = 0.02 -------------------
# One row's tangent noise move sqrt(2 T h) |xi_t| exceeds the radius 1 (then SHAKE along the
# normal has no solution) with probability 1 - (1 - P(chi2_3 > 25))^20000 ~ 0.27 per step;
# seed 0 draws such a row at the first step.

def test_default_policy_raises_and_changes_nothing():
    layer = rows(20000)
    opt = hn.OverdampedLangevin(layer.parameters(), step=0.02, temperature=1.0)
    opt.generator(layer.weight.device)  # create the generator so its state is compared
    zero_grads(layer)
    before = snapshot(opt, layer)
    with pytest.raises(hn.IntegrationError, match="retry_substeps") as err:
        opt.step()
    assert err.value.reason == "projection failed" and err.value.group == 0
    assert_same(before, snapshot(opt, layer))
    assert opt.retried_steps == 0 and opt.param_groups[0]["substeps"] == 1


def test_overdamped_retry_completes_and_is_recorded():
    layer = rows(20000)
    opt = hn.OverdampedLangevin(layer.parameters(), step=0.02, temperature=1.0, retry_substeps=8)
    zero_grads(layer)
    opt.step()
    assert row_residual(layer) < 1e-12
    assert opt.last_info.retried_substeps == {0: 2}
    assert opt.retried_steps == 1
    assert opt.param_groups[0]["substeps"] == 1  # restored after the retry
    retried = 1
    for _ in range(5):  # later steps: the counter counts the retried steps only
        opt.step()
        retried += bool(opt.last_info.retried_substeps)
        assert row_residual(layer) < 1e-12
    assert opt.retried_steps == retried


# -- (b) a retried step is exactly the step with k times more substeps ------------------------------

def test_overdamped_retry_equals_step_with_more_substeps():
    a, b = rows(20000), rows(20000)
    opt_a = hn.OverdampedLangevin(a.parameters(), step=0.02, temperature=1.0, retry_substeps=8)
    opt_b = hn.OverdampedLangevin(b.parameters(), step=0.02, temperature=1.0, substeps=2)
    zero_grads(a, b)
    opt_a.step()
    assert opt_a.last_info.retried_substeps == {0: 2}
    opt_b.step()
    assert torch.equal(a.weight, b.weight)
    assert torch.equal(opt_a.generator(a.weight.device).get_state(), opt_b.generator(b.weight.device).get_state())


def _langevin_until_retry(opt_factory, n=5000, step=0.4, max_steps=40):
    """Run Langevin on ``n`` rows with a real loss until a step is retried; returns the layer, the
    optimizer, the state and gradient before that step, and the factor used."""
    layer = rows(n, seed=1)
    opt = opt_factory(layer.parameters())
    g = torch.Generator().manual_seed(5)
    for _ in range(max_steps):
        x = torch.randn(32, 4, generator=g, dtype=torch.float64)
        opt.zero_grad()
        (layer(x) ** 2).mean().backward()
        before_w = layer.weight.detach().clone()
        before_sd = copy.deepcopy(opt.state_dict())
        grad = layer.weight.grad.clone()
        opt.step()
        if opt.last_info.retried_substeps:
            return layer, opt, before_w, before_sd, grad, opt.last_info.retried_substeps
    pytest.fail("no step was retried")


@pytest.mark.parametrize("cls", ["langevin", "adaptive"])
def test_langevin_retry_equals_step_with_more_substeps(cls):
    def factory(params, **kw):
        if cls == "langevin":
            return hn.Langevin(params, step=0.4, temperature=1.0, friction=0.5, **kw)
        return hn.AdaptiveLangevin(params, step=0.4, temperature=1.0, friction=0.5, **kw)

    layer, opt, w0, sd0, grad, retried = _langevin_until_retry(lambda ps: factory(ps, retry_substeps=16))
    (k,) = retried.values()
    assert k >= 2 and row_residual(layer) < 1e-12
    # Reference: a second optimizer built with substeps = k, from the same state and generator state.
    ref_layer = rows(len(w0), seed=1)
    with torch.no_grad():
        ref_layer.weight.copy_(w0)
    ref = factory(ref_layer.parameters(), substeps=k)
    ref.load_state_dict(sd0)
    ref.param_groups[0]["substeps"] = k  # load_state_dict restores the saved group settings (substeps 1)
    ref_layer.weight.grad = grad
    ref.step()
    assert not ref.last_info.retried_substeps
    torch.testing.assert_close(layer.weight, ref_layer.weight, rtol=0, atol=1e-13)
    torch.testing.assert_close(opt.state[layer.weight]["momentum"], ref.state[ref_layer.weight]["momentum"],
                               rtol=0, atol=1e-12)
    assert opt.param_groups[0]["substeps"] == 1


def _pushed_row(force: float = 150.0) -> nn.Linear:
    """One unit row ``(1, 0)`` with a tangent force: at T = 0 and h = 0.02 the move has length
    ``0.02 * force``; SHAKE along the normal needs each (sub)move to be at most 1."""
    layer = nn.Linear(2, 1, bias=False).double()
    with torch.no_grad():
        layer.weight.copy_(torch.tensor([[1.0, 0.0]], dtype=torch.float64))
    hn.constrain(layer, weight=hn.FixedNorm(1.0, over="rows"))
    layer.weight.grad = torch.tensor([[0.0, -force]], dtype=torch.float64)
    return layer


def test_only_the_failing_group_is_retried():
    calm, pushed = rows(50, seed=2), _pushed_row()  # move 3: 2 substeps fail, 4 succeed
    opt = hn.OverdampedLangevin([{"params": calm.parameters()},
                                 {"params": pushed.parameters(), "substeps": 2, "temperature": 0.0}],
                                step=0.02, temperature=0.5, retry_substeps=8)
    calm.weight.grad = torch.zeros_like(calm.weight)
    opt.step()
    assert opt.last_info.retried_substeps == {1: 2}  # group 1 ran 2 * 2 substeps, group 0 its 1
    assert [g["substeps"] for g in opt.param_groups] == [1, 2]
    assert row_residual(calm) < 1e-12 and row_residual(pushed) < 1e-12


def test_retry_limit_raises_saying_so_and_changes_nothing():
    # T = 0, a tangent move of length 3 on a unit row: 2 moves of 1.5 fail, 4 of 0.75 succeed.
    layer = _pushed_row()
    opt = hn.OverdampedLangevin(layer.parameters(), step=0.02, retry_substeps=2)
    before = snapshot(opt, layer)
    with pytest.raises(hn.IntegrationError, match=r"retried with up to 2 times more substeps") as err:
        opt.step()
    assert err.value.reason == "projection failed"
    assert_same(before, snapshot(opt, layer))
    assert opt.param_groups[0]["substeps"] == 1 and opt.retried_steps == 0
    layer = _pushed_row()
    opt = hn.OverdampedLangevin(layer.parameters(), step=0.02, retry_substeps=4)
    opt.step()
    assert opt.last_info.retried_substeps == {0: 4}
    assert row_residual(layer) < 1e-14


# -- (c) non-finite gradients are never retried ---------------------------------------------------

def test_non_finite_gradient_is_not_retried():
    wild, bad = rows(20000), rows(3, seed=3)
    opt = hn.OverdampedLangevin([*wild.parameters(), *bad.parameters()], step=0.02, temperature=1.0,
                                retry_substeps=8)
    zero_grads(wild, bad)
    bad.weight.grad[1, 2] = math.nan  # and the first parameter's projection fails as well
    attempts = []
    take = opt._take_step
    opt._take_step = lambda: (attempts.append(1), take())[1]
    before = snapshot(opt, wild, bad)
    with pytest.raises(hn.IntegrationError, match="non-finite gradient") as err:
        opt.step()
    assert err.value.reason == "non-finite gradient" and "retried" not in str(err.value)
    assert len(attempts) == 1 and opt.retried_steps == 0
    assert_same(before, snapshot(opt, wild, bad))


# -- (d) the counter is checkpointed ---------------------------------------------------------------

def test_state_dict_round_trip_keeps_the_counter():
    layer = rows(20000)
    opt = hn.OverdampedLangevin(layer.parameters(), step=0.02, temperature=1.0, retry_substeps=8)
    zero_grads(layer)
    opt.step()
    assert opt.retried_steps == 1
    buffer = io.BytesIO()
    torch.save(opt.state_dict(), buffer)
    buffer.seek(0)
    sd = torch.load(buffer, weights_only=True)
    assert sd["retried_steps"] == 1
    fresh = hn.OverdampedLangevin(layer.parameters(), step=0.02, temperature=1.0, retry_substeps=8)
    fresh.load_state_dict(sd)
    assert fresh.retried_steps == 1
    del sd["retried_steps"]  # a checkpoint written before the counter existed
    fresh.load_state_dict(sd)
    assert fresh.retried_steps == 0


# -- (e) large steps on many rows complete with the policy -------------------------------------------

@pytest.mark.slow
def test_langevin_large_step_many_rows_completes():
    layer = rows(100_000, seed=4)
    plain = hn.Langevin(rows(100_000, seed=4).parameters(), step=0.4, temperature=1.0)
    opt = hn.Langevin(layer.parameters(), step=0.4, temperature=1.0, retry_substeps=16)
    g = torch.Generator().manual_seed(0)
    failures = 0
    for _ in range(6):
        x = torch.randn(64, 4, generator=g, dtype=torch.float64)
        opt.zero_grad()
        (layer(x) ** 2).mean().backward()
        opt.step()
        assert row_residual(layer) < 1e-12
        for p in plain.param_groups[0]["params"]:
            p.grad = layer.weight.grad.clone()
        try:
            plain.step()
        except hn.IntegrationError:
            failures += 1
    assert opt.retried_steps >= 2 and failures >= 2  # the default policy fails often here


# -- policy validation ---------------------------------------------------------------------------------

@pytest.mark.parametrize("value", [0, 1, -2, 2.0, True, "2"])
def test_retry_substeps_is_validated(value):
    for cls in (hn.Langevin, hn.OverdampedLangevin):
        with pytest.raises(ValueError, match=f"retry_substeps .*got {value!r}"):
            cls(rows(2).parameters(), step=0.1, retry_substeps=value)


# -- OverdampedLangevin substeps: the Brownian increment is split along its bridge ------------------

class _Recording(Unconstrained):
    """No constraint; records each sub-move ``y - w``."""

    def __init__(self) -> None:
        self.moves: list[torch.Tensor] = []

    def shake(self, w, y):
        self.moves.append(y - w)
        return super().shake(w, y)


def test_overdamped_substeps_split_the_same_increment():
    n, h, temperature, k = 200_000, 0.3, 0.7, 4
    w = torch.zeros(n, dtype=torch.float64)
    force = torch.zeros(n, dtype=torch.float64)
    one, split = _Recording(), _Recording()
    out1 = overdamped_move(w, force, geometry=one, step=h, temperature=temperature,
                           generator=torch.Generator().manual_seed(0))
    outk = overdamped_move(w, force, geometry=split, step=h, temperature=temperature,
                           generator=torch.Generator().manual_seed(0), substeps=k)
    # The increments sum to the single step's increment sqrt(2 T h) xi (same first draw) ...
    torch.testing.assert_close(outk.w, out1.w, rtol=0, atol=1e-12)
    assert len(split.moves) == k
    # ... and each has variance 2 T h / k per coordinate, uncorrelated with the others
    # (Brownian increments over h/k); standard error of a variance estimate: var sqrt(2/n).
    var = 2 * temperature * h / k
    for i, move in enumerate(split.moves):
        assert abs(float(move.var()) / var - 1) < 5 * math.sqrt(2 / n)
        for other in split.moves[i + 1:]:
            assert abs(float((move * other).mean()) / var) < 5 / math.sqrt(n)


def test_overdamped_substeps_one_is_the_plain_step():
    a, b = rows(30), rows(30)
    opt_a = hn.OverdampedLangevin(a.parameters(), step=0.01, temperature=0.5)
    opt_b = hn.OverdampedLangevin(b.parameters(), step=0.01, temperature=0.5, substeps=1)
    for _ in range(3):
        for layer in (a, b):
            layer.weight.grad = layer.weight.detach().sin()
        opt_a.step()
        opt_b.step()
    assert torch.equal(a.weight, b.weight)


def test_overdamped_substeps_at_zero_temperature_are_small_projected_moves():
    # T = 0, substeps 3: three projected gradient moves of h/3 with the force of the step's start.
    layer = rows(5)
    w0 = layer.weight.detach().clone()
    layer.weight.grad = torch.randn(w0.shape, dtype=torch.float64, generator=torch.Generator().manual_seed(1))
    hn.OverdampedLangevin(layer.parameters(), step=0.05, substeps=3).step()
    geometry = hn.FixedNorm(1.0, over="rows")
    w = w0
    for _ in range(3):
        w = geometry.shake(w, w + geometry.tangent(w, -(0.05 / 3) * layer.weight.grad)).position
    torch.testing.assert_close(layer.weight.detach(), w, rtol=0, atol=1e-15)


# -- torch.compile around optimizer.step -----------------------------------------------------------------

def _mixed(seed=0):
    torch.manual_seed(seed)
    model = nn.Sequential(nn.Linear(6, 8), nn.Tanh(), nn.Linear(8, 5), nn.Tanh(), nn.Linear(5, 3), nn.Linear(3, 1))
    hn.constrain(model, **{"0.weight": hn.FixedNorm(1.0, over="rows"), "2.weight": hn.FixedNorm(2.0, over="columns"),
                           "4.weight": hn.Orthonormal(over="rows")})
    ps = list(model.parameters())
    return model, [{"params": ps[:3]}, {"params": ps[3:], "temperature": 0.0, "substeps": 2}]


@pytest.mark.parametrize("cls", ["langevin", "adaptive"])
def test_compiled_step_runs_eagerly_with_the_same_result(cls):
    def build():
        model, groups = _mixed()
        if cls == "langevin":
            return model, hn.Langevin(groups, step=0.05, temperature=0.1)
        groups[1]["temperature"] = 0.2
        return model, hn.AdaptiveLangevin(groups, step=0.05, temperature=0.1)

    x = torch.randn(16, 6, generator=torch.Generator().manual_seed(0))
    (m1, o1), (m2, o2) = build(), build()
    compiled = torch.compile(o2.step, backend="eager")
    for _ in range(3):
        for model, opt, step in ((m1, o1, o1.step), (m2, o2, compiled)):
            opt.zero_grad()
            model(x).pow(2).mean().backward()
            step()
    assert all(torch.equal(a, b) for a, b in zip(m1.parameters(), m2.parameters()))
    torch._dynamo.reset()


def test_compiled_step_fullgraph_names_the_reason():
    model, groups = _mixed()
    opt = hn.Langevin(groups, step=0.05, temperature=0.1)
    model(torch.randn(4, 6)).sum().backward()
    before = [p.detach().clone() for p in model.parameters()]
    with pytest.raises(Exception, match="holonomic step is a transaction"):
        torch.compile(opt.step, backend="eager", fullgraph=True)()
    assert all(torch.equal(a, b) for a, b in zip(before, model.parameters()))
    torch._dynamo.reset()
