"""Drift under other optimizers, repair, alarms, and a clean holonomic run."""

from __future__ import annotations

import warnings

import pytest
import torch
from torch import nn
from torch.nn import functional as F

import holonomic as hn
from holonomic.audit import Audit, AuditWarning, read_audit, repair
from holonomic.cli import main as cli_main


def _mlp(dtype=torch.float32, seed=0):
    torch.manual_seed(seed)
    model = nn.Sequential(nn.Linear(8, 16), nn.Tanh(), nn.Linear(16, 6), nn.Tanh(), nn.Linear(6, 3))
    model.to(dtype)
    hn.constrain(model, **{"0.weight": hn.FixedNorm(1.5, over="rows"), "2.weight": hn.Orthonormal(over="rows")})
    return model


def _data(dtype=torch.float32, n=64, seed=1):
    # Invented demo data, generated from a seed.
    gen = torch.Generator().manual_seed(seed)
    x = torch.randn(n, 8, generator=gen, dtype=dtype)
    y = (x[:, 0] + x[:, 1] > 0).long() + (x[:, 2] > 1).long()
    return x, y


def _train(model, opt, steps, audit=None, x=None, y=None):
    for _ in range(steps):
        opt.zero_grad()
        F.cross_entropy(model(x), y).backward()
        opt.step()
        if audit is not None:
            audit()


def test_adamw_drift_detected_alarm_exit_status_and_repair(tmp_path, capsys):
    model = _mlp()
    x, y = _data()
    opt = torch.optim.AdamW(model.parameters(), lr=1e-2, weight_decay=0.1)
    path = tmp_path / "adamw.jsonl"
    with Audit(model, opt, every=5, path=path) as audit:
        with pytest.warns(AuditWarning, match="off its constraint set"):
            _train(model, opt, 40, audit, x, y)
    rec = audit.records[-1]
    eps = torch.finfo(torch.float32).eps
    names = {p["name"] for p in rec["parameters"]}
    assert names == {"0.weight", "2.weight"}
    for p in rec["parameters"]:
        assert p["residual_max"] > 1000 * eps  # drift: far above roundoff
        assert p["kinetic_temperature"] is None and p["iterations_max"] is None  # drift only
        assert p["kinetic_check"].startswith("skipped")
    assert {a["kind"] for a in audit.alarms} == {"residual"}
    assert not audit.ok and audit.summary()["alarm_count"] == len(audit.alarms)
    # the record's residual is the constraint's own residual (parity)
    live = hn.residuals(model)
    for p in rec["parameters"]:
        assert p["residual_max"] == pytest.approx(live[p["name"]], rel=1e-6)
    # command line: summary with the alarm, non-zero exit status
    assert cli_main(["audit", str(path)]) == 1
    out = capsys.readouterr().out
    assert "ALARM residual 0.weight" in out and "ALARM residual 2.weight" in out
    # repair: projects back to roundoff and reports the distance moved
    before = {n: p.detach().clone() for n, p in model.named_parameters()}
    report = repair(model)
    assert set(report) == {"0.weight", "2.weight"}
    for name, r in report.items():
        c = hn.constraint_of(dict(model.named_parameters())[name])
        moved = float((before[name] - dict(model.named_parameters())[name].detach()).norm())
        assert r.distance == pytest.approx(moved, rel=1e-6) and r.distance > 0
        assert r.residual_before > 1000 * eps
        assert r.residual_after <= 8 * eps  # roundoff of one projection
        assert float(c.residual(dict(model.named_parameters())[name].detach())) == r.residual_after
    assert model[0].weight.grad is not None  # repair leaves gradients alone


def test_clean_file_exit_zero_and_plot(tmp_path, capsys):
    model = _mlp()
    x, y = _data()
    opt = hn.Langevin(model.parameters(), step=0.05, friction=2.0, temperature=0.0)
    path = tmp_path / "clean.jsonl"
    with warnings.catch_warnings():
        warnings.simplefilter("error", AuditWarning)
        with Audit(model, opt, every=2, path=path) as audit:
            _train(model, opt, 20, audit, x, y)
    assert audit.ok and len(audit.records) == 10
    for p in audit.records[-1]["parameters"]:
        assert p["kinetic_check"] == "skipped: temperature 0"
        assert p["kinetic_temperature"] is not None and p["kinetic_z"] is None
        assert p["iterations_max"] >= 1 and p["tangency_residual"] is not None
    for g in audit.records[-1]["groups"]:
        assert g["kinetic_check"] == "skipped: temperature 0"
    png = tmp_path / "audit.png"
    assert cli_main(["audit", str(path), "--plot", str(png)]) == 0
    out = capsys.readouterr().out
    assert "no alarm" in out and "skipped: temperature 0" in out
    assert png.stat().st_size > 1000 and png.read_bytes()[:4] == b"\x89PNG"


def test_record_fields_against_direct_computation():
    model = _mlp(torch.float64)
    x, y = _data(torch.float64)
    opt = hn.Langevin(model.parameters(), step=0.05, friction=1.0, temperature=0.3, seed=4)
    audit = Audit(model, opt, every=3)
    _train(model, opt, 3, audit, x, y)
    (rec,) = audit.records
    w = model[0].weight.detach()
    c = hn.constraint_of(model[0].weight)
    p = {q["name"]: q for q in rec["parameters"]}["0.weight"]
    mom = opt.state[model[0].weight]["momentum"]
    g = model[0].weight.grad
    rel = w.norm(dim=1) / 1.5 - 1
    assert p["residual_max"] == pytest.approx(float(rel.abs().max()), abs=1e-18)
    assert p["residual_rms"] == pytest.approx(float(rel.pow(2).mean().sqrt()), abs=1e-18)
    assert p["tangent_dof"] == 16 * 7
    assert p["kinetic_temperature"] == pytest.approx(float((mom**2).sum()) / (16 * 7))
    gt = g - (g * w).sum(1, keepdim=True) * w / 1.5**2  # tangent part (docs/math.md 3)
    assert p["grad_norm_tangent"] == pytest.approx(float(gt.norm()))
    assert p["grad_norm_normal"] == pytest.approx(float((g - gt).norm()))
    assert p["row_norm_mean"] == pytest.approx(1.5)
    # pooled group temperature counts unconstrained parameters with numel dof
    total = sum(float((opt.state[q]["momentum"] ** 2).sum()) for q in model.parameters())
    dof = sum((hn.constraint_of(q).tangent_dof(q.shape) if hn.constraint_of(q) else q.numel())
              for q in model.parameters())
    assert rec["groups"][0]["kinetic_temperature"] == pytest.approx(total / dof)
    assert rec["groups"][0]["kinetic_check"] == "skipped: burn-in"  # sum gamma h = 0.15 < 10


def test_kinetic_alarm_fires_when_temperature_is_wrong():
    """A thermostat at 1.15 T while the audit expects T (noise scale off by
    ~7%): the alarm must fire on a layer of modest size."""
    model = nn.Module()
    model.register_parameter("w", nn.Parameter(torch.randn(200, 10, dtype=torch.float64)))
    hn.constrain(model, w=hn.FixedNorm(1.0))
    opt = hn.Langevin(model.parameters(), step=0.1, friction=5.0, temperature=1.15, seed=2)
    audit = Audit(model, opt, every=1, burn_in=2.0)
    with pytest.warns(AuditWarning, match="kinetic temperature"):
        for _ in range(60):
            model.w.grad = torch.zeros_like(model.w)
            opt.step()  # thermostat at 1.15
            opt.param_groups[0]["temperature"] = 1.0  # the audit reads the target T = 1
            audit()
            opt.param_groups[0]["temperature"] = 1.15
    assert {a["kind"] for a in audit.alarms} == {"kinetic"}


def test_iteration_limit_alarm_and_overdamped_and_attach():
    model = _mlp(torch.float64)
    x, y = _data(torch.float64)
    opt = hn.OverdampedLangevin(model.parameters(), step=0.01, temperature=0.01, seed=1)
    audit = Audit(model, opt, every=4, iteration_limit=2)
    handle = audit.attach()
    with pytest.warns(AuditWarning, match="iterations"):
        _train(model, opt, 8, None, x, y)
    handle.remove()
    assert len(audit.records) == 2
    p = {q["name"]: q for q in audit.records[-1]["parameters"]}
    assert p["0.weight"]["iterations_max"] == 1  # closed-form SHAKE
    assert p["2.weight"]["iterations_max"] >= 2  # iterative SHAKE (Orthonormal)
    assert p["2.weight"]["kinetic_check"].startswith("skipped")
    assert {(a["kind"], a["where"]) for a in audit.alarms} == {("iterations", "2.weight")}


def test_constructor_errors():
    with pytest.raises(ValueError, match="every"):
        Audit(nn.Linear(2, 2), every=0)
    with pytest.raises(ValueError, match="kinetic_sigmas"):
        Audit(nn.Linear(2, 2), kinetic_sigmas=-1)
    with pytest.raises(ValueError, match="iteration_limit"):
        Audit(nn.Linear(2, 2), iteration_limit=0)
    with pytest.raises(ValueError, match="model"):
        Audit("not a model")
    with pytest.raises(ValueError, match="no model"):
        Audit()()


@pytest.mark.slow
def test_holonomic_float32_run_of_ten_thousand_steps_has_no_alarm():
    torch.manual_seed(3)
    model = nn.Sequential(nn.Linear(8, 4), nn.Tanh(), nn.Linear(4, 3))
    hn.constrain(model, **{"0.weight": hn.Orthonormal(over="rows"), "2.weight": hn.FixedNorm(1.5)})
    x, y = _data(torch.float32, n=32)
    opt = hn.Langevin(model.parameters(), step=0.05, friction=2.0, temperature=1e-3, seed=5,
                      dataset_size=32)
    # burn_in: while the loss still falls (the first few hundred steps) the
    # momenta carry the released potential energy and run hot, a real
    # departure from equilibrium that the kinetic alarm reports; 100
    # friction times (1000 steps) skip it.
    audit = Audit(model, opt, every=20, burn_in=100.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error", AuditWarning)
        _train(model, opt, 10_000, audit, x, y)
    assert audit.ok and len(audit.records) == 500
    eps = torch.finfo(torch.float32).eps
    worst = max(p["residual_max"] for r in audit.records for p in r["parameters"])
    assert worst < 100 * eps  # roundoff
    checked = [g for r in audit.records for g in r["groups"] if g["kinetic_check"] == "checked"]
    assert len(checked) >= 450  # the kinetic check was armed for 90% of the run
