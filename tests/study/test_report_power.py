"""Issue 14, statistics users can act on: a named baseline arm, Holm-adjusted p-values,
d_z, and power figures (detectable difference, seeds needed for ``study.min_effect``) in
summary.json and report.md, from invented run records (:mod:`tests.study.fabricate`)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from holonomic.study import parse_config
from holonomic.study.config import StudyConfigError
from holonomic.study.report import build_summary, select_settings, write_outputs
from holonomic.study.runner import RunSpec
from holonomic.study.stats import detectable_difference, holm_adjust, seeds_needed
from tests.study.conftest import tiny_document
from tests.study.fabricate import fabricate


def _config(**study):
    doc = tiny_document()
    doc["study"]["seeds"] = 5
    doc["study"].update(study)
    return parse_config(doc)


def _error(doc) -> str:
    with pytest.raises(StudyConfigError) as info:
        parse_config(doc)
    return str(info.value)


def test_baseline_key_defaults_and_validates():
    assert _config().baseline == "weight_decay" and _config().min_effect is None
    assert _config(baseline="none").baseline == "none"
    assert _config(min_effect=0.01).min_effect == 0.01
    doc = tiny_document()
    doc["study"]["baseline"] = "dropout"
    message = _error(doc)
    assert "'study.baseline'" in message and "none, weight_decay, max_norm" in message
    # an arm name the study does not list: the key and the study's arms
    doc = tiny_document()
    del doc["arms"]["max_norm"]
    doc["study"]["baseline"] = "max_norm"
    message = _error(doc)
    assert "'study.baseline' = 'max_norm' is not an arm of this study" in message
    assert "none, weight_decay, fixed_norm, orthonormal" in message
    # the baseline arm is required, weight decay is not once another baseline is named
    doc = tiny_document()
    del doc["arms"]["weight_decay"]
    message = _error(doc)
    assert "'arms.weight_decay' is missing" in message and "'study.baseline'" in message
    doc["study"]["baseline"] = "none"
    assert parse_config(doc).baseline == "none"
    for bad in (0, -0.01, "0.01", float("inf")):
        doc = tiny_document()
        doc["study"]["min_effect"] = bad
        assert "'study.min_effect'" in _error(doc)


def _values(records, config, summary, arm, metric):
    chosen = summary["arms"][arm]
    return np.array([records[RunSpec(arm, chosen["chosen_index"], chosen["chosen_strength"],
                                     s).key]["metrics"][metric] for s in config.seeds])


def test_named_baseline_is_compared_seed_by_seed(tmp_path):
    config = _config(baseline="none")
    records = fabricate(config, effects={"fixed_norm": 0.05}, noise=0.01)
    summary = write_outputs(config, tmp_path, records, "invented", plots=False)
    report = (tmp_path / "report.md").read_text()
    assert summary["baseline"] == "none" and "none" not in summary["comparisons"]
    assert set(summary["comparisons"]) == {"weight_decay", "max_norm", "fixed_norm",
                                           "orthonormal"}
    d = (_values(records, config, summary, "fixed_norm", "test_accuracy")
         - _values(records, config, summary, "none", "test_accuracy"))
    comp = summary["comparisons"]["fixed_norm"]["test_accuracy"]
    assert comp["differences"] == pytest.approx(list(d), abs=1e-12)
    assert "fixed_norm vs none, test accuracy:" in report
    assert "## Paired comparison against none" in report
    assert "weight_decay vs none, test accuracy:" in report


def test_holm_effect_size_and_power_in_summary_and_report(tmp_path):
    config = _config(min_effect=0.02)
    records = fabricate(config, effects={"fixed_norm": 0.05, "max_norm": 0.001}, noise=0.01)
    summary = write_outputs(config, tmp_path, records, "invented", plots=False)
    saved = json.loads((tmp_path / "summary.json").read_text())
    report = (tmp_path / "report.md").read_text()
    comps = summary["comparisons"]
    arms = list(comps)
    for metric in comps["fixed_norm"]:
        raw = [comps[a][metric]["p_wilcoxon"] for a in arms]
        np.testing.assert_allclose([comps[a][metric]["p_holm"] for a in arms],
                                   holm_adjust(raw), rtol=1e-12)
    head = {a: comps[a]["test_accuracy"] for a in arms}
    for arm, comp in head.items():
        d = np.array(comp["differences"])
        assert comp["d_z"] == pytest.approx(d.mean() / d.std(ddof=1), rel=1e-9)
        assert comp["detectable_difference"] == pytest.approx(
            detectable_difference(d.std(ddof=1), len(d)), rel=1e-9)
        assert comp["seeds_needed"] == seeds_needed(0.02, d.std(ddof=1))
        assert comp["min_effect"] == 0.02
        assert saved["comparisons"][arm]["test_accuracy"]["p_holm"] == pytest.approx(
            comp["p_holm"])
    # max_norm differs by about 0.001 with noise 0.01 over 5 seeds: too small to detect
    notes = {n["arm"]: n for n in summary["power_notes"]}
    assert "max_norm" in notes and "fixed_norm" not in notes
    mn = head["max_norm"]
    assert abs(mn["mean_difference"]) < mn["detectable_difference"]
    needed = mn["seeds_needed"]
    expected = ("the study was too small to detect a difference of this size "
                f"({mn['mean_difference']:+.3f}): it could detect about "
                f"{mn['detectable_difference']:.3f} with 5 seeds; "
                + (f"about {needed} seeds would be needed to detect 0.02" if needed else
                   "more than 1000 seeds would be needed to detect 0.02"))
    assert expected in notes["max_norm"]["line"] and expected in report
    assert saved["power_notes"][0]["line"] == summary["power_notes"][0]["line"]
    # the table's new columns, and the protocol's reading of them
    header = next(line for line in report.splitlines() if line.startswith("| arm | metric |"))
    assert "| Wilcoxon p | Holm p | d_z | detectable (80% power) | reading |" in header
    row = next(line for line in report.splitlines()
               if line.startswith("| max_norm | test_accuracy |"))
    assert f"| {mn['p_holm']:.3f} | {mn['d_z']:.2f} | {mn['detectable_difference']:.4f} |" in row
    assert "family-wise error rate" in report and "over the arms" in report
    assert "observed sd" in report and "rough" in report
    assert summary["protocol"]["min_effect"] == 0.02


def test_no_seeds_needed_without_min_effect(tmp_path):
    config = _config()
    records = fabricate(config, effects={"max_norm": 0.001}, noise=0.01)
    summary = build_summary(config, records, select_settings(config, records))
    comp = summary["comparisons"]["max_norm"]["test_accuracy"]
    assert "seeds_needed" not in comp and math.isfinite(comp["detectable_difference"])
    line = next(n["line"] for n in summary["power_notes"] if n["arm"] == "max_norm")
    assert line.endswith(" with 5 seeds.") and "would be needed" not in line


def test_no_too_small_note_when_the_interval_excludes_zero():
    from holonomic.study.summary import _add_power

    # invented comparison: observed 0.01 below the detectable 0.02, but the interval
    # [0.002, 0.018] excludes 0, so the study did detect it: no "too small" note
    comp = {"n": 5, "mean_difference": 0.01, "ci_low": 0.002, "ci_high": 0.018,
            "includes_zero": False, "sd_difference": 0.006, "detectable_difference": 0.02}
    assert _add_power({"max_norm": {"test_accuracy": comp}}, "test_accuracy", None,
                      "weight_decay") == []
    comp["includes_zero"] = True
    assert len(_add_power({"max_norm": {"test_accuracy": comp}}, "test_accuracy", None,
                          "weight_decay")) == 1
