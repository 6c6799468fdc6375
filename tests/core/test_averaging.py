"""Weight averaging that keeps the constraint (issue 16 item 5).

``torch.optim.swa_utils.AveragedModel`` (SWA and EMA) keeps the arithmetic
mean of the weights, which is off a curved constraint set; the extrinsic mean
(its nearest point on the set) is read with ``project_average``.
"""

import warnings

import numpy as np
import pytest
import torch
from torch import nn
from torch.optim.swa_utils import AveragedModel, get_ema_multi_avg_fn

import holonomic as hn
from holonomic.audit import AuditWarning

RADIUS, SCALE = 1.5, 0.7


def _model() -> nn.Sequential:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(6, 5), nn.Tanh(), nn.Linear(5, 3)).double()
    hn.constrain(model, **{"0.weight": hn.FixedNorm(RADIUS), "2.weight": hn.Orthonormal(scale=SCALE)})
    return model


def _run(model: nn.Module, averaged: AveragedModel, steps: int = 12) -> list[dict[str, torch.Tensor]]:
    """Hot Langevin steps (the weights move far on their sets), averaging after each;
    returns the snapshots that were averaged."""
    opt = hn.Langevin(model.parameters(), step=0.2, temperature=2.0, seed=3)
    x = torch.randn(8, 6, dtype=torch.float64)
    snapshots = []
    for _ in range(steps):
        opt.zero_grad()
        model(x).pow(2).sum().backward()
        opt.step()
        averaged.update_parameters(model)
        snapshots.append({k: v.detach().clone() for k, v in model.named_parameters()})
    return snapshots


def _closed_forms(mean0: torch.Tensor, mean2: torch.Tensor) -> tuple[np.ndarray, np.ndarray]:
    # nearest point of the product of spheres: each row of the mean rescaled to norm r
    rows = mean0.numpy() / np.linalg.norm(mean0.numpy(), axis=1, keepdims=True) * RADIUS
    # nearest matrix with orthonormal rows (scaled): s U V^T of the SVD of the mean / s
    # (Fan & Hoffman 1955; Higham 2002 sec. 8), reference SVD from numpy.linalg.svd
    u, _, vt = np.linalg.svd(mean2.numpy() / SCALE, full_matrices=False)
    return rows, SCALE * u @ vt


def test_swa_average_is_off_the_set_and_its_projection_is_the_extrinsic_mean():
    model = _model()
    averaged = AveragedModel(model)
    snapshots = _run(model, averaged)
    # equal-weight SWA mean (the first update copies the model)
    mean0 = torch.stack([s["0.weight"] for s in snapshots]).mean(0)
    mean2 = torch.stack([s["2.weight"] for s in snapshots]).mean(0)
    torch.testing.assert_close(averaged.module[0].weight.detach(), mean0)
    raw = hn.residuals(averaged)  # the averaged copy knows its constraints
    assert set(raw) == {"module.0.weight", "module.2.weight"}
    assert min(raw.values()) > 1e-3  # the arithmetic mean left the set

    running = averaged.module[0].weight.detach().clone()
    projected = hn.project_average(averaged)
    assert projected is not averaged
    assert max(hn.residuals(projected).values()) < 1e-13
    rows, frame = _closed_forms(mean0, mean2)
    np.testing.assert_allclose(projected.module[0].weight.detach().numpy(), rows, rtol=0, atol=1e-13)
    np.testing.assert_allclose(projected.module[2].weight.detach().numpy(), frame, rtol=0, atol=1e-13)
    # unconstrained parameters are the plain averages; the running average is untouched
    torch.testing.assert_close(projected.module[0].bias, averaged.module[0].bias, rtol=0, atol=0)
    torch.testing.assert_close(averaged.module[0].weight.detach(), running, rtol=0, atol=0)
    x = torch.randn(4, 6, dtype=torch.float64)
    assert projected(x).shape == (4, 3)


def test_ema_projection_is_the_weighted_extrinsic_mean_and_averaging_continues():
    decay = 0.8
    model = _model()
    averaged = AveragedModel(model, multi_avg_fn=get_ema_multi_avg_fn(decay))
    snapshots = _run(model, averaged, steps=6)
    halfway = hn.project_average(averaged)  # read mid-run ...
    snapshots += _run(model, averaged, steps=6)  # ... and keep averaging
    # EMA weights: the first update copies, then avg <- decay avg + (1 - decay) W
    n = len(snapshots)
    weights = [decay ** (n - 1)] + [(1 - decay) * decay ** (n - 1 - i) for i in range(1, n)]
    assert abs(sum(weights) - 1) < 1e-12
    for name, c in [("0.weight", hn.FixedNorm(RADIUS)), ("2.weight", hn.Orthonormal(scale=SCALE))]:
        expected = hn.extrinsic_mean(c, [s[name] for s in snapshots], weights)
        got = hn.project_average(averaged).get_parameter("module." + name).detach()
        torch.testing.assert_close(got, expected, rtol=0, atol=1e-12)
    assert max(hn.residuals(halfway).values()) < 1e-13


def test_extrinsic_mean_matches_closed_forms_and_validates():
    torch.manual_seed(1)
    c_rows, c_frame = hn.FixedNorm(RADIUS), hn.Orthonormal(scale=SCALE)
    pts0 = [c_rows.project(torch.randn(5, 6, dtype=torch.float64)) for _ in range(4)]
    pts2 = [c_frame.project(torch.randn(3, 5, dtype=torch.float64)) for _ in range(4)]
    rows, frame = _closed_forms(torch.stack(pts0).mean(0), torch.stack(pts2).mean(0))
    np.testing.assert_allclose(hn.extrinsic_mean(c_rows, pts0).numpy(), rows, rtol=0, atol=1e-13)
    np.testing.assert_allclose(hn.extrinsic_mean(c_frame, pts2).numpy(), frame, rtol=0, atol=1e-13)
    # the extrinsic mean minimises the summed squared distances over the set: no random
    # point of the set does better
    best = hn.extrinsic_mean(c_frame, pts2)
    cost = lambda x: sum(float((x - p).pow(2).sum()) for p in pts2)  # noqa: E731
    for _ in range(200):
        assert cost(best) <= cost(c_frame.project(best + 0.3 * torch.randn_like(best))) + 1e-12
    with pytest.raises(ValueError, match="at least one point"):
        hn.extrinsic_mean(c_rows, [])
    with pytest.raises(ValueError, match="non-negative"):
        hn.extrinsic_mean(c_rows, pts0, [1.0, -1.0, 1.0, 1.0])
    with pytest.raises(ValueError, match="shape"):
        hn.extrinsic_mean(c_rows, [pts0[0], pts0[1][:3]])


def test_projecting_at_every_update_is_not_the_extrinsic_mean():
    """Why there is no projecting avg_fn: torch stores what avg_fn returns as the
    running average, so projecting there averages projected averages."""
    c = hn.FixedNorm(1.0)
    torch.manual_seed(2)
    model = nn.Linear(6, 4, bias=False).double()
    hn.constrain(model, weight=c)

    def projecting_avg_fn(avg, new, n):
        return c.project(avg + (new - avg) / (n + 1))

    plain, projecting = AveragedModel(model), AveragedModel(model, avg_fn=projecting_avg_fn)
    opt = hn.Langevin(model.parameters(), step=0.3, temperature=3.0, seed=0, projection="geodesic")
    snapshots = []
    for _ in range(10):
        opt.zero_grad()
        model(torch.randn(8, 6, dtype=torch.float64)).pow(2).sum().backward()
        opt.step()
        plain.update_parameters(model)
        projecting.update_parameters(model)
        snapshots.append(model.weight.detach().clone())
    truth = hn.extrinsic_mean(c, snapshots)
    torch.testing.assert_close(hn.project_average(plain).module.weight.detach(), truth, rtol=0, atol=1e-13)
    assert float((projecting.module.weight.detach() - truth).abs().max()) > 1e-3


def test_audit_and_residuals_flag_an_average_off_its_set():
    model = _model()
    averaged = AveragedModel(model)
    _run(model, averaged, steps=8)
    audit = hn.Audit(averaged)  # no optimizer moved these weights: the audit still checks them
    with pytest.warns(AuditWarning, match=r"module\.[02]\.weight .* is off its constraint set.*project_average"):
        record = audit()
    assert {a["where"] for a in record["alarms"] if a["kind"] == "residual"} == {"module.0.weight",
                                                                                  "module.2.weight"}
    clean = hn.Audit(hn.project_average(averaged))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        clean()
    assert clean.ok


def test_project_average_in_place_and_errors():
    model = _model()
    averaged = AveragedModel(model)
    _run(model, averaged, steps=4)
    assert hn.project_average(averaged, inplace=True) is averaged
    assert max(hn.residuals(averaged).values()) < 1e-13
    with pytest.raises(ValueError, match="no constrained parameters.*before wrapping"):
        hn.project_average(AveragedModel(nn.Linear(3, 2)))
    with pytest.raises(ValueError, match="torch.nn.Module"):
        hn.project_average("model")
    zero = nn.Linear(4, 2, bias=False)
    hn.constrain(zero, weight=hn.FixedNorm())
    with torch.no_grad():
        zero.weight[1] = 0.0  # an average of opposite rows
    with pytest.raises(ValueError, match="average of weight has no nearest point"):
        hn.project_average(zero)
