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
from tests.study.fabricate import fabricate

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
