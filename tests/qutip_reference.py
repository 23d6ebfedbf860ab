"""QuTiP ``brmesolve`` reference for the time-dependent Davies dynamics.

Shared by ``test_qutip_crosscheck.py`` and ``benchmarks/bench_eigenframe.py``.  QuTiP's
secular Bloch-Redfield solver with a time-dependent Hamiltonian and the bath's spectral
density; it omits the Lamb shift, so compare with ours off.
"""

from __future__ import annotations

import numpy as np
import qutip

from schedforge.schedules import make_schedule
from schedforge.system import System
from schedforge.units import GHZ_TO_RAD_PER_NS


def brmesolve_trace_distance(system: System, k_end: int, tf: float) -> float:
    """Trace distance of brmesolve's rho(tf) from sigma(1) for a beta schedule (k_start 0)."""
    ham, bath = system.hamiltonian, system.bath
    sched = make_schedule("beta", k_start=0, k_end=k_end)
    dims = [[2] * ham.n_qubits, [2] * ham.n_qubits]

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

    res = qutip.brmesolve(
        h,
        qutip.Qobj(system.initial_state(), dims=dims),
        [0.0, tf],
        a_ops=[[qutip.Qobj(a, dims=dims), spectrum] for a in bath.operators],
        sec_cutoff=1e-6,
        options={"method": "vern9", "atol": 1e-13, "rtol": 1e-11, "nsteps": 10**8},
    )
    dev = res.states[-1].full() - system.target_state()
    return 0.5 * float(np.abs(np.linalg.eigvalsh(0.5 * (dev + dev.conj().T))).sum())
