"""A CNN factory on scikit-learn's bundled digits data (open data shipped inside
scikit-learn: 1797 8x8 images), trained by the study with its conv layers constrained."""

from __future__ import annotations

import pytest
import torch

import holonomic as hn
from holonomic.study import parse_config
from holonomic.study.runner import RunSpec, train_run

CONVS = ["features.0.weight", "features.2.weight"]


@pytest.fixture
def cnn_config(tiny_doc):
    tiny_doc["data"] = {"source": "digits", "train_size": 300, "val_fraction": 0.2,
                        "test_fraction": 0.3}
    tiny_doc["model"] = {"factory": "tests.study.factories_layers:digits_cnn",
                         "constrain": ["features.*.weight"]}
    tiny_doc["budget"].update(epochs=5, batch_size=32, lr=0.05, momentum=0.9)
    return parse_config(tiny_doc)


def _channel_norms(model) -> list[torch.Tensor]:
    return [model.get_parameter(n).detach().flatten(1).norm(dim=1) for n in CONVS]


@pytest.mark.slow
def test_cnn_conv_kernels_held_at_the_radius_and_clipped_to_the_ball(cnn_config):
    radius = 0.5
    record, model = train_run(cnn_config, RunSpec("fixed_norm", 1, radius, seed=0),
                              return_model=True)
    assert record["status"] == "ok", record["message"]
    assert record["layers"] == CONVS
    for norms in _channel_norms(model):  # float32: every output channel's kernel at r
        assert torch.allclose(norms, torch.full_like(norms, radius), rtol=0, atol=1e-5)
    for name in CONVS:
        assert hn.constraint_of(model.get_parameter(name)) is not None
    assert record["metrics"]["constraint_residual"] < 1e-5
    assert record["metrics"]["mean_row_norm_hidden"] == pytest.approx(radius, abs=1e-5)
    assert record["history"]["mean_row_norm_hidden"][-1] == pytest.approx(radius, abs=1e-5)
    assert record["metrics"]["test_accuracy"] > 0.3  # it learns (10 classes: chance 0.1)

    record, model = train_run(cnn_config, RunSpec("max_norm", 1, 0.3, seed=0),
                              return_model=True)
    assert record["status"] == "ok" and record["layers"] == CONVS
    norms = torch.cat(_channel_norms(model))
    assert norms.max() <= 0.3 * (1 + 1e-6)
    assert record["metrics"]["constraint_residual"] <= 1e-6

    record, model = train_run(cnn_config, RunSpec("orthonormal", 1, 0.5, seed=0),
                              return_model=True)
    assert record["status"] == "ok" and record["layers"] == CONVS
    for name in CONVS:  # (8, 9) and (8, 72): rows
        m = model.get_parameter(name).detach().flatten(1)
        assert torch.allclose(m @ m.T, 0.25 * torch.eye(8), atol=1e-5)
