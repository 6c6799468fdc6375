"""Models for studies: an MLP from widths, or a user factory ``"package.module:function"``.

A factory is called as ``factory(in_features, n_outputs)`` (:data:`FACTORY_SIGNATURE`) and
must return a ``torch.nn.Module``. Its module is looked up first in the study file's folder
(:func:`import_path`; the study's runs are wrapped in it), then on the Python path.
"""

from __future__ import annotations

import contextlib
import importlib
import inspect
import sys
from pathlib import Path
from typing import Iterator

import torch
from torch import nn

from holonomic.study.config import ModelConfig, StudyConfigError

__all__ = ["build_model", "hidden_layers", "mlp"]

_ACTIVATIONS = {"relu": nn.ReLU, "tanh": nn.Tanh, "gelu": nn.GELU, "silu": nn.SiLU}


def mlp(in_features: int, widths: tuple[int, ...], n_classes: int,
        activation: str = "relu") -> nn.Sequential:
    """``Linear -> activation`` per width, then a ``Linear`` output layer (logits)."""
    layers: list[nn.Module] = []
    previous = in_features
    for width in widths:
        layers += [nn.Linear(previous, width), _ACTIVATIONS[activation]()]
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
                dtype: torch.dtype = torch.float32) -> nn.Module:
    """Build the model with initial weights fixed by ``seed``.

    The global torch RNG is seeded inside :func:`torch.random.fork_rng`, so the caller's
    global RNG state is left as it was.
    """
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        if config.factory is not None:
            model = _call_factory(config.factory, in_features, n_classes)
        else:
            model = mlp(in_features, config.widths, n_classes, config.activation)
    return model.to(dtype)


def hidden_layers(model: nn.Module) -> list[tuple[str, nn.Linear]]:
    """Hidden ``nn.Linear`` layers: every ``Linear`` in module order except the last.

    The last ``Linear`` is taken to be the output (logit) layer and is never regularised by
    the constraint or max-norm arms; biases are never constrained either.
    """
    linears = [(name, m) for name, m in model.named_modules() if isinstance(m, nn.Linear)]
    if len(linears) < 2:
        raise StudyConfigError("study config: the model needs at least one hidden nn.Linear "
                               "layer before the output layer (the constraint arms act on "
                               f"hidden layers); it has {len(linears)} Linear layer(s)")
    return linears[:-1]
