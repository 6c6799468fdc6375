"""Models for studies: an MLP from widths, or a user factory ``"package.module:function"``.

A factory is called as ``factory(in_features, n_outputs)`` (:data:`FACTORY_SIGNATURE`) and
must return a ``torch.nn.Module``. Its module is looked up first in the study file's folder
(:func:`import_path`; the study's runs are wrapped in it), then on the Python path.
"""

from __future__ import annotations

import contextlib
import fnmatch
import importlib
import inspect
import sys
from pathlib import Path
from typing import Iterator, Sequence

import torch
from torch import nn

from holonomic.study.config import LAYER_SELECTIONS, ModelConfig, StudyConfigError

__all__ = ["WEIGHT_LAYERS", "build_model", "hidden_layers", "mlp", "output_layer",
           "select_weights", "weight_layers"]

_ACTIVATIONS = {"relu": nn.ReLU, "tanh": nn.Tanh, "gelu": nn.GELU, "silu": nn.SiLU}


def mlp(in_features: int, widths: tuple[int, ...], n_classes: int,
        activation: str = "relu", dropout: float | None = None) -> nn.Sequential:
    """``Linear -> activation`` per width (``-> nn.Dropout(dropout)`` unless None),
    then a ``Linear`` output layer (logits)."""
    layers: list[nn.Module] = []
    previous = in_features
    for width in widths:
        layers += [nn.Linear(previous, width), _ACTIVATIONS[activation]()]
        if dropout is not None:
            layers.append(nn.Dropout(dropout))
        previous = width
    layers.append(nn.Linear(previous, n_classes))
    return nn.Sequential(*layers)


#: The signature a model factory must have (quoted in error messages).
FACTORY_SIGNATURE = ("def make_model(in_features: int, n_outputs: int) -> torch.nn.Module "
                     "(n_outputs: the number of classes, or 1 for regression)")


#: Study folders put on the import path by the active :func:`import_path` blocks.
_ACTIVE_FOLDERS: list[str] = []


@contextlib.contextmanager
def import_path(folder: str | Path | None) -> Iterator[None]:
    """Put ``folder`` (a study file's folder) first on ``sys.path`` for the duration, so a
    factory ``"mymodel:make"`` finds ``mymodel.py`` beside the study file; the entry is
    removed afterwards. ``None`` changes nothing."""
    if folder is None:
        yield
        return
    entry = str(Path(folder).resolve())
    added = entry not in sys.path
    if added:
        sys.path.insert(0, entry)
        importlib.invalidate_caches()
    _ACTIVE_FOLDERS.append(entry)
    try:
        yield
    finally:
        _ACTIVE_FOLDERS.pop()
        if added and entry in sys.path:
            sys.path.remove(entry)


def _import_factory(spec: str, base_dir: str | Path | None = None):
    """The function named by ``"module:function"``; ``base_dir`` (the study file's folder)
    is searched first (:func:`import_path`)."""
    module_name, _, func_name = spec.partition(":")
    if base_dir is None and _ACTIVE_FOLDERS:
        base_dir = _ACTIVE_FOLDERS[-1]
    where = "on the Python path"
    if base_dir is not None:
        where = f"in the study file's folder ({str(Path(base_dir).resolve())!r}) nor {where}"
    try:
        with import_path(base_dir):
            module = importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        top = module_name.split(".")
        if exc.name is not None and exc.name not in (".".join(top[:i + 1])
                                                     for i in range(len(top))):
            raise StudyConfigError(
                f"study config: 'model.factory' module {module_name!r} was found but imports "
                f"{exc.name!r}, which is not installed ({exc})") from exc
        raise StudyConfigError(
            f"study config: 'model.factory' module {module_name!r} cannot be imported: it is "
            f"not {where}; put {top[0]}.py beside the study file, install its package, or "
            "add its folder to PYTHONPATH") from exc
    except ImportError as exc:
        raise StudyConfigError(f"study config: 'model.factory' module {module_name!r} cannot "
                               f"be imported ({exc}); check the name and PYTHONPATH") from exc
    except SyntaxError as exc:
        raise StudyConfigError(f"study config: 'model.factory' module {module_name!r} has a "
                               f"syntax error: {exc.filename}, line {exc.lineno}: "
                               f"{exc.msg}") from exc
    factory = getattr(module, func_name, None)
    if not callable(factory):
        raise StudyConfigError(f"study config: 'model.factory' {spec!r}: module "
                               f"{module_name!r} ({getattr(module, '__file__', None)}) has no "
                               f"function {func_name!r}; it needs {FACTORY_SIGNATURE}")
    return factory


def _call_factory(spec: str, in_features: int, n_outputs: int,
                  base_dir: str | Path | None = None) -> nn.Module:
    """Import the factory, check that it takes ``(in_features, n_outputs)``, call it and
    check that it returned a module; every mistake is a :class:`StudyConfigError` quoting
    :data:`FACTORY_SIGNATURE`. An error raised inside the factory's own code passes through."""
    factory = _import_factory(spec, base_dir)
    try:
        signature = inspect.signature(factory)
    except (TypeError, ValueError):  # no signature to check (some builtins): just call it
        signature = None
    if signature is not None:
        try:
            signature.bind(in_features, n_outputs)
        except TypeError as exc:
            raise StudyConfigError(
                f"study config: 'model.factory' {spec!r} cannot be called as "
                f"factory(in_features, n_outputs): its signature is {_name_of(factory)}"
                f"{signature} ({exc}); the study calls it with two integers, as "
                f"{FACTORY_SIGNATURE}") from exc
    with import_path(base_dir):
        model = factory(in_features, n_outputs)
    if not isinstance(model, nn.Module):
        raise StudyConfigError(f"study config: 'model.factory' {spec!r} returned "
                               f"{type(model).__name__}, not a torch nn.Module; it needs "
                               f"{FACTORY_SIGNATURE}")
    return model


def _name_of(function) -> str:
    return getattr(function, "__name__", type(function).__name__)


def build_model(config: ModelConfig, in_features: int, n_classes: int, seed: int,
                dtype: torch.dtype = torch.float32, dropout: float | None = None) -> nn.Module:
    """Build the model with initial weights fixed by ``seed``.

    ``dropout`` (the ``dropout`` regulariser's rate; None: none asked): the MLP gets
    ``nn.Dropout(dropout)`` after each hidden activation (the initial weights are those of
    the MLP without it); a factory's model gets ``p = dropout`` on each of its
    ``nn.Dropout`` modules, and is refused (:class:`StudyConfigError`) when it has none.
    The global torch RNG is seeded inside :func:`torch.random.fork_rng`, so the caller's
    global RNG state is left as it was.
    """
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        if config.factory is not None:
            model = _call_factory(config.factory, in_features, n_classes)
        else:
            model = mlp(in_features, config.widths, n_classes, config.activation, dropout)
    if dropout is not None and config.factory is not None:
        layers = [m for m in model.modules() if isinstance(m, nn.Dropout)]
        if not layers:
            raise StudyConfigError(
                f"study config: regulariser 'dropout' needs nn.Dropout modules in the model; "
                f"'model.factory' {config.factory!r} builds none. Add nn.Dropout layers to "
                "the factory's model (their rate is set by the arm's strength), or use the "
                "built-in MLP (model.widths)")
        for layer in layers:
            layer.p = float(dropout)
    return model.to(dtype)


#: Module types whose weight (a tensor of >= 2 dimensions) the constraint and max-norm arms
#: may act on. Each output unit (a row of a ``Linear`` weight, an output channel's kernel of a
#: convolution, flattened) is one vector of the constraint.
WEIGHT_LAYERS = (nn.Linear, nn.Conv1d, nn.Conv2d, nn.Conv3d)
_WEIGHT_LAYER_NAMES = "Linear and Conv1d/Conv2d/Conv3d"


def _weight_of(module: nn.Module) -> torch.Tensor | None:
    weight = module._parameters.get("weight") if isinstance(module, WEIGHT_LAYERS) else None
    if isinstance(weight, nn.Parameter) and weight.dim() >= 2:
        return weight
    return None


def weight_layers(model: nn.Module) -> list[tuple[str, nn.Module]]:
    """``(qualified weight name, module)`` of every ``Linear`` / ``Conv1d/2d/3d`` layer with a
    weight of >= 2 dimensions, in module order (``model.named_modules()``).

    The names are those of ``model.named_parameters()`` (e.g. ``"features.0.weight"``); a
    weight shared by several modules is listed once, under its first name.
    """
    names = {id(p): name for name, p in model.named_parameters()}
    seen: set[int] = set()
    out = []
    for _, module in model.named_modules():
        weight = _weight_of(module)
        if weight is not None and id(weight) not in seen and id(weight) in names:
            seen.add(id(weight))
            out.append((names[id(weight)], module))
    return out


def output_layer(model: nn.Module) -> tuple[str, nn.Module] | None:
    """The output layer: the last ``nn.Linear`` in module order, or the last convolution
    when the model has no ``Linear``; ``None`` when it has neither."""
    layers = weight_layers(model)
    linears = [entry for entry in layers if isinstance(entry[1], nn.Linear)]
    if linears:
        return linears[-1]
    return layers[-1] if layers else None


def hidden_layers(model: nn.Module, key: str = "model.constrain") -> list[tuple[str, nn.Module]]:
    """Hidden layers: ``(qualified weight name, module)`` of every ``Linear`` and
    ``Conv1d/2d/3d`` layer in module order except the output layer (:func:`output_layer`).

    These are what the constraint and max-norm arms act on by default
    (``[model] constrain = "hidden"``). Raises :class:`StudyConfigError` naming ``key`` when
    there are none.
    """
    output = output_layer(model)
    hidden = [entry for entry in weight_layers(model) if output is None or entry[0] != output[0]]
    if not hidden:
        found = "only the output layer " + repr(output[0]) if output else "none"
        raise StudyConfigError(
            f"study config: '{key}' = 'hidden': the model has no hidden layer (a "
            f"{_WEIGHT_LAYER_NAMES} layer before the output layer, the last Linear); weight "
            f"layers found: {found}. Use constrain = \"hidden+output\" or a list of parameter "
            "name patterns, or give the model a hidden layer")
    return hidden


def _why_not_eligible(model: nn.Module, name: str) -> str:
    owner_path, _, leaf = name.rpartition(".")
    owner = model.get_submodule(owner_path) if owner_path else model
    kind = type(owner).__name__
    if leaf == "bias":
        return f"{name} (bias of {kind}: biases are never constrained)"
    if not isinstance(owner, WEIGHT_LAYERS):
        return (f"{name} (parameter of {kind}: only the weights of {_WEIGHT_LAYER_NAMES} "
                "layers are eligible)")
    if leaf != "weight":
        return f"{name} ({leaf!r} of {kind}: only the layer's weight is eligible)"
    return f"{name} (weight of {kind} with fewer than 2 dimensions)"


def select_weights(model: nn.Module, selection: str | Sequence[str],
                   key: str = "model.constrain") -> list[tuple[str, nn.Module]]:
    """The weights a constraint or max-norm arm acts on: ``(qualified name, module)`` pairs
    in module order.

    ``selection``: ``"hidden"`` (:func:`hidden_layers`), ``"hidden+output"`` (those and the
    output layer, :func:`output_layer`), or patterns (``fnmatch``-style, case-sensitive:
    ``*``, ``?``, ``[...]``; ``*`` also matches dots) matched against the qualified parameter
    names of ``model.named_parameters()``, e.g. ``["features.*.weight", "fc1.weight"]``.
    Only weights of >= 2 dimensions of ``Linear`` / ``Conv1d/2d/3d`` layers are eligible
    (:func:`weight_layers`); a pattern may also match ineligible parameters (``"fc1.*"``
    matches ``fc1.bias``), which are left alone.

    Raises:
        StudyConfigError: naming ``key`` (the config key the selection came from), when a
            pattern matches no parameter (listing the eligible names) or only ineligible
            ones (naming them and why), or when ``"hidden"`` finds no hidden layer.
    """
    if isinstance(selection, str):
        if selection == "hidden":
            return hidden_layers(model, key)
        if selection == "hidden+output":
            output = output_layer(model)
            if output is None:
                raise StudyConfigError(
                    f"study config: '{key}' = 'hidden+output': the model has no "
                    f"{_WEIGHT_LAYER_NAMES} layer")
            return weight_layers(model)
        raise StudyConfigError(f"study config: '{key}' must be one of "
                               f"{', '.join(LAYER_SELECTIONS)} or a list of parameter name "
                               f"patterns, got {selection!r}")
    eligible = weight_layers(model)
    eligible_names = [name for name, _ in eligible]
    listed = ", ".join(eligible_names) or "(none)"
    all_names = [name for name, _ in model.named_parameters()]
    chosen: set[str] = set()
    for pattern in selection:
        matched = [name for name in all_names if fnmatch.fnmatchcase(name, pattern)]
        hits = [name for name in matched if name in eligible_names]
        if not matched:
            raise StudyConfigError(
                f"study config: '{key}' pattern {pattern!r} matches no parameter of the "
                f"model; eligible parameters (weights of {_WEIGHT_LAYER_NAMES} layers): "
                f"{listed}")
        if not hits:
            why = "; ".join(_why_not_eligible(model, name) for name in matched)
            raise StudyConfigError(
                f"study config: '{key}' pattern {pattern!r} matches only parameters no arm "
                f"can act on: {why}. Eligible parameters: {listed}")
        chosen.update(hits)
    return [entry for entry in eligible if entry[0] in chosen]
