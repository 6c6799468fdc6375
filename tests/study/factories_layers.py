"""Model factories for the layer-selection tests, ``factory(in_features, n_outputs)``.

Named in study configs as ``"tests.study.factories_layers:NAME"``. The CNNs read the 64
features of scikit-learn's bundled digits data (8x8 images) as a ``(1, 8, 8)`` image.
"""

from __future__ import annotations

import math

import torch
from torch import nn


class _Image(nn.Module):
    """Reshape ``(n, side * side)`` features to ``(n, 1, side, side)`` images."""

    def __init__(self, in_features: int) -> None:
        super().__init__()
        self.side = math.isqrt(in_features)
        if self.side * self.side != in_features:
            raise ValueError(f"{in_features} features are not a square image")

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x.reshape(-1, 1, self.side, self.side)


class DigitsCNN(nn.Module):
    """``Conv2d(1, 8, 3) -> ReLU -> Conv2d(8, 8, 3) -> ReLU -> flatten -> Linear(., 16) ->
    ReLU -> Linear(16, n_outputs)``; optionally a ``BatchNorm2d`` after the first conv."""

    def __init__(self, in_features: int, n_outputs: int, batch_norm: bool = False) -> None:
        super().__init__()
        self.image = _Image(in_features)
        side = self.image.side - 4
        layers: list[nn.Module] = [nn.Conv2d(1, 8, 3)]
        if batch_norm:
            layers.append(nn.BatchNorm2d(8))
        layers += [nn.ReLU(), nn.Conv2d(8, 8, 3), nn.ReLU()]
        self.features = nn.Sequential(*layers)
        self.fc1 = nn.Linear(8 * side * side, 16)
        self.out = nn.Linear(16, n_outputs)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.features(self.image(x)).flatten(1)
        return self.out(torch.relu(self.fc1(h)))


def digits_cnn(in_features: int, n_outputs: int) -> nn.Module:
    """:class:`DigitsCNN` without batch norm: weights ``features.0.weight`` (8, 1, 3, 3),
    ``features.2.weight`` (8, 8, 3, 3), ``fc1.weight``, ``out.weight``."""
    return DigitsCNN(in_features, n_outputs)


def digits_cnn_bn(in_features: int, n_outputs: int) -> nn.Module:
    """:class:`DigitsCNN` with ``features.1`` a ``BatchNorm2d(8)``."""
    return DigitsCNN(in_features, n_outputs, batch_norm=True)


def conv_only(in_features: int, n_outputs: int) -> nn.Module:
    """A model with convolutions only: the last one (``2``, a 1x1 conv to ``n_outputs``
    channels, then a global mean) is the output layer."""
    return nn.Sequential(_Image(in_features), nn.Conv2d(1, 4, 3), nn.ReLU(),
                         nn.Conv2d(4, n_outputs, 1), nn.Flatten(2), _Mean())


class _Mean(nn.Module):
    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x.mean(dim=-1)


def needs_values(in_features: int, n_outputs: int) -> nn.Module:
    """A factory that reads a tensor value while building (cannot build on ``meta``)."""
    width = int(torch.tensor(8).item())
    return nn.Sequential(nn.Linear(in_features, width), nn.ReLU(),
                         nn.Linear(width, n_outputs))
