"""What every integrator shares: the outcome type, the registry and the default choice.

An integrator is a function ``fn(system, schedule, tf_ns, *, rtol, atol)`` returning an
:class:`IntegrationOutcome`; it registers itself under a name with
:func:`register_integrator` when its module is imported (``schedforge.integrators``
imports the built-in ones).  ``"auto"`` resolves through :func:`default_integrator`,
the one place that chooses.  This module imports nothing from the integrators, so
they can all import it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from ..errors import InputError

if TYPE_CHECKING:
    from ..system import System

__all__ = [
    "HELD_INTEGRATOR",
    "INTEGRATORS",
    "IntegrationOutcome",
    "Integrator",
    "default_integrator",
    "get_integrator",
    "register_integrator",
]


@dataclass(frozen=True)
class IntegrationOutcome:
    """What an integrator returns.

    Attributes
    ----------
    deviation : ndarray
        ``rho(tf) - sigma(1)`` (d x d), computed as directly as possible.
    rho : ndarray
        ``rho(tf)``.
    status : str
        ``"ok"`` or ``"failed"``.
    message : str
        What happened (the solver's message on failure).
    stats : dict
        Steps, right-hand-side evaluations and anything else worth reporting.
    """

    deviation: NDArray[Any] = field(repr=False)
    rho: NDArray[Any] = field(repr=False)
    status: str
    message: str
    stats: dict[str, Any] = field(default_factory=dict)

    @classmethod
    def failure(
        cls, dim: int, message: str, stats: dict[str, Any] | None = None
    ) -> IntegrationOutcome:
        """A failed outcome with nan matrices."""
        nan = np.full((dim, dim), np.nan, dtype=complex)
        return cls(nan, nan.copy(), "failed", message, dict(stats or {}))


Integrator = Callable[..., IntegrationOutcome]

#: Registered integrators by name: ``fn(system, schedule, tf_ns, *, rtol, atol)``.
INTEGRATORS: dict[str, Integrator] = {}

#: The integrator of piecewise-constant schedules (unfiltered holds), whatever was asked.
HELD_INTEGRATOR = "held"


def register_integrator(name: str, fn: Integrator) -> None:
    """Register an integrator under ``name`` (replacing any previous one)."""
    INTEGRATORS[name] = fn


def default_integrator(system: System) -> str:
    """The integrator that ``"auto"`` selects for ``system`` (the one place to change it).

    Open systems get the fast eigenframe integrator, which meets the general
    integrator's accuracy (see ``tests/test_eigenframe.py``) and hands over to it
    by itself where its assumptions fail; closed systems get the general one.
    """
    if system.closed or "eigenframe" not in INTEGRATORS:
        return "general"
    return "eigenframe"


def get_integrator(name: str, system: System) -> tuple[str, Integrator]:
    """Resolve ``name`` (or ``"auto"``) to a registered integrator."""
    resolved = default_integrator(system) if name == "auto" else name
    if resolved not in INTEGRATORS:
        known = ", ".join(sorted(["auto", *INTEGRATORS]))
        raise InputError("numerics.integrator", f"must be one of {known}; got {name!r}")
    return resolved, INTEGRATORS[resolved]
