"""Benchmark suite: ``python -m holonomic.bench`` (see :mod:`holonomic.bench.suite`)."""

from holonomic.bench.suite import main, run_suite

__all__ = ["main", "run_suite"]
