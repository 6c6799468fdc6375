"""The report's ensemble section for any metric names the phase records (invented records)."""

from __future__ import annotations

import csv
import dataclasses
import io

import numpy as np
import pytest

from holonomic.study import parse_config
from holonomic.study.ensemble_report import METRIC_DIRECTIONS, ensemble_metric_names
from holonomic.study.report import csv_columns, results_table, select_settings, write_outputs
from tests.study.conftest import tiny_document
from tests.study.fabricate import fabricate

#: Invented regression ensemble numbers: the ensemble has a lower RMSE (better), a lower
#: R^2 (worse), the same MAE up to noise, and a larger predictive sd (neither).
REGRESSION_PHASE = {
    "single": {"rmse": lambda s: 55.0 + s, "r2": lambda s: 0.45 + 0.01 * s,
               "mae": lambda s: 44.0 + 0.5 * s, "nll": lambda s: 1.2 + 0.01 * s,
               "sd": lambda s: 0.8 + 0.01 * s},
    "ensemble": {"rmse": lambda s: 53.0 + s + 0.1 * (s % 2),
                 "r2": lambda s: 0.40 + 0.01 * s + 0.001 * (s % 2),
                 "mae": lambda s: 44.0 + 0.5 * s + (0.3 if s % 2 else -0.3),
                 "nll": lambda s: 1.1 + 0.01 * s + 0.002 * (s % 2),
                 "sd": lambda s: 0.9 + 0.01 * s + 0.001 * (s % 2)},
}


def _config():
    doc = tiny_document()
    doc["study"]["seeds"] = 4
    doc["arms"] = {name: doc["arms"][name] for name in ("none", "weight_decay", "fixed_norm")}
    doc["arms"]["fixed_norm"]["ensemble"] = {"temperature": 1.0, "samples": 6, "every": 2,
                                             "burn_in": 3}
    return dataclasses.replace(parse_config(doc), selection=None)


def test_regression_ensemble_metrics_come_from_the_records(tmp_path):
    config = _config()
    records = fabricate(config, "regression", ensemble={"fixed_norm": REGRESSION_PHASE})
    assert ensemble_metric_names(records) == ("rmse", "r2", "mae", "nll", "sd")
    columns = csv_columns(config, records)
    assert columns[-11:] == ("ensemble_status",) + tuple(
        f"{who}_test_{m}" for who in ("single", "ensemble")
        for m in ("rmse", "r2", "mae", "nll", "sd"))
    rows = list(csv.DictReader(io.StringIO(
        results_table(config, records, select_settings(config, records)))))
    row = next(r for r in rows if r["arm"] == "fixed_norm" and r["seed"] == "3")
    assert float(row["ensemble_test_rmse"]) == pytest.approx(56.1)
    assert next(r for r in rows if r["arm"] == "none")["ensemble_test_rmse"] == ""

    summary = write_outputs(config, tmp_path, records, "invented records", plots=False)
    report = (tmp_path / "report.md").read_text()
    entry = summary["ensembles"]["fixed_norm"]
    assert list(entry["metrics"]) == ["rmse", "r2", "mae", "nll", "sd"]
    d = entry["metrics"]["rmse"]["difference"]
    assert d["mean_difference"] == pytest.approx(-2.0 + 0.1 * np.mean([s % 2 for s in range(4)]))
    readings = {line.split("|")[1].strip(): line.split("|")[5].strip()
                for line in report.splitlines()
                if line.startswith("| ") and line.split("|")[1].strip() in entry["metrics"]}
    assert readings == {"rmse": "ensemble lower (better)", "r2": "ensemble lower (worse)",
                        "mae": "cannot tell apart (interval includes 0)",
                        "nll": "ensemble lower (better)",
                        "sd": "ensemble higher (neither is better by itself)"}
    assert "half the squared error of standardised targets" in report
    assert set(entry["mixing"]) == {"train_loss", "weight_norm_output"}


def test_metric_directions_agree_with_the_tasks():
    from holonomic.study.tasks import Task

    for name in ("accuracy", "balanced_accuracy", "macro_f1", "roc_auc", "rmse", "r2", "mae",
                 "loss"):
        assert METRIC_DIRECTIONS[name] == Task.higher_is_better(name)
    assert METRIC_DIRECTIONS["nll"] is False and METRIC_DIRECTIONS["entropy"] is None
