"""Crash-safe storage of a study directory.

Layout of ``--out DIR``::

    DIR/study.json                           the study definition (see write_study_record)
    DIR/runs/<key>.json                      one finished run each (written atomically)
    DIR/audits/<key>.jsonl                   that run's audit (renamed into place)
    DIR/results.csv, summary.json, report.md, *.png   (unsharded runs and --report-only)
    DIR/invalid/<time>/runs/..., audits/...  run files set aside by --rerun-invalid

A run's key (:func:`run_key`: ``<arm>-<strength>-s<seed>`` for an arm that sets at most
its strength, ``<arm>-t<trial>-<hash of its settings>-s<seed>`` otherwise) depends only on
its arm, trial settings, seed and budget fraction, so processes that split the
run list between them (shards, workers) never write the same file, and merging is a
directory listing. Every file is written to a hidden temporary file in the same directory
and then renamed with :func:`os.replace`, so an interrupted study leaves either the old file
or the new one, never half of one; leftover temporaries (``.*.tmp``) are ignored on reading
and removed by the next run.

Run records are checked when read (:func:`validate_record`): a damaged or foreign file is an
:class:`InvalidRunRecord` naming the file; :func:`move_aside` sets such files aside (never
deletes them) so that their runs are redone. A write that fails for lack of space or
permission is a :class:`StudyOutputError` naming the file and what to do.
"""

from __future__ import annotations

import contextlib
import errno
import glob
import hashlib
import json
import math
import os
import re
import socket
import time
from pathlib import Path
from typing import Any, Iterable, Iterator, Mapping

from holonomic.study.config import StudyConfigError

__all__ = ["InvalidRunRecord", "RUN_STATUSES", "StudyOutputError", "atomic_write_text",
           "audit_path", "check_output_dir", "make_output_dir", "move_aside", "output_errors",
           "read_records", "remove_stale_temporaries", "run_key", "validate_record",
           "write_record", "write_study_record"]

RUNS_DIR = "runs"
AUDITS_DIR = "audits"
INVALID_DIR = "invalid"
STUDY_RECORD = "study.json"
#: Valid values of a run record's ``status``.
RUN_STATUSES = ("ok", "failed", "diverged")
#: Keys every run record has (see validate_record for their types).
REQUIRED_RECORD_KEYS = ("key", "arm", "strength", "seed", "status", "metrics", "fingerprint")
#: Command-line flag that sets invalid run files aside and redoes those runs.
RERUN_INVALID_FLAG = "--rerun-invalid"


def run_key(arm: str, settings: Mapping[str, float] | float, seed: int,
            budget_fraction: float = 1.0, trial: int = 0) -> str:
    """File-name key of a run.

    ``settings``: the trial's own settings (:attr:`holonomic.study.search.Trial.settings`;
    a number means ``{"strength": number}``). An arm whose trial sets at most its strength
    (the arms of studies before recipes) keeps the old key ``f"{arm}-{strength!r}-s{seed}"``
    (e.g. ``fixed_norm-0.5-s3``; strength 0.0 when absent); any other trial is
    ``f"{arm}-t{trial}-{hash}-s{seed}"``, ``hash`` the first 8 hex digits of the SHA-256 of
    the settings as canonical JSON (sorted keys, floats). A successive-halving rung run
    (``budget_fraction < 1``) adds ``-h{fraction}``.
    """
    if not isinstance(settings, Mapping):
        settings = {"strength": float(settings)}
    if set(settings) <= {"strength"}:
        key = f"{arm}-{float(settings.get('strength', 0.0))!r}-s{seed}"
    else:
        text = json.dumps({k: float(v) for k, v in settings.items()}, sort_keys=True,
                          separators=(",", ":"))
        digest = hashlib.sha256(text.encode()).hexdigest()[:8]
        key = f"{arm}-t{int(trial)}-{digest}-s{seed}"
    if budget_fraction != 1.0:
        key += f"-h{float(budget_fraction)!r}"
    return key


# ---------------------------------------------------------------------------------------
# Errors while writing


class StudyOutputError(StudyConfigError):
    """A file of the study directory could not be written (disk full, no permission, a
    path that is a file ...); the message names the file and what to do.

    Attributes:
        path: the file or directory that could not be written (a string).
        errno: the operating system's error number (``errno.ENOSPC`` for a full disk), or None.
    """

    def __init__(self, message: str, path: str = "", errno: int | None = None) -> None:
        super().__init__(message)
        self.path = path
        self.errno = errno

    def __reduce__(self):  # keeps path and errno when raised in a worker process
        return (type(self), (str(self), self.path, self.errno))


#: Error numbers of a full disk or exceeded quota.
_NO_SPACE = {errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC), errno.EFBIG}
#: Error numbers of a place the study may not or cannot write to.
_NOT_WRITABLE = {errno.EACCES, errno.EPERM, errno.EROFS, errno.ENOTDIR, errno.EISDIR}


def output_error(exc: OSError, path: str | Path | None = None,
                 default: str | Path | None = None) -> StudyOutputError | None:
    """The :class:`StudyOutputError` for an ``OSError`` raised while writing ``path`` (else
    the file the error names, else ``default``), or None for errors that are not about the
    place written to (those propagate unchanged)."""
    where = path if path is not None else (exc.filename or default)
    where = "" if where is None else str(where)
    named = repr(where) if where else "a file of the study directory"
    reason = exc.strerror or str(exc)
    if exc.errno in _NO_SPACE:
        return StudyOutputError(
            f"no space left while writing {named} ({reason}). Free disk space (or raise the "
            "quota) where the study writes, then rerun the same command: finished runs are "
            "kept and only the missing ones are trained", where, exc.errno)
    if exc.errno in _NOT_WRITABLE:
        return StudyOutputError(
            f"cannot write {named} ({reason}); give an --out directory you can write to",
            where, exc.errno)
    return None


@contextlib.contextmanager
def output_errors(path: str | Path | None = None,
                  default: str | Path | None = None) -> Iterator[None]:
    """Turn a full disk or an unwritable place into a :class:`StudyOutputError` naming
    ``path`` (else the file the error names, else ``default``); other errors pass through."""
    try:
        yield
    except StudyOutputError:
        raise
    except OSError as exc:
        error = output_error(exc, path, default)
        if error is None:
            raise
        raise error from exc


def check_output_dir(out_dir: str | Path) -> None:
    """Refuse an ``--out`` that is a file or cannot be created or written; creates nothing.

    Raises:
        StudyOutputError: naming the path and what is wrong.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise StudyOutputError(f"--out {str(out)!r} is a file, not a directory; give a "
                               "directory (it is created if missing)", str(out))
    existing = out
    while not existing.exists():
        if existing.parent == existing:
            break
        existing = existing.parent
    if existing.exists() and not existing.is_dir():
        raise StudyOutputError(f"--out {str(out)!r} cannot be created: {str(existing)!r} is a "
                               "file, not a directory", str(out))
    if existing.is_dir() and not os.access(existing, os.W_OK | os.X_OK):
        what = "is" if existing == out else f"would be created in {str(existing)!r}, which is"
        raise StudyOutputError(f"--out {str(out)!r} {what} not writable; give a directory you "
                               "can write to", str(out), errno.EACCES)


def make_output_dir(out_dir: str | Path) -> Path:
    """Create ``out_dir`` (and its parents); a failure is a :class:`StudyOutputError`."""
    out = Path(out_dir)
    check_output_dir(out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StudyOutputError(f"cannot create --out directory {str(out)!r}: "
                               f"{exc.strerror or exc}; give a directory you can write to",
                               str(out), exc.errno) from exc
    return out


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
    """Write ``text`` to ``path`` atomically (temporary file, fsync, ``os.replace``).

    Raises:
        StudyOutputError: the disk is full or ``path`` cannot be written (naming it); the
            old file, if any, is left as it was and no temporary remains.
    """
    path = Path(path)
    tmp = temporary_path(path)
    try:
        with output_errors(path):
            _write_synced(open(tmp, "w", encoding="utf-8", newline=""), text)
            os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def atomic_write_bytes_from(path: str | Path, writer) -> None:
    """Call ``writer(temporary_path)`` and rename the result onto ``path`` (for plots and
    weights). Errors as in :func:`atomic_write_text`."""
    path = Path(path)
    tmp = temporary_path(path, keep_suffix=True)
    try:
        with output_errors(path):
            writer(tmp)
            os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


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


class InvalidRunRecord(StudyConfigError):
    """A run file under ``DIR/runs`` that is not a valid run record (damaged, edited, or
    written by something else). The message names the file, what is wrong, and the
    ``--rerun-invalid`` flag that sets such files aside and redoes their runs.

    Attributes:
        path: the run file (a string).
        key: the run key its name gives.
        problem: what is wrong with it.
    """

    def __init__(self, path: str | Path, problem: str, key: str | None = None) -> None:
        path = str(path)
        self.path, self.problem = path, problem
        self.key = Path(path).stem if key is None else key
        super().__init__(
            f"{path!r} is not a valid run record: {problem}. It may be damaged or written by "
            f"something else. Add {RERUN_INVALID_FLAG} to the command to move it (with its "
            f"audit and weights) aside into {INVALID_DIR}/ under the study directory and redo "
            "that run, or restore the file")

    def __reduce__(self):
        return (type(self), (self.path, self.problem, self.key))


def validate_record(record: Any, path: str | Path) -> dict[str, Any]:
    """Check that ``record`` (read from ``path``, ``DIR/runs/<key>.json``) is a run record
    (:func:`holonomic.study.records.read_record`: the keys every record has, of the right
    types; a ``status`` in :data:`RUN_STATUSES`; for a finished run every metric its task
    records, finite and in range; a ``key`` equal to the file name and to
    :func:`run_key` of its arm, trial settings, seed, budget fraction and trial).
    Returns the record (the dict).

    Raises:
        InvalidRunRecord: naming the file and the first thing wrong.
    """
    from holonomic.study.records import read_record as read_typed

    if not isinstance(record, dict):
        raise InvalidRunRecord(path, f"it holds a JSON {type(record).__name__}, not an object")
    read_typed(record, path, run_key=lambda r: run_key(r.arm, r.trial_settings, r.seed,
                                                       r.budget_fraction, r.trial))
    return record


def read_record(path: str | Path) -> dict[str, Any]:
    """Read and validate one run file (see :func:`validate_record`)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except IsADirectoryError as exc:
        raise InvalidRunRecord(path, "it is a directory, not a file") from exc
    except UnicodeDecodeError as exc:
        raise InvalidRunRecord(path, f"it is not UTF-8 text ({exc.reason} at byte "
                                     f"{exc.start})") from exc
    try:
        record = loads(text)
    except json.JSONDecodeError as exc:
        message = exc.msg[:-len(" at")] if exc.msg.endswith(" at") else exc.msg
        raise InvalidRunRecord(path, f"it is not JSON ({message} at line {exc.lineno} column "
                                     f"{exc.colno})") from exc
    except RecursionError as exc:
        raise InvalidRunRecord(path, "it is nested too deeply") from exc
    return validate_record(record, path)


def read_records(out_dir: str | Path, keys: Iterable[str] | None = None,
                 invalid: list[InvalidRunRecord] | None = None) -> dict[str, dict]:
    """Finished runs under ``DIR/runs`` keyed by run key (temporaries are skipped; with
    ``keys``, only those runs are read). Every record is validated (:func:`read_record`).

    Raises:
        InvalidRunRecord: for the first invalid file, unless ``invalid`` is a list: then
            each invalid file's error is appended to it and the file is left out.
    """
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
        try:
            records[key] = read_record(path)
        except InvalidRunRecord as exc:
            if invalid is None:
                raise
            invalid.append(exc)
    return records


def run_files(out_dir: str | Path, key: str) -> list[Path]:
    """The files of run ``key`` that exist: its record, audit and weights (``runs/<key>.pt``),
    and with k-fold data each fold's audit and weights (``<key>.fold<j>.jsonl`` / ``.pt``)."""
    candidates = [runs_dir(out_dir) / f"{key}.json", audit_path(out_dir, key),
                  runs_dir(out_dir) / f"{key}.pt"]
    candidates += sorted(runs_dir(out_dir).glob(f"{glob.escape(key)}.fold*.pt"))
    candidates += sorted(audits_dir(out_dir).glob(f"{glob.escape(key)}.fold*.jsonl"))
    return [path for path in candidates if path.exists()]


def move_aside(out_dir: str | Path, keys: Iterable[str]) -> list[tuple[Path, Path]]:
    """Move the files of runs ``keys`` (record, audit, weights) into a new folder
    ``DIR/invalid/<YYYYmmdd-HHMMSS>[-n]/`` (keeping ``runs/`` and ``audits/`` below it);
    nothing is deleted. Returns ``(from, to)`` for each file moved (none: nothing created).
    """
    out = Path(out_dir)
    files = [path for key in keys for path in run_files(out, key)]
    if not files:
        return []
    stamp = time.strftime("%Y%m%d-%H%M%S")
    with output_errors():
        base = out / INVALID_DIR
        base.mkdir(exist_ok=True)
        for n in range(10_000):
            target = base / (stamp if n == 0 else f"{stamp}-{n}")
            try:
                target.mkdir()
                break
            except FileExistsError:
                continue
        moved = []
        for path in files:
            destination = target / path.relative_to(out)
            destination.parent.mkdir(parents=True, exist_ok=True)
            os.replace(path, destination)
            moved.append((path, destination))
    return moved


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
    with output_errors(path):
        created = _create_exclusive(path, dumps(record))
    if created:
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
