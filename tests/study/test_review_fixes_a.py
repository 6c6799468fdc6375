"""Fixes from the user-style review of ``holonomic study`` (issue 13 follow-up, part a)."""

from __future__ import annotations

import copy

import torch

from holonomic.study import parse_config
from holonomic.study.runner import RunSpec, train_run

DROPOUT = "tests.study.factories:dropout_mlp"


def _dropout_config(doc: dict):
    doc = copy.deepcopy(doc)
    doc["model"] = {"factory": DROPOUT}
    doc["arms"] = {"none": {}, "weight_decay": {"grid": [0.0, 1e-3]}}
    doc["study"]["seeds"] = 2
    doc["budget"]["epochs"] = 2
    return parse_config(doc)


def _metrics(config, arm: str, strength: float) -> dict:
    record = train_run(config, RunSpec(arm, 0, strength, seed=0), hooks=[])
    assert record["status"] == "ok"
    return record["metrics"]


def test_dropout_runs_are_reproducible_and_paired_across_arms(tiny_doc):
    config = _dropout_config(tiny_doc)
    torch.manual_seed(1)
    first = _metrics(config, "none", 0.0)
    state = torch.random.get_rng_state()
    torch.manual_seed(2)  # the caller's global RNG state does not matter
    again = _metrics(config, "none", 0.0)
    assert first == again
    # weight decay 0 is the unregularised arm: same dropout masks, same numbers
    assert _metrics(config, "weight_decay", 0.0) == first
    # and training leaves the caller's global RNG where it was
    torch.manual_seed(1)
    _metrics(config, "none", 0.0)
    assert torch.equal(torch.random.get_rng_state(), state)


# ---------------------------------------------------------------------------------------
# 2, 3: an edited factory module, a moved study folder, what changed

import os  # noqa: E402
import shutil  # noqa: E402
import sys  # noqa: E402
from pathlib import Path  # noqa: E402

from holonomic.cli import main  # noqa: E402
from tests.study.robust_helpers import (  # noqa: E402
    SMALL_TOML,
    snapshot,
    with_data_file,
    write_invented_csv,
    write_study,
)

ONE_SEED_TOML = SMALL_TOML.replace("[arms.fixed_norm]\ngrid = [0.5]\n", "").replace(
    "epochs = 3", "epochs = 2")


def _cli(study: Path, out: Path, *extra: str) -> int:
    return main(["study", str(study), "--out", str(out), "--quiet", "--no-plots", *extra])


def _factory_source(width: int) -> str:
    return ("from torch import nn\n\n"
            "def make(in_features, n_outputs):\n"
            f"    return nn.Sequential(nn.Linear(in_features, {width}), nn.ReLU(),\n"
            f"                         nn.Linear({width}, n_outputs))\n")


def test_an_edited_factory_module_is_a_different_model(tmp_path, capsys):
    module = f"edited_model_{os.getpid()}"
    source = tmp_path / f"{module}.py"
    source.write_text(_factory_source(4))
    study = write_study(tmp_path, ONE_SEED_TOML.replace("widths = [8, 8]",
                                                        f'factory = "{module}:make"'))
    out = tmp_path / "out"
    sys.modules.pop(module, None)
    try:
        assert _cli(study, out) == 0, capsys.readouterr().err
        capsys.readouterr()
        before = snapshot(out)
        source.write_text(_factory_source(16))  # a wider layer: another model
        sys.modules.pop(module, None)
        assert _cli(study, out) == 2
        err = capsys.readouterr().err
        assert "Traceback" not in err
        assert "different data, model or budget" in err and "model_source.sha256" in err, err
        assert snapshot(out) == before
    finally:
        sys.modules.pop(module, None)


def _csv_study(folder: Path) -> Path:
    folder.mkdir(parents=True)
    write_invented_csv(folder / "data.csv", n=200)
    return write_study(folder, with_data_file(ONE_SEED_TOML, "data.csv"))


def test_a_moved_study_folder_still_reports_and_changes_are_named(tmp_path, capsys):
    first = tmp_path / "first"
    study = _csv_study(first)
    assert _cli(study, first / "out") == 0, capsys.readouterr().err
    moved = tmp_path / "elsewhere" / "moved"
    shutil.copytree(first, moved)
    shutil.rmtree(first)
    assert _cli(moved / study.name, moved / "out", "--report-only") == 0, \
        capsys.readouterr().err
    capsys.readouterr()
    (moved / study.name).write_text((moved / study.name).read_text().replace(
        "epochs = 2", "epochs = 3"))
    assert _cli(moved / study.name, moved / "out", "--report-only") == 2
    err = capsys.readouterr().err
    assert "budget.epochs: 2 -> 3" in err, err


# ---------------------------------------------------------------------------------------
# 4: the factory's model is tried on the data before the study starts

import pytest  # noqa: E402

_BAD_OUTPUTS = {
    "10 outputs on binary data": ("breast_cancer", "tests.study.factories:too_many_outputs",
                                  ["(4, 10)", "expected (4, 2)", "too_many_outputs"]),
    "10 outputs on regression": ("diabetes", "tests.study.factories:too_many_outputs",
                                 ["(4, 10)", "expected (4, 1)", "regression"]),
    "CNN fed feature rows": ("demo", "tests.study.factories:image_cnn",
                             ["forward pass fails", "RuntimeError", "image_cnn"]),
}


@pytest.mark.parametrize("case", list(_BAD_OUTPUTS))
def test_a_model_that_does_not_fit_the_data_is_refused_before_any_output(
        tmp_path, capsys, case):
    source, factory, expected = _BAD_OUTPUTS[case]
    text = ONE_SEED_TOML.replace("widths = [8, 8]", f'factory = "{factory}"')
    text = text.replace('source = "demo"', f'source = "{source}"')
    if source == "diabetes":
        text = text.replace("train_size = 64\n", "")
    study = write_study(tmp_path, text)
    out = tmp_path / "out"
    assert _cli(study, out) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    assert "model.factory" in err
    for part in expected:
        assert part in err, (part, err)
    assert not out.exists()


# ---------------------------------------------------------------------------------------
# 5: study files that are not UTF-8

from holonomic.study import StudyConfigError, load_config  # noqa: E402


@pytest.mark.parametrize("encoding,offset", [("utf-16", 0), ("latin-1", None)])
def test_a_study_file_that_is_not_utf8_is_a_clear_error(tmp_path, capsys, encoding, offset):
    text = ONE_SEED_TOML.replace('name = "small"', 'name = "étude"')
    study = tmp_path / "s.toml"
    study.write_bytes(text.encode(encoding))
    with pytest.raises(StudyConfigError) as info:
        load_config(study)
    message = str(info.value)
    assert str(study) in message and "study files are UTF-8 TOML" in message
    where = offset if offset is not None else text.encode(encoding).index("é".encode(encoding))
    assert f"byte {where} " in message
    assert _cli(study, tmp_path / "out") == 2
    assert "Traceback" not in capsys.readouterr().err


def test_a_utf8_byte_order_mark_is_accepted(tmp_path):
    study = tmp_path / "bom.toml"
    study.write_bytes(b"\xef\xbb\xbf" + ONE_SEED_TOML.encode())
    assert load_config(study).name == "small"


# ---------------------------------------------------------------------------------------
# 6: load_trained finds a factory beside the study file; mean imputation when predicting

import numpy as np  # noqa: E402

from holonomic.study import load_trained, predict  # noqa: E402


def test_load_trained_finds_the_factory_beside_the_study_file(tmp_path, capsys, monkeypatch):
    module = f"beside_trained_{os.getpid()}"
    folder = tmp_path / "study"
    folder.mkdir()
    (folder / f"{module}.py").write_text(_factory_source(4))
    study = write_study(folder, ONE_SEED_TOML.replace("widths = [8, 8]",
                                                      f'factory = "{module}:make"'))
    out = tmp_path / "elsewhere" / "out"  # --out not beside the study file
    sys.modules.pop(module, None)
    try:
        assert _cli(study, out) == 0, capsys.readouterr().err
        sys.modules.pop(module, None)
        monkeypatch.chdir(tmp_path)
        model, info = load_trained(out, "none-0.0-s0")
        assert info["study_dir"] == str(folder.resolve())
        assert predict(model, info, np.zeros((2, info["in_features"]))).shape == (2,)
        # the folder gone: still a clear error naming where it looked
        sys.modules.pop(module, None)
        shutil.rmtree(folder)
        with pytest.raises(StudyConfigError, match="cannot rebuild the model"):
            load_trained(out, "none-0.0-s0")
    finally:
        sys.modules.pop(module, None)


def test_predict_fills_missing_features_with_the_saved_training_means(tmp_path, capsys):
    folder = tmp_path / "s"
    study = _csv_study(folder)
    lines = (folder / "data.csv").read_text().splitlines()
    lines[3] = "," + lines[3].split(",", 1)[1]  # a missing value in column a
    (folder / "data.csv").write_text("\n".join(lines) + "\n")
    study.write_text(study.read_text().replace('target = "label"',
                                               'target = "label"\nmissing = "mean"'))
    out = folder / "out"
    assert _cli(study, out) == 0, capsys.readouterr().err
    model, info = load_trained(out, "none-0.0-s0")
    mean = info["imputation_mean"].numpy()
    assert mean.shape == (3,) and np.isfinite(mean).all()
    x = np.array([[np.nan, 0.5, -0.2], [mean[0], 0.5, -0.2]])
    from holonomic.study.trained import raw_outputs

    outputs = raw_outputs(model, info, x)
    assert np.array_equal(outputs[0], outputs[1])
    assert predict(model, info, x).shape == (2,)


def test_dropout_sampling_in_the_ensemble_phase_is_reproducible(tiny_doc):
    doc = copy.deepcopy(tiny_doc)
    doc["model"] = {"factory": DROPOUT}
    doc["arms"] = {"none": {}, "weight_decay": {
        "grid": [0.0], "ensemble": {"temperature": 1.0, "samples": 4, "every": 2,
                                    "burn_in": 2}}}
    config = parse_config(doc)
    spec = RunSpec("weight_decay", 0, 0.0, seed=0)
    torch.manual_seed(1)
    first = train_run(config, spec, hooks=[])["ensemble"]
    torch.manual_seed(2)
    again = train_run(config, spec, hooks=[])["ensemble"]
    assert first["status"] == "ok"
    assert first["ensemble"] == again["ensemble"] and first["traces"] == again["traces"]


def test_runs_recorded_with_the_old_fingerprint_are_still_accepted(tmp_path):
    """Before, the fingerprint held a data file's absolute path: studies begun then, where
    they are, stay resumable."""
    from holonomic.study.execution import check_compatible

    config = load_config(_csv_study(tmp_path / "s"))
    legacy = config._fingerprint(legacy=True)
    assert legacy != config.training_fingerprint()
    record = {"arm": "none", "fingerprint": legacy, "data_fingerprint": "x",
              "ensemble_settings": None}
    # accepted; such old runs did not record the version that made them: a warning says so
    with pytest.warns(UserWarning, match="a version that was not recorded"):
        check_compatible(config, {"none-0.0-s0": record}, tmp_path, fingerprint="x")
    record["fingerprint"] = "0" * 16
    with pytest.raises(StudyConfigError, match="different data, model or budget"):
        check_compatible(config, {"none-0.0-s0": record}, tmp_path, fingerprint="x")
