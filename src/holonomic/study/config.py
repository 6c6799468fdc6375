"""Study configuration: parse and validate a study file (TOML).

Every key, with its default and allowed values (the dataclasses below give the details;
the README has the same list as tables):

``[study]``
    ``name`` (default: the file's stem); ``seeds`` (default 5): a count (>= 2) or a list of
    distinct non-negative integers; ``selection``: ``val_<metric>`` for a metric of the task
    (classification: ``accuracy``, ``balanced_accuracy``, ``macro_f1``, ``roc_auc`` (two
    classes only), ``loss``; regression: ``rmse``, ``r2``, ``mae``, ``loss``); default
    ``val_accuracy`` or ``val_rmse`` (:func:`selection_metric`); ``baseline`` (default
    ``"weight_decay"``): the arm every other arm is compared with, seed by seed (any arm of
    the study; that arm is required); ``min_effect`` (optional, > 0): a difference of the
    test headline metric (accuracy, or RMSE for regression; in its units, e.g. 0.01
    accuracy) that the report says how many seeds would be needed to detect (80% power,
    two-sided 0.05, the observed paired sd); ``trials`` (>= 1; default: the grid size when
    every searched arm is a grid of one size, else 4): trials of every arm with a search
    space (an arm with everything fixed gets 1); ``search`` (``"sobol"`` | ``"halton"``,
    default ``"sobol"``): the ``scipy.stats.qmc`` sequence for ranges, scrambled with the
    first seed; ``halving`` (``false`` | ``true`` | ``{fraction = f}``, 0 < f < 1, default
    0.25 with ``true``): successive halving (every trial first trains ``round(f * epochs)``
    epochs, the better half per arm is rerun in full; not with ``--shard``).
``[data]`` (:class:`DataConfig`)
    ``source`` (default ``"digits"``; also ``breast_cancer``, ``wine``, ``diabetes``,
    ``demo`` (invented), or a ``.csv`` / ``.npz`` path relative to the study file);
    ``target`` (``"target"``); ``task`` (inferred; ``"classification"`` |
    ``"regression"``); ``missing`` (``"refuse"`` | ``"drop"`` | ``"mean"``);
    ``drop_columns`` (``[]``) or ``features`` (every other column); ``standardize``
    (``true``); the split: ``val_fraction`` (0.2) and ``test_fraction`` (0.3) of all rows,
    or ``split_column``, or ``test_source`` / ``val_source`` (separate files), or
    ``folds`` (2..20), optionally with ``group_column``; ``train_size`` (omitted: every row
    left after the validation and test parts).
``[model]`` (:class:`ModelConfig`)
    ``widths`` (``[64]``) and ``activation`` (``"relu"`` | ``"tanh"`` | ``"gelu"`` |
    ``"silu"``), or ``factory = "module:function"`` called as
    ``function(in_features, n_outputs)`` (``n_outputs``: the number of classes, 1 for
    regression; the study file's folder is on the import path); ``constrain``
    (``"hidden"`` | ``"hidden+output"`` | a list of parameter-name patterns).
``[budget]`` (:class:`BudgetConfig`)
    ``epochs`` (30), ``batch_size`` (32), ``lr`` (0.05) + ``momentum`` (0.9) or ``step`` +
    ``friction`` (1.0), ``temperature`` (0.0), ``schedule`` (``"constant"`` |
    ``"cosine"``), ``projection`` (``"rattle"`` | ``"geodesic"``), ``dtype``
    (``"float32"`` | ``"float64"``).
``[arms.NAME]`` (:class:`ArmConfig`; NAME: letters, digits, ``_``; reports follow file order)
    A recipe. ``regulariser`` (default: NAME when NAME is one): ``none``, ``weight_decay``,
    ``decoupled_weight_decay``, ``max_norm``, ``fixed_norm``, ``orthonormal``, ``dropout``
    (:mod:`holonomic.study.regularisers`); ``optimiser`` (default ``"langevin"``):
    ``langevin``, ``adaptive_langevin``, ``overdamped_langevin``, ``sgd``, ``adamw``
    (:mod:`holonomic.study.optimisers`; combinations that cannot work are refused, naming
    what to use instead); ``constrain`` (``max_norm``, ``fixed_norm``, ``orthonormal``
    only): overrides ``model.constrain``; fixed values ``strength`` (the regulariser's:
    weight decays >= 0, dropout in [0, 1), the others > 0), ``lr`` (> 0), ``momentum``
    ([0, 1)), ``temperature`` (>= 0), each only where the recipe has it (default: the
    budget's); ``search.KEY`` for those keys: a list of values or a range ``{low, high,
    scale}`` (``scale`` ``"log"`` (default) | ``"linear"``); ``grid``: the old name of
    ``search.strength`` (a list). An arm with neither ``search`` nor ``grid`` searches its
    strength over the regulariser's default range and ``lr`` over [budget lr / 10, budget
    lr * 3] (log), except in a study where some arm gives ``grid``: there it is fixed (one
    trial). The baseline arm (``study.baseline``, default ``weight_decay``) is required.
``[[arms.NAME.groups]]`` (optional, :class:`GroupConfig`; per-layer settings, torch param groups)
    ``layers`` (required): ``"hidden"``, ``"hidden+output"``, ``"output"`` (those layers'
    weights and biases) or a list of ``fnmatch`` patterns over parameter names; the first
    group matching a parameter takes it, the rest form the arm's default group. Then the
    optimiser's keys: ``lr`` or ``lr_scale``, ``momentum``, ``temperature`` or
    ``temperature_scale`` (scales multiply the trial's value), ``adaptive``
    (``adaptive_langevin`` only: ``false`` keeps the friction fixed, T = 0 allowed).
``[arms.NAME.ensemble]`` (optional, :class:`EnsembleConfig`; not with ``data.folds``)
    ``temperature`` (> 0, required), ``samples`` (>= 4, required), ``every`` (1),
    ``burn_in`` (one epoch of steps), ``sampler`` (``"adaptive"`` | ``"langevin"``),
    ``step``, ``friction`` (default: the budget's, rescaled to the force ``N x gradient``).
``[audit]``
    ``every`` (50): optimizer steps between audit records.

Every error is a :class:`StudyConfigError` (a ``ValueError``) whose message names the key
and the allowed values, e.g. ``study config: unknown key 'data.trian_size'; allowed keys in
[data]: source, target, ...``.
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
import re
try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10: the same parser, packaged as tomli
    import tomli as tomllib
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Mapping

__all__ = [
    "ARM_NAMES",
    "ArmConfig",
    "BudgetConfig",
    "DataConfig",
    "EnsembleConfig",
    "ModelConfig",
    "StudyConfig",
    "StudyConfigError",
    "load_config",
    "parse_config",
    "selection_metric",
]

#: Arms a study may list, in the order they appear in reports.
ARM_NAMES = ("none", "weight_decay", "max_norm", "fixed_norm", "orthonormal")
#: Default of ``study.baseline``: the arm every other arm is compared against.
BASELINE_ARM = "weight_decay"
ACTIVATIONS = ("relu", "tanh", "gelu", "silu")
SCHEDULES = ("constant", "cosine")
PROJECTIONS = ("rattle", "geodesic")
DTYPES = ("float32", "float64")
#: Every ``study.selection`` any task accepts: ``val_<metric>`` for the metrics of
#: :class:`holonomic.study.tasks.Task` (ROC AUC for two classes only; rmse, r2, mae for
#: regression only); :func:`selection_metric` checks the choice against the study's task.
SELECTION_METRICS = ("val_accuracy", "val_balanced_accuracy", "val_macro_f1", "val_roc_auc",
                     "val_loss", "val_rmse", "val_r2", "val_mae")
#: ``study.selection`` when the study file gives none, per task.
DEFAULT_SELECTION = {"classification": "val_accuracy", "regression": "val_rmse"}
#: Default audit interval (optimizer steps between audit records of a run). The audit reads
#: its state every step (cheap: no host synchronisation) and writes a record every
#: ``every`` steps plus one at the end of the run.
DEFAULT_AUDIT_EVERY = 50
#: ``study.trials`` when no study file gives it and the arms are not grids of one size.
DEFAULT_TRIALS = 4
#: ``study.halving = true``: the fraction of the epochs every trial first trains for.
DEFAULT_HALVING_FRACTION = 0.25
#: Built-in data sources and their task (``data.task`` must agree when given).
BUILTIN_TASKS = {"digits": "classification", "demo": "classification",
                 "breast_cancer": "classification", "wine": "classification",
                 "diabetes": "regression"}
BUILTIN_SOURCES = tuple(BUILTIN_TASKS)
DATA_TASKS = ("classification", "regression")
MISSING_POLICIES = ("refuse", "drop", "mean")
#: Most folds ``data.folds`` may ask for.
MAX_FOLDS = 20
SAMPLERS = ("adaptive", "langevin")
#: Named layer selections of ``[model] constrain`` / ``[arms.NAME] constrain`` (besides a list
#: of parameter-name patterns); see :class:`ModelConfig`.
LAYER_SELECTIONS = ("hidden", "hidden+output")
#: Fewest samples of an ensemble phase: the mixing diagnostics need 4 draws per chain.
MIN_ENSEMBLE_SAMPLES = 4


class StudyConfigError(ValueError):
    """A study file that cannot be run; the message names the key and what to change."""


@dataclass(frozen=True)
class DataConfig:
    """Where the data come from, how they are read and how they are split (``[data]``).

    Reading (details in :mod:`holonomic.study.data`):

    * ``source`` (default ``"digits"``): a built-in set (``digits``, ``breast_cancer``,
      ``wine``: classification; ``diabetes``: regression; ``demo``: invented data), or a
      ``.csv`` / ``.npz`` file, relative to the study file or absolute.
    * ``target`` (default ``"target"``): the CSV column to predict.
    * ``task``: ``"classification"`` or ``"regression"``; omitted (``None``): inferred.
      String labels, or integer-valued numbers with at most 50 distinct values, are
      classification; any other numeric target is refused until ``task`` is given.
    * ``missing`` (default ``"refuse"``): an empty, ``nan`` or ``inf`` feature or target is
      refused (naming column and line); ``"drop"`` drops such rows; ``"mean"`` fills
      missing features with the mean of each split's training part and drops rows with a
      missing target.
    * ``drop_columns`` (default none): CSV columns not to use; ``features`` (default: every
      column that is not the target, split or group column): the feature columns to use,
      in order. Give one or the other.

    Splitting (each scheme fixed by the seed; see :func:`holonomic.study.data.describe_scheme`):

    * hold-out (default): ``test_fraction`` (default 0.3) and ``val_fraction`` (default 0.2)
      of all rows, stratified for classification, random for regression.
    * ``split_column``: a CSV column of ``train`` / ``val`` / ``test``: the same split for
      every seed (no fractions, folds or ``train_size`` with it).
    * ``test_source`` (and ``val_source``): separate files with the same columns as
      ``source``; without ``val_source`` the validation part is ``val_fraction`` of the
      rows of ``source``.
    * ``folds`` (2 to 20): k-fold cross-validation repeated once per seed; each fold is the
      test part once, the validation part is ``val_fraction`` of the other folds.
    * ``group_column``: rows sharing a value stay in one part (fractions then count groups).

    ``train_size``: training rows, subsampled per seed from the training part; omitted
    (``None``): every row left after the validation and test parts. ``standardize`` (default
    true): features standardised with the training part's mean and standard deviation.
    Keys that do not apply to the scheme are ``None`` (``val_fraction`` with
    ``val_source`` or ``split_column``; ``test_fraction`` with ``test_source``,
    ``split_column`` or ``folds``).
    """

    source: str = "digits"
    target: str = "target"
    train_size: int | None = None
    val_fraction: float | None = 0.2
    test_fraction: float | None = 0.3
    standardize: bool = True
    task: str | None = None
    missing: str = "refuse"
    drop_columns: tuple[str, ...] = ()
    features: tuple[str, ...] | None = None
    split_column: str | None = None
    group_column: str | None = None
    val_source: str | None = None
    test_source: str | None = None
    folds: int | None = None

    @property
    def scheme(self) -> str:
        """``"holdout"``, ``"split_column"``, ``"files"`` or ``"folds"``."""
        if self.split_column is not None:
            return "split_column"
        if self.test_source is not None:
            return "files"
        if self.folds is not None:
            return "folds"
        return "holdout"


@dataclass(frozen=True)
class ModelConfig:
    """An MLP (``widths``, ``activation``) or a user factory ``"package.module:function"``,
    and which weights the constraint and max-norm arms act on (``constrain``).

    A factory is called as ``factory(in_features, n_outputs)`` (``n_outputs``: the number of
    classes, or 1 for regression) and returns a ``torch.nn.Module``; a module beside the
    study file is found (the study file's folder is on the import path while importing).

    ``constrain`` (default ``"hidden"``) is the study's default for the arms ``max_norm``,
    ``fixed_norm`` and ``orthonormal`` (each may override it with ``[arms.NAME] constrain``):

    - ``"hidden"``: the weight of every ``nn.Linear`` and ``nn.Conv1d/2d/3d`` layer except
      the output layer, which is the last ``Linear`` in module order (the last convolution
      when the model has no ``Linear``). For an MLP: every ``Linear`` but the last.
    - ``"hidden+output"``: those and the output layer's weight.
    - a list of ``fnmatch``-style patterns (``*``, ``?``, ``[...]``; case-sensitive; ``*``
      also matches dots) on qualified parameter names as ``model.named_parameters()`` gives
      them, e.g. ``["features.*.weight", "fc1.weight"]``.

    Only weights of >= 2 dimensions of ``Linear`` / ``Conv1d/2d/3d`` layers are eligible:
    never a bias, never a BatchNorm / LayerNorm weight. A selection that matches nothing, or
    a pattern that matches only ineligible parameters, is refused before the first run
    (the check needs the model: :func:`holonomic.study.arms.prepare_arm`). Each output unit
    is one vector: a row of a ``Linear`` weight, an output channel's kernel (flattened) of a
    convolution. ``weight_decay`` ignores the selection and decays every parameter; the
    weight-norm metrics of the ``none`` and ``weight_decay`` arms are measured on this
    default selection.
    """

    widths: tuple[int, ...] = (64,)
    activation: str = "relu"
    factory: str | None = None
    constrain: str | tuple[str, ...] = "hidden"


@dataclass(frozen=True)
class BudgetConfig:
    """Training budget shared by every arm.

    Either ``step`` (h) and ``friction`` (gamma) or SGD-style ``lr`` (eta) and ``momentum``
    (mu); the two are related by ``mu = exp(-gamma h)``, ``eta = h^2 (1 + mu) / 2``
    (``holonomic.Langevin.from_sgd``). ``temperature`` is in units of the mean minibatch loss
    (cross-entropy, or half the mean squared error of standardised targets for regression:
    :mod:`holonomic.study.tasks`) with no ``dataset_size`` scaling, so ``temperature = 1 /
    n_train`` is the Bayesian posterior of that loss.
    """

    epochs: int = 30
    batch_size: int = 32
    step: float | None = None
    friction: float | None = None
    lr: float | None = None
    momentum: float | None = None
    temperature: float = 0.0
    schedule: str = "constant"
    projection: str = "rattle"
    dtype: str = "float32"

    @property
    def parametrisation(self) -> str:
        """``"sgd"`` when given as lr/momentum, ``"langevin"`` when given as step/friction."""
        return "sgd" if self.lr is not None else "langevin"

    def step_friction(self) -> tuple[float, float]:
        """The integrator's step h and friction gamma for either parametrisation.

        From ``eta = h^2 (1 + mu) / 2`` and ``mu = exp(-gamma h)``:
        ``h = sqrt(2 eta / (1 + mu))``, ``gamma = -log(mu) / h``.
        """
        if self.lr is None:
            return float(self.step), float(self.friction)
        h = math.sqrt(2.0 * self.lr / (1.0 + self.momentum))
        gamma = -math.log(self.momentum) / h if self.momentum > 0 else math.inf
        return h, gamma


@dataclass(frozen=True)
class EnsembleConfig:
    r"""Sampling phase after training (``[arms.NAME.ensemble]``), run for every run of the arm.

    From the trained weights the sampler draws from the tempered posterior

    .. math::  \pi(W) \propto \exp\bigl(-N\,[\bar L(W) + \tfrac{\lambda}{2}|W|^2] / T\bigr)

    on the arm's constraint set, with :math:`\bar L` the mean training loss (cross-entropy,
    or half the mean squared error of standardised targets: a Gaussian likelihood with noise
    variance ``T`` in standardised units, see :mod:`holonomic.study.tasks`),
    :math:`N` the training-set size (``dataset_size = N``), :math:`\lambda` the arm's weight
    decay (0 except for the weight-decay arm) and :math:`T` = ``temperature``: ``T = 1`` is
    the Bayesian posterior of that model and prior, ``T < 1`` a cold posterior. Mini-batches
    as in training. After ``burn_in`` steps a sample is taken every ``every`` steps until
    ``samples`` are collected: ``burn_in + samples * every`` steps in all.

    ``sampler``: ``"adaptive"`` (``holonomic.AdaptiveLangevin``: the friction adapts so the
    kinetic temperature is right despite mini-batch gradient noise) or ``"langevin"``
    (``holonomic.Langevin``: mini-batch noise heats it above ``T``). ``step`` and
    ``friction`` are in the sampler's units (force ``N * grad + N * lambda * W``); by default
    they follow the budget's base step and friction rescaled to that force,
    ``h / sqrt(N)`` and ``gamma * sqrt(N)`` (SGD view: ``lr / N``, same momentum).
    ``burn_in`` defaults to one epoch of steps (``None`` here).
    """

    temperature: float
    samples: int
    every: int = 1
    burn_in: int | None = None
    sampler: str = "adaptive"
    step: float | None = None
    friction: float | None = None

    def resolved(self, budget: "BudgetConfig", n_train: int) -> dict[str, Any]:
        """Step, friction and burn-in actually used for a training set of ``n_train`` rows."""
        h, gamma = budget.step_friction()
        scale = math.sqrt(n_train)
        steps_per_epoch = math.ceil(n_train / budget.batch_size)
        return {
            "step": h / scale if self.step is None else self.step,
            "friction": gamma * scale if self.friction is None else self.friction,
            "burn_in": steps_per_epoch if self.burn_in is None else self.burn_in,
        }


@dataclass(frozen=True)
class GroupConfig:
    """One ``[[arms.NAME.groups]]`` entry: per-layer settings of the arm's optimiser (a
    torch param group). ``layers``: ``"hidden"``, ``"hidden+output"``, ``"output"`` or
    ``fnmatch`` patterns over qualified parameter names (weights and biases); the first
    group that matches a parameter takes it, the rest form the arm's default group.
    ``settings``: the group's keys (``lr``, ``lr_scale``, ``momentum``, ``temperature``,
    ``temperature_scale``, ``adaptive``) as given."""

    layers: str | tuple[str, ...]
    settings: tuple[tuple[str, Any], ...] = ()

    def as_dict(self) -> dict[str, Any]:
        return dict(self.settings)


@dataclass(frozen=True)
class ArmConfig:
    """One arm: a training recipe (:mod:`holonomic.study.regularisers`,
    :mod:`holonomic.study.optimisers`) and the trials of its search space.

    Attributes:
        name: the arm's name (``[arms.NAME]``).
        ensemble: optional sampling phase after training (:class:`EnsembleConfig`).
        constrain: layer selection of ``max_norm``, ``fixed_norm``, ``orthonormal``
            (``None``: ``[model] constrain``).
        regulariser: a name of :data:`holonomic.study.regularisers.REGULARISERS`.
        optimiser: a name of :data:`holonomic.study.optimisers.OPTIMISERS`.
        fixed: hyperparameters the arm fixes (``strength``, ``lr``, ``momentum``,
            ``temperature``), as ``(key, value)`` pairs.
        search: the searched keys: ``(key, tuple of values)`` or ``(key, Range)``.
        groups: per-layer settings (:class:`GroupConfig`).
        trials: the points the study trains (:class:`holonomic.study.search.Trial`).
    """

    name: str
    ensemble: EnsembleConfig | None = None
    constrain: str | tuple[str, ...] | None = None
    regulariser: str = ""
    optimiser: str = "langevin"
    fixed: tuple[tuple[str, float], ...] = ()
    search: tuple[tuple[str, Any], ...] = ()
    groups: tuple[GroupConfig, ...] = ()
    trials: tuple[Any, ...] = ()

    def layer_selection(self, model: "ModelConfig") -> tuple[str | tuple[str, ...], str]:
        """``(selection, config key it comes from)``: this arm's override, or the study's
        default ``[model] constrain``."""
        if self.constrain is not None:
            return self.constrain, f"arms.{self.name}.constrain"
        return model.constrain, "model.constrain"

    @property
    def grid(self) -> tuple[float, ...]:
        """The strength of each trial (0 where the regulariser has none): the old grid of
        an arm that searches only its strength."""
        return tuple(float(t.settings.get("strength", 0.0)) for t in self.trials)

    @property
    def meaning(self) -> str:
        from holonomic.study.regularisers import REGULARISERS

        return REGULARISERS[self.regulariser].meaning

    @property
    def plain(self) -> bool:
        """An arm as studies had them before recipes: named after its regulariser (one of
        :data:`ARM_NAMES`), ``holonomic.Langevin`` with the budget's settings, at most its
        strength searched or fixed, no groups."""
        return (self.name == self.regulariser and self.name in ARM_NAMES
                and self.optimiser == "langevin" and not self.groups
                and all(k == "strength" for k, _ in self.fixed)
                and all(k == "strength" for k, _ in self.search))

    def recipe(self) -> dict[str, Any]:
        """The recipe as plain data (regulariser, optimiser, fixed values, search space,
        groups)."""
        return {"regulariser": self.regulariser, "optimiser": self.optimiser,
                "fixed": dict(self.fixed),
                "search": {k: (v.to_dict() if hasattr(v, "to_dict") else list(v))
                           for k, v in self.search},
                "groups": [{"layers": g.layers if isinstance(g.layers, str) else list(g.layers),
                            **g.as_dict()} for g in self.groups]}

    def recipe_fingerprint(self) -> str | None:
        """Hash of what changes this arm's runs besides its trial settings (regulariser,
        optimiser, fixed values, groups); None for a :attr:`plain` arm (whose runs predate
        recipes). Stored in run records and checked when a study resumes."""
        if self.plain:
            return None
        recipe = self.recipe()
        del recipe["search"]  # the trial's settings are in the run key
        text = json.dumps(recipe, sort_keys=True, default=str)
        return hashlib.sha256(text.encode()).hexdigest()[:16]


@dataclass(frozen=True)
class StudyConfig:
    """A validated study. ``base_dir`` resolves relative data paths."""

    name: str
    seeds: tuple[int, ...]
    data: DataConfig
    model: ModelConfig
    budget: BudgetConfig
    arms: tuple[ArmConfig, ...]
    #: ``study.selection`` as given (None: the task's default, see :func:`selection_metric`).
    selection: str | None = None
    base_dir: str = "."
    audit_every: int = DEFAULT_AUDIT_EVERY
    #: ``study.baseline``: the arm every other arm is compared with (an arm of the study).
    baseline: str = BASELINE_ARM
    #: ``study.min_effect``: a difference of the test headline metric (its units) for which
    #: the report gives the seeds needed to detect it; None: not asked.
    min_effect: float | None = None
    #: ``study.trials``: trials of every arm with a search space (the equal budget).
    trials: int = DEFAULT_TRIALS
    #: ``study.search``: ``"sobol"`` or ``"halton"`` (scipy.stats.qmc) for ranges.
    search: str = "sobol"
    #: ``study.halving``: the rung's fraction of the epochs (successive halving), or None.
    halving: float | None = None

    def arm(self, name: str) -> ArmConfig:
        for arm in self.arms:
            if arm.name == name:
                return arm
        raise KeyError(name)

    def data_path(self) -> Path | None:
        """Absolute path of a user data file, or None for a built-in source."""
        if self.data.source in BUILTIN_SOURCES:
            return None
        path = Path(self.data.source)
        return path if path.is_absolute() else Path(self.base_dir) / path

    def training_fingerprint(self) -> str:
        """Hash of everything that changes a run's result except arm, strength and seed.

        Stored in every run record so that a rerun into the same directory refuses to mix
        runs of a different study. It covers the data settings (a data file by its path as
        written in the study file, relative to it: a study folder moved or copied elsewhere
        keeps its fingerprint; the data's *contents* are checked separately by their own
        fingerprint), the model (with ``model.factory``, also a hash of the factory
        module's source file: an edited factory is a different model, see
        :func:`factory_source_hash`), the budget and per-arm layer selections.

        Computed once per config (cached; the factory's module file is located and read
        once, never executed here).
        """
        cached = self.__dict__.get("_training_fingerprint")
        if cached is None:
            cached = self._fingerprint(legacy=False)
            object.__setattr__(self, "_training_fingerprint", cached)
        return cached

    def accepted_fingerprints(self) -> tuple[str, ...]:
        """Training fingerprints of runs compatible with this study: the current one and,
        without a model factory, the one earlier versions computed (data file by absolute
        path), so studies begun before stay resumable where they are."""
        if self.model.factory is not None:
            return (self.training_fingerprint(),)
        return (self.training_fingerprint(), self._fingerprint(legacy=True))

    def _fingerprint(self, legacy: bool) -> str:
        payload: dict[str, Any] = {
            "data": asdict(self.data),
            "model": asdict(self.model),
            "budget": asdict(self.budget),
        }
        overrides = {a.name: a.constrain for a in self.arms if a.constrain is not None}
        if overrides:  # which weights an arm acts on changes its runs
            payload["arm_constrain"] = overrides
        if legacy and self.data_path() is not None:
            payload["data"]["source"] = str(self.data_path().resolve())
        if not legacy and self.model.factory is not None:
            payload["factory_source"] = factory_source_hash(self.model.factory, self.base_dir)
        text = json.dumps(payload, sort_keys=True, default=str)
        return hashlib.sha256(text.encode()).hexdigest()[:16]

    def ensemble_settings(self, arm: str) -> dict[str, Any] | None:
        """The arm's ensemble settings as plain data (stored in each run record), or None."""
        ensemble = self.arm(arm).ensemble
        return None if ensemble is None else asdict(ensemble)

    def to_dict(self) -> dict[str, Any]:
        """Plain-data view (for summary.json)."""
        out = {
            "name": self.name,
            "seeds": list(self.seeds),
            "selection": self.selection,
            "data": asdict(self.data),
            "model": {**asdict(self.model), "widths": list(self.model.widths)},
            "budget": asdict(self.budget),
            "arms": {a.name: list(a.grid) for a in self.arms},
            "audit": {"every": self.audit_every},
        }
        ensembles = {a.name: asdict(a.ensemble) for a in self.arms if a.ensemble is not None}
        if ensembles:  # absent otherwise: definitions of studies without ensembles unchanged
            out["ensembles"] = ensembles
        constrain = {a.name: a.constrain for a in self.arms if a.constrain is not None}
        if constrain:  # per-arm layer selections ([arms.NAME] constrain), when given
            out["arm_constrain"] = constrain
        if not all(a.plain for a in self.arms) or self.halving is not None:
            # absent for studies of plain arms: their definitions stay as they were
            out["recipes"] = {a.name: a.recipe() for a in self.arms}
            out["trials"] = {"per_arm": self.trials, "search": self.search,
                             "halving": self.halving}
        return out


# ---------------------------------------------------------------------------------------
# Parsing helpers


def _fail(message: str) -> StudyConfigError:
    return StudyConfigError(f"study config: {message}")


def _check_keys(table: Mapping[str, Any], allowed: tuple[str, ...], where: str) -> None:
    for key in table:
        if key not in allowed:
            name = f"{where}.{key}" if where else key
            scope = f"in [{where}]" if where else "at the top level"
            listed = ", ".join(allowed) if allowed else "(none)"
            raise _fail(f"unknown key '{name}'; allowed keys {scope}: {listed}")


def _type_name(value: Any) -> str:
    return type(value).__name__


def _get_int(table: Mapping[str, Any], key: str, where: str, default: int | None,
             minimum: int | None = None) -> int | None:
    if key not in table:
        return default
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, int):
        raise _fail(f"'{where}.{key}' must be an integer, got {value!r} ({_type_name(value)})")
    if minimum is not None and value < minimum:
        raise _fail(f"'{where}.{key}' must be >= {minimum}, got {value}")
    return value


def _get_float(table: Mapping[str, Any], key: str, where: str, default: float | None,
               low: float | None = None, high: float | None = None,
               low_open: bool = False, high_open: bool = False) -> float | None:
    if key not in table:
        return default
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise _fail(f"'{where}.{key}' must be a number, got {value!r} ({_type_name(value)})")
    value = float(value)
    if not math.isfinite(value):
        raise _fail(f"'{where}.{key}' must be finite, got {value}")
    if low is not None and (value < low or (low_open and value == low)):
        sign = ">" if low_open else ">="
        raise _fail(f"'{where}.{key}' must be {sign} {low}, got {value}")
    if high is not None and (value > high or (high_open and value == high)):
        sign = "<" if high_open else "<="
        raise _fail(f"'{where}.{key}' must be {sign} {high}, got {value}")
    return value


def _get_str(table: Mapping[str, Any], key: str, where: str, default: str | None,
             choices: tuple[str, ...] | None = None) -> str | None:
    if key not in table:
        return default
    value = table[key]
    if not isinstance(value, str):
        raise _fail(f"'{where}.{key}' must be a string, got {value!r} ({_type_name(value)})")
    if choices is not None and value not in choices:
        raise _fail(f"'{where}.{key}' must be one of {', '.join(choices)}; got {value!r}")
    return value


def _get_bool(table: Mapping[str, Any], key: str, where: str, default: bool) -> bool:
    if key not in table:
        return default
    value = table[key]
    if not isinstance(value, bool):
        raise _fail(f"'{where}.{key}' must be true or false, got {value!r}")
    return value


def _get_table(doc: Mapping[str, Any], key: str) -> Mapping[str, Any]:
    value = doc.get(key, {})
    if not isinstance(value, Mapping):
        raise _fail(f"'{key}' must be a table ([{key}]), got {value!r}")
    return value


# ---------------------------------------------------------------------------------------
# Sections


def _parse_seeds(table: Mapping[str, Any]) -> tuple[int, ...]:
    value = table.get("seeds", 5)
    if isinstance(value, bool):
        raise _fail(f"'study.seeds' must be a count or a list of integers, got {value!r}")
    if isinstance(value, int):
        if value < 2:
            raise _fail(f"'study.seeds' must be at least 2 (paired intervals need 2; "
                        f"5 or more recommended), got {value}")
        return tuple(range(value))
    if isinstance(value, list):
        if len(value) < 2 or not all(isinstance(s, int) and not isinstance(s, bool)
                                     for s in value):
            raise _fail(f"'study.seeds' must list at least 2 integers, got {value!r}")
        if len(set(value)) != len(value):
            raise _fail(f"'study.seeds' has repeated seeds, got {value!r}")
        if any(s < 0 for s in value):
            raise _fail(f"'study.seeds' must be non-negative, got {value!r}")
        return tuple(value)
    raise _fail(f"'study.seeds' must be a count or a list of integers, got {value!r}")


def _csv_header(path: Path) -> list[str]:
    """The header row of a CSV file (stripped names), read as UTF-8."""
    try:
        with path.open("rb") as handle:
            first = handle.readline()
    except OSError as exc:
        raise _fail(f"cannot read data file {str(path)!r}: {exc}") from None
    if first.startswith(b"\xef\xbb\xbf"):
        first = first[3:]
    try:
        text = first.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise _fail(f"data file {str(path)!r} is not UTF-8 text: byte {exc.start} of line 1 "
                    f"is {first[exc.start:exc.start + 1]!r}; save the file as UTF-8") from None
    return [h.strip() for h in next(csv.reader([text.rstrip("\r\n")]), [])]


def _check_csv_target(path: Path, target: str,
                      columns: tuple[tuple[str, str], ...] = ()) -> None:
    """Refuse a CSV file whose header lacks the target or a column named by another key
    (``columns``: pairs of key and column name)."""
    header = _csv_header(path)
    listed = ", ".join(repr(h) if not h else h for h in header) or "(no header)"
    if target not in header:
        raise _fail(f"target column 'data.target' = {target!r} is missing from {str(path)!r}; "
                    f"columns: {listed}")
    for key, name in columns:
        if name not in header:
            raise _fail(f"'{key}' names column {name!r}, which is missing from {str(path)!r}; "
                        f"columns: {listed}")


_DATA_KEYS = ("source", "target", "task", "train_size", "val_fraction", "test_fraction",
              "standardize", "missing", "drop_columns", "features", "split_column",
              "group_column", "val_source", "test_source", "folds")
#: Keys that name CSV columns (refused for .npz files and built-in sources).
_CSV_ONLY_KEYS = ("drop_columns", "features", "split_column", "group_column")


def _get_names(table: Mapping[str, Any], key: str, where: str) -> tuple[str, ...] | None:
    if key not in table:
        return None
    value = table[key]
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        raise _fail(f"'{where}.{key}' must be a list of column names, got {value!r}")
    if len(set(value)) != len(value):
        raise _fail(f"'{where}.{key}' has repeated names, got {value!r}")
    return tuple(value)


def _data_file(value: str, key: str, base_dir: Path, suffix: str | None) -> Path:
    path = Path(value)
    if suffix is not None and path.suffix.lower() != suffix:
        raise _fail(f"'data.{key}' must be a {suffix} file like 'data.source', got {value!r}")
    full = path if path.is_absolute() else base_dir / path
    if not full.is_file():
        raise _fail(f"'data.{key}' file does not exist: {str(full)!r}; give a path "
                    "relative to the study file or an absolute path")
    return full


def _parse_data(table: Mapping[str, Any], base_dir: Path) -> DataConfig:
    """``[data]``: see :class:`DataConfig`; combinations of keys are checked here."""
    _check_keys(table, _DATA_KEYS, "data")
    given = set(table)

    def refuse_together(key: str, others: tuple[str, ...], why: str) -> None:
        if key in given:
            for other in others:
                if other in given:
                    raise _fail(f"'data.{key}' and 'data.{other}' cannot be given together: "
                                f"{why}")

    source = _get_str(table, "source", "data", "digits")
    target = _get_str(table, "target", "data", "target")
    task = _get_str(table, "task", "data", None, DATA_TASKS)
    missing = _get_str(table, "missing", "data", "refuse", MISSING_POLICIES)
    drop_columns = _get_names(table, "drop_columns", "data") or ()
    features = _get_names(table, "features", "data")
    if features is not None and not features:
        raise _fail("'data.features' is empty; list at least one feature column or omit it "
                    "(every column that is not the target, split or group column)")
    split_column = _get_str(table, "split_column", "data", None)
    group_column = _get_str(table, "group_column", "data", None)
    val_source = _get_str(table, "val_source", "data", None)
    test_source = _get_str(table, "test_source", "data", None)
    folds = _get_int(table, "folds", "data", None, minimum=2)
    if folds is not None and folds > MAX_FOLDS:
        raise _fail(f"'data.folds' must be between 2 and {MAX_FOLDS}, got {folds}")

    refuse_together("split_column", ("val_fraction", "test_fraction", "folds", "test_source",
                                     "val_source", "group_column", "train_size"),
                    "the split column fixes the training, validation and test rows (the same "
                    "split for every seed); remove the other key")
    refuse_together("folds", ("test_fraction", "test_source"),
                    "with k-fold each fold is the test part in turn; remove the other key")
    refuse_together("test_source", ("test_fraction",),
                    "the test part is the test file; remove 'data.test_fraction'")
    refuse_together("val_source", ("val_fraction",),
                    "the validation part is the validation file; remove 'data.val_fraction'")
    if "val_source" in given and "test_source" not in given:
        raise _fail("'data.val_source' needs 'data.test_source' (the test file); give both, "
                    "or only 'data.test_source' to carve the validation part from "
                    "'data.source' by 'data.val_fraction'")
    if "val_source" in given and "train_size" in given:
        raise _fail("'data.train_size' cannot be given with 'data.val_source' and "
                    "'data.test_source': the files fix every part (the same split for every "
                    "seed); remove 'data.train_size' or shorten the training file")
    if features is not None and drop_columns:
        raise _fail("give 'data.features' (the columns to use) or 'data.drop_columns' (the "
                    "columns not to use), not both")
    roles = {"data.target": target}
    for key, name in (("data.split_column", split_column), ("data.group_column", group_column)):
        if name is None:
            continue
        for other, taken in roles.items():
            if name == taken:
                raise _fail(f"'{key}' = {name!r} is also '{other}'; name another column")
        roles[key] = name
    for key, names in (("data.drop_columns", drop_columns), ("data.features", features or ())):
        for name in names:
            for other, taken in roles.items():
                if name == taken:
                    raise _fail(f"'{key}' lists {name!r}, which is '{other}' (never a "
                                "feature); remove it from the list")

    if source in BUILTIN_SOURCES:
        csv_keys = [k for k in _CSV_ONLY_KEYS + ("val_source", "test_source") if k in given]
        if csv_keys:
            raise _fail(f"'data.{csv_keys[0]}' applies to .csv files; 'data.source' is the "
                        f"built-in set {source!r}")
        if task is not None and task != BUILTIN_TASKS[source]:
            raise _fail(f"'data.task' = {task!r} does not fit the built-in set {source!r} "
                        f"(a {BUILTIN_TASKS[source]} set); remove 'data.task'")
    else:
        suffix = Path(source).suffix.lower()
        if suffix not in (".csv", ".npz"):
            raise _fail(f"'data.source' must be one of {', '.join(BUILTIN_SOURCES)} or a "
                        f".csv / .npz file, got {source!r}")
        if suffix == ".npz":
            npz_keys = [k for k in _CSV_ONLY_KEYS if k in given]
            if npz_keys:
                raise _fail(f"'data.{npz_keys[0]}' names CSV columns; 'data.source' is a "
                            f".npz file (arrays x and y): use a .csv file or remove the key")
        files = [_data_file(source, "source", base_dir, None)]
        for key, value in (("val_source", val_source), ("test_source", test_source)):
            if value is not None:
                full = _data_file(value, key, base_dir, suffix)
                if any(full.resolve() == other.resolve() for other in files):
                    raise _fail(f"'data.{key}' = {value!r} is a file already used for another "
                                "part; training, validation and test files must differ")
                files.append(full)
        if suffix == ".csv":
            columns = tuple((f"data.{key}", name) for key, name in (
                ("split_column", split_column), ("group_column", group_column))
                if name is not None)
            columns += tuple(("data.features", n) for n in features or ())
            columns += tuple(("data.drop_columns", n) for n in drop_columns)
            for full in files:
                _check_csv_target(full, target, columns)

    scheme_has_val_fraction = split_column is None and val_source is None
    scheme_has_test_fraction = split_column is None and test_source is None and folds is None
    val_fraction = (_get_float(table, "val_fraction", "data", 0.2, 0.0, 1.0, True, True)
                    if scheme_has_val_fraction else None)
    test_fraction = (_get_float(table, "test_fraction", "data", 0.3, 0.0, 1.0, True, True)
                     if scheme_has_test_fraction else None)
    if (val_fraction is not None and test_fraction is not None
            and val_fraction + test_fraction >= 1.0):
        raise _fail("'data.val_fraction' + 'data.test_fraction' must be < 1, got "
                    f"{val_fraction} + {test_fraction}")
    return DataConfig(
        source=source,
        target=target,
        train_size=_get_int(table, "train_size", "data", None, minimum=2),
        val_fraction=val_fraction,
        test_fraction=test_fraction,
        standardize=_get_bool(table, "standardize", "data", True),
        task=task,
        missing=missing,
        drop_columns=drop_columns,
        features=features,
        split_column=split_column,
        group_column=group_column,
        val_source=val_source,
        test_source=test_source,
        folds=folds,
    )


def _parse_layer_selection(value: Any, where: str) -> str | tuple[str, ...]:
    """``"hidden"``, ``"hidden+output"`` or a non-empty list of parameter-name patterns."""
    hint = ("\"hidden\" (every Linear/Conv weight but the output layer's), \"hidden+output\", "
            "or a list of parameter-name patterns such as [\"features.*.weight\", "
            "\"fc1.weight\"]")
    if isinstance(value, str):
        if value in LAYER_SELECTIONS:
            return value
        raise _fail(f"'{where}' must be {hint}; got {value!r} (a single pattern goes in a "
                    "list)")
    if not isinstance(value, list) or not value:
        raise _fail(f"'{where}' must be {hint}; got {value!r}")
    for pattern in value:
        if not isinstance(pattern, str) or not pattern.strip():
            raise _fail(f"'{where}' patterns must be non-empty strings, got {pattern!r}")
    if len(set(value)) != len(value):
        raise _fail(f"'{where}' has repeated patterns, got {value!r}")
    return tuple(value)


def _parse_model(table: Mapping[str, Any]) -> ModelConfig:
    _check_keys(table, ("widths", "activation", "factory", "constrain"), "model")
    constrain = _parse_layer_selection(table.get("constrain", "hidden"), "model.constrain")
    factory = _get_str(table, "factory", "model", None)
    if factory is not None:
        if "widths" in table or "activation" in table:
            raise _fail("'model.factory' replaces 'model.widths' and 'model.activation'; "
                        "give either the factory or the MLP keys, not both")
        module, sep, func = factory.partition(":")
        if not sep or not module or not func:
            raise _fail(f"'model.factory' must look like 'package.module:function', "
                        f"got {factory!r}")
        return ModelConfig(widths=(), activation="relu", factory=factory,
                           constrain=constrain)
    widths = table.get("widths", [64])
    if (not isinstance(widths, list) or not widths
            or not all(isinstance(w, int) and not isinstance(w, bool) and w >= 1
                       for w in widths)):
        raise _fail(f"'model.widths' must be a non-empty list of positive integers, "
                    f"got {widths!r}")
    activation = _get_str(table, "activation", "model", "relu", ACTIVATIONS)
    return ModelConfig(widths=tuple(widths), activation=activation, constrain=constrain)


def _parse_budget(table: Mapping[str, Any]) -> BudgetConfig:
    _check_keys(table, ("epochs", "batch_size", "step", "friction", "lr", "momentum",
                        "temperature", "schedule", "projection", "dtype"), "budget")
    langevin = [k for k in ("step", "friction") if k in table]
    sgd = [k for k in ("lr", "momentum") if k in table]
    if langevin and sgd:
        raise _fail("'budget' takes either step + friction or lr + momentum, not both; "
                    f"got {', '.join(langevin + sgd)}")
    step = _get_float(table, "step", "budget", None, 0.0, None, low_open=True)
    friction = _get_float(table, "friction", "budget", 1.0 if step is not None else None,
                          0.0, None, low_open=True)
    lr = _get_float(table, "lr", "budget", None, 0.0, None, low_open=True)
    momentum = _get_float(table, "momentum", "budget", 0.9 if lr is not None else None,
                          0.0, 1.0, high_open=True)
    if step is None and lr is None:
        if langevin:
            raise _fail("'budget.step' is required with 'budget.friction'")
        if sgd:
            raise _fail("'budget.lr' is required with 'budget.momentum'")
        lr, momentum = 0.05, 0.9
    return BudgetConfig(
        epochs=_get_int(table, "epochs", "budget", 30, minimum=1),
        batch_size=_get_int(table, "batch_size", "budget", 32, minimum=1),
        step=step,
        friction=friction,
        lr=lr,
        momentum=momentum,
        temperature=_get_float(table, "temperature", "budget", 0.0, 0.0, None),
        schedule=_get_str(table, "schedule", "budget", "constant", SCHEDULES),
        projection=_get_str(table, "projection", "budget", "rattle", PROJECTIONS),
        dtype=_get_str(table, "dtype", "budget", "float32", DTYPES),
    )


#: Keys of ``[arms.NAME]``.
_ARM_KEYS = ("regulariser", "optimiser", "constrain", "strength", "lr", "momentum",
             "temperature", "search", "grid", "groups", "ensemble")
#: Hyperparameters an arm may fix or search (strength: the regulariser's).
_SETTING_KEYS = ("strength", "lr", "momentum", "temperature")
#: Keys of ``[[arms.NAME.groups]]`` (the optimiser decides which apply).
_GROUP_KEYS = ("layers", "lr", "lr_scale", "momentum", "temperature", "temperature_scale",
               "adaptive")
#: Named selections a group's ``layers`` may give besides patterns.
GROUP_SELECTIONS = LAYER_SELECTIONS + ("output",)
_ARM_NAME = re.compile(r"^[A-Za-z0-9_]+$")


def _number(value: Any, key: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise _fail(f"'{key}' must be a number, got {value!r} ({_type_name(value)})")
    value = float(value)
    if not math.isfinite(value):
        raise _fail(f"'{key}' must be finite, got {value}")
    return value


def _check_setting(name: str, value: float, key: str, regulariser: Any) -> float:
    """A value of a hyperparameter, checked against its allowed interval."""
    from holonomic.study.optimisers import HYPERPARAMETERS

    if name == "strength":
        return regulariser.check_strength(value, key)
    spec = HYPERPARAMETERS[name]
    if not spec.ok(value):
        raise _fail(f"'{key}' = {value!r}: {name} ({spec.meaning}) must be {spec.allowed()}")
    return value


def _parse_search_value(value: Any, name: str, key: str, regulariser: Any) -> Any:
    """A list of values, or a range table ``{low, high, scale}``."""
    from holonomic.study.search import SCALES, Range

    if isinstance(value, list):
        if not value:
            raise _fail(f"'{key}' is empty; give at least one value or a range "
                        "{low = ..., high = ..., scale = \"log\" | \"linear\"}")
        values = tuple(_check_setting(name, _number(v, key), key, regulariser) for v in value)
        if len(set(values)) != len(values):
            raise _fail(f"'{key}' has repeated values, got {value!r}")
        return values
    if isinstance(value, Mapping):
        _check_keys(value, ("low", "high", "scale"), key)
        for bound in ("low", "high"):
            if bound not in value:
                raise _fail(f"'{key}.{bound}' is missing; a range needs low and high (and "
                            f"scale: {', '.join(SCALES)}; default log)")
        low = _check_setting(name, _number(value["low"], f"{key}.low"), f"{key}.low",
                             regulariser)
        high = _check_setting(name, _number(value["high"], f"{key}.high"), f"{key}.high",
                              regulariser)
        scale = _get_str(value, "scale", key, "log", SCALES)
        if not low < high:
            raise _fail(f"'{key}' needs low < high, got low = {low}, high = {high}")
        if scale == "log" and low <= 0:
            raise _fail(f"'{key}.low' must be > 0 on scale \"log\", got {low}; use scale = "
                        "\"linear\" or a positive low")
        return Range(low, high, scale)
    raise _fail(f"'{key}' must be a list of values or a range {{low, high, scale}}, got "
                f"{value!r}")


def _parse_groups(value: Any, where: str, optimiser: Any) -> tuple[GroupConfig, ...]:
    """``[[arms.NAME.groups]]``: per-layer settings of the arm's optimiser."""
    if not isinstance(value, list) or not all(isinstance(g, Mapping) for g in value):
        raise _fail(f"'{where}' must be an array of tables ([[{where}]]), got {value!r}")
    allowed = ("layers",) + optimiser.group_keys
    groups = []
    for i, group in enumerate(value):
        key = f"{where}[{i}]"
        for name in group:
            if name not in _GROUP_KEYS:
                raise _fail(f"unknown key '{key}.{name}'; allowed keys in [[{where}]]: "
                            f"{', '.join(_GROUP_KEYS)}")
            if name not in allowed:
                raise _fail(f"'{key}.{name}' does not apply to optimiser "
                            f"{optimiser.name!r}; allowed keys for it: {', '.join(allowed)}")
        if "layers" not in group:
            raise _fail(f"'{key}.layers' is missing; give {', '.join(GROUP_SELECTIONS)} or a "
                        "list of parameter-name patterns such as [\"0.*\"]")
        layers = group["layers"]
        if isinstance(layers, str):
            if layers not in GROUP_SELECTIONS:
                raise _fail(f"'{key}.layers' must be one of {', '.join(GROUP_SELECTIONS)} or "
                            f"a list of parameter-name patterns, got {layers!r}")
        else:
            layers = _parse_layer_selection(layers, f"{key}.layers")
        settings = []
        for name in _GROUP_KEYS[1:]:
            if name not in group:
                continue
            if name == "adaptive":
                settings.append((name, _get_bool(group, name, key, True)))
                continue
            base = name.removesuffix("_scale")
            if name.endswith("_scale"):
                if base in group:
                    raise _fail(f"'{key}' gives both {base} and {name}; give one (absolute, "
                                "or a factor times the arm's value)")
                factor = _number(group[name], f"{key}.{name}")
                if not factor > 0:
                    raise _fail(f"'{key}.{name}' must be > 0, got {factor}")
                settings.append((name, factor))
            else:
                settings.append((name, _check_setting(
                    name, _number(group[name], f"{key}.{name}"), f"{key}.{name}", None)))
        if len(settings) == 0:
            raise _fail(f"'{key}' sets nothing; give at least one of "
                        f"{', '.join(k for k in allowed if k != 'layers')}")
        groups.append(GroupConfig(layers, tuple(settings)))
    return tuple(groups)


def _parse_arm(name: str, body: Any, uses_grid: bool, defaults: Mapping[str, float]) -> ArmConfig:
    """One ``[arms.NAME]`` table without its trials (:func:`_plan_arm_trials` adds them)."""
    from holonomic.study.optimisers import OPTIMISERS
    from holonomic.study.regularisers import REGULARISERS
    from holonomic.study.search import Range

    where = f"arms.{name}"
    if not _ARM_NAME.match(name):
        raise _fail(f"arm name {name!r} ('{where}') may hold only letters, digits and _; "
                    f"e.g. [arms.sgd_weight_decay]")
    if not isinstance(body, Mapping):
        raise _fail(f"'{where}' must be a table ([{where}]), got {body!r}")
    _check_keys(body, _ARM_KEYS, where)
    if "regulariser" in body:
        regulariser = _get_str(body, "regulariser", where, None, tuple(REGULARISERS))
    elif name in REGULARISERS:
        regulariser = name
    else:
        raise _fail(f"'{where}.regulariser' is missing (the arm's name is not a regulariser); "
                    f"allowed: {', '.join(REGULARISERS)}")
    optimiser = _get_str(body, "optimiser", where, "langevin", tuple(OPTIMISERS))
    reg, opt = REGULARISERS[regulariser], OPTIMISERS[optimiser]
    if reg.optimisers is not None and optimiser not in reg.optimisers:
        raise _fail(f"'{where}.optimiser' = {optimiser!r} does not work with regulariser "
                    f"{regulariser!r}; allowed optimisers for it: {', '.join(reg.optimisers)}. "
                    + reg.instead.format(opt=repr(optimiser)))
    ensemble = None
    if "ensemble" in body:
        ensemble = _parse_ensemble(body["ensemble"], f"{where}.ensemble")
        if optimiser != "langevin" and optimiser != "adaptive_langevin":
            raise _fail(f"'{where}.ensemble' samples with the holonomic samplers after "
                        f"training with a Langevin optimiser; optimiser {optimiser!r} is not "
                        "one: use optimiser = \"langevin\" or \"adaptive_langevin\", or remove "
                        f"[{where}.ensemble]")
    constrain = None
    if "constrain" in body:
        if not reg.selects_layers:
            selecting = ", ".join(n for n, r in REGULARISERS.items() if r.selects_layers)
            what = ("weight decay acts on every parameter" if "weight_decay" in regulariser
                    else f"the {regulariser} regulariser acts on no selected weight")
            raise _fail(f"'{where}.constrain' has no effect: {what}; 'constrain' applies "
                        f"to {selecting} (remove it here)")
        constrain = _parse_layer_selection(body["constrain"], f"{where}.constrain")
    settable = opt.hyperparameters + (("strength",) if reg.has_strength else ())
    fixed = []
    for key in _SETTING_KEYS:
        if key not in body:
            continue
        if key not in settable:
            raise _fail(f"'{where}.{key}' does not apply: {_no_such_setting(key, reg, opt)}; "
                        f"settable for this arm: {', '.join(settable)}")
        fixed.append((key, _check_setting(key, _number(body[key], f"{where}.{key}"),
                                          f"{where}.{key}", reg)))
    search: dict[str, Any] = {}
    if "grid" in body:
        if not reg.has_strength:
            raise _fail(f"unknown key '{where}.grid': the {regulariser} regulariser has no "
                        "strength to search; remove it")
        if "strength" in body or "strength" in (body.get("search") or {}):
            raise _fail(f"'{where}.grid' is the old name of 'search.strength'; give one of "
                        "grid, search.strength or strength")
        grid = body["grid"]
        if not isinstance(grid, list):
            raise _fail(f"'{where}.grid' must be a list of numbers, got {grid!r}")
        if not grid:
            raise _fail(f"'{where}.grid' is empty; give at least one strength ({reg.meaning})")
        search["strength"] = _parse_search_value(grid, "strength", f"{where}.grid", reg)
    if "search" in body:
        table = body["search"]
        if not isinstance(table, Mapping):
            raise _fail(f"'{where}.search' must be a table (search.lr = ...), got {table!r}")
        for key, value in table.items():
            if key not in settable:
                allowed = ", ".join(settable)
                raise _fail(f"'{where}.search.{key}' cannot be searched for this arm; allowed: "
                            f"{allowed}")
            if key in body:
                raise _fail(f"'{where}.{key}' is fixed and 'search.{key}' searches it; give "
                            "one")
            search[key] = _parse_search_value(value, key, f"{where}.search.{key}", reg)
    fixed_keys = {k for k, _ in fixed}
    if "grid" not in body and "search" not in body and not uses_grid:
        # a one-line arm: the default space (strength on its default range, lr around the
        # budget's), minus what the arm fixes
        if reg.has_strength and "strength" not in fixed_keys:
            search["strength"] = Range(*reg.default_range, "log")
        if "lr" not in fixed_keys:
            search["lr"] = Range(defaults["lr"] / 10.0, defaults["lr"] * 3.0, "log")
    if reg.has_strength and "strength" not in fixed_keys and "strength" not in search:
        raise _fail(f"'{where}.strength' is needed: the {regulariser} regulariser has a "
                    f"strength ({reg.meaning}); give strength = ..., search.strength or grid")
    groups = ()
    if "groups" in body:
        groups = _parse_groups(body["groups"], f"{where}.groups", opt)
    return ArmConfig(name, ensemble, constrain, regulariser, optimiser, tuple(fixed),
                     tuple(sorted(search.items())), groups)


def _no_such_setting(key: str, reg: Any, opt: Any) -> str:
    if key == "strength":
        return f"the {reg.name} regulariser has no strength"
    return f"optimiser {opt.name!r} ({opt.built_as}) has no {key}"


def _parse_arms(table: Mapping[str, Any], defaults: Mapping[str, float],
                ) -> tuple[ArmConfig, ...]:
    """Every ``[arms.NAME]`` in file order, without trials."""
    if not table:
        raise _fail("no arms: add at least the baseline arm (study.baseline, default "
                    f"{BASELINE_ARM}) and one other arm; e.g. [arms.weight_decay] and "
                    "[arms.fixed_norm]")
    uses_grid = any(isinstance(body, Mapping) and "grid" in body for body in table.values())
    return tuple(_parse_arm(name, body, uses_grid, defaults) for name, body in table.items())


def _plan_arm_trials(arms: tuple[ArmConfig, ...], trials: int | None, method: str,
                     seed: int) -> tuple[tuple[ArmConfig, ...], int]:
    """Draw each arm's trials (:func:`holonomic.study.search.search_points`) and check the
    equal budget: every arm with a search space gets ``trials`` trials (``None``: the size
    of the grids when every searched arm is a grid of one size, else
    :data:`DEFAULT_TRIALS`)."""
    from dataclasses import replace

    from holonomic.study.search import Range, Trial, search_points

    def is_grid(arm: ArmConfig) -> bool:
        return bool(arm.search) and all(not isinstance(v, Range) for _, v in arm.search)

    def grid_size(arm: ArmConfig) -> int:
        return math.prod(len(v) for _, v in arm.search)

    given = trials is not None
    if trials is None:
        searched = [a for a in arms if a.search]
        sizes = {grid_size(a) for a in searched if is_grid(a)}
        if searched and all(is_grid(a) for a in searched) and len(sizes) == 1:
            trials = sizes.pop()
        elif searched and all(is_grid(a) for a in searched):
            listed = ", ".join(f"arms.{a.name} has {grid_size(a)}" for a in searched)
            raise _fail("every tuned arm needs the same number of grid points (a fair "
                        f"search: 'study.trials' each); got {listed}. Give every grid the "
                        "same length, or set 'study.trials' and give ranges instead of lists, "
                        "e.g. search.strength = {low = 0.25, high = 2.0, scale = \"log\"}")
        else:
            trials = DEFAULT_TRIALS
    out = []
    for arm in arms:
        if is_grid(arm) and grid_size(arm) != trials:
            source = "'study.trials'" if given else "the other arms' grids"
            raise _fail(f"'arms.{arm.name}': its grid has {grid_size(arm)} points but every "
                        f"arm gets {trials} trials ({source}); give {trials} grid points, or "
                        "ranges {low, high, scale} (sampled), or set 'study.trials'")
        points = search_points(dict(arm.search), trials, method, seed)
        searched = tuple(k for k, _ in arm.search)
        fixed = dict(arm.fixed)
        out.append(replace(arm, trials=tuple(
            Trial(arm.name, i, {**fixed, **point}, searched)
            for i, point in enumerate(points))))
    return tuple(out), trials


def _check_baseline(config: StudyConfig, given: bool) -> None:
    """The baseline arm (``study.baseline``) must be one of the study's arms."""
    names = [a.name for a in config.arms]
    if config.baseline in names:
        return
    if given:
        raise _fail(f"'study.baseline' = {config.baseline!r} is not an arm of this study; "
                    f"allowed: the study's arms, {', '.join(names)} (or add "
                    f"[arms.{config.baseline}])")
    raise _fail(f"'arms.{config.baseline}' is missing: every arm is compared against the "
                f"baseline arm (study.baseline, default {BASELINE_ARM}); add "
                f"[arms.{config.baseline}] (its search space as for any arm), or set "
                f"'study.baseline' to one of the study's arms: {', '.join(names)}")


def _parse_ensemble(table: Any, where: str) -> EnsembleConfig:
    """``[arms.NAME.ensemble]``: see :class:`EnsembleConfig`."""
    if not isinstance(table, Mapping):
        raise _fail(f"'{where}' must be a table ([{where}]), got {table!r}")
    _check_keys(table, ("temperature", "samples", "every", "burn_in", "sampler", "step",
                        "friction"), where)
    for key in ("temperature", "samples"):
        if key not in table:
            raise _fail(f"'{where}.{key}' is missing; an ensemble needs temperature (> 0; "
                        f"1 = the Bayesian posterior) and samples (>= {MIN_ENSEMBLE_SAMPLES})")
    return EnsembleConfig(
        temperature=_get_float(table, "temperature", where, None, 0.0, None, low_open=True),
        samples=_get_int(table, "samples", where, None, minimum=MIN_ENSEMBLE_SAMPLES),
        every=_get_int(table, "every", where, 1, minimum=1),
        burn_in=_get_int(table, "burn_in", where, None, minimum=0),
        sampler=_get_str(table, "sampler", where, "adaptive", SAMPLERS),
        step=_get_float(table, "step", where, None, 0.0, None, low_open=True),
        friction=_get_float(table, "friction", where, None, 0.0, None, low_open=True),
    )


def _parse_audit(table: Mapping[str, Any]) -> int:
    """``[audit] every``: optimizer steps between audit records (>= 1)."""
    _check_keys(table, ("every",), "audit")
    return _get_int(table, "every", "audit", DEFAULT_AUDIT_EVERY, minimum=1)


def _parse_halving(study: Mapping[str, Any]) -> float | None:
    """``study.halving``: false (default), true (fraction 0.25) or ``{fraction = f}``."""
    value = study.get("halving", False)
    if isinstance(value, bool):
        return DEFAULT_HALVING_FRACTION if value else None
    if isinstance(value, Mapping):
        _check_keys(value, ("fraction",), "study.halving")
        return _get_float(value, "fraction", "study.halving", DEFAULT_HALVING_FRACTION,
                          0.0, 1.0, low_open=True, high_open=True)
    raise _fail(f"'study.halving' must be true, false or a table {{fraction = f}} with "
                f"0 < f < 1; got {value!r}")


def parse_config(doc: Mapping[str, Any], *, base_dir: str | Path = ".",
                 default_name: str = "study") -> StudyConfig:
    """Validate a parsed TOML document and return a :class:`StudyConfig`.

    Raises:
        StudyConfigError: naming the offending key and the allowed values.
    """
    from holonomic.study.optimisers import budget_defaults
    from holonomic.study.search import SEARCH_METHODS

    _check_keys(doc, ("study", "data", "model", "budget", "arms", "audit"), "")
    base = Path(base_dir)
    study = _get_table(doc, "study")
    _check_keys(study, ("name", "seeds", "selection", "baseline", "min_effect", "trials",
                        "search", "halving"), "study")
    baseline = _get_str(study, "baseline", "study", BASELINE_ARM)
    min_effect = _get_float(study, "min_effect", "study", None, 0.0, None, low_open=True)
    seeds = _parse_seeds(study)
    budget = _parse_budget(_get_table(doc, "budget"))
    method = _get_str(study, "search", "study", "sobol", SEARCH_METHODS)
    arms, trials = _plan_arm_trials(
        _parse_arms(_get_table(doc, "arms"), budget_defaults(budget)),
        _get_int(study, "trials", "study", None, minimum=1), method, seeds[0])
    config = StudyConfig(
        name=_get_str(study, "name", "study", default_name),
        seeds=seeds,
        selection=_get_str(study, "selection", "study", None, SELECTION_METRICS),
        data=_parse_data(_get_table(doc, "data"), base),
        model=_parse_model(_get_table(doc, "model")),
        budget=budget,
        arms=arms,
        base_dir=str(base),
        audit_every=_parse_audit(_get_table(doc, "audit")),
        baseline=baseline,
        min_effect=min_effect,
        trials=trials,
        search=method,
        halving=_parse_halving(study),
    )
    _check_baseline(config, given="baseline" in study)
    if config.data.task is not None:  # data.task given: check the selection now, not at start
        selection_metric(config, config.data.task)
    folds = config.data.folds or 1
    for arm in config.arms:
        if arm.ensemble is not None and folds > 1:
            raise _fail(f"'arms.{arm.name}.ensemble' cannot be combined with 'data.folds' = "
                        f"{folds}: the chains of the folds sample different posteriors and "
                        "their traces cannot be pooled for the mixing diagnostics; use a "
                        "hold-out split (remove 'data.folds') for the ensemble phase, or "
                        f"remove [arms.{arm.name}.ensemble]")
        if (arm.ensemble is not None and arm.ensemble.sampler == "adaptive"
                and arm.ensemble.friction is None
                and not math.isfinite(config.budget.step_friction()[1])):
            raise _fail(f"'arms.{arm.name}.ensemble.friction' is needed: the budget's momentum "
                        "0 gives infinite friction, which the adaptive sampler cannot start "
                        "from; give a finite friction or sampler = \"langevin\"")
    return config


def selection_metric(config: StudyConfig, task: Any) -> str:
    """The validation metric that chooses each arm's setting: ``study.selection``, or the
    task's default (``val_accuracy`` for classification, ``val_rmse`` for regression).

    ``task``: a :class:`holonomic.study.tasks.Task` (its metrics decide, so ``val_roc_auc``
    needs two classes), or a task name (``"classification"`` / ``"regression"``; with a
    name only, ROC AUC is allowed for classification since the classes are not known yet).
    Larger is better per :meth:`holonomic.study.tasks.Task.higher_is_better` of the name
    without ``val_``.

    Raises:
        StudyConfigError: the metric is not one this task records; the message names
            ``study.selection`` and the allowed values for the task.
    """
    if isinstance(task, str):
        from holonomic.study.tasks import TASKS, Task

        if task not in TASKS:
            raise _fail(f"unknown task {task!r}; allowed: {', '.join(TASKS)}")
        name = task
        metrics = Task(task, 2).metrics if task == "classification" else Task(task).metrics
        described = task
    else:
        name, metrics = task.name, task.metrics
        described = (f"classification with {task.n_classes} classes"
                     if name == "classification" else name)
    if config.selection is None:
        return DEFAULT_SELECTION[name]
    allowed = tuple(f"val_{m}" for m in metrics)
    if config.selection not in allowed:
        hint = (" (ROC AUC is defined for two classes only)"
                if config.selection == "val_roc_auc" and name == "classification" else "")
        raise _fail(f"'study.selection' = {config.selection!r} is not a metric of this study's "
                    f"task ({described}){hint}; allowed for this task: {', '.join(allowed)}")
    return config.selection


def factory_source_file(factory: str, base_dir: str | Path | None) -> Path | None:
    """The source file of a ``model.factory`` module (``"module:function"``), looked up as
    the study imports it (the study file's folder first on the path), or None when it
    cannot be found (not importable, no source file: a compiled or namespace module).

    The module itself is not executed (``importlib.util.find_spec``; the parent packages of
    a dotted name are imported, as any lookup of a submodule does), unless it is already
    imported, when its loaded spec is used.
    """
    import importlib.util
    import sys

    from holonomic.study.models import import_path

    module_name = factory.partition(":")[0]
    try:
        with import_path(base_dir):
            module = sys.modules.get(module_name)
            spec = (getattr(module, "__spec__", None) if module is not None
                    else importlib.util.find_spec(module_name))
    except (ImportError, ValueError, SyntaxError):
        return None
    origin = getattr(spec, "origin", None) if spec is not None else None
    if not origin or not getattr(spec, "has_location", False):
        return None
    path = Path(origin)
    return path if path.is_file() else None


def factory_source_hash(factory: str, base_dir: str | Path | None) -> str:
    """Hash of the factory module's source file (:func:`factory_source_file`), so runs of an
    edited factory are not mixed with old ones. When the file cannot be found (the factory
    is refused later anyway, or it has no source file) only the name is in the training
    fingerprint: ``"unknown"`` here."""
    path = factory_source_file(factory, base_dir)
    if path is None:
        return "unknown"
    try:
        return hashlib.sha256(path.read_bytes()).hexdigest()[:16]
    except OSError:
        return "unknown"


def load_config(path: str | Path) -> StudyConfig:
    """Read and validate a study file (UTF-8 TOML; a UTF-8 byte-order mark is allowed).

    Raises:
        StudyConfigError: the file is missing, not UTF-8 (naming the byte offset), not
            valid TOML, or not a valid study.
    """
    path = Path(path)
    if not path.is_file():
        raise StudyConfigError(f"study config: file does not exist: {str(path)!r}")
    raw = path.read_bytes()
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        hint = (" (it looks like UTF-16: save it as UTF-8)"
                if raw[:2] in (b"\xff\xfe", b"\xfe\xff") else "")
        raise StudyConfigError(
            f"study config: {str(path)!r} is not UTF-8 text: byte {exc.start} "
            f"(0x{raw[exc.start]:02x}) cannot be decoded{hint}; study files are UTF-8 TOML, "
            "save it with UTF-8 encoding") from None
    if text.startswith("\ufeff"):  # a UTF-8 byte-order mark, as some editors write
        text = text[1:]
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise StudyConfigError(f"study config: {str(path)!r} is not valid TOML: {exc}") from exc
    return parse_config(doc, base_dir=path.parent, default_name=path.stem)
