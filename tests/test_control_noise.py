"""Control errors on the programmed problem (static): enumeration, probabilities, precision.

References
----------
- One qubit: the sign of h + N(0, sigma^2) differs from the sign of h with
  probability Phi(-|h| / sigma) (normal distribution function; any statistics text).
- Wilson score interval: Wilson, J. Am. Stat. Assoc. 22, 209 (1927); checked against
  scipy.stats.binomtest(...).proportion_ci(method="wilson") (reference library) and
  the worked examples of Newcombe, Stat. Med. 17, 857 (1998), Table I, method 3
  (81/263, 15/148, 0/20, 1/29; values from memory, confirmed by SciPy).
- Edge counts of a path, cycle, grid and complete graph: common practice, no source.
- Independent brute force: the Ising energies are rebuilt here from Kronecker
  products of diag(1, -1) (no bit tricks), and the ground state found by argmin.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import binomtest, norm

from schedforge import control_noise as cn
from schedforge.control_noise import (
    critical_levels,
    draw_normals,
    find_precision,
    noise_directions,
    noisy_problem,
    problem_precision,
    spin_configurations,
    wilson_interval,
)
from schedforge.errors import InputError
from schedforge.problem_families import IsingProblem, graph_edges, grid_shape, make_problem
from schedforge.spec_model import NoiseSpec

CONF = 0.999  # wide enough that a correct estimator essentially never fails


# -- independent brute force ------------------------------------------------------
def kron_features(n: int, pairs: list[tuple[int, int]]) -> np.ndarray:
    """Columns diag(Z_i) and diag(Z_i Z_j) built from Kronecker products of diag(1, -1)."""
    z = np.array([1.0, -1.0])

    def zdiag(q: int) -> np.ndarray:
        out = np.ones(1)
        for k in range(n):
            out = np.kron(out, z if k == q else np.ones(2))
        return out

    zs = [zdiag(q) for q in range(n)]
    return np.stack(zs + [zs[a] * zs[b] for a, b in pairs], axis=1)


def kron_energies(n: int, h: np.ndarray, pairs: list[tuple[int, int]], J: np.ndarray) -> np.ndarray:
    """Diagonal of sum h_i Z_i + sum J_ij Z_i Z_j."""
    return kron_features(n, pairs) @ np.concatenate([np.asarray(h, float), np.asarray(J, float)])


def ground_set(e: np.ndarray, tol: float = 1e-9) -> set[int]:
    return set(np.flatnonzero(e <= e.min() + tol).tolist())


def brute_changed(problem: IsingProblem, noisy_coeffs: np.ndarray) -> np.ndarray:
    """For each column of noisy coefficients: did the ground state leave the intended set?"""
    pairs = list(zip(problem.i.tolist(), problem.j.tolist(), strict=True))
    feats = kron_features(problem.n, pairs)
    e0 = feats @ problem.coefficients()
    intended = e0 <= e0.min() + 1e-9
    e = feats @ noisy_coeffs
    lowest = e <= e.min(axis=0) + 1e-9
    return np.any(lowest & ~intended[:, None], axis=0)


PROBLEMS = {
    # two qubits, fields: unique ground state
    "2q-fields": IsingProblem([0.3, -0.5], [0], [1], [0.8]),
    # three-qubit ferromagnetic chain, no fields: Z2 pair (degenerate)
    "3q-z2": IsingProblem([0.0, 0.0, 0.0], [0, 1], [1, 2], [-1.0, -1.0]),
    # antiferromagnetic triangle: frustrated, 6-fold degenerate
    "3q-frustrated": IsingProblem([0.0, 0.0, 0.0], [0, 0, 1], [1, 2, 2], [1.0, 1.0, 1.0]),
    # three qubits, mixed
    "3q-mixed": IsingProblem([0.2, 0.0, -0.1], [0, 0, 1], [1, 2, 2], [1.0, -0.6, 0.4]),
}


# -- Wilson -------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("k", "n", "lo", "hi"),
    [
        (81, 263, 0.2553, 0.3662),
        (15, 148, 0.0624, 0.1605),
        (0, 20, 0.0, 0.1611),
        (1, 29, 0.0061, 0.1718),
    ],
)
def test_wilson_interval_matches_newcombe_and_scipy(k: int, n: int, lo: float, hi: float) -> None:
    got = wilson_interval(k, n, 0.95)
    assert got == pytest.approx((lo, hi), abs=6e-5)
    ref = binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    assert got == pytest.approx((ref.low, ref.high), abs=1e-12)


def test_wilson_interval_vectorised_and_other_levels() -> None:
    lo, hi = wilson_interval(np.array([0, 3, 10]), 10, 0.99)
    for k, a, b in zip([0, 3, 10], lo, hi, strict=True):
        ref = binomtest(k, 10).proportion_ci(confidence_level=0.99, method="wilson")
        assert (a, b) == pytest.approx((ref.low, ref.high), abs=1e-12)


# -- problem families ---------------------------------------------------------------
@pytest.mark.parametrize(
    ("graph", "n", "edges"),
    [("chain", 7, 6), ("ring", 7, 7), ("grid", 12, 2 * 12 - 3 - 4), ("complete", 7, 21)],
)
def test_graph_edge_counts(graph: str, n: int, edges: int) -> None:
    i, j = graph_edges(graph, n)
    assert i.size == edges
    assert np.all(i < j)
    assert len(set(zip(i.tolist(), j.tolist(), strict=True))) == edges


def test_grid_shape_and_neighbours() -> None:
    assert grid_shape(12) == (3, 4)
    assert grid_shape(16) == (4, 4)
    assert grid_shape(7) == (1, 7)
    i, j = graph_edges("grid", 6, shape=(2, 3))
    assert set(zip(i.tolist(), j.tolist(), strict=True)) == {
        (0, 1), (1, 2), (3, 4), (4, 5), (0, 3), (1, 4), (2, 5),
    }  # fmt: skip


def test_families_are_reproducible_from_the_seed() -> None:
    a = make_problem("ring", 9, couplings="sign", fields="gaussian", seed=5, instance=2)
    b = make_problem("ring", 9, couplings="sign", fields="gaussian", seed=5, instance=2)
    c = make_problem("ring", 9, couplings="sign", fields="gaussian", seed=5, instance=3)
    assert a == b
    assert a != c
    assert set(np.abs(a.J).tolist()) == {1.0}
    assert make_problem("complete", 5, fields="none").h.tolist() == [0.0] * 5


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"graph": "star", "size": 4}, "graph"),
        ({"graph": "ring", "size": 2}, "size"),
        ({"graph": "chain", "size": 4, "couplings": "uniform"}, "couplings"),
        ({"graph": "chain", "size": 4, "fields": "random"}, "fields"),
    ],
)
def test_family_bad_input(kwargs: dict, field: str) -> None:
    with pytest.raises(InputError) as err:
        make_problem(**kwargs)
    assert err.value.field == field


# -- enumeration --------------------------------------------------------------------
def test_block_enumeration_matches_kronecker_energies(monkeypatch: pytest.MonkeyPatch) -> None:
    p = make_problem("grid", 8, couplings="gaussian", fields="gaussian", seed=4)
    pairs = list(zip(p.i.tolist(), p.j.tolist(), strict=True))
    ref = kron_energies(p.n, p.h, pairs, p.J)
    monkeypatch.setattr(cn, "_BLOCK_ENTRIES", 16)  # many small blocks, cross couplings
    got = np.concatenate([e[:, 0] for _, e in cn._energy_blocks(p, p.coefficients()[:, None])])
    np.testing.assert_allclose(got, ref, atol=1e-12)
    e0, ground, _ = cn.ground_states(p)
    assert e0 == pytest.approx(ref.min(), abs=1e-12)
    assert set(ground.tolist()) == ground_set(ref)


def test_spin_convention_matches_hamiltonian_module() -> None:
    from schedforge.hamiltonian import ising_diagonal

    p = PROBLEMS["3q-mixed"]
    ps = p.to_spec()
    diag = ising_diagonal(ps.qubits, ps.h, ps.J)
    np.testing.assert_allclose(p.energies(spin_configurations(3, np.arange(8))), diag, atol=1e-12)


# -- one qubit: Phi(-|h| / sigma) ---------------------------------------------------------
def test_one_qubit_critical_levels_are_exact() -> None:
    """For h > 0 the draw flips when z <= -1 / level: critical level -1/z for z < 0."""
    p = IsingProblem([0.7], [], [], [])
    crit = critical_levels(p, 500, seed=11)
    z = np.array([draw_normals(11, d, 3)[0] for d in range(500)])
    expect = np.where(z < 0, -1.0 / np.where(z < 0, z, -1.0), np.inf)
    finite = np.isfinite(expect)
    assert np.array_equal(np.isfinite(crit.levels), finite)
    np.testing.assert_allclose(crit.levels[finite], expect[finite], rtol=1e-8)


@pytest.mark.parametrize("level", [0.3, 0.5, 1.0, 2.0])
def test_one_qubit_flip_probability_is_phi(level: float) -> None:
    h = -0.7
    crit = critical_levels(IsingProblem([h], [], [], []), 20000, seed=3)
    est = crit.estimate(level, CONF)
    sigma = level * abs(h)  # level is relative to the largest coefficient
    exact = norm.cdf(-abs(h) / sigma)
    assert est.lower <= exact <= est.upper
    # and not with sigma^2 in place of sigma (a plausible slip)
    if level != 1.0:
        assert not est.lower <= norm.cdf(-abs(h) / sigma**2) <= est.upper


# -- two and three qubits against the brute force ------------------------------------
@pytest.mark.parametrize("name", list(PROBLEMS))
@pytest.mark.parametrize("terms", [("h", "J"), ("J",)])
def test_enumeration_equals_brute_force_on_the_same_draws(name: str, terms: tuple) -> None:
    p = PROBLEMS[name]
    draws, level = 400, 0.6
    crit = critical_levels(p, draws, seed=7, terms=terms)
    dirs = noise_directions(p, draws, 7, terms)
    noisy = p.coefficients()[:, None] + level * dirs
    brute = brute_changed(p, noisy)
    assert np.array_equal(crit.levels <= level, brute)
    assert crit.degeneracy == len(
        ground_set(kron_energies(p.n, p.h, list(zip(p.i, p.j, strict=True)), p.J))
    )


@pytest.mark.parametrize("name", list(PROBLEMS))
def test_enumeration_against_independent_monte_carlo(name: str) -> None:
    """Independent draws and code: the MC frequency lies in the Wilson interval."""
    p = PROBLEMS[name]
    level, n_mc = 0.5, 20000
    est = critical_levels(p, 4000, seed=1).estimate(level, CONF)
    rng = np.random.default_rng(20240917)
    sigma = level * p.scale()
    noisy = p.coefficients()[:, None] + sigma * rng.standard_normal((p.coefficients().size, n_mc))
    k = int(brute_changed(p, noisy).sum())
    assert est.lower <= k / n_mc <= est.upper


def test_degenerate_rule_z2_and_frustration() -> None:
    """Zero fields, J noise: the Z2 pair is kept while the pair itself stays lowest."""
    z2 = critical_levels(PROBLEMS["3q-z2"], 300, seed=2, terms=("J",))
    assert z2.degeneracy == 2
    # a ferromagnetic chain stays ferromagnetic until a coupling changes sign, which
    # needs a noise of |J| = 1: at level 0.2 that is a 5-sigma event per coupling
    assert z2.probability(0.2) == 0.0
    tri = critical_levels(PROBLEMS["3q-frustrated"], 300, seed=2)
    assert tri.degeneracy == 6
    assert tri.probability(0.1) == 0.0  # noise selects one of the six, never an outsider


# -- level zero and monotonicity ---------------------------------------------------------
def test_level_zero_reproduces_the_noiseless_problem() -> None:
    p = PROBLEMS["3q-mixed"]
    assert noisy_problem(p, 0.0, seed=9, draw=4) == p
    crit = critical_levels(p, 200, seed=9)
    assert np.all(crit.levels > 0)
    assert crit.probability(0.0) == 0.0


def test_probability_is_monotone_in_the_level() -> None:
    crit = critical_levels(make_problem("ring", 8, couplings="gaussian", seed=1), 300, seed=4)
    levels = np.linspace(0, 1, 60)
    p = [crit.probability(x) for x in levels]
    assert np.all(np.diff(p) >= 0)
    assert p[-1] > 0


# -- the precision search -----------------------------------------------------------------
def test_search_brackets_an_analytic_crossing() -> None:
    """P(level) = Phi(-1/level) (one qubit) crosses 0.05 at 1 / Phi^-1(0.95)."""
    target = 0.05
    res = find_precision(lambda x: norm.cdf(-1 / x) if x > 0 else 0.0, target, rtol=1e-9)
    exact = -1.0 / norm.ppf(target)
    assert res.status == "bracketed"
    assert res.level_below <= exact <= res.level_above
    assert res.level_above - res.level_below <= 1e-8
    assert res.probability_below < target <= res.probability_above


def test_search_on_brute_force_estimates_finds_the_enumerated_crossing() -> None:
    """Brute force at each searched level (same draws) vs the enumerated crossing."""
    p = PROBLEMS["3q-mixed"]
    draws, target = 300, 0.1
    crit = critical_levels(p, draws, seed=5)
    dirs = noise_directions(p, draws, 5)

    def brute_probability(level: float) -> float:
        return float(brute_changed(p, p.coefficients()[:, None] + level * dirs).mean())

    res = find_precision(brute_probability, target, start=0.05, rtol=1e-7)
    crossing = crit.crossing_level(target)
    assert res.status == "bracketed"
    assert res.level_below <= crossing <= res.level_above * (1 + 1e-9)
    assert res.probability_below < target <= res.probability_above
    assert crit.probability(crossing) >= target > crit.probability(crossing * (1 - 1e-9))


def test_search_reports_a_target_never_reached() -> None:
    res = find_precision(lambda x: 0.0, 0.05, max_level=10.0)
    assert res.status == "not reached"
    assert math.isinf(res.level_above)
    # J noise on a single qubit without couplings: no draw ever changes
    crit = critical_levels(IsingProblem([0.5], [], [], []), 50, seed=0, terms=("J",))
    assert math.isinf(crit.crossing_level(0.05))


def test_problem_precision_summary_is_consistent() -> None:
    noise = NoiseSpec(level=0.2, draws=500, seed=3, target=0.05)
    res = problem_precision(PROBLEMS["3q-mixed"], noise)
    assert res.search.level_below <= res.crossing <= res.search.level_above * (1 + 1e-9)
    assert res.conservative <= res.crossing
    assert res.at_level.level == 0.2
    levels = [e.level for e in res.curve]
    assert levels[0] == 0.0 and levels == sorted(levels)


def test_bad_terms_are_input_errors() -> None:
    with pytest.raises(InputError) as err:
        critical_levels(PROBLEMS["2q-fields"], 10, seed=0, terms=("x",))
    assert err.value.field == "noise.terms"
