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

Benchmarks 1-3 run twice: with ``compiled=False`` (the eager fast path) and
with ``compiled=True`` (``compiled``: the native C++ kernel, which is also
the default on the CPU, or torch.compile where that cannot be built; the
table says which), the latter plus a T = 0 step on a single 2048 x 2048
tensor, where overheads matter least.  Benchmarks 5 and 6 use the default.
Also reported: the eager fast path against the plain per-parameter
reference path.
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
from holonomic.dynamics import compiled as compiled_mod

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


def bench_steps(rounds: int, compiled: bool = False) -> dict[str, Any]:
    """Benchmarks 1 and 2 (and, eager only, fast path vs reference); keys get
    a ``_compiled`` suffix for ``Langevin(compiled=True)``."""
    suffix = "_compiled" if compiled else ""
    con, free = constrain_rows(mlp(SHAPE)), mlp(SHAPE)
    fake_grads(con)
    fake_grads(free)
    ours = hn.Langevin.from_sgd(con.parameters(), lr=LR, momentum=MOMENTUM, compiled=compiled)
    sgd = torch.optim.SGD(free.parameters(), lr=LR, momentum=MOMENTUM, foreach=True)
    out: dict[str, Any] = {}
    if compiled:
        out["compile_seconds"] = _first_call_seconds(ours.step)
        _check_compiled(ours)
        out["compiled_kernel"] = _kernel_name(ours)
    out["t0_vs_sgd" + suffix] = compare(ours.step, sgd.step, rounds=rounds, calls=3)
    hot = hn.Langevin.from_sgd(con.parameters(), lr=LR, momentum=MOMENTUM, temperature=1e-4, compiled=compiled)
    plain = PlainLangevin(free.parameters(), *hot.step_and_friction(0), 1e-4)
    if compiled:
        out["compile_seconds_hot"] = _first_call_seconds(hot.step)
        _check_compiled(hot)
    out["hot_vs_plain_langevin" + suffix] = compare(hot.step, plain.step, rounds=rounds, calls=3)
    if not compiled:
        ref = hn.Langevin.from_sgd(con.parameters(), lr=LR, momentum=MOMENTUM)
        ref._reference = True
        out["t0_fast_vs_reference"] = compare(ours.step, ref.step, rounds=max(3, rounds // 3))
    return out


def _first_call_seconds(step: Step) -> float:
    start = time.perf_counter()
    step()
    return time.perf_counter() - start


def bench_training(rounds: int, batch: int = 128, compiled: bool = False) -> dict[str, Any]:
    g = torch.Generator().manual_seed(2)
    x = torch.randn(batch, SHAPE[0], generator=g)  # invented data
    y = torch.randint(0, SHAPE[-1], (batch,), generator=g)
    con, free = constrain_rows(mlp(SHAPE)), mlp(SHAPE)
    ours = hn.Langevin.from_sgd(con.parameters(), lr=LR, momentum=MOMENTUM, compiled=compiled)
    sgd = torch.optim.SGD(free.parameters(), lr=LR, momentum=MOMENTUM, foreach=True)
    step = _train_step(con, ours, x, y)
    if compiled:
        step()
        _check_compiled(ours)
    key = "train_step_vs_sgd" + ("_compiled" if compiled else "")
    return {key: compare(step, _train_step(free, sgd, x, y), rounds=rounds, calls=2)}


def bench_compiled(rounds: int) -> dict[str, Any]:
    """Benchmarks 1-3 again with ``Langevin(compiled=True)``; the first step's
    wall time (mostly compilation) is reported separately."""
    out = bench_steps(rounds, compiled=True)
    out.update(bench_training(rounds, compiled=True))
    # one large tensor, where per-step overheads are small against the memory passes
    layer, free = nn.Linear(2048, 2048, bias=False), nn.Linear(2048, 2048, bias=False)
    hn.constrain(layer, weight=hn.FixedNorm(1.0))
    fake_grads(layer)
    fake_grads(free)
    ours = hn.Langevin.from_sgd(layer.parameters(), lr=LR, momentum=MOMENTUM, compiled=True)
    sgd = torch.optim.SGD(free.parameters(), lr=LR, momentum=MOMENTUM, foreach=True)
    out["compile_seconds_one_tensor"] = _first_call_seconds(ours.step)
    _check_compiled(ours)
    out["one_tensor_vs_sgd_compiled"] = compare(ours.step, sgd.step, rounds=rounds, calls=3)
    return out


def _kernel_name(opt: hn.Langevin) -> str:
    """Which kernel ``compiled=True`` ran: the native CPU kernel or torch.compile's."""
    items = compiled_mod._collect(opt)
    return "native C++" if items and compiled_mod._native_available(opt, items) else "torch.compile"


def _check_compiled(opt: hn.Langevin) -> None:
    """The compiled rows mean nothing if the step fell back to the eager path."""
    if getattr(opt, "_compile_failed", False):
        raise RuntimeError("Langevin(compiled=True) could not compile here (see the warning above); "
                           "run the suite with --only steps training orthonormal scaling memory")


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
            ref = hn.Langevin.from_sgd(ref_net.parameters(), lr=LR, momentum=MOMENTUM)
            ref._reference = True
            out["fast_vs_reference_orthonormal"] = compare(ours_step, _train_step(ref_net, ref, x, y),
                                                           rounds=rounds, warmup=1)
    return out


#: n x n products of our T = 0 orthonormal step in float32 training (fast_orthonormal).
_STEP_PRODUCTS = 3


def _orthonormal_floor(width: int, x: torch.Tensor, y: torch.Tensor, *, their_step_ms: float,
                       rounds: int) -> dict[str, float]:
    """The least our training step can cost against the cayley map: our T = 0
    RATTLE step needs three n x n products (``W^T V``, ``W A``, ``W A^2``;
    :mod:`holonomic.dynamics.fast_orthonormal`) on top of the plain training
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


BENCHMARKS = ("steps", "training", "compiled", "orthonormal", "scaling", "memory")


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
    if "training" in only:
        result.update(bench_training(rounds))
    if "compiled" in only:
        result.update(bench_compiled(rounds))
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
    if "t0_vs_sgd" in r:
        lines += ["  Langevin(compiled=False): the eager fast path",
                  f"1 T=0 step vs SGD(momentum, foreach)            [<=1.5]   {_fmt(r['t0_vs_sgd'])}",
                  f"2 T>0 step vs unconstrained Langevin (same noise) [<=1.2] {_fmt(r['hot_vs_plain_langevin'])}"]
    if "train_step_vs_sgd" in r:
        lines.append(f"3 training step vs SGD, batch 128               [<=1.10]  {_fmt(r['train_step_vs_sgd'])}")
    if "t0_vs_sgd_compiled" in r:
        lines += [f"  Langevin(compiled=True), {r.get('compiled_kernel', '?')} kernel (on the CPU the native kernel "
                  "is also the default); first step (building) "
                  f"{r['compile_seconds']:.1f} s at T=0, "
                  f"{r['compile_seconds_hot']:.1f} s at T>0, "
                  f"{r.get('compile_seconds_one_tensor', float('nan')):.1f} s for the single tensor:",
                  f"1c T=0 step vs SGD(momentum, foreach)           [<=1.5]   {_fmt(r['t0_vs_sgd_compiled'])}",
                  f"2c T>0 step vs unconstrained Langevin           [<=1.2]   "
                  f"{_fmt(r['hot_vs_plain_langevin_compiled'])}",
                  f"3c training step vs SGD, batch 128              [<=1.10]  "
                  f"{_fmt(r['train_step_vs_sgd_compiled'])}",
                  f"  T=0 step on one 2048 x 2048 FixedNorm tensor vs SGD           "
                  f"{_fmt(r['one_tensor_vs_sgd_compiled'])}"]
    for key, row in r.items():
        if key.startswith("orthonormal_"):
            for kind in ("cayley", "matrix_exp"):
                lines.append(f"4 {key} training step vs torch {kind:<10} [<=0.5] {_fmt(row[kind])}  "
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
    for key, label in (("t0_fast_vs_reference", "T=0 step, FixedNorm MLP"),
                       ("fast_vs_reference_orthonormal", "T=0 training step, Orthonormal 512")):
        if key in r:
            lines.append(f"  fast path vs plain reference path ({label}): {_fmt(r[key])}")
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
