"""Each arm's chosen trial, its budget and where its choice lies in what was searched.

Plain data in, plain data out: every function here takes run records (``{key: dict}`` or
``{key: RunRecord}``, :mod:`holonomic.study.records`) and finds an arm's trials from the
records themselves, grouped by ``(arm, trial)``; nothing is looked up in the study file.

Protocol: among the arm's full-budget runs (``budget_fraction == 1``; successive-halving
rung runs are never used for the choice), the trial with the best mean of the selection
metric (a ``val_<metric>``) over seeds; larger or smaller is better as the metric says; ties
go to the lower trial index. A trial with a failed or diverged seed, a non-finite
selection metric, or fewer seeds than the arm's other full trials is not eligible.
"""

from __future__ import annotations

import math
from collections import defaultdict
from dataclasses import dataclass, field, replace
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from holonomic.study.records import Recipe, RunRecord, as_records
from holonomic.study.tasks import Task, recorded_n_classes

__all__ = ["ArmBudget", "Edge", "Rung", "Selection", "StudyMetrics", "TrialRuns",
           "arm_budget", "edge_flags", "group_trials", "tie_edges", "read_metrics", "select_trials",
           "searched_keys"]


@dataclass(frozen=True)
class StudyMetrics:
    """What a study's records hold and what the report does with it.

    Attributes:
        task: the task rebuilt from the records (``n_classes`` from the record, or when
            it has none 2 if it holds ROC AUC and 3 standing for "more than two"
            otherwise; only the metric names and directions are used).
        metrics: per-split metric names found in the records, in the task's order; the
            first is the headline metric (accuracy, or RMSE for regression).
        selection: the selection metric, ``val_<metric>``.
        names: every name of the records' ``metrics``, in record order.
    """

    task: Task
    metrics: tuple[str, ...]
    selection: str
    names: tuple[str, ...]

    @property
    def headline(self) -> str:
        return self.metrics[0]

    @property
    def is_regression(self) -> bool:
        return self.task.is_regression

    @property
    def selection_base(self) -> str:
        return self.selection[len("val_"):]

    @property
    def selection_larger_is_better(self) -> bool:
        return Task.higher_is_better(self.selection_base)

    def higher_is_better(self, metric: str) -> bool:
        """Direction of a per-split metric name (without prefix)."""
        return Task.higher_is_better(metric)

    @property
    def compared(self) -> tuple[str, ...]:
        """Metrics compared across arms (paired by seed): the test headline metric, R^2
        for regression, the selection metric's test counterpart when it differs, the gap
        in the headline metric and the gap in loss."""
        names = [f"test_{self.headline}"]
        if self.is_regression and "r2" in self.metrics:
            names.append("test_r2")
        names.append(f"test_{self.selection_base}")
        names += [f"gap_{self.headline}", "gap_loss"]
        return tuple(n for i, n in enumerate(names) if n in self.names and n not in names[:i])

    @property
    def summarised(self) -> tuple[str, ...]:
        """Per-arm metrics summarised for the chosen settings (the report's test table)."""
        names = [f"train_{self.headline}"]
        names += [f"test_{m}" for m in self.metrics if m != "loss"]
        names += [f"gap_{self.headline}", "gap_loss", "ece_test", "mean_row_norm_hidden",
                  "constraint_residual"]
        return tuple(n for i, n in enumerate(names) if n in self.names and n not in names[:i])


def read_metrics(records: Mapping[str, Any], selection: str | None = None,
                 first: RunRecord | None = None) -> StudyMetrics:
    """The task and metric names of a study, read from its records (``first``, else the
    first finished record), and the selection metric ``selection`` (None: the task's default,
    ``val_<headline>``).

    Raises:
        ValueError: no records, or a record that holds none of its task's metrics, or a
            ``selection`` that is not a validation metric of the records.
    """
    typed = as_records(records)
    if first is None:
        if not typed:
            raise ValueError("no run records: nothing to report")
        # a finished run holds every metric of its task; a failed one may hold none
        first = next((r for r in typed.values() if r.ok), next(iter(typed.values())))
    names = tuple(first.metrics)
    name = first.task
    n_classes = int(recorded_n_classes(name, first.n_classes or None, names))
    task = Task(name, n_classes)
    metrics = tuple(m for m in task.metrics if f"test_{m}" in names)
    if not metrics:
        raise ValueError(f"run {first.key!r} holds none of the {name} metrics "
                         f"{', '.join('test_' + m for m in task.metrics)}")
    chosen = f"val_{metrics[0]}" if selection is None else selection
    allowed = [f"val_{m}" for m in metrics]
    if chosen not in allowed:
        raise ValueError(f"{chosen!r} is not a validation metric of this {name} study's "
                         f"runs; allowed: {', '.join(allowed)}")
    return StudyMetrics(task, metrics, chosen, names)


@dataclass(frozen=True)
class TrialRuns:
    """The full-budget runs of one trial of an arm, in seed order."""

    arm: str
    trial: int
    settings: dict[str, Any]
    runs: tuple[RunRecord, ...]

    @property
    def seeds(self) -> tuple[int, ...]:
        return tuple(r.seed for r in self.runs)

    @property
    def strength(self) -> float:
        return float(self.settings.get("strength", 0.0))

    def values(self, metric: str) -> np.ndarray:
        """``metric`` per seed (NaN where missing)."""
        return np.array([r.metric(metric) for r in self.runs], dtype=np.float64)

    def mean(self, metric: str) -> float:
        """Mean of ``metric`` over seeds; NaN when a run failed or a value is not finite."""
        values = self.values(metric)
        if not self.runs or any(not r.ok for r in self.runs) or not np.isfinite(values).all():
            return math.nan
        return float(values.mean())


def _arm_order(records: Iterable[RunRecord], arms: Sequence[str] | None) -> list[str]:
    seen = list(dict.fromkeys(r.arm for r in records))
    if arms is None:
        return seen
    return list(arms) + [a for a in seen if a not in arms]


def group_trials(records: Mapping[str, Any], full_only: bool = True
                 ) -> dict[str, dict[int, TrialRuns]]:
    """``{arm: {trial: TrialRuns}}`` in record order of arms and trial order, from the
    records' own ``arm``, ``trial`` and ``seed``; only full-budget runs unless
    ``full_only`` is false (then a trial's runs are every run of it, rung runs included).

    Raises:
        ValueError: two full runs of the same arm, trial and seed (naming their keys).
    """
    typed = as_records(records)
    found: dict[str, dict[int, dict[int, RunRecord]]] = defaultdict(dict)
    for record in typed.values():
        if full_only and not record.full:
            continue
        runs = found[record.arm].setdefault(record.trial, {})
        slot = (record.seed, record.budget_fraction) if not full_only else record.seed
        if slot in runs:
            raise ValueError(f"runs {runs[slot].key!r} and {record.key!r} are both arm "
                             f"{record.arm!r}, trial {record.trial}, seed {record.seed}")
        runs[slot] = record
    out: dict[str, dict[int, TrialRuns]] = {}
    for arm, trials in found.items():
        out[arm] = {}
        for trial in sorted(trials):
            runs = tuple(trials[trial][s] for s in sorted(trials[trial]))
            out[arm][trial] = TrialRuns(arm, trial, dict(runs[0].settings), runs)
    return out


def searched_keys(records: Iterable[RunRecord]) -> tuple[str, ...]:
    """The settings an arm searched: those its records list in ``searched`` and those whose
    value varies across its trials (records made before recipes list none), sorted."""
    records = list(records)
    keys = {k for r in records for k in r.searched}
    values: dict[str, set[float]] = defaultdict(set)
    for r in records:
        for k, v in r.settings.items():
            values[k].add(float(v))
    keys |= {k for k, v in values.items() if len(v) > 1}
    return tuple(sorted(keys))


@dataclass(frozen=True)
class Edge:
    """A chosen value at the edge of what an arm tried for ``key``: the ``side``
    (``"smallest"`` or ``"largest"``) of the values tried, from ``low`` to ``high``."""

    key: str
    value: float
    side: str
    low: float
    high: float
    #: The validation means of the trials at the two ends (``low`` and ``high``) are all
    #: equal: the setting made no difference over the range tried (:func:`tie_edges`).
    tied: bool = False


def edge_flags(tried: Iterable[Mapping[str, Any]], chosen: Mapping[str, Any],
               keys: Iterable[str]) -> tuple[Edge, ...]:
    """The keys whose chosen value is the smallest or largest value tried for it (over the
    settings ``tried``, one mapping per trial), among ``keys``; a key tried at one value
    only is not flagged (nothing was searched)."""
    tried = list(tried)
    out = []
    for key in keys:
        values = sorted({float(t[key]) for t in tried if key in t})
        if len(values) < 2 or key not in chosen:
            continue
        value = float(chosen[key])
        if value in (values[0], values[-1]):
            out.append(Edge(key, value, "smallest" if value == values[0] else "largest",
                            values[0], values[-1]))
    return tuple(out)


def tie_edges(edges: Iterable[Edge], trials: Sequence[Any], means: Sequence[float]
              ) -> tuple[Edge, ...]:
    """``edges`` with ``tied`` set where the validation means (``means``, one per trial of
    ``trials``, which have ``settings``) of every trial at the smallest and the largest value
    of the key are finite and equal: the setting made no difference there (e.g. a clip that
    never binds), so the edge says nothing about where to search."""
    out = []
    for edge in edges:
        at = {end: [float(m) for t, m in zip(trials, means)
                    if edge.key in t.settings and float(t.settings[edge.key]) == end]
              for end in (edge.low, edge.high)}
        ends = at[edge.low] + at[edge.high]
        tied = (edge.low != edge.high and all(at.values())  # a mean at each end
                and all(math.isfinite(m) for m in ends)
                and max(ends) - min(ends) <= 1e-12 * max(1.0, abs(max(ends))))
        out.append(replace(edge, tied=bool(tied)))
    return tuple(out)


@dataclass(frozen=True)
class Rung:
    """A successive-halving rung: ``trials`` trials were trained for ``fraction`` of the
    budget and ``dropped`` of them were not taken further."""

    fraction: float
    trials: int
    dropped: int


@dataclass(frozen=True)
class ArmBudget:
    """What an arm was given: ``trials`` trained at the full budget (``trials_started``
    counts those started at any rung), ``seeds``, gradient evaluations per full run (the
    distinct values) and in total over every run of the arm (rung runs included; None
    when a record lacks the count), and the halving ``rungs`` (none without halving)."""

    trials: int
    trials_started: int
    seeds: tuple[int, ...]
    grad_evals_per_run: tuple[int, ...]
    grad_evals_total: int | None
    rungs: tuple[Rung, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {"trials": self.trials, "trials_started": self.trials_started,
                "seeds": list(self.seeds), "grad_evals_per_run": list(self.grad_evals_per_run),
                "grad_evals_total": self.grad_evals_total,
                "halving": [{"fraction": r.fraction, "trials": r.trials, "dropped": r.dropped}
                            for r in self.rungs]}


def arm_budget(records: Iterable[RunRecord]) -> ArmBudget:
    """The budget of the arm whose runs are ``records`` (every run of it, rung runs
    included)."""
    records = list(records)
    full = [r for r in records if r.full]
    counts = [r.grad_evals for r in records]
    at: dict[float, set[int]] = defaultdict(set)
    for r in records:
        at[float(r.budget_fraction)].add(r.trial)
    levels = sorted(at)
    rungs = tuple(Rung(f, len(at[f]), len(at[f] - at[levels[i + 1]]))
                  for i, f in enumerate(levels[:-1]))
    return ArmBudget(
        trials=len({r.trial for r in full}),
        trials_started=len({r.trial for r in records}),
        seeds=tuple(sorted({r.seed for r in full})),
        grad_evals_per_run=tuple(sorted({int(r.grad_evals) for r in full
                                         if r.grad_evals is not None})),
        grad_evals_total=None if any(c is None for c in counts) else int(sum(counts)),
        rungs=rungs)


@dataclass(frozen=True)
class Selection:
    """The chosen trial of one arm and what it was chosen from.

    Attributes:
        arm: the arm's name.
        index: the chosen trial (None: no trial was eligible).
        strength: the chosen trial's strength (``settings.get("strength", 0.0)``; None
            with no choice).
        validation_means: mean selection metric per full trial (in the order of
            ``trials``; NaN: not eligible).
        trials: the arm's full-budget trial indices.
        settings: the chosen trial's settings (empty with no choice).
        searched: the settings the arm searched (:func:`searched_keys`).
        edges: chosen values at the edge of what was tried (:func:`edge_flags`).
        recipe: the arm's recipe (None: no runs).
        budget: the arm's budget (:func:`arm_budget`).
        runs: the chosen trial's runs in seed order (empty with no choice).
        tried: the settings of every trial of the arm, rung-only trials included.
        trial_runs: the full trials (:class:`TrialRuns`, in the order of ``trials``).
        layers: the parameters the arm's first run constrained or clipped (record
            ``layers``).
    """

    arm: str
    index: int | None
    strength: float | None
    validation_means: tuple[float, ...]
    trials: tuple[int, ...] = ()
    settings: dict[str, Any] = field(default_factory=dict)
    searched: tuple[str, ...] = ()
    edges: tuple[Edge, ...] = ()
    recipe: Recipe | None = None
    budget: ArmBudget | None = None
    runs: tuple[RunRecord, ...] = field(default=(), compare=False, repr=False)
    tried: tuple[dict[str, Any], ...] = field(default=(), compare=False, repr=False)
    trial_runs: tuple[TrialRuns, ...] = field(default=(), compare=False, repr=False)
    layers: tuple[str, ...] = ()

    def values(self, metric: str) -> np.ndarray:
        """``metric`` of the chosen runs per seed."""
        return np.array([r.metric(metric) for r in self.runs], dtype=np.float64)

    @property
    def seeds(self) -> tuple[int, ...]:
        return tuple(r.seed for r in self.runs)


def _best(means: Sequence[float], larger_is_better: bool) -> int | None:
    best = None
    for i, m in enumerate(means):
        if math.isnan(m):
            continue
        if best is None or (m > means[best] if larger_is_better else m < means[best]):
            best = i
    return best


def select_trials(records: Mapping[str, Any], selection: str, larger_is_better: bool,
                  arms: Sequence[str] | None = None) -> dict[str, Selection]:
    """Choose each arm's trial by the mean of ``selection`` over seeds (full runs only).

    ``records``: ``{key: dict or RunRecord}``; ``arms``: the report order (arms without
    records get a :class:`Selection` with no choice; arms of the records not listed follow
    in record order). A trial is eligible only with as many seeds as the arm's most
    seeded full trial, every run ok and a finite ``selection`` value.
    """
    typed = as_records(records)
    trials = group_trials(typed)
    by_arm: dict[str, list[RunRecord]] = defaultdict(list)
    for record in typed.values():
        by_arm[record.arm].append(record)
    chosen = {}
    for arm in _arm_order(typed.values(), arms):
        mine = trials.get(arm, {})
        n_seeds = max((len(t.runs) for t in mine.values()), default=0)
        means = tuple(t.mean(selection) if len(t.runs) == n_seeds else math.nan
                      for t in mine.values())
        best = _best(means, larger_is_better)
        runs = by_arm.get(arm, [])
        searched = searched_keys(runs)
        tried = tuple(dict(s) for s in {tuple(sorted(r.settings.items())): r.settings
                                        for r in sorted(runs, key=lambda r: r.trial)}.values())
        pick = None if best is None else list(mine.values())[best]
        chosen[arm] = Selection(
            arm=arm, index=None if pick is None else pick.trial,
            strength=None if pick is None else pick.strength, validation_means=means,
            trials=tuple(mine), settings={} if pick is None else dict(pick.settings),
            searched=searched,
            edges=() if pick is None else tie_edges(
                edge_flags(tried, pick.settings, searched), list(mine.values()), means),
            recipe=runs[0].recipe if runs else None,
            budget=arm_budget(runs) if runs else None,
            runs=() if pick is None else pick.runs, tried=tried,
            trial_runs=tuple(mine.values()), layers=runs[0].layers if runs else ())
    return chosen
