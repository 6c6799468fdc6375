"""Splitting a study's runs between machines: ``--shard i/n`` and merging the results.

Partition: the study's runs in their canonical order (:func:`runner.plan_runs`: arm, grid
point, seed) are numbered from 0; shard ``i`` of ``n`` runs the runs whose number ``k``
satisfies ``k mod n == i``. ``i`` is **0-based**: ``0 <= i < n`` (Slurm ``--array=0-(n-1)``
with ``--shard $SLURM_ARRAY_TASK_ID/$SLURM_ARRAY_TASK_COUNT``). Every run belongs to exactly
one shard, and a run's files (``runs/<key>.json``, ``audits/<key>.jsonl``) are named by the
run alone, so shards never write the same file; dealing the runs round-robin gives every
shard a mix of arms and strengths (similar running times).

The split depends on the run list, so every shard must run the same study file with the
same ``n``; ``DIR/study.json`` (``storage.write_study_record``) enforces that.
"""

from __future__ import annotations

import re
from typing import Sequence, TypeVar

__all__ = ["ShardError", "missing_runs_message", "parse_shard", "shard_runs"]

T = TypeVar("T")

_SHARD = re.compile(r"\s*(-?\d+)\s*/\s*(-?\d+)\s*")


class ShardError(ValueError):
    """A ``--shard`` value that cannot be used; the message says what to give instead."""


def parse_shard(text: str) -> tuple[int, int]:
    """Parse ``"i/n"`` (0-based ``i``, ``0 <= i < n``) into ``(i, n)``.

    Raises:
        ShardError: for anything else, e.g. ``"3/3"`` (``i`` is 0-based), ``"0/0"``,
            ``"a/b"`` or ``"2"``.
    """
    match = _SHARD.fullmatch(str(text))
    if match is None:
        raise ShardError(f"--shard must look like i/n with integers, 0 <= i < n (e.g. 0/3, "
                         f"1/3, 2/3), got {text!r}")
    index, count = int(match.group(1)), int(match.group(2))
    if count < 1:
        raise ShardError(f"--shard i/n needs n >= 1 shards, got {text!r}")
    if not 0 <= index < count:
        hint = (" (i is 0-based: the shards of 3 are 0/3, 1/3, 2/3; with a 1-based job array "
                "pass $((SLURM_ARRAY_TASK_ID - 1))/n)" if index == count else "")
        raise ShardError(f"--shard i/n needs 0 <= i < n, got {text!r}{hint}")
    return index, count


def shard_runs(runs: Sequence[T], index: int, count: int) -> list[T]:
    """The runs of shard ``index`` of ``count``: every ``count``-th run from ``index``."""
    if count < 1 or not 0 <= index < count:
        raise ShardError(f"shard index must satisfy 0 <= index < count, got {index}/{count}")
    return list(runs[index::count])


def missing_runs_message(missing: Sequence[tuple[int, str]], total: int, shown: int = 10) -> str:
    """Say which runs (plan number, key) are not finished and which shard owns each."""
    listed = ", ".join(f"{key} (#{k})" for k, key in missing[:shown])
    more = f" and {len(missing) - shown} more" if len(missing) > shown else ""
    return (f"{len(missing)} of {total} runs are not finished: {listed}{more}. Run #k belongs "
            "to shard k mod n of an i/n split; rerun the shards that own them (the same "
            "command resumes: finished runs are skipped), or run the study without --shard "
            "to finish them here, then --report-only again")
