"""Task metrics against the reference library (sklearn.metrics) and closed forms."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from sklearn import metrics as skm

from holonomic.study.tasks import (
    Task,
    balanced_accuracy,
    macro_f1,
    regression_scores,
    roc_auc,
    task_for,
)


@pytest.mark.parametrize("k", [2, 3, 5])
def test_classification_metrics_equal_sklearn(k):
    # Reference library: sklearn.metrics (accuracy_score, balanced_accuracy_score,
    # f1_score(average="macro"), roc_auc_score, log_loss), on imbalanced random labels.
    rng = np.random.default_rng(k)
    y = rng.choice(k, size=200, p=np.linspace(1, 3, k) / np.linspace(1, 3, k).sum())
    logits = rng.normal(size=(200, k)) + 1.5 * np.eye(k)[y] * rng.random((200, 1))
    task = Task("classification", n_classes=k)
    scores = task.scores(logits, y)
    probabilities = torch.softmax(torch.as_tensor(logits), dim=1).numpy()
    predicted = probabilities.argmax(axis=1)
    assert scores["accuracy"] == pytest.approx(skm.accuracy_score(y, predicted), abs=1e-12)
    assert scores["balanced_accuracy"] == pytest.approx(
        skm.balanced_accuracy_score(y, predicted), abs=1e-12)
    assert scores["macro_f1"] == pytest.approx(
        skm.f1_score(y, predicted, average="macro", zero_division=0), abs=1e-12)
    assert scores["loss"] == pytest.approx(skm.log_loss(y, probabilities), abs=1e-10)
    if k == 2:
        assert scores["roc_auc"] == pytest.approx(
            skm.roc_auc_score(y, probabilities[:, 1]), abs=1e-12)
    else:
        assert "roc_auc" not in scores


def test_roc_auc_with_ties_equals_sklearn():
    # Reference library: sklearn.metrics.roc_auc_score (ties count one half).
    y = np.array([0, 0, 1, 1, 0, 1, 1, 0, 1, 0])
    score = np.array([0.1, 0.4, 0.4, 0.8, 0.8, 0.8, 0.3, 0.2, 0.9, 0.5])
    assert roc_auc(y, score) == pytest.approx(skm.roc_auc_score(y, score), abs=1e-12)
    assert math.isnan(roc_auc(np.zeros(4, dtype=int), score[:4]))


def test_macro_f1_counts_a_predicted_class_absent_from_labels():
    # Reference library: sklearn.metrics.f1_score(average="macro") uses the union of labels.
    y = np.array([0, 0, 1, 1])
    p = np.array([0, 2, 1, 1])
    assert macro_f1(y, p) == pytest.approx(skm.f1_score(y, p, average="macro",
                                                        zero_division=0), abs=1e-12)
    assert balanced_accuracy(y, p) == pytest.approx(skm.balanced_accuracy_score(y, p))


def test_regression_metrics_equal_sklearn_in_original_units():
    # Reference library: sklearn.metrics.mean_squared_error / mean_absolute_error /
    # r2_score, on predictions mapped back from standardised units.
    rng = np.random.default_rng(0)
    y = rng.normal(150.0, 70.0, size=120)
    task = task_for("regression", target_mean=140.0, target_std=60.0)
    z_hat = (y - 140.0) / 60.0 + rng.normal(0.0, 0.5, size=120)
    scores = task.scores(z_hat[:, None], y)
    y_hat = 140.0 + 60.0 * z_hat
    assert scores["rmse"] == pytest.approx(math.sqrt(skm.mean_squared_error(y, y_hat)))
    assert scores["mae"] == pytest.approx(skm.mean_absolute_error(y, y_hat))
    assert scores["r2"] == pytest.approx(skm.r2_score(y, y_hat))
    # loss: half the mean squared error in standardised units (closed form)
    assert scores["loss"] == pytest.approx(0.5 * np.mean(((y - 140.0) / 60.0 - z_hat) ** 2))
    assert regression_scores(y, y_hat)["rmse"] == pytest.approx(scores["rmse"])


def test_training_loss_matches_the_recorded_loss():
    rng = np.random.default_rng(1)
    task = task_for("regression", target_mean=2.0, target_std=3.0)
    y = rng.normal(2.0, 3.0, size=50)
    out = torch.as_tensor(rng.normal(size=(50, 1)))
    loss = float(task.loss(out, task.target_tensor(y)))
    assert loss == pytest.approx(task.scores(out.numpy(), y)["loss"], rel=1e-12)


def test_gaps_are_positive_when_training_scores_better():
    task = Task("regression")
    assert task.gap("rmse", 1.0, 2.0) == 1.0
    assert task.gap("r2", 0.9, 0.6) == pytest.approx(0.3)
    names = task.record_metrics()
    assert "gap_rmse" in names and "val_gap_r2" in names and "ece_test" not in names


def test_bad_task_settings_are_refused():
    with pytest.raises(ValueError, match="task must be one of"):
        Task("ranking")
    with pytest.raises(ValueError, match="n_classes"):
        Task("classification", n_classes=1)
    with pytest.raises(ValueError, match="target_std"):
        task_for("regression", target_std=0.0)
