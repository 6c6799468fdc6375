"""Typed run records: one dataclass per record kind and one reader that validates.

A run writes one JSON object (``DIR/runs/<key>.json``); :func:`read_record` turns it into a
:class:`RunRecord` after checking it, and :meth:`RunRecord.to_dict` gives the object back
(``RunRecord.from_dict(d).to_dict() == d`` for a record with every issue-14 field). The
parts of a record are typed too: its :class:`Recipe`, its ensemble phase
(:class:`EnsemblePhase`) and, with k-fold data, one :class:`FoldDetail` per fold.

Records made before issue 14 (recipes) have no ``trial``, ``settings``, ``searched``,
``recipe``, ``budget_fraction`` or ``epochs``; they are read as

* ``trial = setting_index``, ``settings = {"strength": strength}``, ``searched = ()``
  (the report finds what an arm searched from the values that vary across its trials),
* ``budget_fraction = 1.0`` (a full run), ``epochs = None`` (not recorded),
* ``recipe = {"regulariser": arm, "optimiser": "langevin", "groups": []}``

and :attr:`RunRecord.legacy` is true. :meth:`RunRecord.to_dict` of such a record writes
the filled-in fields as well.

Errors: every problem is an :class:`InvalidRecordField` (an
:class:`holonomic.study.storage.InvalidRunRecord`) whose ``field`` names the key at fault
and whose message names it too.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, Callable, Mapping

from holonomic.study.storage import RUN_STATUSES, InvalidRunRecord

__all__ = ["EnsemblePhase", "FoldDetail", "InvalidRecordField", "LEGACY_OPTIMISER",
           "Recipe", "RunRecord", "as_records", "legacy_key", "read_record"]

#: The optimiser of every run made before recipes existed.
LEGACY_OPTIMISER = "langevin"
#: The ``path`` of an error about a record that was not read from a file.
_NO_PATH = "run record"
#: Keys of a record made before issue 14 that every record must have.
_REQUIRED = ("key", "arm", "seed", "status", "metrics")


class InvalidRecordField(InvalidRunRecord):
    """A run record with a missing or wrong field; ``field`` names it (``""`` when the
    record as a whole is wrong, e.g. not a JSON object)."""

    def __init__(self, path: str | Path, problem: str, key: str | None = None,
                 field: str = "") -> None:
        super().__init__(path, problem, key)
        self.field = field
        if str(path) == _NO_PATH:  # a record not read from a file: no file advice
            self.args = (f"not a valid run record: {problem}",)

    def __reduce__(self):
        return (type(self), (self.path, self.problem, self.key, self.field))


def legacy_key(arm: str, strength: float, seed: int, budget_fraction: float = 1.0) -> str:
    """The key of a run made before recipes (``f"{arm}-{strength!r}-s{seed}"``), which a
    trial that sets at most its strength keeps (with ``-h{fraction!r}`` for a
    successive-halving rung run)."""
    key = f"{arm}-{float(strength)!r}-s{seed}"
    return key if budget_fraction == 1.0 else key + f"-h{float(budget_fraction)!r}"


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


class _Checker:
    """Raises :class:`InvalidRecordField` for the record read from ``path``."""

    def __init__(self, path: str | Path | None) -> None:
        self.path = _NO_PATH if path is None else str(path)

    def fail(self, name: str, problem: str) -> InvalidRecordField:
        return InvalidRecordField(self.path, problem, field=name)

    def require(self, data: Mapping[str, Any], name: str, test: Callable[[Any], bool],
                words: str, where: str = "") -> Any:
        value = data[name]
        if not test(value):
            raise self.fail(where + name, f"'{where}{name}' must be {words}, got {value!r:.60}")
        return value

    def optional(self, data: Mapping[str, Any], name: str, test: Callable[[Any], bool],
                 words: str, default: Any = None, where: str = "") -> Any:
        if name not in data:
            return default
        return self.require(data, name, test, words, where)


@dataclass(frozen=True)
class Recipe:
    """What an arm trains with: its regulariser, its optimiser and its per-layer groups
    (each ``{"layers": [parameter names], ...the group's resolved settings}``)."""

    regulariser: str
    optimiser: str = LEGACY_OPTIMISER
    groups: tuple[dict[str, Any], ...] = ()

    @classmethod
    def from_dict(cls, data: Any, check: _Checker | None = None) -> "Recipe":
        check = check or _Checker(None)
        if not isinstance(data, dict):
            raise check.fail("recipe", f"'recipe' must be an object, got {data!r:.60}")
        for name in ("regulariser", "optimiser"):
            if name not in data:
                raise check.fail(f"recipe.{name}", f"'recipe' lacks the key '{name}'")
            check.require(data, name, lambda v: isinstance(v, str) and bool(v),
                          "a non-empty string", "recipe.")
        groups = check.optional(data, "groups", lambda v: isinstance(v, list), "a list", [],
                                "recipe.")
        for i, group in enumerate(groups):
            where = f"recipe.groups[{i}]"
            if not isinstance(group, dict):
                raise check.fail(where, f"'{where}' must be an object, got {group!r:.60}")
            layers = group.get("layers")
            if not (isinstance(layers, list) and all(isinstance(p, str) for p in layers)):
                raise check.fail(f"{where}.layers", f"'{where}.layers' must be a list of "
                                 f"parameter names, got {layers!r:.60}")
        return cls(data["regulariser"], data["optimiser"], tuple(dict(g) for g in groups))

    def to_dict(self) -> dict[str, Any]:
        return {"regulariser": self.regulariser, "optimiser": self.optimiser,
                "groups": [dict(g) for g in self.groups]}


def _split_metrics(data: Any) -> dict[str, dict[str, Any]]:
    return {part: dict(values) for part, values in data.items()}


@dataclass(frozen=True)
class EnsemblePhase:
    """A run's sampling phase (:mod:`holonomic.study.ensemble`): the single network and the
    ensemble on each split (``single["test"]["accuracy"]`` ...), the traced observables,
    and how the phase went. ``extra``: any other key (kept for the round trip)."""

    status: str
    single: dict[str, dict[str, Any]]
    ensemble: dict[str, dict[str, Any]]
    settings: dict[str, Any] = field(default_factory=dict)
    sampler: str = ""
    message: str = ""
    steps_done: int = 0
    samples: int = 0
    traces: dict[str, list[float]] = field(default_factory=dict)
    constraint_residual: float = math.nan
    wall_s: float = 0.0
    extra: dict[str, Any] = field(default_factory=dict)

    @classmethod
    def from_dict(cls, data: Any, check: _Checker | None = None) -> "EnsemblePhase":
        check = check or _Checker(None)
        if not isinstance(data, dict):
            raise check.fail("ensemble", f"'ensemble' must be an object or null, got "
                             f"{data!r:.60}")
        for name in ("status", "single", "ensemble"):
            if name not in data:
                raise check.fail(f"ensemble.{name}", f"'ensemble' lacks the key '{name}'")
        check.require(data, "status", lambda v: isinstance(v, str), "a string", "ensemble.")
        for who in ("single", "ensemble"):
            check.require(data, who, lambda v: isinstance(v, dict) and all(
                isinstance(p, dict) for p in v.values()), "an object of per-split metrics",
                "ensemble.")
        known = {f.name for f in fields(cls)} - {"extra"}
        return cls(
            status=data["status"], single=_split_metrics(data["single"]),
            ensemble=_split_metrics(data["ensemble"]),
            settings=dict(data.get("settings") or {}), sampler=str(data.get("sampler", "")),
            message=str(data.get("message", "")), steps_done=data.get("steps_done", 0),
            samples=data.get("samples", 0),
            traces={k: list(v) for k, v in (data.get("traces") or {}).items()},
            constraint_residual=data.get("constraint_residual", math.nan),
            wall_s=data.get("wall_s", 0.0),
            extra={k: v for k, v in data.items() if k not in known})

    def to_dict(self) -> dict[str, Any]:
        out = {f.name: getattr(self, f.name) for f in fields(self) if f.name != "extra"}
        out["single"] = _split_metrics(self.single)
        out["ensemble"] = _split_metrics(self.ensemble)
        out["traces"] = {k: list(v) for k, v in self.traces.items()}
        return {**out, **self.extra}


@dataclass(frozen=True)
class FoldDetail:
    """One fold of a k-fold run (record ``fold_details``); ``extra``: any other key."""

    fold: int
    status: str
    n_train: int
    message: str = ""
    steps_done: int = 0
    hooks: dict[str, Any] = field(default_factory=dict)
    weights_file: str | None = None
    extra: dict[str, Any] = field(default_factory=dict)

    @classmethod
    def from_dict(cls, data: Any, index: int, check: _Checker | None = None) -> "FoldDetail":
        check = check or _Checker(None)
        where = f"fold_details[{index}]."
        if not isinstance(data, dict):
            raise check.fail(where[:-1], f"'{where[:-1]}' must be an object, got {data!r:.60}")
        if "n_train" not in data:
            raise check.fail(where + "n_train", f"'{where[:-1]}' lacks the key 'n_train'")
        check.require(data, "n_train", _is_int, "an integer", where)
        check.optional(data, "fold", _is_int, "an integer", where=where)
        check.optional(data, "status", lambda v: isinstance(v, str), "a string", where=where)
        known = {f.name for f in fields(cls)} - {"extra"}
        return cls(fold=data.get("fold", index), status=data.get("status", "ok"),
                   n_train=data["n_train"],
                   message=data.get("message", ""), steps_done=data.get("steps_done", 0),
                   hooks=dict(data.get("hooks") or {}), weights_file=data.get("weights_file"),
                   extra={k: v for k, v in data.items() if k not in known})

    def to_dict(self) -> dict[str, Any]:
        out = {f.name: getattr(self, f.name) for f in fields(self) if f.name != "extra"}
        return {**out, **self.extra}


#: RunRecord fields that are not a key of the JSON object.
_INTERNAL = ("extra", "legacy", "given")


@dataclass(frozen=True)
class RunRecord:
    """One finished run (status ok, failed or diverged).

    The identity of the run: ``arm`` (the arm's name), ``trial`` (index of the trial
    within the arm; ``setting_index`` of the JSON), ``settings`` (the hyperparameters the
    trial used: ``lr``, ``momentum``, ``temperature``, ``strength`` where they apply),
    ``trial_settings`` (the trial's own point, which its run key is made of; the runner
    records it; default: ``settings``, ``{"strength": strength}`` for a legacy record),
    ``searched`` (the keys that vary across the arm's trials), ``recipe``, ``seed`` and
    ``budget_fraction`` (1.0: a full run; f < 1: a successive-halving rung run). Its
    outcome: ``status``, ``metrics`` (``val_accuracy`` ...; a value may be None or NaN),
    ``history`` (per epoch), ``grad_evals`` (gradient evaluations; None: not recorded),
    ``epochs`` (trained; None: not recorded), ``ensemble`` and ``fold_details``.

    ``extra`` holds every other key of the JSON object, ``legacy`` says the record was made
    before recipes (see the module docstring), ``given`` the keys the JSON object had.
    """

    key: str
    arm: str
    seed: int
    status: str
    metrics: dict[str, Any]
    trial: int
    settings: dict[str, Any]
    searched: tuple[str, ...]
    recipe: Recipe
    budget_fraction: float = 1.0
    epochs: int | None = None
    grad_evals: int | None = None
    strength: float = 0.0
    trial_settings: dict[str, Any] = field(default_factory=dict)
    fingerprint: str = ""
    message: str = ""
    task: str = "classification"
    n_classes: int | None = None
    n_train: int = 0
    layers: tuple[str, ...] = ()
    history: dict[str, list[Any]] = field(default_factory=dict)
    hooks: dict[str, Any] = field(default_factory=dict)
    ensemble: EnsemblePhase | None = None
    fold_details: tuple[FoldDetail, ...] = ()
    folds: tuple[dict[str, Any], ...] = ()
    data_fingerprint: str = ""
    feature_names: tuple[str, ...] = ()
    weights_file: str | None = None
    weights_files: tuple[str, ...] = ()
    extra: dict[str, Any] = field(default_factory=dict)
    legacy: bool = False
    given: frozenset[str] = field(default=frozenset(), compare=False, repr=False)

    # -- reading -----------------------------------------------------------------------

    @property
    def full(self) -> bool:
        """Whether the run trained for the whole budget (not a halving rung run)."""
        return self.budget_fraction >= 1.0

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    @property
    def optimiser(self) -> str:
        return self.recipe.optimiser

    @property
    def regulariser(self) -> str:
        return self.recipe.regulariser

    def metric(self, name: str) -> float:
        """Metric ``name`` as a float (NaN when missing or None)."""
        value = self.metrics.get(name)
        return math.nan if value is None else float(value)

    def setting(self, name: str, default: float = math.nan) -> float:
        value = self.settings.get(name)
        return default if value is None else float(value)

    @classmethod
    def from_dict(cls, data: Any, path: str | Path | None = None) -> "RunRecord":
        """The typed record of the JSON object ``data``, with its fields' types checked
        (values as given: ints stay ints). Missing issue-14 fields are filled as the module
        docstring says. See :func:`read_record` for the full check.

        Raises:
            InvalidRecordField: naming the field.
        """
        check = _Checker(path)
        if not isinstance(data, dict):
            raise check.fail("", f"it holds a JSON {type(data).__name__}, not an object")
        for name in _REQUIRED:
            if name not in data:
                raise check.fail(name, f"it lacks the key '{name}'")
        for name in ("key", "arm", "status"):
            check.require(data, name, lambda v: isinstance(v, str), "a string")
        check.require(data, "seed", _is_int, "an integer")
        check.require(data, "metrics", lambda v: isinstance(v, dict), "an object")
        for name, value in data["metrics"].items():
            if not (value is None or _is_number(value)):
                raise check.fail(f"metrics.{name}", f"metric {name!r} must be a number, got "
                                 f"{value!r:.60}")
        legacy = "settings" not in data and "trial" not in data
        if "strength" not in data and "settings" not in data:
            raise check.fail("strength", "it lacks the key 'strength' (and has no 'settings')")
        strength = check.optional(data, "strength", _is_number, "a number")
        settings = check.optional(data, "settings", lambda v: isinstance(v, dict) and all(
            isinstance(k, str) and _is_number(x) for k, x in v.items()),
            "an object of numbers ({name: value})")
        if settings is None:
            settings = {"strength": strength}
        if strength is None:
            strength = settings.get("strength", 0.0)
        elif "settings" in data and strength != settings.get("strength", 0.0):
            raise check.fail("strength", f"'strength' = {strength!r} differs from the "
                             f"strength of its 'settings' ({settings.get('strength', 0.0)!r})")
        trial_settings = check.optional(
            data, "trial_settings", lambda v: isinstance(v, dict) and all(
                isinstance(k, str) and _is_number(x) for k, x in v.items()),
            "an object of numbers ({name: value})", dict(settings))
        index = check.optional(data, "setting_index", lambda v: _is_int(v) and v >= 0,
                               "a non-negative integer")
        trial = check.optional(data, "trial", lambda v: _is_int(v) and v >= 0,
                               "a non-negative integer", index)
        if trial is None:
            raise check.fail("trial", "it lacks the key 'trial' (and 'setting_index')")
        if index is not None and index != trial:
            raise check.fail("setting_index", f"'setting_index' = {index!r} differs from "
                             f"'trial' = {trial!r}")
        searched = check.optional(data, "searched", lambda v: isinstance(v, list) and all(
            isinstance(k, str) for k in v), "a list of setting names", [])
        unknown = [k for k in searched if k not in settings]
        if unknown:
            raise check.fail("searched", f"'searched' names {', '.join(map(repr, unknown))}, "
                             f"not a key of its 'settings' ({', '.join(settings) or 'none'})")
        if "recipe" in data:
            recipe = Recipe.from_dict(data["recipe"], check)
        else:
            recipe = Recipe(data["arm"], LEGACY_OPTIMISER, ())
        fraction = check.optional(data, "budget_fraction",
                                  lambda v: _is_number(v) and 0.0 < v <= 1.0,
                                  "a number in (0, 1] (1: a full run)", 1.0)
        epochs = check.optional(data, "epochs", lambda v: v is None or (_is_int(v) and v >= 0),
                                "a non-negative integer")
        grad_evals = check.optional(data, "grad_evals",
                                    lambda v: v is None or (_is_int(v) and v >= 0),
                                    "a non-negative integer")
        for name in ("fingerprint", "data_fingerprint", "message"):
            check.optional(data, name, lambda v: isinstance(v, str), "a string")
        check.optional(data, "task", lambda v: isinstance(v, str), "a string")
        check.optional(data, "n_classes", lambda v: v is None or _is_int(v),
                       "an integer")
        check.optional(data, "n_train", _is_int, "an integer")
        for name in ("layers", "feature_names", "weights_files"):
            check.optional(data, name, lambda v: v is None or (isinstance(v, list) and all(
                isinstance(x, str) for x in v)), "a list of strings")
        for name in ("history", "hooks"):
            check.optional(data, name, lambda v: v is None or isinstance(v, dict),
                           "an object")
        ensemble = data.get("ensemble")
        details = data.get("fold_details") or []
        if not isinstance(details, list):
            raise check.fail("fold_details", f"'fold_details' must be a list, got "
                             f"{details!r:.60}")
        known = {f.name for f in fields(cls)} | {"setting_index"}
        return cls(
            key=data["key"], arm=data["arm"], seed=data["seed"], status=data["status"],
            metrics=dict(data["metrics"]), trial=trial, settings=dict(settings),
            searched=tuple(searched), recipe=recipe, budget_fraction=fraction, epochs=epochs,
            grad_evals=grad_evals, strength=strength, trial_settings=dict(trial_settings),
            fingerprint=data.get("fingerprint", ""), message=data.get("message", ""),
            task=data.get("task") or "classification", n_classes=data.get("n_classes"),
            n_train=data.get("n_train", 0), layers=tuple(data.get("layers") or ()),
            history=dict(data.get("history") or {}), hooks=dict(data.get("hooks") or {}),
            ensemble=None if ensemble is None else EnsemblePhase.from_dict(ensemble, check),
            fold_details=tuple(FoldDetail.from_dict(d, i, check)
                               for i, d in enumerate(details)),
            folds=tuple(data.get("folds") or ()),
            data_fingerprint=data.get("data_fingerprint", ""),
            feature_names=tuple(data.get("feature_names") or ()),
            weights_file=data.get("weights_file"),
            weights_files=tuple(data.get("weights_files") or ()),
            extra={k: v for k, v in data.items() if k not in known and k not in _INTERNAL},
            legacy=legacy, given=frozenset(data))

    def to_dict(self) -> dict[str, Any]:
        """The JSON object: the keys the record was read with (every issue-14 key filled
        in for a legacy record), plus ``extra``."""
        values: dict[str, Any] = {
            "key": self.key, "arm": self.arm, "seed": self.seed, "status": self.status,
            "metrics": dict(self.metrics), "trial": self.trial, "setting_index": self.trial,
            "settings": dict(self.settings), "searched": list(self.searched),
            "recipe": self.recipe.to_dict(), "budget_fraction": self.budget_fraction,
            "epochs": self.epochs, "grad_evals": self.grad_evals, "strength": self.strength,
            "trial_settings": dict(self.trial_settings),
            "fingerprint": self.fingerprint, "message": self.message, "task": self.task,
            "n_classes": self.n_classes, "n_train": self.n_train, "layers": list(self.layers),
            "history": dict(self.history), "hooks": dict(self.hooks),
            "ensemble": None if self.ensemble is None else self.ensemble.to_dict(),
            "fold_details": [d.to_dict() for d in self.fold_details],
            "folds": list(self.folds), "data_fingerprint": self.data_fingerprint,
            "feature_names": list(self.feature_names), "weights_file": self.weights_file,
            "weights_files": list(self.weights_files)}
        new = ("trial", "settings", "searched", "recipe", "budget_fraction", "epochs",
               "setting_index")
        keep = set(self.given) | set(new) if self.given else set(values)
        out = {k: v for k, v in values.items() if k in keep}
        return {**out, **self.extra}


# ---------------------------------------------------------------------------------------
# The validating reader

#: Task metrics (without split prefix) of a classification record made before tasks
#: existed (no ``task`` key).
_OLD_CLASSIFICATION = ("accuracy", "loss")


def _required_metrics(data: Mapping[str, Any], check: _Checker) -> tuple[str, ...]:
    """The task metric names a finished run of the record's task must hold."""
    from holonomic.study.tasks import PARTS, Task, recorded_n_classes  # lazy: imports torch

    name = data.get("task")
    if name is None:  # made before tasks existed: classification, accuracy and loss
        names = [f"{p}_{m}" for p in PARTS for m in _OLD_CLASSIFICATION]
        names += [f"{g}_{m}" for g in ("gap", "val_gap") for m in _OLD_CLASSIFICATION]
        return tuple(names) + ("ece_val", "ece_test")
    n_classes = recorded_n_classes(name, data.get("n_classes"), data["metrics"])
    if not _is_int(n_classes):
        raise check.fail("n_classes", f"'n_classes' must be an integer, got {n_classes!r:.60}")
    try:
        return Task(str(name), n_classes).record_metrics()
    except ValueError as exc:
        raise check.fail("task", f"its task is not valid ({exc})") from None


def _check_ok_metrics(data: Mapping[str, Any], check: _Checker) -> None:
    """A finished run (status ok) holds every metric of its task, each a finite number
    (ROC AUC and R^2 may be NaN: undefined on a split with one class or constant targets)
    inside the range the metric can take."""
    from holonomic.study.tasks import MAY_BE_UNDEFINED, metric_range, split_metric_name

    metrics = data["metrics"]
    missing = [n for n in _required_metrics(data, check) if n not in metrics]
    if missing:
        raise check.fail(f"metrics.{missing[0]}", f"its status is ok but it lacks the "
                         f"metric(s) {', '.join(missing)} of its task "
                         f"({data.get('task', 'classification')})")
    for name, value in metrics.items():
        if value is None:
            continue
        prefix, base = split_metric_name(name)
        if not math.isfinite(value):
            if base in MAY_BE_UNDEFINED and math.isnan(value):
                continue
            if prefix:  # a task metric (norms and residuals are NaN where they do not apply)
                raise check.fail(f"metrics.{name}", f"its status is ok but metric {name!r} "
                                 f"is {value!r}, not a finite number")
            continue
        low, high = metric_range(name)
        slack = 1e-9 * (1.0 + abs(value))  # roundoff
        if not low - slack <= value <= high + slack:
            raise check.fail(f"metrics.{name}", f"metric {name!r} = {value!r} is outside the "
                             f"values it can take ([{low:g}, {high:g}])")


def read_record(data: Any, path: str | Path | None = None,
                run_key: Callable[[RunRecord], str] | None = None) -> RunRecord:
    """Check the JSON object ``data`` of a run record (read from ``path``,
    ``DIR/runs/<key>.json``, when given) and return it typed.

    Checks, besides the types of :meth:`RunRecord.from_dict`: the keys every run record
    has (``key``, ``arm``, ``strength`` or ``settings``, ``seed``, ``status``, ``metrics``,
    ``fingerprint``); a ``status`` in :data:`holonomic.study.storage.RUN_STATUSES`; a
    finished run (status ok) holds every metric its task records, finite (ROC AUC and R^2
    may be undefined) and in the range the metric can take; the ``key`` equals the file
    name and the key of its fields: ``run_key(record)`` when given (e.g.
    ``lambda r: storage.run_key(r.arm, r.trial_settings, r.seed, r.budget_fraction,
    r.trial)``), else for a trial that sets at most its strength the old key
    :func:`legacy_key` (other keys are left to ``run_key``).

    Raises:
        InvalidRecordField: naming the file (when given), the field and what is wrong.
    """
    check = _Checker(path)
    record = RunRecord.from_dict(data, path)
    if "fingerprint" not in data:
        raise check.fail("fingerprint", "it lacks the key 'fingerprint'")
    if record.status not in RUN_STATUSES:
        raise check.fail("status", f"'status' must be one of {', '.join(RUN_STATUSES)}, got "
                         f"{record.status!r:.60}")
    if record.ok:
        _check_ok_metrics(data, check)
    if path is not None and record.key != Path(path).stem:
        raise check.fail("key", f"its 'key' {record.key!r} does not match its file name "
                         f"(key {Path(path).stem!r})")
    if run_key is not None:
        expected = run_key(record)
    elif set(record.trial_settings) <= {"strength"}:
        expected = legacy_key(record.arm, record.trial_settings.get("strength", 0.0),
                              record.seed, record.budget_fraction)
    else:
        expected = record.key
    if record.key != expected:
        raise check.fail("key", f"its 'key' {record.key!r} does not match its arm, settings "
                         f"and seed (key {expected!r})")
    return record


def as_records(records: Mapping[str, Any]) -> dict[str, RunRecord]:
    """``{key: RunRecord}`` of ``{key: dict or RunRecord}`` (dicts are typed with
    :meth:`RunRecord.from_dict`; the validating read is :func:`read_record`, made when the
    files were read)."""
    return {key: r if isinstance(r, RunRecord) else RunRecord.from_dict(r)
            for key, r in records.items()}
