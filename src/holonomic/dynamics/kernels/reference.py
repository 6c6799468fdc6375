"""The reference kernel: any scheme table, any constraint, one operator at a time.

It runs the operators of :mod:`holonomic.dynamics.operators` in the order of
the scheme's table, per param group: a per-parameter operator on each
parameter's phase, a group operator on all of them.  Every other kernel is
tested against it."""

from __future__ import annotations

from typing import Mapping, Sequence

import torch
from torch import Tensor

from holonomic.dynamics.kernels.protocol import Layout
from holonomic.dynamics.operators import GROUP_OPERATORS, OPERATORS, Phase
from holonomic.dynamics.transaction import GroupResult, StepInput, StepResult
from holonomic.geometry.base import Constraint

__all__ = ["ReferenceKernel"]


class ReferenceKernel:
    """Supports every (scheme, constraint, dtype, device, layout)."""

    name = "reference"

    def supports(self, scheme: object, settings: object, constraint: Constraint, dtype: torch.dtype,
                 device: torch.device, layout: Layout) -> bool:
        return True

    def run(self, inputs: Sequence[StepInput], group_states: Mapping[int, Mapping[str, Tensor]]
            ) -> tuple[list[StepResult | None], dict[int, GroupResult]]:
        groups: dict[int, list[int]] = {}
        for i, u in enumerate(inputs):
            groups.setdefault(u.group, []).append(i)
        results: list[StepResult | None] = [None] * len(inputs)
        group_results: dict[int, GroupResult] = {}
        for g, members in groups.items():
            new_state = dict(group_states.get(g, {}))
            items = [inputs[i] for i in members]
            phases, forces = [], []
            for u in items:
                force = u.force()
                momentum = u.momentum
                if momentum is None and u.scheme.momentum:
                    momentum = torch.zeros_like(u.position)
                phases.append(Phase(w=u.position, p=momentum, ok=torch.isfinite(force).all()))
                forces.append(force)
            draws = [iter(u.noise) for u in items]
            scheme, settings = items[0].scheme, items[0].settings
            dof = sum(u.constraint.tangent_dof(u.param.shape) for u in items)
            for name, fraction in scheme.operators:
                group_op = GROUP_OPERATORS.get(name)
                if group_op is not None:
                    group_op(phases, fraction, dof=dof, settings=settings, state=new_state)
                    continue
                op = OPERATORS[name]
                for u, phase, force, noise in zip(items, phases, forces, draws):
                    op(phase, fraction, force=force, geometry=u.constraint, settings=u.settings,
                       noise=noise.__next__, state=new_state)
            for i, u, phase in zip(members, items, phases):
                ok = phase.ok
                if u.scheme.momentum:
                    ok = ok & torch.isfinite(phase.p).all()
                results[i] = StepResult(ok, phase.iterations, _writer(u, phase), self.name)
            if scheme.group_level:
                flags = [torch.isfinite(v).all() for v in new_state.values()]
                group_results[g] = GroupResult(torch.stack(flags).all() if flags else True, new_state)
        return results, group_results


def _writer(u: StepInput, phase: Phase):
    def apply() -> tuple[Tensor | None, Tensor | None]:
        u.param.detach().copy_(phase.w)
        if not u.scheme.momentum:
            return None, None
        return phase.p, 0.5 * (phase.p * phase.p).sum()

    return apply
