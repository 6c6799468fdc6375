"""The one minibatch loop of a study, shared by training (:mod:`holonomic.study.runner`)
and the ensemble phase's sampling (:mod:`holonomic.study.ensemble`).

:func:`run_minibatches` takes ``steps`` optimizer steps over minibatches of
:func:`epoch_order` (a permutation per epoch fixed by seed and epoch) starting at epoch
``first_epoch``, each step ``zero_grad; mean loss; backward; optimizer.step(); after-step``
(:func:`minibatch_step`), and turns a failed integration step or a non-finite loss into a
status (``"failed"`` / ``"diverged"``) with a message naming the step. The caller seeds the
global torch RNG (dropout masks) with :func:`model_rng`.
"""

from __future__ import annotations

from contextlib import contextmanager
from typing import Callable, Iterator

import torch
from torch import nn
from torch.nn import functional as F

import holonomic as hn

__all__ = ["FOLD_SEED_OFFSET", "MODEL_RNG_OFFSET", "SAMPLING_RNG_OFFSET", "epoch_order",
           "evaluation_mode", "minibatch_step", "model_rng", "run_minibatches"]

#: Fold ``j`` of a seed draws its integrator noise from ``seed + j * FOLD_SEED_OFFSET``
#: (fold 0, and hold-out runs, from the seed itself).
FOLD_SEED_OFFSET = 100_003
#: Randomness a model draws from the global torch RNG in its forward pass (``nn.Dropout``,
#: ...) during training is seeded with ``seed + FOLD_SEED_OFFSET * fold +
#: MODEL_RNG_OFFSET`` (:func:`model_rng`), which differs from the initial-weights seed.
MODEL_RNG_OFFSET = 7_919_007
#: ... and during an ensemble phase's sampling with this offset instead.
SAMPLING_RNG_OFFSET = 15_485_863


@contextmanager
def model_rng(seed: int, fold: int = 0, offset: int = MODEL_RNG_OFFSET) -> Iterator[None]:
    """Seed the global torch RNG (CPU) for the duration, inside
    :func:`torch.random.fork_rng`, so the caller's global RNG state is restored afterwards.

    Dropout masks and any other randomness a model's forward draws from the global RNG
    are then fixed by (seed, fold): a run is reproducible, and every arm at the same seed
    draws the same masks (runs stay paired across arms).
    """
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(int(seed) + FOLD_SEED_OFFSET * int(fold) + int(offset))
        yield


def epoch_order(n: int, seed: int, epoch: int) -> torch.Tensor:
    """Minibatch order of one epoch: a permutation fixed by (seed, epoch)."""
    generator = torch.Generator().manual_seed(1_000_003 * seed + epoch)
    return torch.randperm(n, generator=generator)


@contextmanager
def evaluation_mode(model: nn.Module) -> Iterator[nn.Module]:
    """Evaluate ``model``: eval mode (dropout off, batch-norm running statistics) under
    ``torch.no_grad()``; every submodule's previous training flag is restored afterwards."""
    modes = [(module, module.training) for module in model.modules()]
    model.eval()
    try:
        with torch.no_grad():
            yield model
    finally:
        for module, mode in modes:
            module.training = mode


def minibatch_step(model: nn.Module, optimizer: torch.optim.Optimizer, setup: object,
                   x: torch.Tensor, y: torch.Tensor, idx: torch.Tensor, where: str,
                   loss: Callable[[torch.Tensor, torch.Tensor], torch.Tensor] | None = None,
                   ) -> None:
    """One step on the mini-batch ``idx``: ``zero_grad; mean loss; backward;
    optimizer.step(); setup.after_step()`` (``setup``: anything with an ``after_step``
    attribute, a callable or None, e.g. :class:`holonomic.study.regularisers.ArmSetup`).
    ``loss(outputs, targets)`` is the task's loss (cross-entropy when None). The model's
    mode is the caller's (train mode in training and sampling). Raises
    ``FloatingPointError`` naming ``where`` on a non-finite loss
    (``holonomic.IntegrationError`` passes through)."""
    loss_fn = F.cross_entropy if loss is None else loss
    optimizer.zero_grad(set_to_none=True)
    value = loss_fn(model(x[idx]), y[idx])
    if not torch.isfinite(value):
        raise FloatingPointError(f"non-finite loss at {where}")
    value.backward()
    optimizer.step()
    after_step = getattr(setup, "after_step", None)
    if after_step is not None:
        after_step()


def run_minibatches(model: nn.Module, optimizer: torch.optim.Optimizer, setup: object,
                    x: torch.Tensor, y: torch.Tensor, *, batch_size: int, seed: int,
                    steps: int, first_epoch: int = 0,
                    loss: Callable[[torch.Tensor, torch.Tensor], torch.Tensor] | None = None,
                    on_step: Callable[[int], None] | None = None,
                    on_epoch: Callable[[int], None] | None = None,
                    label: str = "step", where: str = "") -> tuple[str, str, int]:
    """``steps`` steps of :func:`minibatch_step` over the minibatches of
    :func:`epoch_order` from epoch ``first_epoch`` on (an epoch cut short when ``steps``
    runs out), in the model's current mode.

    ``on_step(k)`` is called after step ``k`` (1-based); ``on_epoch(e)`` after each
    complete epoch (``e``: epochs completed in this call). A ``holonomic.IntegrationError``
    or a non-finite loss stops the loop. Returns ``(status, message, steps done)``: status
    ``"ok"``, ``"failed"`` (message ``f"{where}IntegrationError at {label} {k}: ..."``) or
    ``"diverged"`` (``f"{where}non-finite loss at {label} {k}"``).
    """
    n = len(y)
    step, epoch = 0, first_epoch
    try:
        while step < steps:
            order = epoch_order(n, seed, epoch)
            epoch += 1
            complete = True
            for start in range(0, n, batch_size):
                if step == steps:
                    complete = False
                    break
                minibatch_step(model, optimizer, setup, x, y, order[start:start + batch_size],
                               f"{where}{label} {step}", loss)
                step += 1
                if on_step is not None:
                    on_step(step)
            if complete and on_epoch is not None:
                on_epoch(epoch - first_epoch)
    except hn.IntegrationError as exc:
        return "failed", f"{where}IntegrationError at {label} {step}: {exc}", step
    except FloatingPointError as exc:
        return "diverged", f"{where}{exc}", step
    return "ok", "", step
