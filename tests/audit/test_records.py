"""The JSON Lines format: round trip, malformed, truncated, empty and legacy files."""

from __future__ import annotations

import json

import pytest
import torch

import holonomic as hn
from holonomic.audit import SCHEMA_VERSION, Audit, AuditFileError, read_audit
from holonomic.cli import main as cli_main


def _write_run(path, steps=6):
    model = torch.nn.Linear(5, 4).double()
    hn.constrain(model, weight=hn.FixedNorm(1.0))
    opt = hn.Langevin(model.parameters(), step=0.1, friction=1.0, temperature=0.5, seed=0)
    with Audit(model, opt, every=2, path=path) as audit:
        for _ in range(steps):
            opt.zero_grad()
            model(torch.ones(3, 5, dtype=torch.float64)).sum().backward()
            opt.step()
            audit()
    return audit


def test_round_trip(tmp_path):
    path = tmp_path / "run.jsonl"
    audit = _write_run(path)
    log = read_audit(path)
    assert log.header["version"] == SCHEMA_VERSION and log.header["optimizer"] == "Langevin"
    assert [r["step"] for r in log.records] == [2, 4, 6]
    for mem, disk in zip(audit.records, log.records):
        assert disk["parameters"][0]["residual_max"] == mem["parameters"][0]["residual_max"]
        assert disk["groups"][0]["kinetic_temperature"] == mem["groups"][0]["kinetic_temperature"]
    lines = path.read_text().splitlines()
    assert all(json.loads(line)["version"] == SCHEMA_VERSION for line in lines)


def test_truncated_line_names_the_line(tmp_path, capsys):
    path = tmp_path / "run.jsonl"
    _write_run(path)
    text = path.read_text()
    path.write_text(text[: len(text) - 40])  # a crash while writing the last record
    with pytest.warns(UserWarning, match=r"line 4: the last line is incomplete"):
        log = read_audit(path)  # the complete records before it are kept
    assert [r["line"] for r in log.records] == [2, 3]
    with pytest.warns(UserWarning, match="line 4"):
        assert cli_main(["audit", str(path)]) == 0
    path.write_text(text[: len(text) - 40] + "\n" + text.splitlines()[-1])  # broken mid-file
    with pytest.raises(AuditFileError, match=r"line 4: not valid JSON.*truncated"):
        read_audit(path)


def test_malformed_lines_name_the_line(tmp_path):
    path = tmp_path / "bad.jsonl"
    good = json.dumps({"version": 1, "step": 1, "parameters": []})
    path.write_text(good + "\n" + "{not json}\n")
    with pytest.raises(AuditFileError, match=r"bad.jsonl, line 2: not valid JSON"):
        read_audit(path)
    path.write_text(good + "\n[1, 2]\n")
    with pytest.raises(AuditFileError, match=r"line 2: expected a JSON object, got list"):
        read_audit(path)
    path.write_text(good + "\n" + json.dumps({"version": 1, "parameters": []}) + "\n")
    with pytest.raises(AuditFileError, match=r"line 2: a record needs an integer 'step'"):
        read_audit(path)
    path.write_text(json.dumps({"version": 99, "step": 1, "parameters": []}) + "\n")
    with pytest.raises(AuditFileError, match=r"line 1: written with audit schema version 99.*upgrade"):
        read_audit(path)


def test_empty_file_and_missing_file(tmp_path, capsys):
    path = tmp_path / "empty.jsonl"
    path.write_text("\n  \n")
    with pytest.raises(AuditFileError, match="is empty: it holds no audit records"):
        read_audit(path)
    assert cli_main(["audit", str(path)]) == 2
    assert "is empty" in capsys.readouterr().err
    with pytest.raises(AuditFileError, match="no such audit file"):
        read_audit(tmp_path / "missing.jsonl")


def test_legacy_version_zero_records_are_read(tmp_path, capsys):
    # Version 0: no "version"/"schema"/"type", per-parameter "residual" for the
    # maximum, no groups or alarms.
    path = tmp_path / "legacy.jsonl"
    lines = [json.dumps({"step": s, "parameters": [{"name": "fc.weight", "residual": 1e-7 * s}]})
             for s in (10, 20)]
    path.write_text("\n".join(lines) + "\n")
    log = read_audit(path)
    assert log.header is None and [r["version"] for r in log.records] == [0, 0]
    p = log.records[1]["parameters"][0]
    assert p["residual_max"] == pytest.approx(2e-6)
    assert p["kinetic_temperature"] is None and log.records[1]["alarms"] == []
    assert cli_main(["audit", str(path)]) == 0
    out = capsys.readouterr().out
    assert "fc.weight" in out and "schema version 0" in out
