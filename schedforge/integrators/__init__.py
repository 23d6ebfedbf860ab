"""Integrators of the master equation, registered by name.

:mod:`.base` holds what they share (the outcome type, the registry and the ``"auto"``
choice); importing this package registers the built-in integrators:

* ``"general"`` (:mod:`.general`): adaptive Runge-Kutta / BDF on the full equation;
* ``"eigenframe"`` (:mod:`.eigenframe`): the fast integrator in the instantaneous
  eigenbasis, for open systems;
* ``"held"`` (:mod:`.held`): exact propagation of piecewise-constant schedules.
"""

from . import eigenframe, general, held  # noqa: F401  (each registers itself)
from .base import (
    HELD_INTEGRATOR,
    INTEGRATORS,
    IntegrationOutcome,
    Integrator,
    default_integrator,
    get_integrator,
    register_integrator,
)

__all__ = [
    "HELD_INTEGRATOR",
    "INTEGRATORS",
    "IntegrationOutcome",
    "Integrator",
    "default_integrator",
    "get_integrator",
    "register_integrator",
]
