"""Config errors: each names the key and the allowed values (or what to change)."""

from __future__ import annotations

import math

import pytest

from holonomic.cli import main
from holonomic.study import StudyConfigError, load_config, parse_config
from holonomic.study.demo import demo_document


def _error(doc, **kw) -> str:
    with pytest.raises(StudyConfigError) as info:
        parse_config(doc, **kw)
    return str(info.value)


def test_demo_and_example_parse():
    config = parse_config(demo_document())
    assert [a.name for a in config.arms] == ["none", "weight_decay", "max_norm", "fixed_norm",
                                             "orthonormal"]
    assert len(config.seeds) >= 5
    digits = load_config("examples/digits.toml")
    assert digits.data.source == "digits" and len(digits.seeds) >= 5


def test_unknown_key_names_key_and_allowed(tiny_doc):
    tiny_doc["data"]["trian_size"] = 10
    message = _error(tiny_doc)
    assert "'data.trian_size'" in message and "train_size" in message
    tiny_doc["data"].pop("trian_size")
    tiny_doc["extra"] = {}
    assert "'extra'" in _error(tiny_doc) and "budget" in _error(tiny_doc)


@pytest.mark.parametrize("section,key,value,needle", [
    ("budget", "epochs", "ten", "'budget.epochs' must be an integer"),
    ("budget", "lr", "fast", "'budget.lr' must be a number"),
    ("budget", "schedule", "linear", "constant, cosine"),
    ("model", "activation", "sigmoid", "relu, tanh, gelu, silu"),
    ("model", "widths", [], "'model.widths'"),
    ("data", "standardize", "yes", "'data.standardize' must be true or false"),
    ("data", "test_fraction", 1.5, "'data.test_fraction' must be < 1.0"),
    ("study", "seeds", 1, "'study.seeds' must be at least 2"),
    ("study", "selection", "test_accuracy", "val_accuracy, val_balanced_accuracy, val_macro_f1"),
])
def test_wrong_type_or_value(tiny_doc, section, key, value, needle):
    tiny_doc[section][key] = value
    assert needle in _error(tiny_doc)


def test_unknown_arm_lists_allowed(tiny_doc):
    # an arm named after no regulariser must name one; the message lists them all
    tiny_doc["arms"]["heavy_ball"] = {"grid": [0.1, 0.2]}
    message = _error(tiny_doc)
    assert "'arms.heavy_ball.regulariser' is missing" in message
    assert ("none, weight_decay, decoupled_weight_decay, max_norm, fixed_norm, orthonormal, "
            "dropout") in message


def test_empty_grid(tiny_doc):
    tiny_doc["arms"]["fixed_norm"]["grid"] = []
    assert "'arms.fixed_norm.grid' is empty" in _error(tiny_doc)


def test_unequal_grids_and_missing_baseline(tiny_doc):
    tiny_doc["arms"]["fixed_norm"]["grid"] = [0.5, 1.0, 2.0]
    message = _error(tiny_doc)
    assert "same number of grid points" in message and "search.strength = {low" in message
    tiny_doc["arms"]["fixed_norm"]["grid"] = [0.5, 1.0]
    del tiny_doc["arms"]["weight_decay"]
    assert "'arms.weight_decay' is missing" in _error(tiny_doc)


def test_both_parametrisations_rejected(tiny_doc):
    tiny_doc["budget"]["step"] = 0.1
    assert "either step + friction or lr + momentum" in _error(tiny_doc)


def test_sgd_mapping_matches_documented_formula(tiny_doc):
    # mapping from the core's documentation: mu = exp(-gamma h), lr = h^2 (1 + mu) / 2
    h, gamma = parse_config(tiny_doc).budget.step_friction()
    lr, mu = tiny_doc["budget"]["lr"], tiny_doc["budget"]["momentum"]
    assert math.isclose(math.exp(-gamma * h), mu, rel_tol=1e-12)
    assert math.isclose(h * h * (1 + mu) / 2, lr, rel_tol=1e-12)


def test_missing_files(tmp_path, tiny_doc):
    with pytest.raises(StudyConfigError, match="file does not exist"):
        load_config(tmp_path / "nope.toml")
    tiny_doc["data"]["source"] = "nope.csv"
    message = _error(tiny_doc, base_dir=tmp_path)
    assert "'data.source' file does not exist" in message and "nope.csv" in message


def test_missing_target_column(tmp_path, tiny_doc):
    (tmp_path / "d.csv").write_text("a,b,label\n1,2,x\n3,4,y\n")
    tiny_doc["data"]["source"] = "d.csv"
    tiny_doc["data"]["target"] = "class"
    message = _error(tiny_doc, base_dir=tmp_path)
    assert "'data.target' = 'class' is missing" in message and "a, b, label" in message


def test_cli_reports_config_error(tmp_path, capsys):
    study = tmp_path / "bad.toml"
    study.write_text('[data]\nsource = "digits"\n[arms.weight_decay]\ngrid = []\n')
    assert main(["study", str(study), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert "holonomic study: error:" in err and "'arms.weight_decay.grid' is empty" in err
    assert main(["study", "--out", str(tmp_path / "out")]) == 2
    assert "exactly one" in capsys.readouterr().err
    assert main(["study", str(tmp_path / "missing.toml"), "--out", str(tmp_path)]) == 2
    assert "file does not exist" in capsys.readouterr().err
