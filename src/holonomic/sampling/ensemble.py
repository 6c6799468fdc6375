r"""Ensembles from a sampling run without keeping every weight in memory.

:class:`PredictiveEnsemble` keeps a running posterior-predictive average on fixed inputs:

.. code-block:: text

    input: model, inputs x, burn-in b, every k, snapshot_every s (optional)
    after optimizer step t (call observe()):
        if t > b and (t - b) mod k == 0:            # sample j = 1, 2, ...
            S <- S + softmax(model(x))              # float64 running sum
            if snapshots and j mod s == 0: save model.state_dict() to sample_<j>.pt
    mean predictive: p(y | x) ~= S / J             # J samples collected

Only S (examples x classes) is held; no weights are kept. The snapshot files are plain
``state_dict`` dicts of CPU tensors and load with ``torch.load(path, weights_only=True)``.

What it does and does not give: with a sampler at temperature :math:`\tau` the average
approximates the predictive distribution of the tempered posterior
:math:`\propto \exp(-U/\tau)` *only if the chain has mixed* over the relevant modes; check
with :mod:`holonomic.sampling.diagnostics` over several seeds. Samples k steps apart are
correlated, so J overstates the number of independent members.
"""

from __future__ import annotations

import copy
import os
from pathlib import Path
from typing import Any, Callable, Iterable

import torch
from torch import nn

__all__ = [
    "PredictiveEnsemble",
    "load_snapshot",
    "predict_probabilities",
    "predict_from_snapshots",
]


def _softmax(outputs: torch.Tensor) -> torch.Tensor:
    return torch.softmax(outputs, dim=-1)


def predict_probabilities(
    model: nn.Module,
    inputs: torch.Tensor,
    *,
    batch_size: int | None = None,
    to_probs: Callable[[torch.Tensor], torch.Tensor] | None = None,
) -> torch.Tensor:
    """Predictive probabilities of one network, float64, shape (examples, classes).

    The model runs in eval mode under ``torch.no_grad()``; its previous training mode is
    restored afterwards. ``to_probs`` maps the model's output to probabilities (default:
    softmax over the last dimension, i.e. the model returns logits).
    """
    to_probs = to_probs or _softmax
    was_training = model.training
    model.eval()
    try:
        with torch.no_grad():
            n = inputs.shape[0]
            size = n if batch_size is None else batch_size
            parts = [to_probs(model(inputs[i:i + size])).to(torch.float64)
                     for i in range(0, n, size)]
    finally:
        model.train(was_training)
    return torch.cat(parts, dim=0)


def load_snapshot(path: str | os.PathLike) -> dict[str, torch.Tensor]:
    """Load a snapshot written by :class:`PredictiveEnsemble` (``weights_only=True``)."""
    return torch.load(path, map_location="cpu", weights_only=True)


def predict_from_snapshots(
    model: nn.Module,
    paths: Iterable[str | os.PathLike],
    inputs: torch.Tensor,
    *,
    batch_size: int | None = None,
    to_probs: Callable[[torch.Tensor], torch.Tensor] | None = None,
) -> torch.Tensor:
    """Average predictive probabilities over stored snapshots (float64).

    ``model`` supplies the architecture; it is copied, so its own weights are untouched.
    """
    work = copy.deepcopy(model)
    total: torch.Tensor | None = None
    count = 0
    for path in paths:
        work.load_state_dict(load_snapshot(path))
        probs = predict_probabilities(work, inputs, batch_size=batch_size, to_probs=to_probs)
        total = probs if total is None else total + probs
        count += 1
    if total is None:
        raise ValueError("paths is empty; pass at least one snapshot file")
    return total / count


class PredictiveEnsemble:
    r"""Streaming posterior-predictive average on fixed inputs, plus optional snapshots.

    Call :meth:`observe` once after every optimizer step; it collects a sample after the
    burn-in and then every ``every`` steps (see the module docstring for the algorithm).

    Args:
        model: the network being sampled (its current weights are read at each sample).
        inputs: tensor of inputs to predict on, shape (examples, ...).
        burn_in: steps to skip before the first sample (>= 0).
        every: thinning: steps between samples (>= 1).
        snapshot_dir: if given, also write every ``snapshot_every``-th sample's
            ``state_dict`` to ``snapshot_dir/sample_<j>.pt`` (directory created if needed).
        snapshot_every: samples between snapshot files (>= 1).
        batch_size: evaluate the inputs in chunks of this size (default: all at once).
        to_probs: maps model outputs to probabilities (default softmax of logits).

    Example::

        ens = PredictiveEnsemble(model, x_test, burn_in=500, every=10)
        for t in range(steps):
            opt.zero_grad(); loss_fn(model(x), y).backward(); opt.step()
            ens.observe()
        probs = ens.mean_probs()
    """

    def __init__(
        self,
        model: nn.Module,
        inputs: torch.Tensor,
        *,
        burn_in: int = 0,
        every: int = 1,
        snapshot_dir: str | os.PathLike | None = None,
        snapshot_every: int = 1,
        batch_size: int | None = None,
        to_probs: Callable[[torch.Tensor], torch.Tensor] | None = None,
    ) -> None:
        if not isinstance(model, nn.Module):
            raise ValueError(f"model must be a torch.nn.Module; got {type(model).__name__}")
        if not isinstance(inputs, torch.Tensor) or inputs.ndim < 1 or inputs.shape[0] == 0:
            raise ValueError("inputs must be a non-empty tensor of shape (examples, ...); "
                             f"got {getattr(inputs, 'shape', type(inputs).__name__)}")
        if not (isinstance(burn_in, int) and burn_in >= 0):
            raise ValueError(f"burn_in must be an integer >= 0; got {burn_in!r}")
        if not (isinstance(every, int) and every >= 1):
            raise ValueError(f"every must be an integer >= 1 (steps between samples); got {every!r}")
        if not (isinstance(snapshot_every, int) and snapshot_every >= 1):
            raise ValueError(f"snapshot_every must be an integer >= 1; got {snapshot_every!r}")
        if batch_size is not None and not (isinstance(batch_size, int) and batch_size >= 1):
            raise ValueError(f"batch_size must be None or an integer >= 1; got {batch_size!r}")
        self.model = model
        self.inputs = inputs
        self.burn_in = burn_in
        self.every = every
        self.snapshot_dir = None if snapshot_dir is None else Path(snapshot_dir)
        self.snapshot_every = snapshot_every
        self.batch_size = batch_size
        self.to_probs = to_probs
        self.steps_seen = 0
        self.num_samples = 0
        self.snapshot_paths: list[Path] = []
        self._sum: torch.Tensor | None = None

    def observe(self) -> bool:
        """Count one optimizer step; collect a sample if the schedule says so.

        Returns:
            True if a sample was collected at this step.
        """
        self.steps_seen += 1
        after = self.steps_seen - self.burn_in
        if after <= 0 or after % self.every != 0:
            return False
        self.collect()
        return True

    def collect(self) -> None:
        """Add the model's current predictive probabilities (and maybe a snapshot) now."""
        probs = predict_probabilities(self.model, self.inputs, batch_size=self.batch_size,
                                      to_probs=self.to_probs)
        self._sum = probs if self._sum is None else self._sum + probs
        self.num_samples += 1
        if self.snapshot_dir is not None and self.num_samples % self.snapshot_every == 0:
            self.snapshot_dir.mkdir(parents=True, exist_ok=True)
            path = self.snapshot_dir / f"sample_{self.num_samples:06d}.pt"
            state = {k: v.detach().cpu().clone() for k, v in self.model.state_dict().items()}
            torch.save(state, path)
            self.snapshot_paths.append(path)

    def mean_probs(self) -> torch.Tensor:
        """Ensemble predictive probabilities, float64 (examples, classes)."""
        if self._sum is None:
            raise RuntimeError(
                f"no samples collected yet (steps seen {self.steps_seen}, burn_in "
                f"{self.burn_in}, every {self.every}); call observe() after each step"
            )
        return self._sum / self.num_samples

    def state_dict(self) -> dict[str, Any]:
        """Counters, running sum and snapshot paths, for resuming a run."""
        return {
            "steps_seen": self.steps_seen,
            "num_samples": self.num_samples,
            "sum": None if self._sum is None else self._sum.clone(),
            "snapshot_paths": [str(p) for p in self.snapshot_paths],
        }

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Restore what :meth:`state_dict` returned."""
        self.steps_seen = int(state["steps_seen"])
        self.num_samples = int(state["num_samples"])
        self._sum = None if state["sum"] is None else state["sum"].clone().to(torch.float64)
        self.snapshot_paths = [Path(p) for p in state["snapshot_paths"]]
