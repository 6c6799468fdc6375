r"""The integration schemes, as tables of named operators.

A scheme is a sequence of ``(operator, fraction of the step h)`` pairs; the
operators are those of :mod:`holonomic.dynamics.operators` (``B`` kick,
``A`` drift with position projection, ``O`` thermostat, ``D`` the group's
friction update).  One generic loop (the reference kernel,
:mod:`holonomic.dynamics.kernels.reference`) runs any table; the fast
kernels recognise the tables they implement in closed form.

=====================  ====================================================
``BAOAB``              B(1) A_rattle(1/2) O(1) A_rattle(1/2)
``GEODESIC_BAOAB``     B(1) A_geodesic(1/2) O(1) A_geodesic(1/2)   (g-BAOAB)
``OVERDAMPED``         projected Euler-Maruyama (no momentum)
``ADAPTIVE_FRICTION``  B(1) A(1/2) D(1/2) O_xi(1) D(1/2) A(1/2)    (BADODAB)
=====================  ====================================================

The closing half kick of one step and the opening half kick of the next use the
same gradient, so they are fused into the one full kick at the start of each
step (see :class:`holonomic.Langevin`).  ``substeps = K`` splits every drift
into ``K`` equal pieces (g-BAOAB with ``K`` RATTLE substeps).

References:
    Leimkuhler & Matthews, Proc. R. Soc. A 472 (2016) 20160138 (BAOAB, g-BAOAB);
    Leimkuhler & Shang, SIAM J. Sci. Comput. 38 (2016) A712-A736 (BADODAB).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

from holonomic.dynamics.operators import GROUP_OPERATORS, NOISE_DRAWS, OPERATORS, Settings

__all__ = ["Scheme", "BAOAB", "GEODESIC_BAOAB", "OVERDAMPED", "ADAPTIVE_FRICTION", "as_scheme"]


@dataclass(frozen=True)
class Scheme:
    """A named table of operators.

    Attributes:
        name: for messages and :class:`holonomic.dynamics.StepInfo`.
        operators: ``(operator name, fraction of the step)`` pairs, run in order.
        momentum: whether the scheme keeps a momentum per parameter.
    """

    name: str
    operators: tuple[tuple[str, float], ...]
    momentum: bool = True

    def __post_init__(self) -> None:
        for op, _ in self.operators:
            if op not in OPERATORS and op not in GROUP_OPERATORS:
                raise ValueError(f"scheme {self.name!r}: unknown operator {op!r}; known: "
                                 f"{sorted(OPERATORS) + sorted(GROUP_OPERATORS)} (register_operator adds one)")

    @property
    def group_level(self) -> bool:
        """Whether an operator couples the parameters of a group (all of them then
        run on one kernel)."""
        return any(op in GROUP_OPERATORS for op, _ in self.operators)

    def noise_draws(self, settings: Settings) -> int:
        """Standard normal tensors per parameter and step, drawn by the transaction
        in parameter order (so every kernel sees the same numbers)."""
        return sum(NOISE_DRAWS[op](settings) for op, _ in self.operators if op in NOISE_DRAWS)


BAOAB = Scheme("baoab", (("kick", 1.0), ("rattle_drift", 0.5), ("thermostat", 1.0), ("rattle_drift", 0.5)))
GEODESIC_BAOAB = Scheme("geodesic-baoab",
                        (("kick", 1.0), ("geodesic_drift", 0.5), ("thermostat", 1.0), ("geodesic_drift", 0.5)))
OVERDAMPED = Scheme("overdamped", (("overdamped", 1.0),), momentum=False)
ADAPTIVE_FRICTION = Scheme("adaptive-friction", (
    ("kick", 1.0), ("drift", 0.5), ("friction_update", 0.5), ("adaptive_thermostat", 1.0),
    ("friction_update", 0.5), ("drift", 0.5)))


def as_scheme(table: Scheme | Sequence[tuple[str, float]]) -> Scheme:
    """A :class:`Scheme` from a scheme or a plain table of pairs."""
    if isinstance(table, Scheme):
        return table
    return Scheme("custom", tuple((str(op), float(c)) for op, c in table))
