r"""Ensemble phase of a study run: sample weights after training, compare with the network.

For an arm with ``[arms.NAME.ensemble]`` (:class:`~holonomic.study.config.EnsembleConfig`)
every run of the arm, once trained, continues as a sampler from its trained weights:

.. code-block:: text

    input: trained model W0, task (loss L), arm (constraints, weight decay lambda,
           max-norm clipping), N training rows, temperature T, burn-in b, thinning k,
           samples J
    single <- eval-mode prediction of model_W0 on validation and test inputs
    sampler <- AdaptiveLangevin or Langevin(step, friction, T, dataset_size=N,
                                            weight_decay=N lambda, seed from the run seed)
    for t = 1 .. b + J k:                          # mini-batches as in training, train mode
        zero_grad; task loss on the batch; backward; sampler.step(); arm after-step
        if t > b and (t - b) mod k == 0:           # sample j, eval mode
            classification: S <- S + softmax(model(x))    # holonomic.sampling.PredictiveEnsemble
            regression:     S1 <- S1 + f(x);  S2 <- S2 + f(x)^2
            trace: task loss over the training split, output-layer weight norm
    classification: ensemble <- S / J
    regression: mean mu = S1 / J; variance v = T + (S2 / J - mu^2)
    return metrics of single and ensemble (:func:`ensemble_metrics`), traces

Classification metrics: accuracy, NLL, ECE (15 bins), entropy
(:func:`holonomic.sampling.classification_metrics`). Regression metrics: RMSE, R^2, MAE of
the predictive mean, and the Gaussian negative log-likelihood
:math:`\frac1n\sum_i \tfrac12\log(2\pi v_i) + (y_i - \mu_i)^2 / (2 v_i)` of the predictive
distribution, all in the target's units (standardised mean and variance mapped back with the
training split's mean ``m`` and standard deviation ``s``: :math:`m + s\mu`, :math:`s^2 v`).
The predictive variance is the noise variance of the likelihood the sampler targets,
:math:`\sigma^2 = T` in standardised units (the loss is half the mean squared error, so
``dataset_size = N`` at temperature ``T`` is a Gaussian likelihood of variance ``T``; see
:mod:`holonomic.study.tasks`), plus the variance of the sampled networks' means. The single
network's NLL uses the same noise variance ``T`` (and no spread), so the two are compared
under one likelihood.

The phase is part of the run: its results land in the same run record, written atomically
with the rest, so resuming and sharding work as for training alone. Every seed draws the
same number of samples, so the traces form a (seeds, samples) array per observable for the
mixing diagnostics of the report
(:func:`holonomic.study.ensemble_report.ensemble_summary`). Ensembles are not combined with
k-fold data (refused when the study file is read).

What it does not show: the ensemble averages draws from an *approximate* tempered posterior
(finite step, mini-batch noise, a short chain from one trained point); chains that have not
mixed average around one mode only. The seeds differ in their data split, so chains of
different seeds target different posteriors: R-hat over seeds mixes "not mixed" with
"different split"; the single-chain split R-hat (halves of one chain) is reported too.
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict
from typing import Any

import numpy as np
import torch
from torch import nn

import holonomic as hn
from holonomic.sampling import (
    PredictiveEnsemble,
    classification_metrics,
    predict_probabilities,
)
from holonomic.study.arms import constraint_residual
from holonomic.study.config import BudgetConfig, EnsembleConfig, StudyConfig
from holonomic.study.loop import SAMPLING_RNG_OFFSET, evaluation_mode, model_rng, run_minibatches
from holonomic.study.regularisers import ArmSetup
from holonomic.study.tasks import Task, regression_scores

__all__ = ["ENSEMBLE_METRICS", "REGRESSION_ENSEMBLE_METRICS", "TRACED", "ensemble_metrics",
           "regression_predictive", "run_ensemble_phase", "skipped_phase"]

#: Metrics of the single network and of the ensemble for classification
#: (sampling.classification_metrics).
ENSEMBLE_METRICS = ("accuracy", "nll", "ece", "entropy")
#: The same for regression: of the predictive mean, and the Gaussian NLL (target units).
REGRESSION_ENSEMBLE_METRICS = ("rmse", "r2", "mae", "nll")
#: Scalar observables traced at every sample.
TRACED = ("train_loss", "weight_norm_output")
ECE_BINS = 15
#: Offset that makes the sampler's noise independent of the training noise of the same seed.
_SAMPLER_SEED_OFFSET = 7_919


def ensemble_metrics(task: Task | str | None = None) -> tuple[str, ...]:
    """Metric names of the phase's ``single`` and ``ensemble`` entries for ``task`` (a
    :class:`~holonomic.study.tasks.Task` or a task name; None: classification)."""
    name = task if isinstance(task, str) or task is None else task.name
    return REGRESSION_ENSEMBLE_METRICS if name == "regression" else ENSEMBLE_METRICS


def _budget(budget: BudgetConfig | StudyConfig) -> BudgetConfig:
    """The budget (a whole :class:`StudyConfig` is accepted for older callers)."""
    return budget.budget if isinstance(budget, StudyConfig) else budget


def _sampler(model: nn.Module, ens: EnsembleConfig, budget: BudgetConfig, setup: ArmSetup,
             n_train: int, seed: int) -> tuple[torch.optim.Optimizer, dict[str, Any]]:
    resolved = ens.resolved(budget, n_train)
    settings = {**resolved, "dataset_size": n_train,
                "weight_decay": setup.weight_decay * n_train,
                "seed": seed + _SAMPLER_SEED_OFFSET}
    common = dict(step=settings["step"], friction=settings["friction"],
                  temperature=ens.temperature, projection=budget.projection,
                  seed=settings["seed"], dataset_size=n_train,
                  weight_decay=settings["weight_decay"])
    cls = hn.AdaptiveLangevin if ens.sampler == "adaptive" else hn.Langevin
    return cls(model.parameters(), **common), settings


def _output_norm(model: nn.Module) -> float:
    output = [m for m in model.modules() if isinstance(m, nn.Linear)][-1]
    with torch.no_grad():
        return float(output.weight.norm())


def _metrics(probs: torch.Tensor, labels: Any) -> dict[str, float]:
    return classification_metrics(probs, torch.as_tensor(np.asarray(labels)), ECE_BINS)


def _moments(outputs: torch.Tensor) -> torch.Tensor:
    """A regression network's prediction and its square, float64 (n, 2): averaged by the
    collector into the first two moments over the samples."""
    f = outputs.reshape(-1, 1).to(torch.float64)
    return torch.cat([f, f * f], dim=1)


def regression_predictive(moments: torch.Tensor, temperature: float,
                          ) -> tuple[torch.Tensor, torch.Tensor]:
    """Predictive mean and variance (standardised units) from the sample averages of the
    prediction and its square (``moments``: (n, 2)): mean ``mu = E f``, variance
    ``T + (E f^2 - mu^2)`` -- the likelihood's noise variance ``sigma^2 = T`` plus the
    spread of the sampled networks' predictions (population variance over the samples)."""
    mean = moments[:, 0]
    spread = (moments[:, 1] - mean ** 2).clamp_min(0.0)
    return mean, spread + temperature


def _regression_metrics(mean: torch.Tensor, variance: torch.Tensor, y: Any,
                        task: Task) -> dict[str, float]:
    """RMSE, R^2, MAE of the predictive mean and the Gaussian NLL, in target units, from a
    standardised predictive mean and variance."""
    y = np.asarray(y, dtype=np.float64)
    mu = task.target_mean + task.target_std * mean.numpy()
    var = variance.numpy() * task.target_std ** 2
    out = regression_scores(y, mu)
    out["nll"] = float(np.mean(0.5 * np.log(2.0 * np.pi * var) + (y - mu) ** 2 / (2.0 * var)))
    return {m: out[m] for m in REGRESSION_ENSEMBLE_METRICS}


def run_ensemble_phase(budget: BudgetConfig, ens: EnsembleConfig, model: nn.Module,
                       setup: ArmSetup, data: dict[str, tuple[torch.Tensor, torch.Tensor]],
                       seed: int, first_epoch: int, task: Task | None = None,
                       targets: dict[str, Any] | None = None) -> dict[str, Any]:
    """Sample from the trained ``model`` (changed in place) and return the phase's record.

    ``data`` maps ``"train"``, ``"val"``, ``"test"`` to (inputs, training targets: labels,
    or standardised regression targets); ``targets`` maps ``"val"`` and ``"test"`` to the
    labels or original-unit targets the metrics compare with (default: the labels of
    ``data``); ``task`` defaults to classification; ``budget``: the study's (batch size,
    projection, default step and friction). Mini-batches follow the training loop
    (:func:`holonomic.study.loop.run_minibatches`) from epoch ``first_epoch`` on (the
    epochs after training). Keys of the result: ``settings`` (as configured and as resolved),
    ``status`` (``ok``, ``failed``: an integration step failed, ``diverged``: a non-finite
    loss), ``message``, ``steps_done``, ``samples``, ``single`` and ``ensemble``
    (``{"val": metrics, "test": metrics}`` with the names of :func:`ensemble_metrics`;
    ensemble metrics NaN unless ``ok``), ``traces`` (observable -> list of one value per
    sample), ``constraint_residual`` after sampling, ``wall_s``.
    """
    budget = _budget(budget)

    started = time.perf_counter()
    x_train, y_train = data["train"]
    n_train = len(y_train)
    if task is None:
        task = Task("classification", int(torch.max(y_train)) + 1)
    if targets is None:
        targets = {part: data[part][1].numpy() for part in ("val", "test")}
    regression = task.is_regression
    x_eval = torch.cat([data["val"][0], data["test"][0]])
    n_val = len(data["val"][1])
    temperature = ens.temperature

    def scores(prediction: torch.Tensor, variance: torch.Tensor | None) -> dict[str, dict]:
        if regression:
            return {"val": _regression_metrics(prediction[:n_val], variance[:n_val],
                                               targets["val"], task),
                    "test": _regression_metrics(prediction[n_val:], variance[n_val:],
                                                targets["test"], task)}
        return {"val": _metrics(prediction[:n_val], targets["val"]),
                "test": _metrics(prediction[n_val:], targets["test"])}

    if regression:  # predict_probabilities: eval mode, no gradients, mode restored
        single_mean = predict_probabilities(model, x_eval, to_probs=_moments)[:, 0]
        single = scores(single_mean, torch.full_like(single_mean, temperature))
    else:
        single = scores(predict_probabilities(model, x_eval), None)

    sampler, resolved = _sampler(model, ens, budget, setup, n_train, seed)
    burn_in = resolved["burn_in"]
    total = burn_in + ens.samples * ens.every
    collector = PredictiveEnsemble(model, x_eval, burn_in=burn_in, every=ens.every,
                                   to_probs=_moments if regression else None)
    traces: dict[str, list[float]] = {name: [] for name in TRACED}

    def on_step(step: int) -> None:
        if collector.observe():  # collects in eval mode
            with evaluation_mode(model):
                train_loss = float(task.loss(model(x_train), y_train))
            traces["train_loss"].append(train_loss)
            traces["weight_norm_output"].append(_output_norm(model))

    model.train()
    # dropout masks (the global torch RNG) fixed by the seed; the caller's RNG is untouched
    with model_rng(seed, 0, SAMPLING_RNG_OFFSET):
        status, message, step = run_minibatches(
            model, sampler, setup, x_train, y_train, batch_size=budget.batch_size, seed=seed,
            steps=total, first_epoch=first_epoch, loss=task.loss, on_step=on_step,
            label="sampling step")
    if status == "ok" and not all(math.isfinite(v) for t in traces.values() for v in t):
        status, message = "diverged", "non-finite traced observable"
    nan = {name: math.nan for name in ensemble_metrics(task)}
    if status == "ok":
        mean = collector.mean_probs()
        if regression:
            ensemble = scores(*regression_predictive(mean, temperature))
        else:
            ensemble = scores(mean, None)
    else:
        ensemble = {"val": dict(nan), "test": dict(nan)}
    return {
        "settings": {**asdict(ens), **resolved},
        "sampler": type(sampler).__name__,
        "status": status,
        "message": message,
        "steps_done": step,
        "samples": collector.num_samples,
        "single": single,
        "ensemble": ensemble,
        "traces": traces,
        "constraint_residual": constraint_residual(model, setup),
        "wall_s": time.perf_counter() - started,
    }


def skipped_phase(budget: BudgetConfig, ens: EnsembleConfig, n_train: int,
                  reason: str, task: Task | str | None = None) -> dict[str, Any]:
    """The phase's record when training did not finish (nothing to sample from)."""
    nan = {name: math.nan for name in ensemble_metrics(task)}
    return {"settings": {**asdict(ens), **ens.resolved(_budget(budget), n_train)},
            "sampler": "AdaptiveLangevin" if ens.sampler == "adaptive" else "Langevin",
            "status": "skipped", "message": f"not sampled: {reason}", "steps_done": 0,
            "samples": 0, "single": {"val": dict(nan), "test": dict(nan)},
            "ensemble": {"val": dict(nan), "test": dict(nan)},
            "traces": {name: [] for name in TRACED}, "constraint_residual": math.nan,
            "wall_s": 0.0}
