"""Geometry: constraint sets for parameter tensors and how to project onto them."""

from holonomic.geometry.averaging import extrinsic_mean, project_average
from holonomic.geometry.base import Constraint, ShakeResult, default_tolerance
from holonomic.geometry.euclidean import UNCONSTRAINED, Unconstrained
from holonomic.geometry.registry import constrain, constraint_of, parameter_label, residuals
from holonomic.geometry.sphere import FixedNorm
from holonomic.geometry.stiefel import Orthonormal

__all__ = [
    "Constraint",
    "ShakeResult",
    "FixedNorm",
    "Orthonormal",
    "Unconstrained",
    "UNCONSTRAINED",
    "constrain",
    "constraint_of",
    "parameter_label",
    "residuals",
    "extrinsic_mean",
    "project_average",
    "default_tolerance",
]
