"""Data-parallel constrained Langevin training with DistributedDataParallel.

Launch on one machine with two CPU processes (gloo):

    torchrun --nproc_per_node=2 examples/train_ddp.py

or on GPUs (one process per GPU, NCCL):

    torchrun --nproc_per_node=NUM_GPUS examples/train_ddp.py --backend nccl

Without torchrun it runs as a single process (useful for comparison).
See docs/distributed.md for several nodes.

The data are INVENTED: a two-class problem generated from a seed (points
near two noisy concentric shells in 10 dimensions), so the example needs no
download.  Every rank generates the same data set from the same seed and
uses its own slice of each global batch.

What the example shows:

- the model is wrapped in DistributedDataParallel (DDP averages gradients);
- every rank builds the integrator with the SAME seed, so all ranks draw the
  same noise and the weights stay identical without extra communication
  (the integrator checks this on its first step);
- ``dataset_size`` is the size of the whole data set, not of a rank's share:
  the loss is a mean, DDP averages the means of equal-size local batches, so
  ``.grad`` is the gradient of the mean over the global batch, and
  ``U = dataset_size * mean`` is the negative log-likelihood of the whole
  data set at temperature 1;
- at the end the ranks compare a checksum of their weights.
"""

from __future__ import annotations

import argparse
import os

import torch
import torch.distributed as dist
from torch import nn

import holonomic


def invented_data(n: int, seed: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Invented two-class data: radius 1 (class 0) or 1.5 (class 1) in 10-d, plus noise."""
    gen = torch.Generator().manual_seed(seed)
    direction = torch.randn(n, 10, generator=gen)
    direction = direction / direction.norm(dim=1, keepdim=True)
    label = torch.randint(0, 2, (n,), generator=gen)
    radius = 1.0 + 0.5 * label + 0.15 * torch.randn(n, generator=gen)
    return direction * radius[:, None], label


def build_model() -> nn.Module:
    model = nn.Sequential(nn.Linear(10, 32), nn.Tanh(), nn.Linear(32, 32), nn.Tanh(), nn.Linear(32, 2))
    # Each hidden unit's incoming weights on a sphere; the middle layer orthogonal.
    return holonomic.constrain(model, **{"0.weight": holonomic.FixedNorm(3.0),
                                         "2.weight": holonomic.Orthonormal(scale=1.5)})


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--backend", default="gloo", choices=["gloo", "nccl"])
    parser.add_argument("--steps", type=int, default=300)
    parser.add_argument("--batch", type=int, default=64, help="GLOBAL batch size (split over ranks)")
    parser.add_argument("--temperature", type=float, default=1.0)
    parser.add_argument("--seed", type=int, default=0, help="same on every rank")
    args = parser.parse_args()

    distributed = "RANK" in os.environ  # set by torchrun
    if distributed:
        dist.init_process_group(args.backend)
        rank, world = dist.get_rank(), dist.get_world_size()
    else:
        rank, world = 0, 1
    if args.backend == "nccl":
        local = int(os.environ.get("LOCAL_RANK", 0))
        torch.cuda.set_device(local)
        device = torch.device("cuda", local)
    else:
        device = torch.device("cpu")
    if args.batch % world:
        raise SystemExit(f"--batch must be divisible by the number of ranks ({world}), got {args.batch}")
    local_batch = args.batch // world

    x, y = invented_data(4096, seed=1234)  # the same on every rank
    x, y = x.to(device), y.to(device)
    torch.manual_seed(args.seed)  # DDP broadcasts rank 0's weights anyway
    model = build_model().to(device)
    net = nn.parallel.DistributedDataParallel(model) if distributed else model
    opt = holonomic.Langevin(net.parameters(), step=0.003, friction=10.0, temperature=args.temperature,
                             seed=args.seed, dataset_size=len(x))
    order = torch.Generator().manual_seed(args.seed + 1)  # same batches on every rank
    loss_fn = nn.CrossEntropyLoss()  # a MEAN over the local batch
    for step in range(args.steps):
        batch = torch.randint(0, len(x), (args.batch,), generator=order).to(device)
        mine = batch[rank * local_batch:(rank + 1) * local_batch]
        opt.zero_grad()
        loss = loss_fn(net(x[mine]), y[mine])
        loss.backward()
        opt.step()
        if rank == 0 and (step % 100 == 0 or step == args.steps - 1):
            with torch.no_grad():
                accuracy = (model(x).argmax(1) == y).float().mean().item()
            print(f"step {step:4d}  local loss {loss.item():.4f}  accuracy (all data) {accuracy:.3f}")

    worst = max(holonomic.residuals(model).values())
    with torch.no_grad():
        checksum = torch.stack([p.double().sum() for p in model.parameters()]).sum().reshape(1)
    if distributed:
        high, low = checksum.clone(), checksum.clone()
        dist.all_reduce(high, op=dist.ReduceOp.MAX)
        dist.all_reduce(low, op=dist.ReduceOp.MIN)
        same = bool(high == low)
    else:
        same = True
    if rank == 0:
        print(f"ranks: {world}; largest constraint residual {worst:.2e}; "
              f"weight checksum identical on all ranks: {same}")
    if distributed:
        dist.destroy_process_group()


if __name__ == "__main__":
    main()
