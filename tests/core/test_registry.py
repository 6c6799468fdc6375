"""Declaring constraints on modules: constrain, constraint_of, residuals."""

import copy
import io

import pytest
import torch
from torch import nn

import holonomic as hn


def test_constrain_linear_projects_to_nearest_point_and_records():
    torch.manual_seed(0)
    layer = nn.Linear(5, 3)
    w0 = layer.weight.detach().clone()
    out = hn.constrain(layer, weight=hn.FixedNorm(2.0))
    assert out is layer
    # nearest point on the product of spheres: each row rescaled to norm 2
    torch.testing.assert_close(layer.weight.detach(), 2.0 * w0 / w0.norm(dim=1, keepdim=True))
    assert hn.constraint_of(layer.weight) == hn.FixedNorm(2.0)
    assert hn.constraint_of(layer.bias) is None
    assert set(hn.residuals(layer)) == {"weight"}


def test_orthonormal_projection_is_the_polar_factor():
    # nearest orthonormal matrix in Frobenius norm = U V^T of the SVD
    # (a classical result; e.g. Higham, Accuracy and Stability of Numerical Algorithms)
    torch.manual_seed(1)
    layer = nn.Linear(6, 4).double()
    u, _, vh = torch.linalg.svd(layer.weight.detach(), full_matrices=False)
    hn.constrain(layer, weight=hn.Orthonormal(over="rows", scale=0.5))
    torch.testing.assert_close(layer.weight.detach(), 0.5 * u @ vh)
    assert hn.residuals(layer)["weight"] < 1e-14


def test_conv_embedding_and_plain_attribute_parameters():
    conv = nn.Conv2d(3, 4, kernel_size=3)
    hn.constrain(conv, weight=hn.FixedNorm(1.0))  # one row per output channel (27 weights)
    norms = conv.weight.detach().reshape(4, -1).norm(dim=1)
    torch.testing.assert_close(norms, torch.ones(4))
    emb = nn.Embedding(10, 16)
    hn.constrain(emb, weight=hn.Orthonormal(over="rows"))
    assert hn.residuals(emb)["weight"] < 1e-5

    class Custom(nn.Module):
        def __init__(self):
            super().__init__()
            self.frame = nn.Parameter(torch.randn(8, 3))

    m = Custom()
    hn.constrain(m, frame=hn.Orthonormal(over="columns"))
    assert hn.residuals(m)["frame"] < 1e-5


def test_dotted_names_reach_submodules_and_residuals_use_qualified_names():
    model = nn.Sequential(nn.Linear(4, 8), nn.ReLU(), nn.Linear(8, 2))
    hn.constrain(model, **{"0.weight": hn.FixedNorm(), "2.weight": hn.FixedNorm(0.5, over="all")})
    assert set(hn.residuals(model)) == {"0.weight", "2.weight"}


def test_constraint_survives_to_deepcopy_and_state_dict():
    model = nn.Sequential(nn.Linear(4, 8), nn.Tanh(), nn.Linear(8, 8))
    hn.constrain(model[0], weight=hn.FixedNorm(1.5))
    hn.constrain(model[2], weight=hn.Orthonormal())
    model.to(torch.float64)
    assert hn.constraint_of(model[0].weight) == hn.FixedNorm(1.5)
    assert model[0].weight.dtype == torch.float64
    clone = copy.deepcopy(model)
    assert hn.constraint_of(clone[0].weight) == hn.FixedNorm(1.5)
    assert hn.constraint_of(clone[2].weight) == hn.Orthonormal()
    assert clone[0].weight is not model[0].weight
    # an optimizer built on the copy finds the constraints
    opt = hn.Langevin(clone.parameters(), step=0.1, temperature=0.1)
    clone(torch.randn(3, 4, dtype=torch.float64)).sum().backward()
    opt.step()
    assert max(hn.residuals(clone).values()) < 1e-13
    # state_dict round trip into the constrained model keeps the records and values
    buf = io.BytesIO()
    torch.save(clone.state_dict(), buf)
    buf.seek(0)
    model.load_state_dict(torch.load(buf, weights_only=True))
    assert hn.constraint_of(model[2].weight) == hn.Orthonormal()
    torch.testing.assert_close(model[2].weight, clone[2].weight, rtol=0, atol=0)


def test_residuals_see_drift_from_any_optimizer():
    layer = nn.Linear(6, 4)
    hn.constrain(layer, weight=hn.FixedNorm())
    opt = torch.optim.AdamW(layer.parameters(), lr=0.1)
    layer(torch.randn(5, 6)).pow(2).sum().backward()
    opt.step()
    assert hn.residuals(layer)["weight"] > 1e-3


@pytest.mark.parametrize(
    "call,match",
    [
        (lambda m: hn.constrain(m, weights=hn.FixedNorm()), "not a parameter of Linear"),
        (lambda m: hn.constrain(m, weight="sphere"), "expected a constraint"),
        (lambda m: hn.constrain(m), "at least one"),
        (lambda m: hn.constrain(m, bias=hn.FixedNorm()), "over='all'"),
        (lambda m: hn.constrain(m, weight=hn.Orthonormal(over="columns")), "wide"),
        (lambda m: hn.constrain(m, **{"9.weight": hn.FixedNorm()}), "no submodule"),
    ],
)
def test_bad_declarations_raise_value_error(call, match):
    with pytest.raises(ValueError, match=match):
        call(nn.Linear(5, 3))


def test_zero_row_cannot_be_projected():
    layer = nn.Linear(3, 2)
    with torch.no_grad():
        layer.weight[1] = 0.0
    with pytest.raises(ValueError, match="Linear.weight.*zero"):
        hn.constrain(layer, weight=hn.FixedNorm())
    assert hn.constraint_of(layer.weight) is None
