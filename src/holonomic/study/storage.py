"""Crash-safe storage of a study directory.

Layout of ``--out DIR``::

    DIR/runs/<arm>-<strength>-s<seed>.json   one finished run each (written atomically)
    DIR/results.csv, summary.json, report.md, *.png

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
from pathlib import Path
from typing import Any, Iterable

__all__ = ["atomic_write_text", "read_records", "remove_stale_temporaries", "write_record"]

RUNS_DIR = "runs"


def atomic_write_text(path: str | Path, text: str) -> None:
    """Write ``text`` to ``path`` atomically (temporary file, fsync, ``os.replace``)."""
    path = Path(path)
    tmp = path.parent / f".{path.name}.{os.getpid()}.tmp"
    try:
        with open(tmp, "w", encoding="utf-8", newline="") as handle:
            handle.write(text)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def atomic_write_bytes_from(path: str | Path, writer) -> None:
    """Call ``writer(temporary_path)`` and rename the result onto ``path`` (for plots)."""
    path = Path(path)
    tmp = path.parent / f".{path.stem}.{os.getpid()}.tmp{path.suffix}"
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
    """Whether the process named in a temporary's name still runs on this host."""
    try:
        pid = int(path.name.split(".tmp")[0].rsplit(".", 1)[1])
    except (IndexError, ValueError):
        return False
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

    A temporary whose writing process still runs on this host is left alone, so studies
    that share a directory do not delete each other's files in flight.
    """
    removed = 0
    for directory in (Path(out_dir), runs_dir(out_dir)):
        if directory.is_dir():
            for path in directory.glob(".*.tmp*"):
                if not _writer_alive(path):
                    path.unlink(missing_ok=True)
                    removed += 1
    return removed
