"""The report for either task and any selection metric, from invented run records.

The records come from :mod:`tests.study.fabricate` (made-up numbers, no training), so each
test knows what selection must choose and what each comparison must say.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import json
import math

import numpy as np
import pytest
from scipy import stats

from holonomic.study import parse_config, storage
from holonomic.study.report import (
    LEADING_COLUMNS,
    build_summary,
    csv_columns,
    metric_range,
    report_markdown,
    results_table,
    select_settings,
    study_metrics,
    write_outputs,
)
from holonomic.study.runner import RunSpec
from tests.study.conftest import tiny_document
from tests.study.fabricate import fabricate

#: Column order of results.csv before regression existed (classification records).
OLD_COLUMNS = ("arm", "setting_index", "strength", "seed", "chosen", "status", "n_train",
               "grad_evals", "train_accuracy", "val_accuracy", "test_accuracy", "train_loss",
               "val_loss", "test_loss", "gap_accuracy", "gap_loss", "val_gap_accuracy",
               "val_gap_loss", "ece_val", "ece_test", "weight_norm_hidden",
               "mean_row_norm_hidden", "weight_norm_output", "constraint_residual")


def _config(seeds: int = 5, selection: str | None = "keep", arms=None):
    doc = tiny_document()
    doc["study"]["seeds"] = seeds
    if arms is not None:
        doc["arms"] = {name: doc["arms"][name] for name in arms}
    config = parse_config(doc)
    # selection None: the task's default (val_rmse for regression, val_accuracy otherwise)
    return config if selection == "keep" else dataclasses.replace(config, selection=selection)


def _report(config, records, tmp_path, description="invented records"):
    summary = write_outputs(config, tmp_path, records, description, plots=False)
    return summary, (tmp_path / "report.md").read_text()


def _rows(text: str) -> list[dict]:
    return list(csv.DictReader(io.StringIO(text)))


def _mean(records, config, arm, index, metric):
    grid = config.arm(arm).grid
    return np.mean([records[RunSpec(arm, index, grid[index], s).key]["metrics"][metric]
                    for s in config.seeds])


# --- selection -------------------------------------------------------------------------

def test_regression_selection_is_smallest_mean_val_rmse():
    config = _config(selection=None)
    # index 0 is better for every tuned arm: quality falls with the index
    records = fabricate(config, "regression",
                        quality=lambda arm, i, s: 0.8 - 0.05 * i + 0.001 * s)
    metrics = study_metrics(config, records)
    assert metrics.selection == "val_rmse" and metrics.headline == "rmse"
    chosen = select_settings(config, records)
    for arm in config.arms:
        means = [_mean(records, config, arm.name, i, "val_rmse") for i in range(len(arm.grid))]
        assert chosen[arm.name].index == int(np.argmin(means)) == 0


def test_selection_by_balanced_accuracy_is_larger_better_and_not_accuracy():
    config = _config(selection="val_balanced_accuracy")
    records = fabricate(config, binary=True)
    for record in records.values():  # balanced accuracy prefers index 0, accuracy index 1
        i = record["setting_index"]
        record["metrics"]["val_balanced_accuracy"] = 0.9 - 0.1 * i
        record["metrics"]["val_accuracy"] = 0.5 + 0.1 * i
    chosen = select_settings(config, records)
    assert all(chosen[a.name].index == 0 for a in config.arms)
    assert study_metrics(config, records).compared == (
        "test_accuracy", "test_balanced_accuracy", "gap_accuracy", "gap_loss")


def test_unknown_selection_metric_is_a_clear_error():
    from holonomic.study import StudyConfigError

    config = _config(selection="val_roc_auc")
    records = fabricate(config)  # three classes: no ROC AUC
    with pytest.raises(StudyConfigError, match="'study.selection' = 'val_roc_auc'.*allowed "
                                               "for this task: val_accuracy, "
                                               "val_balanced_accuracy"):
        study_metrics(config, records)


# --- results.csv, summary.json ------------------------------------------------------

def test_csv_columns_keep_the_old_order_for_old_classification_records():
    config = _config(seeds=2)
    records = fabricate(config)
    for record in records.values():  # records as written before the new metrics
        del record["task"]
        record["metrics"] = {k: v for k, v in record["metrics"].items()
                             if k in OLD_COLUMNS}
    assert csv_columns(config, records) == OLD_COLUMNS
    chosen = select_settings(config, records)
    rows = _rows(results_table(config, records, chosen))
    assert tuple(rows[0]) == OLD_COLUMNS and len(rows) == 18


def test_csv_columns_for_new_classification_and_regression_records():
    config = _config(seeds=2)
    binary = csv_columns(config, fabricate(config, binary=True))
    assert binary[:len(LEADING_COLUMNS)] == LEADING_COLUMNS
    assert binary[8:20] == tuple(f"{p}_{m}" for m in ("accuracy", "balanced_accuracy",
                                                      "macro_f1", "roc_auc")
                                 for p in ("train", "val", "test"))
    config = _config(seeds=2, selection=None)
    regression = fabricate(config, "regression")
    columns = csv_columns(config, regression)
    assert columns[8:11] == ("train_rmse", "val_rmse", "test_rmse")
    assert "gap_loss" in columns and "test_r2" in columns and "test_mae" in columns
    assert not any(c.startswith("ece") or "accuracy" in c for c in columns)
    rows = _rows(results_table(config, regression, select_settings(config, regression)))
    key = RunSpec("fixed_norm", 1, 0.5, 1).key
    row = next(r for r in rows if (r["arm"], r["setting_index"], r["seed"])
               == ("fixed_norm", "1", "1"))
    assert float(row["test_rmse"]) == regression[key]["metrics"]["test_rmse"]


def test_regression_summary_and_report(tmp_path):
    config = _config(selection=None)
    records = fabricate(config, "regression", effects={"fixed_norm": 0.05})
    summary, report = _report(config, records, tmp_path)
    assert summary["task"]["headline"] == "rmse" and summary["task"]["selection"] == "val_rmse"
    assert summary["protocol"]["selection_metric"] == "val_rmse"
    assert summary["task"]["compared"] == ["test_rmse", "test_r2", "gap_rmse", "gap_loss"]
    chosen = summary["arms"]["fixed_norm"]["chosen"]
    assert {"train_rmse", "test_rmse", "test_r2", "test_mae", "gap_loss"} <= set(chosen)
    assert "ece_test" not in chosen and "per_seed_test_rmse" in chosen
    header = next(line for line in report.splitlines()
                  if line.startswith("| arm | strength | train"))
    assert "test RMSE" in header and "test R^2" in header and "test MAE" in header
    assert "ECE" not in header
    assert "smaller is better" in report  # selection direction
    assert "half the mean squared error of the standardised targets" in report
    # lower RMSE is better: fixed_norm has the better quality, so the lower RMSE
    assert "fixed_norm vs weight_decay, test RMSE: better (" in report
    json.loads((tmp_path / "summary.json").read_text())


def test_selection_counterpart_is_compared(tmp_path):
    config = _config(selection="val_roc_auc")
    records = fabricate(config, binary=True)
    summary = build_summary(config, records, select_settings(config, records))
    assert list(summary["comparisons"]["fixed_norm"]) == [
        "test_accuracy", "test_roc_auc", "gap_accuracy", "gap_loss"]


# --- item 14: verdict, residuals, bounded intervals, rows, orthonormal note ---------

def _expected_line(records, config, arm, metric, label, higher_better, summary):
    chosen = {name: summary["arms"][name]["chosen_strength"] for name in summary["arms"]}
    index = {name: summary["arms"][name]["chosen_index"] for name in summary["arms"]}

    def values(name):
        return np.array([records[RunSpec(name, index[name], chosen[name], s).key]["metrics"]
                         [metric] for s in config.seeds])

    d = values(arm) - values("weight_decay")
    m = len(summary["comparisons"])  # arms compared with the baseline
    # Reference library: scipy.stats.t for the paired interval; the verdict reads the
    # Bonferroni simultaneous interval over the m arms (t quantile 1 - 0.05 / (2 m))
    half = stats.t.ppf(1 - 0.05 / (2 * m), len(d) - 1) * d.std(ddof=1) / math.sqrt(len(d))
    low, high = d.mean() - half, d.mean() + half
    reading = ("cannot tell apart" if low <= 0 <= high else
               "better" if (d.mean() > 0) == higher_better else "worse")
    return (f"{arm} vs weight_decay, {label}: {reading} ({d.mean():+.3f} [{low:+.3f}, "
            f"{high:+.3f}] 95% simultaneous over {m} arms, Bonferroni, {len(d)} seeds)"), reading


def test_verdict_lines_at_the_top(tmp_path):
    config = _config()
    records = fabricate(config, effects={"fixed_norm": 0.05, "orthonormal": -0.05,
                                         "max_norm": 0.0}, noise=0.01)
    summary, report = _report(config, records, tmp_path)
    lines = report.splitlines()
    assert lines[0] == "# Study `tiny`" and lines[2].startswith("**Verdict**")
    top = "\n".join(lines[:12])
    readings = {}
    for arm in ("none", "max_norm", "fixed_norm", "orthonormal"):
        line, readings[arm] = _expected_line(records, config, arm, "test_accuracy",
                                             "test accuracy", True, summary)
        assert f"- {line}" in top
    assert readings["fixed_norm"] == "better" and readings["orthonormal"] == "worse"
    assert readings["max_norm"] == "cannot tell apart"
    assert [v["reading"] for v in summary["verdict"]] == [readings[a] for a in readings]


def test_verdict_with_non_finite_metric_says_so(tmp_path):
    config = _config(seeds=3)
    records = fabricate(config)
    for record in records.values():
        if record["arm"] == "max_norm":
            record["metrics"]["test_accuracy"] = math.nan
    _, report = _report(config, records, tmp_path)
    assert "max_norm vs weight_decay, test accuracy: no verdict (non-finite values)" in report


def test_residuals_in_scientific_notation(tmp_path):
    config = _config(seeds=2)
    _, report = _report(config, fabricate(config, residual=1.19e-7), tmp_path)
    row = next(line for line in report.splitlines() if line.startswith("| fixed_norm | 0."))
    assert row.endswith("| 1.19e-07 |")
    row = next(line for line in report.splitlines() if line.startswith("| max_norm | 0."))
    assert row.endswith("| 0.00e+00 |")


def test_bounded_metric_intervals_stay_in_their_range(tmp_path):
    config = _config(seeds=2)
    # two seeds far apart near 1: the plain t interval (12.7 standard errors) passes 1
    records = fabricate(config, quality=lambda arm, i, s: 0.99 - 0.2 * s - 0.001 * i)
    summary, report = _report(config, records, tmp_path)
    entry = summary["arms"]["fixed_norm"]["chosen"]["test_accuracy"]
    values = np.array([0.99 - 0.2 * s - 0.01 for s in config.seeds]) - 0.001 * \
        summary["arms"]["fixed_norm"]["chosen_index"]
    low, high = stats.t.interval(0.95, 1, loc=values.mean(),
                                 scale=values.std(ddof=1) / math.sqrt(2))
    assert low < 0 and high > 1  # what the interval was before
    assert (entry["ci_low"], entry["ci_high"]) == (0.0, 1.0) and entry["clipped"]
    assert f"{entry['mean']:.4f} [0.0000, 1.0000]*" in report
    assert "clipped to the range the metric can take" in report
    for arm in summary["arms"].values():
        for name, e in arm["chosen"].items():
            if name.startswith("per_seed"):
                continue
            low_bound, high_bound = metric_range(name)
            assert math.isnan(e["mean"]) or (
                low_bound <= e["ci_low"] and e["ci_high"] <= high_bound), name


def test_metric_ranges():
    assert metric_range("test_accuracy") == (0.0, 1.0)
    assert metric_range("test_roc_auc") == (0.0, 1.0)
    assert metric_range("gap_macro_f1") == (-1.0, 1.0)
    assert metric_range("ece_test") == (0.0, 1.0)
    assert metric_range("test_r2") == (-math.inf, 1.0)
    assert metric_range("test_rmse") == (0.0, math.inf)
    assert metric_range("gap_loss") == (-math.inf, math.inf)


def test_training_rows_are_counted_never_all_the_rest(tmp_path):
    doc = tiny_document()
    del doc["data"]["train_size"]
    config = parse_config(doc)
    records = fabricate(config, n_train=812)
    _, report = _report(config, records, tmp_path)
    assert "all the rest" not in report and "Training rows per run: 812." in report
    records = fabricate(config, n_train={0: 810, 1: 812})
    _, report = _report(config, records, tmp_path)
    assert "Training rows per run: 810 to 812" in report
    for record in records.values():  # k-fold: per-fold sizes in the record's fold details
        record["folds"] = [dict(record["metrics"]) for _ in range(3)]
        record["fold_details"] = [{"fold": j, "n_train": 540 + (j > 0)} for j in range(3)]
        record["n_train"] = 540
    summary, report = _report(config, records, tmp_path)
    assert summary["data"]["n_train"] == [540, 541] and summary["data"]["folds"] == 3
    assert "Training rows per run: 540 to 541" in report
    assert "- Folds: 3 per seed; each run's metrics are the means over its folds" in report


def test_orthonormal_note_and_its_arithmetic(tmp_path):
    import torch

    import holonomic as hn

    # the note's claim: W (out x in, out > in) with W^T W = s^2 I has mean squared row norm
    # s^2 in / out (trace(W W^T) = trace(W^T W) = s^2 in), so the rms row norm is
    # s sqrt(in/out) and the mean row norm at most that
    out_f, in_f, s = 12, 5, 0.7
    w = hn.Orthonormal(over="columns", scale=s).project(
        torch.randn(out_f, in_f, generator=torch.Generator().manual_seed(0),
                    dtype=torch.float64))
    assert torch.allclose(w.T @ w, s ** 2 * torch.eye(in_f, dtype=torch.float64), atol=1e-12)
    rows = w.norm(dim=1)
    assert float(rows.pow(2).mean()) == pytest.approx(s ** 2 * in_f / out_f, rel=1e-12)
    assert float(rows.mean()) <= s * math.sqrt(in_f / out_f) + 1e-12
    config = _config(seeds=2)
    _, report = _report(config, fabricate(config), tmp_path)
    assert "for non-square layers the mean row norm is not the scale s" in report
    assert "s^2 in/out" in report and "s sqrt(in/out)" in report
    config = _config(seeds=2, arms=("none", "weight_decay", "fixed_norm"))
    _, report = _report(config, fabricate(config), tmp_path)
    assert "non-square" not in report


# --- what the report states ---------------------------------------------------------

def test_report_states_scheme_features_layers_task_and_weights(tmp_path):
    from holonomic.study.data import describe_scheme, load_dataset, make_splits

    config = _config(seeds=2, selection="val_macro_f1")
    names = tuple(f"sensor_{i}" for i in range(25))
    records = fabricate(config, feature_names=names, weights=True)
    summary, report = _report(config, records, tmp_path)
    dataset = load_dataset(config)
    (split,) = make_splits(dataset, config.data, config.seeds[0])
    scheme = describe_scheme(config.data, dataset, config.seeds[0])
    assert scheme.startswith("hold-out per seed, stratified by class: test 0.35 and "
                             "validation 0.25 of all rows; training: 64 rows subsampled")
    sizes = (f"training 64, validation {len(split.y_val)}, test {len(split.y_test)} rows "
             f"(seed {config.seeds[0]})")
    assert scheme.endswith(sizes + ".") and summary["data"]["scheme"] == scheme[:-1]
    assert f"- Split: {scheme} Features" in report
    assert ("Feature columns: 25 used: " + ", ".join(f"`sensor_{i}`" for i in range(20))
            + " and 5 more") in report
    assert "`sensor_20`" not in report
    assert summary["data"]["feature_names"] == list(names)
    assert "| fixed_norm | row radius" in report and "| `0.weight`, `2.weight` |" in report
    assert "- Task: classification; metrics per split: accuracy, balanced accuracy" in report
    assert "best mean `val_macro_f1` over seeds (larger is better" in report
    assert "`runs/<run key>.pt`" in report and "weights_only=True" in report
    assert "`0123456789abcdef`" in report  # data fingerprint


def test_report_without_feature_names_or_weights_says_so(tmp_path):
    config = _config(seeds=2)
    _, report = _report(config, fabricate(config), tmp_path)
    assert "Feature columns: not recorded by these runs." in report
    assert ".pt`" not in report


def test_caveats_kept_and_selection_choice_added(tmp_path):
    config = _config(seeds=2, selection="val_balanced_accuracy")
    _, report = _report(config, fabricate(config), tmp_path)
    assert "## Caveats (what this does and does not show)" in report
    assert "it is not evidence that they are equal" in report
    # Holm corrects over the arms (per metric), not over the metrics: the caveat says so
    assert "nothing corrects over the several metrics" in report
    assert ("The selection metric (`val_balanced_accuracy`) is a choice made in the study "
            "file") in report


def test_report_markdown_from_summary_alone(tmp_path):
    """report_markdown can be rebuilt from summary.json (no records at hand)."""
    config = _config(seeds=2, selection=None)
    records = fabricate(config, "regression")
    summary, report = _report(config, records, tmp_path)
    summary = storage.loads((tmp_path / "summary.json").read_text())
    assert report_markdown(config, summary, "invented records", []) == report


def test_selection_metric_is_the_configs_resolution():
    """The report selects by ``holonomic.study.config.selection_metric(config, task)`` (the
    study's own resolution of ``study.selection``): the task's default, or the metric set."""
    from holonomic.study.config import selection_metric
    from holonomic.study.tasks import Task

    records = fabricate(_config(selection=None), "regression")
    for record in records.values():  # MAE prefers index 0, RMSE index 1
        record["metrics"]["val_mae"] = 40.0 + record["setting_index"]
        record["metrics"]["val_rmse"] = 60.0 - record["setting_index"]
    for selection, index in ((None, 1), ("val_mae", 0)):
        config = _config(selection=selection)
        expected = selection_metric(config, Task("regression"))
        assert study_metrics(config, records).selection == expected == (selection or
                                                                        "val_rmse")
        chosen = select_settings(config, records)
        assert all(chosen[a.name].index == index for a in config.arms if len(a.grid) > 1)
