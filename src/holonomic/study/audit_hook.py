"""The audit every study run records: :class:`RunAudit`, a step hook over ``holonomic.Audit``.

Each run of a study gets one :class:`holonomic.audit.Audit` (constraint residuals, momentum
tangency, SHAKE iterations, kinetic temperature against the target; see its docstring). The
audit sees every optimizer step -- between records it only adds up the integrator's
projection iterations and thermostat time, with no host synchronisation -- and writes a
record every ``every`` steps (``[audit] every`` in the study file) plus one at the run's last
step, so every audit file has at least one record. The JSON Lines file is written to a
hidden temporary next to ``DIR/audits/<run key>.jsonl`` and renamed onto it when the run
ends, before the run's record is stored: a stored run always has its complete audit, and an
interrupted run leaves only a temporary (removed by the next run).

Alarms are not raised as warnings here (many runs in worker processes would bury them);
they are counted in the run record (``record["hooks"]["audit"]``) and listed per arm in
``report.md``.
"""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Any

import torch
from torch import nn

from holonomic.audit import Audit
from holonomic.study import storage

__all__ = ["RunAudit"]


class RunAudit:
    """Step hook that audits one study run and summarises the audit for its record.

    Args:
        every: optimizer steps between audit records (>= 1); a last record is written at
            the run's final step whatever ``every`` is.
        path: the audit file ``DIR/audits/<run key>.jsonl`` (created at :meth:`finish`), or
            ``None`` to keep the records in memory only.
        relative_to: directory the stored ``file`` entry is relative to (the study
            directory), so the directory can be moved.
    """

    name = "audit"

    def __init__(self, every: int, path: str | os.PathLike[str] | None = None,
                 relative_to: str | os.PathLike[str] | None = None) -> None:
        if isinstance(every, bool) or not isinstance(every, int) or every < 1:
            raise ValueError(f"every must be a positive integer (steps between audit "
                             f"records), got {every!r}")
        self.path = None if path is None else Path(path)
        self._temporary = None if self.path is None else storage.temporary_path(self.path)
        self._relative_to = None if relative_to is None else Path(relative_to)
        self.audit = Audit(every=every, path=self._temporary, warn=False)

    def on_step(self, model: nn.Module, optimizer: torch.optim.Optimizer, step: int) -> None:
        """Called after every optimizer step (see ``runner.StepHook``)."""
        self.audit.on_step(model, optimizer, step)

    def finish(self, model: nn.Module, optimizer: torch.optim.Optimizer, steps_done: int) -> None:
        """Write the closing record at ``steps_done`` (unless the last record is at that step),
        close the file and rename it into place. Called once at the end of the run, whether
        it finished, failed or diverged."""
        audit = self.audit
        if not audit.records or audit.records[-1]["step"] != steps_done:
            if audit.model is None:
                audit.model, audit.optimizer = model, optimizer
            # One record now: the optimizer state is the one the last on_step saw, so the
            # iteration counts and thermostat time are not counted twice (the audit only
            # adds a step's info once).
            every, audit.every = audit.every, 1
            try:
                audit(steps_done)
            finally:
                audit.every = every
        audit.close()
        if self._temporary is not None:
            os.replace(self._temporary, self.path)

    def summary(self) -> dict[str, Any]:
        """What the run record keeps: file, record count, alarms, largest residual.

        ``residual_max`` is the largest relative constraint violation over the audited
        records and constrained parameters (``None`` when the run has no constrained
        parameter; NaN if any was NaN).
        """
        digest = self.audit.summary()
        per_parameter = digest["residual_max"]
        values = list(per_parameter.values())
        if not values:
            largest = None
        elif any(v is None or math.isnan(v) for v in values):
            largest = math.nan
        else:
            largest = max(values)
        file = None
        if self.path is not None:
            file = (os.path.relpath(self.path, self._relative_to).replace(os.sep, "/")
                    if self._relative_to is not None else str(self.path))
        return {
            "file": file,
            "every": self.audit.every,
            "records": digest["records"],
            "last_step": digest["last_step"],
            "constrained_parameters": sorted(per_parameter),
            "residual_max": largest,
            "residual_max_per_parameter": per_parameter,
            "alarm_count": digest["alarm_count"],
            "alarms": digest["alarms"],
            "first_alarms": digest["first_alarms"],
        }
