"""Experiment harness: does holding weights on a constraint set beat weight decay?

An arm is a training recipe: a regulariser (:mod:`holonomic.study.regularisers`), an
optimiser (:mod:`holonomic.study.optimisers`: ``holonomic.Langevin`` and its relatives,
``torch.optim.SGD``, ``torch.optim.AdamW``), optional per-layer settings and its own search
space. Every arm gets the same number of trials (:mod:`holonomic.study.search`) and the same
epochs. A study trains one model per (arm, trial, seed), chooses each arm's setting on the
validation split, and compares the chosen
settings on the test split against the baseline arm (``study.baseline``, default weight
decay), paired by seed (t interval, Wilcoxon signed-rank test with Holm's adjustment over
the arms, d_z and power figures). Every run is audited (``holonomic.audit``). An arm may
add an ensemble phase (``[arms.NAME.ensemble]``: sampling after training,
:mod:`holonomic.study.ensemble`); the report then compares the ensemble with the trained
network. Command line: ``holonomic study FILE.toml --out DIR`` or ``holonomic study --demo
--out DIR``; on a cluster, ``--shard i/n`` per machine, then ``--report-only``
(docs/cluster.md).

A refused command changes nothing on disk: the data, the stored runs (validated, and of
the same study and the same data contents) and the model are checked before the output
directory is created or ``study.json`` written (:mod:`holonomic.study.execution`).
"""

from __future__ import annotations

import sys
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
from holonomic.study.optimisers import OPTIMISERS
from holonomic.study.regularisers import REGULARISERS
from holonomic.study.search import Trial, plan_trials
from holonomic.study.storage import InvalidRunRecord, StudyOutputError
from holonomic.study.trained import class_probabilities, load_trained, predict

__all__ = [
    "ARM_NAMES",
    "IncompleteStudyError",
    "InvalidRunRecord",
    "OPTIMISERS",
    "REGULARISERS",
    "StudyConfig",
    "StudyConfigError",
    "StudyOutputError",
    "Trial",
    "class_probabilities",
    "demo_config",
    "load_config",
    "load_trained",
    "parse_config",
    "plan_trials",
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


def study_definition(config: StudyConfig, data_fingerprint: str | None) -> dict[str, Any]:
    """The study as recorded in ``DIR/study.json``: ``config.to_dict()``, the training and
    data fingerprints and, with a model factory, ``model_source`` (the factory module's
    file and a hash of its contents, which the training fingerprint covers)."""
    out = {**config.to_dict(), "training_fingerprint": config.training_fingerprint(),
           "data_fingerprint": data_fingerprint}
    if config.model.factory is not None:
        from holonomic.study.config import factory_source_file, factory_source_hash

        path = factory_source_file(config.model.factory, config.base_dir)
        out["model_source"] = {
            "file": None if path is None else path.name,
            "sha256": factory_source_hash(config.model.factory, config.base_dir)}
    return out


_definition = study_definition


def run_study(config: StudyConfig, out_dir: str | Path, workers: int = 1,
              progress: bool = True, plots: bool = True,
              shard: tuple[int, int] | None = None,
              rerun_invalid: bool = False) -> dict[str, Any]:
    """Run (or resume) a study into ``out_dir`` and write every output.

    Returns the summary (the contents of ``summary.json``). Finished runs found under
    ``out_dir/runs`` are reused, so rerunning after an interruption only trains what is
    missing. Every run is audited (``out_dir/audits/<run key>.jsonl``).

    Nothing is created or written before every check has passed: the data load, the stored
    runs are valid run records (:class:`InvalidRunRecord` otherwise) of this study made on
    the same data (``StudyConfigError`` otherwise: training fingerprint, ensemble settings,
    data fingerprint), and a model factory builds. Then ``out_dir`` is created and
    ``study.json`` written (it records the data fingerprint too).

    With ``rerun_invalid``, invalid run files are not an error: they (with their audit and
    weights files) are moved into ``out_dir/invalid/<time>/`` (never deleted; each move is
    printed to stderr) and their runs are trained again.

    With ``shard=(i, n)`` (0-based ``i``, see :mod:`holonomic.study.sharding`) only shard
    ``i``'s runs are trained and no shared output is written (results.csv, summary.json,
    report.md, plots: :func:`report_study` writes them once every shard is done); the
    return value then describes the shard: ``{"shard": [i, n], "runs": {"total", "ok",
    "failed", "diverged"}, "keys": [...]}``. Every shard must use the same study and the
    same ``n``; ``out_dir/study.json`` records them and a mismatch raises
    :class:`StudyConfigError`.

    Raises:
        StudyConfigError: refused (nothing changed on disk), or :class:`StudyOutputError`
            (a subclass) when a file cannot be written (disk full: free space and rerun).
    """
    from holonomic.study import storage
    from holonomic.study.execution import (data_fingerprint, halving_rung, prepare_runs,
                                           run_all, run_halving)
    from holonomic.study.runner import check_selection, plan_runs
    from holonomic.study.sharding import shard_runs

    check_selection(config)  # a selection metric the task lacks: refused before any output
    specs = plan_runs(config)
    if config.halving is not None:
        if shard is not None:
            raise StudyConfigError("study config: 'study.halving' cannot be combined with "
                                   "--shard (which trials continue is known only after "
                                   "every rung run); run without --shard, or set "
                                   "study.halving = false")
        specs = halving_rung(config) + specs  # every run it may train, for the checks
    if shard is not None:
        specs = shard_runs(specs, *shard)
    invalid: list[InvalidRunRecord] | None = [] if rerun_invalid else None
    done = prepare_runs(config, out_dir, specs, invalid)
    definition = _definition(config, data_fingerprint(config))
    storage.make_output_dir(out_dir)
    storage.write_study_record(out_dir, definition, None if shard is None else shard[1])
    if invalid:
        moved = storage.move_aside(out_dir, [error.key for error in invalid])
        for error in invalid:
            print(f"holonomic study: {error.path!r} is not a valid run record "
                  f"({error.problem}); its run is redone", file=sys.stderr)
        for source, target in moved:
            print(f"holonomic study: moved {str(source)!r} to {str(target)!r}", file=sys.stderr)
    if config.halving is not None:
        records = run_halving(config, out_dir, workers=workers, progress=progress, done=done)
    else:
        records = run_all(config, out_dir, workers=workers, progress=progress, specs=specs,
                          done=done)
    if shard is None:
        return _write_report(config, out_dir, records, plots)
    statuses = [records[s.key]["status"] for s in specs]
    return {"shard": list(shard),
            "runs": {"total": len(specs), "ok": statuses.count("ok"),
                     "failed": statuses.count("failed"),
                     "diverged": statuses.count("diverged")},
            "keys": [s.key for s in specs]}


def report_study(config: StudyConfig, out_dir: str | Path, plots: bool = True) -> dict[str, Any]:
    """Merge the finished runs under ``out_dir`` into results.csv, summary.json, report.md.

    Trains nothing and, when it refuses, writes nothing. Refuses (:class:`IncompleteStudyError`,
    listing the missing runs and their plan numbers) unless every run of the study is
    finished: a report over a subset would choose settings from fewer seeds for some arms
    and break the pairing by seed. Invalid run files and runs of a different study (data
    settings or contents, model or budget) are refused as in :func:`run_study`. With
    ``study.halving`` the runs of the study are the rung runs and the full runs of the
    trials the rung kept.
    """
    from holonomic.study import storage
    from holonomic.study.execution import (check_compatible, data_fingerprint,
                                           halving_full_runs, halving_rung)
    from holonomic.study.runner import plan_runs
    from holonomic.study.sharding import missing_runs_message

    storage.check_output_dir(out_dir)
    specs = plan_runs(config)
    if config.halving is not None:  # the rung, then the full runs of the trials it kept
        rung = halving_rung(config)
        records = storage.read_records(out_dir, [s.key for s in rung])
        specs = rung + (halving_full_runs(config, records)[0]
                        if len(records) == len(rung) else specs)
    fingerprint = data_fingerprint(config)
    records = storage.read_records(out_dir, [s.key for s in specs])
    check_compatible(config, records, out_dir, fingerprint)
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
