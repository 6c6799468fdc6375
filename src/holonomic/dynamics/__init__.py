"""Dynamics: integrators that move weights while keeping them on their constraint sets."""

from holonomic.dynamics.base import HolonomicIntegrator, IntegrationError, ParameterStepInfo, StepInfo
from holonomic.dynamics.langevin import Langevin, OverdampedLangevin
from holonomic.dynamics.operators import BAOAB, Phase, Settings, drift, kick, overdamped_move, run_scheme, thermostat

__all__ = [
    "HolonomicIntegrator",
    "IntegrationError",
    "ParameterStepInfo",
    "StepInfo",
    "Langevin",
    "OverdampedLangevin",
    "BAOAB",
    "Phase",
    "Settings",
    "kick",
    "drift",
    "thermostat",
    "run_scheme",
    "overdamped_move",
]
