r"""Summaries and plots of audit records (used by ``holonomic audit``).

Files are read in one streaming pass with constant memory
(:class:`AuditDigest`): every summary is a running one (maxima, last values,
counts, sums), and the two kinds of series that need more keep a bounded
number of values:

* a kinetic-temperature series for its mean and standard error keeps its
  values exactly up to ``series_limit`` of them; beyond that it keeps
  *batch means*: when the buffer is full, neighbouring values are averaged
  in pairs and the batch size doubles.  The mean stays the exact mean of all
  values; the standard error is ``sd_B sqrt(tau_B / B)`` over the ``B``
  complete batch means (``tau_B`` their integrated autocorrelation time),
  the batch-means estimator of the variance of a mean, which tends to the
  plain estimator as batches grow longer than the correlation time
  (Flegal and Jones, Ann. Statist. 38 (2010) 1034-1070);
* a plotted series keeps at most ``plot_points`` points by stride doubling:
  each point stands for ``stride`` consecutive records, as their maximum
  (residuals: a drift spike is never averaged away) or the first of them
  (kinetic and target temperatures: one representative draw).
"""

from __future__ import annotations

import math
import os
from array import array
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Sequence

import numpy as np

from holonomic.audit.records import AuditLog, iter_audit

__all__ = [
    "PLOT_SUFFIXES",
    "AuditDigest",
    "SeriesMean",
    "check_plot_path",
    "series_mean",
    "summarize",
    "format_summary",
    "plot_audit",
]

#: Image formats ``plot_audit`` / ``holonomic audit --plot`` write, chosen by the file suffix.
PLOT_SUFFIXES = (".png", ".pdf", ".svg")

DEFAULT_SERIES_LIMIT = 4096
DEFAULT_PLOT_POINTS = 2000
DEFAULT_KINETIC_SIGMAS = 5.0  # AuditThresholds.kinetic_sigmas, when the file has no header


@dataclass(frozen=True)
class SeriesMean:
    """Mean of a correlated series with its standard error
    ``sd sqrt(tau / n)`` (``tau`` the integrated autocorrelation time,
    Sokal's window); ``stderr`` is ``None`` with fewer than 20 values."""

    mean: float
    stderr: float | None
    count: int


def series_mean(values: Sequence[float]) -> SeriesMean | None:
    """:class:`SeriesMean` of the finite ``values`` (``None`` if there are none)."""
    x = np.asarray([v for v in values if v is not None and math.isfinite(v)], dtype=float)
    if x.size == 0:
        return None
    if x.size < 20 or float(np.std(x)) == 0.0:
        return SeriesMean(float(x.mean()), None if x.size < 20 else 0.0, int(x.size))
    from holonomic.sampling import integrated_autocorrelation_time

    tau = max(1.0, integrated_autocorrelation_time(x).tau)
    return SeriesMean(float(x.mean()), float(np.std(x, ddof=1) * math.sqrt(tau / x.size)), int(x.size))


def _nanmax(a: float | None, b: float | None) -> float | None:
    """Largest of two values, ``None`` ignored, NaN winning (a NaN residual is the worst)."""
    if a is None:
        return None if b is None else float(b)
    if b is None:
        return a
    if math.isnan(a) or math.isnan(b):
        return math.nan
    return a if a >= b else float(b)


class _RunningSeries:
    """Mean and standard error of a series in bounded memory (module docstring):
    exact values below ``limit``, batch means of doubling size beyond."""

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self.values = array("d")
        self.batch = 1
        self.count = 0
        self.total = 0.0
        self._pending_sum = 0.0
        self._pending_count = 0

    def add(self, value: float | None) -> None:
        if value is None or not math.isfinite(value):
            return  # as series_mean: only finite values count
        self.count += 1
        self.total += value
        self._pending_sum += value
        self._pending_count += 1
        if self._pending_count == self.batch:
            self.values.append(self._pending_sum / self.batch)  # exact when batch == 1
            self._pending_sum, self._pending_count = 0.0, 0
            if len(self.values) >= self.limit:
                v = self.values
                self.values = array("d", ((v[i] + v[i + 1]) / 2 for i in range(0, len(v) - 1, 2)))
                self.batch *= 2

    def mean(self) -> SeriesMean | None:
        if self.count == 0:
            return None
        if self.batch == 1:
            return series_mean(self.values)  # every value kept: the in-memory result
        batches = series_mean(self.values)
        assert batches is not None
        return SeriesMean(self.total / self.count, batches.stderr, self.count)


class _Downsampler:
    """At most ``limit`` (step, value) points; each stands for ``stride``
    consecutive records (their max, or the first of them)."""

    def __init__(self, limit: int, how: str) -> None:
        self.limit = limit - limit % 2
        self.how = how
        self.steps: list[int] = []
        self.values = array("d")
        self.stride = 1
        self._pending: list[Any] | None = None

    def add(self, step: int, value: float) -> None:
        if self._pending is None:
            self._pending = [step, float(value), 1]
        else:
            self._pending[2] += 1
            if self.how == "max":
                self._pending[1] = _nanmax(self._pending[1], value)
        if self._pending[2] == self.stride:
            self.steps.append(self._pending[0])
            self.values.append(self._pending[1])
            self._pending = None
            if len(self.steps) >= self.limit:
                v = self.values
                if self.how == "max":
                    self.values = array("d", (_nanmax(v[i], v[i + 1]) for i in range(0, len(v), 2)))
                else:
                    self.values = v[::2]
                self.steps = self.steps[::2]
                self.stride *= 2

    def points(self) -> tuple[list[int], list[float]]:
        steps, values = list(self.steps), list(self.values)
        if self._pending is not None:
            steps.append(self._pending[0])
            values.append(self._pending[1])
        return steps, values


class _ParameterState:
    def __init__(self, series_limit: int, plot_points: int | None) -> None:
        self.records = 0
        self.group: int | None = None
        self.residual_max: float | None = None
        self.residual_last: float | None = None
        self.tangency_max: float | None = None
        self.iterations_sum = 0.0
        self.iterations_count = 0
        self.iterations_max: float | None = None
        self.kinetic = _RunningSeries(series_limit)
        self.plot = plot_points is not None
        if plot_points is not None:
            self.residual_points = _Downsampler(plot_points, "max")
            self.kinetic_points = _Downsampler(plot_points, "first")
            self.residual_zero = 0


class _GroupState:
    def __init__(self, series_limit: int, plot_points: int | None) -> None:
        self.temperature: float | None = None
        self.temperature_varies = False
        self.armed_target: float | None = None
        self.armed_target_varies = False
        self.kinetic = _RunningSeries(series_limit)
        self.checks: Counter[Any] = Counter()
        self.target_points = _Downsampler(plot_points, "first") if plot_points is not None else None


class AuditDigest:
    """Running summary of audit records: one pass, constant memory.

    ``add`` every header and record (in file order), then read
    :meth:`summary` (the dict :func:`format_summary` prints) or :meth:`plot`.
    :meth:`from_file` streams a file through it.

    Args:
        path: the name shown in the summary and the plot title.
        series_limit: kinetic-temperature values kept exactly per series
            (even, >= 40); beyond, batch means (module docstring).
        plot_points: points kept per plotted series (even, >= 2), or
            ``None`` to keep no plot data.

    Raises:
        ValueError: a limit out of range.
    """

    def __init__(self, path: str = "<records>", *, series_limit: int = DEFAULT_SERIES_LIMIT,
                 plot_points: int | None = None) -> None:
        if isinstance(series_limit, bool) or not isinstance(series_limit, int) or series_limit < 40 \
                or series_limit % 2:
            raise ValueError(f"series_limit must be an even integer >= 40, got {series_limit!r}")
        if plot_points is not None and (isinstance(plot_points, bool) or not isinstance(plot_points, int)
                                        or plot_points < 2 or plot_points % 2):
            raise ValueError(f"plot_points must be an even integer >= 2 or None, got {plot_points!r}")
        self.path = str(path)
        self.series_limit = series_limit
        self.plot_points = plot_points
        self.header: dict[str, Any] | None = None
        self.records = 0
        self.first_step: int | None = None
        self.last_step: int | None = None
        self.version: int | None = None
        self._params: dict[str, _ParameterState] = {}
        self._groups: dict[Any, _GroupState] = {}
        self._alarms: Counter[tuple[str, str]] = Counter()
        self._first_alarm: dict[tuple[str, str], str] = {}

    @classmethod
    def from_file(cls, path: str | os.PathLike[str], *, series_limit: int = DEFAULT_SERIES_LIMIT,
                  plot_points: int | None = None) -> "AuditDigest":
        """Stream the audit file at ``path`` (see :func:`holonomic.audit.iter_audit`).

        Raises:
            AuditFileError: the file cannot be read or is malformed (the
                message names the line and the field).
        """
        digest = cls(str(path), series_limit=series_limit, plot_points=plot_points)
        for item in iter_audit(path):
            digest.add(item)
        return digest

    def add(self, item: dict[str, Any]) -> None:
        """Take one header (``"type": "header"``) or one normalised record."""
        if item.get("type") == "header":
            self.header = item
            return
        step = item["step"]
        self.records += 1
        if self.first_step is None:
            self.first_step = step
        self.last_step = step
        self.version = item["version"]
        plot = self.plot_points is not None
        for p in item["parameters"]:
            s = self._params.get(p["name"])
            if s is None:
                s = self._params[p["name"]] = _ParameterState(self.series_limit, self.plot_points)
            s.records += 1
            s.group = p["group"]
            res = p["residual_max"]
            s.residual_max = _nanmax(s.residual_max, res)
            s.residual_last = res
            s.tangency_max = _nanmax(s.tangency_max, p["tangency_residual"])
            if p["iterations_mean"] is not None:
                s.iterations_sum += p["iterations_mean"]
                s.iterations_count += 1
            s.iterations_max = _nanmax(s.iterations_max, p["iterations_max"])
            if p["kinetic_check"] == "checked":
                s.kinetic.add(p["kinetic_temperature"])
            if plot:
                if res is not None:
                    s.residual_points.add(step, res)
                    s.residual_zero += res <= 0
                if p["kinetic_temperature"] is not None:
                    s.kinetic_points.add(step, p["kinetic_temperature"])
        for g in item["groups"]:
            s = self._groups.get(g["group"])
            if s is None:
                s = self._groups[g["group"]] = _GroupState(self.series_limit, self.plot_points)
            t = g["temperature"]
            if t is not None:
                s.temperature_varies |= s.temperature is not None and t != s.temperature
                s.temperature = t
                if s.target_points is not None:
                    s.target_points.add(step, t)
            s.checks[g["kinetic_check"]] += 1
            if g["kinetic_check"] == "checked":
                s.kinetic.add(g["kinetic_temperature"])
                if t is not None:
                    s.armed_target_varies |= s.armed_target is not None and t != s.armed_target
                    s.armed_target = t
        for a in item["alarms"]:
            key = (str(a.get("kind")), str(a.get("where")))
            self._alarms[key] += 1
            self._first_alarm.setdefault(key, str(a.get("message", "")))

    def kinetic_sigmas(self) -> float:
        """The kinetic alarm bound of the run (header thresholds; default 5)."""
        value = ((self.header or {}).get("thresholds") or {}).get("kinetic_sigmas")
        return float(value) if value is not None else DEFAULT_KINETIC_SIGMAS

    def summary(self) -> dict[str, Any]:
        """Digest of the records: one row per constrained parameter and per
        param group, and the alarms grouped by kind and place.

        Kinetic temperatures are averaged over the records whose check was
        armed (``kinetic_check == "checked"``), i.e. after burn-in.  For a
        group, ``z_mean = (mean - T) / stderr`` and ``bias = mean / T - 1``
        against its target ``T`` (``None`` when the target changed while
        armed, or without a standard error).

        Raises:
            ValueError: no record was added.
        """
        if not self.records:
            raise ValueError(f"{self.path}: no audit records to summarise")
        alarms = self._alarms
        param_rows = []
        for name, s in self._params.items():
            param_rows.append({
                "name": name, "group": s.group, "records": s.records,
                "residual_max": s.residual_max, "residual_last": s.residual_last,
                "tangency_max": s.tangency_max,
                "iterations_mean": s.iterations_sum / s.iterations_count if s.iterations_count else None,
                "iterations_max": s.iterations_max,
                "kinetic": s.kinetic.mean(),
                "alarms": sum(n for (kind, where), n in alarms.items() if where == name),
            })
        group_rows = []
        for gi, s in self._groups.items():
            m, t = s.kinetic.mean(), s.armed_target
            z = bias = None
            if m is not None and t and not s.armed_target_varies:
                bias = m.mean / t - 1.0
                if m.stderr:
                    z = (m.mean - t) / m.stderr
            group_rows.append({
                "group": gi, "temperature": s.temperature, "temperature_varies": s.temperature_varies,
                "kinetic": m, "z_mean": z, "bias": bias,
                "check": ", ".join(f"{k} x{n}" for k, n in s.checks.most_common()),
                "alarms": sum(n for (kind, where), n in alarms.items() if where == f"group {gi}"),
            })
        return {
            "path": self.path,
            "version": self.version,
            "records": self.records,
            "first_step": self.first_step,
            "last_step": self.last_step,
            "optimizer": (self.header or {}).get("optimizer"),
            "kinetic_sigmas": self.kinetic_sigmas(),
            "parameters": param_rows,
            "groups": group_rows,
            "alarms": [{"kind": k, "where": w, "count": n, "first": self._first_alarm[(k, w)]}
                       for (k, w), n in sorted(alarms.items())],
        }

    def figure(self) -> Any:
        """The matplotlib figure of :meth:`plot` (Agg backend; the caller closes it).

        Raises:
            ValueError: the digest was made without ``plot_points``.
        """
        if self.plot_points is None:
            raise ValueError("this AuditDigest keeps no plot data: make it with plot_points=...")
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        fig, (ax_r, ax_t) = plt.subplots(2, 1, figsize=(8, 6.5), sharex=True)
        notes = []
        zeros = 0
        positive = False
        stride = 1
        for name, s in self._params.items():
            steps, res = s.residual_points.points()
            # A log axis cannot show 0: mask non-positive residuals (gaps), say so below.
            masked = [v if v > 0 or math.isnan(v) else math.nan for v in res]
            positive |= any(v > 0 for v in res)
            zeros += s.residual_zero
            stride = max(stride, s.residual_points.stride, s.kinetic_points.stride)
            ax_r.plot(steps, masked, label=name, lw=1)
            tsteps, tkin = s.kinetic_points.points()
            if tkin:
                ax_t.plot(tsteps, tkin, label=name, lw=1)
        for gi, s in self._groups.items():
            if s.target_points is None:
                continue
            steps, temps = s.target_points.points()
            if any(temps):
                label = f"target T (group {gi})" if len(self._groups) > 1 else "target T"
                ax_t.step(steps, temps, where="post", color="k", ls="--", lw=1, label=label)
        if positive:
            ax_r.set_yscale("log")
        else:
            ax_r.text(0.5, 0.5, "no positive residual to show on a log axis", ha="center", va="center",
                      transform=ax_r.transAxes)
        if zeros:
            notes.append(f"{zeros} record(s) with residual exactly 0 not drawn (log axis: gaps)")
        if stride > 1:
            notes.append(f"downsampled: one point per {stride} records (residual: their max; "
                         "kinetic temperature: the first)")
        ax_r.set_ylabel("max relative residual")
        ax_t.set_ylabel("kinetic temperature |P|^2 / N_f")
        ax_t.set_xlabel("step")
        if ax_r.lines:
            ax_r.legend(fontsize=7, loc="best")
        if ax_t.lines:
            ax_t.legend(fontsize=7, loc="best")
        if not any(s.kinetic_points.points()[1] for s in self._params.values()):
            ax_t.text(0.5, 0.5, "no momenta recorded (drift-only audit)", ha="center", va="center",
                      transform=ax_t.transAxes)
        ax_r.set_title(f"audit: {self.path}", fontsize=9)
        fig.tight_layout()
        if notes:
            fig.text(0.01, 0.005, "\n".join(notes), fontsize=7, ha="left", va="bottom")
            fig.subplots_adjust(bottom=0.1 + 0.025 * len(notes))
        return fig

    def plot(self, out_path: str | os.PathLike[str]) -> str:
        """Residual (log scale) and kinetic temperature against step, one line
        per constrained parameter, target temperatures dashed; written to
        exactly ``out_path`` in the format of its suffix (:data:`PLOT_SUFFIXES`).

        Returns:
            The absolute path written.

        Raises:
            ValueError: ``out_path`` has another suffix, its folder does not
                exist, or it is a directory (see :func:`check_plot_path`).
        """
        path = check_plot_path(out_path)
        import matplotlib.pyplot as plt

        fig = self.figure()
        try:
            fig.savefig(path, dpi=110, format=path.suffix[1:].lower())
        finally:
            plt.close(fig)
        return str(path.resolve())


def check_plot_path(out_path: str | os.PathLike[str]) -> Path:
    """``out_path`` as a :class:`~pathlib.Path` if a plot can be written there.

    Raises:
        ValueError: the suffix is not one of :data:`PLOT_SUFFIXES`, the folder
            does not exist, or the path is a directory.
    """
    path = Path(out_path)
    if path.suffix.lower() not in PLOT_SUFFIXES:
        raise ValueError(f"--plot {out_path}: the file name must end in one of "
                         f"{', '.join(PLOT_SUFFIXES)} (the suffix chooses the format), got "
                         f"{path.suffix or 'no suffix'}")
    if path.is_dir():
        raise ValueError(f"--plot {out_path} is a directory; give a file name such as "
                         f"{path / 'audit.png'}")
    parent = path.parent
    if not parent.is_dir():
        raise ValueError(f"--plot {out_path}: folder {parent} does not exist; create it first")
    return path


def _digest(source: AuditLog | str | os.PathLike[str] | Iterable[dict[str, Any]],
            plot_points: int | None) -> AuditDigest:
    if isinstance(source, AuditDigest):
        return source
    if isinstance(source, (str, os.PathLike)):
        return AuditDigest.from_file(source, plot_points=plot_points)
    if isinstance(source, AuditLog):
        digest = AuditDigest(source.path, plot_points=plot_points)
        if source.header is not None:
            digest.add(source.header)
        for rec in source.records:
            digest.add(rec)
        return digest
    digest = AuditDigest(plot_points=plot_points)
    for item in source:
        digest.add(item)
    return digest


def summarize(source: AuditLog | str | os.PathLike[str]) -> dict[str, Any]:
    """Digest of an audit log or file (streamed): one row per constrained
    parameter and per param group, and the alarms grouped by kind and place
    (see :meth:`AuditDigest.summary`)."""
    return _digest(source, None).summary()


def plot_audit(source: AuditLog | AuditDigest | str | os.PathLike[str], out_path: str | os.PathLike[str]) -> str:
    """Plot an audit log, digest or file (streamed) to exactly ``out_path``
    (see :meth:`AuditDigest.plot`); returns the absolute path written."""
    check_plot_path(out_path)
    digest = _digest(source, DEFAULT_PLOT_POINTS)
    if digest.plot_points is None:
        raise ValueError("plot_audit needs an AuditDigest made with plot_points=...")
    return digest.plot(out_path)


def _fmt(x: Any, spec: str = ".3g") -> str:
    if x is None:
        return "-"
    if isinstance(x, float) and math.isnan(x):
        return "nan"
    return format(x, spec)


def _fmt_mean(m: SeriesMean | None) -> str:
    if m is None:
        return "-"
    return f"{m.mean:.4g}" + (f" +- {m.stderr:.2g}" if m.stderr is not None else "")


def _table(header: list[str], rows: list[list[str]]) -> list[str]:
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(header)]
    line = lambda cells: "  ".join(c.ljust(w) for c, w in zip(cells, widths)).rstrip()  # noqa: E731
    return [line(header), line(["-" * w for w in widths])] + [line(r) for r in rows]


def format_summary(summary: dict[str, Any]) -> str:
    """The summary as text: a parameter table, a group table with the z of
    the mean explained, and one line per alarm kind and place."""
    out = [f"audit {summary['path']}: {summary['records']} records, steps {summary['first_step']}.."
           f"{summary['last_step']}, schema version {summary['version']}"
           + (f", optimizer {summary['optimizer']}" if summary.get("optimizer") else "")]
    out.append("")
    rows = [[r["name"], _fmt(r["group"], "d") if r["group"] is not None else "-",
             _fmt(r["residual_max"]), _fmt(r["residual_last"]), _fmt(r["tangency_max"]),
             _fmt(r["iterations_mean"], ".2f"), _fmt(r["iterations_max"], ".0f"),
             _fmt_mean(r["kinetic"]), str(r["alarms"])] for r in summary["parameters"]]
    out += _table(["parameter", "group", "residual max", "last", "tangency max", "iter mean",
                   "iter max", "T_kin (armed)", "alarms"], rows)
    sigmas = summary.get("kinetic_sigmas", DEFAULT_KINETIC_SIGMAS)
    notes = []
    if summary["groups"]:
        out.append("")
        rows = []
        for g in summary["groups"]:
            z, bias = g.get("z_mean"), g.get("bias")
            rows.append([str(g["group"]), _fmt(g["temperature"]) + (" (varied)" if g.get("temperature_varies") else ""),
                         _fmt_mean(g["kinetic"]), f"{z:+.2f}" if z is not None else "-",
                         f"{100 * bias:+.3g}%" if bias is not None else "-", g["check"], str(g["alarms"])])
            if z is not None and abs(z) > sigmas:
                notes.append(f"note: group {g['group']}: the mean kinetic temperature is {abs(z):.3g} standard "
                             f"errors {'above' if z > 0 else 'below'} its target (mean/T - 1 = "
                             f"{100 * bias:+.3g}%); not an alarm (see above)")
        out += _table(["group", "target T", "T_kin (armed)", "z of mean", "mean/T - 1", "kinetic check",
                       "alarms"], rows)
    out.append("")
    out.append("T_kin = |P|^2 / N_f (tangent degrees of freedom), averaged over records after burn-in; "
               "+- is the standard error from the integrated autocorrelation time of the record series "
               "(it assumes a stationary series; none is shown below 20 records).")
    if summary["groups"]:
        # Why the z of the mean does not alarm.  The kinetic alarm (Audit, monitor.py) tests each
        # record, one draw of T_kin, against its equilibrium law T chi2(N_f)/N_f at +-kinetic_sigmas:
        # a fixed relative tolerance with a known false-alarm rate per record.  The mean over n
        # records has a standard error about sqrt(tau/n) times smaller, so its z measures the run
        # length as much as the departure: any fixed bias -- the integrator's discretisation bias at
        # a finite step (higher order in h, monitor.py), minibatch gradient noise -- gives |z| > 5 in
        # a long enough run, and the standard error itself rests on a stationarity assumption and an
        # estimated autocorrelation time.  An alarm on it would fire on every long healthy run, so
        # the exit status ignores it; the output says what it is and flags large values, with the
        # size of the departure (mean/T - 1) to judge them by.
        out.append(f"z of mean = (mean T_kin - T) / its standard error: how many standard errors the "
                   f"average over the armed records lies from the target T; mean/T - 1 is the size of "
                   f"that departure. It is not an alarm and does not change the exit status: alarms "
                   f"test each record against the spread of a single draw (+-{sigmas:g} sd, "
                   f"kinetic_sigmas), while the mean of many records resolves departures far below "
                   f"that (the integrator's bias at a finite step, minibatch gradient noise), so in a "
                   f"long run any systematic departure, however small, gives |z| > {sigmas:g}; judge "
                   f"by mean/T - 1 whether the departure matters for your use.")
    out += notes
    if summary["alarms"]:
        out.append("")
        total = sum(a["count"] for a in summary["alarms"])
        out.append(f"ALARMS ({total}):")
        for a in summary["alarms"]:
            out.append(f"  ALARM {a['kind']} {a['where']}: {a['count']} record(s); first: {a['first']}")
    else:
        out.append("no alarm")
    return "\n".join(out)
