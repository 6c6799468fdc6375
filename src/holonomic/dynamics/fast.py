r"""Fast path of the BAOAB step for fixed-norm and unconstrained parameters.

The plain path (:func:`holonomic.dynamics.operators.run_scheme`, one
parameter at a time) is the reference; this module computes the same step
with far fewer passes over memory, and the parity tests in ``tests/speed``
compare the two in float64.

**Fixed norm: the step stays in a small span.**  For one constrained vector
``w`` (a row, a column or the whole tensor), momentum ``p`` and force ``f``,
every vector that one BAOAB step forms is a combination of ``w``,
``q = p - h f`` and the thermostat noise ``xi``.  So the step needs only the
Gram matrix of those vectors (one reduction per pair), a few scalar
operations per vector (the two SHAKE roots and three tangent projections, all
in closed form), and one final pass that writes::

    input:  w, q = p - h f, xi (T > 0);  Gram entries ww, wq, qq (, wxi, qxi, xixi)
    B:      p1 = q - (w.q / w.w) w
    A:      w1 = y + lam1 w,  y = w + s p1,  s = h/2       (SHAKE root from the Gram)
            p1 <- Pi_w1 (w1 - w)/s
    O:      p2 = Pi_w1 (e^{-gamma h} p1 + sigma xi)
    A:      w2 = w1 + s p2 + lam2 w1,  p3 = Pi_w2 (w2 - w1)/s
    return: w2 = a_w w + a_q q + a_xi xi,  p3 = c_w w + c_q q + c_xi xi

The exact identities ``w.p1 = 0`` and ``w1.p2 = 0`` (the momenta are tangent
after each projection) are used symbolically; the plain path meets them to
roundoff, so the two paths agree to roundoff.  The constraint itself is not
assumed: ``|w|^2`` is measured every step, so SHAKE corrects any drift
exactly as the plain path does.

**Unconstrained parameters** take the same scheme with identity projections,
with ``torch._foreach_*`` arithmetic across the parameters of a group.

**Transactions.**  Noise is drawn in the same order as the plain path (same
generator stream).  All checks (finite Gram entries and coefficients, real
SHAKE roots, finite unconstrained results) are gathered into one flag that
is read with one host synchronisation *before* anything is written.  If it
fails, the generators are restored and the caller runs the plain path, which
then raises the documented error (or, for a false alarm such as an
overflowing Gram entry, takes the step).  Parameters the fast path does not
cover (rectangular orthonormal, non-contiguous, geodesic projection,
substeps) go through the plain per-parameter update inside the same
transaction.

**Square orthonormal parameters** take the closed-form RATTLE step of
:mod:`holonomic.dynamics.fast_orthonormal`, batched over the same-shaped
parameters of a group (``torch.stack``, batched matrix products).

**Noise** is drawn with ``Tensor.normal_`` (the same stream as
``torch.randn``) into one buffer per parameter that the optimizer keeps
outside its state (not checkpointed, allocated at the first step with
``T > 0``).  A buffer is only read within the step that filled it, so an
abandoned step leaves nothing behind but scratch values.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Callable

import torch
from torch import Tensor

from holonomic.dynamics.base import ParameterStepInfo, Pending, StepInfo, step_label
from holonomic.dynamics.fast_orthonormal import square_orthonormal_baoab
from holonomic.dynamics.operators import ou_coefficients
from holonomic.dynamics.settings import integrator_step_and_friction
from holonomic.geometry import UNCONSTRAINED, FixedNorm, Orthonormal, Unconstrained, constraint_of
from holonomic.geometry.base import HALF_DTYPES

if TYPE_CHECKING:  # pragma: no cover
    from holonomic.dynamics.langevin import Langevin

__all__ = ["fast_baoab_step", "sphere_baoab_coefficients"]

# A coefficient vector: the weights of (w, q, xi) for every constrained vector.
Coefs = tuple[Tensor, Tensor, Tensor | None]


def _vectors(w: Tensor, over: str) -> tuple[Tensor, int]:
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
    r"""Closed-form BAOAB-RATTLE step on spheres, from Gram entries (module docstring).

    ``gram`` holds per-vector tensors ``ww, wq, qq`` and, for a step with
    noise, ``wx, qx, xx`` (``x`` the noise).  The step, decay and noise scale
    are numbers or 0-d tensors (the compiled path passes tensors so that a
    new learning rate does not recompile); whether the step is noisy is read
    from the presence of ``"xx"`` in ``gram``.  Returns the coefficients of
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


@dataclass
class _Entry:
    """One parameter of the step, in parameter order."""

    param: Tensor
    label: str
    group: int
    index: int
    dof: int
    commit: Callable[[], Tensor | None] = field(default=lambda: None)  # returns kinetic energy
    iterations: int = 0


def _fast_eligible(p: Tensor, geometry: Any, group: dict[str, Any], state: dict[str, Any]) -> bool:
    return _group_eligible(group) and _tensors_eligible(p, state) and _geometry_eligible(p, geometry)


def _group_eligible(group: dict[str, Any]) -> bool:
    return group["projection"] == "rattle" and group["substeps"] == 1


def _tensors_eligible(p: Tensor, state: dict[str, Any]) -> bool:
    """Dense, contiguous, floating weight, gradient and momentum of one dtype
    (and a momentum of the weight's shape and device)."""
    grad = p.grad
    if grad.is_sparse or not (p.is_floating_point() and p.is_contiguous() and grad.is_contiguous()) \
            or grad.dtype != p.dtype:
        return False
    momentum = state.get("momentum")
    return momentum is None or (momentum.is_contiguous() and momentum.dtype == p.dtype
                                and momentum.shape == p.shape and momentum.device == p.device)


def _geometry_eligible(p: Tensor, geometry: Any) -> bool:
    if p.dtype in HALF_DTYPES and not isinstance(geometry, Unconstrained):
        return False  # the plain path projects in float32 (holonomic.geometry.base.in_float32)
    if isinstance(geometry, Orthonormal):
        return _square(p)
    return isinstance(geometry, Unconstrained) or (isinstance(geometry, FixedNorm) and p.dim() >= 1)


def _square(p: Tensor) -> bool:
    return p.dim() >= 2 and p.shape[0] == p[0].numel()


def scratch_buffer(opt: "Langevin", kind: str, p: Tensor, fill: float | None = None) -> Tensor:
    """A contiguous buffer like ``p`` that the optimizer keeps outside its state
    (not checkpointed), one per ``kind`` and parameter; ``fill`` initialises a
    newly allocated one."""
    buffers = opt.__dict__.setdefault("_scratch_buffers", {}).setdefault(kind, {})
    buf = buffers.get(p)
    if buf is None or buf.shape != p.shape or buf.dtype != p.dtype or buf.device != p.device:
        buf = buffers[p] = torch.empty_like(p, memory_format=torch.contiguous_format)
        if fill is not None:
            buf.fill_(fill)
    return buf


def _noise(opt: "Langevin", p: Tensor) -> Tensor:
    """Gaussian noise of ``p``'s shape from the integrator's generator, drawn
    into the parameter's buffer (same values as ``torch.randn``)."""
    return scratch_buffer(opt, "noise", p).normal_(generator=opt.generator(p.device))


def fast_baoab_step(opt: "Langevin") -> bool:
    """Take one BAOAB step of ``opt`` on the fast path; ``False`` (nothing
    changed, generators restored) when a check failed and the caller should
    run the plain path."""
    saved = {k: g.get_state() for k, g in opt._generators.items()}
    entries: list[_Entry] = []
    flags: list[Tensor] = []
    plain: list[tuple[_Entry, Pending]] = []
    for g_index, group in enumerate(opt.param_groups):
        if not group["lr"] > 0:
            if group["lr"] == 0:
                continue
            return _abandon(opt, saved)  # the plain path raises the documented error
        h, gamma = integrator_step_and_friction(group)
        temperature = group["temperature"]
        decay, sigma = ou_coefficients(gamma, h, temperature)
        names = group.get("param_names")
        spheres: list[tuple[_Entry, Tensor, Tensor, Tensor | None, dict[str, Tensor], Tensor, str]] = []
        free: list[tuple[_Entry, Tensor, Tensor, Tensor, Tensor | None]] = []
        square: list[tuple[_Entry, Tensor, Tensor, Tensor | None, Orthonormal]] = []
        for index, p in enumerate(group["params"]):
            if p.grad is None:
                continue
            if p.grad.is_sparse:
                return _abandon(opt, saved)
            geometry = constraint_of(p) or UNCONSTRAINED
            entry = _Entry(p, step_label(p, names, g_index, index), g_index, index, geometry.tangent_dof(p.shape))
            entries.append(entry)
            if not _fast_eligible(p, geometry, group, opt.state[p]):
                grad_ok = torch.isfinite(p.grad).all()
                position, momentum, ok, iterations = opt._update(p, opt.force(p, group), group, geometry)
                flags.append(grad_ok & ok)
                entry.iterations = iterations
                plain.append((entry, Pending(p, entry.label, g_index, index, geometry, grad_ok, ok, position,
                                             momentum, iterations)))
                continue
            force = opt.force(p, group)
            momentum = opt.state[p].get("momentum")
            w = p.detach()
            q = torch.mul(force, -h) if momentum is None else torch.add(momentum, force, alpha=-h)
            noise = _noise(opt, p) if temperature > 0 else None
            if isinstance(geometry, Orthonormal):
                square.append((entry, w, q, noise, geometry))
                continue
            if isinstance(geometry, Unconstrained):
                free.append((entry, w, q, force, noise))
                continue
            wv, dim = _vectors(w, geometry.over)
            qv = q.view(wv.shape)
            gram = {"ww": torch.linalg.vector_norm(wv, dim=dim) ** 2, "wq": _dot(wv, qv, dim),
                    "qq": torch.linalg.vector_norm(qv, dim=dim) ** 2}
            xv = None
            if noise is not None:
                xv = noise.view(wv.shape)
                gram.update(wx=_dot(wv, xv, dim), qx=_dot(qv, xv, dim),
                            xx=torch.linalg.vector_norm(xv, dim=dim) ** 2)
            r2 = torch.full_like(gram["ww"], geometry.radius ** 2)
            spheres.append((entry, wv, qv, xv, gram, r2, geometry.over))
            entry.iterations = 1
        if spheres:
            flags.append(_plan_spheres(opt, spheres, h, decay, sigma))
        if free:
            flags.append(_plan_free(opt, free, h, decay, sigma))
        if square:
            flag = _plan_square(opt, square, h, decay, sigma)
            if flag is None:
                return _abandon(opt, saved)
            flags.append(flag)
    if not entries:
        opt.last_info = StepInfo(())
        return True
    if not bool(torch.stack(flags).all()):  # the one host synchronisation
        return _abandon(opt, saved)
    for entry, u in plain:
        u.param.copy_(u.position)
        kinetic = None
        if u.momentum is not None:
            opt.state[u.param]["momentum"] = u.momentum
            kinetic = 0.5 * (u.momentum * u.momentum).sum()
        entry.commit = (lambda k=kinetic: k)
    infos = [ParameterStepInfo(e.label, e.group, e.index, e.iterations, e.commit(), e.dof) for e in entries]
    opt.last_info = StepInfo(tuple(infos))
    return True


def _abandon(opt: "Langevin", saved: dict[str, Tensor]) -> bool:
    for key, state in saved.items():
        opt._generators[key].set_state(state)
    for key in list(opt._generators):
        if key not in saved:
            del opt._generators[key]
    return False


def _plan_spheres(opt: "Langevin", spheres: list, h: float, decay: float, sigma: float) -> Tensor:
    """Coefficients for all fixed-norm vectors of a group at once; sets each
    entry's commit (the in-place write) and returns the group's flag."""
    sizes = [g["ww"].numel() for _, _, _, _, g, _, _ in spheres]
    keys = spheres[0][4].keys()
    gram = {k: torch.cat([g[k] for _, _, _, _, g, _, _ in spheres]) for k in keys}
    r2 = torch.cat([r for *_, r, _ in spheres])
    new_w, new_p, p_norm2, ok = sphere_baoab_coefficients(gram, r2, step=h, decay=decay, sigma=sigma)
    # Write w2 in place first, then p3 = e_w w2 + e_q q + e_x xi (with e_w = c_w / a_w, a_w > 1/2 checked).
    e_w = new_p[0] / new_w[0]
    e_q = new_p[1] - e_w * new_w[1]
    e_x = None if new_p[2] is None else new_p[2] - e_w * new_w[2]
    parts = [t.split(sizes) for t in (new_w[0], new_w[1], e_w, e_q, p_norm2)]
    parts_x = [t.split(sizes) for t in (new_w[2], e_x)] if e_x is not None else None
    for i, (entry, wv, qv, xv, _, _, over) in enumerate(spheres):
        shape = (-1, 1) if over != "columns" else (1, -1)
        a_w, a_q, c_w, c_q, pn = (t[i].view(shape) for t in parts)
        a_x, c_x = (t[i].view(shape) for t in parts_x) if parts_x is not None else (None, None)

        def commit(entry=entry, wv=wv, qv=qv, xv=xv, a_w=a_w, a_q=a_q, a_x=a_x, c_w=c_w, c_q=c_q, c_x=c_x, pn=pn):
            wv.mul_(a_w).addcmul_(qv, a_q)
            if xv is not None:
                wv.addcmul_(xv, a_x)
            qv.mul_(c_q).addcmul_(wv, c_w)
            if xv is not None:
                qv.addcmul_(xv, c_x)
            opt.state[entry.param]["momentum"] = qv.view(entry.param.shape)
            return 0.5 * pn.sum()

        entry.commit = commit
    return ok


def _plan_square(opt: "Langevin", square: list, h: float, decay: float, sigma: float) -> Tensor | None:
    """Closed-form BAOAB for square orthonormal parameters, batched over those
    of one shape, dtype, device and tolerance; ``None`` when the closed form
    does not apply (the caller abandons the fast path)."""
    batches: dict[tuple, list] = {}
    for item in square:
        w, geometry = item[1], item[4]
        batches.setdefault((w.shape, w.dtype, w.device, geometry._tol(w.dtype)), []).append(item)
    flags = []
    for (shape, _, _, tol), items in batches.items():
        n = shape[0]
        scales = {g.scale for *_, g in items}
        if len(scales) > 1:  # different scales in one batch: one unit scale, folded per matrix
            def stacked(ts: list[Tensor]) -> Tensor:
                return torch.stack([t.reshape(n, n) / g.scale for t, (*_, g) in zip(ts, items)])
            scale = 1.0
        else:
            def stacked(ts: list[Tensor]) -> Tensor:
                mats = [t.reshape(n, n) for t in ts]
                return mats[0].unsqueeze(0) if len(mats) == 1 else torch.stack(mats)
            scale = scales.pop()
        noise = None if sigma <= 0 else stacked([it[3] for it in items])
        out = square_orthonormal_baoab(stacked([it[1] for it in items]), stacked([it[2] for it in items]),
                                       noise, scale=scale, step=h, decay=decay, sigma=sigma, tolerance=tol)
        if out is None:
            return None
        w2, p2, kinetic, ok, degree = out
        flags.append(ok)
        for i, (entry, w, _, _, geometry) in enumerate(items):
            entry.iterations = degree
            factor = geometry.scale / scale

            def commit(entry=entry, w=w, w2=w2[i], p2=p2[i], kinetic=kinetic[i], factor=factor):
                momentum = p2.view(w.shape)
                if factor != 1.0:
                    w2, momentum, kinetic = w2 * factor, momentum * factor, kinetic * factor**2
                w.copy_(w2.view(w.shape))
                opt.state[entry.param]["momentum"] = momentum
                return kinetic

            entry.commit = commit
    return torch.stack(flags).all()


def _plan_free(opt: "Langevin", free: list, h: float, decay: float, sigma: float) -> Tensor:
    """Unconstrained BAOAB (identity projections) with foreach arithmetic:
    ``p1 = q``, ``w1 = w + s p1``, ``p2 = decay p1 + sigma xi``, ``w2 = w1 + s p2``."""
    s = 0.5 * h
    ws = [w for _, w, _, _, _ in free]
    ps = [q for _, _, q, _, _ in free]
    new_w = torch._foreach_add(ws, ps, alpha=s)
    torch._foreach_mul_(ps, decay)
    if sigma > 0:
        torch._foreach_add_(ps, [x for *_, x in free], alpha=sigma)
    torch._foreach_add_(new_w, ps, alpha=s)
    p_norms = torch._foreach_norm(ps)
    w_norms = torch._foreach_norm(new_w)
    for (entry, w, q, _, _), nw, pn in zip(free, new_w, p_norms):
        def commit(entry=entry, w=w, q=q, nw=nw, pn=pn):
            w.copy_(nw)
            opt.state[entry.param]["momentum"] = q
            return 0.5 * pn * pn

        entry.commit = commit
    return torch.isfinite(torch.stack(p_norms + w_norms)).all()
