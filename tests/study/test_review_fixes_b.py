"""Fixes from a user-style review of ``holonomic study`` (issue 13, second batch).

Report tests use invented records (:mod:`tests.study.fabricate`), no training.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from holonomic.study import parse_config
from holonomic.study.ensemble_report import _reading as ensemble_reading
from holonomic.study.report import write_outputs
from holonomic.study.runner import RunSpec
from holonomic.study.stats import paired_comparison
from tests.study.conftest import tiny_document
from tests.study.fabricate import fabricate

#: The review's paired differences: one test row of 171 each, equal up to roundoff.
REVIEW_DIFFERENCES = np.array([-0.005847953216374974, -0.0058479532163735635])


def _config(seeds: int = 2, arms=("none", "weight_decay"), selection: str | None = "keep"):
    doc = tiny_document()
    doc["study"]["seeds"] = seeds
    doc["arms"] = {name: doc["arms"][name] for name in arms}
    config = parse_config(doc)
    return config if selection == "keep" else dataclasses.replace(config, selection=selection)


def _report(config, records, tmp_path):
    summary = write_outputs(config, tmp_path, records, "invented records", plots=False)
    return summary, (tmp_path / "report.md").read_text()


# ---------------------------------------------------------------------------------------
# 1. zero-width intervals are not verdicts

@pytest.mark.parametrize("d", [REVIEW_DIFFERENCES, np.full(3, -0.0058)])
def test_differences_without_spread_do_not_exclude_zero(d):
    comp = paired_comparison(d, np.zeros(len(d)))
    assert comp.zero_spread and comp.includes_zero
    assert comp.ci_low == comp.ci_high == pytest.approx(d.mean())
    as_dict = comp.to_dict()
    assert as_dict["includes_zero"] and as_dict["zero_spread"]
    assert f"all {len(d)} paired differences equal" in as_dict["note"]


def test_ordinary_interval_is_unchanged():
    comp = paired_comparison(np.array([0.1, 0.12, 0.09, 0.11, 0.1]), np.zeros(5))
    assert not comp.zero_spread and not comp.includes_zero and comp.note == ""
    assert comp.ci_low < comp.mean_difference < comp.ci_high
    assert ensemble_reading("accuracy", comp.to_dict()) == "ensemble higher (better)"


def test_report_says_cannot_tell_apart_for_equal_differences(tmp_path):
    config = _config()
    records = fabricate(config)
    # test accuracy: weight_decay 165/171 and 160/171, none one row fewer on each seed
    for spec_seed, right in zip(config.seeds, (165, 160)):
        for arm in config.arms:
            for i, strength in enumerate(arm.grid):
                key = RunSpec(arm.name, i, strength, spec_seed).key
                correct = right - (1 if arm.name == "none" else 0)
                records[key]["metrics"]["test_accuracy"] = correct / 171
    summary, text = _report(config, records, tmp_path)
    (verdict,) = summary["verdict"]
    assert verdict["reading"] == "cannot tell apart", verdict["line"]
    assert "no spread to build an interval from" in verdict["line"]
    assert "worse" not in text.split("## Set-up")[0]
    row = next(line for line in text.splitlines()
               if line.startswith("| none | test_accuracy"))
    assert "cannot tell them apart (all 2 paired differences equal" in row
    comp = summary["comparisons_vs_weight_decay"]["none"]["test_accuracy"]
    assert ensemble_reading("accuracy", comp).startswith("cannot tell apart (all 2 paired")
