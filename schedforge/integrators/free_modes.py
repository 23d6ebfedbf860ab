"""Free oscillations of the eigenframe integrator: coupling ratios, clusters, dressing.

A coherence split off at the start of the anneal (or where the integrator changes
how it treats it) oscillates freely as ``A_ab exp(tf * integral of lambda_ab)``.
The frame rotation ``S = -f' [K, .]`` couples it to the other coherences and to the
populations.  This module holds what :mod:`schedforge.integrators.eigenframe` does
with these modes:

* perturbation ratios ``|S| / |lambda_ab - lambda_m|`` between coupled modes
  (:func:`coupling_ratios`);
* clusters of nearly resonant modes, propagated jointly by a fourth-order Magnus
  method (:func:`resonant_clusters`, :func:`propagate_clusters`; Blanes, Casas & Ros,
  2000);
* the second-order shift of their rates (:func:`transient_rates`, adiabatic
  elimination) and the first-order components they induce elsewhere
  (:func:`transient_dressing`).

Arrays are in the eigenbasis; rates per unit x = t / tf (scaled by tf).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import sparse
from scipy.linalg import expm
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from .collocation import CollocationScheme

__all__ = [
    "CLUSTER_MAX_SIZE",
    "CLUSTER_WORK_LIMIT",
    "EXPM_EIG_SIZE",
    "EXPM_OVERHEAD",
    "EXPM_TAYLOR_SIZE",
    "RESONANCE_RATIO",
    "RESONANCE_RATIO_MAX",
    "coupling_ratios",
    "expm_stack",
    "intra_cluster",
    "join_sector_modes",
    "perturbation_ratios",
    "propagate_clusters",
    "resonant_clusters",
    "transient_dressing",
    "transient_rates",
]

#: Largest perturbation ratio |S| / |tf (lambda_ab - lambda_m)| for which free modes
#: are dressed; coherences coupled more strongly to a partner of similar frequency
#: are propagated with it (a cluster).  What the dressing leaves out, eps^2 times the
#: amplitude, counts in the free-mode error estimate.  Larger values were tried
#: (2026-12-03, tf = 1e3 ns, against the general integrator at rtol 1e-12): 3e-4 made
#: the uniform 4-ring 1.5x faster but the fully connected 3-qubit instance 1.5-2x
#: slower (the clusters then stay under ``CLUSTER_MAX_SIZE`` instead of being split at
#: a raised threshold, and hold modes detuned thousands of times their coupling, whose
#: Magnus substeps follow the detuning); the cost moves erratically with the value.
RESONANCE_RATIO = 1.0e-4
#: Largest threshold tried when clusters at ``RESONANCE_RATIO`` are too large.
RESONANCE_RATIO_MAX = 1.0e-1
#: Denominators below this fraction of the largest rate count as exact resonances.
RESONANT_RTOL = 1e-12
#: Largest cluster of free modes propagated jointly.
CLUSTER_MAX_SIZE = 24
#: Matrices up to this size that the Taylor method does not take go to
#: ``scipy.linalg.expm``, larger ones through their eigen-decomposition.
EXPM_EIG_SIZE = 24
#: Largest work (substeps x cluster size^3) spent on one cluster of nearly resonant
#: free modes in one step; beyond it the cluster is left undressed and its amplitude
#: counts wholly in the error estimate.
CLUSTER_WORK_LIMIT = 2.0e6
#: Degree of the Taylor polynomial in the stacked matrix exponential (norm <= 1/2).
TAYLOR_DEGREE = 14
#: The Taylor coefficients 1 / k! in blocks of four (Paterson-Stockmeyer), zero beyond
#: ``TAYLOR_DEGREE``.
_PS_COEFFICIENTS = np.array(
    [
        [1.0 / math.factorial(4 * j + i) if 4 * j + i <= TAYLOR_DEGREE else 0.0 for i in range(4)]
        for j in range(TAYLOR_DEGREE // 4 + 1)
    ]
)
#: Largest matrices exponentiated by the stacked Taylor method.  With the
#: Paterson-Stockmeyer evaluation (measured 2026-12-03, best of 5, stacks of 1000 with
#: norm 1/2, as the clusters' substeps keep them, so no squaring) it is faster than
#: scipy's loop over the stack at every cluster size: 4.9x at 12 x 12, 2.1x at 15,
#: 1.7x at 16, 2.2x at 20, 4.6x at 24 (with plain Horner it lost from 12 x 12 on).
EXPM_TAYLOR_SIZE = 24
#: Fixed cost of one small matrix exponential in the same units (flops of n^3), for
#: the work limit: for tiny clusters the per-matrix overhead dominates.
EXPM_OVERHEAD = 500


def intra_cluster(labels: NDArray[np.int64] | None, d: int) -> tuple[NDArray, NDArray]:
    """Masks of (mode, partner) pairs in the same near-resonant cluster.

    Returned in the layouts of ``coupling_ratios``: [a, c, b] for partner cb and
    [a, b, c] for partner ac.
    """
    if labels is None:
        z = np.zeros((d, d, d), dtype=bool)
        return z, z
    lab = np.where(labels >= 0, labels, -1)
    intra1 = (lab[:, None, :] == lab[None, :, :]) & (lab[:, None, :] >= 0)
    intra2 = (lab[:, :, None] == lab[:, None, :]) & (lab[:, :, None] >= 0)
    return intra1, intra2


def coupling_ratios(
    K: NDArray[np.float64],
    fp: NDArray[np.float64],
    lam: NDArray[np.complex128],
    labels: NDArray[np.int64] | None = None,
) -> tuple[NDArray, NDArray, NDArray, NDArray, NDArray, NDArray]:
    """Perturbation ratios |S_(m,ab)| / |lam_m - lam_ab| between coupled coherences.

    The frame rotation S = -f'[K, .] couples coherence ab to cb (through K_ca)
    and to ac (through K_bc), c not in {a, b}.  Arrays are stacked over n nodes;
    returns ``mask1, den1, ratio1`` indexed [n, a, c, b] (partner cb) and
    ``mask2, den2, ratio2`` indexed [n, a, b, c] (partner ac).
    """
    d = K.shape[-1]
    idx = np.arange(d)
    mask1 = np.ones((d, d, d), dtype=bool)  # [a, c, b]: c not in {a, b}
    mask1[idx, idx, :] = False
    mask1[:, idx, idx] = False
    mask2 = mask1.transpose(0, 2, 1)  # [a, b, c]
    intra1, intra2 = intra_cluster(labels, d)
    mask1 = mask1 & ~intra1
    mask2 = mask2 & ~intra2
    afp = np.abs(fp)[:, None, None, None]
    den1 = lam[:, None, :, :] - lam[:, :, None, :]  # [n, a, c, b] = lam_cb - lam_ab
    den2 = lam[:, :, None, :] - lam[:, :, :, None]  # [n, a, b, c] = lam_ac - lam_ab
    # exactly resonant partners (degenerate levels) are propagated with their mode
    mask1 = mask1 & ~np.any(_resonant(den1, lam), axis=0)
    mask2 = mask2 & ~np.any(_resonant(den2, lam), axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio1 = np.where(mask1, afp * np.abs(K)[:, :, :, None] / np.abs(den1), 0.0)
        ratio2 = np.where(mask2, afp * np.abs(K)[:, None, :, :] / np.abs(den2), 0.0)
    ratio1 = np.nan_to_num(ratio1, nan=np.inf)
    ratio2 = np.nan_to_num(ratio2, nan=np.inf)
    return mask1, den1, ratio1, mask2, den2, ratio2


def _resonant(den: NDArray[np.complex128], lam: NDArray[np.complex128]) -> NDArray[np.bool_]:
    """Denominators that vanish to rounding: partners in resonance with the mode.

    Levels inside one degenerate eigenspace give coherences of exactly equal rates;
    their coupling is no perturbation, and the eigenframe propagates such modes
    together (:func:`schedforge.integrators.sectors.propagate_sector_modes`).
    """
    scale = np.max(np.abs(lam), axis=(-2, -1), keepdims=True)
    while scale.ndim < den.ndim:
        scale = scale[..., None]
    return np.abs(den) <= RESONANT_RTOL * np.maximum(scale, 1e-300)


def perturbation_ratios(
    K: NDArray[np.float64],
    fp: NDArray[np.float64],
    lam: NDArray[np.complex128],
    mask: NDArray[np.bool_],
) -> NDArray[np.float64]:
    """The largest perturbation ratio of each free mode in ``mask``, zero elsewhere.

    The same expansion parameter as :func:`transient_rates` returns (without the
    cluster exclusions), ``max(|f' K_ab| / |lam_ab|, max_c |f' K_ca| / |lam_cb -
    lam_ab|, max_c |f' K_bc| / |lam_ac - lam_ab|)`` over the nodes given, but computed
    for the masked pairs only: O(n_mask d) per node instead of O(d^3).
    """
    d = K.shape[-1]
    a, b = np.nonzero(mask)
    eps = np.zeros((d, d))
    if a.size == 0:
        return eps
    afp = np.abs(fp)[:, None, None]
    lam_ab = lam[:, a, b][:, :, None]  # (n, k, 1)
    others = np.ones((a.size, d), dtype=bool)
    others[np.arange(a.size), a] = False
    others[np.arange(a.size), b] = False
    with np.errstate(divide="ignore", invalid="ignore"):
        # partner cb through K_ca, partner ac through K_bc
        r1 = (
            afp
            * np.abs(K[:, :, a].transpose(0, 2, 1))
            / np.abs(lam[:, :, b].transpose(0, 2, 1) - lam_ab)
        )
        r2 = afp * np.abs(K[:, b, :]) / np.abs(lam[:, a, :] - lam_ab)
        pop = np.abs(fp)[:, None] * np.abs(K[:, a, b]) / np.abs(lam[:, a, b])
    r1 = np.nan_to_num(np.where(others[None], r1, 0.0), nan=np.inf)
    r2 = np.nan_to_num(np.where(others[None], r2, 0.0), nan=np.inf)
    ratio = np.maximum(np.maximum(r1.max(axis=2), r2.max(axis=2)), pop).max(axis=0)
    eps[a, b] = ratio
    return eps


def resonant_clusters(
    K: NDArray[np.float64],
    fp: NDArray[np.float64],
    lam: NDArray[np.complex128],
    candidates: NDArray[np.bool_],
    h: float | None = None,
) -> NDArray[np.int64]:
    """Group free modes coupled with a ratio above a threshold into clusters.

    Returns a (d, d) array of cluster labels, -1 for modes outside any cluster of
    two or more.  Within a cluster the modes are nearly degenerate and are
    propagated together (quasi-degenerate perturbation theory); between clusters
    the coupling is eliminated to second order.  The threshold starts at
    ``RESONANCE_RATIO`` and is raised tenfold (up to ``RESONANCE_RATIO_MAX``) while
    the largest cluster has more than ``CLUSTER_MAX_SIZE`` members: a dense spectrum
    (several qubits) would otherwise join most modes into one cluster too large to
    propagate.  With the step length ``h``, also while a cluster would cost more than
    ``CLUSTER_WORK_LIMIT`` over the step (:func:`propagate_clusters` leaves such a
    cluster out, and with it the couplings of its closely tied members; weak links
    to far-detuned modes, which set the substeps, go first when the threshold rises).
    The coupling left between clusters counts in the error estimate.
    """
    d = K.shape[-1]
    _, _, ratio1, _, _, ratio2 = coupling_ratios(K, fp, lam)
    r1 = ratio1.max(axis=0)  # [a, c, b]: ab -- cb
    r2 = ratio2.max(axis=0)  # [a, b, c]: ab -- ac
    a1, c1, b1 = np.nonzero((r1 > RESONANCE_RATIO) & candidates[:, None, :] & candidates[None])
    a2, b2, c2 = np.nonzero(
        (r2 > RESONANCE_RATIO) & candidates[:, :, None] & candidates[:, None, :]
    )
    src = np.concatenate([a1 * d + b1, a2 * d + b2])
    dst = np.concatenate([c1 * d + b1, a2 * d + c2])
    weight = np.concatenate([r1[a1, c1, b1], r2[a2, b2, c2]])
    labels = -np.ones((d, d), dtype=np.int64)
    threshold = RESONANCE_RATIO
    while src.size:
        keep = weight > threshold
        graph = coo_matrix((np.ones(int(keep.sum())), (src[keep], dst[keep])), shape=(d * d, d * d))
        _, comp = connected_components(graph, directed=False)
        comp = comp.reshape(d, d)
        sizes = np.bincount(comp[candidates], minlength=comp.max() + 1)
        fits = sizes.max() <= CLUSTER_MAX_SIZE and not _too_costly(comp, sizes, lam, h)
        if fits or threshold >= RESONANCE_RATIO_MAX:
            member = candidates & (sizes[comp] > 1) & (sizes[comp] <= CLUSTER_MAX_SIZE)
            labels[member] = comp[member]
            break
        threshold *= 10.0
    return labels


def _too_costly(
    comp: NDArray[np.int64],
    sizes: NDArray[np.int64],
    lam: NDArray[np.complex128],
    h: float | None,
) -> bool:
    """Whether some cluster of ``comp`` would exceed ``CLUSTER_WORK_LIMIT`` over a step h.

    The substeps of :func:`propagate_clusters` follow the spread of the members' rates
    about their mean (its diagonal part, a lower bound of the norm it uses).
    """
    if h is None or not np.any(sizes > 1):
        return False
    a, b = np.nonzero(sizes[comp] > 1)
    c = comp[a, b]
    rates = lam[:, a, b]  # (nodes, members of clusters)
    count = np.bincount(c, minlength=sizes.size)
    mean = np.stack(
        [
            np.bincount(c, weights=r.real, minlength=sizes.size)
            + 1j * np.bincount(c, weights=r.imag, minlength=sizes.size)
            for r in rates
        ]
    ) / np.maximum(count, 1)
    spread = np.zeros(sizes.size)
    np.maximum.at(spread, c, np.max(np.abs(rates - mean[:, c]), axis=0))
    n_sub = np.maximum(1, np.ceil(h * spread / 0.5))
    work = n_sub * (count.astype(float) ** 3 + EXPM_OVERHEAD)
    return bool(np.any(work[count > 1] > CLUSTER_WORK_LIMIT))


def _expm_2x2(omega: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """Closed-form exponentials of a stack of 2 x 2 matrices.

    With ``M = t I + N`` (t half the trace, N traceless, ``N^2 = delta^2 I``):
    ``exp(M) = e^t (cosh(delta) I + sinh(delta) / delta N)``; the ratio is taken from
    its series where ``delta`` is small.  Vectorised, unlike a loop over ``expm``.
    """
    t = 0.5 * (omega[..., 0, 0] + omega[..., 1, 1])
    N = omega - t[..., None, None] * np.eye(2)
    delta = np.sqrt(N[..., 0, 0] ** 2 + N[..., 0, 1] * N[..., 1, 0])
    small = np.abs(delta) < 1e-4
    safe = np.where(small, 1.0, delta)
    d2 = delta * delta
    ratio = np.where(small, 1.0 + d2 / 6.0 + d2 * d2 / 120.0, np.sinh(safe) / safe)
    cosh = np.where(small, 1.0 + d2 / 2.0 + d2 * d2 / 24.0, np.cosh(delta))
    out = ratio[..., None, None] * N + cosh[..., None, None] * np.eye(2)
    return np.exp(t)[..., None, None] * out


def _taylor_polynomial(X: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """``sum_(k <= TAYLOR_DEGREE) X^k / k!`` for a stack, by Paterson & Stockmeyer.

    The polynomial in blocks of four powers, Horner in ``X^4`` (Paterson & Stockmeyer,
    SIAM J. Comput. 2, 60, 1973): six stacked products for degree 14 instead of the
    fourteen of plain Horner.
    """
    X2 = X @ X
    X3 = X2 @ X
    powers = np.stack([np.broadcast_to(np.eye(X.shape[-1]), X.shape), X, X2, X3])
    # blocks[j] = sum_i X^i / (4 j + i)!, all at once
    blocks = np.tensordot(_PS_COEFFICIENTS, powers, axes=(1, 0))
    X4 = X3 @ X
    out = blocks[-1]
    for block in blocks[-2::-1]:
        out = block + X4 @ out
    return out.astype(complex, copy=False)


def _expm_taylor(omega: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """Exponentials of a stack of small matrices by scaling and squaring (Taylor).

    Each matrix is scaled by 2^-s_k so that its infinity norm is at most 1/2, where
    the degree-``TAYLOR_DEGREE`` Taylor polynomial is accurate to about 1e-17
    (0.5^15 / 15!), then squared s_k times (Moler & Van Loan, SIAM Rev. 45, 3, 2003,
    method 3).  Every operation is a stacked matmul, so the whole stack costs a few
    dozen NumPy calls (``scipy.linalg.expm`` loops over a stack in Python).
    """
    norm = np.max(np.sum(np.abs(omega), axis=-1), axis=-1)
    with np.errstate(divide="ignore"):
        s = np.maximum(0, np.ceil(np.log2(norm / 0.5))).astype(int)
    X = omega * (0.5**s)[..., None, None]
    E = _taylor_polynomial(X)
    for j in range(int(s.max(initial=0))):
        more = s > j
        E[more] = E[more] @ E[more]
    return E


def expm_stack(omega: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """Matrix exponentials of a stack of small matrices.

    Closed form for 2 x 2, stacked Taylor scaling and squaring up to
    ``EXPM_TAYLOR_SIZE``, ``scipy.linalg.expm`` up to ``EXPM_EIG_SIZE``; above, the
    eigen-decomposition (vectorised in LAPACK) where it
    is well conditioned and ``scipy.linalg.expm`` for the few matrices where it is not.
    """
    if omega.shape[-1] == 2:
        return _expm_2x2(omega)
    if omega.shape[-1] <= EXPM_TAYLOR_SIZE:
        return _expm_taylor(omega)
    if omega.shape[-1] <= EXPM_EIG_SIZE:
        return expm(omega)
    w, vec = np.linalg.eig(omega)
    cond = np.linalg.cond(vec)
    out = vec @ (np.exp(w)[..., None] * np.linalg.inv(vec))
    bad = ~np.isfinite(cond) | (cond > 1e6)
    if np.any(bad):
        out[bad] = expm(omega[bad])
    return out


def _ordered_product(props: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """``P_(s-1) ... P_1 P_0`` of a stack (G, s, n, n), later factors on the left.

    Pairwise, in about log2(s) stacked products: a loop over the substeps applying each
    propagator to the vector costs one NumPy call per substep (the 4-star at 1e3 ns
    made 40 000 of them).
    """
    while props.shape[1] > 1:
        odd = props[:, -1:] if props.shape[1] % 2 else None
        pairs = props[:, 1::2] @ props[:, 0 : 2 * (props.shape[1] // 2) : 2]
        props = pairs if odd is None else np.concatenate([pairs, odd], axis=1)
    return props[:, 0]


def _extra_blocks(extra: list[Any], flat: NDArray[np.int64]) -> NDArray[np.complex128]:
    """The blocks of per-node couplings between each cluster's members: (G, nodes, n, n).

    ``flat`` (G, n) holds the members' flat indices ``a d + b``; entry [g, j, p, q] is
    how member q of cluster g feeds member p at node j (off the diagonal only: the
    diagonal is the modes' own rate).
    """
    G, n = flat.shape
    out = np.zeros((G, len(extra), n, n), dtype=complex)
    rows = flat[:, :, None]
    cols = flat[:, None, :]
    for j, C in enumerate(extra):
        if C is None:
            continue
        if sparse.issparse(C):
            used = np.unique(flat)
            pos = np.searchsorted(used, flat)
            sub = C[used][:, used].toarray()
            out[:, j] = sub[pos[:, :, None], pos[:, None, :]]
        else:
            out[:, j] = C[rows, cols]
    out[:, :, np.arange(n), np.arange(n)] = 0.0
    return out


def join_sector_modes(
    labels: NDArray[np.int64], coupling: list[Any], free: NDArray[np.bool_]
) -> NDArray[np.int64]:
    """Clusters joined with the free modes that Bohr-sector couplings tie to them.

    A mode can be a member of a near-resonant cluster (coupled to its partners by the
    frame's rotation, with a detuning that changes along the step) and of a Bohr
    sector (coupled to other modes of its frequency by the Davies terms).  Propagated
    apart, one treatment overrode the other and dropped its coupling: on the fully
    connected 2-qubit instance at 1e3 ns (levels 1 and 2 parting near s = 0, where
    the driver's ladder makes Bohr frequencies coincide) that left 1e-4 of the state
    (2.5e-8 in trace norm) against an estimate of 8e-13.  Returns labels (d, d) in
    which each cluster takes in the modes its members are sector-coupled to
    (transitively), as long as the result has at most ``CLUSTER_MAX_SIZE`` members;
    larger groups keep the cluster as it was (their sector couplings are then left to
    :func:`.sectors.propagate_sector_modes` for the modes outside clusters).
    """
    d = labels.shape[0]
    idx = np.flatnonzero(free.ravel())
    links = [C for C in coupling if C is not None]
    if not links or idx.size < 2:
        return labels
    total = sum(
        abs(C[idx][:, idx]) if sparse.issparse(C) else np.abs(C[np.ix_(idx, idx)]) for C in links
    )
    flat_labels = labels.ravel()[idx]
    clustered = np.flatnonzero(flat_labels >= 0)
    # edges: sector couplings among free modes, and each cluster member to its cluster
    graph = sparse.coo_matrix(total)
    rows = np.concatenate([graph.row, clustered])
    first = {}
    for k in clustered:
        first.setdefault(int(flat_labels[k]), int(k))
    cols = np.concatenate([graph.col, [first[int(flat_labels[k])] for k in clustered]])
    adj = sparse.coo_matrix((np.ones(rows.size), (rows, cols)), shape=(idx.size, idx.size))
    _, comp = connected_components(adj, directed=False)
    out = labels.copy().ravel()
    sizes = np.bincount(comp)
    for c in np.unique(comp[clustered]):
        members = np.flatnonzero(comp == c)
        if 2 <= sizes[c] <= CLUSTER_MAX_SIZE:
            out[idx[members]] = d * d + c  # a label no cluster uses
    return out.reshape(d, d)


def propagate_clusters(
    A: NDArray[np.complex128],
    labels: NDArray[np.int64],
    rate: NDArray[np.complex128],
    K: NDArray[np.float64],
    fp: NDArray[np.float64],
    scheme: CollocationScheme,
    h: float,
    extra: list[Any] | None = None,
    tol: float = math.inf,
) -> tuple[NDArray[np.complex128], NDArray[np.bool_], float]:
    """Propagate the free modes of each near-resonant cluster jointly over one step.

    Within a cluster, dA/dx = M(x) A with M = diag(rate) plus the direct frame-
    rotation couplings S between members, plus ``extra`` (per node a (d^2, d^2)
    dense or sparse matrix on the row-major vector of rho, or None: the Bohr-sector
    couplings of :func:`.sectors.resonant_coupling` without its rotation, when a
    cluster holds modes of a sector); the common mean of the diagonal is
    integrated exactly and the remainder by a fourth-order Magnus method on the
    Lagrange interpolant of the node values, with substeps keeping |R dx| <= 0.5
    and, where a cluster's amplitude exceeds ``tol`` (absolute), its Magnus error
    within ``tol`` as far as ``CLUSTER_WORK_LIMIT`` allows (estimated against half as
    many substeps, :func:`_magnus_checked`).  Clusters that would cost more than that
    limit anyway are left as they are and returned in the ``skipped`` mask (the caller
    counts their amplitude as error).  Also returns the estimated Magnus error of the
    propagated clusters (absolute, summed over clusters).
    """
    d = A.shape[0]
    out = A.copy()
    skipped = np.zeros((d, d), dtype=bool)
    magnus_error = 0.0
    m1 = scheme.tau.size
    # Lagrange basis on tau for interpolation inside the step
    vand = np.vander(scheme.tau, m1, increasing=True)
    coef_of_values = np.linalg.inv(vand)  # values at tau -> polynomial coefficients
    members: dict[int, list[tuple[NDArray, NDArray]]] = {}
    for lab in np.unique(labels[labels >= 0]):
        ma, mb = np.nonzero(labels == lab)
        members.setdefault(ma.size, []).append((ma, mb))
    # clusters of one size are handled together, as stacks
    for n, group in members.items():
        ma = np.stack([item[0] for item in group])  # (G, n)
        mb = np.stack([item[1] for item in group])
        # direct frame-rotation couplings [j, i]: mode i = (a, b) feeds j = (c, b)
        # with S = -f' K_ca and j = (a, c) with S = +f' K_bc
        same_a = (ma[:, :, None] == ma[:, None, :])[:, None]  # (G, 1, n, n)
        same_b = (mb[:, :, None] == mb[:, None, :])[:, None]
        f = fp[None, :, None, None]
        Ka = np.moveaxis(K[:, ma[:, :, None], ma[:, None, :]], 0, 1)  # (G, nodes, n, n)
        Kb = np.moveaxis(K[:, mb[:, None, :], mb[:, :, None]], 0, 1)
        M = np.where(same_b & ~same_a, -f * Ka, 0.0) + np.where(same_a & ~same_b, f * Kb, 0.0)
        M = M.astype(complex)
        if extra is not None:
            M += _extra_blocks(extra, ma * d + mb)
        M[:, :, np.arange(n), np.arange(n)] = np.moveaxis(rate[:, ma, mb], 0, 1)
        mean = np.trace(M, axis1=2, axis2=3) / n  # (G, nodes)
        R = M - mean[:, :, None, None] * np.eye(n)
        coeffs = np.moveaxis(np.tensordot(coef_of_values, R, axes=(1, 1)), 0, 1)  # polynomial
        norm = np.max(np.sum(np.abs(R), axis=-1), axis=(1, 2))  # infinity norm at the nodes
        n_sub = np.maximum(1, np.ceil(h * norm / 0.5)).astype(int)
        too_costly = n_sub * (n**3 + EXPM_OVERHEAD) > CLUSTER_WORK_LIMIT
        for g in np.flatnonzero(too_costly):  # left undressed, counted as error
            skipped[ma[g], mb[g]] = True
        decay = np.exp(h * mean @ scheme.w)  # (G,)
        start = A[ma, mb].astype(complex)  # (G, n)
        # the Magnus error matters where a cluster's amplitude exceeds the tolerance
        checked = np.abs(start).max(axis=1) > tol
        most = max(1, int(CLUSTER_WORK_LIMIT // (n**3 + EXPM_OVERHEAD)))
        for subs in np.unique(n_sub[~too_costly]):
            sel = np.flatnonzero((n_sub == subs) & ~too_costly)
            vec = _magnus(coeffs[sel], h, int(subs), start[sel])
            check = sel[checked[sel]]
            if check.size:
                vec_c, error = _magnus_checked(
                    coeffs[check], h, int(subs), start[check], vec[checked[sel]], tol, most
                )
                vec[checked[sel]] = vec_c
                magnus_error += float(np.sum(error * np.abs(decay[check])))
            out[ma[sel], mb[sel]] = vec * decay[sel, None]
    return out, skipped, magnus_error


def _magnus(
    coeffs: NDArray[np.complex128], h: float, subs: int, vec: NDArray[np.complex128]
) -> NDArray[np.complex128]:
    """Fourth-order Magnus propagation of ``vec`` (G, n) over the step in ``subs`` substeps.

    ``coeffs`` (G, m, n, n) holds the polynomial in tau of each cluster's generator
    about its mean (per unit x).  Each substep takes Omega = dt/2 (R1 + R2) +
    sqrt(3) dt^2 / 12 [R2, R1] at its two Gauss points (Blanes, Casas & Ros, 2000).
    """
    G, m1, n = coeffs.shape[0], coeffs.shape[1], coeffs.shape[-1]
    dt = 1.0 / subs
    mid = (np.arange(subs) + 0.5) * dt
    g = dt / (2.0 * math.sqrt(3.0))
    powers1 = (mid - g)[:, None] ** np.arange(m1)[None, :]
    powers2 = (mid + g)[:, None] ** np.arange(m1)[None, :]
    R1 = h * np.einsum("sk,gkij->gsij", powers1, coeffs)
    R2 = h * np.einsum("sk,gkij->gsij", powers2, coeffs)
    omega = 0.5 * dt * (R1 + R2) + (math.sqrt(3.0) * dt**2 / 12.0) * (R2 @ R1 - R1 @ R2)
    props = expm_stack(omega.reshape(-1, n, n)).reshape(G, subs, n, n)
    return (_ordered_product(props) @ vec[..., None])[..., 0]


def _magnus_checked(
    coeffs: NDArray[np.complex128],
    h: float,
    subs: int,
    start: NDArray[np.complex128],
    vec: NDArray[np.complex128],
    tol: float,
    most: int,
) -> tuple[NDArray[np.complex128], NDArray[np.float64]]:
    """The propagation ``vec`` in ``subs`` substeps, refined where its error exceeds ``tol``.

    The error of the fourth-order method is estimated from the same propagation in
    half as many substeps (``|A_n - A_(n/2)| / (r^4 - 1)``, r the ratio of the
    counts); where it exceeds ``tol`` the clusters are propagated again in as many
    substeps as the estimate asks for (up to ``most``), whose error is the estimate
    scaled by the fourth power of the ratio.  Returns the propagated amplitudes and
    the estimated error per cluster (absolute, largest member).  With fixed substeps
    of 0.5 rad, strongly coupled clusters kept 1e-5 of their amplitude (2.3e-5 of the
    fully connected 2-qubit state at 300 ns; 1.4e-9 against a bound of 2e-10 at a
    narrow crossing, depending on the machine's rounding), unseen by the estimates.
    """
    fewer = subs // 2 if subs > 1 else 1
    if subs == 1:  # compare with two substeps instead, and keep those
        vec, coarse, subs, fewer = _magnus(coeffs, h, 2, start), vec, 2, 1
    else:
        coarse = _magnus(coeffs, h, fewer, start)
    ratio = subs / fewer
    error = np.max(np.abs(vec - coarse), axis=1) / (ratio**4 - 1.0)
    redo = np.flatnonzero((error > tol) & (subs < most))
    if redo.size:
        finer = np.ceil(subs * 1.2 * (error[redo] / tol) ** 0.25)
        finer = np.minimum(finer, most).astype(int)
        for count in np.unique(finer):
            idx = redo[finer == count]
            vec[idx] = _magnus(coeffs[idx], h, int(count), start[idx])
            error[idx] *= (subs / count) ** 4
    return vec, error


def transient_rates(
    K: NDArray[np.float64],
    fp: NDArray[np.float64],
    lam: NDArray[np.complex128],
    W: NDArray[np.float64],
    levin: NDArray[np.bool_],
    labels: NDArray[np.int64] | None = None,
) -> tuple[NDArray[np.complex128], NDArray[np.float64]]:
    """Second-order correction mu_ab to the growth rate of free mode ab.

    A free coherence c_ab ~ exp(int lam_ab) couples through the frame rotation
    S = -f'[K, .] to other coherences and to the populations; eliminating those
    (they are far off resonance) gives ``A_ab' = (lam_ab + mu_ab) A_ab`` with
    ``mu_ab = sum_m S_(ab,m) S_(m,ab) / (lam_ab - lam_m)``, the standard second-order
    adiabatic-elimination (Schrieffer-Wolff) shift.  Arrays are stacked over n
    nodes: ``K, lam, W`` of shape (n, d, d), ``fp`` of shape (n,); ``lam`` and
    ``W`` are scaled by tf (per unit x).  Also returns the largest perturbation
    ratio |S| / |lam_ab - lam_m| of each free mode, a (d, d) array (the expansion
    parameter; zero outside ``levin``).
    """
    d = K.shape[-1]
    off = ~np.eye(d, dtype=bool)
    lam_safe = np.where(off, lam, 1.0)
    K2 = K**2
    mask1, den1, ratio1, mask2, den2, ratio2 = coupling_ratios(K, fp, lam, labels)
    with np.errstate(divide="ignore", invalid="ignore"):  # masked entries are dropped
        t1 = np.where(mask1, K2[:, :, :, None] / np.where(mask1, den1, 1.0), 0.0).sum(axis=2)
        t2 = np.where(mask2, K2[:, None, :, :] / np.where(mask2, den2, 1.0), 0.0).sum(axis=3)
    # populations: -K_ab^2 (e_a - e_b)^T (lam_ab - W)^(-1) (e_a - e_b), expanded in W / lam
    wd = np.einsum("naa->na", W)
    quad = wd[:, :, None] + wd[:, None, :] - W - np.swapaxes(W, 1, 2)
    q = (2.0 + quad / lam_safe) / lam_safe
    mu = (fp**2)[:, None, None] * (t1 + t2 - K2 * q)
    mu[:, ~levin] = 0.0
    pop_ratio = np.abs(fp)[:, None, None] * np.abs(K) / np.abs(lam_safe)
    eps = np.maximum(np.maximum(ratio1.max(axis=2), ratio2.max(axis=3)), pop_ratio).max(axis=0)
    eps[~levin] = 0.0
    return mu, eps


def transient_dressing(
    A: NDArray[np.complex128],
    K: NDArray[np.float64],
    fp: float,
    lam: NDArray[np.complex128],
    W: NDArray[np.float64],
    labels: NDArray[np.int64] | None = None,
    fpp: float = 0.0,
) -> tuple[NDArray[np.float64], NDArray[np.complex128]]:
    """Components that free modes with amplitudes ``A`` induce elsewhere.

    Returns the population vector and the coherence matrix of
    ``sum_ab A_ab v_ab`` with the first-order dressing
    ``v_m = S_(m,ab) / (lam_ab - lam_m)``.

    ``fpp`` (f'' at the node) adds the next term of the adiabatic expansion, the
    slope of the forcing: with ``D = lam_ab - lam_m`` the induced component is
    ``s / D - s' / D^2 + ...``, and ``s' = f'' K`` where f' = 0 (the end of a
    schedule with k_end = 1, where the first-order term vanishes and this one
    leads).  The part ``f'^2 dK/ds`` of s' and the drift of D are not included.
    """
    d = K.shape[0]
    off = ~np.eye(d, dtype=bool)
    lam_safe = np.where(off, lam, 1.0)
    idx = np.arange(d)
    # T1[c, b] = sum_a A_ab fp K_ca / (lam_cb - lam_ab), c not in {a, b}
    den1 = lam[None, :, :] - lam[:, None, :]  # [a, c, b]
    mask1 = np.ones((d, d, d), dtype=bool)
    mask1[idx, idx, :] = False
    mask1[:, idx, idx] = False
    intra1, intra2 = intra_cluster(labels, d)
    num1 = A[:, None, :] * K.T[:, :, None]  # [a, c, b]: A_ab K_ca
    den2 = lam[:, None, :] - lam[:, :, None]  # [a, b, c]
    # partner ac of mode ab: c not in {a, b}, the base mask transposed before the
    # cluster exclusions (transposing mask1 after them dropped the terms that a mode
    # feeds into ac wherever ab and cb share a cluster, and the dressing lost its
    # Hermitian symmetry: 2e-8 of a 2-qubit state of 2e-3 at 300 ns)
    mask2 = mask1.transpose(0, 2, 1) & ~intra2 & ~_resonant(den2, lam)
    mask1 = mask1 & ~intra1 & ~_resonant(den1, lam)
    den1 = np.where(mask1, den1, 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):  # masked entries are dropped
        q1 = np.where(mask1, num1 / den1, 0.0)
    # T2[a, c] = -sum_b A_ab fp K_bc / (lam_ac - lam_ab), c not in {a, b}
    num2 = A[:, :, None] * K[None, :, :]  # [a, b, c]: A_ab K_bc
    den2 = np.where(mask2, den2, 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        q2 = -np.where(mask2, num2 / den2, 0.0)
    coh = fp * (q1.sum(axis=0) + q2.sum(axis=1))
    if fpp != 0.0:  # the slope term: the same sums over one more power of the denominator
        coh = coh + fpp * ((q1 / den1).sum(axis=0) + (q2 / den2).sum(axis=1))
    coh[~off] = 0.0
    # populations: (lam_ab - W)^(-1) s_ab with s_ab = fp K_ba (e_a - e_b)
    u1 = np.where(off, A * K.T / lam_safe, 0.0)
    u2 = np.where(off, A * K.T / lam_safe**2, 0.0)
    v1 = u1.sum(axis=1) - u1.sum(axis=0)
    v2 = u2.sum(axis=1) - u2.sum(axis=0)
    pop = np.real(fp * (v1 + W @ v2) - fpp * v2)
    return pop, coh
