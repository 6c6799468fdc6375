"""Geometry of the constraint sets: projections, SHAKE, geodesics, degrees of freedom."""

import math

import pytest
import torch

from holonomic import FixedNorm, Orthonormal
from holonomic.geometry.stiefel import stiefel_geodesic



@pytest.fixture(autouse=True)
def _float64_default():
    # these checks are at float64 roundoff; restore the default afterwards so
    # other test modules are unaffected
    previous = torch.get_default_dtype()
    torch.set_default_dtype(torch.float64)
    yield
    torch.set_default_dtype(previous)

CONSTRAINTS = [
    (FixedNorm(1.5, over="rows"), (6, 4)),
    (FixedNorm(0.7, over="columns"), (5, 3)),
    (FixedNorm(2.0, over="all"), (3, 4)),
    (FixedNorm(1.0, over="rows"), (4, 2, 3, 3)),  # conv kernel, flattened per output channel
    (Orthonormal(over="rows", scale=1.0), (3, 7)),
    (Orthonormal(over="columns", scale=2.0), (7, 3)),
    (Orthonormal(over="rows"), (5, 5)),
]
IDS = [f"{type(c).__name__}-{c.over}-{'x'.join(map(str, s))}" for c, s in CONSTRAINTS]


def _point(constraint, shape, seed=0):
    g = torch.Generator().manual_seed(seed)
    return constraint.project(torch.randn(shape, generator=g))


@pytest.mark.parametrize("constraint,shape", CONSTRAINTS, ids=IDS)
def test_projection_is_on_the_set_and_idempotent(constraint, shape):
    w = _point(constraint, shape)
    assert constraint.residual(w) < 1e-14
    torch.testing.assert_close(constraint.project(w), w, rtol=0, atol=1e-14)


@pytest.mark.parametrize("constraint,shape", CONSTRAINTS, ids=IDS)
def test_tangent_projection_is_an_orthogonal_projector(constraint, shape):
    w = _point(constraint, shape)
    g = torch.Generator().manual_seed(1)
    v = torch.randn(shape, generator=g)
    u = torch.randn(shape, generator=g)
    pv = constraint.tangent(w, v)
    torch.testing.assert_close(constraint.tangent(w, pv), pv, rtol=0, atol=1e-13)  # idempotent
    # self-adjoint: <Pi u, v> = <u, Pi v>
    assert abs(float((constraint.tangent(w, u) * v).sum() - (u * pv).sum())) < 1e-12
    assert constraint.tangent_residual(w, pv) < 1e-13
    # the residual is orthogonal to the tangent space, i.e. normal
    assert abs(float(((v - pv) * pv).sum())) < 1e-12


@pytest.mark.parametrize("constraint,shape", CONSTRAINTS, ids=IDS)
def test_nearest_point_beats_other_points(constraint, shape):
    # The projection is the nearest point: no other point of the set (random
    # points and small perturbations along the set) is closer.
    g = torch.Generator().manual_seed(3)
    x = torch.randn(shape, generator=g)
    best = constraint.project(x)
    d0 = (x - best).norm()
    for seed in range(20):
        other = _point(constraint, shape, seed + 10)
        assert (x - other).norm() >= d0 - 1e-12
        p = constraint.tangent(best, torch.randn(shape, generator=g))
        near, _ = constraint.geodesic(best, 1e-3 * p, 1.0)
        assert (x - near).norm() >= d0 - 1e-12


@pytest.mark.parametrize("constraint,shape", CONSTRAINTS, ids=IDS)
def test_shake_lands_on_the_set_along_the_old_normal(constraint, shape):
    w = _point(constraint, shape)
    g = torch.Generator().manual_seed(2)
    p = constraint.tangent(w, torch.randn(shape, generator=g))
    for s in (1e-3, 1e-2, 0.1):
        y = w + s * p
        res = constraint.shake(w, y)
        assert bool(res.ok)
        assert constraint.residual(res.position) < 1e-13
        # the correction is normal at the old point w
        correction = res.position - y
        assert constraint.tangent(w, correction).norm() < 1e-12 * max(1.0, correction.norm())
        # and of second order in the step (docs/math.md sec. 3: lam, S = O(s^2), derived there from the quadratic)
        assert correction.norm() < 10 * s**2 * p.norm() ** 2 / min(1.0, float(w.norm()))


def test_sphere_shake_fails_without_a_real_root():
    # docs/math.md 3: for tangent p the discriminant is negative when s|p| > r.
    c = FixedNorm(1.0, over="rows")
    w = torch.tensor([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]])
    p = torch.tensor([[0.0, 2.0, 0.0], [0.0, 0.0, 0.5]])
    res = c.shake(w, w + 1.0 * p)
    assert not bool(res.ok)


def test_stiefel_shake_reports_iterations_and_fails_cleanly():
    c = Orthonormal(over="columns")
    w = _point(c, (6, 3))
    p = c.tangent(w, torch.randn(6, 3, generator=torch.Generator().manual_seed(0)))
    small = c.shake(w, w + 1e-2 * p)
    assert bool(small.ok) and 1 <= small.iterations < 20
    big = c.shake(w, w + 50.0 * p / p.norm())
    assert not bool(big.ok)


@pytest.mark.parametrize("constraint,shape", CONSTRAINTS, ids=IDS)
def test_geodesic_stays_on_set_keeps_speed_and_matches_small_rattle_steps(constraint, shape):
    w = _point(constraint, shape)
    p = constraint.tangent(w, torch.randn(shape, generator=torch.Generator().manual_seed(5)))
    wt, pt = constraint.geodesic(w, p, 0.7)
    assert constraint.residual(wt) < 1e-13
    assert constraint.tangent_residual(wt, pt) < 1e-12
    # geodesics have constant speed (per vector for FixedNorm rows/columns)
    assert abs(float(pt.norm() - p.norm())) < 1e-12
    # many tiny RATTLE drifts converge to the geodesic (first-order check)
    x, v = w.clone(), p.clone()
    n = 2000
    for _ in range(n):
        res = constraint.shake(x, x + (0.7 / n) * v)
        v = constraint.tangent(res.position, (res.position - x) / (0.7 / n))
        x = res.position
    assert (x - wt).norm() < 1e-3


def test_stiefel_geodesic_square_case_matches_matrix_exponential():
    # For k = n the geodesic is X expm(t X^T V) (Edelman, Arias & Smith 1998, sec. 2.2, recalled from memory).
    q, _ = torch.linalg.qr(torch.randn(4, 4, generator=torch.Generator().manual_seed(0)))
    a = torch.randn(4, 4, generator=torch.Generator().manual_seed(1))
    a = a - a.T
    x, v = stiefel_geodesic(q, q @ a, 0.3)
    torch.testing.assert_close(x, q @ torch.linalg.matrix_exp(0.3 * a), rtol=0, atol=1e-13)


def test_stiefel_geodesic_rectangular_satisfies_the_geodesic_equation():
    # Geodesic equation of the embedded Stiefel manifold (EAS 1998 eq. 2.7):
    # X'' + X (X'^T X') = 0.  Check by central differences.
    c = Orthonormal(over="columns")
    x0 = _point(c, (6, 2))
    v0 = c.tangent(x0, torch.randn(6, 2, generator=torch.Generator().manual_seed(4)))
    t, e = 0.5, 1e-4
    xm, _ = stiefel_geodesic(x0, v0, t - e)
    x, v = stiefel_geodesic(x0, v0, t)
    xp, _ = stiefel_geodesic(x0, v0, t + e)
    acc = (xp - 2 * x + xm) / e**2
    torch.testing.assert_close(acc, -x @ (v.T @ v), rtol=0, atol=1e-5)
    torch.testing.assert_close((xp - xm) / (2 * e), v, rtol=0, atol=1e-7)


@pytest.mark.parametrize(
    "constraint,shape,dof",
    [
        (FixedNorm(over="rows"), (6, 4), 6 * 3),
        (FixedNorm(over="columns"), (6, 4), 4 * 5),
        (FixedNorm(over="all"), (6, 4), 23),
        (Orthonormal(over="rows"), (3, 7), 7 * 3 - 6),  # n k - k(k+1)/2: Edelman, Arias & Smith 1998, sec. 2.2 (memory)
        (Orthonormal(over="columns"), (5, 5), 10),  # dim O(5) = 5*4/2
    ],
)
def test_tangent_degrees_of_freedom_match_numerical_rank(constraint, shape, dof):
    assert constraint.tangent_dof(shape) == dof
    # the rank of the tangent projector equals the tangent dimension
    w = _point(constraint, shape)
    n = math.prod(shape)
    basis = torch.eye(n).reshape(n, *shape)
    projector = torch.stack([constraint.tangent(w, b).reshape(-1) for b in basis])
    assert int(torch.linalg.matrix_rank(projector)) == dof


@pytest.mark.parametrize(
    "make,match",
    [
        (lambda: FixedNorm(radius=0.0), "radius"),
        (lambda: FixedNorm(radius=-1.0), "radius"),
        (lambda: FixedNorm(radius=float("nan")), "radius"),
        (lambda: FixedNorm(over="diagonal"), "over"),
        (lambda: Orthonormal(over="all"), "over"),
        (lambda: Orthonormal(scale=0), "scale"),
        (lambda: Orthonormal(scale=float("inf")), "scale"),
        (lambda: Orthonormal(max_iterations=0), "max_iterations"),
    ],
)
def test_bad_constraint_settings_raise_at_construction(make, match):
    with pytest.raises(ValueError, match=match):
        make()


@pytest.mark.parametrize(
    "constraint,shape,match",
    [
        (Orthonormal(over="rows"), (5, 3), "tall"),
        (Orthonormal(over="columns"), (3, 5), "wide"),
        (FixedNorm(over="rows"), (7,), "over='all'"),
        (FixedNorm(over="rows"), (4, 1), "no freedom"),
    ],
)
def test_shapes_the_set_cannot_hold_are_rejected(constraint, shape, match):
    with pytest.raises(ValueError, match=match):
        constraint.validate_shape(shape, "layer.weight")


def test_zero_row_and_rank_deficient_matrix_have_no_projection():
    with pytest.raises(ValueError, match="zero"):
        FixedNorm().project(torch.tensor([[1.0, 2.0], [0.0, 0.0]]))
    with pytest.raises(ValueError, match="rank deficient"):
        Orthonormal(over="columns").project(torch.ones(4, 2))
