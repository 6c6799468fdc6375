"""A refused command changes nothing on disk (issue 13, items 2, 3 and 6): changed settings,
changed data contents, invalid run files (and --rerun-invalid, which sets them aside)."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from holonomic.cli import main
from holonomic.study import InvalidRunRecord, StudyConfigError, load_config, run_study, storage
from holonomic.study.execution import check_compatible, data_fingerprint
from tests.study.robust_helpers import (
    N_SMALL_RUNS,
    SMALL_TOML,
    copy_study,
    forget_loaded_data,
    snapshot,
    with_data_file,
    write_invented_csv,
    write_study,
)


@pytest.fixture(scope="module")
def finished(tmp_path_factory) -> tuple[Path, Path]:
    """The small study, finished once for this module: (study file, output directory)."""
    folder = tmp_path_factory.mktemp("finished")
    study = write_study(folder)
    out = folder / "out"
    run_study(load_config(study), out, progress=False, plots=False)
    return study, out


@pytest.fixture
def study_copy(finished, tmp_path) -> tuple[Path, Path]:
    study, out = finished
    return study, copy_study(out, tmp_path / "out")


def _cli(study: Path, out: Path, *extra: str) -> int:
    return main(["study", str(study), "--out", str(out), "--quiet", "--no-plots", *extra])


# ---------------------------------------------------------------------------------------
# Item 3: a refused command changes nothing; a config that fails creates no folder


@pytest.mark.slow
def test_refused_rerun_with_another_budget_changes_nothing(study_copy, tmp_path, capsys):
    study, out = study_copy
    before = snapshot(out)
    changed = write_study(tmp_path / "changed", SMALL_TOML.replace("epochs = 3", "epochs = 4"))
    assert _cli(changed, out) == 2
    err = capsys.readouterr().err
    assert "different data, model or budget" in err and "Traceback" not in err
    assert snapshot(out) == before  # study.json still says 3 epochs
    record = storage.loads((out / "study.json").read_text())
    assert record["definition"]["budget"]["epochs"] == 3
    # --report-only with the changed study is refused the same way and writes nothing
    assert _cli(changed, out, "--report-only") == 2
    assert snapshot(out) == before


@pytest.mark.parametrize("problem,match", [
    ("data", "is not a number"),
    ("factory", "cannot be imported"),
])
def test_config_failing_on_data_or_model_creates_no_output_folder(tmp_path, capsys, problem,
                                                                   match):
    if problem == "data":
        (tmp_path / "bad.csv").write_text("a,b,label\n1,2,x\n3,oops,y\n")
        text = with_data_file(SMALL_TOML, "bad.csv")
    else:
        text = SMALL_TOML.replace("widths = [8, 8]", 'factory = "no_such_module_xq:make"')
    study = write_study(tmp_path, text)
    out = tmp_path / "deep" / "out"
    assert _cli(study, out) == 2
    err = capsys.readouterr().err
    assert match in err and "Traceback" not in err
    assert not (tmp_path / "deep").exists()


def test_invalid_study_file_creates_no_output_folder(tmp_path, capsys):
    study = write_study(tmp_path, SMALL_TOML.replace("epochs = 3", "epochs = 0"))
    assert _cli(study, tmp_path / "out") == 2
    assert "budget.epochs" in capsys.readouterr().err
    assert not (tmp_path / "out").exists()


@pytest.mark.slow
def test_report_only_on_a_missing_directory_creates_nothing(finished, tmp_path, capsys):
    study, _ = finished
    assert _cli(study, tmp_path / "none", "--report-only") == 1
    assert f"{N_SMALL_RUNS} of {N_SMALL_RUNS} runs are not finished" in capsys.readouterr().err
    assert not (tmp_path / "none").exists()


# ---------------------------------------------------------------------------------------
# Item 2: runs made on other data are refused


@pytest.mark.slow
def test_changed_data_contents_are_refused_and_nothing_changes(tmp_path, capsys):
    csv = tmp_path / "data.csv"
    write_invented_csv(csv)
    study = write_study(tmp_path, with_data_file(SMALL_TOML, "data.csv"))
    out = tmp_path / "out"
    forget_loaded_data()
    assert _cli(study, out) == 0
    record = storage.loads((out / "study.json").read_text())
    fingerprint = record["definition"]["data_fingerprint"]
    assert fingerprint and fingerprint == data_fingerprint(load_config(study))
    runs = storage.read_records(out)
    assert len(runs) == N_SMALL_RUNS
    assert {r["data_fingerprint"] for r in runs.values()} == {fingerprint}
    before = snapshot(out)

    # one label changed, same path: every setting (and the training fingerprint) is the same
    lines = csv.read_text().splitlines()
    label = lines[5].rsplit(",", 1)
    lines[5] = f"{label[0]},{'no' if label[1] == 'yes' else 'yes'}"
    csv.write_text("\n".join(lines) + "\n")
    forget_loaded_data()
    assert _cli(study, out) == 2
    err = capsys.readouterr().err
    assert "the data changed since the runs" in err and str(study.parent / "data.csv") in err
    assert fingerprint in err and "new --out" in err and "Traceback" not in err
    assert _cli(study, out, "--report-only") == 2
    assert "the data changed" in capsys.readouterr().err
    assert snapshot(out) == before  # results.csv, study.json and the runs untouched
    forget_loaded_data()


@pytest.mark.slow
def test_runs_without_a_data_fingerprint_are_refused(finished, tmp_path):
    study, out = finished
    config = load_config(study)
    records = storage.read_records(out)
    old = {key: {k: v for k, v in r.items() if k != "data_fingerprint"}
           for key, r in records.items()}
    check_compatible(config, records, out)  # the current runs pass
    with pytest.raises(StudyConfigError, match="made before runs recorded a fingerprint"):
        check_compatible(config, old, out)
    other = {key: {**r, "data_fingerprint": "0123456789abcdef"} for key, r in records.items()}
    with pytest.raises(StudyConfigError, match="fingerprint 0123456789abcdef"):
        check_compatible(config, other, out)


# ---------------------------------------------------------------------------------------
# Item 6: run records are validated on read; --rerun-invalid sets bad ones aside


def _edit(record: dict, change: str):
    if change == "not json":
        return '{"key": "half a rec'
    if change == "list":
        return [record]
    if change == "no metrics":
        return {k: v for k, v in record.items() if k != "metrics"}
    if change == "unknown status":
        return {**record, "status": "excellent"}
    if change == "other key":
        return {**record, "key": "none-0.0-s7"}
    if change == "seed text":
        return {**record, "seed": "0"}
    if change == "strength bool":
        return {**record, "strength": True}
    if change == "metric text":
        return {**record, "metrics": {**record["metrics"], "test_accuracy": "high"}}
    if change == "fingerprint number":
        return {**record, "fingerprint": 12}
    if change == "arm and key swapped":
        return {**record, "arm": "fixed_norm"}
    raise AssertionError(change)


CHANGES = {
    "not json": "it is not JSON", "list": "JSON list, not an object",
    "no metrics": "lacks the key 'metrics'", "unknown status": "'status' must be one of ok",
    "other key": "does not match its file name", "seed text": "'seed' must be an integer",
    "strength bool": "'strength' must be a number", "metric text": "'test_accuracy' must be",
    "fingerprint number": "'fingerprint' must be a string",
    "arm and key swapped": "does not match its arm, settings and seed",
}


@pytest.mark.slow
@pytest.mark.parametrize("change", list(CHANGES))
def test_invalid_run_files_are_named(finished, tmp_path, change):
    _, out = finished
    source = out / "runs" / "none-0.0-s0.json"
    record = json.loads(source.read_text())
    (tmp_path / "runs").mkdir()
    target = tmp_path / "runs" / source.name
    edited = _edit(record, change)
    target.write_text(edited if isinstance(edited, str) else json.dumps(edited))
    with pytest.raises(InvalidRunRecord, match=re.escape(CHANGES[change])) as caught:
        storage.read_records(tmp_path)
    message = str(caught.value)
    assert str(target) in message and "--rerun-invalid" in message
    assert isinstance(caught.value, StudyConfigError) and caught.value.key == "none-0.0-s0"
    collected: list = []
    assert storage.read_records(tmp_path, invalid=collected) == {}
    assert [e.path for e in collected] == [str(target)]


def test_binary_run_file_is_invalid(tmp_path):
    (tmp_path / "runs").mkdir()
    (tmp_path / "runs" / "none-0.0-s0.json").write_bytes(b"\xff\xfe\x00garbage")
    with pytest.raises(InvalidRunRecord, match="not UTF-8"):
        storage.read_records(tmp_path)


@pytest.mark.slow
def test_invalid_run_stops_the_study_until_rerun_invalid_sets_it_aside(study_copy, capsys):
    study, out = study_copy
    reference = (out / "results.csv").read_text()
    key = "fixed_norm-0.5-s1"
    bad = out / "runs" / f"{key}.json"
    bad.write_text(bad.read_text().replace('"status": "ok"', '"status": "great"'))
    bad_bytes = bad.read_bytes()
    audit = (out / "audits" / f"{key}.jsonl").read_bytes()
    (out / "runs" / f"{key}.pt").write_bytes(b"weights")  # a weights file goes along
    before = snapshot(out)

    assert _cli(study, out) == 2
    err = capsys.readouterr().err
    assert str(bad) in err and "'status' must be one of" in err and "--rerun-invalid" in err
    assert "Traceback" not in err
    assert _cli(study, out, "--report-only") == 2
    assert "--rerun-invalid" in capsys.readouterr().err
    assert snapshot(out) == before
    assert _cli(study, out, "--report-only", "--rerun-invalid") == 2
    assert "cannot redo invalid runs" in capsys.readouterr().err

    assert _cli(study, out, "--rerun-invalid") == 0
    err = capsys.readouterr().err
    moved = list((out / "invalid").iterdir())
    assert len(moved) == 1  # one timestamped folder
    aside = moved[0]
    assert (aside / "runs" / f"{key}.json").read_bytes() == bad_bytes
    assert (aside / "audits" / f"{key}.jsonl").read_bytes() == audit
    assert (aside / "runs" / f"{key}.pt").read_bytes() == b"weights"
    assert f"moved {str(bad)!r} to {str(aside / 'runs' / f'{key}.json')!r}" in err
    assert "its run is redone" in err
    assert storage.read_records(out)[key]["status"] == "ok"  # redone
    assert (out / "results.csv").read_text() == reference  # same seed, same result
