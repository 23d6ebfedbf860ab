"""Conserved spin-flip parity: detection, the sector target, sector-by-sector dynamics.

References: the sector target against an exact projection (scipy.linalg.expm of H with
QuTiP's parity operator) and against QuTiP's steady state of the Bloch-Redfield tensor
restricted to each sector; the sector-by-sector dynamics against a direct integration of
the whole space's master equation (which knows nothing of the sectors); the error law
tf^-(k_end+1) and its coefficient from Phys. Rev. A 98, 022315 (2018), arXiv:1806.06310.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import qutip
from scipy import linalg
from scipy.integrate import solve_ivp

from schedforge.bath import Bath, OhmicSpectralDensity
from schedforge.device import LinearCurves
from schedforge.dynamics import simulate
from schedforge.errors import SteadyStateError
from schedforge.hamiltonian import AnnealingHamiltonian, pauli_operator
from schedforge.prediction import predicted_coefficient
from schedforge.schedules import make_schedule
from schedforge.spec_model import ProblemSpec
from schedforge.symmetry import find_conserved, spin_flip_parity
from schedforge.system import System
from schedforge.units import beta_from_mk

BETA = beta_from_mk(12.0)
DENSITY = OhmicSpectralDensity(1e-3, 2 * np.pi * 8.0, BETA)


def _chain(n: int, fields: float = 0.0) -> ProblemSpec:
    """Ferromagnetic chain, uniform fields (zero by default)."""
    return ProblemSpec(n, (fields,) * n, tuple((i, i + 1, -1.0) for i in range(n - 1)))


def _system(problem: ProblemSpec, coupling: str = "x", initial: object = "gibbs") -> System:
    ham = AnnealingHamiltonian(LinearCurves(3.5, 2.5), problem)  # A(1) = 0
    n = problem.qubits
    ops = tuple(pauli_operator(coupling, q, n) for q in range(n))
    return System(ham, Bath(DENSITY, ops), initial)


def _trace_distance(a: np.ndarray) -> float:
    return 0.5 * float(np.abs(np.linalg.eigvalsh(0.5 * (a + a.conj().T))).sum())


def _qutip_parity_projectors(n: int) -> list[np.ndarray]:
    parity = qutip.tensor([qutip.sigmax()] * n).full()
    eye = np.eye(2**n)
    return [0.5 * (eye + parity), 0.5 * (eye - parity)]


def _gibbs(h: np.ndarray) -> np.ndarray:
    g = linalg.expm(-BETA * (h - np.linalg.eigvalsh(h)[0] * np.eye(len(h))))
    return g / np.trace(g)


# ----------------------------------------------------------------------------- detection
def test_parity_is_found_only_with_zero_fields_and_x_coupling() -> None:
    system = _system(_chain(3))
    assert system.conserved is not None
    assert system.conserved.name == "spin-flip parity (X^n)"
    assert [s.name for s in system.conserved.sectors] == ["even", "odd"]
    # the operator found is QuTiP's X (x) X (x) X
    np.testing.assert_array_equal(
        system.conserved.operator, qutip.tensor([qutip.sigmax()] * 3).full().real
    )
    assert _system(_chain(3, fields=0.2)).conserved is None  # a field breaks it
    assert _system(_chain(3), coupling="z").conserved is None  # Z_i anticommutes with X^n
    assert _system(_chain(3), coupling="y").conserved is None
    # one field on one qubit is enough to break it
    problem = ProblemSpec(3, (0.0, 1e-3, 0.0), _chain(3).J)
    assert _system(problem).conserved is None
    # the numerical check on bare matrices
    x = pauli_operator("x", 0, 2)
    assert find_conserved([x], [x], 2) is not None
    assert find_conserved([pauli_operator("z", 0, 2)], [x], 2) is None
    sx = pauli_operator("x", 0, 1)
    np.testing.assert_array_equal(spin_flip_parity(2), np.kron(sx, sx))


def test_sector_bases_span_the_parity_eigenspaces() -> None:
    conserved = _system(_chain(3)).conserved
    assert conserved is not None
    for sector, proj in zip(conserved.sectors, _qutip_parity_projectors(3), strict=True):
        assert sector.dim == 4
        np.testing.assert_allclose(sector.projector, proj, atol=1e-15)
        np.testing.assert_allclose(sector.basis.T @ sector.basis, np.eye(4), atol=1e-15)


# ----------------------------------------------------------------------------- the target
@pytest.mark.parametrize("n", [2, 3])
@pytest.mark.parametrize("s", [0.6, 1.0])
def test_sector_target_is_the_weighted_projection(n: int, s: float) -> None:
    # sum_p tr(Pi_p rho0) Pi_p exp(-beta H) Pi_p / tr(Pi_p exp(-beta H)), with QuTiP's parity
    # projectors and scipy's expm: an exact construction independent of the sector bases
    system = _system(_chain(n))
    h0, h = system.hamiltonian.matrix(0.0), system.hamiltonian.matrix(s)
    rho0 = _gibbs(h0)
    g = linalg.expm(-BETA * (h - np.linalg.eigvalsh(h)[0] * np.eye(len(h))))
    expected = sum(
        np.trace(p @ rho0) * (p @ g @ p) / np.trace(p @ g @ p) for p in _qutip_parity_projectors(n)
    )
    np.testing.assert_allclose(system.steady_state(s), expected, atol=1e-13)
    weights = [part.weight for part in system.sector_parts()]
    np.testing.assert_allclose(
        weights, [np.trace(p @ rho0).real for p in _qutip_parity_projectors(n)], atol=1e-14
    )
    # and it is not the Gibbs state of the whole space (the sectors are not thermalised)
    assert _trace_distance(system.steady_state(s) - _gibbs(h)) > 1e-2


@pytest.mark.parametrize("n", [2, 3])
def test_sector_target_is_qutip_steady_state_of_each_sector(n: int) -> None:
    # QuTiP 5 bloch_redfield_tensor (secular) of H(1) and the couplings restricted to each
    # parity sector; qutip.steadystate of each; weighted by the initial populations
    system = _system(_chain(n))
    h1 = system.hamiltonian.matrix(1.0)
    rho0 = system.initial_state()
    total = np.zeros_like(h1, dtype=complex)
    for proj in _qutip_parity_projectors(n):
        vals, vecs = np.linalg.eigh(proj)
        u = vecs[:, vals > 0.5]  # QuTiP-side basis of the sector (eigh, not ours)
        a_ops = [
            [qutip.Qobj(u.T @ a @ u), lambda w: float(DENSITY(np.array([w]))[0])]
            for a in system.bath.operators
        ]
        tensor = qutip.bloch_redfield_tensor(
            qutip.Qobj(u.T @ h1 @ u), a_ops, sec_cutoff=1e-6, fock_basis=True
        )
        ss = qutip.steadystate(tensor).full()
        total += np.trace(proj @ rho0) * (u @ ss @ u.T)
    np.testing.assert_allclose(system.target_state(), total, atol=1e-10)
    # L(1) of the full space has (at least) one steady state per sector
    assert system.spectrum(1.0).zero_count >= 2


def test_ground_start_populates_the_even_sector_only() -> None:
    system = _system(_chain(3), initial="ground")
    parts = {p.sector.name: p for p in system.sector_parts() if p.matters}
    assert list(parts) == ["even"]  # |+++> is even
    even = system.conserved.sectors[0].projector
    h1 = system.hamiltonian.matrix(1.0)
    g = linalg.expm(-BETA * (h1 - np.linalg.eigvalsh(h1)[0] * np.eye(8)))
    np.testing.assert_allclose(
        system.target_state(), even @ g @ even / np.trace(even @ g @ even), atol=1e-13
    )


def test_nonzero_fields_are_unaffected() -> None:
    system = _system(_chain(3, fields=0.2))
    assert system.conserved is None and system.sector_parts() == ()
    # bit-identical: the Gibbs state of the eigen-decomposition, as before
    assert np.array_equal(system.target_state(), system.eigen(1.0).target_state(system.target_beta))
    assert "conserved" not in system.diagnostics


# ----------------------------------------------------------------------------- refusals
def test_z_coupling_without_driver_is_still_refused() -> None:
    # Z coupling, zero fields, A(1) = 0: every classical state is stationary at s = 1, but
    # Z_i anticommutes with X^n, so nothing is conserved along the anneal: undetermined
    system = _system(_chain(2), coupling="z")
    assert system.conserved is None
    with pytest.raises(SteadyStateError) as err:
        system.preflight()
    assert err.value.field == "bath.coupling"
    assert "commute" in str(err.value) and "A(1) > 0" in str(err.value)


def test_a_sector_with_several_steady_states_is_refused() -> None:
    # qubit 2 has no coupling and no field: H(1) does not act on it, parity is conserved,
    # and each sector still has several steady states (truly undetermined)
    system = _system(ProblemSpec(3, (0.0, 0.0, 0.0), ((0, 1, -1.0),)))
    assert system.conserved is not None
    with pytest.raises(SteadyStateError) as err:
        system.preflight()
    assert "spin-flip parity" in str(err.value) and "qubit(s) 2" in str(err.value)


def test_initial_coherence_between_sectors_is_refused() -> None:
    plus = np.zeros(4)
    plus[0] = 1.0  # |00>: an equal superposition of the two parity sectors
    system = _system(_chain(2), initial=np.outer(plus, plus))
    with pytest.raises(SteadyStateError) as err:
        system.preflight()
    assert err.value.field == "initial.state" and "coherences between the sectors" in str(err.value)


# ----------------------------------------------------------------------------- dynamics
def _agree(system: System, k_end: int, tf: float) -> tuple[float, float]:
    sched = make_schedule("beta", k_start=0, k_end=k_end)
    gen = simulate(system, sched, tf, integrator="general")
    eig = simulate(system, sched, tf, integrator="eigenframe")
    assert gen.ok and eig.ok, (gen.message, eig.message)
    assert gen.integrator == "general" and eig.integrator == "eigenframe"
    assert eig.stats["conserved"] == "spin-flip parity (X^n)"
    assert any(w.startswith("conserved: spin-flip parity") for w in eig.warnings)
    rel = abs(gen.trace_distance - eig.trace_distance) / gen.trace_distance
    state = _trace_distance(gen.final_state - eig.final_state) / gen.trace_distance
    assert rel < 1e-6 and state < 1e-6, (rel, state)
    assert gen.ground_infidelity == pytest.approx(eig.ground_infidelity, rel=1e-6)
    return gen.trace_distance, eig.trace_distance


def test_two_qubit_chain_general_and_eigenframe_agree() -> None:
    system = _system(_chain(2))
    first, _ = _agree(system, 1, 10.0)
    second, _ = _agree(system, 1, 30.0)
    assert second < first


@pytest.mark.slow
def test_three_qubit_chain_general_and_eigenframe_agree() -> None:
    system = _system(_chain(3))
    first, _ = _agree(system, 2, 10.0)
    second, _ = _agree(system, 2, 30.0)
    assert second < first


def test_full_space_master_equation_gives_the_same_final_state() -> None:
    # drho/dx = tf L(s(x)) rho integrated directly on the whole space (no sectors, no
    # deviation): scipy's DOP853 on the dense Davies generator, which equals QuTiP's
    # secular Bloch-Redfield tensor away from s = 0 (test_davies.py)
    system = _system(_chain(2))
    sched = make_schedule("beta", k_start=0, k_end=1)
    tf = 10.0

    def rhs(x: float, y: np.ndarray) -> np.ndarray:
        return tf * (system.generator(float(sched(x))) @ y)

    rho0 = system.initial_state().reshape(-1, order="F").astype(complex)
    sol = solve_ivp(rhs, (0.0, 1.0), rho0, method="DOP853", rtol=1e-11, atol=1e-13)
    rho = sol.y[:, -1].reshape(4, 4, order="F")
    ours = simulate(system, sched, tf, integrator="general")
    assert _trace_distance(rho - ours.final_state) < 1e-9
    # measured 2026-12-02: 9.6e-9 relative on the trace distance
    assert ours.trace_distance == pytest.approx(
        _trace_distance(rho - system.target_state()), rel=1e-6
    )


@pytest.mark.parametrize(("n", "k_end"), [(2, 1), (3, 2)])
def test_error_law_and_its_predicted_coefficient(n: int, k_end: int) -> None:
    # open-system law tf^-(k_end+1) once tf is long against 1/gap(1) (14 ns and 24 ns
    # here), with C_k from the sectors' L_p(1) (Phys. Rev. A 98, 022315, 2018)
    system = _system(_chain(n))
    sched = make_schedule("beta", k_start=0, k_end=k_end)
    tfs = [1e3, 3e3, 1e4]
    td = [simulate(system, sched, tf, integrator="eigenframe").trace_distance for tf in tfs]
    slopes = np.diff(np.log(td)) / np.diff(np.log(tfs))
    assert np.all(np.abs(slopes + (k_end + 1)) < 0.01), slopes
    pred = predicted_coefficient(system, sched)
    assert pred.status == "ok" and "spin-flip parity" in pred.message
    assert td[-1] * tfs[-1] ** (k_end + 1) == pytest.approx(pred.coefficient, rel=1e-3)


# ----------------------------------------------------------------------------- CLI
def test_ferromagnetic_and_antiferromagnetic_rings_are_equivalent() -> None:
    # On a bipartite graph, X on one sublattice (sites 1, 3 of a 4-ring) maps J -> -J
    # and h_1, h_3 -> -h_1, -h_3, and leaves the X driver, the X coupling operators, the
    # parity X^n and the Gibbs start alone: the trace distance is the same (an exact
    # gauge equivalence; common practice, no source).  The eigenframe sees other level
    # orders, crossings and sector groupings on the two sides.
    bonds = ((0, 1), (1, 2), (2, 3), (0, 3))
    f = make_schedule("beta", k_end=1)

    def ring(sign: float, h: tuple[float, ...]) -> float:
        problem = ProblemSpec(4, h, tuple((i, j, sign) for i, j in bonds))
        res = simulate(_system(problem), f, 100.0)
        assert res.integrator == "eigenframe"
        return res.trace_distance

    # at 100 ns the zero-field trace distance (4.7e-6) stands far above the numerical
    # floor; at 300 ns (2.6e-8) summation order alone moved it by 1.3e-5 relative, and
    # the general integrator's two signs were 1.4e-6 apart (measured 3 Dec 2026)
    zero = (0.0,) * 4
    ferro = ring(-1.0, zero)
    assert ferro > 1e-6  # well above the numerical floor
    assert ring(1.0, zero) == pytest.approx(ferro, rel=1e-6)  # both with a parity
    uniform, staggered = (0.05,) * 4, (0.05, -0.05, 0.05, -0.05)
    ferro_h = ring(-1.0, uniform)
    assert ring(1.0, staggered) == pytest.approx(ferro_h, rel=1e-6)  # no parity
    # the check can fail: the same fields on the other sign are another problem
    assert abs(ring(1.0, uniform) - ferro_h) > 1e-3 * ferro_h


SPEC = """
version = 1
[problem]
qubits = 2
h = [0.0, 0.0]
J = [[0, 1, -1.0]]
[bath]
coupling = "x"
[schedule]
family = "beta"
k_end = 1
tf_ns = 1000.0
"""


def test_cli_simulate_names_the_conserved_parity(run_cli, write_spec) -> None:
    path = write_spec(SPEC)
    code, out, err = run_cli("simulate", path)
    assert code == 0, err
    assert "conserved       spin-flip parity (X^n): target = Gibbs state per sector" in out
    assert "warning: conserved: spin-flip parity (X^n)" in err
    code, out, err = run_cli("simulate", path, "--json")
    data = json.loads(out)
    assert data["status"] == "ok" and data["stats"]["conserved"] == "spin-flip parity (X^n)"
    assert set(data["stats"]["sector_weights"]) == {"even", "odd"}
