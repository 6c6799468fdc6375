"""Diagnostics: constraint drift and thermodynamic checks during training.

:class:`Audit` records, per constrained parameter and per param group, the
constraint residuals, momentum tangency, projection iterations, the kinetic
temperature against its target, gradient components and weight norms, to
memory and a JSON Lines file, and raises :class:`AuditWarning` alarms.
:func:`repair` projects drifted weights back.  :func:`read_audit` reads the
files (all schema versions), :func:`iter_audit` streams them, and
:class:`AuditDigest` summarises and plots them in one pass with constant
memory, as ``holonomic audit FILE.jsonl`` does.
"""

from holonomic.audit.monitor import Audit, AuditThresholds, AuditWarning
from holonomic.audit.records import SCHEMA, SCHEMA_VERSION, AuditFileError, AuditLog, iter_audit, read_audit
from holonomic.audit.repair import RepairReport, repair
from holonomic.audit.report import (
    PLOT_SUFFIXES,
    AuditDigest,
    check_plot_path,
    format_summary,
    plot_audit,
    series_mean,
    summarize,
)
from holonomic.audit.stats import (
    constraint_violations,
    default_residual_tolerance,
    default_tangency_tolerance,
    kinetic_fluctuation,
    kinetic_interval,
    kinetic_temperature,
)

__all__ = [
    "Audit",
    "AuditThresholds",
    "AuditWarning",
    "AuditFileError",
    "AuditLog",
    "RepairReport",
    "SCHEMA",
    "SCHEMA_VERSION",
    "iter_audit",
    "read_audit",
    "AuditDigest",
    "PLOT_SUFFIXES",
    "check_plot_path",
    "repair",
    "summarize",
    "format_summary",
    "plot_audit",
    "series_mean",
    "kinetic_temperature",
    "kinetic_fluctuation",
    "kinetic_interval",
    "constraint_violations",
    "default_residual_tolerance",
    "default_tangency_tolerance",
]
