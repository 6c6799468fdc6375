"""Kinetic temperature: the estimator |P|^2 / N_f and the audit's use of it."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from scipy import special, stats

import holonomic as hn
from holonomic.audit import Audit, kinetic_fluctuation, kinetic_interval, kinetic_temperature, series_mean

Z_BOUND = 4.0  # two-sided normal tail 6e-5 per check (common practice, no source)


def _tangent_gaussian(constraint, shape, temperature, draws, gen):
    """Momenta from the tangent-space Gaussian at random points of the set:
    ambient N(0, T I) projected onto the tangent space (an orthogonal
    projection of an isotropic Gaussian is the isotropic Gaussian on the
    subspace)."""
    out = []
    for _ in range(draws):
        w = constraint.project(torch.randn(shape, generator=gen, dtype=torch.float64))
        xi = math.sqrt(temperature) * torch.randn(shape, generator=gen, dtype=torch.float64)
        out.append(constraint.tangent(w, xi))
    return out


def _z(estimates, temperature, dof):
    # chi-square with N_f dof has variance 2 N_f (closed form), so one estimate
    # has sd T sqrt(2/N_f) and the mean of n independent ones sd / sqrt(n).
    se = kinetic_fluctuation(temperature, dof) / math.sqrt(len(estimates))
    return (float(np.mean(estimates)) - temperature) / se


@pytest.mark.parametrize("constraint, shape", [
    (hn.FixedNorm(2.0, over="rows"), (4, 5)),      # N_f = 4 * 4 = 16 of 20
    (hn.Orthonormal(over="rows"), (3, 5)),         # N_f = 15 - 6 = 9 of 15
    (hn.Orthonormal(over="columns"), (4, 4)),      # O(4): N_f = 6 of 16
])
def test_estimator_unbiased_with_tangent_dof_and_biased_with_ambient(constraint, shape):
    gen = torch.Generator().manual_seed(7)
    temperature, draws = 0.7, 1500
    dof = constraint.tangent_dof(shape)
    numel = math.prod(shape)
    assert dof < numel
    momenta = _tangent_gaussian(constraint, shape, temperature, draws, gen)
    right = [kinetic_temperature(p, dof) for p in momenta]
    assert abs(_z(right, temperature, dof)) < Z_BOUND
    # The same check with the ambient size as degrees of freedom must fail:
    # the estimate is low by the factor N_f / numel.
    wrong = [kinetic_temperature(p, numel) for p in momenta]
    assert abs(_z(wrong, temperature, dof)) > 3 * Z_BOUND
    # Spread of single estimates: sd T sqrt(2/N_f) (chi-square variance 2 N_f),
    # checked against scipy.stats.chi2's variance.
    sd = float(np.std(right, ddof=1))
    expected = temperature / dof * math.sqrt(stats.chi2(dof).var())
    assert abs(sd / expected - 1) < 0.1


def test_interval_matches_chi_square_coverage():
    # scipy.stats.chi2 / scipy.stats.norm: the interval has the coverage of
    # +-k normal sd, and for large N_f it approaches T +- k T sqrt(2/N_f).
    lo, hi = kinetic_interval(2.0, 6, 3.0)
    cover = stats.chi2(6).cdf(hi * 6 / 2.0) - stats.chi2(6).cdf(lo * 6 / 2.0)
    assert cover == pytest.approx(1 - 2 * stats.norm.sf(3.0), rel=1e-9)
    lo, hi = kinetic_interval(1.0, 10**6, 3.0)
    assert (hi - 1) / kinetic_fluctuation(1.0, 10**6) == pytest.approx(3.0, rel=0.01)
    assert (1 - lo) / kinetic_fluctuation(1.0, 10**6) == pytest.approx(3.0, rel=0.01)
    with pytest.raises(ValueError, match="dof"):
        kinetic_temperature(torch.ones(3), 0)


@pytest.mark.slow
def test_long_von_mises_fisher_run_matches_target_temperature():
    """BAOAB on the sphere with U = -a.w per row samples vMF; the audit's
    kinetic temperature (state momentum, before the closing half kick) must
    match T within its standard error, per parameter and pooled."""
    n_params, rows, d = 2, 512, 3
    temperature, h = 1.0, 0.2
    model = torch.nn.Module()
    gen = torch.Generator().manual_seed(3)
    for i in range(n_params):
        model.register_parameter(f"w{i}", torch.nn.Parameter(torch.randn(rows, d, generator=gen,
                                                                         dtype=torch.float64)))
        hn.constrain(model, **{f"w{i}": hn.FixedNorm(1.0)})
    a = torch.tensor([4.0, 0.0, 0.0], dtype=torch.float64)  # kappa = r |a| / T = 4
    opt = hn.Langevin(model.parameters(), step=h, friction=1.0, temperature=temperature, seed=11)
    audit = Audit(model, opt, every=1, burn_in=5.0)
    for _ in range(1500):
        for p in model.parameters():
            p.grad = (-a).expand(rows, d).clone()
        opt.step()
        audit()
    assert audit.ok, audit.summary()["first_alarms"]
    per_param = {}
    for rec in audit.records:
        for p in rec["parameters"]:
            if p["kinetic_check"] == "checked":
                per_param.setdefault(p["name"], []).append(p["kinetic_temperature"])
    means = [series_mean(v) for v in per_param.values()]
    assert len(means) == n_params and all(m.count > 1400 for m in means)
    for m in means:  # per parameter, SE from the integrated autocorrelation time
        assert abs(m.mean - temperature) / m.stderr < Z_BOUND
    pooled = sum(m.mean for m in means) / n_params
    pooled_se = math.sqrt(sum(m.stderr**2 for m in means)) / n_params  # independent parameters
    assert abs(pooled - temperature) / pooled_se < Z_BOUND
    # With the ambient dimension (3 per row instead of 2) the same test fails.
    assert abs(pooled * (d - 1) / d - temperature) / pooled_se > 3 * Z_BOUND
    # Positions: E[mu.x] = A_3(kappa) = I_{3/2}(k)/I_{1/2}(k) (Mardia & Jupp 2000,
    # via scipy.special.ive); rows are independent chains, last state only.
    x = torch.cat([p.detach()[:, 0] for p in model.parameters()]).numpy()
    kappa = 4.0
    a3 = special.ive(1.5, kappa) / special.ive(0.5, kappa)
    assert abs(x.mean() - a3) / (x.std(ddof=1) / math.sqrt(x.size)) < Z_BOUND
