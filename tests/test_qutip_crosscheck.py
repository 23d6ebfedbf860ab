"""The general integrator against QuTiP's brmesolve (secular Bloch-Redfield, time-dependent H).

QuTiP omits the Lamb shift, so ours is off.  The systems are scenarios of our own: the
driven qubit of the default spec and a 2-qubit Ising problem.  QuTiP's solver runs with
tight tolerances (Verner 9(8)); the trace distances agree to 1e-6 relative (measured: ~1e-9).
"""

from __future__ import annotations

import numpy as np
import pytest
import qutip

from schedforge.dynamics import System, simulate
from schedforge.schedules import make_schedule
from schedforge.spec_model import BathSpec, DeviceSpec, ProblemSpec, Spec
from schedforge.units import GHZ_TO_RAD_PER_NS

QUBIT = Spec()  # A0 3.5, B0 2.5 GHz, h = 0.7, ohmic X coupling, eta 1e-4, 8 GHz, 12 mK
ISING = Spec(
    device=DeviceSpec(A0_ghz=2.0, B0_ghz=2.0),
    problem=ProblemSpec(2, (0.6, -0.35), ((0, 1, 0.8),)),
    bath=BathSpec(eta=1e-3, cutoff_ghz=8.0, temperature_mk=15.0),
)


def _brmesolve_trace_distance(spec: Spec, k_end: int, tf: float) -> float:
    system = System.from_spec(spec)
    ham, bath = system.hamiltonian, system.bath
    sched = make_schedule("beta", k_start=0, k_end=k_end)
    n = ham.n_qubits
    dims = [[2] * n, [2] * n]

    def s_of(t: float) -> float:
        return float(sched(min(max(t / tf, 0.0), 1.0)))

    def a_coef(t: float) -> float:
        return -0.5 * GHZ_TO_RAD_PER_NS * float(ham.curves.A(s_of(t)))

    def b_coef(t: float) -> float:
        return 0.5 * GHZ_TO_RAD_PER_NS * float(ham.curves.B(s_of(t)))

    h = [
        [qutip.Qobj(ham.driver, dims=dims), a_coef],
        [qutip.Qobj(ham.problem_matrix, dims=dims), b_coef],
    ]

    def spectrum(w: float) -> float:
        return float(bath.gamma(np.array([w]))[0])

    a_ops = [[qutip.Qobj(a, dims=dims), spectrum] for a in bath.operators]
    res = qutip.brmesolve(
        h,
        qutip.Qobj(system.initial_state(), dims=dims),
        [0.0, tf],
        a_ops=a_ops,
        sec_cutoff=1e-6,
        options={"method": "vern9", "atol": 1e-13, "rtol": 1e-11, "nsteps": 10**7},
    )
    dev = res.states[-1].full() - system.target_state()
    return 0.5 * float(np.abs(np.linalg.eigvalsh(0.5 * (dev + dev.conj().T))).sum())


@pytest.mark.parametrize(("tf", "k_end"), [(10.0, 0), (10.0, 2), (20.0, 1)])
def test_driven_qubit_agrees_with_brmesolve(tf: float, k_end: int) -> None:
    ours = simulate(System.from_spec(QUBIT), make_schedule("beta", k_start=0, k_end=k_end), tf)
    assert ours.ok
    ref = _brmesolve_trace_distance(QUBIT, k_end, tf)
    assert ours.trace_distance == pytest.approx(ref, rel=1e-6)


@pytest.mark.parametrize(
    ("tf", "k_end"), [(10.0, 1), pytest.param(30.0, 2, marks=pytest.mark.slow)]
)
def test_two_qubit_ising_agrees_with_brmesolve(tf: float, k_end: int) -> None:
    ours = simulate(System.from_spec(ISING), make_schedule("beta", k_start=0, k_end=k_end), tf)
    assert ours.ok
    ref = _brmesolve_trace_distance(ISING, k_end, tf)
    assert ours.trace_distance == pytest.approx(ref, rel=1e-6)
