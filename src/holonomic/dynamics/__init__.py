"""Dynamics: integrators that move weights while keeping them on their constraint sets.

Three places hold the step: the scheme tables (:mod:`holonomic.dynamics.schemes`, built
from the operators of :mod:`holonomic.dynamics.operators`), the kernels that compute
them (:mod:`holonomic.dynamics.kernels`) and the transaction that commits a step
(:mod:`holonomic.dynamics.transaction`)."""

from holonomic.dynamics.base import HolonomicIntegrator
from holonomic.dynamics.langevin import Langevin, OverdampedLangevin
from holonomic.dynamics.operators import Phase, Settings, drift, kick, overdamped_move, run_scheme, thermostat
from holonomic.dynamics.schemes import ADAPTIVE_FRICTION, BAOAB, GEODESIC_BAOAB, OVERDAMPED, Scheme
from holonomic.dynamics.transaction import IntegrationError, ParameterStepInfo, StepInfo

__all__ = [
    "HolonomicIntegrator",
    "IntegrationError",
    "ParameterStepInfo",
    "StepInfo",
    "Langevin",
    "OverdampedLangevin",
    "Scheme",
    "BAOAB",
    "GEODESIC_BAOAB",
    "OVERDAMPED",
    "ADAPTIVE_FRICTION",
    "Phase",
    "Settings",
    "kick",
    "drift",
    "thermostat",
    "run_scheme",
    "overdamped_move",
]
