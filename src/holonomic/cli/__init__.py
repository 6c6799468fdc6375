"""The ``holonomic`` command line.

Each subcommand lives in its own module of this package and exposes
``register(subparsers)`` (adds its parser, sets ``func``) so that the entry
point below stays a thin dispatcher.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from typing import Sequence

# Modules that provide subcommands; each has ``register(subparsers)``.
_SUBCOMMAND_MODULES = ("holonomic.cli.study", "holonomic.cli.audit")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="holonomic",
        description="Constrained Langevin training, studies and audits.",
        epilog="Exit statuses: 0 success, 2 usage or input errors (a message, no traceback), "
               "130 interrupted; each subcommand's help lists its own (holonomic study --help).",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in _SUBCOMMAND_MODULES:
        try:
            module = importlib.import_module(name)
        except ModuleNotFoundError as exc:  # subcommand not built yet
            if exc.name != name:
                raise
            continue
        module.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status (argparse usage errors exit with 2)."""
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if getattr(args, "func", None) is None:
            parser.print_help(sys.stderr)
            return 2
        return int(args.func(args) or 0)
    except KeyboardInterrupt:  # Ctrl-C before a subcommand handles it (e.g. while importing)
        print("\nholonomic: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
