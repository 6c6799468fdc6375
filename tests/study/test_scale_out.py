"""Sharded studies (--shard i/n, --report-only) and the audit recorded for every run."""

from __future__ import annotations

import json
import math
import multiprocessing
import os
import time
from pathlib import Path

import pytest

from holonomic.audit import read_audit
from holonomic.cli import main
from holonomic.study import load_config, run_study, storage
from holonomic.study.runner import plan_runs
from holonomic.study.sharding import ShardError, parse_shard, shard_runs

#: The tiny study (conftest) audited every 2 steps: 64 rows / batch 32 x 3 epochs = 6 steps,
#: so each run's audit has records at steps 2, 4 and 6.
AUDIT_EVERY = 2


@pytest.fixture(scope="module")
def study_file(tmp_path_factory) -> Path:
    from tests.study.conftest import TINY_TOML

    path = tmp_path_factory.mktemp("study") / "tiny.toml"
    path.write_text(TINY_TOML + f"\n[audit]\nevery = {AUDIT_EVERY}\n")
    return path


@pytest.fixture(scope="module")
def reference(study_file, tmp_path_factory) -> Path:
    """The unsharded study, run once for this module."""
    out = tmp_path_factory.mktemp("reference")
    run_study(load_config(study_file), out, progress=False, plots=False)
    return out


@pytest.mark.parametrize("text", ["0/1", "2/3", " 1 / 4 "])
def test_parse_shard_accepts_zero_based(text):
    index, count = parse_shard(text)
    assert 0 <= index < count


@pytest.mark.parametrize("text,match", [
    ("3/3", "0-based"), ("4/3", "0 <= i < n"), ("-1/3", "0 <= i < n"), ("0/0", "n >= 1"),
    ("a/b", "must look like i/n"), ("2", "must look like i/n"), ("1/3/4", "must look like"),
    ("1.5/3", "must look like"), ("", "must look like"),
])
def test_bad_shard_values_are_refused(text, match, capsys):
    with pytest.raises(ShardError, match=match):
        parse_shard(text)
    # the command line refuses before reading anything (the file does not exist)
    assert main(["study", "missing.toml", "--out", "unused", f"--shard={text}"]) == 2
    assert match.split()[0] in capsys.readouterr().err
    assert not Path("unused").exists()


def test_report_only_and_shard_together_are_refused(capsys):
    assert main(["study", "missing.toml", "--out", "unused", "--shard", "0/2",
                 "--report-only"]) == 2
    assert "drop --shard" in capsys.readouterr().err


def test_shards_partition_the_plan(tiny_config):
    plan = [s.key for s in plan_runs(tiny_config)]
    for count in (1, 2, 3, 5, len(plan), len(plan) + 2):
        shards = [[s.key for s in shard_runs(plan_runs(tiny_config), i, count)]
                  for i in range(count)]
        flat = [key for shard in shards for key in shard]
        assert sorted(flat) == sorted(plan) and len(flat) == len(set(flat))
        sizes = [len(s) for s in shards]
        assert max(sizes) - min(sizes) <= 1  # round robin: balanced counts


@pytest.mark.slow
def test_three_shards_merge_to_the_unsharded_csv(study_file, reference, tmp_path, capsys):
    config = load_config(study_file)
    plan = [s.key for s in plan_runs(config)]
    out = tmp_path / "sharded"
    base = ["study", str(study_file), "--out", str(out), "--quiet", "--no-plots"]
    for index in (0, 1):
        assert main(base + ["--shard", f"{index}/3"]) == 0
    done = {p.stem for p in (out / "runs").glob("*.json")}
    assert done == {k for i, k in enumerate(plan) if i % 3 != 2}
    assert {p.name[:-len(".jsonl")] for p in (out / "audits").glob("*.jsonl")} == done
    for name in ("results.csv", "summary.json", "report.md"):
        assert not (out / name).exists()  # shards write no shared output

    # merging with a shard missing is refused and names every missing run
    capsys.readouterr()
    assert main(base + ["--report-only"]) == 1
    err = capsys.readouterr().err
    missing = [k for i, k in enumerate(plan) if i % 3 == 2]
    assert f"{len(missing)} of {len(plan)} runs are not finished" in err
    assert all(key in err for key in missing)
    assert not (out / "results.csv").exists()

    # a shard of a different count, or of a different study, is refused
    assert main(base + ["--shard", "2/4"]) == 2
    assert "run as 3 shards" in capsys.readouterr().err
    changed = tmp_path / "changed.toml"
    changed.write_text(study_file.read_text().replace("epochs = 3", "epochs = 4"))
    assert main(["study", str(changed), "--out", str(out), "--quiet", "--shard", "2/3"]) == 2
    assert "different study (differs in: budget, training_fingerprint)" in \
        capsys.readouterr().err
    assert {p.stem for p in (out / "runs").glob("*.json")} == done  # nothing was trained

    assert main(base + ["--shard", "2/3"]) == 0
    assert main(base + ["--report-only"]) == 0
    assert (out / "results.csv").read_text() == (reference / "results.csv").read_text()
    assert not list(out.rglob(".*.tmp*"))


def _claim(out: str, definition: dict, shards: int, barrier, results) -> None:
    barrier.wait()
    try:
        storage.write_study_record(out, definition, shards)
        results.put("ok")
    except storage.StudyRecordMismatch as exc:
        results.put(f"refused: {exc}")


def test_study_record_is_created_once_when_shards_start_together(tmp_path):
    if "fork" not in multiprocessing.get_all_start_methods():
        pytest.skip("needs fork to start the processes at once cheaply")
    context = multiprocessing.get_context("fork")
    definition = {"name": "tiny", "arms": {"fixed_norm": [0.25, 0.5]}, "x": math.nan}
    other = {**definition, "arms": {"fixed_norm": [0.25, 1.0]}}
    for attempt in range(3):
        out = tmp_path / f"out{attempt}"
        out.mkdir()
        barrier, results = context.Barrier(7), context.Queue()
        procs = [context.Process(target=_claim, args=(str(out), definition, 3, barrier, results))
                 for _ in range(6)]
        procs.append(context.Process(target=_claim, args=(str(out), other, 3, barrier, results)))
        for p in procs:
            p.start()
        for p in procs:
            p.join(30)
        outcomes = sorted(results.get(timeout=5) for _ in procs)
        record = storage.loads((out / storage.STUDY_RECORD).read_text())
        winner = record["definition"]["arms"]["fixed_norm"]
        # whoever created the file first, the other definition is refused, never mixed in
        refused = [o for o in outcomes if o.startswith("refused")]
        assert len(refused) == (6 if winner == [0.25, 1.0] else 1), outcomes
        assert all("differs in: arms" in o for o in refused)
        assert record["shards"] == 3
        assert [p.name for p in out.iterdir()] == [storage.STUDY_RECORD]  # no temporaries


def test_foreign_temporaries_are_kept_until_old(tmp_path):
    (tmp_path / "runs").mkdir()
    foreign = tmp_path / "runs" / ".fixed_norm-0.5-s0.json.123-another-machine.tmp"
    local_dead = tmp_path / "runs" / f".fixed_norm-0.5-s1.json.{2 ** 22 + 1}.tmp"
    for path in (foreign, local_dead):
        path.write_text("{")
    assert storage.remove_stale_temporaries(tmp_path) == 1
    assert foreign.exists() and not local_dead.exists()
    old = time.time() - storage.FOREIGN_TEMPORARY_AGE_S - 60
    os.utime(foreign, (old, old))
    assert storage.remove_stale_temporaries(tmp_path) == 1 and not foreign.exists()


@pytest.mark.slow
def test_every_run_has_an_audit_and_the_report_shows_it(study_file, reference):
    config = load_config(study_file)
    steps = [AUDIT_EVERY * (i + 1) for i in range(6 // AUDIT_EVERY)]
    largest: dict[str, float] = {}
    for spec in plan_runs(config):
        record = json.loads((reference / "runs" / f"{spec.key}.json").read_text())
        summary = record["hooks"]["audit"]
        assert summary["file"] == f"audits/{spec.key}.jsonl"
        log = read_audit(reference / summary["file"])
        assert [r["step"] for r in log.records] == steps and summary["last_step"] == steps[-1]
        assert summary["records"] == len(steps) and log.header["every"] == AUDIT_EVERY
        names = {p["name"] for r in log.records for p in r["parameters"]}
        assert names == set(summary["constrained_parameters"])
        if spec.arm in ("fixed_norm", "orthonormal"):
            # two constrained hidden layers, held at roundoff (float32: 100 eps is the
            # audit's tolerance, so a residual alarm would be listed)
            assert len(names) == 2
            values = [p["residual_max"] for r in log.records for p in r["parameters"]]
            assert summary["residual_max"] == max(values) < 100 * 2 ** -23
            assert not any(key.startswith("residual") for key in summary["alarms"])
            largest[spec.arm] = max(largest.get(spec.arm, 0.0), max(values))
        else:
            assert names == set() and summary["residual_max"] is None
    report = (reference / "report.md").read_text()
    assert "## Audit (checks during training)" in report
    assert f"every {AUDIT_EVERY} steps and at its last step" in report
    runs_per_arm = {a.name: len(a.grid) * len(config.seeds) for a in config.arms}
    for arm, n in runs_per_arm.items():
        row = next(line for line in report.splitlines() if line.startswith(f"| {arm} | {n}/{n} |"))
        cells = [c.strip() for c in row.strip("|").split("|")]
        assert cells[2] == str(n * len(steps))  # records
        assert cells[5] == (f"{largest[arm]:.2e}" if arm in largest else "-")


@pytest.mark.parametrize("table,match", [
    ({"every": 0}, r"'audit.every' must be >= 1, got 0"),
    ({"every": 2.5}, r"'audit.every' must be an integer"),
    ({"evry": 5}, r"unknown key 'audit.evry'; allowed keys in \[audit\]: every"),
])
def test_audit_table_is_validated(tiny_doc, table, match):
    from holonomic.study import StudyConfigError, parse_config

    assert parse_config(tiny_doc).audit_every == 50  # default when [audit] is absent
    with pytest.raises(StudyConfigError, match=match):
        parse_config({**tiny_doc, "audit": table})
