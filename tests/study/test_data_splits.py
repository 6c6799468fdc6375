"""Split schemes: hold-out, split column, separate files, repeated k-fold, groups.

Every file here is invented test data written into the test's tmp_path.
"""

from __future__ import annotations

import numpy as np
import pytest

from holonomic.study import StudyConfigError
from holonomic.study.data import describe_scheme, load_dataset, make_split, make_splits
from tests.study.data_helpers import classes_csv, config, load, load_error, regression_csv, write


def _assert_disjoint_cover(split, n: int | None = None) -> None:
    parts = [split.train_index, split.val_index, split.test_index]
    joined = np.concatenate(parts)
    assert len(np.unique(joined)) == len(joined)  # disjoint
    if n is not None:
        assert len(joined) == n


def _same(a, b) -> bool:
    return all(np.array_equal(getattr(a, k), getattr(b, k))
               for k in ("train_index", "val_index", "test_index"))


def test_holdout_parts_are_disjoint_and_sized(tmp_path):
    cfg = config(tmp_path, source="wine", val_fraction=0.2, test_fraction=0.3)
    dataset = load_dataset(cfg)
    split = make_split(dataset, cfg.data, seed=3)
    _assert_disjoint_cover(split, 178)
    assert len(split.test_index) == 54 and len(split.val_index) == 36  # ceil(0.3 * 178) ...
    np.testing.assert_array_equal(split.y_test, dataset.y[split.test_index])
    assert split.task.name == "classification" and split.task.n_classes == 3
    np.testing.assert_allclose(split.feature_mean, dataset.x[split.train_index].mean(axis=0))


def test_regression_holdout_is_random_and_subsamples(tmp_path):
    cfg = config(tmp_path, source="diabetes", train_size=100)
    dataset = load_dataset(cfg)
    split = make_split(dataset, cfg.data, seed=0)
    assert len(split.y_train) == 100 and split.y_train.dtype == np.float64
    assert split.task.target_mean == pytest.approx(split.y_train.mean())
    assert "random (regression: not stratified)" in describe_scheme(cfg.data, dataset)


def test_split_column(tmp_path):
    n = 40
    part = ["TRAIN" if i % 4 < 2 else "Val" if i % 4 == 2 else "test" for i in range(n)]
    part[1] = "validation"
    write(tmp_path, "d.csv", classes_csv(n=n, extra={"part": part}))
    cfg, dataset = load(tmp_path, source="d.csv", target="label", split_column="part")
    assert dataset.feature_names == ("a", "b")  # the split column is not a feature
    first, second = make_split(dataset, cfg.data, 0), make_split(dataset, cfg.data, 7)
    assert _same(first, second)  # the same for every seed
    np.testing.assert_array_equal(first.val_index, [1] + list(range(2, n, 4)))
    np.testing.assert_array_equal(first.test_index, list(range(3, n, 4)))
    _assert_disjoint_cover(first, n)
    sentence = describe_scheme(cfg.data, dataset)
    assert "the same for every seed" in sentence and "initialisation" in sentence
    part[5] = "holdout"
    write(tmp_path, "e.csv", classes_csv(n=n, extra={"part": part}))
    message = load_error(tmp_path, source="e.csv", target="label", split_column="part")
    assert "'holdout'" in message and "line 7" in message and "train, val" in message


def test_split_column_needs_every_part(tmp_path):
    write(tmp_path, "d.csv", classes_csv(n=8, extra={"part": ["train"] * 6 + ["test"] * 2}))
    message = load_error(tmp_path, source="d.csv", target="label", split_column="part")
    assert "no 'val' row" in message


def test_separate_test_file_with_validation_carved(tmp_path):
    write(tmp_path, "train.csv", classes_csv(n=40, seed=1))
    write(tmp_path, "test.csv", classes_csv(n=20, seed=2))
    cfg, dataset = load(tmp_path, source="train.csv", test_source="test.csv", target="label",
                        val_fraction=0.25)
    assert len(dataset.y) == 60
    split = make_split(dataset, cfg.data, seed=0)
    np.testing.assert_array_equal(split.test_index, np.arange(40, 60))
    assert len(split.val_index) == 10 and split.val_index.max() < 40
    assert np.bincount(split.y_val).tolist() == [5, 5]  # stratified
    assert not _same(split, make_split(dataset, cfg.data, seed=1))
    assert "separate file 'test.csv'" in describe_scheme(cfg.data, dataset)


def test_separate_validation_and_test_files(tmp_path):
    write(tmp_path, "train.csv", classes_csv(n=30, seed=1))
    write(tmp_path, "val.csv", classes_csv(n=10, seed=2))
    write(tmp_path, "test.csv", classes_csv(n=12, seed=3))
    cfg, dataset = load(tmp_path, source="train.csv", val_source="val.csv",
                        test_source="test.csv", target="label")
    split = make_split(dataset, cfg.data, seed=5)
    assert (len(split.y_train), len(split.y_val), len(split.y_test)) == (30, 10, 12)
    assert _same(split, make_split(dataset, cfg.data, seed=6))


def test_separate_files_need_the_same_columns(tmp_path):
    write(tmp_path, "train.csv", classes_csv(n=30, extra={"c": ["1"] * 30}))
    write(tmp_path, "test.csv", classes_csv(n=10))
    message = load_error(tmp_path, source="train.csv", test_source="test.csv",
                         target="label", features=["a", "b", "c"])
    assert "'data.features'" in message and "'c'" in message and "test.csv" in message
    message = load_error(tmp_path, source="train.csv", test_source="test.csv", target="label")
    assert "other feature columns" in message and "missing: ['c']" in message


@pytest.mark.parametrize("source, k", [("wine", 4), ("diabetes", 3)])
def test_folds_cover_every_row_once_per_seed(tmp_path, source, k):
    cfg = config(tmp_path, source=source, folds=k, val_fraction=0.25)
    dataset = load_dataset(cfg)
    n = len(dataset.y)
    splits = make_splits(dataset, cfg.data, seed=2)
    assert [s.fold for s in splits] == list(range(k))
    tests = np.concatenate([s.test_index for s in splits])
    np.testing.assert_array_equal(np.sort(tests), np.arange(n))  # each row test exactly once
    for split in splits:
        _assert_disjoint_cover(split, n)
        rest = len(split.train_index) + len(split.val_index)
        assert abs(len(split.val_index) - 0.25 * rest) <= 1
    again = make_splits(dataset, cfg.data, seed=2)
    assert all(_same(a, b) for a, b in zip(splits, again))  # same folds for every arm
    other = make_splits(dataset, cfg.data, seed=3)
    assert not all(_same(a, b) for a, b in zip(splits, other))  # a seed is one repetition
    if source == "wine":  # stratified: each fold's class counts within 1 of the share
        share = np.bincount(dataset.y) / n
        for split in splits:
            counts = np.bincount(split.y_test, minlength=3)
            assert np.all(np.abs(counts - share * len(split.y_test)) <= 1.0 + 1e-9)
    with pytest.raises(StudyConfigError, match="make_splits"):
        make_split(dataset, cfg.data, seed=2)
    assert _same(make_split(dataset, cfg.data, seed=2, fold=1), splits[1])


def test_folds_with_train_size(tmp_path):
    cfg = config(tmp_path, source="wine", folds=3, train_size=50)
    splits = make_splits(load_dataset(cfg), cfg.data, seed=0)
    assert all(len(s.y_train) == 50 for s in splits)


def _grouped_csv(n_groups: int, per_group: int, regression: bool = False) -> str:
    groups = [f"g{i // per_group}" for i in range(n_groups * per_group)]
    make = regression_csv if regression else classes_csv
    return make(n=n_groups * per_group, extra={"who": groups})


def _assert_groups_stay_together(dataset, split) -> None:
    seen = [set(dataset.groups[idx]) for idx in (split.train_index, split.val_index,
                                                 split.test_index)]
    assert not (seen[0] & seen[1]) and not (seen[0] & seen[2]) and not (seen[1] & seen[2])


def test_group_holdout_never_straddles(tmp_path):
    write(tmp_path, "d.csv", _grouped_csv(20, 3))
    cfg, dataset = load(tmp_path, source="d.csv", target="label", group_column="who",
                        test_fraction=0.3, val_fraction=0.2)
    assert dataset.feature_names == ("a", "b") and dataset.n_groups == 20
    for seed in range(3):
        split = make_split(dataset, cfg.data, seed)
        _assert_groups_stay_together(dataset, split)
        _assert_disjoint_cover(split, 60)
        assert len(set(dataset.groups[split.test_index])) == 6  # 0.3 of 20 groups
    assert "whole groups of column 'who'" in describe_scheme(cfg.data, dataset)


@pytest.mark.parametrize("regression", [False, True])
def test_group_folds_never_straddle(tmp_path, regression):
    write(tmp_path, "d.csv", _grouped_csv(15, 4, regression))
    target = "t" if regression else "label"
    task = {"task": "regression"} if regression else {}
    cfg, dataset = load(tmp_path, source="d.csv", target=target, group_column="who",
                        folds=5, **task)
    splits = make_splits(dataset, cfg.data, seed=1)
    tests = np.sort(np.concatenate([s.test_index for s in splits]))
    np.testing.assert_array_equal(tests, np.arange(60))
    for split in splits:
        _assert_groups_stay_together(dataset, split)


def test_too_few_groups_are_refused(tmp_path):
    write(tmp_path, "d.csv", _grouped_csv(2, 10))
    message = load_error(tmp_path, source="d.csv", target="label", group_column="who")
    assert "2 group(s)" in message and "'who'" in message
    write(tmp_path, "e.csv", _grouped_csv(5, 4))
    message = load_error(tmp_path, source="e.csv", target="label", group_column="who", folds=5)
    assert "5 group(s)" in message and "fewer folds" in message


def test_describe_scheme_without_data(tmp_path):
    cfg = config(tmp_path, source="digits", train_size=160)
    sentence = describe_scheme(cfg.data)
    assert sentence.startswith("hold-out per seed, stratified by class: test 0.3 and "
                               "validation 0.2 of all rows; training: 160 rows subsampled")
    assert "all the rows left after the validation and test parts" in describe_scheme(
        config(tmp_path, source="digits").data)
    folds = describe_scheme(config(tmp_path, source="digits", folds=5).data)
    assert "repeated stratified 5-fold" in folds and "each seed one repetition" in folds


def test_a_group_in_two_files_is_refused(tmp_path):
    write(tmp_path, "train.csv", _grouped_csv(6, 4))
    write(tmp_path, "test.csv", _grouped_csv(2, 4))  # groups g0, g1 again
    message = load_error(tmp_path, source="train.csv", test_source="test.csv",
                         target="label", group_column="who")
    assert "group 'g0'" in message and "'data.source' and 'data.test_source'" in message
