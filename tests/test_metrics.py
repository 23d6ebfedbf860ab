"""Tests of the metric registry and the one trace distance (schedforge.metrics).

References: the trace distance D(rho, sigma) = ||rho - sigma||_1 / 2 (Nielsen and
Chuang, Quantum Computation and Quantum Information, 2000, sec. 9.2.1), checked
against QuTiP's ``tracedist``; the trace norm against SciPy's singular values.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from schedforge.metrics import (
    METRICS,
    fitted_metric,
    measure,
    metric_values,
    nan_metrics,
    trace_distance,
    trace_norm,
)
from schedforge.store import CSV_COLUMNS, METRIC_COLUMNS


def _random_state(rng: np.random.Generator, d: int) -> np.ndarray:
    a = rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d))
    rho = a @ a.conj().T
    return rho / np.trace(rho)


def test_trace_distance_matches_qutip():
    qutip = pytest.importorskip("qutip")
    rng = np.random.default_rng(3)
    for d in (2, 4, 8):
        rho, sigma = _random_state(rng, d), _random_state(rng, d)
        ref = qutip.tracedist(qutip.Qobj(rho), qutip.Qobj(sigma))
        assert trace_distance(rho - sigma) == pytest.approx(ref, rel=1e-12)


def test_trace_distance_of_orthogonal_pure_states_is_one():
    # Nielsen and Chuang (2000), sec. 9.2.1: D = 1 for orthogonal pure states.
    assert trace_distance(np.diag([1.0, -1.0]).astype(complex)) == pytest.approx(1.0)


def test_trace_norm_is_the_sum_of_singular_values():
    a = np.array([[1.0, 2.0], [0.0, -3.0]])
    from scipy.linalg import svdvals

    assert trace_norm(a) == pytest.approx(float(np.sum(svdvals(a))), rel=1e-14)


def test_registry_drives_the_store_columns():
    assert METRIC_COLUMNS == tuple(METRICS)
    # points.csv: the coordinates, then every metric in registry order, then status.
    assert CSV_COLUMNS[5 : 5 + len(METRICS)] == tuple(METRICS)
    assert fitted_metric() == "trace_distance" and METRICS["trace_distance"].predicted
    assert all(math.isnan(v) for v in nan_metrics().values())


def test_measure_on_a_qubit_equals_the_formulas():
    # A qubit with H(1) = diag(0, w): target ground state |0><0|.  rho(tf) has an
    # excited population p: trace distance p, ground infidelity p, excess energy p w.
    class Eig:
        labels = np.array([0, 1])
        vectors = np.eye(2)

        @staticmethod
        def target_weights(beta):
            return np.array([1.0, 0.0])

    class Ham:
        @staticmethod
        def matrix(s):
            return np.diag([0.0, 2.0 * math.pi * 1.5])  # rad/ns: 1.5 GHz

    class System:
        target_beta = None
        hamiltonian = Ham()

        @staticmethod
        def eigen(s):
            return Eig()

    p = 1e-9
    values = measure(System(), np.diag([-p, p]).astype(complex))
    assert values["trace_distance"] == pytest.approx(p, rel=1e-12)
    assert values["ground_infidelity"] == pytest.approx(p, rel=1e-12)
    assert values["excess_energy_ghz"] == pytest.approx(1.5 * p, rel=1e-12)


def test_metric_values_prefers_the_result_fields():
    from types import SimpleNamespace

    result = SimpleNamespace(
        trace_distance=0.5, metrics={"trace_distance": 0.25, "ground_infidelity": 0.1}
    )
    values = metric_values(result)
    assert values["trace_distance"] == 0.5 and values["ground_infidelity"] == 0.1
    assert math.isnan(values["excess_energy_ghz"])
