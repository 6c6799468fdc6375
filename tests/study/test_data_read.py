"""Reading data: fingerprints, bad input, missing values, index columns, task, built-ins.

Every file here is invented test data written into the test's tmp_path.
"""

from __future__ import annotations

import hashlib
import shutil
from dataclasses import replace

import numpy as np
import pytest

from holonomic.study import StudyConfigError
from holonomic.study.data import load_dataset, make_split, make_splits
from tests.study.data_helpers import (classes_csv, config, load, load_error, regression_csv,
                                      write)

# --------------------------------------------------------------------------- fingerprint


def test_fingerprint_is_the_content_not_the_path(tmp_path):
    text = classes_csv()
    write(tmp_path, "d.csv", text)
    _, first = load(tmp_path, source="d.csv", target="label")
    # a single file's fingerprint is the SHA-256 of its bytes, as sha256sum prints it
    assert first.fingerprint == hashlib.sha256(text.encode()).hexdigest()
    write(tmp_path, "elsewhere/copy.csv", text)
    _, moved = load(tmp_path, source="elsewhere/copy.csv", target="label")
    assert moved.fingerprint == first.fingerprint
    lines = text.splitlines()
    lines[5] = lines[5].replace(",x", ",y") if ",x" in lines[5] else lines[5].replace(",y", ",x")
    write(tmp_path, "d.csv", "\n".join(lines) + "\n")
    _, changed = load(tmp_path, source="d.csv", target="label")
    assert changed.fingerprint != first.fingerprint


def test_a_replaced_file_is_read_again_in_the_same_process(tmp_path):
    text = classes_csv()
    write(tmp_path, "d.csv", text)
    _, before = load(tmp_path, source="d.csv", target="label")
    # same size, other labels: the cache must not hand back the old data
    write(tmp_path, "d.csv", text.replace(",x\n", ",z\n").replace(",y\n", ",x\n")
          .replace(",z\n", ",y\n"))
    _, after = load(tmp_path, source="d.csv", target="label")
    np.testing.assert_array_equal(after.y, 1 - before.y)


def test_fingerprint_covers_separate_files(tmp_path):
    write(tmp_path, "train.csv", classes_csv(seed=1))
    write(tmp_path, "test.csv", classes_csv(seed=2))
    _, first = load(tmp_path, source="train.csv", test_source="test.csv", target="label")
    write(tmp_path, "test.csv", classes_csv(seed=3))
    _, second = load(tmp_path, source="train.csv", test_source="test.csv", target="label")
    assert first.fingerprint != second.fingerprint
    assert len(first.fingerprint) == 64


def test_builtin_fingerprint_is_of_the_arrays(tmp_path):
    _, digits = load(tmp_path, source="digits")
    _, wine = load(tmp_path, source="wine")
    digest = hashlib.sha256()
    for array in (digits.x, digits.y):
        digest.update(f"{array.dtype.str}{array.shape};".encode())
        digest.update(np.ascontiguousarray(array).tobytes())
    assert digits.fingerprint == digest.hexdigest()
    assert wine.fingerprint != digits.fingerprint


# --------------------------------------------------------------------------- bad CSV input

BAD_CSV = [
    # (file text, fragments the message must hold)
    ("a,b,label\n1,2,x\n3,,y\n5,6,x\n", ["column 'b'", "line 3", "empty", "data.missing"]),
    ("a,b,label\n1,2,x\n3,nan,y\n5,6,x\n", ["column 'b'", "line 3", "not finite ('nan')"]),
    ("a,b,label\n1,2,x\n3,4,y\n-inf,6,x\n", ["column 'a'", "line 4", "not finite ('-inf')"]),
    ("a,b,label\n1,2,x\n3,4,\n5,6,x\n", ["target column 'label'", "line 3", "empty"]),
    ("a,b,label\n1,2,x\n3,4,NaN\n5,6,x\n", ["target column 'label'", "line 3", "'NaN'"]),
    ("a,b,label\n1,2,x\n1e300,4,y\n5,6,x\n",
     ["column 'a'", "line 3", "'1e300'", "beyond the float32 range"]),
    ("a,b,label\n1,2,x\n1e400,4,y\n5,6,x\n", ["column 'a'", "line 3", "float32 range"]),
    ("a,b,label\n", ["has a header but no data rows"]),
    ("a,b,label\n1,2,x\n3,abc,y\n", ["column 'b'", "line 3", "not a number ('abc')"]),
    ("a,b,label\n1,2,x\n3,4\n", ["line 3 has 2 fields, the header has 3"]),
    ("a,b,label\n\n1,2,x\n\n3,,y\n", ["column 'b'", "line 5"]),  # blank lines still counted
]


@pytest.mark.parametrize("text, fragments", BAD_CSV)
def test_bad_csv_is_refused_naming_file_column_and_line(tmp_path, text, fragments):
    write(tmp_path, "d.csv", text)
    message = load_error(tmp_path, source="d.csv", target="label")
    assert "d.csv" in message
    for fragment in fragments:
        assert fragment in message, (fragment, message)


def test_non_utf8_csv_names_the_byte_and_line(tmp_path):
    body = "a,b,label\n1,2,x\n3,4,caf".encode() + b"\xe9\n"  # latin-1 e-acute
    write(tmp_path, "d.csv", body)
    message = load_error(tmp_path, source="d.csv", target="label")
    offset = body.index(b"\xe9")
    assert "not UTF-8" in message and f"byte {offset}" in message and "line 3" in message
    assert "d.csv" in message
    write(tmp_path, "h.csv", "a,b,cl".encode() + b"\xe9" + b"\n1,2,x\n")
    message = load_error(tmp_path, source="h.csv", target="label")  # at config time
    assert "h.csv" in message and "not UTF-8" in message


def test_a_utf8_byte_order_mark_is_accepted(tmp_path):
    write(tmp_path, "d.csv", b"\xef\xbb\xbf" + classes_csv().encode())
    _, dataset = load(tmp_path, source="d.csv", target="label")
    assert dataset.feature_names == ("a", "b")


# --------------------------------------------------------------------------- bad .npz input


def _npz_error(tmp_path, write_file, **data) -> str:
    path = tmp_path / "d.npz"
    write_file(path)
    message = load_error(tmp_path, source="d.npz", **data)
    assert "d.npz" in message
    assert "allow_pickle" not in message and "pickle=True" not in message
    return message


def test_npz_that_is_not_an_archive(tmp_path):
    message = _npz_error(tmp_path, lambda p: p.write_bytes(b"x,y\n1,2\n"))
    assert "is not a .npz archive" in message and "numpy.savez" in message

    def npy(path):
        with path.open("wb") as handle:
            np.save(handle, np.zeros((3, 2)))

    assert "single .npy array" in _npz_error(tmp_path, npy)
    message = _npz_error(tmp_path, lambda p: p.write_bytes(b"PK\x03\x04broken"))
    assert "not a readable .npz archive" in message


def test_npz_object_and_complex_arrays(tmp_path):
    x = np.zeros((6, 2))
    y = np.array(["a", "b"] * 3, dtype=object)
    message = _npz_error(tmp_path, lambda p: np.savez(p, x=x, y=y))
    assert "array 'y'" in message and "object array" in message
    message = _npz_error(tmp_path, lambda p: np.savez(p, x=x.astype(object), y=np.arange(6) % 2))
    assert "array 'x'" in message and "object array" in message
    message = _npz_error(tmp_path, lambda p: np.savez(p, x=x + 1j, y=np.arange(6) % 2))
    assert "array 'x'" in message and "complex" in message
    message = _npz_error(tmp_path, lambda p: np.savez(p, x=x, y=np.arange(6) % 2 + 0j))
    assert "array 'y'" in message and "complex" in message
    message = _npz_error(tmp_path, lambda p: np.savez(p, x=x.astype(str), y=np.arange(6) % 2))
    assert "array 'x'" in message and "strings" in message


def test_npz_non_finite_and_overflow_name_array_and_index(tmp_path):
    x = np.arange(12.0).reshape(6, 2)
    y = np.arange(6) % 2
    bad = x.copy()
    bad[3, 1] = np.nan
    message = _npz_error(tmp_path, lambda p: np.savez(p, x=bad, y=y))
    assert "array 'x'" in message and "index [3, 1]" in message and "nan" in message
    bad = x.copy()
    bad[4, 0] = 1e300
    message = _npz_error(tmp_path, lambda p: np.savez(p, x=bad, y=y))
    assert "index [4, 0]" in message and "float32 range" in message
    bad = x.copy()
    bad[2, 0] = -np.inf
    message = _npz_error(tmp_path, lambda p: np.savez(p, x=bad, y=y))
    assert "index [2, 0]" in message and "not finite (-inf)" in message
    target = np.linspace(0.0, 1.0, 6)
    target[5] = np.inf
    message = _npz_error(tmp_path, lambda p: np.savez(p, x=x, y=target), task="regression")
    assert "array 'y'" in message and "index [5]" in message


def test_npz_missing_array_is_named(tmp_path):
    message = _npz_error(tmp_path, lambda p: np.savez(p, features=np.zeros((3, 2))))
    assert "no array 'x'" in message and "features" in message


# --------------------------------------------------------------------------- missing policy


def _with_gaps() -> str:
    # invented: 12 rows; row 3 lacks b, row 6 has b = nan, row 9 lacks its label
    rows = ["a,b,label"]
    for i in range(12):
        b = "" if i == 3 else "nan" if i == 6 else f"{i}.5"
        label = "" if i == 9 else "xy"[i % 2]
        rows.append(f"{i},{b},{label}")
    return "\n".join(rows) + "\n"


def test_missing_drop_drops_rows_and_says_how_many(tmp_path):
    write(tmp_path, "d.csv", _with_gaps())
    _, dataset = load(tmp_path, source="d.csv", target="label", missing="drop")
    assert len(dataset.y) == 9 and dataset.n_dropped == 3
    assert "dropped 3 row(s)" in dataset.description
    assert np.isfinite(dataset.x).all()
    np.testing.assert_array_equal(dataset.x[:, 0], [0, 1, 2, 4, 5, 7, 8, 10, 11])


def test_missing_mean_uses_the_training_part_only(tmp_path):
    # split column fixes the parts; features a (complete) and b (gaps); invented numbers
    text = ("a,b,label,part\n"
            "0,1,x,train\n1,2,y,train\n2,6,x,train\n3,,y,train\n"
            "4,100,x,val\n5,,y,val\n6,,x,test\n7,-50,y,test\n8,9,,train\n")
    write(tmp_path, "d.csv", text)
    cfg, dataset = load(tmp_path, source="d.csv", target="label", missing="mean",
                        split_column="part", standardize=False)
    assert dataset.n_dropped == 1 and dataset.n_missing == 3  # the row without a label
    assert "dropped 1 row(s) with a missing or non-finite target" in dataset.description
    split = make_split(dataset, cfg.data, seed=0)
    # mean of b over the training rows with a value: (1 + 2 + 6) / 3 = 3 (by hand);
    # the validation (100) and test (-50) values must not enter it
    assert split.imputation_mean[1] == pytest.approx(3.0)
    np.testing.assert_allclose(split.x_train[:, 1], [1, 2, 6, 3])
    np.testing.assert_allclose(split.x_val[:, 1], [100, 3])
    np.testing.assert_allclose(split.x_test[:, 1], [3, -50])
    standardised = make_split(dataset, replace(cfg.data, standardize=True), seed=0)
    np.testing.assert_allclose(standardised.x_train.mean(axis=0), 0.0, atol=1e-12)


def test_missing_mean_is_fitted_per_fold(tmp_path):
    rows = ["a,b,label"] + [f"{i},{'' if i % 5 == 0 else i * 1.5},{'xy'[i % 2]}"
                            for i in range(30)]
    write(tmp_path, "d.csv", "\n".join(rows) + "\n")
    cfg, dataset = load(tmp_path, source="d.csv", target="label", missing="mean", folds=3)
    for split in make_splits(dataset, cfg.data, seed=4):
        expected = np.nanmean(dataset.x[split.train_index], axis=0)
        np.testing.assert_allclose(split.imputation_mean, expected)


def test_missing_refuse_is_the_default(tmp_path):
    write(tmp_path, "d.csv", _with_gaps())
    message = load_error(tmp_path, source="d.csv", target="label")
    assert "column 'b'" in message and "line 5" in message and "3 missing" in message


# --------------------------------------------------------------------------- index column


def test_pandas_index_column_is_dropped_with_a_warning(tmp_path):
    lines = classes_csv(n=30).splitlines()
    text = "\n".join([f",{lines[0]}"] + [f"{i},{line}" for i, line in enumerate(lines[1:])])
    write(tmp_path, "d.csv", text + "\n")
    with pytest.warns(UserWarning, match="row index"):
        _, dataset = load(tmp_path, source="d.csv", target="label")
    assert dataset.feature_names == ("a", "b") and dataset.x.shape == (30, 2)
    assert "dropped the unnamed first column" in dataset.description
    text = "\n".join([f"Unnamed: 0,{lines[0]}"]
                     + [f"{i + 1},{line}" for i, line in enumerate(lines[1:])])
    write(tmp_path, "e.csv", text + "\n")
    with pytest.warns(UserWarning, match="row index"):
        _, dataset = load(tmp_path, source="e.csv", target="label")
    assert dataset.feature_names == ("a", "b")


def test_unnamed_first_column_that_is_not_an_index_is_refused(tmp_path):
    lines = classes_csv(n=30).splitlines()
    text = "\n".join([f",{lines[0]}"] + [f"{3 * i},{line}" for i, line in enumerate(lines[1:])])
    write(tmp_path, "d.csv", text + "\n")
    message = load_error(tmp_path, source="d.csv", target="label")
    assert "first column" in message and "no name" in message and "drop_columns" in message
    _, dataset = load(tmp_path, source="d.csv", target="label", drop_columns=[""])
    assert dataset.feature_names == ("a", "b")


def test_drop_columns_and_features(tmp_path):
    write(tmp_path, "d.csv", classes_csv(extra={"id": [str(i) for i in range(40)],
                                                "c": ["1.5"] * 40}))
    _, dataset = load(tmp_path, source="d.csv", target="label", drop_columns=["id"])
    assert dataset.feature_names == ("a", "b", "c")
    _, dataset = load(tmp_path, source="d.csv", target="label", features=["c", "a"])
    assert dataset.feature_names == ("c", "a")
    np.testing.assert_allclose(dataset.x[:, 0], 1.5)
    message = load_error(tmp_path, source="d.csv", target="label", drop_columns=["ID"])
    assert "'data.drop_columns'" in message and "'ID'" in message
    assert "a, b, label, id, c" in message


# --------------------------------------------------------------------------- task


def test_float_target_without_task_is_refused(tmp_path):
    write(tmp_path, "r.csv", regression_csv())
    message = load_error(tmp_path, source="r.csv", target="t")
    assert 'data.task = "regression"' in message and "60 distinct" in message


def test_regression_csv_keeps_original_units(tmp_path):
    write(tmp_path, "r.csv", regression_csv())
    cfg, dataset = load(tmp_path, source="r.csv", target="t", task="regression")
    assert dataset.task == "regression" and dataset.classes == () and dataset.n_classes == 0
    assert dataset.y.dtype == np.float64
    split = make_split(dataset, cfg.data, seed=0)
    assert split.task.name == "regression" and split.n_classes == 0
    assert split.task.target_mean == pytest.approx(split.y_train.mean())
    assert split.task.target_std == pytest.approx(split.y_train.std())
    np.testing.assert_array_equal(split.y_test, dataset.y[split.test_index])


def test_integer_target_with_few_values_is_classification(tmp_path):
    write(tmp_path, "d.csv", classes_csv(labels=("3", "10", "7")))
    _, dataset = load(tmp_path, source="d.csv", target="label")
    assert dataset.task == "classification" and dataset.classes == ("3", "7", "10")
    assert "task inferred: classification" in dataset.description
    _, numbers = load(tmp_path, source="d.csv", target="label", task="regression")
    assert numbers.task == "regression" and set(numbers.y) == {3.0, 7.0, 10.0}


def test_string_target_for_regression_is_refused(tmp_path):
    write(tmp_path, "d.csv", classes_csv())
    message = load_error(tmp_path, source="d.csv", target="label", task="regression")
    assert "not a number at line 2" in message and "'x'" in message


def test_constant_regression_target_on_the_training_part(tmp_path):
    rows = ["a,t,part"] + [f"{i},5,train" for i in range(6)] + ["6,1,val", "7,2,test"]
    write(tmp_path, "d.csv", "\n".join(rows) + "\n")
    cfg, dataset = load(tmp_path, source="d.csv", target="t", task="regression",
                        split_column="part")
    with pytest.raises(StudyConfigError, match="constant .* on the training part of seed 0"):
        make_split(dataset, cfg.data, seed=0)


def test_builtin_sets(tmp_path):
    # sizes as documented by scikit-learn's dataset loaders (open data bundled with it)
    _, cancer = load(tmp_path, source="breast_cancer")
    assert cancer.x.shape == (569, 30) and cancer.classes == ("malignant", "benign")
    _, wine = load(tmp_path, source="wine")
    assert wine.x.shape == (178, 13) and wine.n_classes == 3
    _, diabetes = load(tmp_path, source="diabetes")
    assert diabetes.x.shape == (442, 10) and diabetes.task == "regression"
    assert diabetes.feature_names[:3] == ("age", "sex", "bmi")
    _, explicit = load(tmp_path, source="diabetes", task="regression")
    assert explicit is diabetes  # cached per process
    message = load_error(tmp_path, source="diabetes", task="classification")
    assert "'data.task'" in message and "regression set" in message


def test_load_dataset_is_cached_per_process(tmp_path):
    write(tmp_path, "d.csv", classes_csv())
    cfg = config(tmp_path, source="d.csv", target="label")
    assert load_dataset(cfg) is load_dataset(cfg)
    shutil.copy(tmp_path / "d.csv", tmp_path / "e.csv")
    other = load_dataset(config(tmp_path, source="e.csv", target="label"))
    assert other is not load_dataset(cfg) and other.fingerprint == load_dataset(cfg).fingerprint


def test_npz_missing_drop(tmp_path):
    x = np.arange(20.0).reshape(10, 2)
    x[2, 1] = np.nan
    x[7, 0] = -np.inf
    np.savez(tmp_path / "d.npz", x=x, y=np.arange(10) % 2)
    _, dataset = load(tmp_path, source="d.npz", missing="drop")
    assert dataset.n_dropped == 2 and len(dataset.y) == 8 and np.isfinite(dataset.x).all()
    assert dataset.feature_names == ("x0", "x1")
