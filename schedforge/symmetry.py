"""Conserved quantities of an anneal and the sectors they split the dynamics into.

A Hermitian operator P that commutes with H(s) at every s (with the driver and with
the problem Hamiltonian) and with every coupling operator of the bath is conserved by
the whole open-system evolution: the Davies jump operators are built from spectral
projectors of H and from the coupling operators, so they commute with P, and the
generator maps each block ``Pi_p rho Pi_q`` of the eigenspaces Pi_p of P to itself.
The population of each sector, ``w_p = tr(Pi_p rho)``, is then fixed by the initial
state, and the final generator L(1) has (at least) one steady state per sector.  The
state the system relaxes to is still well defined,

    sigma(s) = sum_p w_p Gibbs_p(s),   Gibbs_p = Pi_p exp(-beta H) Pi_p / tr(Pi_p exp(-beta H)),

the Gibbs state of each sector weighted by the initial populations (the restriction of
a KMS-symmetric Davies generator to a sector is again one, whose steady state is the
sector's Gibbs state; Davies, Commun. Math. Phys. 39, 91 (1974); for Lindblad
generators with a strong symmetry: Buca and Prosen, New J. Phys. 14, 073007 (2012)).

A closed system (no bath) conserves P when P commutes with H(s) alone; its target is
then the ground state of H(1) within each sector, weighted the same way (a unitary
evolution keeps each sector's population, and within a sector the adiabatic theorem
leads to the sector's own ground state).

The candidate checked here is the global spin-flip parity ``X^n = prod_i X_i``: it
commutes with the transverse-field driver always, with the Ising problem exactly when
every field h_i vanishes, and with X couplings (Y and Z couplings anticommute with it).
The check is numerical (commutators of the actual matrices), so it holds for any
coupling and any fields: :data:`CANDIDATES` lists what is tried, in order.

:class:`SectorHamiltonian` is H(s) restricted to one sector (``U^T H U`` with U an
orthonormal basis of the sector), so a whole :class:`~schedforge.system.System` can be
built per sector and integrated on its own (``System.sector_parts``); each sector's
deviation from its own Gibbs state is small where the anneal is adiabatic, which keeps
the integrators' precision (the deviation from the Gibbs state of the full space is of
order one when sectors are conserved).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .units import GHZ_TO_RAD_PER_NS

__all__ = [
    "CANDIDATES",
    "COMMUTATOR_RTOL",
    "SECTOR_COHERENCE_MAX",
    "SECTOR_WEIGHT_MIN",
    "ConservedQuantity",
    "Sector",
    "SectorHamiltonian",
    "find_conserved",
    "sector_bases",
    "spin_flip_parity",
]

#: Relative size of a commutator ``||[P, M]|| / (||P|| ||M||)`` below which P commutes with M.
COMMUTATOR_RTOL = 1e-12
#: Sectors holding at most this much of the initial population are not integrated: their
#: share of the final deviation is at most twice this, below the default ``atol`` (their
#: Gibbs state still enters the target, weighted).  Rounding leaves about 1e-17 in the
#: odd sector of the ground state of H(0).
SECTOR_WEIGHT_MIN = 1e-15
#: Largest norm of the initial state's coherences between sectors that is treated as zero.
SECTOR_COHERENCE_MAX = 1e-12


def spin_flip_parity(n_qubits: int) -> NDArray[np.float64]:
    """The global spin-flip parity ``X^n = X_0 X_1 ... X_(n-1)`` (a permutation matrix).

    It maps the basis state of bits b to that of the complemented bits.
    """
    d = 2**n_qubits
    idx = np.arange(d)
    out = np.zeros((d, d))
    out[idx ^ (d - 1), idx] = 1.0
    return out


#: The conserved quantities tried, in order: (name, builder from the number of qubits).
CANDIDATES: tuple[tuple[str, Callable[[int], NDArray[Any]]], ...] = (
    ("spin-flip parity (X^n)", spin_flip_parity),
)

_SECTOR_NAMES = {1: "even", -1: "odd"}


@dataclass(frozen=True, eq=False)
class Sector:
    """One eigenspace of a conserved quantity.

    Attributes
    ----------
    value : float
        The eigenvalue of the conserved operator on it (+1 or -1 for a parity).
    name : str
        ``"even"`` / ``"odd"`` for a parity.
    basis : ndarray
        ``(d, d_p)`` orthonormal columns spanning it (real for a real operator).
    """

    value: float
    name: str
    basis: NDArray[Any] = field(repr=False)

    @property
    def dim(self) -> int:
        """Dimension of the sector."""
        return int(self.basis.shape[1])

    @property
    def projector(self) -> NDArray[Any]:
        """``Pi_p = U U^+``."""
        return self.basis @ self.basis.conj().T

    def restrict(self, x: NDArray[Any]) -> NDArray[Any]:
        """``U^+ X U``: an operator of the full space as seen inside the sector."""
        u = self.basis
        return u.conj().T @ x @ u

    def embed(self, y: NDArray[Any]) -> NDArray[Any]:
        """``U Y U^+``: an operator of the sector in the full space."""
        u = self.basis
        return u @ y @ u.conj().T


@dataclass(frozen=True, eq=False)
class ConservedQuantity:
    """A conserved operator and its sectors.

    Attributes
    ----------
    name : str
        What it is, in words (``"spin-flip parity (X^n)"``).
    operator : ndarray
        The operator P (d x d).
    sectors : tuple of Sector
        Its eigenspaces.
    """

    name: str
    operator: NDArray[Any] = field(repr=False)
    sectors: tuple[Sector, ...]

    def weights(self, rho: NDArray[Any]) -> NDArray[np.float64]:
        """``tr(Pi_p rho)`` for each sector (the conserved populations)."""
        return np.array([float(np.real(np.trace(sec.restrict(rho)))) for sec in self.sectors])

    def coherence(self, rho: NDArray[Any]) -> float:
        """Frobenius norm of the blocks ``Pi_p rho Pi_q`` (p != q) of ``rho``."""
        blocks = sum(sec.embed(sec.restrict(rho)) for sec in self.sectors)
        return float(np.linalg.norm(rho - blocks))

    def describe(self, weights: Sequence[float]) -> str:
        """``"spin-flip parity (X^n): even 0.73, odd 0.27"``."""
        parts = ", ".join(
            f"{sec.name} {w:.6g}" for sec, w in zip(self.sectors, weights, strict=True)
        )
        return f"{self.name}: {parts}"


def _commutes(p: NDArray[Any], m: NDArray[Any]) -> bool:
    scale = float(np.linalg.norm(p)) * max(float(np.linalg.norm(m)), 1e-300)
    return float(np.linalg.norm(p @ m - m @ p)) <= COMMUTATOR_RTOL * scale


def find_conserved(
    hamiltonian_parts: Sequence[NDArray[Any]],
    operators: Sequence[NDArray[Any]],
    n_qubits: int,
) -> ConservedQuantity | None:
    """The first of :data:`CANDIDATES` that commutes with every part of H and every coupling.

    Parameters
    ----------
    hamiltonian_parts : sequence of ndarray
        Matrices whose linear combinations make H(s) at every s (the driver and the
        problem Hamiltonian), or H at enough points s.
    operators : sequence of ndarray
        The coupling operators of the bath.
    n_qubits : int

    Returns
    -------
    ConservedQuantity or None
        None when no candidate is conserved (or it has a single sector: it is then a
        multiple of the identity and splits nothing).
    """
    mats = [np.asarray(m) for m in (*hamiltonian_parts, *operators)]
    for name, build in CANDIDATES:
        p = build(n_qubits)
        if p.shape != mats[0].shape or not all(_commutes(p, m) for m in mats):
            continue
        sectors = sector_bases(p)
        if len(sectors) > 1:
            return ConservedQuantity(name, p, sectors)
    return None


def sector_bases(p: NDArray[Any]) -> tuple[Sector, ...]:
    """Orthonormal bases of the eigenspaces of a Hermitian involution-like operator P.

    A real signed permutation (a Pauli string of X and Z factors) gets the explicit
    basis ``e_i`` (fixed points) and ``(e_i +- P_ji e_j) / sqrt 2`` (swapped pairs), so
    that an operator diagonal in the computational basis that commutes with P stays
    diagonal in the sector basis; anything else gets the eigenvectors of ``eigh``.
    Sectors come in decreasing eigenvalue (even before odd).
    """
    p = np.asarray(p)
    d = p.shape[0]
    nz = np.abs(p) > 0.5
    signed_perm = (
        not np.iscomplexobj(p)
        and np.all(nz.sum(axis=0) == 1)
        and np.allclose(np.abs(p[nz]), 1.0, atol=0.0)
        and np.array_equal(p, p.T)
    )
    columns: dict[int, list[NDArray[Any]]] = {}
    if signed_perm:
        image = np.argmax(nz, axis=0)  # P e_i = p[image_i, i] e_(image_i)
        for i in range(d):
            j = int(image[i])
            if j < i:
                continue
            if j == i:
                columns.setdefault(round(float(p[i, i])), []).append(np.eye(d)[:, i])
                continue
            sgn = float(p[j, i])
            for value in (1, -1):
                v = np.zeros(d)
                v[i], v[j] = 1.0 / np.sqrt(2.0), value * sgn / np.sqrt(2.0)
                columns.setdefault(value, []).append(v)
        groups = {k: np.array(v).T for k, v in columns.items()}
    else:
        vals, vecs = np.linalg.eigh(0.5 * (p + p.conj().T))
        keys = np.round(vals, 8)
        groups = {float(k): vecs[:, keys == k] for k in np.unique(keys)}
    return tuple(
        Sector(float(k), _SECTOR_NAMES.get(int(k), "") or f"P = {float(k):g}", u)
        if float(k) in (1.0, -1.0)
        else Sector(float(k), f"P = {float(k):g}", u)
        for k, u in sorted(groups.items(), key=lambda kv: -kv[0])
    )


class SectorHamiltonian:
    """H(s) restricted to one sector of a conserved quantity: ``U^T H(s) U``.

    Offers what the integrators use of an
    :class:`~schedforge.hamiltonian.AnnealingHamiltonian` (the same device curves; the
    driver and problem matrices restricted), so a
    :class:`~schedforge.system.System` can be built on one sector.

    Parameters
    ----------
    parent : AnnealingHamiltonian
    sector : Sector
    """

    def __init__(self, parent: Any, sector: Sector) -> None:
        self.parent = parent
        self.sector = sector
        self.curves = parent.curves
        self.n_qubits = parent.n_qubits
        self.dim = sector.dim
        self.driver = np.real_if_close(sector.restrict(parent.driver))
        self.problem_matrix = np.real_if_close(sector.restrict(parent.problem_matrix))

    @property
    def problem_diagonal(self) -> NDArray[Any]:
        """Diagonal of the restricted problem (which must be diagonal in the sector basis)."""
        q = self.problem_matrix
        off = q - np.diag(np.diag(q))
        if np.any(np.abs(off) > 1e-12 * max(1.0, float(np.max(np.abs(q))))):
            raise ValueError("the problem Hamiltonian is not diagonal in this sector's basis")
        return np.diag(q).copy()

    def _combine(self, a_ghz: float, b_ghz: float) -> NDArray[Any]:
        return (0.5 * GHZ_TO_RAD_PER_NS) * (-a_ghz * self.driver + b_ghz * self.problem_matrix)

    def coefficients(self, s: float, order: int = 0) -> NDArray[np.float64]:
        """A, B (GHz) and their s-derivatives up to ``order``."""
        return self.parent.coefficients(s, order)

    def matrix(self, s: float) -> NDArray[Any]:
        """``U^T H(s) U`` in rad/ns."""
        ab = self.coefficients(s, 0)
        return self._combine(ab[0, 0], ab[1, 0])

    def derivative(self, s: float, order: int = 1) -> NDArray[Any]:
        """``U^T d^n H / ds^n U`` in rad/ns."""
        ab = self.coefficients(s, order)
        return self._combine(ab[0, order], ab[1, order])

    def matrix_and_derivative(self, s: float) -> tuple[NDArray[Any], NDArray[Any]]:
        """The restricted H(s) and dH/ds."""
        ab = self.coefficients(s, 1)
        return self._combine(ab[0, 0], ab[1, 0]), self._combine(ab[0, 1], ab[1, 1])

    def scale(self) -> float:
        """The parent's bound on ||H(s)|| (the same tolerances as the full space)."""
        return float(self.parent.scale())

    def describe(self) -> dict[str, Any]:
        """The parent's metadata and the sector."""
        return {**self.parent.describe(), "sector": self.sector.name}

    def __repr__(self) -> str:
        return f"SectorHamiltonian({self.parent!r}, sector={self.sector.name!r})"
