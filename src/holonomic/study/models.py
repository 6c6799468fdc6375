"""Models for studies: an MLP from widths, or a user factory ``"package.module:function"``."""

from __future__ import annotations

import importlib

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


def _import_factory(spec: str):
    module_name, _, func_name = spec.partition(":")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise StudyConfigError(f"study config: 'model.factory' module {module_name!r} cannot "
                               f"be imported ({exc}); check the name and PYTHONPATH") from exc
    factory = getattr(module, func_name, None)
    if not callable(factory):
        raise StudyConfigError(f"study config: 'model.factory' {spec!r}: module "
                               f"{module_name!r} has no function {func_name!r}")
    return factory


def build_model(config: ModelConfig, in_features: int, n_classes: int, seed: int,
                dtype: torch.dtype = torch.float32) -> nn.Module:
    """Build the model with initial weights fixed by ``seed``.

    The global torch RNG is seeded inside :func:`torch.random.fork_rng`, so the caller's
    global RNG state is left as it was.
    """
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        if config.factory is not None:
            model = _import_factory(config.factory)(in_features, n_classes)
            if not isinstance(model, nn.Module):
                raise StudyConfigError(f"study config: 'model.factory' {config.factory!r} "
                                       f"returned {type(model).__name__}, not a torch "
                                       "nn.Module")
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
