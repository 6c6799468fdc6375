"""Study plots (PNG): selection metric and gap against strength, the selection metric
against temperature, learning curves, weights.

The figures read run records and each arm's :class:`~holonomic.study.selection.Selection`
(plain data: an arm's trials are found from the records, grouped by ``(arm, trial)``; only
full-budget runs are drawn). Every figure draws each arm in the same colour
(:func:`arm_colours`), epochs on integer ticks, spreads as the standard error over seeds,
and nothing at a zero on a log axis (a zero residual is left out, not drawn at an invented
floor).
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np

from holonomic.study.records import as_records
from holonomic.study.selection import TrialRuns, group_trials
from holonomic.study.storage import atomic_write_bytes_from

__all__ = ["ARM_COLOURS", "arm_colour", "arm_colours", "build_figures", "temperature_arms",
           "write_plots"]

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


def arm_colours(arms) -> dict[str, str]:
    """One colour per arm of ``arms``: :data:`ARM_COLOURS` for the arms named after a
    regulariser, spare colours in order for the others (distinct while they last)."""
    out = {a: ARM_COLOURS[a] for a in arms if a in ARM_COLOURS}
    spare = [c for c in _SPARE_COLOURS if c not in out.values()]
    for i, arm in enumerate(a for a in arms if a not in ARM_COLOURS):
        out[arm] = spare[i] if i < len(spare) else arm_colour(arm)
    return out


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


def _save(fig, path: Path) -> None:
    atomic_write_bytes_from(path, lambda tmp: fig.savefig(tmp, dpi=110, format="png"))


def _histories(runs, name: str):
    """History ``name`` of ``runs`` (seeds x epochs, cut to the shortest), or None."""
    rows = [r.history.get(name) for r in runs]
    if not rows or any(r is None for r in rows):
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


def _per_trial(trials: list[TrialRuns], metric: str) -> tuple[np.ndarray, np.ndarray]:
    """Mean and standard error over seeds of ``metric``, per trial."""
    means, errs = [], []
    for trial in trials:
        mean, se = _mean_se(trial.values(metric))
        means.append(float(mean))
        errs.append(float(se))
    return np.array(means), np.array(errs)


def _chosen_trial(trials: list[TrialRuns], sel) -> int | None:
    """Position of the chosen trial in ``trials`` (None: no choice)."""
    return next((i for i, t in enumerate(trials) if sel is not None and t.trial == sel.index),
                None)


def _log_x(ax, xs) -> None:
    """Log x axis whose labels do not overlap on a narrow panel (matplotlib labels minor
    ticks on short ranges): with two or more powers of ten in range only those are
    labelled, else also 3 times a power of ten (half a decade between labels)."""
    from matplotlib.ticker import LogLocator, NullFormatter

    ax.set_xscale("log")
    powers = math.floor(math.log10(xs.max())) - math.ceil(math.log10(xs.min())) + 1
    if powers >= 2:
        ax.xaxis.set_minor_formatter(NullFormatter())
    else:
        ax.xaxis.set_minor_locator(LogLocator(base=10, subs=(3.0,)))


def _scan_axis(ax, xs) -> None:
    """Log x axis when every value is > 0, symlog when 0 is among them (linear up to the
    smallest positive value); linear with one value only."""
    xs = np.asarray(xs, dtype=np.float64)
    positive = xs[xs > 0]
    if len(set(xs.tolist())) < 2:
        return
    if len(positive) == len(xs):
        _log_x(ax, xs)
    elif len(positive) and (xs >= 0).all():  # 0 and positive values
        ax.set_xscale("symlog", linthresh=float(positive.min()))


def _against(plt, panels, key: str, metric: str, ylabel: str, title: str, colours,
             reference=None, force_log: bool = False, reference_on=None):
    """One panel per ``(arm, trials, selection)``: ``metric`` mean ± se over seeds against
    setting ``key`` per trial (a line when only ``key`` varies, else points), the chosen
    trial ringed; ``reference``: a dashed line ``(label, value)``, on the panels of the arms
    in ``reference_on`` (None: every panel)."""
    fig, axes = plt.subplots(1, max(1, len(panels)), figsize=(3.6 * max(1, len(panels)), 3.2),
                             squeeze=False)
    for ax, (arm, trials, sel) in zip(axes[0], panels):
        colour = colours[arm]
        order = sorted(range(len(trials)), key=lambda i: float(trials[i].settings[key]))
        xs = np.array([float(trials[i].settings[key]) for i in order])
        means, errs = _per_trial([trials[i] for i in order], metric)
        others = {k for t in trials for k, v in t.settings.items()
                  if k != key and v != trials[0].settings.get(k)}
        ax.errorbar(xs, means, yerr=errs, marker="o", capsize=3, color=colour, label=arm,
                    linestyle="-" if not others else "none")
        pick = _chosen_trial([trials[i] for i in order], sel)
        if pick is not None:
            ax.plot([xs[pick]], [means[pick]], marker="o", markersize=13,
                    markerfacecolor="none", markeredgecolor=colour, markeredgewidth=1.5,
                    linestyle="none", label=f"chosen ({xs[pick]:g})")
        if (reference is not None and math.isfinite(reference[1])
                and (reference_on is None or arm in reference_on)):
            ax.axhline(reference[1], color=colours.get(reference[0], arm_colour(reference[0])),
                       linestyle="--", linewidth=1, label=reference[0])
        if force_log:
            _scan_axis(ax, xs)
        elif xs.min() > 0 and xs.max() / xs.min() > 20:
            _log_x(ax, xs)
        ax.set_title(arm, fontsize=9)
        ax.set_xlabel(key)
        ax.set_ylabel(ylabel, fontsize=8)
        ax.legend(fontsize=7)
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    return fig


def _strength_panels(trials, chosen):
    """``(panels, reference, reference_on)``. Panels: every arm whose recipe has a
    regulariser other than ``none`` and whose trials record a strength that varies between
    them (an arm tried at one strength has no curve to draw). Reference: the unregularised
    arm's trial (its only one, or its chosen one) as ``(name, trial)``; ``reference_on``:
    the panel arms with the unregularised arm's optimiser (a reference with another
    optimiser compares more than the regulariser; legacy runs all share one)."""
    panels, reference, optimiser = [], None, None
    for arm, sel in chosen.items():
        mine = list(trials.get(arm, {}).values())
        if not mine:
            continue
        if sel.recipe is not None and sel.recipe.regulariser == "none":
            if reference is None:
                pick = _chosen_trial(mine, sel)
                reference = (arm, mine[0] if len(mine) == 1 else
                             None if pick is None else mine[pick])
                optimiser = sel.recipe.optimiser
            continue
        strengths = {float(t.settings["strength"]) for t in mine if "strength" in t.settings}
        if all("strength" in t.settings for t in mine) and len(strengths) > 1:
            panels.append((arm, mine, sel))
    reference_on = {arm for arm, _, sel in panels
                    if sel.recipe is None or sel.recipe.optimiser == optimiser}
    return panels, reference, reference_on


def _against_strength(plt, trials, chosen, metric: str, ylabel: str, title: str, colours):
    """One panel per arm whose strength varies: ``metric`` mean ± se over seeds against
    strength, the chosen point ringed; the unregularised arm's mean as a dashed line on the
    panels of the arms with its optimiser. None when no arm varies its strength."""
    panels, reference, reference_on = _strength_panels(trials, chosen)
    if not panels:
        return None
    line = None
    if reference is not None and reference[1] is not None:
        line = (reference[0], float(_mean_se(reference[1].values(metric))[0]))
    return _against(plt, panels, "strength", metric, ylabel, title, colours, line,
                    reference_on=reference_on)


def temperature_arms(trials, chosen) -> list[tuple[str, list[TrialRuns], Any]]:
    """``(arm, full trials, selection)`` of every arm whose trials vary temperature."""
    out = []
    for arm, sel in chosen.items():
        mine = list(trials.get(arm, {}).values())
        values = {float(t.settings["temperature"]) for t in mine
                  if "temperature" in t.settings}
        if len(values) > 1 and all("temperature" in t.settings for t in mine):
            out.append((arm, mine, sel))
    return out


def _label(sel) -> str:
    """Legend label of an arm's chosen trial: its strength (an arm that searches at most
    the strength, as before recipes), else the trial's index."""
    if set(sel.searched) <= {"strength"}:
        return f"{sel.arm} ({sel.strength:g})"
    return f"{sel.arm} (trial {sel.index})"


def _epochs(chosen) -> int:
    """Epochs drawn: the longest history of the chosen runs (at least 1)."""
    return max([len(r.history.get("epoch") or next(iter(r.history.values()), []))
                for sel in chosen.values() for r in sel.runs] + [1])


def _learning_curves(plt, chosen: dict, headline: str, colours):
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.6), sharey=True)
    for arm, sel in chosen.items():
        if sel.index is None:
            continue
        for ax, part in zip(axes, ("train", "test")):
            values = _histories(sel.runs, f"{part}_{headline}")
            if values is None:
                continue
            epochs = np.arange(1, values.shape[1] + 1)
            mean, se = _mean_se(values)
            colour = colours[arm]
            ax.plot(epochs, mean, color=colour, label=_label(sel))
            ax.fill_between(epochs, mean - se, mean + se, color=colour, alpha=0.2,
                            linewidth=0, gid=arm)
    for ax, part in zip(axes, ("train", "test")):
        ax.set_xlabel("epoch")
        _integer_epochs(ax, _epochs(chosen))
        ax.set_title(f"{part} {headline} (chosen settings, mean ± se over seeds)", fontsize=9)
    axes[0].set_ylabel(headline)
    axes[1].legend(fontsize=7)
    fig.tight_layout()
    return fig


def _weights(plt, chosen: dict, colours):
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.6))
    all_zero = []
    for arm, sel in chosen.items():
        if sel.index is None:
            continue
        label = _label(sel)
        colour = colours[arm]
        norms = _histories(sel.runs, "mean_row_norm_hidden")
        if norms is not None:
            epochs = np.arange(1, norms.shape[1] + 1)
            mean, se = _mean_se(norms)
            axes[0].plot(epochs, mean, color=colour, label=label)
            axes[0].fill_between(epochs, mean - se, mean + se, color=colour, alpha=0.2,
                                 linewidth=0, gid=arm)
        residual = _histories(sel.runs, "constraint_residual")
        if residual is None or not np.isfinite(residual).all():
            continue  # the arm holds no constraint (NaN residual)
        worst = residual.max(axis=0)
        if not (worst > 0).any():
            all_zero.append(arm)
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
        _integer_epochs(ax, _epochs(chosen))
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=7)
    fig.tight_layout()
    return fig


def build_figures(config: Any, records: dict, chosen: dict,
                  metrics: Any = None) -> list[tuple[str, str, Any]]:
    """The study's figures as ``(file name, description, matplotlib Figure)``.

    ``records``: ``{key: dict or RunRecord}``; ``chosen``: arm -> Selection (report order);
    ``metrics``: :class:`holonomic.study.selection.StudyMetrics` (read from the records
    with ``config``'s selection metric when None; ``config`` is used for nothing else).
    The caller closes the figures.
    """
    if metrics is None:
        from holonomic.study.report import study_metrics

        metrics = study_metrics(config, records)
    typed = as_records(records)
    trials = group_trials(typed)
    colours = arm_colours(list(chosen) + [a for a in trials if a not in chosen])
    plt = _pyplot()
    headline, selection = metrics.headline, metrics.selection
    larger = metrics.higher_is_better(metrics.selection_base)
    better = f"{'larger' if larger else 'smaller'} is better"
    gap = f"val_gap_{headline}"
    out = [
        ("selection_vs_strength.png",
         f"mean validation metric used for the choice ({selection}, {better}) against "
         "strength per arm whose strength varies, ± standard error over seeds, chosen "
         "point ringed, the unregularised arm dashed on the panels of the arms with its "
         "optimiser",
         _against_strength(plt, trials, chosen, selection, f"{selection} (mean ± se)",
                           f"Selection metric ({selection}) against strength", colours)),
    ]
    if gap in metrics.names:
        out.append(("gap_vs_strength.png",
                    f"validation gap in {headline} (how much better the training split "
                    "scores) against strength per arm, mean ± standard error over seeds",
                    _against_strength(plt, trials, chosen, gap,
                                      f"gap in {headline}, train vs val (mean ± se)",
                                      "Generalisation gap on the validation split against "
                                      "strength", colours)))
    scan = temperature_arms(trials, chosen)
    if scan:
        out.append(("selection_vs_temperature.png",
                    f"temperature scan: mean validation metric used for the choice "
                    f"({selection}, {better}) against temperature per arm whose trials vary "
                    "it, ± standard error over seeds, chosen trial ringed (points, not a "
                    "line, when other settings vary too; a trend there mixes the effects "
                    "of every setting that varies)",
                    _against(plt, scan, "temperature", selection, f"{selection} (mean ± se)",
                             f"Selection metric ({selection}) against temperature", colours,
                             force_log=True)))
    out.append(("learning_curves.png",
                f"train and test {headline} per epoch of the chosen settings, mean ± "
                "standard error over seeds (shown after selection; not used for it)",
                _learning_curves(plt, chosen, headline, colours)))
    out.append(("weights.png",
                "mean row norm of the hidden weights and constraint residual per epoch "
                "of the chosen settings (zero residuals are not drawn on the log axis)",
                _weights(plt, chosen, colours)))
    return [entry for entry in out if entry[2] is not None]  # no arm varies its strength


def write_plots(config: Any, records: dict, chosen: dict, out_dir: Path,
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
