"""The error metrics of an anneal: one registry every layer derives from.

A *metric* is a number measured on the final deviation ``rho(tf) - sigma(1)`` of a
simulated anneal (``sigma(1)`` is the target: the steady state of the final
generator for an open system, the ground state of H(1) for a closed one).  Each is a
:class:`Metric` in :data:`METRICS`, in display order:

* ``trace_distance``: ``||rho(tf) - sigma(1)||_1 / 2``;
* ``ground_infidelity``: ``1 - tr(P_0 rho(tf))`` with P_0 the projector on the
  lowest level of H(1) (for an open system this tends to the thermal excited
  population, not to zero; for a closed system with a conserved quantity, on the
  lowest level of H(1) within each sector the initial state populates);
* ``excess_energy_ghz``: ``tr(H(1) (rho(tf) - sigma(1)))`` as E/h in GHz, the
  energy in excess of the target state.

All are computed from the integrated deviation, so they keep their relative
accuracy down to ~1e-13.

What derives from the registry: the values :func:`schedforge.dynamics.simulate`
puts in ``SimulationResult.metrics``, the store's result columns (``sweep.sqlite``;
a store made before a metric existed gains its column when next opened for
writing, its old points read back NaN there), the columns of ``points.csv``, the
metric a scaling fit analyses (``fitted``), whether the predicted leading
coefficient C_k applies (``predicted``), the report's column headers and the
plots' axis labels and bounds.

Adding a metric: write its function ``(system, dev) -> float`` here and add a
:class:`Metric` to :data:`METRICS` (its name becomes a column: a lower-case
identifier); name it in the README (``simulate``'s outputs).  Nothing else
changes.  The store, the CSV and the analysis read the registry when they are
imported: change it here, not at run time.

This module also holds the one trace distance of the package
(:func:`trace_distance`), used by the metrics and by the integrators' own error
estimates, and the trace norm of a general matrix (:func:`trace_norm`).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .units import GHZ_TO_RAD_PER_NS

__all__ = [
    "METRICS",
    "Metric",
    "fitted_metric",
    "measure",
    "metric",
    "metric_names",
    "metric_values",
    "nan_metrics",
    "trace_distance",
    "trace_norm",
]


def trace_distance(deviation: NDArray[Any]) -> float:
    """``||D||_1 / 2`` of the Hermitian part D of ``deviation`` (e.g. rho - sigma).

    Uses the eigenvalues of the Hermitian part, so that a deviation of 1e-13 keeps
    its relative accuracy.
    """
    return _trace_distance(None, 0.5 * (deviation + deviation.conj().T))


def trace_norm(a: NDArray[Any]) -> float:
    """Trace norm ||a||_1 (sum of singular values) of any matrix."""
    from scipy import linalg

    return float(np.sum(linalg.svdvals(a)))


@dataclass(frozen=True)
class Metric:
    """One error metric of an anneal.

    Attributes
    ----------
    name : str
        Column name in the store, ``points.csv`` and ``fit.csv`` (``metric``), and the
        key in ``SimulationResult.metrics``.
    label : str
        Short words for tables and axes (``"trace distance"``).
    unit : str
        Unit of the value (``""``: dimensionless).
    description : str
        What it measures (the formula).
    compute : callable
        ``compute(system, dev)`` with ``dev`` the Hermitian part of
        ``rho(tf) - sigma(1)`` and ``system`` a :class:`~schedforge.dynamics.System`.
    fitted : bool
        The scaling analysis fits it against tf (the report's fit table).
    predicted : bool
        The predicted leading coefficient C_k (:mod:`schedforge.prediction`)
        predicts this metric, so a fit of it is held against C_k.
    bounded : bool
        The value cannot exceed 1 (plots draw no predicted line above it).
    """

    name: str
    label: str
    unit: str
    description: str
    compute: Callable[[Any, NDArray[Any]], float]
    fitted: bool = False
    predicted: bool = False
    bounded: bool = False

    @property
    def heading(self) -> str:
        """Label with the unit: ``"excess energy (GHz)"``."""
        return f"{self.label} ({self.unit})" if self.unit else self.label


def _trace_distance(system: Any, dev: NDArray[Any]) -> float:
    """Half the sum of |eigenvalues| of the Hermitian ``dev`` (``system`` unused)."""
    return 0.5 * float(np.sum(np.abs(np.linalg.eigvalsh(dev))))


def _ground_infidelity(system: Any, dev: NDArray[Any]) -> float:
    eig = system.eigen(1.0)
    ground = eig.labels == 0
    # the ground space measured (a closed system with a conserved quantity: the ground
    # state of each populated sector, the target's support) and the target's own
    # population of it
    space = getattr(system, "ground_space", None)
    v0 = eig.vectors[:, ground] if space is None else space()
    p0_dev = float(np.real(np.trace(v0.conj().T @ dev @ v0)))
    population = getattr(system, "target_ground_population", None)
    if population is None:
        population = lambda: float(np.sum(eig.target_weights(system.target_beta)[ground]))  # noqa: E731
    target_excited = 1.0 - population()
    return target_excited - p0_dev


def _excess_energy_ghz(system: Any, dev: NDArray[Any]) -> float:
    h1 = system.hamiltonian.matrix(1.0)
    return float(np.real(np.sum(h1 * dev.T))) / GHZ_TO_RAD_PER_NS


#: The registry, by name, in display order (the order of the store's and the CSV's
#: columns).
METRICS: dict[str, Metric] = {
    m.name: m
    for m in (
        Metric(
            "trace_distance",
            "trace distance",
            "",
            "||rho(tf) - sigma(1)||_1 / 2",
            _trace_distance,
            fitted=True,
            predicted=True,
            bounded=True,
        ),
        Metric(
            "ground_infidelity",
            "ground infidelity",
            "",
            "1 - tr(P_0 rho(tf)), P_0 the ground space of H(1)",
            _ground_infidelity,
            bounded=True,
        ),
        Metric(
            "excess_energy_ghz",
            "excess energy",
            "GHz",
            "tr(H(1) (rho(tf) - sigma(1))) as E/h",
            _excess_energy_ghz,
        ),
    )
}


def metric_names() -> tuple[str, ...]:
    """Names of every registered metric, in display order."""
    return tuple(METRICS)


def metric(name: str) -> Metric:
    """The metric called ``name`` (KeyError naming the known ones)."""
    try:
        return METRICS[name]
    except KeyError:
        raise KeyError(f"unknown metric {name!r}; known: {', '.join(METRICS)}") from None


def fitted_metric() -> str:
    """The metric the scaling analysis fits by default (the first ``fitted`` one)."""
    return next(m.name for m in METRICS.values() if m.fitted)


def measure(system: Any, deviation: NDArray[Any]) -> dict[str, float]:
    """Every registered metric of the final deviation ``rho(tf) - sigma(1)``."""
    dev = 0.5 * (deviation + deviation.conj().T)
    return {name: float(m.compute(system, dev)) for name, m in METRICS.items()}


def nan_metrics() -> dict[str, float]:
    """Every metric as NaN (a point that produced no numbers)."""
    return dict.fromkeys(METRICS, math.nan)


def metric_values(result: Any) -> dict[str, float]:
    """Every registered metric of a simulation result, as floats.

    A metric that is an attribute of the result (the fields of
    :class:`~schedforge.dynamics.SimulationResult`) is read there, any other from
    ``result.metrics``; NaN when the result carries neither.
    """
    values: Mapping[str, float] = getattr(result, "metrics", None) or {}
    return {
        name: float(getattr(result, name))
        if hasattr(result, name)
        else float(values.get(name, math.nan))
        for name in METRICS
    }
