"""The report of recipe studies (issue 14) from invented records with trials
(:func:`tests.study.fabricate.fabricate_trials`): selection among trials, failed and rung
runs, edge flags, each arm's budget, successive halving, the temperature scan and
results.csv. The numbers are made up, so each test knows what the report must say."""

from __future__ import annotations

import csv
import dataclasses
import io
import math

import numpy as np
import pytest

from holonomic.study import parse_config
from holonomic.study.config import ArmConfig
from holonomic.study.records import as_records
from holonomic.study.report import write_outputs
from holonomic.study.selection import Rung, arm_budget, edge_flags, group_trials, select_trials
from holonomic.study.summary import SETTING_COLUMNS
from tests.study.conftest import tiny_document
from tests.study.fabricate import fabricate_trials

SEEDS = (0, 1, 2)
#: lr in the middle, strength at the largest value of the four trials of sgd_wd.
SGD_TRIALS = [{"lr": 0.01, "momentum": 0.9, "strength": 1e-4},
              {"lr": 0.03, "momentum": 0.9, "strength": 1e-2},
              {"lr": 0.1, "momentum": 0.9, "strength": 1e-3},
              {"lr": 0.3, "momentum": 0.9, "strength": 1e-5}]
ADAMW_TRIALS = [{"lr": 1e-3, "strength": 1e-2}, {"lr": 3e-3, "strength": 1e-1},
                {"lr": 1e-2, "strength": 1e-3}, {"lr": 3e-2, "strength": 1e-2}]
HOT_TRIALS = [{"lr": 0.05, "momentum": 0.9, "temperature": t, "strength": 0.5}
              for t in (0.0, 1e-4, 1e-3, 1e-2)]
ARMS = {
    "sgd_wd": {"regulariser": "weight_decay", "optimiser": "sgd", "trials": SGD_TRIALS},
    "adamw": {"regulariser": "decoupled_weight_decay", "optimiser": "adamw",
              "trials": ADAMW_TRIALS},
    "hot": {"regulariser": "fixed_norm", "optimiser": "langevin", "trials": HOT_TRIALS},
}


def _quality(best: dict[str, int], noise: float = 0.004):
    """Quality: 0.75 for each arm's ``best`` trial, 0.70 for the others, with a fixed
    per-(arm, trial, seed) wobble."""
    def quality(arm, trial, settings, seed):
        wobble = noise * math.sin(1.0 + 3 * seed + 7 * trial + len(arm))
        return (0.75 if trial == best[arm] else 0.70) + wobble
    return quality


BEST = {"sgd_wd": 1, "adamw": 2, "hot": 2}


def _records(**kwargs):
    kwargs.setdefault("quality", _quality(BEST))
    return fabricate_trials(ARMS, seeds=SEEDS, **kwargs)


def _arm(name: str, spec: dict | None = None) -> ArmConfig:
    """An arm of the study file with this name (and recipe, where the config has one)."""
    spec = spec or {}
    fields = {f.name for f in dataclasses.fields(ArmConfig)}
    given = {"grid": (0.0,), "regulariser": spec.get("regulariser", name),
             "optimiser": spec.get("optimiser", "langevin")}
    return ArmConfig(name=name, **{k: v for k, v in given.items() if k in fields})


def _study(baseline: str = "sgd_wd", arms: dict | None = None):
    """The tiny study with the recipe arms (only names, seeds, baseline and the shared
    budget are read from it by the report)."""
    config = parse_config(tiny_document())
    arms = ARMS if arms is None else arms
    return dataclasses.replace(config, seeds=SEEDS, baseline=baseline,
                               arms=tuple(_arm(name, spec) for name, spec in arms.items()))


def _mean(records, arm, trial, metric="val_accuracy"):
    return np.mean([r["metrics"][metric] for r in records.values()
                    if (r["arm"], r["trial"], r["budget_fraction"]) == (arm, trial, 1.0)])


# --- selection -------------------------------------------------------------------------

def test_each_arm_chooses_its_best_trial_by_mean_validation():
    records = _records()
    chosen = select_trials(records, "val_accuracy", True, list(ARMS))
    assert list(chosen) == list(ARMS)
    for arm, sel in chosen.items():
        means = [_mean(records, arm, i) for i in range(4)]
        assert sel.index == BEST[arm] == int(np.argmax(means))
        np.testing.assert_allclose(sel.validation_means, means, rtol=1e-12)
        assert sel.trials == (0, 1, 2, 3)
        assert sel.settings == ARMS[arm]["trials"][BEST[arm]]
        assert sel.seeds == SEEDS and len(sel.runs) == 3
    assert chosen["adamw"].recipe.optimiser == "adamw"
    # the searched keys are those that vary (momentum is fixed for sgd_wd)
    assert chosen["sgd_wd"].searched == ("lr", "strength")
    assert chosen["hot"].searched == ("temperature",)
    # smaller is better: the worst trial by accuracy wins on a loss
    loss = select_trials(records, "val_loss", False, list(ARMS))
    assert loss["sgd_wd"].index == int(np.argmin([_mean(records, "sgd_wd", i, "val_loss")
                                                  for i in range(4)]))


def test_a_trial_with_a_nan_or_missing_run_is_not_eligible():
    records = _records()
    key = next(k for k, r in records.items()
               if (r["arm"], r["trial"], r["seed"]) == ("sgd_wd", BEST["sgd_wd"], 1))
    records[key]["status"] = "diverged"
    records[key]["metrics"] = {m: math.nan for m in records[key]["metrics"]}
    # adamw's best trial lacks a seed: a mean over fewer seeds is not comparable
    del records[next(k for k, r in records.items()
                     if (r["arm"], r["trial"], r["seed"]) == ("adamw", BEST["adamw"], 0))]
    chosen = select_trials(records, "val_accuracy", True)
    assert math.isnan(chosen["sgd_wd"].validation_means[BEST["sgd_wd"]])
    assert math.isnan(chosen["adamw"].validation_means[BEST["adamw"]])
    for arm in ("sgd_wd", "adamw"):
        means = chosen[arm].validation_means
        assert chosen[arm].index == int(np.nanargmax(means)) != BEST[arm]
    assert chosen["hot"].index == BEST["hot"]
    # a whole arm without a valid trial: no choice, and the report says why
    for record in records.values():
        if record["arm"] == "hot":
            record["status"] = "failed"
    assert select_trials(records, "val_accuracy", True)["hot"].index is None


def test_rung_runs_are_never_chosen_and_halving_is_counted():
    keep = {"sgd_wd": [1, 3], "adamw": [0, 2], "hot": [1, 2]}

    def quality(arm, trial, settings, seed):  # the dropped trial 0 looks best at the rung
        return 0.9 if (trial == 0 and arm == "sgd_wd") else _quality(BEST)(arm, trial,
                                                                            settings, seed)
    records = _records(quality=quality, halving={"fraction": 0.25, "keep": keep})
    full = group_trials(records)
    assert sorted(full["sgd_wd"]) == [1, 3]
    chosen = select_trials(records, "val_accuracy", True)
    assert chosen["sgd_wd"].index == 1 and chosen["sgd_wd"].trials == (1, 3)
    assert all(r.full for r in chosen["sgd_wd"].runs)
    budget = chosen["sgd_wd"].budget
    # 4 trials x 3 seeds at round(0.25 * 6) = 2 gradient evaluations, 2 x 3 full at 6
    assert (budget.trials, budget.trials_started, budget.seeds) == (2, 4, SEEDS)
    assert budget.grad_evals_per_run == (6,) and budget.grad_evals_total == 4 * 3 * 2 + 2 * 3 * 6
    assert budget.rungs == (Rung(0.25, 4, 2),)
    # every trial tried counts for the edge flag, the dropped ones included
    assert {s["lr"] for s in chosen["sgd_wd"].tried} == {0.01, 0.03, 0.1, 0.3}


def test_arm_budget_with_two_rungs_and_unknown_counts():
    runs = as_records(_records(halving={"fraction": 0.5, "keep": {"hot": [2]}}))
    hot = [r for r in runs.values() if r.arm == "hot"]
    quarter = [dataclasses.replace(r, budget_fraction=0.25, key=r.key + "q") for r in hot
               if r.budget_fraction == 0.5]
    budget = arm_budget(hot + quarter)
    assert budget.rungs == (Rung(0.25, 4, 0), Rung(0.5, 4, 3))
    unknown = arm_budget([dataclasses.replace(hot[0], grad_evals=None)] + hot[1:])
    assert unknown.grad_evals_total is None


def test_edge_flags_smallest_and_largest_value_tried():
    tried = [{"lr": 0.01, "strength": 1e-4}, {"lr": 0.1, "strength": 1e-2},
             {"lr": 0.3, "strength": 1e-3}]
    edges = edge_flags(tried, {"lr": 0.3, "strength": 1e-3}, ["lr", "strength"])
    assert [(e.key, e.side, e.low, e.high) for e in edges] == [("lr", "largest", 0.01, 0.3)]
    edges = edge_flags(tried, tried[0], ["lr", "strength"])
    assert [(e.key, e.side) for e in edges] == [("lr", "smallest"), ("strength", "smallest")]
    # one value tried: nothing searched, no flag; keys not asked about are not flagged
    assert edge_flags([{"lr": 0.1}, {"lr": 0.1}], {"lr": 0.1}, ["lr"]) == ()
    assert edge_flags(tried, tried[0], ["strength"])[0].key == "strength"


# --- the written report ----------------------------------------------------------------

@pytest.fixture
def written(tmp_path):
    records = _records(halving={"fraction": 0.5,
                                "keep": {"sgd_wd": [1, 3], "adamw": [2, 3], "hot": [0, 2]}})
    summary = write_outputs(_study(), tmp_path, records, "invented records")
    return records, summary, (tmp_path / "report.md").read_text(), tmp_path


def test_report_states_budget_choice_edges_halving_and_scope(written):
    records, summary, report, _ = written
    lines = report.splitlines()
    # the verdict stays at the top, then what it does and does not show
    assert lines[2].startswith("**Verdict**")
    scope = next(line for line in lines if line.startswith("What this shows"))
    assert lines.index(scope) < lines.index("## Set-up")
    assert "tuned comparison" in scope and "not a general claim" in scope
    assert "tuned with 4 trials (successive halving: 2 trained in full)" in scope
    assert "with this model and these 3 seeds" in scope
    # one budget row per arm: optimiser, regulariser, trials, seeds, gradient evaluations
    rows = {line.split(" | ")[0][2:]: line for line in lines
            if line.startswith("| ") and "trial " in line and " in full) " in line}
    assert rows["sgd_wd"] == ("| sgd_wd | sgd | weight_decay | 4 (2 in full) | 3 | 6 | "
                              f"{4 * 3 * 3 + 2 * 3 * 6} | lr, strength | trial 1: lr 0.03, "
                              "momentum 0.9, strength 0.01 |")
    assert "| adamw | adamw | decoupled_weight_decay | 4 (2 in full) | 3 | 6 |" in report
    # halving: said, per arm, with what was dropped after what fraction
    assert "Successive halving was used" in report
    assert "- sgd_wd: 2 of 4 trials dropped after 0.5 of the budget." in report
    assert "- hot: 2 of 4 trials dropped after 0.5 of the budget." in report
    # edge: sgd_wd chose the largest strength tried (lr 0.03 is inside 0.01 .. 0.3)
    assert ("- sgd_wd: strength = 0.01, the largest of the values tried (1e-05 to 0.01)."
            in report)
    assert "- sgd_wd: lr" not in report
    assert "widen the range of these settings" in report
    edges = summary["arms"]["sgd_wd"]["edges"]
    assert [(e["key"], e["side"]) for e in edges] == [("strength", "largest")]
    # the per-trial validation table lists full trials only, the chosen one marked
    assert "| sgd_wd | 1 | lr 0.03, momentum 0.9, strength 0.01 |" in report
    assert not any(line.startswith("| sgd_wd | 0 |") for line in lines)
    assert "equal budget" not in report  # every arm got the same counts
    assert "(identical across arms)" in report
    assert summary["halving"] == {"used": True, "rung_runs": 3 * 4 * 3}


def test_unequal_budgets_are_said(tmp_path):
    records = _records()
    for record in records.values():
        if record["arm"] == "adamw":
            record["grad_evals"] = 12
    write_outputs(_study(), tmp_path, records, "invented", plots=False)
    report = (tmp_path / "report.md").read_text()
    assert "They are NOT the same for every arm" in report
    assert "not given an equal budget" in report


def test_comparisons_pair_the_chosen_trials_by_seed(written):
    records, summary, report, _ = written
    for arm in ("adamw", "hot"):
        ours = [records[k]["metrics"]["test_accuracy"] for k in sorted(
            (k for k, r in records.items() if (r["arm"], r["trial"], r["budget_fraction"])
             == (arm, BEST[arm], 1.0)), key=lambda k: records[k]["seed"])]
        base = [records[k]["metrics"]["test_accuracy"] for k in sorted(
            (k for k, r in records.items() if (r["arm"], r["trial"], r["budget_fraction"])
             == ("sgd_wd", BEST["sgd_wd"], 1.0)), key=lambda k: records[k]["seed"])]
        comp = summary["comparisons"][arm]["test_accuracy"]
        np.testing.assert_allclose(comp["differences"], np.subtract(ours, base), atol=1e-12)
        assert "p_holm" in comp and "detectable_difference" in comp
    assert f"{'adamw'} vs sgd_wd, test accuracy:" in report


def test_results_csv_has_a_row_per_run_with_the_trial_settings(written):
    records, summary, _, out = written
    rows = list(csv.DictReader(io.StringIO((out / "results.csv").read_text())))
    assert len(rows) == len(records)
    header = list(rows[0])
    assert tuple(header[-len(SETTING_COLUMNS):]) == SETTING_COLUMNS
    assert {"lr", "momentum", "temperature", "strength", "optimiser",
            "regulariser"} <= set(header)
    adamw = next(r for r in rows if r["arm"] == "adamw" and r["trial"] == "2"
                 and r["budget_fraction"] == "1.0")
    assert (adamw["lr"], adamw["strength"], adamw["momentum"]) == ("0.01", "0.001", "")
    assert (adamw["optimiser"], adamw["regulariser"]) == ("adamw", "decoupled_weight_decay")
    hot = next(r for r in rows if r["arm"] == "hot" and r["trial"] == "1")
    assert hot["temperature"] == "0.0001"
    # chosen: the full runs of each chosen trial only, never a rung run
    chosen = {(r["arm"], r["trial"], r["budget_fraction"]) for r in rows if r["chosen"] == "true"}
    assert chosen == {(a, str(BEST[a]), "1.0") for a in ARMS}
    assert sum(r["budget_fraction"] == "0.5" for r in rows) == 4 * 3 * 3


# --- plots -----------------------------------------------------------------------------

def test_temperature_scan_is_drawn_listed_and_written(written):
    pytest.importorskip("matplotlib")
    import matplotlib.pyplot as plt

    from holonomic.study.plots import build_figures

    records, summary, report, out = written
    assert (out / "selection_vs_temperature.png").stat().st_size > 0
    assert "- `selection_vs_temperature.png`: temperature scan" in report
    assert "- Temperature scan (hot: `selection_vs_temperature.png`)" in report
    assert "not that a range of temperatures helps" in report
    assert any(p.startswith("selection_vs_temperature.png") for p in summary["plots"])
    config = _study()
    from holonomic.study.report import select_settings

    figures = {name: fig for name, _, fig in build_figures(config, records,
                                                           select_settings(config, records))}
    try:
        axes = figures["selection_vs_temperature.png"].axes
        assert [ax.get_title() for ax in axes] == ["hot"]  # the only arm varying temperature
        ax = axes[0]
        assert ax.get_xscale() == "symlog"  # 0 is among the temperatures
        container = next(c for c in ax.containers if c.get_label() == "hot")
        xs = list(container.lines[0].get_xdata())
        assert xs == [0.0, 1e-3]  # the full trials 0 and 2 (1 and 3 dropped at the rung)
        values = np.array([[records[k]["metrics"]["val_accuracy"] for k in sorted(
            (k for k, r in records.items() if (r["arm"], r["trial"], r["budget_fraction"])
             == ("hot", i, 1.0)), key=lambda k: records[k]["seed"])] for i in (0, 2)])
        np.testing.assert_allclose(container.lines[0].get_ydata(), values.mean(axis=1),
                                   rtol=1e-12)
        se = values.std(axis=1, ddof=1) / np.sqrt(3)
        bars = container.lines[2][0].get_segments()
        np.testing.assert_allclose([seg[1][1] - seg[0][1] for seg in bars], 2 * se,
                                   rtol=1e-9)
        ringed = next(l for l in ax.get_lines() if l.get_label().startswith("chosen"))
        assert list(ringed.get_xdata()) == [1e-3]
        # against strength: one panel per arm with a regulariser whose strength varies
        # (hot tries 0.5 only), x = each trial's strength
        strength = figures["selection_vs_strength.png"].axes
        assert [a.get_title() for a in strength] == ["sgd_wd", "adamw"]
        sgd = next(c for c in strength[0].containers if c.get_label() == "sgd_wd")
        assert sorted(sgd.lines[0].get_xdata()) == [1e-5, 1e-2]  # its two full trials
        assert sgd.lines[0].get_linestyle() == "None"  # lr varies too: points, no line
    finally:
        for fig in figures.values():
            plt.close(fig)


def test_temperature_scan_uses_a_log_axis_when_every_temperature_is_positive(tmp_path):
    pytest.importorskip("matplotlib")
    import matplotlib.pyplot as plt

    from holonomic.study.plots import build_figures
    from holonomic.study.report import select_settings

    arms = {"hot": {"regulariser": "none", "trials": [
        {"lr": 0.05, "temperature": t} for t in (1e-4, 1e-3, 1e-2)]}}
    records = fabricate_trials(arms, seeds=SEEDS)
    config = _study("hot", arms)
    figures = build_figures(config, records, select_settings(config, records))
    try:
        scan = dict((n, f) for n, _, f in figures)["selection_vs_temperature.png"]
        assert scan.axes[0].get_xscale() == "log"
        assert scan.axes[0].containers[0].lines[0].get_linestyle() == "-"  # one setting varies
    finally:
        for _, _, fig in figures:
            plt.close(fig)
    # no arm varies temperature: no scan figure
    cold = {"cold": {"regulariser": "none", "trials": [
        {"lr": lr, "temperature": 0.0} for lr in (0.01, 0.1)]}}
    flat = fabricate_trials(cold, seeds=SEEDS)
    config = _study("cold", cold)
    names = [n for n, _, f in build_figures(config, flat, select_settings(config, flat))]
    plt.close("all")
    assert "selection_vs_temperature.png" not in names


def test_ensemble_section_reads_the_chosen_trials_runs(tmp_path):
    records = _records()
    for record in records.values():
        if record["arm"] == "hot":
            shift = 0.01 * (record["trial"] == BEST["hot"])
            record["ensemble"] = {
                "settings": {"temperature": 1.0, "samples": 4, "every": 2, "burn_in": 3,
                             "sampler": "adaptive", "step": 0.01, "friction": 1.0},
                "sampler": "AdaptiveLangevin",
                "status": "ok", "message": "", "steps_done": 4, "samples": 4,
                "single": {"val": {"accuracy": 0.7}, "test": {"accuracy": 0.7 + shift}},
                "ensemble": {"val": {"accuracy": 0.72},
                             "test": {"accuracy": 0.72 + shift + 0.001 * record["seed"]}},
                "traces": {"train_loss": [0.5 + 0.01 * ((record["seed"] + i) % 3)
                                          for i in range(6)]},
                "constraint_residual": 0.0, "wall_s": 0.0}
    summary = write_outputs(_study(), tmp_path, records, "invented", plots=False)
    assert list(summary["ensembles"]) == ["hot"]
    entry = summary["ensembles"]["hot"]["metrics"]["accuracy"]
    # the chosen trial's phases (shift 0.01), paired by seed: ensemble - single
    assert entry["single_mean"] == pytest.approx(0.71)
    assert entry["difference"]["differences"] == pytest.approx([0.02, 0.021, 0.022])
    assert f"### hot (trial {BEST['hot']})" in (tmp_path / "report.md").read_text()
    rows = list(csv.DictReader(io.StringIO((tmp_path / "results.csv").read_text())))
    assert {r["ensemble_status"] for r in rows if r["arm"] == "hot"} == {"ok"}
    assert {r["ensemble_status"] for r in rows if r["arm"] != "hot"} == {""}


def test_metric_names_come_from_a_finished_run():
    records = _records()
    first = next(iter(records))
    records[first]["status"] = "failed"
    records[first]["metrics"] = {}
    from holonomic.study.selection import read_metrics

    metrics = read_metrics(records)
    assert metrics.selection == "val_accuracy" and "test_accuracy" in metrics.names
    with pytest.raises(ValueError, match="allowed: val_accuracy"):
        read_metrics(records, "val_rmse")
