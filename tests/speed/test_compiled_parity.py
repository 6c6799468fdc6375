"""Parity of the compiled BAOAB step (holonomic.dynamics.compiled) with the
plain per-parameter reference path, in float64, plus failure behaviour.

The kernel is plain torch code; most tests run it eagerly (fast), one slow
test runs it through ``torch.compile``.  The reference is the plain path of
the same class (``opt._reference = True``).  No timing assertions: speed is
measured by ``python -m holonomic.bench``.
"""

import copy
import math
import os
import shutil
import warnings

import pytest
import torch
from torch import nn

import holonomic as hn
from holonomic.dynamics import compiled as compiled_mod
from tests.speed import test_fast_path_parity as fast_parity
from tests.speed.test_fast_path_parity import _assert_unchanged, _data, _groups, _run, _snapshot, assert_same_run


@pytest.fixture(autouse=True)
def _torch_compile_only(monkeypatch):
    """These tests are about the torch.compile function: keep the native CPU
    kernel (tests/speed/test_native_parity.py) out of the way."""
    monkeypatch.setattr(compiled_mod, "_native_available", lambda opt, items: False)


def _net(seed=0, dtype=torch.float64):
    # rows, columns and whole-tensor FixedNorm; net[6] and every bias unconstrained
    return fast_parity._net(seed, orthonormal_last=False).to(dtype)


@pytest.fixture
def eager_kernel(monkeypatch):
    """Run the compiled path's kernel without compiling it, and count calls."""
    calls = []

    def kernel(*args):
        calls.append(1)
        return compiled_mod.baoab_kernel(*args)

    monkeypatch.setattr(compiled_mod, "_compiled_kernel", lambda: kernel)
    return calls


def pair(temperature, friction, dtype=torch.float64, **kwargs):
    """A network with ``compiled=True`` and a copy on the plain reference path."""
    net = _net(dtype=dtype)
    ref_net = copy.deepcopy(net)
    opt = hn.Langevin(_groups(net, temperature, friction), step=0.1, friction=friction,
                      temperature=temperature, seed=5, compiled=True, **kwargs)
    ref = hn.Langevin(_groups(ref_net, temperature, friction), step=0.1, friction=friction,
                      temperature=temperature, seed=5, **kwargs)
    ref._reference = True
    return net, opt, ref_net, ref


def check_parity(calls, temperature, friction, steps=40, cold_group=False, halve_step_after=None):
    """``steps`` steps of ``pair(temperature, friction)``, all through the kernel
    that appends to ``calls``, agree with the reference to float64 roundoff.
    ``cold_group``: group 1 at temperature 0 (only group 0 draws noise, in
    parameter order); ``halve_step_after``: a step-size schedule."""
    net, opt, ref_net, ref = pair(temperature, friction)
    if cold_group:
        for o in (opt, ref):
            o.param_groups[1]["temperature"] = 0.0
    data = _data()
    for step in range(steps):
        if step == halve_step_after:
            for group in opt.param_groups + ref.param_groups:
                group["lr"] *= 0.5
        _run(net, opt, 1, data)
        _run(ref_net, ref, 1, data)
    assert len(calls) == steps  # every step went through the kernel
    assert_same_run(net, opt, ref_net, ref)


@pytest.mark.parametrize("temperature", [0.0, 0.4])
@pytest.mark.parametrize("friction", [1.0, math.inf])
def test_compiled_kernel_eager_matches_reference(eager_kernel, temperature, friction):
    check_parity(eager_kernel, temperature, friction)


def test_compiled_kernel_eager_mixed_temperatures_match_reference(eager_kernel):
    check_parity(eager_kernel, 0.4, 1.0, steps=10, cold_group=True)


def test_compiled_path_steps_aside_for_what_it_does_not_cover(eager_kernel):
    # an Orthonormal parameter: the eager fast path takes the step, with the same result
    net, opt, ref_net, ref = pair(0.2, 1.0)
    hn.constrain(net[6], weight=hn.Orthonormal(over="rows"))
    hn.constrain(ref_net[6], weight=hn.Orthonormal(over="rows"))
    with torch.no_grad():
        for layer in (net[6], ref_net[6]):
            layer.weight.copy_(hn.constraint_of(layer.weight).project(layer.weight))
    data = _data()
    _run(net, opt, 5, data)
    _run(ref_net, ref, 5, data)
    assert not eager_kernel
    assert_same_run(net, opt, ref_net, ref)


def test_compiled_path_failure_changes_nothing(eager_kernel):
    net, opt, _, _ = pair(0.3, 1.0)
    fast_parity.check_bad_gradient_changes_nothing(net, opt, float("nan"))
    assert len(eager_kernel) == 4  # the kernel ran, found the NaN, and wrote nothing


def test_compiled_first_step_failure_leaves_no_momentum(eager_kernel):
    opt = fast_parity.check_unprojectable_first_step_changes_nothing(compiled=True)
    assert eager_kernel  # the kernel ran, found no SHAKE root, and wrote nothing
    assert all("momentum" not in s for s in opt.state.values())  # no buffer left behind


def test_compiled_path_is_skipped_when_force_is_overridden(eager_kernel):
    # the kernel computes the force itself, so a custom force must take the eager path
    class Clipped(hn.Langevin):
        @staticmethod
        def force(p, group):
            return p.grad.clamp(-0.1, 0.1)

    net = _net()
    opt = Clipped(net.parameters(), step=0.1, compiled=True)
    _run(net, opt, 2, _data())
    assert not eager_kernel


def test_error_inside_the_step_is_raised_with_nothing_changed(monkeypatch):
    # an error that is not a failure to compile (here: after the noise was drawn)
    def failing(*args):
        raise MemoryError("out of memory")

    monkeypatch.setattr(compiled_mod, "_compiled_kernel", lambda: failing)
    net, opt, _, _ = pair(0.3, 1.0)
    data = _data()
    x, y = data
    opt.zero_grad()
    ((net(x) - y) ** 2).mean().backward()
    before = _snapshot(net, opt)
    with pytest.raises(MemoryError):
        opt.step()
    _assert_unchanged(before, (net.state_dict(), opt.state_dict()))
    assert not opt._generators  # the generator created for the noise was dropped again
    assert not getattr(opt, "_compile_failed", False)  # not mistaken for a failure to compile


def test_compiled_rejects_non_bool():
    with pytest.raises(ValueError, match="compiled"):
        hn.Langevin(nn.Linear(2, 2).parameters(), step=0.1, compiled="yes")


def test_compile_failure_warns_and_uses_eager_path(monkeypatch):
    def broken():
        raise RuntimeError("no C++ compiler")

    monkeypatch.setattr(compiled_mod, "_compiled_kernel", broken)
    net, opt, ref_net, ref = pair(0.0, 1.0)
    data = _data()
    with pytest.warns(RuntimeWarning, match="no C\\+\\+ compiler"):
        _run(net, opt, 1, data)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # warned once only
        _run(net, opt, 4, data)
    _run(ref_net, ref, 5, data)
    assert_same_run(net, opt, ref_net, ref)


_HAVE_CXX = any(shutil.which(c) for c in (os.environ.get("CXX", ""), "g++", "clang++") if c)


@pytest.mark.slow
@pytest.mark.skipif(not _HAVE_CXX, reason="torch.compile on CPU needs a C++ compiler (g++ or clang++)")
def test_torch_compiled_step_matches_reference_float64():
    # the real torch.compile path (tens of seconds to compile on a small CPU)
    for temperature in (0.0, 0.4):
        net, opt, ref_net, ref = pair(temperature, 1.0)
        data = _data()
        _run(net, opt, 20, data)
        _run(ref_net, ref, 20, data)
        assert not getattr(opt, "_compile_failed", False)
        assert_same_run(net, opt, ref_net, ref)
        # a new learning rate goes in as data: same compiled function, still exact
        for group in (opt.param_groups + ref.param_groups):
            group["lr"] *= 0.5
        _run(net, opt, 5, data)
        _run(ref_net, ref, 5, data)
        assert_same_run(net, opt, ref_net, ref)
