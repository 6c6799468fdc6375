"""Study outputs: selection by validation, results.csv, summary.json and report.md.

Protocol: each arm's setting is the grid point with the best mean validation metric over
seeds (``study.selection``, any ``val_<metric>`` of the task; larger or smaller is better as
:meth:`holonomic.study.tasks.Task.higher_is_better` says; ties go to the earlier grid point;
a setting with a failed run is not eligible). Test metrics are computed by every run and
stored in ``results.csv`` so that a resumed or merged study needs no recomputation, but
they are never used for the choice; the report quotes test metrics only for the chosen
settings. Every other arm is compared with the baseline arm (``study.baseline``) seed by
seed (``summary["comparisons"]``): mean difference with a 95% t interval, Wilcoxon p raw
and Holm-adjusted over the arms per metric, Cohen's d_z, the difference detectable with 80%
power and, with ``study.min_effect``, the seeds needed to detect that difference
(:mod:`holonomic.study.stats`).

Everything task-specific is read from the run records: the task (``record["task"]``;
records without one are classification, as every record made before regression existed),
and the metric names (the keys of ``record["metrics"]``). :func:`study_metrics` turns them
into the names the report compares and summarises.
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from scipy import stats as sps

from holonomic.study import storage
from holonomic.study.config import BASELINE_ARM, StudyConfig, StudyConfigError, selection_metric
from holonomic.study.data import describe_scheme, load_dataset
from holonomic.study.ensemble_report import (
    ensemble_lines,
    ensemble_metric_names,
    ensemble_summary,
)
from holonomic.study.runner import RunSpec, plan_runs
from holonomic.study.stats import (
    ALPHA, MAX_SEEDS, POWER, comparison_note, holm_adjust, paired_comparison, seeds_needed,
    wilcoxon_min_p)
from holonomic.study.tasks import PARTS, Task, metric_range, recorded_n_classes
from holonomic.study.tasks import split_metric_name as _split_name

__all__ = ["LEADING_COLUMNS", "Selection", "StudyMetrics", "build_summary", "csv_columns",
           "metric_range", "report_markdown", "results_table", "select_settings",
           "study_metrics", "write_outputs"]

#: First columns of ``results.csv``; the metric columns follow (:func:`csv_columns`).
LEADING_COLUMNS = ("arm", "setting_index", "strength", "seed", "chosen", "status", "n_train",
                   "grad_evals")
#: Short names for text ("test RMSE").
_SHORT = {"accuracy": "accuracy", "balanced_accuracy": "balanced accuracy",
          "macro_f1": "macro F1", "roc_auc": "ROC AUC", "loss": "loss", "rmse": "RMSE",
          "mae": "MAE", "r2": "R^2", "ece": "ECE"}
#: Feature names listed in the report before "and N more".
FEATURES_SHOWN = 20
#: Where the report sends a reader who wants to load a run's saved weights.
WEIGHTS_HELP = ("each loads with `torch.load(path, weights_only=True)`; how to rebuild the "
                "model and predict with it: see the `holonomic.study.trained` module "
                "docstring")


def _short(name: str) -> str:
    """``"test_rmse"`` -> ``"test RMSE"``, ``"gap_loss"`` -> ``"gap in loss"``."""
    prefix, base = _split_name(name)
    label = _SHORT.get(base, base)
    if prefix in ("gap_", "val_gap_"):
        return f"{'validation ' if prefix == 'val_gap_' else ''}gap in {label}"
    part = {"train_": "train ", "val_": "validation ", "test_": "test "}.get(prefix, "")
    return f"{part}{label}"


@dataclass(frozen=True)
class StudyMetrics:
    """What a study's records hold and what the report does with it.

    Attributes:
        task: the task rebuilt from the records (``n_classes`` from the record, or when
            it has none 2 if it holds ROC AUC and 3 standing for "more than two"
            otherwise; only the metric names and directions are used).
        metrics: per-split metric names found in the records, in the task's order; the
            first is the headline metric (accuracy, or RMSE for regression).
        selection: the selection metric, ``val_<metric>``.
        names: every name of the records' ``metrics``, in record order.
    """

    task: Task
    metrics: tuple[str, ...]
    selection: str
    names: tuple[str, ...]

    @property
    def headline(self) -> str:
        return self.metrics[0]

    @property
    def is_regression(self) -> bool:
        return self.task.is_regression

    @property
    def selection_base(self) -> str:
        return self.selection[len("val_"):]

    def higher_is_better(self, metric: str) -> bool:
        """Direction of a per-split metric name (without prefix)."""
        return Task.higher_is_better(metric)

    @property
    def compared(self) -> tuple[str, ...]:
        """Metrics compared across arms (paired by seed): the test headline metric, R^2
        for regression, the selection metric's test counterpart when it differs, the gap
        in the headline metric and the gap in loss."""
        names = [f"test_{self.headline}"]
        if self.is_regression and "r2" in self.metrics:
            names.append("test_r2")
        names.append(f"test_{self.selection_base}")
        names += [f"gap_{self.headline}", "gap_loss"]
        return tuple(n for i, n in enumerate(names) if n in self.names and n not in names[:i])

    @property
    def summarised(self) -> tuple[str, ...]:
        """Per-arm metrics summarised for the chosen settings (the report's test table)."""
        names = [f"train_{self.headline}"]
        names += [f"test_{m}" for m in self.metrics if m != "loss"]
        names += [f"gap_{self.headline}", "gap_loss", "ece_test", "mean_row_norm_hidden",
                  "constraint_residual"]
        return tuple(n for i, n in enumerate(names) if n in self.names and n not in names[:i])


def _first_record(config: StudyConfig, records: dict[str, dict]) -> dict:
    for spec in plan_runs(config):
        if spec.key in records:
            return records[spec.key]
    if records:
        return next(iter(records.values()))
    raise ValueError("no run records: nothing to report")


def study_metrics(config: StudyConfig, records: dict[str, dict]) -> StudyMetrics:
    """The task, metric names and selection metric of a study, read from its records.

    Raises:
        StudyConfigError: the selection metric is not a validation metric of the records.
    """
    first = _first_record(config, records)
    names = tuple(first["metrics"])
    name = first.get("task", "classification")
    n_classes = int(recorded_n_classes(name, first.get("n_classes") or None, names))
    task = Task(name, n_classes)
    metrics = tuple(m for m in task.metrics if f"test_{m}" in names)
    if not metrics:
        raise ValueError(f"run {first.get('key')!r} holds none of the {name} metrics "
                         f"{', '.join('test_' + m for m in task.metrics)}")
    selection = selection_metric(config, task)
    allowed = [f"val_{m}" for m in metrics]
    if selection not in allowed:
        raise StudyConfigError(
            f"study config: 'study.selection' = {selection!r} is not a validation metric of "
            f"this {name} study's runs; allowed: {', '.join(allowed)}")
    return StudyMetrics(task, metrics, selection, names)


@dataclass(frozen=True)
class Selection:
    """The chosen grid point of one arm and the validation means it was chosen from."""

    arm: str
    index: int | None
    strength: float | None
    validation_means: tuple[float, ...]


def _metric(record: dict, name: str) -> float:
    return float(record["metrics"][name])


def select_settings(config: StudyConfig, records: dict[str, dict],
                    metrics: StudyMetrics | None = None) -> dict[str, Selection]:
    """Choose each arm's setting by the mean validation metric over seeds (only)."""
    metrics = study_metrics(config, records) if metrics is None else metrics
    larger_better = metrics.higher_is_better(metrics.selection_base)
    chosen = {}
    for arm in config.arms:
        means = []
        for i in range(len(arm.grid)):
            values = [_metric(records[RunSpec(arm.name, i, arm.trials[i].settings, seed).key],
                              metrics.selection) for seed in config.seeds]
            means.append(float(np.mean(values)) if all(map(math.isfinite, values)) else math.nan)
        best = None
        for i, m in enumerate(means):
            if math.isnan(m):
                continue
            if best is None or (m > means[best] if larger_better else m < means[best]):
                best = i
        chosen[arm.name] = Selection(arm.name, best,
                                     None if best is None else arm.grid[best], tuple(means))
    return chosen


def _fmt(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, (list, tuple)):
        return ";".join(_fmt(v) for v in value)
    return str(value)


def _metric_columns(records: dict[str, dict], metrics: StudyMetrics) -> tuple[str, ...]:
    """Metric columns: per metric its train, val and test values (for accuracy and loss
    the order of the columns before regression existed), the gaps, the validation gaps,
    ECE, the weight norms and constraint residual, then any other name (sorted: stored
    records have sorted keys)."""
    seen: set[str] = set()
    for record in records.values():
        seen.update(record["metrics"])
    ordered = [f"{part}_{m}" for m in metrics.metrics for part in PARTS]
    ordered += [f"gap_{m}" for m in metrics.metrics] + [f"val_gap_{m}" for m in metrics.metrics]
    ordered += ["ece_val", "ece_test", "weight_norm_hidden", "mean_row_norm_hidden",
                "weight_norm_output", "constraint_residual"]
    ordered = [n for n in ordered if n in seen]
    return tuple(ordered + sorted(seen.difference(ordered)))


def csv_columns(config: StudyConfig, records: dict[str, dict],
                metrics: StudyMetrics | None = None) -> tuple[str, ...]:
    """Columns of ``results.csv``: :data:`LEADING_COLUMNS`, the metric names of the records
    and, when an arm has an ensemble phase, ``ensemble_status`` and
    ``{single,ensemble}_test_<metric>`` for the phase's metrics (empty for the runs of arms
    without one)."""
    metrics = study_metrics(config, records) if metrics is None else metrics
    columns = LEADING_COLUMNS + _metric_columns(records, metrics)
    if any(arm.ensemble is not None for arm in config.arms):
        columns += _ensemble_columns(records)
    return columns


def _ensemble_columns(records: dict[str, dict]) -> tuple[str, ...]:
    names = ensemble_metric_names(records)
    return ("ensemble_status",) + tuple(f"{who}_test_{m}" for who in ("single", "ensemble")
                                        for m in names)


def _ensemble_row(record: dict, columns: tuple[str, ...]) -> dict[str, Any]:
    phase = record.get("ensemble")
    if phase is None:
        return {c: "" for c in columns}
    row: dict[str, Any] = {"ensemble_status": phase["status"]}
    for who in ("single", "ensemble"):
        row.update({f"{who}_test_{m}": float(v) for m, v in phase[who]["test"].items()})
    return row


def results_table(config: StudyConfig, records: dict[str, dict],
                  chosen: dict[str, Selection], metrics: StudyMetrics | None = None) -> str:
    """``results.csv`` text: one row per arm, setting and seed, in plan order."""
    metrics = study_metrics(config, records) if metrics is None else metrics
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    columns = csv_columns(config, records, metrics)
    metric_columns = _metric_columns(records, metrics)
    ensemble_columns = columns[len(LEADING_COLUMNS) + len(metric_columns):]
    writer.writerow(columns)
    for spec in plan_runs(config):
        record = records[spec.key]
        row = {
            "arm": spec.arm, "setting_index": spec.index, "strength": float(spec.strength),
            "seed": spec.seed, "chosen": chosen[spec.arm].index == spec.index,
            "status": record["status"], "n_train": record["n_train"],
            "grad_evals": record["grad_evals"],
        }
        row.update({k: float(record["metrics"].get(k, math.nan)) for k in metric_columns})
        if ensemble_columns:
            row.update(_ensemble_row(record, ensemble_columns))
        writer.writerow([_fmt(row.get(c, "")) for c in columns])
    return buffer.getvalue()


def _mean_interval(values: np.ndarray, confidence: float = 0.95,
                   bounds: tuple[float, float] = (-math.inf, math.inf)) -> dict[str, Any]:
    """Mean over seeds with a t interval (scipy.stats.t) and the sample sd.

    The interval is clipped to ``bounds``, the values the metric can take (an accuracy
    interval stays in [0, 1]); ``clipped`` says whether clipping changed it. The true mean
    lies inside the bounds, so clipping never lowers the interval's coverage.
    """
    values = np.asarray(values, dtype=np.float64)
    n = len(values)
    mean = float(values.mean())
    sd = float(values.std(ddof=1)) if n > 1 else math.nan
    if not math.isfinite(mean):
        return {"mean": mean, "sd": sd, "ci_low": math.nan, "ci_high": math.nan,
                "clipped": False}
    if n > 1 and sd > 0:
        low, high = sps.t.interval(confidence, n - 1, loc=mean, scale=sd / math.sqrt(n))
    else:
        low = high = mean
    clipped_low, clipped_high = max(float(low), bounds[0]), min(float(high), bounds[1])
    return {"mean": mean, "sd": sd, "ci_low": clipped_low, "ci_high": clipped_high,
            "clipped": (clipped_low, clipped_high) != (float(low), float(high))}


def _chosen_values(config: StudyConfig, records: dict[str, dict], sel: Selection,
                   metric: str) -> np.ndarray:
    return np.array([_metric(records[RunSpec(sel.arm, sel.index,
                                             config.arm(sel.arm).trials[sel.index].settings,
                                             seed).key],
                             metric) for seed in config.seeds])


def audit_summary(config: StudyConfig, records: dict[str, dict]) -> dict[str, Any]:
    """Per arm, over all its runs: how many were audited, records, alarms by kind, and the
    largest constraint residual any audit saw (``None`` when the arm constrains nothing)."""
    out: dict[str, Any] = {}
    for arm in config.arms:
        mine = [r for r in records.values() if r["arm"] == arm.name]
        audits = [r.get("hooks", {}).get("audit") for r in mine]
        audited = [a for a in audits if a]
        kinds: dict[str, int] = {}
        for a in audited:
            for place, count in a["alarms"].items():
                kind = place.split(" ", 1)[0]
                kinds[kind] = kinds.get(kind, 0) + int(count)
        residuals = [float(a["residual_max"]) for a in audited if a["residual_max"] is not None]
        largest = None
        if residuals:
            largest = math.nan if any(map(math.isnan, residuals)) else max(residuals)
        out[arm.name] = {
            "runs": len(mine),
            "audited": len(audited),
            "every": sorted({int(a["every"]) for a in audited}),
            "records": sum(int(a["records"]) for a in audited),
            "runs_with_alarms": sum(1 for a in audited if a["alarm_count"]),
            "alarm_count": sum(int(a["alarm_count"]) for a in audited),
            "alarm_kinds": dict(sorted(kinds.items())),
            "residual_max": largest,
            "first_alarm": next((a["first_alarms"][0] for a in audited if a["first_alarms"]),
                                None),
        }
    return out


def _n_train_values(records: dict[str, dict]) -> list[int]:
    """Every training-set size the runs used: each record's ``n_train``, and with k-fold
    data each fold's (``fold_details``)."""
    sizes: set[int] = set()
    for record in records.values():
        sizes.add(int(record["n_train"]))
        sizes.update(int(fold["n_train"]) for fold in record.get("fold_details") or [])
    return sorted(sizes)


def _scheme(config: StudyConfig) -> str:
    """One sentence on how rows are split, with the part sizes of the first seed's splits
    (:func:`holonomic.study.data.describe_scheme`)."""
    return describe_scheme(config.data, load_dataset(config), config.seeds[0]).rstrip(".")


def _weights_count(record: dict) -> int:
    """Saved weight files of a run: ``weights_files`` (one per fold) or ``weights_file``."""
    files = record.get("weights_files")
    if files:
        return len(files)
    return 1 if record.get("weights_file") else 0


def _data_summary(config: StudyConfig, records: dict[str, dict]) -> dict[str, Any]:
    first = _first_record(config, records)
    features = next((list(r["feature_names"]) for r in records.values()
                     if r.get("feature_names")), None)
    fingerprints = sorted({str(r["data_fingerprint"]) for r in records.values()
                           if r.get("data_fingerprint")})
    return {
        "scheme": _scheme(config),
        "n_train": _n_train_values(records),
        "feature_names": features,
        "fingerprints": fingerprints,
        "folds": max((len(r.get("folds") or []) for r in records.values()), default=0),
        "weights_files": sum(_weights_count(r) for r in records.values()),
        "task": first.get("task", "classification"),
    }


def _verdict_entry(arm: str, metric: str, comp: dict[str, Any] | None,
                   metrics: StudyMetrics, reason: str = "",
                   baseline: str = BASELINE_ARM) -> dict[str, Any]:
    """One arm's verdict against the baseline on ``metric`` (a test metric). A metric other
    than the headline (the selection metric's test counterpart) names its direction."""
    label = _short(metric)
    _, base = _split_name(metric)
    if base != metrics.headline:
        label += (f" (selection metric; {'higher' if metrics.higher_is_better(base) else 'lower'}"
                  " is better)")
    if comp is None or not all(math.isfinite(comp[k]) for k in
                               ("mean_difference", "ci_low", "ci_high")):
        why = reason or "non-finite values"
        return {"arm": arm, "metric": metric, "reading": "no verdict",
                "line": f"{arm} vs {baseline}, {label}: no verdict ({why})"}
    _, base = _split_name(metric)
    note = comparison_note(comp)
    if note or comp["ci_low"] <= 0.0 <= comp["ci_high"]:
        reading = "cannot tell apart"
    else:
        arm_higher = comp["mean_difference"] > 0
        reading = "better" if arm_higher == metrics.higher_is_better(base) else "worse"
    digits = _digits(metric, comp)
    line = (f"{arm} vs {baseline}, {label}: {reading} "
            f"({comp['mean_difference']:+.{digits}f} [{comp['ci_low']:+.{digits}f}, "
            f"{comp['ci_high']:+.{digits}f}], {comp['n']} seeds"
            + (f"; {note}" if note else "") + ")")
    return {"arm": arm, "metric": metric, "reading": reading,
            "mean_difference": comp["mean_difference"], "ci_low": comp["ci_low"],
            "ci_high": comp["ci_high"], "n": comp["n"], "line": line}


def _digits(metric: str, comp: dict[str, Any]) -> int:
    """Decimals for a difference: 3 for metrics in [0, 1], else about 3 significant."""
    if metric_range(metric)[1] <= 1.0 and metric_range(metric)[0] >= -1.0:
        return 3
    scale = max(abs(comp["mean_difference"]), abs(comp["ci_low"]), abs(comp["ci_high"]))
    if not scale > 0:
        return 3
    return max(3, min(6, 2 - math.floor(math.log10(scale))))


def build_summary(config: StudyConfig, records: dict[str, dict],
                  chosen: dict[str, Selection],
                  metrics: StudyMetrics | None = None) -> dict[str, Any]:
    """Everything the report states, as plain data (written to summary.json)."""
    metrics = study_metrics(config, records) if metrics is None else metrics
    statuses = [r["status"] for r in records.values()]
    grad_evals = sorted({int(r["grad_evals"]) for r in records.values()})
    arms: dict[str, Any] = {}
    for arm in config.arms:
        sel = chosen[arm.name]
        entry: dict[str, Any] = {
            "grid": list(arm.grid),
            "meaning": arm.meaning,
            "validation_means": list(sel.validation_means),
            "chosen_index": sel.index,
            "chosen_strength": sel.strength,
            "layers": next((list(r.get("layers") or []) for r in records.values()
                            if r["arm"] == arm.name), []),
        }
        if sel.index is not None:
            entry["chosen"] = {m: _mean_interval(_chosen_values(config, records, sel, m),
                                                 bounds=metric_range(m))
                               for m in metrics.summarised}
            headline = f"test_{metrics.headline}"
            entry["chosen"][f"per_seed_{headline}"] = list(
                _chosen_values(config, records, sel, headline))
        arms[arm.name] = entry
    comparisons: dict[str, Any] = {}
    verdict: list[dict[str, Any]] = []
    baseline = config.baseline
    base = chosen[baseline]
    headline = f"test_{metrics.headline}"
    # the verdict: the headline metric, and the selection metric's test counterpart
    judged = [headline] + [m for m in (f"test_{metrics.selection_base}",)
                           if m != headline and m in metrics.compared]
    for arm in config.arms:
        sel = chosen[arm.name]
        if arm.name == baseline:
            continue
        if sel.index is None or base.index is None:
            who = arm.name if sel.index is None else baseline
            verdict += [_verdict_entry(arm.name, m, None, metrics, f"{who} has no valid setting",
                                       baseline) for m in judged]
            continue
        comparisons[arm.name] = {}
        for metric in metrics.compared:
            result = paired_comparison(_chosen_values(config, records, sel, metric),
                                       _chosen_values(config, records, base, metric))
            comparisons[arm.name][metric] = result.to_dict()
        verdict += [_verdict_entry(arm.name, m, comparisons[arm.name][m], metrics, "",
                                   baseline) for m in judged]
    _add_holm(comparisons)
    power_notes = _add_power(comparisons, headline, config.min_effect, baseline)
    larger = metrics.higher_is_better(metrics.selection_base)
    return {
        "study": config.to_dict(),
        "task": {
            "name": metrics.task.name,
            "metrics": list(metrics.metrics),
            "headline": metrics.headline,
            "selection": metrics.selection,
            "selection_larger_is_better": larger,
            "compared": list(metrics.compared),
        },
        "data": _data_summary(config, records),
        "protocol": {
            "selection": f"mean {metrics.selection} over seeds, per arm ("
                         f"{'larger' if larger else 'smaller'} wins; ties go to the earlier "
                         "grid point)",
            "selection_metric": metrics.selection,
            "test_metrics": "computed for every run and stored in results.csv; never used for "
                            "selection; reported only for the chosen settings",
            "paired_by": "seed (same split, initial weights, minibatch order and noise)",
            "confidence": 0.95,
            "intervals": "per-arm means: t interval clipped to the range the metric can take",
            "wilcoxon_min_p": wilcoxon_min_p(len(config.seeds)),
            "baseline": baseline,
            "holm": "p_holm: Holm's step-down adjustment of the Wilcoxon p-values over the "
                    "arms compared with the baseline, per metric (controls the family-wise "
                    "error rate over the arms, per metric)",
            "effect_size": "d_z: mean / sd of the paired differences (NaN with zero spread)",
            "power": f"detectable_difference: smallest true mean difference a two-sided "
                     f"paired t test at level {ALPHA:g} detects with power {POWER:g}, from the "
                     "observed sd of the differences and the number of seeds (rough: the sd "
                     "of a few seeds is itself uncertain)",
            "min_effect": config.min_effect,
            "max_seeds": MAX_SEEDS,
        },
        "runs": {"total": len(records), "ok": statuses.count("ok"),
                 "failed": statuses.count("failed"), "diverged": statuses.count("diverged")},
        "grad_evals_per_run": grad_evals,
        "arms": arms,
        "verdict": verdict,
        "baseline": baseline,
        "comparisons": comparisons,
        "power_notes": power_notes,
        "audit": audit_summary(config, records),
        "ensembles": ensemble_summary(config, records, chosen),
    }


def _add_holm(comparisons: dict[str, dict[str, dict[str, Any]]]) -> None:
    """Set ``p_holm`` of every comparison: Holm over the arms compared, per metric."""
    metrics = {m for comps in comparisons.values() for m in comps}
    for metric in metrics:
        arms = [a for a in comparisons if metric in comparisons[a]]
        adjusted = holm_adjust([comparisons[a][metric]["p_wilcoxon"] for a in arms])
        for arm, p in zip(arms, adjusted):
            comparisons[arm][metric]["p_holm"] = float(p)


def _add_power(comparisons: dict[str, dict[str, dict[str, Any]]], headline: str,
               min_effect: float | None, baseline: str) -> list[dict[str, Any]]:
    """Seeds needed for ``min_effect`` on the headline metric (``seeds_needed``, None: more
    than ``MAX_SEEDS`` or no spread), and a note per arm whose observed headline
    difference is smaller than the detectable one and whose interval includes 0 (an
    interval that excludes 0 found the difference, however small the study)."""
    notes = []
    for arm, comps in comparisons.items():
        comp = comps.get(headline)
        if comp is None:
            continue
        if min_effect is not None:
            comp["min_effect"] = min_effect
            comp["seeds_needed"] = seeds_needed(min_effect, comp["sd_difference"])
        detectable = comp["detectable_difference"]
        observed = comp["mean_difference"]
        if not (math.isfinite(detectable) and math.isfinite(observed)
                and abs(observed) < detectable and comp["includes_zero"]):
            continue
        digits = _digits(headline, comp)
        line = (f"{arm} vs {baseline}, {_short(headline)}: the study was too small to detect "
                f"a difference of this size ({observed:+.{digits}f}): it could detect about "
                f"{detectable:.{digits}f} with {comp['n']} seeds")
        if min_effect is not None:
            needed = comp["seeds_needed"]
            line += (f"; about {needed} seeds would be needed to detect {min_effect:g}"
                     if needed is not None else
                     f"; more than {MAX_SEEDS} seeds would be needed to detect {min_effect:g}")
        notes.append({"arm": arm, "metric": headline, "observed": observed,
                      "detectable": detectable, "n": comp["n"],
                      "seeds_needed": comp.get("seeds_needed"), "min_effect": min_effect,
                      "line": line + "."})
    return notes


# ---------------------------------------------------------------------------------------
# report.md

def _num(x: float | None, digits: int = 4) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "n/a"
    return f"{x:.{digits}f}"


def _sci(x: float | None) -> str:
    """Residuals and other small positive numbers: ``1.19e-07``, ``0.00e+00``."""
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "n/a"
    return f"{x:.2e}"


def _interval(entry: dict[str, float], digits: int = 4) -> str:
    return (f"{_num(entry['mean'], digits)} [{_num(entry['ci_low'], digits)}, "
            f"{_num(entry['ci_high'], digits)}]")


def _reading(arm: str, metric: str, comp: dict, metrics: StudyMetrics,
             baseline: str = BASELINE_ARM) -> str:
    if not math.isfinite(comp["mean_difference"]) or not math.isfinite(comp["ci_low"]):
        return "no reading (non-finite values)"
    note = comparison_note(comp)
    if note:
        return f"the data cannot tell them apart ({note})"
    if comp["includes_zero"]:
        return "the data cannot tell them apart (the interval includes 0)"
    prefix, base = _split_name(metric)
    higher = comp["mean_difference"] > 0
    if prefix in ("gap_", "val_gap_"):
        return (f"{arm} has a {'larger' if higher else 'smaller'} gap than {baseline} "
                "(the interval excludes 0)")
    try:
        good = higher == metrics.higher_is_better(base)
    except KeyError:
        return f"{arm} {'higher' if higher else 'lower'} than {baseline}"
    return (f"{arm} {'better' if good else 'worse'} than {baseline} "
            f"({'higher' if higher else 'lower'}; the interval excludes 0)")


def _count(values: list[int]) -> str:
    if not values:
        return "unknown"
    if len(values) == 1:
        return str(values[0])
    return f"{values[0]} to {values[-1]} (they differ between seeds or folds)"


def _feature_text(features: list[str] | None) -> str:
    if not features:
        return "not recorded by these runs"
    shown = ", ".join(f"`{f}`" for f in features[:FEATURES_SHOWN])
    more = len(features) - FEATURES_SHOWN
    return (f"{len(features)} used: {shown}" + (f" and {more} more (all in each run "
                                                "record's `feature_names`)" if more > 0 else ""))


def _verdict_lines(summary: dict[str, Any]) -> list[str]:
    task = summary["task"]
    baseline = summary.get("baseline", BASELINE_ARM)
    if not summary["verdict"]:
        return [f"**Verdict**: no arm to compare with {baseline}.", ""]
    lines = [f"**Verdict** (test {_SHORT.get(task['headline'], task['headline'])} of the "
             f"chosen settings, arm minus {baseline} paired by seed: mean difference "
             f"[95% t interval]; {'higher' if Task.higher_is_better(task['headline']) else 'lower'}"
             " is better):", ""]
    lines += [f"- {v['line']}" for v in summary["verdict"]]
    return lines + [""]


def _setup_lines(config: StudyConfig, summary: dict[str, Any], description: str,
                 metrics: StudyMetrics) -> list[str]:
    b = config.budget
    h, gamma = b.step_friction()
    data = summary["data"]
    loss = ("half the mean squared error of the standardised targets" if metrics.is_regression
            else "the mean cross-entropy")
    lines = ["## Set-up", "",
             f"- Data: {description}."]
    if data["fingerprints"]:
        lines.append(f"- Data fingerprint (content hash recorded by every run): "
                     f"{', '.join(f'`{f}`' for f in data['fingerprints'])}.")
    described = [f"loss ({loss})" if m == "loss" else Task.describe(m) for m in metrics.metrics]
    lines += [f"- Task: {metrics.task.name}; metrics per split: {', '.join(described)}"
              + ("; ECE on validation and test" if "ece_test" in metrics.names else "") + ".",
              f"- Split: {data['scheme']}. "
              + ("Features standardised with training statistics." if config.data.standardize
                 else "Features not standardised."),
              f"- Training rows per run: {_count(data['n_train'])}.",
              f"- Feature columns: {_feature_text(data['feature_names'])}."]
    if data["folds"]:
        lines.append(f"- Folds: {data['folds']} per seed; each run's metrics are the means "
                     "over its folds (per-fold metrics in each run record's `folds`).")
    lines += ["- Model: " + (f"factory `{config.model.factory}`" if config.model.factory else
                              f"MLP, hidden widths {list(config.model.widths)}, "
                              f"{config.model.activation}") + ".",
              f"- Training (same for every arm): `holonomic.Langevin`, {b.epochs} epochs, batch "
              f"{b.batch_size}, step h = {h:.6g}, friction gamma = {gamma:.6g} (SGD view: lr = "
              f"{h * h * (1 + math.exp(-gamma * h)) / 2:.6g}, momentum = "
              f"{math.exp(-gamma * h):.6g}), temperature {b.temperature:g} (units of the mean "
              f"training loss, {loss}), schedule {b.schedule}, projection {b.projection}, "
              f"{b.dtype}.",
              f"- Gradient evaluations per run: {summary['grad_evals_per_run']} "
              "(identical across arms).",
              f"- Seeds: {list(config.seeds)}; {_seed_text(config)}, shared by every arm "
              "(paired design).",
              f"- Runs: {summary['runs']['total']} ({summary['runs']['ok']} finished, "
              f"{summary['runs']['failed']} failed integration steps, "
              f"{summary['runs']['diverged']} diverged).", ""]
    return lines


def _split_fixed(config: StudyConfig) -> str:
    """Which parts of the split are the same for every seed: ``"all"`` (a split column, or
    separate validation and test files with every training row), ``"test"`` (a separate
    test file: validation, or training rows, still drawn per seed) or ``"none"``."""
    data = config.data
    if data.scheme == "split_column":
        return "all"
    if data.scheme == "files":
        return "all" if data.val_source is not None and data.train_size is None else "test"
    return "none"


def _seed_text(config: StudyConfig) -> str:
    fixed = _split_fixed(config)
    if fixed == "all":
        return ("the split is fixed (the same for every seed); each seed fixes the initial "
                "weights, minibatch order and integrator noise")
    if fixed == "test":
        return ("the test part is fixed (the same for every seed); each seed fixes the rest "
                "of the split, initial weights, minibatch order and integrator noise")
    return "each seed fixes the split, initial weights, minibatch order and integrator noise"


def _split_caveat(config: StudyConfig) -> str:
    fixed = _split_fixed(config)
    if fixed == "all":
        return ("The split is the same for every seed (seeds vary initial weights, batch "
                "order and noise), so the intervals leave out split-to-split variation: "
                "another split could give other numbers. The comparison is paired, which "
                "removes what the arms share.")
    if fixed == "test":
        return ("The test part is the same for every seed; the rest of the split differs "
                "between seeds, so the intervals include that variation but not the test "
                "part's. The comparison is paired, which removes what the arms share.")
    return ("Splits differ between seeds, so the intervals include split-to-split "
            "variation; the comparison is paired, which removes what the arms share.")


def _arm_lines(config: StudyConfig, summary: dict[str, Any]) -> list[str]:
    lines = ["## Arms", "", "| arm | strength means | grid | parameters it constrained |",
             "|---|---|---|---|"]
    for name, arm in summary["arms"].items():
        lines.append(f"| {name} | {arm['meaning']} | {arm['grid']} | "
                     f"{', '.join(f'`{p}`' for p in arm['layers']) or '-'} |")
    lines += ["", "The last column is what each arm's runs recorded (run record `layers`): "
              "the parameters the arm constrained or clipped. Parameters not listed (the "
              "output layer and biases unless listed) were left free; weight decay acts on "
              "every parameter."]
    if any(a.name == "orthonormal" for a in config.arms):
        lines += ["", "Orthonormal row norms: for non-square layers the mean row norm is not "
                  "the scale s. A layer W (out x in) with out <= in is held at W W^T = s^2 I, "
                  "so every row has norm s. With out > in it is held at W^T W = s^2 I "
                  "(orthonormal columns); then the sum of squared row norms is "
                  "trace(W W^T) = trace(W^T W) = s^2 in, so the mean squared row norm is "
                  "s^2 in/out: the rows' root-mean-square norm is s sqrt(in/out) < s, and "
                  "their mean norm is at most that. The `mean row norm` column and "
                  "`weights.png` average over the rows of every hidden layer."]
    return lines + [""]


def _protocol_lines(metrics: StudyMetrics, baseline: str = BASELINE_ARM) -> list[str]:
    larger = metrics.higher_is_better(metrics.selection_base)
    lines = ["## Protocol", "",
             f"- Each arm's setting is the grid point with the best mean `{metrics.selection}` "
             f"over seeds ({'larger' if larger else 'smaller'} is better; validation split "
             "only).",
             "- Test metrics were computed for every run (they are in `results.csv`, so "
             "resuming needs no recomputation) but were never used to choose a setting; "
             "this report quotes test numbers only for the chosen settings.",
             "- Gaps: `gap_M` is how much better the training split scores than the test "
             "split on metric M (train - test where larger is better, test - train where "
             "smaller is better), so a positive gap means the model does better on data it "
             "was trained on."]
    if "ece_test" in metrics.names:
        lines.append("- ECE: 15 equal-width confidence bins on the test split.")
    lines += ["- Per-arm means carry a 95% t interval (scipy.stats.t) over seeds, clipped to "
              "the range the metric can take: metrics in [0, 1] (accuracy, balanced "
              "accuracy, macro F1, ROC AUC, ECE) to [0, 1], their gaps to [-1, 1], R^2 to "
              "at most 1, errors, losses and norms to at least 0. With few seeds and a large "
              "spread the symmetric t interval can reach past the range; since the true mean "
              "lies inside it, clipping never lowers the coverage. Clipped intervals are "
              "marked `*`.",
              f"- Every other arm is compared with the baseline arm `{baseline}` "
              "(`study.baseline`), seed by seed. Holm p is Holm's step-down adjustment "
              "(Holm 1979) of the Wilcoxon p-values over the arms compared, per metric: it "
              "controls the family-wise error rate (the chance of calling any arm different "
              "when none is) over the arms, for each metric separately. d_z is the mean "
              "paired difference over its sd (Cohen's standardised effect size).",
              f"- Power figures: `detectable (80% power)` is the smallest true mean "
              f"difference a two-sided paired t test at level {ALPHA:g} would detect with "
              f"probability {POWER:g} (noncentral t, scipy.stats.nct), using the observed sd "
              "of the paired differences and the number of seeds; seeds needed for "
              "`study.min_effect` use the same sd. With few seeds that sd is itself "
              "uncertain, so these figures are rough.", ""]
    return lines


def _chosen_table(summary: dict[str, Any], metrics: StudyMetrics) -> list[str]:
    columns = [n for n in metrics.summarised if n not in ("ece_test", "mean_row_norm_hidden",
                                                          "constraint_residual")]
    extra = [n for n in ("ece_test", "mean_row_norm_hidden", "constraint_residual")
             if n in metrics.summarised]
    header = ["arm", "strength"] + [_short(n) for n in columns]
    header += [{"ece_test": "ECE", "mean_row_norm_hidden": "mean row norm",
                "constraint_residual": "residual"}[n] for n in extra]
    lines = ["## Chosen settings on the test split (mean [95% t interval] over seeds)", "",
             "| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    for name, arm in summary["arms"].items():
        if arm["chosen_index"] is None:
            lines.append(f"| {name} | no valid setting (every grid point has a failed or "
                         "diverged seed) |"
                         + " |" * (len(header) - 2))
            continue
        c = arm["chosen"]
        cells = [name, f"{arm['chosen_strength']:g}"]
        for n in columns:
            if n.startswith("train_"):
                cells.append(_num(c[n]["mean"]))
            else:
                cells.append(_interval(c[n]) + ("*" if c[n].get("clipped") else ""))
        for n in extra:
            if n == "ece_test":
                cells.append(_num(c[n]["mean"]))
            elif n == "mean_row_norm_hidden":
                cells.append(_num(c[n]["mean"], 3))
            else:
                cells.append(_sci(c[n]["mean"]))
        lines.append("| " + " | ".join(cells) + " |")
    return lines


def report_markdown(config: StudyConfig, summary: dict[str, Any], description: str,
                    plots: list[str], metrics: StudyMetrics | None = None) -> str:
    """The report: verdict, set-up, protocol, chosen settings, tables, comparisons, caveats."""
    if metrics is None:
        t = summary["task"]
        n_classes = recorded_n_classes(t["name"], None, t["metrics"])
        names = tuple(m for arm in summary["arms"].values() for m in arm.get("chosen", {}))
        names += tuple(f"{p}_{m}" for p in PARTS for m in t["metrics"])
        metrics = StudyMetrics(Task(t["name"], n_classes), tuple(t["metrics"]),
                               t["selection"], tuple(dict.fromkeys(names)))
    summary = _in_study_order(config, summary)
    n_seeds = len(config.seeds)
    lines = [f"# Study `{config.name}`", ""]
    lines += _verdict_lines(summary)
    lines += _setup_lines(config, summary, description, metrics)
    lines += _arm_lines(config, summary)
    baseline = summary.get("baseline", BASELINE_ARM)
    lines += _protocol_lines(metrics, baseline)
    lines += ["## Validation means per setting (used for the choice)", "",
              f"| arm | grid | mean {metrics.selection} per grid point | chosen |",
              "|---|---|---|---|"]
    for name, arm in summary["arms"].items():
        means = ", ".join(_num(m) for m in arm["validation_means"])
        chosen = "none valid" if arm["chosen_index"] is None else f"{arm['chosen_strength']:g}"
        lines.append(f"| {name} | {arm['grid']} | {means} | {chosen} |")
    lines += [""] + _chosen_table(summary, metrics)
    lines += ["", f"## Paired comparison against {baseline}", "",
              f"Differences are arm minus {baseline} per seed (chosen settings); 95% t "
              "interval (scipy.stats.t), two-sided Wilcoxon signed-rank p "
              "(scipy.stats.wilcoxon) raw and Holm-adjusted over the arms (per metric), "
              "Cohen's d_z, and the smallest difference detectable with 80% power (see "
              "Protocol).", "",
              "| arm | metric | mean difference [95% CI] | Wilcoxon p | Holm p | d_z | "
              "detectable (80% power) | reading |",
              "|---|---|---|---|---|---|---|---|"]
    for name, comps in summary["comparisons"].items():
        for metric, comp in comps.items():
            lines.append(
                f"| {name} | {metric} | {_num(comp['mean_difference'])} "
                f"[{_num(comp['ci_low'])}, {_num(comp['ci_high'])}] | "
                f"{_num(comp['p_wilcoxon'], 3)} | {_num(comp.get('p_holm'), 3)} | "
                f"{_num(comp.get('d_z'), 2)} | {_num(comp.get('detectable_difference'))} | "
                f"{_reading(name, metric, comp, metrics, baseline)} |")
    if not summary["comparisons"]:
        lines.append("| - | - | - | - | - | - | - | no comparison possible |")
    if summary.get("power_notes"):
        lines += [""] + [f"- {note['line']}" for note in summary["power_notes"]]
    lines += ensemble_lines(summary["ensembles"])
    lines += _audit_lines(config, summary["audit"])
    lines += _caveat_lines(config, summary, metrics, n_seeds)
    lines += _file_lines(summary, plots)
    return "\n".join(lines) + "\n"


def _in_study_order(config: StudyConfig, summary: dict[str, Any]) -> dict[str, Any]:
    """The summary with its per-arm tables in the study's arm order and the comparisons in
    the order of ``task.compared`` (summary.json stores keys sorted)."""
    names = [a.name for a in config.arms]

    def ordered(table: dict[str, Any]) -> dict[str, Any]:
        return {n: table[n] for n in names if n in table} | {
            n: v for n, v in table.items() if n not in names}

    compared = summary["task"]["compared"]
    comparisons = {arm: {m: comps[m] for m in sorted(comps, key=lambda m: (
        compared.index(m) if m in compared else len(compared), m))}
        for arm, comps in ordered(summary["comparisons"]).items()}
    return {**summary, "arms": ordered(summary["arms"]), "audit": ordered(summary["audit"]),
            "ensembles": ordered(summary["ensembles"]),
            "comparisons": comparisons}


def _caveat_lines(config: StudyConfig, summary: dict[str, Any], metrics: StudyMetrics,
                  n_seeds: int) -> list[str]:
    min_p = summary["protocol"]["wilcoxon_min_p"]
    headline = _short(f"test_{metrics.headline}")
    lines = ["", "## Caveats (what this does and does not show)", "",
             f"- {n_seeds} seeds. With {n_seeds} pairs the smallest possible two-sided "
             f"Wilcoxon p is {min_p:.4g}"
             + (" so it can never fall below 0.05; read the intervals." if min_p > 0.05
                else ".")
             + (" Fewer than 5 seeds: treat every interval as rough." if n_seeds < 5 else ""),
             "- An interval that includes 0 means the data cannot tell the arms apart at this "
             "sample size; it is not evidence that they are equal.",
             "- A smaller gap is not by itself better generalisation: a model that fits the "
             f"training set less has a smaller gap at the same {headline}. Read {headline} "
             "first, the gap second.",
             f"- The selection metric (`{metrics.selection}`) is a choice made in the study "
             "file; metrics such as balanced accuracy, macro F1 or ROC AUC weigh errors "
             "differently from accuracy, and another choice can pick other settings and "
             "change the ranking.",
             "- No correction for multiple comparisons (several arms, several metrics).",
             "- One data set, one model and one training budget: the ranking may change with "
             "any of them. Each grid is small; a better strength may lie outside it.",
             f"- {_split_caveat(config)}",
             "- The max-norm arm clips after each integrator step (the common practice); the "
             "constraint arms are held on their sets inside the integrator (RATTLE).",
             "- Test metrics exist for every run in results.csv; only the chosen settings' "
             "test metrics are quoted here, and nothing was chosen with them.", ""]
    edges = [f"{name} ({arm['chosen_strength']:g})" for name, arm in summary["arms"].items()
             if arm["chosen_index"] is not None and len(arm["grid"]) > 1
             and arm["chosen_index"] in (0, len(arm["grid"]) - 1)]
    if edges:
        lines += ["- Chosen at the edge of its grid: " + ", ".join(edges) + ". The best "
                  "strength may lie outside the grid; widen it before drawing conclusions.",
                  ""]
    if summary["runs"]["ok"] < summary["runs"]["total"]:
        lines += ["- Some runs failed or diverged (NaN metrics in results.csv); settings with "
                  "a failed seed were not eligible for selection.", ""]
    return lines


def _file_lines(summary: dict[str, Any], plots: list[str]) -> list[str]:
    lines = ["## Files", "",
             "- `results.csv`: one row per arm, setting and seed (`chosen` flags the selected "
             "settings); `summary.json`: the numbers in this report; `runs/`: one record per "
             "run with its per-epoch history and audit summary; `audits/`: one audit per run; "
             "`study.json`: the study definition the runs were made with."]
    if summary["data"]["weights_files"]:
        per_fold = (", `runs/<run key>.fold<j>.pt` per fold j with k-fold data"
                    if summary["data"]["folds"] else "")
        lines.append(f"- `runs/<run key>.pt`{per_fold}: the final weights of each finished "
                     f"run (record `weights_file`); {WEIGHTS_HELP}.")
    for p in plots:
        name, _, text = p.partition(": ")
        lines.append(f"- `{name}`: {text}")
    return lines


def _audit_lines(config: StudyConfig, audit: dict[str, Any]) -> list[str]:
    every = sorted({e for arm in audit.values() for e in arm["every"]})
    lines = ["", "## Audit (checks during training)", "",
             "Every run was audited by `holonomic.Audit` every "
             f"{', '.join(map(str, every)) or '?'} steps and at its last step (one JSON Lines "
             "file per run in `audits/`; `holonomic audit audits/FILE.jsonl` summarises one). "
             "Max residual: the largest relative constraint violation in any audited record of "
             "the arm's runs (constraint arms only: max-norm clipping and weight decay hold no "
             "constraint). Alarms: residual above 100 eps of the dtype, momentum not tangent, "
             "SHAKE at its iteration limit, kinetic temperature outside its 5-sd equilibrium "
             "interval (checked only at temperature > 0, after burn-in).", "",
             "| arm | runs audited | records | runs with alarms | alarms by kind | max residual |",
             "|---|---|---|---|---|---|"]
    for name, arm in audit.items():
        kinds = ", ".join(f"{k} {n}" for k, n in arm["alarm_kinds"].items()) or "none"
        residual = "-" if arm["residual_max"] is None else _sci(arm["residual_max"])
        lines.append(f"| {name} | {arm['audited']}/{arm['runs']} | {arm['records']} | "
                     f"{arm['runs_with_alarms']} | {kinds} | {residual} |")
    alarmed = [(name, arm["first_alarm"]) for name, arm in audit.items() if arm["first_alarm"]]
    if alarmed:
        lines.append("")
        lines += [f"- First alarm in {name}: {message}" for name, message in alarmed]
    lines += ["", "No alarm means the checks passed at the audited steps, not at every step; "
              "at temperature 0 the kinetic check is skipped, so only the constraints are "
              "checked."]
    if config.budget.temperature > 0:
        lines[-1] += (" Minibatch gradient noise heats the momenta above the target "
                      "temperature, so kinetic alarms can fire with small batches: they say the "
                      "run is hotter than asked, not that the constraints failed.")
    return lines


def write_outputs(config: StudyConfig, out_dir: str | Path, records: dict[str, dict],
                  description: str, plots: bool = True) -> dict[str, Any]:
    """Write results.csv, summary.json, report.md and the plots; returns the summary."""
    out_dir = Path(out_dir)
    missing = [s.key for s in plan_runs(config) if s.key not in records]
    if missing:
        raise RuntimeError(f"{len(missing)} runs are not finished (e.g. {missing[0]}); run "
                           "the study to completion before writing the report")
    metrics = study_metrics(config, records)
    chosen = select_settings(config, records, metrics)
    summary = build_summary(config, records, chosen, metrics)
    summary["data_description"] = description
    storage.atomic_write_text(out_dir / "results.csv",
                              results_table(config, records, chosen, metrics))
    storage.atomic_write_text(out_dir / "summary.json", storage.dumps(summary))
    plot_files: list[str] = []
    if plots:
        from holonomic.study.plots import write_plots

        plot_files = write_plots(config, records, chosen, out_dir, metrics)
    summary["plots"] = plot_files
    storage.atomic_write_text(out_dir / "summary.json", storage.dumps(summary))
    storage.atomic_write_text(out_dir / "report.md",
                              report_markdown(config, summary, description, plot_files,
                                              metrics))
    return summary
