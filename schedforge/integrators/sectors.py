"""Bohr-frequency sectors: the Davies terms that couple distinct elements of rho.

In the instantaneous eigenbasis the Davies generator is block diagonal: an element
rho_ab only talks to elements rho_cd of the same (grouped) Bohr frequency
E_a - E_b = E_c - E_d (Davies, Commun. Math. Phys. 39, 91, 1974; Albash, Boixo,
Lidar and Zanardi, New J. Phys. 14, 123016, 2012).  When all levels and Bohr
frequencies are distinct, the only block with more than one element is that of the
populations (the Pauli rate matrix) and every coherence decays on its own; the
eigenframe integrator carries those two parts as ``W`` and ``lam``.

On the problems users write first (chains, rings, stars, uniform couplings, zero
fields) Bohr frequencies coincide over whole stretches of the anneal: flipping spin
i costs an energy that depends only on i's field and neighbours.  Then the jump
terms ``L rho L^+`` move coherence (c, d) into (a, b), and the anticommutator
``{L^+ L, rho}`` mixes coherences inside degenerate levels with each other and
with the populations.  :func:`sector_coupling` returns exactly those terms (the
whole generator minus its diagonal and minus the population-to-population rates),
as a sparse matrix on the row-major vector of rho, so the eigenframe step can add
them to its coupling; :func:`propagate_sector_modes` propagates the free
oscillations of one sector together, with the exponential of the sector's block.

The grouping tolerance decides which frequencies count as equal: the secular
approximation behind the Davies generator is valid when distinct Bohr frequencies
are far apart compared with the relaxation rates, and frequencies closer than the
rates must be grouped (see :func:`schedforge.davies.secular_tolerance`).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import sparse
from scipy.linalg import expm
from scipy.sparse import csgraph

from ..davies import bohr_groups, group_levels
from .frame import EigenframeModel, FrameData, frame_tol

__all__ = [
    "CouplingPattern",
    "FactoredCoupling",
    "LaidOutCoupling",
    "apply_sector",
    "as_matrices",
    "propagate_sector_modes",
    "resonant_coupling",
    "rotation_superoperator",
    "sector_coupling",
    "sector_coupling_batch",
    "sector_couplings",
    "sector_leak",
]


#: Groupings whose index work is kept (the oldest is dropped beyond this).
_STRUCTURES_MAX = 64
#: Largest dimension (levels) whose groupings are kept: a few MB each at 64 levels.
_STRUCTURES_MAX_DIM = 64
#: Largest structure (pairs of elements) that is kept.
_STRUCTURES_MAX_PAIRS = 200_000
_STRUCTURES: dict[tuple[int, str, bytes], _SectorStructure] = {}
#: Groups of more elements than this are applied in factored form
#: (:class:`FactoredCoupling`) instead of laid out as a matrix.
FACTORED_GROUP_MIN = 64
#: Elements of rho (d^2) up to which the free modes' resonant couplings are dense.
DENSE_MODES_MAX = 256


def sector_coupling(
    E: NDArray[np.float64],
    V: NDArray[Any],
    operators: list[NDArray[Any]],
    gamma: Any,
    tol: float,
) -> LaidOutCoupling | FactoredCoupling | None:
    """The Davies terms between distinct elements of one Bohr sector, at one point s.

    Parameters
    ----------
    E : ndarray (d,)
        Energies (rad/ns) of the frame's levels, in the frame's label order.
    V : ndarray (d, d)
        The frame's eigenvectors (columns).
    operators : list of ndarray
        Hermitian system-bath coupling operators (computational basis).
    gamma : callable
        Spectral density ``gamma(omega)`` (rad/ns), vectorised;
        ``omega[a, b] = E_b - E_a`` is the energy given to the bath by b -> a.
    tol : float
        Levels and Bohr frequencies closer than this (rad/ns) are grouped.

    Returns
    -------
    LaidOutCoupling, FactoredCoupling or None
        A (d^2, d^2) operator ``S`` (``S @ vec``, ``S.toarray()``) with
        ``(S vec(rho))[a d + b]`` the rate (rad/ns) at which the other elements of
        rho's sector feed rho_ab (row-major ``vec``); the diagonal and
        the population-to-population entries (already in the Pauli rates) are left
        out.  None when no two elements share a sector (distinct levels and Bohr
        frequencies), the case the eigenframe handles without it.
    """
    return sector_coupling_batch(E[None], V[None], operators, gamma, tol)[0]


def sector_coupling_batch(
    E: NDArray[np.float64],
    V: NDArray[Any],
    operators: list[NDArray[Any]],
    gamma: Any,
    tol: float,
) -> list[Any]:
    """:func:`sector_coupling` at n points at once (``E`` (n, d), ``V`` (n, d, d)).

    Points with the same grouping of Bohr frequencies (a step's nodes, as a rule)
    share the index work and the matrix structure; only the rates differ.
    """
    n, d = E.shape
    levels = np.stack([group_levels(E[j], tol) for j in range(n)])
    found = [bohr_groups(levels[j], tol) for j in range(n)]
    # points with the same grouping (a step's nodes, as a rule) share the index work
    shared: dict[bytes, list[int]] = {}
    for j, (_, gj, _) in enumerate(found):
        shared.setdefault(gj.tobytes(), []).append(j)
    out: list[Any] = [None] * n
    for points in shared.values():
        gid = _coupled_grouping(found[points[0]][1])
        if gid is None:
            continue  # distinct levels and Bohr frequencies at these points
        at = np.array(points)
        omega = np.stack([found[j][0] for j in points])
        g = np.asarray(gamma(omega.ravel()), dtype=float).reshape(at.size, d * d)
        Vn = V[at]
        ops = np.stack([np.swapaxes(Vn, 1, 2).conj() @ op @ Vn for op in operators], axis=1)
        couplings = _couplings(gid, np.sqrt(np.maximum(g, 0.0)), ops.reshape(at.size, -1, d * d))
        for j, S in zip(points, couplings, strict=True):
            out[j] = S
    return out


def _couplings(
    gid: NDArray[np.int64], sqrt_g: NDArray[np.float64], ops: NDArray[np.complex128]
) -> list[Any]:
    """The couplings of one grouping at n points: large groups factored, others laid out."""
    large = [m for m in coupling_groups(gid) if m.shape[1] > FACTORED_GROUP_MIN]
    if not large:
        return _structure(gid).matrices(sqrt_g, ops)
    # the large groups factored, the others laid out (large ones made lone elements)
    rest_gid = gid.copy().ravel()
    taken = np.concatenate([m.ravel() for m in large])
    rest_gid[taken] = rest_gid.max() + 1 + np.arange(taken.size)
    rest = _structure(rest_gid.reshape(gid.shape)).matrices(sqrt_g, ops)
    return [
        FactoredCoupling(gid, large, sqrt_g[j], ops[j], rest[j]) for j in range(sqrt_g.shape[0])
    ]


def _coupled_grouping(gid: NDArray[np.int64]) -> NDArray[np.int64] | None:
    """``gid``, or None when it groups nothing beyond the populations.

    The populations (zero frequency) always form a group of d; any larger zero group,
    or any other group of two or more, couples elements the eigenframe treats apart.
    """
    d = gid.shape[0]
    sizes = np.bincount(gid.ravel())
    zero = gid[0, 0]
    others = np.delete(sizes, zero)
    if sizes[zero] == d and (others.size == 0 or others.max() == 1):
        return None
    return gid


def _structure(gid: NDArray[np.int64]) -> _SectorStructure:
    """The (cached) structure of one grouping: most steps repeat the previous one's.

    Cached up to ``_STRUCTURES_MAX_DIM`` levels (6 qubits) and ``_STRUCTURES_MAX_PAIRS``
    pairs; above, the index arrays grow as d^4 at worst (the whole ladder at s = 0 of 6
    qubits: 2.7 million pairs, a few hundred MB) and are rebuilt when needed.
    """
    if gid.shape[0] > _STRUCTURES_MAX_DIM:
        return _SectorStructure(gid)
    key = (gid.shape[0], gid.dtype.str, gid.tobytes())
    found = _STRUCTURES.get(key)
    if found is None:
        found = _SectorStructure(gid)
        if found.size <= _STRUCTURES_MAX_PAIRS:
            if len(_STRUCTURES) >= _STRUCTURES_MAX:
                _STRUCTURES.pop(next(iter(_STRUCTURES)))
            _STRUCTURES[key] = found
    return found


def coupling_groups(gid: NDArray[np.int64]) -> list[NDArray[np.int64]]:
    """The groups of elements that couple distinct elements, by size.

    A lone element, and the populations without coherences between degenerate
    levels, give diagonal terms and population rates alone, which the eigenframe
    already has; every other group of two or more is kept.

    Returns
    -------
    list of ndarray of int (groups, size)
        Flat indices (``a d + b``) of the members, one array per group size.
    """
    d = gid.shape[0]
    flat = gid.ravel()
    sizes = np.bincount(flat)
    off_diagonal = np.bincount(flat, weights=np.arange(d * d) % (d + 1) != 0, minlength=sizes.size)
    useful = (sizes >= 2) & (off_diagonal > 0)
    order = np.argsort(flat, kind="stable")
    starts = np.concatenate(([0], np.cumsum(sizes)[:-1]))
    out = []
    for size in np.unique(sizes[useful]):
        groups = np.flatnonzero(useful & (sizes == size))
        out.append(order[starts[groups][:, None] + np.arange(size)[None, :]])
    return out


class _SectorStructure:
    """Index work of the sector couplings for one grouping of Bohr frequencies.

    Every entry the couplings can have (jump terms and the anticommutator inside
    degenerate levels) is laid out once: ``to_csr`` sums each point's values into the
    CSR pattern of the whole grouping, so a point costs two sparse products instead
    of building and sorting a matrix (the uniform 4-ring at 100 ns spent a quarter of
    its time there).  Only the groups of :func:`coupling_groups` are laid out.  The
    weights of a group are its Gram matrix ``sum_k Y_k^T conj(Y_k)`` with ``Y_k``
    the group's entries of ``sqrt(gamma) L_k``, computed for all groups of one size
    together (the fully connected 6-qubit instance at s = 0 has groups of up to 924
    elements and 2.7 million pairs).
    """

    def __init__(self, gid: NDArray[np.int64]) -> None:
        d = gid.shape[0]
        self.d = d
        D = d * d
        # members of the useful groups, one (groups, size) array per group size
        self.members = coupling_groups(gid)
        ps = [np.repeat(m, m.shape[1], axis=1).ravel() for m in self.members]
        qs = [np.tile(m, (1, m.shape[1])).ravel() for m in self.members]
        p = np.concatenate(ps) if ps else np.zeros(0, dtype=np.int64)
        q = np.concatenate(qs) if qs else np.zeros(0, dtype=np.int64)
        self.size = p.size
        ap, bp, aq, bq = p // d, p % d, q // d, q % d
        # jump terms: rho_(bp, bq) -> rho_(ap, aq)
        jump_rows, jump_cols = ap * d + aq, bp * d + bq
        # anticommutator -(K rho + rho K) / 2 with K = sum L^+ L (within degenerate
        # levels): K_(bp, bq) collects the weights of the pairs with ap == aq
        self.same = np.flatnonzero(ap == aq)
        k_index = bp[self.same] * d + bq[self.same]
        k_pos, k_of_pair = np.unique(k_index, return_inverse=True)
        # conj(K) at its possible entries: a sum over the pairs with ap == aq
        self.k_sum = sparse.csr_matrix(
            (np.ones(k_index.size), (np.arange(k_index.size), k_of_pair)),
            shape=(k_index.size, k_pos.size),
        )
        ka, kb = k_pos // d, k_pos % d
        idx = np.arange(d)
        # (K rho)_(a, c) = sum_b K_ab rho_bc ; (rho K)_(a, c) = sum_b rho_ab K_bc
        rows = np.concatenate(
            [jump_rows, np.add.outer(ka * d, idx).ravel(), np.add.outer(idx * d, kb).ravel()]
        )
        cols = np.concatenate(
            [jump_cols, np.add.outer(kb * d, idx).ravel(), np.add.outer(idx * d, ka).ravel()]
        )
        # the values' source: pair weight j, or K entry j (repeated over rho's rows
        # for K rho, tiled for rho K)
        k_src = p.size + np.arange(k_pos.size)
        source = np.concatenate([np.arange(p.size), np.repeat(k_src, d), np.tile(k_src, d)])
        population = (rows // d == rows % d) & (cols // d == cols % d)
        keep = (rows != cols) & ~population
        lin = rows[keep] * D + cols[keep]
        entries, slot = np.unique(lin, return_inverse=True)
        self.indices = (entries % D).astype(np.int32)
        self.indptr = np.searchsorted(entries // D, np.arange(D + 1)).astype(np.int32)
        factor = np.where(source[keep] < p.size, 1.0, -0.5)
        # values (pair weights, then K entries) -> CSR data, duplicates summed
        self.to_csr = sparse.csr_matrix(
            (factor, (source[keep], slot)), shape=(p.size + k_pos.size, entries.size)
        )
        self.D = D
        self.pattern = CouplingPattern(self.indices, self.indptr, D)

    def matrices(
        self, sqrt_g: NDArray[np.float64], ops: NDArray[np.complex128]
    ) -> list[LaidOutCoupling | None]:
        """The couplings at each point from its sqrt(gamma) (n, d^2) and operators."""
        n = sqrt_g.shape[0]
        if not self.indices.size:
            return [None] * n
        parts = []
        for members in self.members:
            # Y (n, ops, groups, size): a Gram matrix per group and point
            Y = sqrt_g[:, None, members] * ops[:, :, members]
            Yt = np.moveaxis(Y, 1, -1)  # (n, groups, size, ops)
            parts.append((Yt @ np.swapaxes(Yt, -1, -2).conj()).reshape(n, -1))
        weight = np.concatenate(parts, axis=1)
        kconj = (self.k_sum.T @ weight[:, self.same].T).T.conj()  # (n, K entries)
        data = (self.to_csr.T @ np.concatenate([weight, kconj], axis=1).T).T
        return [LaidOutCoupling(row, self.pattern) if row.any() else None for row in data]


class CouplingPattern:
    """The CSR pattern of one grouping's couplings, shared by the points that have it.

    Applying the couplings of several points is one gather, one product and one
    segmented sum (``numpy.add.reduceat`` over the rows' entries) for all of them,
    instead of a sparse matrix per point: on small problems (d = 8 to 16) building
    and applying scipy.sparse matrices per node cost more than the arithmetic.
    """

    def __init__(self, indices: NDArray[np.int32], indptr: NDArray[np.int32], D: int) -> None:
        self.indices, self.indptr, self.D = indices, indptr, D
        self.rows = np.flatnonzero(np.diff(indptr))  # rows with entries
        self.starts = indptr[self.rows]

    def apply(self, data: NDArray[np.complex128], vecs: NDArray[Any]) -> NDArray[np.complex128]:
        """Each point's couplings (``data`` (n, nnz)) applied to its vector (n, D)."""
        out = np.zeros((data.shape[0], self.D), dtype=np.result_type(data, vecs))
        if self.rows.size:
            out[:, self.rows] = np.add.reduceat(data * vecs[:, self.indices], self.starts, axis=1)
        return out


class LaidOutCoupling:
    """One point's sector coupling: its entries in the pattern of its grouping.

    Acts as a (d^2, d^2) matrix: ``S @ vec``, ``S.toarray()``; ``tocsr()``,
    ``abs(S)`` and ``c * S`` give scipy.sparse matrices.
    """

    __slots__ = ("data", "pattern")
    __array_ufunc__ = None  # numpy scalars times S defer to __rmul__

    def __init__(self, data: NDArray[np.complex128], pattern: CouplingPattern) -> None:
        self.data, self.pattern = data, pattern

    @property
    def shape(self) -> tuple[int, int]:
        """(d^2, d^2)."""
        return (self.pattern.D, self.pattern.D)

    def tocsr(self) -> sparse.csr_matrix:
        """As a scipy.sparse CSR matrix (its own copy)."""
        pat = self.pattern
        return sparse.csr_matrix(
            (self.data.copy(), pat.indices.copy(), pat.indptr.copy()), shape=self.shape
        )

    def toarray(self) -> NDArray[np.complex128]:
        """As a dense array."""
        return self.tocsr().toarray()

    def __matmul__(self, vec: NDArray[Any]) -> NDArray[np.complex128]:
        return self.pattern.apply(self.data[None], np.asarray(vec)[None])[0]

    def __abs__(self) -> sparse.csr_matrix:
        return abs(self.tocsr())

    def __mul__(self, factor: complex) -> sparse.csr_matrix:
        return self.tocsr() * factor

    __rmul__ = __mul__


class FactoredCoupling:
    """The sector coupling of one point, its large groups applied without a matrix.

    The jump terms of a group g are ``sum_k L_gk rho L_gk^+`` with ``L_gk`` the
    group's entries of ``sqrt(gamma) L_k`` (|g| entries each), the anticommutator is
    ``-(K rho + rho K) / 2`` with ``K = sum L_gk^+ L_gk`` off its diagonal, and what
    the eigenframe already has (the diagonal of the superoperator and the
    population-to-population rates) is taken off again.  Applying a group costs about
    ``2 d |g|`` products per operator, laying it out ``|g|^2`` entries: near s = 0 the
    driver's ladder puts up to 924 elements in one group (the fully connected 6-qubit
    instance: 2.7 million entries, about 1.3 s per step to lay out at 9 nodes).  The
    small groups come laid out (``rest``); :func:`as_matrices` lays out the whole
    coupling where the entries themselves are needed (free modes of the sector).
    """

    def __init__(
        self,
        gid: NDArray[np.int64],
        members: list[NDArray[np.int64]],
        sqrt_g: NDArray[np.float64],
        ops: NDArray[np.complex128],
        rest: LaidOutCoupling | None = None,
    ) -> None:
        d = gid.shape[0]
        self.d, self.gid, self.sqrt_g, self.ops, self.rest = d, gid, sqrt_g, ops, rest
        n_ops = ops.shape[0]
        # one block b per (group, operator): L_b[a, b'] = Y for member (a, b')
        elem = np.concatenate([m.ravel() for m in members])
        first = np.cumsum([0] + [m.shape[0] for m in members])
        group = np.concatenate(
            [
                start + np.repeat(np.arange(m.shape[0]), m.shape[1])
                for start, m in zip(first[:-1], members, strict=True)
            ]
        )
        a, b = elem // d, elem % d
        Y = sqrt_g[None, elem] * ops[:, elem]  # (ops, members)
        self.n_blocks = int(first[-1]) * n_ops
        block = (group[None, :] + int(first[-1]) * np.arange(n_ops)[:, None]).ravel()
        A, B = np.tile(a, n_ops), np.tile(b, n_ops)
        # L (blocks d, d): row block d + a, column b'; R^T (d, blocks d): row a,
        # column block d + b', conj(Y), so that sum_b T_b L_b^+ = (R^T Tcat^T)^T
        # with Tcat the blocks T_b = L_b rho side by side
        self.L = sparse.csr_matrix((Y.ravel(), (block * d + A, B)), shape=(self.n_blocks * d, d))
        self.Rt = sparse.csr_matrix(
            (Y.conj().ravel(), (A, block * d + B)), shape=(d, self.n_blocks * d)
        )
        K = (self.L.conj().T @ self.L).toarray()
        np.fill_diagonal(K, 0.0)
        self.K = K
        # what the eigenframe has already: population rates (b' -> a, a != b') ...
        off = a != b
        w = np.sum(np.abs(Y[:, off]) ** 2, axis=0)
        self.pop = sparse.csr_matrix((w, (a[off], b[off])), shape=(d, d))
        # ... and the diagonal of the jump terms (rho_ac -> rho_ac, both (a, a) and
        # (c, c) in the zero-frequency group)
        diag = a == b
        self.dephase = None
        if diag.any():
            y = np.zeros((n_ops, d), dtype=complex)
            y[:, a[diag]] = Y[:, diag]
            self.dephase = y.T @ y.conj()

    def __matmul__(self, vec: NDArray[np.complex128]) -> NDArray[np.complex128]:
        """The coupling applied to the row-major vector of rho."""
        d = self.d
        rho = vec.reshape(d, d)
        T = (self.L @ rho).reshape(self.n_blocks, d, d)
        Tcat = np.ascontiguousarray(T.transpose(1, 0, 2)).reshape(d, self.n_blocks * d)
        out = (self.Rt @ Tcat.T).T
        out = out - 0.5 * (self.K @ rho + rho @ self.K)
        out[np.diag_indices(d)] -= self.pop @ np.diag(rho)
        if self.dephase is not None:
            out = out - self.dephase * rho
        out = out.ravel()
        return out if self.rest is None else out + self.rest @ vec


def as_matrices(sector: list[Any]) -> list[Any]:
    """A step's sector couplings as sparse matrices (laid out where they were factored).

    For the free modes, which need the entries themselves; points of one grouping are
    laid out together.
    """
    factored = [j for j, S in enumerate(sector) if isinstance(S, FactoredCoupling)]
    if not factored:
        return sector
    shared: dict[bytes, list[int]] = {}
    for j in factored:
        shared.setdefault(sector[j].gid.tobytes(), []).append(j)
    out = list(sector)
    for points in shared.values():
        sqrt_g = np.stack([sector[j].sqrt_g for j in points])
        ops = np.stack([sector[j].ops for j in points])
        laid_out = _structure(sector[points[0]].gid).matrices(sqrt_g, ops)
        for j, S in zip(points, laid_out, strict=True):
            out[j] = S
    return out


def propagate_sector_modes(
    A: NDArray[np.complex128],
    free: NDArray[np.bool_],
    rate: NDArray[np.complex128],
    coupling: list[sparse.csr_matrix | None],
    h: float,
    weights: NDArray[np.float64],
) -> tuple[NDArray[np.complex128], NDArray[np.bool_]]:
    """Free oscillations of the modes that a Bohr sector couples, propagated together.

    The modes ``free`` with amplitudes ``A`` (d, d) obey ``A' = diag(rate) A + C A``
    over the step (per unit x), with ``rate`` (m + 1, d, d) their own rates at the
    step's nodes and ``C`` the resonant coupling there (``tf`` times the sector
    coupling, plus the frame's rotation inside degenerate levels).  Modes of one
    sector share their Bohr frequency, so the coupling does not oscillate; each
    connected group is propagated with the exponential of
    ``h sum_j w_j (diag(rate_j) + C_j)`` (the first Magnus term with the step's
    quadrature; the fast common phase is exact).

    Returns
    -------
    (A_new, done)
        Propagated amplitudes of the coupled modes (zero elsewhere) and the mask of the
        modes propagated here; the caller propagates the others as before.
    """
    d = A.shape[0]
    done = np.zeros((d, d), dtype=bool)
    out = np.zeros((d, d), dtype=complex)
    idx = np.flatnonzero(free.ravel())
    mats = [(j, C) for j, C in enumerate(coupling) if C is not None]
    if idx.size < 2 or not mats:
        return out, done
    dense = isinstance(mats[0][1], np.ndarray)
    total: Any = np.zeros((d * d, d * d), dtype=complex) if dense else None
    if not dense:
        total = sparse.csr_matrix((d * d, d * d), dtype=complex)
    for j, C in mats:
        total = total + (h * weights[j]) * C
    sub = total[np.ix_(idx, idx)] if dense else total[idx][:, idx]
    if (not sub.any()) if dense else sub.nnz == 0:
        return out, done
    n_comp, comp = csgraph.connected_components(abs(sub) + abs(sub).T, directed=False)
    sizes = np.bincount(comp, minlength=n_comp)
    growth = h * np.einsum("j,jab->ab", weights, rate).ravel()
    flat_out = out.ravel()
    flat_done = done.ravel()
    amps = A.ravel()
    for k in np.flatnonzero(sizes > 1):
        members = np.flatnonzero(comp == k)
        modes = idx[members]
        block = sub[np.ix_(members, members)] if dense else sub[members][:, members].toarray()
        block[np.diag_indices(members.size)] += growth[modes]
        flat_out[modes] = expm(block) @ amps[modes]
        flat_done[modes] = True
    return out, done


def rotation_superoperator(K: NDArray[np.float64]) -> sparse.csr_matrix:
    """``rho -> -[K, rho]`` as a sparse matrix on the row-major vector of rho.

    Built from K's nonzero entries k = K_ab: ``-(K rho)_(a, c)`` takes ``-k rho_(b, c)``
    and ``(rho K)_(c, b)`` takes ``k rho_(c, a)``, for every c (the entries of
    ``-(K (x) I - I (x) K^T)``, without the Kronecker products' overhead).
    """
    d = K.shape[0]
    a, b = np.nonzero(K)
    k = K[a, b]
    c = np.arange(d)
    rows = np.concatenate([np.add.outer(a * d, c).ravel(), np.add.outer(c * d, b).ravel()])
    cols = np.concatenate([np.add.outer(b * d, c).ravel(), np.add.outer(c * d, a).ravel()])
    vals = np.concatenate([np.repeat(-k, d), np.tile(k, d)])
    return sparse.csr_matrix((vals, (rows, cols)), shape=(d * d, d * d))


def apply_sector(sector: list[Any], rho: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """The sector couplings at each node applied to rho at that node (stacked)."""
    n, d = rho.shape[0], rho.shape[1]
    out = np.zeros((n, d * d), dtype=complex)
    flat = rho.reshape(n, d * d)
    shared: dict[int, list[int]] = {}  # points laid out in one pattern: together
    for j, S in enumerate(sector):
        if isinstance(S, LaidOutCoupling):
            shared.setdefault(id(S.pattern), []).append(j)
        elif S is not None:
            out[j] = S @ flat[j]
    for points in shared.values():
        data = np.stack([sector[j].data for j in points])
        out[points] = sector[points[0]].pattern.apply(data, flat[points])
    return out.reshape(rho.shape)


def sector_couplings(model: EigenframeModel, fr: FrameData, tol: float) -> list[Any] | None:
    """The Bohr-sector couplings at the step's nodes, or None where there are none.

    Only where some node has coinciding Bohr frequencies or degenerate levels
    (within ``tol``); elsewhere the eigenframe's rates are the whole generator.
    """
    tol = max(tol, frame_tol(fr.E))
    if not np.any((fr.min_bohr_gap <= tol) | (fr.min_level_gap <= tol)):
        return None
    out = sector_coupling_batch(fr.E, fr.V, model.operators, model.gamma, tol)
    return None if all(S is None for S in out) else out


def resonant_coupling(
    sector: list[Any], fr: FrameData, fp: NDArray[np.float64], tf: float, rotation: bool = True
) -> list[Any]:
    """Per node, the couplings between free modes that do not oscillate (per unit x).

    ``tf`` times the sector coupling, plus (``rotation``) the frame's rotation
    ``-f' [K, .]`` inside degenerate levels (the transported frame turns there, and the
    modes it couples share their frequency exactly; :func:`.free_modes.propagate_clusters`
    takes the rotation from ``K`` itself).  Dense arrays up to ``DENSE_MODES_MAX`` elements of
    rho (sparse matrices cost more than their products there: the triangle at 1e5 ns
    spent half its time in scipy.sparse's overhead on 64 x 64 matrices), else sparse.
    """
    tol = frame_tol(fr.E)
    d = fr.E.shape[1]
    dense = d * d <= DENSE_MODES_MAX
    out: list[Any] = []
    for j, S in enumerate(sector):
        E = fr.E[j]
        inside = (np.abs(E[:, None] - E[None, :]) <= tol) & ~np.eye(E.size, dtype=bool)
        C: Any = None
        if S is not None:
            C = tf * (S.toarray() if dense else S)
        if rotation and inside.any():
            K = np.where(inside, fr.K[j], 0.0)
            if dense:  # -(K (x) I - I (x) K^T), as rotation_superoperator lays it out
                eye = np.eye(d)
                R: Any = fp[j] * (np.kron(eye, K.T) - np.kron(K, eye))
            else:
                R = fp[j] * rotation_superoperator(K)
            C = R if C is None else C + R
        out.append(C)
    return out


def sector_leak(
    sector: list[Any],
    A: NDArray[np.complex128],
    free: NDArray[np.bool_],
    tf: float,
    h: float,
    weights: NDArray[np.float64],
) -> float:
    """What free modes feed, through their sector, into elements that are not free.

    Those elements (populations, resolved coherences) take the free modes' forcing
    in neither their collocation nor the modes' own propagation; bounded over the
    step by ``h tf sum_j w_j |S_j| |A|``, at most the amplitude itself.
    """
    d = A.shape[0]
    amp = np.abs(A.ravel()) * free.ravel()
    if not amp.any():
        return 0.0
    fed = np.zeros(d * d)
    for j, S in enumerate(sector):
        if S is not None:
            fed += (h * tf * weights[j]) * (abs(S).T @ (~free.ravel()).astype(float))
    return float(np.sum(np.minimum(fed, 1.0) * amp))
