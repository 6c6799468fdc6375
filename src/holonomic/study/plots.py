"""Study plots (PNG): selection metric and gap against strength, learning curves, weights.

Every figure draws each arm in the same colour (:data:`ARM_COLOURS`), epochs on integer
ticks, spreads as the standard error over seeds, and nothing at a zero on a log axis (a
zero residual is left out, not drawn at an invented floor).
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np

from holonomic.study.config import StudyConfig
from holonomic.study.runner import RunSpec
from holonomic.study.storage import atomic_write_bytes_from

__all__ = ["ARM_COLOURS", "arm_colour", "build_figures", "write_plots"]

#: One colour per arm, the same in every figure (matplotlib's tab10 colours; grey for the
#: unregularised arm).
ARM_COLOURS = {
    "none": "#7f7f7f",
    "weight_decay": "#1f77b4",
    "max_norm": "#ff7f0e",
    "fixed_norm": "#2ca02c",
    "orthonormal": "#d62728",
}
_SPARE_COLOURS = ("#9467bd", "#8c564b", "#e377c2", "#bcbd22", "#17becf")


def arm_colour(name: str) -> str:
    """The arm's colour in every figure (an unknown arm gets a spare colour by name)."""
    if name in ARM_COLOURS:
        return ARM_COLOURS[name]
    return _SPARE_COLOURS[sum(map(ord, name)) % len(_SPARE_COLOURS)]


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


def _save(fig, path: Path) -> None:
    atomic_write_bytes_from(path, lambda tmp: fig.savefig(tmp, dpi=110, format="png"))


def _histories(config: StudyConfig, records: dict, arm: str, index: int, name: str):
    settings = config.arm(arm).trials[index].settings
    rows = [records[RunSpec(arm, index, settings, seed).key]["history"].get(name)
            for seed in config.seeds]
    if any(r is None for r in rows):
        return None
    length = min(len(r) for r in rows)
    if length == 0:
        return None
    return np.array([r[:length] for r in rows], dtype=np.float64)


def _mean_se(values: np.ndarray, axis: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Mean and standard error (sample sd / sqrt(n)) over ``axis``."""
    n = values.shape[axis]
    mean = values.mean(axis=axis)
    se = values.std(axis=axis, ddof=1) / math.sqrt(n) if n > 1 else np.zeros_like(mean)
    return mean, se


def _integer_epochs(ax, epochs: int) -> None:
    """Epoch axis from 1 to ``epochs`` with integer ticks only (also for one epoch)."""
    from matplotlib.ticker import MaxNLocator

    ax.set_xlim(0.5, epochs + 0.5)
    ax.xaxis.set_major_locator(MaxNLocator(integer=True, min_n_ticks=1))


def _per_setting(config: StudyConfig, records: dict, arm, metric: str):
    means, errs = [], []
    for i in range(len(arm.grid)):
        vals = np.array([records[RunSpec(arm.name, i, arm.trials[i].settings, s).key]["metrics"]
                         .get(metric, math.nan) for s in config.seeds], dtype=np.float64)
        mean, se = _mean_se(vals)
        means.append(float(mean))
        errs.append(float(se))
    return np.array(means), np.array(errs)


def _against_strength(plt, config: StudyConfig, records: dict, chosen: dict, metric: str,
                      ylabel: str, title: str):
    """One panel per tuned arm: ``metric`` mean ± se over seeds against strength, the
    chosen point ringed; the unregularised arm's mean as a dashed line."""
    tuned = [a for a in config.arms if a.name != "none"]
    fig, axes = plt.subplots(1, max(1, len(tuned)), figsize=(3.6 * max(1, len(tuned)), 3.2),
                             squeeze=False)
    reference = None
    if any(a.name == "none" for a in config.arms):
        reference = _per_setting(config, records, config.arm("none"), metric)[0][0]
    for ax, arm in zip(axes[0], tuned):
        colour = arm_colour(arm.name)
        means, errs = _per_setting(config, records, arm, metric)
        ax.errorbar(arm.grid, means, yerr=errs, marker="o", capsize=3, color=colour,
                    label=arm.name)
        sel = chosen[arm.name]
        if sel.index is not None:
            ax.plot([sel.strength], [means[sel.index]], marker="o", markersize=13,
                    markerfacecolor="none", markeredgecolor=colour, markeredgewidth=1.5,
                    linestyle="none", label=f"chosen ({sel.strength:g})")
        if reference is not None and math.isfinite(reference):
            ax.axhline(reference, color=arm_colour("none"), linestyle="--", linewidth=1,
                       label="none")
        if min(arm.grid) > 0 and max(arm.grid) / min(arm.grid) > 20:
            ax.set_xscale("log")
        ax.set_title(arm.name, fontsize=9)
        ax.set_xlabel("strength")
        ax.set_ylabel(ylabel, fontsize=8)
        ax.legend(fontsize=7)
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    return fig


def _learning_curves(plt, config: StudyConfig, records: dict, chosen: dict, headline: str):
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.6), sharey=True)
    for arm in config.arms:
        sel = chosen[arm.name]
        if sel.index is None:
            continue
        for ax, part in zip(axes, ("train", "test")):
            values = _histories(config, records, arm.name, sel.index, f"{part}_{headline}")
            if values is None:
                continue
            epochs = np.arange(1, values.shape[1] + 1)
            mean, se = _mean_se(values)
            colour = arm_colour(arm.name)
            ax.plot(epochs, mean, color=colour, label=f"{arm.name} ({sel.strength:g})")
            ax.fill_between(epochs, mean - se, mean + se, color=colour, alpha=0.2,
                            linewidth=0, gid=arm.name)
    for ax, part in zip(axes, ("train", "test")):
        ax.set_xlabel("epoch")
        _integer_epochs(ax, config.budget.epochs)
        ax.set_title(f"{part} {headline} (chosen settings, mean ± se over seeds)", fontsize=9)
    axes[0].set_ylabel(headline)
    axes[1].legend(fontsize=7)
    fig.tight_layout()
    return fig


def _weights(plt, config: StudyConfig, records: dict, chosen: dict):
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.6))
    all_zero = []
    for arm in config.arms:
        sel = chosen[arm.name]
        if sel.index is None:
            continue
        label = f"{arm.name} ({sel.strength:g})"
        colour = arm_colour(arm.name)
        norms = _histories(config, records, arm.name, sel.index, "mean_row_norm_hidden")
        if norms is not None:
            epochs = np.arange(1, norms.shape[1] + 1)
            mean, se = _mean_se(norms)
            axes[0].plot(epochs, mean, color=colour, label=label)
            axes[0].fill_between(epochs, mean - se, mean + se, color=colour, alpha=0.2,
                                 linewidth=0, gid=arm.name)
        residual = _histories(config, records, arm.name, sel.index, "constraint_residual")
        if residual is None or not np.isfinite(residual).all():
            continue  # the arm holds no constraint (NaN residual)
        worst = residual.max(axis=0)
        if not (worst > 0).any():
            all_zero.append(arm.name)
            continue
        shown = np.where(worst > 0, worst, np.nan)  # a zero has no place on a log axis
        axes[1].semilogy(np.arange(1, len(worst) + 1), shown, color=colour, marker=".",
                         label=label)
    axes[0].set_title("mean row norm of hidden weights (mean ± se over seeds)",
                      fontsize=9)
    axes[1].set_title("constraint residual, max over seeds (zeros not drawn)", fontsize=9)
    if all_zero:
        axes[1].text(0.02, 0.02, "exactly 0 at every epoch: " + ", ".join(all_zero),
                     transform=axes[1].transAxes, fontsize=7)
    for ax in axes:
        ax.set_xlabel("epoch")
        _integer_epochs(ax, config.budget.epochs)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def build_figures(config: StudyConfig, records: dict, chosen: dict,
                  metrics: Any = None) -> list[tuple[str, str, Any]]:
    """The study's figures as ``(file name, description, matplotlib Figure)``.

    ``metrics``: :class:`holonomic.study.report.StudyMetrics` (read from the records when
    None). The caller closes the figures.
    """
    if metrics is None:
        from holonomic.study.report import study_metrics

        metrics = study_metrics(config, records)
    plt = _pyplot()
    headline, selection = metrics.headline, metrics.selection
    larger = metrics.higher_is_better(metrics.selection_base)
    gap = f"val_gap_{headline}"
    out = [
        ("selection_vs_strength.png",
         f"mean validation metric used for the choice ({selection}, "
         f"{'larger' if larger else 'smaller'} is better) against strength per arm, ± "
         "standard error over seeds, chosen point ringed, the unregularised arm dashed",
         _against_strength(plt, config, records, chosen, selection,
                           f"{selection} (mean ± se)",
                           f"Selection metric ({selection}) against strength")),
    ]
    if gap in metrics.names:
        out.append(("gap_vs_strength.png",
                    f"validation gap in {headline} (how much better the training split "
                    "scores) against strength per arm, mean ± standard error over seeds",
                    _against_strength(plt, config, records, chosen, gap,
                                      f"gap in {headline}, train vs val (mean ± se)",
                                      "Generalisation gap on the validation split against "
                                      "strength")))
    out.append(("learning_curves.png",
                f"train and test {headline} per epoch of the chosen settings, mean ± "
                "standard error over seeds (shown after selection; not used for it)",
                _learning_curves(plt, config, records, chosen, headline)))
    out.append(("weights.png",
                "mean row norm of the hidden weights and constraint residual per epoch "
                "of the chosen settings (zero residuals are not drawn on the log axis)",
                _weights(plt, config, records, chosen)))
    return out


def write_plots(config: StudyConfig, records: dict, chosen: dict, out_dir: Path,
                metrics: Any = None) -> list[str]:
    """Write the PNG plots into ``out_dir``; return ``"file: description"`` per plot."""
    plt = _pyplot()
    written = []
    for name, text, fig in build_figures(config, records, chosen, metrics):
        try:
            _save(fig, Path(out_dir) / name)
        finally:
            plt.close(fig)
        written.append(f"{name}: {text}")
    return written
