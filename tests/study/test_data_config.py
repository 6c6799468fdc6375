"""``[data]`` keys: combinations refused at parse time, naming the keys."""

from __future__ import annotations

import numpy as np
import pytest

from holonomic.study import StudyConfigError
from tests.study.data_helpers import classes_csv, config, write


def _error(tmp_path, **data) -> str:
    with pytest.raises(StudyConfigError) as info:
        config(tmp_path, **data)
    return str(info.value)


@pytest.fixture
def files(tmp_path):
    write(tmp_path, "d.csv", classes_csv(extra={"part": ["train"] * 40, "who": ["g"] * 40}))
    write(tmp_path, "t.csv", classes_csv(extra={"part": ["test"] * 40, "who": ["h"] * 40}))
    np.savez(tmp_path / "d.npz", x=np.zeros((4, 2)), y=np.arange(4) % 2)
    return tmp_path


COMBINATIONS = [
    (dict(split_column="part", test_fraction=0.2),
     ["'data.split_column' and 'data.test_fraction'", "the same split for every seed"]),
    (dict(split_column="part", train_size=10), ["'data.split_column' and 'data.train_size'"]),
    (dict(split_column="part", folds=3), ["'data.split_column' and 'data.folds'"]),
    (dict(split_column="part", group_column="who"), ["'data.group_column'"]),
    (dict(folds=3, test_fraction=0.2), ["'data.folds' and 'data.test_fraction'"]),
    (dict(test_source="t.csv", test_fraction=0.2),
     ["'data.test_source' and 'data.test_fraction'"]),
    (dict(test_source="t.csv", val_source="t.csv", val_fraction=0.2),
     ["'data.val_source' and 'data.val_fraction'"]),
    (dict(val_source="t.csv"), ["'data.val_source' needs 'data.test_source'"]),
    (dict(test_source="t.csv", val_source="t.csv"), ["'data.test_source' = 't.csv' is a file "
                                                      "already used for another part"]),
    (dict(test_source="./d.csv"), ["'data.test_source' = './d.csv' is a file already used"]),
    (dict(test_source="t.csv", val_source="t.csv", train_size=10), ["'data.train_size'"]),
    (dict(test_source="d.npz"), ["'data.test_source' must be a .csv file"]),
    (dict(features=["a"], drop_columns=["b"]), ["'data.features'", "'data.drop_columns'"]),
    (dict(features=["a", "label"]), ["'data.features' lists 'label'", "'data.target'"]),
    (dict(drop_columns=["part"], split_column="part"), ["'data.drop_columns' lists 'part'"]),
    (dict(group_column="label"), ["'data.group_column' = 'label' is also 'data.target'"]),
    (dict(split_column="nope"), ["'data.split_column' names column 'nope'", "columns: a, b"]),
    (dict(folds=1), ["'data.folds' must be >= 2"]),
    (dict(folds=21), ["'data.folds' must be between 2 and 20"]),
    (dict(missing="zero"), ["'data.missing' must be one of refuse, drop, mean"]),
    (dict(task="ranking"), ["'data.task' must be one of classification, regression"]),
    (dict(features=[]), ["'data.features' is empty"]),
    (dict(drop_columns="a"), ["'data.drop_columns' must be a list of column names"]),
]


@pytest.mark.parametrize("keys, fragments", COMBINATIONS)
def test_combinations_are_refused(files, keys, fragments):
    message = _error(files, source="d.csv", target="label", **keys)
    for fragment in fragments:
        assert fragment in message, (fragment, message)


def test_csv_keys_need_a_csv_file(files):
    message = _error(files, source="digits", split_column="part")
    assert "'data.split_column' applies to .csv files" in message
    message = _error(files, source="d.npz", group_column="who")
    assert "'data.group_column' names CSV columns" in message and ".npz" in message


def test_keys_that_do_not_apply_are_none(files):
    data = config(files, source="d.csv", target="label", split_column="part").data
    assert data.val_fraction is None and data.test_fraction is None
    assert data.scheme == "split_column"
    data = config(files, source="d.csv", target="label", folds=5).data
    assert data.val_fraction == 0.2 and data.test_fraction is None and data.scheme == "folds"
    data = config(files, source="d.csv", target="label", test_source="t.csv").data
    assert data.val_fraction == 0.2 and data.test_fraction is None and data.scheme == "files"
    data = config(files, source="d.csv", target="label").data
    assert (data.val_fraction, data.test_fraction, data.train_size) == (0.2, 0.3, None)
    assert data.missing == "refuse" and data.task is None and data.scheme == "holdout"
