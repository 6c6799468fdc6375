"""The closed-form square orthonormal kernel (holonomic.dynamics.kernels.square_orthonormal):
batches of several shapes and scales against the reference kernel (the iterative SHAKE
path) in float64, its failure behaviour, and its pieces against outside references.

The generic registry tests (tests/core, kernel axis) cover one square parameter with the
kernel pinned.  No timing assertions here: speed is measured by ``python -m holonomic.bench``.
"""

import copy
import math

import pytest
import scipy.linalg
import scipy.special
import torch
from torch import nn

import holonomic as hn
import holonomic.dynamics.kernels.square_orthonormal as fo
from holonomic.dynamics.kernels.square_orthonormal import (
    _block_size,
    _combined_series,
    _drift_factor,
    matrix_series,
    series_degree,
    sqrt_series,
)
from holonomic.geometry import default_tolerance
from holonomic.geometry.stiefel import stiefel_shake, stiefel_tangent

TOL = 1e-11  # float64 roundoff over a few dozen steps (common practice, no source)


def _data():
    g = torch.Generator().manual_seed(1)
    return torch.randn(24, 7, generator=g, dtype=torch.float64), torch.randn(24, 3, generator=g, dtype=torch.float64)


def _run(net, opt, steps, data):
    x, y = data
    for _ in range(steps):
        opt.zero_grad()
        ((net(x) - y) ** 2).mean().backward()
        opt.step()


def _snapshot(net, opt):
    return copy.deepcopy((net.state_dict(), opt.state_dict()))


def assert_same_run(fast_net, fast, ref_net, ref, same_iterations=lambda a, b: a == b):
    """Weights, momenta, generator states and step info of the two runs agree to float64 roundoff."""
    for a, b in zip(fast_net.parameters(), ref_net.parameters()):
        assert torch.allclose(a, b, rtol=0, atol=TOL)
        assert torch.allclose(fast.state[a]["momentum"], ref.state[b]["momentum"], rtol=0, atol=TOL)
    # same noise stream: the generators advanced identically
    assert all(torch.equal(fast._generators[k].get_state(), ref._generators[k].get_state())
               for k in ref._generators)
    for a, b in zip(fast.last_info.parameters, ref.last_info.parameters):
        assert (a.label, a.group, a.index, a.tangent_dof) == (b.label, b.group, b.index, b.tangent_dof)
        assert same_iterations(a.projection_iterations, b.projection_iterations)
        assert abs(float(a.kinetic_energy) - float(b.kinetic_energy)) <= TOL * max(1.0, float(b.kinetic_energy))
    assert max(hn.residuals(fast_net).values()) < 1e-13


def _net(seed=0):
    g = torch.Generator().manual_seed(seed)
    net = nn.Sequential(nn.Linear(7, 6), nn.Tanh(), nn.Linear(6, 6), nn.Tanh(), nn.Linear(6, 6, bias=False),
                        nn.Tanh(), nn.Linear(6, 4), nn.Tanh(), nn.Linear(4, 4), nn.Tanh(), nn.Linear(4, 3)).double()
    with torch.no_grad():
        for p in net.parameters():
            p.copy_(0.5 * torch.randn(p.shape, generator=g, dtype=torch.float64))
        for i in (2, 4, 8):
            q, _ = torch.linalg.qr(torch.randn(net[i].weight.shape, generator=g, dtype=torch.float64))
            net[i].weight.copy_(q)
    hn.constrain(net[0], weight=hn.FixedNorm(1.5, over="rows"))
    hn.constrain(net[2], weight=hn.Orthonormal(over="rows", scale=0.8))  # two of one shape: batched
    hn.constrain(net[4], weight=hn.Orthonormal(over="columns"))
    hn.constrain(net[6], weight=hn.Orthonormal(over="rows"))  # rectangular: the reference kernel, same step
    net[8].weight.data *= 1.3
    hn.constrain(net[8], weight=hn.Orthonormal(over="columns", scale=1.3))
    return net


def _groups(net, temperature, friction):
    params = list(net.parameters())
    return [{"params": params[:5]},
            {"params": params[5:], "temperature": 0.5 * temperature, "friction": 2 * friction}]


@pytest.mark.parametrize("temperature", [0.0, 0.4])
@pytest.mark.parametrize("friction", [1.0, math.inf])
def test_square_orthonormal_batches_match_the_reference_kernel(temperature, friction):
    fast_net = _net()
    ref_net = copy.deepcopy(fast_net)
    kw = dict(step=0.2, friction=friction, temperature=temperature, seed=3)
    fast = hn.Langevin(_groups(fast_net, temperature, friction), backend="eager", **kw)
    ref = hn.Langevin(_groups(ref_net, temperature, friction), backend="reference", **kw)
    data = _data()
    _run(fast_net, fast, 30, data)
    _run(ref_net, ref, 30, data)
    # the closed form reports its series degree, the reference its fixed-point count
    assert_same_run(fast_net, fast, ref_net, ref,
                    same_iterations=lambda a, b: a == 0 if b == 0 else 1 <= a <= 100)


def test_square_closed_form_equals_iterative_shake_for_one_drift():
    # the SHAKE equation X'^T X' = I, X' = Y + X S, S symmetric, solved by the reference
    # fixed point; the closed form X' = X (sqrt(I + s^2 Omega^2) + s Omega) must agree
    g = torch.Generator().manual_seed(4)
    x, _ = torch.linalg.qr(torch.randn(7, 7, generator=g, dtype=torch.float64))
    p = stiefel_tangent(x, torch.randn(7, 7, generator=g, dtype=torch.float64))
    s = 0.4 / float(torch.linalg.matrix_norm(p, 2))  # s ||Omega||_2 = 0.4
    ref, ok, _ = stiefel_shake(x, x + s * p, tolerance=1e-15, max_iterations=200)
    assert bool(ok)
    omega = x.T @ p
    # outside reference: scipy.linalg.sqrtm (principal square root)
    root = torch.from_numpy(scipy.linalg.sqrtm((torch.eye(7, dtype=torch.float64) + s * s * omega @ omega).numpy()).real)
    torch.testing.assert_close(x @ (root + s * omega), ref, rtol=0, atol=1e-13)


def test_series_pieces_against_outside_values():
    # binom(1/2, j) from scipy.special.binom
    assert all(abs(c - scipy.special.binom(0.5, j)) < 1e-15 for j, c in enumerate(sqrt_series()[:20]))
    # E(z) = sqrt(1+z) sqrt(1+d^2 z) + d z, O(z) = d sqrt(1+z) + sqrt(1+d^2 z) (module docstring, closed form)
    d, z = 0.7, 0.1
    e, o = _combined_series(d)
    assert abs(sum(c * z**j for j, c in enumerate(e)) - (math.sqrt(1 + z) * math.sqrt(1 + d * d * z) + d * z)) < 1e-15
    assert abs(sum(c * z**j for j, c in enumerate(o)) - (d * math.sqrt(1 + z) + math.sqrt(1 + d * d * z))) < 1e-15
    # Paterson-Stockmeyer evaluation equals the plain sum of powers, every degree and block size
    g = torch.Generator().manual_seed(0)
    a = torch.randn(5, 5, generator=g, dtype=torch.float64)
    zm = -0.05 * a @ a.T
    for m in range(0, 9):
        coefs = sqrt_series()[:m + 1]
        q = _block_size(max(m, 1))
        powers = [torch.linalg.matrix_power(zm, j)[None] for j in range(1, q + 1)]
        plain = sum(c * torch.linalg.matrix_power(zm, j) for j, c in enumerate(coefs))
        torch.testing.assert_close(matrix_series(coefs, powers)[0], plain, rtol=0, atol=1e-15)
    # degree: tail bound below target; refuses zeta beyond the range
    assert series_degree(sqrt_series(), 0.0, 1e-16) == 0
    assert series_degree(sqrt_series(), 0.3, 1e-16) is None


def test_square_kernel_failure_changes_nothing():
    layer = nn.Linear(4, 4, bias=False).double()
    with torch.no_grad():
        q, _ = torch.linalg.qr(torch.randn(4, 4, generator=torch.Generator().manual_seed(0), dtype=torch.float64))
        layer.weight.copy_(q)
    hn.constrain(layer, weight=hn.Orthonormal())
    opt = hn.Langevin(layer.parameters(), step=1.0, temperature=0.2)
    g = torch.randn(4, 4, generator=torch.Generator().manual_seed(1), dtype=torch.float64)
    layer.weight.grad = 100.0 * (g - g.T)  # s ||Omega||_2 >> 1: no SHAKE solution
    before = _snapshot(layer, opt)
    with pytest.raises(hn.IntegrationError, match="projection") as err:
        opt.step()
    assert err.value.reason == "projection failed"
    after = _snapshot(layer, opt)
    assert torch.equal(before[0]["weight"], after[0]["weight"]) and not any(after[1]["state"].values())
    assert all(torch.equal(v, after[1]["generators"][k]) for k, v in before[1]["generators"].items())
    layer.weight.grad = torch.full_like(layer.weight, float("nan"))
    with pytest.raises(hn.IntegrationError, match="non-finite gradient"):
        opt.step()
    assert torch.equal(before[0]["weight"], layer.weight.detach())


def test_square_kernel_float32_stays_on_the_set_and_near_reference():
    # float32: the drift check rarely fires, so this covers the uncorrected branch; the
    # constraint must hold to the dtype tolerance (8 eps, geometry.base.default_tolerance)
    g = torch.Generator().manual_seed(5)
    nets = []
    for _ in range(2):
        layer = nn.Linear(32, 32, bias=False)
        with torch.no_grad():
            layer.weight.copy_(torch.linalg.qr(torch.randn(32, 32, generator=torch.Generator().manual_seed(6)))[0])
        hn.constrain(layer, weight=hn.Orthonormal())
        nets.append(layer)
    opts = [hn.Langevin(n.parameters(), step=0.1, temperature=0.01, seed=1, backend=b)
            for n, b in zip(nets, ("eager", "reference"))]
    target = torch.randn(32, 32, generator=g)
    for _ in range(200):
        for layer, opt in zip(nets, opts):
            opt.zero_grad()
            ((layer.weight - target) ** 2).sum().backward()
            opt.step()
    assert hn.residuals(nets[0])["weight"] <= default_tolerance(torch.float32)
    # same noise, same dynamics: float32 roundoff grows slowly along the trajectory (common practice, no source)
    assert (nets[0].weight - nets[1].weight).abs().max() < 1e-4


def test_cut_odd_series_moves_the_drift_factor_off_the_group_only_at_second_order():
    # The T = 0 drift factor K = E(Z) + A O(Z) with the odd series O cut early: the error
    # delta = K_full - K_cut is skew, so K_cut^T K_cut - I = -(K-I)^T delta - delta^T (K-I)
    # + delta^T delta is of size 2 ||K - I|| ||delta|| (K - I ~ (1 + d) A), far below ||delta||
    # for the small A of training (the reason the odd series gets a looser budget).
    g = torch.Generator().manual_seed(7)
    b = torch.randn(1, 8, 8, generator=g, dtype=torch.float64)
    a = 0.004 * (b - b.transpose(-1, -2))  # ||A||_2 about 0.03
    z = a @ a
    e, o = _combined_series(0.9)
    full = _drift_factor(e, o, z, a, 20, 20)
    cut = _drift_factor(e, o, z, a, 20, 0)
    eye = torch.eye(8, dtype=torch.float64)
    assert torch.linalg.matrix_norm(full[0].T @ full[0] - eye, ord=2) < 1e-14  # full: orthogonal
    delta = full[0] - cut[0]
    size = float(torch.linalg.matrix_norm(delta, ord=2))
    assert size > 1e-6  # the cut is visible, so the checks below can fail
    assert torch.allclose(delta, -delta.T, rtol=0, atol=1e-15)  # float64 roundoff of entries near 1
    norm_a = float(torch.linalg.matrix_norm(a[0], ord=2))
    err = float(torch.linalg.matrix_norm(cut[0].T @ cut[0] - eye, ord=2))
    k_minus_i = float(torch.linalg.matrix_norm(full[0] - eye, ord=2))
    assert err <= 2 * k_minus_i * size + size**2 + 1e-15
    assert norm_a < 0.05 and err < 0.2 * size


def _cold_inputs(n, scale, s, zeta, batch, rank2=False, seed=11):
    """Orthonormal W (times scale) and V such that A = s skew(X^T V) has ||A A||_F = zeta
    (largest over the batch); rank2 makes A of rank two, where ||A||_2^2 = zeta / sqrt(2)."""
    g = torch.Generator().manual_seed(seed)
    x = torch.linalg.qr(torch.randn(batch, n, n, generator=g, dtype=torch.float64))[0]
    w = scale * x
    if rank2:
        b = torch.randn(batch, n, 2, generator=g, dtype=torch.float64)
        v = w @ (b[..., :1] @ b[..., 1:].transpose(-1, -2))  # X^T V has rank one: its skew part rank two
    else:
        v = torch.randn(batch, n, n, generator=g, dtype=torch.float64)
    z = fo._zeta(torch.bmm(*(2 * [fo._scaled_skew(w, v, 0.5 * s / scale**2)])))
    return w, v * math.sqrt(zeta / float(z))


def _closed_form_cold(w, a, scale, s, d):
    """W2 = W K1 K2 with K1 = sqrt(I + A^2) + A, K2 = sqrt(I + d^2 A^2) + d A (two RATTLE drifts
    at T = 0, module docstring) and P2 = d W2 A / s; square roots by scipy.linalg.sqrtm (the
    outside reference)."""
    eye = torch.eye(w.shape[-1], dtype=torch.float64)
    out_w, out_p = [], []
    for wi, ai in zip(w, a):
        k1 = torch.from_numpy(scipy.linalg.sqrtm((eye + ai @ ai).numpy()).real) + ai
        k2 = torch.from_numpy(scipy.linalg.sqrtm((eye + d * d * ai @ ai).numpy()).real) + d * ai
        out_w.append(wi @ k1 @ k2)
        out_p.append(d * out_w[-1] @ ai / s)
    return torch.stack(out_w), torch.stack(out_p)


# (scale, zeta, batch, rank2, decay, n x n products expected from torch.bmm)
_COLD_CASES = {
    "momentum term cut": (0.8, 1e-6, 1, False, 0.9, 2),
    "large scale, rank-two A, batch": (8.0, 1e-5, 2, True, 0.9, 4),
    "momentum term kept": (1.0, 2.7e-6, 1, False, 0.9, 3),
    "decay 0": (1.0, 5e-6, 1, False, 0.0, 2),
    "large zeta: series in Z": (1.0, 1e-2, 1, False, 0.9, None),
}


@pytest.mark.parametrize("case", list(_COLD_CASES))
def test_cold_step_against_closed_form_rattle(case, monkeypatch):
    # T = 0: the fast step forms W^T V and the products W A^k (module docstring) and leaves
    # out the momentum's last term when its bound tau is below half the tolerance; it must
    # land within its budgets of the closed-form RATTLE step, whichever branch it takes
    scale, zeta, batch, rank2, d, products = _COLD_CASES[case]
    n, s, tol = 8, 0.05, 1e-8
    w, v = _cold_inputs(n, scale, s, zeta, batch, rank2)
    a = fo._scaled_skew(w, v, 0.5 * s / scale**2)
    w2_exact, p2_exact = _closed_form_cold(w, a, scale, s, d)
    tau = fo.momentum_tail(d, zeta, 2)
    if case == "momentum term cut":
        assert tau <= 0.5 * tol and fo._cold_degrees(d, zeta, tol)[2] == 2
    if case in ("momentum term kept", "decay 0"):
        assert tau > 0.5 * tol and fo._cold_degrees(d, zeta, tol)[2] == 2
    if case == "large zeta: series in Z":
        assert fo._cold_degrees(d, zeta, tol)[2] > fo._PRODUCTS_MAX

    calls = []
    real_bmm = torch.bmm
    monkeypatch.setattr(torch, "bmm", lambda *args: calls.append(1) or real_bmm(*args))
    w2, p2, kinetic, ok, degree = fo.square_orthonormal_baoab(
        w, v, None, scale=scale, step=2 * s, decay=d, sigma=0.0, tolerance=tol)
    monkeypatch.undo()
    assert bool(ok)
    if products is not None:
        assert len(calls) == products  # W^T V is the one baddbmm
    eye = torch.eye(n, dtype=torch.float64)
    for i in range(batch):
        # position: even tail (an eighth of tol) plus odd tail (half of tol), unit frame
        assert float(torch.linalg.matrix_norm(w2[i] - w2_exact[i], 2)) / scale <= 0.625 * tol
        x2 = w2[i] / scale
        assert float(torch.linalg.matrix_norm(x2.T @ x2 - eye, 2)) <= 0.25 * tol
        # momentum, as the next drift's displacement s P / scale: within its budget
        err = float(torch.linalg.matrix_norm(s * (p2[i] - p2_exact[i]), 2)) / scale
        assert err <= 0.5 * tol
        if d > 0:
            # the stored momentum's normal part: second order for the (odd) cut power (module docstring)
            m = x2.T @ p2[i]
            normal = float(torch.linalg.matrix_norm(0.5 * (m + m.T))) / float(torch.linalg.matrix_norm(p2[i]))
            assert normal <= max((1 + d) * tau, 1e-13)
    if case == "momentum term cut":
        # the cut is visible (so the budget check above can fail) and tau bounds it
        err = float(torch.linalg.matrix_norm(s * (p2[0] - p2_exact[0]), 2)) / scale
        assert 1e-3 * tol < err <= d * tau
        # a step that cut one term more (the U_2 term of the momentum) fails the budget
        cut_more = d / s * fo.power_coefficients(d, 1)[0] * (w[0] @ a[0])
        assert float(torch.linalg.matrix_norm(s * (cut_more - p2_exact[0]), 2)) / scale > 10 * tol
    if case == "decay 0":
        assert not p2.any()
    assert torch.allclose(kinetic, 0.5 * (p2 * p2).sum((-2, -1)), rtol=1e-14, atol=0)


def test_cold_step_corrects_roundoff_drift_first():
    # W off the set by about 1e-6 (between the correction threshold tol / 8 and its limit
    # sqrt(tol / 8)): one Newton-Schulz step brings it to ~1e-12, then the step lands within
    # its budgets of the closed-form step from the polar factor of W (the nearest orthogonal
    # matrix, by SVD)
    n, scale, s, d, tol = 8, 1.0, 0.05, 0.9, 1e-8
    w, v = _cold_inputs(n, scale, s, 1e-6, 1)
    sym = torch.randn(n, n, generator=torch.Generator().manual_seed(3), dtype=torch.float64)
    w = w @ (torch.eye(n, dtype=torch.float64) + 1e-6 * (sym + sym.T))
    assert 0.125 * tol < float(fo._drift_error(w, scale**2)) < math.sqrt(0.125 * tol)
    u_, _, vh = torch.linalg.svd(w)
    a = fo._scaled_skew(w, v, 0.5 * s / scale**2)  # A from the uncorrected W, as the step forms it
    w2_exact, _ = _closed_form_cold(u_ @ vh, a, scale, s, d)
    w2, _, _, ok, _ = fo.square_orthonormal_baoab(w, v, None, scale=scale, step=2 * s, decay=d, sigma=0.0,
                                                  tolerance=tol)
    assert bool(ok)
    x2 = w2[0] / scale
    assert float(torch.linalg.matrix_norm(x2.T @ x2 - torch.eye(n, dtype=torch.float64), 2)) <= 0.25 * tol
    assert float(torch.linalg.matrix_norm(w2[0] - w2_exact[0], 2)) / scale <= 0.625 * tol


@pytest.mark.parametrize("lr", [0.002, 0.05])
def test_cold_step_float32_momentum_stays_tangent(lr):
    # float32 training at T = 0 (SGD-style momentum 0.9): at the small step the momentum's cut
    # term is left out (N = 2), at the larger one N is rounded up to an even degree; in both the
    # stored momentum must stay tangent to the dtype tolerance (8 eps,
    # geometry.base.default_tolerance), as RATTLE's is to roundoff
    layer = nn.Linear(48, 48, bias=False)
    with torch.no_grad():
        layer.weight.copy_(torch.linalg.qr(torch.randn(48, 48, generator=torch.Generator().manual_seed(8)))[0])
    geometry = hn.Orthonormal()
    hn.constrain(layer, weight=geometry)
    opt = hn.Langevin.from_sgd(layer.parameters(), lr=lr, momentum=0.9)
    target = torch.randn(48, 48, generator=torch.Generator().manual_seed(9))
    worst, degrees = 0.0, set()
    for _ in range(150):
        opt.zero_grad()
        ((layer.weight - target) ** 2).sum().backward()
        opt.step()
        degrees.add(opt.last_info.parameters[0].projection_iterations)
        worst = max(worst, float(geometry.tangent_residual(layer.weight.detach(), opt.state[layer.weight]["momentum"])))
    assert worst <= default_tolerance(torch.float32)
    assert hn.residuals(layer)["weight"] <= default_tolerance(torch.float32)
    assert {k for _, k in opt.last_info.kernels} == {"square-orthonormal"} and degrees
