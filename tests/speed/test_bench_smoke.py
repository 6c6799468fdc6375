"""Smoke test of the benchmark command (``python -m holonomic.bench``): it
runs and writes well-formed results.  No timing assertions: the figures are
ratios on a noisy machine and belong in the README, not in a test."""

import json
import math

import pytest

from holonomic.bench.suite import _log_slope, bench_scaling, compare, format_table, main


def test_compare_reports_interleaved_ratios():
    calls = []
    out = compare(lambda: calls.append("a"), lambda: calls.append("b"), rounds=4, calls=2, warmup=1)
    assert calls[:2] == ["a", "b"]  # warm-up
    # rounds alternate; each turn makes one untimed call, then the timed ones
    assert calls[2:8] == ["a"] * 3 + ["b"] * 3 and calls[8:14] == ["b"] * 3 + ["a"] * 3
    assert out["rounds"] == 4 and out["q1"] <= out["ratio"] <= out["q3"]
    assert all(math.isfinite(out[k]) and out[k] > 0 for k in ("ratio", "a_ms", "b_ms"))


@pytest.mark.slow
def test_bench_command_writes_results(tmp_path, capsys):
    path = tmp_path / "bench.json"
    assert main(["--quick", "--only", "steps", "memory", "--json", str(path), "--threads", "1"]) == 0
    result = json.loads(path.read_text())
    assert result["threads"] == 1 and result["dtype"] == "float32"
    for key in ("t0_vs_sgd", "hot_vs_plain_langevin", "t0_eager_vs_reference", "t0_vs_sgd_eager"):
        assert math.isfinite(result[key]["ratio"]) and result[key]["ratio"] > 0
    memory = result["memory"]
    # one float32 momentum buffer per parameter, as torch.optim.SGD(momentum=...) keeps
    assert memory["holonomic"]["state_bytes_per_param"] == pytest.approx(4.0)
    assert memory["sgd"]["state_bytes_per_param"] == pytest.approx(4.0)
    printed = capsys.readouterr().out
    assert "1 T=0 step vs SGD" in printed and format_table(result) in printed


def test_scaling_reports_both_exponents():
    # the fit recovers an exact power law (y = 3 x^2: slope 2)
    assert _log_slope([1.0, 2.0, 4.0, 8.0], [3.0, 12.0, 48.0, 192.0]) == pytest.approx(2.0, rel=1e-12)
    s = bench_scaling(1, (0.01, 0.04))["scaling"]
    assert s["params"] == [10000, 40000] and len(s["step_ms"]) == len(s["sgd_step_ms"]) == 2
    assert s["exponent"] == pytest.approx(_log_slope(s["params"], s["step_ms"]))
    assert s["sgd_exponent"] == pytest.approx(_log_slope(s["params"], s["sgd_step_ms"]))
    header = {"date": "-", "torch": "-", "threads": 1, "cpu_count": 1, "dtype": "float32"}
    assert "SGD's k" in format_table({**header, "scaling": s})
