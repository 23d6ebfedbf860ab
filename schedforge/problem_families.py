"""Ising problems as arrays, and families of them generated reproducibly from a seed.

An :class:`IsingProblem` is H_p = sum_i h_i Z_i + sum_(i<j) J_ij Z_i Z_j on ``n``
qubits (dimensionless), stored as arrays: the fields ``h`` (length n) and the
couplings as index arrays ``i``, ``j`` (``i < j``) with values ``J``.  It converts
to and from :class:`~schedforge.spec_model.ProblemSpec`.

A *family* is a graph (``chain``, ``ring``, ``grid``, ``complete``) with a coupling
distribution (``sign``: J_ij = +-1 with equal probability; ``gaussian``: J_ij from
N(0, 1)) and optional fields (``none``, ``sign``, ``gaussian``, scaled by
``field_scale``).  :func:`make_problem` draws instance ``instance`` of a family of
a given size from ``numpy.random.SeedSequence([seed, size, instance])``, so the
same (seed, size, instance) gives the same problem on any machine and in any order.

Sizes: ``chain``, ``ring`` and ``complete`` take the number of qubits; ``grid``
takes the number of qubits too and uses the most nearly square ``rows x cols``
with ``rows <= cols`` (a prime size gives a 1 x n strip, i.e. a chain); an
explicit shape can be given as ``grid_shape``.  A ``ring`` needs at least 3 qubits.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .errors import InputError

__all__ = [
    "COUPLING_KINDS",
    "FIELD_KINDS",
    "GRAPHS",
    "IsingProblem",
    "graph_edges",
    "grid_shape",
    "make_problem",
]

#: Graphs of the generated families.
GRAPHS = ("chain", "ring", "grid", "complete")
#: Distributions of the couplings J_ij.
COUPLING_KINDS = ("sign", "gaussian")
#: Distributions of the fields h_i ("none": all zero).
FIELD_KINDS = ("none", "sign", "gaussian")


@dataclass(frozen=True, eq=False)
class IsingProblem:
    """H_p = sum_i h_i Z_i + sum_k J_k Z_(i_k) Z_(j_k) on ``n`` qubits.

    Parameters
    ----------
    h : array_like
        Fields, one per qubit.
    i, j : array_like of int
        Coupled pairs, ``0 <= i < j < n``, each pair once.
    J : array_like
        Coupling values, one per pair.
    label : str
        A short description (for tables).

    Notes
    -----
    The spin of qubit ``q`` in basis state ``index`` is ``+1`` when bit
    ``n - 1 - q`` of ``index`` is 0 (``|0>`` has Z = +1, qubit 0 is the most
    significant bit), as in :mod:`schedforge.hamiltonian`.
    """

    h: NDArray[np.float64]
    i: NDArray[np.int64]
    j: NDArray[np.int64]
    J: NDArray[np.float64]
    label: str = field(default="")

    def __post_init__(self) -> None:
        h = np.array(self.h, dtype=float).ravel()
        i = np.array(self.i, dtype=np.int64).ravel()
        j = np.array(self.j, dtype=np.int64).ravel()
        J = np.array(self.J, dtype=float).ravel()
        n = h.size
        if n < 1:
            raise InputError("problem.h", "must have at least one qubit")
        if not (i.size == j.size == J.size):
            raise InputError("problem.J", "needs as many i, j and J_ij values")
        if i.size and (np.any(i < 0) or np.any(j >= n) or np.any(i >= j)):
            raise InputError("problem.J", f"needs qubit indices 0 <= i < j < {n}")
        if len(set(zip(i.tolist(), j.tolist(), strict=True))) != i.size:
            raise InputError("problem.J", "repeats a pair; give each pair once")
        if not (np.all(np.isfinite(h)) and np.all(np.isfinite(J))):
            raise InputError("problem", "needs finite fields and couplings")
        for name, arr in (("h", h), ("i", i), ("j", j), ("J", J)):
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)

    @property
    def n(self) -> int:
        """Number of qubits."""
        return int(self.h.size)

    @property
    def n_couplings(self) -> int:
        """Number of coupled pairs."""
        return int(self.J.size)

    def coefficients(self) -> NDArray[np.float64]:
        """All programmed coefficients ``[h_0 .. h_(n-1), J_0 .. J_(m-1)]``."""
        return np.concatenate([self.h, self.J])

    def scale(self) -> float:
        """The largest |h_i|, |J_ij| (0 for an empty problem)."""
        c = self.coefficients()
        return float(np.max(np.abs(c))) if c.size else 0.0

    def with_coefficients(self, coefficients: ArrayLike) -> IsingProblem:
        """The same graph with new ``[h, J]`` values (see :meth:`coefficients`)."""
        c = np.asarray(coefficients, dtype=float).ravel()
        if c.size != self.n + self.n_couplings:
            raise ValueError(f"expected {self.n + self.n_couplings} coefficients, got {c.size}")
        return IsingProblem(c[: self.n], self.i, self.j, c[self.n :], label=self.label)

    def energies(self, spins: ArrayLike) -> NDArray[np.float64]:
        """Energies of spin configurations, ``spins`` of shape ``(..., n)`` with +-1 entries."""
        s = np.asarray(spins, dtype=float)
        return s @ self.h + (s[..., self.i] * s[..., self.j]) @ self.J

    @classmethod
    def from_spec(cls, problem: Any) -> IsingProblem:
        """From a :class:`~schedforge.spec_model.ProblemSpec`."""
        triples = list(problem.J)
        i = [int(t[0]) for t in triples]
        j = [int(t[1]) for t in triples]
        J = [float(t[2]) for t in triples]
        return cls(np.asarray(problem.h, dtype=float), i, j, J, label="spec problem")

    def to_spec(self) -> Any:
        """As a :class:`~schedforge.spec_model.ProblemSpec` (for the dynamics)."""
        from .spec_model import ProblemSpec

        return ProblemSpec(
            qubits=self.n,
            h=tuple(float(x) for x in self.h),
            J=tuple(
                (int(a), int(b), float(v))
                for a, b, v in zip(self.i.tolist(), self.j.tolist(), self.J.tolist(), strict=True)
            ),
        )

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, IsingProblem):
            return NotImplemented
        return (
            np.array_equal(self.h, other.h)
            and np.array_equal(self.i, other.i)
            and np.array_equal(self.j, other.j)
            and np.array_equal(self.J, other.J)
        )

    __hash__ = None  # type: ignore[assignment]


def grid_shape(n: int) -> tuple[int, int]:
    """The most nearly square ``(rows, cols)`` with ``rows * cols = n`` and ``rows <= cols``."""
    rows = math.isqrt(n)
    while n % rows:
        rows -= 1
    return rows, n // rows


def graph_edges(
    graph: str, n: int, *, shape: tuple[int, int] | None = None
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """The coupled pairs ``(i, j)``, ``i < j``, of a graph on ``n`` qubits.

    Parameters
    ----------
    graph : {"chain", "ring", "grid", "complete"}
    n : int
        Number of qubits (>= 1; >= 3 for a ring).
    shape : (rows, cols), optional
        Grid shape (``rows * cols == n``); default :func:`grid_shape`.  Qubit
        ``r * cols + c`` sits at row r, column c; open boundaries.

    Returns
    -------
    i, j : ndarray of int
        Sorted by (i, j).
    """
    if graph not in GRAPHS:
        raise InputError("graph", f"must be one of {', '.join(GRAPHS)}, got {graph!r}")
    if n < 1:
        raise InputError("size", f"must be an integer >= 1, got {n}")
    pairs: list[tuple[int, int]]
    if graph == "chain":
        pairs = [(q, q + 1) for q in range(n - 1)]
    elif graph == "ring":
        if n < 3:
            raise InputError("size", f"must be >= 3 for a ring, got {n}")
        pairs = [(q, q + 1) for q in range(n - 1)] + [(0, n - 1)]
    elif graph == "complete":
        pairs = [(a, b) for a in range(n) for b in range(a + 1, n)]
    else:
        rows, cols = shape if shape is not None else grid_shape(n)
        if rows * cols != n or rows < 1 or cols < 1:
            raise InputError("grid_shape", f"must multiply to the size {n}, got {rows} x {cols}")
        pairs = []
        for r in range(rows):
            for c in range(cols):
                q = r * cols + c
                if c + 1 < cols:
                    pairs.append((q, q + 1))
                if r + 1 < rows:
                    pairs.append((q, q + cols))
    pairs.sort()
    arr = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    return arr[:, 0].copy(), arr[:, 1].copy()


def _draw(rng: np.random.Generator, kind: str, size: int) -> NDArray[np.float64]:
    if kind == "sign":
        return rng.choice(np.array([-1.0, 1.0]), size=size)
    if kind == "gaussian":
        return rng.standard_normal(size)
    return np.zeros(size)


def make_problem(
    graph: str,
    size: int,
    *,
    couplings: str = "sign",
    fields: str = "none",
    field_scale: float = 1.0,
    seed: int = 0,
    instance: int = 0,
    shape: tuple[int, int] | None = None,
) -> IsingProblem:
    """Instance ``instance`` of a problem family, reproducible from ``seed``.

    Parameters
    ----------
    graph : {"chain", "ring", "grid", "complete"}
    size : int
        Number of qubits.
    couplings : {"sign", "gaussian"}
        J_ij = +-1 with equal probability, or J_ij from N(0, 1).
    fields : {"none", "sign", "gaussian"}
        h_i = 0, +-field_scale, or field_scale N(0, 1).
    field_scale : float
        Scale of the fields (>= 0).
    seed, instance : int
        The random stream is ``SeedSequence([seed, size, instance])``.
    shape : (rows, cols), optional
        Grid shape (``graph = "grid"`` only).

    Returns
    -------
    IsingProblem
        With ``label`` such as ``"ring n=8 sign #0"``.
    """
    if couplings not in COUPLING_KINDS:
        raise InputError(
            "couplings", f"must be one of {', '.join(COUPLING_KINDS)}, got {couplings!r}"
        )
    if fields not in FIELD_KINDS:
        raise InputError("fields", f"must be one of {', '.join(FIELD_KINDS)}, got {fields!r}")
    if not (math.isfinite(field_scale) and field_scale >= 0):
        raise InputError("field_scale", f"must be a number >= 0, got {field_scale!r}")
    for name, v in (("seed", seed), ("instance", instance)):
        if int(v) < 0:
            raise InputError(name, f"must be an integer >= 0, got {v!r}")
    i, j = graph_edges(graph, int(size), shape=shape)
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), int(size), int(instance)]))
    J = _draw(rng, couplings, i.size)
    h = field_scale * _draw(rng, fields, int(size))
    label = f"{graph} n={size} {couplings}" + ("" if fields == "none" else f" h:{fields}")
    return IsingProblem(h, i, j, J, label=f"{label} #{instance}")
