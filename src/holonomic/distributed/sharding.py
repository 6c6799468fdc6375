"""Refuse parameters sharded by fully sharded data parallelism (FSDP).

The holonomic integrators need, for every constrained parameter, whole rows
(``FixedNorm(over="rows")``), whole columns or the whole matrix
(``Orthonormal``, ``FixedNorm(over="all")``) on one device: the tangent
projection and the SHAKE multiplier are computed from norms and Gram matrices
of those vectors.  FSDP splits parameters across ranks:

- FSDP1 (``FullyShardedDataParallel``) flattens the parameters of a unit into
  one ``FlatParameter`` and shards it; the rows of a weight land on different
  ranks and the constraint recorded by :func:`holonomic.constrain` is not
  visible on the flat parameter at all (the step would silently ignore it);
- FSDP2 (``fully_shard``) turns each parameter into a ``DTensor`` sharded
  along dimension 0; it is a new ``nn.Parameter``, again without the record.

Also, every rank draws the same noise from the same seed; on replicated
weights that is what keeps the replicas equal, but on shards it would give
every shard the same noise (perfectly correlated), which is wrong at any
temperature above zero.  So this release refuses sharded parameters outright
(constrained or not) and says what to do; only replicated data parallelism
(DDP) is supported.  See docs/distributed.md.
"""

from __future__ import annotations

import torch
from torch import Tensor

from holonomic.geometry import constraint_of

__all__ = ["refuse_sharded_parameters", "sharding_of"]


def sharding_of(p: Tensor) -> str | None:
    """``"FSDP flat parameter"``, ``"DTensor sharded as (...)"`` or ``None``
    when ``p`` is an ordinary (replicated or local) tensor."""
    if getattr(p, "_is_flat_param", False) or any(c.__name__ == "FlatParameter" for c in type(p).__mro__):
        return "FSDP flat parameter"
    try:
        from torch.distributed.tensor import DTensor
    except ImportError:  # pragma: no cover - torch built without distributed
        return None
    if isinstance(p, DTensor):
        placements = tuple(p.placements)
        if not all(pl.is_replicate() for pl in placements):
            return f"DTensor with placements {placements}"
        return "DTensor replicated over a device mesh"
    return None


def refuse_sharded_parameters(optimizer: torch.optim.Optimizer) -> None:
    """Raise ``ValueError`` if ``optimizer`` holds FSDP-sharded parameters or DTensors.

    The message names the first offending parameter, says why, and what to do
    instead (DistributedDataParallel).  Collective-free: each rank decides
    alone (FSDP shards every rank alike, so all ranks raise together).
    """
    for g_index, group in enumerate(optimizer.param_groups):
        names = group.get("param_names")
        for index, p in enumerate(group["params"]):
            kind = sharding_of(p)
            if kind is None:
                continue
            name = names[index] if names else f"param group {g_index} parameter {index} {tuple(p.shape)}"
            constraint = constraint_of(p)
            if constraint is not None:
                why = (f"it carries the constraint {constraint!r}, whose rows/columns would be split "
                       "across shards, but the projections need each constrained vector whole on "
                       "one rank")
            else:
                why = ("the constraints declared with holonomic.constrain() are not visible on "
                       "the sharded copies FSDP makes, and every rank would draw the same noise "
                       "for its own shard (perfectly correlated noise across shards)")
            raise ValueError(
                f"{type(optimizer).__name__}: {name} is a {kind}; holonomic integrators do not "
                f"support fully sharded data parallelism (FSDP/DTensor): {why}. Nothing was "
                "changed. Wrap the model in torch.nn.parallel.DistributedDataParallel instead "
                "(replicated weights, same seed on every rank), or give only unsharded "
                "parameters to this optimizer (see docs/distributed.md)."
            )
