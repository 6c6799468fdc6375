"""holonomic: constrained Langevin training and sampling of neural-network weights.

Declare constraints on layers (:func:`constrain` with :class:`FixedNorm` or
:class:`Orthonormal`), then train or sample with :class:`Langevin` or
:class:`OverdampedLangevin`, which keep the constraints to roundoff with
SHAKE/RATTLE projections at a temperature you choose.
"""

from holonomic.dynamics import IntegrationError, Langevin, OverdampedLangevin, StepInfo
from holonomic.geometry import (
    Constraint,
    FixedNorm,
    Orthonormal,
    constrain,
    constraint_of,
    extrinsic_mean,
    project_average,
    residuals,
)
from holonomic.sampling import AdaptiveLangevin
from holonomic.audit import Audit, repair

__version__ = "0.2.0"

__all__ = [
    "Constraint",
    "FixedNorm",
    "Orthonormal",
    "constrain",
    "constraint_of",
    "residuals",
    "project_average",
    "extrinsic_mean",
    "Langevin",
    "OverdampedLangevin",
    "AdaptiveLangevin",
    "IntegrationError",
    "Audit",
    "repair",
    "StepInfo",
    "__version__",
]
