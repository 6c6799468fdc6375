"""Metrics equal hand computations on a small worked example."""

import math

import pytest
import torch
from scipy import stats

from holonomic.sampling import (
    accuracy,
    calibration_bins,
    classification_metrics,
    expected_calibration_error,
    negative_log_likelihood,
    predictive_entropy,
)

# Worked example: 4 examples, 3 classes.
PROBS = torch.tensor([
    [0.70, 0.20, 0.10],   # label 0: correct, confidence 0.70
    [0.40, 0.35, 0.25],   # label 1: wrong (predicts 0), confidence 0.40
    [0.10, 0.85, 0.05],   # label 1: correct, confidence 0.85
    [0.30, 0.30, 0.40],   # label 0: wrong (predicts 2), confidence 0.40
], dtype=torch.float64)
LABELS = torch.tensor([0, 1, 1, 0])


def test_accuracy_by_hand():
    assert accuracy(PROBS, LABELS) == 0.5  # 2 of 4 correct


def test_nll_by_hand():
    hand = -(math.log(0.70) + math.log(0.35) + math.log(0.85) + math.log(0.30)) / 4
    assert negative_log_likelihood(PROBS, LABELS) == pytest.approx(hand, rel=1e-14)
    # and against torch's own NLL loss on log-probabilities
    torch_nll = torch.nn.functional.nll_loss(PROBS.log(), LABELS).item()
    assert negative_log_likelihood(PROBS, LABELS) == pytest.approx(torch_nll, rel=1e-14)


def test_ece_by_hand_with_five_bins():
    # Bins (0,.2] (.2,.4] (.4,.6] (.6,.8] (.8,1]; a confidence on an edge goes to the lower bin.
    # (.2,.4]: confidences .40, .40, accuracy 0  -> 2/4 * |0 - .40| = 0.2
    # (.6,.8]: confidence .70, accuracy 1        -> 1/4 * |1 - .70| = 0.075
    # (.8,1]:  confidence .85, accuracy 1        -> 1/4 * |1 - .85| = 0.0375
    hand = 0.2 + 0.075 + 0.0375
    assert expected_calibration_error(PROBS, LABELS, n_bins=5) == pytest.approx(hand, rel=1e-12)
    bins = calibration_bins(PROBS, LABELS, n_bins=5)
    assert bins["count"].tolist() == [0.0, 2.0, 0.0, 1.0, 1.0]


def test_ece_with_one_bin_is_gap_between_mean_confidence_and_accuracy():
    # One bin: ECE = |accuracy - mean confidence| = |0.5 - (0.7 + 0.4 + 0.85 + 0.4)/4|
    hand = abs(0.5 - (0.70 + 0.40 + 0.85 + 0.40) / 4)
    assert expected_calibration_error(PROBS, LABELS, n_bins=1) == pytest.approx(hand, rel=1e-12)


def test_entropy_matches_scipy():
    # scipy.stats.entropy (natural log) per row
    per_row = predictive_entropy(PROBS, reduction="none")
    for i in range(4):
        assert per_row[i].item() == pytest.approx(stats.entropy(PROBS[i].numpy()), rel=1e-13)
    assert predictive_entropy(torch.tensor([[1.0, 0.0]])) == 0.0  # 0 log 0 = 0


def test_classification_metrics_bundle():
    out = classification_metrics(PROBS, LABELS, n_bins=5)
    assert set(out) == {"accuracy", "nll", "ece", "entropy"}
    assert out["ece"] == pytest.approx(0.3125, rel=1e-12)


def test_bad_inputs_raise():
    with pytest.raises(ValueError, match="labels"):
        accuracy(PROBS, torch.tensor([0, 1, 3, 0]))
    with pytest.raises(ValueError, match="n_bins"):
        expected_calibration_error(PROBS, LABELS, n_bins=0)
    with pytest.raises(ValueError, match="probs"):
        negative_log_likelihood(PROBS[0], LABELS)
