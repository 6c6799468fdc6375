"""``holonomic study``: compare constraint arms against a baseline arm (weight decay by default)."""

from __future__ import annotations

import argparse
import contextlib
import sys
import time
import warnings

__all__ = ["register"]

_DESCRIPTION = """\
Train one model per (arm, strength, seed) with holonomic.Langevin under one shared budget,
choose each arm's strength on the validation split, and compare the chosen settings against
the baseline arm (study.baseline, weight decay by default) on the test split, paired by seed
(95% t interval, Wilcoxon signed-rank test with Holm's adjustment over the arms).
Writes results.csv, summary.json, report.md and PNG plots into --out, and one audit per run
under OUT/audits. Reruns resume: runs already stored under OUT/runs are skipped.

On a cluster: run `--shard i/n` on each machine against a shared --out (i is 0-based,
0 <= i < n; run number k of the study's canonical run list belongs to shard k mod n), then
`--report-only` once all shards are done. Shards write only their own runs; --report-only
refuses, with exit status 1, while any run is missing, and names the missing runs.
See docs/cluster.md.

A refused command changes nothing on disk: the study file, the data, the runs already in
--out and the model are checked before --out is created or written to. With --workers N
the workers end with this command, however it ends.
"""

_EPILOG = """exit statuses:
  0    success (for --shard: that shard's runs are done)
  1    --report-only: the study is incomplete (the missing runs are named); nothing written
  2    usage, study file, data, model factory or output errors (the message says what to
       change; a full disk: free space and rerun the same command, finished runs are kept)
  130  interrupted (Ctrl-C); finished runs are kept, rerun the same command to resume
  143  terminated (SIGTERM; 129 for SIGHUP); finished runs are kept, rerun to resume
"""


def register(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """Add the ``study`` subcommand to ``subparsers`` and set its ``func``."""
    parser = subparsers.add_parser(
        "study",
        help="compare constraints against weight decay or another baseline arm (train, select, report)",
        description=_DESCRIPTION, epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("config", nargs="?", metavar="FILE.toml",
                        help="study file (see examples/digits.toml)")
    parser.add_argument("--demo", action="store_true",
                        help="run the built-in demo study on invented data (about 20 s on 2 cores)")
    parser.add_argument("--out", required=True, metavar="DIR",
                        help="output directory (created; reused to resume)")
    parser.add_argument("--workers", type=int, default=1, metavar="N",
                        help="parallel worker processes (default 1)")
    parser.add_argument("--shard", metavar="I/N",
                        help="run only shard I of N (0-based: 0 <= I < N), e.g. "
                             "$SLURM_ARRAY_TASK_ID/$SLURM_ARRAY_TASK_COUNT; writes no report")
    parser.add_argument("--report-only", action="store_true",
                        help="train nothing: merge the finished runs in --out into the report "
                             "(exit status 1, naming them, if runs are missing)")
    parser.add_argument("--rerun-invalid", action="store_true",
                        help="move run files in --out that are not valid run records (damaged, "
                             "edited, foreign) aside into OUT/invalid/<time>/ with their audit "
                             "and weights (never deleted; each move is printed) and redo those "
                             "runs; without it such a file stops the study with an error")
    parser.add_argument("--no-plots", action="store_true", help="write no PNG plots")
    parser.add_argument("--quiet", action="store_true",
                        help="no progress bar; print only the output location (for logs)")
    parser.set_defaults(func=_main)
    return parser


@contextlib.contextmanager
def _one_line_warnings():
    """Show warnings as ``holonomic study: warning: MESSAGE`` (no source file or line of
    code) while the command runs."""
    previous = warnings.showwarning

    def show(message, category, filename, lineno, file=None, line=None):
        print(f"holonomic study: warning: {message}", file=sys.stderr if file is None else file)

    warnings.showwarning = show
    try:
        yield
    finally:
        warnings.showwarning = previous


def _stored_keys(config, out: str, shard) -> set[str]:
    """Keys of the runs of this command (the study, or one shard of it) already stored,
    valid, under ``out`` (they are reused, not trained)."""
    from holonomic.study import storage
    from holonomic.study.execution import halving_rung
    from holonomic.study.runner import plan_runs
    from holonomic.study.sharding import shard_runs

    specs = plan_runs(config)
    if config.halving is not None:  # its rung runs are reused too
        specs = halving_rung(config) + specs
    if shard is not None:
        specs = shard_runs(specs, *shard)
    try:
        return set(storage.read_records(out, keys=[s.key for s in specs], invalid=[]))
    except OSError:
        return set()


def _counts(runs: dict, reused: int, verb: str) -> str:
    """``"10/10 runs finished (0 trained now, 10 reused)"``."""
    trained = max(0, runs["total"] - reused)
    return (f"{runs['ok']}/{runs['total']} runs {verb} ({trained} trained now, {reused} "
            "reused)")


def _main(args: argparse.Namespace) -> int:
    with _one_line_warnings():
        return _run(args)


def _run(args: argparse.Namespace) -> int:
    from holonomic.study import (
        IncompleteStudyError,
        StudyConfigError,
        demo_config,
        load_config,
        report_study,
        run_study,
    )
    from holonomic.study.execution import StudyTerminated, terminate_on_signals, usable_cpus
    from holonomic.study.sharding import ShardError, parse_shard

    def error(message: str, status: int = 2) -> int:
        print(f"holonomic study: error: {message}", file=sys.stderr)
        return status

    if args.demo == (args.config is not None):
        return error("give either a study file or --demo (exactly one)")
    if args.workers < 1:
        return error(f"--workers must be >= 1, got {args.workers}")
    if args.report_only and args.shard is not None:
        return error("--report-only merges every shard's runs; drop --shard")
    if args.report_only and args.rerun_invalid:
        return error("--report-only trains nothing, so it cannot redo invalid runs; run the "
                     "study with --rerun-invalid first (without --report-only)")
    shard = None
    if args.shard is not None:
        try:
            shard = parse_shard(args.shard)
        except ShardError as exc:
            return error(str(exc))
    cpus = usable_cpus()
    if args.workers > cpus and not args.report_only:
        print(f"holonomic study: warning: --workers {args.workers} is more than the {cpus} "
              "CPU(s) this process may use; the workers will share them (slower, same results)",
              file=sys.stderr)
    started = time.perf_counter()
    try:
        with terminate_on_signals():
            config = demo_config() if args.demo else load_config(args.config)
            reused = 0 if args.report_only else len(_stored_keys(config, args.out, shard))
            if args.report_only:
                summary = report_study(config, args.out, plots=not args.no_plots)
            else:
                summary = run_study(config, args.out, workers=args.workers,
                                    progress=not args.quiet, plots=not args.no_plots,
                                    shard=shard, rerun_invalid=args.rerun_invalid)
    except StudyConfigError as exc:
        return error(str(exc))
    except IncompleteStudyError as exc:
        return error(f"no report written: {exc}", status=1)
    except KeyboardInterrupt:
        print("\nholonomic study: interrupted; finished runs are saved under "
              f"{args.out}/runs; rerun the same command to resume", file=sys.stderr)
        return 130
    except StudyTerminated as exc:
        print(f"\nholonomic study: {exc}; finished runs are saved under {args.out}/runs; "
              "rerun the same command to resume", file=sys.stderr)
        return exc.exit_status
    elapsed = time.perf_counter() - started
    runs = summary["runs"]
    if shard is not None:
        print(f"study {config.name}, shard {shard[0]}/{shard[1]}: "
              f"{_counts(runs, reused, 'finished')} in {elapsed:.1f} s (stored under "
              f"{args.out}/runs); when every "
              f"shard is done: holonomic study ... --out {args.out} --report-only")
        return 0
    alarms = sum(arm["runs_with_alarms"] for arm in summary["audit"].values())
    counts = (f"{runs['ok']}/{runs['total']} runs merged" if args.report_only
              else _counts(runs, reused, "finished"))
    print(f"study {config.name}: {counts} in {elapsed:.1f} s; "
          f"{alarms} with audit alarms; report: {args.out}/report.md")
    return 0
