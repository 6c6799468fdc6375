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
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator, TextIO

__all__ = ["SCHEMA", "SCHEMA_VERSION", "AuditFileError", "AuditLog", "JsonLinesWriter", "iter_audit", "read_audit"]

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


# Field types, checked on reading so that a malformed file gives a message
# naming the line and the field (never a traceback from deeper code).
_NUMBER, _INT, _STR, _INTS, _PAIR = "number", "integer", "string", "list of integers", "pair of numbers"
_PARAMETER_TYPES: dict[str, str] = {
    "name": _STR, "constraint": _STR, "group": _INT, "shape": _INTS, "tangent_dof": _INT,
    "residual_max": _NUMBER, "residual_rms": _NUMBER, "tangency_residual": _NUMBER,
    "iterations_mean": _NUMBER, "iterations_max": _NUMBER, "kinetic_temperature": _NUMBER,
    "kinetic_z": _NUMBER, "kinetic_check": _STR, "kinetic_interval": _PAIR,
    "grad_norm_tangent": _NUMBER, "grad_norm_normal": _NUMBER, "weight_norm": _NUMBER,
    "row_norm_min": _NUMBER, "row_norm_mean": _NUMBER, "row_norm_max": _NUMBER,
}
_GROUP_TYPES: dict[str, str] = {
    "group": _INT, "optimizer": _STR, "step_size": _NUMBER, "temperature": _NUMBER,
    "friction": _NUMBER, "thermostat_time": _NUMBER, "kinetic_temperature": _NUMBER,
    "tangent_dof": _INT, "kinetic_z": _NUMBER, "kinetic_check": _STR, "kinetic_interval": _PAIR,
}
_PARAMETER_FIELDS = tuple(_PARAMETER_TYPES)
_GROUP_FIELDS = tuple(_GROUP_TYPES)


def _where(path: str, line_no: int) -> str:
    return f"{path}, line {line_no}"


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


_CHECKS = {
    _NUMBER: _is_number,
    _INT: _is_int,
    _STR: lambda v: isinstance(v, str),
    _INTS: lambda v: isinstance(v, list) and all(_is_int(x) for x in v),
    _PAIR: lambda v: isinstance(v, list) and len(v) == 2 and all(_is_number(x) for x in v),
}


def _shown(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _check_fields(obj: dict[str, Any], types: dict[str, str], label: str, where: str) -> None:
    """Raise AuditFileError if a known field has the wrong type (``null`` is allowed)."""
    for key, kind in types.items():
        value = obj.get(key)
        if value is not None and not _CHECKS[kind](value):
            raise AuditFileError(f"{where}: field '{label}{key}' must be a {kind} or null, got "
                                 f"{_shown(value)}")


def _list_of_objects(obj: dict[str, Any], key: str, where: str, required: bool) -> list[dict[str, Any]]:
    value = obj.get(key)
    if value is None and not required:
        return []
    if not isinstance(value, list):
        raise AuditFileError(f"{where}: field '{key}' must be a list of objects, got "
                             f"{_shown(value) if value is not None else 'nothing'}")
    for i, item in enumerate(value):
        if not isinstance(item, dict):
            raise AuditFileError(f"{where}: field '{key}[{i}]' must be an object, got {_shown(item)}")
    return value


def _normalise_record(obj: dict[str, Any], version: int, path: str, line_no: int) -> dict[str, Any]:
    where = _where(path, line_no)
    step = obj.get("step")
    if not _is_int(step):
        raise AuditFileError(f"{where}: a record needs an integer 'step', got {step!r}")
    out_params = []
    for i, p in enumerate(_list_of_objects(obj, "parameters", where, required=True)):
        p = dict(p)
        if version == 0 and "residual_max" not in p and "residual" in p:
            p["residual_max"] = p.pop("residual")
        if "name" not in p:
            raise AuditFileError(f"{where}: parameter entry {i} has no 'name'")
        _check_fields(p, _PARAMETER_TYPES, f"parameters[{i}].", where)
        for key in _PARAMETER_FIELDS:
            p.setdefault(key, None)
        out_params.append(p)
    out_groups = []
    for i, g in enumerate(_list_of_objects(obj, "groups", where, required=False)):
        g = dict(g)
        _check_fields(g, _GROUP_TYPES, f"groups[{i}].", where)
        for key in _GROUP_FIELDS:
            g.setdefault(key, None)
        out_groups.append(g)
    alarms = _list_of_objects(obj, "alarms", where, required=False)
    return {"type": "record", "schema": SCHEMA, "version": version, "step": step,
            "parameters": out_params, "groups": out_groups, "alarms": list(alarms),
            "line": line_no}


def _normalise_header(obj: dict[str, Any], where: str) -> dict[str, Any]:
    header = dict(obj)
    thresholds = header.get("thresholds")
    if thresholds is not None:
        if not isinstance(thresholds, dict):
            raise AuditFileError(f"{where}: field 'thresholds' must be an object, got {_shown(thresholds)}")
        sigmas = thresholds.get("kinetic_sigmas")
        if sigmas is not None and not (_is_number(sigmas) and sigmas > 0):
            raise AuditFileError(f"{where}: field 'thresholds.kinetic_sigmas' must be a positive number, "
                                 f"got {_shown(sigmas)}")
    if header.get("optimizer") is not None and not isinstance(header["optimizer"], str):
        raise AuditFileError(f"{where}: field 'optimizer' must be a string or null, got "
                             f"{_shown(header['optimizer'])}")
    return header


def iter_audit(path: str | os.PathLike[str]) -> Iterator[dict[str, Any]]:
    """Stream an audit JSON Lines file: yield its header (``"type": "header"``)
    and its records in file order, one line at a time (constant memory).

    Each record is normalised as by :func:`read_audit`.  The checks that need
    the whole file (empty, no records) raise after the last line.

    Raises:
        AuditFileError: as :func:`read_audit`.
    """
    path = str(path)
    try:
        fh = open(path, encoding="utf-8")
    except FileNotFoundError:
        raise AuditFileError(f"{path}: no such audit file") from None
    except IsADirectoryError:
        raise AuditFileError(f"{path} is a directory, not an audit file (give the .jsonl file "
                             "written by holonomic.Audit)") from None
    except OSError as exc:
        raise AuditFileError(f"{path}: cannot be read ({exc.strerror or exc})") from None
    seen_line = seen_record = False
    with fh:
        line_no = 0
        while True:
            try:
                raw = fh.readline()
            except UnicodeDecodeError as exc:
                raise AuditFileError(f"{path}: not a text file ({exc})") from None
            except OSError as exc:
                raise AuditFileError(f"{path}: cannot be read ({exc.strerror or exc})") from None
            if not raw:
                break
            line_no += 1
            line = raw.rstrip("\r\n")
            if not line.strip():
                continue
            seen_line = True
            try:
                obj = json.loads(line)
            except json.JSONDecodeError as exc:
                if not raw.endswith("\n") and fh.read(1) == "":
                    # The last line, cut short without its newline: a run killed while its
                    # audit was being written. The complete records before it are kept.
                    warnings.warn(f"{_where(path, line_no)}: the last line is incomplete (was the run "
                                  "interrupted while writing?); it is ignored and the complete records "
                                  "before it are read", stacklevel=2)
                    break
                hint = " (the line looks truncated: was the run interrupted while writing?)" \
                    if exc.msg.startswith(("Expecting", "Unterminated")) and exc.pos >= len(line.rstrip()) - 1 \
                    else ""
                raise AuditFileError(f"{_where(path, line_no)}: not valid JSON: {exc.msg} at column "
                                     f"{exc.colno}{hint}") from None
            if not isinstance(obj, dict):
                raise AuditFileError(f"{_where(path, line_no)}: expected a JSON object, got "
                                     f"{type(obj).__name__}")
            version = obj.get("version", 0)
            if not _is_int(version) or version < 0:
                raise AuditFileError(f"{_where(path, line_no)}: 'version' must be a non-negative integer, "
                                     f"got {version!r}")
            if version > SCHEMA_VERSION:
                raise AuditFileError(f"{_where(path, line_no)}: written with audit schema version {version}, "
                                     f"this holonomic reads up to {SCHEMA_VERSION}; upgrade holonomic")
            if "schema" in obj and obj["schema"] != SCHEMA:
                raise AuditFileError(f"{_where(path, line_no)}: schema {obj['schema']!r} is not {SCHEMA!r}")
            if obj.get("type") == "header":
                yield _normalise_header(obj, _where(path, line_no))
                continue
            seen_record = True
            yield _normalise_record(obj, version, path, line_no)
    if not seen_line:
        raise AuditFileError(f"{path} is empty: it holds no audit records (was the run audited, or did "
                             "it stop before the first record was written?)")
    if not seen_record:
        raise AuditFileError(f"{path}: has a header but no records (the run stopped before the first "
                             "record, or `every` exceeds the number of steps)")


def read_audit(path: str | os.PathLike[str]) -> AuditLog:
    """Read a whole audit JSON Lines file (any version up to :data:`SCHEMA_VERSION`)
    into memory; for large files use :func:`iter_audit` (or ``holonomic audit``,
    which streams).

    Blank lines are skipped.  Records are returned in file order, each with
    every field of the current version present (``None`` where the file had
    none) and ``"line"`` set to its line number.  A last line cut short
    without its newline (a run killed while writing) is skipped with a
    ``UserWarning``; the complete records before it are returned.

    Raises:
        AuditFileError: the file is missing, a directory or empty, has no
            records, or a line is not a JSON object (e.g. truncated by a
            crash, anywhere but at the end), lacks ``step``/``parameters``, has a field of the wrong
            type (a string where a number belongs, a list where an object
            does), or was written by a newer version; the message names the
            file, the line and the field.
    """
    header: dict[str, Any] | None = None
    records: list[dict[str, Any]] = []
    for item in iter_audit(path):
        if item.get("type") == "header":
            header = item
        else:
            records.append(item)
    return AuditLog(path=str(path), header=header, records=records)
