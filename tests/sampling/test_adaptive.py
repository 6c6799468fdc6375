"""AdaptiveLangevin: sampling with unknown gradient noise, and the integrator guarantees."""

import io
import math

import pytest
import torch

import holonomic as hn
from scipy import special

from holonomic import FixedNorm, IntegrationError, Langevin, Orthonormal, constrain
from holonomic.sampling import AdaptiveLangevin

DTYPE = torch.float64


class _AmbientDofFixedNorm(FixedNorm):
    """Deliberately wrong: reports the ambient size rows*d as the degrees of freedom."""

    def tangent_dof(self, shape):
        return math.prod(shape)


def _rows_on_sphere(rows: int, d: int, seed: int, constraint=None) -> torch.nn.Linear:
    """A bias-free linear layer whose rows are independent chains on the unit sphere."""
    layer = torch.nn.Linear(d, rows, bias=False).to(DTYPE)
    with torch.no_grad():
        layer.weight.copy_(torch.randn(rows, d, generator=torch.Generator().manual_seed(seed),
                                       dtype=DTYPE))
    return constrain(layer, weight=constraint or FixedNorm(1.0))


def _vmf_mean_resultant(optimizer_factory, *, sigma_g, rows=1000, d=3, steps=1200, burn_in=300,
                        every=5, seed=0, constraint=None):
    """Run U(W) = -sum_i a.w_i on unit-norm rows with N(0, sigma_g^2) added to every gradient.

    Returns (estimate of E[a.w], its standard error, optimizer). Rows are independent chains,
    so the standard error is the spread of per-row time averages over sqrt(rows).
    """
    layer = _rows_on_sphere(rows, d, seed, constraint)
    w = layer.weight
    opt = optimizer_factory([w])
    a = torch.zeros(d, dtype=DTYPE)
    a[0] = 1.0
    # The gradient noise has its own generator, seeded apart from the optimizer's.
    noise = torch.Generator().manual_seed(seed + 10_000)
    total = torch.zeros(rows, dtype=DTYPE)
    count = 0
    for t in range(steps):
        w.grad = -a.expand(rows, d) + sigma_g * torch.randn(rows, d, generator=noise, dtype=DTYPE)
        opt.step()
        if t >= burn_in and (t - burn_in) % every == 0:
            total += w.detach()[:, 0]
            count += 1
    per_row = total / count
    return per_row.mean().item(), per_row.std().item() / math.sqrt(rows), opt


@pytest.mark.slow
def test_vmf_with_unknown_gradient_noise_adaptive_right_plain_hot():
    temperature, step, friction, sigma_g, d = 0.2, 0.1, 1.0, 2.0, 3
    kappa = 1.0 / temperature  # U = -a.w, |a| = 1, r = 1: w ~ vMF(a, r|a|/T) (docs/math.md sec. 5)
    # Mean resultant length A_d(kappa) = I_{d/2}(kappa)/I_{d/2-1}(kappa) (Mardia & Jupp 2000)
    truth = special.ive(d / 2, kappa) / special.ive(d / 2 - 1, kappa)
    assert truth == pytest.approx(1 / math.tanh(kappa) - 1 / kappa, rel=1e-12)  # d = 3 closed form

    est, se, opt = _vmf_mean_resultant(
        lambda p: AdaptiveLangevin(p, step=step, temperature=temperature, friction=friction,
                                   seed=1),
        sigma_g=sigma_g, d=d)
    assert abs(est - truth) < 4.0 * se, (est, truth, se)
    # The thermostat absorbs the noise: xi -> A + h sigma_g^2 / (2 T) (= 2.0 here), from the
    # stationary point of d xi/dt (Leimkuhler & Shang 2016); xi fluctuates, so 15 % slack.
    (xi,) = opt.thermostat_friction()
    assert xi == pytest.approx(friction + step * sigma_g**2 / (2 * temperature), rel=0.15)

    hot, hot_se, _ = _vmf_mean_resultant(
        lambda p: Langevin(p, step=step, friction=friction, temperature=temperature, seed=1),
        sigma_g=sigma_g, d=d)
    # Plain Langevin runs at about T + h sigma_g^2 / (2 gamma) = 2 T: a clearly smaller mean
    # resultant length (A_3(kappa/2) = 0.61 against 0.80).
    assert truth - hot > 20.0 * math.hypot(se, hot_se), (hot, truth)
    hot_truth = special.ive(d / 2, kappa / 2) / special.ive(d / 2 - 1, kappa / 2)
    assert abs(hot - hot_truth) < 0.03  # common practice, no source: loose check of the 2T story

    # Counting ambient instead of tangent degrees of freedom (3 instead of 2 per row) makes the
    # thermostat aim at 1.5 T: the same test must fail (A_3(kappa / 1.5) = 0.70).
    wrong, wrong_se, _ = _vmf_mean_resultant(
        lambda p: AdaptiveLangevin(p, step=step, temperature=temperature, friction=friction,
                                   seed=1),
        sigma_g=sigma_g, d=d, constraint=_AmbientDofFixedNorm(1.0))
    assert truth - wrong > 20.0 * math.hypot(se, wrong_se), (wrong, truth)


def _two_group_problem(seed=0):
    """A quadratic unconstrained group and an orthonormal group (invented data from a seed)."""
    gen = torch.Generator().manual_seed(seed)
    free = torch.nn.Parameter(torch.randn(7, 3, generator=gen, dtype=DTYPE))
    layer = torch.nn.Linear(5, 3, bias=False).to(DTYPE)
    with torch.no_grad():
        layer.weight.copy_(torch.randn(3, 5, generator=gen, dtype=DTYPE))
    constrain(layer, weight=Orthonormal(over="rows"))
    target = torch.randn(3, 5, generator=gen, dtype=DTYPE)
    return free, layer.weight, target


def _set_grads(free, ortho, target, gen=None, sigma=0.0):
    free.grad = free.detach().clone()
    ortho.grad = -target.clone()
    if gen is not None:
        free.grad += sigma * torch.randn(free.shape, generator=gen, dtype=DTYPE)


def _make(free, ortho, seed=3, projection="rattle"):
    return AdaptiveLangevin(
        [{"params": [free]}, {"params": [ortho], "temperature": 0.05, "thermostat_mass": 2.0}],
        step=0.05, temperature=0.3, friction=0.5, seed=seed, projection=projection)


@pytest.mark.parametrize("projection", ["rattle", "geodesic"])
def test_resume_from_state_dict_is_bit_identical(projection):
    free, ortho, target = _two_group_problem()
    opt = _make(free, ortho, projection=projection)
    for _ in range(5):
        _set_grads(free, ortho, target)
        opt.step()
    buffer = io.BytesIO()
    torch.save(opt.state_dict(), buffer)
    saved_weights = (free.detach().clone(), ortho.detach().clone())
    for _ in range(7):
        _set_grads(free, ortho, target)
        opt.step()
    first = (free.detach().clone(), ortho.detach().clone(), opt.thermostat_friction())

    with torch.no_grad():
        free.copy_(saved_weights[0])
        ortho.copy_(saved_weights[1])
    resumed = _make(free, ortho, seed=99, projection=projection)  # the seed is restored from the state dict
    buffer.seek(0)
    resumed.load_state_dict(torch.load(buffer, weights_only=True))
    for _ in range(7):
        _set_grads(free, ortho, target)
        resumed.step()
    assert torch.equal(free, first[0]) and torch.equal(ortho, first[1])
    assert resumed.thermostat_friction() == first[2]


def test_failed_step_changes_nothing():
    free, ortho, target = _two_group_problem()
    opt = _make(free, ortho)
    for _ in range(3):
        _set_grads(free, ortho, target)
        opt.step()
    before = (free.detach().clone(), ortho.detach().clone(), opt.thermostat_friction(),
              {k: v.clone() if torch.is_tensor(v) else v
               for k, v in opt.state[free].items()}, opt.state_dict()["generators"])
    _set_grads(free, ortho, target)
    ortho.grad[0, 0] = float("nan")
    with pytest.raises(IntegrationError):
        opt.step()
    assert torch.equal(free, before[0]) and torch.equal(ortho, before[1])
    assert opt.thermostat_friction() == before[2]
    assert torch.equal(opt.state[free]["momentum"], before[3]["momentum"])
    for key, state in opt.state_dict()["generators"].items():
        assert torch.equal(state, before[4][key])


def test_constraints_hold_to_roundoff_and_groups_keep_their_own_friction():
    free, ortho, target = _two_group_problem()
    opt = _make(free, ortho)
    gen = torch.Generator().manual_seed(5)
    for _ in range(300):
        _set_grads(free, ortho, target, gen=gen, sigma=3.0)  # noise on the free group only
        opt.step()
    residual = Orthonormal(over="rows").residual(ortho.detach()).item()
    assert residual < 1e-12  # float64 roundoff level
    xi_free, xi_ortho = opt.thermostat_friction()
    # group 0 sees gradient noise of diffusion h sigma^2 = 0.45: xi ~ 0.5 + 0.45 / 0.6 = 1.25
    assert xi_free > 0.9
    assert abs(xi_ortho - 0.5) < abs(xi_free - 0.5)
    info = opt.last_info.parameters
    assert [p.tangent_dof for p in info] == [21, 3 * 5 - 3 * 4 // 2]  # n k - k(k+1)/2


def test_constructor_validation_names_the_parameter():
    w = torch.nn.Parameter(torch.zeros(3))
    with pytest.raises(ValueError, match="temperature"):
        AdaptiveLangevin([w], step=0.1, temperature=0.0)
    with pytest.raises(ValueError, match="thermostat_mass"):
        AdaptiveLangevin([w], step=0.1, temperature=1.0, thermostat_mass=-1.0)
    with pytest.raises(ValueError, match="friction"):
        AdaptiveLangevin([w], step=0.1, temperature=1.0, friction=math.inf)
    with pytest.raises(ValueError, match="step"):
        AdaptiveLangevin([w], step=0.0, temperature=1.0)
    with pytest.raises(ValueError, match="projection"):
        AdaptiveLangevin([w], step=0.1, temperature=1.0, projection="straight")


def _fixed_norm_model():
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(5, 4), torch.nn.Tanh(),
                                torch.nn.Linear(4, 2)).double()
    hn.constrain(model, **{"0.weight": hn.FixedNorm(1.0)})
    return model


def _trajectory(model, opt, steps=20):
    x = torch.randn(16, 5, dtype=torch.float64, generator=torch.Generator().manual_seed(1))
    y = torch.arange(16) % 2
    for _ in range(steps):
        opt.zero_grad()
        torch.nn.functional.cross_entropy(model(x), y).backward()
        opt.step()
    return torch.cat([p.detach().flatten() for p in model.parameters()])


def test_fixed_friction_groups_are_plain_langevin():
    """adaptive=False: D is skipped and xi = A, so B A O A is Langevin's BAOAB step with its
    exact Ornstein-Uhlenbeck O (same noise stream): equal to roundoff in float64."""
    model = _fixed_norm_model()
    plain = _trajectory(model, hn.Langevin(model.parameters(), lr=0.01, momentum=0.9,
                                           temperature=0.05, seed=3, backend="eager"))
    model = _fixed_norm_model()
    fixed = _trajectory(model, hn.AdaptiveLangevin(model.parameters(), lr=0.01, momentum=0.9,
                                                   temperature=0.05, seed=3, adaptive=False))
    assert torch.allclose(plain, fixed, rtol=0, atol=1e-12)


def test_mixed_groups_adapt_only_where_asked():
    """An adaptive first layer and a fixed-friction output layer at temperature 0: the fixed
    group's friction stays at A = -ln(momentum)/h, the adaptive one moves."""
    model = _fixed_norm_model()
    opt = hn.AdaptiveLangevin(
        [{"params": model[0].parameters(), "temperature": 0.05},
         {"params": model[2].parameters(), "temperature": 0.0, "adaptive": False}],
        lr=0.01, momentum=0.9, seed=3)
    start = opt.thermostat_friction()
    _trajectory(model, opt)
    h = math.sqrt(2 * 0.01 / 1.9)
    assert opt.thermostat_friction()[1] == pytest.approx(-math.log(0.9) / h, rel=1e-12)
    assert opt.thermostat_friction()[0] != pytest.approx(start[0], rel=1e-6)
    assert hn.residuals(model)["0.weight"] < 1e-12


def test_adaptive_flag_is_checked():
    model = _fixed_norm_model()
    with pytest.raises(ValueError, match="adaptive must be True"):
        hn.AdaptiveLangevin(model.parameters(), lr=0.01, adaptive="no")
    with pytest.raises(ValueError, match="temperature"):
        hn.AdaptiveLangevin(model.parameters(), lr=0.01, temperature=0.0)


def test_state_dict_saved_before_the_adaptive_key_loads_and_adapts():
    # a dict saved before groups had 'adaptive' (the first release) adapted: it loads with
    # adaptive=True and continues exactly as the dict that has the key
    model = _fixed_norm_model()
    opt = hn.AdaptiveLangevin(model.parameters(), lr=0.01, momentum=0.9, temperature=0.05,
                              seed=3)
    _trajectory(model, opt, steps=5)
    saved = opt.state_dict()
    old = {**saved, "param_groups": [{k: v for k, v in g.items() if k != "adaptive"}
                                     for g in saved["param_groups"]]}
    ends = []
    for state in (saved, old):
        copy = _fixed_norm_model()
        with torch.no_grad():
            for p, q in zip(copy.parameters(), model.parameters()):
                p.copy_(q)
        resumed = hn.AdaptiveLangevin(copy.parameters(), lr=0.01, momentum=0.9,
                                      temperature=0.05, seed=3)
        resumed.load_state_dict(state)
        assert resumed.param_groups[0]["adaptive"] is True
        ends.append(_trajectory(copy, resumed, steps=5))
    assert torch.equal(ends[0], ends[1])
