"""Overhead of holonomic.Audit relative to a plain training step.

MLP 784-1024-1024-10 (ReLU), FixedNorm rows on both hidden weight matrices,
holonomic.Langevin (from_sgd lr=0.01, momentum=0.9, temperature 1e-4),
batch 128, float32, CPU.  Invented data (Gaussian inputs, random labels from a
seed).  Three variants are timed in interleaved rounds (plain, audit every
step, audit every 100 steps; the order rotates each round) so that drifts in
machine load hit all of them alike; the figure is the median over rounds of
the per-step time ratio to the plain step.  What it does not show: GPU
behaviour, other models, or the cost on a quiet machine if this one is busy
(the ratios are less sensitive to load than the absolute times, which are
printed for context only).

Usage: python benchmarks/audit_overhead.py [--rounds 7] [--steps 30]
"""

from __future__ import annotations

import argparse
import statistics
import time

import torch
from torch import nn
from torch.nn import functional as F

import holonomic as hn
from holonomic.audit import Audit


def build(seed: int = 0):
    torch.manual_seed(seed)
    model = nn.Sequential(nn.Linear(784, 1024), nn.ReLU(), nn.Linear(1024, 1024), nn.ReLU(),
                          nn.Linear(1024, 10))
    hn.constrain(model, **{"0.weight": hn.FixedNorm(1.0), "2.weight": hn.FixedNorm(1.0)})
    opt = hn.Langevin.from_sgd(model.parameters(), lr=0.01, momentum=0.9, temperature=1e-4, seed=seed)
    return model, opt


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rounds", type=int, default=7)
    parser.add_argument("--steps", type=int, default=30, help="steps per variant per round (>= 100 "
                        "is not needed: every=100 is timed as its amortised cost)")
    args = parser.parse_args()
    print(f"torch {torch.__version__}, threads {torch.get_num_threads()}")
    gen = torch.Generator().manual_seed(1)
    x = torch.randn(128, 784, generator=gen)
    y = torch.randint(0, 10, (128,), generator=gen)
    model, opt = build()
    audits = {"every=1": Audit(model, opt, every=1, warn=False),
              "every=100": Audit(model, opt, every=100, warn=False)}

    def step(audit):
        opt.zero_grad(set_to_none=True)
        F.cross_entropy(model(x), y).backward()
        opt.step()
        if audit is not None:
            audit()

    variants = ["plain", "every=1", "every=100"]
    for v in variants:  # warm-up
        for _ in range(3):
            step(audits.get(v))
    times: dict[str, list[float]] = {v: [] for v in variants}
    ratios: dict[str, list[float]] = {v: [] for v in variants[1:]}
    for r in range(args.rounds):
        order = variants[r % 3:] + variants[: r % 3]
        per: dict[str, float] = {}
        for v in order:
            audit = audits.get(v)
            n = args.steps
            if v == "every=100":  # time 100 consecutive calls so exactly one record falls inside
                n = 100
            t0 = time.perf_counter()
            for _ in range(n):
                step(audit)
            per[v] = (time.perf_counter() - t0) / n
            times[v].append(per[v])
        for v in ratios:
            ratios[v].append(per[v] / per["plain"])
    for v in variants:
        print(f"{v:10s} median step {1e3 * statistics.median(times[v]):8.2f} ms")
    for v, rs in ratios.items():
        print(f"audit {v:10s} ratio to plain step: median {statistics.median(rs):.3f} "
              f"(rounds: {', '.join(f'{x:.3f}' for x in rs)})")


if __name__ == "__main__":
    main()
