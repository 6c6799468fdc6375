"""What a study trained: the saved weights of every run, and predicting with them.

Every finished run of a study saves its trained network next to its record::

    DIR/runs/<key>.pt              hold-out data (key: holonomic.study.storage.run_key)
    DIR/runs/<key>.fold<j>.pt      k-fold data, one file per fold j = 0 .. k-1

The file is written (temporary file, fsync, rename) before the run's record
``DIR/runs/<key>.json``, whose ``"weights_file"`` (``"weights_files"`` for every fold) names
it relative to ``DIR``; a run that failed or diverged saves none (``weights_file`` null).
For an arm with an ensemble phase these are the trained weights, before sampling. A model
its regulariser changed when building it (dropout) records how (``model_options``), so
:func:`rebuild_model` builds the same network.

The file holds only tensors and plain values, so it loads with
``torch.load(path, weights_only=True)``:

==================  ============================================================================
key                 value
==================  ============================================================================
``state_dict``      ``model.state_dict()`` (constrained weights are plain tensors: nothing
                    needs ``holonomic.constrain`` again to predict)
``task``            ``"classification"`` or ``"regression"``
``classes``         class names, in the order of the network's outputs (``[]`` for regression)
``n_classes``       number of classes (0 for regression); ``n_outputs`` the output width
``feature_names``   the feature columns, in input order (``[]`` if the source has no names)
``feature_mean``,   float64 tensors (d,): inputs were standardised as ``(x - mean) / std``
``feature_std``     with the training part's statistics (zeros and ones when
                    ``data.standardize = false``)
``target_mean``,    the training part's target mean and standard deviation: a regression
``target_std``      network predicts ``(y - target_mean) / target_std`` (0 and 1 otherwise)
``model``           ``{"widths", "activation", "factory"}`` (the study's ``[model]``),
                    ``in_features``, ``dtype`` (``"float32"``/``"float64"``)
``arm``,            the run: arm, strength, seed, ``fold`` (None for hold-out), ``folds``,
``strength``, ...   ``key``, ``layers`` (parameters the arm acted on), ``data_fingerprint``
``study_dir``       the study file's folder when it was trained (a string; where a model
                    factory module beside the study file is looked for when rebuilding)
``imputation_mean`` only with ``data.missing = "mean"``: float64 tensor (d,), the training
                    part's feature means (raw units) that filled missing features
==================  ============================================================================

Rebuild and predict::

    from holonomic.study import load_trained, predict, class_probabilities

    model, info = load_trained("DIR", "fixed_norm", strength=0.5, seed=3)   # or a run key,
    labels = predict(model, info, x)          # class names, or targets in their own units
    probs = class_probabilities(model, info, x)   # classification: (n, k), float64

``x`` is a 2-D array of raw feature values (columns in the order of
``info["feature_names"]``, as in the data file, without the target column); with
``data.missing = "mean"`` a NaN in ``x`` is filled with ``info["imputation_mean"]`` (as in
training), otherwise a non-finite value is refused; :func:`predict` standardises it with
the saved statistics, runs the network in eval mode and maps regression outputs back
with ``target_mean + target_std * output``. A model factory (``model.factory``) must be
importable to rebuild the network: the study file's folder recorded at training time
(``info["study_dir"]``) and the folder above the study's ``--out`` directory are searched
first, then ``sys.path``.
By hand: ``build_model(ModelConfig(**info["model"]), info["in_features"],
info["n_outputs"], seed, dtype)`` from :mod:`holonomic.study.models`, then
``model.load_state_dict(info["state_dict"])`` and ``model.eval()``.
"""

from __future__ import annotations

import contextlib
import os
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn

from holonomic.study import storage

__all__ = ["class_probabilities", "load_trained", "load_weights", "predict", "rebuild_model",
           "save_run_weights", "weights_path"]

_DTYPES = {"float32": torch.float32, "float64": torch.float64}


def weights_path(out_dir: str | Path, key: str, fold: int | None = None) -> Path:
    """``DIR/runs/<key>.pt``, or ``DIR/runs/<key>.fold<j>.pt`` for fold ``j``."""
    name = f"{key}.pt" if fold is None else f"{key}.fold{fold}.pt"
    return storage.runs_dir(out_dir) / name


def _write_atomic(path: Path, payload: dict[str, Any]) -> None:
    """``torch.save`` to a temporary file in the same folder, fsync, rename onto ``path``
    (:func:`holonomic.study.storage.atomic_write_bytes_from`: a full disk names the file)."""
    def write(tmp: Path) -> None:
        with open(tmp, "wb") as handle:
            torch.save(payload, handle)
            handle.flush()
            os.fsync(handle.fileno())

    storage.atomic_write_bytes_from(path, write)


def save_run_weights(out_dir: str | Path, spec: Any, model: nn.Module, dataset: Any,
                     split: Any, task: Any, config: Any, layers: list[str],
                     fold: int | None = None, folds: int = 1) -> str:
    """Save one trained network (see the module docstring) and return its path relative
    to ``out_dir`` (forward slashes), for the run record's ``weights_file``."""
    path = weights_path(out_dir, spec.key, fold)
    path.parent.mkdir(parents=True, exist_ok=True)
    state = {name: value.detach().cpu().clone() for name, value in model.state_dict().items()}
    payload = {
        "state_dict": state,
        "task": task.name,
        "n_classes": int(task.n_classes),
        "n_outputs": int(task.n_outputs),
        "classes": [str(c) for c in dataset.classes],
        "feature_names": list(dataset.feature_names),
        "feature_mean": torch.as_tensor(np.asarray(split.feature_mean, dtype=np.float64)),
        "feature_std": torch.as_tensor(np.asarray(split.feature_std, dtype=np.float64)),
        "target_mean": float(task.target_mean),
        "target_std": float(task.target_std),
        "model": {"widths": [int(w) for w in config.model.widths],
                  "activation": str(config.model.activation),
                  "factory": config.model.factory},
        "in_features": int(np.asarray(split.x_train).shape[1]),
        "dtype": str(config.budget.dtype),
        "key": spec.key,
        "arm": spec.arm,
        "strength": float(spec.strength),
        "seed": int(spec.seed),
        "fold": fold,
        "folds": int(folds),
        "layers": [str(name) for name in layers],
        "data_fingerprint": dataset.fingerprint,
        "study_dir": str(Path(config.base_dir).resolve()),
    }
    options = _model_options(config, spec)
    if options:  # e.g. {"dropout": rate}: rebuild_model builds the same network
        payload["model_options"] = options
    imputation = getattr(split, "imputation_mean", None)
    if imputation is not None:  # data.missing = "mean": predict fills missing the same way
        payload["imputation_mean"] = torch.as_tensor(np.asarray(imputation, dtype=np.float64))
    _write_atomic(path, payload)
    return os.path.relpath(path, out_dir).replace(os.sep, "/")


def _model_options(config: Any, spec: Any) -> dict[str, Any]:
    """What the arm's regulariser changed when building the model (``{"dropout": rate}``
    for dropout), so :func:`rebuild_model` builds the same network."""
    from holonomic.study.regularisers import REGULARISERS

    try:
        regulariser = config.arm(spec.arm).regulariser
    except KeyError:
        return {}
    return REGULARISERS[regulariser].model_options(float(spec.strength))


def load_weights(path: str | Path) -> dict[str, Any]:
    """A saved weights file (``torch.load(path, weights_only=True)``, on the CPU)."""
    return torch.load(Path(path), map_location="cpu", weights_only=True)


def rebuild_model(info: dict[str, Any], study_dir: str | Path | None = None) -> nn.Module:
    """The network of a weights file with its weights loaded, in eval mode.

    A model factory (``model.factory``) is imported with the study file's folder recorded
    at training time (``info["study_dir"]``) first on the import path, then the folder
    above ``study_dir`` (the study's ``--out`` directory, which usually sits beside the
    study file), then the ordinary path.

    Raises:
        StudyConfigError: the factory cannot be imported from any of these, naming them.
    """
    from holonomic.study.config import ModelConfig, StudyConfigError
    from holonomic.study.models import build_model, import_path

    spec = info["model"]
    model_config = ModelConfig(widths=tuple(spec["widths"]), activation=spec["activation"],
                               factory=spec["factory"])
    folders = [str(f) for f in (info.get("study_dir"),
                                None if study_dir is None else Path(study_dir).resolve().parent)
               if f is not None and Path(f).is_dir()]
    try:
        with contextlib.ExitStack() as stack:
            for folder in reversed(folders):  # the recorded folder ends up first
                stack.enter_context(import_path(folder))
            model = build_model(model_config, int(info["in_features"]), int(info["n_outputs"]),
                                int(info["seed"]), _DTYPES[info["dtype"]],
                                **(info.get("model_options") or {}))
    except StudyConfigError as exc:
        if spec["factory"] is None:
            raise
        module = str(spec["factory"]).partition(":")[0]
        looked = ", ".join(repr(f) for f in folders) or "(no recorded study folder exists)"
        raise StudyConfigError(
            f"load_trained: cannot rebuild the model of {info.get('path', 'the weights file')!r}"
            f" from its factory {spec['factory']!r}; looked in {looked} and on the Python "
            f"path. Put the folder holding {module.split('.')[0]}.py (or its package) on "
            f"sys.path / PYTHONPATH. ({exc})") from exc
    model.load_state_dict(info["state_dict"])
    return model.eval()


def load_trained(study_dir: str | Path, run: str, strength: float | None = None,
                 seed: int | None = None, fold: int | None = None, *,
                 trial: int | None = None) -> tuple[nn.Module, dict[str, Any]]:
    """Rebuild a trained network of a study and load its weights (eval mode).

    Args:
        study_dir: the study's ``--out`` directory.
        run: a run key (``"fixed_norm-0.5-s3"``), or an arm name with ``seed`` and either
            ``trial`` (the trial's index within the arm, as in ``results.csv`` column
            ``setting_index`` and the report; the full-budget run) or ``strength`` (arms
            that search only their strength, the old grid studies).
        fold: for k-fold data, which fold's network (required then).

    Returns:
        ``(model, info)``: ``info`` is the weights file's contents (see the module
        docstring) plus ``"path"``; pass both to :func:`predict`.

    Raises:
        FileNotFoundError: no weights for that run (not finished, failed, or trained
            before weights were saved), naming the file looked for.
        ValueError: k-fold weights and no ``fold``; ``seed`` without ``trial`` or
            ``strength`` (or the reverse), or both ``trial`` and ``strength``.
    """
    if trial is not None and strength is not None:
        raise ValueError("load_trained: give trial or strength with an arm name, not both")
    if ((strength is None and trial is None) != (seed is None)):
        raise ValueError("load_trained: give an arm name with seed and trial (or strength), "
                         "or a run key alone")
    if trial is not None:
        key = _trial_key(study_dir, run, int(trial), int(seed))
    elif strength is None:
        key = run
    else:
        from holonomic.study.runner import RunSpec

        key = RunSpec(run, 0, float(strength), int(seed)).key
    record_path = storage.runs_dir(study_dir) / f"{key}.json"
    if not record_path.is_file():  # the record commits a run: weights without one are not
        raise FileNotFoundError(f"load_trained: no finished run {key!r} in "
                                f"{str(study_dir)!r} (no {str(record_path)!r})")
    record = storage.loads(record_path.read_text(encoding="utf-8"))
    files = record.get("weights_files") or []
    if fold is None and len(files) > 1:
        raise ValueError(f"load_trained: run {key!r} was trained on {len(files)} folds; "
                         f"pass fold=0..{len(files) - 1}")
    path = weights_path(study_dir, key, fold)
    relative = os.path.relpath(path, study_dir).replace(os.sep, "/")
    if relative not in files or not path.is_file():
        raise FileNotFoundError(f"load_trained: no saved weights for run {key!r} at "
                                f"{str(path)!r} (the run {record.get('status', '?')}; failed "
                                "runs and runs trained before weights were saved have none)")
    info = load_weights(path)
    info["path"] = str(path)
    return rebuild_model(info, study_dir), info


def _trial_key(study_dir: str | Path, arm: str, trial: int, seed: int) -> str:
    """Key of the full-budget run of ``arm``'s trial ``trial`` at ``seed`` (run records read
    from ``study_dir/runs``)."""
    for key, record in storage.read_records(study_dir, invalid=[]).items():
        if (record["arm"] == arm and record["seed"] == seed
                and record.get("trial", record.get("setting_index")) == trial
                and record.get("budget_fraction", 1.0) == 1.0):
            return key
    raise FileNotFoundError(f"load_trained: no finished full-budget run of arm {arm!r}, trial "
                            f"{trial}, seed {seed} in {str(study_dir)!r} (trials are numbered "
                            "from 0 within each arm: results.csv column setting_index)")


def raw_outputs(model: nn.Module, info: dict[str, Any], x: Any) -> np.ndarray:
    """The network's outputs (float64) for raw features ``x`` (n, d): standardised with the
    saved statistics, eval mode, no gradients."""
    x = np.asarray(x, dtype=np.float64)
    mean = info["feature_mean"].numpy()
    std = info["feature_std"].numpy()
    if x.ndim != 2 or x.shape[1] != mean.shape[0]:
        names = info.get("feature_names") or []
        listed = f" ({', '.join(names)})" if names else ""
        raise ValueError(f"x must have shape (n, {mean.shape[0]}): the {mean.shape[0]} "
                         f"feature columns{listed}; got shape {x.shape}")
    imputation = info.get("imputation_mean")
    if imputation is not None:  # data.missing = "mean": fill NaN as training did
        missing = np.isnan(x)
        if missing.any():
            x = np.where(missing, imputation.numpy()[None, :], x)
    if not np.isfinite(x).all():
        row, column = np.argwhere(~np.isfinite(x))[0]
        filled = ("" if imputation is None else
                  " (only NaN is filled with the training means)")
        raise ValueError(f"x holds a non-finite value at row {row}, column {column}; the "
                         f"network needs complete rows{filled}")
    dtype = _DTYPES[info["dtype"]]
    inputs = torch.as_tensor((x - mean) / std, dtype=dtype)
    from holonomic.study.runner import outputs_of

    return outputs_of(model, inputs)


def predict(model: nn.Module, info: dict[str, Any], x: Any) -> np.ndarray:
    """Predictions for raw features ``x`` (n, d): class names (the largest output), or
    regression targets in their original units (``target_mean + target_std * output``)."""
    outputs = raw_outputs(model, info, x)
    if info["task"] == "regression":
        return info["target_mean"] + info["target_std"] * outputs.reshape(-1)
    return np.asarray(info["classes"])[outputs.argmax(axis=1)]


def class_probabilities(model: nn.Module, info: dict[str, Any], x: Any) -> np.ndarray:
    """Classification: softmax probabilities (n, k), float64, columns in the order of
    ``info["classes"]``."""
    if info["task"] != "classification":
        raise ValueError(f"class_probabilities needs a classification network; this one is "
                         f"{info['task']}")
    outputs = torch.as_tensor(raw_outputs(model, info, x))
    return torch.softmax(outputs, dim=1).numpy()
