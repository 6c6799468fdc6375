"""Shared helpers for the study tests: a tiny study on the invented demo data."""

from __future__ import annotations

import pytest

from holonomic.study import parse_config
from holonomic.study.demo import tomllib
from holonomic.study.execution import _execute, run_all

#: The demo study shrunk to seconds: 2 seeds, 2 grid points, 3 epochs, 64 training rows.
TINY_TOML = """
[study]
name = "tiny"
seeds = 2

[data]
source = "demo"
train_size = 64
val_fraction = 0.25
test_fraction = 0.35

[model]
widths = [8, 8]

[budget]
epochs = 3
batch_size = 32
lr = 0.05
momentum = 0.9

[arms.none]
[arms.weight_decay]
grid = [1e-3, 1e-2]
[arms.max_norm]
grid = [0.25, 0.5]
[arms.fixed_norm]
grid = [0.25, 0.5]
[arms.orthonormal]
grid = [0.25, 0.5]
"""


def tiny_document() -> dict:
    return tomllib.loads(TINY_TOML)


@pytest.fixture
def tiny_config():
    return parse_config(tiny_document(), default_name="tiny")


@pytest.fixture
def tiny_toml() -> str:
    return TINY_TOML


@pytest.fixture
def tiny_doc():
    return tiny_document()


@pytest.fixture(autouse=True)
def _single_thread():
    """Tiny models: torch threads only add overhead (and contention on shared CPUs)."""
    import torch

    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(threads)


def interrupt_after(config, out_dir, n: int) -> list[str]:
    """Run the study's runs into ``out_dir`` and interrupt (as Ctrl-C would)
    once ``n`` have finished; returns the keys of the finished runs."""
    calls: list[str] = []

    def interrupted(cfg, spec, out):
        if len(calls) == n:
            raise KeyboardInterrupt
        calls.append(spec.key)
        return _execute(cfg, spec, out)

    with pytest.raises(KeyboardInterrupt):
        run_all(config, out_dir, progress=False, execute=interrupted)
    return calls


def counting_execute():
    """An ``execute`` for ``run_all`` that records the key of every run it trains,
    and the list it records into."""
    trained: list[str] = []

    def counting(cfg, spec, out):
        trained.append(spec.key)
        return _execute(cfg, spec, out)

    return trained, counting
