"""The Davies generator: an independent textbook construction, QuTiP's Bloch-Redfield tensor,
detailed balance, Lindblad structure, the spectral gap and the uniqueness check."""

from __future__ import annotations

import numpy as np
import pytest
import qutip
from scipy import linalg

from schedforge.bath import Bath, OhmicSpectralDensity
from schedforge.device import LinearCurves
from schedforge.errors import SteadyStateError
from schedforge.hamiltonian import AnnealingHamiltonian, pauli_operator
from schedforge.spec_model import ProblemSpec
from schedforge.system import System
from schedforge.units import beta_from_mk

BETA = beta_from_mk(12.0)
DENSITY = OhmicSpectralDensity(1e-3, 2 * np.pi * 8.0, BETA)

PROBLEMS = {
    "1q": ProblemSpec(1, (0.7,), ()),
    "2q-generic": ProblemSpec(2, (0.7, -0.4), ((0, 1, 0.9),)),
    "2q-degenerate": ProblemSpec(2, (0.5, 0.5), ((0, 1, 1.0),)),  # symmetric: degenerate levels
    "3q-uniform": ProblemSpec(3, (0.3, 0.3, 0.3), ((0, 1, 1.0), (1, 2, 1.0), (0, 2, 1.0))),
}


def _system(problem: ProblemSpec, coupling: str = "x", lamb: bool = False) -> System:
    ham = AnnealingHamiltonian(LinearCurves(3.5, 2.5), problem)
    ops = tuple(pauli_operator(coupling, q, problem.qubits) for q in range(problem.qubits))
    return System(ham, Bath(DENSITY, ops, lamb_shift=lamb))


def _textbook_generator(
    h: np.ndarray, ops: tuple[np.ndarray, ...], gamma, shift=None, tol=1e-7
) -> np.ndarray:
    """Davies generator written as in Albash et al. (NJP 14, 123016, 2012), column-stacking vec.

    Loops over distinct levels and distinct Bohr frequencies with explicit spectral
    projectors: slow, obvious, and independent of the vectorised implementation.
    """
    d = h.shape[0]
    e, v = np.linalg.eigh(h)
    levels: list[float] = []
    projectors: list[np.ndarray] = []
    for k in range(d):
        if levels and abs(e[k] - levels[-1]) < tol:
            projectors[-1] = projectors[-1] + np.outer(v[:, k], v[:, k].conj())
        else:
            levels.append(e[k])
            projectors.append(np.outer(v[:, k], v[:, k].conj()))
    freqs: list[float] = []
    for e1 in levels:
        for e2 in levels:
            w = e2 - e1
            if not any(abs(w - f) < tol for f in freqs):
                freqs.append(w)
    eye = np.eye(d)
    hls = np.zeros((d, d), complex)
    sup = np.zeros((d * d, d * d), complex)
    for a in ops:
        for w in freqs:
            lw = np.zeros((d, d), complex)
            for i, e1 in enumerate(levels):
                for j, e2 in enumerate(levels):
                    if abs((e2 - e1) - w) < tol:
                        lw += projectors[i] @ a @ projectors[j]
            g = float(gamma(np.array([w]))[0])
            ldl = lw.conj().T @ lw
            sup += g * (
                np.kron(lw.conj(), lw) - 0.5 * np.kron(eye, ldl) - 0.5 * np.kron(ldl.T, eye)
            )
            if shift is not None:
                hls += float(shift(np.array([w]))[0]) * ldl
    htot = h + hls
    sup += -1j * (np.kron(eye, htot) - np.kron(htot.T, eye))
    return sup


@pytest.mark.parametrize("name", list(PROBLEMS))
@pytest.mark.parametrize("s", [0.0, 0.35, 1.0])
def test_generator_matches_textbook_construction(name: str, s: float) -> None:
    system = _system(PROBLEMS[name])
    ref = _textbook_generator(system.hamiltonian.matrix(s), system.bath.operators, DENSITY)
    got = system.generator(s)
    scale = np.abs(ref).max()
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-12 * scale)


def test_generator_with_lamb_shift_matches_textbook_construction() -> None:
    system = _system(PROBLEMS["2q-degenerate"], lamb=True)
    s = 0.6
    ref = _textbook_generator(
        system.hamiltonian.matrix(s),
        system.bath.operators,
        DENSITY,
        shift=system.bath.lamb_shift_at,
    )
    np.testing.assert_allclose(system.generator(s), ref, rtol=0, atol=1e-12 * np.abs(ref).max())


@pytest.mark.parametrize("name", ["2q-generic", "2q-degenerate"])
def test_generator_matches_qutip_bloch_redfield_tensor(name: str) -> None:
    # QuTiP's secular Bloch-Redfield tensor (QuTiP 5, bloch_redfield_tensor) for a static H; in the
    # strict secular limit it is the Davies generator.  Both use column-stacking superoperators.
    system = _system(PROBLEMS[name])
    s = 0.45
    h = qutip.Qobj(system.hamiltonian.matrix(s), dims=[[2, 2], [2, 2]])
    a_ops = [
        [qutip.Qobj(a, dims=[[2, 2], [2, 2]]), lambda w: float(DENSITY(np.array([w]))[0])]
        for a in system.bath.operators
    ]
    tensor = qutip.bloch_redfield_tensor(h, a_ops, sec_cutoff=1e-6, fock_basis=True)
    ref = tensor.full()
    np.testing.assert_allclose(system.generator(s), ref, rtol=0, atol=1e-10 * np.abs(ref).max())


@pytest.mark.parametrize("name", list(PROBLEMS))
@pytest.mark.parametrize("s", [0.3, 0.8, 1.0])
def test_steady_state_is_gibbs(name: str, s: float) -> None:
    # detailed balance (KMS) => the Davies generator's steady state is exp(-beta H)/Z
    # (Davies, Commun. Math. Phys. 39, 91, 1974); Gibbs state from scipy.linalg.expm
    system = _system(PROBLEMS[name])
    h = system.hamiltonian.matrix(s)
    gibbs = linalg.expm(-BETA * (h - np.linalg.eigvalsh(h)[0] * np.eye(len(h))))
    gibbs /= np.trace(gibbs)
    np.testing.assert_allclose(system.steady_state(s), gibbs, atol=1e-13)
    gen = system.davies(s)
    np.testing.assert_allclose(gen.steady_state_numeric(), gibbs, atol=1e-11)
    # and it is annihilated by the generator, to rounding
    assert np.abs(gen.apply(gibbs)).max() < 1e-13 * np.abs(gen.superoperator()).max()


@pytest.mark.parametrize("name", ["1q", "2q-degenerate", "3q-uniform"])
def test_lindblad_structure(name: str) -> None:
    """Trace and Hermiticity preserved; conditionally completely positive (Lindblad form)."""
    system = _system(PROBLEMS[name])
    d = system.dim
    sup = system.generator(0.5)
    vec_id = np.eye(d).reshape(-1, order="F")
    assert np.abs(vec_id.conj() @ sup).max() < 1e-12 * np.abs(sup).max()  # tr L(X) = 0
    rng = np.random.default_rng(1)
    x = rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d))
    lx = system.davies(0.5).apply(x)
    lxh = system.davies(0.5).apply(x.conj().T)
    np.testing.assert_allclose(lxh, lx.conj().T, atol=1e-12 * np.abs(lx).max())
    # column-stacking convention: vec(L(X)) = S vec(X)
    np.testing.assert_allclose(
        sup @ x.reshape(-1, order="F"), lx.reshape(-1, order="F"), atol=1e-12 * np.abs(lx).max()
    )
    # Choi matrix of L, projected off the maximally entangled vector, is PSD
    choi = np.zeros((d * d, d * d), complex)
    for i in range(d):
        for j in range(d):
            e = np.zeros((d, d))
            e[i, j] = 1.0
            choi += np.kron(e, system.davies(0.5).apply(e))
    omega = np.eye(d).reshape(-1) / np.sqrt(d)
    q = np.eye(d * d) - np.outer(omega, omega)
    assert np.linalg.eigvalsh(q @ choi @ q).min() > -1e-12 * np.abs(choi).max()


def test_gap_of_a_qubit_is_analytic() -> None:
    # H(1) = (B0 h / 2) Z, X coupling: populations relax at gamma(w) + gamma(-w) = 1/T1 and the
    # coherences at half that (T2 = 2 T1, no pure dephasing) (Breuer & Petruccione 2002, sec. 3.4)
    system = _system(PROBLEMS["1q"])
    w = 2 * np.pi * 2.5 * 0.7
    rate = float(DENSITY(np.array([w]))[0] + DENSITY(np.array([-w]))[0])
    spec = system.spectrum(1.0)
    assert spec.zero_count == 1
    assert spec.gap == pytest.approx(rate / 2, rel=1e-12)
    ev = np.sort_complex(spec.eigenvalues)
    np.testing.assert_allclose(
        sorted(ev.real), sorted([-rate, -rate / 2, -rate / 2, 0.0]), atol=1e-15
    )


def test_gap_agrees_with_dense_eigenvalues() -> None:
    system = _system(PROBLEMS["3q-uniform"])
    for s in (0.2, 0.7):
        dense = np.linalg.eigvals(system.generator(s))
        re = np.sort(np.abs(dense.real))
        assert system.spectrum(s).gap == pytest.approx(re[1], rel=1e-8)


def test_assembly_entries_counts_the_sparse_form() -> None:
    # at s = 0 the 3-qubit driver is degenerate: Bohr groups enter as Kronecker products
    system = _system(PROBLEMS["3q-uniform"])
    for s in (0.0, 0.7):
        gen = system.davies(s)
        assert gen.assembly_entries() >= gen.sparse_eigen(coherent=False).nnz


def test_preflight_skips_generators_too_large_to_assemble(monkeypatch) -> None:
    import schedforge.system as dyn

    full = _system(PROBLEMS["3q-uniform"])
    full.preflight()
    s_min = full.diagnostics["s_at_liouvillian_gap_min"]
    limit = full.davies(0.0).assembly_entries() - 1  # s = 0 (degenerate) is over the limit
    assert all(full.davies(s).assembly_entries() <= limit for s in (0.1, 0.5, 1.0))
    monkeypatch.setattr(dyn, "PREFLIGHT_MAX_ENTRIES", limit)
    system = _system(PROBLEMS["3q-uniform"])
    warnings = system.preflight()
    assert any("not scanned at s = 0:" in w for w in warnings)
    if s_min != 0.0:  # the scan of the other points is unchanged
        assert system.diagnostics["liouvillian_gap_min_ghz"] == pytest.approx(
            full.diagnostics["liouvillian_gap_min_ghz"], rel=1e-12
        )


def test_non_unique_final_steady_state_is_refused() -> None:
    # Z coupling commutes with H(1) = (B/2) H_problem when A(1) = 0: populations never relax.
    system = _system(PROBLEMS["2q-generic"], coupling="z")
    assert system.spectrum(1.0).zero_count == 4
    with pytest.raises(SteadyStateError) as err:
        system.preflight()
    assert err.value.field == "bath.coupling"
    assert "commute" in str(err.value) and "x" in str(err.value)


@pytest.mark.parametrize("name", ["1q", "2q-generic", "2q-degenerate", "3q-uniform"])
@pytest.mark.parametrize("thermal", [True, False])
def test_target_state_derivative_matches_finite_differences(name: str, thermal: bool) -> None:
    # d sigma / ds (Daleckii-Krein, used by the integrators) against a 4th-order central
    # difference of exp(-beta H(s)) / Z from scipy.linalg.expm (or of the ground projector)
    system = _system(PROBLEMS[name])
    beta = BETA if thermal else None
    s, h = 0.55, 1e-4

    def sigma(x: float) -> np.ndarray:
        hm = system.hamiltonian.matrix(x)
        if beta is None:
            v = np.linalg.eigh(hm)[1][:, :1]
            return v @ v.conj().T
        g = linalg.expm(-beta * (hm - np.linalg.eigvalsh(hm)[0] * np.eye(len(hm))))
        return g / np.trace(g)

    fd = (-sigma(s + 2 * h) + 8 * sigma(s + h) - 8 * sigma(s - h) + sigma(s - 2 * h)) / (12 * h)
    eig = system.eigen(s)
    if beta is None and eig.ground_multiplicity > 1:
        pytest.skip("ground projector derivative needs a non-degenerate ground level")
    got = eig.from_eigen(
        eig.target_derivative_eigen(eig.to_eigen(system.hamiltonian.derivative(s)), beta)
    )
    np.testing.assert_allclose(got, fd, atol=1e-8 * max(1.0, np.abs(fd).max()))
