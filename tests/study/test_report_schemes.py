"""The report of a real (tiny) study under each split scheme without test or validation
fractions: k-fold, a split column, separate files. ``data.test_fraction`` (and, for the
fixed schemes, ``data.val_fraction``) is None there; the report must still state the scheme
with the part sizes."""

from __future__ import annotations

import pytest

from holonomic.study import parse_config, run_study
from holonomic.study.data import describe_scheme, load_dataset
from tests.study.conftest import tiny_document
from tests.study.data_helpers import classes_csv, write


def _split_column_data(tmp_path) -> dict:
    n = 40
    part = ["train" if i % 4 < 2 else "val" if i % 4 == 2 else "test" for i in range(n)]
    write(tmp_path, "d.csv", classes_csv(n=n, extra={"part": part}))
    return {"source": "d.csv", "target": "label", "split_column": "part"}


def _files_data(tmp_path) -> dict:
    for name, n, seed in (("train.csv", 24, 1), ("val.csv", 12, 2), ("test.csv", 16, 3)):
        write(tmp_path, name, classes_csv(n=n, seed=seed))
    return {"source": "train.csv", "val_source": "val.csv", "test_source": "test.csv",
            "target": "label"}


def _folds_data(tmp_path) -> dict:
    return {"source": "demo", "folds": 3, "train_size": 64, "val_fraction": 0.25}


@pytest.mark.parametrize("scheme,make,sizes", [
    ("folds", _folds_data, "training 64, validation"),
    ("split_column", _split_column_data, "training 20, validation 10, test 10 rows"),
    ("files", _files_data, "training 24, validation 12, test 16 rows"),
])
def test_report_states_schemes_without_fractions(tmp_path, scheme, make, sizes):
    doc = tiny_document()
    doc["study"]["seeds"] = 2
    doc["data"] = make(tmp_path)
    doc["arms"] = {"none": {}, "weight_decay": {"grid": [1e-3, 1e-2]}}
    config = parse_config(doc, base_dir=tmp_path)
    assert config.data.scheme == scheme and config.data.test_fraction is None
    summary = run_study(config, tmp_path / "out", progress=False, plots=False)
    assert summary["runs"] == {"total": 6, "ok": 6, "failed": 0, "diverged": 0}
    report = (tmp_path / "out" / "report.md").read_text()
    expected = describe_scheme(config.data, load_dataset(config), config.seeds[0])
    assert sizes in expected and summary["data"]["scheme"] == expected.rstrip(".")
    assert f"- Split: {expected} Features standardised" in report
    assert "**Verdict**" in report
    if scheme == "folds":
        assert summary["data"]["folds"] == 3 and summary["data"]["n_train"] == [64]
        assert "- Folds: 3 per seed" in report and "Training rows per run: 64." in report
    else:
        assert config.data.val_fraction is None and summary["data"]["folds"] == 0
        train = int(sizes.split()[1].rstrip(","))
        assert f"Training rows per run: {train}." in report
