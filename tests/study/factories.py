"""Model factories for the study tests (``model.factory = "tests.study.factories:NAME"``).

Each is called as ``factory(in_features, n_outputs)`` like a user's factory.
"""

from __future__ import annotations

import torch
from torch import nn

#: (training flag, gradients enabled, batch size) of every forward pass through a
#: :class:`ModeProbe`; tests clear it before use.
FORWARD_LOG: list[tuple[bool, bool, int]] = []


class ModeProbe(nn.Module):
    """Identity that records the mode it is called in (see :data:`FORWARD_LOG`)."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        FORWARD_LOG.append((self.training, torch.is_grad_enabled(), int(x.shape[0])))
        return x


def dropout_batchnorm(in_features: int, n_outputs: int) -> nn.Module:
    """An MLP whose outputs depend on the mode: batch norm and dropout (p = 0.5)."""
    return nn.Sequential(nn.Linear(in_features, 16), nn.BatchNorm1d(16), nn.ReLU(),
                         nn.Dropout(0.5), nn.Linear(16, 16), nn.ReLU(),
                         nn.Linear(16, n_outputs))


def probed_mlp(in_features: int, n_outputs: int) -> nn.Module:
    """A small MLP with a :class:`ModeProbe` before the output layer."""
    return nn.Sequential(nn.Linear(in_features, 8), nn.ReLU(), ModeProbe(),
                         nn.Linear(8, n_outputs))


def dropout_mlp(in_features: int, n_outputs: int) -> nn.Module:
    """An MLP with dropout (p = 0.5) whose training draws masks from the global torch RNG."""
    return nn.Sequential(nn.Linear(in_features, 16), nn.ReLU(), nn.Dropout(0.5),
                         nn.Linear(16, n_outputs))


def too_many_outputs(in_features: int, n_outputs: int) -> nn.Module:
    """Ignores ``n_outputs``: always 10 outputs."""
    return nn.Sequential(nn.Linear(in_features, 8), nn.ReLU(), nn.Linear(8, 10))


class _Image(nn.Module):
    """A CNN that expects images (N, 1, 8, 8): its forward fails on rows of features."""

    def __init__(self, n_outputs: int) -> None:
        super().__init__()
        self.conv = nn.Conv2d(1, 4, 3)
        self.fc = nn.Linear(4 * 6 * 6, n_outputs)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.fc(self.conv(x).flatten(1))


def image_cnn(in_features: int, n_outputs: int) -> nn.Module:
    """A CNN whose forward fails on (n, in_features) inputs (see :class:`_Image`)."""
    return _Image(n_outputs)
