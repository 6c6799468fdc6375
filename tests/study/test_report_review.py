"""Fixes from a user-style review of the report: the verdict reads a simultaneous
(Bonferroni) interval over the arms compared and carries what undermines it (edges, audit
alarms); the audit note says whether runs were too hot or too cold; the strength plot's
reference line; the budget wording; edge flags on settings that made no difference."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from holonomic.study.report import write_outputs
from holonomic.study.stats import bonferroni_interval
from tests.study.conftest import tiny_document
from holonomic.study import parse_config
from tests.study.fabricate import fabricate, fabricate_trials

#: Paired differences whose raw 95% t interval excludes 0 (t = 3.7 on 4 df) but whose
#: simultaneous interval over 4 arms (t quantile 0.99375 on 4 df, about 4.6) does not.
_D = (0.01, 0.02, 0.005, 0.015, 0.03)


def _config(seeds=5):
    doc = tiny_document()
    doc["study"]["seeds"] = seeds
    return parse_config(doc)


@pytest.mark.parametrize("m", [1, 2, 4, 7])
def test_bonferroni_interval_by_hand(m):
    d = np.array(_D)
    low, high, level = bonferroni_interval(d, m)
    # Bonferroni simultaneous intervals (from memory: e.g. Miller, Simultaneous Statistical
    # Inference, ch. 1): each of the m intervals at level 1 - alpha/m, i.e. the t quantile
    # 1 - alpha / (2 m) with n - 1 degrees of freedom (scipy.stats.t.ppf).
    half = stats.t.ppf(1 - 0.05 / (2 * m), len(d) - 1) * d.std(ddof=1) / math.sqrt(len(d))
    assert level == pytest.approx(1 - 0.05 / m)
    assert (low, high) == pytest.approx((d.mean() - half, d.mean() + half), rel=1e-12)
    if m == 1:  # the plain 95% interval
        assert (low, high) == pytest.approx(stats.t.interval(
            0.95, len(d) - 1, loc=d.mean(), scale=d.std(ddof=1) / math.sqrt(len(d))))


def test_bonferroni_interval_without_spread():
    assert bonferroni_interval([0.1, 0.1, 0.1], 3)[:2] == (pytest.approx(0.1),
                                                           pytest.approx(0.1))


def test_verdict_reads_the_simultaneous_interval(tmp_path):
    config = _config()

    def quality(arm, index, seed):
        return 0.8 + (_D[seed] if arm == "fixed_norm" else 0.0)

    summary = write_outputs(config, tmp_path, fabricate(config, quality=quality),
                            "invented", plots=False)
    comp = summary["comparisons"]["fixed_norm"]["test_accuracy"]
    m = len(summary["comparisons"])
    assert m == 4 and comp["arms_compared"] == 4
    assert comp["ci_low"] > 0  # the raw interval alone would call it better
    assert comp["ci_low_adjusted"] < 0 < comp["ci_high_adjusted"]
    assert comp["confidence_adjusted"] == pytest.approx(1 - 0.05 / 4)
    verdict = next(v for v in summary["verdict"] if v["arm"] == "fixed_norm")
    assert verdict["reading"] == "cannot tell apart"
    assert (verdict["ci_low"], verdict["ci_high"]) == (comp["ci_low_adjusted"],
                                                       comp["ci_high_adjusted"])
    assert "95% simultaneous over 4 arms, Bonferroni" in verdict["line"]
    report = (tmp_path / "report.md").read_text()
    assert f"- {verdict['line']}" in report
    row = next(line for line in report.splitlines()
               if line.startswith("| fixed_norm | test_accuracy |"))
    assert (f"[{comp['ci_low_adjusted']:.4f}, {comp['ci_high_adjusted']:.4f}] (4 arms)"
            in row and "simultaneous interval includes 0" in row)
    assert "Bonferroni" in report.split("## Protocol")[1].split("##")[0]
    # the power note follows the verdict: "cannot tell apart" with a difference below what the
    # study could detect says the study was too small
    assert abs(comp["mean_difference"]) < comp["detectable_difference"]
    notes = [str(n) for n in summary["power_notes"]]
    assert any("fixed_norm vs" in n and "too small" in n for n in notes), notes


# --- 2, 3: the verdict carries edges and audit alarms; the audit note's direction -------

def _kinetic_message(value, low=0.9e-3, high=1.1e-3, target=1e-3):
    """A kinetic alarm as holonomic.audit.monitor words it."""
    return (f"kinetic temperature of 0.weight is {value:.6g} at step 100, outside "
            f"[{low:.6g}, {high:.6g}] (target {target:g} +- 5 sd, 64 tangent dof, z = "
            f"{(value - target) / 2e-5:.3g}); the dynamics are not at the target temperature "
            "(step too large, gradient noise, or not yet equilibrated: raise burn_in)")


def _audit(messages):
    return {"every": 50, "records": 6, "residual_max": 1e-7, "alarm_count": len(messages),
            "alarms": {"kinetic 0.weight": len(messages)} if messages else {},
            "first_alarms": list(messages)}


def _alarmed_study(tmp_path):
    from tests.study.test_report_trials import _records, _study
    records = _records()
    for record in records.values():
        if record["arm"] == "hot":  # every run too cold; trial 3's runs also too hot
            cold = [_kinetic_message(3e-10)]
            record["hooks"] = {"audit": _audit(
                cold + ([_kinetic_message(5e-2)] if record["trial"] == 3 else []))}
        else:
            record["hooks"] = {"audit": _audit([])}
    summary = write_outputs(_study(), tmp_path, records, "invented", plots=False)
    return summary, (tmp_path / "report.md").read_text()


def test_verdict_line_carries_edges_and_audit_alarms(tmp_path):
    summary, report = _alarmed_study(tmp_path)
    verdict = {v["arm"]: v for v in summary["verdict"]}
    # adamw chose its smallest strength, the baseline sgd_wd its largest; hot no edge
    assert verdict["adamw"]["line"].endswith(
        "(chosen at the edge of its search: strength) "
        "(sgd_wd chosen at the edge of its search: strength)")
    assert verdict["adamw"]["edges"] == ["strength"] and verdict["hot"]["edges"] == []
    assert verdict["hot"]["line"].endswith(
        "(sgd_wd chosen at the edge of its search: strength) "
        "(audit: the kinetic temperature missed its target in 12/12 runs)")
    assert verdict["hot"]["kinetic_alarms"] == {"hot": [12, 12]}
    assert "audit" not in verdict["adamw"]["line"]
    assert f"- {verdict['hot']['line']}" in report


def test_audit_note_says_too_hot_or_too_cold(tmp_path):
    summary, report = _alarmed_study(tmp_path)
    audit = summary["audit"]["hot"]
    assert (audit["runs_with_kinetic_alarms"], audit["kinetic_too_cold"],
            audit["kinetic_too_hot"]) == (12, 12, 3)
    note = next(line for line in report.splitlines() if line.startswith("- hot: kinetic"))
    assert "12/12 runs (both directions)" in note
    assert "too hot in 3 (the momenta ran hotter than asked" in note
    assert "too cold in 12 (the momenta ran colder than asked" in note
    assert "has not equilibrated" in note and "gradient noise" in note
    # no longer says every alarm is a run hotter than asked
    assert "they say the run is hotter than asked" not in report


def test_audit_note_names_only_the_direction_seen(tmp_path):
    from tests.study.test_report_trials import _records, _study
    records = _records()
    for record in records.values():
        record["hooks"] = {"audit": _audit([_kinetic_message(3e-10)] if record["arm"] == "hot"
                                           else [])}
    write_outputs(_study(), tmp_path, records, "invented", plots=False)
    note = next(line for line in (tmp_path / "report.md").read_text().splitlines()
                if line.startswith("- hot: kinetic"))
    assert "too cold in 12" in note and "too hot" not in note and "both" not in note


# --- 5: the budget wording ---------------------------------------------------------------

def test_halving_trials_are_all_started_some_in_full(tmp_path):
    from tests.study.test_report_trials import _records, _study
    records = _records(halving={"fraction": 0.5, "keep": {"sgd_wd": [1, 3]}})
    write_outputs(_study(), tmp_path, records, "invented", plots=False)
    report = (tmp_path / "report.md").read_text()
    assert "| sgd_wd | sgd | weight_decay | 4 (2 in full) | 3 |" in report
    assert "of 4 started" not in report


def test_an_arm_with_nothing_to_search_is_the_difference_in_budget(tmp_path):
    from tests.study.test_report_trials import ARMS, _study
    arms = dict(ARMS, plain={"regulariser": "none", "optimiser": "sgd",
                             "trials": [{"lr": 0.05, "momentum": 0.9}]})
    records = fabricate_trials(arms, seeds=(0, 1, 2))
    write_outputs(_study(arms=arms), tmp_path, records, "invented", plots=False)
    line = next(line for line in (tmp_path / "report.md").read_text().splitlines()
                if line.startswith("- Gradient evaluations per full run"))
    assert "the same for every arm" in line and "NOT the same" not in line
    assert "the number of trials differs" in line
    assert "an arm with nothing to search has one (plain), the others 4 each" in line


def test_unequal_trial_counts_among_searching_arms_are_said(tmp_path):
    from tests.study.test_report_trials import ARMS, _study
    arms = dict(ARMS, adamw=dict(ARMS["adamw"], trials=ARMS["adamw"]["trials"][:2]))
    records = fabricate_trials(arms, seeds=(0, 1, 2))
    write_outputs(_study(arms=arms), tmp_path, records, "invented", plots=False)
    line = next(line for line in (tmp_path / "report.md").read_text().splitlines()
                if line.startswith("- Gradient evaluations per full run"))
    assert "trials started: sgd_wd 4, adamw 2, hot 4" in line
    assert "NOT given an equal tuning budget" in line


# --- 4: selection_vs_strength.png -----------------------------------------------------

def test_strength_plot_reference_only_with_the_same_optimiser(tmp_path):
    pytest.importorskip("matplotlib")
    import matplotlib.pyplot as plt

    from holonomic.study.plots import build_figures
    from holonomic.study.selection import select_trials
    from tests.study.test_report_trials import ARMS, _study
    arms = dict(ARMS, none={"regulariser": "none", "optimiser": "adamw",
                            "trials": [{"lr": 1e-3}, {"lr": 1e-2}]})
    records = fabricate_trials(arms, seeds=(0, 1, 2))
    chosen = select_trials(records, "val_accuracy", True, list(arms))
    figures = build_figures(_study(arms=arms), records, chosen)
    try:
        fig = {name: f for name, _, f in figures}["selection_vs_strength.png"]
        panels = {ax.get_title(): ax for ax in fig.axes}
        # hot tries one strength only (0.5): no panel; none is the reference, not a panel
        assert set(panels) == {"sgd_wd", "adamw"}
        dashed = {title: [line.get_label() for line in ax.get_lines()
                          if line.get_linestyle() == "--"] for title, ax in panels.items()}
        # "none" trains with AdamW: its line belongs on adamw's panel only, not sgd_wd's
        assert dashed == {"adamw": ["none"], "sgd_wd": []}
    finally:
        for _, _, f in figures:
            plt.close(f)


def test_no_strength_plot_when_no_arm_varies_its_strength():
    pytest.importorskip("matplotlib")
    import matplotlib.pyplot as plt

    from holonomic.study.plots import build_figures
    from holonomic.study.selection import select_trials
    from tests.study.test_report_trials import ARMS, _study
    arms = {"hot": ARMS["hot"], "sgd_wd": dict(ARMS["sgd_wd"], trials=[
        dict(t, strength=1e-3) for t in ARMS["sgd_wd"]["trials"]])}
    records = fabricate_trials(arms, seeds=(0, 1, 2))
    figures = build_figures(_study(arms=arms), records,
                            select_trials(records, "val_accuracy", True, list(arms)))
    try:
        names = [name for name, _, _ in figures]
        assert "selection_vs_strength.png" not in names and "learning_curves.png" in names
    finally:
        for _, _, f in figures:
            plt.close(f)


# --- 6: an edge on a setting that made no difference ------------------------------------

def test_edge_with_equal_means_at_both_ends_says_the_setting_made_no_difference(tmp_path):
    from tests.study.test_report_trials import ARMS, _study
    arms = {"sgd_wd": ARMS["sgd_wd"],
            "clip": {"regulariser": "max_norm", "optimiser": "sgd",
                     "trials": [{"lr": 0.1, "momentum": 0.9, "strength": s}
                                for s in (1.0, 2.0)]}}

    def quality(arm, trial, settings, seed):  # the clip never binds: strength is inert
        return 0.7 + 0.01 * seed + (0.01 * trial if arm == "sgd_wd" else 0.0)

    records = fabricate_trials(arms, seeds=(0, 1, 2), quality=quality)
    summary = write_outputs(_study(arms=arms), tmp_path, records, "invented", plots=False)
    report = (tmp_path / "report.md").read_text()
    clip = summary["arms"]["clip"]
    assert clip["chosen_index"] == 0 and clip["edges"][0]["tied"] is True
    assert ("- clip: strength = 1, the smallest of the values tried (1 to 2) (the validation "
            "means of the values tried are equal: the setting made no difference)." in report)
    # sgd_wd's edge is a real one (trial 3, the best, has the smallest strength)
    assert [e["tied"] for e in summary["arms"]["sgd_wd"]["edges"]] == [False, False]
    assert "made no difference" not in next(
        line for line in report.splitlines() if line.startswith("- sgd_wd: strength"))
    # the caveats and the verdict do not call an inert setting an edge
    caveat = next(line for line in report.splitlines()
                  if line.startswith("- Chosen at the edge of what was searched"))
    assert "sgd_wd" in caveat and "clip" not in caveat
    assert "clip vs sgd_wd" in summary["verdict"][0]["line"]
    assert "(chosen at the edge of its search" not in summary["verdict"][0]["line"]


def test_tied_edge_needs_a_trial_at_each_end():
    # two trials at the low end with equal means and none at the high end (e.g. dropped by
    # halving) say nothing about whether the setting mattered: not tied
    from types import SimpleNamespace

    from holonomic.study.selection import Edge, tie_edges

    edge = Edge("strength", 0.5, "smallest", 0.5, 2.0)
    trials = [SimpleNamespace(settings={"strength": 0.5, "lr": lr}) for lr in (0.01, 0.1)]
    assert tie_edges([edge], trials, [0.9, 0.9])[0].tied is False
    trials.append(SimpleNamespace(settings={"strength": 2.0, "lr": 0.05}))
    assert tie_edges([edge], trials, [0.9, 0.9, 0.9])[0].tied is True
    assert tie_edges([edge], trials, [0.9, 0.9, 0.8])[0].tied is False
