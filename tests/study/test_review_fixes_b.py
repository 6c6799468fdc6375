"""Fixes from a user-style review of ``holonomic study`` (issue 13, second batch).

Report tests use invented records (:mod:`tests.study.fabricate`), no training.
"""

from __future__ import annotations

import dataclasses
import json
import re
import warnings

import numpy as np
import pytest

from holonomic.study import parse_config, storage
from holonomic.study.config import StudyConfigError
from holonomic.study.data import load_dataset
from holonomic.study.ensemble_report import _reading as ensemble_reading
from holonomic.study.report import write_outputs
from holonomic.study.runner import RunSpec
from holonomic.study.stats import paired_comparison
from holonomic.study.storage import InvalidRunRecord
from tests.study.conftest import tiny_document
from tests.study.data_helpers import classes_csv, write
from tests.study.fabricate import fabricate
from tests.study.robust_helpers import N_SMALL_RUNS, write_study
from tests.study.test_report_schemes import _files_data, _split_column_data

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
    comp = summary["comparisons"]["none"]["test_accuracy"]
    assert ensemble_reading("accuracy", comp).startswith("cannot tell apart (all 2 paired")


# ---------------------------------------------------------------------------------------
# 2. finished runs must hold valid metrics

def _stored_record(tmp_path, change, task="classification", binary=False):
    config = _config(selection=None)
    record = next(iter(fabricate(config, task, binary=binary).values()))
    record["fingerprint"] = "0123"
    change(record["metrics"])
    (tmp_path / "runs").mkdir(exist_ok=True)
    storage.write_record(tmp_path, record)
    return tmp_path / "runs" / f"{record['key']}.json"


@pytest.mark.parametrize("change, words", [
    (lambda m: m.pop("test_accuracy"), "lacks the metric(s) test_accuracy"),
    (lambda m: m.update(test_accuracy=5.0), "'test_accuracy' = 5.0 is outside"),
    (lambda m: m.update(val_accuracy=float("nan")), "'val_accuracy' is nan, not a finite"),
    (lambda m: m.update(test_loss=-0.5), "'test_loss' = -0.5 is outside"),
    (lambda m: m.update(ece_test=1.5), "'ece_test' = 1.5 is outside"),
])
def test_finished_run_with_bad_metric_is_invalid(tmp_path, change, words):
    path = _stored_record(tmp_path, change)
    with pytest.raises(InvalidRunRecord, match=re.escape(words)) as caught:
        storage.read_records(tmp_path)
    assert str(path) in str(caught.value) and "--rerun-invalid" in str(caught.value)


def test_regression_bounds_and_undefined_metrics(tmp_path):
    _stored_record(tmp_path, lambda m: m.update(test_r2=1.5), "regression")
    with pytest.raises(InvalidRunRecord, match=re.escape("'test_r2' = 1.5 is outside")):
        storage.read_records(tmp_path)
    # R^2 and ROC AUC can be undefined (NaN) in a finished run; R^2 can be very negative
    _stored_record(tmp_path, lambda m: m.update(test_r2=float("nan"), val_r2=-40.0),
                   "regression")
    assert len(storage.read_records(tmp_path)) == 1
    _stored_record(tmp_path, lambda m: m.update(test_roc_auc=float("nan")), binary=True)
    assert len(storage.read_records(tmp_path)) == 1


def test_valid_and_failed_records_still_read(tmp_path):
    path = _stored_record(tmp_path, lambda m: None)
    assert len(storage.read_records(tmp_path)) == 1
    record = json.loads(path.read_text())
    record["status"], record["metrics"] = "failed", {"test_accuracy": "nan"}
    path.write_text(json.dumps(record))
    assert len(storage.read_records(tmp_path)) == 1


def test_control_character_message_has_one_at(tmp_path):
    (tmp_path / "runs").mkdir()
    (tmp_path / "runs" / "none-0.0-s0.json").write_text('{"key": "a\tb"}')
    with pytest.raises(InvalidRunRecord) as caught:
        storage.read_records(tmp_path)
    assert "Invalid control character at line 1" in str(caught.value)
    assert "at at" not in str(caught.value)


# ---------------------------------------------------------------------------------------
# 3. report text under fixed splits, without standardisation, with a diverged seed

def _doc(seeds=2, arms=("none", "weight_decay")):
    doc = tiny_document()
    doc["study"]["seeds"] = seeds
    doc["arms"] = {name: doc["arms"][name] for name in arms}
    return doc


@pytest.mark.parametrize("make", [_split_column_data, _files_data])
def test_fixed_split_is_not_said_to_vary_with_the_seed(tmp_path, make):
    doc = _doc()
    doc["data"] = make(tmp_path)
    config = parse_config(doc, base_dir=tmp_path)
    (tmp_path / "out").mkdir()
    _, text = _report(config, fabricate(config), tmp_path / "out")
    assert "each seed fixes the split" not in text
    assert "Splits differ between seeds" not in text
    assert "the split is fixed (the same for every seed); each seed fixes the initial" in text
    assert "The split is the same for every seed (seeds vary initial weights" in text


def test_random_split_still_varies_with_the_seed(tmp_path):
    config = parse_config(_doc())
    _, text = _report(config, fabricate(config), tmp_path)
    assert "each seed fixes the split, initial weights" in text
    assert "Splits differ between seeds" in text
    assert "Features standardised with training statistics." in text


def test_unstandardised_features_are_said_not_standardised(tmp_path):
    doc = _doc()
    doc["data"]["standardize"] = False
    config = parse_config(doc)
    _, text = _report(config, fabricate(config), tmp_path)
    assert "Features not standardised." in text and "(off)" not in text


def test_arm_with_a_diverged_seed_everywhere_is_not_said_all_failed(tmp_path):
    config = parse_config(_doc(arms=("none", "weight_decay", "max_norm")))
    records = fabricate(config)
    for record in records.values():
        if record["arm"] == "max_norm" and record["seed"] == config.seeds[1]:
            record["status"] = "diverged"
            record["metrics"] = {k: float("nan") for k in record["metrics"]}
    _, text = _report(config, records, tmp_path)
    assert "all failed" not in text
    assert ("| max_norm | no valid setting (every grid point has a failed or diverged seed) |"
            in text)


# ---------------------------------------------------------------------------------------
# 4. the verdict also judges the selection metric

def test_verdict_judges_the_selection_metric_too(tmp_path):
    config = _config(seeds=3, selection="val_roc_auc")
    records = fabricate(config, binary=True, effects={"none": -0.05})
    summary, text = _report(config, records, tmp_path)
    assert [(v["arm"], v["metric"]) for v in summary["verdict"]] == [
        ("none", "test_accuracy"), ("none", "test_roc_auc")]
    top = text.split("## Set-up")[0]
    assert "- none vs weight_decay, test accuracy: worse" in top
    assert ("- none vs weight_decay, test ROC AUC (selection metric; higher is better): worse"
            in top)


def test_regression_selection_by_mae_is_lower_better(tmp_path):
    config = _config(seeds=3, selection="val_mae")
    records = fabricate(config, "regression", effects={"none": -0.05})
    summary, text = _report(config, records, tmp_path)
    assert [v["metric"] for v in summary["verdict"]] == ["test_rmse", "test_mae"]
    assert "test MAE (selection metric; lower is better): worse" in text


def test_verdict_has_one_line_per_arm_when_selection_is_the_headline(tmp_path):
    config = _config(seeds=3)
    summary, _ = _report(config, fabricate(config, binary=True), tmp_path)
    assert [v["metric"] for v in summary["verdict"]] == ["test_accuracy"]


# ---------------------------------------------------------------------------------------
# 6. one-line warnings; trained and reused runs counted

def test_warnings_are_one_line_during_the_command(capsys):
    from holonomic.cli.study import _one_line_warnings

    before = warnings.showwarning
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        with _one_line_warnings():
            warnings.warn("the data has 3 rows", UserWarning)
    assert warnings.showwarning is before
    err = capsys.readouterr().err
    assert err == "holonomic study: warning: the data has 3 rows\n"


def test_rerun_counts_trained_and_reused_runs(tmp_path, capsys):
    from holonomic.cli import main

    study = write_study(tmp_path)
    args = ["study", str(study), "--out", str(tmp_path / "out"), "--quiet", "--no-plots"]
    assert main(args) == 0
    first = capsys.readouterr().out
    assert f"({N_SMALL_RUNS} trained now, 0 reused)" in first
    assert main(args) == 0
    assert f"({0} trained now, {N_SMALL_RUNS} reused)" in capsys.readouterr().out


# ---------------------------------------------------------------------------------------
# 5. separate files: a class never trained on; the same columns in another order

def _files_config(tmp_path, test_text, val_text=None):
    write(tmp_path, "train.csv", classes_csv(n=24, seed=1))
    write(tmp_path, "test.csv", test_text)
    data = {"source": "train.csv", "test_source": "test.csv", "target": "label"}
    if val_text is not None:
        write(tmp_path, "val.csv", val_text)
        data["val_source"] = "val.csv"
    doc = _doc()
    doc["data"] = data
    return parse_config(doc, base_dir=tmp_path)


@pytest.mark.parametrize("where", ["test", "val"])
def test_class_only_in_a_separate_file_is_refused(tmp_path, where):
    other = classes_csv(n=12, seed=3, labels=("x", "y", "z"))
    plain = classes_csv(n=12, seed=2)
    config = (_files_config(tmp_path, other) if where == "test"
              else _files_config(tmp_path, plain, val_text=other))
    with pytest.raises(StudyConfigError) as caught:
        load_dataset(config)
    message = str(caught.value)
    assert "class 'z'" in message and f"'data.{where}_source'" in message
    assert str(tmp_path / f"{where}.csv") in message and "never trains on" in message


def test_class_only_in_split_column_test_rows_is_refused(tmp_path):
    n = 40
    part = ["train" if i % 4 < 2 else "val" if i % 4 == 2 else "test" for i in range(n)]
    labels = ["z" if p == "test" and i == 3 else ("x", "y")[i % 2]
              for i, p in enumerate(part)]
    text = classes_csv(n=n, extra={"part": part})
    lines = text.splitlines()
    lines = [lines[0]] + [",".join(line.split(",")[:2] + [labels[i]] + line.split(",")[3:])
                          for i, line in enumerate(lines[1:])]
    write(tmp_path, "d.csv", "\n".join(lines) + "\n")
    doc = _doc()
    doc["data"] = {"source": "d.csv", "target": "label", "split_column": "part"}
    with pytest.raises(StudyConfigError, match="class 'z' .* marks 'test'"):
        load_dataset(parse_config(doc, base_dir=tmp_path))


def test_same_columns_in_another_order_are_matched_by_name(tmp_path):
    plain = classes_csv(n=12, seed=2)
    lines = [line.split(",") for line in plain.splitlines()]
    swapped = "\n".join(",".join([r[1], r[0], r[2]]) for r in lines) + "\n"  # b,a,label
    dataset = load_dataset(_files_config(tmp_path, swapped))
    reference = load_dataset(_files_config(tmp_path / "ref", plain))
    assert dataset.feature_names == ("a", "b")
    np.testing.assert_array_equal(dataset.x, reference.x)
    assert "matched by name" in dataset.description


def test_moving_an_invalid_k_fold_run_aside_takes_every_fold_file(tmp_path):
    # --rerun-invalid never deletes: each fold's weights and audit must move with the record
    # (found by the final read of the change: only <key>.pt and <key>.jsonl were moved).
    from holonomic.study import storage

    key = "fixed_norm-0.5-s0"
    storage.runs_dir(tmp_path).mkdir(parents=True)
    storage.audits_dir(tmp_path).mkdir(parents=True)
    names = [f"runs/{key}.json"] + [f"runs/{key}.fold{j}.pt" for j in range(3)] + [
        f"audits/{key}.fold{j}.jsonl" for j in range(3)]
    other = tmp_path / "runs" / "fixed_norm-0.5-s1.fold0.pt"  # another run's file stays
    for name in names:
        (tmp_path / name).write_text("x")
    other.write_text("x")
    moved = storage.move_aside(tmp_path, [key])
    assert sorted(str(src.relative_to(tmp_path)) for src, _ in moved) == sorted(names)
    assert all(dst.exists() for _, dst in moved) and other.exists()
