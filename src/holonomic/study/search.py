"""Trials of a study: the points of each arm's search space that the study trains.

Every arm with a non-empty search space gets the same number of trials (``study.trials``:
an equal tuning budget); an arm whose hyperparameters are all fixed gets one. The points:

* every searched key a list of values -> the full grid (its size must equal
  ``study.trials``; checked when the study file is read), in the order of the lists
  (the first key varies slowest, keys in sorted order);
* any key a range ``{low, high, scale}`` -> ``trials`` points of a scrambled
  low-discrepancy sequence in the unit cube, one dimension per searched key in sorted key
  order (:class:`scipy.stats.qmc.Sobol` or :class:`scipy.stats.qmc.Halton`, seeded with
  the study's first seed), mapped per key: a list key takes ``values[floor(u * len)]``, a
  range key ``low + u (high - low)`` (``scale = "linear"``) or
  ``exp(log low + u (log high - log low))`` (``scale = "log"``).

This module only samples; :mod:`holonomic.study.config` parses the spaces and stores each
arm's trials (``ArmConfig.trials``), so :func:`plan_trials` reads them from the config.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Mapping, Sequence

if TYPE_CHECKING:
    from holonomic.study.config import StudyConfig

__all__ = ["SEARCH_METHODS", "SCALES", "Range", "Trial", "grid_points", "plan_trials",
           "sample_points", "search_points"]

#: Values of ``study.search``: the scipy.stats.qmc sequence used for ranges.
SEARCH_METHODS = ("sobol", "halton")
#: Values of a range's ``scale``.
SCALES = ("log", "linear")


@dataclass(frozen=True)
class Range:
    """A searched range ``[low, high]`` on a ``"log"`` or ``"linear"`` scale."""

    low: float
    high: float
    scale: str = "log"

    def at(self, u: float) -> float:
        """The value at ``u`` in ``[0, 1)`` of the unit interval."""
        if self.scale == "log":
            return math.exp(math.log(self.low) + u * (math.log(self.high) - math.log(self.low)))
        return self.low + u * (self.high - self.low)

    def to_dict(self) -> dict[str, float | str]:
        return {"low": self.low, "high": self.high, "scale": self.scale}


@dataclass(frozen=True)
class Trial:
    """One point of an arm's search space.

    Attributes:
        arm: the arm's name.
        index: position among the arm's trials (0-based; ``trial`` in run records).
        settings: the values this trial sets (searched keys, and the arm's fixed values);
            the runner fills in the rest from the budget.
        searched: the keys that vary across the arm's trials (sorted).
    """

    arm: str
    index: int
    settings: Mapping[str, float] = field(default_factory=dict)
    searched: tuple[str, ...] = ()


def grid_points(space: Mapping[str, Sequence[float]]) -> list[dict[str, float]]:
    """Every combination of the listed values (keys in sorted order, the first slowest)."""
    keys = sorted(space)
    return [dict(zip(keys, (float(v) for v in values)))
            for values in itertools.product(*(space[k] for k in keys))]


def sample_points(space: Mapping[str, Sequence[float] | Range], n: int, method: str,
                  seed: int) -> list[dict[str, float]]:
    """``n`` points of a scrambled Sobol or Halton sequence (``scipy.stats.qmc``, seeded
    with ``seed``) mapped onto ``space`` (one dimension per key, in sorted key order)."""
    from scipy.stats import qmc

    if method not in SEARCH_METHODS:
        raise ValueError(f"method must be one of {', '.join(SEARCH_METHODS)}, got {method!r}")
    keys = sorted(space)
    kind = qmc.Sobol if method == "sobol" else qmc.Halton
    engine = kind(d=len(keys), scramble=True, seed=int(seed))
    if method == "sobol":  # Sobol's balance properties hold for powers of two; n need not be one
        m = max(0, math.ceil(math.log2(max(n, 1))))
        unit = engine.random_base2(m)[:n]
    else:
        unit = engine.random(n)
    points = []
    for row in unit:
        point = {}
        for key, u in zip(keys, row):
            where = space[key]
            if isinstance(where, Range):
                point[key] = float(where.at(float(u)))
            else:
                point[key] = float(where[min(int(u * len(where)), len(where) - 1)])
        points.append(point)
    return points


def search_points(space: Mapping[str, Sequence[float] | Range], trials: int, method: str,
                  seed: int) -> list[dict[str, float]]:
    """The trial points of one arm: ``[{}]`` for an empty space, the full grid when every
    key is a list, else ``trials`` points of :func:`sample_points`."""
    if not space:
        return [{}]
    if all(not isinstance(v, Range) for v in space.values()):
        return grid_points(space)  # type: ignore[arg-type]
    return sample_points(space, trials, method, seed)


def plan_trials(config: "StudyConfig") -> dict[str, list[Trial]]:
    """Every arm's trials, in arm order (as drawn when the study file was read)."""
    return {arm.name: list(arm.trials) for arm in config.arms}
