"""``holonomic audit`` at scale and under bad input (issue 16, item 9): streaming in
constant memory, clear errors with exit status 2, ``--plot`` to exactly the path given,
the z of the mean explained, zero residuals masked on the log axis."""

from __future__ import annotations

import json
import math
import random
import tracemalloc

import numpy as np
import pytest

from holonomic.audit import AuditDigest, read_audit, series_mean, summarize
from holonomic.audit.report import _RunningSeries
from holonomic.cli import main as cli_main


def _record(step, rng, *, t_kin_mean=1.0, residual=None, alarms=()):
    """One schema-1 record in the shape Audit writes (invented values, generated from a seed)."""
    t_w = t_kin_mean * (1 + 0.05 * rng.gauss(0, 1))
    t_b = t_kin_mean * (1 + 0.08 * rng.gauss(0, 1))
    res = rng.random() * 1e-7 if residual is None else residual
    return {
        "type": "record", "schema": "holonomic.audit", "version": 1, "step": step,
        "parameters": [
            {"name": "fc.weight", "constraint": "FixedNorm(radius=1.0, over='rows')", "group": 0,
             "shape": [64, 32], "tangent_dof": 1984, "residual_max": res, "residual_rms": res / 2,
             "kinetic_z": 0.0, "kinetic_interval": [0.6, 1.4], "grad_norm_tangent": rng.random(),
             "grad_norm_normal": rng.random(), "weight_norm": 8.0, "row_norm_min": 1.0 - res,
             "row_norm_mean": 1.0, "row_norm_max": 1.0 + res, "tangency_residual": rng.random() * 1e-9,
             "iterations_mean": 1.0 + rng.random(), "iterations_max": 1 + rng.randrange(3),
             "kinetic_temperature": t_w, "kinetic_check": "checked"},
            {"name": "out.weight", "group": 0, "residual_max": rng.random() * 1e-6,
             "kinetic_temperature": t_b, "kinetic_check": "skipped: burn-in" if step < 50 else "checked"},
        ],
        "groups": [{"group": 0, "temperature": t_kin_mean if step >= 0 else 1.0,
                    "kinetic_temperature": (t_w + t_b) / 2,
                    "kinetic_check": "checked" if step >= 20 else "skipped: burn-in"}],
        "alarms": list(alarms),
    }


def _write(path, n, seed=0, **kw):
    rng = random.Random(seed)
    header = {"type": "header", "schema": "holonomic.audit", "version": 1, "optimizer": "Langevin",
              "every": 1, "thresholds": {"kinetic_sigmas": 5.0}}
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(json.dumps(header) + "\n")
        for step in range(1, n + 1):
            fh.write(json.dumps(_record(step, rng, **kw), separators=(",", ":")) + "\n")
    return path


# -- scale -----------------------------------------------------------------------------------

def _traced_peak(path, **limits):
    tracemalloc.start()
    try:
        digest = AuditDigest.from_file(path, **limits)
        summary = digest.summary()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return peak, digest, summary


def test_large_file_is_streamed_in_bounded_memory(tmp_path):
    # Small buffers (256 exact values, 200 plot points) so that short files already go past
    # them: what is checked is that memory stops growing with the file, at any limits.
    limits = {"series_limit": 256, "plot_points": 200}
    small = _write(tmp_path / "small.jsonl", 2_000, seed=1)
    n = 8_000
    big = _write(tmp_path / "big.jsonl", n)
    size = big.stat().st_size
    assert size > 5e6
    peak_small, _, _ = _traced_peak(small, **limits)
    peak, digest, summary = _traced_peak(big, **limits)
    # Before the fix the whole file was held as Python objects (about 5 times its size);
    # streaming holds one line and a few fixed buffers: no growth with 4 times the records.
    assert peak < size / 20, f"peak {peak / 1e6:.2f} MB for a {size / 1e6:.1f} MB file"
    assert peak < 1.25 * peak_small + 20_000, (peak, peak_small)
    assert summary["records"] == n and summary["last_step"] == n
    rows = {r["name"]: r for r in summary["parameters"]}
    rng = random.Random(0)  # the same draws as _write(seed=0)
    ref = [_record(step, rng)["parameters"][0] for step in range(1, n + 1)]
    t_w = [p["kinetic_temperature"] for p in ref]
    assert rows["fc.weight"]["residual_max"] == max(p["residual_max"] for p in ref)
    k = rows["fc.weight"]["kinetic"]
    assert k.count == n and k.mean == pytest.approx(float(np.mean(t_w)), rel=1e-12)
    # i.i.d. draws: the batch-means standard error is close to sd / sqrt(n)
    assert k.stderr == pytest.approx(float(np.std(t_w, ddof=1)) / math.sqrt(n), rel=0.3)
    steps, res = digest._params["fc.weight"].residual_points.points()
    assert len(steps) <= 201 and max(res) == rows["fc.weight"]["residual_max"]  # spikes survive


def test_streamed_summary_equals_the_in_memory_summary_on_a_small_file(tmp_path):
    path = _write(tmp_path / "small.jsonl", 300, seed=3)
    summary = summarize(path)  # streamed
    log = read_audit(path)  # in memory: the reference, computed directly
    params = {}
    for rec in log.records:
        for p in rec["parameters"]:
            params.setdefault(p["name"], []).append(p)
    for row in summary["parameters"]:
        ps = params[row["name"]]
        assert row["records"] == len(ps)
        assert row["residual_max"] == max(p["residual_max"] for p in ps)
        assert row["residual_last"] == ps[-1]["residual_max"]
        its = [p["iterations_mean"] for p in ps if p["iterations_mean"] is not None]
        assert row["iterations_mean"] == (pytest.approx(float(np.mean(its)), rel=1e-14) if its else None)
        assert row["kinetic"] == series_mean([p["kinetic_temperature"] for p in ps
                                              if p["kinetic_check"] == "checked"])
    (g,) = summary["groups"]
    ref = series_mean([r["groups"][0]["kinetic_temperature"] for r in log.records
                       if r["groups"][0]["kinetic_check"] == "checked"])
    assert g["kinetic"] == ref and g["z_mean"] == pytest.approx((ref.mean - 1.0) / ref.stderr)
    assert summarize(log) == summary  # the in-memory log goes through the same digest


def test_batch_means_standard_error_on_a_correlated_series():
    # AR(1) with coefficient a: tau = (1 + a) / (1 - a), var = 1 / (1 - a^2);
    # stderr of the mean = sqrt(var tau / n) (Sokal, lecture notes, section 3).
    a, n = 0.8, 200_000
    rng = np.random.default_rng(0)
    noise = rng.standard_normal(n)
    x = np.empty(n)
    x[0] = noise[0] / math.sqrt(1 - a * a)
    for i in range(1, n):
        x[i] = a * x[i - 1] + noise[i]
    s = _RunningSeries(4096)
    for v in x.tolist():
        s.add(v)
    m = s.mean()
    assert len(s.values) < 4096 and s.batch > 1
    assert m.mean == pytest.approx(float(x.mean()), abs=1e-12)
    exact = math.sqrt((1 / (1 - a * a)) * ((1 + a) / (1 - a)) / n)
    assert m.stderr == pytest.approx(exact, rel=0.2)


# -- bad input -------------------------------------------------------------------------------

def _one(tmp_path, record):
    path = tmp_path / "bad.jsonl"
    good = json.dumps({"version": 1, "step": 1, "parameters": [{"name": "w", "residual_max": 0.0}]})
    path.write_text(good + "\n" + json.dumps(record) + "\n")
    return path


@pytest.mark.parametrize("record, message", [
    ({"version": 1, "step": 2, "parameters": {"name": "w"}},
     "line 2: field 'parameters' must be a list of objects, got {'name': 'w'}"),
    ({"version": 1, "step": 2, "parameters": [["w", 1e-7]]},
     "line 2: field 'parameters[0]' must be an object, got ['w', 1e-07]"),
    ({"version": 1, "step": 2, "parameters": [{"name": "w", "residual_max": "abc"}]},
     "line 2: field 'parameters[0].residual_max' must be a number or null, got 'abc'"),
    ({"version": 1, "step": 2, "parameters": [{"name": "w", "kinetic_temperature": [1.0]}]},
     "line 2: field 'parameters[0].kinetic_temperature' must be a number or null, got [1.0]"),
    ({"version": 1, "step": 2, "parameters": [{"name": 3}]},
     "line 2: field 'parameters[0].name' must be a string or null, got 3"),
    ({"version": 1, "step": 2, "parameters": [], "groups": {"group": 0}},
     "line 2: field 'groups' must be a list of objects"),
    ({"version": 1, "step": 2, "parameters": [], "groups": [{"group": 0, "temperature": "1.0"}]},
     "line 2: field 'groups[0].temperature' must be a number or null, got '1.0'"),
    ({"version": 1, "step": 2, "parameters": [], "alarms": {"kind": "residual"}},
     "line 2: field 'alarms' must be a list of objects"),
    ({"version": 1, "step": 2, "parameters": [], "alarms": ["residual"]},
     "line 2: field 'alarms[0]' must be an object, got 'residual'"),
])
def test_malformed_fields_are_clear_errors_with_status_2(tmp_path, capsys, record, message):
    path = _one(tmp_path, record)
    assert cli_main(["audit", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("holonomic audit: error: ") and message in err and "Traceback" not in err


def test_bad_paths_are_clear_errors_with_status_2(tmp_path, capsys):
    good = _write(tmp_path / "good.jsonl", 5)
    cases = [
        (["audit", str(tmp_path)], "is a directory, not an audit file"),
        (["audit", str(tmp_path / "missing.jsonl")], "no such audit file"),
        (["audit", str(good), "--plot", str(tmp_path / "nowhere" / "a.png")], "does not exist; create it"),
        (["audit", str(good), "--plot", str(tmp_path / "a.jpeg")], "must end in one of .png, .pdf, .svg"),
        (["audit", str(good), "--plot", str(tmp_path / "plots")], "got no suffix"),
        (["audit", str(good), "--plot", str(good)], "must end in one of"),
    ]
    (tmp_path / "dir.png").mkdir()
    cases.append((["audit", str(good), "--plot", str(tmp_path / "dir.png")], "is a directory"))
    for argv, message in cases:
        assert cli_main(argv) == 2, argv
        captured = capsys.readouterr()
        assert captured.err.startswith("holonomic audit: error: ") and message in captured.err, argv
        assert "Traceback" not in captured.err and captured.out == ""  # refused before any output
    assert not (tmp_path / "plots.png").exists() and not (tmp_path / "a.jpeg").exists()


def test_help_documents_the_exit_statuses(capsys):
    with pytest.raises(SystemExit) as info:
        cli_main(["audit", "--help"])
    assert info.value.code == 0
    out = " ".join(capsys.readouterr().out.split())
    assert "0 no alarm" in out and "1 alarms found" in out and "2 bad input or usage" in out
    assert ".png, .pdf, .svg" in out


# -- plot ------------------------------------------------------------------------------------

@pytest.mark.parametrize("suffix, magic", [(".png", b"\x89PNG"), (".pdf", b"%PDF"), (".svg", b"<?xml")])
def test_plot_is_written_to_exactly_the_path_given(tmp_path, capsys, suffix, magic):
    path = _write(tmp_path / "run.jsonl", 30)
    out = tmp_path / f"figure{suffix}"
    assert cli_main(["audit", str(path), "--plot", str(out)]) == 0
    assert out.read_bytes()[:len(magic)] == magic
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(["run.jsonl", out.name])  # no out.png
    assert f"plot written to {out.resolve()}" in capsys.readouterr().out


def test_zero_residuals_are_not_drawn_on_the_log_axis(tmp_path):
    path = _write(tmp_path / "zeros.jsonl", 40, residual=0.0)
    digest = AuditDigest.from_file(path, plot_points=2000)
    fig = digest.figure()
    try:
        ax_r = fig.axes[0]
        assert ax_r.get_yscale() == "log"
        lines = {line.get_label(): line for line in ax_r.lines}
        y = np.asarray(lines["fc.weight"].get_ydata(), dtype=float)
        assert np.isnan(y).all()  # every residual of fc.weight is 0: nothing drawn (no 1e-18 spike)
        assert (np.asarray(lines["out.weight"].get_ydata(), dtype=float) > 0).all()
        assert ax_r.get_ylim()[0] > 1e-12  # the axis is not stretched down to a fake floor
        notes = " ".join(t.get_text() for t in fig.texts)
        assert "40 record(s) with residual exactly 0 not drawn" in notes
    finally:
        import matplotlib.pyplot as plt

        plt.close(fig)


# -- z of the mean ---------------------------------------------------------------------------

def test_z_of_the_mean_is_explained_and_does_not_change_the_exit_status(tmp_path, capsys):
    # A run 2% hot on average: every record well inside its +-5 sd interval, so no alarm was
    # recorded, but 600 records resolve the mean to ~0.3%: |z| far above 5.
    path = _write(tmp_path / "warm.jsonl", 600, seed=1)
    text = path.read_text().replace('"temperature":1.0', '"temperature":0.98')
    path.write_text(text)
    assert cli_main(["audit", str(path)]) == 0
    out = capsys.readouterr().out
    assert "no alarm" in out
    (z,) = [g["z_mean"] for g in summarize(path)["groups"]]
    assert z > 5
    assert "z of mean = (mean T_kin - T) / its standard error" in out
    assert "does not change the exit status" in out
    assert f"note: group 0: the mean kinetic temperature is {z:.3g} standard errors above its target" in out
    (bias,) = [g["bias"] for g in summarize(path)["groups"]]
    assert 0.015 < bias < 0.03  # 1.0 / 0.98 - 1 = 2% plus noise
    assert f"mean/T - 1 = {100 * bias:+.3g}%" in out


def test_a_truncated_last_line_is_ignored_with_a_warning(tmp_path, capsys):
    # A run killed while writing its audit leaves a last line without its newline: the
    # complete records before it are still summarised (found by a user-style review); a
    # broken line in the middle of a file is still an error.
    import warnings

    from holonomic.audit import read_audit

    good = _write(tmp_path / "good.jsonl", 5)
    text = good.read_text()
    cut = tmp_path / "cut.jsonl"
    cut.write_text(text + text.splitlines()[-1][:40])  # a partial copy of the last record
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        records = read_audit(cut)
    assert any("last line is incomplete" in str(w.message) for w in caught)
    assert len(records.records) == len(read_audit(good).records) == 5
    middle = tmp_path / "middle.jsonl"
    lines = text.splitlines()
    middle.write_text("\n".join(lines[:2] + [lines[2][:40]] + lines[3:]) + "\n")
    with pytest.raises(Exception, match="not valid JSON"):
        read_audit(middle)
