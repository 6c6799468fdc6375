"""Data-parallel use of the holonomic integrators with ``torch.distributed``.

The integrators work unchanged on models wrapped in
``torch.nn.parallel.DistributedDataParallel`` (DDP):

- DDP averages the gradients over the ranks, so ``.grad`` is the gradient of
  the mean loss over the *global* batch (``world_size`` local batches of
  equal size), exactly what one process seeing the whole batch computes;
- every rank constructs the integrator with the **same seed**, so every rank
  draws the same noise, and the weights stay identical on all ranks with no
  communication beyond DDP's gradient all-reduce.

Units: with a mean loss, ``dataset_size`` is the size ``N`` of the whole
training set (not the per-rank shard ``N / world_size``): ``U = N * mean``.
Passing the shard size samples at ``world_size`` times the temperature.

On its first step (under an initialised process group) every integrator
calls :func:`on_first_step`, which

1. refuses FSDP-sharded parameters and DTensors with a ``ValueError``
   (:func:`refuse_sharded_parameters`);
2. checks with one small all-reduce that all ranks hold the same weights,
   momenta, settings, seed and generator state, and raises
   :class:`ReplicaMismatchError` otherwise (:func:`check_replicas`).

Nothing is changed when either raises.  Ranks that deliberately run
independent chains opt out with :func:`skip_replica_check`.
"""

from __future__ import annotations

import torch

from holonomic.distributed.replicas import (
    ReplicaMismatchError,
    check_replicas,
    replica_check_skipped,
    replica_fingerprint,
    skip_replica_check,
)
from holonomic.distributed.sharding import refuse_sharded_parameters, sharding_of

__all__ = [
    "ReplicaMismatchError",
    "check_replicas",
    "on_first_step",
    "refuse_sharded_parameters",
    "replica_fingerprint",
    "sharding_of",
    "skip_replica_check",
]


def on_first_step(optimizer: torch.optim.Optimizer) -> None:
    """Checks a holonomic integrator runs on its first ``step()``.

    Does nothing unless ``torch.distributed`` is available and initialised.
    Then: :func:`refuse_sharded_parameters`, and unless
    :func:`skip_replica_check` was called, :func:`check_replicas` on the
    world group (collective: every rank's first step takes part).
    """
    import torch.distributed as dist

    if not (dist.is_available() and dist.is_initialized()):
        return
    refuse_sharded_parameters(optimizer)
    if not replica_check_skipped(optimizer):
        check_replicas(optimizer)
