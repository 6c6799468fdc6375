"""Experiment harness: does holding weights on a constraint set beat weight decay?

A study trains one model per (arm, grid point, seed) with ``holonomic.Langevin`` under one
shared budget, chooses each arm's setting on the validation split, and compares the chosen
settings on the test split against weight decay, paired by seed (t interval and Wilcoxon
signed-rank test). Every run is audited (``holonomic.audit``). An arm may add an ensemble
phase (``[arms.NAME.ensemble]``: sampling after training, :mod:`holonomic.study.ensemble`);
the report then compares the ensemble with the trained network. Command line:
``holonomic study FILE.toml --out DIR`` or ``holonomic study --demo --out DIR``; on a
cluster, ``--shard i/n`` per machine, then ``--report-only`` (docs/cluster.md).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from holonomic.study.config import (
    ARM_NAMES,
    StudyConfig,
    StudyConfigError,
    load_config,
    parse_config,
)
from holonomic.study.demo import demo_config
from holonomic.study.trained import class_probabilities, load_trained, predict

__all__ = [
    "ARM_NAMES",
    "IncompleteStudyError",
    "StudyConfig",
    "StudyConfigError",
    "class_probabilities",
    "demo_config",
    "load_config",
    "load_trained",
    "parse_config",
    "predict",
    "report_study",
    "run_study",
]


class IncompleteStudyError(RuntimeError):
    """``--report-only`` found runs of the study that are not finished.

    Attributes:
        missing: ``(plan number, run key)`` of each missing run.
    """

    def __init__(self, message: str, missing: list[tuple[int, str]]) -> None:
        super().__init__(message)
        self.missing = missing


def _definition(config: StudyConfig) -> dict[str, Any]:
    return {**config.to_dict(), "training_fingerprint": config.training_fingerprint()}


def run_study(config: StudyConfig, out_dir: str | Path, workers: int = 1,
              progress: bool = True, plots: bool = True,
              shard: tuple[int, int] | None = None) -> dict[str, Any]:
    """Run (or resume) a study into ``out_dir`` and write every output.

    Returns the summary (the contents of ``summary.json``). Finished runs found under
    ``out_dir/runs`` are reused, so rerunning after an interruption only trains what is
    missing. Every run is audited (``out_dir/audits/<run key>.jsonl``).

    With ``shard=(i, n)`` (0-based ``i``, see :mod:`holonomic.study.sharding`) only shard
    ``i``'s runs are trained and no shared output is written (results.csv, summary.json,
    report.md, plots: :func:`report_study` writes them once every shard is done); the
    return value then describes the shard: ``{"shard": [i, n], "runs": {"total", "ok",
    "failed", "diverged"}, "keys": [...]}``. Every shard must use the same study and the
    same ``n``; ``out_dir/study.json`` records them and a mismatch raises
    :class:`StudyConfigError`.
    """
    from holonomic.study import storage
    from holonomic.study.runner import check_selection, plan_runs, run_all
    from holonomic.study.sharding import shard_runs

    check_selection(config)  # a selection metric the task lacks: refused before any output
    Path(out_dir).mkdir(parents=True, exist_ok=True)
    storage.write_study_record(out_dir, _definition(config), None if shard is None else shard[1])
    if shard is None:
        records = run_all(config, out_dir, workers=workers, progress=progress)
        return _write_report(config, out_dir, records, plots)
    specs = shard_runs(plan_runs(config), *shard)
    records = run_all(config, out_dir, workers=workers, progress=progress, specs=specs)
    statuses = [records[s.key]["status"] for s in specs]
    return {"shard": list(shard),
            "runs": {"total": len(specs), "ok": statuses.count("ok"),
                     "failed": statuses.count("failed"),
                     "diverged": statuses.count("diverged")},
            "keys": [s.key for s in specs]}


def report_study(config: StudyConfig, out_dir: str | Path, plots: bool = True) -> dict[str, Any]:
    """Merge the finished runs under ``out_dir`` into results.csv, summary.json, report.md.

    Trains nothing. Refuses (:class:`IncompleteStudyError`, listing the missing runs and
    their plan numbers) unless every run of the study is finished: a report over a subset
    would choose settings from fewer seeds for some arms and break the pairing by seed.
    Runs of a different study (data, model or budget) are refused as in :func:`run_study`.
    """
    from holonomic.study import storage
    from holonomic.study.runner import check_compatible, plan_runs
    from holonomic.study.sharding import missing_runs_message

    specs = plan_runs(config)
    records = storage.read_records(out_dir, [s.key for s in specs])
    check_compatible(config, records, out_dir)
    missing = [(k, s.key) for k, s in enumerate(specs) if s.key not in records]
    if missing:
        raise IncompleteStudyError(missing_runs_message(missing, len(specs)), missing)
    return _write_report(config, out_dir, records, plots)


def _write_report(config: StudyConfig, out_dir: str | Path, records: dict[str, dict],
                  plots: bool) -> dict[str, Any]:
    from holonomic.study.data import load_dataset
    from holonomic.study.report import write_outputs

    description = load_dataset(config).description
    return write_outputs(config, out_dir, records, description, plots=plots)
