"""The Davies (weak-coupling, secular) generator in the instantaneous eigenbasis of H.

For a Hamiltonian H with spectral decomposition ``H = sum_e e Pi_e`` (the
eigenvalues e grouped into degenerate *clusters* with a tolerance) and coupling
operators A_alpha, the jump operators are built from spectral projectors,

    L_alpha,omega = sum_(e' - e = omega) Pi_e A_alpha Pi_e',

so they do not depend on the arbitrary choice of basis inside a degenerate
cluster.  Equal Bohr frequencies omega are grouped with a tolerance.  The
generator is

    L(rho) = -i [H + H_LS, rho]
             + sum_alpha sum_omega gamma(omega) (L rho L^+ - {L^+ L, rho} / 2)

(Davies, Commun. Math. Phys. 39, 91 (1974); Albash, Boixo, Lidar and Zanardi,
New J. Phys. 14, 123016 (2012), arXiv:1206.4197).  Within one Bohr group the
rate is evaluated at each pair's own frequency and the cross terms use
``sqrt(gamma_p gamma_q)``, which keeps the generator in Lindblad form and makes
the Gibbs state stationary to machine precision even when the grouping
tolerance merges slightly different frequencies.

Implementation.  Everything is done in the eigenbasis.  The sandwich term
``sum L rho L^+`` maps the element (b, d) of rho to (a, c) only when the pairs
(a, b) and (c, d) share a Bohr group; these "pair pairs" are enumerated once per
s, vectorised, and applied with a scatter-add (``numpy.bincount``), so no
``d^2 x d^2`` matrix is ever formed for :meth:`DaviesGenerator.apply`.  Bohr
groups with more than ``max(2 d, 16)`` members (large degeneracies) are applied
as sparse matrix products instead.

Superoperators use the *column-stacking* convention: ``vec(rho)[a + c d] =
rho[a, c]`` (``rho.flatten(order="F")``), so ``vec(A X B) = (B^T kron A) vec(X)``.

The spectrum of the generator is computed sector by sector: the Davies generator
commutes with ``[H, .]``, so it is block diagonal in the coherences of equal
Bohr frequency; each block is symmetrised with the Gibbs weights (the KMS
inner product, in which the dissipator is self-adjoint) before its eigenvalues
are taken, which keeps tiny rates (uphill transitions at low temperature)
accurate.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import sparse
from scipy.sparse import csgraph

from .bath import Bath

__all__ = [
    "DEFAULT_DEGENERACY_RTOL",
    "SECULAR_RTOL",
    "DaviesGenerator",
    "EigenDecomposition",
    "GeneratorSpectrum",
    "bohr_groups",
    "eigen_decomposition",
    "group_levels",
]

#: Levels (and Bohr frequencies) closer than this times max(1, max|E|) are merged.
DEFAULT_DEGENERACY_RTOL: float = 1e-9
#: Default grouping of a simulated system (``numerics.secular_tol_ghz`` unset): Bohr
#: frequencies and levels closer than this times max(1, |H|) form one sector.  In double
#: precision ``eigh`` resolves eigenvectors of levels that close only to about
#: eps |H| / gap ~ 1e-9, so closer levels cannot be told apart reliably; grouping them
#: also makes the result independent of where inside that band a splitting falls.
SECULAR_RTOL: float = 1e-7


@dataclass(frozen=True, eq=False)
class EigenDecomposition:
    """Eigen-decomposition of a Hermitian H with degenerate levels grouped.

    Attributes
    ----------
    energies : ndarray
        Eigenvalues in ascending order (rad/ns), as returned by ``eigh``.
    vectors : ndarray
        Eigenvectors (columns).
    labels : ndarray of int
        Cluster label of each level: 0 for the lowest cluster, increasing.
    levels : ndarray
        The cluster-mean energy of each level (equal within a cluster).
    tol : float
        The absolute tolerance (rad/ns) used to group levels.
    """

    energies: NDArray[np.float64]
    vectors: NDArray[Any]
    labels: NDArray[np.int64]
    levels: NDArray[np.float64]
    tol: float

    @property
    def dim(self) -> int:
        """Hilbert-space dimension."""
        return int(self.energies.size)

    @property
    def n_clusters(self) -> int:
        """Number of distinct (grouped) levels."""
        return int(self.labels[-1]) + 1

    @property
    def ground_multiplicity(self) -> int:
        """Degeneracy of the lowest level."""
        return int(np.count_nonzero(self.labels == 0))

    def to_eigen(self, x: NDArray[Any]) -> NDArray[Any]:
        """Operator in the eigenbasis: ``V^+ X V``."""
        v = self.vectors
        return v.conj().T @ x @ v

    def from_eigen(self, y: NDArray[Any]) -> NDArray[Any]:
        """Operator back in the computational basis: ``V Y V^+``."""
        v = self.vectors
        return v @ y @ v.conj().T

    # -- target states: thermal (open) and ground projector (closed) -------------
    def target_weights(self, beta: float | None) -> NDArray[np.float64]:
        """Diagonal of the target state in the eigenbasis.

        ``beta`` given: Gibbs weights ``exp(-beta e) / Z`` (cluster energies);
        ``beta = None``: the projector on the lowest cluster (not normalised by
        its multiplicity when the ground level is degenerate, it is normalised).
        """
        if beta is None or math.isinf(beta):
            g = (self.labels == 0).astype(float)
        else:
            g = np.exp(-beta * (self.levels - self.levels[0]))
        return g / g.sum()

    def target_state(self, beta: float | None) -> NDArray[Any]:
        """Gibbs state at ``beta`` (or the ground-level projector state for None)."""
        p = self.target_weights(beta)
        v = self.vectors
        return (v * p) @ v.conj().T

    def target_derivative_eigen(self, dh_eigen: NDArray[Any], beta: float | None) -> NDArray[Any]:
        """d sigma / ds in the eigenbasis, given dH/ds in the eigenbasis.

        Exact first-order perturbation of the matrix function
        ``sigma = g(H) / tr g(H)`` (Daleckii-Krein formula): the divided
        differences ``(g(e_a) - g(e_b)) / (e_a - e_b)`` (``g'(e_a)`` within a
        cluster) times ``(dH/ds)_ab``, minus the change of normalisation.
        For ``beta = None`` the target is the projector on the lowest cluster
        (assumed non-degenerate when used by a closed-system integrator).
        """
        e = self.levels
        diff = e[:, None] - e[None, :]
        if beta is not None and not math.isinf(beta) and self.n_clusters == self.dim:
            # non-degenerate levels: the lean path (the general formula, specialised)
            p = np.exp(-beta * (e - e[0]))
            p /= p.sum()
            gap = np.abs(diff)
            gap.flat[:: self.dim + 1] = 1.0
            # (p_a - p_b) / (e_a - e_b) = p_lower expm1(-beta |e_a - e_b|) / |e_a - e_b|
            g1 = np.maximum(p[:, None], p[None, :]) * np.expm1(-beta * gap) / gap
            g1.flat[:: self.dim + 1] = -beta * p
            out = g1 * dh_eigen
            dd = np.diagonal(dh_eigen).real
            out.flat[:: self.dim + 1] += (beta * float(np.dot(p, dd))) * p
            return out
        if beta is None or math.isinf(beta):
            g = (self.labels == 0).astype(float)
            same = self.labels[:, None] == self.labels[None, :]
            with np.errstate(divide="ignore", invalid="ignore"):
                g1 = np.where(same, 0.0, (g[:, None] - g[None, :]) / np.where(same, 1.0, diff))
            return g1 * dh_eigen / g.sum()
        g = np.exp(-beta * (e - e[0]))
        z = g.sum()
        p = g / z
        gap = np.abs(diff)
        gmax = np.maximum(g[:, None], g[None, :])  # the lower level of each pair
        with np.errstate(divide="ignore", invalid="ignore"):
            g1 = np.where(
                gap > 0.0,
                gmax * np.expm1(-beta * gap) / np.where(gap > 0, gap, 1.0),
                -beta * g[:, None] * np.ones_like(gap),
            )
        out = g1 * dh_eigen / z
        mean_dh = float(np.real(np.sum(p * np.diag(dh_eigen))))
        out[np.diag_indices_from(out)] += beta * p * mean_dh
        return out


def eigen_decomposition(h: NDArray[Any], tol: float | None = None) -> EigenDecomposition:
    """Diagonalise a Hermitian matrix and group (nearly) degenerate levels.

    Parameters
    ----------
    h : ndarray
        Hermitian matrix (rad/ns).
    tol : float, optional
        Absolute tolerance for equal levels; default
        ``DEFAULT_DEGENERACY_RTOL * max(1, max |E|)``.
    """
    energies, vectors = np.linalg.eigh(h)
    if tol is None:
        tol = DEFAULT_DEGENERACY_RTOL * max(1.0, float(np.max(np.abs(energies))))
    labels, levels = _cluster(energies, tol)
    return EigenDecomposition(energies, vectors, labels, levels, float(tol))


def _cluster(
    energies: NDArray[np.float64], tol: float
) -> tuple[NDArray[np.int64], NDArray[np.float64]]:
    """Cluster labels and cluster-mean levels of ascending energies (gaps above tol split)."""
    split = np.diff(energies) > tol
    if split.all():  # no degeneracy: the common case, kept cheap
        return np.arange(energies.size, dtype=np.int64), energies
    labels = np.concatenate(([0], np.cumsum(split))).astype(np.int64)
    means = np.bincount(labels, weights=energies) / np.bincount(labels)
    return labels, means[labels]


def group_levels(energies: NDArray[np.float64], tol: float) -> NDArray[np.float64]:
    """Each energy replaced by the mean of its cluster of (nearly) degenerate levels.

    ``energies`` may come in any order (a frame's labels need not follow the energy
    ranks); levels whose sorted neighbours lie within ``tol`` form one cluster.
    """
    order = np.argsort(energies, kind="stable")
    _, levels = _cluster(energies[order], tol)
    out = np.empty_like(levels)
    out[order] = levels
    return out


def bohr_groups(
    levels: NDArray[np.float64], tol: float
) -> tuple[NDArray[np.float64], NDArray[np.int64], int]:
    """Bohr frequencies ``omega[a, b] = e_b - e_a`` and their group labels.

    Frequencies are sorted and split wherever consecutive values differ by more
    than ``tol``.  Pairs inside one cluster have exactly equal frequency.

    Returns
    -------
    omega : ndarray (d, d)
    group : ndarray of int (d, d)
    n_groups : int
    """
    omega = levels[None, :] - levels[:, None]
    flat = omega.ravel()
    order = np.argsort(flat, kind="stable")
    new = np.diff(flat[order]) > tol
    gid_sorted = np.concatenate(([0], np.cumsum(new)))
    gid = np.empty(flat.size, dtype=np.int64)
    gid[order] = gid_sorted
    return omega, gid.reshape(omega.shape), int(gid_sorted[-1]) + 1


def _pair_pairs(
    gid: NDArray[np.int64], max_small: int
) -> tuple[NDArray[np.int64], NDArray[np.int64], list[NDArray[np.int64]]]:
    """All ordered (p, q) with p, q in the same small group; members of large groups."""
    flat = gid.ravel()
    order = np.argsort(flat, kind="stable")
    sizes = np.bincount(flat)
    starts = np.concatenate(([0], np.cumsum(sizes)[:-1]))
    small = np.flatnonzero(sizes <= max_small)
    large = np.flatnonzero(sizes > max_small)
    sz = sizes[small]
    counts = sz * sz
    total = int(counts.sum())
    offs = np.concatenate(([0], np.cumsum(counts)[:-1]))
    local = np.arange(total) - np.repeat(offs, counts)
    rep_sz = np.repeat(sz, counts)
    base = np.repeat(starts[small], counts)
    p = order[base + local // rep_sz]
    q = order[base + local % rep_sz]
    large_members = [order[starts[g] : starts[g] + sizes[g]] for g in large]
    return p, q, large_members


def _distinct_bohr(omega: NDArray[np.float64], tol: float) -> bool:
    """True if all off-diagonal Bohr frequencies differ from each other and from 0."""
    d = omega.shape[0]
    if d == 1:
        return True
    if d == 2:
        return bool(abs(omega[0, 1]) > tol)
    off = np.sort(omega[~np.eye(d, dtype=bool)])
    return bool(np.min(np.abs(off)) > tol and (off.size < 2 or np.min(np.diff(off)) > tol))


@dataclass(frozen=True)
class GeneratorSpectrum:
    """Eigenvalues of a generator and what they say about its steady state.

    Attributes
    ----------
    eigenvalues : ndarray
        All d^2 eigenvalues (rad/ns).
    zero_count : int
        How many are zero within ``zero_tol`` (the number of independent
        steady states; 1 means unique).
    gap : float
        Smallest |Re lambda| among the others (rad/ns); 0 if some non-zero
        eigenvalue has no decay (an undamped oscillation).
    zero_tol : float
        Threshold used, relative to the largest rate.
    """

    eigenvalues: NDArray[np.complex128] = field(repr=False)
    zero_count: int
    gap: float
    zero_tol: float


class DaviesGenerator:
    """The Davies generator at one point s, in the eigenbasis of H(s).

    Parameters
    ----------
    eig : EigenDecomposition
        Of H(s).
    bath : Bath or None
        ``None`` gives the purely coherent generator ``-i [H, .]`` (closed system).
    bohr_tol : float, optional
        Tolerance for equal Bohr frequencies (default: ``eig.tol``).

    Notes
    -----
    :meth:`apply_eigen` and :meth:`apply` act on a d x d matrix without forming
    the d^2 x d^2 superoperator; :meth:`superoperator` builds it (column-stacking
    vec) for small d.
    """

    def __init__(
        self, eig: EigenDecomposition, bath: Bath | None, *, bohr_tol: float | None = None
    ) -> None:
        self.eig = eig
        self.bath = bath
        d = eig.dim
        self.dim = d
        self._energy_diff = eig.energies[:, None] - eig.energies[None, :]
        self._lamb: NDArray[Any] | None = None
        self._generic = False
        if bath is None:
            return
        if bath.dim != d:
            raise ValueError(f"bath operators are {bath.dim}-dimensional, H is {d}-dimensional")
        tol = eig.tol if bohr_tol is None else bohr_tol
        levels = eig.levels
        omega = levels[None, :] - levels[:, None]
        gamma = bath.gamma(omega)
        if not (gamma.min() >= 0.0 and gamma.max() < np.inf):
            raise ValueError("spectral density returned a negative or non-finite rate")
        self.omega = omega
        self.gamma = gamma
        vec = eig.vectors
        ops = vec.conj().T @ np.asarray(bath.operator_stack) @ vec  # (n, d, d) in the eigenbasis
        self._generic = False
        if not bath.lamb_shift and eig.n_clusters == d and _distinct_bohr(omega, tol):
            self._init_generic(ops, gamma)
            return
        _, gid, _ = bohr_groups(levels, tol)
        af = ops.reshape(len(bath.operators), d * d)
        sqrt_g = np.sqrt(gamma).ravel()
        p, q, large = _pair_pairs(gid, max(2 * d, 16))
        m = np.einsum("ij,ij->j", af[:, p], af[:, q].conj()) if p.size else np.zeros(0, complex)
        w = sqrt_g[p] * sqrt_g[q] * m
        keep = w != 0
        ap, bp, aq, bq = p // d, p % d, q // d, q % d
        self._t = (ap * d + aq)[keep]
        self._u = (bp * d + bq)[keep]
        self._w = w[keep]
        same_a = ap == aq
        kmat = np.zeros((d, d), dtype=complex)
        np.add.at(kmat, (bp[same_a], bq[same_a]), w[same_a].conj())
        self._large: list[sparse.csr_matrix] = []
        lamb = bath.lamb_shift
        s_flat = bath.lamb_shift_at(omega).ravel() if lamb else None
        hls = np.zeros((d, d), dtype=complex) if lamb else None
        if lamb:
            assert s_flat is not None and hls is not None
            np.add.at(
                hls,
                (bp[same_a], bq[same_a]),
                0.5 * (s_flat[p[same_a]] + s_flat[q[same_a]]) * m[same_a].conj(),
            )
        for members in large:
            rows, cols = members // d, members % d
            for k in range(af.shape[0]):
                vals = af[k, members]
                lop = sparse.csr_matrix((sqrt_g[members] * vals, (rows, cols)), shape=(d, d))
                self._large.append(lop)
                kmat += (lop.conj().T @ lop).toarray()
                if lamb:
                    assert s_flat is not None and hls is not None
                    l1 = sparse.csr_matrix((vals, (rows, cols)), shape=(d, d))
                    ls = sparse.csr_matrix((s_flat[members] * vals, (rows, cols)), shape=(d, d))
                    hls += 0.5 * (ls.conj().T @ l1 + l1.conj().T @ ls).toarray()
        off = kmat - np.diag(np.diag(kmat))
        self._k_diag: NDArray[Any] | None = np.diag(kmat).copy() if not np.any(off) else None
        self._k = kmat
        self._lamb = hls

    def _init_generic(self, ops: NDArray[Any], gamma: NDArray[np.float64]) -> None:
        """Non-degenerate levels and distinct Bohr frequencies: closed-form structure.

        Then the only Bohr group with more than one pair is omega = 0 (the
        diagonal), and the generator reduces to a Pauli rate equation for the
        populations, ``R[a, b] = gamma(e_b - e_a) sum_alpha |A_ab|^2``, plus
        pure dephasing of each coherence (the same formula as the general case,
        specialised).
        """
        d = self.dim
        weights = np.sum(np.abs(ops) ** 2, axis=0)  # sum_alpha |A_ab|^2
        rates = gamma * weights  # R[a, b]: rate of b -> a (diagonal: omega = 0 terms)
        kdiag = rates.sum(axis=0)  # K is diagonal: K_bb = sum_a R[a, b]
        diag_ops = np.diagonal(ops, axis1=1, axis2=2)  # (n, d): A_aa per alpha
        cross = gamma[0, 0] * (diag_ops.T @ diag_ops.conj())  # sum_alpha gamma(0) A_aa conj(A_cc)
        coef = -1j * self._energy_diff - 0.5 * (kdiag[:, None] + kdiag[None, :]) + cross
        coef[np.diag_indices(d)] -= np.diag(cross)  # the diagonal is in the rate matrix
        self._generic = True
        self._coef = coef
        self._rates = rates
        self._cross = cross
        self._k_diag = kdiag.astype(complex)

    def _pair_form_generic(self) -> None:
        """The generic structure in the pair-pair form (for superoperators and spectra)."""
        d = self.dim
        rates, cross = self._rates, self._cross
        self._k = np.diag(self._k_diag)
        idx = np.arange(d)
        pop_t = np.repeat(idx * (d + 1), d)  # (a, a) <- (b, b)
        pop_u = np.tile(idx * (d + 1), d)
        aa, cc = np.meshgrid(idx, idx, indexing="ij")
        off = aa != cc
        coh = (aa * d + cc)[off]
        self._t = np.concatenate((pop_t, coh))
        self._u = np.concatenate((pop_u, coh))
        self._w = np.concatenate((rates.ravel().astype(complex), cross[off]))
        self._large = []

    @property
    def closed(self) -> bool:
        """True for the purely coherent generator."""
        return self.bath is None

    # -- action on a matrix ------------------------------------------------------
    def apply_eigen(self, x: NDArray[Any]) -> NDArray[Any]:
        """L(X) for X given and returned in the eigenbasis."""
        if self._generic:
            out = self._coef * x
            out[np.diag_indices(self.dim)] += self._rates @ np.diagonal(x)
            return out
        out = -1j * self._energy_diff * x
        if self.bath is None:
            return out
        d = self.dim
        flat = out.reshape(-1)
        if self._t.size:
            vals = self._w * x.reshape(-1)[self._u]
            flat += np.bincount(self._t, weights=vals.real, minlength=d * d)
            flat += 1j * np.bincount(self._t, weights=vals.imag, minlength=d * d)
        for lop in self._large:
            lx = lop @ x
            out += (lop @ lx.conj().T).conj().T
        if self._k_diag is not None:
            out -= 0.5 * (self._k_diag[:, None] + self._k_diag[None, :]) * x
        else:
            out -= 0.5 * (self._k @ x + x @ self._k)
        if self._lamb is not None:
            out -= 1j * (self._lamb @ x - x @ self._lamb)
        return out

    def apply(self, rho: NDArray[Any]) -> NDArray[Any]:
        """L(rho) in the computational basis."""
        return self.eig.from_eigen(
            self.apply_eigen(self.eig.to_eigen(np.asarray(rho, dtype=complex)))
        )

    # -- structure ---------------------------------------------------------------
    def assembly_entries(self) -> int:
        """Stored entries of the sparse (d^2, d^2) form, before it is built.

        Large groups of equal Bohr frequencies (a degenerate driver at s = 0) enter
        as Kronecker products of dense d x d operators, whose entries grow as d^4;
        callers check this before asking for :meth:`spectrum` at large d.
        """
        d = self.dim
        if self.bath is None:
            return d**2
        pairs = int(self._t.size) if hasattr(self, "_t") else d**2
        groups = sum(int(lop.nnz) ** 2 for lop in getattr(self, "_large", ()))
        anticommutator = 2 * d * int(np.count_nonzero(self._k)) if hasattr(self, "_k") else d**2
        lamb = 0 if self._lamb is None else 2 * d * int(np.count_nonzero(self._lamb))
        return pairs + groups + anticommutator + lamb

    def pauli_structure(self) -> tuple[NDArray[np.float64], NDArray[np.complex128]] | None:
        """The decoupled form of a generator with distinct levels and Bohr frequencies.

        Returns
        -------
        (W, lam) or None
            ``W`` (d, d), the Pauli rate matrix of the populations in the eigenbasis
            (``p' = W p``, columns summing to zero); ``lam`` (d, d), the complex rate
            of each coherence (``x_ab' = lam_ab x_ab``; its diagonal is not used).
            None when levels or Bohr frequencies coincide (the coherences couple)
            or for a closed system.
        """
        if not self._generic:
            return None
        W = np.array(self._rates, dtype=float)
        W[np.diag_indices(self.dim)] += np.diagonal(self._coef).real
        return W, np.array(self._coef, dtype=complex)

    def sparse_eigen(self, *, coherent: bool = True) -> sparse.csr_matrix:
        """The generator as a sparse (d^2, d^2) matrix in the eigenbasis.

        Row-major vectorisation: element (a, c) of X is entry ``a d + c``.
        ``coherent=False`` leaves out the ``-i [H, .]`` part.
        """
        return self._sparse_eigen_rowmajor(coherent=coherent)

    # -- superoperators ----------------------------------------------------------
    def _sparse_eigen_rowmajor(self, *, coherent: bool = True) -> sparse.csr_matrix:
        """The generator in the eigenbasis, row-major vec (internal helper)."""
        d = self.dim
        n = d * d
        if self._generic and not hasattr(self, "_t"):
            self._pair_form_generic()
        mats = []
        if coherent:
            mats.append(sparse.diags(-1j * self._energy_diff.ravel(), format="csr"))
        if self.bath is not None:
            mats.append(sparse.csr_matrix((self._w, (self._t, self._u)), shape=(n, n)))
            for lop in self._large:
                mats.append(sparse.kron(lop, lop.conj(), format="csr"))
            eye = sparse.identity(d, format="csr")
            ks = sparse.csr_matrix(self._k)
            mats.append(-0.5 * (sparse.kron(ks, eye) + sparse.kron(eye, ks.T)))
            if self._lamb is not None:
                hs = sparse.csr_matrix(self._lamb)
                mats.append(-1j * (sparse.kron(hs, eye) - sparse.kron(eye, hs.T)))
        total = mats[0]
        for m_ in mats[1:]:
            total = total + m_
        return sparse.csr_matrix(total, dtype=complex)

    def superoperator(self, basis: str = "computational") -> NDArray[np.complex128]:
        """The dense d^2 x d^2 generator, column-stacking vec convention.

        Parameters
        ----------
        basis : {"computational", "eigen"}
            Basis of the density matrices it acts on.

        Notes
        -----
        ``vec(rho)[a + c d] = rho[a, c]``.  Memory grows as d^4: limited to d <= 32.
        """
        d = self.dim
        if d > 32:
            raise ValueError(f"dense superoperator limited to d <= 32, got d = {d}; use apply()")
        lr = self._sparse_eigen_rowmajor().toarray()
        if basis == "computational":
            v = self.eig.vectors
            t = np.kron(v, v.conj())
            lr = t @ lr @ t.conj().T
        elif basis != "eigen":
            raise ValueError("basis must be 'computational' or 'eigen'")
        return lr.reshape(d, d, d, d).transpose(1, 0, 3, 2).reshape(d * d, d * d)

    # -- spectrum, gap, steady state --------------------------------------------
    def _sectors(self) -> tuple[sparse.csr_matrix, int, NDArray[np.int64]]:
        diss = self._sparse_eigen_rowmajor(coherent=False)
        pattern = abs(diss) + abs(diss).T
        ncomp, comp = csgraph.connected_components(pattern, directed=False)
        return diss, ncomp, comp

    def spectrum(self) -> GeneratorSpectrum:
        """All eigenvalues, sector by sector, with the steady-state count and gap.

        Each sector is symmetrised with the Gibbs weights (KMS) when the bath is
        thermal and there is no Lamb shift, so ``eigvalsh`` applies.
        """
        d = self.dim
        nu = self._energy_diff.ravel()
        if self.bath is None:
            ev = -1j * nu.astype(complex)
            return GeneratorSpectrum(
                ev,
                int(np.count_nonzero(np.abs(ev) <= 1e-12 * max(1.0, np.abs(ev).max()))),
                0.0,
                0.0,
            )
        diss, ncomp, comp = self._sectors()
        beta = self.bath.beta
        symmetric = self._lamb is None and beta is not None and not math.isinf(beta)
        if symmetric:
            e = self.eig.levels
            logp = -beta * (e - e[0])
            logw = 0.25 * (logp[:, None] + logp[None, :]).ravel()
        ev = np.empty(d * d, dtype=complex)
        diag = diss.diagonal()
        sizes = np.bincount(comp, minlength=ncomp)
        single = sizes[comp] == 1
        ev[single] = diag[single] - 1j * nu[single]
        for c in np.flatnonzero(sizes > 1):
            idx = np.flatnonzero(comp == c)
            block = diss[idx][:, idx].toarray()
            mean_nu = float(np.mean(nu[idx]))
            if symmetric:
                sc = np.exp(logw[idx][None, :] - logw[idx][:, None])
                hb = block * sc
                herm = 0.5 * (hb + hb.conj().T)
                vals = np.linalg.eigvalsh(herm).astype(complex)
            else:
                vals = np.linalg.eigvals(block)
            ev[idx] = vals - 1j * mean_nu
        scale = float(np.max(np.abs(ev.real))) if ev.size else 0.0
        zero_tol = 1e-11 * scale
        is_zero = np.abs(ev) <= zero_tol
        rest = np.abs(ev[~is_zero].real)
        gap = float(rest.min()) if rest.size else 0.0
        if gap <= zero_tol:
            gap = 0.0
        return GeneratorSpectrum(ev, int(np.count_nonzero(is_zero)), gap, zero_tol)

    def steady_state_numeric(self) -> NDArray[np.complex128]:
        """The steady state found as a null vector of the generator (computational basis).

        Used to *check* that the Gibbs state is stationary; the integrators use
        the Gibbs state directly.  Raises ``ValueError`` for a closed system.
        """
        if self.bath is None:
            raise ValueError("a closed system has no unique steady state")
        d = self.dim
        diss, _, comp = self._sectors()
        full = diss + sparse.diags(-1j * self._energy_diff.ravel())
        idx = np.flatnonzero(comp == comp[0])  # the sector holding the populations
        block = full[idx][:, idx].toarray()
        vals, vecs = np.linalg.eig(block)
        k = int(np.argmin(np.abs(vals)))
        x = np.zeros(d * d, dtype=complex)
        x[idx] = vecs[:, k]
        rho_e = x.reshape(d, d)
        rho = self.eig.from_eigen(rho_e)
        rho = 0.5 * (rho + rho.conj().T)
        return rho / np.trace(rho)
