r"""Classification metrics for predictive probabilities (single network or ensemble).

All functions take ``probs`` of shape (examples, classes) -- rows are predictive
distributions, e.g. a softmax output or an ensemble average -- and integer ``labels`` of
shape (examples,). They return Python floats (means over the examples) unless stated.

* accuracy: fraction with :math:`\arg\max_k p_{ik} = y_i` (ties go to the lowest index).
* negative log-likelihood: :math:`-\frac1n\sum_i \log p_{i y_i}` (natural log, nats), with
  probabilities clamped below at ``eps`` so a confident error costs :math:`-\log\epsilon`
  instead of infinity.
* expected calibration error, equal-width bins (Naeini, Cooper & Hauskrecht, AAAI 2015;
  Guo, Pleiss, Sun & Weinberger, ICML 2017):

  .. math:: \mathrm{ECE} = \sum_{b=1}^{B} \frac{|S_b|}{n}\,
            \bigl|\mathrm{acc}(S_b) - \mathrm{conf}(S_b)\bigr|,

  where the confidence of example i is :math:`c_i = \max_k p_{ik}`, bin b (1-based) holds
  the examples with :math:`c_i \in ((b-1)/B,\ b/B]` (a confidence of exactly 0 goes into
  bin 1), acc is the fraction correct and conf the mean confidence in the bin; empty bins
  contribute 0. ECE depends on B (15 by default, the value used by Guo et al.) and is
  biased upward for small test sets; compare ECE values only at equal B and n.
* predictive entropy: :math:`H_i = -\sum_k p_{ik}\log p_{ik}` (nats, with
  :math:`0\log 0 = 0`), averaged over examples by :func:`predictive_entropy`.

What these do not show: low NLL/ECE on one test set is not evidence of calibration under
distribution shift, and an ensemble's entropy mixes data noise with disagreement between
members (it is the total, not the epistemic, uncertainty).
"""

from __future__ import annotations

import torch

__all__ = [
    "accuracy",
    "negative_log_likelihood",
    "expected_calibration_error",
    "calibration_bins",
    "predictive_entropy",
    "classification_metrics",
]


def _check(probs: torch.Tensor, labels: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    probs = torch.as_tensor(probs)
    labels = torch.as_tensor(labels)
    if probs.ndim != 2:
        raise ValueError(f"probs must have shape (examples, classes); got {tuple(probs.shape)}")
    if labels.ndim != 1 or labels.shape[0] != probs.shape[0]:
        raise ValueError(
            f"labels must have shape ({probs.shape[0]},) to match probs; got {tuple(labels.shape)}"
        )
    if probs.shape[0] == 0:
        raise ValueError("probs has no examples; pass at least one row")
    if labels.dtype.is_floating_point or labels.dtype == torch.bool:
        raise ValueError(f"labels must be integer class indices; got dtype {labels.dtype}")
    if labels.min() < 0 or labels.max() >= probs.shape[1]:
        raise ValueError(f"labels must lie in [0, {probs.shape[1] - 1}]; got "
                         f"range [{int(labels.min())}, {int(labels.max())}]")
    return probs.detach().to(torch.float64), labels.detach().long()


def accuracy(probs: torch.Tensor, labels: torch.Tensor) -> float:
    """Fraction of examples whose most probable class is the label."""
    probs, labels = _check(probs, labels)
    return (probs.argmax(dim=1) == labels).double().mean().item()


def negative_log_likelihood(probs: torch.Tensor, labels: torch.Tensor,
                            eps: float = 1e-12) -> float:
    r"""Mean :math:`-\log p_{i y_i}` in nats, probabilities clamped below at ``eps``."""
    if not 0.0 < eps < 1.0:
        raise ValueError(f"eps must lie in (0, 1); got {eps}")
    probs, labels = _check(probs, labels)
    picked = probs.gather(1, labels[:, None]).squeeze(1).clamp_min(eps)
    return (-picked.log()).mean().item()


def calibration_bins(probs: torch.Tensor, labels: torch.Tensor,
                     n_bins: int = 15) -> dict[str, torch.Tensor]:
    """Per-bin counts, accuracies and mean confidences of the equal-width binning above.

    Returns a dict of float64 tensors of length ``n_bins``: ``count``, ``accuracy``,
    ``confidence`` (the last two are 0 for empty bins) and ``upper`` (bin upper edges).
    Useful for reliability diagrams.
    """
    if not (isinstance(n_bins, int) and n_bins >= 1):
        raise ValueError(f"n_bins must be a positive integer; got {n_bins!r}")
    probs, labels = _check(probs, labels)
    conf, pred = probs.max(dim=1)
    correct = (pred == labels).double()
    # bin b (0-based) holds conf in (b/B, (b+1)/B]; conf == 0 goes to bin 0
    index = (torch.ceil(conf * n_bins).long() - 1).clamp(0, n_bins - 1)
    count = torch.zeros(n_bins, dtype=torch.float64).index_add_(0, index, torch.ones_like(conf))
    sum_correct = torch.zeros(n_bins, dtype=torch.float64).index_add_(0, index, correct)
    sum_conf = torch.zeros(n_bins, dtype=torch.float64).index_add_(0, index, conf)
    safe = count.clamp_min(1.0)
    return {
        "count": count,
        "accuracy": sum_correct / safe,
        "confidence": sum_conf / safe,
        "upper": torch.arange(1, n_bins + 1, dtype=torch.float64) / n_bins,
    }


def expected_calibration_error(probs: torch.Tensor, labels: torch.Tensor,
                               n_bins: int = 15) -> float:
    """Expected calibration error with ``n_bins`` equal-width confidence bins (see module)."""
    bins = calibration_bins(probs, labels, n_bins)
    weights = bins["count"] / bins["count"].sum()
    return (weights * (bins["accuracy"] - bins["confidence"]).abs()).sum().item()


def predictive_entropy(probs: torch.Tensor, reduction: str = "mean") -> float | torch.Tensor:
    r"""Entropy :math:`-\sum_k p_k \log p_k` of each row (nats).

    Args:
        probs: (examples, classes).
        reduction: ``"mean"`` (a float) or ``"none"`` (a float64 tensor per example).
    """
    if reduction not in ("mean", "none"):
        raise ValueError(f"reduction must be 'mean' or 'none'; got {reduction!r}")
    probs = torch.as_tensor(probs).detach().to(torch.float64)
    if probs.ndim != 2:
        raise ValueError(f"probs must have shape (examples, classes); got {tuple(probs.shape)}")
    terms = torch.where(probs > 0, probs * probs.clamp_min(1e-300).log(), torch.zeros_like(probs))
    entropy = -terms.sum(dim=1)
    return entropy.mean().item() if reduction == "mean" else entropy


def classification_metrics(probs: torch.Tensor, labels: torch.Tensor,
                           n_bins: int = 15) -> dict[str, float]:
    """All four metrics: ``accuracy``, ``nll``, ``ece``, ``entropy`` (means over examples)."""
    return {
        "accuracy": accuracy(probs, labels),
        "nll": negative_log_likelihood(probs, labels),
        "ece": expected_calibration_error(probs, labels, n_bins),
        "entropy": predictive_entropy(probs),
    }
