"""One step of the slow (non-oscillating) part of the deviation in the eigenframe.

On a step the populations and the resolved coherences are collocation polynomials
(Radau IIA, L-stable and stiffly accurate: Hairer & Wanner, *Solving ODEs II*,
1996); coherences whose phase turns a lot take a Levin-type collocation of their
slow particular solution (Levin, Math. Comp. 38, 531, 1982).  The collocation
equations are linear and solved block by block (populations, each coherence) for a
given coupling (the frame's rotation and the sector couplings of the Davies
generator); that block-Jacobi iteration is replaced by GMRES (Saad & Schultz, 1986)
preconditioned with the same block solves when it contracts too slowly.
Populations and the most strongly rotating coherences near a narrow avoided
crossing are solved together (:class:`_CoreBlock`).  The local error is the spectral
tail of the collocation polynomials.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.linalg import lu_factor, lu_solve
from scipy.sparse.linalg import LinearOperator, gmres

from .collocation import CollocationScheme, lagrange_weights
from .frame import FrameData
from .sectors import apply_sector

__all__ = ["SlowStep", "predict_step", "slow_step", "strong_pairs"]

#: Population blocks (stages x levels) up to this size are inverted explicitly, larger
#: ones LU-factored.  Measured with three solves per step (one BLAS thread, 2026-12-03):
#: inverse and solves 0.024 ms against LU 0.030 ms at 32, 0.081 against 0.047 at 64,
#: 0.45 against 0.12 at 128 (four qubits, eight stages).
SMALL_POPULATION_BLOCK = 32
#: Block-Jacobi sweeps of the slow collocation system before switching to GMRES.
SLOW_ITERATION_LIMIT = 40
#: The collocation system of a step is solved to this fraction of the local error target.
SLOW_SOLVE_TOL = 1e-2
#: A sweep that shrinks the change by less than this factor hands over to GMRES.
SLOW_CONTRACTION = 0.5
#: GMRES restart length and number of restarts for the slow collocation system.
KRYLOV_RESTART = 40
KRYLOV_MAXITER = 5
#: A resolved coherence whose frame-rotation coupling to its two populations turns by
#: more than this over a step (h |f'| |K_ab|, near a narrow avoided crossing) is
#: solved together with the populations instead of by block Jacobi.
CORE_COUPLING = 0.05
#: At most this many level pairs (the most strongly coupled) join the populations.
CORE_MAX_PAIRS = 8
#: Solve the coherences coupled in pairs through those level pairs as 2-mode blocks.
PAIR_BLOCKS = True


@dataclass
class SlowStep:
    P: NDArray[np.float64]  # (m+1, d) populations at the nodes (node 0 = start)
    C: NDArray[np.complex128]  # (m+1, d, d) coherences (slow part where Levin)
    err: float
    iterations: int
    resolving: bool = False  # the error is that of a resolved oscillation (|tf lambda h| >= 1)


class _CoreBlock:
    """Populations solved together with the most strongly rotating resolved coherences.

    Near a narrow avoided crossing the frame turns fast within one pair of levels:
    the rotation couples the pair's populations and coherences so strongly that block
    Jacobi contracts slowly and GMRES needs many sweeps.  These few coherences (both
    orders of each pair) join the population block; the joint collocation system is
    solved through the Schur complement of the (already factored) population matrix,
    so the population factorisation is reused and only a small complex system of
    ``m * n_core`` unknowns is added.
    """

    def __init__(
        self,
        h: float,
        A: NDArray[np.float64],
        K: NDArray[np.float64],
        fp: NDArray[np.float64],
        lam: NDArray[np.complex128],
        a: NDArray[np.intp],
        b: NDArray[np.intp],
        pop_solve: Any,
    ) -> None:
        m, d = A.shape[0], K.shape[-1]
        nc = a.size
        self.a, self.b, self.pop_solve = a, b, pop_solve
        cols = np.arange(nc)
        kab = fp[:, None] * K[:, a, b]  # (m, nc): f' K_ab at the Radau nodes
        # -f' [K, rho]: population a and b rows from coherence (a, b), and back
        self.Bpc = np.zeros((m, d, nc))
        self.Bpc[:, a, cols] = -kab
        self.Bpc[:, b, cols] = kab
        self.Bcp = np.zeros((m, nc, d))
        self.Bcp[:, cols, a] = kab
        self.Bcp[:, cols, b] = -kab
        hA = h * A
        Mpc = -np.einsum("ij,jau->iaju", hA, self.Bpc).reshape(m * d, m * nc)
        self.Mcp = -np.einsum("ij,jua->iuja", hA, self.Bcp).reshape(m * nc, m * d)
        Mcc = np.eye(m * nc) - np.einsum("ij,ju,uv->iujv", hA, lam, np.eye(nc)).reshape(
            m * nc, m * nc
        )
        self.Z = pop_solve(Mpc)  # real
        self.S_inv = np.linalg.inv(Mcc - self.Mcp @ self.Z)

    def internal(
        self, P: NDArray[np.complex128], Cc: NDArray[np.complex128]
    ) -> tuple[NDArray[np.complex128], NDArray[np.complex128]]:
        """The coupling within the block at the Radau nodes: (population rows, core rows)."""
        return (
            np.einsum("jau,ju->ja", self.Bpc, Cc),
            np.einsum("jua,ja->ju", self.Bcp, P),
        )

    def solve(
        self, rhs_p: NDArray[np.complex128], rhs_c: NDArray[np.complex128]
    ) -> tuple[NDArray[np.complex128], NDArray[np.complex128]]:
        """Solve the joint system for the stacked right-hand sides."""
        xp = _real_apply(self.pop_solve, rhs_p)
        xc = self.S_inv @ (rhs_c - _real_apply(self.Mcp.__matmul__, xp))
        return xp - _real_apply(self.Z.__matmul__, xc), xc


def _real_apply(op: Any, v: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """A real linear map applied to a complex vector (real and imaginary parts as columns)."""
    out = op(np.column_stack([v.real, v.imag]))
    return out[:, 0] + 1j * out[:, 1]


def strong_pairs(
    h: float, K: NDArray[np.float64], fp: NDArray[np.float64], allowed: NDArray[np.bool_]
) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """Level pairs (a < b) among ``allowed`` whose frame rotation turns by at least
    ``CORE_COUPLING`` over the step, the ``CORE_MAX_PAIRS`` strongest first."""
    d = K.shape[-1]
    iu, ju = np.triu_indices(d, 1)
    strength = h * np.max(np.abs(fp)) * np.max(np.abs(K[:, iu, ju]), axis=0)
    chosen = np.flatnonzero(allowed[iu, ju] & (strength >= CORE_COUPLING))
    chosen = chosen[np.argsort(strength[chosen])[::-1][:CORE_MAX_PAIRS]]
    return iu[chosen], ju[chosen]


def _core_pairs(
    h: float, K: NDArray[np.float64], fp: NDArray[np.float64], resolved: NDArray[np.bool_]
) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """Coherences (a, b) and (b, a) of the level pairs that join the population block."""
    pa, pb = strong_pairs(h, K, fp, resolved)
    return np.concatenate([pa, pb]), np.concatenate([pb, pa])


class _PairBlocks:
    """Coherences coupled in pairs through a fast-rotating level pair, solved jointly.

    For a level pair (a, b) whose frame rotates fast, the rotation couples coherence
    (c, a) with (c, b), and (a, c) with (b, c), for every other level c:
    ``G_u += -k rho_v`` and ``G_v += +k rho_u`` with ``k = f' K_ab``.  When both
    coherences are exponentially treated with little phase over the step, the Levin
    blocks amplify that coupling and block Jacobi (and GMRES after it) converges
    slowly; solving each such pair as one 2-mode block removes the amplification.
    Pairs of one kind only (both Levin or both resolved); each coherence joins at most
    one block, and not if it is in the core block.
    """

    def __init__(
        self,
        h: float,
        scheme: CollocationScheme,
        K: NDArray[np.float64],
        fp: NDArray[np.float64],
        lam: NDArray[np.complex128],
        levin: NDArray[np.bool_],
        taken: NDArray[np.bool_],
        pairs: tuple[NDArray[np.intp], NDArray[np.intp]],
    ) -> None:
        d = K.shape[-1]
        m1 = scheme.tau.size
        used = taken.copy()
        us: list[NDArray[np.intp]] = []
        vs: list[NDArray[np.intp]] = []
        ks: list[NDArray[np.float64]] = []
        for a, b in zip(*pairs, strict=True):
            cs = np.setdiff1d(np.arange(d), [a, b])
            k = fp * K[:, a, b]  # (m + 1,)
            for u, v in ((cs * d + a, cs * d + b), (a * d + cs, b * d + cs)):
                ok = ~used.flat[u] & ~used.flat[v] & (levin.flat[u] == levin.flat[v])
                used.flat[u[ok]] = True
                used.flat[v[ok]] = True
                us.append(u[ok])
                vs.append(v[ok])
                ks.append(np.repeat(k[None], int(ok.sum()), axis=0))
        u = np.concatenate(us)
        v = np.concatenate(vs)
        k = np.concatenate(ks) if ks else np.zeros((0, m1))
        lam_flat = lam.reshape(m1, d * d)
        self.levin_kind = levin.flat[u]
        self.u, self.v, self.k = u, v, k  # k: (n_blocks, m + 1)
        self.size = u.size
        L = self.levin_kind
        # Levin: [[D/h - lam_u, k], [-k, D/h - lam_v]] on the m + 1 nodes
        if L.any():
            Dh = scheme.D / h
            n = int(L.sum())
            mat = np.zeros((n, 2 * m1, 2 * m1), dtype=complex)
            kk = k[L]
            idx = np.arange(m1)
            mat[:, :m1, :m1] = Dh
            mat[:, m1:, m1:] = Dh
            mat[:, idx, idx] -= lam_flat[:, u[L]].T
            mat[:, m1 + idx, m1 + idx] -= lam_flat[:, v[L]].T
            mat[:, idx, m1 + idx] = kk
            mat[:, m1 + idx, idx] = -kk
            self.levin_inv = np.linalg.inv(mat)
        # resolved: [[I - hA lam_u, hA k], [-hA k, I - hA lam_v]] on the Radau nodes
        R = ~L
        if R.any():
            m = m1 - 1
            hA = h * scheme.A
            n = int(R.sum())
            kk = k[R][:, 1:]
            mat = np.zeros((n, 2 * m, 2 * m), dtype=complex)
            eye = np.eye(m)
            mat[:, :m, :m] = eye - hA[None] * lam_flat[1:, u[R]].T[:, None, :]
            mat[:, m:, m:] = eye - hA[None] * lam_flat[1:, v[R]].T[:, None, :]
            mat[:, :m, m:] = hA[None] * kk[:, None, :]
            mat[:, m:, :m] = -hA[None] * kk[:, None, :]
            self.resolved_inv = np.linalg.inv(mat)

    def solve(
        self,
        G: NDArray[np.complex128],
        C: NDArray[np.complex128],
        c0: NDArray[np.complex128],
        forced: bool,
        h: float,
        A: NDArray[np.float64],
        C_new: NDArray[np.complex128],
    ) -> None:
        """Overwrite the block coherences of ``C_new`` with the joint solution.

        ``G`` is the full coupling computed from ``C`` (whose within-block part is
        removed here); ``c0`` the start values of resolved coherences.
        """
        m1 = G.shape[0]
        n2 = G.shape[1] * G.shape[2]
        Gf = G.reshape(m1, n2)
        Cf = C.reshape(m1, n2)
        out = C_new.reshape(m1, n2)
        u, v, k = self.u, self.v, self.k
        gu = Gf[:, u].T + k * Cf[:, v].T  # (n, m + 1) without the within-block part
        gv = Gf[:, v].T - k * Cf[:, u].T
        L = self.levin_kind
        if L.any():
            rhs = np.concatenate([gu[L], gv[L]], axis=1)[..., None]
            sol = (self.levin_inv @ rhs)[..., 0]
            out[:, u[L]] = sol[:, :m1].T
            out[:, v[L]] = sol[:, m1:].T
        R = ~L
        if R.any():
            m = m1 - 1
            start_u = c0.flat[u[R]] if forced else np.zeros(int(R.sum()), dtype=complex)
            start_v = c0.flat[v[R]] if forced else np.zeros(int(R.sum()), dtype=complex)
            ru = start_u[:, None] + h * gu[R][:, 1:] @ A.T
            rv = start_v[:, None] + h * gv[R][:, 1:] @ A.T
            rhs = np.concatenate([ru, rv], axis=1)[..., None]
            sol = (self.resolved_inv @ rhs)[..., 0]
            out[0, u[R]] = start_u
            out[0, v[R]] = start_v
            out[1:, u[R]] = sol[:, :m].T
            out[1:, v[R]] = sol[:, m:].T


class _CollocationSystem:
    """The linear collocation equations of one step, solved block by block.

    Set up once per step (the population matrix factored, the coherence blocks in
    use inverted, the core and pair blocks found); :meth:`block_solve` solves every
    block for the coupling computed from a trial solution.
    """

    def __init__(
        self,
        h: float,
        p0: NDArray[np.float64],
        c0: NDArray[np.complex128],
        levin: NDArray[np.bool_],
        fr: FrameData,
        fp: NDArray[np.float64],
        tf: float,
        scheme: CollocationScheme,
        sector: list[Any] | None,
    ) -> None:
        m = scheme.c.size
        d = p0.size
        self.h, self.p0, self.c0, self.fr, self.fp, self.tf = h, p0, c0, fr, fp, tf
        self.scheme, self.sector, self.m, self.d = scheme, sector, m, d
        off = ~np.eye(d, dtype=bool)
        lam = tf * fr.lam  # (m+1, d, d)
        # populations: P_i - h sum_j a_ij tf W_j P_j = p0 + h sum_j a_ij G_j
        Wn = tf * fr.W[1:]
        M = np.eye(m * d) - h * np.einsum("ij,jab->iajb", scheme.A, Wn).reshape(m * d, m * d)
        if m * d <= SMALL_POPULATION_BLOCK:  # tiny: an explicit inverse has less overhead
            self._pop_inv = np.linalg.inv(M)
            self._pop_lu = None
        else:
            self._pop_lu = lu_factor(M, check_finite=False)
        resolved = off & ~levin
        # each coherence block is solved on its own: factor only the blocks in use
        self.li, self.lj = np.nonzero(levin)
        self.ri, self.rj = np.nonzero(resolved)
        if self.li.size:
            lam_l = lam[:, self.li, self.lj].T  # (n_levin, m+1)
            lmat = scheme.D[None] / h - lam_l[:, :, None] * np.eye(m + 1)[None]
            self.linv = np.linalg.inv(lmat)
        if self.ri.size:
            lam_r = lam[1:, self.ri, self.rj].T  # (n_resolved, m)
            rmat = np.eye(m)[None] - h * scheme.A[None] * lam_r[:, None, :]
            self.rinv = np.linalg.inv(rmat)
        core_a, core_b = _core_pairs(h, fr.K[1:], fp[1:], resolved)
        self.core_a, self.core_b = core_a, core_b
        self.core = None
        if core_a.size:
            self.core = _CoreBlock(
                h,
                scheme.A,
                fr.K[1:],
                fp[1:],
                lam[1:, core_a, core_b],
                core_a,
                core_b,
                self._pop_solve,
            )
        self.blocks = None
        if PAIR_BLOCKS:
            strong = strong_pairs(h, fr.K[1:], fp[1:], off)
            if strong[0].size:
                taken = np.zeros((d, d), dtype=bool)
                taken[core_a, core_b] = True
                blocks = _PairBlocks(h, scheme, fr.K, fp, lam, levin, taken, strong)
                self.blocks = blocks if blocks.size else None
        self.sigma_comm = fr.K * (fr.pi[:, None, :] - fr.pi[:, :, None])  # [K, diag(pi)]
        self.eye = np.eye(d)

    def _pop_solve(self, b: NDArray[np.float64]) -> NDArray[np.float64]:
        if self._pop_lu is None:
            return self._pop_inv @ b
        return lu_solve(self._pop_lu, b, check_finite=False)

    def _coupling(
        self, P: NDArray[np.complex128], C: NDArray[np.complex128], forced: bool
    ) -> tuple[NDArray[np.complex128], NDArray[np.complex128]]:
        """The coupling G of every element, and its population part, from (P, C)."""
        fr, fp = self.fr, self.fp
        rho = C + P[:, :, None] * self.eye[None]
        G = -fp[:, None, None] * _commutator(fr.K, rho)
        if self.sector is not None:
            G = G + self.tf * apply_sector(self.sector, rho)
        if forced:
            G = G - fp[:, None, None] * self.sigma_comm
        Gp = np.einsum("naa->na", G)
        if forced:
            Gp = Gp - fp[:, None] * fr.dpi
        return G, Gp

    def block_solve(
        self, P: NDArray[np.complex128], C: NDArray[np.complex128], forced: bool
    ) -> tuple[NDArray[np.complex128], NDArray[np.complex128]]:
        """Solve every block for the coupling computed from (P, C).

        ``forced`` includes the initial values and the Gibbs-state forcing; without
        it the map is the linear part alone (used by the Krylov solver).
        """
        h, m, d, A = self.h, self.m, self.d, self.scheme.A
        p0, c0, core, core_a, core_b = self.p0, self.c0, self.core, self.core_a, self.core_b
        G, Gp = self._coupling(P, C, forced)
        if core is not None:  # the coupling within the core block is solved for
            from_core, to_core = core.internal(P[1:], C[1:, core_a, core_b])
            Gp[1:] = Gp[1:] - from_core
            core_start = c0[core_a, core_b] if forced else np.zeros(core_a.size, dtype=complex)
            core_rhs = core_start[None] + h * A @ (G[1:, core_a, core_b] - to_core)
        rhs = (h * A @ Gp[1:]).reshape(m * d)
        if forced:
            rhs = rhs + np.tile(p0, m)
        if core is None:
            pops = _real_apply(self._pop_solve, rhs)
        else:
            pops, core_c = core.solve(rhs, core_rhs.reshape(-1))
        P_new = np.empty_like(P)
        P_new[0] = p0 if forced else 0.0
        P_new[1:] = pops.reshape(m, d)
        C_new = np.zeros_like(C)
        li, lj, ri, rj = self.li, self.lj, self.ri, self.rj
        if li.size:
            C_new[:, li, lj] = (self.linv @ G[:, li, lj].T[..., None])[..., 0].T
        if ri.size:
            start = c0[ri, rj] if forced else np.zeros(ri.size, dtype=complex)
            rhs_c = start[:, None] + h * G[1:, ri, rj].T @ A.T  # (n_resolved, m)
            C_new[0, ri, rj] = start
            C_new[1:, ri, rj] = (self.rinv @ rhs_c[..., None])[..., 0].T
        if core is not None:
            C_new[1:, core_a, core_b] = core_c.reshape(m, core_a.size)
        if self.blocks is not None:
            self.blocks.solve(G, C, c0, forced, h, A, C_new)
        return P_new, C_new


def slow_step(
    h: float,
    p0: NDArray[np.float64],
    c0: NDArray[np.complex128],
    levin: NDArray[np.bool_],
    fr: FrameData,
    fp: NDArray[np.float64],
    tf: float,
    scheme: CollocationScheme,
    rtol: float,
    atol: float,
    guess: tuple[NDArray[Any], NDArray[Any]] | None = None,
    sector: list[Any] | None = None,
) -> SlowStep:
    """Collocation for populations and coherences over one step.

    Coherences where ``levin`` is False are integrated by Radau IIA from ``c0``
    (their oscillation is resolved); where it is True they are replaced by the
    slow particular solution of their equation (Levin collocation on the m + 1
    nodes) and ``c0`` is not used.  ``fr`` holds frame data at the nodes
    ``x0 + h tau``, ``fp`` is f' there.  ``guess`` gives starting values (P, C)
    at the m + 1 nodes (a prediction from the previous step), else the start value
    is held constant.  ``sector`` (one sparse matrix or None per node, from
    :func:`.sectors.sector_coupling`) adds the Davies terms between elements of one
    Bohr sector (coinciding Bohr frequencies, degenerate levels) to the coupling.

    The collocation equations are linear.  Each population and coherence block is
    solved exactly for a given frame-rotation coupling (block Jacobi); when that
    fixed-point iteration contracts too slowly (coupling comparable to the spacing
    of the levels it connects, as in multi-qubit spectra) the same block solves
    serve as the preconditioner of GMRES (Saad & Schultz, SIAM J. Sci. Stat.
    Comput. 7, 856, 1986) on the whole coupled system.
    """
    m = scheme.c.size
    system = _CollocationSystem(h, p0, c0, levin, fr, fp, tf, scheme, sector)

    def size(P: NDArray[Any], C: NDArray[Any]) -> float:
        return atol + rtol * max(np.max(np.abs(P)), np.max(np.abs(C)))

    if guess is None:
        P = np.repeat(p0[None], m + 1, axis=0).astype(complex)
        C = np.repeat(np.where(levin, 0.0, c0)[None], m + 1, axis=0)
    else:
        P = guess[0].astype(complex)
        C = guess[1].astype(complex)
        P[0] = p0
        C[0] = np.where(levin, C[0], c0)
    iterations = 0
    converged = False
    previous = math.inf
    for iterations in range(1, SLOW_ITERATION_LIMIT + 1):
        P_new, C_new = system.block_solve(P, C, True)
        change = max(np.max(np.abs(P_new - P)), np.max(np.abs(C_new - C)))
        P, C = P_new, C_new
        if change <= SLOW_SOLVE_TOL * size(P, C):
            converged = True
            break
        if iterations >= 3 and change > SLOW_CONTRACTION * previous:
            break  # too slow or diverging: solve the coupled system instead
        previous = change
    if not converged and np.all(np.isfinite(P)) and np.all(np.isfinite(C)):
        tol = SLOW_SOLVE_TOL * size(P, C)
        P, C, krylov_iterations = _krylov_solve(system.block_solve, P, C, tol)
        iterations += krylov_iterations
    P = np.real(P)
    pop_tail = np.abs(np.tensordot(scheme.tail, P, axes=(0, 0)))
    coh_tail = np.abs(np.tensordot(scheme.tail, C, axes=(0, 0)))
    tail = max(np.max(pop_tail), np.max(coh_tail))
    scale = atol + rtol * max(np.max(np.abs(P[-1])), np.max(np.abs(C[-1])))
    # the step is set by an oscillation it resolves: the largest tail is that of a
    # resolved coherence whose phase turns by a radian or more over the step
    worst = np.unravel_index(np.argmax(coh_tail), coh_tail.shape)
    resolving = bool(
        coh_tail[worst] >= np.max(pop_tail)
        and not levin[worst]
        and h * tf * np.min(np.abs(fr.lam[:, worst[0], worst[1]])) >= 1.0
    )
    return SlowStep(P=P, C=C, err=float(tail / scale), iterations=iterations, resolving=resolving)


def _commutator(K: NDArray[np.float64], rho: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """``K rho - rho K`` for real K and complex rho, stacked.

    Split into real and imaginary parts so that both products run in BLAS (a
    real-by-complex matmul does not, and is about 100 times slower at d = 64).
    """
    re, im = np.ascontiguousarray(rho.real), np.ascontiguousarray(rho.imag)
    return (K @ re - re @ K) + 1j * (K @ im - im @ K)


def _krylov_solve(
    block_solve: Any,
    P: NDArray[np.complex128],
    C: NDArray[np.complex128],
    tol: float,
) -> tuple[NDArray[np.complex128], NDArray[np.complex128], int]:
    """Solve ``y = T(y)`` for the affine block-Jacobi map T by GMRES, from ``(P, C)``.

    ``block_solve(P, C, forced)`` is T (forced) or its linear part J (not forced);
    the equation is ``(I - J) y = T(0)``.  Returns the solution and the number of
    map applications; non-finite values if GMRES does not reach ``tol`` (the caller
    then rejects the step).
    """
    shape_p, n_p = P.shape, P.size

    def unpack(v: NDArray[np.complex128]) -> tuple[NDArray, NDArray]:
        return v[:n_p].reshape(shape_p), v[n_p:].reshape(C.shape)

    def matvec(v: NDArray[np.complex128]) -> NDArray[np.complex128]:
        Jp, Jc = block_solve(*unpack(v), False)
        return v - np.concatenate([Jp.ravel(), Jc.ravel()])

    T0p, T0c = block_solve(np.zeros_like(P), np.zeros_like(C), True)
    b = np.concatenate([T0p.ravel(), T0c.ravel()])
    x0 = np.concatenate([P.ravel(), C.ravel()])
    count = [0]

    def counted(v: NDArray[np.complex128]) -> NDArray[np.complex128]:
        count[0] += 1
        return matvec(v)

    n = b.size
    op = LinearOperator((n, n), matvec=counted, dtype=complex)
    x, info = gmres(
        op, b, x0=x0, rtol=0.0, atol=tol, restart=KRYLOV_RESTART, maxiter=KRYLOV_MAXITER
    )
    if info != 0:
        x = np.full_like(x, np.nan)
    Pn, Cn = unpack(x)
    return Pn, Cn, count[0]


#: Extrapolating the last step's collocation polynomial further than this many of its
#: lengths amplifies its error too much; beyond, a quadratic through its last nodes.
PREDICTION_REACH = 2.0


def predict_step(
    previous: tuple[float, float, NDArray[Any], NDArray[Any], NDArray[np.float64]] | None,
    x: float,
    h: float,
    tau: NDArray[np.float64],
    entering: NDArray[np.bool_],
) -> tuple[NDArray[Any], NDArray[Any]] | None:
    """Starting values at the nodes ``x + h tau`` from the last accepted step.

    The collocation polynomial of that step (``previous``: its start, length, values
    at its nodes and the nodes ``tau_old``), extrapolated (the usual predictor of
    implicit Runge-Kutta codes, Hairer & Wanner 1996, IV.8).  Coherences entering the
    exponential treatment start from zero: their old values carry the oscillation
    that the new step splits off.  None when there is no previous step.
    """
    if previous is None:
        return None
    x_old, h_old, P_old, C_old, tau_old = previous
    t = (x + h * tau - x_old) / h_old
    if t[-1] <= 1.0 + PREDICTION_REACH:
        weights = lagrange_weights(tau_old, t)
    else:
        weights = np.zeros((t.size, tau_old.size))
        weights[:, -3:] = lagrange_weights(tau_old[-3:], t)
    P = weights @ P_old
    C = np.tensordot(weights, C_old, axes=(1, 0))
    C[:, entering] = 0.0
    return P, C
