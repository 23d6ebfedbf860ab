"""Tests of the schedule families (schedforge.schedules).

References used (named again beside each check):
- scipy.special.betainc / scipy.special.expn (reference library values);
- SymPy exact differentiation of closed-form polynomials, exact (rational) solution
  of the Hermite interpolation conditions, and SymPy/mpmath arbitrary-precision
  evaluation of the gevrey bump integrand, its derivatives and integrals;
- scipy.integrate.quad for the consistency of successive derivative rows;
- Abramowitz & Stegun (1964), eq. 5.1.4 (definition of E_n), for the closed form of
  the end-only gevrey primitive: int_0^u exp(-1/v) dv = u E_2(1/u).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from fractions import Fraction

import mpmath as mp
import numpy as np
import pytest
import sympy as sp
from scipy import integrate, special

from schedforge.errors import InputError
from schedforge.schedules import (
    FAMILIES,
    GEVREY_FLATNESS_CHECKED,
    MAX_POLY_K,
    BetaSchedule,
    GevreySchedule,
    LinearSchedule,
    MonotoneInterpolant,
    PointsSchedule,
    PolySchedule,
    Schedule,
    make_schedule,
    schedule_from_spec,
)
from schedforge.spec_model import ScheduleSpec

X = sp.Symbol("x", positive=True)

#: Invented demo control points: a ramp with a mid-anneal pause.
PAUSE_POINTS = ((0.0, 0.0), (0.3, 0.35), (0.45, 0.4), (0.6, 0.4), (1.0, 1.0))


def _sympy_beta_polynomial(ks: int, ke: int) -> sp.Expr:
    """Closed form of I_x(1 + ks, 1 + ke) for integer k: the integral of the density."""
    t = sp.Symbol("t")
    a, b = ks + 1, ke + 1
    beta = sp.factorial(a - 1) * sp.factorial(b - 1) / sp.factorial(a + b - 1)
    return sp.expand(sp.integrate(t ** (a - 1) * (1 - t) ** (b - 1), (t, 0, X)) / beta)


def _exact_derivatives(expr: sp.Expr, order: int, xs: list[sp.Rational]) -> np.ndarray:
    """Exact values of d^n expr / dx^n at rational points, as floats."""
    out = np.empty((order + 1, len(xs)))
    d = expr
    for n in range(order + 1):
        out[n] = [float(d.subs(X, xv)) for xv in xs]
        d = sp.diff(d, X)
    return out


RATIONAL_GRID = [
    sp.Rational(v) for v in ("0", "1/1000", "1/7", "3/10", "1/2", "77/100", "999/1000", "1")
]
FLOAT_GRID = np.array([float(v) for v in RATIONAL_GRID])


# -- beta ---------------------------------------------------------------------
@pytest.mark.parametrize(
    ("k_start", "k_end"),
    [(0, 0), (0, 2), (3, 1), (0.5, 0.5), (1.5, 2.25), (0, 4.7), (7.3, 0.1), (12, 9)],
)
def test_beta_values_match_scipy_betainc(k_start: float, k_end: float) -> None:
    # Reference: scipy.special.betainc(a, b, x), a = 1 + k_start, b = 1 + k_end.
    x = np.linspace(0.0, 1.0, 1001)
    ref = special.betainc(1.0 + k_start, 1.0 + k_end, x)
    np.testing.assert_allclose(BetaSchedule(k_start, k_end)(x), ref, rtol=1e-14, atol=1e-16)


@pytest.mark.parametrize("k_start", range(6))
@pytest.mark.parametrize("k_end", range(6))
def test_beta_derivatives_match_sympy_integer_k(k_start: int, k_end: int) -> None:
    # Reference: SymPy exact differentiation of the closed-form polynomial
    # I_x(1 + k_start, 1 + k_end) (the integral of the beta density), at rational points.
    order = max(k_start, k_end) + 2
    ref = _exact_derivatives(_sympy_beta_polynomial(k_start, k_end), order, RATIONAL_GRID)
    got = BetaSchedule(k_start, k_end).derivatives(FLOAT_GRID, order)
    assert np.all(np.isfinite(got))
    for n in range(order + 1):
        scale = max(1.0, float(np.max(np.abs(ref[n]))))
        np.testing.assert_allclose(got[n], ref[n], rtol=0, atol=1e-12 * scale, err_msg=f"n={n}")
    # the end values are exact (zeros exactly zero)
    np.testing.assert_array_equal(got[:, 0] == 0.0, ref[:, 0] == 0.0)
    np.testing.assert_array_equal(got[1:, -1] == 0.0, ref[1:, -1] == 0.0)


def test_beta_orders_beyond_degree_are_zero_not_nan() -> None:
    # Reference: SymPy; I_x(2, 2) = 3x^2 - 2x^3 has all derivatives of order >= 4 zero.
    got = BetaSchedule(1, 1).derivatives(FLOAT_GRID, 7)
    ref = _exact_derivatives(_sympy_beta_polynomial(1, 1), 7, RATIONAL_GRID)
    np.testing.assert_array_equal(got[4:], 0.0)
    np.testing.assert_allclose(got, ref, atol=1e-12)


@pytest.mark.parametrize(("k_start", "k_end"), [(1.5, 0.7), (0.5, 2.25), (2.6, 3.4)])
def test_beta_real_k_derivatives_match_sympy(k_start: float, k_end: float) -> None:
    # Reference: SymPy differentiation of the beta density x^(a-1) (1-x)^(b-1) / B(a, b)
    # with rational exponents, evaluated to 30 digits (f^(n) = density^(n-1)).
    a = 1 + sp.nsimplify(k_start)
    b = 1 + sp.nsimplify(k_end)
    density = X ** (a - 1) * (1 - X) ** (b - 1) / sp.beta(a, b)
    xs = [sp.Rational(v) for v in ("1/100", "1/5", "1/2", "4/5", "99/100")]
    order = 5
    got = BetaSchedule(k_start, k_end).derivatives(np.array([float(v) for v in xs]), order)
    d = density
    for n in range(1, order + 1):
        ref = np.array([float(d.subs(X, v).evalf(30)) for v in xs])
        np.testing.assert_allclose(got[n], ref, rtol=1e-11, err_msg=f"n={n}")
        d = sp.diff(d, X)


@pytest.mark.parametrize("k", [0.5, 1.5, 2.25, 3.7])
def test_beta_real_k_end_limits(k: float) -> None:
    # Reference: SymPy differentiation of the density, evaluated to 100 digits at a
    # distance 1e-80 from each end: it is ~0 up to order ceil(k) and blows up (with the
    # sign returned) beyond.  The schedule must return 0 or +-inf there, never nan.
    kr = sp.nsimplify(k)
    order = math.ceil(k) + 3
    sched_start, sched_end = BetaSchedule(k, 0), BetaSchedule(0, k)
    d0 = sched_start.end_derivatives(order)[0]
    d1 = sched_end.end_derivatives(order)[1]
    dens_start = X**kr / sp.beta(1 + kr, 1)
    dens_end = (1 - X) ** kr / sp.beta(1, 1 + kr)
    eps = sp.Rational(1, 10**80)
    for n in range(1, order + 1):
        near0 = sp.diff(dens_start, X, n - 1).subs(X, eps).evalf(100)
        near1 = sp.diff(dens_end, X, n - 1).subs(X, 1 - eps).evalf(100)
        for got, near in ((d0[n], near0), (d1[n], near1)):
            assert not np.isnan(got)
            if abs(near) > 1e8:
                assert np.isinf(got) and np.sign(got) == np.sign(float(near))
            else:
                assert abs(near) < 1e-8 and got == 0.0
    assert sched_start.flat_start == math.ceil(k)
    assert sched_end.flat_end == math.ceil(k)


# -- poly ---------------------------------------------------------------------
def _sympy_hermite_tail(k: int, tail: sp.Rational) -> sp.Expr:
    """Degree 2k+2 polynomial p(x) solving the tail conditions exactly (SymPy linsolve).

    Conditions: p^(i)(x_j) = d^i x / dx^i at x_j = 1 - tail for i = 0..k+1 (linear base),
    p(1) = 1, p^(i)(1) = 0 for i = 1..k.
    """
    cs = sp.symbols(f"c0:{2 * k + 3}")
    p = sum(c * X**i for i, c in enumerate(cs))
    xj = 1 - tail
    eqs = [
        sp.diff(p, X, i).subs(X, xj) - (xj if i == 0 else (1 if i == 1 else 0))
        for i in range(k + 2)
    ]
    eqs += [p.subs(X, 1) - 1] + [sp.diff(p, X, i).subs(X, 1) for i in range(1, k + 1)]
    (sol,) = sp.linsolve(eqs, cs)
    return sp.expand(p.subs(dict(zip(cs, sol, strict=True))))


@pytest.mark.parametrize(
    ("k", "tail"),
    [(k, t) for k in range(6) for t in ("1/5", "1/2", "1/20")] + [(MAX_POLY_K, "1/5")],
)
def test_poly_matches_sympy_hermite_solution(k: int, tail: str) -> None:
    # Reference: SymPy exact solution of the Hermite conditions (linear system in
    # rationals) and exact differentiation, orders up to k_end + 2.
    tail_r = sp.Rational(tail)
    ref_poly = _sympy_hermite_tail(k, tail_r)
    xj = 1 - tail_r
    xs = [xj, xj + tail_r / 7, xj + tail_r / 2, 1 - tail_r / 1000, sp.Integer(1)]
    order = k + 2
    ref = _exact_derivatives(ref_poly, order, xs)
    sched = PolySchedule(k, float(tail_r))
    got = sched.derivatives(np.array([float(v) for v in xs]), order)
    for n in range(order + 1):
        # the larger of the natural size of the n-th derivative in the tail and its largest value
        scale = max(float(tail_r) ** -n, float(np.max(np.abs(ref[n]))))
        np.testing.assert_allclose(got[n], ref[n], rtol=0, atol=1e-11 * scale, err_msg=f"n={n}")
    # before the join the schedule is the linear base
    xb = np.linspace(0.0, float(xj), 50, endpoint=False)
    np.testing.assert_array_equal(sched(xb), xb)


@pytest.mark.parametrize("k", range(1, 7))
def test_poly_join_continuity(k: int) -> None:
    # Property of the design (Hermite matching of k_end + 1 derivatives at the join,
    # checked against SymPy above): left/right derivatives agree to order k_end + 1,
    # while order k_end + 2 jumps.  (k_end = 0 on a linear base is the straight line
    # itself: P(z) = 1 - tail + tail z solves the three conditions.)
    tail = 0.25
    sched = PolySchedule(k, tail)
    (join,) = sched.knots
    assert sched.continuity == k + 1
    left = sched.derivatives(np.nextafter(join, 0.0), k + 2)
    right = sched.derivatives(join, k + 2)
    for n in range(k + 2):
        assert left[n] == pytest.approx(right[n], abs=1e-12 * max(tail**-n, abs(right[n])))
    assert abs(left[k + 2] - right[k + 2]) > 1e-3 * max(tail ** -(k + 2), abs(right[k + 2]))


def test_points_tail_join_and_knots() -> None:
    # Property: for points, the join inherits the C^(k_end+1) matching and interior
    # control points before the join are knots (reference: the design contract).
    k = 2
    sched = PointsSchedule(PAUSE_POINTS, k_end=k, tail=0.2)
    assert sched.knots == (0.3, 0.45, 0.6, 0.8)
    assert sched.continuity == k + 1
    join = sched.knots[-1]
    left = sched.derivatives(np.nextafter(join, 0.0), k + 2)
    right = sched.derivatives(join, k + 2)
    np.testing.assert_allclose(left[: k + 2], right[: k + 2], rtol=1e-9, atol=1e-9)


# -- gevrey -------------------------------------------------------------------
def _sympy_bump(both_ends: bool) -> sp.Expr:
    y = X
    return sp.exp(-1 / (y * (1 - y))) if both_ends else sp.exp(-1 / (1 - y))


def _mp_bump(both_ends: bool) -> Callable[[mp.mpf], mp.mpf]:
    if both_ends:
        return lambda y: mp.exp(-1 / (y * (1 - y)))
    return lambda y: mp.exp(-1 / (1 - y))


def _mp_norm(both_ends: bool) -> mp.mpf:
    """Z = int_0^1 phi by mpmath quadrature at 40 digits (split at 1/2)."""
    with mp.workdps(40):
        return mp.quad(_mp_bump(both_ends), [0, mp.mpf(1) / 2, 1])


GEVREY_X = ("1/50", "1/10", "3/10", "1/2", "7/10", "9/10", "49/50")


@pytest.mark.parametrize("both_ends", [False, True])
def test_gevrey_derivatives_match_sympy(both_ends: bool) -> None:
    # Reference: SymPy exact differentiation of the integrand phi (f^(n) = phi^(n-1) / Z)
    # for n = 1..6, evaluated to 30 digits; Z by mpmath quadrature to 40 digits.
    # Tolerance: 1e-10 relative, plus 1e-13 of the largest value of that order
    # (for points near a sign change of the derivative).
    sched = GevreySchedule(flat_start=both_ends)
    z_ref = _mp_norm(both_ends)
    assert sched.normalization == pytest.approx(float(z_ref), rel=1e-14)
    xs = [sp.Rational(v) for v in GEVREY_X]
    order = 6
    got = sched.derivatives(np.array([float(v) for v in xs]), order)
    dphi = _sympy_bump(both_ends)
    for n in range(1, order + 1):
        ref = np.array([float(dphi.subs(X, v).evalf(30) / sp.Float(z_ref, 40)) for v in xs])
        atol = 1e-13 * float(np.max(np.abs(ref)))
        np.testing.assert_allclose(got[n], ref, rtol=1e-10, atol=atol, err_msg=f"n={n}")
        dphi = sp.diff(dphi, X)


@pytest.mark.parametrize("both_ends", [False, True])
def test_gevrey_high_derivatives_match_mpmath(both_ends: bool) -> None:
    # Reference: mpmath (SymPy's arbitrary-precision library) numerical differentiation
    # mp.diff at 40 digits, for orders up to max_order = 30 (where symbolic
    # differentiation of the two-sided bump becomes too slow).  Same tolerance as above.
    sched = GevreySchedule(flat_start=both_ends)
    z_ref = _mp_norm(both_ends)
    xf = np.array([float(sp.Rational(v)) for v in GEVREY_X])
    orders = (8, 12, 20, 30)
    got = sched.derivatives(xf, max(orders))
    phi = _mp_bump(both_ends)
    with mp.workdps(40):
        for n in orders:
            ref = np.array(
                [
                    float(mp.diff(phi, mp.mpf(sp.Rational(v).p) / sp.Rational(v).q, n - 1) / z_ref)
                    for v in GEVREY_X
                ]
            )
            atol = 1e-13 * float(np.max(np.abs(ref)))
            np.testing.assert_allclose(got[n], ref, rtol=1e-10, atol=atol, err_msg=f"n={n}")


@pytest.mark.parametrize("both_ends", [False, True])
def test_gevrey_values_match_quadrature(both_ends: bool) -> None:
    # Reference: mpmath quadrature of the integrand at 40 digits.
    sched = GevreySchedule(flat_start=both_ends)
    z_ref = _mp_norm(both_ends)
    phi = _mp_bump(both_ends)
    for v in ("1/100", "1/5", "1/2", "3/4", "19/20", "999/1000"):
        xv = sp.Rational(v)
        with mp.workdps(40):
            ref = mp.quad(phi, [0, mp.mpf(xv.p) / xv.q]) / z_ref
        assert sched(float(xv)) == pytest.approx(float(ref), abs=5e-16)  # a few ulps


def test_gevrey_end_only_matches_exponential_integral_closed_form() -> None:
    # Reference: Abramowitz & Stegun (1964) eq. 5.1.4 gives int_0^u exp(-1/v) dv = u E_2(1/u),
    # so f(x) = 1 - (1 - x) E_2(1/(1 - x)) / E_2(1); values by scipy.special.expn.
    sched = GevreySchedule()
    assert sched.normalization == pytest.approx(special.expn(2, 1.0), rel=1e-14)
    x = np.linspace(0.0, 0.999, 20001)
    u = 1.0 - x
    ref = 1.0 - u * special.expn(2, 1.0 / u) / special.expn(2, 1.0)
    np.testing.assert_allclose(sched(x), ref, rtol=0, atol=1e-14)


def test_gevrey_end_values_are_exact() -> None:
    # Reference: every derivative of exp(-1/(1-y)) vanishes at y = 1 (common practice,
    # no source: the standard smooth-but-not-analytic bump).
    for both in (False, True):
        sched = GevreySchedule(flat_start=both)
        d0, d1 = sched.end_derivatives(30)
        assert d1[0] == 1.0 and np.all(d1[1:] == 0.0)
        assert d0[0] == 0.0
        if both:
            assert np.all(d0[1:] == 0.0)
        else:
            assert d0[1] == pytest.approx(math.exp(-1.0) / special.expn(2, 1.0), rel=1e-14)
    with pytest.raises(ValueError, match="up to order 30"):
        GevreySchedule().derivatives(0.5, 31)


# -- every family ---------------------------------------------------------------
def _family_cases() -> list[tuple[Schedule, int, int]]:
    """(schedule, designed flatness at start, at end)."""
    g = GEVREY_FLATNESS_CHECKED
    cases: list[tuple[Schedule, int, int]] = [(LinearSchedule(), 0, 0)]
    cases += [(BetaSchedule(ks, ke), ks, ke) for ks in (0, 1, 3) for ke in (0, 2, 5)]
    cases += [(BetaSchedule(0.4, 2.5), 1, 3)]
    cases += [(PolySchedule(k, 0.2), 0, k) for k in (0, 1, 2, 4, 8)]
    cases += [(PointsSchedule(PAUSE_POINTS, k, 0.3), 0, k) for k in (0, 2, 3)]
    cases += [(PolySchedule(3, 0.3, base=BetaSchedule(2, 0)), 2, 3)]
    cases += [(GevreySchedule(), 0, g), (GevreySchedule(flat_start=True), g, g)]
    return cases


@pytest.mark.parametrize(("sched", "fs", "fe"), _family_cases(), ids=repr)
def test_flatness_orders_as_designed(sched: Schedule, fs: int, fe: int) -> None:
    # Reference: the design of each family (beta: Leibniz/SymPy-checked above; poly:
    # SymPy Hermite solution above; gevrey: all derivatives vanish, GEVREY_FLATNESS_CHECKED
    # of them are checked).
    assert sched.flat_start == fs
    assert sched.flat_end == fe
    assert sched.is_monotone()


def test_gevrey_flatness_reports_number_checked() -> None:
    # Reference: as above; an infinitely flat end reports max_check when asked.
    assert GevreySchedule().flatness("end", max_check=30) == 30
    assert GevreySchedule().flatness("start") == 0


@pytest.mark.parametrize(("sched", "fs", "fe"), _family_cases()[::3], ids=repr)
def test_derivative_rows_consistent_with_quadrature(sched: Schedule, fs: int, fe: int) -> None:
    # Reference: fundamental theorem of calculus, f^(n)(b) - f^(n)(a) = int_a^b f^(n+1),
    # with scipy.integrate.quad (breakpoints at the knots).
    del fs, fe
    for a, b in ((0.0, 0.37), (0.25, 0.9), (0.61, 1.0)):
        pts = [kn for kn in sched.knots if a < kn < b]
        ends = sched.derivatives(np.array([a, b]), 4)
        # across a knot only orders up to the continuity are continuous
        top = 4 if not pts or sched.continuity is None else min(4, sched.continuity + 1)
        for n in range(top):

            def row(x: float, n: int = n) -> float:
                return float(sched.derivatives(x, n + 1)[n + 1])

            # size of the integrand times the interval: the scale of the rounding error
            mag = (b - a) * float(
                np.max(np.abs(sched.derivatives(np.linspace(a, b, 201), n + 1)[n + 1]))
            )
            scale = max(1.0, mag)
            val, _err = integrate.quad(
                row, a, b, points=pts or None, epsabs=1e-11 * scale, epsrel=1e-10, limit=200
            )
            assert ends[n, 1] - ends[n, 0] == pytest.approx(val, abs=1e-9 * scale), (n, a, b)


class _Wiggle(Schedule):
    """f(x) = x + 0.25 sin(2 pi x): f(0) = 0, f(1) = 1 but f' = 1 + (pi/2) cos(2 pi x) < 0."""

    family = "wiggle"

    def _derivatives(self, x: np.ndarray, order: int) -> np.ndarray:
        out = np.zeros((order + 1, x.size))
        out[0] = x + 0.25 * np.sin(2 * np.pi * x)
        if order >= 1:
            out[1] = 1 + 0.5 * np.pi * np.cos(2 * np.pi * x)
        return out


def test_is_monotone_detects_a_decreasing_stretch() -> None:
    # Reference: f'(1/2) = 1 - pi/2 < 0 for the wiggle (elementary calculus).
    assert not _Wiggle().is_monotone()
    assert LinearSchedule().is_monotone()


# -- points -------------------------------------------------------------------
def test_interpolant_passes_through_points_and_is_smooth() -> None:
    # Reference: the interpolation conditions themselves (the given data) and
    # continuity of order m at the nodes, where derivatives 2..m vanish by design.
    m = 4
    interp = MonotoneInterpolant(PAUSE_POINTS, smoothness=m)
    xk = np.array([p[0] for p in PAUSE_POINTS])
    sk = np.array([p[1] for p in PAUSE_POINTS])
    np.testing.assert_allclose(interp(xk), sk, rtol=0, atol=1e-15)
    for xn in xk[1:-1]:
        left = interp.derivatives(np.nextafter(xn, 0.0), m + 1)
        right = interp.derivatives(xn, m + 1)
        np.testing.assert_allclose(left[: m + 1], right[: m + 1], rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(right[2 : m + 1], 0.0, atol=1e-12)
    # the pause segment stays exactly flat
    xp = np.linspace(0.45, 0.6, 11)
    np.testing.assert_allclose(interp(xp), 0.4, rtol=0, atol=1e-15)
    assert interp.is_monotone()


def test_interpolant_reproduces_straight_line_data() -> None:
    # Reference: straight-line data must give the straight line (identity).
    pts = [(0.0, 0.0), (0.2, 0.2), (0.5, 0.5), (0.9, 0.9), (1.0, 1.0)]
    x = np.linspace(0.0, 1.0, 301)
    d = MonotoneInterpolant(pts, smoothness=3).derivatives(x, 3)
    np.testing.assert_allclose(d[0], x, atol=1e-15)
    np.testing.assert_allclose(d[1], 1.0, atol=1e-14)
    np.testing.assert_allclose(d[2:], 0.0, atol=1e-12)
    # and then the points family is the linear-base poly family
    np.testing.assert_allclose(
        PointsSchedule(pts, 3, 0.2).derivatives(x, 5),
        PolySchedule(3, 0.2).derivatives(x, 5),
        atol=1e-12,
    )


def test_interpolant_monotone_for_random_monotone_data() -> None:
    # Reference: monotone data (a seeded random increasing sequence with repeated values).
    rng = np.random.default_rng(7)
    for _ in range(20):
        n = int(rng.integers(3, 12))
        x = np.concatenate([[0.0], np.sort(rng.uniform(0.02, 0.98, n)), [1.0]])
        steps = rng.exponential(1.0, n + 1) * (rng.uniform(size=n + 1) > 0.3)
        s = np.concatenate([[0.0], np.cumsum(steps)])
        s = s / s[-1]
        interp = MonotoneInterpolant(np.column_stack([x, s]), smoothness=3)
        grid = np.union1d(np.linspace(0, 1, 2001), x)
        d = interp.derivatives(grid, 1)
        assert np.all(d[1] >= -1e-12)
        assert np.all(np.diff(d[0]) >= -1e-15)
        np.testing.assert_allclose(interp(x), s, atol=1e-15)


# -- input errors ---------------------------------------------------------------
@pytest.mark.parametrize(
    ("build", "field", "words"),
    [
        (lambda: PolySchedule(2, 0.0), "schedule.tail", "between 0 and 1"),
        (lambda: PolySchedule(2, 1.0), "schedule.tail", "between 0 and 1"),
        (lambda: PolySchedule(2, -0.1), "schedule.tail", "between 0 and 1"),
        (lambda: PolySchedule(2, float("nan")), "schedule.tail", "finite"),
        (lambda: PolySchedule(2, "0.2"), "schedule.tail", "number"),
        (lambda: PolySchedule(2.5, 0.2), "schedule.k_end", "whole number"),
        (lambda: PolySchedule(MAX_POLY_K + 1, 0.2), "schedule.k_end", f"<= {MAX_POLY_K}"),
        (lambda: BetaSchedule(-1, 2), "schedule.k_start", ">= 0"),
        (lambda: BetaSchedule(0, float("inf")), "schedule.k_end", "finite"),
        (
            lambda: PointsSchedule([(0, 0), (0.5, 0.5), (0.5, 0.6), (1, 1)]),
            "schedule.points",
            "strictly increasing",
        ),
        (
            lambda: PointsSchedule([(0, 0), (0.6, 0.5), (0.4, 0.6), (1, 1)]),
            "schedule.points",
            "strictly increasing",
        ),
        (lambda: PointsSchedule([(0.1, 0), (1, 1)]), "schedule.points", "start at (0, 0)"),
        (lambda: PointsSchedule([(0, 0.1), (1, 1)]), "schedule.points", "start at (0, 0)"),
        (lambda: PointsSchedule([(0, 0), (1, 0.9)]), "schedule.points", "end at (1, 1)"),
        (
            lambda: PointsSchedule([(0, 0), (0.5, 0.7), (0.7, 0.6), (1, 1)]),
            "schedule.points",
            "non-decreasing",
        ),
        (lambda: PointsSchedule([(0, 0)]), "schedule.points", "at least 2"),
        (lambda: PointsSchedule([(0, 0), (0.5,), (1, 1)]), "schedule.points", "pair"),
        (lambda: PointsSchedule(None), "schedule.points", "required"),
        (
            lambda: PointsSchedule([(0, 0), (0.7, 0.1), (0.9, 0.99), (1, 1)], 2, 0.2),
            "schedule.tail",
            "overshoots: increase schedule.tail or lower schedule.k_end",
        ),
        (lambda: make_schedule("cosine"), "schedule.family", "must be one of"),
        (lambda: make_schedule("beta", kend=2), "schedule.kend", "not a schedule parameter"),
        (lambda: make_schedule("poly", k_start=1, k_end=2), "schedule.k_start", "must be 0"),
        (lambda: make_schedule("points", k_end=2), "schedule.points", "required"),
    ],
)
def test_bad_input_names_the_field(build, field: str, words: str) -> None:
    # Reference: the input-error contract (InputError(field, rule), message names both).
    with pytest.raises(InputError) as info:
        build()
    assert info.value.field == field
    assert field in str(info.value) and words in str(info.value)


def test_overshoot_is_a_real_overshoot() -> None:
    # Reference: SymPy exact solution of the same Hermite conditions for the rejected
    # combination has a negative slope somewhere in the tail (so rejection is right),
    # while a longer tail gives a monotone schedule.
    pts = [(0, 0), (0.7, 0.1), (0.9, 0.99), (1, 1)]
    base = MonotoneInterpolant(pts, smoothness=4)
    k, tail = 2, Fraction(1, 5)
    xj = 1 - tail
    bj = base.derivatives(float(xj), k + 1)
    cs = sp.symbols(f"c0:{2 * k + 3}")
    p = sum(c * X**i for i, c in enumerate(cs))
    xjr = sp.Rational(xj.numerator, xj.denominator)
    eqs = [sp.diff(p, X, i).subs(X, xjr) - sp.nsimplify(bj[i]) for i in range(k + 2)]
    eqs += [p.subs(X, 1) - 1] + [sp.diff(p, X, i).subs(X, 1) for i in range(1, k + 1)]
    (sol,) = sp.linsolve(eqs, cs)
    slope = sp.lambdify(X, sp.diff(p.subs(dict(zip(cs, sol, strict=True))), X))
    assert min(slope(v) for v in np.linspace(float(xj), 1.0, 401)) < 0
    assert PointsSchedule(pts, 2, 0.35).is_monotone()


# -- construction ---------------------------------------------------------------
def test_registry_and_make_schedule() -> None:
    # Reference: the spec contract's family names.
    assert set(FAMILIES) == {"linear", "beta", "poly", "gevrey", "points"}
    assert isinstance(make_schedule("linear", k_end=3), LinearSchedule)
    b = make_schedule("beta", k_start=1, k_end=2.5, tail=0.3)
    assert isinstance(b, BetaSchedule) and (b.k_start, b.k_end) == (1, 2.5)
    p = make_schedule("poly", k_end=3, tail=0.1)
    assert isinstance(p, PolySchedule) and (p.k_end, p.tail, p.knots) == (3, 0.1, (0.9,))
    pp = make_schedule("poly", k_end=1, points=PAUSE_POINTS)
    assert isinstance(pp.base, MonotoneInterpolant) and pp.family == "poly"
    g = make_schedule("gevrey", k_start=0, k_end=5)
    assert isinstance(g, GevreySchedule) and not g.both_ends and g.k_end == math.inf
    assert make_schedule("gevrey", k_start=2).both_ends
    pts = make_schedule("points", points=PAUSE_POINTS, k_end=2, tail=0.25)
    assert isinstance(pts, PointsSchedule) and pts.describe()["points"] == PAUSE_POINTS


def test_schedule_from_spec() -> None:
    # Reference: the ScheduleSpec defaults (beta, k_start 0, k_end 2) and fields.
    s = schedule_from_spec(ScheduleSpec())
    assert isinstance(s, BetaSchedule) and (s.k_start, s.k_end) == (0, 2)
    s = schedule_from_spec(ScheduleSpec(family="points", k_end=1, tail=0.3, points=PAUSE_POINTS))
    assert isinstance(s, PointsSchedule) and s.k_end == 1 and s.tail == 0.3
    s = schedule_from_spec(ScheduleSpec(family="gevrey", k_start=1))
    assert s.flat_start == GEVREY_FLATNESS_CHECKED


def test_argument_domain() -> None:
    # Reference: the schedule contract, x in [0, 1] (rounding slack 1e-12 clipped).
    sched = BetaSchedule(2, 2)
    assert sched(1.0 + 1e-15) == 1.0 and sched(-1e-15) == 0.0
    with pytest.raises(ValueError, match=r"\[0, 1\]"):
        sched(1.01)
    with pytest.raises(ValueError, match=r"\[0, 1\]"):
        sched(np.array([0.5, np.nan]))
    assert sched.derivatives(np.zeros((2, 3)), 2).shape == (3, 2, 3)
