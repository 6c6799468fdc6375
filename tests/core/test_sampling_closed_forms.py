"""Sampling against closed-form distributions, with standard errors from many
independent chains (the rows of one tensor, or a batch of matrices).

Every check compares |estimate - truth| / standard_error with a z bound of 4.5
(a false alarm about once in 150,000 per check; common practice, no source),
with fixed seeds.  ``test_broken_noise_scale_fails_the_vmf_check`` shows once
that a kernel whose noise is 15% too large fails the same check.
"""

from __future__ import annotations

import math

import pytest
import scipy.special
import scipy.stats
import torch
from torch import nn

import holonomic as hn
from holonomic.dynamics import operators
from holonomic.geometry import Constraint, ShakeResult
from holonomic.geometry.base import default_tolerance
from holonomic.geometry.stiefel import stiefel_geodesic, stiefel_shake, stiefel_tangent

pytestmark = pytest.mark.slow
Z = 4.5

SAMPLERS = {
    "rattle": lambda params, seed: hn.Langevin(params, step=0.1, friction=1.0, temperature=1.0, seed=seed),
    "geodesic": lambda params, seed: hn.Langevin(params, step=0.1, friction=1.0, temperature=1.0, seed=seed,
                                                 projection="geodesic"),
    "overdamped": lambda params, seed: hn.OverdampedLangevin(params, step=0.004, temperature=1.0, seed=seed),
}
# overdamped has weak order 1 (bias O(h)) and needs a smaller step, hence more steps;
# at h = 0.01 its vMF bias (~0.009) was measured to exceed the bound.
STEPS = {"rattle": (250, 400), "geodesic": (250, 400), "overdamped": (700, 1100)}
BATCH = 500  # independent matrices per Stiefel test


def _sphere_chains(make, steps, rows, d, field, seed=0, record=lambda w: w):
    """Run ``rows`` independent chains on S^{d-1} with constant force ``-field``
    (U = -field . w); return per-row time averages of ``record(w)`` over the
    second phase, and the final positions."""
    w = nn.Parameter(torch.zeros(rows, d, dtype=torch.float64))
    with torch.no_grad():
        w[:, -1] = 1.0  # every chain starts at the north pole
    holder = nn.Module()
    holder.w = w
    hn.constrain(holder, w=hn.FixedNorm(1.0, over="rows"))
    opt = make([w], seed)
    burn, run = steps
    acc = 0.0
    for i in range(burn + run):
        w.grad = -field.expand_as(w).clone()
        opt.step()
        if i >= burn:
            acc = acc + record(w.detach())
    assert hn.residuals(holder)["w"] < 1e-13
    return acc / run, w.detach()


def _z(chain_means: torch.Tensor, truth: float) -> float:
    se = float(chain_means.std()) / math.sqrt(chain_means.numel())
    return abs(float(chain_means.mean()) - truth) / se


@pytest.mark.parametrize("scheme", list(SAMPLERS))
def test_uniform_on_the_sphere_beta_marginal(scheme):
    # Uniform on S^{d-1}: (x_1 + 1)/2 ~ Beta((d-1)/2, (d-1)/2) (Mardia & Jupp,
    # Directional Statistics, 2000, section 9.3; recalled from memory); KS test
    # with scipy.stats.
    d = 4
    _, final = _sphere_chains(SAMPLERS[scheme], STEPS[scheme], 3000, d, torch.zeros(d, dtype=torch.float64))
    x = ((final[:, 0] + 1) / 2).numpy()
    p = scipy.stats.kstest(x, scipy.stats.beta((d - 1) / 2, (d - 1) / 2).cdf).pvalue
    assert p > 1e-3, p
    # and the second moment E[x x^T] = I/d
    second = (final[:, 1] ** 2).numpy()
    assert abs(second.mean() - 1 / d) / (second.std() / math.sqrt(len(second))) < Z


def _vmf_mean_resultant(d: int, kappa: float) -> float:
    # E[mu . x] = I_{d/2}(kappa) / I_{d/2-1}(kappa) (Mardia & Jupp, Directional
    # Statistics, 2000), with scipy.special.ive (scaling cancels).
    return float(scipy.special.ive(d / 2, kappa) / scipy.special.ive(d / 2 - 1, kappa))


@pytest.mark.parametrize("scheme", list(SAMPLERS))
def test_von_mises_fisher_mean_resultant_length(scheme):
    d, kappa = 3, 2.0
    mu = torch.zeros(d, dtype=torch.float64)
    mu[0] = 1.0
    means, _ = _sphere_chains(SAMPLERS[scheme], STEPS[scheme], 2000, d, kappa * mu,
                              record=lambda w: w[:, 0].clone())
    truth = _vmf_mean_resultant(d, kappa)
    # closed form for d = 3: coth(kappa) - 1/kappa (Mardia & Jupp 2000)
    assert math.isclose(truth, 1 / math.tanh(kappa) - 1 / kappa, rel_tol=1e-12)
    assert _z(means, truth) < Z, (float(means.mean()), truth)


def test_broken_noise_scale_fails_the_vmf_check(monkeypatch):
    """The same check rejects a thermostat whose noise is 15% too large."""

    def broken_thermostat(phase, fraction, *, force, geometry, settings, noise, state):
        gh = settings.friction * fraction * settings.step
        scale = 1.15 * math.sqrt(settings.temperature * -math.expm1(-2 * gh))
        phase.p = geometry.tangent(phase.w, phase.p * math.exp(-gh) + scale * noise())

    monkeypatch.setitem(operators.OPERATORS, "broken_thermostat", broken_thermostat)
    monkeypatch.setitem(operators.NOISE_DRAWS, "broken_thermostat", operators.NOISE_DRAWS["thermostat"])

    class Broken(hn.Langevin):
        scheme = (("kick", 1.0), ("drift", 0.5), ("broken_thermostat", 1.0), ("drift", 0.5))

    d, kappa = 3, 2.0
    mu = torch.zeros(d, dtype=torch.float64)
    mu[0] = 1.0
    make = lambda params, seed: Broken(params, step=0.1, friction=1.0, temperature=1.0, seed=seed)
    means, _ = _sphere_chains(make, STEPS["rattle"], 2000, d, kappa * mu, record=lambda w: w[:, 0].clone())
    assert _z(means, _vmf_mean_resultant(d, kappa)) > Z


class _BatchOfOrthonormal(Constraint):
    """Test geometry: a (B, n, k) tensor holding B independent points of the
    unit Stiefel manifold, built from the library's batched Stiefel functions
    (the same code that :class:`holonomic.Orthonormal` uses per matrix)."""

    def validate_shape(self, shape, name="parameter"):
        assert len(shape) == 3 and shape[1] >= shape[2]

    def project(self, w):
        u, _, vh = torch.linalg.svd(w, full_matrices=False)
        return u @ vh

    def tangent(self, w, v):
        return stiefel_tangent(w, v)

    def shake(self, w, y):
        new, ok, it = stiefel_shake(w, y, tolerance=default_tolerance(w.dtype), max_iterations=100)
        return ShakeResult(new, ok, it)

    def geodesic(self, w, p, t):
        return stiefel_geodesic(w, p, t)

    def residual(self, w):
        eye = torch.eye(w.shape[-1], dtype=w.dtype)
        return (w.transpose(-1, -2) @ w - eye).abs().max()

    def tangent_residual(self, w, v):
        return (w.transpose(-1, -2) @ v + v.transpose(-1, -2) @ w).abs().max()

    def tangent_dof(self, shape):
        b, n, k = shape
        return b * (n * k - k * (k + 1) // 2)


def _stiefel_chains(make, steps, batch, n, k, force=None, record=lambda x: x, seed=0):
    x = nn.Parameter(torch.eye(n, k, dtype=torch.float64).repeat(batch, 1, 1))
    holder = nn.Module()
    holder.x = x
    hn.constrain(holder, x=_BatchOfOrthonormal())
    opt = make([x], seed)
    burn, run = steps
    acc = 0.0
    for i in range(burn + run):
        x.grad = torch.zeros_like(x) if force is None else force.expand_as(x).clone()
        opt.step()
        if i >= burn:
            acc = acc + record(x.detach())
    assert hn.residuals(holder)["x"] < 1e-12
    return acc / run, x.detach()


@pytest.mark.parametrize("scheme", ["rattle", "geodesic"])  # overdamped: uniform Stiefel test below
def test_haar_measure_on_so4_trace_moments_and_scipy_samples(scheme):
    # Diaconis & Shahshahani, J. Appl. Probab. 31A (1994): for Haar O(n),
    # E[tr Q] = 0, E[tr Q^2] = 1, E[(tr Q)^2] = 1; SO(n) agrees for degree < n.
    n = 4
    batch = BATCH
    rec = lambda q: torch.stack([
        q.diagonal(dim1=-2, dim2=-1).sum(-1),
        (q @ q).diagonal(dim1=-2, dim2=-1).sum(-1),
        q.diagonal(dim1=-2, dim2=-1).sum(-1) ** 2,
    ], dim=-1)
    means, final = _stiefel_chains(SAMPLERS[scheme], STEPS[scheme], batch, n, n, record=rec)
    for j, truth in enumerate((0.0, 1.0, 1.0)):
        assert _z(means[:, j], truth) < Z, (j, float(means[:, j].mean()))
    assert (torch.linalg.det(final) > 0).all()  # started at I: stays in SO(n)
    # two-sample KS against scipy.stats.special_ortho_group samples of tr Q
    ref = scipy.stats.special_ortho_group(dim=n, seed=1).rvs(size=1000)
    ours = final.diagonal(dim1=-2, dim2=-1).sum(-1).numpy()
    assert scipy.stats.ks_2samp(ours, ref.trace(axis1=1, axis2=2)).pvalue > 1e-3


@pytest.mark.parametrize("scheme", list(SAMPLERS))
def test_uniform_stiefel_second_moment(scheme):
    # Uniform on V_k(R^n): E[X X^T] = (k/n) I -- by invariance under rotations
    # E[X X^T] = c I, and its trace is E[tr X^T X] = k (Chikuse, Statistics on
    # Special Manifolds, 2003; the argument is elementary).
    n, k = 5, 2
    rec = lambda x: (x @ x.transpose(-1, -2)).reshape(x.shape[0], -1)
    means, _ = _stiefel_chains(SAMPLERS[scheme], STEPS[scheme], BATCH, n, k, record=rec)
    eye = torch.eye(n, dtype=torch.float64).reshape(-1)
    for j in (0, 1, 6, 12, 24):  # diagonal entries (0, 6, 12, 24) and one off-diagonal (1)
        assert _z(means[:, j], float(eye[j]) * k / n) < Z, j


@pytest.mark.parametrize("scheme", ["rattle", "geodesic"])
def test_so3_rotation_angle_under_trace_potential(scheme):
    # SO(3) with U = -kappa tr R: the rotation angle t has density
    # proportional to exp(kappa (1 + 2 cos t)) (1 - cos t) on [0, pi]
    # (the Haar measure of SO(3) has angle density (1 - cos t)/pi: Miles,
    # Biometrika 52 (1965) 636-639, recalled from memory; times the Boltzmann factor).
    from scipy import integrate

    kappa = 1.0
    dens = lambda t: math.exp(kappa * (1 + 2 * math.cos(t))) * (1 - math.cos(t))
    z = integrate.quad(dens, 0, math.pi)[0]
    truth = integrate.quad(lambda t: math.cos(t) * dens(t), 0, math.pi)[0] / z
    force = -kappa * torch.eye(3, dtype=torch.float64)  # grad of -kappa tr R
    rec = lambda r: (r.diagonal(dim1=-2, dim2=-1).sum(-1) - 1) / 2  # cos of the rotation angle
    means, _ = _stiefel_chains(SAMPLERS[scheme], STEPS[scheme], BATCH, 3, 3, force=force, record=rec)
    assert _z(means, truth) < Z, (float(means.mean()), truth)
