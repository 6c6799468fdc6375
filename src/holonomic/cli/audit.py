"""``holonomic audit FILE.jsonl``: summarise an audit file; exit 1 if an alarm fired, 2 on bad input."""

from __future__ import annotations

import argparse
import os
import sys
from typing import Any

__all__ = ["register", "run"]

_PLOT_SUFFIXES = (".png", ".pdf", ".svg")  # holonomic.audit.PLOT_SUFFIXES (not imported: fast --help)


def register(subparsers: Any) -> argparse.ArgumentParser:
    """Add the ``audit`` subcommand to ``subparsers`` (sets ``func``)."""
    parser = subparsers.add_parser(
        "audit",
        help="summarise an audit JSON Lines file (exit status 1 if an alarm fired, 2 on bad input)",
        description="Print a summary table of an audit file written by holonomic.Audit: constraint "
                    "residuals, momentum tangency, projection iterations and kinetic temperature "
                    "per parameter and param group, and the alarms. The file is read in one "
                    "streaming pass with constant memory, whatever its size.",
        epilog="Exit status: 0 no alarm; 1 alarms found (the file records at least one alarm); "
               "2 bad input or usage: a missing, unreadable or malformed file (the message names "
               "the line and the field), a directory given as FILE, or a --plot path with an "
               "unknown suffix or in a folder that does not exist. No traceback is printed for "
               "status 2, so CI can tell a bad file from an alarm.",
    )
    parser.add_argument("file", metavar="FILE.jsonl", help="audit file (JSON Lines)")
    parser.add_argument("--plot", metavar="OUT", default=None,
                        help="also plot residual and kinetic temperature against step, to exactly "
                             f"this path; the suffix chooses the format: {', '.join(_PLOT_SUFFIXES)}. "
                             "The folder must exist.")
    parser.set_defaults(func=run)
    return parser


def _error(message: str) -> int:
    print(f"holonomic audit: error: {message}", file=sys.stderr)
    return 2


def run(args: argparse.Namespace) -> int:
    from holonomic.audit import AuditDigest, AuditFileError, check_plot_path, format_summary
    from holonomic.audit.report import DEFAULT_PLOT_POINTS

    if args.plot is not None:
        try:
            plot_path = check_plot_path(args.plot)
        except ValueError as exc:
            return _error(str(exc))
        if os.path.exists(args.file) and plot_path.exists() and os.path.samefile(plot_path, args.file):
            return _error(f"--plot {args.plot} is the audit file itself; choose another name")
    try:
        digest = AuditDigest.from_file(args.file, plot_points=DEFAULT_PLOT_POINTS if args.plot else None)
    except AuditFileError as exc:
        return _error(str(exc))
    summary = digest.summary()
    print(format_summary(summary))
    if args.plot is not None:
        try:
            written = digest.plot(args.plot)
        except (OSError, ValueError) as exc:
            return _error(f"--plot {args.plot}: cannot write the plot ({exc})")
        print(f"plot written to {written}")
    return 1 if summary["alarms"] else 0
