"""Exact propagation of a piecewise-constant (held) schedule.

An unfiltered hold of samples (a :class:`~schedforge.waveform.RealizedSchedule`
with ``jumps`` True) plays s(t) constant between jumps.  Between two jumps H(s_j)
and the Davies generator L(s_j) are constant, so the state evolves exactly as

    rho(t + dt) = exp(L(s_j) dt) rho(t)

(closed system: ``exp(-i H dt) rho exp(+i H dt)``).  The state is continuous at a
jump; only the generator changes.  Registered as ``"held"``;
:func:`schedforge.dynamics.simulate` sends every jumping schedule here.

Method
------
* **Segments** (:func:`held_segments`): the level at x = 0 and the level after
  every jump of ``schedule.jump_points()``, consecutive equal levels merged, and
  checked against the schedule itself (value and zero slope at each segment's
  midpoint), so a schedule that is not piecewise constant is refused.
* **State**: the deviation ``delta = rho - sigma(s_j)`` from the target of the
  current level (the Gibbs state of H(s_j); for a closed system the ground-level
  projector), as in the other integrators.  Because ``L(s_j) sigma(s_j) = 0``,
  ``delta`` propagates with the same exponential; at a jump it gains
  ``sigma(s_j) - sigma(s_(j+1))``, and the final deviation from sigma(1) is
  ``delta + sigma(s_last) - sigma(1)``.  Small quantities stay small.
* **Structure, at every d**: in the
  eigenbasis of H(s_j) the generator (:class:`~schedforge.davies.DaviesGenerator`,
  its sparse row-major form) is block diagonal.  The blocks are the connected
  components of its sparsity graph: for non-degenerate levels with distinct Bohr
  frequencies, the populations (the Pauli rate matrix, d x d) and every coherence
  alone (a scalar ``exp(lambda_ac dt)``); coherences that share a Bohr frequency
  (degenerate levels, equally spaced spectra) and the coherences inside a
  degenerate cluster join larger blocks.  Each block of size > 1 is exponentiated
  densely after its mean Bohr frequency is taken out as a phase
  ``exp(-i nu dt)`` (so long segments do not hand large imaginary norms to the
  exponential): 2 x 2 blocks (the one-qubit populations) in closed form, larger
  ones with :func:`scipy.linalg.expm` (scaling and squaring, Al-Mohy and Higham,
  SIAM J. Matrix Anal. Appl. 31, 970, 2009); no d^2 x d^2 matrix is formed.
  A closed system has only scalar blocks, the phases ``exp(-i (E_a - E_c) dt)``.
  The non-degenerate case reads the rate matrix and the coherence eigenvalues
  straight from the generator; otherwise the blocks are cut from its sparse form.
* **Lamb shift**: supported; it is part of the generator that ``davies.py``
  builds (a Hermitian correction commuting with H), so it joins the blocks.  Its
  adaptive quadrature makes each new level slow (tens of ms).
* **Cache**: the eigen-decomposition, the target state and the blocks of each
  distinct level are cached per :class:`~schedforge.system.System` (bounded by
  :data:`CACHE_BYTES`, least recently used dropped first): DAC levels repeat
  between the points of a sweep.

Cost: one eigen-decomposition and generator per distinct level and one small
exponential per block and segment, computed in batches (:func:`block_exponentials`).
A monotone schedule quantized to b bits has at most 2^b level changes, whatever the
sample rate and tf.
"""

from __future__ import annotations

import math
import weakref
from collections import OrderedDict
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import sparse
from scipy.linalg import expm
from scipy.sparse import csgraph

from ..davies import EigenDecomposition
from ..errors import InputError
from ..schedules import Schedule
from ..system import System
from .base import IntegrationOutcome, register_integrator

__all__ = [
    "CACHE_BYTES",
    "HeldSegments",
    "LevelPropagator",
    "block_exponentials",
    "held_segments",
    "integrate_held",
    "level_propagator",
    "propagate_levels",
]

#: Memory (bytes) that the cached per-level data of one system may take.
CACHE_BYTES = 256 * 2**20
#: Segments whose block exponentials are computed in one batch (at most), and the memory
#: such a batch may take (bytes).
_WINDOW = 1024
_BATCH_BYTES = 64 * 2**20
#: A held level must match the schedule at a segment's midpoint to this (absolute, in s).
_LEVEL_ATOL = 1e-12


# =============================================================================
# segments
# =============================================================================
@dataclass(frozen=True)
class HeldSegments:
    """A piecewise-constant schedule as levels held on intervals of x = t / tf.

    Attributes
    ----------
    levels : ndarray
        s held on each segment; consecutive levels differ.
    bounds : ndarray
        Segment boundaries in x, ``len(levels) + 1`` values from 0 to 1.
    """

    levels: NDArray[np.float64]
    bounds: NDArray[np.float64]

    def __len__(self) -> int:
        return int(self.levels.size)

    def durations_ns(self, tf_ns: float) -> NDArray[np.float64]:
        """Length of each segment in ns."""
        return np.diff(self.bounds) * float(tf_ns)


def held_segments(schedule: Schedule) -> HeldSegments:
    """The levels and segments of a piecewise-constant schedule.

    Parameters
    ----------
    schedule : Schedule
        A schedule with ``jumps`` True and a ``jump_points()`` method (an
        unfiltered hold of samples, see :class:`schedforge.waveform.RealizedSchedule`).

    Returns
    -------
    HeldSegments

    Raises
    ------
    InputError
        ``numerics.integrator``: the schedule is not piecewise constant.
    """
    jump_points = getattr(schedule, "jump_points", None)
    if not getattr(schedule, "jumps", False) or jump_points is None:
        raise InputError(
            "numerics.integrator",
            '"held" propagates piecewise-constant schedules only (an unfiltered hold of '
            'samples); this schedule is continuous: use "auto", "general" or "eigenframe"',
        )
    xj, before, after = (np.asarray(v, dtype=float) for v in jump_points())
    s0 = float(schedule.derivatives(np.array([0.0]), 0)[0, 0])
    levels = np.concatenate(([s0], after))
    bounds = np.concatenate(([0.0], xj, [1.0]))
    if xj.size and (np.any(np.diff(xj) <= 0.0) or xj[0] <= 0.0 or xj[-1] > 1.0):
        raise InputError("numerics.integrator", '"held" needs increasing jump points in (0, 1]')
    if xj.size and np.max(np.abs(before - levels[:-1])) > _LEVEL_ATOL:
        raise InputError(
            "numerics.integrator",
            '"held" needs a piecewise-constant schedule: the level before a jump differs '
            "from the level after the previous one",
        )
    keep = np.diff(bounds) > 0.0  # a jump at x = 1 starts an empty segment
    keep[0] = True
    levels, starts = levels[keep], bounds[:-1][keep]
    new = np.concatenate(([True], levels[1:] != levels[:-1]))  # merge equal levels
    levels, starts = levels[new], starts[new]
    bounds = np.append(starts, 1.0)
    mid = 0.5 * (bounds[:-1] + bounds[1:])
    d = schedule.derivatives(mid, 1)
    if np.max(np.abs(d[0] - levels)) > _LEVEL_ATOL or np.max(np.abs(d[1])) > 0.0:
        raise InputError(
            "numerics.integrator",
            '"held" needs a piecewise-constant schedule: s is not constant between its jumps',
        )
    return HeldSegments(levels, bounds)


# =============================================================================
# one level: the exact exponential of its generator, block by block
# =============================================================================
@dataclass(frozen=True, eq=False)
class LevelPropagator:
    """exp(L(s) dt) for one level s, applied block by block in the eigenbasis of H(s).

    Attributes
    ----------
    level : float
        s.
    eig : EigenDecomposition
        Of H(s).
    target : ndarray
        sigma(s) in the computational basis (stationary under L(s)).
    scalar_index : ndarray of int
        Row-major indices ``a d + c`` of the elements of rho (eigenbasis) that
        evolve alone, and ``scalar_rate`` their eigenvalues (rad/ns).
    blocks : tuple
        ``(index, matrix, phase)`` for each coupled set: the elements ``index``
        evolve as ``exp(phase dt) expm(matrix dt)``.
    """

    level: float
    eig: EigenDecomposition
    target: NDArray[np.complex128]
    scalar_index: NDArray[np.int64]
    scalar_rate: NDArray[np.complex128]
    blocks: tuple[tuple[NDArray[np.int64], NDArray[Any], complex], ...]

    @property
    def nbytes(self) -> int:
        """Memory held (bytes, approximate)."""
        arrays = [self.eig.vectors, self.target, self.scalar_index, self.scalar_rate]
        arrays += [a for idx, m, _ in self.blocks for a in (idx, m)]
        return int(sum(a.nbytes for a in arrays))

    def propagate(self, delta: NDArray[Any], dt_ns: float) -> NDArray[np.complex128]:
        """exp(L(s) dt) applied to ``delta`` (computational basis, d x d)."""
        exps = block_exponentials([mat * dt_ns for _, mat, _ in self.blocks])
        return self._apply(delta, dt_ns, exps)

    def _apply(
        self, delta: NDArray[Any], dt_ns: float, exps: list[NDArray[Any]]
    ) -> NDArray[np.complex128]:
        """:meth:`propagate` with the block exponentials ``expm(matrix dt)`` given."""
        d = self.eig.dim
        x = self.eig.to_eigen(np.asarray(delta, dtype=complex)).reshape(-1)
        out = np.empty_like(x)
        out[self.scalar_index] = np.exp(self.scalar_rate * dt_ns) * x[self.scalar_index]
        for (idx, _, phase), e in zip(self.blocks, exps, strict=True):
            out[idx] = np.exp(phase * dt_ns) * (e @ x[idx])
        return self.eig.from_eigen(out.reshape(d, d))


def block_exponentials(mats: list[NDArray[Any]]) -> list[NDArray[Any]]:
    """Matrix exponentials of many small blocks, in as few calls as possible.

    Blocks of equal shape and type are stacked.  2 x 2 blocks (the one-qubit
    populations, the most frequent) use the closed form below, vectorised; larger
    ones one batched :func:`scipy.linalg.expm` call per stack.  Batching matters
    beyond the call overhead: alternating small NumPy and SciPy BLAS calls (two
    thread pools) was measured to slow each exponential down 10-100x when other
    multithreaded jobs share the cores.

    For a 2 x 2 matrix M with mean eigenvalue m = tr(M) / 2 and
    q^2 = ((M_00 - M_11) / 2)^2 + M_01 M_10 (its eigenvalues are m +- q),

        exp(M) = e^m [cosh(q) I + (sinh(q) / q) (M - m I)]

    (Cayley-Hamilton; e.g. Bernstein and So, IEEE Trans. Autom. Control 38, 1228,
    1993, from memory).  For |q| >= 1 it is evaluated from the two exponentials
    e^(m +- q), the eigenvalue of smaller magnitude taken as det(M) divided by the
    other (no cancellation in m + q: a rate matrix keeps its zero eigenvalue), so
    nothing overflows for long holds.
    """
    out: list[NDArray[Any] | None] = [None] * len(mats)
    groups: dict[tuple[int, bool], list[int]] = {}
    for i, m in enumerate(mats):
        groups.setdefault((m.shape[0], np.iscomplexobj(m)), []).append(i)
    for (n, is_complex), members in groups.items():
        stack = np.stack([mats[i] for i in members])
        res = _expm_2x2(stack) if n == 2 else expm(stack)
        if not is_complex:
            res = res.real
        for i, r in zip(members, res, strict=True):
            out[i] = r
    return out  # type: ignore[return-value]


def _expm_2x2(m: NDArray[Any]) -> NDArray[np.complex128]:
    """exp of a stack of 2 x 2 matrices by the closed form of :func:`block_exponentials`."""
    a, b, c, d = m[:, 0, 0], m[:, 0, 1], m[:, 1, 0], m[:, 1, 1]
    mean = 0.5 * (a + d)
    q = np.sqrt((0.25 * (a - d) ** 2 + b * c).astype(complex))
    small = np.abs(q) < 1.0
    with np.errstate(all="ignore"):
        qs = np.where(small, q, 0.0)
        e_m = np.exp(mean)
        cosh_small = e_m * np.cosh(qs)
        sinhc_small = e_m * np.where(qs == 0, 1.0, np.sinh(qs) / np.where(qs == 0, 1.0, qs))
        plus, minus = mean + q, mean - q
        use_plus = np.abs(plus) >= np.abs(minus)
        big = np.where(use_plus, plus, minus)
        other = (a * d - b * c) / np.where(small, 1.0, big)
        up = np.exp(np.where(use_plus, big, other))
        down = np.exp(np.where(use_plus, other, big))
        cosh_large = 0.5 * (up + down)
        sinhc_large = 0.5 * (up - down) / np.where(small, 1.0, q)
    cosh_q = np.where(small, cosh_small, cosh_large)
    sinhc_q = np.where(small, sinhc_small, sinhc_large)
    out = np.empty(m.shape, dtype=complex)
    out[:, 0, 0] = cosh_q + sinhc_q * (a - mean)
    out[:, 0, 1] = sinhc_q * b
    out[:, 1, 0] = sinhc_q * c
    out[:, 1, 1] = cosh_q + sinhc_q * (d - mean)
    return out


def level_propagator(system: System, s: float) -> LevelPropagator:
    """Build the exact propagator of the constant generator L(s) of ``system``.

    Parameters
    ----------
    system : System
        Open (Davies generator, Lamb shift included if the bath has it) or closed.
    s : float
        The held level.
    """
    gen = system.davies(float(s))
    eig = gen.eig
    d = eig.dim
    target = eig.target_state(system.target_beta)
    if gen.closed:  # -i [H, .]: every element of rho alone, exp(-i (E_a - E_c) dt)
        e = eig.energies
        return LevelPropagator(
            level=float(s),
            eig=eig,
            target=target,
            scalar_index=np.arange(d * d, dtype=np.int64),
            scalar_rate=(-1j * (e[:, None] - e[None, :])).ravel(),
            blocks=(),
        )
    structure = gen.pauli_structure()
    if structure is not None:
        # non-degenerate levels, distinct Bohr frequencies: the Pauli rate matrix
        # (populations) and one eigenvalue per coherence; no sparse assembly needed
        pop, coh = structure
        scalar_index = np.flatnonzero(~np.eye(d, dtype=bool).ravel())
        return LevelPropagator(
            level=float(s),
            eig=eig,
            target=target,
            scalar_index=scalar_index.astype(np.int64),
            scalar_rate=coh.ravel()[scalar_index],
            blocks=((np.arange(d, dtype=np.int64) * (d + 1), pop, 0j),),
        )
    # the generator in the eigenbasis, row-major vec: element (a, c) at a d + c
    full = sparse.csr_matrix(gen.sparse_eigen())
    full.eliminate_zeros()
    pattern = sparse.csr_matrix((np.ones(full.nnz), full.indices, full.indptr), shape=full.shape)
    _, comp = csgraph.connected_components(pattern, directed=False)
    sizes = np.bincount(comp)
    diag = full.diagonal()
    single = sizes[comp] == 1
    scalar_index = np.flatnonzero(single)
    order = np.argsort(comp, kind="stable")
    starts = np.concatenate(([0], np.cumsum(sizes)))
    blocks = []
    for c in np.flatnonzero(sizes > 1):
        idx = np.sort(order[starts[c] : starts[c + 1]])
        mat = full[idx][:, idx].toarray()
        phase = 1j * float(np.mean(diag[idx].imag))
        mat[np.diag_indices_from(mat)] -= phase
        if not np.any(mat.imag):
            mat = mat.real.copy()
        blocks.append((idx.astype(np.int64), mat, phase))
    assert scalar_index.size + sum(b[0].size for b in blocks) == d * d
    return LevelPropagator(
        level=float(s),
        eig=eig,
        target=target,
        scalar_index=scalar_index.astype(np.int64),
        scalar_rate=np.asarray(diag[scalar_index], dtype=complex),
        blocks=tuple(blocks),
    )


class _LevelCache:
    """Least-recently-used cache of level propagators, bounded in bytes."""

    def __init__(self, max_bytes: int) -> None:
        self.max_bytes = max_bytes
        self.items: OrderedDict[float, LevelPropagator] = OrderedDict()
        self.bytes = 0
        self.hits = 0
        self.misses = 0

    def get(self, system: System, s: float) -> LevelPropagator:
        item = self.items.get(s)
        if item is not None:
            self.items.move_to_end(s)
            self.hits += 1
            return item
        self.misses += 1
        item = level_propagator(system, s)
        self.items[s] = item
        self.bytes += item.nbytes
        while self.bytes > self.max_bytes and len(self.items) > 1:
            _, old = self.items.popitem(last=False)
            self.bytes -= old.nbytes
        return item


_CACHES: weakref.WeakKeyDictionary[System, _LevelCache] = weakref.WeakKeyDictionary()


def _cache_for(system: System) -> _LevelCache:
    cache = _CACHES.get(system)
    if cache is None:
        cache = _LevelCache(CACHE_BYTES)
        _CACHES[system] = cache
    return cache


# =============================================================================
# propagation
# =============================================================================
def propagate_levels(
    system: System,
    levels: Any,
    durations_ns: Any,
    rho0: NDArray[Any] | None = None,
) -> IntegrationOutcome:
    """Propagate exactly through levels s_j held for durations dt_j (ns).

    Parameters
    ----------
    system : System
    levels : array_like
        The held values of s, in playing order.
    durations_ns : array_like
        How long each is held (ns, >= 0).
    rho0 : ndarray, optional
        Initial state (default: ``system.initial_state()``).

    Returns
    -------
    IntegrationOutcome
        ``deviation = rho - sigma(1)`` with ``sigma(1) = system.target_state()``.
    """
    levels = np.asarray(levels, dtype=float).ravel()
    dts = np.asarray(durations_ns, dtype=float).ravel()
    if levels.size == 0 or levels.size != dts.size:
        raise InputError("levels", "must be non-empty and as long as durations_ns")
    if not (np.all(np.isfinite(dts)) and np.all(dts >= 0.0)):
        raise InputError("durations_ns", "must be finite numbers >= 0")
    if not np.all(np.isfinite(levels)):
        raise InputError("levels", "must be finite numbers")
    cache = _cache_for(system)
    hits0, misses0 = cache.hits, cache.misses
    rho = system.initial_state() if rho0 is None else np.asarray(rho0, dtype=complex)
    current = cache.get(system, float(levels[0]))
    delta = rho - current.target
    blocks = 0
    largest = 1
    per_segment = max(16, sum(16 * m.size for _, m, _ in current.blocks))
    window = int(min(_WINDOW, max(1, _BATCH_BYTES // per_segment)))
    for start in range(0, levels.size, window):  # exponentials of a window in one batch
        props = [cache.get(system, s) for s in levels[start : start + window].tolist()]
        seg_dts = dts[start : start + window].tolist()
        mats = [m * dt for p, dt in zip(props, seg_dts, strict=True) for _, m, _ in p.blocks]
        exps = block_exponentials(mats)
        pos = 0
        for nxt, dt in zip(props, seg_dts, strict=True):
            if nxt is not current:
                delta = delta + (current.target - nxt.target)
                current = nxt
            k = len(current.blocks)
            if dt > 0.0:
                delta = current._apply(delta, dt, exps[pos : pos + k])
                blocks += k
                largest = max(largest, *(b[0].size for b in current.blocks), 1)
            pos += k
    final = system.target_state()
    dev = delta + (current.target - final)
    dev = 0.5 * (dev + dev.conj().T)
    stats = {
        "integrator": "held",
        "state": "density-matrix deviation, exact exponentials",
        "segments": int(levels.size),
        "steps": int(levels.size),
        "rhs_evaluations": 0,
        "distinct_levels": int(np.unique(levels).size),
        "levels_built": cache.misses - misses0,
        "levels_from_cache": cache.hits - hits0,
        "block_exponentials": blocks,
        "largest_block": int(largest),
        "trace_error": float(abs(np.trace(dev))),
        "rtol": None,  # exact propagation: the tolerances are not used
        "atol": None,
    }
    return IntegrationOutcome(dev, final + dev, "ok", "", stats)


def integrate_held(
    system: System, schedule: Schedule, tf_ns: float, *, rtol: float = 1e-10, atol: float = 1e-14
) -> IntegrationOutcome:
    """Propagate a piecewise-constant schedule exactly; return rho(tf) - sigma(1).

    Parameters
    ----------
    system : System
    schedule : Schedule
        Piecewise constant (``jumps`` True), e.g. the realized schedule of an
        unfiltered hold.
    tf_ns : float
        Anneal time (ns).
    rtol, atol : float
        Accepted for the integrator interface and not used: the propagation is
        exact up to rounding.
    """
    del rtol, atol
    segs = held_segments(schedule)
    if not math.isfinite(tf_ns) or tf_ns <= 0:
        raise InputError("tf_ns", f"must be a finite number > 0, got {tf_ns!r}")
    return propagate_levels(system, segs.levels, segs.durations_ns(tf_ns))


register_integrator("held", integrate_held)
