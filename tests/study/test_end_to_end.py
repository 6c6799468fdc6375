"""The study end to end on a tiny budget: outputs, consistency, reproducibility, resume."""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from holonomic.cli import main
from holonomic.study import StudyConfigError, parse_config, run_study
from holonomic.study.execution import run_all
from holonomic.study.runner import plan_runs
from tests.study.conftest import counting_execute, interrupt_after

OUTPUTS = ("results.csv", "summary.json", "report.md", "selection_vs_strength.png",
           "gap_vs_strength.png", "learning_curves.png", "weights.png")


def _rows(path: Path) -> list[dict]:
    with open(path / "results.csv", newline="") as handle:
        return list(csv.DictReader(handle))


@pytest.mark.slow
def test_cli_study_outputs_are_complete_and_consistent(tmp_path, tiny_config, tiny_toml):
    study = tmp_path / "tiny.toml"
    study.write_text(tiny_toml)
    out = tmp_path / "out"
    assert main(["study", str(study), "--out", str(out), "--quiet"]) == 0
    for name in OUTPUTS:
        assert (out / name).is_file() and (out / name).stat().st_size > 0, name
    rows = _rows(out)
    n_settings = sum(len(a.grid) for a in tiny_config.arms)
    assert len(rows) == n_settings * len(tiny_config.seeds)
    assert {r["status"] for r in rows} == {"ok"}
    assert any("gap" in c for c in rows[0]) and "seed" in rows[0]
    summary = json.loads((out / "summary.json").read_text())
    report = (out / "report.md").read_text()
    for arm in tiny_config.arms:
        mine = [r for r in rows if r["arm"] == arm.name]
        chosen = {r["setting_index"] for r in mine if r["chosen"] == "true"}
        assert len(chosen) == 1
        # the choice is the best mean validation accuracy, recomputed from the CSV
        means = [np.mean([float(r["val_accuracy"]) for r in mine
                          if r["setting_index"] == str(i)]) for i in range(len(arm.grid))]
        assert chosen == {str(int(np.argmax(means)))}
        picked = [r for r in mine if r["chosen"] == "true"]
        test_mean = float(np.mean([float(r["test_accuracy"]) for r in picked]))
        entry = summary["arms"][arm.name]["chosen"]["test_accuracy"]
        assert entry["mean"] == pytest.approx(test_mean, rel=1e-12)
        assert f"{test_mean:.4f} [{entry['ci_low']:.4f}, {entry['ci_high']:.4f}]" in report
        if arm.name != "weight_decay":
            base = [float(r["gap_accuracy"]) for r in rows
                    if r["arm"] == "weight_decay" and r["chosen"] == "true"]
            diff = np.mean([float(r["gap_accuracy"]) for r in picked]) - np.mean(base)
            comp = summary["comparisons"][arm.name]["gap_accuracy"]
            assert comp["mean_difference"] == pytest.approx(diff, abs=1e-12)
            assert f"{diff:.4f}" in report
            # the verdict at the top, recomputed from the CSV (scipy.stats.t interval)
            base = np.array([float(r["test_accuracy"]) for r in rows
                             if r["arm"] == "weight_decay" and r["chosen"] == "true"])
            d = np.array([float(r["test_accuracy"]) for r in picked]) - base
            low = high = d.mean()
            # no spread (equal up to roundoff): no interval, so no verdict either way
            spread = d.std(ddof=1) > 1e-12 * max(1.0, abs(d.mean()))
            m = len(tiny_config.arms) - 1  # arms compared: the verdict's simultaneous
            if spread:                       # (Bonferroni) interval, level 1 - 0.05 / m
                low, high = stats.t.interval(1 - 0.05 / m, len(d) - 1, loc=d.mean(),
                                             scale=d.std(ddof=1) / np.sqrt(len(d)))
            reading = ("cannot tell apart" if not spread or low <= 0 <= high else
                       "better" if d.mean() > 0 else "worse")
            note = "" if spread else ("; all 2 paired differences equal: no spread to build "
                                      "an interval from")
            verdict = (f"- {arm.name} vs weight_decay, test accuracy: {reading} "
                       f"({d.mean():+.3f} [{low:+.3f}, {high:+.3f}] 95% simultaneous "
                       f"over {m} arms, Bonferroni, 2 seeds{note})")
            assert verdict in report.split("## Set-up")[0]
    assert "never used to choose" in report and "0.5" in report  # Wilcoxon floor, 2 seeds
    assert "Training rows per run: 64." in report and "all the rest" not in report


@pytest.mark.slow
def test_same_study_twice_identical_and_resume_matches(tmp_path, tiny_config, tiny_doc):
    first = tmp_path / "first"
    run_study(tiny_config, first, progress=False, plots=False)
    second = tmp_path / "second"
    run_study(tiny_config, second, workers=2, progress=False, plots=False)
    reference = (first / "results.csv").read_text()
    assert (second / "results.csv").read_text() == reference

    resumed = tmp_path / "resumed"
    calls = interrupt_after(tiny_config, resumed, 5)
    assert sorted(p.stem for p in (resumed / "runs").glob("*.json")) == sorted(calls)
    # each finished run's weights are saved before its record (the record commits the run)
    assert sorted(p.stem for p in (resumed / "runs").glob("*.pt")) == sorted(calls)
    assert sorted(p.name for p in (resumed / "runs").iterdir()) == sorted(
        f"{key}{suffix}" for key in calls for suffix in (".json", ".pt"))
    # a temporary left by a process killed mid-write (pid 2**22 + 1 is not running)
    stale = resumed / "runs" / f".{calls[0]}.json.{2 ** 22 + 1}.tmp"
    stale.write_text("{half a rec")
    trained, counting = counting_execute()
    records = run_all(tiny_config, resumed, progress=False, execute=counting)
    assert not stale.exists()
    assert len(trained) == len(plan_runs(tiny_config)) - 5 and not set(trained) & set(calls)
    run_study(tiny_config, resumed, progress=False, plots=False)
    assert (resumed / "results.csv").read_text() == reference
    assert len(records) == len(plan_runs(tiny_config))

    # a grown grid reuses the runs it has (keys name the strength, not the position)
    tiny_doc["arms"]["fixed_norm"]["grid"] = [0.5, 1.0]
    for arm in ("weight_decay", "max_norm", "orthonormal"):
        tiny_doc["arms"][arm]["grid"] = tiny_doc["arms"][arm]["grid"][:2]
    trained.clear()
    run_all(parse_config(tiny_doc), resumed, progress=False, execute=counting)
    assert sorted(trained) == ["fixed_norm-1.0-s0", "fixed_norm-1.0-s1"]
    # a changed budget is refused rather than mixed in
    tiny_doc["budget"]["epochs"] = 4
    with pytest.raises(StudyConfigError, match="different data, model or budget"):
        run_all(parse_config(tiny_doc), resumed, progress=False, execute=counting)


@pytest.mark.slow
def test_killed_process_leaves_no_partial_files_and_resumes(tmp_path, tiny_toml):
    study = tmp_path / "tiny.toml"
    study.write_text(tiny_toml)
    out = tmp_path / "out"
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    proc = subprocess.Popen([sys.executable, "-m", "holonomic", "study", str(study), "--out",
                             str(out), "--quiet"], env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        runs = list((out / "runs").glob("*.json")) if (out / "runs").is_dir() else []
        if len(runs) >= 3 or proc.poll() is not None:
            break
        time.sleep(0.05)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    for path in (out / "runs").glob("*.json"):
        json.loads(path.read_text())  # every stored record is complete
    assert main(["study", str(study), "--out", str(out), "--quiet"]) == 0
    assert not list(out.rglob(".*.tmp*"))
    assert len(_rows(out)) == 18
