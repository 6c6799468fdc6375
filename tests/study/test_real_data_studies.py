"""End-to-end studies on scikit-learn's bundled open data sets, as a user runs them.

Each test runs a whole study (small budget) through ``run_study`` and checks the numbers in
``results.csv`` / ``summary.json`` against an outside reference recomputed from the saved
weights (``runs/<key>.pt``): ``sklearn.metrics`` on the same predictions.
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest
from sklearn import metrics as skm

from holonomic.study import class_probabilities, load_trained, parse_config, predict, run_study
from holonomic.study.data import load_dataset
from holonomic.study.runner import load_folds, plan_runs

SMALL_ARMS = {"none": {}, "weight_decay": {"grid": [1e-3, 1e-2]},
              "fixed_norm": {"grid": [0.5, 1.0]}}


def _doc(source: str, **data) -> dict:
    return {
        "study": {"name": source, "seeds": 2},
        "data": {"source": source, **data},
        "model": {"widths": [16]},
        "budget": {"epochs": 4, "batch_size": 32, "lr": 0.02, "momentum": 0.9},
        "arms": {name: dict(body) for name, body in SMALL_ARMS.items()},
    }


def _rows(out) -> list[dict]:
    with open(out / "results.csv", newline="") as handle:
        return list(csv.DictReader(handle))


def _raw_part(config, seed: int, part: str):
    """Raw (unstandardised) features and targets of one part of a seed's split."""
    dataset, splits = load_folds(config, seed)
    split = splits[0]
    index = getattr(split, f"{part}_index")
    return dataset.x[index], dataset.y[index], dataset


@pytest.mark.slow
def test_breast_cancer_study_roc_auc_equals_sklearn_on_saved_predictions(tmp_path):
    # Reference library: sklearn.metrics.roc_auc_score on the saved networks' probabilities.
    config = parse_config(_doc("breast_cancer", train_size=100, val_fraction=0.2,
                               test_fraction=0.3) | {"study": {"name": "bc", "seeds": 2,
                                                               "selection": "val_roc_auc"}})
    out = tmp_path / "bc"
    summary = run_study(config, out, progress=False)
    assert summary["runs"]["ok"] == summary["runs"]["total"] == len(plan_runs(config))
    rows = _rows(out)
    assert "test_roc_auc" in rows[0] and "test_balanced_accuracy" in rows[0]
    for row in rows[::3]:
        seed = int(row["seed"])
        model, info = load_trained(out, row["arm"], strength=float(row["strength"]), seed=seed)
        x, y, dataset = _raw_part(config, seed, "test")
        probabilities = class_probabilities(model, info, x)
        positive = list(info["classes"]).index(dataset.classes[1])
        assert float(row["test_roc_auc"]) == pytest.approx(
            skm.roc_auc_score(y == 1, probabilities[:, positive]), abs=1e-12)
        assert float(row["test_balanced_accuracy"]) == pytest.approx(
            skm.balanced_accuracy_score(y, probabilities.argmax(axis=1)), abs=1e-12)
    report = (out / "report.md").read_text()
    head = report.split("## Set-up")[0]
    assert "- fixed_norm vs weight_decay, test accuracy: " in head  # the verdict line
    assert "val_roc_auc" in report


@pytest.mark.slow
def test_wine_study_macro_f1_equals_sklearn_on_saved_predictions(tmp_path):
    # Reference library: sklearn.metrics.f1_score(average="macro") on the saved networks'
    # predicted classes (three classes: no ROC AUC).
    config = parse_config(_doc("wine") | {"study": {"name": "wine", "seeds": 2,
                                                    "selection": "val_macro_f1"}})
    out = tmp_path / "wine"
    run_study(config, out, progress=False, plots=False)
    rows = _rows(out)
    assert "test_roc_auc" not in rows[0]
    for row in rows[::4]:
        seed = int(row["seed"])
        model, info = load_trained(out, row["arm"], strength=float(row["strength"]), seed=seed)
        x, y, dataset = _raw_part(config, seed, "test")
        labels = predict(model, info, x)
        predicted = np.array([list(dataset.classes).index(str(c)) for c in labels])
        assert float(row["test_macro_f1"]) == pytest.approx(
            skm.f1_score(y, predicted, average="macro"), abs=1e-12)
        assert float(row["test_accuracy"]) == pytest.approx(skm.accuracy_score(y, predicted),
                                                            abs=1e-12)


@pytest.mark.slow
def test_diabetes_regression_study_r2_and_rmse_equal_sklearn(tmp_path):
    # Reference library: sklearn.metrics.r2_score / mean_squared_error on the saved
    # networks' predictions in the target's units; sanity band against
    # sklearn.linear_model.Ridge on the same split (common practice, no source: a small MLP
    # trained briefly should not be far worse than a linear model on 10 features).
    from sklearn.linear_model import Ridge

    doc = _doc("diabetes")
    doc["budget"].update(epochs=30, lr=0.01)
    config = parse_config(doc)
    assert load_dataset(config).task == "regression"
    out = tmp_path / "diabetes"
    summary = run_study(config, out, progress=False, plots=False)
    assert summary["runs"]["ok"] == summary["runs"]["total"]
    rows = _rows(out)
    assert {"test_rmse", "test_r2", "test_mae", "gap_loss"} <= set(rows[0])
    assert "test_accuracy" not in rows[0]
    ridge_r2, ours_r2 = [], []
    for row in rows:
        seed = int(row["seed"])
        model, info = load_trained(out, row["arm"], strength=float(row["strength"]), seed=seed)
        x, y, _ = _raw_part(config, seed, "test")
        y_hat = predict(model, info, x)
        assert float(row["test_r2"]) == pytest.approx(skm.r2_score(y, y_hat), abs=1e-9)
        assert float(row["test_rmse"]) == pytest.approx(
            math.sqrt(skm.mean_squared_error(y, y_hat)), rel=1e-9)
        if row["arm"] == "none":
            x_train, y_train, _ = _raw_part(config, seed, "train")
            ridge = Ridge(alpha=1.0).fit(x_train, y_train)
            ridge_r2.append(ridge.score(x, y))
            ours_r2.append(float(row["test_r2"]))
    assert abs(np.mean(ours_r2) - np.mean(ridge_r2)) < 0.15, (ours_r2, ridge_r2)
    report = (out / "report.md").read_text()
    assert "test RMSE" in report and "| ECE |" not in report


@pytest.mark.slow
def test_dropout_batchnorm_factory_study_reports_eval_mode_numbers(tmp_path):
    # The recorded test accuracy of every run equals a fresh eval-mode evaluation of its
    # saved weights (closed form: the same network, the same inputs, no randomness).
    doc = _doc("breast_cancer", train_size=100)
    doc["model"] = {"factory": "tests.study.factories:dropout_batchnorm"}
    config = parse_config(doc)
    out = tmp_path / "dbn"
    run_study(config, out, progress=False, plots=False)
    for row in _rows(out):
        seed = int(row["seed"])
        model, info = load_trained(out, row["arm"], strength=float(row["strength"]), seed=seed)
        assert not model.training
        x, y, dataset = _raw_part(config, seed, "test")
        labels = predict(model, info, x)
        predicted = np.array([list(dataset.classes).index(str(c)) for c in labels])
        assert float(row["test_accuracy"]) == pytest.approx(np.mean(predicted == y), abs=1e-12)
