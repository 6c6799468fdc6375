"""Ensemble phase of a study: config errors, outputs end to end, resume, refusal to mix."""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from holonomic.study import StudyConfigError, parse_config, run_study
from holonomic.study.ensemble import ENSEMBLE_METRICS, TRACED
from holonomic.study.execution import run_all
from holonomic.study.runner import plan_runs

from tests.study.conftest import counting_execute, interrupt_after, tiny_document

ENSEMBLE = {"temperature": 1.0, "samples": 6, "every": 2, "burn_in": 3}
ENSEMBLE_ARMS = ("weight_decay", "fixed_norm")


def _doc() -> dict:
    """The tiny study cut to three arms, two of them with an ensemble phase."""
    doc = tiny_document()
    doc["arms"] = {name: doc["arms"][name] for name in ("none",) + ENSEMBLE_ARMS}
    for name in ENSEMBLE_ARMS:
        doc["arms"][name]["ensemble"] = dict(ENSEMBLE)
    return doc


def _error(doc) -> str:
    with pytest.raises(StudyConfigError) as info:
        parse_config(doc)
    return str(info.value)


@pytest.mark.parametrize("key,value,needle", [
    ("temperature", 0.0, "'arms.fixed_norm.ensemble.temperature' must be > 0.0"),
    ("temperature", "warm", "'arms.fixed_norm.ensemble.temperature' must be a number"),
    ("samples", 3, "'arms.fixed_norm.ensemble.samples' must be >= 4"),
    ("every", 0, "'arms.fixed_norm.ensemble.every' must be >= 1"),
    ("burn_in", -1, "'arms.fixed_norm.ensemble.burn_in' must be >= 0"),
    ("sampler", "hmc", "must be one of adaptive, langevin"),
    ("step", -0.1, "'arms.fixed_norm.ensemble.step' must be > 0.0"),
    ("thin", 2, "unknown key 'arms.fixed_norm.ensemble.thin'"),
])
def test_bad_ensemble_keys_name_key_and_allowed(key, value, needle):
    doc = _doc()
    doc["arms"]["fixed_norm"]["ensemble"][key] = value
    message = _error(doc)
    assert needle in message
    if key == "thin":
        assert "temperature, samples, every, burn_in, sampler" in message


def test_ensemble_table_shape_and_required_keys():
    doc = _doc()
    doc["arms"]["fixed_norm"]["ensemble"] = 5
    assert "'arms.fixed_norm.ensemble' must be a table" in _error(doc)
    doc["arms"]["fixed_norm"]["ensemble"] = {"samples": 8}
    assert "'arms.fixed_norm.ensemble.temperature' is missing" in _error(doc)
    doc["arms"]["fixed_norm"]["ensemble"] = {"temperature": 1.0}
    assert "'arms.fixed_norm.ensemble.samples' is missing" in _error(doc)
    doc = _doc()
    doc["arms"]["none"]["ensemble"] = dict(ENSEMBLE)  # the arm without a grid may sample too
    config = parse_config(doc)
    assert config.arm("none").ensemble.samples == ENSEMBLE["samples"]
    assert set(config.to_dict()["ensembles"]) == {"none", *ENSEMBLE_ARMS}
    assert "ensembles" not in parse_config(tiny_document()).to_dict()
    doc["budget"]["momentum"] = 0.0  # infinite friction: the adaptive sampler needs one
    assert "'arms.none.ensemble.friction' is needed" in _error(doc)
    doc["arms"]["none"]["ensemble"]["friction"] = 2.0
    doc["arms"]["weight_decay"]["ensemble"]["sampler"] = "langevin"
    doc["arms"]["fixed_norm"]["ensemble"]["sampler"] = "langevin"
    parse_config(doc)


@pytest.fixture(scope="module")
def finished(tmp_path_factory) -> tuple[Path, dict]:
    out = tmp_path_factory.mktemp("ensemble") / "out"
    summary = run_study(parse_config(_doc()), out, progress=False, plots=False)
    return out, summary


def _records(out: Path) -> dict[str, dict]:
    return {p.stem: json.loads(p.read_text()) for p in (out / "runs").glob("*.json")}


def test_outputs_and_report_equal_the_run_records(finished):
    out, summary = finished
    records = _records(out)
    report = (out / "report.md").read_text()
    assert "## Ensemble phase" in report and "What the ensemble numbers do and do not show" in report
    with open(out / "results.csv", newline="") as handle:
        rows = list(csv.DictReader(handle))
    for row in rows:
        record = records[f"{row['arm']}-{float(row['strength'])!r}-s{row['seed']}"]
        if row["arm"] == "none":
            assert record["ensemble"] is None and row["ensemble_status"] == ""
            continue
        phase = record["ensemble"]
        assert phase["status"] == "ok" == row["ensemble_status"]
        assert phase["samples"] == ENSEMBLE["samples"]
        assert phase["steps_done"] == ENSEMBLE["burn_in"] + ENSEMBLE["samples"] * ENSEMBLE["every"]
        assert all(len(phase["traces"][name]) == ENSEMBLE["samples"] for name in TRACED)
        # the single network is the trained one: same test accuracy as the training record
        assert phase["single"]["test"]["accuracy"] == pytest.approx(
            record["metrics"]["test_accuracy"], abs=1e-12)
        for who in ("single", "ensemble"):
            for metric in ENSEMBLE_METRICS:
                assert float(row[f"{who}_test_{metric}"]) == pytest.approx(
                    phase[who]["test"][metric], rel=1e-12)
        if row["arm"] == "fixed_norm":  # the sampler kept the rows on their spheres
            assert phase["constraint_residual"] < 1e-5
    for arm in ENSEMBLE_ARMS:
        entry = summary["ensembles"][arm]
        picked = [records[f"{arm}-{entry['strength']!r}-s{seed}"]["ensemble"] for seed in (0, 1)]
        assert f"### {arm} (strength {entry['strength']:g})" in report
        for metric in ENSEMBLE_METRICS:
            single = np.array([p["single"]["test"][metric] for p in picked])
            ensemble = np.array([p["ensemble"]["test"][metric] for p in picked])
            d = ensemble - single
            # paired 95% t interval recomputed with scipy.stats.t
            low, high = stats.t.interval(0.95, len(d) - 1, loc=d.mean(),
                                         scale=d.std(ddof=1) / math.sqrt(len(d)))
            got = entry["metrics"][metric]
            assert got["ensemble_mean"] == pytest.approx(ensemble.mean(), rel=1e-12)
            assert got["difference"]["ci_low"] == pytest.approx(low, rel=1e-9)
            assert got["difference"]["ci_high"] == pytest.approx(high, rel=1e-9)
            assert (f"| {metric} | {single.mean():.4f} | {ensemble.mean():.4f} | "
                    f"{d.mean():.4f} [{low:.4f}, {high:.4f}] |") in report
        for name in TRACED:
            mixing = entry["mixing"][name]
            assert mixing["chains"] == 2 and mixing["draws_per_chain"] == ENSEMBLE["samples"]
            assert f"| {name} | " in report
        # 6 draws per chain cannot reach 100 effective samples per chain: always warned
        assert any("bulk ESS" in w for name in TRACED for w in entry["mixing"][name]["warnings"])
    assert "- Warning: " in report
    assert "ensembles" in json.loads((out / "summary.json").read_text())


def test_resume_is_unaffected_and_changed_ensemble_is_refused(finished, tmp_path):
    reference, _ = finished
    config = parse_config(_doc())
    resumed = tmp_path / "resumed"
    calls = interrupt_after(config, resumed, 5)
    trained, counting = counting_execute()
    run_all(config, resumed, progress=False, execute=counting)
    assert len(trained) == len(plan_runs(config)) - 5 and not set(trained) & set(calls)
    run_study(config, resumed, progress=False, plots=False)
    assert (resumed / "results.csv").read_text() == (reference / "results.csv").read_text()

    doc = _doc()
    doc["arms"]["fixed_norm"]["ensemble"]["temperature"] = 0.5
    with pytest.raises(StudyConfigError, match=r"ensemble settings.*arms\.fixed_norm\.ensemble"):
        run_all(parse_config(doc), resumed, progress=False)
