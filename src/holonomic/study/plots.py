"""Study plots (PNG): gap against strength, learning curves, weight norm and residual."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from holonomic.study.config import StudyConfig
from holonomic.study.runner import RunSpec
from holonomic.study.storage import atomic_write_bytes_from

__all__ = ["write_plots"]

_RESIDUAL_FLOOR = 1e-12


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


def _save(fig, path: Path) -> None:
    atomic_write_bytes_from(path, lambda tmp: fig.savefig(tmp, dpi=110, format="png"))


def _histories(config: StudyConfig, records: dict, arm: str, index: int, name: str):
    strength = config.arm(arm).grid[index]
    rows = [records[RunSpec(arm, index, strength, seed).key]["history"][name]
            for seed in config.seeds]
    length = min(len(r) for r in rows)
    if length == 0:
        return None
    return np.array([r[:length] for r in rows], dtype=np.float64)


def write_plots(config: StudyConfig, records: dict, chosen: dict, out_dir: Path) -> list[str]:
    """Write the three PNG plots into ``out_dir``; return their file names."""
    plt = _pyplot()
    written = []
    tuned = [a for a in config.arms if a.name != "none"]

    # 1. validation gap against strength, one panel per arm (different units per arm)
    fig, axes = plt.subplots(1, max(1, len(tuned)), figsize=(3.6 * max(1, len(tuned)), 3.2),
                             squeeze=False)
    for ax, arm in zip(axes[0], tuned):
        means, errs = [], []
        for i in range(len(arm.grid)):
            vals = np.array([records[RunSpec(arm.name, i, arm.grid[i], s).key]["metrics"]
                             ["val_gap_accuracy"] for s in config.seeds])
            means.append(np.mean(vals))
            errs.append(np.std(vals, ddof=1) / math.sqrt(len(vals)))
        ax.errorbar(arm.grid, means, yerr=errs, marker="o", capsize=3)
        sel = chosen[arm.name]
        if sel.index is not None:
            ax.axvline(sel.strength, color="grey", linestyle=":", label="chosen")
            ax.legend(fontsize=7)
        if min(arm.grid) > 0 and max(arm.grid) / min(arm.grid) > 20:
            ax.set_xscale("log")
        ax.set_title(arm.name, fontsize=9)
        ax.set_xlabel("strength")
        ax.set_ylabel("train acc - val acc (mean ± se)")
    fig.suptitle("Generalisation gap on the validation split against strength", fontsize=10)
    fig.tight_layout()
    _save(fig, out_dir / "gap_vs_strength.png")
    plt.close(fig)
    written.append("gap_vs_strength.png: validation gap (train - validation accuracy) against "
                   "strength per arm, mean ± standard error over seeds")

    # 2. learning curves of the chosen settings
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.6), sharey=True)
    for arm in config.arms:
        sel = chosen[arm.name]
        if sel.index is None:
            continue
        for ax, part in zip(axes, ("train_accuracy", "test_accuracy")):
            values = _histories(config, records, arm.name, sel.index, part)
            if values is None:
                continue
            epochs = np.arange(1, values.shape[1] + 1)
            ax.plot(epochs, values.mean(axis=0), label=f"{arm.name} ({sel.strength:g})")
    for ax, part in zip(axes, ("train accuracy", "test accuracy")):
        ax.set_xlabel("epoch")
        ax.set_title(f"{part} (chosen settings, mean over seeds)", fontsize=9)
    axes[0].set_ylabel("accuracy")
    axes[1].legend(fontsize=7)
    fig.tight_layout()
    _save(fig, out_dir / "learning_curves.png")
    plt.close(fig)
    written.append("learning_curves.png: train and test accuracy per epoch of the chosen "
                   "settings (shown after selection; not used for it)")

    # 3. weight norm and constraint residual over training
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.6))
    for arm in config.arms:
        sel = chosen[arm.name]
        if sel.index is None:
            continue
        label = f"{arm.name} ({sel.strength:g})"
        norms = _histories(config, records, arm.name, sel.index, "mean_row_norm_hidden")
        if norms is not None:
            axes[0].plot(np.arange(1, norms.shape[1] + 1), norms.mean(axis=0), label=label)
        residual = _histories(config, records, arm.name, sel.index, "constraint_residual")
        if residual is not None and np.isfinite(residual).all():
            worst = np.maximum(residual.max(axis=0), _RESIDUAL_FLOOR)
            axes[1].semilogy(np.arange(1, len(worst) + 1), worst, label=label)
    axes[0].set_title("mean row norm of hidden weights", fontsize=9)
    axes[1].set_title("constraint residual, max over seeds (values below 1e-12 drawn at "
                      "1e-12)", fontsize=9)
    axes[1].set_ylim(_RESIDUAL_FLOOR / 10, 1.0)
    for ax in axes:
        ax.set_xlabel("epoch")
        ax.legend(fontsize=7)
    fig.tight_layout()
    _save(fig, out_dir / "weights.png")
    plt.close(fig)
    written.append("weights.png: mean hidden row norm and constraint residual per epoch of "
                   "the chosen settings")
    return written
