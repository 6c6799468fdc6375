"""The report's ensemble section: single network against ensemble, and mixing diagnostics.

Reads the ensemble phases stored in run records (:mod:`holonomic.study.ensemble`) at each
arm's chosen setting; see that module for what the numbers do and do not show. Generic over
the task: the metric names come from the records (``record["ensemble"]["single"]["test"]``)
and the traced observables from ``record["ensemble"]["traces"]``; whether larger is better
comes from :data:`METRIC_DIRECTIONS`.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

import numpy as np

from holonomic.sampling import mixing_diagnostics, rank_normalized_split_rhat
from holonomic.study.stats import comparison_note, paired_comparison

__all__ = ["METRIC_DIRECTIONS", "ensemble_lines", "ensemble_metric_names", "ensemble_summary"]

#: Whether a larger value of an ensemble metric is better (None: neither, e.g. the
#: predictive entropy or spread, which are descriptions, not scores). Names not listed
#: are treated as neither.
METRIC_DIRECTIONS: dict[str, bool | None] = {
    "accuracy": True, "balanced_accuracy": True, "macro_f1": True, "roc_auc": True,
    "rmse": False, "r2": True, "mae": False, "nll": False, "ece": False, "loss": False,
    "entropy": None, "sd": None, "mean_sd": None, "predictive_sd": None,
}


def _phase(record: Any) -> dict | None:
    """A record's ensemble phase as a dict (``record``: a dict or a RunRecord)."""
    if isinstance(record, dict):
        return record.get("ensemble") or None
    return None if record.ensemble is None else record.ensemble.to_dict()


def _phases(records: Mapping[str, Any]) -> list[dict]:
    return [p for p in map(_phase, records.values()) if p]


def ensemble_metric_names(records: Mapping[str, Any]) -> tuple[str, ...]:
    """Metric names of the ensemble phases in ``records`` (the keys of
    ``record["ensemble"]["single"]["test"]``) in the order of :data:`METRIC_DIRECTIONS`,
    then any other name sorted."""
    seen: set[str] = set()
    for phase in _phases(records):
        for who in ("single", "ensemble"):
            seen.update(phase[who]["test"])
    return tuple(_in_order(seen))



def _diagnostics(traces: dict[str, np.ndarray]) -> dict[str, Any]:
    """Mixing diagnostics per observable, seeds as chains, plus single-chain split R-hat."""
    out: dict[str, Any] = {}
    for name, chains in traces.items():
        entry: dict[str, Any] = {"chains": int(chains.shape[0]),
                                 "draws_per_chain": int(chains.shape[1])}
        try:
            summary = mixing_diagnostics({name: chains}, warn=False)[name]
            entry.update(rhat=summary.rhat, ess=summary.ess, tau=summary.tau,
                         warnings=list(summary.warnings))
        except ValueError as exc:  # constant or too short traces
            entry.update(rhat=math.nan, ess=math.nan, tau=math.nan,
                         warnings=[f"{name}: no diagnostics ({exc})"])
        singles = []
        for row in chains:
            try:
                singles.append(rank_normalized_split_rhat(row))
            except ValueError:
                singles.append(math.nan)
        entry["single_chain_rhat_max"] = float(max(singles)) if singles else math.nan
        out[name] = entry
    return out


def ensemble_summary(chosen: Mapping[str, Any]) -> dict[str, Any]:
    """Per arm with an ensemble phase, at its chosen trial: single vs ensemble on the test
    split (paired by seed: mean difference ensemble - single with a 95% t interval) and the
    mixing diagnostics of the traced observables over the seeds' chains.

    ``chosen``: arm -> :class:`holonomic.study.selection.Selection` (its ``runs``, typed
    run records, are read; arms without a choice or without a phase are left out).
    """
    out: dict[str, Any] = {}
    for arm, sel in chosen.items():
        if sel.index is None or not sel.runs or sel.runs[0].ensemble is None:
            continue
        seeds = [r.seed for r in sel.runs]
        runs = [_phase(r) for r in sel.runs]
        ok = [(seed, r) for seed, r in zip(seeds, runs) if r["status"] == "ok"]
        entry: dict[str, Any] = {
            "task": sel.runs[0].task,
            "strength": sel.strength,
            "trial": sel.index,
            "chosen_settings": dict(sel.settings),
            "searched": list(sel.searched),
            "settings": runs[0]["settings"],
            "sampler": runs[0]["sampler"],
            "seeds_ok": [seed for seed, _ in ok],
            "seeds_failed": {str(seed): r["message"] for seed, r in zip(seeds, runs)
                             if r["status"] != "ok"},
            "metrics": {},
            "mixing": {},
        }
        if len(ok) >= 2:
            names = ensemble_metric_names({str(s): {"ensemble": r} for s, r in ok})
            for metric in names:
                single = np.array([r["single"]["test"].get(metric, math.nan) for _, r in ok])
                ensemble = np.array([r["ensemble"]["test"].get(metric, math.nan)
                                     for _, r in ok])
                comp = paired_comparison(ensemble, single)
                entry["metrics"][metric] = {"single_mean": float(single.mean()),
                                            "ensemble_mean": float(ensemble.mean()),
                                            "larger_is_better": METRIC_DIRECTIONS.get(metric),
                                            "difference": comp.to_dict()}
            traced = [name for name in ok[0][1]["traces"]
                      if all(len(r["traces"].get(name, [])) == len(ok[0][1]["traces"][name])
                             for _, r in ok)]
            traces = {name: np.array([r["traces"][name] for _, r in ok]) for name in traced}
            entry["mixing"] = _diagnostics(traces)
        out[arm] = entry
    return out


def _num(x: float, digits: int = 4) -> str:
    return "n/a" if x is None or not math.isfinite(x) else f"{x:.{digits}f}"


def _in_order(names) -> list[str]:
    """Metric names in the order of :data:`METRIC_DIRECTIONS`, others sorted after them."""
    known = [m for m in METRIC_DIRECTIONS if m in names]
    return known + sorted(set(names).difference(known))


def _reading(metric: str, comp: dict) -> str:
    if not (math.isfinite(comp["mean_difference"]) and math.isfinite(comp["ci_low"])
            and math.isfinite(comp["ci_high"])):
        return "no reading (non-finite values)"
    note = comparison_note(comp)
    if note:
        return f"cannot tell apart ({note})"
    if comp["includes_zero"]:
        return "cannot tell apart (interval includes 0)"
    higher = comp["mean_difference"] > 0
    larger_better = METRIC_DIRECTIONS.get(metric)
    if larger_better is None:
        return f"ensemble {'higher' if higher else 'lower'} (neither is better by itself)"
    good = higher == larger_better
    return f"ensemble {'higher' if higher else 'lower'} ({'better' if good else 'worse'})"


def ensemble_lines(summary: dict[str, Any]) -> list[str]:
    """The report's ensemble section (empty when no arm has an ensemble)."""
    if not summary:
        return []
    regression = any(e.get("task") == "regression" for e in summary.values())
    loss = ("training loss (half the squared error of standardised targets: a Gaussian "
            "likelihood)" if regression else "training cross-entropy")
    average = ("averages the samples' predictions (the predictive mean; the spread of the "
               "samples' predictions adds to the predictive variance)" if regression else
               "averages the predictive probabilities of the samples")
    lines = ["", "## Ensemble phase (sampling after training)", "",
             "For the arms below every run continued after training as a sampler from its "
             f"trained weights, at temperature T on the tempered posterior of N x mean {loss} "
             "(+ N x the arm's weight decay as a Gaussian prior; the "
             "constraint set itself for constraint arms), N = training-set size, mini-batches "
             f"as in training. The ensemble {average}; the single network is the trained "
             "network the sampler started from. "
             "Test split, chosen setting, mean over seeds; difference = ensemble - single, "
             "paired by seed, with a 95% t interval (scipy.stats.t). Lower is better for "
             "NLL, ECE, RMSE and MAE, higher for accuracy-type metrics and R^2; entropy and "
             "predictive spread describe the predictions and are neither."]
    for name, entry in summary.items():
        s = entry["settings"]
        which = (f"strength {entry['strength']:g}"
                 if set(entry.get("searched", ())) <= {"strength"}
                 else f"trial {entry['trial']}")
        lines += ["", f"### {name} ({which})", "",
                  f"- Sampler `{entry['sampler']}`, T = {s['temperature']:g}, {s['samples']} "
                  f"samples every {s['every']} steps after a burn-in of {s['burn_in']} steps; "
                  f"step {s['step']:.4g}, friction {s['friction']:.4g} (units of the force "
                  "N x gradient).",
                  f"- Seeds with a finished sampling phase: {len(entry['seeds_ok'])}"
                  f"/{len(entry['seeds_ok']) + len(entry['seeds_failed'])}."]
        for seed, message in entry["seeds_failed"].items():
            lines.append(f"- Seed {seed}: {message}")
        if not entry["metrics"]:
            lines.append("- Fewer than 2 seeds finished: no comparison.")
            continue
        lines += ["", "| metric | single | ensemble | ensemble - single [95% CI] | reading |",
                  "|---|---|---|---|---|"]
        for metric in _in_order(entry["metrics"]):
            m = entry["metrics"][metric]
            d = m["difference"]
            lines.append(f"| {metric} | {_num(m['single_mean'])} | {_num(m['ensemble_mean'])} "
                         f"| {_num(d['mean_difference'])} [{_num(d['ci_low'])}, "
                         f"{_num(d['ci_high'])}] | {_reading(metric, d)} |")
        lines += ["", "Mixing of traced observables (one chain per seed):", "",
                  "| observable | R-hat over seeds | max single-chain split R-hat | bulk ESS "
                  "(all chains) | autocorrelation time (samples) |", "|---|---|---|---|---|"]
        warned = []
        for obs, mix in entry["mixing"].items():
            lines.append(f"| {obs} | {_num(mix['rhat'], 3)} | "
                         f"{_num(mix['single_chain_rhat_max'], 3)} | {_num(mix['ess'], 1)} | "
                         f"{_num(mix['tau'], 2)} |")
            warned += mix["warnings"]
        if warned:
            lines += [""] + [f"- Warning: {w}" for w in warned]
    lines += ["", "What the ensemble numbers do and do not show:", "",
              "- The samples come from an approximate posterior: finite step size, mini-batch "
              "gradient noise (the adaptive sampler corrects its average effect on the kinetic "
              "temperature only; plain Langevin runs hotter than T), short chains started at "
              "the trained weights.",
              "- The temperature is a choice: T = 1 is the Bayesian posterior of this model and "
              "prior, T < 1 a cold posterior; other temperatures give other ensembles.",
              "- Chains may not have mixed: R-hat above 1.01 or a small ESS means the ensemble "
              "averages around each seed's starting mode, not over the posterior. R-hat over "
              "seeds also compares chains on different data splits (different posteriors), so "
              "it can exceed 1.01 even for chains that mixed; the single-chain split R-hat "
              "compares the halves of each chain. The sampling phase is not audited; its end "
              "constraint residual is in each run record.",
              "- For the unconstrained parameters of the arms without weight decay (biases, "
              "output layer, and every layer of `none`) the prior is flat, so T = 1 does not "
              "define a proper posterior for them; the sampler's draws are still well "
              "defined. Max-norm clipping after each step is not a sampler of a known law.",
              "- One data set and one model; the ensemble's gain (or loss) may change with "
              "the temperature, the chain length and the data. Ensemble and single network are "
              "compared at the setting chosen for the single network."]
    return lines
