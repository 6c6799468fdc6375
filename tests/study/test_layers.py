"""Which weights the constraint and max-norm arms act on: ``[model] constrain`` and
``[arms.NAME] constrain`` (hidden layers, conv kernels, the output layer, name patterns)."""

from __future__ import annotations

import math

import pytest
import torch
from torch import nn

import holonomic as hn
from holonomic.study import StudyConfigError, parse_config
from holonomic.study.arms import (check_layer_selections, constraint_residual, prepare_arm,
                                  weight_norms)
from holonomic.study.models import build_model, hidden_layers, mlp, output_layer, select_weights
from holonomic.study.execution import run_all
from holonomic.study.runner import RunSpec, train_run
from tests.study.factories_layers import conv_only, digits_cnn, digits_cnn_bn

CONVS = ["features.0.weight", "features.2.weight"]


def _config(doc, factory="digits_cnn", constrain=None, **arm_constrain):
    """The tiny study on scikit-learn's bundled digits data with a factory model."""
    doc["data"] = {"source": "digits", "train_size": 200, "val_fraction": 0.2,
                   "test_fraction": 0.3}
    doc["model"] = {"factory": f"tests.study.factories_layers:{factory}"}
    if constrain is not None:
        doc["model"]["constrain"] = constrain
    for arm, value in arm_constrain.items():
        doc["arms"][arm]["constrain"] = value
    return parse_config(doc)


def _error(call) -> str:
    with pytest.raises(StudyConfigError) as info:
        call()
    return str(info.value)


# -- config keys ------------------------------------------------------------------------

def test_constrain_keys_parse_with_hidden_default(tiny_doc):
    config = parse_config(tiny_doc)
    assert config.model.constrain == "hidden"
    assert config.arm("fixed_norm").constrain is None
    assert config.arm("fixed_norm").layer_selection(config.model) == ("hidden",
                                                                      "model.constrain")
    tiny_doc["model"]["constrain"] = "hidden+output"
    tiny_doc["arms"]["orthonormal"]["constrain"] = ["0.weight"]
    config = parse_config(tiny_doc)
    assert config.model.constrain == "hidden+output"
    assert config.arm("orthonormal").layer_selection(config.model) == (
        ("0.weight",), "arms.orthonormal.constrain")
    assert config.arm("max_norm").layer_selection(config.model) == ("hidden+output",
                                                                    "model.constrain")


@pytest.mark.parametrize("where,value,needle", [
    ("model", "conv", "'model.constrain' must be \"hidden\""),
    ("model", "fc1.weight", "a single pattern goes in a list"),
    ("model", [], "'model.constrain' must be"),
    ("model", 3, "'model.constrain' must be"),
    ("model", ["fc1.weight", ""], "patterns must be non-empty strings"),
    ("model", ["a", "a"], "repeated patterns"),
    ("fixed_norm", "all", "'arms.fixed_norm.constrain' must be"),
    ("weight_decay", "hidden", "weight decay acts on every parameter"),
    ("none", "hidden", "'arms.none.constrain' has no effect"),
])
def test_bad_constrain_values_are_refused(tiny_doc, where, value, needle):
    if where == "model":
        tiny_doc["model"]["constrain"] = value
    else:
        tiny_doc["arms"][where]["constrain"] = value
    assert needle in _error(lambda: parse_config(tiny_doc))


def test_an_arm_override_changes_the_training_fingerprint(tiny_doc):
    # runs made with one layer selection must not be mixed with runs of another
    before = parse_config(tiny_doc).training_fingerprint()
    tiny_doc["arms"]["fixed_norm"]["constrain"] = ["0.weight"]
    after = parse_config(tiny_doc).training_fingerprint()
    tiny_doc["arms"]["fixed_norm"].pop("constrain")
    tiny_doc["model"]["constrain"] = "hidden+output"
    assert len({before, after, parse_config(tiny_doc).training_fingerprint()}) == 3


# -- selection ----------------------------------------------------------------------------

def test_hidden_covers_convolutions_and_leaves_the_output_layer():
    model = digits_cnn(64, 10)
    assert [n for n, _ in hidden_layers(model)] == CONVS + ["fc1.weight"]
    assert output_layer(model)[0] == "out.weight"
    assert [n for n, _ in select_weights(model, "hidden+output")] == (
        CONVS + ["fc1.weight", "out.weight"])
    assert [n for n, _ in select_weights(model, ["features.*.weight"])] == CONVS
    # a pattern may also match a bias: the bias is left alone
    assert [n for n, _ in select_weights(model, ["fc1.*", "features.0.w*"])] == [
        "features.0.weight", "fc1.weight"]


def test_without_a_linear_the_last_convolution_is_the_output_layer():
    model = conv_only(64, 3)
    assert output_layer(model)[0] == "3.weight"
    assert [n for n, _ in hidden_layers(model)] == ["1.weight"]


def test_default_on_an_mlp_is_unchanged(tiny_config):
    # the layers every arm acted on before layer selections existed: every Linear but the last
    model = build_model(tiny_config.model, 16, 4, seed=0)
    for arm in ("max_norm", "fixed_norm", "orthonormal"):
        setup = prepare_arm(arm, 0.5, build_model(tiny_config.model, 16, 4, seed=0),
                            tiny_config)
        assert setup.layers == ["0.weight", "2.weight"], arm
    assert prepare_arm("none", 0.0, model, tiny_config).layers == []
    assert prepare_arm("weight_decay", 1e-3, model, tiny_config).layers == ["(all parameters)"]
    with torch.no_grad():
        expected = math.sqrt(sum(float(model[i].weight.pow(2).sum()) for i in (0, 2)))
    setup = prepare_arm("none", 0.0, model, tiny_config)
    assert weight_norms(model, setup)["weight_norm_hidden"] == pytest.approx(expected)
    assert weight_norms(model)["weight_norm_hidden"] == pytest.approx(expected)
    output = float(model[4].weight.detach().norm())
    assert weight_norms(model)["weight_norm_output"] == pytest.approx(output)


def test_an_unmatched_pattern_is_refused_naming_key_pattern_and_eligible(tiny_doc):
    config = _config(tiny_doc, fixed_norm=["conv*.weight"])
    message = _error(lambda: prepare_arm("fixed_norm", 0.5, digits_cnn(64, 10), config))
    assert "'arms.fixed_norm.constrain'" in message and "'conv*.weight'" in message
    assert "matches no parameter" in message
    assert "features.0.weight, features.2.weight, fc1.weight, out.weight" in message


def test_a_pattern_matching_only_biases_or_batch_norm_is_refused(tiny_doc):
    config = _config(tiny_doc, factory="digits_cnn_bn", constrain=["features.1.*"])
    message = _error(lambda: prepare_arm("max_norm", 0.5, digits_cnn_bn(64, 10), config))
    assert "'model.constrain' pattern 'features.1.*' matches only parameters" in message
    assert "features.1.weight (parameter of BatchNorm2d" in message
    assert "features.1.bias (bias of BatchNorm2d: biases are never constrained)" in message
    assert "Eligible parameters: features.0.weight, features.3.weight" in message
    message = _error(lambda: select_weights(digits_cnn(64, 10), ["*.bias"], "arms.x"))
    assert "'arms.x' pattern '*.bias'" in message and "out.bias (bias of Linear" in message


def test_hidden_without_a_hidden_layer_is_refused_and_names_the_alternative():
    model = nn.Sequential(nn.Linear(5, 3))
    message = _error(lambda: prepare_arm("fixed_norm", 1.0, model))
    assert "'model.constrain' = 'hidden'" in message and "hidden+output" in message


def test_a_weight_that_cannot_hold_the_constraint_is_refused_by_name():
    # one input feature: each row of the first layer has length 1 (no freedom on a sphere)
    message = _error(lambda: prepare_arm("fixed_norm", 1.0, mlp(1, (4,), 3)))
    assert "the fixed_norm arm cannot act on '0.weight'" in message


# -- what the arms do to convolutions and output layers -----------------------------------

def test_fixed_norm_holds_each_output_channels_kernel(tiny_doc):
    config = _config(tiny_doc, constrain=["features.*.weight"])
    model = digits_cnn(64, 10)
    setup = prepare_arm("fixed_norm", 0.7, model, config)
    assert setup.layers == setup.measured == CONVS
    for name in CONVS:
        w = model.get_parameter(name)
        assert hn.constraint_of(w) == hn.FixedNorm(0.7, over="rows")
        norms = w.detach().flatten(1).norm(dim=1)
        assert torch.allclose(norms, torch.full((8,), 0.7), rtol=1e-6)
    assert hn.constraint_of(model.fc1.weight) is None
    assert constraint_residual(model, setup) < 1e-6
    norms = weight_norms(model, setup)
    assert norms["mean_row_norm_hidden"] == pytest.approx(0.7, rel=1e-6)
    assert norms["weight_norm_hidden"] == pytest.approx(0.7 * math.sqrt(16), rel=1e-6)


def test_max_norm_clips_each_output_channels_kernel(tiny_doc):
    config = _config(tiny_doc, max_norm=["features.*"])
    model = digits_cnn(64, 10)
    conv = model.features[2].weight
    before = conv.detach().flatten(1).norm(dim=1)
    c = float(before.median())
    setup = prepare_arm("max_norm", c, model, config)
    assert setup.layers == CONVS and setup.radius == c
    after = conv.detach().flatten(1).norm(dim=1)
    assert torch.all(after <= c * (1 + 1e-6))
    assert torch.allclose(after, torch.minimum(before, torch.tensor(c)), rtol=1e-6)
    with torch.no_grad():
        conv.mul_(3.0)
    assert constraint_residual(model, setup) > 0.5
    setup.after_step()
    assert constraint_residual(model, setup) < 1e-6
    assert torch.all(model.features[0].weight.detach().flatten(1).norm(dim=1) <= c * (1 + 1e-6))


def test_orthonormal_uses_the_out_by_in_k_k_view_of_a_kernel():
    # (8, 1*3*3): rows; (16, 8*1*1): more outputs than the kernel's length, so columns;
    # (16, 16*1*1): square, rows
    model = nn.Sequential(nn.Conv2d(1, 8, 3), nn.Conv2d(8, 16, 1), nn.Conv2d(16, 16, 1),
                          nn.Flatten(), nn.Linear(16 * 36, 2))
    setup = prepare_arm("orthonormal", 0.5, model)
    assert setup.layers == ["0.weight", "1.weight", "2.weight"]
    overs = [hn.constraint_of(model[i].weight).over for i in range(3)]
    assert overs == ["rows", "columns", "rows"]
    for i in range(3):
        m = model[i].weight.detach().double().flatten(1)
        gram = m @ m.T if m.shape[0] <= m.shape[1] else m.T @ m
        assert torch.allclose(gram, 0.25 * torch.eye(len(gram), dtype=gram.dtype), atol=1e-6)


@pytest.mark.parametrize("arm", ["fixed_norm", "orthonormal"])
def test_a_one_output_regression_layer_is_one_row_of_norm_strength(tiny_doc, arm):
    tiny_doc["model"]["constrain"] = "hidden+output"
    config = parse_config(tiny_doc)
    model = mlp(5, (4, 4), 1)
    setup = prepare_arm(arm, 0.8, model, config)
    assert setup.layers == ["0.weight", "2.weight", "4.weight"]
    assert float(model[4].weight.detach().norm()) == pytest.approx(0.8, rel=1e-6)
    assert weight_norms(model, setup)["weight_norm_output"] == pytest.approx(0.8, rel=1e-6)


# -- runs: refused, not recorded -------------------------------------------------------------

def test_a_refused_selection_propagates_from_a_run_and_stops_the_study_first(tiny_doc,
                                                                            tmp_path):
    config = _config(tiny_doc, orthonormal=["features.*.wieght"])
    with pytest.raises(StudyConfigError, match="arms.orthonormal.constrain"):
        train_run(config, RunSpec("orthonormal", 0, 0.5, seed=0))
    # checked before any run: the none and weight_decay runs planned first are not trained
    trained = []
    with pytest.raises(StudyConfigError, match="'features.*.wieght'"):
        run_all(config, tmp_path / "out", progress=False,
                execute=lambda *args: trained.append(args))
    assert trained == [] and not list((tmp_path / "out" / "runs").glob("*.json"))


def test_the_check_before_the_runs_refuses_and_leaves_value_reading_factories_to_the_run(tiny_doc):
    config = _config(tiny_doc, fixed_norm=["nothing"])
    with pytest.raises(StudyConfigError, match="'nothing' matches no parameter"):
        check_layer_selections(config, 64, 10)
    # a factory that reads values cannot build on the meta device: left to its first run
    config = _config(tiny_doc, factory="needs_values", fixed_norm=["nothing"])
    check_layer_selections(config, 64, 10)
    with pytest.raises(StudyConfigError, match="'nothing' matches no parameter"):
        prepare_arm("fixed_norm", 1.0, build_model(config.model, 64, 10, seed=0), config)
