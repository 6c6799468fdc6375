"""Study outputs: selection by validation, results.csv, summary.json, report.md and plots.

The work is done in :mod:`holonomic.study.selection` (each arm's chosen trial, budget and
edge flags), :mod:`holonomic.study.summary` (summary.json and results.csv),
:mod:`holonomic.study.markdown` (report.md) and :mod:`holonomic.study.plots`; they take
run records as plain data (:mod:`holonomic.study.records`). This module re-exports their
public names, keeps the study-file-level entry points (``select_settings(config,
records)`` ...) and writes the files (:func:`write_outputs`).

Protocol: each arm's setting is the trial with the best mean validation metric over seeds
(``study.selection``, any ``val_<metric>`` of the task; larger or smaller is better as
:meth:`holonomic.study.tasks.Task.higher_is_better` says; ties go to the earlier trial; a
trial with a failed run is not eligible; successive-halving rung runs are never chosen).
Test metrics are computed by every run and stored in ``results.csv`` so that a resumed or
merged study needs no recomputation, but they are never used for the choice; the report
quotes test metrics only for the chosen settings. Every other arm is compared with the
baseline arm (``study.baseline``) seed by seed (``summary["comparisons"]``): mean
difference with a 95% t interval, Wilcoxon p raw and Holm-adjusted over the arms per
metric, Cohen's d_z, the difference detectable with 80% power and, with
``study.min_effect``, the seeds needed to detect that difference
(:mod:`holonomic.study.stats`).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping

from holonomic.study import storage
from holonomic.study.config import StudyConfig, StudyConfigError, selection_metric
from holonomic.study.markdown import report_markdown
from holonomic.study.records import RunRecord, as_records
from holonomic.study.selection import (
    Selection, StudyMetrics, group_trials, read_metrics, select_trials)
from holonomic.study.summary import (
    LEADING_COLUMNS, SETTING_COLUMNS, data_summary, summary_numbers)
from holonomic.study.summary import csv_columns as _csv_columns
from holonomic.study.summary import results_table as _results_table
from holonomic.study.tasks import metric_range

__all__ = ["LEADING_COLUMNS", "SETTING_COLUMNS", "Selection", "StudyMetrics",
           "build_summary", "csv_columns", "metric_range", "report_markdown",
           "results_table", "select_settings", "study_metrics", "write_outputs"]


def study_metrics(config: StudyConfig, records: Mapping[str, Any]) -> StudyMetrics:
    """The task, metric names and selection metric (``study.selection``, or the task's
    default) of a study, read from its records.

    Raises:
        StudyConfigError: the selection metric is not a validation metric of the records.
    """
    found = read_metrics(records)
    selection = selection_metric(config, found.task)
    allowed = [f"val_{m}" for m in found.metrics]
    if selection not in allowed:
        raise StudyConfigError(
            f"study config: 'study.selection' = {selection!r} is not a validation metric of "
            f"this {found.task.name} study's runs; allowed: {', '.join(allowed)}")
    return StudyMetrics(found.task, found.metrics, selection, found.names)


def _arm_names(config: StudyConfig) -> list[str]:
    return [a.name for a in config.arms]


def select_settings(config: StudyConfig, records: Mapping[str, Any],
                    metrics: StudyMetrics | None = None) -> dict[str, Selection]:
    """Each arm's chosen trial (:func:`holonomic.study.selection.select_trials`) by the
    study's selection metric, in the study's arm order."""
    metrics = study_metrics(config, records) if metrics is None else metrics
    return select_trials(records, metrics.selection, metrics.selection_larger_is_better,
                         _arm_names(config))


def csv_columns(config: StudyConfig, records: Mapping[str, Any],
                metrics: StudyMetrics | None = None) -> tuple[str, ...]:
    """Columns of ``results.csv`` (:func:`holonomic.study.summary.csv_columns`)."""
    metrics = study_metrics(config, records) if metrics is None else metrics
    return _csv_columns(records, metrics)


def results_table(config: StudyConfig, records: Mapping[str, Any],
                  chosen: Mapping[str, Selection], metrics: StudyMetrics | None = None) -> str:
    """``results.csv`` text (:func:`holonomic.study.summary.results_table`)."""
    metrics = study_metrics(config, records) if metrics is None else metrics
    return _results_table(records, chosen, metrics)


def _meanings(config: StudyConfig) -> dict[str, str]:
    out = {}
    for arm in config.arms:
        try:
            out[arm.name] = arm.meaning
        except (AttributeError, KeyError):  # an arm whose strength has no fixed meaning
            out[arm.name] = ""
    return out


def _scheme(config: StudyConfig) -> str:
    """One sentence on how rows are split, with the part sizes of the first seed's splits
    (:func:`holonomic.study.data.describe_scheme`)."""
    from holonomic.study.data import describe_scheme, load_dataset

    return describe_scheme(config.data, load_dataset(config), config.seeds[0]).rstrip(".")


def build_summary(config: StudyConfig, records: Mapping[str, Any],
                  chosen: Mapping[str, Selection],
                  metrics: StudyMetrics | None = None) -> dict[str, Any]:
    """Everything the report states, as plain data (written to summary.json): the study
    definition, the data, and :func:`holonomic.study.summary.summary_numbers`."""
    metrics = study_metrics(config, records) if metrics is None else metrics
    numbers = summary_numbers(records, chosen, metrics, config.baseline, config.min_effect,
                              _meanings(config))
    return {"study": config.to_dict(), "task": numbers.pop("task"),
            "data": data_summary(records, _scheme(config)), **numbers}


def _missing_runs(config: StudyConfig, records: Mapping[str, RunRecord]) -> list[str]:
    """Runs the report needs that ``records`` lack: an arm without runs, or a seed of the
    study missing from a full-budget trial."""
    trials = group_trials(records)
    missing = []
    for arm in _arm_names(config):
        if arm not in trials:
            missing.append(f"every run of arm {arm!r}")
            continue
        for trial in trials[arm].values():
            missing += [f"arm {arm!r}, trial {trial.trial}, seed {s}"
                        for s in config.seeds if s not in trial.seeds]
    return missing


def write_outputs(config: StudyConfig, out_dir: str | Path, records: Mapping[str, Any],
                  description: str, plots: bool = True) -> dict[str, Any]:
    """Write results.csv, summary.json, report.md and the plots; returns the summary."""
    out_dir = Path(out_dir)
    typed = as_records(records)
    missing = _missing_runs(config, typed)
    if missing:
        raise RuntimeError(f"{len(missing)} runs are not finished (e.g. {missing[0]}); run "
                           "the study to completion before writing the report")
    metrics = study_metrics(config, typed)
    chosen = select_settings(config, typed, metrics)
    summary = build_summary(config, typed, chosen, metrics)
    summary["data_description"] = description
    storage.atomic_write_text(out_dir / "results.csv", _results_table(typed, chosen, metrics))
    storage.atomic_write_text(out_dir / "summary.json", storage.dumps(summary))
    plot_files: list[str] = []
    if plots:
        from holonomic.study.plots import write_plots

        plot_files = write_plots(config, typed, chosen, out_dir, metrics)
    summary["plots"] = plot_files
    storage.atomic_write_text(out_dir / "summary.json", storage.dumps(summary))
    storage.atomic_write_text(out_dir / "report.md",
                              report_markdown(config, summary, description, plot_files,
                                              metrics))
    return summary
