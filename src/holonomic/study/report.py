"""Study outputs: selection by validation, results.csv, summary.json and report.md.

Protocol: each arm's setting is the grid point with the best mean validation metric over
seeds (``study.selection``; ties go to the earlier grid point; a setting with a failed run
is not eligible). Test metrics are computed by every run and stored in ``results.csv`` so
that a resumed or merged study needs no recomputation, but they are never used for the
choice; the report quotes test metrics only for the chosen settings.
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
from holonomic.study.config import BASELINE_ARM, StudyConfig, selection_metric
from holonomic.study.ensemble import ENSEMBLE_METRICS
from holonomic.study.ensemble_report import ensemble_lines, ensemble_summary
from holonomic.study.runner import _METRIC_NAMES, RunSpec, plan_runs
from holonomic.study.stats import paired_comparison, wilcoxon_min_p

__all__ = ["CSV_COLUMNS", "ENSEMBLE_COLUMNS", "Selection", "csv_columns", "build_summary", "results_table", "select_settings",
           "write_outputs"]

CSV_COLUMNS = ("arm", "setting_index", "strength", "seed", "chosen", "status", "n_train",
               "grad_evals") + _METRIC_NAMES
#: Extra columns when an arm has an ensemble phase: test metrics of the trained network
#: and of the ensemble (holonomic.sampling.classification_metrics, 15 ECE bins).
ENSEMBLE_COLUMNS = ("ensemble_status",) + tuple(
    f"{who}_test_{m}" for who in ("single", "ensemble") for m in ENSEMBLE_METRICS)
#: Metrics compared across arms (paired by seed) in the report.
COMPARED = ("test_accuracy", "gap_accuracy", "gap_loss")
#: Per-arm metrics summarised for the chosen settings.
SUMMARISED = ("train_accuracy", "test_accuracy", "gap_accuracy", "gap_loss", "ece_test",
              "mean_row_norm_hidden", "constraint_residual")


@dataclass(frozen=True)
class Selection:
    """The chosen grid point of one arm and the validation means it was chosen from."""

    arm: str
    index: int | None
    strength: float | None
    validation_means: tuple[float, ...]


def _metric(record: dict, name: str) -> float:
    return float(record["metrics"][name])


def _selection(config: StudyConfig, records: dict[str, dict]) -> str:
    """The resolved ``study.selection`` for the task the records were trained on."""
    from holonomic.study.tasks import Task

    record = next(iter(records.values()), {})
    name = record.get("task", "classification")
    return selection_metric(config, Task(name, int(record.get("n_classes", 2)))
                            if name == "classification" else name)


def select_settings(config: StudyConfig, records: dict[str, dict]) -> dict[str, Selection]:
    """Choose each arm's setting by the mean validation metric over seeds (only)."""
    from holonomic.study.tasks import Task

    selection = _selection(config, records)
    larger_better = Task.higher_is_better(selection[len("val_"):])
    chosen = {}
    for arm in config.arms:
        means = []
        for i in range(len(arm.grid)):
            values = [_metric(records[RunSpec(arm.name, i, arm.grid[i], seed).key],
                              selection) for seed in config.seeds]
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
    return str(value)


def csv_columns(config: StudyConfig) -> tuple[str, ...]:
    """Columns of ``results.csv``: :data:`CSV_COLUMNS`, plus :data:`ENSEMBLE_COLUMNS` when
    an arm has an ensemble phase (empty for the runs of arms without one)."""
    if any(arm.ensemble is not None for arm in config.arms):
        return CSV_COLUMNS + ENSEMBLE_COLUMNS
    return CSV_COLUMNS


def _ensemble_row(record: dict) -> dict[str, Any]:
    phase = record.get("ensemble")
    if phase is None:
        return {c: "" for c in ENSEMBLE_COLUMNS}
    row: dict[str, Any] = {"ensemble_status": phase["status"]}
    for who in ("single", "ensemble"):
        row.update({f"{who}_test_{m}": float(phase[who]["test"][m]) for m in ENSEMBLE_METRICS})
    return row


def results_table(config: StudyConfig, records: dict[str, dict],
                  chosen: dict[str, Selection]) -> str:
    """``results.csv`` text: one row per arm, setting and seed, in plan order."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    columns = csv_columns(config)
    writer.writerow(columns)
    for spec in plan_runs(config):
        record = records[spec.key]
        row = {
            "arm": spec.arm, "setting_index": spec.index, "strength": float(spec.strength),
            "seed": spec.seed, "chosen": chosen[spec.arm].index == spec.index,
            "status": record["status"], "n_train": record["n_train"],
            "grad_evals": record["grad_evals"],
        }
        row.update({k: float(record["metrics"][k]) for k in _METRIC_NAMES})
        if len(columns) > len(CSV_COLUMNS):
            row.update(_ensemble_row(record))
        writer.writerow([_fmt(row[c]) for c in columns])
    return buffer.getvalue()


def _mean_interval(values: np.ndarray, confidence: float = 0.95) -> dict[str, float]:
    """Mean over seeds with a t interval (scipy.stats.t) and the sample sd."""
    values = np.asarray(values, dtype=np.float64)
    n = len(values)
    mean = float(values.mean())
    sd = float(values.std(ddof=1)) if n > 1 else math.nan
    if not math.isfinite(mean):
        return {"mean": mean, "sd": sd, "ci_low": math.nan, "ci_high": math.nan}
    if n > 1 and sd > 0:
        low, high = sps.t.interval(confidence, n - 1, loc=mean, scale=sd / math.sqrt(n))
    else:
        low = high = mean
    return {"mean": mean, "sd": sd, "ci_low": float(low), "ci_high": float(high)}


def _chosen_values(config: StudyConfig, records: dict[str, dict], sel: Selection,
                   metric: str) -> np.ndarray:
    return np.array([_metric(records[RunSpec(sel.arm, sel.index, sel.strength, seed).key],
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


def build_summary(config: StudyConfig, records: dict[str, dict],
                  chosen: dict[str, Selection]) -> dict[str, Any]:
    """Everything the report states, as plain data (written to summary.json)."""
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
            "layers": next(r["layers"] for r in records.values() if r["arm"] == arm.name),
        }
        if sel.index is not None:
            entry["chosen"] = {m: _mean_interval(_chosen_values(config, records, sel, m))
                               for m in SUMMARISED}
            entry["chosen"]["per_seed_test_accuracy"] = list(
                _chosen_values(config, records, sel, "test_accuracy"))
        arms[arm.name] = entry
    comparisons: dict[str, Any] = {}
    base = chosen[BASELINE_ARM]
    for arm in config.arms:
        sel = chosen[arm.name]
        if arm.name == BASELINE_ARM or sel.index is None or base.index is None:
            continue
        comparisons[arm.name] = {}
        for metric in COMPARED:
            result = paired_comparison(_chosen_values(config, records, sel, metric),
                                       _chosen_values(config, records, base, metric))
            comparisons[arm.name][metric] = result.to_dict()
    return {
        "study": config.to_dict(),
        "protocol": {
            "selection": f"mean {_selection(config, records)} over seeds, per arm (larger "
                         "accuracy / smaller loss wins; ties go to the earlier grid point)",
            "selection_metric": _selection(config, records),
            "test_metrics": "computed for every run and stored in results.csv; never used for "
                            "selection; reported only for the chosen settings",
            "paired_by": "seed (same split, initial weights, minibatch order and noise)",
            "confidence": 0.95,
            "wilcoxon_min_p": wilcoxon_min_p(len(config.seeds)),
        },
        "runs": {"total": len(records), "ok": statuses.count("ok"),
                 "failed": statuses.count("failed"), "diverged": statuses.count("diverged")},
        "grad_evals_per_run": grad_evals,
        "arms": arms,
        "comparisons_vs_weight_decay": comparisons,
        "audit": audit_summary(config, records),
        "ensembles": ensemble_summary(config, records, chosen),
    }


# ---------------------------------------------------------------------------------------
# report.md

def _num(x: float, digits: int = 4) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "n/a"
    return f"{x:.{digits}f}"


def _interval(entry: dict[str, float], digits: int = 4) -> str:
    return (f"{_num(entry['mean'], digits)} [{_num(entry['ci_low'], digits)}, "
            f"{_num(entry['ci_high'], digits)}]")


def _verdict(arm: str, metric: str, comp: dict) -> str:
    if comp["includes_zero"]:
        return "the data cannot tell them apart (the interval includes 0)"
    direction = "higher" if comp["mean_difference"] > 0 else "lower"
    return f"{arm} {direction} than weight_decay (the interval excludes 0)"


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
        residual = ("-" if arm["residual_max"] is None else
                    "n/a" if math.isnan(arm["residual_max"]) else f"{arm['residual_max']:.2e}")
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


def report_markdown(config: StudyConfig, summary: dict[str, Any], description: str,
                    plots: list[str]) -> str:
    """The report: protocol, chosen settings, tables, comparisons and caveats."""
    b = config.budget
    h, gamma = b.step_friction()
    n_seeds = len(config.seeds)
    lines = [f"# Study `{config.name}`", ""]
    lines += ["## Set-up", "",
              f"- Data: {description}.",
              f"- Split per seed (stratified): test {config.data.test_fraction:g} and "
              f"validation {config.data.val_fraction:g} of all rows; training set "
              f"{'all the rest' if config.data.train_size is None else config.data.train_size}"
              f" rows; features standardised with training statistics"
              f"{'' if config.data.standardize else ' (off)'}.",
              f"- Model: " + (f"factory `{config.model.factory}`" if config.model.factory else
                              f"MLP, hidden widths {list(config.model.widths)}, "
                              f"{config.model.activation}") + ".",
              f"- Training (same for every arm): `holonomic.Langevin`, {b.epochs} epochs, batch "
              f"{b.batch_size}, step h = {h:.6g}, friction gamma = {gamma:.6g} (SGD view: lr = "
              f"{h * h * (1 + math.exp(-gamma * h)) / 2:.6g}, momentum = "
              f"{math.exp(-gamma * h):.6g}), temperature {b.temperature:g} (units of the mean "
              f"cross-entropy), schedule {b.schedule}, projection {b.projection}, {b.dtype}.",
              f"- Gradient evaluations per run: {summary['grad_evals_per_run']} "
              "(identical across arms).",
              f"- Seeds: {list(config.seeds)}; each seed fixes the split, initial weights, "
              "minibatch order and integrator noise, shared by every arm (paired design).",
              f"- Runs: {summary['runs']['total']} ({summary['runs']['ok']} finished, "
              f"{summary['runs']['failed']} failed integration steps, "
              f"{summary['runs']['diverged']} diverged).", ""]
    lines += ["## Arms", "", "| arm | strength means | grid | acts on |", "|---|---|---|---|"]
    for name, arm in summary["arms"].items():
        lines.append(f"| {name} | {arm['meaning']} | {arm['grid']} | "
                     f"{', '.join(arm['layers']) or '-'} |")
    lines += ["", "Hidden layers are every `nn.Linear` but the last; the output layer and the "
              "biases are never constrained or clipped. Weight decay acts on every parameter.",
              ""]
    lines += ["## Protocol", "",
              f"- Each arm's setting is the grid point with the best mean "
              f"`{summary['protocol']['selection_metric']}` "
              "over seeds (validation split only).",
              "- Test metrics were computed for every run (they are in `results.csv`, so "
              "resuming needs no recomputation) but were never used to choose a setting; "
              "this report quotes test numbers only for the chosen settings.",
              "- Gap: `gap_accuracy` = train accuracy - test accuracy; `gap_loss` = test loss "
              "- train loss. ECE: 15 equal-width confidence bins on the test split.", ""]
    lines += ["## Validation means per setting (used for the choice)", "",
              f"| arm | grid | mean {summary['protocol']['selection_metric']} per grid "
              "point | chosen |",
              "|---|---|---|---|"]
    for name, arm in summary["arms"].items():
        means = ", ".join(_num(m) for m in arm["validation_means"])
        chosen = "none valid" if arm["chosen_index"] is None else f"{arm['chosen_strength']:g}"
        lines.append(f"| {name} | {arm['grid']} | {means} | {chosen} |")
    lines += ["", "## Chosen settings on the test split (mean [95% t interval] over seeds)", "",
              "| arm | strength | train acc | test acc | gap acc | gap loss | ECE | mean row "
              "norm | residual |", "|---|---|---|---|---|---|---|---|---|"]
    for name, arm in summary["arms"].items():
        if arm["chosen_index"] is None:
            lines.append(f"| {name} | no valid setting (all failed) | | | | | | | |")
            continue
        c = arm["chosen"]
        lines.append(
            f"| {name} | {arm['chosen_strength']:g} | {_num(c['train_accuracy']['mean'])} | "
            f"{_interval(c['test_accuracy'])} | {_interval(c['gap_accuracy'])} | "
            f"{_interval(c['gap_loss'])} | {_num(c['ece_test']['mean'])} | "
            f"{_num(c['mean_row_norm_hidden']['mean'], 3)} | "
            f"{_num(c['constraint_residual']['mean'], 2) if not math.isnan(c['constraint_residual']['mean']) else 'n/a'} |")
    lines += ["", "## Paired comparison against weight decay", "",
              "Differences are arm minus weight_decay per seed (chosen settings); 95% t "
              "interval (scipy.stats.t) and two-sided Wilcoxon signed-rank p "
              "(scipy.stats.wilcoxon).", "",
              "| arm | metric | mean difference [95% CI] | Wilcoxon p | reading |",
              "|---|---|---|---|---|"]
    for name, comps in summary["comparisons_vs_weight_decay"].items():
        for metric, comp in comps.items():
            lines.append(
                f"| {name} | {metric} | {_num(comp['mean_difference'])} "
                f"[{_num(comp['ci_low'])}, {_num(comp['ci_high'])}] | "
                f"{_num(comp['p_wilcoxon'], 3)} | {_verdict(name, metric, comp)} |")
    if not summary["comparisons_vs_weight_decay"]:
        lines.append("| - | - | - | - | no comparison possible |")
    lines += ensemble_lines(summary["ensembles"])
    lines += _audit_lines(config, summary["audit"])
    min_p = summary["protocol"]["wilcoxon_min_p"]
    lines += ["", "## Caveats (what this does and does not show)", "",
              f"- {n_seeds} seeds. With {n_seeds} pairs the smallest possible two-sided "
              f"Wilcoxon p is {min_p:.4g}"
              + (" so it can never fall below 0.05; read the intervals." if min_p > 0.05
                 else ".")
              + (" Fewer than 5 seeds: treat every interval as rough." if n_seeds < 5 else ""),
              "- An interval that includes 0 means the data cannot tell the arms apart at this "
              "sample size; it is not evidence that they are equal.",
              "- A smaller gap is not by itself better generalisation: a model that fits the "
              "training set less has a smaller gap at the same test accuracy. Read test "
              "accuracy first, the gap second.",
              "- No correction for multiple comparisons (several arms, several metrics).",
              "- One data set, one model and one training budget: the ranking may change with "
              "any of them. Each grid is small; a better strength may lie outside it.",
              "- Splits differ between seeds, so the intervals include split-to-split "
              "variation; the comparison is paired, which removes what the arms share.",
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
    lines += ["## Files", "",
              "- `results.csv`: one row per arm, setting and seed (`chosen` flags the selected "
              "settings); `summary.json`: the numbers in this report; `runs/`: one record per "
              "run with its per-epoch history and audit summary; `audits/`: one audit per run; "
              "`study.json`: the study definition the runs were made with."]
    for p in plots:
        name, _, text = p.partition(": ")
        lines.append(f"- `{name}`: {text}")
    return "\n".join(lines) + "\n"


def write_outputs(config: StudyConfig, out_dir: str | Path, records: dict[str, dict],
                  description: str, plots: bool = True) -> dict[str, Any]:
    """Write results.csv, summary.json, report.md and the plots; returns the summary."""
    out_dir = Path(out_dir)
    missing = [s.key for s in plan_runs(config) if s.key not in records]
    if missing:
        raise RuntimeError(f"{len(missing)} runs are not finished (e.g. {missing[0]}); run "
                           "the study to completion before writing the report")
    chosen = select_settings(config, records)
    summary = build_summary(config, records, chosen)
    summary["data_description"] = description
    storage.atomic_write_text(out_dir / "results.csv", results_table(config, records, chosen))
    storage.atomic_write_text(out_dir / "summary.json", storage.dumps(summary))
    plot_files: list[str] = []
    if plots:
        from holonomic.study.plots import write_plots

        plot_files = write_plots(config, records, chosen, out_dir)
    summary["plots"] = plot_files
    storage.atomic_write_text(out_dir / "summary.json", storage.dumps(summary))
    storage.atomic_write_text(out_dir / "report.md",
                              report_markdown(config, summary, description, plot_files))
    return summary
