"""The native C++ kernel: what the generic registry tests (tests/core, kernel axis) do not
cover: threads, building and caching, the fallback without a compiler, its argument table.

Parity with the reference kernel and failure behaviour are generic tests
(tests/core/test_integrators.py, tests/core/test_dispatch.py).  No timing assertions here:
speed is measured by ``python -m holonomic.bench``.
"""

import copy
import warnings
from pathlib import Path

import pytest
import torch
from torch import nn

import holonomic as hn
from holonomic.dynamics.kernels import native


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
    """Skip where no C++ compiler can build the kernel; count the kernel's runs."""
    try:
        native.native_kernel()
    except native.NativeBuildError as exc:
        pytest.skip(f"the native kernel cannot be built here: {exc}")
    calls = []
    real = native.NativeKernel.run

    def counted(self, *args, **kwargs):
        calls.append(1)
        return real(self, *args, **kwargs)

    monkeypatch.setattr(native.NativeKernel, "run", counted)
    return calls


def _layer_steps(opt, layer, x, steps):
    for _ in range(steps):
        opt.zero_grad()
        layer(x).square().mean().backward()
        opt.step()


def test_native_kernel_parallel_matches_serial_reference(native_calls):
    # above the kernel's 32768-number threshold it runs on torch's threads;
    # outside reference: the reference kernel (the scheme's operators one by one)
    torch.set_num_threads(2)
    try:
        layer = nn.Linear(256, 256).double()
        hn.constrain(layer, weight=hn.FixedNorm(1.0))
        layers = [layer, copy.deepcopy(layer)]
        x = torch.randn(32, 256, generator=torch.Generator().manual_seed(4), dtype=torch.float64)
        opts = [hn.Langevin(layers[0].parameters(), step=0.05, temperature=0.1, backend="native"),
                hn.Langevin(layers[1].parameters(), step=0.05, temperature=0.1, backend="reference")]
        for layer, opt in zip(layers, opts):
            _layer_steps(opt, layer, x, 5)
    finally:
        torch.set_num_threads(1)
    assert len(native_calls) == 5
    for a, b in zip(layers[0].parameters(), layers[1].parameters()):
        assert torch.allclose(a, b, rtol=0, atol=1e-11)


def test_float32_steps_keep_the_norms(native_calls):
    layer = nn.Linear(64, 32)
    hn.constrain(layer, weight=hn.FixedNorm(1.5))
    opt = hn.Langevin(layer.parameters(), lr=0.01, temperature=0.01, backend="native")
    _layer_steps(opt, layer, torch.randn(16, 64, generator=torch.Generator().manual_seed(0)), 50)
    assert len(native_calls) == 50
    assert hn.residuals(layer)["weight"] < 2e-6  # float32 roundoff (a small multiple of eps)


def test_unbuildable_kernel_warns_once_with_native_and_is_silent_with_auto(monkeypatch):
    def unbuildable():
        raise native.NativeBuildError("no C++ compiler found: install g++ or clang++, or name one in $CXX")

    monkeypatch.setattr(native, "native_kernel", unbuildable)
    import holonomic.dynamics.kernels as kernels

    monkeypatch.setattr(kernels, "native_kernel", unbuildable)
    layer = nn.Linear(4, 3).double()
    hn.constrain(layer, weight=hn.FixedNorm(1.0))
    x = torch.ones(2, 4, dtype=torch.float64)
    opt = hn.Langevin(layer.parameters(), lr=0.01, backend="native")
    with pytest.warns(RuntimeWarning, match="native CPU kernel is not available"):
        _layer_steps(opt, layer, x, 1)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # warned once only, and never with "auto"
        _layer_steps(opt, layer, x, 2)
        auto = hn.Langevin(layer.parameters(), lr=0.01)
        _layer_steps(auto, layer, x, 2)
    assert {k for _, k in opt.last_info.kernels} == {"fused"}
    assert {k for _, k in auto.last_info.kernels} == {"fused"}


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
    opt = hn.Langevin(layer.parameters(), step=0.05, backend="native")
    x = torch.randn(8, 6, generator=torch.Generator().manual_seed(0), dtype=torch.float64)

    def step():
        opt.zero_grad()  # set_to_none: new gradient tensors every step
        layer(x).square().sum().backward()
        opt.step()

    step()
    step()  # the first step stored new momenta (new pointers): the table follows
    kernel = opt.kernels[0]
    table = kernel._cache[2]
    step()
    assert kernel._cache[2] is table  # new gradients alone do not rebuild the table
    # replaced twice between steps: the last object may reuse the first one's address
    hn.constrain(layer, weight=hn.FixedNorm(2.0), replace=True)
    hn.constrain(layer, weight=hn.FixedNorm(1.2), replace=True)
    with torch.no_grad():
        layer.weight.copy_(hn.constraint_of(layer.weight).project(layer.weight))
    step()
    assert torch.allclose(layer.weight.norm(dim=1), torch.full((5,), 1.2, dtype=torch.float64), rtol=1e-13, atol=0)
    assert len(native_calls) == 4


def test_momentum_of_another_shape_is_not_given_to_the_kernel(native_calls):
    # e.g. from an incompatible checkpoint: the step refuses it; the kernel must not write past it
    layer = nn.Linear(4, 3).double()
    hn.constrain(layer, weight=hn.FixedNorm(1.0))
    opt = hn.Langevin(layer.parameters(), step=0.05, backend="native")
    big = torch.zeros(40, dtype=torch.float64)
    opt.state[layer.weight]["momentum"] = big[:2]
    layer(torch.ones(2, 4, dtype=torch.float64)).sum().backward()
    with pytest.raises(ValueError, match="momentum has shape"):  # refused before any kernel runs
        opt.step()
    assert not native_calls and torch.count_nonzero(big) == 0


def test_step_info_of_a_native_step_pickles():
    import pickle

    layer = nn.Linear(4, 3).double()
    hn.constrain(layer, weight=hn.FixedNorm(1.0))
    opt = hn.Langevin(layer.parameters(), step=0.1)
    _layer_steps(opt, layer, torch.ones(2, 4, dtype=torch.float64), 1)
    info = pickle.loads(pickle.dumps(opt.last_info))
    assert info == opt.last_info and len(info.parameters) == 2


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


class _CountingLibrary:
    """The loaded kernel library, counting the calls of its ``holonomic_step_*`` and
    ``holonomic_write_*`` functions (by name)."""

    def __init__(self, lib):
        self._lib = lib
        self.calls: list[str] = []

    def __getattr__(self, name):
        real = getattr(self._lib, name)
        if not name.startswith(("holonomic_step_", "holonomic_write_")):
            return real

        def counted(*args):
            self.calls.append(name.split("_")[1])
            return real(*args)

        return counted


@pytest.fixture
def counting_library(native_calls, monkeypatch):
    counting = _CountingLibrary(native.native_kernel())
    monkeypatch.setattr(native, "native_kernel", lambda: counting)
    return counting


def _step_pair(model_fn, backend="native", grad_fill=None):
    torch.manual_seed(0)
    models = [model_fn(), None]
    models[1] = copy.deepcopy(models[0])
    x = torch.randn(8, 16, generator=torch.Generator().manual_seed(1), dtype=torch.float64)
    opts = [hn.Langevin.from_sgd(models[0].parameters(), lr=0.01, momentum=0.9, backend=backend),
            hn.Langevin.from_sgd(models[1].parameters(), lr=0.01, momentum=0.9, backend="reference")]
    for model, opt in zip(models, opts):
        for _ in range(2):
            opt.zero_grad()
            model(x).square().mean().backward()
            opt.step()
    return models, opts


def _fixed_norm_net():
    net = nn.Sequential(nn.Linear(16, 16), nn.Tanh(), nn.Linear(16, 4)).double()
    hn.constrain(net[0], weight=hn.FixedNorm(1.0))
    return net


def test_a_step_on_the_native_kernel_alone_is_one_native_call(counting_library):
    models, opts = _step_pair(_fixed_norm_net)
    assert {k for _, k in opts[0].last_info.kernels} == {"native"}
    assert counting_library.calls == ["step", "step"]  # checked and written in one call per step
    for a, b in zip(models[0].parameters(), models[1].parameters()):
        assert torch.allclose(a, b, rtol=0, atol=1e-12)


def test_a_failing_flag_on_the_native_kernel_alone_writes_nothing(counting_library):
    net = _fixed_norm_net()
    opt = hn.Langevin.from_sgd(net.parameters(), lr=0.01, momentum=0.9, backend="native")
    for p in net.parameters():
        p.grad = torch.ones_like(p)
    net[0].weight.grad[3, 2] = float("nan")
    before = [p.detach().clone() for p in net.parameters()]
    with pytest.raises(hn.IntegrationError, match="non-finite gradient"):
        opt.step()
    assert counting_library.calls == ["step"]
    assert all(torch.equal(a, b) for a, b in zip(before, net.parameters()))
    assert len(opt.state) == 0


def test_a_step_shared_with_another_kernel_writes_the_native_part_at_commit(counting_library):
    def mixed():
        net = nn.Sequential(nn.Linear(16, 16), nn.Tanh(), nn.Linear(16, 4)).double()
        hn.constrain(net[0], weight=hn.Orthonormal())  # square: the square-orthonormal kernel
        return net

    models, opts = _step_pair(mixed)
    assert {k for _, k in opts[0].last_info.kernels} == {"native", "square-orthonormal"}
    assert counting_library.calls == ["step", "write", "step", "write"]
    for a, b in zip(models[0].parameters(), models[1].parameters()):
        assert torch.allclose(a, b, rtol=0, atol=1e-10)
