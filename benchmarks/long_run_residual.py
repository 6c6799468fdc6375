"""Constraint residual over 10^5 steps (float32 and float64), printed every
10^4 steps.  A script, not a test: it takes a few minutes on a CPU.

    python benchmarks/long_run_residual.py [--steps 100000]
"""

import argparse

import torch
from torch import nn

import holonomic as hn


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=100_000)
    args = parser.parse_args()
    torch.set_num_threads(1)
    for dtype in (torch.float32, torch.float64):
        g = torch.Generator().manual_seed(0)
        model = nn.Module()
        model.a = nn.Parameter(torch.randn(16, 8, generator=g, dtype=dtype))
        model.b = nn.Parameter(torch.randn(4, 8, generator=g, dtype=dtype))
        hn.constrain(model, a=hn.FixedNorm(1.0), b=hn.Orthonormal(over="rows"))
        fa, fb = torch.randn(16, 8, generator=g, dtype=dtype), torch.randn(4, 8, generator=g, dtype=dtype)
        opt = hn.Langevin(model.parameters(), step=0.1, friction=1.0, temperature=0.05, seed=1)
        worst = {"a": 0.0, "b": 0.0}
        print(f"{dtype}: eps = {torch.finfo(dtype).eps:.3g}")
        for i in range(1, args.steps + 1):
            model.a.grad, model.b.grad = -fa, -fb
            opt.step()
            if i % 100 == 0:
                for k, v in hn.residuals(model).items():
                    worst[k] = max(worst[k], v)
            if i % (args.steps // 10) == 0:
                print(f"  step {i:>7}: max residual so far  FixedNorm {worst['a']:.3g}  Orthonormal {worst['b']:.3g}")


if __name__ == "__main__":
    main()
