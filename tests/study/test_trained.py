"""Evaluation in eval mode, and the trained weights every run keeps (issue items 1 and 12)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from torch import nn

from holonomic.study import class_probabilities, load_trained, parse_config, predict
from holonomic.study import storage
from holonomic.study.models import build_model
from holonomic.study.runner import (
    RunSpec,
    _tensors,
    evaluation_mode,
    load_folds,
    record_metric_names,
    train_run,
)
from holonomic.study.trained import load_weights

from tests.study import factories

DROPOUT_BN = "tests.study.factories:dropout_batchnorm"


def _stored_run(config, spec, out) -> dict:
    """Train a run and store its record, as a study does (the record commits the run)."""
    storage.runs_dir(out).mkdir(parents=True, exist_ok=True)
    record = train_run(config, spec, out_dir=out)
    storage.write_record(out, record)
    return record


def _factory_config(doc: dict, factory: str, **budget):
    doc["model"] = {"factory": factory}
    doc["budget"].update(budget)
    return parse_config(doc)


def _fresh_outputs(config, info: dict, split, train_mode: bool) -> dict[str, np.ndarray]:
    """Outputs of a model rebuilt from the saved state dict on the split's (standardised)
    inputs, in eval mode (or, for the counter-example, train mode)."""
    dtype = {"float32": torch.float32, "float64": torch.float64}[config.budget.dtype]
    data = _tensors(split, dtype)
    model = build_model(config.model, data["train"][0].shape[1], info["n_outputs"], 123, dtype)
    model.load_state_dict(info["state_dict"])
    model.train(train_mode)
    with torch.no_grad():
        return {part: model(data[part][0]).double().numpy() for part in ("train", "val", "test")}


def test_recorded_metrics_equal_a_fresh_eval_mode_evaluation_of_the_saved_weights(
        tiny_doc, tmp_path):
    config = _factory_config(tiny_doc, DROPOUT_BN)
    spec = RunSpec("fixed_norm", 0, 0.5, seed=1)
    record = _stored_run(config, spec, tmp_path)
    assert record["status"] == "ok"
    assert record["weights_file"] == f"runs/{spec.key}.pt"
    assert record["weights_files"] == [record["weights_file"]]
    info = torch.load(tmp_path / record["weights_file"], weights_only=True)

    _, (split,) = load_folds(config, spec.seed)
    task = split.task
    targets = {"train": split.y_train, "val": split.y_val, "test": split.y_test}
    fresh = task.run_metrics(_fresh_outputs(config, info, split, train_mode=False), targets)
    for name in task.record_metrics():
        assert record["metrics"][name] == pytest.approx(fresh[name], rel=0, abs=1e-12), name
    # the last epoch of the history is the same network, evaluated the same way
    assert record["history"]["test_loss"][-1] == pytest.approx(
        record["metrics"]["test_loss"], abs=1e-12)
    assert record["history"]["val_accuracy"][-1] == record["metrics"]["val_accuracy"]
    # counter-example: evaluated in train mode (dropout on, batch statistics) the same
    # weights give other numbers, which the runner recorded before evaluation used eval mode
    with torch.random.fork_rng():
        torch.manual_seed(0)
        noisy = task.run_metrics(_fresh_outputs(config, info, split, train_mode=True), targets)
    assert abs(noisy["test_loss"] - fresh["test_loss"]) > 1e-4


def test_training_steps_run_in_train_mode_and_evaluations_in_eval_mode(tiny_doc):
    doc = tiny_doc
    doc["arms"]["fixed_norm"]["ensemble"] = {"temperature": 1.0, "samples": 4, "every": 1,
                                             "burn_in": 2}
    config = _factory_config(doc, "tests.study.factories:probed_mlp", epochs=2)
    factories.FORWARD_LOG.clear()
    record = train_run(config, RunSpec("fixed_norm", 0, 0.5, seed=0))
    assert record["status"] == "ok" and record["ensemble"]["status"] == "ok"
    log = list(factories.FORWARD_LOG)
    steps = record["steps_done"] + record["ensemble"]["steps_done"]
    with_grad = [entry for entry in log if entry[1]]
    without_grad = [entry for entry in log if not entry[1]]
    assert len(with_grad) == steps  # one forward per training or sampling step
    assert all(training and size <= config.budget.batch_size
               for training, _, size in with_grad)
    # history (3 parts per epoch), final metrics (3), single network, samples, traces
    assert len(without_grad) >= 3 * 2 + 3 + 1 + 2 * 4
    assert not any(training for training, _, _ in without_grad)


def test_evaluation_mode_restores_every_submodule_flag():
    model = nn.Sequential(nn.Linear(3, 4), nn.Dropout(0.5), nn.Linear(4, 2))
    model.train()
    model[1].eval()  # a caller's mixed setting survives
    with evaluation_mode(model):
        assert not any(m.training for m in model.modules())
        assert not torch.is_grad_enabled()
    assert [m.training for m in model.modules()] == [True, True, False, True]
    assert torch.is_grad_enabled()


def test_weights_file_layout_and_load_predict(tiny_doc, tmp_path):
    tiny_doc["budget"]["dtype"] = "float64"
    config = parse_config(tiny_doc)
    spec = RunSpec("orthonormal", 1, 0.5, seed=2)
    record = _stored_run(config, spec, tmp_path)
    info = load_weights(tmp_path / record["weights_file"])
    assert set(info) == {
        "state_dict", "task", "n_classes", "n_outputs", "classes", "feature_names",
        "feature_mean", "feature_std", "target_mean", "target_std", "model", "in_features",
        "dtype", "key", "arm", "strength", "seed", "fold", "folds", "layers",
        "data_fingerprint", "study_dir"}
    assert (info["arm"], info["strength"], info["seed"], info["fold"]) == (
        "orthonormal", 0.5, 2, None)
    assert info["task"] == "classification" and info["target_std"] == 1.0
    assert info["layers"] == record["layers"] == ["0.weight", "2.weight"]
    assert not list((tmp_path / "runs").glob(".*"))  # no temporaries left

    model, loaded = load_trained(tmp_path, "orthonormal", strength=0.5, seed=2)
    assert not model.training
    same, _ = load_trained(tmp_path, spec.key)
    for p, q in zip(model.parameters(), same.parameters()):
        assert torch.equal(p, q)
    # the orthonormal constraint holds in the saved weights: W W^T = s^2 I (square, 8 x 8)
    w = loaded["state_dict"]["2.weight"]
    assert torch.allclose(w @ w.T, 0.25 * torch.eye(8, dtype=w.dtype), atol=1e-10)

    _, (split,) = load_folds(config, spec.seed)
    raw = split.x_test * split.feature_std + split.feature_mean  # the data's own units
    probs = class_probabilities(model, loaded, raw)
    logits = torch.as_tensor(_fresh_outputs(config, loaded, split, False)["test"])
    assert np.allclose(probs, torch.softmax(logits, dim=1).numpy(), rtol=0, atol=1e-10)
    labels = predict(model, loaded, raw)
    assert list(labels) == [loaded["classes"][i] for i in probs.argmax(axis=1)]
    accuracy = np.mean(labels == np.asarray(loaded["classes"])[split.y_test])
    assert accuracy == pytest.approx(record["metrics"]["test_accuracy"], abs=1e-12)

    with pytest.raises(ValueError, match=r"shape \(n, 16\)"):
        predict(model, loaded, raw[:, :3])
    bad = raw.copy()
    bad[2, 5] = np.nan
    with pytest.raises(ValueError, match="row 2, column 5"):
        predict(model, loaded, bad)
    with pytest.raises(FileNotFoundError, match="no finished run 'none-0.0-s2'"):
        load_trained(tmp_path, "none", strength=0.0, seed=2)
    # weights whose run has no record (killed before the record was written) are not used
    (tmp_path / "runs" / f"{spec.key}.json").unlink()
    with pytest.raises(FileNotFoundError, match=f"no finished run '{spec.key}'"):
        load_trained(tmp_path, spec.key)
    with pytest.raises(ValueError, match="with seed and trial \\(or strength\\)"):
        load_trained(tmp_path, "orthonormal", strength=0.5)


def test_a_diverged_run_saves_no_weights(tiny_doc, tmp_path):
    tiny_doc["budget"].update(lr=1e4, momentum=0.0)
    config = parse_config(tiny_doc)
    record = _stored_run(config, RunSpec("none", 0, 0.0, seed=0), tmp_path)
    assert record["status"] in ("diverged", "failed")
    assert record["weights_file"] is None and record["weights_files"] == []
    assert not list((tmp_path / "runs").glob("*.pt"))
    with pytest.raises(FileNotFoundError, match="no saved weights for run 'none-0.0-s0'"):
        load_trained(tmp_path, "none-0.0-s0")
    assert set(record["metrics"]) == set(record_metric_names(
        load_folds(config, 0)[1][0].task))
    assert all(math.isnan(v) for v in record["metrics"].values())
