"""Invented run records with known numbers, for testing the report without training.

Every number here is made up by formula (no training, no data): a run's "quality"
``q = 0.7 + effect[arm] + 0.01 * grid index + noise(arm, seed)`` drives all its metrics,
so a test knows which setting selection must choose and what each comparison must say.
"""

from __future__ import annotations

import hashlib
import json
import math
from typing import Any

import numpy as np

from holonomic.study.runner import plan_runs
from holonomic.study.tasks import PARTS, Task

#: Offsets of each split from the run's quality, in "quality" units.
_PART_OFFSET = {"train": 0.10, "val": 0.0, "test": -0.01}


def _scores(task: Task, q: float) -> dict[str, float]:
    """Invented per-split scores for quality ``q`` (larger q is better on every metric)."""
    if task.is_regression:
        return {"rmse": 60.0 * (1.0 - q), "r2": q - 0.2, "mae": 45.0 * (1.0 - q),
                "loss": 0.5 * (1.0 - q)}
    out = {"accuracy": q, "balanced_accuracy": q - 0.02, "macro_f1": q - 0.03,
           "loss": 1.0 - q}
    if task.n_classes == 2:
        out["roc_auc"] = min(1.0, q + 0.1)
    return out


def fabricate(config, task: str = "classification", binary: bool = False,
              effects: dict[str, float] | None = None, noise: float = 0.005,
              seed: int = 0, epochs: int = 3, n_train: int | dict = 64,
              feature_names: tuple[str, ...] | None = None, residual: float = 1.19e-7,
              quality: Any = None, ensemble: dict[str, dict] | None = None,
              weights: bool = False) -> dict[str, dict]:
    """Records for every run of ``config`` (keyed as the study keys them).

    ``effects``: added to the quality of every run of an arm; ``noise``: sd of a per
    (arm, seed) normal perturbation from ``seed``; ``quality(arm, index, seed)`` overrides
    the formula; ``n_train``: one size, or a dict seed -> size; ``ensemble``: arm ->
    ``{"single": {metric: value}, "ensemble": {metric: value}}`` test metrics of an ensemble
    phase (values may be callables of the seed).
    """
    effects = effects or {}
    rng = np.random.default_rng(seed)
    jitter = {(arm.name, s): float(rng.normal(0.0, noise)) for arm in config.arms
              for s in config.seeds}
    t = Task(task, 0 if task == "regression" else (2 if binary else 3))
    records = {}
    for spec in plan_runs(config):
        q = (quality(spec.arm, spec.index, spec.seed) if quality is not None else
             0.7 + effects.get(spec.arm, 0.0) + 0.01 * spec.index + jitter[spec.arm, spec.seed])
        size = n_train[spec.seed] if isinstance(n_train, dict) else n_train
        record = _record(t, task, spec.key, spec.arm, spec.index, spec.strength, spec.seed, q,
                         epochs, size, residual, weights)
        if feature_names is not None:
            record["feature_names"] = list(feature_names)
        if ensemble and spec.arm in ensemble:
            record["ensemble"] = _phase(ensemble[spec.arm], spec.seed, epochs)
        records[spec.key] = record
    return records


def _record(t: Task, task: str, key: str, arm: str, index: int, strength: float, seed: int,
            q: float, epochs: int, size: int, residual: float, weights: bool,
            constrained: bool | None = None, clipped: bool | None = None) -> dict[str, Any]:
    """One invented run record (the fields every run record had before recipes) of
    quality ``q``; ``constrained`` / ``clipped`` (default: by the arm's name) decide the
    constraint residual."""
    per_part = {p: _scores(t, q + _PART_OFFSET[p]) for p in PARTS}
    metrics = {f"{p}_{m}": per_part[p][m] for p in PARTS for m in t.metrics}
    for m in t.metrics:
        metrics[f"gap_{m}"] = t.gap(m, per_part["train"][m], per_part["test"][m])
        metrics[f"val_gap_{m}"] = t.gap(m, per_part["train"][m], per_part["val"][m])
    if not t.is_regression:
        metrics["ece_val"], metrics["ece_test"] = 0.05, 0.06
    constrained = arm in ("fixed_norm", "orthonormal") if constrained is None else constrained
    clipped = arm == "max_norm" if clipped is None else clipped
    metrics.update(weight_norm_hidden=2.0, mean_row_norm_hidden=0.5,
                   weight_norm_output=1.0,
                   constraint_residual=(residual if constrained else
                                        0.0 if clipped else math.nan))
    history: dict[str, list[float]] = {"epoch": list(range(1, epochs + 1))}
    for p in PARTS:
        for m in (t.headline, "loss"):
            history[f"{p}_{m}"] = [per_part[p][m] * (0.8 + 0.2 * e / epochs)
                                   for e in range(1, epochs + 1)]
    history["mean_row_norm_hidden"] = [0.5] * epochs
    history["constraint_residual"] = [
        (residual if e % 2 else 0.0) if constrained else
        0.0 if clipped else math.nan for e in range(epochs)]
    return {
        "key": key, "arm": arm, "setting_index": index,
        "strength": strength, "seed": seed, "status": "ok", "message": "",
        "task": task, "n_classes": t.n_classes, "n_train": size, "grad_evals": 6,
        "steps_done": 6,
        "layers": ([] if arm == "none" else ["(all parameters)"]
                   if arm == "weight_decay" else ["0.weight", "2.weight"]),
        "metrics": metrics, "history": history, "hooks": {}, "ensemble": None,
        "data_fingerprint": "0123456789abcdef",
        "weights_file": f"runs/{key}.pt" if weights else None,
    }


def trial_key(arm: str, trial: int, settings: dict[str, float], seed: int,
              fraction: float = 1.0) -> str:
    """A run key of the form the contract of issue 14 gives for recipe arms (made up here:
    the report never parses keys)."""
    digest = hashlib.sha256(json.dumps(settings, sort_keys=True).encode()).hexdigest()[:8]
    return f"{arm}-t{trial}-{digest}-s{seed}" + ("" if fraction >= 1 else f"-h{fraction!r}")


def fabricate_trials(arms: dict[str, dict[str, Any]], seeds=(0, 1, 2),
                     task: str = "classification", quality: Any = None, epochs: int = 3,
                     grad_evals: int = 6, halving: dict[str, Any] | None = None,
                     n_train: int = 64, residual: float = 1.19e-7) -> dict[str, dict]:
    """Records with the issue-14 fields (``trial``, ``settings``, ``searched``, ``recipe``,
    ``budget_fraction``, ``epochs``, ``grad_evals``) for recipe arms, without a study file.

    ``arms``: name -> ``{"regulariser": str, "optimiser": str, "trials": [settings, ...],
    "groups": [...]}`` (``regulariser`` defaults to the name, ``optimiser`` to langevin);
    ``quality(arm, trial, settings, seed)``: the run's quality (default ``0.7 + 0.01 *
    trial``); ``halving``: ``{"fraction": f, "keep": {arm: [trials]}}``: every trial gets
    a rung run per seed at ``f`` (``round(f * epochs)`` epochs, ``f * grad_evals``
    gradient evaluations) and only the kept trials a full run (every trial when the arm is
    not listed).
    """
    t = Task(task, 0 if task == "regression" else 3)
    records = {}
    for arm, spec in arms.items():
        trials = [dict(s) for s in spec["trials"]]
        varying = sorted({k for s in trials for k in s
                          if len({float(x.get(k, math.nan)) for x in trials}) > 1})
        recipe = {"regulariser": spec.get("regulariser", arm),
                  "optimiser": spec.get("optimiser", "langevin"),
                  "groups": list(spec.get("groups", []))}
        levels = [1.0]
        if halving is not None:
            levels = [float(halving["fraction"]), 1.0]
        for fraction in levels:
            for i, settings in enumerate(trials):
                kept = (halving or {}).get("keep", {}).get(arm)
                if fraction >= 1 and kept is not None and i not in kept:
                    continue
                for seed in seeds:
                    q = (quality(arm, i, settings, seed) if quality is not None else
                         0.7 + 0.01 * i)
                    key = trial_key(arm, i, settings, seed, fraction)
                    ran = max(1, round(fraction * epochs))
                    record = _record(t, task, key, arm, i, settings.get("strength", 0.0), seed,
                                     q, ran, n_train, residual, False,
                                     recipe["regulariser"] in ("fixed_norm", "orthonormal"),
                                     recipe["regulariser"] == "max_norm")
                    record.update(trial=i, settings=settings, trial_settings=settings,
                                  searched=varying, recipe=recipe,
                                  budget_fraction=fraction, epochs=ran,
                                  grad_evals=int(round(fraction * grad_evals)),
                                  fingerprint="fabricated")
                    records[key] = record
    return records


def _phase(values: dict[str, dict], seed: int, samples: int) -> dict[str, Any]:
    def resolve(table):
        return {m: float(v(seed) if callable(v) else v) for m, v in table.items()}

    test = {who: resolve(values[who]) for who in ("single", "ensemble")}
    return {
        "settings": {"temperature": 1.0, "samples": 6, "every": 2, "burn_in": 3,
                     "sampler": "adaptive", "step": 0.01, "friction": 1.0},
        "sampler": "AdaptiveLangevin", "status": "ok", "message": "", "steps_done": 15,
        "samples": 6,
        "single": {"val": dict(test["single"]), "test": test["single"]},
        "ensemble": {"val": dict(test["ensemble"]), "test": test["ensemble"]},
        "traces": {"train_loss": [0.5 + 0.01 * ((seed + i) % 3) for i in range(6)],
                   "weight_norm_output": [1.0 + 0.02 * ((seed * i) % 5) for i in range(6)]},
        "constraint_residual": 0.0, "wall_s": 0.0,
    }
