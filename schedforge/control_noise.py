"""Control errors on the programmed problem: does the intended ground state survive?

Every programmed coefficient lands with an error, fresh at each programming cycle.
This module answers, without any dynamics, how likely the noisy problem's ground
state is to differ from the intended one, and how much analog precision a problem
needs.

Noise model
-----------
Draw ``d`` of a study with seed ``seed`` takes its standard normal numbers from
``numpy.random.default_rng(SeedSequence([seed, d]))``, in this order: one per field
h_i, one per coupling J_ij (in the problem's coupling order), then one for the
amplitude of A(s) and one for B(s) (used by the dynamics ensemble,
:mod:`schedforge.noise_ensemble`).  They are always drawn, whichever terms are noisy,
so a draw's errors do not depend on the terms switched on or on the executor.  At
noise level ``sigma`` the programmed coefficients are

    c' = c + sigma * M * z   (for the terms switched on; M = max |h_i|, |J_ij|)

i.e. ``sigma`` is the standard deviation of each coefficient's error as a fraction
of the largest programmed coefficient (a Gaussian error of a few percent of the
largest coupling is a common working assumption: common practice, no source).
The same draws serve every level (common random numbers), so the estimated
probability is monotone in the level.

The rule for a kept ground state
--------------------------------
The intended ground-state set G holds every state within ``tol`` of the lowest
energy (``tol`` = :data:`DEGENERACY_RTOL` times the sum of |coefficients|): a
degenerate intended ground state, e.g. the Z2 pair s, -s of a problem without
fields, is handled as a set.  A draw *keeps* the ground state when every ground
state of the noisy problem lies in G, i.e. when the lowest noisy energy outside G
exceeds the lowest noisy energy inside G by more than ``tol`` (a tie counts as
*not kept*).  With zero fields and noise on J only the noisy problem keeps the Z2
symmetry: its ground pair is kept when it is the intended pair.

Because every noisy energy is linear in the level, E_s(l) = E_s + l D_s, and all of
G starts at the same energy E_0, the lowest noisy energy inside G is the line
E_0 + l min_G D_g; the lowest outside G is concave; so once a draw loses the ground
state it never regains it at a larger level.  Each draw therefore has a *critical
level*

    c_d = min over s outside G with D_s < min_G D_g of (E_s - E_0 - tol) / (min_G D_g - D_s),

and the draw changes the ground state exactly at the levels l >= c_d.  One
enumeration pass gives every c_d; the estimated probability at any level is the
fraction of draws with c_d <= l.

Enumeration
-----------
Exact, over all 2^n states, in blocks: the last ``L`` qubits vary inside a block,
the first ``n - L`` are fixed per block.  The couplings among the block's own
qubits contribute the same block of energies every time (computed once); the
fixed qubits act on them as extra fields, so each block costs one
``(2^L x L) @ (L x draws)`` product plus elementwise work.  Memory stays at a few
``2^L x draws`` arrays (about 16 MB each).

Statistics
----------
The binomial confidence interval is the Wilson score interval (Wilson, J. Am.
Stat. Assoc. 22, 209, 1927).
"""

from __future__ import annotations

import csv
import math
import os
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.stats import norm

from .errors import InputError
from .fileio import atomic_write
from .problem_families import IsingProblem

__all__ = [
    "DEGENERACY_RTOL",
    "NOISE_TERMS",
    "CriticalLevels",
    "FlipEstimate",
    "PrecisionResult",
    "ProblemPrecision",
    "SizeRow",
    "critical_levels",
    "draw_normals",
    "find_precision",
    "ground_states",
    "noise_directions",
    "noisy_problem",
    "problem_precision",
    "size_growth",
    "spin_configurations",
    "summarize_sizes",
    "wilson_interval",
    "write_table_csv",
]

#: Terms a noise model may switch on.
NOISE_TERMS = ("h", "J")
#: Relative tolerance (of the sum of |coefficients|) for equal energies.
DEGENERACY_RTOL = 1e-9
#: Largest number of float64 entries of one block array (2^21: 16 MB).
_BLOCK_ENTRIES = 1 << 21
#: Standard normal numbers drawn per draw beyond the coefficients (A and B amplitudes).
_AMPLITUDE_NORMALS = 2


# ---------------------------------------------------------------------------
# draws
# ---------------------------------------------------------------------------
def draw_normals(seed: int, draw: int, count: int) -> NDArray[np.float64]:
    """The ``count`` standard normal numbers of draw ``draw`` (reproducible anywhere).

    Parameters
    ----------
    seed : int
        The study's noise seed (>= 0).
    draw : int
        Draw index (>= 0).
    count : int
        How many numbers (the layout is fixed: fields, couplings, then A and B).

    Returns
    -------
    ndarray
        From ``default_rng(SeedSequence([seed, draw])).standard_normal(count)``.
    """
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), int(draw)]))
    return rng.standard_normal(int(count))


def _term_mask(problem: IsingProblem, terms: Sequence[str]) -> NDArray[np.float64]:
    bad = [t for t in terms if t not in NOISE_TERMS]
    if bad:
        raise InputError("noise.terms", f"must hold only {', '.join(NOISE_TERMS)}, got {bad[0]!r}")
    return np.concatenate(
        [
            np.full(problem.n, 1.0 if "h" in terms else 0.0),
            np.full(problem.n_couplings, 1.0 if "J" in terms else 0.0),
        ]
    )


def noise_directions(
    problem: IsingProblem,
    draws: int | Sequence[int],
    seed: int,
    terms: Sequence[str] = NOISE_TERMS,
) -> NDArray[np.float64]:
    """Errors per unit level, one column per draw: ``M * z`` on the noisy terms.

    Parameters
    ----------
    problem : IsingProblem
    draws : int or sequence of int
        Number of draws (indices ``0 .. draws - 1``) or the draw indices.
    seed : int
    terms : sequence of {"h", "J"}

    Returns
    -------
    ndarray
        Shape ``(n + m, n_draws)``; at level ``sigma`` the coefficients of draw
        ``d`` are ``problem.coefficients() + sigma * out[:, d]``.
    """
    idx = range(int(draws)) if isinstance(draws, int | np.integer) else list(draws)
    mask = _term_mask(problem, terms) * problem.scale()
    width = problem.n + problem.n_couplings
    cols = [draw_normals(seed, d, width + _AMPLITUDE_NORMALS)[:width] for d in idx]
    if not cols:
        return np.zeros((width, 0))
    return np.stack(cols, axis=1) * mask[:, None]


def noisy_problem(
    problem: IsingProblem, level: float, seed: int, draw: int, terms: Sequence[str] = NOISE_TERMS
) -> IsingProblem:
    """The programmed problem of one draw at noise level ``level``."""
    direction = noise_directions(problem, [draw], seed, terms)[:, 0]
    return problem.with_coefficients(problem.coefficients() + float(level) * direction)


# ---------------------------------------------------------------------------
# enumeration
# ---------------------------------------------------------------------------
def spin_configurations(n: int, indices: ArrayLike) -> NDArray[np.int8]:
    """Spins (+1 / -1, int8) of basis states ``indices`` of ``n`` qubits, shape ``(len, n)``.

    Qubit 0 is the most significant bit; bit value 0 is spin +1 (Z = +1).
    """
    idx = np.asarray(indices, dtype=np.int64).reshape(-1, 1)
    shifts = np.arange(n - 1, -1, -1, dtype=np.int64)
    return (1 - 2 * ((idx >> shifts) & 1)).astype(np.int8)


@dataclass(frozen=True)
class _Blocks:
    """How the states are split: the last ``low`` qubits vary inside a block."""

    n: int
    low: int
    # coupling groups: inside the low qubits, inside the high ones, across
    lo_pairs: NDArray[np.int64]
    hi_pairs: NDArray[np.int64]
    cross: NDArray[np.int64]
    lo_spins: NDArray[np.float64]  # (2^low, low)
    lo_products: NDArray[np.float64]  # (2^low, n lo_pairs)

    @property
    def n_blocks(self) -> int:
        return 1 << (self.n - self.low)

    @property
    def size(self) -> int:
        return 1 << self.low


def _pairs_within(problem: IsingProblem, high: int) -> int:
    """Couplings among the qubits ``high .. n - 1``."""
    return int(np.count_nonzero(problem.i >= high))


def _blocks(problem: IsingProblem, columns: int) -> _Blocks:
    n = problem.n
    low = n
    while low > 0 and (1 << low) * max(columns, low, _pairs_within(problem, n - low)) > (
        _BLOCK_ENTRIES
    ):
        low -= 1
    high = n - low
    in_lo_i = problem.i >= high
    in_lo_j = problem.j >= high
    k = np.arange(problem.n_couplings)
    lo_pairs = k[in_lo_i & in_lo_j]
    hi_pairs = k[~in_lo_i & ~in_lo_j]
    cross = k[~in_lo_i & in_lo_j]  # i < j, so i is the high one
    spins = spin_configurations(low, np.arange(1 << low)).astype(float)
    prods = spins[:, problem.i[lo_pairs] - high] * spins[:, problem.j[lo_pairs] - high]
    return _Blocks(n, low, lo_pairs, hi_pairs, cross, spins, prods)


def _energy_blocks(
    problem: IsingProblem, weights: NDArray[np.float64]
) -> Iterator[tuple[int, NDArray[np.float64]]]:
    """Energies of every basis state for each weight column, block by block.

    ``weights`` has shape ``(n + m, k)``: column ``c`` holds the coefficients
    ``[h, J]`` of problem ``c``.  Yields ``(first_index, E)`` with ``E`` of shape
    ``(2^L, k)``, in index order.
    """
    n, m = problem.n, problem.n_couplings
    W = np.asarray(weights, dtype=float).reshape(n + m, -1)
    hw, jw = W[:n], W[n:]
    b = _blocks(problem, W.shape[1])
    high = n - b.low
    lo_fixed = b.lo_products @ jw[b.lo_pairs]  # (2^L, k): the same in every block
    h_lo = hw[high:]  # (L, k)
    cross_lo = problem.j[b.cross] - high
    cross_hi = problem.i[b.cross]
    for block in range(b.n_blocks):
        s_hi = spin_configurations(high, [block])[0].astype(float) if high else np.zeros(0)
        const = (
            s_hi @ hw[:high]
            + (s_hi[problem.i[b.hi_pairs]] * s_hi[problem.j[b.hi_pairs]]) @ (jw[b.hi_pairs])
        )
        h_eff = h_lo.copy()
        if b.cross.size:
            np.add.at(h_eff, cross_lo, s_hi[cross_hi, None] * jw[b.cross])
        E = b.lo_spins @ h_eff
        E += lo_fixed
        E += const
        yield block * b.size, E


def _tolerance(problem: IsingProblem) -> float:
    return DEGENERACY_RTOL * max(1.0, float(np.sum(np.abs(problem.coefficients()))))


def ground_states(problem: IsingProblem) -> tuple[float, NDArray[np.int64], float]:
    """The lowest energy, the intended ground-state set and the degeneracy tolerance.

    Returns
    -------
    energy : float
        The lowest energy E_0.
    indices : ndarray of int
        Basis states with E <= E_0 + tol (sorted).
    tol : float
        :data:`DEGENERACY_RTOL` times max(1, sum of |coefficients|).
    """
    tol = _tolerance(problem)
    w = problem.coefficients()[:, None]
    best = math.inf
    found: list[NDArray[np.int64]] = []
    for start, E in _energy_blocks(problem, w):
        e = E[:, 0]
        low = float(e.min())
        if low < best - tol:
            best = low
            found = []  # a lower energy: start again
        best = min(best, low)
        hits = np.flatnonzero(e <= best + tol)
        if hits.size:
            found.append(hits + start)
    idx = np.concatenate(found) if found else np.zeros(0, dtype=np.int64)
    # a later, slightly lower minimum (within tol) may leave stale entries: recheck them
    e_idx = problem.energies(spin_configurations(problem.n, idx))
    return best, np.sort(idx[e_idx <= best + tol]), tol


# ---------------------------------------------------------------------------
# critical levels and probabilities
# ---------------------------------------------------------------------------
def wilson_interval(
    successes: int | NDArray[Any], trials: int, confidence: float = 0.95
) -> tuple[Any, Any]:
    """Wilson score interval of a binomial proportion (Wilson, JASA 1927).

    Parameters
    ----------
    successes : int or array of int
        Number of events k (0 <= k <= trials).
    trials : int
        Number of trials n (>= 1).
    confidence : float
        Two-sided confidence level in (0, 1).

    Returns
    -------
    (lower, upper)
        With z = Phi^-1((1 + confidence) / 2) and p = k / n:
        (p + z^2/2n +- z sqrt(p(1 - p)/n + z^2/4n^2)) / (1 + z^2/n).
    """
    if trials < 1:
        raise ValueError("trials must be >= 1")
    if not 0 < confidence < 1:
        raise ValueError("confidence must be in (0, 1)")
    k = np.asarray(successes, dtype=float)
    n = float(trials)
    z = float(norm.ppf(0.5 * (1.0 + confidence)))
    p = k / n
    denom = 1.0 + z * z / n
    center = (p + z * z / (2 * n)) / denom
    half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    lo = np.clip(center - half, 0.0, 1.0)
    hi = np.clip(center + half, 0.0, 1.0)
    lo = np.where(k <= 0, 0.0, lo)
    hi = np.where(k >= n, 1.0, hi)
    if np.ndim(lo) == 0:
        return float(lo), float(hi)
    return lo, hi


@dataclass(frozen=True)
class FlipEstimate:
    """The probability that the ground state changes at one noise level.

    Attributes
    ----------
    level : float
        Noise level (fraction of the largest coefficient).
    changed, draws : int
        Draws whose ground state left the intended set, and draws in all.
    probability : float
        ``changed / draws``.
    lower, upper : float
        Wilson score interval at ``confidence``.
    confidence : float
    """

    level: float
    changed: int
    draws: int
    probability: float
    lower: float
    upper: float
    confidence: float

    def row(self) -> dict[str, Any]:
        """A plain dict (CSV / JSON row)."""
        return {
            "level": self.level,
            "changed": self.changed,
            "draws": self.draws,
            "probability": self.probability,
            "lower": self.lower,
            "upper": self.upper,
            "confidence": self.confidence,
        }


@dataclass(frozen=True)
class CriticalLevels:
    """Per-draw critical levels of one problem under one noise model.

    Attributes
    ----------
    problem : IsingProblem
    levels : ndarray
        ``levels[d]`` is the smallest level at which draw d's ground state leaves
        the intended set (``inf``: never, e.g. when its errors do not reach any
        competing state).
    seed : int
    terms : tuple of str
    ground_energy : float
        E_0 of the intended problem.
    ground_states : ndarray of int
        The intended ground-state set G (basis indices).
    tol : float
        The degeneracy tolerance.
    """

    problem: IsingProblem
    levels: NDArray[np.float64]
    seed: int
    terms: tuple[str, ...]
    ground_energy: float
    ground_states: NDArray[np.int64] = field(repr=False)
    tol: float

    @property
    def draws(self) -> int:
        """Number of draws."""
        return int(self.levels.size)

    @property
    def degeneracy(self) -> int:
        """Size of the intended ground-state set."""
        return int(self.ground_states.size)

    def changed(self, level: float) -> int:
        """Number of draws whose ground state changed at ``level``."""
        return int(np.count_nonzero(self.levels <= float(level)))

    def probability(self, level: float) -> float:
        """Estimated probability that the ground state changes at ``level``."""
        return self.changed(level) / self.draws

    def estimate(self, level: float, confidence: float = 0.95) -> FlipEstimate:
        """The estimate at ``level`` with its Wilson interval."""
        k = self.changed(level)
        lo, hi = wilson_interval(k, self.draws, confidence)
        return FlipEstimate(float(level), k, self.draws, k / self.draws, lo, hi, confidence)

    def crossing_level(self, target: float) -> float:
        """The supremum of the levels whose estimated probability stays below ``target``.

        The estimate is below ``target`` exactly for levels below the k-th smallest
        critical level, k = ceil(target * draws) (``inf`` if fewer draws ever change).
        """
        k = max(1, math.ceil(target * self.draws - 1e-12))
        ordered = np.sort(self.levels)
        return float(ordered[k - 1]) if k <= ordered.size else math.inf

    def conservative_level(self, target: float, confidence: float = 0.95) -> float:
        """The supremum of the levels whose Wilson *upper* bound stays below ``target``."""
        counts = np.arange(self.draws + 1)
        _, upper = wilson_interval(counts, self.draws, confidence)
        below = np.flatnonzero(np.asarray(upper) < target)
        if below.size == 0:
            return 0.0
        k = int(below.max())  # the most changed draws still allowed
        ordered = np.sort(self.levels)
        return float(ordered[k]) if k < ordered.size else math.inf


def critical_levels(
    problem: IsingProblem,
    draws: int,
    seed: int,
    terms: Sequence[str] = NOISE_TERMS,
) -> CriticalLevels:
    """One exact enumeration pass: the critical level of every draw.

    Parameters
    ----------
    problem : IsingProblem
        The intended problem (up to about 20 qubits: 2^n states are enumerated).
    draws : int
        Number of noise draws (indices 0 .. draws - 1).
    seed : int
    terms : sequence of {"h", "J"}
        Which coefficients carry errors.

    Returns
    -------
    CriticalLevels
    """
    if draws < 1:
        raise InputError("noise.draws", f"must be an integer >= 1, got {draws}")
    terms = tuple(terms)
    e0, ground, tol = ground_states(problem)
    dirs = noise_directions(problem, draws, seed, terms)
    # slope of the lowest intended energy: min over G of D_g
    d_min = np.full(draws, np.inf)
    for chunk in np.array_split(ground, max(1, ground.size // 4096)):
        if chunk.size:
            spins = spin_configurations(problem.n, chunk).astype(float)
            feats = np.concatenate([spins, spins[:, problem.i] * spins[:, problem.j]], axis=1)
            d_min = np.minimum(d_min, (feats @ dirs).min(axis=0))
    weights = np.concatenate([problem.coefficients()[:, None], dirs], axis=1)
    # c_d = min_s gap_s / (d_min - D_sd) over deficits > 0, i.e. 1 / max_s (d_min - D_sd) / gap_s
    # (states of G get weight 0 and cannot win the max, which is > 0 when some state competes)
    worst = np.zeros(draws)
    for _, E in _energy_blocks(problem, weights):
        gap = E[:, 0] - e0 - tol  # > 0 outside G
        inv_gap = np.divide(1.0, gap, out=np.zeros_like(gap), where=gap > 0)
        T = d_min[None, :] - E[:, 1:]
        T *= inv_gap[:, None]
        np.maximum(worst, T.max(axis=0), out=worst)
    with np.errstate(divide="ignore"):
        crit = np.where(worst > 0, 1.0 / worst, np.inf)
    return CriticalLevels(problem, crit, int(seed), terms, e0, ground, tol)


# ---------------------------------------------------------------------------
# the precision needed
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class PrecisionResult:
    """Result of the bracketing search for the largest acceptable noise level.

    Attributes
    ----------
    target : float
        Largest acceptable probability that the ground state changes.
    level_below, level_above : float
        Final bracket: the estimate is below ``target`` at ``level_below`` and at
        or above it at ``level_above`` (``level_above = inf`` when no level up to
        ``max_level`` reaches the target).
    probability_below, probability_above : float
        The estimates at the bracket ends.
    evaluations : int
        Estimator evaluations used.
    status : str
        ``"bracketed"``, ``"not reached"`` (the probability stays below the target
        up to ``max_level``) or ``"at zero"`` (the target is reached at the smallest
        positive level tried).
    """

    target: float
    level_below: float
    level_above: float
    probability_below: float
    probability_above: float
    evaluations: int
    status: str


def find_precision(
    probability: Callable[[float], float],
    target: float,
    *,
    start: float = 0.01,
    max_level: float = 100.0,
    rtol: float = 1e-6,
    max_evaluations: int = 200,
) -> PrecisionResult:
    """Bracketing search for the level where a monotone probability reaches ``target``.

    The bracket grows geometrically (x2) from ``start`` until the probability is
    at least ``target``, then bisects until ``level_above - level_below <= rtol *
    level_above``.  ``probability`` must be non-decreasing in the level: estimate
    it with common random numbers (the same draws at every level), as
    :meth:`CriticalLevels.probability` does.

    Parameters
    ----------
    probability : callable
        Level -> estimated probability.
    target : float
        In (0, 1].
    start, max_level : float
        First level tried, and the largest.
    rtol : float
        Relative width of the final bracket.
    max_evaluations : int
        Safety limit.

    Returns
    -------
    PrecisionResult
    """
    if not 0 < target <= 1:
        raise InputError("noise.target", f"must be a number in (0, 1], got {target!r}")
    if not (0 < start <= max_level):
        raise ValueError("need 0 < start <= max_level")
    evals = 0

    def p(level: float) -> float:
        nonlocal evals
        evals += 1
        return float(probability(level))

    lo, p_lo = 0.0, p(0.0)
    if p_lo >= target:
        return PrecisionResult(target, 0.0, 0.0, p_lo, p_lo, evals, "at zero")
    hi = float(start)
    p_hi = p(hi)
    while p_hi < target:
        lo, p_lo = hi, p_hi
        if hi >= max_level:
            return PrecisionResult(target, lo, math.inf, p_lo, math.nan, evals, "not reached")
        hi = min(2.0 * hi, max_level)
        p_hi = p(hi)
    while hi - lo > rtol * hi and evals < max_evaluations:
        mid = 0.5 * (lo + hi)
        p_mid = p(mid)
        if p_mid < target:
            lo, p_lo = mid, p_mid
        else:
            hi, p_hi = mid, p_mid
    return PrecisionResult(target, lo, hi, p_lo, p_hi, evals, "bracketed")


# ---------------------------------------------------------------------------
# studies: one problem, and a family against size
# ---------------------------------------------------------------------------
#: Points of the default tabulated probability curve.
CURVE_POINTS = 25


@dataclass(frozen=True)
class ProblemPrecision:
    """What control errors do to one problem.

    Attributes
    ----------
    critical : CriticalLevels
        The per-draw critical levels.
    at_level : FlipEstimate
        The estimate at the noise model's ``level``.
    curve : tuple of FlipEstimate
        The estimate at each tabulated level.
    search : PrecisionResult
        The bracketing search for the largest level below ``target``.
    crossing : float
        The exact crossing of the estimate (:meth:`CriticalLevels.crossing_level`);
        it lies in the search's bracket.
    conservative : float
        The largest level whose Wilson upper bound stays below ``target``.
    """

    critical: CriticalLevels
    at_level: FlipEstimate
    curve: tuple[FlipEstimate, ...]
    search: PrecisionResult
    crossing: float
    conservative: float


def _curve_levels(critical: CriticalLevels, noise: Any, crossing: float) -> list[float]:
    if noise.levels:
        return sorted(float(x) for x in noise.levels)
    finite = critical.levels[np.isfinite(critical.levels)]
    top = max(noise.level, crossing if math.isfinite(crossing) else 0.0)
    if top <= 0:
        top = float(np.max(finite)) if finite.size else 1.0
    return [float(x) for x in np.linspace(0.0, 2.0 * top, CURVE_POINTS)]


def problem_precision(problem: IsingProblem, noise: Any) -> ProblemPrecision:
    """Probability curve, estimate at the noise level and the precision needed.

    Parameters
    ----------
    problem : IsingProblem
    noise : NoiseSpec
        Uses ``level``, ``terms``, ``draws``, ``seed``, ``target``, ``confidence``
        and ``levels``.

    Returns
    -------
    ProblemPrecision
    """
    crit = critical_levels(problem, noise.draws, noise.seed, noise.terms)
    crossing = crit.crossing_level(noise.target)
    start = noise.level if noise.level > 0 else 0.01
    search = find_precision(crit.probability, noise.target, start=start)
    curve = tuple(
        crit.estimate(lv, noise.confidence) for lv in _curve_levels(crit, noise, crossing)
    )
    return ProblemPrecision(
        critical=crit,
        at_level=crit.estimate(noise.level, noise.confidence),
        curve=curve,
        search=search,
        crossing=crossing,
        conservative=crit.conservative_level(noise.target, noise.confidence),
    )


@dataclass(frozen=True)
class SizeRow:
    """Fragility of one generated problem (one size, one instance).

    Attributes
    ----------
    size, instance : int
    label : str
    degeneracy : int
        Size of the intended ground-state set.
    estimate : FlipEstimate
        At the noise model's level.
    crossing : float
        Largest level keeping the estimate below the target.
    """

    size: int
    instance: int
    label: str
    degeneracy: int
    estimate: FlipEstimate
    crossing: float

    def row(self) -> dict[str, Any]:
        """A plain dict (CSV row)."""
        return {
            "size": self.size,
            "instance": self.instance,
            "problem": self.label,
            "degeneracy": self.degeneracy,
            **self.estimate.row(),
            "crossing_level": self.crossing,
        }


def size_growth(noise: Any, progress: Callable[[str], None] | None = None) -> list[SizeRow]:
    """The probability at fixed noise for every size and instance of ``noise.problems``.

    Parameters
    ----------
    noise : NoiseSpec
        With a ``problems`` family.
    progress : callable, optional
        Called with a line of text after each problem.

    Returns
    -------
    list of SizeRow
        Sorted by size, then instance.
    """
    from .problem_families import make_problem

    fam = noise.problems
    if fam is None:
        raise InputError("noise.problems", "is required for the growth with size")
    out = []
    for size in sorted(fam.sizes):
        for inst in range(fam.instances):
            prob = make_problem(
                fam.graph,
                size,
                couplings=fam.couplings,
                fields=fam.fields,
                field_scale=fam.field_scale,
                seed=fam.seed,
                instance=inst,
            )
            crit = critical_levels(prob, noise.draws, noise.seed, noise.terms)
            row = SizeRow(
                size,
                inst,
                prob.label,
                crit.degeneracy,
                crit.estimate(noise.level, noise.confidence),
                crit.crossing_level(noise.target),
            )
            out.append(row)
            if progress is not None:
                progress(
                    f"{prob.label}: P = {row.estimate.probability:.3g} at level "
                    f"{noise.level:g}, precision needed {row.crossing:.3g}"
                )
    return out


def summarize_sizes(rows: Sequence[SizeRow]) -> list[dict[str, Any]]:
    """Per size: mean, smallest and largest estimate over instances, and the median crossing.

    The instances differ in their problems, so the spread between them is part of
    what the family does; the Wilson intervals hold per instance only.
    """
    sizes = sorted({r.size for r in rows})
    out = []
    for n in sizes:
        group = [r for r in rows if r.size == n]
        p = np.array([r.estimate.probability for r in group])
        c = np.array([r.crossing for r in group])
        out.append(
            {
                "size": n,
                "instances": len(group),
                "probability_mean": float(p.mean()),
                "probability_stderr": float(p.std(ddof=1) / math.sqrt(p.size))
                if p.size > 1
                else math.nan,
                "probability_min": float(p.min()),
                "probability_max": float(p.max()),
                "crossing_median": float(np.median(c)),
            }
        )
    return out


def write_table_csv(path: str | os.PathLike[str], rows: Sequence[Mapping[str, Any]]) -> None:
    """Write rows (dicts with the same keys) as CSV, atomically; floats with ``repr``."""

    def cell(v: Any) -> str:
        if isinstance(v, float | np.floating):
            return repr(float(v))
        return str(v)

    columns = list(rows[0]) if rows else []
    with atomic_write(path, "w", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(columns)
        for r in rows:
            writer.writerow([cell(r[c]) for c in columns])
