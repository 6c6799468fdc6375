"""Runs of every task: regression, binary classification, k-fold, the selection metric.

Outside references: scikit-learn's bundled diabetes and breast-cancer data (written to CSV
files), ``sklearn.metrics`` for the recorded metrics, ``scipy.stats.norm`` for the Gaussian
negative log-likelihood, and ``sklearn.linear_model.Ridge`` for a sanity band.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import torch
from scipy import stats
from sklearn import metrics as skm

from holonomic.study import (
    StudyConfigError,
    class_probabilities,
    load_trained,
    parse_config,
    predict,
    run_study,
)
from holonomic.study import storage
from holonomic.study.config import EnsembleConfig, selection_metric
from holonomic.study.ensemble import ensemble_metrics, regression_predictive
from holonomic.study.report import select_settings
from holonomic.study.runner import RunSpec, load_folds, plan_runs, record_metric_names, train_run
from holonomic.study.tasks import Task


def _stored_run(config, spec, out) -> dict:
    """Train a run and store its record, as a study does (the record commits the run)."""
    storage.runs_dir(out).mkdir(parents=True, exist_ok=True)
    record = train_run(config, spec, out_dir=out)
    storage.write_record(out, record)
    return record


def _write_csv(path, x: np.ndarray, y: np.ndarray, names) -> None:
    lines = [",".join([*names, "target"])]
    lines += [",".join([*(repr(float(v)) for v in row), str(t)]) for row, t in zip(x, y)]
    path.write_text("\n".join(lines) + "\n")


def _doc(source: str, task: str, **budget) -> dict:
    doc = {
        "study": {"name": "t", "seeds": [0, 1]},
        "data": {"source": source, "target": "target", "task": task, "val_fraction": 0.2,
                 "test_fraction": 0.3},
        "model": {"widths": [32]},
        "budget": {"epochs": 40, "batch_size": 32, "lr": 0.01, "momentum": 0.9,
                   "dtype": "float64", **budget},
        "arms": {"none": {}, "weight_decay": {"grid": [1e-3, 1e-2]}},
    }
    return doc


def _raw(split, part: str) -> np.ndarray:
    """A part's features in the data's own units (the split holds them standardised)."""
    return getattr(split, f"x_{part}") * split.feature_std + split.feature_mean


@pytest.fixture
def diabetes(tmp_path):
    """A regression study on scikit-learn's bundled diabetes data, as a CSV file."""
    from sklearn.datasets import load_diabetes

    bunch = load_diabetes()
    _write_csv(tmp_path / "diabetes.csv", bunch.data, bunch.target, bunch.feature_names)

    def make(**budget):
        return parse_config(_doc("diabetes.csv", "regression", **budget), base_dir=tmp_path)

    return make


@pytest.mark.slow
def test_diabetes_regression_matches_sklearn_metrics_and_a_ridge_band(diabetes, tmp_path):
    config = diabetes()
    spec = RunSpec("none", 0, 0.0, seed=0)
    out = tmp_path / "out"
    record = _stored_run(config, spec, out)
    assert record["status"] == "ok"
    assert (record["task"], record["n_classes"], record["classes"]) == ("regression", 0, [])
    task = Task("regression")
    assert set(record["metrics"]) == set(record_metric_names(task))
    history = record["history"]
    assert set(history) == {"epoch", "train_rmse", "val_rmse", "test_rmse", "train_loss",
                            "val_loss", "test_loss", "mean_row_norm_hidden",
                            "constraint_residual"}
    assert history["epoch"] == list(range(1, config.budget.epochs + 1))
    assert history["test_rmse"][-1] == pytest.approx(record["metrics"]["test_rmse"], abs=1e-12)

    _, (split,) = load_folds(config, spec.seed)
    model, info = load_trained(out, spec.key)
    assert info["target_mean"] == record["target_mean"] == pytest.approx(split.y_train.mean())
    predicted = predict(model, info, _raw(split, "test"))
    # Reference library: sklearn.metrics (r2_score, mean_squared_error, mean_absolute_error)
    m = record["metrics"]
    assert m["test_r2"] == pytest.approx(skm.r2_score(split.y_test, predicted), rel=1e-9)
    assert m["test_rmse"] == pytest.approx(
        math.sqrt(skm.mean_squared_error(split.y_test, predicted)), rel=1e-9)
    assert m["test_mae"] == pytest.approx(
        skm.mean_absolute_error(split.y_test, predicted), rel=1e-9)
    # gap in loss: positive when the training split is fitted better
    assert m["gap_loss"] == pytest.approx(m["test_loss"] - m["train_loss"], abs=1e-12)

    # Sanity band (common practice, no source): an unregularised MLP's test R^2 within
    # 0.15 of a ridge regression (sklearn.linear_model.Ridge) on the same split.
    from sklearn.linear_model import Ridge

    ridge = Ridge(alpha=1.0).fit(split.x_train, split.y_train)
    ridge_r2 = skm.r2_score(split.y_test, ridge.predict(split.x_test))
    assert 0.3 < ridge_r2 < 0.7
    assert abs(m["test_r2"] - ridge_r2) < 0.15, (m["test_r2"], ridge_r2)


def test_regression_ensemble_has_predictive_mean_and_variance(diabetes, tmp_path):
    config = diabetes(epochs=8)
    sampling = EnsembleConfig(temperature=0.5, samples=4, every=2, burn_in=3)
    config = dataclasses.replace(config, arms=tuple(
        dataclasses.replace(a, ensemble=sampling) if a.name == "weight_decay" else a
        for a in config.arms))
    spec = RunSpec("weight_decay", 0, 1e-3, seed=1)
    out = tmp_path / "out"
    record = _stored_run(config, spec, out)
    phase = record["ensemble"]
    assert record["status"] == "ok" and phase["status"] == "ok"
    assert ensemble_metrics("regression") == ("rmse", "r2", "mae", "nll")
    for who in ("single", "ensemble"):
        for part in ("val", "test"):
            assert tuple(phase[who][part]) == ensemble_metrics("regression")
            assert all(math.isfinite(v) for v in phase[who][part].values())
    assert [len(phase["traces"][k]) for k in ("train_loss", "weight_norm_output")] == [4, 4]
    # the single network is the trained one, whose weights were saved before sampling
    assert phase["single"]["test"]["rmse"] == pytest.approx(record["metrics"]["test_rmse"],
                                                           abs=1e-12)
    _, (split,) = load_folds(config, spec.seed)
    model, info = load_trained(out, spec.key)
    mu = predict(model, info, _raw(split, "test"))
    # Reference library: scipy.stats.norm; the single network's predictive variance is the
    # likelihood's noise variance T (standardised units), T * s^2 in target units
    sd = math.sqrt(sampling.temperature) * info["target_std"]
    nll = -np.mean(stats.norm.logpdf(split.y_test, loc=mu, scale=sd))
    assert phase["single"]["test"]["nll"] == pytest.approx(nll, rel=1e-9)


def test_regression_predictive_adds_sample_spread_to_noise_variance():
    rng = np.random.default_rng(0)
    samples = rng.normal(size=(7, 5))  # 7 sampled networks' predictions on 5 inputs
    moments = torch.as_tensor(np.stack([samples, samples ** 2], axis=2).mean(axis=0))
    mean, variance = regression_predictive(moments, 0.3)
    assert np.allclose(mean.numpy(), samples.mean(axis=0), rtol=0, atol=1e-12)
    assert np.allclose(variance.numpy(), 0.3 + samples.var(axis=0), rtol=0, atol=1e-12)


def test_breast_cancer_binary_metrics_match_sklearn(tmp_path):
    from sklearn.datasets import load_breast_cancer

    bunch = load_breast_cancer()
    _write_csv(tmp_path / "cancer.csv", bunch.data, bunch.target,
               [n.replace(" ", "_") for n in bunch.feature_names])
    doc = _doc("cancer.csv", "classification", epochs=3)
    doc["study"]["selection"] = "val_roc_auc"
    config = parse_config(doc, base_dir=tmp_path)
    spec = RunSpec("weight_decay", 1, 1e-2, seed=0)
    out = tmp_path / "out"
    record = _stored_run(config, spec, out)
    assert record["status"] == "ok" and record["task"] == "classification"
    assert record["n_classes"] == 2 and record["classes"] == ["0", "1"]
    assert {"test_roc_auc", "val_roc_auc", "gap_roc_auc", "test_balanced_accuracy",
            "test_macro_f1"} <= set(record["metrics"])
    _, (split,) = load_folds(config, spec.seed)
    model, info = load_trained(out, spec.key)
    probs = class_probabilities(model, info, _raw(split, "test"))
    predicted = probs.argmax(axis=1)
    m = record["metrics"]
    # Reference library: sklearn.metrics (roc_auc_score, balanced_accuracy_score, f1_score)
    assert m["test_roc_auc"] == pytest.approx(skm.roc_auc_score(split.y_test, probs[:, 1]),
                                              rel=1e-12)
    assert m["test_balanced_accuracy"] == pytest.approx(
        skm.balanced_accuracy_score(split.y_test, predicted), rel=1e-12)
    assert m["test_macro_f1"] == pytest.approx(
        skm.f1_score(split.y_test, predicted, average="macro"), rel=1e-12)
    assert list(predict(model, info, _raw(split, "test"))) == [str(i) for i in predicted]
    assert selection_metric(config, Task("classification", 2)) == "val_roc_auc"


def test_selection_metric_default_per_task_and_refusals(tiny_doc, tmp_path):
    config = parse_config(tiny_doc)
    assert config.selection is None
    assert selection_metric(config, Task("classification", 4)) == "val_accuracy"
    assert selection_metric(config, Task("regression")) == "val_rmse"
    assert selection_metric(config, "regression") == "val_rmse"
    for name in ("val_balanced_accuracy", "val_macro_f1", "val_loss"):
        tiny_doc["study"]["selection"] = name
        assert selection_metric(parse_config(tiny_doc), Task("classification", 4)) == name
    tiny_doc["study"]["selection"] = "val_roc_auc"
    config = parse_config(tiny_doc)  # which task it is is known once the data are read
    with pytest.raises(StudyConfigError) as info:
        selection_metric(config, Task("classification", 3))
    message = str(info.value)
    assert "'study.selection' = 'val_roc_auc'" in message and "two classes" in message
    assert "val_accuracy, val_balanced_accuracy, val_macro_f1, val_loss" in message
    # the demo data have 4 classes: refused before anything is trained or written
    with pytest.raises(StudyConfigError, match="classification with 4 classes"):
        run_study(config, tmp_path / "out", progress=False, plots=False)
    assert not (tmp_path / "out").exists()
    with pytest.raises(StudyConfigError, match="study.selection"):
        train_run(config, RunSpec("none", 0, 0.0, 0))
    tiny_doc["study"]["selection"] = "val_accuracy"
    with pytest.raises(StudyConfigError) as info:
        selection_metric(parse_config(tiny_doc), Task("regression"))
    assert "allowed for this task: val_rmse, val_r2, val_mae, val_loss" in str(info.value)


@pytest.mark.parametrize("selection,best", [("val_loss", np.argmin),
                                            ("val_macro_f1", np.argmax)])
def test_selection_follows_the_metric_direction(tiny_doc, selection, best):
    tiny_doc["study"]["selection"] = selection
    config = parse_config(tiny_doc)
    task = Task("classification", 4)
    rng = np.random.default_rng(3)
    records = {s.key: {"key": s.key, "arm": s.arm, "status": "ok", "task": "classification",
                       "seed": s.seed, "strength": s.strength, "setting_index": s.index,
                       "n_classes": 4, "metrics": {n: float(rng.uniform(0.1, 0.9))
                                                   for n in record_metric_names(task)}}
               for s in plan_runs(config)}
    chosen = select_settings(config, records)
    for arm in config.arms:
        means = [np.mean([records[s.key]["metrics"][selection] for s in plan_runs(config)
                          if s.arm == arm.name and s.index == i]) for i in range(len(arm.grid))]
        assert chosen[arm.name].index == int(best(means))


def _three_fold_doc(doc: dict) -> dict:
    """The tiny study on 3-fold data (each fold the test part once; 'data.test_fraction'
    does not apply)."""
    del doc["data"]["test_fraction"]
    doc["data"]["folds"] = 3
    return doc


def test_k_fold_run_trains_every_fold_and_averages(tiny_doc, tmp_path):
    config = parse_config(_three_fold_doc(tiny_doc))
    spec = RunSpec("fixed_norm", 0, 0.25, seed=1)
    out = tmp_path / "out"
    record = _stored_run(config, spec, out)
    assert record["status"] == "ok"
    folds = record["folds"]
    assert len(folds) == 3 and all(set(f) == set(record["metrics"]) for f in folds)
    for name, value in record["metrics"].items():
        assert value == pytest.approx(np.mean([f[name] for f in folds]), abs=1e-12,
                                      nan_ok=True), name
    assert len({f["test_loss"] for f in folds}) == 3  # three different splits
    assert record["history"]["epoch"] == [1, 2, 3]
    per_fold_steps = config.budget.epochs * math.ceil(64 / config.budget.batch_size)
    assert record["grad_evals"] == record["steps_done"] == 3 * per_fold_steps
    assert record["weights_files"] == [f"runs/{spec.key}.fold{j}.pt" for j in range(3)]
    assert record["weights_file"] == record["weights_files"][0]
    details = record["fold_details"]
    assert [d["fold"] for d in details] == [0, 1, 2]
    assert [d["hooks"]["audit"]["file"] for d in details] == [
        f"audits/{spec.key}.fold{j}.jsonl" for j in range(3)]
    assert all((out / d["hooks"]["audit"]["file"]).is_file() for d in details)
    _, splits = load_folds(config, spec.seed)
    for j, split in enumerate(splits):  # each fold's saved network scores its fold's numbers
        model, info = load_trained(out, spec.key, fold=j)
        assert info["fold"] == j and info["folds"] == 3
        labels = predict(model, info, _raw(split, "test"))
        accuracy = np.mean(labels == np.asarray(info["classes"])[split.y_test])
        assert accuracy == pytest.approx(folds[j]["test_accuracy"], abs=1e-12)
    with pytest.raises(ValueError, match="3 folds; pass fold=0..2"):
        load_trained(out, spec.key)


def test_k_fold_refuses_ensembles_and_explicit_hooks(tiny_doc):
    config = parse_config(_three_fold_doc(tiny_doc))
    with pytest.raises(ValueError, match="pass hooks=None"):
        train_run(config, RunSpec("none", 0, 0.0, seed=1), hooks=[])
    # refused when the config is read ...
    tiny_doc["arms"]["fixed_norm"]["ensemble"] = {"temperature": 1.0, "samples": 4}
    with pytest.raises(StudyConfigError, match="'arms.fixed_norm.ensemble' cannot be "
                                               "combined with 'data.folds' = 3"):
        parse_config(tiny_doc)
    # ... and by the runner, for a config assembled in code
    sampling = EnsembleConfig(temperature=1.0, samples=4)
    config = dataclasses.replace(config, arms=tuple(
        dataclasses.replace(a, ensemble=sampling) if a.name == "fixed_norm" else a
        for a in config.arms))
    with pytest.raises(StudyConfigError, match="cannot be combined with k-fold data"):
        train_run(config, RunSpec("fixed_norm", 0, 0.25, seed=1))
