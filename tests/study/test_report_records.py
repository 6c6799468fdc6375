"""Typed run records (records.py): round trip, old records filled in, validation errors
naming the field; and the reshaped report saying the same as before about old records
(golden outputs of main @ dad93af in tests/study/golden, made by make_golden.py)."""

from __future__ import annotations

import copy
import csv
import io
import json
import math
import pickle
from pathlib import Path

import pytest

from holonomic.study import storage
from holonomic.study.records import (
    InvalidRecordField, Recipe, RunRecord, as_records, legacy_key, read_record)
from holonomic.study.report import write_outputs
from tests.study.fabricate import fabricate_trials
from tests.study.golden.make_golden import cases

GOLDEN = Path(__file__).parent / "golden"


def _new_record() -> dict:
    """A record with every issue-14 field, shaped as the runner writes it (k-fold details
    and an ensemble phase included)."""
    arms = {"adamw": {"regulariser": "decoupled_weight_decay", "optimiser": "adamw",
                      "trials": [{"lr": 1e-3, "strength": 1e-2}, {"lr": 3e-3, "strength": 1e-3}],
                      "groups": [{"layers": ["0.weight", "0.bias"], "lr": 1e-3}]}}
    record = next(iter(fabricate_trials(arms, seeds=(4,)).values()))
    record["fold_details"] = [{"fold": 0, "status": "ok", "message": "", "n_train": 40,
                               "steps_done": 6, "target_mean": 0.0, "target_std": 1.0,
                               "hooks": {}, "weights_file": None}]
    record["folds"] = [{"val_accuracy": 0.7}]
    record["ensemble"] = {"settings": {"temperature": 1.0}, "sampler": "AdaptiveLangevin",
                          "status": "ok", "message": "", "steps_done": 5, "samples": 2,
                          "single": {"val": {"accuracy": 0.7}, "test": {"accuracy": 0.69}},
                          "ensemble": {"val": {"accuracy": 0.71}, "test": {"accuracy": 0.7}},
                          "traces": {"train_loss": [0.5, 0.4]}, "constraint_residual": 0.0,
                          "wall_s": 0.1}
    record["target_mean"] = 0.0  # a key the dataclass does not name: kept in ``extra``
    return record


def test_new_record_round_trip_and_fields():
    data = _new_record()
    record = read_record(data, f"/study/runs/{data['key']}.json")
    assert not record.legacy and record.trial == 0 and record.seed == 4
    assert record.settings == {"lr": 1e-3, "strength": 1e-2}
    assert record.searched == ("lr", "strength")
    assert record.recipe == Recipe("decoupled_weight_decay", "adamw",
                                   ({"layers": ["0.weight", "0.bias"], "lr": 1e-3},))
    assert record.optimiser == "adamw" and record.regulariser == "decoupled_weight_decay"
    assert record.budget_fraction == 1.0 and record.full and record.epochs == 3
    assert record.grad_evals == 6 and record.strength == 1e-2
    assert record.fold_details[0].n_train == 40 and record.ensemble.samples == 2
    assert record.extra["target_mean"] == 0.0
    assert record.to_dict() == data
    # through JSON as the runner stores it (NaN as "nan"; compared as text: nan != nan)
    stored = storage.dumps(data)
    assert storage.dumps(RunRecord.from_dict(storage.loads(stored)).to_dict()) == stored


def test_old_record_is_filled_in():
    data = {"key": "max_norm-0.5-s2", "arm": "max_norm", "setting_index": 1, "strength": 0.5,
            "seed": 2, "status": "failed", "message": "diverged at step 3",
            "fingerprint": "f", "metrics": {"val_accuracy": math.nan}, "grad_evals": 12}
    record = read_record(data, "runs/max_norm-0.5-s2.json")
    assert record.legacy
    assert (record.trial, record.settings, record.searched) == (1, {"strength": 0.5}, ())
    assert record.budget_fraction == 1.0 and record.epochs is None
    assert record.recipe.to_dict() == {"regulariser": "max_norm", "optimiser": "langevin",
                                       "groups": []}
    assert math.isnan(record.metric("val_accuracy")) and math.isnan(record.metric("absent"))
    out = record.to_dict()
    # every key it had is kept, and the issue-14 keys are written filled in
    assert {k: out[k] for k in data if k != "metrics"} == {
        k: v for k, v in data.items() if k != "metrics"}
    assert set(out) - set(data) == {"trial", "settings", "searched", "recipe",
                                    "budget_fraction", "epochs"}
    assert read_record(out, "runs/max_norm-0.5-s2.json").to_dict() == out


@pytest.mark.parametrize("change,field,words", [
    (lambda d: d.pop("seed"), "seed", "lacks the key 'seed'"),
    (lambda d: d.update(seed="3"), "seed", "'seed' must be an integer"),
    (lambda d: d.update(trial=-1), "trial", "'trial' must be a non-negative integer"),
    (lambda d: d.update(setting_index=5), "setting_index", "differs from 'trial'"),
    (lambda d: d.update(settings={"lr": "fast"}), "settings", "'settings' must be an object"),
    (lambda d: d.update(searched=["momentum"]), "searched", "'momentum'"),
    (lambda d: d.update(trial_settings={"lr": None}), "trial_settings",
     "'trial_settings' must be an object of numbers"),
    (lambda d: d.update(strength=0.5), "strength", "differs from the strength of its"),
    (lambda d: d["recipe"].pop("optimiser"), "recipe.optimiser", "lacks the key 'optimiser'"),
    (lambda d: d["recipe"].update(groups=[{"layers": "0.*"}]), "recipe.groups[0].layers",
     "must be a list of parameter names"),
    (lambda d: d.update(budget_fraction=0.0), "budget_fraction", "a number in (0, 1]"),
    (lambda d: d.update(budget_fraction=1.5), "budget_fraction", "a number in (0, 1]"),
    (lambda d: d.update(epochs=2.5), "epochs", "'epochs' must be a non-negative integer"),
    (lambda d: d.update(grad_evals=-1), "grad_evals", "'grad_evals' must be"),
    (lambda d: d.update(status="done"), "status", "'status' must be one of ok, failed"),
    (lambda d: d["metrics"].pop("val_accuracy"), "metrics.val_accuracy",
     "lacks the metric(s) val_accuracy"),
    (lambda d: d["metrics"].update(val_accuracy=1.5), "metrics.val_accuracy",
     "outside the values it can take"),
    (lambda d: d["metrics"].update(val_loss="low"), "metrics.val_loss", "must be a number"),
    (lambda d: d.pop("fingerprint"), "fingerprint", "lacks the key 'fingerprint'"),
    (lambda d: d.update(key="other"), "key", "does not match its file name"),
    (lambda d: d.update(fold_details=[{"fold": 0}]), "fold_details[0].n_train",
     "lacks the key 'n_train'"),
    (lambda d: d.update(ensemble={"status": "ok", "single": {}}), "ensemble.ensemble",
     "lacks the key 'ensemble'"),
])
def test_validation_errors_name_the_field(change, field, words):
    data = _new_record()
    path = f"/study/runs/{data['key']}.json"
    change(data)
    with pytest.raises(InvalidRecordField) as info:
        read_record(data, path)
    assert info.value.field == field
    assert words in str(info.value) and path in str(info.value)
    # an InvalidRunRecord (what storage raises), picklable for worker processes
    assert isinstance(info.value, storage.InvalidRunRecord)
    again = pickle.loads(pickle.dumps(info.value))
    assert (again.field, str(again)) == (field, str(info.value))


def test_keys_are_checked_for_old_style_records_and_by_a_given_key_function():
    data = {"key": "weight_decay-0.01-s0", "arm": "weight_decay", "setting_index": 0,
            "strength": 0.01, "seed": 0, "status": "failed", "fingerprint": "f",
            "metrics": {}}
    assert read_record(data).key == legacy_key("weight_decay", 0.01, 0)
    with pytest.raises(InvalidRecordField, match="does not match its arm, settings") as info:
        read_record({**data, "key": "weight_decay-0.1-s0"})
    assert info.value.field == "key"
    # a record not read from a file: the message gives no file advice
    assert "--rerun-invalid" not in str(info.value)
    # an old grid arm run by the recipe runner: resolved settings hold lr and momentum, the
    # trial's own point (trial_settings, what the key is made of) only the strength; a
    # halving rung run adds -h<fraction>
    runner = {**data, "key": "weight_decay-0.01-s0-h0.25", "trial": 0,
              "settings": {"lr": 0.05, "momentum": 0.9, "strength": 0.01},
              "trial_settings": {"strength": 0.01}, "searched": ["strength"],
              "recipe": {"regulariser": "weight_decay", "optimiser": "langevin", "groups": []},
              "budget_fraction": 0.25, "epochs": 1}
    record = read_record(runner)
    assert record.trial_settings == {"strength": 0.01} and not record.full
    assert record.to_dict() == runner
    with pytest.raises(InvalidRecordField, match="key 'weight_decay-0.01-s0-h0.25'"):
        read_record({**runner, "key": "weight_decay-0.01-s0"})
    new = _new_record()
    with pytest.raises(InvalidRecordField, match="key 'expected'"):
        read_record(new, run_key=lambda record: "expected")
    assert read_record(new, run_key=lambda record: record.key).key == new["key"]
    with pytest.raises(InvalidRecordField, match="it holds a JSON list"):
        read_record([data])


def test_as_records_keeps_typed_records():
    data = _new_record()
    typed = as_records({"a": data})
    assert isinstance(typed["a"], RunRecord)
    assert as_records(typed)["a"] is typed["a"]


# --- old-format records are reported as before ------------------------------------------

#: Lines of the dad93af report that now read differently: the caveat on multiple
#: comparisons (Holm corrects over the arms, per metric, since issue 14's statistics), the
#: max-norm line (optimisers other than the integrator), the edge line (now per setting,
#: in the budget section) and the results.csv line (rows per run).
_REWORDED = ("- No correction for multiple comparisons", "- The max-norm arm clips after",
             "- Chosen at the edge of its grid:", "- `results.csv`: one row per arm")


#: Lines that say how the verdict and the comparisons read their interval (the simultaneous
#: Bonferroni interval since the review of the report; before, the raw 95% t interval).
_SIMULTANEOUS = ("**Verdict**", "- Every other arm is compared with the baseline",
                 "Differences are arm minus")


def _outside_comparisons(text, indices=False):
    """The report's lines (or their indices) but those the simultaneous interval changed:
    the verdict header and lines, the protocol line on the comparisons, the paired table."""
    out, in_table = [], False
    for i, line in enumerate(text.splitlines()):
        if line.startswith("## "):
            in_table = line.startswith("## Paired comparison")
        if in_table and line.startswith("|") or line.startswith(_SIMULTANEOUS):
            continue
        if line.startswith("- ") and " vs " in line and ": " in line and line.endswith(")"):
            continue  # a verdict line
        out.append(i if indices else line)
    return out


def _walk(old, new, path=""):
    """Keys of ``old`` missing from ``new`` or with another value (new keys are allowed)."""
    if isinstance(old, dict):
        out = []
        for key, value in old.items():
            if key not in new:
                out.append(f"{path}/{key} missing")
            else:
                out += _walk(value, new[key], f"{path}/{key}")
        return out
    return [] if old == new else [f"{path}: {old!r} -> {new!r}"]


@pytest.mark.parametrize("name,config,records", list(cases()), ids=lambda x: str(x)[:14])
def test_old_records_are_reported_as_before(tmp_path, name, config, records):
    write_outputs(config, tmp_path, copy.deepcopy(records), "invented records", plots=False)
    golden = GOLDEN / name
    # results.csv: byte for byte (old records get no setting columns)
    assert (tmp_path / "results.csv").read_text() == (golden / "results.csv").read_text()
    # summary.json: every number and text as before; only the protocol's selection
    # sentence says "trial" for "grid point"; new keys are added
    old = json.loads((golden / "summary.json").read_text())
    new = json.loads((tmp_path / "summary.json").read_text())
    # the verdict now reads the simultaneous (Bonferroni) interval: its interval and lines
    # changed on purpose; the old (raw) interval is kept beside it
    # and the power notes follow the verdict: a note for each arm whose simultaneous
    # interval includes 0 and whose difference is below the detectable one
    changed = _walk(old, new)
    assert [c for c in changed if not c.startswith(("/verdict", "/power_notes"))] == [
        f"/protocol/selection: {old['protocol']['selection']!r} -> "
        f"{new['protocol']['selection']!r}"]
    assert [n for n in old["power_notes"] if n not in new["power_notes"]] == []
    for note in new["power_notes"]:
        comp = new["comparisons"][note["arm"]][note["metric"]]
        assert comp["includes_zero_adjusted"] and abs(note["observed"]) < note["detectable"]
    for before, after in zip(old["verdict"], new["verdict"], strict=True):
        if "ci_low" not in before:
            assert before == after
            continue
        comp = new["comparisons"][after["arm"]][after["metric"]]
        assert (after["ci_low_unadjusted"], after["ci_high_unadjusted"]) == (
            before["ci_low"], before["ci_high"])
        assert (after["ci_low"], after["ci_high"]) == (comp["ci_low_adjusted"],
                                                        comp["ci_high_adjusted"])
    assert "grid point" in old["protocol"]["selection"]
    assert new["arms"]["weight_decay"]["recipe"]["optimiser"] == "langevin"
    # report.md: every line of the old report is still there but the reworded ones
    report = (tmp_path / "report.md").read_text().splitlines()
    lost = [line for line in _outside_comparisons((golden / "report.md").read_text())
            if line not in report]
    assert sorted(lost) == sorted(line for line in _outside_comparisons(
        (golden / "report.md").read_text()) if line.startswith(_REWORDED))
    assert len(lost) == len(_REWORDED)
    # and what is new is the scope line, the budget section and the reworded lines
    old_lines = set((golden / "report.md").read_text().splitlines())
    start, end = report.index("## Budget and chosen setting per arm"), report.index("## Protocol")
    kept = set(_outside_comparisons("\n".join(report), indices=True))
    added = [line for i, line in enumerate(report) if line not in old_lines
             and not start <= i < end and i in kept]
    assert [line for line in added if not line.startswith((
        "What this shows: a tuned comparison", "- Holm's adjustment corrects over the arms",
        "- The max-norm arm clips after each optimiser step",
        "- Chosen at the edge of what was searched:", "- `results.csv`: one row per run"))
        and line not in {f"- {n['line']}" for n in new["power_notes"]}] == []
    assert not any(line.startswith("- Temperature scan") for line in report)
    rows = list(csv.reader(io.StringIO((tmp_path / "results.csv").read_text())))
    assert len(rows) == 1 + len(records)
