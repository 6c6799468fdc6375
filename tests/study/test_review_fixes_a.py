"""Fixes from the user-style review of ``holonomic study`` (issue 13 follow-up, part a)."""

from __future__ import annotations

import copy

import torch

from holonomic.study import parse_config
from holonomic.study.runner import RunSpec, train_run

DROPOUT = "tests.study.factories:dropout_mlp"


def _dropout_config(doc: dict):
    doc = copy.deepcopy(doc)
    doc["model"] = {"factory": DROPOUT}
    doc["arms"] = {"none": {}, "weight_decay": {"grid": [0.0, 1e-3]}}
    doc["study"]["seeds"] = 2
    doc["budget"]["epochs"] = 2
    return parse_config(doc)


def _metrics(config, arm: str, strength: float) -> dict:
    record = train_run(config, RunSpec(arm, 0, strength, seed=0), hooks=[])
    assert record["status"] == "ok"
    return record["metrics"]


def test_dropout_runs_are_reproducible_and_paired_across_arms(tiny_doc):
    config = _dropout_config(tiny_doc)
    torch.manual_seed(1)
    first = _metrics(config, "none", 0.0)
    state = torch.random.get_rng_state()
    torch.manual_seed(2)  # the caller's global RNG state does not matter
    again = _metrics(config, "none", 0.0)
    assert first == again
    # weight decay 0 is the unregularised arm: same dropout masks, same numbers
    assert _metrics(config, "weight_decay", 0.0) == first
    # and training leaves the caller's global RNG where it was
    torch.manual_seed(1)
    _metrics(config, "none", 0.0)
    assert torch.equal(torch.random.get_rng_state(), state)
