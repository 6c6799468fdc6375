"""Constraints that survive the replacement of a parameter (issue 16 item 3).

``module.weight = nn.Parameter(...)``, ``load_state_dict(..., assign=True)``
and the tensor swaps of ``set_swap_module_params_on_conversion(True)``
replace (or swap the attributes of) the parameter object; the declaration made
by ``constrain`` must carry over, and an optimizer built before a replacement
must not step the stale parameter silently.
"""

import copy
import pickle
import warnings

import pytest
import torch
from torch import nn

import holonomic as hn


def _model() -> nn.Sequential:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(5, 4), nn.Tanh(), nn.Linear(4, 3))
    hn.constrain(model, **{"0.weight": hn.FixedNorm(1.0), "2.weight": hn.Orthonormal()})
    return model


@pytest.fixture
def swap_on_conversion():
    before = torch.__future__.get_swap_module_params_on_conversion()
    torch.__future__.set_swap_module_params_on_conversion(True)
    yield
    torch.__future__.set_swap_module_params_on_conversion(before)


def _train(model: nn.Sequential, steps: int = 20) -> None:
    opt = hn.Langevin(model.parameters(), step=0.05, temperature=0.01, seed=1)
    dtype = next(model.parameters()).dtype
    x = torch.randn(16, 5, dtype=dtype)
    for _ in range(steps):
        opt.zero_grad()
        model(x).pow(2).sum().backward()
        opt.step()


def _assert_declared(model: nn.Sequential) -> None:
    assert hn.constraint_of(model[0].weight) == hn.FixedNorm(1.0)
    assert hn.constraint_of(model[2].weight) == hn.Orthonormal()
    assert set(hn.residuals(model)) == {"0.weight", "2.weight"}


def test_assigning_a_new_parameter_keeps_the_constraint():
    model = _model()
    on_set = hn.FixedNorm(1.0).project(torch.randn(4, 5))
    model[0].weight = nn.Parameter(on_set.clone())  # before the fix: constraint_of(...) is None
    _assert_declared(model)
    _train(model)  # an optimizer built afterwards holds the constraint
    norms = model[0].weight.detach().norm(dim=1)
    torch.testing.assert_close(norms, torch.ones(4), rtol=0, atol=1e-5)
    assert max(hn.residuals(model).values()) < 1e-5


def test_load_state_dict_assign_keeps_the_constraint():
    model = _model()
    other = _model()
    _train(other)
    model.load_state_dict(other.state_dict(), assign=True)  # replaces every parameter object
    _assert_declared(model)
    _train(model)
    assert max(hn.residuals(model).values()) < 1e-5


def test_swap_on_conversion_keeps_the_constraint(swap_on_conversion):
    model = _model()
    weight = model[0].weight
    model.to(torch.float64)  # swap_tensors: same object, attributes swapped away
    assert model[0].weight is weight and weight.dtype == torch.float64
    _assert_declared(model)
    _train(model)
    assert max(hn.residuals(model).values()) < 1e-12
    # load_state_dict also swaps under this flag
    other = _model().double()
    model.load_state_dict(other.state_dict())
    _assert_declared(model)


def test_a_replacement_off_the_set_warns_and_shows_in_residuals():
    model = _model()
    with pytest.warns(UserWarning, match=r"0.weight was replaced by a value off its constraint set"):
        model[0].weight = nn.Parameter(3.0 * torch.randn(4, 5))
    assert hn.constraint_of(model[0].weight) == hn.FixedNorm(1.0)
    assert hn.residuals(model)["0.weight"] > 0.1  # reported, not hidden
    hn.repair(model)
    assert hn.residuals(model)["0.weight"] < 1e-6


def test_a_shape_the_constraint_cannot_hold_drops_it_with_a_warning():
    layer = nn.Linear(5, 4)
    hn.constrain(layer, weight=hn.Orthonormal())
    with pytest.warns(UserWarning, match=r"shape \(6, 5\).*cannot hold it and was dropped"):
        layer.weight = nn.Parameter(torch.randn(6, 5))  # 6 orthonormal rows in dimension 5
    assert hn.constraint_of(layer.weight) is None
    assert hn.residuals(layer) == {}


@pytest.mark.parametrize("how", ["assign", "load_assign"])
def test_an_optimizer_holding_the_replaced_parameter_refuses_to_step(how):
    model = _model()
    opt = hn.Langevin(model.parameters(), step=0.05, temperature=0.0)
    if how == "assign":
        model[0].weight = nn.Parameter(model[0].weight.detach().clone())
    else:
        model.load_state_dict(copy.deepcopy(model.state_dict()), assign=True)
    model(torch.randn(3, 5)).sum().backward()
    before = [p.detach().clone() for p in model.parameters()]
    # before the fix: the step trains the stale tensors and the model silently stays put
    with pytest.raises(ValueError, match=r"0\.weight \(param group 0, parameter 0\) is no longer its module's"):
        opt.step()
    for p, b in zip(model.parameters(), before):
        assert torch.equal(p.detach(), b)
    # an optimizer built afterwards steps
    hn.Langevin(model.parameters(), step=0.05, temperature=0.0).step()
    assert not torch.equal(model[0].weight.detach(), before[0])


def test_reassigning_the_original_parameter_is_accepted():
    model = _model()
    original = model[0].weight
    opt = hn.Langevin(model.parameters(), step=0.05, temperature=0.0)
    model[0].weight = nn.Parameter(original.detach().clone())
    model[0].weight = original  # back to the object the optimizer holds
    model(torch.randn(3, 5)).sum().backward()
    opt.step()
    assert hn.constraint_of(model[0].weight) == hn.FixedNorm(1.0)


def test_direct_write_to_parameters_is_picked_up_by_residuals():
    model = _model()
    model[0]._parameters["weight"] = nn.Parameter(model[0].weight.detach().clone())  # no hook fires
    assert set(hn.residuals(model)) == {"0.weight", "2.weight"}
    assert hn.constraint_of(model[0].weight) == hn.FixedNorm(1.0)


def test_deepcopy_and_pickle_keep_constraints_and_replacement_tracking():
    model = _model()
    for clone in (copy.deepcopy(model), pickle.loads(pickle.dumps(model))):
        _assert_declared(clone)
        clone[0].weight = nn.Parameter(clone[0].weight.detach().clone())
        assert hn.constraint_of(clone[0].weight) == hn.FixedNorm(1.0)
    _assert_declared(model)


def test_second_constrain_warns_unless_replace():
    layer = nn.Linear(6, 4)
    hn.constrain(layer, weight=hn.FixedNorm(1.0))
    with pytest.warns(UserWarning, match=r"Linear.weight \('weight'\) is already constrained to "
                                         r"FixedNorm\(radius=1.0.*Orthonormal\(.*replace=True"):
        hn.constrain(layer, weight=hn.Orthonormal())
    assert hn.constraint_of(layer.weight) == hn.Orthonormal()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        hn.constrain(layer, weight=hn.FixedNorm(2.0), replace=True)
        hn.constrain(layer, weight=hn.FixedNorm(2.0))  # the same declaration again: no warning
    assert hn.constraint_of(layer.weight) == hn.FixedNorm(2.0)
