"""Models for studies: an MLP from widths, or a user factory ``"package.module:function"``."""

from __future__ import annotations

import fnmatch
import importlib
from typing import Sequence

import torch
from torch import nn

from holonomic.study.config import LAYER_SELECTIONS, ModelConfig, StudyConfigError

__all__ = ["WEIGHT_LAYERS", "build_model", "hidden_layers", "mlp", "output_layer",
           "select_weights", "weight_layers"]

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
