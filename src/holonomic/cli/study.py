"""``holonomic study``: compare constraint arms against weight decay on a data set."""

from __future__ import annotations

import argparse
import sys
import time

__all__ = ["register"]

_DESCRIPTION = """\
Train one model per (arm, strength, seed) with holonomic.Langevin under one shared budget,
choose each arm's strength on the validation split, and compare the chosen settings against
weight decay on the test split, paired by seed (95% t interval, Wilcoxon signed-rank test).
Writes results.csv, summary.json, report.md and PNG plots into --out. Reruns resume: runs
already stored under OUT/runs are skipped.
"""


def register(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """Add the ``study`` subcommand to ``subparsers`` and set its ``func``."""
    parser = subparsers.add_parser(
        "study", help="compare constraints against weight decay (train, select, report)",
        description=_DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("config", nargs="?", metavar="FILE.toml",
                        help="study file (see examples/digits.toml)")
    parser.add_argument("--demo", action="store_true",
                        help="run the built-in demo study on invented data (about a minute)")
    parser.add_argument("--out", required=True, metavar="DIR",
                        help="output directory (created; reused to resume)")
    parser.add_argument("--workers", type=int, default=1, metavar="N",
                        help="parallel worker processes (default 1)")
    parser.add_argument("--quiet", action="store_true",
                        help="no progress bar; print only the output location (for logs)")
    parser.set_defaults(func=_main)
    return parser


def _main(args: argparse.Namespace) -> int:
    from holonomic.study import StudyConfigError, demo_config, load_config, run_study

    def error(message: str) -> int:
        print(f"holonomic study: error: {message}", file=sys.stderr)
        return 2

    if args.demo == (args.config is not None):
        return error("give either a study file or --demo (exactly one)")
    if args.workers < 1:
        return error(f"--workers must be >= 1, got {args.workers}")
    started = time.perf_counter()
    try:
        config = demo_config() if args.demo else load_config(args.config)
        summary = run_study(config, args.out, workers=args.workers, progress=not args.quiet)
    except StudyConfigError as exc:
        return error(str(exc))
    except KeyboardInterrupt:
        print("\nholonomic study: interrupted; finished runs are saved under "
              f"{args.out}/runs; rerun the same command to resume", file=sys.stderr)
        return 130
    elapsed = time.perf_counter() - started
    runs = summary["runs"]
    print(f"study {config.name}: {runs['ok']}/{runs['total']} runs finished in {elapsed:.1f} s; "
          f"report: {args.out}/report.md")
    return 0
