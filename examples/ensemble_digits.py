"""Ensemble from a Langevin chain against a single trained network, on the digits data.

Data: ``sklearn.datasets.load_digits`` (bundled with scikit-learn, 1797 8x8 images, no
download). A small training set (``--train-size``, default 200, stratified) is drawn once
from ``--split-seed``; the rest (about 1600 images) is the test set.

For each model kind and each seed (initial weights and sampler noise; the split is fixed):

1. *Single network*: the maximum a posteriori (MAP) weights, found by ``holonomic.Langevin``
   at temperature 0 (full batch, heavy-ball SGD in disguise) from the seed's initial weights.
2. *Ensembles*: from those weights, for each of ``--temperatures`` (default 1, 0.1, 0.01),
   ``holonomic.Langevin`` at that temperature (1 = the Bayesian posterior with the same
   prior, since ``dataset_size = N`` multiplies the mean loss; below 1 a "cold posterior",
   Wenzel et al., ICML 2020), collecting the softmax on the test set every ``--every``
   steps after ``--burn-in`` with :class:`holonomic.sampling.PredictiveEnsemble`.
   Full-batch gradients, so there is no gradient noise and plain Langevin suffices.

Models (an MLP 64 -> 100 -> 10, tanh):

* ``unconstrained``: Gaussian prior of precision ``--prior-precision`` on every weight
  (weight decay), for MAP and sampling alike.
* ``constrained``: each hidden unit's incoming weight vector has fixed norm ``--hidden-norm``
  and each output unit's has fixed norm ``--output-norm`` (``FixedNorm(over="rows")``); the
  biases get the Gaussian prior.

Reported: test accuracy, NLL, ECE (15 equal-width bins) and predictive entropy, per seed;
the mean over seeds with a 95 % Student-t interval of the *paired* difference ensemble minus
single network; and the rank-normalised split R-hat / ESS over the seeds' chains of the
training loss and of two test predictions.

What this shows and does not show: one dataset, one small training size, one architecture,
one fixed split, a handful of seeds; the intervals cover seed-to-seed variation (initial
weights and sampler noise) for this split only, not variation over splits or datasets.
The chains start at different MAP points and are short, so they usually do not mix across
modes (R-hat well above 1.01): the "ensemble" then averages local posterior samples around
each seed's mode, not the full posterior.

Run: ``python examples/ensemble_digits.py`` (a few minutes on 2 cores; ``--quick`` for a
smoke run). Writes ``results.json`` and ``ensemble_digits.png`` into ``--out``.
"""

from __future__ import annotations

import argparse
import copy
import json
import math
import time
from pathlib import Path

import numpy as np
import torch
from scipy import stats
from sklearn.datasets import load_digits
from sklearn.model_selection import train_test_split
from torch import nn

from holonomic import FixedNorm, Langevin, constrain
from holonomic.sampling import (
    PredictiveEnsemble,
    classification_metrics,
    mixing_diagnostics,
    predict_probabilities,
)

KINDS = ("unconstrained", "constrained")
METRICS = ("accuracy", "nll", "ece", "entropy")


def parse_args() -> argparse.Namespace:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--seeds", type=int, default=5)
    ap.add_argument("--train-size", type=int, default=200)
    ap.add_argument("--split-seed", type=int, default=0)
    ap.add_argument("--hidden", type=int, default=100)
    ap.add_argument("--train-steps", type=int, default=1000)
    ap.add_argument("--sample-steps", type=int, default=2000)
    ap.add_argument("--burn-in", type=int, default=500)
    ap.add_argument("--every", type=int, default=10)
    ap.add_argument("--temperatures", type=float, nargs="+", default=[1.0, 0.1, 0.01],
                    help="sampling temperatures (1 = Bayesian posterior); each starts at the MAP")
    ap.add_argument("--lr", type=float, default=0.2,
                    help="SGD-style learning rate on the mean loss (training and sampling)")
    ap.add_argument("--momentum", type=float, default=0.9)
    ap.add_argument("--prior-precision", type=float, default=1.0)
    ap.add_argument("--hidden-norm", type=float, default=2.0)
    ap.add_argument("--output-norm", type=float, default=4.0)
    ap.add_argument("--out", type=Path, default=Path("runs/ensemble_digits"))
    ap.add_argument("--quick", action="store_true", help="tiny run to check the script works")
    args = ap.parse_args()
    if args.quick:
        args.seeds, args.train_steps, args.sample_steps, args.burn_in = 2, 200, 300, 100
    return args


def load_data(train_size: int, split_seed: int):
    digits = load_digits()
    x = digits.data.astype(np.float64) / 16.0
    y = digits.target
    x_tr, x_te, y_tr, y_te = train_test_split(x, y, train_size=train_size, stratify=y,
                                              random_state=split_seed)
    t = lambda a, dt: torch.as_tensor(a, dtype=dt)  # noqa: E731
    return (t(x_tr, torch.float64), t(y_tr, torch.long), t(x_te, torch.float64),
            t(y_te, torch.long))


def build(kind: str, hidden: int, seed: int, args: argparse.Namespace) -> nn.Module:
    gen = torch.Generator().manual_seed(seed)
    model = nn.Sequential(nn.Linear(64, hidden), nn.Tanh(), nn.Linear(hidden, 10)).double()
    with torch.no_grad():
        for layer in (model[0], model[2]):
            bound = 1.0 / math.sqrt(layer.in_features)  # torch's default init range
            layer.weight.uniform_(-bound, bound, generator=gen)
            layer.bias.uniform_(-bound, bound, generator=gen)
    if kind == "constrained":
        constrain(model, **{"0.weight": FixedNorm(args.hidden_norm),
                            "2.weight": FixedNorm(args.output_norm)})
    return model


def make_optimizer(model: nn.Module, n: int, temperature: float, seed: int,
                   args: argparse.Namespace) -> Langevin:
    # lr on the mean loss = lr_sum * n, since the force is n * grad(mean loss)
    return Langevin.from_sgd(model.parameters(), lr=args.lr / n, momentum=args.momentum,
                             temperature=temperature, weight_decay=args.prior_precision,
                             dataset_size=n, seed=seed)


def run_one(kind: str, seed: int, data, args: argparse.Namespace) -> dict:
    x_tr, y_tr, x_te, y_te = data
    n = x_tr.shape[0]
    model = build(kind, args.hidden, seed, args)
    loss_fn = nn.CrossEntropyLoss()

    def gradient() -> float:
        for p in model.parameters():
            p.grad = None
        loss = loss_fn(model(x_tr), y_tr)
        loss.backward()
        return loss.item()

    opt = make_optimizer(model, n, 0.0, seed, args)  # MAP: temperature 0
    for _ in range(args.train_steps):
        gradient()
        opt.step()
    single = predict_probabilities(model, x_te)

    map_state = copy.deepcopy(model.state_dict())
    out = {"single": classification_metrics(single, y_te), "by_temperature": {}}
    for temperature in args.temperatures:
        model.load_state_dict(map_state)
        opt = make_optimizer(model, n, temperature, seed, args)
        ens = PredictiveEnsemble(model, x_te, burn_in=args.burn_in, every=args.every)
        watch = [0, 1]  # two test images whose predicted true-class probability is traced
        trace = {"train_loss": [], "p_true_0": [], "p_true_1": []}
        for _ in range(args.sample_steps):
            loss = gradient()
            opt.step()
            if ens.observe():
                trace["train_loss"].append(loss)
                probs = predict_probabilities(model, x_te[watch])
                for j, i in enumerate(watch):
                    trace[f"p_true_{j}"].append(probs[j, y_te[i]].item())
        out["by_temperature"][temperature] = {
            "ensemble": classification_metrics(ens.mean_probs(), y_te),
            "last": classification_metrics(predict_probabilities(model, x_te), y_te),
            "samples": ens.num_samples, "trace": trace,
        }
    return out


def interval(values: list[float]) -> tuple[float, float]:
    """Mean and 95 % Student-t half-width over seeds (scipy.stats.t)."""
    a = np.asarray(values)
    if len(a) < 2:
        return float(a.mean()), float("nan")
    half = stats.t.ppf(0.975, len(a) - 1) * a.std(ddof=1) / math.sqrt(len(a))
    return float(a.mean()), float(half)


def plot(results: dict, temperatures: list[float], path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    colours = ["tab:blue", "tab:orange", "tab:green", "tab:red", "tab:purple"]
    columns = [("single (MAP)", "tab:gray", lambda r: r["single"])] + [
        (f"ensemble T={t:g}", colours[i % len(colours)],
         (lambda r, t=t: r["by_temperature"][t]["ensemble"]))
        for i, t in enumerate(temperatures)]
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.8))
    width = 0.7 / len(columns)
    for ax, metric in zip(axes, ("nll", "ece")):
        for k, kind in enumerate(KINDS):
            for j, (label, colour, get) in enumerate(columns):
                vals = [get(r)[metric] for r in results[kind]]
                mean, half = interval(vals)
                xpos = k + (j - (len(columns) - 1) / 2) * width
                ax.errorbar([xpos], [mean], yerr=[half], fmt="o", color=colour, capsize=4,
                            label=label if k == 0 else None)
                ax.plot([xpos] * len(vals), vals, ".", color=colour, alpha=0.4)
        ax.set_xticks(range(len(KINDS)), KINDS)
        ax.set_title(f"test {metric.upper()}: mean, 95% t-interval, seeds (dots)", fontsize=9)
        ax.legend(fontsize=8)
    fig.suptitle("sklearn digits, small training set: Langevin ensembles vs the single MAP "
                 "network", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, dpi=120)


def summarise(results: dict, temperatures: list[float], seeds: int) -> dict:
    summary: dict = {}
    for kind in KINDS:
        rows = results[kind]
        summary[kind] = {}
        for t in temperatures:
            entry: dict = {}
            for metric in METRICS:
                single = [r["single"][metric] for r in rows]
                ens = [r["by_temperature"][t]["ensemble"][metric] for r in rows]
                entry[metric] = {
                    "single": interval(single), "ensemble": interval(ens),
                    "ensemble_minus_single": interval([e - s for e, s in zip(ens, single)]),
                }
            traces = {name: np.array([r["by_temperature"][t]["trace"][name] for r in rows])
                      for name in rows[0]["by_temperature"][t]["trace"]}
            diag = mixing_diagnostics(traces, warn=False) if seeds >= 2 else {}
            entry["mixing"] = {name: {"rhat": d.rhat, "ess": d.ess,
                                      "draws": d.chains * d.draws_per_chain}
                               for name, d in diag.items()}
            summary[kind][str(t)] = entry
    return summary


def main() -> None:
    args = parse_args()
    torch.set_num_threads(1)  # tiny model: threads only contend on a shared machine
    args.out.mkdir(parents=True, exist_ok=True)
    data = load_data(args.train_size, args.split_seed)
    print(f"train {data[0].shape[0]}, test {data[2].shape[0]} images (sklearn digits)")
    results: dict = {kind: [] for kind in KINDS}
    for kind in KINDS:
        for seed in range(args.seeds):
            t0 = time.perf_counter()
            r = run_one(kind, seed, data, args)
            results[kind].append(r)
            line = (f"{kind:13s} seed {seed}: single nll {r['single']['nll']:.3f} ece "
                    f"{r['single']['ece']:.3f} acc {r['single']['accuracy']:.3f}")
            for t, e in r["by_temperature"].items():
                m = e["ensemble"]
                line += (f" | T={t:g} ens nll {m['nll']:.3f} ece {m['ece']:.3f} acc "
                         f"{m['accuracy']:.3f}")
            print(line + f" ({time.perf_counter() - t0:.0f} s)", flush=True)
    summary = summarise(results, args.temperatures, args.seeds)
    print("\nmean over seeds [95% t half-width]; difference is paired, ensemble - single")
    for kind in KINDS:
        for t in args.temperatures:
            entry = summary[kind][str(t)]
            for metric in METRICS:
                s = entry[metric]
                print(f"{kind:13s} T={t:<5g} {metric:8s} single {s['single'][0]:.4f} "
                      f"[{s['single'][1]:.4f}]  ensemble {s['ensemble'][0]:.4f} "
                      f"[{s['ensemble'][1]:.4f}]  diff {s['ensemble_minus_single'][0]:+.4f} "
                      f"[{s['ensemble_minus_single'][1]:.4f}]")
            for name, d in entry["mixing"].items():
                print(f"{kind:13s} T={t:<5g} mixing {name:10s} R-hat {d['rhat']:.3f}  ESS "
                      f"{d['ess']:.0f} of {d['draws']} draws")
    per_seed = {k: [{"single": r["single"],
                     "by_temperature": {str(t): {w: e[w] for w in ("ensemble", "last", "samples")}
                                        for t, e in r["by_temperature"].items()}}
                    for r in v] for k, v in results.items()}
    (args.out / "results.json").write_text(json.dumps(
        {"args": {k: str(v) for k, v in vars(args).items()}, "summary": summary,
         "per_seed": per_seed}, indent=1))
    plot(results, args.temperatures, args.out / "ensemble_digits.png")
    print(f"wrote {args.out / 'results.json'} and {args.out / 'ensemble_digits.png'}")


if __name__ == "__main__":
    main()
