"""Data-parallel holonomic integrators on two gloo processes of this machine.

One spawn of two ranks (127.0.0.1, a free port) runs every scenario in turn
and saves what each rank saw; the tests below read those records.  Data are
invented: a regression target generated from a seed.

External reference: the single-process run on the full batch (torch autograd
on the mean loss), which DistributedDataParallel must reproduce because it
averages the per-rank gradients of equal-size local batches (torch
DistributedDataParallel documentation: gradients are averaged over ranks).
"""

from __future__ import annotations

import datetime
import math
import os
import socket
import warnings
from pathlib import Path

import pytest
import torch
import torch.distributed as dist
import torch.multiprocessing as mp
from torch import nn

import holonomic
from holonomic.distributed import ReplicaMismatchError, skip_replica_check

pytestmark = pytest.mark.slow

WORLD = 2
STEPS = 25
LOCAL_BATCH = 8
DATASET_SIZE = 64
SEED = 7
INTEGRATORS = {
    "langevin": lambda params, seed: holonomic.Langevin(
        params, step=0.05, friction=2.0, temperature=0.3, seed=seed, dataset_size=DATASET_SIZE),
    "geodesic": lambda params, seed: holonomic.Langevin(
        params, step=0.05, friction=2.0, temperature=0.3, seed=seed, dataset_size=DATASET_SIZE,
        projection="geodesic"),
    "overdamped": lambda params, seed: holonomic.OverdampedLangevin(
        params, step=1e-3, temperature=0.3, seed=seed, dataset_size=DATASET_SIZE),
}


def make_model(init_seed: int) -> nn.Module:
    """float64 MLP: fixed-norm rows, then orthonormal rows, then a free head."""
    torch.manual_seed(init_seed)
    model = nn.Sequential(nn.Linear(5, 8), nn.Tanh(), nn.Linear(8, 6), nn.Tanh(), nn.Linear(6, 1)).double()
    holonomic.constrain(model, **{"0.weight": holonomic.FixedNorm(2.0), "2.weight": holonomic.Orthonormal()})
    return model


def global_batch(step: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Invented data: x ~ N(0, I), y = sin(x . a) + noise, drawn from a seed."""
    gen = torch.Generator().manual_seed(1000 + step)
    x = torch.randn(WORLD * LOCAL_BATCH, 5, generator=gen, dtype=torch.float64)
    a = torch.linspace(-1.0, 1.0, 5, dtype=torch.float64)
    y = torch.sin(x @ a)[:, None] + 0.1 * torch.randn(WORLD * LOCAL_BATCH, 1, generator=gen, dtype=torch.float64)
    return x, y


def train(model: nn.Module, opt: torch.optim.Optimizer, rank: int | None) -> None:
    """STEPS steps on the mean squared error; ``rank=None``: the whole batch."""
    for step in range(STEPS):
        x, y = global_batch(step)
        if rank is not None:
            x, y = x[rank * LOCAL_BATCH:(rank + 1) * LOCAL_BATCH], y[rank * LOCAL_BATCH:(rank + 1) * LOCAL_BATCH]
        opt.zero_grad()
        ((model(x) - y) ** 2).mean().backward()
        opt.step()


def snapshot(model: nn.Module, opt: torch.optim.Optimizer) -> dict:
    return {"weights": {k: v.clone() for k, v in model.state_dict().items()},
            "optimizer_state": len(opt.state), "generators": sorted(opt._generators)}


def expect_mismatch(model: nn.Module, opt: torch.optim.Optimizer, rank: int) -> dict:
    x, y = global_batch(0)
    ((model(x[rank::WORLD]) - y[rank::WORLD]) ** 2).mean().backward()
    before = snapshot(model, opt)
    try:
        opt.step()
    except ReplicaMismatchError as exc:
        return {"message": str(exc), "differences": exc.differences, "before": before,
                "after": snapshot(model, opt)}
    return {"message": None}


def expect_refusal(opt: torch.optim.Optimizer) -> str | None:
    try:
        opt.step()
    except ValueError as exc:
        return str(exc)
    return None


def worker(rank: int, port: int, out: str) -> None:
    os.environ["MASTER_ADDR"] = "127.0.0.1"
    os.environ["MASTER_PORT"] = str(port)
    torch.set_num_threads(1)
    dist.init_process_group("gloo", rank=rank, world_size=WORLD, timeout=datetime.timedelta(seconds=60))
    record: dict = {}
    try:
        # 1. DDP: different initialisations per rank (DDP broadcasts rank 0's), same seed.
        for name, build in INTEGRATORS.items():
            ddp = nn.parallel.DistributedDataParallel(make_model(init_seed=rank))
            opt = build(ddp.parameters(), SEED)
            train(ddp, opt, rank)
            record[name] = {k: v.clone() for k, v in ddp.module.state_dict().items()}
            record[name + "/residuals"] = holonomic.residuals(ddp.module)

        # 2. Different seeds per rank: error on the first step, nothing changed.
        ddp = nn.parallel.DistributedDataParallel(make_model(init_seed=0))
        record["seed"] = expect_mismatch(ddp, INTEGRATORS["langevin"](ddp.parameters(), SEED + rank), rank)

        # 3. No DDP and different initialisations: the weights differ.
        model = make_model(init_seed=rank)
        record["init"] = expect_mismatch(model, INTEGRATORS["langevin"](model.parameters(), SEED), rank)

        # 4. Independent chains, opted out: steps run with different seeds.
        model = make_model(init_seed=rank)
        opt = skip_replica_check(INTEGRATORS["langevin"](model.parameters(), SEED + rank))
        train(model, opt, rank)
        record["independent"] = {k: v.clone() for k, v in model.state_dict().items()}

        # 5. Fully sharded data parallel (FSDP2 DTensor shards, FSDP1 flat parameters): refused.
        from torch.distributed.device_mesh import init_device_mesh
        from torch.distributed.fsdp import FullyShardedDataParallel, fully_shard

        sharded = make_model(init_seed=0).float()
        fully_shard(sharded, mesh=init_device_mesh("cpu", (WORLD,)))
        record["fsdp2"] = expect_refusal(INTEGRATORS["langevin"](sharded.parameters(), SEED))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # FSDP1 deprecation notice
            flat = FullyShardedDataParallel(make_model(init_seed=0), device_id=torch.device("cpu"))
        record["fsdp1"] = expect_refusal(INTEGRATORS["langevin"](flat.parameters(), SEED))
    finally:
        torch.save(record, Path(out) / f"rank{rank}.pt")
        dist.destroy_process_group()


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def ranks(tmp_path_factory: pytest.TempPathFactory) -> list[dict]:
    out = tmp_path_factory.mktemp("ddp")
    mp.spawn(worker, args=(free_port(), str(out)), nprocs=WORLD, join=True)
    return [torch.load(out / f"rank{r}.pt", weights_only=False) for r in range(WORLD)]


@pytest.mark.parametrize("name", list(INTEGRATORS))
def test_ranks_bit_identical_and_equal_to_full_batch(ranks: list[dict], name: str) -> None:
    for key, value in ranks[0][name].items():
        assert torch.equal(value, ranks[1][name][key]), key  # bit-identical across ranks
    # The reference: one process, the whole batch, rank 0's initialisation.
    model = make_model(init_seed=0)
    train(model, INTEGRATORS[name](model.parameters(), SEED), rank=None)
    moved = False
    for key, value in model.state_dict().items():
        assert torch.allclose(ranks[0][name][key], value, rtol=0, atol=1e-9), key
        moved |= not torch.allclose(value, make_model(init_seed=0).state_dict()[key], atol=1e-3)
    assert moved  # the weights did move (so the comparison is not vacuous)
    # Constraints at roundoff (float64).
    assert set(ranks[0][name + "/residuals"]) == {"0.weight", "2.weight"}
    assert max(ranks[0][name + "/residuals"].values()) < 1e-12


def test_noise_is_used(ranks: list[dict]) -> None:
    """The same run at temperature 0 ends elsewhere: the equality above
    includes the noise, which the ranks drew identically without communicating."""
    model = make_model(init_seed=0)
    opt = holonomic.Langevin(model.parameters(), step=0.05, friction=2.0, temperature=0.0, seed=SEED,
                             dataset_size=DATASET_SIZE)
    train(model, opt, rank=None)
    gap = max((ranks[0]["langevin"][k] - v).abs().max().item() for k, v in model.state_dict().items())
    assert gap > 1e-3


@pytest.mark.parametrize("case, difference", [("seed", "randomness"), ("init", "weights")])
def test_mismatch_raises_on_first_step_and_changes_nothing(ranks: list[dict], case: str,
                                                           difference: str) -> None:
    for rank in ranks:
        record = rank[case]
        assert record["message"] is not None, "no error was raised"
        assert record["differences"] == (difference,)
        before, after = record["before"], record["after"]
        assert after["optimizer_state"] == before["optimizer_state"] == 0
        assert after["generators"] == before["generators"] == []
        for key, value in before["weights"].items():
            assert torch.equal(value, after["weights"][key]), key
    assert "seed=" in ranks[0]["seed"]["message"] and "skip_replica_check" in ranks[0]["seed"]["message"]
    assert ranks[0][case]["message"] == ranks[1][case]["message"]  # every rank raises alike


def test_skip_replica_check_allows_independent_chains(ranks: list[dict]) -> None:
    first, second = ranks[0]["independent"], ranks[1]["independent"]
    assert any(not torch.allclose(first[k], second[k]) for k in first)


@pytest.mark.parametrize("kind", ["fsdp2", "fsdp1"])
def test_fully_sharded_parameters_refused(ranks: list[dict], kind: str) -> None:
    for rank in ranks:
        message = rank[kind]
        assert message is not None, "no ValueError was raised"
        assert "FSDP" in message and "DistributedDataParallel" in message
        assert "Nothing was changed" in message


def test_no_process_group_no_check() -> None:
    """Without torch.distributed initialised the first step does no collective."""
    assert not dist.is_initialized()
    model = make_model(init_seed=0)
    opt = INTEGRATORS["langevin"](model.parameters(), SEED)
    x, y = global_batch(0)
    ((model(x) - y) ** 2).mean().backward()
    opt.step()
    assert math.isfinite(max(holonomic.residuals(model).values()))
