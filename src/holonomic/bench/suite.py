r"""Speed of the constrained steps against plain ones, as ratios.

Every figure is a ratio of two step functions timed side by side in one
process: rounds alternate between them (A B, B A, ...), each turn makes one
untimed call and then times a few calls, and the report gives the median
ratio over rounds with its interquartile range.  Interleaving cancels slow
drifts of the machine (other jobs, clocks); the spread says how much remains.  float32, CPU, the torch
thread count is printed.  What the figures do not show: the speed of other
hardware, other shapes, or a GPU.

Benchmarks (issue 6):

1. T = 0: ``Langevin.from_sgd`` with ``FixedNorm`` rows on every weight matrix
   of an MLP 784-1024-1024-10 against ``torch.optim.SGD(momentum=0.9,
   foreach=True)`` on the same shapes (steps only, gradients fixed).
2. T > 0: the same against an unconstrained Langevin step written with
   torch ops that draws the same amount of Gaussian noise.
3. A training step (forward, backward, step; batch 128, invented data) with
   the constraints against the same without them under SGD with momentum.
4. Orthonormal square hidden layers (512, 1024): a training step with
   ``Orthonormal`` against ``torch.nn.utils.parametrizations.orthogonal``
   (cayley and matrix_exp maps) with SGD; constraint residuals reported,
   and the floor of the ratio to cayley: the plain training step plus the
   three n x n products our T = 0 RATTLE step needs, over the cayley step.
5. Scaling: constrained step time against parameter count (0.25 M to 8 M),
   fitted exponent of ``time ~ count^k``; SGD's exponent on the same
   sizes, timed side by side, is reported too (the machine's cache makes
   both superlinear when the large sizes leave it).
6. Memory: optimizer state bytes per parameter, and peak resident memory
   growth of a short training run against SGD with momentum.
7. Mixed model: MLP 784-512-512-10 with the first weight ``FixedNorm``, the
   square hidden weight ``Orthonormal`` and the rest free, batch 128, T = 0:
   the optimizer step (gradients fixed) and the training step against
   SGD's (step, or training step) plus the three 512 x 512 products that the
   exact orthonormal step needs.

Benchmarks 1-3 run with the default backend (``"auto"``: the native C++
kernel on the CPU where it can be built; the table names the kernels that
ran, from ``last_info.kernels``) and with ``backend="eager"``; benchmark 1
also on a single 2048 x 2048 tensor, where overheads matter least.  Also
reported: the eager kernels against the reference kernel.
"""

from __future__ import annotations

import argparse
import datetime
import json
import math
import os
import platform
import statistics
import subprocess
import sys
import time
from typing import Any, Callable

import torch
from torch import nn

import holonomic as hn

__all__ = ["run_suite", "main", "compare"]

Step = Callable[[], Any]


def compare(a: Step, b: Step, *, rounds: int, calls: int = 1, warmup: int = 2) -> dict[str, float]:
    """Median over interleaved rounds of ``time(a) / time(b)`` with its quartiles,
    plus the median seconds per call of each.

    Each turn of a round makes one untimed call before its timed calls, so
    that both sides are timed with their own data in the caches: otherwise
    the side that runs second in a round starts with the other's data there
    (on the benchmark MLP, one diagnostic run gave a ratio of 1.04 in rounds
    where our step ran first and 1.76 where SGD did), and the median over
    rounds lands anywhere between the two."""
    for _ in range(warmup):
        a()
        b()
    ta, tb, ratios = [], [], []
    for r in range(rounds):
        pair = []
        for f in ((a, b) if r % 2 == 0 else (b, a)):
            f()
            start = time.perf_counter()
            for _ in range(calls):
                f()
            pair.append((time.perf_counter() - start) / calls)
        x, y = pair if r % 2 == 0 else pair[::-1]
        ta.append(x)
        tb.append(y)
        ratios.append(x / y)
    q = statistics.quantiles(ratios, n=4) if len(ratios) > 1 else [ratios[0]] * 3
    return {"ratio": statistics.median(ratios), "q1": q[0], "q3": q[2],
            "a_ms": 1e3 * statistics.median(ta), "b_ms": 1e3 * statistics.median(tb), "rounds": rounds}


# -- models -------------------------------------------------------------------
def mlp(sizes: tuple[int, ...], seed: int = 0) -> nn.Sequential:
    torch.manual_seed(seed)
    layers: list[nn.Module] = []
    for i, (n_in, n_out) in enumerate(zip(sizes[:-1], sizes[1:])):
        if i:
            layers.append(nn.ReLU())
        layers.append(nn.Linear(n_in, n_out))
    return nn.Sequential(*layers)


def constrain_rows(model: nn.Module) -> nn.Module:
    for m in model.modules():
        if isinstance(m, nn.Linear):
            hn.constrain(m, weight=hn.FixedNorm(1.0))
    return model


def fake_grads(model: nn.Module, seed: int = 1) -> None:
    g = torch.Generator().manual_seed(seed)
    for p in model.parameters():
        p.grad = 1e-3 * torch.randn(p.shape, generator=g)


class PlainLangevin:
    """Unconstrained BAOAB with torch ops (the comparison of benchmark 2):
    one full kick, two half drifts, an exact OU step that draws one Gaussian
    per coordinate from its own generator."""

    def __init__(self, params, step: float, friction: float, temperature: float) -> None:
        self.params = [p for p in params]
        self.h = step
        self.decay = math.exp(-friction * step)
        self.sigma = math.sqrt(temperature * -math.expm1(-2 * friction * step))
        self.momenta = [torch.zeros_like(p) for p in self.params]
        self.noise = [torch.empty_like(p) for p in self.params]
        self.gen = torch.Generator().manual_seed(0)

    @torch.no_grad()
    def step(self) -> None:
        ws, ps = [p.detach() for p in self.params], self.momenta
        torch._foreach_add_(ps, [p.grad for p in self.params], alpha=-self.h)
        torch._foreach_add_(ws, ps, alpha=0.5 * self.h)
        for x in self.noise:
            x.normal_(generator=self.gen)
        torch._foreach_mul_(ps, self.decay)
        torch._foreach_add_(ps, self.noise, alpha=self.sigma)
        torch._foreach_add_(ws, ps, alpha=0.5 * self.h)


# -- benchmarks ----------------------------------------------------------------
SHAPE = (784, 1024, 1024, 10)
LR, MOMENTUM = 0.01, 0.9


def _kernels(opt: torch.optim.Optimizer) -> str:
    """The kernels that took the optimizer's last step (``last_info.kernels``)."""
    return "+".join(sorted({k for _, k in opt.last_info.kernels}))


def bench_steps(rounds: int, backend: str = "auto") -> dict[str, Any]:
    """Benchmarks 1 and 2 (and, for ``"eager"``, the eager kernels vs the reference);
    keys get an ``_eager`` suffix for ``backend="eager"``."""
    suffix = "" if backend == "auto" else f"_{backend}"
    con, free = constrain_rows(mlp(SHAPE)), mlp(SHAPE)
    fake_grads(con)
    fake_grads(free)
    ours = hn.Langevin.from_sgd(con.parameters(), lr=LR, momentum=MOMENTUM, backend=backend)
    sgd = torch.optim.SGD(free.parameters(), lr=LR, momentum=MOMENTUM, foreach=True)
    out: dict[str, Any] = {"first_step_seconds" + suffix: _first_call_seconds(ours.step),
                           "kernels" + suffix: _kernels(ours)}
    out["t0_vs_sgd" + suffix] = compare(ours.step, sgd.step, rounds=rounds, calls=3)
    hot = hn.Langevin.from_sgd(con.parameters(), lr=LR, momentum=MOMENTUM, temperature=1e-4, backend=backend)
    plain = PlainLangevin(free.parameters(), *hot.step_and_friction(0), 1e-4)
    out["hot_vs_plain_langevin" + suffix] = compare(hot.step, plain.step, rounds=rounds, calls=3)
    if backend == "eager":
        ref = hn.Langevin.from_sgd(con.parameters(), lr=LR, momentum=MOMENTUM, backend="reference")
        out["t0_eager_vs_reference"] = compare(ours.step, ref.step, rounds=max(3, rounds // 3))
    else:
        # one large tensor, where per-step overheads are small against the memory passes
        layer, one = nn.Linear(2048, 2048, bias=False), nn.Linear(2048, 2048, bias=False)
        hn.constrain(layer, weight=hn.FixedNorm(1.0))
        fake_grads(layer)
        fake_grads(one)
        big = hn.Langevin.from_sgd(layer.parameters(), lr=LR, momentum=MOMENTUM, backend=backend)
        sgd_big = torch.optim.SGD(one.parameters(), lr=LR, momentum=MOMENTUM, foreach=True)
        out["one_tensor_vs_sgd"] = compare(big.step, sgd_big.step, rounds=rounds, calls=3)
    return out


def _first_call_seconds(step: Step) -> float:
    start = time.perf_counter()
    step()
    return time.perf_counter() - start


def bench_training(rounds: int, batch: int = 128, backend: str = "auto") -> dict[str, Any]:
    g = torch.Generator().manual_seed(2)
    x = torch.randn(batch, SHAPE[0], generator=g)  # invented data
    y = torch.randint(0, SHAPE[-1], (batch,), generator=g)
    con, free = constrain_rows(mlp(SHAPE)), mlp(SHAPE)
    ours = hn.Langevin.from_sgd(con.parameters(), lr=LR, momentum=MOMENTUM, backend=backend)
    sgd = torch.optim.SGD(free.parameters(), lr=LR, momentum=MOMENTUM, foreach=True)
    step = _train_step(con, ours, x, y)
    key = "train_step_vs_sgd" + ("" if backend == "auto" else f"_{backend}")
    return {key: compare(step, _train_step(free, sgd, x, y), rounds=rounds, calls=2)}


MIXED_SHAPE = (784, 512, 512, 10)


def mixed_model(seed: int = 0) -> nn.Sequential:
    """The README's quick-start mix: first weight ``FixedNorm``, square hidden weight
    ``Orthonormal`` (started orthogonal), the rest free."""
    model = mlp(MIXED_SHAPE, seed=seed)
    with torch.no_grad():
        nn.init.orthogonal_(model[2].weight)
    hn.constrain(model[0], weight=hn.FixedNorm(1.0))
    hn.constrain(model[2], weight=hn.Orthonormal())
    return model


def bench_mixed(rounds: int, batch: int = 128) -> dict[str, Any]:
    """Benchmark 7: the mixed model against SGD plus the three n x n products of an
    exact orthonormal step (``W^T V``, ``W A``, ``W A^2``)."""
    n = MIXED_SHAPE[1]
    a, b = torch.randn(n, n), torch.randn(n, n)

    def products() -> None:
        for _ in range(_STEP_PRODUCTS):
            torch.mm(a, b)

    g = torch.Generator().manual_seed(2)
    x = torch.randn(batch, MIXED_SHAPE[0], generator=g)  # invented data
    y = torch.randint(0, MIXED_SHAPE[-1], (batch,), generator=g)
    ours_net, free = mixed_model(), mlp(MIXED_SHAPE)
    ours = hn.Langevin.from_sgd(ours_net.parameters(), lr=LR, momentum=MOMENTUM)
    sgd = torch.optim.SGD(free.parameters(), lr=LR, momentum=MOMENTUM, foreach=True)
    ours_train, sgd_train = _train_step(ours_net, ours, x, y), _train_step(free, sgd, x, y)
    ours_train()
    out: dict[str, Any] = {"mixed_kernels": [k for _, k in ours.last_info.kernels]}

    def sgd_and_products() -> None:
        sgd.step()
        products()

    def sgd_train_and_products() -> None:
        sgd_train()
        products()

    fake_grads(ours_net)
    fake_grads(free)
    out["mixed_step_vs_sgd_products"] = compare(ours.step, sgd_and_products, rounds=rounds, calls=3)
    out["mixed_train_vs_sgd_products"] = compare(ours_train, sgd_train_and_products, rounds=rounds, calls=2)
    return out


def _train_step(model: nn.Module, opt: torch.optim.Optimizer, x: torch.Tensor, y: torch.Tensor) -> Step:
    def step() -> None:
        opt.zero_grad()
        nn.functional.cross_entropy(model(x), y).backward()
        opt.step()
    return step


def _square_net(width: int, seed: int) -> nn.Sequential:
    return mlp((64, width, width, 10), seed=seed)


def bench_orthonormal(rounds: int, widths: tuple[int, ...], steps_check: int = 20) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for width in widths:
        g = torch.Generator().manual_seed(3)
        x = torch.randn(128, 64, generator=g)  # invented data
        y = torch.randint(0, 10, (128,), generator=g)
        ours_net = _square_net(width, 0)
        with torch.no_grad():  # a random square matrix can be near singular; start orthogonal
            nn.init.orthogonal_(ours_net[2].weight)
        hn.constrain(ours_net[2], weight=hn.Orthonormal())
        ours = hn.Langevin.from_sgd(ours_net.parameters(), lr=LR, momentum=MOMENTUM)
        ours_step = _train_step(ours_net, ours, x, y)
        row: dict[str, Any] = {}
        for kind in ("cayley", "matrix_exp"):
            net = _square_net(width, 0)
            torch.nn.utils.parametrizations.orthogonal(net[2], orthogonal_map=kind)
            sgd = torch.optim.SGD(net.parameters(), lr=LR, momentum=MOMENTUM, foreach=True)
            their_step = _train_step(net, sgd, x, y)
            cmp = compare(ours_step, their_step, rounds=rounds, warmup=1)
            for _ in range(steps_check):
                their_step()
            w = net[2].weight.detach()
            cmp["their_residual"] = float((w.T @ w - torch.eye(width)).abs().max())
            row[kind] = cmp
        for _ in range(steps_check):
            ours_step()
        row["our_residual"] = hn.residuals(ours_net)["2.weight"]
        row["floor"] = _orthonormal_floor(width, x, y, their_step_ms=row["cayley"]["b_ms"], rounds=rounds)
        out[f"orthonormal_{width}"] = row
        if width == widths[0]:
            ref_net = _square_net(width, 0)
            with torch.no_grad():
                nn.init.orthogonal_(ref_net[2].weight)
            hn.constrain(ref_net[2], weight=hn.Orthonormal())
            ref = hn.Langevin.from_sgd(ref_net.parameters(), lr=LR, momentum=MOMENTUM, backend="reference")
            out["fast_vs_reference_orthonormal"] = compare(ours_step, _train_step(ref_net, ref, x, y),
                                                           rounds=rounds, warmup=1)
    return out


#: n x n products of our T = 0 orthonormal step in float32 training (kernels.square_orthonormal).
_STEP_PRODUCTS = 3


def _orthonormal_floor(width: int, x: torch.Tensor, y: torch.Tensor, *, their_step_ms: float,
                       rounds: int) -> dict[str, float]:
    """The least our training step can cost against the cayley map: our T = 0
    RATTLE step needs three n x n products (``W^T V``, ``W A``, ``W A^2``;
    :mod:`holonomic.dynamics.kernels.square_orthonormal`) on top of the plain training
    step (forward, backward, SGD on the same net without the constraint).
    Returns both times (ms) and ``(plain + 3 products) / cayley``."""
    net = _square_net(width, 0)
    sgd = torch.optim.SGD(net.parameters(), lr=LR, momentum=MOMENTUM, foreach=True)
    a = torch.randn(1, width, width)
    b = torch.randn(1, width, width)
    cmp = compare(lambda: torch.bmm(a, b), _train_step(net, sgd, x, y), rounds=rounds, warmup=1)
    product, plain = cmp["a_ms"], cmp["b_ms"]
    return {"product_ms": product, "plain_step_ms": plain, "products": _STEP_PRODUCTS,
            "ratio": (plain + _STEP_PRODUCTS * product) / their_step_ms}


def bench_scaling(rounds: int, counts: tuple[float, ...]) -> dict[str, Any]:
    sizes, times, sgd_times = [], [], []
    for millions in counts:
        width = int(round(math.sqrt(millions * 1e6)))
        layer = nn.Linear(width, width, bias=False)
        hn.constrain(layer, weight=hn.FixedNorm(1.0))
        fake_grads(layer)
        opt = hn.Langevin.from_sgd(layer.parameters(), lr=LR, momentum=MOMENTUM)
        base = torch.optim.SGD([torch.nn.Parameter(torch.zeros(width, width))], lr=LR, momentum=MOMENTUM)
        base.param_groups[0]["params"][0].grad = torch.zeros(width, width)
        cmp = compare(opt.step, base.step, rounds=rounds, calls=2)
        sizes.append(width * width)
        times.append(cmp["a_ms"])
        sgd_times.append(cmp["b_ms"])
    return {"scaling": {"params": sizes, "step_ms": times, "exponent": _log_slope(sizes, times),
                        "sgd_step_ms": sgd_times, "sgd_exponent": _log_slope(sizes, sgd_times)}}


def _log_slope(xs: list[float], ys: list[float]) -> float:
    """Least-squares slope of ``log y`` against ``log x``."""
    return statistics.linear_regression([math.log(x) for x in xs], [math.log(y) for y in ys]).slope


def memory_child(name: str, steps: int = 5) -> dict[str, float]:
    """Train the benchmark MLP for a few steps (in a fresh process) and return
    the optimizer state bytes per parameter and the peak resident memory."""
    model = mlp(SHAPE)
    if name == "holonomic":
        constrain_rows(model)
        opt: torch.optim.Optimizer = hn.Langevin.from_sgd(model.parameters(), lr=LR, momentum=MOMENTUM)
    else:
        opt = torch.optim.SGD(model.parameters(), lr=LR, momentum=MOMENTUM, foreach=True)
    g = torch.Generator().manual_seed(2)
    x = torch.randn(128, SHAPE[0], generator=g)  # invented data
    y = torch.randint(0, SHAPE[-1], (128,), generator=g)
    step = _train_step(model, opt, x, y)
    for _ in range(steps):
        step()
    n = sum(p.numel() for p in model.parameters())
    state_bytes = sum(t.numel() * t.element_size() for s in opt.state.values() for t in s.values()
                      if torch.is_tensor(t))
    return {"state_bytes_per_param": state_bytes / n,
            "peak_rss_mib": _peak_rss_mib()}


def _peak_rss_mib() -> float:
    """Peak resident memory of this process (VmHWM; ``ru_maxrss`` would carry the
    parent's peak across exec)."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def bench_memory() -> dict[str, Any]:
    out: dict[str, Any] = {}
    for name in ("sgd", "holonomic"):
        code = f"import json; from holonomic.bench.suite import memory_child; print(json.dumps(memory_child({name!r})))"
        done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
        out[name] = json.loads(done.stdout.strip().splitlines()[-1])
    return {"memory": out}


BENCHMARKS = ("steps", "training", "mixed", "orthonormal", "scaling", "memory")


def run_suite(quick: bool = False, threads: int | None = None,
              only: tuple[str, ...] = BENCHMARKS) -> dict[str, Any]:
    """Run the benchmarks named in ``only`` (default all) and return the
    results (plain data)."""
    if threads:
        torch.set_num_threads(threads)
    rounds = 5 if quick else 15
    result: dict[str, Any] = {
        "date": datetime.date.today().isoformat(),
        "machine": f"{platform.machine()} {platform.processor() or ''}".strip(),
        "cpu_count": os.cpu_count(),
        "torch": torch.__version__,
        "threads": torch.get_num_threads(),
        "dtype": "float32",
    }
    if "steps" in only:
        result.update(bench_steps(rounds))
        result.update(bench_steps(rounds, backend="eager"))
    if "training" in only:
        result.update(bench_training(rounds))
        result.update(bench_training(rounds, backend="eager"))
    if "mixed" in only:
        result.update(bench_mixed(rounds))
    if "orthonormal" in only:
        result.update(bench_orthonormal(max(3, rounds // 3), (512,) if quick else (512, 1024)))
    if "scaling" in only:
        result.update(bench_scaling(max(3, rounds // 3), (0.25, 1.0, 2.0, 4.0, 8.0) if not quick else (0.25, 1.0)))
    if "memory" in only:
        result.update(bench_memory())
    return result


def _fmt(c: dict[str, float]) -> str:
    return f"{c['ratio']:.2f} [{c['q1']:.2f}, {c['q3']:.2f}]  ({c['a_ms']:.1f} ms vs {c['b_ms']:.1f} ms)"


def format_table(r: dict[str, Any]) -> str:
    lines = [f"holonomic benchmark  {r['date']}  torch {r['torch']}  threads {r['threads']}  "
             f"cpus {r['cpu_count']}  {r['dtype']} CPU",
             "ratio = median over interleaved rounds [quartiles]; target in brackets"]
    for suffix, tag, name in (("", "", "default backend (auto)"), ("_eager", "e", 'backend="eager"')):
        if "t0_vs_sgd" + suffix in r:
            lines += [f"  Langevin, {name}: kernels {r['kernels' + suffix]}, first step "
                      f"{r['first_step_seconds' + suffix]:.2f} s (building the native kernel, if not cached)",
                      f"1{tag} T=0 step vs SGD(momentum, foreach)        [<=1.2]   {_fmt(r['t0_vs_sgd' + suffix])}",
                      f"2{tag} T>0 step vs unconstrained Langevin      [<=1.2]   "
                      f"{_fmt(r['hot_vs_plain_langevin' + suffix])}"]
        if "train_step_vs_sgd" + suffix in r:
            lines.append(f"3{tag} training step vs SGD, batch 128          [<=1.10]  "
                         f"{_fmt(r['train_step_vs_sgd' + suffix])}")
    if "one_tensor_vs_sgd" in r:
        lines.append(f"  T=0 step on one 2048 x 2048 FixedNorm tensor vs SGD         {_fmt(r['one_tensor_vs_sgd'])}")
    if "mixed_step_vs_sgd_products" in r:
        lines += [f"7  mixed model (kernels {', '.join(r['mixed_kernels'])}):",
                  f"7a optimizer step vs SGD step + 3 products      [<=1.3]   {_fmt(r['mixed_step_vs_sgd_products'])}",
                  f"7b training step vs SGD's + 3 products          [<=1.1]   {_fmt(r['mixed_train_vs_sgd_products'])}"]
    for key, row in r.items():
        if key.startswith("orthonormal_"):
            for kind in ("cayley", "matrix_exp"):
                lines.append(f"4 {key} training step vs torch {kind:<10} [<=0.40] {_fmt(row[kind])}  "
                             f"residual ours {row['our_residual']:.1e} theirs {row[kind]['their_residual']:.1e}")
            f = row["floor"]
            lines.append(f"  {key}: one n x n product {f['product_ms']:.1f} ms, plain SGD training step "
                         f"{f['plain_step_ms']:.1f} ms; floor (plain + {f['products']} products) / cayley = {f['ratio']:.2f}")
    if "scaling" in r:
        s = r["scaling"]
        lines.append(f"5 step time ~ params^k, {s['params'][0]/1e6:.2f}M..{s['params'][-1]/1e6:.2f}M  [<=1.05]  "
                     f"k = {s['exponent']:.3f}  (ms: {', '.join(f'{t:.1f}' for t in s['step_ms'])}); "
                     f"SGD's k = {s['sgd_exponent']:.3f}")
    if "memory" in r:
        m = r["memory"]
        lines.append(f"6 state bytes/param: holonomic {m['holonomic']['state_bytes_per_param']:.2f}, "
                     f"SGD {m['sgd']['state_bytes_per_param']:.2f};  peak RSS of a 5-step training run "
                     f"{m['holonomic']['peak_rss_mib']:.0f} vs {m['sgd']['peak_rss_mib']:.0f} MiB "
                     f"(ratio {m['holonomic']['peak_rss_mib'] / m['sgd']['peak_rss_mib']:.2f})")
    for key, label in (("t0_eager_vs_reference", "T=0 step, FixedNorm MLP"),
                       ("fast_vs_reference_orthonormal", "T=0 training step, Orthonormal 512, default backend")):
        if key in r:
            lines.append(f"  vs the reference kernel ({label}): {_fmt(r[key])}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m holonomic.bench", description=__doc__.split("\n\n")[0])
    parser.add_argument("--json", default="bench.json", help="where to write the results (default bench.json)")
    parser.add_argument("--quick", action="store_true", help="fewer rounds and sizes (a smoke run)")
    parser.add_argument("--threads", type=int, default=None, help="torch thread count (default: torch's)")
    parser.add_argument("--only", nargs="+", choices=BENCHMARKS, default=list(BENCHMARKS),
                        help="run only these benchmarks (default: all)")
    args = parser.parse_args(argv)
    result = run_suite(quick=args.quick, threads=args.threads, only=tuple(args.only))
    print(format_table(result))
    with open(args.json, "w") as f:
        json.dump(result, f, indent=1)
    print(f"wrote {args.json}")
    return 0
