"""The annealing Hamiltonian H(s) of a small spin system.

.. math::

    H(s) = 2\\pi \\left[ -\\frac{A(s)}{2} \\sum_i X_i
           + \\frac{B(s)}{2} \\Big( \\sum_i h_i Z_i + \\sum_{i<j} J_{ij} Z_i Z_j \\Big) \\right]

with A(s), B(s) the device curves (E/h in GHz); the factor 2 pi converts to the
internal angular frequencies (rad/ns, hbar = 1).

Qubit ordering: qubit 0 is the leftmost factor of the Kronecker product (the
most significant bit of a basis index), as in QuTiP's ``tensor``.  The basis
state ``|0>`` has Z = +1.

Pauli operators are built from bit operations on basis indices, never from
Kronecker products of large matrices, so 8 qubits (d = 256) are cheap.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import sparse

from .checks import integer, number, shown
from .device_curves import DeviceCurves
from .errors import InputError
from .limits import MAX_COEFFICIENT, MAX_QUBITS
from .spec_model import ProblemSpec
from .units import GHZ_TO_RAD_PER_NS

__all__ = [
    "AnnealingHamiltonian",
    "check_problem",
    "driver_matrix",
    "ising_diagonal",
    "pauli_operator",
]

_KINDS = ("i", "x", "y", "z")


def pauli_operator(
    kind: str, qubit: int, n: int, *, as_sparse: bool = False
) -> NDArray[Any] | sparse.csr_matrix:
    """The Pauli operator ``kind`` acting on ``qubit`` of ``n`` qubits.

    Parameters
    ----------
    kind : {"x", "y", "z", "i"}
        Which Pauli matrix (case-insensitive).
    qubit : int
        Qubit index, 0 is the leftmost Kronecker factor.
    n : int
        Number of qubits (the dimension is ``2**n``).
    as_sparse : bool
        Return a ``scipy.sparse.csr_matrix`` instead of a dense array.

    Returns
    -------
    ndarray or csr_matrix
        ``(2**n, 2**n)``; real for x, z, i and complex for y.

    Examples
    --------
    >>> pauli_operator("z", 0, 1)
    array([[ 1.,  0.],
           [ 0., -1.]])
    """
    k = str(kind).lower()
    if k not in _KINDS:
        raise ValueError(f"kind must be one of x, y, z, i; got {kind!r}")
    if not (0 <= qubit < n):
        raise ValueError(f"qubit must be in [0, {n}), got {qubit}")
    d = 2**n
    idx = np.arange(d)
    bit = (idx >> (n - 1 - qubit)) & 1
    sign = 1.0 - 2.0 * bit  # Z eigenvalue of each basis state
    if k == "i":
        rows, cols, vals = idx, idx, np.ones(d)
    elif k == "z":
        rows, cols, vals = idx, idx, sign
    else:
        flipped = idx ^ (1 << (n - 1 - qubit))
        rows, cols = flipped, idx  # X|b> = |b xor bit>
        # Y = i X Z: Y|b> = i (-1)^b |b xor bit>
        vals = np.ones(d) if k == "x" else 1j * sign
    mat = sparse.csr_matrix((vals, (rows, cols)), shape=(d, d))
    return mat if as_sparse else mat.toarray()


def driver_matrix(n: int) -> NDArray[np.float64]:
    """The bare driver ``sum_i X_i`` on ``n`` qubits (dense, real)."""
    d = 2**n
    out = np.zeros((d, d))
    idx = np.arange(d)
    for q in range(n):
        out[idx ^ (1 << (n - 1 - q)), idx] += 1.0
    return out


def ising_diagonal(
    n: int, h: tuple[float, ...] | list[float], J: tuple[tuple[int, int, float], ...] | list[Any]
) -> NDArray[np.float64]:
    """Diagonal of ``sum_i h_i Z_i + sum_(i<j) J_ij Z_i Z_j`` in the computational basis."""
    idx = np.arange(2**n)
    z = np.array([1.0 - 2.0 * ((idx >> (n - 1 - q)) & 1) for q in range(n)])
    diag = np.zeros(2**n)
    for q in range(n):
        diag += float(h[q]) * z[q]
    for i, j, val in J:
        diag += float(val) * z[int(i)] * z[int(j)]
    return diag


def check_problem(problem: ProblemSpec) -> ProblemSpec:
    """The ``[problem]`` section's rules; the one validator of the TOML and Python paths.

    Parameters
    ----------
    problem : ProblemSpec
        Built by the spec reader (types already read from TOML) or in Python.

    Returns
    -------
    ProblemSpec
        With plain ``int`` / ``float`` values in tuples.

    Raises
    ------
    InputError
        Naming the field (``problem.qubits``, ``problem.h[1]``, ``problem.J[2][0]``...):
        1 to :data:`~schedforge.limits.MAX_QUBITS` qubits, one field per qubit,
        coefficients within :data:`~schedforge.limits.MAX_COEFFICIENT`, couplings
        ``[i, j, J_ij]`` with 0 <= i < j < qubits, each pair once.
    """
    n = integer(problem.qubits, "problem.qubits", ge=1, le=MAX_QUBITS)
    if isinstance(problem.h, str) or not isinstance(problem.h, Sequence):
        raise InputError("problem.h", f"must be an array, got {shown(problem.h)}")
    if len(problem.h) != n:
        raise InputError("problem.h", f"must have one entry per qubit ({n}), got {len(problem.h)}")
    h = tuple(_coefficient(v, f"problem.h[{i}]") for i, v in enumerate(problem.h))
    if isinstance(problem.J, str) or not isinstance(problem.J, Sequence):
        raise InputError("problem.J", f"must be an array, got {shown(problem.J)}")
    pairs: set[tuple[int, int]] = set()
    couplings = []
    for idx, entry in enumerate(problem.J):
        where = f"problem.J[{idx}]"
        if isinstance(entry, str) or not isinstance(entry, Sequence) or len(entry) != 3:
            raise InputError(where, f"must be an array [i, j, J_ij], got {shown(entry)}")
        i = integer(entry[0], f"{where}[0]", ge=0)
        j = integer(entry[1], f"{where}[1]", ge=0)
        value = _coefficient(entry[2], f"{where}[2]")
        if not i < j < n:
            raise InputError(
                where, f"must have qubit indices 0 <= i < j < qubits ({n}), got i={i}, j={j}"
            )
        if (i, j) in pairs:
            raise InputError(where, f"repeats the pair ({i}, {j}); give each pair once")
        pairs.add((i, j))
        couplings.append((i, j, value))
    return ProblemSpec(qubits=n, h=h, J=tuple(couplings))


def _coefficient(value: object, path: str) -> float:
    return number(value, path, ge=-MAX_COEFFICIENT, le=MAX_COEFFICIENT)


class AnnealingHamiltonian:
    """H(s) = 2 pi [-(A(s)/2) sum_i X_i + (B(s)/2) H_problem] in rad/ns.

    Parameters
    ----------
    curves : DeviceCurves
        A(s), B(s) in GHz with exact derivatives.
    problem : ProblemSpec
        Number of qubits, fields ``h`` and couplings ``J`` (dimensionless);
        checked by :func:`check_problem`.

    Attributes
    ----------
    n_qubits, dim : int
        Number of qubits and Hilbert-space dimension ``2**n_qubits``.
    driver : ndarray
        The bare driver ``sum_i X_i`` (real, dense).
    problem_matrix : ndarray
        The bare problem ``sum h_i Z_i + sum J_ij Z_i Z_j`` (real diagonal, dense).
    problem_diagonal : ndarray
        Its diagonal.
    curves : DeviceCurves
        The device curves.
    """

    def __init__(self, curves: DeviceCurves, problem: ProblemSpec) -> None:
        checked = check_problem(problem)
        n = checked.qubits
        self.curves = curves
        self.problem = problem
        self.n_qubits = n
        self.dim = 2**n
        self.h = checked.h
        self.J = checked.J
        self.driver = driver_matrix(n)
        self.problem_diagonal = ising_diagonal(n, self.h, self.J)
        self.problem_matrix = np.diag(self.problem_diagonal)

    def _combine(self, a_ghz: float, b_ghz: float) -> NDArray[np.float64]:
        out = (-0.5 * GHZ_TO_RAD_PER_NS * a_ghz) * self.driver
        out.flat[:: self.dim + 1] += (0.5 * GHZ_TO_RAD_PER_NS * b_ghz) * self.problem_diagonal
        return out

    def coefficients(self, s: float, order: int = 0) -> NDArray[np.float64]:
        """A, B (GHz) and their s-derivatives up to ``order``: shape ``(2, order + 1)``."""
        return self.curves.derivatives(float(s), order)

    def matrix(self, s: float) -> NDArray[np.float64]:
        """H(s) in rad/ns (real symmetric, ``(dim, dim)``)."""
        ab = self.coefficients(s, 0)
        return self._combine(ab[0, 0], ab[1, 0])

    def derivative(self, s: float, order: int = 1) -> NDArray[np.float64]:
        """d^n H / ds^n at s in rad/ns, from the curves' exact derivatives."""
        if order < 0:
            raise ValueError("order must be >= 0")
        ab = self.coefficients(s, order)
        return self._combine(ab[0, order], ab[1, order])

    def matrix_and_derivative(self, s: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """H(s) and dH/ds with a single evaluation of the curves."""
        ab = self.coefficients(s, 1)
        return self._combine(ab[0, 0], ab[1, 0]), self._combine(ab[0, 1], ab[1, 1])

    def scale(self) -> float:
        """A bound on ||H(s)|| over the anneal (rad/ns), for tolerances."""
        grid = np.linspace(0.0, 1.0, 5)
        ab = np.abs(self.curves.derivatives(grid, 0)[:, 0])
        return float(
            0.5
            * GHZ_TO_RAD_PER_NS
            * (ab[0].max() * self.n_qubits + ab[1].max() * np.abs(self.problem_diagonal).max())
        )

    def describe(self) -> dict[str, Any]:
        """Metadata for headers and reports."""
        return {"qubits": self.n_qubits, "h": list(self.h), "J": [list(c) for c in self.J]}

    def __repr__(self) -> str:
        return f"AnnealingHamiltonian(n_qubits={self.n_qubits}, curves={self.curves.describe()})"
