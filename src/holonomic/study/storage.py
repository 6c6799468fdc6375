"""Crash-safe storage of a study directory.

Layout of ``--out DIR``::

    DIR/study.json                           the study definition (see write_study_record)
    DIR/runs/<arm>-<strength>-s<seed>.json   one finished run each (written atomically)
    DIR/audits/<arm>-<strength>-s<seed>.jsonl  that run's audit (renamed into place)
    DIR/results.csv, summary.json, report.md, *.png   (unsharded runs and --report-only)

A run's file name depends only on its arm, strength and seed, so processes that split the
run list between them (shards, workers) never write the same file, and merging is a
directory listing. Every file is written to a hidden temporary file in the same directory
and then renamed with :func:`os.replace`, so an interrupted study leaves either the old file
or the new one, never half of one; leftover temporaries (``.*.tmp``) are ignored on reading
and removed by the next run.
"""

from __future__ import annotations

import json
import math
import os
import re
import socket
import time
from pathlib import Path
from typing import Any, Iterable

from holonomic.study.config import StudyConfigError

__all__ = ["atomic_write_text", "audit_path", "read_records", "remove_stale_temporaries",
           "write_record", "write_study_record"]

RUNS_DIR = "runs"
AUDITS_DIR = "audits"
STUDY_RECORD = "study.json"


_HOST = re.sub(r"[^A-Za-z0-9]", "-", socket.gethostname()) or "host"
#: Temporaries of other machines (shards on a shared folder) are removed only when older.
FOREIGN_TEMPORARY_AGE_S = 24 * 3600.0


def temporary_path(path: str | Path, keep_suffix: bool = False) -> Path:
    """Hidden temporary next to ``path`` naming this process and host:
    ``.<name>.<pid>-<host>.tmp`` (``.<stem>.<pid>-<host>.tmp<suffix>`` with ``keep_suffix``,
    for writers that choose the format by suffix)."""
    path = Path(path)
    tag = f"{os.getpid()}-{_HOST}"
    if keep_suffix:
        return path.parent / f".{path.stem}.{tag}.tmp{path.suffix}"
    return path.parent / f".{path.name}.{tag}.tmp"


def _write_synced(handle, text: str) -> None:
    """Write ``text`` to the open text file ``handle``, flush it to disk, close it."""
    with handle:
        handle.write(text)
        handle.flush()
        os.fsync(handle.fileno())


def atomic_write_text(path: str | Path, text: str) -> None:
    """Write ``text`` to ``path`` atomically (temporary file, fsync, ``os.replace``)."""
    path = Path(path)
    tmp = temporary_path(path)
    try:
        _write_synced(open(tmp, "w", encoding="utf-8", newline=""), text)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def atomic_write_bytes_from(path: str | Path, writer) -> None:
    """Call ``writer(temporary_path)`` and rename the result onto ``path`` (for plots)."""
    path = Path(path)
    tmp = temporary_path(path, keep_suffix=True)
    try:
        writer(tmp)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def _clean(value: Any) -> Any:
    """JSON-safe copy: non-finite floats become the strings "nan", "inf", "-inf"."""
    if isinstance(value, float) and not math.isfinite(value):
        return "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    return value


def _restore(value: Any) -> Any:
    if value in ("nan", "inf", "-inf"):
        return float(value)
    if isinstance(value, dict):
        return {k: _restore(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_restore(v) for v in value]
    return value


def dumps(value: Any) -> str:
    """Strict JSON text (non-finite floats as strings), sorted keys, indented."""
    return json.dumps(_clean(value), indent=1, sort_keys=True, allow_nan=False) + "\n"


def loads(text: str) -> Any:
    return _restore(json.loads(text))


def runs_dir(out_dir: str | Path) -> Path:
    return Path(out_dir) / RUNS_DIR


def audits_dir(out_dir: str | Path) -> Path:
    return Path(out_dir) / AUDITS_DIR


def audit_path(out_dir: str | Path, key: str) -> Path:
    """Where run ``key``'s audit lives: ``DIR/audits/<key>.jsonl``."""
    return audits_dir(out_dir) / f"{key}.jsonl"


def write_record(out_dir: str | Path, record: dict[str, Any]) -> Path:
    """Store one run's record as ``DIR/runs/<key>.json`` (atomically)."""
    path = runs_dir(out_dir) / f"{record['key']}.json"
    atomic_write_text(path, dumps(record))
    return path


def read_records(out_dir: str | Path, keys: Iterable[str] | None = None) -> dict[str, dict]:
    """Finished runs under ``DIR/runs`` keyed by run key (temporaries are skipped)."""
    directory = runs_dir(out_dir)
    if not directory.is_dir():
        return {}
    wanted = None if keys is None else set(keys)
    records = {}
    for path in sorted(directory.glob("*.json")):
        if path.name.startswith("."):
            continue
        key = path.stem
        if wanted is not None and key not in wanted:
            continue
        records[key] = loads(path.read_text(encoding="utf-8"))
    return records


def _writer_alive(path: Path) -> bool:
    """Whether the process that writes a temporary may still be writing it.

    On this host: whether the process named in the name runs. On another host (shards on a
    shared folder), its processes cannot be seen: the temporary counts as alive until it is
    older than :data:`FOREIGN_TEMPORARY_AGE_S`.
    """
    try:
        tag = path.name.split(".tmp")[0].rsplit(".", 1)[1]
        pid_text, _, host = tag.partition("-")
        pid = int(pid_text)
    except (IndexError, ValueError):
        return False
    if host and host != _HOST:
        try:
            return time.time() - path.stat().st_mtime < FOREIGN_TEMPORARY_AGE_S
        except FileNotFoundError:
            return True
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def remove_stale_temporaries(out_dir: str | Path) -> int:
    """Delete temporaries left by interrupted processes; returns how many.

    A temporary whose writing process may still run is left alone (see
    :func:`_writer_alive`), so studies and shards that share a directory, on this machine or
    others, do not delete each other's files in flight.
    """
    removed = 0
    for directory in (Path(out_dir), runs_dir(out_dir), audits_dir(out_dir)):
        if directory.is_dir():
            for path in directory.glob(".*.tmp*"):
                if not _writer_alive(path):
                    path.unlink(missing_ok=True)
                    removed += 1
    return removed


# ---------------------------------------------------------------------------------------
# The study record: DIR/study.json


class StudyRecordMismatch(StudyConfigError):
    """``DIR/study.json`` describes a different study (or shard count) than this process."""


def _read_study_record(path: Path, attempts: int = 50, pause: float = 0.1) -> dict[str, Any]:
    """Read ``study.json``; retry briefly in case another process is still writing it (only
    possible on file systems without hard links, where the exclusive-create fallback is used)."""
    for attempt in range(attempts):
        try:
            return loads(path.read_text(encoding="utf-8"))
        except (json.JSONDecodeError, FileNotFoundError):
            if attempt == attempts - 1:
                raise
            time.sleep(pause)
    raise AssertionError("unreachable")


def _create_exclusive(path: Path, text: str) -> bool:
    """Create ``path`` holding ``text`` only if it does not exist; True if this call made it.

    The text is written to a temporary file, flushed, and hard-linked onto ``path``:
    ``link`` fails if ``path`` exists, so among processes starting at once exactly one
    creates the file and nobody ever sees it half written. Where hard links are not
    supported, ``open(O_CREAT | O_EXCL)`` is used instead (readers then retry).
    """
    tmp = temporary_path(path)
    try:
        _write_synced(open(tmp, "w", encoding="utf-8", newline=""), text)
        try:
            os.link(tmp, path)
            return True
        except FileExistsError:
            return False
        except OSError:  # no hard links here (some network or FAT file systems)
            try:
                fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                return False
            _write_synced(os.fdopen(fd, "w", encoding="utf-8", newline=""), text)
            return True
    finally:
        tmp.unlink(missing_ok=True)


def write_study_record(out_dir: str | Path, definition: dict[str, Any],
                       shards: int | None) -> Path:
    """Record the study that runs in ``out_dir`` (``DIR/study.json``); refuse a different one.

    ``definition`` is the study as plain data (``StudyConfig.to_dict()`` plus the training
    fingerprint). Unsharded runs (``shards=None``) replace the record, so a study whose
    grids grow can be rerun into the same directory. Sharded runs create it exclusively
    (:func:`_create_exclusive`, safe when many shards start at once); when it exists they
    accept an identical definition and refuse a different one, and refuse a different
    shard count (shards of different counts would split the runs differently and could
    train the same run twice).

    Raises:
        StudyRecordMismatch: naming the differing parts and what to do.
    """
    path = Path(out_dir) / STUDY_RECORD
    record = {"definition": definition, "shards": shards}
    if shards is None:
        atomic_write_text(path, dumps(record))
        return path
    if _create_exclusive(path, dumps(record)):
        return path
    existing = _read_study_record(path)
    theirs = existing.get("definition", {})
    if _clean(theirs) != _clean(definition):
        parts = sorted(k for k in set(theirs) | set(definition)
                       if _clean(theirs.get(k)) != _clean(definition.get(k)))
        raise StudyRecordMismatch(
            f"{str(path)!r} records a different study (differs in: {', '.join(parts)}); every "
            "shard must run the same study file. Use a new --out directory, or delete "
            f"{str(path)!r} if you changed the study on purpose (finished runs with the same "
            "data, model and budget are reused)")
    if existing.get("shards") not in (None, shards):
        raise StudyRecordMismatch(
            f"{str(path)!r} says this directory is run as {existing['shards']} shards, got "
            f"--shard .../{shards}; shards of different counts split the runs differently. "
            f"Use --shard i/{existing['shards']}, or delete {str(path)!r} once no shard of "
            "the old count is running")
    return path
