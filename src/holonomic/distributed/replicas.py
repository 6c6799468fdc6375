"""Check, once, that the data-parallel replicas of an integrator agree.

Under ``torch.nn.parallel.DistributedDataParallel`` every rank holds a full
copy of the weights, DDP averages the gradients, and every holonomic
integrator draws its noise from its own seeded generator.  If all ranks use
the same seed, they draw the same noise, so the weights stay identical on all
ranks **without any extra communication**.  That only holds if the replicas
start equal; this module checks it on the first step with one small
all-reduce of a fingerprint.

Fingerprint of one replica (a float64 vector of fixed length, so ranks with
different models cannot deadlock the collective)::

    exact part   number of param groups, parameters and elements;
                 a hash of every parameter's dtype and shape;
                 a hash of the group settings (step, temperature, ...);
                 a hash of the seed and of every generator state
                 (hashes are SHA-256 digests cut into 48-bit integers,
                 which float64 holds exactly)
    float part   A = sum_i (i+1) sum(w_i),  B = sum_i (i+1) sum(w_i^2),
                 C = sum_i (i+1) sum|w_i|,
                 R = sum_i (i+1) sum_r (r+1)/rows_i sum(w_i[r])  (rows r of
                 parameter i; catches rows in a different order), all
                 accumulated in float64, and the same four for the momenta

It is a checksum, not a proof: e.g. swapped columns inside one tensor keep
every sum.

One ``all_reduce(MAX)`` of ``[v, -v]`` gives the largest and smallest value of
every entry over the ranks.  Exact parts must agree exactly; ``A`` and ``B``
and ``R`` must agree to ``1e-9`` relative to ``C`` and ``B`` (reduction order may differ
between devices of different kinds, so equal weights need not give equal
sums to the last bit; a real mismatch -- a different initialisation or seed
-- changes them at order one).  Tolerance: common practice, no source.
"""

from __future__ import annotations

import hashlib
import math
import struct
from typing import Any

import torch
from torch import Tensor

__all__ = ["ReplicaMismatchError", "check_replicas", "replica_fingerprint", "skip_replica_check"]

_SKIP_ATTR = "_holonomic_skip_replica_check"
_RELATIVE_TOLERANCE = 1e-9
_HASH_WORDS = 2  # 96 bits of each SHA-256 digest

# Layout of the fingerprint vector (indices).
_FIELDS = (
    "groups", "parameters", "elements",
    *(f"shapes{i}" for i in range(_HASH_WORDS)),
    *(f"settings{i}" for i in range(_HASH_WORDS)),
    *(f"randomness{i}" for i in range(_HASH_WORDS)),
    "seed",
    "w_sum", "w_square", "w_abs", "w_rows",
    "p_count", "p_sum", "p_square", "p_abs", "p_rows",
)
_INDEX = {name: i for i, name in enumerate(_FIELDS)}


class ReplicaMismatchError(RuntimeError):
    """The ranks of a process group hold different optimizer replicas.

    Raised on every rank (all ranks see the same reduced fingerprint), before
    anything is changed.

    Attributes:
        differences: which parts differ, among ``"structure"``,
            ``"settings"``, ``"randomness"``, ``"weights"`` and ``"momenta"``.
    """

    def __init__(self, message: str, *, differences: tuple[str, ...]) -> None:
        super().__init__(message)
        self.differences = differences


def _hash_words(text: bytes) -> list[float]:
    """SHA-256 of ``text`` as ``_HASH_WORDS`` integers below 2**48 (exact in float64)."""
    digest = hashlib.sha256(text).digest()
    return [float(int.from_bytes(digest[6 * i:6 * i + 6], "big")) for i in range(_HASH_WORDS)]


def _setting_bytes(group: dict[str, Any]) -> bytes:
    parts = []
    for key in sorted(group):
        if key in ("params", "param_names"):
            continue
        value = group[key]
        if isinstance(value, float):
            value = struct.pack("<d", value).hex()  # exact, and NaN-safe
        elif isinstance(value, Tensor) and value.numel() == 1:
            value = struct.pack("<d", float(value)).hex()  # e.g. a tensor learning rate
        elif not isinstance(value, (bool, int, str, type(None))):
            value = type(value).__name__  # other objects: repr may hold a memory address
        parts.append(f"{key}={value!r}")
    return ";".join(parts).encode()


def _randomness_bytes(optimizer: torch.optim.Optimizer) -> bytes:
    """Seed and generator states, keyed by device *type*: ``cuda:0`` on rank 0
    and ``cuda:1`` on rank 1 are the same stream when their states agree."""
    parts = [f"seed={getattr(optimizer, 'seed', None)!r}".encode()]
    device_generators = getattr(optimizer, "device_generators", None)  # a holonomic integrator
    generators: dict[str, torch.Generator] = device_generators() if callable(device_generators) else {}
    for key in sorted(generators, key=lambda k: (torch.device(k).type, k)):
        state = generators[key].get_state()
        parts.append(torch.device(key).type.encode() + b":" + state.numpy().tobytes())
    return b"|".join(parts)


def _weighted_sums(tensors: list[tuple[int, Tensor]], device: torch.device) -> Tensor:
    """``[A, B, C, R]`` of the module docstring, in float64."""
    out = torch.zeros(4, dtype=torch.float64, device=device)
    for i, x in tensors:
        x = x.detach().to(torch.float64)
        rows = x.reshape(x.shape[0], -1).sum(1) if x.dim() else x.reshape(1)
        ramp = torch.arange(1, rows.numel() + 1, dtype=torch.float64, device=x.device) / rows.numel()
        sums = torch.stack([x.sum(), (x * x).sum(), x.abs().sum(), (rows * ramp).sum()]) * float(i + 1)
        out += sums.to(device)
    return out


@torch.no_grad()
def replica_fingerprint(optimizer: torch.optim.Optimizer, device: torch.device | str = "cpu") -> Tensor:
    """The float64 fingerprint of this rank's replica (layout in the module docstring).

    Reads weights, momenta (``state[p]["momentum"]``), group settings, the
    seed and the generator states; changes nothing and creates no generator.
    """
    device = torch.device(device)
    params = [p for group in optimizer.param_groups for p in group["params"]]
    shapes = ";".join(f"{p.dtype}{tuple(p.shape)}" for p in params).encode()
    settings = b"|".join(_setting_bytes(group) for group in optimizer.param_groups)
    momenta = [(i, optimizer.state[p]["momentum"]) for i, p in enumerate(params)
               if "momentum" in optimizer.state.get(p, {})]
    seed = getattr(optimizer, "seed", 0)
    exact = [float(len(optimizer.param_groups)), float(len(params)), float(sum(p.numel() for p in params)),
             *_hash_words(shapes), *_hash_words(settings), *_hash_words(_randomness_bytes(optimizer)),
             float(seed) if isinstance(seed, int) else math.nan]
    head = torch.tensor(exact, dtype=torch.float64, device=device)
    weights = _weighted_sums(list(enumerate(params)), device)
    count = torch.tensor([float(len(momenta))], dtype=torch.float64, device=device)
    moments = _weighted_sums(momenta, device)
    vector = torch.cat([head, weights, count, moments])
    # Non-finite values would make MAX/MIN comparisons meaningless; map them to
    # sentinels (equal non-finite weights on all ranks still compare equal; the
    # step itself then reports the non-finite values).
    return torch.nan_to_num(vector, nan=1e300, posinf=1e305, neginf=-1e305)


def _collective_device(group: Any) -> torch.device:
    import torch.distributed as dist

    backend = str(dist.get_backend(group)).lower()
    if "nccl" in backend and "cpu" not in backend and torch.cuda.is_available():
        return torch.device("cuda", torch.cuda.current_device())
    return torch.device("cpu")


def _differences(high: Tensor, low: Tensor) -> tuple[str, ...]:
    hi, lo = high.tolist(), low.tolist()

    def exact(*names: str) -> bool:
        return all(hi[_INDEX[n]] == lo[_INDEX[n]] for n in names)

    def close(value: str, scale: str) -> bool:
        gap = abs(hi[_INDEX[value]] - lo[_INDEX[value]])
        return gap <= _RELATIVE_TOLERANCE * abs(hi[_INDEX[scale]])

    out = []
    if not exact("groups", "parameters", "elements", *(f"shapes{i}" for i in range(_HASH_WORDS))):
        out.append("structure")
        return tuple(out)  # sums over different parameter lists say nothing more
    if not exact(*(f"settings{i}" for i in range(_HASH_WORDS))):
        out.append("settings")
    if not exact("seed", *(f"randomness{i}" for i in range(_HASH_WORDS))):
        out.append("randomness")
    if not (close("w_sum", "w_abs") and close("w_square", "w_square") and close("w_abs", "w_abs")
            and close("w_rows", "w_abs")):
        out.append("weights")
    if not (exact("p_count") and close("p_sum", "p_abs") and close("p_square", "p_square")
            and close("p_abs", "p_abs") and close("p_rows", "p_abs")):
        out.append("momenta")
    return tuple(out)


_ADVICE = {
    "structure": "the ranks optimise different parameter lists (number, shapes or dtypes "
                 "differ): build the same model and param groups on every rank",
    "settings": "the param-group settings (step, temperature, friction, dataset_size, ...) "
                "differ: pass the same values on every rank",
    "randomness": "the integrator's seed or generator state differs (seeds from {seed_lo:g} to "
                  "{seed_hi:g}): construct the optimizer with the same seed= on every rank (not "
                  "seed + rank), and load the same checkpoint on every rank when resuming",
    "weights": "the weights differ: wrap the model in DistributedDataParallel (it broadcasts "
               "rank 0's weights at construction) or initialise it from the same seed on every rank",
    "momenta": "the momenta differ: load the same optimizer checkpoint on every rank",
}


@torch.no_grad()
def check_replicas(optimizer: torch.optim.Optimizer, group: Any = None) -> None:
    """Raise :class:`ReplicaMismatchError` unless every rank of ``group``
    holds the same replica of ``optimizer`` (collective: call it on all ranks).

    Compares structure, group settings, seed and generator states exactly and
    weights and momenta to 1e-9 relative, using one all-reduce of a small
    float64 vector (see the module docstring).  Changes nothing.  Does
    nothing if ``torch.distributed`` is not initialised or the group has a
    single rank.

    Args:
        optimizer: a holonomic integrator (any ``torch.optim.Optimizer``
            works; ``seed`` and generators are read where present).
        group: the process group (default: the world group).
    """
    import torch.distributed as dist

    if not (dist.is_available() and dist.is_initialized()) or dist.get_world_size(group) < 2:
        return
    device = _collective_device(group)
    mine = replica_fingerprint(optimizer, device)
    both = torch.cat([mine, -mine])
    dist.all_reduce(both, op=dist.ReduceOp.MAX, group=group)
    n = mine.numel()
    high, low = both[:n].cpu(), -both[n:].cpu()
    differences = _differences(high, low)
    if not differences:
        return
    seed_at = _INDEX["seed"]
    advice = "; ".join(_ADVICE[d].format(seed_lo=float(low[seed_at]), seed_hi=float(high[seed_at]))
                       for d in differences)
    raise ReplicaMismatchError(
        f"the {dist.get_world_size(group)} ranks hold different replicas of "
        f"{type(optimizer).__name__} before its first step ({', '.join(differences)} differ); "
        f"nothing was changed. Under data parallelism every rank must draw the same noise "
        f"from the same state so the weights stay identical. To fix: {advice}. If the ranks "
        f"are meant to run independent chains (not data parallel), call "
        f"holonomic.distributed.skip_replica_check(optimizer) on every rank.",
        differences=differences,
    )


def skip_replica_check(optimizer: torch.optim.Optimizer) -> torch.optim.Optimizer:
    """Opt ``optimizer`` out of the first-step replica check and return it.

    For ranks that deliberately run *independent* chains (different seeds,
    different data, no DistributedDataParallel) inside one process group.
    The check for sharded parameters (:func:`refuse_sharded_parameters`)
    still runs.
    """
    setattr(optimizer, _SKIP_ATTR, True)
    return optimizer


def replica_check_skipped(optimizer: torch.optim.Optimizer) -> bool:
    """Whether :func:`skip_replica_check` was called on ``optimizer``."""
    return bool(getattr(optimizer, _SKIP_ATTR, False))
