"""Generic integrator tests driven by the registry: every scheme x constraint x kernel that
supports the case, with the kernel pinned (``registry.pin``)."""

import copy
import io

import pytest
import torch

import holonomic as hn

from .registry import CASE_IDS, CASES, INTEGRATORS, pin, toy, toy_data, train
# roundoff levels (relative): float64 ~1e-14, float32 ~1e-7 (a small multiple of machine epsilon)
TOL = {torch.float64: 1e-13, torch.float32: 2e-6}


@pytest.mark.parametrize("dtype", [torch.float64, torch.float32], ids=["f64", "f32"])
@pytest.mark.parametrize("integrator,constraint,kernel", CASES, ids=CASE_IDS)
def test_constraint_holds_to_roundoff(integrator, constraint, kernel, dtype):
    model = toy(constraint, dtype=dtype)
    opt = pin(INTEGRATORS[integrator](model.parameters(), temperature=0.3), kernel)
    train(model, opt, 300, toy_data(dtype))
    assert dict(opt.last_info.kernels)["Linear.weight"] == kernel  # the pinned kernel took the step
    res = hn.residuals(model)
    assert set(res) == {"hidden.weight"}
    assert res["hidden.weight"] < TOL[dtype]
    momentum = opt.state[model.hidden.weight].get("momentum")
    if momentum is not None:  # the momentum is tangent at the weights
        c = hn.constraint_of(model.hidden.weight)
        assert float(c.tangent_residual(model.hidden.weight.detach(), momentum)) < 100 * TOL[dtype]


@pytest.mark.parametrize("integrator,constraint,kernel", CASES, ids=CASE_IDS)
def test_same_seed_same_trajectory_different_seed_different(integrator, constraint, kernel):
    runs = []
    for seed in (7, 7, 8):
        model = toy(constraint)
        opt = pin(INTEGRATORS[integrator](model.parameters(), temperature=0.5, seed=seed), kernel)
        runs.append(train(model, opt, 20, toy_data()).hidden.weight.detach().clone())
    assert torch.equal(runs[0], runs[1])
    assert not torch.equal(runs[0], runs[2])


@pytest.mark.parametrize("integrator,constraint,kernel", CASES, ids=CASE_IDS)
def test_state_dict_round_trip_continues_bit_identically(integrator, constraint, kernel):
    data = toy_data()
    model = toy(constraint)
    opt = pin(INTEGRATORS[integrator](model.parameters(), temperature=0.5, seed=3), kernel)
    train(model, opt, 10, data)
    buf = io.BytesIO()
    torch.save({"model": model.state_dict(), "opt": opt.state_dict()}, buf)
    train(model, opt, 10, data)  # uninterrupted continuation

    buf.seek(0)
    ckpt = torch.load(buf, weights_only=True)  # plain tensors, numbers and strings only
    resumed = toy(constraint, seed=99)  # different init, overwritten by the load
    resumed.load_state_dict(ckpt["model"])
    opt2 = pin(INTEGRATORS[integrator](resumed.parameters(), temperature=0.5, seed=0), kernel)  # seed restored too
    opt2.load_state_dict(ckpt["opt"])
    train(resumed, opt2, 10, data)
    for a, b in zip(model.parameters(), resumed.parameters()):
        assert torch.equal(a, b)


@pytest.mark.parametrize("integrator,constraint,kernel", CASES, ids=CASE_IDS)
def test_temperature_zero_is_deterministic_and_draws_no_noise(integrator, constraint, kernel):
    model = toy(constraint)
    opt = pin(INTEGRATORS[integrator](model.parameters(), temperature=0.0, seed=1), kernel)
    other = copy.deepcopy(model)
    opt_other = pin(INTEGRATORS[integrator](other.parameters(), temperature=0.0, seed=2), kernel)
    train(model, opt, 15, toy_data())
    train(other, opt_other, 15, toy_data())
    for a, b in zip(model.parameters(), other.parameters()):
        assert torch.equal(a, b)
    assert opt.state_dict()["generators"] == {}


@pytest.mark.parametrize("integrator,constraint,kernel", CASES, ids=CASE_IDS)
def test_failed_step_changes_nothing(integrator, constraint, kernel):
    model = toy(constraint)
    opt = pin(INTEGRATORS[integrator](model.parameters(), temperature=0.5), kernel)
    data = toy_data()
    train(model, opt, 5, data)
    before = copy.deepcopy((model.state_dict(), opt.state_dict()))
    x, y = data
    opt.zero_grad()
    ((model(x) - y) ** 2).mean().backward()
    model.out.bias.grad[0] = float("nan")  # a later parameter: earlier ones were already computed
    with pytest.raises(hn.IntegrationError, match="non-finite gradient") as err:
        opt.step()
    assert err.value.reason == "non-finite gradient"
    after = (model.state_dict(), opt.state_dict())
    for k, v in before[0].items():
        assert torch.equal(v, after[0][k])
    for p, s in before[1]["state"].items():
        for k, v in s.items():
            assert torch.equal(v, after[1]["state"][p][k])
    for k, v in before[1]["generators"].items():
        assert torch.equal(v, after[1]["generators"][k])


@pytest.mark.parametrize("temperature", [0.0, 0.5])
@pytest.mark.parametrize("integrator,constraint,kernel", [c for c in CASES if c[2] != "reference"],
                         ids=[i for c, i in zip(CASES, CASE_IDS) if c[2] != "reference"])
def test_kernel_matches_the_reference_kernel(integrator, constraint, kernel, temperature):
    # outside reference: the reference kernel runs the scheme's operators one by one
    # (holonomic.dynamics.operators); a kernel computes the same step to float64 roundoff
    data = toy_data()
    runs = []
    for name in (kernel, "reference"):
        model = toy(constraint)
        opt = pin(INTEGRATORS[integrator](model.parameters(), temperature=temperature, seed=4), name)
        runs.append((train(model, opt, 25, data), opt))
    (fast, fast_opt), (ref, ref_opt) = runs
    for a, b in zip(fast.parameters(), ref.parameters()):
        torch.testing.assert_close(a, b, rtol=1e-10, atol=1e-11)
        torch.testing.assert_close(fast_opt.state[a]["momentum"], ref_opt.state[b]["momentum"], rtol=1e-9, atol=1e-10)
    assert dict(fast_opt.last_info.kernels)["Linear.weight"] == kernel
