r"""Fused eager kernel: BAOAB-RATTLE for fixed-norm and unconstrained parameters.

For one constrained vector ``w`` (a row, a column or the whole tensor) with
momentum ``p`` and force ``f``, every vector one BAOAB step forms lies in the
span of ``w``, ``q = p - h f`` and the noise ``xi``; the step needs only their
Gram entries (one reduction per pair) and a closed form per vector::

    input:  w, q = p - h f, xi (T > 0);  Gram ww, wq, qq (, wx, qx, xx)
    return: w2 = a_w w + a_q q + a_x xi,  p3 = c_w w + c_q q + c_x xi

Unconstrained parameters take the same scheme with identity projections, in
``torch._foreach_*`` arithmetic.  The derivation (and what is assumed of the
inputs) is in ``docs/kernels.md``; ``tests/core`` runs the generic integrator
tests on this kernel and checks it against the reference kernel.
"""

from __future__ import annotations

from typing import Mapping, Sequence

import torch
from torch import Tensor

from holonomic.dynamics.kernels.protocol import Layout, fusable_dtype, is_plain_baoab
from holonomic.dynamics.operators import ou_coefficients
from holonomic.dynamics.transaction import GroupResult, StepInput, StepResult
from holonomic.geometry import FixedNorm, Unconstrained
from holonomic.geometry.base import Constraint

__all__ = ["FusedKernel", "sphere_baoab_coefficients", "constrained_vectors"]

# A coefficient vector: the weights of (w, q, xi) for every constrained vector.
Coefs = tuple[Tensor, Tensor, Tensor | None]


def constrained_vectors(w: Tensor, over: str) -> tuple[Tensor, int]:
    """A 2-D view of ``w`` and the dimension that runs along one constrained vector."""
    if over == "all":
        return w.view(1, -1), 1
    m = w.view(w.shape[0], -1)
    return m, (1 if over == "rows" else 0)


def _dot(a: Tensor, b: Tensor, dim: int) -> Tensor:
    """Dot products of matching vectors (``linalg.vecdot`` is much slower on CPU)."""
    return (a * b).sum(dim)


def _shake_root(norm2: Tensor, step2: Tensor, r2: Tensor) -> tuple[Tensor, Tensor]:
    r"""SHAKE multiplier for ``y = w + s p`` with ``w.p = 0``.

    With ``a = |w|^2``, ``b = w.y = a``, ``c = |y|^2 - r^2 = a + s^2|p|^2 - r^2``
    the root that vanishes with the step is ``-c / (b + sqrt(b^2 - a c))``
    (FixedNorm.shake); ``b^2 - a c = a (r^2 - s^2 |p|^2)``.
    Returns ``(lam, disc)``; the root is real when ``disc >= 0``.
    """
    c = norm2 + step2 - r2
    disc = norm2 * (r2 - step2)
    lam = -c / (norm2 + disc.clamp_min(0).sqrt())
    return lam, disc


def sphere_baoab_coefficients(
    gram: dict[str, Tensor], r2: Tensor, *, step: float | Tensor, decay: float | Tensor,
    sigma: float | Tensor
) -> tuple[Coefs, Coefs, Tensor, Tensor]:
    r"""Closed-form BAOAB-RATTLE step on spheres, from Gram entries (docs/kernels.md).

    ``gram`` holds per-vector tensors ``ww, wq, qq`` and, for a step with
    noise, ``wx, qx, xx`` (``x`` the noise).  The step, decay and noise scale
    are numbers or 0-d tensors; whether the step is noisy is read from the
    presence of ``"xx"`` in ``gram``.  Returns the coefficients of
    the new position and momentum in the basis ``(w, q, xi)``, the squared
    norm of the new momentum per vector, and a 0-d flag (finite values, real
    SHAKE roots).
    """
    ww, wq, qq = gram["ww"], gram["wq"], gram["qq"]
    s = 0.5 * step
    zero = torch.zeros_like(ww)
    ones = torch.ones_like(ww)
    noisy = "xx" in gram
    # B: p1 = q - alpha w
    alpha = wq / ww
    pp = qq - alpha * wq
    # A: w1 = (1 + lam1) w + s p1 ; u = (w1 - w)/s = (lam1/s) w + p1 ; p1 <- u - beta w1
    lam1, disc1 = _shake_root(ww, s * s * pp, r2)
    n1 = (1 + lam1) ** 2 * ww + s * s * pp
    u_w1 = (1 + lam1) * (lam1 / s) * ww + s * pp
    uu = (lam1 / s) ** 2 * ww + pp
    beta = u_w1 / n1
    w1 = (1 + lam1 - s * alpha, s * ones)
    u = (lam1 / s - alpha, ones)
    pt = (u[0] - beta * w1[0], u[1] - beta * w1[1], zero)
    pt2 = uu - beta * u_w1
    # O: p2 = Pi_w1 (decay pt + sigma xi)
    if noisy:
        wx, qx, xx = gram["wx"], gram["qx"], gram["xx"]
        w1_x = w1[0] * wx + w1[1] * qx
        pt_x = pt[0] * wx + pt[1] * qx
        v2 = decay * decay * pt2 + 2 * decay * sigma * pt_x + sigma * sigma * xx
        w1_v = sigma * w1_x
        gamma = w1_v / n1
        p2 = (decay * pt[0] - gamma * w1[0], decay * pt[1] - gamma * w1[1], sigma * ones)
        p2n = v2 - gamma * w1_v
    else:
        p2 = (decay * pt[0], decay * pt[1], zero)
        p2n = decay * decay * pt2
    # A: w2 = (1 + lam2) w1 + s p2 ; u2 = (lam2/s) w1 + p2 ; p3 = u2 - beta2 w2
    lam2, disc2 = _shake_root(n1, s * s * p2n, r2)
    n2 = (1 + lam2) ** 2 * n1 + s * s * p2n
    u2_w2 = (1 + lam2) * (lam2 / s) * n1 + s * p2n
    u2u2 = (lam2 / s) ** 2 * n1 + p2n
    beta2 = u2_w2 / n2
    w1x = (w1[0], w1[1], zero)
    w2 = tuple((1 + lam2) * a + s * b for a, b in zip(w1x, p2))
    u2 = tuple((lam2 / s) * a + b for a, b in zip(w1x, p2))
    p3 = tuple(a - beta2 * b for a, b in zip(u2, w2))
    p3n = (u2u2 - beta2 * u2_w2).clamp_min(0)
    checks = torch.stack([ww, wq, qq, *w2, *p3, p2n, w2[0] - 0.5] + ([gram["xx"]] if noisy else []))
    ok = torch.isfinite(checks).all() & (disc1 >= 0).all() & (disc2 >= 0).all() & (w2[0] > 0.5).all()
    if not noisy:
        return (w2[0], w2[1], None), (p3[0], p3[1], None), p3n, ok
    return w2, p3, p3n, ok  # type: ignore[return-value]


class FusedKernel:
    """Eager fused BAOAB-RATTLE for ``FixedNorm`` and unconstrained parameters
    (any device; dense layout; BAOAB in one drift per half step)."""

    name = "fused"

    def supports(self, scheme: object, settings: object, constraint: Constraint, dtype: torch.dtype,
                 device: torch.device, layout: Layout) -> bool:
        if not (layout.dense and is_plain_baoab(scheme, settings)):
            return False
        if isinstance(constraint, Unconstrained):
            return dtype.is_floating_point
        return isinstance(constraint, FixedNorm) and len(layout.shape) >= 1 and fusable_dtype(dtype, True)

    def run(self, inputs: Sequence[StepInput], group_states: Mapping[int, Mapping[str, Tensor]]
            ) -> tuple[list[StepResult | None], dict[int, GroupResult]]:
        results: list[StepResult | None] = [None] * len(inputs)
        batches: dict[tuple, tuple[list[int], list[int]]] = {}
        for i, u in enumerate(inputs):
            s = u.settings
            key = (s.step, s.friction, s.temperature, u.position.dtype, u.position.device)
            spheres, free = batches.setdefault(key, ([], []))
            (free if isinstance(u.constraint, Unconstrained) else spheres).append(i)
        for (h, friction, temperature, _, _), (spheres, free) in batches.items():
            decay, sigma = ou_coefficients(friction, h, temperature)
            if spheres:
                _spheres(inputs, spheres, results, h, decay, sigma)
            if free:
                _free(inputs, free, results, h, decay, sigma)
        return results, {}


def _kicked(u: StepInput, h: float) -> Tensor:
    """``q = p - h f`` (a new tensor, written in place at commit)."""
    force = u.force()
    return torch.mul(force, -h) if u.momentum is None else torch.add(u.momentum, force, alpha=-h)


def _spheres(inputs: Sequence[StepInput], members: list[int], results: list, h: float, decay: float,
             sigma: float) -> None:
    """Coefficients for all fixed-norm vectors of one batch at once."""
    rows = []
    for i in members:
        u = inputs[i]
        wv, dim = constrained_vectors(u.position, u.constraint.over)
        qv = _kicked(u, h).view(wv.shape)
        gram = {"ww": torch.linalg.vector_norm(wv, dim=dim) ** 2, "wq": _dot(wv, qv, dim),
                "qq": torch.linalg.vector_norm(qv, dim=dim) ** 2}
        xv = None
        if sigma > 0:
            xv = u.noise[0].view(wv.shape)
            gram.update(wx=_dot(wv, xv, dim), qx=_dot(qv, xv, dim), xx=torch.linalg.vector_norm(xv, dim=dim) ** 2)
        rows.append((u, wv, qv, xv, gram, torch.full_like(gram["ww"], u.constraint.radius ** 2)))
    sizes = [r[4]["ww"].numel() for r in rows]
    gram = {k: torch.cat([r[4][k] for r in rows]) for k in rows[0][4]}
    new_w, new_p, p_norm2, ok = sphere_baoab_coefficients(gram, torch.cat([r[5] for r in rows]), step=h,
                                                          decay=decay, sigma=sigma)
    # Write w2 in place first, then p3 = e_w w2 + e_q q + e_x xi (with e_w = c_w / a_w, a_w > 1/2 checked).
    e_w = new_p[0] / new_w[0]
    e_q = new_p[1] - e_w * new_w[1]
    e_x = None if new_p[2] is None else new_p[2] - e_w * new_w[2]
    parts = [t.split(sizes) for t in (new_w[0], new_w[1], e_w, e_q, p_norm2)]
    parts_x = [t.split(sizes) for t in (new_w[2], e_x)] if e_x is not None else None
    for k, (i, (u, wv, qv, xv, _, _)) in enumerate(zip(members, rows)):
        shape = (-1, 1) if u.constraint.over != "columns" else (1, -1)
        a_w, a_q, c_w, c_q, pn = (t[k].view(shape) for t in parts)
        a_x, c_x = (t[k].view(shape) for t in parts_x) if parts_x is not None else (None, None)

        def apply(u=u, wv=wv, qv=qv, xv=xv, a_w=a_w, a_q=a_q, a_x=a_x, c_w=c_w, c_q=c_q, c_x=c_x, pn=pn):
            wv.mul_(a_w).addcmul_(qv, a_q)
            if xv is not None:
                wv.addcmul_(xv, a_x)
            qv.mul_(c_q).addcmul_(wv, c_w)
            if xv is not None:
                qv.addcmul_(xv, c_x)
            return qv.view(u.param.shape), 0.5 * pn.sum()

        results[i] = StepResult(ok, 1, apply, FusedKernel.name)


def _free(inputs: Sequence[StepInput], members: list[int], results: list, h: float, decay: float,
          sigma: float) -> None:
    """Unconstrained BAOAB (identity projections) with foreach arithmetic:
    ``p1 = q``, ``w1 = w + s p1``, ``p2 = decay p1 + sigma xi``, ``w2 = w1 + s p2``."""
    s = 0.5 * h
    ws = [inputs[i].position for i in members]
    ps = [_kicked(inputs[i], h) for i in members]
    new_w = torch._foreach_add(ws, ps, alpha=s)
    torch._foreach_mul_(ps, decay)
    if sigma > 0:
        torch._foreach_add_(ps, [inputs[i].noise[0] for i in members], alpha=sigma)
    torch._foreach_add_(new_w, ps, alpha=s)
    p_norms = torch._foreach_norm(ps)
    w_norms = torch._foreach_norm(new_w)
    for i, w, nw, q, pn, wn in zip(members, ws, new_w, ps, p_norms, w_norms):
        def apply(w=w, nw=nw, q=q, pn=pn):
            w.copy_(nw)
            return q, 0.5 * pn * pn

        results[i] = StepResult(torch.isfinite(pn) & torch.isfinite(wn), 0, apply, FusedKernel.name)
