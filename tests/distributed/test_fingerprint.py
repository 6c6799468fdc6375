"""The replica fingerprint, without processes: which differences it sees.

Two replicas are emulated by the elementwise max and min of their
fingerprints, which is what ``all_reduce(MAX)`` of ``[v, -v]`` gives.
The expected answers hold by construction of each pair.
"""

from __future__ import annotations

import torch
from torch import nn

import holonomic
from holonomic.distributed.replicas import _differences, replica_fingerprint


def model(seed: int = 0, width: int = 4) -> nn.Module:
    torch.manual_seed(seed)
    return holonomic.constrain(nn.Linear(3, width).double(), weight=holonomic.FixedNorm())


def differences(a: torch.optim.Optimizer, b: torch.optim.Optimizer) -> tuple[str, ...]:
    x, y = replica_fingerprint(a), replica_fingerprint(b)
    return _differences(torch.maximum(x, y), torch.minimum(x, y))


def test_fingerprint_sees_each_kind_of_difference() -> None:
    m = model()
    base = holonomic.Langevin(m.parameters(), step=0.1, temperature=1.0, seed=1)
    assert differences(base, holonomic.Langevin(m.parameters(), step=0.1, temperature=1.0, seed=1)) == ()
    assert differences(base, holonomic.Langevin(m.parameters(), step=0.1, temperature=1.0, seed=2)) == (
        "randomness",)
    assert differences(base, holonomic.Langevin(m.parameters(), step=0.1, temperature=0.5, seed=1)) == (
        "settings",)
    other = model(seed=1)
    assert differences(base, holonomic.Langevin(other.parameters(), step=0.1, temperature=1.0, seed=1)) == (
        "weights",)
    wide = model(width=5)
    assert differences(base, holonomic.Langevin(wide.parameters(), step=0.1, temperature=1.0, seed=1)) == (
        "structure",)


def test_fingerprint_sees_a_permutation_and_advanced_generators() -> None:
    m, swapped = model(), model()
    with torch.no_grad():
        swapped.bias.copy_(swapped.bias.flip(0))  # rows in the opposite order
        swapped.weight.copy_(swapped.weight.flip(0))
    a = holonomic.Langevin(m.parameters(), step=0.1, temperature=1.0, seed=1)
    b = holonomic.Langevin(swapped.parameters(), step=0.1, temperature=1.0, seed=1)
    # Rows in another order keep the sum, sum of squares and sum of |w|; the row-weighted
    # sum sees them.
    assert differences(a, b) == ("weights",)
    # Generator states that moved apart are detected even with equal seeds.
    b = holonomic.Langevin(m.parameters(), step=0.1, temperature=1.0, seed=1)
    assert differences(a, b) == ()
    a.generator(torch.device("cpu"))
    b.generator(torch.device("cpu")).manual_seed(1)
    torch.randn(3, generator=b.generator(torch.device("cpu")))
    assert differences(a, b) == ("randomness",)


def test_fingerprint_reads_and_changes_nothing() -> None:
    m = model()
    opt = holonomic.Langevin(m.parameters(), step=0.1, temperature=1.0, seed=1)
    before = [p.clone() for p in m.parameters()]
    replica_fingerprint(opt)
    assert opt.device_generators() == {} and len(opt.state) == 0
    assert all(torch.equal(p, q) for p, q in zip(m.parameters(), before))


def test_device_generators_are_the_live_generators_in_a_new_dict() -> None:
    opt = holonomic.Langevin(model().parameters(), step=0.1, temperature=1.0, seed=3)
    assert opt.device_generators() == {}
    cpu = opt.generator(torch.device("cpu"))
    found = opt.device_generators()
    assert list(found) == ["cpu"] and found["cpu"] is cpu
    found.clear()  # a new dict: the integrator keeps its generators
    assert opt.device_generators()["cpu"] is cpu


def test_fingerprint_of_another_optimizer_has_no_generators() -> None:
    sgd = torch.optim.SGD(model().parameters(), lr=0.1)
    assert torch.equal(replica_fingerprint(sgd), replica_fingerprint(torch.optim.SGD(model().parameters(), lr=0.1)))
