"""``holonomic audit FILE.jsonl``: summarise an audit file; exit 1 if an alarm fired."""

from __future__ import annotations

import argparse
import sys
from typing import Any

__all__ = ["register", "run"]


def register(subparsers: Any) -> argparse.ArgumentParser:
    """Add the ``audit`` subcommand to ``subparsers`` (sets ``func``)."""
    parser = subparsers.add_parser(
        "audit",
        help="summarise an audit JSON Lines file (exit status 1 if an alarm fired)",
        description="Print a summary table of an audit file written by holonomic.Audit: constraint "
                    "residuals, momentum tangency, projection iterations and kinetic temperature "
                    "per parameter and param group, and the alarms. Exit status: 0 no alarm, "
                    "1 an alarm fired, 2 the file cannot be read.",
    )
    parser.add_argument("file", metavar="FILE.jsonl", help="audit file (JSON Lines)")
    parser.add_argument("--plot", metavar="OUT.png", default=None,
                        help="also plot residual and kinetic temperature against step")
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    from holonomic.audit import AuditFileError, format_summary, plot_audit, read_audit, summarize

    try:
        log = read_audit(args.file)
    except AuditFileError as exc:
        print(f"holonomic audit: {exc}", file=sys.stderr)
        return 2
    summary = summarize(log)
    print(format_summary(summary))
    if args.plot:
        plot_audit(log, args.plot)
        print(f"plot written to {args.plot}")
    return 1 if summary["alarms"] else 0
