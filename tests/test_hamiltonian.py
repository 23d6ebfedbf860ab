"""H(s), Pauli operators: checked against QuTiP's operators and explicit Kronecker products."""

from __future__ import annotations

import numpy as np
import pytest
import qutip

from schedforge.device import LinearCurves
from schedforge.errors import InputError
from schedforge.hamiltonian import AnnealingHamiltonian, pauli_operator
from schedforge.spec_model import ProblemSpec

TWO_PI = 2 * np.pi


@pytest.mark.parametrize("kind", ["x", "y", "z", "i"])
@pytest.mark.parametrize("n", [1, 2, 3])
def test_pauli_matches_qutip_tensor(kind: str, n: int) -> None:
    # reference: QuTiP's sigma operators and tensor (qubit 0 = leftmost factor)
    single = {"x": qutip.sigmax(), "y": qutip.sigmay(), "z": qutip.sigmaz(), "i": qutip.qeye(2)}
    for q in range(n):
        factors = [qutip.qeye(2)] * n
        factors[q] = single[kind]
        ref = qutip.tensor(factors).full()
        np.testing.assert_array_equal(pauli_operator(kind, q, n), ref)
        np.testing.assert_array_equal(pauli_operator(kind, q, n, as_sparse=True).toarray(), ref)


def test_pauli_eight_qubits_is_cheap_and_correct() -> None:
    z = pauli_operator("z", 7, 8, as_sparse=True)
    assert z.shape == (256, 256) and z.nnz == 256
    x = pauli_operator("x", 0, 8, as_sparse=True)
    ref = np.kron(np.array([[0, 1], [1, 0]]), np.eye(128))
    np.testing.assert_array_equal(x.toarray(), ref)


def _reference_h(
    s: float, a0: float, b0: float, h: list[float], J: list[tuple[int, int, float]]
) -> np.ndarray:
    n = len(h)
    sx, sz = qutip.sigmax(), qutip.sigmaz()

    def op(o: qutip.Qobj, q: int) -> qutip.Qobj:
        f = [qutip.qeye(2)] * n
        f[q] = o
        return qutip.tensor(f)

    drv = sum(op(sx, q) for q in range(n))
    prob = sum(h[q] * op(sz, q) for q in range(n))
    for i, j, v in J:
        prob = prob + v * op(sz, i) * op(sz, j)
    a, b = a0 * (1 - s), b0 * s
    return (TWO_PI * (-(a / 2) * drv + (b / 2) * prob)).full()


@pytest.mark.parametrize("s", [0.0, 0.37, 1.0])
def test_h_of_s_matches_qutip_construction(s: float) -> None:
    h, J = [0.7, -0.3, 0.2], [(0, 1, 1.0), (1, 2, -0.5)]
    ham = AnnealingHamiltonian(LinearCurves(3.5, 2.5), ProblemSpec(3, tuple(h), tuple(J)))
    np.testing.assert_allclose(ham.matrix(s), _reference_h(s, 3.5, 2.5, h, J), rtol=0, atol=1e-12)
    assert ham.dim == 8 and ham.n_qubits == 3
    assert np.isrealobj(ham.matrix(s))


def test_derivatives_are_exact_for_linear_curves() -> None:
    # dH/ds = 2 pi (A0/2 sum X + B0/2 H_p), d2H/ds2 = 0 (closed form for linear curves)
    ham = AnnealingHamiltonian(LinearCurves(3.5, 2.5), ProblemSpec(2, (0.7, 0.1), ((0, 1, 1.0),)))
    expected = _reference_h(1.0, 0.0, 2.5, [0.7, 0.1], [(0, 1, 1.0)]) - _reference_h(
        0.0, 3.5, 0.0, [0.7, 0.1], [(0, 1, 1.0)]
    )
    np.testing.assert_allclose(ham.derivative(0.4), expected, atol=1e-12)
    np.testing.assert_allclose(ham.derivative(0.4, 2), 0.0, atol=0)
    h, dh = ham.matrix_and_derivative(0.4)
    np.testing.assert_allclose(h, ham.matrix(0.4), atol=0)
    np.testing.assert_allclose(dh, ham.derivative(0.4), atol=0)


@pytest.mark.parametrize(
    ("problem", "field"),
    [
        (ProblemSpec(2, (0.1,), ()), "problem.h"),
        (ProblemSpec(2, (0.1, 0.2), ((1, 0, 1.0),)), "problem.J[0]"),
        (ProblemSpec(2, (0.1, 0.2), ((0, 1, 1.0), (0, 1, 2.0))), "problem.J[1]"),
        (ProblemSpec(0, (), ()), "problem.qubits"),
    ],
)
def test_bad_problem_names_the_field(problem: ProblemSpec, field: str) -> None:
    with pytest.raises(InputError) as err:
        AnnealingHamiltonian(LinearCurves(1.0, 1.0), problem)
    assert err.value.field == field


@pytest.mark.parametrize(
    ("problem", "field"),
    [
        ({"qubits": 9, "h": [0.0] * 9}, "problem.qubits"),  # MAX_QUBITS = 8 on both paths
        ({"qubits": 2, "h": [0.1, 2e6]}, "problem.h[1]"),
        ({"qubits": 2, "h": [0.1, 0.2], "J": [[-1, 1, 1.0]]}, "problem.J[0][0]"),
        ({"qubits": 2, "h": [0.1, 0.2], "J": [[0, 1, float("inf")]]}, "problem.J[0][2]"),
    ],
)
def test_problem_rules_are_the_same_from_toml_and_from_python(
    problem: dict[str, object], field: str
) -> None:
    from schedforge.spec import parse_spec

    with pytest.raises(InputError) as from_toml:
        parse_spec({"version": 1, "problem": problem})
    python_problem = ProblemSpec(
        problem["qubits"],  # type: ignore[arg-type]
        tuple(problem["h"]),  # type: ignore[arg-type]
        tuple(tuple(c) for c in problem.get("J", [])),  # type: ignore[attr-defined]
    )
    with pytest.raises(InputError) as from_python:
        AnnealingHamiltonian(LinearCurves(1.0, 1.0), python_problem)
    assert from_toml.value.field == from_python.value.field == field
    assert str(from_toml.value) == str(from_python.value)
