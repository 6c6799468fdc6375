"""Selection uses the validation split only; failed settings are not eligible."""

from __future__ import annotations

import math

import numpy as np

from holonomic.study.report import build_summary, select_settings
from holonomic.study.runner import plan_runs, record_metric_names
from holonomic.study.tasks import Task

#: The metric names of a run record of a three-class study.
_METRIC_NAMES = record_metric_names(Task("classification", 3))


def _records(config, rng):
    records = {}
    for spec in plan_runs(config):
        metrics = {name: float(rng.uniform(0.2, 0.9)) for name in _METRIC_NAMES}
        records[spec.key] = {"key": spec.key, "arm": spec.arm, "status": "ok",
                             "seed": spec.seed, "strength": spec.strength,
                             "setting_index": spec.index,
                             "n_train": 64, "grad_evals": 10, "layers": [],
                             "metrics": metrics}
    return records


def test_selection_ignores_test_metrics(tiny_config):
    rng = np.random.default_rng(0)
    records = _records(tiny_config, rng)
    chosen = select_settings(tiny_config, records)
    for record in records.values():
        for name in ("test_accuracy", "test_loss", "gap_accuracy", "gap_loss", "ece_test"):
            record["metrics"][name] = float(rng.uniform(0, 1))
    assert select_settings(tiny_config, records) == chosen
    for arm in tiny_config.arms:
        means = [np.mean([records[s.key]["metrics"]["val_accuracy"] for s in plan_runs(
            tiny_config) if s.arm == arm.name and s.index == i]) for i in range(len(arm.grid))]
        assert chosen[arm.name].index == int(np.argmax(means))


def test_failed_setting_is_not_eligible(tiny_config):
    records = _records(tiny_config, np.random.default_rng(1))
    best = select_settings(tiny_config, records)["fixed_norm"].index
    failed = next(s for s in plan_runs(tiny_config)
                  if s.arm == "fixed_norm" and s.index == best)
    records[failed.key]["status"] = "failed"
    records[failed.key]["metrics"] = {name: math.nan for name in _METRIC_NAMES}
    chosen = select_settings(tiny_config, records)
    assert chosen["fixed_norm"].index not in (best, None)
    summary = build_summary(tiny_config, records, chosen)
    assert summary["runs"]["failed"] == 1
