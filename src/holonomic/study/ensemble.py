r"""Ensemble phase of a study run: sample weights after training, compare with the network.

For an arm with ``[arms.NAME.ensemble]`` (:class:`~holonomic.study.config.EnsembleConfig`)
every run of the arm, once trained, continues as a sampler from its trained weights:

.. code-block:: text

    input: trained model W0, arm (constraints, weight decay lambda, max-norm clipping),
           N training rows, temperature T, burn-in b, thinning k, samples J
    single <- softmax(model_W0(x))  on validation and test inputs
    sampler <- AdaptiveLangevin or Langevin(step, friction, T, dataset_size=N,
                                            weight_decay=N lambda, seed from the run seed)
    for t = 1 .. b + J k:                          # mini-batches as in training
        zero_grad; mean cross-entropy on the batch; backward; sampler.step(); arm after-step
        if t > b and (t - b) mod k == 0:           # sample j
            S <- S + softmax(model(x))             # holonomic.sampling.PredictiveEnsemble
            trace: full training loss, output-layer weight norm
    ensemble <- S / J
    return metrics (accuracy, NLL, ECE, entropy) of single and ensemble, traces

The phase is part of the run: its results land in the same run record, written atomically
with the rest, so resuming and sharding work as for training alone. Every seed draws the
same number of samples, so the traces form a (seeds, samples) array per observable for the
mixing diagnostics of the report
(:func:`holonomic.study.ensemble_report.ensemble_summary`).

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

import torch
from torch import nn
from torch.nn import functional as F

import holonomic as hn
from holonomic.sampling import (
    PredictiveEnsemble,
    classification_metrics,
    predict_probabilities,
)
from holonomic.study.arms import ArmSetup, constraint_residual
from holonomic.study.config import EnsembleConfig, StudyConfig

__all__ = ["ENSEMBLE_METRICS", "TRACED", "run_ensemble_phase", "skipped_phase"]

#: Metrics of the single network and of the ensemble (sampling.classification_metrics).
ENSEMBLE_METRICS = ("accuracy", "nll", "ece", "entropy")
#: Scalar observables traced at every sample.
TRACED = ("train_loss", "weight_norm_output")
ECE_BINS = 15
#: Offset that makes the sampler's noise independent of the training noise of the same seed.
_SAMPLER_SEED_OFFSET = 7_919


def _sampler(model: nn.Module, ens: EnsembleConfig, config: StudyConfig, setup: ArmSetup,
             n_train: int, seed: int) -> tuple[torch.optim.Optimizer, dict[str, Any]]:
    resolved = ens.resolved(config.budget, n_train)
    settings = {**resolved, "dataset_size": n_train,
                "weight_decay": setup.weight_decay * n_train,
                "seed": seed + _SAMPLER_SEED_OFFSET}
    common = dict(step=settings["step"], friction=settings["friction"],
                  temperature=ens.temperature, projection=config.budget.projection,
                  seed=settings["seed"], dataset_size=n_train,
                  weight_decay=settings["weight_decay"])
    cls = hn.AdaptiveLangevin if ens.sampler == "adaptive" else hn.Langevin
    return cls(model.parameters(), **common), settings


def _output_norm(model: nn.Module) -> float:
    output = [m for m in model.modules() if isinstance(m, nn.Linear)][-1]
    with torch.no_grad():
        return float(output.weight.norm())


def _metrics(probs: torch.Tensor, labels: torch.Tensor) -> dict[str, float]:
    return classification_metrics(probs, labels, ECE_BINS)


def run_ensemble_phase(config: StudyConfig, ens: EnsembleConfig, model: nn.Module,
                       setup: ArmSetup, data: dict[str, tuple[torch.Tensor, torch.Tensor]],
                       seed: int, first_epoch: int) -> dict[str, Any]:
    """Sample from the trained ``model`` (changed in place) and return the phase's record.

    ``data`` maps ``"train"``, ``"val"``, ``"test"`` to (inputs, labels); mini-batches
    follow :func:`holonomic.study.runner.epoch_order` from epoch ``first_epoch`` on (the
    epochs after training). Keys of the result: ``settings`` (as configured and as
    resolved), ``status`` (``ok``, ``failed``: an integration step failed, ``diverged``: a
    non-finite loss), ``message``, ``steps_done``, ``samples``, ``single`` and ``ensemble``
    (``{"val": metrics, "test": metrics}``; ensemble metrics NaN unless ``ok``), ``traces``
    (observable -> list of one value per sample), ``constraint_residual`` after sampling,
    ``wall_s``.
    """
    from holonomic.study.runner import epoch_order, minibatch_step

    started = time.perf_counter()
    x_train, y_train = data["train"]
    n_train = len(y_train)
    x_eval = torch.cat([data["val"][0], data["test"][0]])
    n_val = len(data["val"][1])
    single_probs = predict_probabilities(model, x_eval)
    single = {"val": _metrics(single_probs[:n_val], data["val"][1]),
              "test": _metrics(single_probs[n_val:], data["test"][1])}

    sampler, resolved = _sampler(model, ens, config, setup, n_train, seed)
    burn_in = resolved["burn_in"]
    total = burn_in + ens.samples * ens.every
    collector = PredictiveEnsemble(model, x_eval, burn_in=burn_in, every=ens.every)
    traces: dict[str, list[float]] = {name: [] for name in TRACED}
    batch = config.budget.batch_size
    status, message, step, epoch = "ok", "", 0, first_epoch
    try:
        while step < total:
            order = epoch_order(n_train, seed, epoch)
            epoch += 1
            for start in range(0, n_train, batch):
                if step == total:
                    break
                minibatch_step(model, sampler, setup, x_train, y_train,
                               order[start:start + batch], f"sampling step {step}")
                step += 1
                if collector.observe():
                    with torch.no_grad():
                        train_loss = float(F.cross_entropy(model(x_train), y_train))
                    traces["train_loss"].append(train_loss)
                    traces["weight_norm_output"].append(_output_norm(model))
    except hn.IntegrationError as exc:
        status, message = "failed", f"IntegrationError at sampling step {step}: {exc}"
    except FloatingPointError as exc:
        status, message = "diverged", str(exc)
    if status == "ok" and not all(math.isfinite(v) for t in traces.values() for v in t):
        status, message = "diverged", "non-finite traced observable"
    nan = {name: math.nan for name in ENSEMBLE_METRICS}
    if status == "ok":
        probs = collector.mean_probs()
        ensemble = {"val": _metrics(probs[:n_val], data["val"][1]),
                    "test": _metrics(probs[n_val:], data["test"][1])}
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


def skipped_phase(config: StudyConfig, ens: EnsembleConfig, n_train: int,
                  reason: str) -> dict[str, Any]:
    """The phase's record when training did not finish (nothing to sample from)."""
    nan = {name: math.nan for name in ENSEMBLE_METRICS}
    return {"settings": {**asdict(ens), **ens.resolved(config.budget, n_train)},
            "sampler": "AdaptiveLangevin" if ens.sampler == "adaptive" else "Langevin",
            "status": "skipped", "message": f"not sampled: {reason}", "steps_done": 0,
            "samples": 0, "single": {"val": dict(nan), "test": dict(nan)},
            "ensemble": {"val": dict(nan), "test": dict(nan)},
            "traces": {name: [] for name in TRACED}, "constraint_residual": math.nan,
            "wall_s": 0.0}
