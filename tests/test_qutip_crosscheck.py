"""Both integrators against QuTiP's brmesolve (secular Bloch-Redfield, time-dependent H).

QuTiP omits the Lamb shift, so ours is off.  The systems are scenarios of our own: the
driven qubit of the default spec and a 2-qubit Ising problem.  QuTiP's solver runs with
tight tolerances (Verner 9(8)); the trace distances agree to 1e-6 relative (measured: ~1e-9).
"""

from __future__ import annotations

import functools

import pytest
from qutip_reference import brmesolve_trace_distance

from schedforge.dynamics import simulate
from schedforge.schedules import make_schedule
from schedforge.spec_model import BathSpec, DeviceSpec, ProblemSpec, Spec
from schedforge.system import System

QUBIT = Spec()  # A0 3.5, B0 2.5 GHz, h = 0.7, ohmic X coupling, eta 1e-4, 8 GHz, 12 mK
ISING = Spec(
    device=DeviceSpec(A0_ghz=2.0, B0_ghz=2.0),
    problem=ProblemSpec(2, (0.6, -0.35), ((0, 1, 0.8),)),
    bath=BathSpec(eta=1e-3, cutoff_ghz=8.0, temperature_mk=15.0),
)


@functools.cache
def _brmesolve_trace_distance(spec: Spec, k_end: int, tf: float) -> float:
    return brmesolve_trace_distance(System.from_spec(spec), k_end, tf)


@pytest.mark.parametrize("integrator", ["general", "eigenframe"])
@pytest.mark.parametrize(("tf", "k_end"), [(10.0, 0), (10.0, 2), (20.0, 1)])
def test_driven_qubit_agrees_with_brmesolve(tf: float, k_end: int, integrator: str) -> None:
    sched = make_schedule("beta", k_start=0, k_end=k_end)
    ours = simulate(System.from_spec(QUBIT), sched, tf, integrator=integrator)
    assert ours.integrator == integrator
    assert ours.ok
    ref = _brmesolve_trace_distance(QUBIT, k_end, tf)
    assert ours.trace_distance == pytest.approx(ref, rel=1e-6)


@pytest.mark.parametrize(
    ("tf", "k_end"), [(10.0, 1), pytest.param(30.0, 2, marks=pytest.mark.slow)]
)
def test_two_qubit_ising_agrees_with_brmesolve(tf: float, k_end: int) -> None:
    # the default ("auto") integrator: eigenframe, handing over where it must
    ours = simulate(System.from_spec(ISING), make_schedule("beta", k_start=0, k_end=k_end), tf)
    assert ours.ok
    ref = _brmesolve_trace_distance(ISING, k_end, tf)
    assert ours.trace_distance == pytest.approx(ref, rel=1e-6)
