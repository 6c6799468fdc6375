"""Running a study: one training run per (arm, setting, seed), resumable and parallel.

Every run trains with ``holonomic.Langevin`` under the same budget (epochs, batch size,
step/friction/temperature, schedule), so every arm gets the same number of gradient
evaluations: ``epochs * ceil(n_train / batch_size)``. The seed fixes the data split, the
initial weights, the minibatch order and the integrator's noise, and the same seeds are
used by every arm, so comparisons between arms are paired.

Per-step hook point: :func:`default_step_hooks` returns the hooks called after every
optimizer step with the model and the optimizer (see :class:`StepHook`); each hook's
``summary()`` lands in the run record under ``"hooks"``. By default every run is audited
(:class:`holonomic.study.audit_hook.RunAudit`: ``DIR/audits/<run key>.jsonl``).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Protocol, Sequence

import numpy as np
import torch
from torch import nn
from torch.nn import functional as F

import holonomic as hn
from holonomic.study import storage
from holonomic.study.arms import ArmSetup, constraint_residual, prepare_arm, weight_norms
from holonomic.study.config import StudyConfig
from holonomic.study.data import Split, load_dataset, make_split
from holonomic.study.models import build_model
from holonomic.study.stats import expected_calibration_error

__all__ = [
    "RunSpec",
    "StepHook",
    "default_step_hooks",
    "epoch_order",
    "make_optimizer",
    "minibatch_step",
    "plan_runs",
    "train_run",
]

_DTYPES = {"float32": torch.float32, "float64": torch.float64}
ECE_BINS = 15


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
                       out_dir: str | Path | None = None) -> list[StepHook]:
    """Hooks attached to every run: an audit (:class:`~holonomic.study.audit_hook.RunAudit`)
    recording every ``config.audit_every`` steps and at the end, written to
    ``out_dir/audits/<run key>.jsonl`` (in memory only when ``out_dir`` is None).

    This is the extension point for per-run diagnostics: return objects with ``name``,
    ``on_step(model, optimizer, step)``, ``summary() -> dict`` and optionally ``finish``.
    """
    from holonomic.study.audit_hook import RunAudit

    path = None if out_dir is None else storage.audit_path(out_dir, spec.key)
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


def minibatch_step(model: nn.Module, optimizer: torch.optim.Optimizer, setup: ArmSetup,
                   x: torch.Tensor, y: torch.Tensor, idx: torch.Tensor, where: str) -> None:
    """One step on the mini-batch ``idx``: ``zero_grad; mean cross-entropy; backward;
    optimizer.step(); arm after-step``. Raises ``FloatingPointError`` naming ``where`` on a
    non-finite loss (``holonomic.IntegrationError`` passes through)."""
    optimizer.zero_grad(set_to_none=True)
    loss = F.cross_entropy(model(x[idx]), y[idx])
    if not torch.isfinite(loss):
        raise FloatingPointError(f"non-finite loss at {where}")
    loss.backward()
    optimizer.step()
    if setup.after_step is not None:
        setup.after_step()


def _evaluate(model: nn.Module, x: torch.Tensor, y: torch.Tensor) -> dict[str, Any]:
    with torch.no_grad():
        logits = model(x)
        loss = float(F.cross_entropy(logits, y))
        accuracy = float((logits.argmax(dim=1) == y).double().mean())
        probabilities = torch.softmax(logits.double(), dim=1).numpy()
    return {"loss": loss, "accuracy": accuracy, "probabilities": probabilities}


def _tensors(split: Split, dtype: torch.dtype) -> dict[str, tuple[torch.Tensor, torch.Tensor]]:
    def pair(x: np.ndarray, y: np.ndarray) -> tuple[torch.Tensor, torch.Tensor]:
        return torch.as_tensor(x, dtype=dtype), torch.as_tensor(y, dtype=torch.long)

    return {"train": pair(split.x_train, split.y_train), "val": pair(split.x_val, split.y_val),
            "test": pair(split.x_test, split.y_test)}


def train_run(config: StudyConfig, spec: RunSpec,
              hooks: Sequence[StepHook] | None = None,
              return_model: bool = False, out_dir: str | Path | None = None,
              ) -> dict[str, Any] | tuple[dict[str, Any], nn.Module]:
    """Train one run and return its record (metrics, per-epoch history, settings).

    Loop: for each epoch, for each minibatch of :func:`epoch_order`:
    ``zero_grad; loss = mean cross-entropy; backward; optimizer.step(); arm after-step;
    hooks``; after each epoch, accuracy / loss on train, validation and test, hidden weight
    norms and the constraint residual are logged. Test metrics are computed for every run
    but the study never uses them to choose settings.

    ``hooks`` default to :func:`default_step_hooks` (``out_dir`` places their files).

    If the arm has an ensemble phase (``[arms.NAME.ensemble]``), the trained network then
    continues as a sampler (:func:`holonomic.study.ensemble.run_ensemble_phase`); its
    results are under ``"ensemble"`` (None for arms without one) and the metrics under
    ``"metrics"`` stay those of the trained network. With ``return_model`` the model is
    returned as it is at the end (after sampling, when there is an ensemble phase).

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
    dtype = _DTYPES[config.budget.dtype]
    split = make_split(load_dataset(config), config.data, spec.seed)
    data = _tensors(split, dtype)
    x_train, y_train = data["train"]
    n_train = len(y_train)
    model = build_model(config.model, x_train.shape[1], split.n_classes, spec.seed, dtype)
    setup: ArmSetup = prepare_arm(spec.arm, spec.strength, model)
    optimizer = make_optimizer(model.parameters(), config, setup.weight_decay, spec.seed)
    batch = config.budget.batch_size
    steps_per_epoch = math.ceil(n_train / batch)
    total_steps = config.budget.epochs * steps_per_epoch
    scheduler = None
    if config.budget.schedule == "cosine":
        scheduler = torch.optim.lr_scheduler.CosineAnnealingLR(optimizer, T_max=total_steps)
    hooks = list(default_step_hooks(config, spec, out_dir) if hooks is None else hooks)

    history: dict[str, list[float]] = {k: [] for k in (
        "epoch", "train_accuracy", "val_accuracy", "test_accuracy", "train_loss", "val_loss",
        "test_loss", "mean_row_norm_hidden", "constraint_residual")}
    status, message, step = "ok", "", 0
    started = time.perf_counter()
    for epoch in range(config.budget.epochs):
        order = epoch_order(n_train, spec.seed, epoch)
        try:
            for start in range(0, n_train, batch):
                minibatch_step(model, optimizer, setup, x_train, y_train,
                               order[start:start + batch], f"step {step}")
                step += 1
                for hook in hooks:
                    hook.on_step(model, optimizer, step)
                if scheduler is not None:
                    scheduler.step()
        except hn.IntegrationError as exc:
            status, message = "failed", f"IntegrationError at step {step}: {exc}"
        except FloatingPointError as exc:
            status, message = "diverged", str(exc)
        if status != "ok":
            break
        evaluations = {part: _evaluate(model, *data[part]) for part in data}
        history["epoch"].append(epoch + 1)
        for part, ev in evaluations.items():
            history[f"{part}_accuracy"].append(ev["accuracy"])
            history[f"{part}_loss"].append(ev["loss"])
        history["mean_row_norm_hidden"].append(weight_norms(model)["mean_row_norm_hidden"])
        history["constraint_residual"].append(constraint_residual(model, setup))

    for hook in hooks:
        if hasattr(hook, "finish"):
            hook.finish(model, optimizer, step)
    metrics = _final_metrics(model, data, setup, status)
    training_wall_s = time.perf_counter() - started
    ensemble_config = config.arm(spec.arm).ensemble
    ensemble = None
    if ensemble_config is not None:
        from holonomic.study.ensemble import run_ensemble_phase, skipped_phase

        ensemble = (run_ensemble_phase(config, ensemble_config, model, setup, data, spec.seed,
                                       first_epoch=config.budget.epochs)
                    if status == "ok" else skipped_phase(config, ensemble_config, n_train,
                                                         f"training {status}"))
    record = {
        "key": spec.key,
        "arm": spec.arm,
        "setting_index": spec.index,
        "strength": spec.strength,
        "seed": spec.seed,
        "status": status,
        "message": message,
        "fingerprint": config.training_fingerprint(),
        "n_train": n_train,
        "grad_evals": total_steps,
        "steps_done": step,
        "layers": setup.layers,
        "metrics": metrics,
        "history": history,
        "hooks": {hook.name: hook.summary() for hook in hooks},
        "ensemble_settings": config.ensemble_settings(spec.arm),
        "ensemble": ensemble,
        "training_wall_s": training_wall_s,
        "wall_s": time.perf_counter() - started,
    }
    return (record, model) if return_model else record


_METRIC_NAMES = (
    "train_accuracy", "val_accuracy", "test_accuracy", "train_loss", "val_loss", "test_loss",
    "gap_accuracy", "gap_loss", "val_gap_accuracy", "val_gap_loss", "ece_val", "ece_test",
    "weight_norm_hidden", "mean_row_norm_hidden", "weight_norm_output", "constraint_residual",
)


def _final_metrics(model: nn.Module, data: dict, setup: ArmSetup, status: str) -> dict:
    if status != "ok":
        return {name: math.nan for name in _METRIC_NAMES}
    ev = {part: _evaluate(model, *data[part]) for part in data}
    out = {f"{part}_{k}": ev[part][k] for part in ev for k in ("accuracy", "loss")}
    out["gap_accuracy"] = out["train_accuracy"] - out["test_accuracy"]
    out["gap_loss"] = out["test_loss"] - out["train_loss"]
    out["val_gap_accuracy"] = out["train_accuracy"] - out["val_accuracy"]
    out["val_gap_loss"] = out["val_loss"] - out["train_loss"]
    for part in ("val", "test"):
        out[f"ece_{part}"] = expected_calibration_error(
            ev[part]["probabilities"], data[part][1].numpy(), ECE_BINS)
    out.update(weight_norms(model))
    out["constraint_residual"] = constraint_residual(model, setup)
    return {name: out[name] for name in _METRIC_NAMES}


# ---------------------------------------------------------------------------------------
# Running many runs: moved to holonomic.study.execution (these names still import from here)

_MOVED_TO_EXECUTION = ("run_all", "check_compatible", "_execute", "_worker_init", "_context")


def __getattr__(name: str):
    if name in _MOVED_TO_EXECUTION:
        from holonomic.study import execution

        return getattr(execution, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
