"""Closed systems with a conserved spin-flip parity: the sector target and the dynamics.

A zero-field Ising problem has a degenerate final ground level (flipping every spin
keeps the energy), but X^n = prod_i X_i commutes with H(s) at every s, so a closed
anneal keeps the population of each parity sector and the target is the ground state
of H(1) within each populated sector, weighted by those populations.

References (independent of schedforge's code): QuTiP ``sesolve`` / ``mesolve`` with no
collapse operators on H(t) built from QuTiP's Pauli operators, the schedule written out
with ``scipy.special.betainc`` (the regularized incomplete beta function I_x(a, b)) and
the linear curves A(s) = A0 (1 - s), B(s) = B0 s; the sector ground state from an exact
projection (P = X (x) X (x) ... built in QuTiP, the ground state of
P_even (H(1) - c) P_even with c above the spectrum, so the odd space's zeros lie above).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import qutip
from scipy.special import betainc

from schedforge.device import LinearCurves
from schedforge.dynamics import simulate
from schedforge.errors import SteadyStateError
from schedforge.hamiltonian import AnnealingHamiltonian
from schedforge.schedules import make_schedule
from schedforge.spec_model import ProblemSpec
from schedforge.system import System
from schedforge.units import beta_from_mk

A0, B0 = 1.0, 1.0  # GHz: slow enough that 10-100 ns anneals leave errors well above 1e-10
BETA = beta_from_mk(24.0)  # ns/rad: a Gibbs start with about 28 % in the odd sector (3 qubits)
PARITY = "spin-flip parity (X^n)"
TWO_PI = 2 * np.pi


def _chain(n: int) -> ProblemSpec:
    return ProblemSpec(n, (0.0,) * n, tuple((i, i + 1, -1.0) for i in range(n - 1)))


def _ring(n: int) -> ProblemSpec:
    return ProblemSpec(n, (0.0,) * n, (*_chain(n).J, (0, n - 1, -1.0)))


def _system(problem: ProblemSpec, initial: str = "ground") -> System:
    ham = AnnealingHamiltonian(LinearCurves(A0, B0), problem)
    return System(ham, None, initial, beta=BETA)


# ----------------------------------------------------------------------------- QuTiP reference
def _qutip_parts(problem: ProblemSpec) -> tuple[qutip.Qobj, qutip.Qobj]:
    """(sum_i X_i, sum_i h_i Z_i + sum J_ij Z_i Z_j) from QuTiP's Pauli operators."""
    n = problem.qubits

    def op(kind: qutip.Qobj, q: int) -> qutip.Qobj:
        return qutip.tensor([kind if i == q else qutip.qeye(2) for i in range(n)])

    driver = sum(op(qutip.sigmax(), q) for q in range(n))
    prob = 0 * driver
    for q, h in enumerate(problem.h):
        prob = prob + h * op(qutip.sigmaz(), q)
    for i, j, jij in problem.J:
        prob = prob + jij * op(qutip.sigmaz(), i) * op(qutip.sigmaz(), j)
    return driver, prob


def _qutip_h(problem: ProblemSpec, s: float) -> qutip.Qobj:
    """H(s) = 2 pi (-A(s)/2 sum X + B(s)/2 H_problem) in rad/ns."""
    driver, prob = _qutip_parts(problem)
    return TWO_PI * (-0.5 * A0 * (1 - s) * driver + 0.5 * B0 * s * prob)


def _sector_grounds(problem: ProblemSpec) -> list[np.ndarray]:
    """Ground vector of P_p (H(1) - c) P_p for the even and the odd sector (exact projection)."""
    n = problem.qubits
    parity = qutip.tensor([qutip.sigmax()] * n).full()
    h1 = _qutip_h(problem, 1.0).full()
    c = np.linalg.eigvalsh(h1)[-1] + 1.0
    out = []
    for sign in (1, -1):
        proj = 0.5 * (np.eye(2**n) + sign * parity)
        vals, vecs = np.linalg.eigh(proj @ (h1 - c * np.eye(2**n)) @ proj)
        assert vals[1] - vals[0] > 1e-6  # non-degenerate within the sector
        out.append(vecs[:, 0])
    return out


def _reference_state(problem: ProblemSpec, rho0: qutip.Qobj, k_end: int, tf: float) -> np.ndarray:
    """rho(tf) from QuTiP (sesolve for a pure start, mesolve with no collapse operators)."""
    driver, prob = _qutip_parts(problem)

    def s_of(t: float) -> float:
        return float(betainc(1.0, 1.0 + k_end, min(max(t / tf, 0.0), 1.0)))

    h = [
        [driver, lambda t: -0.5 * TWO_PI * A0 * (1 - s_of(t))],
        [prob, lambda t: 0.5 * TWO_PI * B0 * s_of(t)],
    ]
    opts = {"method": "vern9", "atol": 1e-13, "rtol": 1e-12, "nsteps": 10**7}
    if rho0.isket:
        psi = qutip.sesolve(h, rho0, [0.0, tf], options=opts).states[-1].full().ravel()
        psi = psi / np.linalg.norm(psi)
        return np.outer(psi, psi.conj())
    return qutip.mesolve(h, rho0, [0.0, tf], c_ops=[], options=opts).states[-1].full()


def _reference_metrics(problem: ProblemSpec, rho: np.ndarray, weights: list[float]) -> dict:
    """The three error metrics against sum_p w_p |g_p><g_p| (exact projection)."""
    grounds = _sector_grounds(problem)
    target = sum(w * np.outer(g, g.conj()) for w, g in zip(weights, grounds, strict=True))
    p0 = sum(np.outer(g, g.conj()) for w, g in zip(weights, grounds, strict=True) if w > 1e-15)
    dev = rho - target
    dev = 0.5 * (dev + dev.conj().T)
    h1 = _qutip_h(problem, 1.0).full()
    return {
        "trace_distance": 0.5 * float(np.abs(np.linalg.eigvalsh(dev)).sum()),
        "ground_infidelity": 1.0 - float(np.real(np.trace(p0 @ rho))),
        "excess_energy_ghz": float(np.real(np.trace(h1 @ dev))) / TWO_PI,
    }


def _compare(problem: ProblemSpec, initial: str, k_end: int, tfs: list[float]) -> None:
    system = _system(problem, initial)
    h0 = _qutip_h(problem, 0.0)
    n = problem.qubits
    parity = qutip.tensor([qutip.sigmax()] * n)
    if initial == "ground":
        rho0 = h0.groundstate()[1]
        dm = rho0.proj()
    else:
        g = (-BETA * (h0 - h0.eigenenergies()[0])).expm()
        rho0 = dm = g / g.tr()
    even = float(np.real((0.5 * (1 + parity) * dm).tr()))
    weights = [even, 1.0 - even]
    sched = make_schedule("beta", k_start=0, k_end=k_end)
    for tf in tfs:
        ours = simulate(system, sched, tf)
        assert ours.ok, ours.message
        assert ours.stats["conserved"] == PARITY
        rho = _reference_state(problem, rho0, k_end, tf)
        for name, value in _reference_metrics(problem, rho, weights).items():
            assert ours.metrics[name] == pytest.approx(value, rel=1e-6), (tf, name, value)
        state = ours.final_state - rho
        assert 0.5 * np.abs(np.linalg.eigvalsh(0.5 * (state + state.conj().T))).sum() < 1e-9


def test_sector_target_is_the_exact_projection() -> None:
    # ground start: the even sector's ground state; Gibbs start: both, weighted
    for problem in (_chain(3), _ring(4)):
        grounds = _sector_grounds(problem)
        ground = _system(problem, "ground")
        np.testing.assert_allclose(
            ground.target_state(), np.outer(grounds[0], grounds[0]), atol=1e-12
        )
        gibbs = _system(problem, "gibbs")
        w = dict(zip(["even", "odd"], gibbs.conserved.weights(gibbs.initial_state()), strict=True))
        assert 0.05 < w["odd"] < 0.5  # both sectors matter
        expected = sum(wp * np.outer(g, g) for wp, g in zip(w.values(), grounds, strict=True))
        np.testing.assert_allclose(gibbs.target_state(), expected, atol=1e-12)
        assert gibbs.diagnostics["sector_weights"] == pytest.approx(w, abs=1e-14)


# Measured 2026-12-03 (relative difference from QuTiP, each metric): chain 1.6e-10 to
# 4.1e-9 at tf = 10-100 ns; ring 1.9e-11 to 2.6e-9 at 10-100 ns; Gibbs starts below 1e-12.
def test_closed_chain_ground_start_against_qutip_sesolve() -> None:
    _compare(_chain(3), "ground", 1, [10.0, 30.0, 100.0])


def test_closed_ring_ground_start_against_qutip_sesolve() -> None:
    _compare(_ring(4), "ground", 2, [10.0, 30.0])


def test_closed_gibbs_start_against_qutip_mesolve() -> None:
    # both sectors populated: the target mixes the two sector ground states
    _compare(_chain(3), "gibbs", 1, [10.0, 30.0])
    _compare(_ring(4), "gibbs", 1, [10.0])


def test_the_error_falls_with_tf_towards_the_sector_target() -> None:
    # without the sector target the trace distance to either degenerate ground state
    # (or their mixture) would stay of order one
    system = _system(_chain(3))
    sched = make_schedule("beta", k_start=0, k_end=1)
    td = [simulate(system, sched, tf).trace_distance for tf in (10.0, 100.0)]
    assert td[1] < 0.2 * td[0] < 1e-2
    assert any(w.startswith(f"conserved: {PARITY}") for w in simulate(system, sched, 10.0).warnings)


# ----------------------------------------------------------------------------- refusals
def test_unexplained_degeneracy_is_still_refused() -> None:
    # fields that cancel: h = (0.5, 0, -0.5) on a ferromagnetic chain gives 000 and 111 the
    # same energy (-2), with no conserved quantity behind it
    problem = ProblemSpec(3, (0.5, 0.0, -0.5), _chain(3).J)
    system = _system(problem)
    assert system.conserved is None
    with pytest.raises(SteadyStateError) as err:
        system.preflight()
    assert err.value.field == "problem"
    text = str(err.value)
    assert "2-fold degenerate" in text and "no conserved quantity explains it" in text
    assert "000, 111" in text and "field h_i" in text


def test_a_sector_with_a_degenerate_ground_state_is_refused() -> None:
    # zero-field antiferromagnetic triangle: six frustrated classical ground states, three
    # of them (as flip pairs) in the even sector, where the ground start lives
    problem = ProblemSpec(3, (0.0,) * 3, ((0, 1, 1.0), (1, 2, 1.0), (0, 2, 1.0)))
    system = _system(problem)
    assert system.conserved is not None
    with pytest.raises(SteadyStateError) as err:
        system.preflight()
    assert err.value.field == "problem"
    text = str(err.value)
    assert PARITY in text and "even sector" in text and "3-fold degenerate" in text


# ----------------------------------------------------------------------------- CLI
SPEC = """
version = 1
[device]
curves = "linear"
A0_ghz = 1.0
B0_ghz = 1.0
[problem]
qubits = 3
h = [0.0, 0.0, 0.0]
J = [[0, 1, -1.0], [1, 2, -1.0]]
[bath]
spectrum = "none"
[initial]
state = "ground"
[schedule]
family = "beta"
k_end = 1
tf_ns = 10.0
"""


def test_cli_simulate_closed_zero_field_chain(run_cli, write_spec) -> None:
    path = write_spec(SPEC)
    code, out, err = run_cli("simulate", path)
    assert code == 0, err
    assert f"conserved       {PARITY}: target = ground state of H(1) per sector" in out
    assert f"warning: conserved: {PARITY}" in err
    code, out, err = run_cli("simulate", path, "--json")
    assert code == 0, err
    data = json.loads(out)
    assert data["status"] == "ok" and data["stats"]["conserved"] == PARITY
    assert data["stats"]["sector_weights"]["even"] == pytest.approx(1.0, abs=1e-14)
    # simulate_spec (under the CLI) and simulate on the system built in Python agree
    direct = simulate(_system(_chain(3)), make_schedule("beta", k_start=0, k_end=1), 10.0)
    assert data["trace_distance"] == pytest.approx(direct.trace_distance, rel=1e-12)


def test_cli_refuses_an_unexplained_degeneracy(run_cli, write_spec) -> None:
    path = write_spec(SPEC.replace("h = [0.0, 0.0, 0.0]", "h = [0.5, 0.0, -0.5]"))
    code, out, err = run_cli("simulate", path)
    assert code == 2 and out == ""
    assert err.startswith("error: `problem` gives a closed system whose final ground state")
    assert "no conserved quantity explains it" in err and "Traceback" not in err
