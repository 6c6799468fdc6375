"""The audit's JSON Lines format: writing and reading, with a schema version.

One JSON object per line.  The first line of a file written by
:class:`holonomic.Audit` is a header (``"type": "header"``: schema name,
version, thresholds, optimizer); every other line is one record
(``"type": "record"``) with ``"step"``, ``"parameters"`` (one entry per
constrained parameter), ``"groups"`` (one entry per param group) and
``"alarms"``.

Versions:

* **1** (current): as above; every line carries ``"schema"`` and ``"version"``.
* **0** (legacy): lines without a ``"version"`` field.  Only ``"step"`` and
  ``"parameters"`` are required; a per-parameter ``"residual"`` is read as
  ``"residual_max"``; missing fields read as ``None`` / empty lists.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

__all__ = ["SCHEMA", "SCHEMA_VERSION", "AuditFileError", "AuditLog", "JsonLinesWriter", "read_audit"]

SCHEMA = "holonomic.audit"
SCHEMA_VERSION = 1


class AuditFileError(ValueError):
    """An audit file that cannot be read; the message names the file and line."""


@dataclass
class AuditLog:
    """The contents of an audit file: the header (or ``None``) and the records."""

    path: str
    header: dict[str, Any] | None
    records: list[dict[str, Any]] = field(default_factory=list)


class JsonLinesWriter:
    """Appends one JSON object per line and flushes after each, so a crash
    loses at most the line being written."""

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path = str(path)
        Path(self.path).parent.mkdir(parents=True, exist_ok=True)
        self._file: TextIO | None = open(self.path, "w", encoding="utf-8")

    def write(self, obj: dict[str, Any]) -> None:
        if self._file is None:
            raise ValueError(f"audit file {self.path} is closed")
        self._file.write(json.dumps(obj, allow_nan=True, separators=(",", ":")) + "\n")
        self._file.flush()

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None


_PARAMETER_FIELDS = (
    "name", "constraint", "group", "shape", "tangent_dof", "residual_max", "residual_rms",
    "tangency_residual", "iterations_mean", "iterations_max", "kinetic_temperature", "kinetic_z",
    "kinetic_check", "kinetic_interval", "grad_norm_tangent", "grad_norm_normal", "weight_norm", "row_norm_min",
    "row_norm_mean", "row_norm_max",
)
_GROUP_FIELDS = ("group", "optimizer", "step_size", "temperature", "friction", "thermostat_time",
                 "kinetic_temperature", "tangent_dof", "kinetic_z", "kinetic_check",
                 "kinetic_interval")


def _where(path: str, line_no: int) -> str:
    return f"{path}, line {line_no}"


def _normalise_record(obj: dict[str, Any], version: int, path: str, line_no: int) -> dict[str, Any]:
    step = obj.get("step")
    if isinstance(step, bool) or not isinstance(step, int):
        raise AuditFileError(f"{_where(path, line_no)}: a record needs an integer 'step', got {step!r}")
    params = obj.get("parameters")
    if not isinstance(params, list) or not all(isinstance(p, dict) for p in params):
        raise AuditFileError(f"{_where(path, line_no)}: 'parameters' must be a list of objects, got "
                             f"{type(params).__name__}")
    out_params = []
    for i, p in enumerate(params):
        p = dict(p)
        if version == 0 and "residual_max" not in p and "residual" in p:
            p["residual_max"] = p.pop("residual")
        if "name" not in p:
            raise AuditFileError(f"{_where(path, line_no)}: parameter entry {i} has no 'name'")
        for key in _PARAMETER_FIELDS:
            p.setdefault(key, None)
        out_params.append(p)
    groups = obj.get("groups") or []
    out_groups = []
    for g in groups:
        g = dict(g)
        for key in _GROUP_FIELDS:
            g.setdefault(key, None)
        out_groups.append(g)
    alarms = obj.get("alarms") or []
    if not isinstance(alarms, list):
        raise AuditFileError(f"{_where(path, line_no)}: 'alarms' must be a list")
    return {"type": "record", "schema": SCHEMA, "version": version, "step": step,
            "parameters": out_params, "groups": out_groups, "alarms": list(alarms),
            "line": line_no}


def read_audit(path: str | os.PathLike[str]) -> AuditLog:
    """Read an audit JSON Lines file (any version up to :data:`SCHEMA_VERSION`).

    Blank lines are skipped.  Records are returned in file order, each with
    every field of the current version present (``None`` where the file had
    none) and ``"line"`` set to its line number.

    Raises:
        AuditFileError: the file is missing or empty, has no records, or a
            line is not a JSON object (e.g. truncated by a crash), lacks
            ``step``/``parameters``, or was written by a newer version; the
            message names the file and the line.
    """
    path = str(path)
    try:
        with open(path, encoding="utf-8") as fh:
            lines = fh.read().splitlines()
    except FileNotFoundError:
        raise AuditFileError(f"{path}: no such audit file") from None
    except UnicodeDecodeError as exc:
        raise AuditFileError(f"{path}: not a text file ({exc})") from None
    if not any(line.strip() for line in lines):
        raise AuditFileError(f"{path} is empty: it holds no audit records (was the run audited, or did "
                             "it stop before the first record was written?)")
    header: dict[str, Any] | None = None
    records: list[dict[str, Any]] = []
    for line_no, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        try:
            obj = json.loads(line)
        except json.JSONDecodeError as exc:
            hint = " (the line looks truncated: was the run interrupted while writing?)" \
                if exc.msg.startswith(("Expecting", "Unterminated")) and exc.pos >= len(line.rstrip()) - 1 else ""
            raise AuditFileError(f"{_where(path, line_no)}: not valid JSON: {exc.msg} at column "
                                 f"{exc.colno}{hint}") from None
        if not isinstance(obj, dict):
            raise AuditFileError(f"{_where(path, line_no)}: expected a JSON object, got "
                                 f"{type(obj).__name__}")
        version = obj.get("version", 0)
        if isinstance(version, bool) or not isinstance(version, int) or version < 0:
            raise AuditFileError(f"{_where(path, line_no)}: 'version' must be a non-negative integer, "
                                 f"got {version!r}")
        if version > SCHEMA_VERSION:
            raise AuditFileError(f"{_where(path, line_no)}: written with audit schema version {version}, "
                                 f"this holonomic reads up to {SCHEMA_VERSION}; upgrade holonomic")
        if "schema" in obj and obj["schema"] != SCHEMA:
            raise AuditFileError(f"{_where(path, line_no)}: schema {obj['schema']!r} is not {SCHEMA!r}")
        if obj.get("type") == "header":
            header = dict(obj)
            continue
        records.append(_normalise_record(obj, version, path, line_no))
    if not records:
        raise AuditFileError(f"{path}: has a header but no records (the run stopped before the first "
                             "record, or `every` exceeds the number of steps)")
    return AuditLog(path=path, header=header, records=records)
