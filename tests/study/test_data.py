"""Splits (stratified, fixed by seed), built-in and user data."""

from __future__ import annotations

import numpy as np
import pytest

from holonomic.study import parse_config
from holonomic.study.data import load_dataset, make_demo_data, make_split


def test_split_is_stratified_disjoint_and_seeded(tiny_doc):
    tiny_doc["data"].update(source="digits", train_size=300)
    config = parse_config(tiny_doc)
    dataset = load_dataset(config)
    assert dataset.x.shape == (1797, 64)  # sklearn documents 1797 8x8 images, 10 classes
    split = make_split(dataset, config.data, seed=0)
    assert len(split.y_train) == 300
    assert len(split.y_test) == round(0.35 * 1797) or abs(len(split.y_test) - 0.35 * 1797) < 1
    overall = np.bincount(dataset.y) / len(dataset.y)
    for y in (split.y_train, split.y_val, split.y_test):
        counts = np.bincount(y, minlength=10)
        # stratified: each class count within 1 of its expected share
        assert np.all(np.abs(counts - overall * len(y)) <= 1.0 + 1e-9)
    rows = [tuple(r) for r in np.vstack([split.x_train, split.x_val, split.x_test])]
    assert len(set(rows)) >= len(rows) - 50  # digits has a few duplicate images
    np.testing.assert_allclose(split.x_train.mean(axis=0), 0.0, atol=1e-10)
    again = make_split(dataset, config.data, seed=0)
    np.testing.assert_array_equal(split.x_train, again.x_train)
    other = make_split(dataset, config.data, seed=1)
    assert not np.array_equal(split.y_test, other.y_test) or not np.array_equal(
        split.x_test, other.x_test)


def test_demo_data_is_seeded_and_marked_invented():
    a, b = make_demo_data(), make_demo_data()
    np.testing.assert_array_equal(a.x, b.x)
    assert "INVENTED" in a.description and "not real data" in a.description
    assert set(np.unique(a.y)) == {0, 1, 2, 3}


def test_csv_and_npz_sources(tmp_path, tiny_doc):
    rng = np.random.default_rng(0)
    x = rng.normal(size=(200, 3))
    y = np.where(x[:, 0] > 0, "up", "down")
    lines = ["f1,f2,label,f3"] + [f"{a},{b},{c},{d}" for (a, b, d), c in zip(x, y)]
    (tmp_path / "d.csv").write_text("\n".join(lines) + "\n")
    np.savez(tmp_path / "d.npz", x=x, y=(x[:, 0] > 0).astype(int))
    tiny_doc["data"].update(train_size=50, target="label", source="d.csv")
    csv_set = load_dataset(parse_config(tiny_doc, base_dir=tmp_path))
    np.testing.assert_allclose(csv_set.x, x[:, [0, 1, 2]])
    assert csv_set.classes == ("down", "up")
    tiny_doc["data"]["source"] = "d.npz"
    npz_set = load_dataset(parse_config(tiny_doc, base_dir=tmp_path))
    np.testing.assert_array_equal(npz_set.y, csv_set.y)


def test_train_size_too_large(tiny_doc):
    from holonomic.study import StudyConfigError

    tiny_doc["data"]["train_size"] = 5000
    config = parse_config(tiny_doc)
    with pytest.raises(StudyConfigError, match="'data.train_size' = 5000 exceeds"):
        make_split(load_dataset(config), config.data, seed=0)
