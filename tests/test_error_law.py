"""The error law by dynamics: open (Davies) vs closed (unitary) evolution.

References:
- closed systems: boundary terms of both ends, error ~ tf^-(min(k_start, k_end) + 1)
  (Lidar, Rezakhani and Hamma, J. Math. Phys. 50, 102106 (2009); cited from memory,
  so the law is checked here numerically on a closed qubit with the general (DOP853)
  integrator, which resolves every oscillation);
- open systems: only the end counts, tf^-(k_end + 1) (Campos Venuti, Albash, Lidar and
  Zanardi, Phys. Rev. A 93, 032118 (2016); checked against simulation in
  tests/test_prediction.py).
"""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest

from schedforge.analysis import expected_slope, fit_scaling, local_slopes
from schedforge.dynamics import simulate_spec
from schedforge.error_law import CLOSED, OPEN, dynamics_kind, end_orders, error_law
from schedforge.spec import load_spec, parse_spec

#: An invented closed qubit: H(s) = -(A(s)/2) X + (B(s)/2) 0.5 Z, minimum gap ~0.5 GHz.
CLOSED_QUBIT = {
    "version": 1,
    "device": {"curves": "linear", "A0_ghz": 1.0, "B0_ghz": 1.0},
    "problem": {"qubits": 1, "h": [0.5], "J": []},
    "bath": {"spectrum": "none"},
    "schedule": {"family": "beta", "k_start": 0, "k_end": 0, "tf_ns": 10.0},
    "initial": {"state": "ground"},
}


@pytest.fixture(scope="module")
def closed_spec():
    return parse_spec(CLOSED_QUBIT, ".")


@functools.cache
def _closed_error(k_start: float, k_end: float, tf: float) -> float:
    """Trace distance of the closed qubit (general integrator), computed once per point."""
    res = simulate_spec(parse_spec(CLOSED_QUBIT, "."), tf_ns=tf, k_start=k_start, k_end=k_end)
    assert res.status == "ok" and res.integrator in ("general", "closed")
    return res.trace_distance


def test_law_trait():
    assert error_law(OPEN, "beta", 0, 2).slope == -3.0
    assert error_law(CLOSED, "beta", 0, 2).slope == -1.0
    assert error_law(CLOSED, "beta", 3, 1).slope == -2.0
    assert error_law(OPEN, "linear", 5, 5).slope == -1.0  # nothing flat whatever k says
    assert error_law(CLOSED, "linear", 5, 5).slope == -1.0
    assert math.isnan(error_law(OPEN, "gevrey", 0, 2).slope)  # flat to every order
    assert error_law(CLOSED, "gevrey", 0, 2).slope == -1.0  # the start is not flat
    assert math.isnan(error_law(CLOSED, "gevrey", 1, 2).slope)  # both ends flat
    assert end_orders("gevrey", 1, 0) == (math.inf, math.inf)
    assert expected_slope("beta", 2, k_start=1, dynamics=CLOSED) == -2.0
    assert "closed" in error_law(CLOSED, "beta", 1, 3).label
    with pytest.raises(ValueError):
        error_law("lossy", "beta", 0, 1)


def test_dynamics_kind_of_specs(closed_spec):
    assert dynamics_kind(closed_spec) == CLOSED
    assert dynamics_kind(load_spec("builtin:driven-qubit")) == OPEN


@pytest.mark.parametrize(("k_start", "k_end"), [(0, 2), (1, 3), (3, 1)])
def test_closed_qubit_follows_the_closed_law(closed_spec, k_start, k_end):
    """Local slope at tf = 40..80 ns (tf x min gap ~ 100) is -(min(k_start, k_end) + 1)."""
    tfs = np.array([40.0, 80.0])
    err = [_closed_error(k_start, k_end, float(tf)) for tf in tfs]
    slope = float(local_slopes(tfs, err)[0])
    law = error_law(dynamics_kind(closed_spec), "beta", k_start, k_end)
    assert slope == pytest.approx(law.slope, abs=0.05)
    # the open-system law would be wrong here whenever the ends differ
    assert abs(slope - error_law(OPEN, "beta", k_start, k_end).slope) > 0.9 or k_end < k_start


def test_closed_fit_agrees_with_the_closed_law_and_says_so():
    """A k_start = 0, k_end = 2 closed sweep: slope -1, verdict agrees (it was 'disagrees'
    or 'add tf above' under the open-system law)."""
    tfs = [40.0, 80.0, 160.0]
    err = [_closed_error(0, 2, t) for t in tfs]
    fit = fit_scaling(tfs, err, k_end=2, k_start=0, family="beta", floor=1e-11, dynamics=CLOSED)
    assert fit.verdict == "agrees", fit.message
    assert fit.expected_slope == -1.0
    assert fit.row()["error_law"].startswith("closed: tf^-(min(k_start,k_end)+1)")
    assert "coefficient not checked" in fit.message
    open_fit = fit_scaling(tfs, err, k_end=2, k_start=0, family="beta", floor=1e-11)
    assert open_fit.verdict != "agrees"


# -- warnings that reach the user ------------------------------------------------------
def test_short_tf_against_the_final_relaxation_time_is_a_warning():
    """A bath so weak that the final relaxation time is ~1e11 ns (gap ~4e-13 GHz, the
    Liouvillian gap scales with eta: Davies rates are linear in the coupling): any
    anneal is short, and the result says so instead of a bare "ok"."""
    import dataclasses

    base = load_spec("builtin:driven-qubit")
    weak = dataclasses.replace(base, bath=dataclasses.replace(base.bath, eta=1e-13))
    res = simulate_spec(weak, tf_ns=1000.0, k_end=2)
    assert res.status == "ok"
    gap_ghz = res.stats["liouvillian_gap_final_ghz"]
    assert gap_ghz == pytest.approx(4.4e-4 * 1e-9, rel=0.05)  # 1e-9 x the eta = 1e-4 gap
    short = [w for w in res.warnings if "short against the final relaxation time" in w]
    assert len(short) == 1 and "does not hold here" in short[0]
    # the built-in scenario at 1000 ns is 2.8 relaxation times: warned; at 3000 ns, 8.3: not
    assert any("relaxation time" in w for w in simulate_spec(base, tf_ns=1000.0).warnings)
    assert not any("relaxation time" in w for w in simulate_spec(base, tf_ns=3000.0).warnings)


def test_simulate_says_when_a_result_is_below_the_numerical_floor(run_cli):
    """k_end = 3 at 1e6 ns: C_3 tf^-4 ~ 2e-16, far below 1000 x atol = 1e-11."""
    import json

    code, out, _ = run_cli("simulate", "builtin:driven-qubit", "--tf-ns", "1e6", "--k-end", "3")
    assert code == 0
    assert "below the numerical floor 1e-11" in out
    code, out, _ = run_cli("simulate", "builtin:driven-qubit", "--tf-ns", "3000", "--quiet")
    assert code == 0 and "below the numerical floor" not in out
    code, out, _ = run_cli(
        "simulate", "builtin:driven-qubit", "--tf-ns", "1e6", "--k-end", "3", "--json"
    )
    data = json.loads(out)
    assert data["below_numerical_floor"] is True and data["numerical_floor"] == 1e-11


def test_closed_equal_ends_oscillation_is_named():
    """Equal flatness at both ends of a closed system: the two boundary terms interfere
    (synthetic data, |a e^(i phi(tf)) + b| / tf^2 with a turning phase; our demo data)."""
    tfs = np.geomspace(20.0, 200.0, 9)
    err = np.abs(1.0 + 0.6 * np.exp(1j * 2.0 * tfs)) * 1e-2 / tfs**2
    fit = fit_scaling(tfs, err, k_end=1, k_start=1, family="beta", floor=1e-11, dynamics=CLOSED)
    assert fit.verdict == "regime not reached"
    assert "interfere" in fit.message
