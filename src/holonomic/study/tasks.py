r"""What a study predicts: classification or regression, its loss and its metrics.

A study's task (``data.task``) decides the network's output, the training loss and the
metrics recorded for every run:

==============  ==========================================================================
task            output, loss, metrics
==============  ==========================================================================
classification  ``k`` logits; mean cross-entropy; accuracy, balanced accuracy, macro F1,
                ROC AUC (two classes only), loss (mean cross-entropy), ECE
regression      one output; targets standardised with the training split's mean ``m`` and
                standard deviation ``s``; loss :math:`\tfrac12` mean squared error in
                standardised units; RMSE, MAE (original units), :math:`R^2`, loss
==============  ==========================================================================

Regression likelihood. The loss :math:`\bar L = \frac{1}{2n}\sum_i (z_i - f(x_i))^2` on
standardised targets :math:`z = (y - m)/s` makes :math:`N \bar L / T` (``dataset_size = N``,
temperature ``T``) the negative log-likelihood of a Gaussian model with noise variance
:math:`\sigma^2 = T` in standardised units, i.e. :math:`\sigma^2 = T s^2` in the target's
units (up to a constant). So ``T = 1`` assumes noise as large as the target's spread; a
smaller ``T`` assumes less noise (a sharper likelihood), not a colder posterior of a fixed
model.

Metric formulas (checked against ``sklearn.metrics`` in the tests):

* accuracy :math:`\frac1n\sum_i [\hat y_i = y_i]`; balanced accuracy: the mean over the
  classes present in ``y`` of the per-class recall;
* macro F1: the unweighted mean over the classes present in ``y`` or predicted of
  :math:`2\,\mathrm{TP}/(2\,\mathrm{TP} + \mathrm{FP} + \mathrm{FN})` (0 where undefined);
* ROC AUC (two classes): the Mann-Whitney probability that a positive scores above a
  negative, ties counting one half, with the score ``p(class 1)``;
* RMSE :math:`\sqrt{\frac1n\sum (y_i - \hat y_i)^2}`, MAE :math:`\frac1n\sum|y_i - \hat y_i|`,
  :math:`R^2 = 1 - \sum (y_i - \hat y_i)^2 / \sum (y_i - \bar y)^2`.

Gaps: for every metric, ``gap_M`` is how much better the training split scores than the
test split (``train - test`` where larger is better, ``test - train`` where smaller is
better), so a positive gap always means the model does better on data it was trained on.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import torch
from scipy import stats as sps
from torch.nn import functional as F

from holonomic.study.stats import expected_calibration_error

__all__ = ["ECE_BINS", "PARTS", "TASKS", "Task", "balanced_accuracy", "macro_f1",
           "metric_range", "recorded_n_classes", "split_metric_name",
           "regression_scores", "roc_auc", "task_for"]

TASKS = ("classification", "regression")
#: The splits every run is evaluated on.
PARTS = ("train", "val", "test")
ECE_BINS = 15

#: Whether a larger value is better, per metric.
_HIGHER_IS_BETTER = {
    "accuracy": True, "balanced_accuracy": True, "macro_f1": True, "roc_auc": True,
    "loss": False, "rmse": False, "mae": False, "r2": True,
}
_DESCRIPTIONS = {
    "accuracy": "accuracy",
    "balanced_accuracy": "balanced accuracy (mean per-class recall)",
    "macro_f1": "macro F1 (unweighted mean over classes)",
    "roc_auc": "ROC AUC (score: probability of the second class)",
    "loss": "loss (classification: mean cross-entropy; regression: half the mean squared "
            "error of standardised targets)",
    "rmse": "root mean squared error (target units)",
    "mae": "mean absolute error (target units)",
    "r2": "coefficient of determination R^2",
}


def balanced_accuracy(y_true: np.ndarray, y_pred: np.ndarray) -> float:
    """Mean over the classes present in ``y_true`` of the recall of that class."""
    y_true, y_pred = np.asarray(y_true), np.asarray(y_pred)
    recalls = [float(np.mean(y_pred[y_true == c] == c)) for c in np.unique(y_true)]
    return float(np.mean(recalls))


def macro_f1(y_true: np.ndarray, y_pred: np.ndarray) -> float:
    """Unweighted mean F1 over the classes in ``y_true`` or ``y_pred`` (0 where undefined)."""
    y_true, y_pred = np.asarray(y_true), np.asarray(y_pred)
    scores = []
    for c in np.union1d(y_true, y_pred):
        tp = float(np.sum((y_pred == c) & (y_true == c)))
        fp = float(np.sum((y_pred == c) & (y_true != c)))
        fn = float(np.sum((y_pred != c) & (y_true == c)))
        scores.append(0.0 if tp == 0.0 else 2.0 * tp / (2.0 * tp + fp + fn))
    return float(np.mean(scores))


def roc_auc(y_true: np.ndarray, score: np.ndarray) -> float:
    """Area under the ROC curve for labels in {0, 1}: the Mann-Whitney U statistic over
    ``n_pos * n_neg`` (mid-ranks for ties); ``nan`` when one class is absent."""
    y_true = np.asarray(y_true)
    score = np.asarray(score, dtype=np.float64)
    positive = y_true == 1
    n_pos, n_neg = int(positive.sum()), int((~positive).sum())
    if n_pos == 0 or n_neg == 0:
        return math.nan
    ranks = sps.rankdata(score)
    u = ranks[positive].sum() - n_pos * (n_pos + 1) / 2.0
    return float(u / (n_pos * n_neg))


def regression_scores(y_true: np.ndarray, y_pred: np.ndarray) -> dict[str, float]:
    """RMSE, MAE and R^2 of predictions in the target's units (R^2 ``nan`` for constant
    ``y_true``)."""
    y_true = np.asarray(y_true, dtype=np.float64)
    y_pred = np.asarray(y_pred, dtype=np.float64)
    residual = y_true - y_pred
    total = float(np.sum((y_true - y_true.mean()) ** 2))
    return {
        "rmse": float(np.sqrt(np.mean(residual ** 2))),
        "mae": float(np.mean(np.abs(residual))),
        "r2": 1.0 - float(np.sum(residual ** 2)) / total if total > 0 else math.nan,
    }


@dataclass(frozen=True)
class Task:
    """A study's task on a given data set.

    Attributes:
        name: ``"classification"`` or ``"regression"``.
        n_classes: number of classes (0 for regression).
        target_mean, target_std: the training split's target statistics that standardised
            the regression targets (0 and 1 for classification); predictions are mapped
            back with ``m + s * output`` before the metrics.
    """

    name: str
    n_classes: int = 0
    target_mean: float = 0.0
    target_std: float = 1.0

    def __post_init__(self) -> None:
        if self.name not in TASKS:
            raise ValueError(f"task must be one of {', '.join(TASKS)}, got {self.name!r}")
        if self.name == "classification" and self.n_classes < 2:
            raise ValueError(f"classification needs n_classes >= 2, got {self.n_classes}")

    @property
    def is_regression(self) -> bool:
        return self.name == "regression"

    @property
    def n_outputs(self) -> int:
        """Width of the network's last layer: ``n_classes`` logits, or 1 for regression."""
        return 1 if self.is_regression else self.n_classes

    @property
    def metrics(self) -> tuple[str, ...]:
        """Metrics recorded per split, in report order; the first is the headline metric."""
        if self.is_regression:
            return ("rmse", "r2", "mae", "loss")
        if self.n_classes == 2:
            return ("accuracy", "balanced_accuracy", "macro_f1", "roc_auc", "loss")
        return ("accuracy", "balanced_accuracy", "macro_f1", "loss")

    @property
    def headline(self) -> str:
        """The metric quoted first (accuracy, or RMSE for regression)."""
        return self.metrics[0]

    @staticmethod
    def higher_is_better(metric: str) -> bool:
        """Whether a larger value of ``metric`` (without split prefix) is better."""
        return _HIGHER_IS_BETTER[metric]

    @staticmethod
    def describe(metric: str) -> str:
        return _DESCRIPTIONS[metric]

    def record_metrics(self) -> tuple[str, ...]:
        """Every metric name a run record holds for this task (``metrics`` of a run)."""
        names = [f"{part}_{m}" for part in PARTS for m in self.metrics]
        names += [f"gap_{m}" for m in self.metrics] + [f"val_gap_{m}" for m in self.metrics]
        if not self.is_regression:
            names += ["ece_val", "ece_test"]
        return tuple(names)

    def loss(self, outputs: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
        """Training loss, a mean over the batch: cross-entropy of logits, or half the
        squared error of the single output against the standardised target."""
        if self.is_regression:
            return 0.5 * F.mse_loss(outputs.reshape(-1), target)
        return F.cross_entropy(outputs, target)

    def target_tensor(self, y: np.ndarray) -> torch.Tensor:
        """Labels as ``long``, or regression targets standardised (float64; cast to the
        model's dtype by the caller)."""
        if self.is_regression:
            z = (np.asarray(y, dtype=np.float64) - self.target_mean) / self.target_std
            return torch.as_tensor(z, dtype=torch.float64)
        return torch.as_tensor(np.asarray(y), dtype=torch.long)

    def scores(self, outputs: np.ndarray, y: np.ndarray) -> dict[str, float]:
        """Every metric of :attr:`metrics` for raw network outputs on one split.

        ``outputs``: logits (n, k), or standardised predictions (n, 1) or (n,);
        ``y``: labels, or targets in their original units.
        """
        outputs = np.asarray(outputs, dtype=np.float64)
        y = np.asarray(y)
        if self.is_regression:
            z_hat = outputs.reshape(-1)
            z = (y.astype(np.float64) - self.target_mean) / self.target_std
            out = regression_scores(y, self.target_mean + self.target_std * z_hat)
            out["loss"] = float(0.5 * np.mean((z - z_hat) ** 2))
            return {m: out[m] for m in self.metrics}
        logits = torch.as_tensor(outputs)
        probabilities = torch.softmax(logits, dim=1).numpy()
        return self.probability_scores(probabilities, y)

    def probability_scores(self, probabilities: np.ndarray, y: np.ndarray) -> dict[str, float]:
        """Classification metrics of predictive probabilities (n, k) (a softmax output or an
        ensemble average); the loss is the mean negative log-probability of the label."""
        probabilities = np.asarray(probabilities, dtype=np.float64)
        y = np.asarray(y)
        predicted = probabilities.argmax(axis=1)
        out = {
            "accuracy": float(np.mean(predicted == y)),
            "balanced_accuracy": balanced_accuracy(y, predicted),
            "macro_f1": macro_f1(y, predicted),
            "loss": float(-np.mean(np.log(np.clip(
                probabilities[np.arange(len(y)), y], 1e-300, None)))),
        }
        if self.n_classes == 2:
            out["roc_auc"] = roc_auc(y, probabilities[:, 1])
        return {m: out[m] for m in self.metrics}

    def calibration_error(self, outputs: np.ndarray, y: np.ndarray) -> float:
        """Expected calibration error (15 bins) of the softmax of ``outputs``."""
        probabilities = torch.softmax(torch.as_tensor(outputs, dtype=torch.float64),
                                      dim=1).numpy()
        return expected_calibration_error(probabilities, np.asarray(y), ECE_BINS)

    def gap(self, metric: str, train: float, other: float) -> float:
        """How much better the training split scores than ``other`` on ``metric``."""
        return train - other if self.higher_is_better(metric) else other - train

    def run_metrics(self, outputs: dict[str, np.ndarray], targets: dict[str, np.ndarray],
                    ) -> dict[str, float]:
        """The ``metrics`` of a run record from its outputs on train, val and test.

        ``outputs[part]``: raw network outputs on that split (eval mode);
        ``targets[part]``: labels or targets in original units.
        """
        per_part = {part: self.scores(outputs[part], targets[part]) for part in PARTS}
        out = {f"{part}_{m}": per_part[part][m] for part in PARTS for m in self.metrics}
        for m in self.metrics:
            out[f"gap_{m}"] = self.gap(m, per_part["train"][m], per_part["test"][m])
            out[f"val_gap_{m}"] = self.gap(m, per_part["train"][m], per_part["val"][m])
        if not self.is_regression:
            for part in ("val", "test"):
                out[f"ece_{part}"] = self.calibration_error(outputs[part], targets[part])
        return out


def recorded_n_classes(task: str, n_classes: int | None, metric_names) -> int:
    """The class count of a stored run or summary: 0 for regression, the recorded count, or
    for records that predate it 2 when they hold a ROC AUC (binary only) and otherwise 3
    (any count above two has the same metrics)."""
    if task == "regression":
        return 0
    if n_classes is not None:
        return n_classes
    return 2 if any(str(m).endswith("roc_auc") for m in metric_names) else 3


def task_for(name: str, n_classes: int = 0, target_mean: float = 0.0,
             target_std: float = 1.0) -> Task:
    """A :class:`Task`; ``target_std`` must be positive (a constant target cannot be
    standardised)."""
    if not (math.isfinite(target_std) and target_std > 0):
        raise ValueError(f"target_std must be finite and > 0, got {target_std}")
    return Task(name, n_classes, float(target_mean), float(target_std))


#: Metric names without split prefix whose values lie in [0, 1].
UNIT_INTERVAL = ("accuracy", "balanced_accuracy", "macro_f1", "roc_auc", "ece")
#: Metrics (without split prefix) that are undefined (NaN) in some finished runs: ROC AUC
#: when a split holds one class, R^2 when a split's targets are constant.
MAY_BE_UNDEFINED = ("roc_auc", "r2")
_PREFIXES = ("val_gap_", "gap_", "train_", "val_", "test_")


def split_metric_name(name: str) -> tuple[str, str]:
    """``"val_gap_accuracy"`` -> ``("val_gap_", "accuracy")``, ``"ece_test"`` ->
    ``("test_", "ece")``; ``("", name)`` otherwise."""
    for prefix in _PREFIXES:
        if name.startswith(prefix):
            return prefix, name[len(prefix):]
    if name.startswith("ece_"):
        return name[len("ece_"):] + "_", "ece"
    return "", name


def metric_range(name: str) -> tuple[float, float]:
    """The values a recorded metric can take, e.g. ``(0, 1)`` for ``test_accuracy``,
    ``(-1, 1)`` for ``gap_accuracy``, ``(-inf, 1)`` for ``test_r2``, ``(0, inf)`` for
    losses, errors, norms and residuals; ``(-inf, inf)`` when unknown."""
    prefix, base = split_metric_name(name)
    gap = prefix in ("gap_", "val_gap_")
    if base in UNIT_INTERVAL:
        return (-1.0, 1.0) if gap else (0.0, 1.0)
    if gap:
        return (-math.inf, math.inf)
    if base == "r2":
        return (-math.inf, 1.0)
    if base in ("rmse", "mae", "loss", "constraint_residual") or base.startswith("weight_norm") \
            or base.startswith("mean_row_norm"):
        return (0.0, math.inf)
    return (-math.inf, math.inf)
