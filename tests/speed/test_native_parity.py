"""Parity of the native CPU kernel (holonomic.dynamics.native; ``Langevin``'s
default on the CPU, and ``compiled=True``) with the plain per-parameter
reference path, plus failure behaviour, its argument cache and the build.

The reference is the plain path of the same class (``opt._reference = True``);
one outside check compares the kernel with ``torch.optim.SGD``.  The kernel
is built once per test session into a temporary cache (about two seconds).
No timing assertions: speed is measured by ``python -m holonomic.bench``.
"""

import copy
import math
import warnings
from pathlib import Path

import pytest
import torch
from torch import nn

import holonomic as hn
from holonomic.dynamics import compiled as compiled_mod
from holonomic.dynamics import native
from tests.speed import test_fast_path_parity as fast_parity
from tests.speed.test_compiled_parity import check_parity, pair
from tests.speed.test_fast_path_parity import _assert_unchanged, _data, _groups, _run, _snapshot, assert_same_run


@pytest.fixture(scope="session", autouse=True)
def _private_cache(tmp_path_factory):
    """Build into a temporary cache, not the user's ``~/.cache/holonomic``."""
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("HOLONOMIC_CACHE_DIR", str(tmp_path_factory.mktemp("kernels")))
        mp.delenv("HOLONOMIC_NATIVE", raising=False)
        native.native_kernel.cache_clear()
        yield
    native.native_kernel.cache_clear()


@pytest.fixture
def native_calls(monkeypatch):
    """Skip where no C++ compiler can build the kernel; count the kernel's steps."""
    try:
        native.native_kernel()
    except native.NativeBuildError as exc:
        pytest.skip(f"the native kernel cannot be built here: {exc}")
    calls = []
    real = native.native_step

    def counted(*args):
        calls.append(1)
        return real(*args)

    monkeypatch.setattr(native, "native_step", counted)
    return calls


@pytest.mark.parametrize("temperature", [0.0, 0.4])
@pytest.mark.parametrize("friction", [1.0, math.inf])
def test_native_kernel_matches_reference_float64(native_calls, temperature, friction):
    check_parity(native_calls, temperature, friction)


def test_native_kernel_mixed_temperatures_and_schedules_match_reference(native_calls):
    check_parity(native_calls, 0.4, 1.0, steps=20, cold_group=True, halve_step_after=10)


def test_native_kernel_float32_tracks_reference_and_keeps_the_norms(native_calls):
    net, opt, ref_net, ref = pair(0.4, 1.0, dtype=torch.float32)
    x, y = (t.float() for t in _data())
    _run(net, opt, 40, (x, y))
    _run(ref_net, ref, 40, (x, y))
    assert len(native_calls) == 40
    for a, b in zip(net.parameters(), ref_net.parameters()):
        # float32 roundoff over 40 steps of a chaotic map (common practice, no source)
        assert torch.allclose(a, b, rtol=0, atol=1e-4)
    # the norms are held to float32 roundoff (eps 1.2e-7) at every step
    assert max(hn.residuals(net).values()) < 1e-6


def test_native_kernel_unconstrained_equals_torch_sgd(native_calls):
    # outside reference: torch.optim.SGD; 6020 numbers, two chunks of the kernel's loop over them
    fast_parity.check_unconstrained_equals_torch_sgd(300, 20, compiled=True)
    assert len(native_calls) == 30


def test_native_kernel_parallel_matches_serial(native_calls):
    # above the kernel's 32768-number threshold it runs on torch's threads
    torch.set_num_threads(2)
    try:
        layer = nn.Linear(256, 256).double()
        hn.constrain(layer, weight=hn.FixedNorm(1.0))
        layers = [layer, copy.deepcopy(layer)]
        x = torch.randn(32, 256, generator=torch.Generator().manual_seed(4), dtype=torch.float64)
        opts = [hn.Langevin(layers[0].parameters(), step=0.05, temperature=0.1, compiled=True),
                hn.Langevin(layers[1].parameters(), step=0.05, temperature=0.1)]
        opts[1]._reference = True
        for _ in range(5):
            for layer, opt in zip(layers, opts):
                opt.zero_grad()
                layer(x).square().mean().backward()
                opt.step()
    finally:
        torch.set_num_threads(1)
    assert len(native_calls) == 5
    for a, b in zip(layers[0].parameters(), layers[1].parameters()):
        assert torch.allclose(a, b, rtol=0, atol=1e-11)


def test_native_kernel_failure_changes_nothing(native_calls):
    net, opt, _, _ = pair(0.3, 1.0)
    fast_parity.check_bad_gradient_changes_nothing(net, opt, float("nan"))
    assert len(native_calls) == 4  # the kernel ran, found the NaN, and wrote nothing


def test_native_first_step_failure_leaves_no_momentum(native_calls):
    opt = fast_parity.check_unprojectable_first_step_changes_nothing(compiled=True)
    assert native_calls  # the kernel ran, found no SHAKE root, and wrote nothing
    assert all("momentum" not in s for s in opt.state.values())


def test_error_inside_the_native_step_is_raised_with_nothing_changed(native_calls, monkeypatch):
    def failing(opt, items, fresh):
        for p, _, group, _ in items:
            if group["temperature"] > 0:
                native._noise(opt, p)  # the noise was drawn, then the step failed
        raise MemoryError("out of memory")

    monkeypatch.setattr(native, "native_step", failing)
    net, opt, _, _ = pair(0.3, 1.0)
    x, y = _data()
    opt.zero_grad()
    ((net(x) - y) ** 2).mean().backward()
    before = _snapshot(net, opt)
    with pytest.raises(MemoryError):
        opt.step()
    _assert_unchanged(before, (net.state_dict(), opt.state_dict()))
    assert not opt._generators  # the generator created for the noise was dropped again


def test_unbuildable_kernel_warns_once_and_uses_torch_compile(monkeypatch):
    def unbuildable():
        raise native.NativeBuildError("no C++ compiler found: install g++ or clang++, or name one in $CXX")

    compiled_calls = []

    def kernel(*args):
        compiled_calls.append(1)
        return compiled_mod.baoab_kernel(*args)  # the torch.compile function's code, run eagerly

    monkeypatch.setattr(native, "native_kernel", unbuildable)
    monkeypatch.setattr(compiled_mod, "_compiled_kernel", lambda: kernel)
    net, opt, ref_net, ref = pair(0.0, 1.0)
    data = _data()
    with pytest.warns(RuntimeWarning, match="native CPU kernel is not available"):
        _run(net, opt, 1, data)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # warned once only
        _run(net, opt, 4, data)
    _run(ref_net, ref, 5, data)
    assert len(compiled_calls) == 5
    assert_same_run(net, opt, ref_net, ref)


def test_switched_off_kernel_is_not_built(monkeypatch):
    monkeypatch.setenv("HOLONOMIC_NATIVE", "0")
    native.native_kernel.cache_clear()
    try:
        with pytest.raises(native.NativeBuildError, match="HOLONOMIC_NATIVE=0"):
            native.native_kernel()
    finally:
        native.native_kernel.cache_clear()


def test_missing_compiler_is_named_in_the_error(monkeypatch, tmp_path):
    monkeypatch.setenv("CXX", str(tmp_path / "no-such-compiler"))
    with pytest.raises(native.NativeBuildError, match="no-such-compiler"):
        native._build(native._compiler(), tmp_path)


@pytest.mark.slow
def test_build_is_cached_and_keyed_by_source(native_calls, tmp_path, monkeypatch):
    first = native._build(native._compiler(), tmp_path)
    stamp = first.stat().st_mtime_ns
    assert native._build(native._compiler(), tmp_path) == first  # reused, not rebuilt
    assert first.stat().st_mtime_ns == stamp
    assert not list(tmp_path.glob(".*.tmp"))  # no half-written files left
    changed = tmp_path / "baoab_kernel.cpp"
    changed.write_text(native._SOURCE.read_text() + "\n// changed\n")
    monkeypatch.setattr(native, "_SOURCE", changed)
    assert native._build(native._compiler(), tmp_path) != first  # another source, another file


def test_default_takes_the_native_kernel_and_false_does_not(native_calls):
    data = _data()
    for compiled, expected in ((None, 3), (False, 0)):
        native_calls.clear()
        net = fast_parity._net(orthonormal_last=False)
        _run(net, hn.Langevin(net.parameters(), step=0.1, temperature=0.2, compiled=compiled), 3, data)
        assert len(native_calls) == expected


def test_default_without_the_kernel_is_silently_eager(monkeypatch):
    def unbuildable():
        raise native.NativeBuildError("no C++ compiler found")

    def no_torch_compile():
        raise AssertionError("the default must not start torch.compile")

    monkeypatch.setattr(native, "native_kernel", unbuildable)
    monkeypatch.setattr(compiled_mod, "_compiled_kernel", no_torch_compile)
    net, _, ref_net, ref = pair(0.3, 1.0)
    opt = hn.Langevin(fast_parity._groups(net, 0.3, 1.0), step=0.1, temperature=0.3, seed=5)  # compiled=None
    data = _data()
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no warning by default
        _run(net, opt, 5, data)
    _run(ref_net, ref, 5, data)
    assert_same_run(net, opt, ref_net, ref)


def test_a_failed_build_is_remembered_and_not_retried(monkeypatch, tmp_path):
    builds = []
    real = native._build

    def counted(*args):
        builds.append(1)
        return real(*args)

    monkeypatch.setenv("CXX", str(tmp_path / "no-such-compiler"))
    monkeypatch.setattr(native, "_build", counted)
    native.native_kernel.cache_clear()
    try:
        for _ in range(3):
            with pytest.raises(native.NativeBuildError, match="no-such-compiler"):
                native.native_kernel()
        assert len(builds) == 1
    finally:
        native.native_kernel.cache_clear()


def test_argument_table_follows_the_constraint_and_keeps_across_new_gradients(native_calls):
    layer = nn.Linear(6, 5).double()
    hn.constrain(layer, weight=hn.FixedNorm(1.0))
    opt = hn.Langevin(layer.parameters(), step=0.05)
    x = torch.randn(8, 6, generator=torch.Generator().manual_seed(0), dtype=torch.float64)

    def step():
        opt.zero_grad()  # set_to_none: new gradient tensors every step
        layer(x).square().sum().backward()
        opt.step()

    step()
    table = opt._native_table
    step()
    assert opt._native_table is table  # new gradients alone do not rebuild the table
    # replaced twice between steps: the last object may reuse the first one's address
    hn.constrain(layer, weight=hn.FixedNorm(2.0), replace=True)
    hn.constrain(layer, weight=hn.FixedNorm(1.2), replace=True)
    with torch.no_grad():
        layer.weight.copy_(hn.constraint_of(layer.weight).project(layer.weight))
    step()
    assert torch.allclose(layer.weight.norm(dim=1), torch.full((5,), 1.2, dtype=torch.float64), rtol=1e-13, atol=0)
    assert len(native_calls) == 3


def test_momentum_of_another_shape_is_not_given_to_the_kernel(native_calls):
    # e.g. from an incompatible checkpoint: the eager path raises; the kernel must not write past it
    layer = nn.Linear(4, 3).double()
    hn.constrain(layer, weight=hn.FixedNorm(1.0))
    opt = hn.Langevin(layer.parameters(), step=0.05)
    big = torch.zeros(40, dtype=torch.float64)
    opt.state[layer.weight]["momentum"] = big[:2]
    layer(torch.ones(2, 4, dtype=torch.float64)).sum().backward()
    with pytest.raises(ValueError, match="momentum has shape"):  # refused before any kernel runs
        opt.step()
    assert not native_calls and torch.count_nonzero(big) == 0


def test_step_info_of_a_native_step_pickles():
    import pickle

    net = fast_parity._net(orthonormal_last=False)
    opt = hn.Langevin(net.parameters(), step=0.1)
    _run(net, opt, 1, _data())
    info = pickle.loads(pickle.dumps(opt.last_info))
    assert info == opt.last_info and len(info.parameters) == len(list(net.parameters()))


def test_unwritable_cache_builds_in_a_temporary_directory(native_calls, monkeypatch):
    # /proc exists and refuses new files even to root (Linux)
    if not Path("/proc/self").exists():
        pytest.skip("needs Linux /proc as an existing directory that refuses new files")
    monkeypatch.setenv("HOLONOMIC_CACHE_DIR", "/proc")
    native.native_kernel.cache_clear()
    try:
        assert native.native_kernel() is not None  # built in a temporary directory instead
        assert not list(Path("/proc").glob("baoab-*"))
    finally:
        native.native_kernel.cache_clear()
