"""Summaries and plots of audit records (used by ``holonomic audit``)."""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from holonomic.audit.records import AuditLog

__all__ = ["SeriesMean", "series_mean", "summarize", "format_summary", "plot_audit"]


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


def _max(values: list[Any]) -> float | None:
    vals = [v for v in values if v is not None]
    if not vals:
        return None
    return float("nan") if any(isinstance(v, float) and math.isnan(v) for v in vals) else float(max(vals))


def summarize(log: AuditLog) -> dict[str, Any]:
    """Digest of an audit log: one row per constrained parameter and per
    param group, and the alarms grouped by kind and place.

    Kinetic temperatures are averaged over the records whose check was
    armed (``kinetic_check == "checked"``), i.e. after burn-in.
    """
    params: dict[str, dict[str, list[Any]]] = {}
    groups: dict[int, dict[str, list[Any]]] = {}
    alarms: Counter[tuple[str, str]] = Counter()
    first: dict[tuple[str, str], str] = {}
    for rec in log.records:
        for p in rec["parameters"]:
            d = params.setdefault(p["name"], {k: [] for k in (
                "residual_max", "tangency_residual", "iterations_mean", "iterations_max", "t_kin",
                "target", "group")})
            for k in ("residual_max", "tangency_residual", "iterations_mean", "iterations_max"):
                d[k].append(p[k])
            d["group"].append(p["group"])
            if p.get("kinetic_check") == "checked":
                d["t_kin"].append(p["kinetic_temperature"])
        for g in rec["groups"]:
            d = groups.setdefault(g["group"], {"t_kin": [], "temperature": [], "check": []})
            d["temperature"].append(g["temperature"])
            d["check"].append(g["kinetic_check"])
            if g.get("kinetic_check") == "checked":
                d["t_kin"].append(g["kinetic_temperature"])
        for a in rec["alarms"]:
            key = (str(a.get("kind")), str(a.get("where")))
            alarms[key] += 1
            first.setdefault(key, str(a.get("message", "")))
    param_rows = []
    for name, d in params.items():
        last_res = d["residual_max"][-1] if d["residual_max"] else None
        its = [v for v in d["iterations_mean"] if v is not None]
        param_rows.append({
            "name": name, "group": d["group"][-1], "records": len(d["residual_max"]),
            "residual_max": _max(d["residual_max"]), "residual_last": last_res,
            "tangency_max": _max(d["tangency_residual"]),
            "iterations_mean": float(np.mean(its)) if its else None,
            "iterations_max": _max(d["iterations_max"]),
            "kinetic": series_mean(d["t_kin"]),
            "alarms": sum(n for (kind, where), n in alarms.items() if where == name),
        })
    group_rows = []
    for gi, d in groups.items():
        temps = [t for t in d["temperature"] if t is not None]
        checks = Counter(d["check"])
        group_rows.append({
            "group": gi, "temperature": temps[-1] if temps else None,
            "kinetic": series_mean(d["t_kin"]),
            "check": ", ".join(f"{k} x{n}" for k, n in checks.most_common()),
            "alarms": sum(n for (kind, where), n in alarms.items() if where == f"group {gi}"),
        })
    return {
        "path": log.path,
        "version": log.records[-1]["version"],
        "records": len(log.records),
        "first_step": log.records[0]["step"],
        "last_step": log.records[-1]["step"],
        "optimizer": (log.header or {}).get("optimizer"),
        "parameters": param_rows,
        "groups": group_rows,
        "alarms": [{"kind": k, "where": w, "count": n, "first": first[(k, w)]}
                   for (k, w), n in sorted(alarms.items())],
    }


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
    """The summary as text: a parameter table, a group table and one line
    per alarm kind and place."""
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
    if summary["groups"]:
        out.append("")
        rows = []
        for g in summary["groups"]:
            m, t = g["kinetic"], g["temperature"]
            z = "-"
            if m is not None and m.stderr and t:
                z = f"{(m.mean - t) / m.stderr:+.2f}"
            rows.append([str(g["group"]), _fmt(t), _fmt_mean(m), z, g["check"], str(g["alarms"])])
        out += _table(["group", "target T", "T_kin (armed)", "z of mean", "kinetic check", "alarms"], rows)
    out.append("")
    out.append("T_kin = |P|^2 / N_f (tangent degrees of freedom), averaged over records after burn-in; "
               "+- is the standard error from the integrated autocorrelation time of the record series "
               "(it assumes a stationary series; none is shown below 20 records).")
    if summary["alarms"]:
        out.append("")
        total = sum(a["count"] for a in summary["alarms"])
        out.append(f"ALARMS ({total}):")
        for a in summary["alarms"]:
            out.append(f"  ALARM {a['kind']} {a['where']}: {a['count']} record(s); first: {a['first']}")
    else:
        out.append("no alarm")
    return "\n".join(out)


def plot_audit(log: AuditLog, out_path: str) -> None:
    """Residual (log scale) and kinetic temperature against step, one line
    per constrained parameter, target temperatures dashed; written to
    ``out_path`` with matplotlib's Agg backend."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (ax_r, ax_t) = plt.subplots(2, 1, figsize=(8, 6.5), sharex=True)
    series: dict[str, dict[str, list[float]]] = {}
    targets: dict[float, None] = {}
    for rec in log.records:
        for p in rec["parameters"]:
            s = series.setdefault(p["name"], {"step": [], "res": [], "tstep": [], "tkin": []})
            if p["residual_max"] is not None:
                s["step"].append(rec["step"])
                s["res"].append(max(p["residual_max"], 1e-18))
            if p["kinetic_temperature"] is not None:
                s["tstep"].append(rec["step"])
                s["tkin"].append(p["kinetic_temperature"])
        for g in rec["groups"]:
            if g["temperature"]:
                targets[g["temperature"]] = None
    for name, s in series.items():
        ax_r.plot(s["step"], s["res"], label=name, lw=1)
        if s["tkin"]:
            ax_t.plot(s["tstep"], s["tkin"], label=name, lw=1)
    for t in targets:
        ax_t.axhline(t, color="k", ls="--", lw=1, label=f"target T = {t:g}")
    ax_r.set_yscale("log")
    ax_r.set_ylabel("max relative residual")
    ax_t.set_ylabel("kinetic temperature |P|^2 / N_f")
    ax_t.set_xlabel("step")
    ax_r.legend(fontsize=7, loc="best")
    if ax_t.lines:
        ax_t.legend(fontsize=7, loc="best")
    else:
        ax_t.text(0.5, 0.5, "no momenta recorded (drift-only audit)", ha="center", va="center",
                  transform=ax_t.transAxes)
    ax_r.set_title(f"audit: {log.path}", fontsize=9)
    fig.tight_layout()
    fig.savefig(out_path, dpi=110)
    plt.close(fig)
