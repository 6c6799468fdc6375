"""Sanity band on real data: the unregularised arm against scikit-learn's MLPClassifier."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from holonomic.study import parse_config
from holonomic.study.data import load_dataset, make_split
from holonomic.study.runner import RunSpec, train_run

SEEDS = (0, 1, 2)


@pytest.mark.slow
def test_unregularised_arm_near_sklearn_mlp_on_digits(tiny_doc):
    # Reference library: sklearn.neural_network.MLPClassifier with the same split, widths,
    # minibatch size, epochs and heavy-ball SGD settings (no L2: alpha=0). Initialisation
    # and minibatch order differ, so this is a sanity band, not an exact match; the width
    # of the band (4 points of mean test accuracy over 3 seeds) is common practice, no
    # source.
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.neural_network import MLPClassifier

    tiny_doc["data"].update(source="digits", train_size=300, val_fraction=0.2,
                            test_fraction=0.3)
    tiny_doc["model"]["widths"] = [64]
    tiny_doc["budget"].update(epochs=20, batch_size=32, lr=0.05, momentum=0.9)
    config = parse_config(tiny_doc)
    ours, theirs = [], []
    for seed in SEEDS:
        record = train_run(config, RunSpec("none", 0, 0.0, seed))
        ours.append(record["metrics"]["test_accuracy"])
        split = make_split(load_dataset(config), config.data, seed)
        reference = MLPClassifier(hidden_layer_sizes=(64,), activation="relu", solver="sgd",
                                  alpha=0.0, batch_size=32, learning_rate_init=0.05,
                                  momentum=0.9, nesterovs_momentum=False, max_iter=20,
                                  n_iter_no_change=1000, random_state=seed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            reference.fit(split.x_train, split.y_train)
        theirs.append(reference.score(split.x_test, split.y_test))
    assert min(theirs) > 0.85  # the reference itself learned the task
    assert abs(np.mean(ours) - np.mean(theirs)) < 0.04, (ours, theirs)
