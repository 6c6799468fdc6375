"""Arms as recipes: registries, trials with an equal budget, per-layer groups, reference
optimisers (torch.optim.AdamW and torch.optim.SGD), dropout, config errors, halving."""

from __future__ import annotations

import copy
import json
import textwrap
import warnings
import math

import numpy as np
import pytest
import torch
from torch import nn
from torch.nn import functional as F

from holonomic.study import StudyConfigError, parse_config
from holonomic.study.data import load_dataset, make_split
from holonomic.study.models import build_model
from holonomic.study.runner import RunSpec, epoch_order, plan_runs, train_run
from holonomic.study.search import plan_trials

#: A tiny recipe study on the invented demo data (see tests/study/conftest.py).
RECIPE_DOC = {
    "study": {"name": "recipes", "seeds": 2, "trials": 3, "baseline": "sgd_wd"},
    "data": {"source": "demo", "train_size": 64, "val_fraction": 0.25,
             "test_fraction": 0.35},
    "model": {"widths": [8, 8]},
    "budget": {"epochs": 2, "batch_size": 32, "lr": 0.05, "momentum": 0.9},
    "arms": {
        "adamw_dwd": {"regulariser": "decoupled_weight_decay", "optimiser": "adamw",
                      "search": {"lr": {"low": 1e-3, "high": 1e-2, "scale": "log"},
                                 "strength": {"low": 1e-3, "high": 1e-1}}},
        "sgd_wd": {"regulariser": "weight_decay", "optimiser": "sgd",
                   "search": {"lr": {"low": 0.01, "high": 0.1},
                              "strength": [1e-4, 1e-3, 1e-2]}},
        "fixed_norm": {"strength": 1.0, "temperature": 0.0,
                       "search": {"lr": {"low": 0.01, "high": 0.1}}},
        "warm_fixed_norm": {"regulariser": "fixed_norm", "strength": 1.0,
                            "search": {"lr": {"low": 0.01, "high": 0.1},
                                       "temperature": {"low": 1e-5, "high": 1e-3}}},
        "layerwise": {"regulariser": "none", "optimiser": "adaptive_langevin",
                      "temperature": 1e-3,
                      "search": {"lr": {"low": 0.01, "high": 0.1}},
                      "groups": [{"layers": ["0.*"], "temperature": 1e-3},
                                 {"layers": "output", "adaptive": False,
                                  "temperature_scale": 0.01}]},
        "dropout": {"search": {"strength": [0.1, 0.2, 0.3]}},
        "overdamped": {"regulariser": "orthonormal", "optimiser": "overdamped_langevin",
                       "strength": 1.0, "temperature": 1e-6,
                       "search": {"lr": {"low": 1e-3, "high": 1e-2}}},
        "sgd_max_norm": {"regulariser": "max_norm", "optimiser": "sgd",
                         "search": {"lr": [0.01, 0.03, 0.1], "strength": [1.0]}},
    },
}


def recipe_doc() -> dict:
    return copy.deepcopy(RECIPE_DOC)


def _error(doc) -> str:
    with pytest.raises(StudyConfigError) as info:
        parse_config(doc)
    return str(info.value)


def test_every_arm_gets_the_same_trials_and_gradient_evaluations():
    config = parse_config(recipe_doc())
    trials = plan_trials(config)
    assert list(trials) == list(RECIPE_DOC["arms"])  # report order = file order
    assert {arm: len(t) for arm, t in trials.items()} == {arm: 3 for arm in trials}
    assert trials["sgd_wd"][0].searched == ("lr", "strength")
    specs = plan_runs(config)
    assert len(specs) == 8 * 3 * 2
    evals = {}
    for arm in trials:  # one run per arm: the same epochs, batches and steps for each
        record = train_run(config, RunSpec(arm, 0, trials[arm][0].settings, seed=0))
        assert record["status"] == "ok", record["message"]
        evals[arm] = (record["grad_evals"], record["steps_done"], record["epochs"])
        assert record["trial"] == record["setting_index"] == 0
        assert record["budget_fraction"] == 1.0
        assert "lr" in record["settings"] and record["searched"] == list(trials[arm][0].searched)
    assert set(evals.values()) == {(4, 4, 2)}  # 2 epochs of ceil(64 / 32) steps


def test_ensemble_phase_and_training_share_one_loop_and_ensemble_does_not_import_runner():
    import ast
    import inspect

    from holonomic.study import ensemble, loop, runner

    tree = ast.parse(inspect.getsource(ensemble))
    imported = {node.module for node in ast.walk(tree) if isinstance(node, ast.ImportFrom)}
    assert "holonomic.study.runner" not in imported
    assert ensemble.run_minibatches is loop.run_minibatches is runner.run_minibatches


def test_a_changed_recipe_is_not_mixed_with_stored_runs(tmp_path):
    from holonomic.study.execution import prepare_runs, run_all

    doc = _single_arm_doc({"regulariser": "none", "optimiser": "sgd", "lr": 0.05})
    doc["budget"]["epochs"] = 1
    config = parse_config(doc)
    run_all(config, tmp_path, progress=False)
    prepare_runs(config, tmp_path, plan_runs(config))  # the same recipe resumes
    doc["arms"]["x"]["optimiser"] = "adamw"  # same settings {"lr": 0.05}: same run keys
    changed = parse_config(doc)
    assert [s.key for s in plan_runs(changed)] == [s.key for s in plan_runs(config)]
    with pytest.raises(StudyConfigError, match="another recipe for arm 'x'"):
        prepare_runs(changed, tmp_path, plan_runs(changed))


def test_same_seed_same_trial_points_and_another_seed_others():
    first = plan_trials(parse_config(recipe_doc()))
    again = plan_trials(parse_config(recipe_doc()))
    assert first == again
    doc = recipe_doc()
    doc["study"]["seeds"] = [7, 8]
    other = plan_trials(parse_config(doc))
    assert other["adamw_dwd"] != first["adamw_dwd"]
    assert other["sgd_wd"] != first["sgd_wd"]
    # the dropout arm is a full grid: it does not depend on the seed
    assert other["dropout"] == first["dropout"]
    for trial in first["adamw_dwd"]:
        assert 1e-3 <= trial.settings["lr"] <= 1e-2
        assert 1e-3 <= trial.settings["strength"] <= 1e-1


def test_ranges_follow_scipy_qmc_sobol_scrambled_with_the_study_seed():
    # reference: scipy.stats.qmc.Sobol(d, scramble=True, seed=first study seed), keys in
    # sorted order, mapped log-linearly (lr) and onto list entries (strength)
    from scipy.stats import qmc

    config = parse_config(recipe_doc())
    unit = qmc.Sobol(d=2, scramble=True, seed=0).random_base2(2)[:3]
    for row, trial in zip(unit, plan_trials(config)["sgd_wd"]):
        lr = math.exp(math.log(0.01) + row[0] * (math.log(0.1) - math.log(0.01)))
        assert trial.settings["lr"] == pytest.approx(lr, rel=1e-12)
        assert trial.settings["strength"] == [1e-4, 1e-3, 1e-2][int(row[1] * 3)]
    doc = recipe_doc()
    doc["study"]["search"] = "halton"
    unit = qmc.Halton(d=2, scramble=True, seed=0).random(3)
    for row, trial in zip(unit, plan_trials(parse_config(doc))["sgd_wd"]):
        assert trial.settings["strength"] == [1e-4, 1e-3, 1e-2][int(row[1] * 3)]


def _reference(config, seed: int, make, after=None):
    """The study's model trained by hand: ``make(params)`` optimiser, the study's
    minibatch order (:func:`epoch_order`), mean cross-entropy; ``after(optimizer)``
    after each step."""
    split = make_split(load_dataset(config), config.data, seed)
    x = torch.as_tensor(split.x_train, dtype=torch.float64)
    y = torch.as_tensor(split.y_train)
    model = build_model(config.model, x.shape[1], split.n_classes, seed, torch.float64)
    optimizer = make(model.parameters())
    for epoch in range(config.budget.epochs):
        order = epoch_order(len(y), seed, epoch)
        for start in range(0, len(y), config.budget.batch_size):
            idx = order[start:start + config.budget.batch_size]
            optimizer.zero_grad()
            F.cross_entropy(model(x[idx]), y[idx]).backward()
            optimizer.step()
            if after is not None:
                after(optimizer)
    return model


def _same_weights(model, reference) -> None:
    for (name, p), q in zip(model.named_parameters(), reference.parameters()):
        assert torch.allclose(p, q, rtol=0, atol=1e-12), name


def _single_arm_doc(arm: dict) -> dict:
    doc = recipe_doc()
    doc["budget"].update(dtype="float64", epochs=3)
    doc["study"]["baseline"] = "x"
    doc["arms"] = {"x": arm}
    return doc


def test_adamw_recipe_follows_torch_adamw():
    # reference library: torch.optim.AdamW(lr, weight_decay) with torch's betas and eps
    config = parse_config(_single_arm_doc(
        {"regulariser": "decoupled_weight_decay", "optimiser": "adamw", "lr": 3e-3,
         "strength": 0.05}))
    record, model = train_run(config, RunSpec("x", 0, config.arms[0].trials[0].settings, 2),
                              return_model=True)
    assert record["status"] == "ok"
    assert record["settings"] == {"lr": 3e-3, "strength": 0.05}
    reference = _reference(config, 2, lambda p: torch.optim.AdamW(p, lr=3e-3,
                                                                  weight_decay=0.05))
    _same_weights(model, reference)


def test_adamw_without_decay_passes_weight_decay_zero():
    # torch.optim.AdamW's default weight_decay is 0.01: the none regulariser must not get it
    config = parse_config(_single_arm_doc({"regulariser": "none", "optimiser": "adamw",
                                           "lr": 3e-3}))
    record, model = train_run(config, RunSpec("x", 0, config.arms[0].trials[0].settings, 1),
                              return_model=True)
    reference = _reference(config, 1, lambda p: torch.optim.AdamW(p, lr=3e-3, weight_decay=0))
    _same_weights(model, reference)


def test_sgd_recipe_follows_torch_sgd():
    # reference library: torch.optim.SGD(lr, momentum, weight_decay)
    config = parse_config(_single_arm_doc(
        {"regulariser": "weight_decay", "optimiser": "sgd", "lr": 0.07, "momentum": 0.8,
         "strength": 1e-2}))
    record, model = train_run(config, RunSpec("x", 0, config.arms[0].trials[0].settings, 3),
                              return_model=True)
    assert record["settings"] == {"lr": 0.07, "momentum": 0.8, "strength": 1e-2}
    reference = _reference(config, 3, lambda p: torch.optim.SGD(p, lr=0.07, momentum=0.8,
                                                                weight_decay=1e-2))
    _same_weights(model, reference)


def test_decoupled_decay_with_sgd_shrinks_after_each_step():
    # torch.optim.SGD, then w <- w (1 - lr * s) after each step (AdamW's decoupled decay)
    config = parse_config(_single_arm_doc(
        {"regulariser": "decoupled_weight_decay", "optimiser": "sgd", "lr": 0.05,
         "momentum": 0.9, "strength": 0.1}))
    _, model = train_run(config, RunSpec("x", 0, config.arms[0].trials[0].settings, 0),
                         return_model=True)

    def decay(optimizer):
        with torch.no_grad():
            for group in optimizer.param_groups:
                for p in group["params"]:
                    p.mul_(1 - group["lr"] * 0.1)

    reference = _reference(config, 0, lambda p: torch.optim.SGD(p, lr=0.05, momentum=0.9),
                           decay)
    _same_weights(model, reference)


def test_dropout_recipe_builds_dropout_layers_and_reloads(tmp_path):
    from holonomic.study.trained import load_trained

    config = parse_config(recipe_doc())
    trial = plan_trials(config)["dropout"][1]
    spec = RunSpec("dropout", 1, trial.settings, 0)
    record, model = train_run(config, spec, return_model=True, out_dir=tmp_path)
    assert record["status"] == "ok" and record["settings"]["strength"] == 0.2
    rates = [m.p for m in model.modules() if isinstance(m, nn.Dropout)]
    assert rates == [0.2, 0.2]  # after each hidden activation
    from holonomic.study import storage

    storage.write_record(tmp_path, record)
    loaded, info = load_trained(tmp_path, spec.key)
    assert [m.p for m in loaded.modules() if isinstance(m, nn.Dropout)] == [0.2, 0.2]
    for p, q in zip(loaded.parameters(), model.parameters()):
        assert torch.equal(p, q)


def test_dropout_with_a_factory_without_dropout_is_refused():
    doc = _single_arm_doc({"regulariser": "dropout", "strength": 0.1})
    doc["model"] = {"factory": "torch.nn:Linear"}
    config = parse_config(doc)
    with pytest.raises(StudyConfigError, match="needs nn.Dropout modules"):
        train_run(config, RunSpec("x", 0, config.arms[0].trials[0].settings, 0))


def test_layerwise_adaptive_recipe_runs_and_records_its_groups():
    config = parse_config(recipe_doc())
    trial = plan_trials(config)["layerwise"][0]
    record = train_run(config, RunSpec("layerwise", 0, trial.settings, 0))
    assert record["status"] == "ok", record["message"]
    assert record["recipe"]["optimiser"] == "adaptive_langevin"
    first, output, rest = record["recipe"]["groups"]
    lr = trial.settings["lr"]
    assert first == {"layers": ["0.weight", "0.bias"], "lr": lr, "momentum": 0.9,
                     "temperature": 1e-3}
    assert output["layers"] == ["4.weight", "4.bias"] and output["adaptive"] is False
    assert output["temperature"] == pytest.approx(1e-5)
    assert rest["layers"] == ["2.weight", "2.bias"] and rest["temperature"] == 1e-3
    assert math.isfinite(record["metrics"]["val_accuracy"])
    assert math.isfinite(record["metrics"]["test_loss"])


def test_old_grid_study_keeps_its_run_keys(tiny_config):
    # the keys studies had before recipes: f"{arm}-{strength!r}-s{seed}"
    grids = {"none": [0.0], "weight_decay": [1e-3, 1e-2], "max_norm": [0.25, 0.5],
             "fixed_norm": [0.25, 0.5], "orthonormal": [0.25, 0.5]}
    expected = [f"{arm}-{float(x)!r}-s{seed}" for arm, grid in grids.items() for x in grid
                for seed in (0, 1)]
    assert [spec.key for spec in plan_runs(tiny_config)] == expected
    assert tiny_config.to_dict()["arms"] == grids and "recipes" not in tiny_config.to_dict()


def test_recipe_keys_name_trial_and_settings():
    config = parse_config(recipe_doc())
    keys = [spec.key for spec in plan_runs(config) if spec.arm == "sgd_wd"]
    assert keys[0].startswith("sgd_wd-t0-") and keys[0].endswith("-s0")
    assert len(set(keys)) == len(keys) == 6
    rung = plan_runs(config, 0.25)[0]
    assert rung.key == plan_runs(config)[0].key + "-h0.25"


BAD_INPUTS = [
    # (arm table or study change, text the message must hold: the key and allowed values)
    ({"regulariser": "l3"}, ["'arms.x.regulariser'", "none, weight_decay, "
                             "decoupled_weight_decay, max_norm, fixed_norm, orthonormal, dropout"]),
    ({"regulariser": "none", "optimiser": "adam"},
     ["'arms.x.optimiser'", "langevin, adaptive_langevin, overdamped_langevin, sgd, adamw"]),
    ({"regulariser": "fixed_norm", "optimiser": "adamw", "strength": 1.0},
     ["'arms.x.optimiser' = 'adamw'", "allowed optimisers for it: langevin, adaptive_langevin, "
      "overdamped_langevin", "max_norm"]),
    ({"regulariser": "weight_decay", "optimiser": "adamw", "strength": 1e-3},
     ["'arms.x.optimiser'", "allowed optimisers for it", "decoupled_weight_decay"]),
    ({"regulariser": "none", "optimiser": "adamw", "momentum": 0.9},
     ["'arms.x.momentum'", "settable for this arm: lr"]),
    ({"regulariser": "none", "strength": 0.1},
     ["'arms.x.strength'", "settable for this arm: lr, momentum, temperature"]),
    ({"regulariser": "none", "search": {"lr": {"low": 0.1, "high": 0.01}}},
     ["'arms.x.search.lr'", "low < high"]),
    ({"regulariser": "none", "search": {"lr": {"low": 0.0, "high": 0.1, "scale": "linear"}}},
     ["'arms.x.search.lr.low'", "must be > 0"]),
    ({"regulariser": "none", "search": {"lr": {"low": 0.01, "high": 0.1, "scale": "cubic"}}},
     ["'arms.x.search.lr.scale'", "log, linear"]),
    ({"regulariser": "none", "search": {"lr": []}}, ["'arms.x.search.lr' is empty"]),
    ({"regulariser": "none", "search": {"momentum": [0.5, 1.0, 0.9]}},
     ["'arms.x.search.momentum'", ">= 0 and < 1"]),
    ({"regulariser": "dropout", "strength": 1.0}, ["'arms.x.strength'", ">= 0 and < 1"]),
    ({"regulariser": "none", "search": {"friction": [1.0]}},
     ["'arms.x.search.friction'", "allowed: lr, momentum, temperature"]),
    ({"regulariser": "none", "lr": 0.1, "search": {"lr": [0.1, 0.2, 0.3]}},
     ["'arms.x.lr' is fixed", "give one"]),
    ({"regulariser": "none", "search": {"lr": {"low": 0.01}}},
     ["'arms.x.search.lr.high' is missing", "log, linear"]),
    ({"regulariser": "none", "groups": [{"temperature": 0.1}]},
     ["'arms.x.groups[0].layers' is missing", "hidden, hidden+output, output"]),
    ({"regulariser": "none", "groups": [{"layers": "first", "lr": 0.1}]},
     ["'arms.x.groups[0].layers'", "hidden, hidden+output, output"]),
    ({"regulariser": "none", "groups": [{"layers": "output", "adaptive": False}]},
     ["'arms.x.groups[0].adaptive'", "allowed keys for it: layers, lr, lr_scale, momentum, "
      "temperature, temperature_scale"]),
    ({"regulariser": "none", "optimiser": "sgd", "groups": [{"layers": "output",
                                                            "temperature": 0.1}]},
     ["'arms.x.groups[0].temperature'", "allowed keys for it: layers, lr, lr_scale, momentum"]),
    ({"regulariser": "none", "groups": [{"layers": "output", "lr": 0.1, "lr_scale": 2.0}]},
     ["'arms.x.groups[0]' gives both lr and lr_scale"]),
    ({"regulariser": "none", "groups": [{"layers": "output", "colour": 1}]},
     ["unknown key 'arms.x.groups[0].colour'", "layers, lr, lr_scale, momentum"]),
    ({"regulariser": "none", "optimiser": "sgd", "ensemble": {"temperature": 1.0,
                                                              "samples": 4}},
     ["'arms.x.ensemble'", "langevin"]),
    ({"regulariser": "none", "colour": 1}, ["unknown key 'arms.x.colour'", "regulariser, "
                                            "optimiser, constrain, strength"]),
    ({"regulariser": "weight_decay", "constrain": "hidden", "strength": 0.1},
     ["'arms.x.constrain' has no effect", "max_norm, fixed_norm, orthonormal"]),
]


@pytest.mark.parametrize("arm, needles", BAD_INPUTS)
def test_config_errors_name_the_key_and_the_allowed_values(arm, needles):
    doc = _single_arm_doc(arm)
    message = _error(doc)
    for needle in needles:
        assert needle in message, message


@pytest.mark.parametrize("study, needles", [
    ({"trials": 0}, ["'study.trials'", ">= 1"]),
    ({"search": "random"}, ["'study.search'", "sobol, halton"]),
    ({"halving": 0.5}, ["'study.halving'", "true, false or a table"]),
    ({"halving": {"fraction": 1.0}}, ["'study.halving.fraction'", "< 1"]),
    ({"trials": 2}, ["'arms.dropout'", "its grid has 3 points", "2 trials"]),
])
def test_study_key_errors_name_the_key_and_the_allowed_values(study, needles):
    doc = recipe_doc()
    doc["study"].update(study)
    message = _error(doc)
    for needle in needles:
        assert needle in message, message


def test_adaptive_at_zero_temperature_is_refused_unless_the_group_is_not_adaptive(tmp_path):
    from holonomic.study.execution import prepare_runs

    doc = _single_arm_doc({"regulariser": "none", "optimiser": "adaptive_langevin",
                           "lr": 0.05, "temperature": 0.0})
    config = parse_config(doc)
    needle = "'arms.x.temperature' = 0.0 for a group that adapts"
    with pytest.raises(StudyConfigError, match=needle):
        train_run(config, RunSpec("x", 0, config.arms[0].trials[0].settings, 0))
    with pytest.raises(StudyConfigError, match=needle):  # refused before anything is written
        prepare_runs(config, tmp_path / "out", plan_runs(config))
    assert not (tmp_path / "out").exists()
    doc = _single_arm_doc({"regulariser": "none", "optimiser": "adaptive_langevin",
                           "lr": 0.05, "temperature": 0.0,
                           "groups": [{"layers": "hidden+output", "adaptive": False}]})
    config = parse_config(doc)
    record = train_run(config, RunSpec("x", 0, config.arms[0].trials[0].settings, 0))
    assert record["status"] == "ok"


def test_one_line_arm_searches_strength_and_lr_by_default():
    doc = recipe_doc()
    doc["study"]["baseline"] = "weight_decay"
    doc["arms"] = {"decoupled_weight_decay": {}, "weight_decay": {}, "none": {}}
    config = parse_config(doc)
    trials = plan_trials(config)
    assert trials["weight_decay"][0].searched == ("lr", "strength")
    assert trials["none"][0].searched == ("lr",)
    for trial in trials["weight_decay"]:
        assert 0.005 <= trial.settings["lr"] <= 0.15


def test_successive_halving_keeps_the_better_half_and_reruns_it_in_full(tmp_path):
    from holonomic.study.execution import HALVING_RECORD, prepare_runs, run_halving

    doc = recipe_doc()
    doc["study"].update(trials=4, halving=True)
    doc["budget"]["epochs"] = 4
    doc["arms"] = {"sgd_wd": {"regulariser": "weight_decay", "optimiser": "sgd",
                              "search": {"lr": {"low": 0.01, "high": 0.3},
                                         "strength": {"low": 1e-4, "high": 1e-2}}},
                   "none": {"lr": 0.05}}
    config = parse_config(doc)
    assert config.halving == 0.25
    done = prepare_runs(config, tmp_path, plan_runs(config))
    records = run_halving(config, tmp_path, progress=False, done=done)
    rung = [r for r in records.values() if r["budget_fraction"] < 1]
    full = [r for r in records.values() if r["budget_fraction"] == 1]
    assert len(rung) == 4 * 2 and {r["epochs"] for r in rung} == {1}
    assert {r["grad_evals"] for r in rung} == {2}
    assert len(full) == (2 + 1) * 2 and {r["epochs"] for r in full} == {4}
    halving = json.loads((tmp_path / HALVING_RECORD).read_text())
    assert len(halving["kept"]["sgd_wd"]) == 2 and len(halving["dropped"]["sgd_wd"]) == 2
    assert halving["kept"]["none"] == [0]
    means = halving["rung_means"]["sgd_wd"]
    assert min(means[i] for i in halving["kept"]["sgd_wd"]) >= max(
        means[i] for i in halving["dropped"]["sgd_wd"])
    for r in full:  # deterministic: the full run's first epoch is the rung run's
        if r["arm"] != "sgd_wd":
            continue
        twin = records[r["key"] + "-h0.25"]
        assert twin["history"]["val_accuracy"][0] == r["history"]["val_accuracy"][0]
        assert twin["history"]["train_loss"][0] == r["history"]["train_loss"][0]


def test_an_arm_without_strength_in_a_grid_study_is_refused(tiny_doc):
    # in a study of grids, a one-line arm is not searched: it must fix its strength
    tiny_doc["arms"]["fixed_norm"] = {}
    message = _error(tiny_doc)
    assert "'arms.fixed_norm.strength' is needed" in message
    assert "search.strength or grid" in message


def test_halving_study_rerun_reuses_every_run_and_reports(tmp_path, capsys):
    # the command line counts the rung runs as reused on a rerun (they are not retrained),
    # and --report-only merges a halving study without asking for the dropped trials
    from holonomic.cli import main

    study = tmp_path / "hv.toml"
    study.write_text(textwrap.dedent("""
        [study]
        seeds = 2
        trials = 4
        halving = true
        [data]
        source = "demo"
        train_size = 120
        [model]
        widths = [8]
        [budget]
        epochs = 4
        [arms.weight_decay]
        [arms.fixed_norm]
        """))
    args = ["study", str(study), "--out", str(tmp_path / "out"), "--quiet", "--no-plots"]
    assert main(args) == 0
    assert "(24 trained now, 0 reused)" in capsys.readouterr().out  # 16 rung + 8 full runs
    stamps = {p.name: p.stat().st_mtime_ns for p in (tmp_path / "out" / "runs").glob("*.json")}
    assert main(args) == 0
    assert "(0 trained now, 24 reused)" in capsys.readouterr().out
    assert stamps == {p.name: p.stat().st_mtime_ns
                      for p in (tmp_path / "out" / "runs").glob("*.json")}
    assert main(args + ["--report-only"]) == 0
    assert "halving" in (tmp_path / "out" / "report.md").read_text().lower()


def test_load_trained_by_trial_gives_the_recorded_test_accuracy(tmp_path):
    # a recipe arm's network found by (arm, trial, seed) predicts what its record says;
    # reference: sklearn.metrics.accuracy_score on the saved network's labels
    import csv

    from sklearn.metrics import accuracy_score

    from holonomic.study import load_trained, predict, run_study
    from holonomic.study.runner import load_folds

    doc = recipe_doc()
    doc["arms"] = {"adamw": RECIPE_DOC["arms"]["adamw_dwd"], "sgd_wd": RECIPE_DOC["arms"]["sgd_wd"]}
    doc["study"]["baseline"] = "sgd_wd"
    config = parse_config(doc)
    out = tmp_path / "out"
    run_study(config, out, progress=False, plots=False)
    rows = list(csv.DictReader((out / "results.csv").open()))
    row = next(r for r in rows if r["arm"] == "adamw" and r["setting_index"] == "2")
    seed = int(row["seed"])
    model, info = load_trained(out, "adamw", trial=2, seed=seed)
    dataset, splits = load_folds(config, seed)
    index = splits[0].test_index  # raw features and labels of the test part
    assert float(row["test_accuracy"]) == pytest.approx(
        accuracy_score(np.asarray(dataset.classes)[dataset.y[index]],
                       predict(model, info, dataset.x[index])), abs=1e-12)
    with pytest.raises(ValueError, match="not both"):
        load_trained(out, "adamw", strength=0.1, seed=seed, trial=2)
    with pytest.raises(FileNotFoundError, match="trial 7"):
        load_trained(out, "adamw", trial=7, seed=seed)


def test_runs_record_the_library_version_and_a_resume_across_versions_warns(tmp_path):
    import holonomic
    from holonomic.study import run_study

    doc = recipe_doc()
    doc["arms"] = {"sgd_wd": RECIPE_DOC["arms"]["sgd_wd"]}
    config = parse_config(doc)
    out = tmp_path / "out"
    run_study(config, out, progress=False, plots=False)
    files = sorted((out / "runs").glob("*.json"))
    record = json.loads(files[0].read_text())
    assert record["holonomic_version"] == holonomic.__version__
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the same version: no warning
        run_study(config, out, progress=False, plots=False)
    record["holonomic_version"] = "0.0.1"
    files[0].write_text(json.dumps(record))
    with pytest.warns(UserWarning, match="made by holonomic 0.0.1"):
        run_study(config, out, progress=False, plots=False)
