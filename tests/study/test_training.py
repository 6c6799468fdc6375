"""Training runs: the harness loop against torch.optim.SGD, and what each arm holds."""

from __future__ import annotations

import math

import torch
from torch.nn import functional as F

import holonomic as hn
from holonomic.study import parse_config
from holonomic.study.data import load_dataset, make_split
from holonomic.study.models import build_model, hidden_layers
from holonomic.study.runner import RunSpec, epoch_order, plan_runs, train_run


def test_weight_decay_arm_at_zero_temperature_follows_torch_sgd(tiny_doc):
    # reference library: torch.optim.SGD(lr, momentum, weight_decay); the core maps
    # lr/momentum to step/friction so that the trajectories coincide at temperature 0
    tiny_doc["budget"].update(dtype="float64", epochs=2, lr=0.05, momentum=0.9,
                              temperature=0.0)
    config = parse_config(tiny_doc)
    spec = RunSpec("weight_decay", 1, 1e-2, seed=3)
    record, model = train_run(config, spec, return_model=True)
    assert record["status"] == "ok"

    split = make_split(load_dataset(config), config.data, spec.seed)
    x = torch.as_tensor(split.x_train, dtype=torch.float64)
    y = torch.as_tensor(split.y_train)
    reference = build_model(config.model, x.shape[1], split.n_classes, spec.seed,
                            torch.float64)
    sgd = torch.optim.SGD(reference.parameters(), lr=0.05, momentum=0.9, weight_decay=1e-2)
    for epoch in range(config.budget.epochs):
        order = epoch_order(len(y), spec.seed, epoch)
        for start in range(0, len(y), config.budget.batch_size):
            idx = order[start:start + config.budget.batch_size]
            sgd.zero_grad()
            F.cross_entropy(reference(x[idx]), y[idx]).backward()
            sgd.step()
    steps = config.budget.epochs * math.ceil(len(y) / config.budget.batch_size)
    assert record["steps_done"] == steps
    for (name, p), q in zip(model.named_parameters(), reference.parameters()):
        assert torch.allclose(p, q, rtol=0, atol=1e-6), name
        assert not torch.equal(q, build_model(config.model, x.shape[1], split.n_classes,
                                              spec.seed, torch.float64).state_dict()[name])


def test_arms_hold_their_sets_and_share_the_budget(tiny_config):
    records = {}
    for spec in plan_runs(tiny_config):
        if spec.seed == tiny_config.seeds[0] and spec.index == 1:
            records[spec.arm], model = train_run(tiny_config, spec, return_model=True)
            hidden = [layer.weight.detach() for _, layer in hidden_layers(model)]
            rows = torch.cat([w.norm(dim=1) for w in hidden])
            if spec.arm == "fixed_norm":
                assert torch.allclose(rows, torch.full_like(rows, spec.strength), rtol=1e-5)
                assert hn.constraint_of(hidden_layers(model)[0][1].weight) is not None
            if spec.arm == "max_norm":
                assert rows.max() <= spec.strength * (1 + 1e-6)
            if spec.arm == "orthonormal":
                for w in hidden:
                    gram = w @ w.T if w.shape[0] <= w.shape[1] else w.T @ w
                    eye = torch.eye(gram.shape[0], dtype=gram.dtype)
                    assert torch.allclose(gram, spec.strength ** 2 * eye, atol=1e-5)
    assert {r["status"] for r in records.values()} == {"ok"}
    assert len({r["grad_evals"] for r in records.values()}) == 1
    assert records["fixed_norm"]["metrics"]["constraint_residual"] < 1e-5
    assert records["orthonormal"]["layers"] == ["0.weight", "2.weight"]
    assert math.isnan(records["weight_decay"]["metrics"]["constraint_residual"])


def test_step_friction_budget_equals_its_sgd_mapping(tiny_doc):
    # the two budget parametrisations are one integrator: step/friction from the mapping
    # mu = exp(-gamma h), lr = h^2 (1 + mu) / 2 (the core's documented SGD mapping)
    tiny_doc["budget"].update(dtype="float64", epochs=1)
    sgd_view = parse_config(tiny_doc)
    h, gamma = sgd_view.budget.step_friction()
    del tiny_doc["budget"]["lr"], tiny_doc["budget"]["momentum"]
    tiny_doc["budget"].update(step=h, friction=gamma)
    langevin_view = parse_config(tiny_doc)
    spec = RunSpec("fixed_norm", 0, 0.5, seed=1)
    _, a = train_run(sgd_view, spec, return_model=True)
    _, b = train_run(langevin_view, spec, return_model=True)
    for p, q in zip(a.parameters(), b.parameters()):
        assert torch.allclose(p, q, rtol=0, atol=1e-9)
