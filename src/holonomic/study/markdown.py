"""report.md: the verdict, set-up, budget and chosen setting per arm, protocol, tables,
paired comparisons, caveats and files, from the summary (:mod:`holonomic.study.summary`).

What the report claims is kept to what the study shows: a comparison of each arm's recipe
tuned with the budget it was given, on this data, with this model and these seeds; it is
not a general claim that one regulariser or optimiser is better.
"""

from __future__ import annotations

import math
from typing import Any

from holonomic.study.selection import StudyMetrics
from holonomic.study.stats import ALPHA, POWER, comparison_note
from holonomic.study.summary import (
    DEFAULT_BASELINE, SHORT_NAMES, adjusted_interval, short_name)
from holonomic.study.ensemble_report import ensemble_lines
from holonomic.study.tasks import PARTS, Task, recorded_n_classes
from holonomic.study.tasks import split_metric_name as _split_name

__all__ = ["FEATURES_SHOWN", "WEIGHTS_HELP", "report_markdown"]

#: Feature names listed in the report before "and N more".
FEATURES_SHOWN = 20
#: Where the report sends a reader who wants to load a run's saved weights.
WEIGHTS_HELP = ("each loads with `torch.load(path, weights_only=True)`; how to rebuild the "
                "model and predict with it: see the `holonomic.study.trained` module "
                "docstring")
_SHORT = SHORT_NAMES
_short = short_name
BASELINE_ARM = DEFAULT_BASELINE


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
    low, high, m = adjusted_interval(comp)
    which = "the simultaneous interval" if m > 1 else "the interval"
    if not (low > 0.0 or high < 0.0):
        return f"the data cannot tell them apart ({which} includes 0)"
    prefix, base = _split_name(metric)
    higher = comp["mean_difference"] > 0
    if prefix in ("gap_", "val_gap_"):
        return (f"{arm} has a {'larger' if higher else 'smaller'} gap than {baseline} "
                f"({which} excludes 0)")
    try:
        good = higher == metrics.higher_is_better(base)
    except KeyError:
        return f"{arm} {'higher' if higher else 'lower'} than {baseline}"
    return (f"{arm} {'better' if good else 'worse'} than {baseline} "
            f"({'higher' if higher else 'lower'}; {which} excludes 0)")


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
             f"[95% interval, simultaneous over the arms compared with {baseline} "
             f"(Bonferroni), so that the verdicts on one metric hold together]; "
             f"{'higher' if Task.higher_is_better(task['headline']) else 'lower'}"
             " is better):", ""]
    lines += [f"- {v['line']}" for v in summary["verdict"]]
    return lines + [""]


def _setup_lines(config: Any, summary: dict[str, Any], description: str,
                 metrics: StudyMetrics) -> list[str]:
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
              _training_line(config, summary, loss),
              _grad_evals_line(summary),
              f"- Seeds: {list(config.seeds)}; {_seed_text(config)}, shared by every arm "
              "(paired design).",
              f"- Runs: {summary['runs']['total']} ({summary['runs']['ok']} finished, "
              f"{summary['runs']['failed']} failed integration steps, "
              f"{summary['runs']['diverged']} diverged{_rung_text(summary)}).", ""]
    return lines


def _rung_text(summary: dict[str, Any]) -> str:
    rungs = (summary.get("halving") or {}).get("rung_runs", 0)
    return f"; {rungs} of them successive-halving rung runs" if rungs else ""


def _training_line(config: Any, summary: dict[str, Any], loss: str) -> str:
    """How the runs were trained. Before recipes every arm used ``holonomic.Langevin`` with
    the budget's settings; with recipes each arm has its own (see the budget table)."""
    b = config.budget
    if summary.get("legacy_records", True):
        h, gamma = b.step_friction()
        return (f"- Training (same for every arm): `holonomic.Langevin`, {b.epochs} epochs, "
                f"batch {b.batch_size}, step h = {h:.6g}, friction gamma = {gamma:.6g} (SGD "
                f"view: lr = {h * h * (1 + math.exp(-gamma * h)) / 2:.6g}, momentum = "
                f"{math.exp(-gamma * h):.6g}), temperature {b.temperature:g} (units of the "
                f"mean training loss, {loss}), schedule {b.schedule}, projection "
                f"{b.projection}, {b.dtype}.")
    return (f"- Training: each arm's own recipe (optimiser, regulariser, settings: see "
            f"\"Budget and chosen setting per arm\"); the same for every arm: {b.epochs} "
            f"epochs, batch {b.batch_size}, schedule {b.schedule}, projection "
            f"{b.projection}, {b.dtype}. Temperatures are in units of the mean training "
            f"loss ({loss}).")


def _grad_evals_line(summary: dict[str, Any]) -> str:
    """Gradient evaluations per full run; whether they are the same for every arm."""
    per_run = summary["grad_evals_per_run"]
    budgets = [a["budget"] for a in summary["arms"].values() if a.get("budget")]
    totals = {b["grad_evals_total"] for b in budgets}
    per_arm = {tuple(b["grad_evals_per_run"]) for b in budgets}
    if summary.get("legacy_records", True):
        return f"- Gradient evaluations per run: {per_run} (identical across arms)."
    if len(per_arm) <= 1 and len(totals) <= 1:
        return (f"- Gradient evaluations per full run: {per_run}; in total per arm: "
                f"{next(iter(totals), 'unknown')} (identical across arms).")
    if len(per_arm) <= 1:
        return _trial_count_line(summary, per_run)
    return (f"- Gradient evaluations per full run: {per_run}. They are NOT the same for every "
            "arm (see \"Budget and chosen setting per arm\"): the arms were not given an "
            "equal budget, so the comparison favours the arm that got more.")


def _trial_count_line(summary: dict[str, Any], per_run: list[int]) -> str:
    """The gradient evaluations per full run are the same for every arm but the totals are
    not: say what differs (the number of trials or seeds; an arm with nothing to search
    has one trial)."""
    arms = {n: a for n, a in summary["arms"].items() if a.get("budget")}
    fixed = [n for n, a in arms.items() if not a.get("searched")]
    searching = {n: a["budget"] for n, a in arms.items() if a.get("searched")}
    line = (f"- Gradient evaluations per full run: {per_run}, the same for every arm; the "
            "totals per arm differ because the number of trials differs")
    counts = {(b["trials_started"], len(b["seeds"]), b["grad_evals_total"])
              for b in searching.values()}
    if fixed and len(counts) <= 1:
        trials = next(iter(counts))[0] if counts else None
        return (line + f": an arm with nothing to search has one ({', '.join(fixed)})"
                + (f", the others {trials} each" if trials is not None else "")
                + " (see \"Budget and chosen setting per arm\"). Every chosen setting was "
                "trained with the same budget per run; only the tuning differs.")
    started = ", ".join(f"{n} {a['budget']['trials_started']}" for n, a in arms.items())
    return (line + f" (trials started: {started}; see \"Budget and chosen setting per "
            "arm\"). The arms that search were NOT given an equal tuning budget, so the "
            "comparison favours the arm that got more.")


def _split_fixed(config: Any) -> str:
    """Which parts of the split are the same for every seed: ``"all"`` (a split column, or
    separate validation and test files with every training row), ``"test"`` (a separate
    test file: validation, or training rows, still drawn per seed) or ``"none"``."""
    data = config.data
    if data.scheme == "split_column":
        return "all"
    if data.scheme == "files":
        return "all" if data.val_source is not None and data.train_size is None else "test"
    return "none"


def _seed_text(config: Any) -> str:
    fixed = _split_fixed(config)
    if fixed == "all":
        return ("the split is fixed (the same for every seed); each seed fixes the initial "
                "weights, minibatch order and integrator noise")
    if fixed == "test":
        return ("the test part is fixed (the same for every seed); each seed fixes the rest "
                "of the split, initial weights, minibatch order and integrator noise")
    return "each seed fixes the split, initial weights, minibatch order and integrator noise"


def _split_caveat(config: Any) -> str:
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


def _arm_lines(config: Any, summary: dict[str, Any]) -> list[str]:
    if summary.get("legacy_records", True):
        lines = ["## Arms", "", "| arm | strength means | grid | parameters it constrained |",
                 "|---|---|---|---|"]
        for name, arm in summary["arms"].items():
            lines.append(f"| {name} | {arm['meaning']} | {arm['grid']} | "
                         f"{', '.join(f'`{p}`' for p in arm['layers']) or '-'} |")
    else:
        lines = ["## Arms", "", "| arm | regulariser | strength means | parameters it "
                 "constrained |", "|---|---|---|---|"]
        for name, arm in summary["arms"].items():
            regulariser = (arm.get("recipe") or {}).get("regulariser", "-")
            lines.append(f"| {name} | {regulariser} | {arm['meaning'] or '-'} | "
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


def _protocol_lines(metrics: StudyMetrics, baseline: str = BASELINE_ARM,
                    legacy: bool = True) -> list[str]:
    larger = metrics.higher_is_better(metrics.selection_base)
    lines = ["## Protocol", "",
             f"- Each arm's setting is the {'grid point' if legacy else 'trial'} with the "
             f"best mean `{metrics.selection}` over seeds ({'larger' if larger else 'smaller'}"
             " is better; validation split only"
             + ("" if legacy else "; full-budget runs only, ties to the earlier trial")
             + ").",
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
              "when none is) over the arms, for each metric separately. The verdict and the "
              "reading of each comparison use the simultaneous interval: with m arms "
              "compared with the baseline, each arm's t interval at level 1 - 0.05/m "
              "(Bonferroni), so that all m intervals of one metric hold together with "
              "probability at least 95% (with one arm it is the plain 95% interval; a second "
              "verdict line on another metric is a second family); the raw 95% interval is shown "
              "beside it. d_z is the mean "
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
    legacy = summary.get("legacy_records", True)
    header = ["arm", "strength" if legacy else "trial"] + [_short(n) for n in columns]
    header += [{"ece_test": "ECE", "mean_row_norm_hidden": "mean row norm",
                "constraint_residual": "residual"}[n] for n in extra]
    lines = ["## Chosen settings on the test split (mean [95% t interval] over seeds)", "",
             "| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    for name, arm in summary["arms"].items():
        if arm["chosen_index"] is None:
            lines.append(f"| {name} | no valid setting (every "
                         f"{'grid point' if legacy else 'trial'} has a failed or "
                         "diverged seed) |"
                         + " |" * (len(header) - 2))
            continue
        c = arm["chosen"]
        cells = [name, f"{arm['chosen_strength']:g}" if legacy else str(arm["chosen_index"])]
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


def report_markdown(config: Any, summary: dict[str, Any], description: str,
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
    lines += _scope_lines(summary, n_seeds)
    lines += _setup_lines(config, summary, description, metrics)
    lines += _arm_lines(config, summary)
    baseline = summary.get("baseline", BASELINE_ARM)
    lines += _budget_lines(summary)
    lines += _protocol_lines(metrics, baseline, summary.get("legacy_records", True))
    lines += _validation_lines(summary, metrics)
    lines += [""] + _chosen_table(summary, metrics)
    lines += ["", f"## Paired comparison against {baseline}", "",
              f"Differences are arm minus {baseline} per seed (chosen settings); 95% t "
              "interval (scipy.stats.t) for each arm alone, and the 95% simultaneous "
              "interval over the arms compared (Bonferroni: each at level 1 - 0.05/m for m "
              "arms; the reading and the verdict use it), two-sided Wilcoxon signed-rank p "
              "(scipy.stats.wilcoxon) raw and Holm-adjusted over the arms (per metric), "
              "Cohen's d_z, and the smallest difference detectable with 80% power (see "
              "Protocol).", "",
              "| arm | metric | mean difference [95% CI] | simultaneous 95% CI (Bonferroni) "
              "| Wilcoxon p | Holm p | d_z | detectable (80% power) | reading |",
              "|---|---|---|---|---|---|---|---|---|"]
    for name, comps in summary["comparisons"].items():
        for metric, comp in comps.items():
            lines.append(
                f"| {name} | {metric} | {_num(comp['mean_difference'])} "
                f"[{_num(comp['ci_low'])}, {_num(comp['ci_high'])}] | "
                f"{_simultaneous_cell(comp)} | {_num(comp['p_wilcoxon'], 3)} | "
                f"{_num(comp.get('p_holm'), 3)} | "
                f"{_num(comp.get('d_z'), 2)} | {_num(comp.get('detectable_difference'))} | "
                f"{_reading(name, metric, comp, metrics, baseline)} |")
    if not summary["comparisons"]:
        lines.append("| - | - | - | - | - | - | - | - | no comparison possible |")
    if summary.get("power_notes"):
        lines += [""] + [f"- {note['line']}" for note in summary["power_notes"]]
    lines += ensemble_lines(summary["ensembles"])
    lines += _audit_lines(config, summary["audit"], summary)
    lines += _caveat_lines(config, summary, metrics, n_seeds)
    lines += _file_lines(summary, plots)
    return "\n".join(lines) + "\n"


def _simultaneous_cell(comp: dict) -> str:
    """``[low, high] (m arms)``: the Bonferroni interval of the paired table."""
    if "ci_low_adjusted" not in comp:
        return "n/a"
    low, high, m = adjusted_interval(comp)
    return f"[{_num(low)}, {_num(high)}] ({m} arm{'s' if m != 1 else ''})"


def _scope_lines(summary: dict[str, Any], n_seeds: int) -> list[str]:
    """What the verdicts do and do not show, right under them."""
    searched = [a["budget"]["trials_started"] for a in summary["arms"].values()
                if a.get("budget") and a.get("searched")]
    full = sorted({a["budget"]["trials"] for a in summary["arms"].values()
                   if a.get("budget") and a.get("searched")})
    fixed = [n for n, a in summary["arms"].items() if a.get("budget") and not a.get("searched")]
    counts = sorted(set(searched))
    if not counts:
        tuned = "no arm searched any setting"
    elif len(counts) == 1:
        tuned = (f"each arm that searches its settings tuned with {counts[0]} "
                 f"trial{'s' if counts[0] != 1 else ''}")
    else:
        tuned = (f"arms tuned with {counts[0]} to {counts[-1]} trials: NOT the same number "
                 "for every arm")
    if counts and full != counts:
        tuned += (f" (successive halving: {' to '.join(map(str, (full[0], full[-1])))} "
                  "trained in full)" if len(full) > 1 else
                  f" (successive halving: {full[0]} trained in full)")
    if fixed and counts:
        tuned += f"; {', '.join(fixed)}: nothing searched, one setting"
    return [f"What this shows: a tuned comparison ({tuned}; choices made on the validation "
            f"split) at this training budget, on this data, with this model and these "
            f"{n_seeds} seeds. It is not a general claim that one regulariser or optimiser "
            "is better: another budget, data set, model or search space can change the "
            "ranking, and \"cannot tell apart\" means this study could not separate the "
            "arms, not that they are equal.", ""]


def _setting_text(settings: dict[str, Any]) -> str:
    return ", ".join(f"{k} {float(v):g}" for k, v in sorted(settings.items())) or "-"


def _budget_lines(summary: dict[str, Any]) -> list[str]:
    """The budget table (trials, seeds, gradient evaluations) and chosen setting per arm,
    the halving paragraph and the edge lines."""
    lines = ["## Budget and chosen setting per arm", "",
             "| arm | optimiser | regulariser | trials | seeds | gradient evaluations per "
             "run | in total | searched | chosen setting |",
             "|---|---|---|---|---|---|---|---|---|"]
    for name, arm in summary["arms"].items():
        budget, recipe = arm.get("budget"), arm.get("recipe")
        if budget is None or recipe is None:
            lines.append(f"| {name} | - | - | 0 | - | - | - | - | no runs |")
            continue
        trials = str(budget["trials"])
        if budget["trials_started"] != budget["trials"]:
            trials = f"{budget['trials_started']} ({budget['trials']} in full)"
        per_run = ", ".join(map(str, budget["grad_evals_per_run"])) or "unknown"
        total = budget["grad_evals_total"]
        groups = f" ({len(recipe['groups'])} layer groups)" if recipe["groups"] else ""
        chosen = ("none valid" if arm["chosen_index"] is None else
                  f"trial {arm['chosen_index']}: {_setting_text(arm['chosen_settings'])}")
        lines.append(f"| {name} | {recipe['optimiser']}{groups} | {recipe['regulariser']} | "
                     f"{trials} | {len(budget['seeds'])} | {per_run} | "
                     f"{'unknown' if total is None else total} | "
                     f"{', '.join(arm['searched']) or '-'} | {chosen} |")
    lines.append("")
    halving = [(name, arm["budget"]) for name, arm in summary["arms"].items()
               if arm.get("budget") and arm["budget"]["halving"]]
    if halving:
        lines += ["Successive halving was used: every trial was first trained for a fraction "
                  "of the budget and only the better trials (by the same validation metric, "
                  "mean over seeds) were trained in full; the dropped trials' rung runs are "
                  "in results.csv (`budget_fraction` < 1) but never chosen. Per arm:", ""]
        for name, budget in halving:
            rungs = "; ".join(f"{r['dropped']} of {r['trials']} trials dropped after "
                              f"{r['fraction']:g} of the budget" for r in budget["halving"])
            lines.append(f"- {name}: {rungs}.")
        lines.append("")
    edges = [(name, e) for name, arm in summary["arms"].items() for e in arm.get("edges", [])]
    if edges:
        lines += ["Chosen at the edge of what was searched (the smallest or largest value "
                  "tried for that setting in that arm):", ""]
        lines += [f"- {name}: {e['key']} = {e['value']:g}, the {e['side']} of the values "
                  f"tried ({e['low']:g} to {e['high']:g})"
                  + (" (the validation means of the values tried are equal: the setting "
                     "made no difference)" if e.get("tied") else "") + "."
                  for name, e in edges]
        lines += ["", "The best value may lie outside the range searched: widen the range of "
                  "these settings (or say why not) before drawing conclusions. With a few "
                  "trials per arm some trial always holds the smallest and the largest value "
                  "of each setting, so a flag says where a wider search could help, not that "
                  "it would.", ""]
    return lines


def _validation_lines(summary: dict[str, Any], metrics: StudyMetrics) -> list[str]:
    """The validation means the choice was made from: per grid point (studies made before
    recipes), else one row per trial with its settings."""
    if summary.get("legacy_records", True):
        lines = ["## Validation means per setting (used for the choice)", "",
                 f"| arm | grid | mean {metrics.selection} per grid point | chosen |",
                 "|---|---|---|---|"]
        for name, arm in summary["arms"].items():
            means = ", ".join(_num(m) for m in arm["validation_means"])
            chosen = ("none valid" if arm["chosen_index"] is None
                      else f"{arm['chosen_strength']:g}")
            lines.append(f"| {name} | {arm['grid']} | {means} | {chosen} |")
        return lines
    lines = ["## Validation means per trial (used for the choice)", "",
             "Full-budget trials only; n/a: a seed failed or diverged (not eligible).", "",
             f"| arm | trial | settings | mean {metrics.selection} | chosen |",
             "|---|---|---|---|---|"]
    for name, arm in summary["arms"].items():
        for trial, settings, mean in zip(arm["trials"], arm["trial_settings"],
                                         arm["validation_means"]):
            mark = "yes" if trial == arm["chosen_index"] else ""
            lines.append(f"| {name} | {trial} | {_setting_text(settings)} | {_num(mean)} | "
                         f"{mark} |")
    return lines


def _in_study_order(config: Any, summary: dict[str, Any]) -> dict[str, Any]:
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


def _caveat_lines(config: Any, summary: dict[str, Any], metrics: StudyMetrics,
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
             "- Holm's adjustment corrects over the arms compared, and so do the "
             "simultaneous (Bonferroni) intervals the verdict reads, for each metric "
             "separately; nothing corrects over the several metrics, so read one metric (the "
             "headline) as the main result.",
             "- One data set, one model and one training budget: the ranking may change with "
             "any of them. " + _search_caveat(summary),
             f"- {_split_caveat(config)}"]
    regularisers = {(a.get("recipe") or {}).get("regulariser", name)
                    for name, a in summary["arms"].items()}
    if "max_norm" in regularisers:
        lines.append("- The max-norm arm clips after each optimiser step (the common "
                     "practice); the constraint arms are held on their sets inside the "
                     "integrator (RATTLE).")
    lines += ["- Test metrics exist for every run in results.csv; only the chosen settings' "
              "test metrics are quoted here, and nothing was chosen with them.", ""]
    edges = sorted({name for name, arm in summary["arms"].items()
                    if any(not e.get("tied") for e in arm.get("edges", []))},
                   key=list(summary["arms"]).index)
    if edges:
        lines += ["- Chosen at the edge of what was searched: " + ", ".join(edges) + " (see "
                  "\"Budget and chosen setting per arm\"). The best setting may lie outside "
                  "the range searched; widen it before drawing conclusions.", ""]
    scanned = [name for name, arm in summary["arms"].items()
               if len({float(t["temperature"]) for t in arm.get("trial_settings", [])
                       if "temperature" in t}) > 1]
    if scanned:
        lines += [f"- Temperature scan ({', '.join(scanned)}: `selection_vs_temperature.png`): "
                  "the validation means of the full-budget trials against their temperature. "
                  "With a few trials, few seeds and other settings varying between trials, "
                  "it shows where to look, not that a range of temperatures helps.", ""]
    if summary["runs"]["ok"] < summary["runs"]["total"]:
        lines += ["- Some runs failed or diverged (NaN metrics in results.csv); settings with "
                  "a failed seed were not eligible for selection.", ""]
    return lines


def _search_caveat(summary: dict[str, Any]) -> str:
    if summary.get("legacy_records", True):
        return "Each grid is small; a better strength may lie outside it."
    return ("Each arm was tuned with a few trials over its own search space; a better "
            "setting may lie between the points tried or outside the ranges, and an arm "
            "whose space suits this budget better is favoured.")


def _file_lines(summary: dict[str, Any], plots: list[str]) -> list[str]:
    lines = ["## Files", "",
             "- `results.csv`: one row per run (arm, trial and seed, with the trial's "
             "settings, optimiser and regulariser; `chosen` flags the selected settings; "
             "`budget_fraction` < 1 marks a successive-halving rung run); `summary.json`: "
             "the numbers in this report; `runs/`: one record per run with its per-epoch "
             "history and audit summary; `audits/`: one audit per run; "
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


def _any_temperature(config: Any, summary: dict[str, Any]) -> bool:
    """Whether any run trained at a temperature above 0 (the budget's, before recipes)."""
    if summary.get("legacy_records", True):
        return config.budget.temperature > 0
    return any(float(t.get("temperature", 0.0)) > 0 for a in summary["arms"].values()
               for t in a.get("tried", []))


def _audit_lines(config: Any, audit: dict[str, Any], summary: dict[str, Any]) -> list[str]:
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
    if _any_temperature(config, summary):
        lines[-1] += (" A kinetic alarm says a run's momenta were not at the temperature "
                      "asked, not that the constraints failed; which way they missed it "
                      "matters:")
        lines += [""] + _kinetic_lines(audit)
    return lines


#: What a kinetic alarm above / below the target's interval means.
TOO_HOT = ("the momenta ran hotter than asked, from minibatch gradient noise (small "
           "batches) or too large a step")
TOO_COLD = ("the momenta ran colder than asked, because the thermostat (the "
            "friction, or an adaptive thermostat's variable) has not equilibrated within the "
            "run's length, or the step is too small for the noise to heat them to the target")


def _kinetic_lines(audit: dict[str, Any]) -> list[str]:
    """Per arm with kinetic alarms: in how many runs, and whether too hot, too cold or both
    (from the recorded alarms: a run record keeps its first 5)."""
    lines = []
    for name, arm in audit.items():
        runs = arm.get("runs_with_kinetic_alarms", 0)
        if not runs:
            continue
        hot, cold = arm.get("kinetic_too_hot", 0), arm.get("kinetic_too_cold", 0)
        ways = [f"too hot in {hot} ({TOO_HOT})" if hot else "",
                f"too cold in {cold} ({TOO_COLD})" if cold else ""]
        ways = [w for w in ways if w]
        direction = ("; ".join(ways) if ways else
                     "direction not recorded (records made before it was)")
        both = " (both directions)" if hot and cold else ""
        lines.append(f"- {name}: kinetic alarms in {runs}/{arm['audited']} runs{both}: "
                     f"{direction}.")
    if not lines:
        lines.append("- No run raised a kinetic alarm. Too hot would mean minibatch gradient "
                     "noise or too large a step; too cold, a thermostat not equilibrated in "
                     "the run's length or too small a step.")
    else:
        lines.append("- (From each run's recorded alarms: a run record keeps its first 5; "
                     "the full list is in its file in `audits/`.)")
    return lines

