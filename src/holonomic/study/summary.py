"""The numbers of a study's report: summary.json and results.csv, as plain data.

Each arm's chosen trial comes from :mod:`holonomic.study.selection`; everything here reads
run records (``{key: dict or RunRecord}``, :mod:`holonomic.study.records`) and
:class:`~holonomic.study.selection.Selection` objects, never the runner's plan. Every other
arm is compared with the baseline arm seed by seed (:func:`compare_with_baseline`): mean
difference with a 95% t interval and a simultaneous (Bonferroni) interval over the arms
compared (which the verdict reads), Wilcoxon p raw and Holm-adjusted over the arms per
metric, Cohen's d_z, the difference detectable with 80% power and, with a ``min_effect``,
the seeds needed to detect it (:mod:`holonomic.study.stats`).
"""

from __future__ import annotations

import csv
import io
import math
import re
from typing import Any, Mapping, Sequence

import numpy as np
from scipy import stats as sps

from holonomic.study.config import BASELINE_ARM
from holonomic.study.ensemble_report import ensemble_metric_names, ensemble_summary
from holonomic.study.records import RunRecord, as_records
from holonomic.study.selection import Selection, StudyMetrics
from holonomic.study.stats import (
    ALPHA, MAX_SEEDS, POWER, bonferroni_interval, comparison_note, holm_adjust,
    paired_comparison, seeds_needed, wilcoxon_min_p)
from holonomic.study.tasks import PARTS, metric_range
from holonomic.study.tasks import split_metric_name as _split_name

__all__ = ["LEADING_COLUMNS", "SETTING_COLUMNS", "SHORT_NAMES", "arm_entries",
           "audit_summary", "compare_with_baseline", "csv_columns", "data_summary",
           "mean_interval", "results_rows", "results_table", "short_name", "summary_numbers"]

#: First columns of ``results.csv``; the metric columns follow, and last the trial's
#: settings, optimiser and regulariser (:data:`SETTING_COLUMNS`; see :func:`csv_columns`).
LEADING_COLUMNS = ("arm", "setting_index", "strength", "seed", "chosen", "status", "n_train",
                   "grad_evals")
#: Columns of ``results.csv`` on a run's recipe: ``trial`` (= ``setting_index``), the budget
#: fraction (1: a full run), the settings every optimiser may have, optimiser, regulariser.
SETTING_COLUMNS = ("trial", "budget_fraction", "lr", "momentum", "temperature", "optimiser",
                   "regulariser")
#: Short names for text ("test RMSE").
SHORT_NAMES = {"accuracy": "accuracy", "balanced_accuracy": "balanced accuracy",
               "macro_f1": "macro F1", "roc_auc": "ROC AUC", "loss": "loss", "rmse": "RMSE",
               "mae": "MAE", "r2": "R^2", "ece": "ECE"}
#: Baseline arm when none is named.
DEFAULT_BASELINE = BASELINE_ARM


def short_name(name: str) -> str:
    """``"test_rmse"`` -> ``"test RMSE"``, ``"gap_loss"`` -> ``"gap in loss"``."""
    prefix, base = _split_name(name)
    label = SHORT_NAMES.get(base, base)
    if prefix in ("gap_", "val_gap_"):
        return f"{'validation ' if prefix == 'val_gap_' else ''}gap in {label}"
    part = {"train_": "train ", "val_": "validation ", "test_": "test "}.get(prefix, "")
    return f"{part}{label}"


# ---------------------------------------------------------------------------------------
# results.csv

def _fmt(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, (list, tuple)):
        return ";".join(_fmt(v) for v in value)
    return str(value)


def _metric_columns(records: Mapping[str, RunRecord], metrics: StudyMetrics
                    ) -> tuple[str, ...]:
    """Metric columns: per metric its train, val and test values (for accuracy and loss
    the order of the columns before regression existed), the gaps, the validation gaps,
    ECE, the weight norms and constraint residual, then any other name (sorted: stored
    records have sorted keys)."""
    seen: set[str] = set()
    for record in records.values():
        seen.update(record.metrics)
    ordered = [f"{part}_{m}" for m in metrics.metrics for part in PARTS]
    ordered += [f"gap_{m}" for m in metrics.metrics] + [f"val_gap_{m}" for m in metrics.metrics]
    ordered += ["ece_val", "ece_test", "weight_norm_hidden", "mean_row_norm_hidden",
                "weight_norm_output", "constraint_residual"]
    ordered = [n for n in ordered if n in seen]
    return tuple(ordered + sorted(seen.difference(ordered)))


def _setting_columns(records: Mapping[str, RunRecord]) -> tuple[str, ...]:
    """:data:`SETTING_COLUMNS`, then any other setting name of the records (sorted)."""
    names = {k for r in records.values() for k in r.settings} - {"strength"}
    return SETTING_COLUMNS + tuple(sorted(names.difference(SETTING_COLUMNS)))


def csv_columns(records: Mapping[str, Any], metrics: StudyMetrics) -> tuple[str, ...]:
    """Columns of ``results.csv``: :data:`LEADING_COLUMNS`, the metric names of the records,
    when a run has an ensemble phase ``ensemble_status`` and
    ``{single,ensemble}_test_<metric>`` for the phase's metrics (empty for the runs without
    one), and last the trial's settings and recipe (:data:`SETTING_COLUMNS`, then any other
    setting name). Records made before recipes (all legacy) get no setting columns, so an
    old study's results.csv keeps its columns; new columns come last so that readers of
    the old columns by position keep working."""
    typed = as_records(records)
    columns = LEADING_COLUMNS + _metric_columns(typed, metrics)
    if any(r.ensemble is not None for r in typed.values()):
        columns += _ensemble_columns(typed)
    if not all(r.legacy for r in typed.values()):
        columns += _setting_columns(typed)
    return columns


def _ensemble_columns(records: Mapping[str, RunRecord]) -> tuple[str, ...]:
    names = ensemble_metric_names(records)
    return ("ensemble_status",) + tuple(f"{who}_test_{m}" for who in ("single", "ensemble")
                                        for m in names)


def _ensemble_row(record: RunRecord) -> dict[str, Any]:
    phase = record.ensemble
    if phase is None:
        return {}
    row: dict[str, Any] = {"ensemble_status": phase.status}
    for who in ("single", "ensemble"):
        row.update({f"{who}_test_{m}": float(v)
                    for m, v in getattr(phase, who)["test"].items()})
    return row


def _run_order(records: Mapping[str, RunRecord], arms: Sequence[str]) -> list[RunRecord]:
    """Runs in report order: arm (``arms`` first), trial, budget fraction, seed."""
    rank = {a: i for i, a in enumerate(arms)}
    return sorted(records.values(), key=lambda r: (rank.get(r.arm, len(rank)), r.arm,
                                                   r.trial, r.budget_fraction, r.seed))


def results_rows(records: Mapping[str, Any], chosen: Mapping[str, Selection],
                 metrics: StudyMetrics) -> list[dict[str, Any]]:
    """One row per run (as ``results.csv`` holds it, values unformatted): in the arm order
    of ``chosen``, then trial, budget fraction and seed; ``chosen`` is true for the full
    runs of each arm's chosen trial."""
    typed = as_records(records)
    metric_columns = _metric_columns(typed, metrics)
    rows = []
    for record in _run_order(typed, list(chosen)):
        sel = chosen.get(record.arm)
        row = {
            "arm": record.arm, "setting_index": record.trial,
            "strength": float(record.strength), "seed": record.seed,
            "chosen": sel is not None and sel.index == record.trial and record.full,
            "status": record.status, "n_train": record.n_train,
            "grad_evals": "" if record.grad_evals is None else record.grad_evals,
            "trial": record.trial, "budget_fraction": float(record.budget_fraction),
            "optimiser": record.optimiser, "regulariser": record.regulariser,
        }
        row.update({k: float(v) for k, v in record.settings.items() if k != "strength"})
        row.update({k: record.metric(k) for k in metric_columns})
        row.update(_ensemble_row(record))
        rows.append(row)
    return rows


def results_table(records: Mapping[str, Any], chosen: Mapping[str, Selection],
                  metrics: StudyMetrics) -> str:
    """``results.csv`` text: :func:`results_rows` under :func:`csv_columns` (a setting a
    run does not have, e.g. momentum for AdamW, is an empty cell)."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    columns = csv_columns(records, metrics)
    writer.writerow(columns)
    for row in results_rows(records, chosen, metrics):
        writer.writerow([_fmt(row.get(c, "")) for c in columns])
    return buffer.getvalue()


# ---------------------------------------------------------------------------------------
# summary.json

def mean_interval(values: np.ndarray, confidence: float = 0.95,
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


#: A kinetic alarm's message (holonomic.audit.monitor): the measured kinetic temperature
#: and the interval around the target it missed.
_KINETIC_ALARM = re.compile(r"kinetic temperature of .+? is (?P<value>\S+) at step \d+, "
                            r"outside \[(?P<low>[^,\]]+), (?P<high>[^\]]+)\]")


def kinetic_direction(message: str) -> str | None:
    """``"hot"`` when a kinetic alarm's message says the measured temperature lay above its
    interval around the target, ``"cold"`` below it; None for any other alarm."""
    match = _KINETIC_ALARM.search(message)
    if match is None:
        return None
    try:
        value, low, high = (float(match[k]) for k in ("value", "low", "high"))
    except ValueError:
        return None
    return "hot" if value > high else "cold" if value < low else None


def audit_summary(records: Mapping[str, Any], arms: Sequence[str]) -> dict[str, Any]:
    """Per arm (``arms``, in that order), over all its runs: how many were audited, records,
    alarms by kind, and the largest constraint residual any audit saw (``None`` when the
    arm constrains nothing). Kinetic alarms: ``runs_with_kinetic_alarms``, and
    ``kinetic_too_hot`` / ``kinetic_too_cold``, the runs whose recorded alarms (a run record
    keeps its first 5, ``first_alarms``) include one above / below the target's interval."""
    typed = as_records(records)
    out: dict[str, Any] = {}
    for arm in arms:
        mine = [r for r in typed.values() if r.arm == arm]
        audits = [r.hooks.get("audit") for r in mine]
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
        out[arm] = {
            "runs": len(mine),
            "audited": len(audited),
            "every": sorted({int(a["every"]) for a in audited}),
            "records": sum(int(a["records"]) for a in audited),
            "runs_with_alarms": sum(1 for a in audited if a["alarm_count"]),
            "alarm_count": sum(int(a["alarm_count"]) for a in audited),
            "alarm_kinds": dict(sorted(kinds.items())),
            "runs_with_kinetic_alarms": sum(1 for a in audited if any(
                place.startswith("kinetic") and int(count)
                for place, count in a["alarms"].items())),
            "kinetic_too_hot": sum(1 for a in audited if "hot" in map(
                kinetic_direction, a["first_alarms"])),
            "kinetic_too_cold": sum(1 for a in audited if "cold" in map(
                kinetic_direction, a["first_alarms"])),
            "residual_max": largest,
            "first_alarm": next((a["first_alarms"][0] for a in audited if a["first_alarms"]),
                                None),
        }
    return out


def _n_train_values(records: Mapping[str, RunRecord]) -> list[int]:
    """Every training-set size the runs used: each record's ``n_train``, and with k-fold
    data each fold's (``fold_details``)."""
    sizes: set[int] = set()
    for record in records.values():
        sizes.add(int(record.n_train))
        sizes.update(int(fold.n_train) for fold in record.fold_details)
    return sorted(sizes)


def _weights_count(record: RunRecord) -> int:
    """Saved weight files of a run: ``weights_files`` (one per fold) or ``weights_file``."""
    if record.weights_files:
        return len(record.weights_files)
    return 1 if record.weights_file else 0


def data_summary(records: Mapping[str, Any], scheme: str,
                 first: RunRecord | None = None) -> dict[str, Any]:
    """What the runs recorded about their data; ``scheme``: one sentence on the split
    (:func:`holonomic.study.data.describe_scheme`); ``first``: the record whose task is
    reported (default: the first)."""
    typed = as_records(records)
    first = next(iter(typed.values())) if first is None else first
    features = next((list(r.feature_names) for r in typed.values() if r.feature_names), None)
    fingerprints = sorted({r.data_fingerprint for r in typed.values() if r.data_fingerprint})
    return {
        "scheme": scheme,
        "n_train": _n_train_values(typed),
        "feature_names": features,
        "fingerprints": fingerprints,
        "folds": max((len(r.folds) for r in typed.values()), default=0),
        "weights_files": sum(_weights_count(r) for r in typed.values()),
        "task": first.task,
    }


def _settings_text(settings: Mapping[str, Any]) -> str:
    return ", ".join(f"{k} = {float(v):g}" for k, v in sorted(settings.items()))


def arm_entries(chosen: Mapping[str, Selection], metrics: StudyMetrics,
                meanings: Mapping[str, str] | None = None) -> dict[str, Any]:
    """Per arm: its trials and validation means, the chosen trial and settings (and the
    settings chosen at the edge of what was tried), its recipe and budget, and, for a
    chosen trial, each summarised metric's mean with a 95% t interval over seeds.
    ``meanings``: what the strength means per arm (text; default none)."""
    meanings = meanings or {}
    arms: dict[str, Any] = {}
    for name, sel in chosen.items():
        grid = [float(t.settings.get("strength", 0.0)) for t in sel.trial_runs]
        entry: dict[str, Any] = {
            "grid": grid,
            "meaning": meanings.get(name, ""),
            "validation_means": list(sel.validation_means),
            "chosen_index": sel.index,
            "chosen_strength": sel.strength,
            "layers": list(sel.layers),
            "trials": list(sel.trials),
            "trial_settings": [dict(t.settings) for t in sel.trial_runs],
            "tried": [dict(t) for t in sel.tried],
            "searched": list(sel.searched),
            "chosen_settings": dict(sel.settings),
            "chosen_settings_text": _settings_text(sel.settings),
            "edges": [{"key": e.key, "value": e.value, "side": e.side, "low": e.low,
                       "high": e.high, "tied": e.tied} for e in sel.edges],
            "recipe": None if sel.recipe is None else sel.recipe.to_dict(),
            "budget": None if sel.budget is None else sel.budget.to_dict(),
        }
        if sel.index is not None:
            entry["chosen"] = {m: mean_interval(sel.values(m), bounds=metric_range(m))
                               for m in metrics.summarised}
            headline = f"test_{metrics.headline}"
            entry["chosen"][f"per_seed_{headline}"] = list(sel.values(headline))
        arms[name] = entry
    return arms


def _verdict_entry(arm: str, metric: str, comp: dict[str, Any] | None,
                   metrics: StudyMetrics, reason: str = "",
                   baseline: str = DEFAULT_BASELINE) -> dict[str, Any]:
    """One arm's verdict against the baseline on ``metric`` (a test metric). A metric other
    than the headline (the selection metric's test counterpart) names its direction."""
    label = short_name(metric)
    _, base = _split_name(metric)
    if base != metrics.headline:
        label += (f" (selection metric; {'higher' if metrics.higher_is_better(base) else 'lower'}"
                  " is better)")
    if comp is None or not all(math.isfinite(comp[k]) for k in
                               ("mean_difference", "ci_low", "ci_high")):
        why = reason or "non-finite values"
        return {"arm": arm, "metric": metric, "reading": "no verdict",
                "line": f"{arm} vs {baseline}, {label}: no verdict ({why})"}
    note = comparison_note(comp)
    low, high, m = adjusted_interval(comp)
    if note or low <= 0.0 <= high:
        reading = "cannot tell apart"
    else:
        arm_higher = comp["mean_difference"] > 0
        reading = "better" if arm_higher == metrics.higher_is_better(base) else "worse"
    digits = digits_for(metric, comp)
    line = (f"{arm} vs {baseline}, {label}: {reading} "
            f"({comp['mean_difference']:+.{digits}f} [{low:+.{digits}f}, {high:+.{digits}f}] "
            f"{interval_name(m)}, {comp['n']} seeds" + (f"; {note}" if note else "") + ")")
    return {"arm": arm, "metric": metric, "reading": reading,
            "mean_difference": comp["mean_difference"], "ci_low": low, "ci_high": high,
            "ci_low_unadjusted": comp["ci_low"], "ci_high_unadjusted": comp["ci_high"],
            "arms_compared": m, "n": comp["n"], "line": line}


def adjusted_interval(comp: Mapping[str, Any]) -> tuple[float, float, int]:
    """``(low, high, m)``: a comparison's simultaneous (Bonferroni) interval over the ``m``
    arms compared; a comparison dict made before it existed gives its raw interval, m 1."""
    if "ci_low_adjusted" in comp:
        return comp["ci_low_adjusted"], comp["ci_high_adjusted"], int(comp["arms_compared"])
    return comp["ci_low"], comp["ci_high"], 1


def interval_name(m: int) -> str:
    """How the verdict names its interval: ``"95% t interval"`` for one arm compared,
    ``"95% simultaneous over 4 arms, Bonferroni"`` for several."""
    confidence = f"{100 * (1 - ALPHA):g}%"
    if m <= 1:
        return f"{confidence} t interval"
    return f"{confidence} simultaneous over {m} arms, Bonferroni"


def _qualify_verdict(verdict: list[dict[str, Any]], chosen: Mapping[str, Selection],
                     audit: Mapping[str, Any], baseline: str) -> None:
    """Append to each verdict line what undermines it: the settings the arm (or the
    baseline) chose at the edge of its search (not those whose values made no difference,
    ``tied``), and the arm's (or the baseline's) runs with
    kinetic-temperature audit alarms. Sets ``edges``, ``baseline_edges`` (keys) and
    ``kinetic_alarms`` (``{arm: [runs with alarms, runs audited]}``) of each entry."""
    def edges(arm: str) -> list[str]:
        sel = chosen.get(arm)
        return [] if sel is None else [e.key for e in sel.edges if not e.tied]

    def alarms(arm: str) -> tuple[int, int] | None:
        entry = audit.get(arm) or {}
        runs = entry.get("runs_with_kinetic_alarms", 0)
        return (runs, entry["audited"]) if runs else None

    for entry in verdict:
        mine, theirs = edges(entry["arm"]), edges(baseline)
        entry["edges"], entry["baseline_edges"] = mine, theirs
        entry["kinetic_alarms"] = {a: list(alarms(a)) for a in (entry["arm"], baseline)
                                   if alarms(a)}
        if entry["reading"] == "no verdict":
            continue
        extra = []
        if mine:
            extra.append(f"chosen at the edge of its search: {', '.join(mine)}")
        if theirs:
            extra.append(f"{baseline} chosen at the edge of its search: {', '.join(theirs)}")
        for arm, (runs, audited) in entry["kinetic_alarms"].items():
            whose = "" if arm == entry["arm"] else f"{arm}'s "
            extra.append(f"audit: {whose or 'the '}kinetic temperature missed its target in "
                         f"{runs}/{audited} runs")
        entry["line"] += "".join(f" ({e})" for e in extra)


def digits_for(metric: str, comp: dict[str, Any]) -> int:
    """Decimals for a difference: 3 for metrics in [0, 1], else about 3 significant."""
    if metric_range(metric)[1] <= 1.0 and metric_range(metric)[0] >= -1.0:
        return 3
    scale = max(abs(comp["mean_difference"]), abs(comp["ci_low"]), abs(comp["ci_high"]))
    if not scale > 0:
        return 3
    return max(3, min(6, 2 - math.floor(math.log10(scale))))


def compare_with_baseline(chosen: Mapping[str, Selection], metrics: StudyMetrics,
                          baseline: str, min_effect: float | None = None
                          ) -> tuple[dict[str, Any], list[dict[str, Any]], list[dict[str, Any]]]:
    """Every arm of ``chosen`` but ``baseline`` against it, paired by seed (the chosen
    trials' runs): ``(comparisons, verdict, power_notes)``.

    ``comparisons[arm][metric]``: :class:`holonomic.study.stats.PairedComparison` as a dict
    for each of ``metrics.compared``, with ``p_holm`` (Holm over the arms, per metric) and,
    for the headline metric with ``min_effect``, ``seeds_needed``. ``verdict``: one entry
    per arm and judged metric (the test headline metric, and the selection metric's test
    counterpart when it differs) with a one-line ``line``. ``power_notes``: the arms whose
    headline difference is below what the study could detect (see :func:`_add_power`).

    Raises:
        ValueError: an arm's chosen runs and the baseline's were made with different seeds
            (the pairing would be wrong).
    """
    comparisons: dict[str, Any] = {}
    verdict: list[dict[str, Any]] = []
    base = chosen[baseline]
    headline = f"test_{metrics.headline}"
    judged = [headline] + [m for m in (f"test_{metrics.selection_base}",)
                           if m != headline and m in metrics.compared]
    for name, sel in chosen.items():
        if name == baseline:
            continue
        if sel.index is None or base.index is None:
            who = name if sel.index is None else baseline
            verdict += [_verdict_entry(name, m, None, metrics, f"{who} has no valid setting",
                                       baseline) for m in judged]
            continue
        if sel.seeds != base.seeds:
            raise ValueError(f"arm {name!r} was run with seeds {list(sel.seeds)}, the "
                             f"baseline {baseline!r} with {list(base.seeds)}: the comparison "
                             "pairs runs by seed")
        comparisons[name] = {}
        for metric in metrics.compared:
            result = paired_comparison(sel.values(metric), base.values(metric))
            comparisons[name][metric] = result.to_dict()
        verdict += [(name, m) for m in judged]
    _add_holm(comparisons)
    _add_simultaneous(comparisons)
    verdict = [v if isinstance(v, dict) else
               _verdict_entry(v[0], v[1], comparisons[v[0]][v[1]], metrics, "", baseline)
               for v in verdict]
    power_notes = _add_power(comparisons, headline, min_effect, baseline)
    return comparisons, verdict, power_notes


def summary_numbers(records: Mapping[str, Any], chosen: Mapping[str, Selection],
                    metrics: StudyMetrics, baseline: str, min_effect: float | None = None,
                    meanings: Mapping[str, str] | None = None) -> dict[str, Any]:
    """The parts of summary.json that follow from the records and the selection alone:
    ``task``, ``protocol``, ``runs``, ``grad_evals_per_run``, ``arms``, ``verdict``,
    ``baseline``, ``comparisons``, ``power_notes``, ``audit``, ``ensembles``, ``halving``."""
    typed = as_records(records)
    statuses = [r.status for r in typed.values()]
    full = [r for r in typed.values() if r.full]
    grad_evals = sorted({int(r.grad_evals) for r in full if r.grad_evals is not None})
    comparisons, verdict, power_notes = compare_with_baseline(chosen, metrics, baseline,
                                                              min_effect)
    audit = audit_summary(typed, list(chosen))
    _qualify_verdict(verdict, chosen, audit, baseline)
    larger = metrics.selection_larger_is_better
    seeds = max((len(sel.seeds) for sel in chosen.values()), default=0)
    return {
        "task": {
            "name": metrics.task.name,
            "metrics": list(metrics.metrics),
            "headline": metrics.headline,
            "selection": metrics.selection,
            "selection_larger_is_better": larger,
            "compared": list(metrics.compared),
        },
        "protocol": {
            "selection": f"mean {metrics.selection} over seeds, per arm ("
                         f"{'larger' if larger else 'smaller'} wins; ties go to the earlier "
                         "trial; full-budget runs only)",
            "selection_metric": metrics.selection,
            "test_metrics": "computed for every run and stored in results.csv; never used for "
                            "selection; reported only for the chosen settings",
            "paired_by": "seed (same split, initial weights, minibatch order and noise)",
            "confidence": 0.95,
            "intervals": "per-arm means: t interval clipped to the range the metric can take",
            "wilcoxon_min_p": wilcoxon_min_p(seeds),
            "baseline": baseline,
            "holm": "p_holm: Holm's step-down adjustment of the Wilcoxon p-values over the "
                    "arms compared with the baseline, per metric (controls the family-wise "
                    "error rate over the arms, per metric)",
            "simultaneous": "ci_low_adjusted, ci_high_adjusted: Bonferroni simultaneous t "
                            "interval over the m arms compared with the baseline, per metric "
                            "(each at level 1 - 0.05/m; m = 1: the plain 95% interval); the "
                            "verdict is read from it",
            "effect_size": "d_z: mean / sd of the paired differences (NaN with zero spread)",
            "power": f"detectable_difference: smallest true mean difference a two-sided "
                     f"paired t test at level {ALPHA:g} detects with power {POWER:g}, from the "
                     "observed sd of the differences and the number of seeds (rough: the sd "
                     "of a few seeds is itself uncertain)",
            "min_effect": min_effect,
            "max_seeds": MAX_SEEDS,
        },
        "runs": {"total": len(typed), "ok": statuses.count("ok"),
                 "failed": statuses.count("failed"), "diverged": statuses.count("diverged")},
        "grad_evals_per_run": grad_evals,
        "arms": arm_entries(chosen, metrics, meanings),
        "verdict": verdict,
        "baseline": baseline,
        "comparisons": comparisons,
        "power_notes": power_notes,
        "audit": audit,
        "ensembles": ensemble_summary(chosen),
        "legacy_records": all(r.legacy for r in typed.values()),
        "halving": {"used": any(sel.budget is not None and sel.budget.rungs
                                for sel in chosen.values()),
                    "rung_runs": len(typed) - len(full)},
    }


def _add_holm(comparisons: dict[str, dict[str, dict[str, Any]]]) -> None:
    """Set ``p_holm`` of every comparison: Holm over the arms compared, per metric."""
    metrics = {m for comps in comparisons.values() for m in comps}
    for metric in metrics:
        arms = [a for a in comparisons if metric in comparisons[a]]
        adjusted = holm_adjust([comparisons[a][metric]["p_wilcoxon"] for a in arms])
        for arm, p in zip(arms, adjusted):
            comparisons[arm][metric]["p_holm"] = float(p)


def _add_simultaneous(comparisons: dict[str, dict[str, dict[str, Any]]]) -> None:
    """Set every comparison's simultaneous interval over the ``m`` arms compared, per metric
    (:func:`holonomic.study.stats.bonferroni_interval`): ``ci_low_adjusted``,
    ``ci_high_adjusted``, ``confidence_adjusted`` (1 - 0.05 / m), ``arms_compared`` (m)
    and ``includes_zero_adjusted``. The verdict reads this interval."""
    metrics = {m for comps in comparisons.values() for m in comps}
    for metric in metrics:
        arms = [a for a in comparisons if metric in comparisons[a]]
        for arm in arms:
            comp = comparisons[arm][metric]
            low, high, level = bonferroni_interval(comp["differences"], len(arms))
            comp.update(ci_low_adjusted=low, ci_high_adjusted=high,
                        confidence_adjusted=level, arms_compared=len(arms),
                        includes_zero_adjusted=bool(comp.get("zero_spread"))
                        or not low > 0.0 and not high < 0.0)


def _add_power(comparisons: dict[str, dict[str, dict[str, Any]]], headline: str,
               min_effect: float | None, baseline: str) -> list[dict[str, Any]]:
    """Seeds needed for ``min_effect`` on the headline metric (``seeds_needed``, None: more
    than ``MAX_SEEDS`` or no spread), and a note per arm whose observed headline
    difference is smaller than the detectable one and whose simultaneous interval (the one
    the verdict reads) includes 0 (an interval that excludes 0 found the difference, however
    small the study)."""
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
                and abs(observed) < detectable
                and comp.get("includes_zero_adjusted", comp["includes_zero"])):
            continue
        digits = digits_for(headline, comp)
        line = (f"{arm} vs {baseline}, {short_name(headline)}: the study was too small to "
                f"detect a difference of this size ({observed:+.{digits}f}): it could detect "
                f"about {detectable:.{digits}f} with {comp['n']} seeds")
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
