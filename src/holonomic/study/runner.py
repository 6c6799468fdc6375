"""Running a study: one training run per (arm, setting, seed), resumable and parallel.

Every run trains with ``holonomic.Langevin`` under the same budget (epochs, batch size,
step/friction/temperature, schedule), so every arm gets the same number of gradient
evaluations: ``epochs * ceil(n_train / batch_size)`` per fold, times the number of folds
with k-fold data (``grad_evals`` in the record is that total). The seed fixes the data
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
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator, Protocol, Sequence

import numpy as np
import torch
from torch import nn
from torch.nn import functional as F

import holonomic as hn
from holonomic.study import storage
from holonomic.study.arms import ArmSetup, constraint_residual, prepare_arm, weight_norms
from holonomic.study.config import StudyConfig, StudyConfigError, selection_metric
from holonomic.study.data import Dataset, Split, load_dataset, make_splits
from holonomic.study.models import build_model
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
    "plan_runs",
    "record_metric_names",
    "study_task",
    "train_run",
]

_DTYPES = {"float32": torch.float32, "float64": torch.float64}
#: Weight metrics every run record holds besides the task's metrics (and
#: ``constraint_residual``).
WEIGHT_METRICS = ("weight_norm_hidden", "mean_row_norm_hidden", "weight_norm_output")
#: Fold ``j`` of a seed draws its integrator noise from ``seed + j * _FOLD_SEED_OFFSET``
#: (fold 0, and hold-out runs, from the seed itself).
_FOLD_SEED_OFFSET = 100_003
#: Randomness a model draws from the global torch RNG in its forward pass (``nn.Dropout``,
#: ...) during training is seeded with ``seed + _FOLD_SEED_OFFSET * fold +
#: _MODEL_RNG_OFFSET`` (:func:`model_rng`), which differs from the initial-weights seed.
_MODEL_RNG_OFFSET = 7_919_007
#: ... and during an ensemble phase's sampling with this offset instead.
_SAMPLING_RNG_OFFSET = 15_485_863


@contextmanager
def model_rng(seed: int, fold: int = 0, offset: int = _MODEL_RNG_OFFSET) -> Iterator[None]:
    """Seed the global torch RNG (CPU) for the duration, inside
    :func:`torch.random.fork_rng`, so the caller's global RNG state is restored afterwards.

    Dropout masks and any other randomness a model's forward draws from the global RNG
    are then fixed by (seed, fold): a run is reproducible, and every arm at the same seed
    draws the same masks (runs stay paired across arms).
    """
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(int(seed) + _FOLD_SEED_OFFSET * int(fold) + int(offset))
        yield


@dataclass(frozen=True)
class RunSpec:
    """One training run: an arm, a grid point of that arm, and a seed."""

    arm: str
    index: int
    strength: float
    seed: int

    @property
    def key(self) -> str:
        """File-name key, unique per (arm, strength, seed), e.g. ``fixed_norm-0.5-s3``.

        It names the strength rather than its grid position, so a study whose grid grows
        reuses the runs it already has and never mistakes one strength for another.
        """
        return storage.run_key(self.arm, self.strength, self.seed)


def plan_runs(config: StudyConfig) -> list[RunSpec]:
    """All runs of a study in a fixed order (arm, grid point, seed)."""
    return [RunSpec(arm.name, i, strength, seed)
            for arm in config.arms
            for i, strength in enumerate(arm.grid)
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


def default_step_hooks(config: StudyConfig, spec: RunSpec,
                       out_dir: str | Path | None = None,
                       fold: int | None = None) -> list[StepHook]:
    """Hooks attached to every run: an audit (:class:`~holonomic.study.audit_hook.RunAudit`)
    recording every ``config.audit_every`` steps and at the end, written to
    ``out_dir/audits/<run key>.jsonl`` (``<run key>.fold<j>.jsonl`` for fold ``j`` of
    k-fold data; in memory only when ``out_dir`` is None).

    This is the extension point for per-run diagnostics: return objects with ``name``,
    ``on_step(model, optimizer, step)``, ``summary() -> dict`` and optionally ``finish``.
    """
    from holonomic.study.audit_hook import RunAudit

    name = spec.key if fold is None else f"{spec.key}.fold{fold}"
    path = None if out_dir is None else storage.audit_path(out_dir, name)
    return [RunAudit(config.audit_every, path, relative_to=out_dir)]


def make_optimizer(params: Iterable[torch.nn.Parameter], config: StudyConfig,
                   weight_decay: float, seed: int) -> torch.optim.Optimizer:
    """``holonomic.Langevin`` with the study budget (either parametrisation)."""
    b = config.budget
    if b.parametrisation == "sgd":
        return hn.Langevin.from_sgd(params, lr=b.lr, momentum=b.momentum,
                                    temperature=b.temperature, weight_decay=weight_decay,
                                    seed=seed, projection=b.projection)
    return hn.Langevin(params, step=b.step, friction=b.friction, temperature=b.temperature,
                       projection=b.projection, seed=seed, weight_decay=weight_decay)


def epoch_order(n: int, seed: int, epoch: int) -> torch.Tensor:
    """Minibatch order of one epoch: a permutation fixed by (seed, epoch)."""
    generator = torch.Generator().manual_seed(1_000_003 * seed + epoch)
    return torch.randperm(n, generator=generator)


@contextmanager
def evaluation_mode(model: nn.Module) -> Iterator[nn.Module]:
    """Evaluate ``model``: eval mode (dropout off, batch-norm running statistics) under
    ``torch.no_grad()``; every submodule's previous training flag is restored afterwards."""
    modes = [(module, module.training) for module in model.modules()]
    model.eval()
    try:
        with torch.no_grad():
            yield model
    finally:
        for module, mode in modes:
            module.training = mode


def minibatch_step(model: nn.Module, optimizer: torch.optim.Optimizer, setup: ArmSetup,
                   x: torch.Tensor, y: torch.Tensor, idx: torch.Tensor, where: str,
                   loss: Callable[[torch.Tensor, torch.Tensor], torch.Tensor] | None = None,
                   ) -> None:
    """One step on the mini-batch ``idx``: ``zero_grad; mean loss; backward;
    optimizer.step(); arm after-step``. ``loss(outputs, targets)`` is the task's loss
    (``Task.loss``; cross-entropy when None). The model's mode is the caller's (train mode
    in training and sampling). Raises ``FloatingPointError`` naming ``where`` on a
    non-finite loss (``holonomic.IntegrationError`` passes through)."""
    loss_fn = F.cross_entropy if loss is None else loss
    optimizer.zero_grad(set_to_none=True)
    value = loss_fn(model(x[idx]), y[idx])
    if not torch.isfinite(value):
        raise FloatingPointError(f"non-finite loss at {where}")
    value.backward()
    optimizer.step()
    if setup.after_step is not None:
        setup.after_step()


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


def _planned_steps(config: StudyConfig, n_train: int) -> int:
    return config.budget.epochs * math.ceil(n_train / config.budget.batch_size)


def _train_fold(config: StudyConfig, spec: RunSpec, split: Split, fold: int,
                hooks: list[StepHook], where: str = "") -> _FoldRun:
    """Train one model on one split (the whole run for hold-out data); ``where`` prefixes
    failure messages (``"fold j "`` for k-fold data)."""
    dtype = _DTYPES[config.budget.dtype]
    task = split.task
    data = _tensors(split, dtype, task)
    targets = _targets(split)
    x_train, y_train = data["train"]
    n_train = len(y_train)
    model = build_model(config.model, x_train.shape[1], task.n_outputs, spec.seed, dtype)
    setup: ArmSetup = prepare_arm(spec.arm, spec.strength, model, config)
    optimizer = make_optimizer(model.parameters(), config, setup.weight_decay,
                               spec.seed + _FOLD_SEED_OFFSET * fold)
    total_steps = _planned_steps(config, n_train)
    scheduler = None
    if config.budget.schedule == "cosine":
        scheduler = torch.optim.lr_scheduler.CosineAnnealingLR(optimizer, T_max=total_steps)

    headline = task.headline
    history: dict[str, list] = {k: [] for k in (
        ["epoch"] + [f"{part}_{headline}" for part in PARTS]
        + [f"{part}_loss" for part in PARTS] + ["mean_row_norm_hidden", "constraint_residual"])}
    model.train()
    with model_rng(spec.seed, fold):
        status, message, step = _train_epochs(config, spec, model, optimizer, setup, scheduler,
                                              data, targets, task, hooks, history, where)
    for hook in hooks:
        if hasattr(hook, "finish"):
            hook.finish(model, optimizer, step)
    metrics = _final_metrics(model, data, setup, status, task, targets)
    return _FoldRun(fold, task, split, model, setup, data, status, message, step, n_train,
                    history, metrics, {hook.name: hook.summary() for hook in hooks})


def _train_epochs(config: StudyConfig, spec: RunSpec, model: nn.Module,
                  optimizer: torch.optim.Optimizer, setup: ArmSetup, scheduler, data: dict,
                  targets: dict, task: Task, hooks: list[StepHook], history: dict[str, list],
                  where: str) -> tuple[str, str, int]:
    """The epochs of :func:`_train_fold` (the caller seeds the global RNG); returns
    ``(status, message, steps done)``."""
    x_train, y_train = data["train"]
    n_train = len(y_train)
    batch = config.budget.batch_size
    headline = task.headline
    status, message, step = "ok", "", 0
    for epoch in range(config.budget.epochs):
        order = epoch_order(n_train, spec.seed, epoch)
        try:
            for start in range(0, n_train, batch):
                minibatch_step(model, optimizer, setup, x_train, y_train,
                               order[start:start + batch], f"{where}step {step}", task.loss)
                step += 1
                for hook in hooks:
                    hook.on_step(model, optimizer, step)
                if scheduler is not None:
                    scheduler.step()
        except hn.IntegrationError as exc:
            status, message = "failed", f"{where}IntegrationError at step {step}: {exc}"
        except FloatingPointError as exc:
            status, message = "diverged", f"{where}{exc}"
        if status != "ok":
            break
        scores = {part: _evaluate(model, data[part][0], targets[part], task) for part in PARTS}
        history["epoch"].append(epoch + 1)
        for part in PARTS:
            history[f"{part}_{headline}"].append(scores[part][headline])
            history[f"{part}_loss"].append(scores[part]["loss"])
        history["mean_row_norm_hidden"].append(weight_norms(model, setup)["mean_row_norm_hidden"])
        history["constraint_residual"].append(constraint_residual(model, setup))
    return status, message, step


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
    ensemble_config = config.arm(spec.arm).ensemble
    if k > 1 and hooks is not None:
        raise ValueError(f"train_run: the data have {k} folds and every fold gets its own "
                         "default hooks; pass hooks=None")
    if k > 1 and ensemble_config is not None:
        raise StudyConfigError(f"study config: 'arms.{spec.arm}.ensemble' cannot be combined "
                               f"with k-fold data ({k} folds); use a hold-out split")
    started = time.perf_counter()
    runs: list[_FoldRun] = []
    for j, split in enumerate(splits):
        fold_hooks = list(default_step_hooks(config, spec, out_dir, None if k == 1 else j)
                          if hooks is None else hooks)
        runs.append(_train_fold(config, spec, split, j, fold_hooks,
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
        from holonomic.study.ensemble import run_ensemble_phase, skipped_phase

        ensemble = (run_ensemble_phase(config, ensemble_config, first.model, first.setup,
                                       first.data, spec.seed, first_epoch=config.budget.epochs,
                                       task=task, targets=_targets(first.split))
                    if status == "ok" else skipped_phase(config, ensemble_config,
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
        "setting_index": spec.index,
        "strength": spec.strength,
        "seed": spec.seed,
        "status": status,
        "message": message,
        "fingerprint": config.training_fingerprint(),
        "task": task.name,
        "n_classes": task.n_classes,
        "classes": [str(c) for c in dataset.classes],
        "target_mean": float(task.target_mean),
        "target_std": float(task.target_std),
        "data_fingerprint": dataset.fingerprint,
        "feature_names": list(dataset.feature_names),
        "n_train": first.n_train,
        "grad_evals": sum(_planned_steps(config, len(s.y_train)) for s in splits),
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
