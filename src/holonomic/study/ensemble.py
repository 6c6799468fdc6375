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
mixing diagnostics of the report (:func:`ensemble_summary`).

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
from torch.nn import functional as F

import holonomic as hn
from holonomic.sampling import (
    PredictiveEnsemble,
    classification_metrics,
    mixing_diagnostics,
    predict_probabilities,
    rank_normalized_split_rhat,
)
from holonomic.study.arms import ArmSetup, constraint_residual
from holonomic.study.config import EnsembleConfig, StudyConfig
from holonomic.study.stats import paired_comparison

__all__ = ["ENSEMBLE_METRICS", "TRACED", "ensemble_lines", "ensemble_summary",
           "run_ensemble_phase", "skipped_phase"]

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


# ---------------------------------------------------------------------------------------
# Report


def _diagnostics(traces: dict[str, np.ndarray]) -> dict[str, Any]:
    """Mixing diagnostics per observable, seeds as chains, plus single-chain split R-hat."""
    out: dict[str, Any] = {}
    for name, chains in traces.items():
        entry: dict[str, Any] = {"chains": int(chains.shape[0]),
                                 "draws_per_chain": int(chains.shape[1])}
        try:
            summary = mixing_diagnostics({name: chains}, warn=False)[name]
            entry.update(rhat=summary.rhat, ess=summary.ess, tau=summary.tau,
                         warnings=list(summary.warnings))
        except ValueError as exc:  # constant or too short traces
            entry.update(rhat=math.nan, ess=math.nan, tau=math.nan,
                         warnings=[f"{name}: no diagnostics ({exc})"])
        singles = []
        for row in chains:
            try:
                singles.append(rank_normalized_split_rhat(row))
            except ValueError:
                singles.append(math.nan)
        entry["single_chain_rhat_max"] = float(max(singles)) if singles else math.nan
        out[name] = entry
    return out


def ensemble_summary(config: StudyConfig, records: dict[str, dict],
                     chosen: dict[str, Any]) -> dict[str, Any]:
    """Per arm with an ensemble, at its chosen setting: single vs ensemble on the test split
    (paired by seed: mean difference ensemble - single with a 95% t interval) and the mixing
    diagnostics of the traced observables over the seeds' chains."""
    from holonomic.study.runner import RunSpec

    out: dict[str, Any] = {}
    for arm in config.arms:
        sel = chosen[arm.name]
        if arm.ensemble is None or sel.index is None:
            continue
        runs = [records[RunSpec(arm.name, sel.index, sel.strength, s).key]["ensemble"]
                for s in config.seeds]
        ok = [(seed, r) for seed, r in zip(config.seeds, runs) if r["status"] == "ok"]
        entry: dict[str, Any] = {
            "strength": sel.strength,
            "settings": runs[0]["settings"],
            "sampler": runs[0]["sampler"],
            "seeds_ok": [seed for seed, _ in ok],
            "seeds_failed": {str(seed): r["message"] for seed, r in zip(config.seeds, runs)
                             if r["status"] != "ok"},
            "metrics": {},
            "mixing": {},
        }
        if len(ok) >= 2:
            for metric in ENSEMBLE_METRICS:
                single = np.array([r["single"]["test"][metric] for _, r in ok])
                ensemble = np.array([r["ensemble"]["test"][metric] for _, r in ok])
                comp = paired_comparison(ensemble, single)
                entry["metrics"][metric] = {"single_mean": float(single.mean()),
                                            "ensemble_mean": float(ensemble.mean()),
                                            "difference": comp.to_dict()}
            traces = {name: np.array([r["traces"][name] for _, r in ok]) for name in TRACED}
            entry["mixing"] = _diagnostics(traces)
        out[arm.name] = entry
    return out


def _num(x: float, digits: int = 4) -> str:
    return "n/a" if x is None or not math.isfinite(x) else f"{x:.{digits}f}"


_LOWER_BETTER = {"nll": True, "ece": True, "accuracy": False, "entropy": None}


def _reading(metric: str, comp: dict) -> str:
    if comp["includes_zero"]:
        return "cannot tell apart (interval includes 0)"
    higher = comp["mean_difference"] > 0
    better = _LOWER_BETTER[metric]
    if better is None:
        return f"ensemble {'higher' if higher else 'lower'} (neither is better by itself)"
    good = higher != better
    return f"ensemble {'higher' if higher else 'lower'} ({'better' if good else 'worse'})"


def ensemble_lines(summary: dict[str, Any]) -> list[str]:
    """The report's ensemble section (empty when no arm has an ensemble)."""
    if not summary:
        return []
    lines = ["", "## Ensemble phase (sampling after training)", "",
             "For the arms below every run continued after training as a sampler from its "
             "trained weights, at temperature T on the tempered posterior of N x mean "
             "training cross-entropy (+ N x the arm's weight decay as a Gaussian prior; the "
             "constraint set itself for constraint arms), N = training-set size, mini-batches "
             "as in training. The ensemble averages the predictive probabilities of the "
             "samples; the single network is the trained network the sampler started from. "
             "Test split, chosen setting, mean over seeds; difference = ensemble - single, "
             "paired by seed, with a 95% t interval (scipy.stats.t)."]
    for name, entry in summary.items():
        s = entry["settings"]
        lines += ["", f"### {name} (strength {entry['strength']:g})", "",
                  f"- Sampler `{entry['sampler']}`, T = {s['temperature']:g}, {s['samples']} "
                  f"samples every {s['every']} steps after a burn-in of {s['burn_in']} steps; "
                  f"step {s['step']:.4g}, friction {s['friction']:.4g} (units of the force "
                  "N x gradient).",
                  f"- Seeds with a finished sampling phase: {len(entry['seeds_ok'])}"
                  f"/{len(entry['seeds_ok']) + len(entry['seeds_failed'])}."]
        for seed, message in entry["seeds_failed"].items():
            lines.append(f"- Seed {seed}: {message}")
        if not entry["metrics"]:
            lines.append("- Fewer than 2 seeds finished: no comparison.")
            continue
        lines += ["", "| metric | single | ensemble | ensemble - single [95% CI] | reading |",
                  "|---|---|---|---|---|"]
        for metric, m in entry["metrics"].items():
            d = m["difference"]
            lines.append(f"| {metric} | {_num(m['single_mean'])} | {_num(m['ensemble_mean'])} "
                         f"| {_num(d['mean_difference'])} [{_num(d['ci_low'])}, "
                         f"{_num(d['ci_high'])}] | {_reading(metric, d)} |")
        lines += ["", "Mixing of traced observables (one chain per seed):", "",
                  "| observable | R-hat over seeds | max single-chain split R-hat | bulk ESS "
                  "(all chains) | autocorrelation time (samples) |", "|---|---|---|---|---|"]
        warned = []
        for obs, mix in entry["mixing"].items():
            lines.append(f"| {obs} | {_num(mix['rhat'], 3)} | "
                         f"{_num(mix['single_chain_rhat_max'], 3)} | {_num(mix['ess'], 1)} | "
                         f"{_num(mix['tau'], 2)} |")
            warned += mix["warnings"]
        if warned:
            lines += [""] + [f"- Warning: {w}" for w in warned]
    lines += ["", "What the ensemble numbers do and do not show:", "",
              "- The samples come from an approximate posterior: finite step size, mini-batch "
              "gradient noise (the adaptive sampler corrects its average effect on the kinetic "
              "temperature only; plain Langevin runs hotter than T), short chains started at "
              "the trained weights.",
              "- The temperature is a choice: T = 1 is the Bayesian posterior of this model and "
              "prior, T < 1 a cold posterior; other temperatures give other ensembles.",
              "- Chains may not have mixed: R-hat above 1.01 or a small ESS means the ensemble "
              "averages around each seed's starting mode, not over the posterior. R-hat over "
              "seeds also compares chains on different data splits (different posteriors), so "
              "it can exceed 1.01 even for chains that mixed; the single-chain split R-hat "
              "compares the halves of each chain. The sampling phase is not audited; its end "
              "constraint residual is in each run record.",
              "- For the unconstrained parameters of the arms without weight decay (biases, "
              "output layer, and every layer of `none`) the prior is flat, so T = 1 does not "
              "define a proper posterior for them; the sampler's draws are still well "
              "defined. Max-norm clipping after each step is not a sampler of a known law.",
              "- One data set and one model; the ensemble's gain (or loss) may change with "
              "the temperature, the chain length and the data. Ensemble and single network are "
              "compared at the setting chosen for the single network."]
    return lines
