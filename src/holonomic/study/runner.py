"""Running a study: one training run per (arm, trial, seed), resumable and parallel.

Every run trains its arm's recipe: the model (with dropout when the regulariser asks), the
regulariser applied (:data:`holonomic.study.regularisers.REGULARISERS`), the optimiser
built from :data:`holonomic.study.optimisers.OPTIMISERS` with the trial's settings
(:func:`resolve_settings`: the budget's lr, momentum and temperature unless the arm fixes
or searches them) and param groups from ``[[arms.NAME.groups]]`` (:func:`param_groups`),
then the same loop for every optimiser (:func:`holonomic.study.loop.run_minibatches`) under
the same budget (epochs, batch size, schedule), so every arm gets the same number of
gradient evaluations: ``epochs * ceil(n_train / batch_size)`` per fold, times the number of
folds with k-fold data (``grad_evals`` in the record is that total; a successive-halving
rung run at ``budget_fraction = f`` trains ``round(f * epochs)`` epochs of the full-length
schedule). The seed fixes the data
split, the initial weights, the minibatch order and the integrator's noise, and the same
seeds are used by every arm, so comparisons between arms are paired.

The study's task (:class:`holonomic.study.tasks.Task`, carried by the data split) decides
the output width (``task.n_outputs``), the loss (``task.loss``) and the metrics
(``task.run_metrics``). Training steps run with the model in train mode; every evaluation
(per-epoch history, final metrics, the ensemble phase's predictions) runs in eval mode under
``torch.no_grad()`` (:func:`evaluation_mode`), so dropout is off and batch-norm layers use
their running statistics. Randomness a model draws from the global torch RNG while it
trains (dropout masks) is seeded by seed and fold (:func:`model_rng`, inside
``torch.random.fork_rng``: the caller's RNG is untouched), so runs are reproducible and
every arm at the same seed draws the same masks.

k-fold data (the data module's ``make_splits`` returns several folds): one model per fold,
all from the same initial weights (the seed), with integrator noise seeded by seed and
fold; the record's ``metrics`` are the means over folds, ``folds`` the per-fold metrics.

Trained weights: with an output directory, each run's final weights (before an ensemble
phase samples from them) are saved to ``runs/<key>.pt`` (``runs/<key>.fold<j>.pt`` per
fold) before the run record is written; :mod:`holonomic.study.trained` rebuilds the model
and predicts with it.

Per-step hook point: :func:`default_step_hooks` returns the hooks called after every
optimizer step with the model and the optimizer (see :class:`StepHook`); each hook's
``summary()`` lands in the run record under ``"hooks"``. By default every run is audited
(:class:`holonomic.study.audit_hook.RunAudit`: ``DIR/audits/<run key>.jsonl``).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping, Protocol, Sequence

import numpy as np
import torch
from torch import nn

import holonomic
from holonomic.study import storage
from holonomic.study.arms import constraint_residual, weight_norms
from holonomic.study.config import (ArmConfig, BudgetConfig, ModelConfig, StudyConfig,
                                    StudyConfigError, selection_metric)
from holonomic.study.data import Dataset, Split, load_dataset, make_splits
from holonomic.study.ensemble import run_ensemble_phase, skipped_phase
from holonomic.study.loop import (FOLD_SEED_OFFSET, epoch_order, evaluation_mode,
                                  minibatch_step, model_rng, run_minibatches)
from holonomic.study.models import build_model
from holonomic.study.optimisers import (OPTIMISERS, budget_defaults, check_thermostat,
                                        decoupled_decay, param_groups)
from holonomic.study.regularisers import REGULARISERS, ArmSetup
from holonomic.study.tasks import PARTS, Task

__all__ = [
    "RunSpec",
    "StepHook",
    "WEIGHT_METRICS",
    "check_selection",
    "default_step_hooks",
    "epoch_order",
    "evaluation_mode",
    "load_folds",
    "make_optimizer",
    "minibatch_step",
    "model_rng",
    "outputs_of",
    "param_groups",
    "plan_runs",
    "resolve_settings",
    "record_metric_names",
    "study_task",
    "train_run",
]

_DTYPES = {"float32": torch.float32, "float64": torch.float64}
#: Weight metrics every run record holds besides the task's metrics (and
#: ``constraint_residual``).
WEIGHT_METRICS = ("weight_norm_hidden", "mean_row_norm_hidden", "weight_norm_output")


@dataclass(frozen=True)
class RunSpec:
    """One training run: an arm, one of its trials, a seed, and the fraction of the epochs
    it trains for (1 for a full run, ``f < 1`` for a successive-halving rung run).

    ``settings`` are the trial's own settings (:attr:`holonomic.study.search.Trial.settings`;
    a number means ``{"strength": number}``, as runs were named before recipes).
    """

    arm: str
    trial: int
    settings: Mapping[str, float]
    seed: int
    budget_fraction: float = 1.0

    def __post_init__(self) -> None:
        if not isinstance(self.settings, Mapping):
            object.__setattr__(self, "settings", {"strength": float(self.settings)})

    @property
    def index(self) -> int:
        """The trial's index (the old name, kept)."""
        return self.trial

    @property
    def strength(self) -> float:
        """The regulariser's strength (0 where it has none)."""
        return float(self.settings.get("strength", 0.0))

    @property
    def key(self) -> str:
        """File-name key (:func:`holonomic.study.storage.run_key`), e.g.
        ``fixed_norm-0.5-s3`` or ``adamw-t2-1a2b3c4d-s3``."""
        return storage.run_key(self.arm, self.settings, self.seed, self.budget_fraction,
                               self.trial)

    def __hash__(self) -> int:
        return hash(self.key)


def plan_runs(config: StudyConfig, budget_fraction: float = 1.0) -> list[RunSpec]:
    """All runs of a study in a fixed order (arm, trial, seed), at ``budget_fraction``."""
    return [RunSpec(arm.name, trial.index, dict(trial.settings), seed, budget_fraction)
            for arm in config.arms
            for trial in arm.trials
            for seed in config.seeds]


class StepHook(Protocol):
    """Called after every optimizer step; ``summary()`` is stored in the run record.

    A hook may also define ``finish(model, optimizer, steps_done)``: called once when the
    run ends (finished, failed or diverged), before ``summary()``.
    """

    name: str

    def on_step(self, model: nn.Module, optimizer: torch.optim.Optimizer, step: int) -> None:
        ...

    def summary(self) -> dict[str, Any]:
        ...


def default_step_hooks(audit_every: int, spec: RunSpec,
                       out_dir: str | Path | None = None,
                       fold: int | None = None) -> list[StepHook]:
    """Hooks attached to every run: an audit (:class:`~holonomic.study.audit_hook.RunAudit`)
    recording every ``audit_every`` steps (``[audit] every``; a :class:`StudyConfig` is
    also accepted) and at the end, written to ``out_dir/audits/<run key>.jsonl``
    (``<run key>.fold<j>.jsonl`` for fold ``j`` of k-fold data; in memory only when
    ``out_dir`` is None).

    This is the extension point for per-run diagnostics: return objects with ``name``,
    ``on_step(model, optimizer, step)``, ``summary() -> dict`` and optionally ``finish``.
    """
    from holonomic.study.audit_hook import RunAudit

    if isinstance(audit_every, StudyConfig):
        audit_every = audit_every.audit_every
    name = spec.key if fold is None else f"{spec.key}.fold{fold}"
    path = None if out_dir is None else storage.audit_path(out_dir, name)
    return [RunAudit(audit_every, path, relative_to=out_dir)]


def resolve_settings(arm: ArmConfig, budget: BudgetConfig,
                     trial_settings: Mapping[str, float]) -> dict[str, float]:
    """The hyperparameters a trial actually uses: the budget's ``lr``, ``momentum`` and
    ``temperature`` (:func:`holonomic.study.optimisers.budget_defaults`) for those the
    optimiser has, overridden by the trial's settings, and ``strength`` when the
    regulariser has one."""
    opt = OPTIMISERS[arm.optimiser]
    reg = REGULARISERS[arm.regulariser]
    defaults = budget_defaults(budget)
    out = {name: float(trial_settings.get(name, defaults[name]))
           for name in opt.hyperparameters}
    if reg.has_strength:
        out["strength"] = float(trial_settings["strength"])
    return out


def make_optimizer(params: Iterable[Any], budget: BudgetConfig | StudyConfig,
                   weight_decay: float, seed: int, optimiser: str = "langevin",
                   settings: Mapping[str, float] | None = None,
                   arm: str = "NAME") -> torch.optim.Optimizer:
    """The arm's optimiser from :data:`holonomic.study.optimisers.OPTIMISERS`
    (``holonomic.Langevin`` with the budget's settings by default). ``weight_decay``: the
    L2 coefficient in the potential, or the decoupled decay for an optimiser that applies
    it itself (``adamw``); ``arm`` names the arm in error messages."""
    if isinstance(budget, StudyConfig):
        budget = budget.budget
    settings = budget_defaults(budget) if settings is None else settings
    spec = OPTIMISERS[optimiser]
    check_thermostat(params, settings, optimiser, arm)
    return spec.build(params, settings, seed, budget, weight_decay)


def outputs_of(model: nn.Module, x: torch.Tensor) -> np.ndarray:
    """The model's raw outputs on ``x`` in eval mode (float64 numpy; logits, or
    standardised predictions for regression)."""
    with evaluation_mode(model):
        return model(x).detach().to(torch.float64).numpy()


def _evaluate(model: nn.Module, x: torch.Tensor, y: np.ndarray, task: Task) -> dict[str, float]:
    """Every metric of ``task.metrics`` on one split, in eval mode (``y``: labels or targets
    in original units)."""
    return task.scores(outputs_of(model, x), y)


# ---------------------------------------------------------------------------------------
# Data: one or several folds of a seed


def load_folds(config: StudyConfig, seed: int) -> tuple[Dataset, list[Split]]:
    """The data set and the splits of ``seed``: several for k-fold data, one otherwise.

    Each split carries ``task``, ``feature_mean``, ``feature_std`` and ``fold`` (see
    :class:`holonomic.study.data.Split`).
    """
    dataset = load_dataset(config)
    return dataset, make_splits(dataset, config.data, seed)


def study_task(config: StudyConfig) -> Task:
    """The study's task as far as its data say before any split (no target statistics):
    for checking ``study.selection`` at the start of a study."""
    dataset = load_dataset(config)
    name = dataset.task
    return Task(name, dataset.n_classes if name == "classification" else 0)


def check_selection(config: StudyConfig) -> str:
    """The study's selection metric (:func:`holonomic.study.config.selection_metric`);
    raises ``StudyConfigError`` before anything is trained or written if the task has no
    such metric."""
    return selection_metric(config, study_task(config))


def _tensors(split: Split, dtype: torch.dtype, task: Task | None = None,
             ) -> dict[str, tuple[torch.Tensor, torch.Tensor]]:
    """Inputs and training targets per part: features in ``dtype``; labels (long) or
    standardised regression targets in ``dtype`` (``Task.target_tensor``)."""
    task = split.task if task is None else task

    def pair(x: np.ndarray, y: np.ndarray) -> tuple[torch.Tensor, torch.Tensor]:
        target = task.target_tensor(y)
        if task.is_regression:
            target = target.to(dtype)
        return torch.as_tensor(x, dtype=dtype), target

    return {"train": pair(split.x_train, split.y_train), "val": pair(split.x_val, split.y_val),
            "test": pair(split.x_test, split.y_test)}


def _targets(split: Split) -> dict[str, np.ndarray]:
    """Labels or targets in original units per part (what the metrics compare with)."""
    return {"train": np.asarray(split.y_train), "val": np.asarray(split.y_val),
            "test": np.asarray(split.y_test)}


def record_metric_names(task: Task) -> tuple[str, ...]:
    """Every name in a run record's ``metrics`` for ``task``: the task's metrics
    (``Task.record_metrics``), the weight norms and ``constraint_residual``."""
    return task.record_metrics() + WEIGHT_METRICS + ("constraint_residual",)


def _nan_metrics(task: Task) -> dict[str, float]:
    return {name: math.nan for name in record_metric_names(task)}


def _final_metrics(model: nn.Module, data: dict, setup: ArmSetup, status: str, task: Task,
                   targets: dict[str, np.ndarray]) -> dict[str, float]:
    """The record's ``metrics``: ``task.run_metrics`` of eval-mode outputs on every part
    (``targets``: labels or targets in original units), weight norms and the constraint
    residual (NaN everywhere unless ``status`` is ok)."""
    if status != "ok":
        return _nan_metrics(task)
    outputs = {part: outputs_of(model, data[part][0]) for part in PARTS}
    out = task.run_metrics(outputs, targets)
    out.update(weight_norms(model, setup))
    out["constraint_residual"] = constraint_residual(model, setup)
    return {name: float(out[name]) for name in record_metric_names(task)}


# ---------------------------------------------------------------------------------------
# Training


@dataclass
class _FoldRun:
    """What training one fold produced."""

    fold: int
    task: Task
    split: Split
    model: nn.Module
    setup: ArmSetup
    data: dict
    status: str
    message: str
    steps_done: int
    n_train: int
    history: dict[str, list]
    metrics: dict[str, float]
    hooks: dict[str, Any] = field(default_factory=dict)
    groups: list[dict[str, Any]] = field(default_factory=list)


def _planned_steps(budget: BudgetConfig, n_train: int) -> int:
    """Optimizer steps (= gradient evaluations) of a full run on ``n_train`` rows."""
    return budget.epochs * math.ceil(n_train / budget.batch_size)


def trained_epochs(epochs: int, budget_fraction: float) -> int:
    """Epochs a run at ``budget_fraction`` trains: ``round(fraction * epochs)``, at least 1."""
    return epochs if budget_fraction == 1.0 else max(1, round(budget_fraction * epochs))


@dataclass
class _Recipe:
    """What a run trains with: the arm, its resolved settings and the run's seed."""

    arm: ArmConfig
    settings: dict[str, float]
    seed: int
    budget_fraction: float = 1.0


def _build(model_config: ModelConfig, budget: BudgetConfig, recipe: _Recipe,
           in_features: int, n_outputs: int,
           fold: int, dtype: torch.dtype,
           ) -> tuple[nn.Module, ArmSetup, torch.optim.Optimizer, list[dict[str, Any]]]:
    """Model (dropout when the regulariser asks), regulariser applied, optimiser built."""
    arm = recipe.arm
    reg = REGULARISERS[arm.regulariser]
    opt = OPTIMISERS[arm.optimiser]
    strength = recipe.settings.get("strength", 0.0)
    model = build_model(model_config, in_features, n_outputs, recipe.seed, dtype,
                        **reg.model_options(strength))
    selection, key = arm.layer_selection(model_config)
    setup: ArmSetup = reg.apply(model, strength, selection, key)
    params, groups = param_groups(model, arm, recipe.settings)
    decay = setup.weight_decay
    if opt.native_decoupled_decay:
        decay = setup.decoupled_weight_decay
    optimizer = make_optimizer(params, budget, decay,
                               recipe.seed + FOLD_SEED_OFFSET * fold, arm.optimiser,
                               recipe.settings, arm.name)
    if setup.decoupled_weight_decay and not opt.native_decoupled_decay:
        clip, shrink = setup.after_step, decoupled_decay(optimizer,
                                                        setup.decoupled_weight_decay)
        setup.after_step = shrink if clip is None else (lambda: (shrink(), clip()))
    return model, setup, optimizer, groups


def _train_fold(model_config: ModelConfig, budget: BudgetConfig, recipe: _Recipe,
                split: Split, fold: int,
                hooks: list[StepHook], where: str = "") -> _FoldRun:
    """Train one model on one split (the whole run for hold-out data); ``where`` prefixes
    failure messages (``"fold j "`` for k-fold data)."""
    dtype = _DTYPES[budget.dtype]
    task = split.task
    data = _tensors(split, dtype, task)
    targets = _targets(split)
    x_train, y_train = data["train"]
    n_train = len(y_train)
    model, setup, optimizer, groups = _build(model_config, budget, recipe, x_train.shape[1],
                                             task.n_outputs, fold, dtype)
    total_steps = _planned_steps(budget, n_train)  # the full run's schedule, also for a rung
    scheduler = None
    if budget.schedule == "cosine":
        scheduler = torch.optim.lr_scheduler.CosineAnnealingLR(optimizer, T_max=total_steps)
    steps = trained_epochs(budget.epochs, recipe.budget_fraction) * math.ceil(
        n_train / budget.batch_size)

    headline = task.headline
    history: dict[str, list] = {k: [] for k in (
        ["epoch"] + [f"{part}_{headline}" for part in PARTS]
        + [f"{part}_loss" for part in PARTS] + ["mean_row_norm_hidden", "constraint_residual"])}

    def on_step(step: int) -> None:
        for hook in hooks:
            hook.on_step(model, optimizer, step)
        if scheduler is not None:
            scheduler.step()

    def on_epoch(epoch: int) -> None:
        scores = {part: _evaluate(model, data[part][0], targets[part], task) for part in PARTS}
        history["epoch"].append(epoch)
        for part in PARTS:
            history[f"{part}_{headline}"].append(scores[part][headline])
            history[f"{part}_loss"].append(scores[part]["loss"])
        history["mean_row_norm_hidden"].append(weight_norms(model, setup)["mean_row_norm_hidden"])
        history["constraint_residual"].append(constraint_residual(model, setup))

    model.train()
    with model_rng(recipe.seed, fold):
        status, message, step = run_minibatches(
            model, optimizer, setup, x_train, y_train, batch_size=budget.batch_size,
            seed=recipe.seed, steps=steps, loss=task.loss, on_step=on_step,
            on_epoch=on_epoch, where=where)
    for hook in hooks:
        if hasattr(hook, "finish"):
            hook.finish(model, optimizer, step)
    metrics = _final_metrics(model, data, setup, status, task, targets)
    return _FoldRun(fold, task, split, model, setup, data, status, message, step, n_train,
                    history, metrics, {hook.name: hook.summary() for hook in hooks}, groups)


def _mean_history(histories: list[dict[str, list]]) -> dict[str, list]:
    """Per-epoch means over folds (over the epochs every fold reached)."""
    n = min(len(h["epoch"]) for h in histories)
    out = {k: [float(np.mean([h[k][i] for h in histories])) for i in range(n)]
           for k in histories[0]}
    out["epoch"] = [int(e) for e in histories[0]["epoch"][:n]]
    return out


def train_run(config: StudyConfig, spec: RunSpec,
              hooks: Sequence[StepHook] | None = None,
              return_model: bool = False, out_dir: str | Path | None = None,
              ) -> dict[str, Any] | tuple[dict[str, Any], nn.Module]:
    """Train one run and return its record (metrics, per-epoch history, settings).

    Loop: for each epoch, for each minibatch of :func:`epoch_order` (model in train mode):
    ``zero_grad; loss = task.loss (mean cross-entropy, or half the mean squared error of
    standardised targets); backward; optimizer.step(); arm after-step; hooks``; after each
    epoch, the task's headline metric and loss on train, validation and test, the mean
    hidden row norm and the constraint residual are logged (eval mode). Test metrics are
    computed for every run but the study never uses them to choose settings.

    ``hooks`` default to :func:`default_step_hooks` (``out_dir`` places their files); with
    k-fold data every fold gets its own default hooks, so ``hooks`` must be None.

    With ``out_dir``, the final weights are saved to ``out_dir/runs/<key>.pt`` (k-fold:
    ``<key>.fold<j>.pt`` per fold) before the record is returned (the caller then writes
    the record, which commits the run); see :mod:`holonomic.study.trained`. Failed or
    diverged runs save none (``weights_file`` None).

    If the arm has an ensemble phase (``[arms.NAME.ensemble]``), the trained network then
    continues as a sampler (:func:`holonomic.study.ensemble.run_ensemble_phase`); its
    results are under ``"ensemble"`` (None for arms without one) and the metrics under
    ``"metrics"`` stay those of the trained network (whose weights are the ones saved).
    Ensembles are not combined with k-fold data (refused when the config is read). With
    ``return_model`` the model is returned as it is at the end (after sampling, when there
    is an ensemble phase; fold 0's model for k-fold data).

    Torch runs single-threaded inside (restored afterwards): the models are small, so
    threads only add overhead, and results do not depend on the thread count.

    A failed integration step (``holonomic.IntegrationError``) or a non-finite loss ends the
    run with ``status`` ``"failed"`` / ``"diverged"`` and NaN metrics; the study reports it.
    """
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        return _train_run(config, spec, hooks, return_model, out_dir)
    finally:
        torch.set_num_threads(threads)


def _train_run(config: StudyConfig, spec: RunSpec, hooks: Sequence[StepHook] | None,
               return_model: bool, out_dir: str | Path | None,
               ) -> dict[str, Any] | tuple[dict[str, Any], nn.Module]:
    from holonomic.study import trained

    dataset, splits = load_folds(config, spec.seed)
    task = splits[0].task
    selection_metric(config, task)  # an impossible selection fails before any training
    k = len(splits)
    arm = config.arm(spec.arm)
    ensemble_config = arm.ensemble if spec.budget_fraction == 1.0 else None  # not on rungs
    recipe = _Recipe(arm, resolve_settings(arm, config.budget, spec.settings), spec.seed,
                     spec.budget_fraction)
    if k > 1 and hooks is not None:
        raise ValueError(f"train_run: the data have {k} folds and every fold gets its own "
                         "default hooks; pass hooks=None")
    if k > 1 and ensemble_config is not None:
        raise StudyConfigError(f"study config: 'arms.{spec.arm}.ensemble' cannot be combined "
                               f"with k-fold data ({k} folds); use a hold-out split")
    started = time.perf_counter()
    runs: list[_FoldRun] = []
    for j, split in enumerate(splits):
        fold_hooks = list(default_step_hooks(config.audit_every, spec, out_dir,
                                             None if k == 1 else j)
                          if hooks is None else hooks)
        runs.append(_train_fold(config.model, config.budget, recipe, split, j, fold_hooks,
                                "" if k == 1 else f"fold {j} "))
        if runs[-1].status != "ok":
            break
    training_wall_s = time.perf_counter() - started
    bad = next((r for r in runs if r.status != "ok"), None)
    status, message = ("ok", "") if bad is None else (bad.status, bad.message)
    first = runs[0]

    weights_files: list[str] = []
    if out_dir is not None and status == "ok":
        for r in runs:  # saved before sampling: the trained weights
            weights_files.append(trained.save_run_weights(
                out_dir, spec, r.model, dataset, r.split, r.task, config,
                r.setup.layers, None if k == 1 else r.fold, k))

    ensemble = None
    if ensemble_config is not None:
        ensemble = (run_ensemble_phase(config.budget, ensemble_config, first.model,
                                       first.setup, first.data, spec.seed,
                                       first_epoch=config.budget.epochs, task=task,
                                       targets=_targets(first.split))
                    if status == "ok" else skipped_phase(config.budget, ensemble_config,
                                                         first.n_train, f"training {status}",
                                                         task=task))
    if k == 1:
        metrics, history = first.metrics, first.history
    else:
        metrics = (_nan_metrics(task) if status != "ok" else
                   {name: float(np.mean([r.metrics[name] for r in runs]))
                    for name in record_metric_names(task)})
        history = _mean_history([r.history for r in runs])
    record = {
        "key": spec.key,
        "arm": spec.arm,
        "trial": spec.trial,
        "setting_index": spec.trial,
        "strength": spec.strength,
        "settings": recipe.settings,
        "trial_settings": {name: float(v) for name, v in spec.settings.items()},
        "searched": list(arm.trials[spec.trial].searched) if spec.trial < len(arm.trials)
        else [],
        "recipe": {"regulariser": arm.regulariser, "optimiser": arm.optimiser,
                   "groups": first.groups},
        "recipe_fingerprint": arm.recipe_fingerprint(),
        "budget_fraction": float(spec.budget_fraction),
        "epochs": trained_epochs(config.budget.epochs, spec.budget_fraction),
        "seed": spec.seed,
        "status": status,
        "message": message,
        "fingerprint": config.training_fingerprint(),
        "holonomic_version": holonomic.__version__,
        "task": task.name,
        "n_classes": task.n_classes,
        "classes": [str(c) for c in dataset.classes],
        "target_mean": float(task.target_mean),
        "target_std": float(task.target_std),
        "data_fingerprint": dataset.fingerprint,
        "feature_names": list(dataset.feature_names),
        "n_train": first.n_train,
        "grad_evals": sum(trained_epochs(config.budget.epochs, spec.budget_fraction)
                          * math.ceil(len(s.y_train) / config.budget.batch_size)
                          for s in splits),
        "steps_done": sum(r.steps_done for r in runs),
        "layers": first.setup.layers,
        "metrics": metrics,
        "history": history,
        "hooks": first.hooks,
        "weights_file": weights_files[0] if weights_files else None,
        "weights_files": weights_files,
        "ensemble_settings": config.ensemble_settings(spec.arm),
        "ensemble": ensemble,
        "training_wall_s": training_wall_s,
        "wall_s": time.perf_counter() - started,
    }
    if k > 1:
        record["folds"] = [r.metrics for r in runs]
        record["fold_details"] = [
            {"fold": r.fold, "status": r.status, "message": r.message, "n_train": r.n_train,
             "steps_done": r.steps_done, "target_mean": float(r.task.target_mean),
             "target_std": float(r.task.target_std), "hooks": r.hooks,
             "weights_file": weights_files[i] if i < len(weights_files) else None}
            for i, r in enumerate(runs)]
    return (record, first.model) if return_model else record
