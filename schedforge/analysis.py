"""Scaling analysis of a sweep: regime detection, power-law fits and verdicts.

A sweep gives, for one schedule (family, variant, k_start, k_end), the error
``err(tf)`` at several anneal times.  In the asymptotic regime it falls as a power
of tf given by :func:`schedforge.error_law.error_law`: ``tf^-(k_end + 1)`` for
open (Davies) dynamics, ``tf^-(min(k_start, k_end) + 1)`` for closed (unitary)
dynamics.  This module finds that regime automatically and fits it; ``fit.csv``
names the law used (column ``error_law``).

Method (all choices are ours and documented here; the tolerances are common
practice, no source):

1. **Usable points.**  A point is usable when its ``status`` is ``"ok"``, its
   error is finite and positive, and the error lies above the *numerical floor*
   ``floor = floor_factor * atol`` (``atol`` is the integrator's absolute
   tolerance, ``spec.numerics.atol``; default ``floor_factor`` =
   :data:`DEFAULT_FLOOR_FACTOR`).  Errors near the integrator's tolerance are
   rounding noise and are never fitted.
2. **Local slopes.**  Between neighbouring usable points (sorted by tf) the local
   slope is ``d log(err) / d log(tf)`` (a finite difference).
3. **Super-polynomial decay.**  If the usable points at the large-tf end have
   local slopes that keep steepening (each at least :data:`STEEPENING_STEP`
   steeper than the previous one, by :data:`DEFAULT_REGIME_TOL` in total) and the
   family has no polynomial law (``gevrey``, flat to every order), the verdict
   is ``super-polynomial``.  For the other families a steepening run is the
   tail of a decaying transient, not a law.
4. **Regime.**  Otherwise the regime is the longest run of consecutive usable
   points ending at the largest usable tf whose local slopes all lie within a
   band of width ``regime_tol`` (``max - min <= regime_tol``; default
   :data:`DEFAULT_REGIME_TOL`), each slope being allowed to leave the band by
   its own uncertainty from noise at the level of the integrator's ``atol``.
   At least :data:`MIN_REGIME_POINTS` points are required; with fewer the
   verdict is ``regime not reached`` and the message says which tf range to add.
   Points with tf shorter than ``RELAXATION_FACTOR`` (= 5) times the system's own
   time scale (``time_scale_ns``: 1/gap(1) of the final generator for open
   dynamics, 1/min spectral gap for closed dynamics; see
   :mod:`schedforge.error_law`) are never part of the regime: the law cannot
   hold there, however steady the local slopes look.
5. **Fit.**  Ordinary least squares of ``log(err)`` on ``log(tf)`` over the
   regime, with the standard error of the slope from the residuals (``n - 2``
   degrees of freedom).  The slope *matches* when ``|slope - expected| <=
   slope_tol`` (default ``slope_tol`` = :data:`DEFAULT_SLOPE_TOL` = 0.03).  If it
   does not match and the local slopes of the regime move monotonically toward
   ``expected`` (the approach to the law, with its 1/tf correction), the verdict
   is ``regime not reached`` (add larger tf); else ``disagrees``.
6. **Fitted coefficient.**  When the slope matches: the leading coefficient of the
   law ``err = C tf^-(k+1) (1 + D / tf + ...)`` (the next term of the adiabatic
   expansion is one power of tf smaller), obtained by a least-squares line of
   ``err * tf^(k+1)`` against ``1 / tf`` over the regime and read at ``1/tf = 0``.
   With a single regime point more than needed this is a Richardson-type
   extrapolation; it is exact for data that follow the two-term law.
7. **Agreement.**  ``agrees`` needs all the evidence: steady local slopes (step 4),
   tf long against the time scale (step 4), a matching slope (step 5) and, when a
   coefficient was predicted, a fitted coefficient within
   ``COEFFICIENT_RTOL`` (= 10 %) of it.  A fit that matches the slope but not the
   coefficient is ``regime not reached`` (a transient can pass through the right
   slope), with the tf range to add.  Without a prediction (closed dynamics,
   more than 32 levels) the coefficient is not checked and the message says so.

Verdict strings are exactly :data:`VERDICTS`.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .error_law import (
    CLOSED,
    COEFFICIENT_RTOL,
    OPEN,
    RELAXATION_FACTOR,
    ErrorLaw,
    end_orders,
    error_law,
)
from .fileio import atomic_write
from .metrics import METRICS
from .schedules import FAMILIES, Schedule

__all__ = [
    "DEFAULT_FLOOR_FACTOR",
    "DEFAULT_REGIME_TOL",
    "DEFAULT_SLOPE_TOL",
    "FIT_COLUMNS",
    "MIN_REGIME_POINTS",
    "NOT_REACHED",
    "STEEPENING_STEP",
    "SUPER_POLYNOMIAL",
    "VERDICTS",
    "ScalingFit",
    "detect_regime",
    "expected_slope",
    "fit_points",
    "fit_power_law",
    "fit_scaling",
    "format_fit_table",
    "local_slopes",
    "numerical_floor",
    "write_fit_csv",
]

#: Tolerance on the fitted slope for ``agrees`` (common practice, no source).
DEFAULT_SLOPE_TOL: float = 0.03
#: Width of the band in which all local slopes of the regime must lie (our choice).
DEFAULT_REGIME_TOL: float = 0.06
#: Numerical floor = this factor times the integrator's absolute tolerance (our choice:
#: the general integrator's measured absolute error at its default tolerances is about
#: 400 atol at short anneals, see benchmarks/RESULTS.md).
DEFAULT_FLOOR_FACTOR: float = 1000.0
#: Minimum number of points in a fitted regime.
MIN_REGIME_POINTS: int = 3
#: Minimum steepening between successive local slopes for ``super-polynomial``.
STEEPENING_STEP: float = 0.02

AGREES = "agrees"
DISAGREES = "disagrees"
NOT_REACHED = "regime not reached"
SUPER_POLYNOMIAL = "super-polynomial"
#: Every verdict this module can give.
VERDICTS: tuple[str, ...] = (AGREES, DISAGREES, NOT_REACHED, SUPER_POLYNOMIAL)

#: Columns of ``fit.csv``, in order.
FIT_COLUMNS: tuple[str, ...] = (
    "family",
    "variant",
    "k_start",
    "k_end",
    "metric",
    "error_law",
    "slope",
    "slope_stderr",
    "expected_slope",
    "regime_tf_min_ns",
    "regime_tf_max_ns",
    "n_points",
    "coefficient_fit",
    "coefficient_predicted",
    "verdict",
    "message",
)


@dataclass(frozen=True)
class ScalingFit:
    """Result of the scaling analysis of one schedule.

    Attributes
    ----------
    family, variant : str
        Schedule family and ``"ideal"`` / ``"realized"``.
    k_start, k_end : float
        Designed flatness orders.
    metric : str
        Name of the error column analysed (``"trace_distance"`` by default).
    tf_ns, error : tuple of float
        All points of the schedule, sorted by tf.
    usable : tuple of bool
        Which points may be fitted (status ok, finite, above the floor).
    slopes : tuple of float
        Local slopes between neighbours ``i, i+1`` (nan unless both usable).
    regime : tuple of int
        Indices (into ``tf_ns``) of the fitted regime; empty if none.
    slope, slope_stderr, intercept : float
        Fit of ``log err = intercept + slope log tf`` (nan when not fitted).
    expected_slope : float
        Slope of the error law (``law.slope``), nan without a polynomial law.
    coefficient_fit : float
        Extrapolated leading coefficient (when the slope matches the law; else nan).
    coefficient_predicted : float
        Leading coefficient predicted from the final generator (nan if none).
    floor : float
        Numerical floor used.
    verdict : str
        One of :data:`VERDICTS`.
    message : str
        Plain-language explanation (what to add when the regime is not reached).
    law : ErrorLaw
        The error law the fit was held against (open or closed dynamics).
    time_scale_ns : float
        The time scale tf must be long against (1/gap; nan when unknown).
    """

    family: str
    variant: str
    k_start: float
    k_end: float
    metric: str
    tf_ns: tuple[float, ...]
    error: tuple[float, ...]
    usable: tuple[bool, ...]
    slopes: tuple[float, ...]
    regime: tuple[int, ...]
    slope: float
    slope_stderr: float
    intercept: float
    expected_slope: float
    coefficient_fit: float
    coefficient_predicted: float
    floor: float
    verdict: str
    message: str
    extra: dict[str, Any] = field(default_factory=dict, compare=False)
    law: ErrorLaw | None = None
    time_scale_ns: float = math.nan

    @property
    def law_label(self) -> str:
        """The error law used, e.g. ``"open: tf^-(k_end+1) = tf^-3"`` ("" if none)."""
        return "" if self.law is None else self.law.label

    @property
    def regime_tf_min_ns(self) -> float:
        """Smallest tf of the regime (nan if none)."""
        return self.tf_ns[self.regime[0]] if self.regime else math.nan

    @property
    def regime_tf_max_ns(self) -> float:
        """Largest tf of the regime (nan if none)."""
        return self.tf_ns[self.regime[-1]] if self.regime else math.nan

    @property
    def n_points(self) -> int:
        """Number of points in the fitted regime."""
        return len(self.regime)

    @property
    def key(self) -> tuple[str, str, float, float]:
        """(family, variant, k_start, k_end)."""
        return (self.family, self.variant, self.k_start, self.k_end)

    def row(self) -> dict[str, Any]:
        """One ``fit.csv`` row (keys :data:`FIT_COLUMNS`)."""
        return {
            "family": self.family,
            "variant": self.variant,
            "k_start": self.k_start,
            "k_end": self.k_end,
            "metric": self.metric,
            "error_law": self.law_label,
            "slope": self.slope,
            "slope_stderr": self.slope_stderr,
            "expected_slope": self.expected_slope,
            "regime_tf_min_ns": self.regime_tf_min_ns,
            "regime_tf_max_ns": self.regime_tf_max_ns,
            "n_points": self.n_points,
            "coefficient_fit": self.coefficient_fit,
            "coefficient_predicted": self.coefficient_predicted,
            "verdict": self.verdict,
            "message": self.message,
        }


def numerical_floor(atol: float, factor: float = DEFAULT_FLOOR_FACTOR) -> float:
    """Errors at or below ``factor * atol`` are treated as integrator noise."""
    return float(factor) * float(atol)


def expected_slope(
    family: str, k_end: float, *, k_start: float = 0.0, dynamics: str = OPEN
) -> float:
    """The slope of the error law (:func:`schedforge.error_law.error_law`).

    Open dynamics: ``-(k_end + 1)``; closed: ``-(min(k_start, k_end) + 1)``; nan
    without a polynomial law (``gevrey``, infinite k).
    """
    return error_law(dynamics, family, k_start, k_end).slope


def local_slopes(tf_ns: ArrayLike, error: ArrayLike) -> NDArray[np.float64]:
    """Finite-difference slopes ``d log(err) / d log(tf)`` between neighbours.

    Parameters
    ----------
    tf_ns, error : array_like
        Points sorted by increasing tf (positive values).

    Returns
    -------
    ndarray
        Length ``n - 1``; entry ``i`` is the slope between points ``i`` and ``i+1``.
    """
    t = np.asarray(tf_ns, dtype=float)
    e = np.asarray(error, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.diff(np.log(e)) / np.diff(np.log(t))


def fit_power_law(tf_ns: ArrayLike, error: ArrayLike) -> tuple[float, float, float]:
    """Least-squares fit ``log err = intercept + slope log tf``.

    Returns
    -------
    slope, slope_stderr, intercept : float
        ``slope_stderr`` is the usual OLS standard error with ``n - 2`` degrees of
        freedom (nan for two points).
    """
    x = np.log(np.asarray(tf_ns, dtype=float))
    y = np.log(np.asarray(error, dtype=float))
    n = x.size
    if n < 2:
        raise ValueError("a power-law fit needs at least two points")
    xm = x.mean()
    sxx = float(np.sum((x - xm) ** 2))
    slope = float(np.sum((x - xm) * (y - y.mean())) / sxx)
    intercept = float(y.mean() - slope * xm)
    if n > 2:
        resid = y - (intercept + slope * x)
        stderr = math.sqrt(float(np.sum(resid**2)) / (n - 2) / sxx)
    else:
        stderr = math.nan
    return slope, stderr, intercept


def _usable_mask(
    error: NDArray[np.float64], status: Sequence[str] | None, floor: float
) -> NDArray[np.bool_]:
    ok = np.isfinite(error) & (error > 0) & (error > floor)
    if status is not None:
        ok &= np.array([s == "ok" for s in status], dtype=bool)
    return ok


def _tail_run(usable: NDArray[np.bool_]) -> list[int]:
    """Indices of the consecutive usable points ending at the last usable point."""
    idx = np.flatnonzero(usable)
    if idx.size == 0:
        return []
    last = int(idx[-1])
    first = last
    while first - 1 >= 0 and usable[first - 1]:
        first -= 1
    return list(range(first, last + 1))


def detect_regime(
    tf_ns: ArrayLike,
    error: ArrayLike,
    usable: ArrayLike,
    regime_tol: float = DEFAULT_REGIME_TOL,
    noise: float = 0.0,
) -> list[int]:
    """The longest run of usable points at the large-tf end with agreeing local slopes.

    Parameters
    ----------
    tf_ns, error : array_like
        Points sorted by increasing tf.
    usable : array_like of bool
        Mask of points that may be fitted.
    regime_tol : float
        All local slopes in the run must lie within a band of this width.
    noise : float
        Absolute noise level of the errors (the integrator's ``atol``).  Each
        local slope may leave the band by its own uncertainty
        ``noise (1/err_i + 1/err_(i+1)) / |log(tf_(i+1) / tf_i)|``, so that
        closely spaced points just above the floor do not break the regime.

    Returns
    -------
    list of int
        Indices of the run in increasing tf (may have fewer than
        :data:`MIN_REGIME_POINTS` entries; empty if no point is usable).
    """
    mask = np.asarray(usable, dtype=bool)
    run = _tail_run(mask)
    if len(run) <= 2:
        return run
    t = np.asarray(tf_ns, dtype=float)[run]
    e = np.asarray(error, dtype=float)[run]
    slopes = local_slopes(t, e)
    half = 0.5 * regime_tol + noise * (1.0 / e[:-1] + 1.0 / e[1:]) / np.abs(np.diff(np.log(t)))
    # Extend from the large-tf end while some common value lies within every
    # slope's allowance (the intervals [m - w, m + w] keep a common point).
    lo = slopes[-1] - half[-1]
    hi = slopes[-1] + half[-1]
    start = len(run) - 2  # index in run of the first point of the current sub-run
    for j in range(len(slopes) - 2, -1, -1):
        lo_new, hi_new = max(lo, slopes[j] - half[j]), min(hi, slopes[j] + half[j])
        if lo_new > hi_new:
            break
        lo, hi = lo_new, hi_new
        start = j
    return run[start:]


def _steepening(slopes: NDArray[np.float64], expected: float, slope_tol: float) -> bool:
    """True if the trailing local slopes keep steepening beyond any polynomial law."""
    if slopes.size < 2:
        return False
    # Longest trailing run in which every slope is steeper than the previous one.
    n = 1
    while n < slopes.size and slopes[-n] < slopes[-n - 1] - STEEPENING_STEP:
        n += 1
    if n < 2:
        return False
    tail = slopes[-n:]
    if tail[0] - tail[-1] <= DEFAULT_REGIME_TOL:
        return False
    del slope_tol
    # Only a family without a polynomial law may be called super-polynomial: for
    # the others a steepening run is the tail of a decaying transient.
    return bool(math.isnan(expected))


def _drifting_toward(slopes: NDArray[np.float64], expected: float) -> bool:
    """True if successive local slopes move monotonically toward ``expected``.

    Used on a regime whose fit disagrees: slopes that keep approaching the law
    mean the data are still pre-asymptotic (regime not reached), whereas slopes
    that stay put or move away (a floor from an imperfect waveform) disagree.
    """
    if slopes.size < 2:
        return False
    dist = np.abs(slopes - expected)
    return bool(np.all(np.diff(dist) < 0))


def _fmt_tf(t: float) -> str:
    return f"{t:.4g}"


def _not_reached_message(
    tf: NDArray[np.float64],
    error: NDArray[np.float64],
    usable: NDArray[np.bool_],
    status: Sequence[str] | None,
    floor: float,
    regime: list[int],
) -> str:
    n_have = len(regime)
    need = MIN_REGIME_POINTS
    if not usable.any():
        at_floor = np.isfinite(error) & (error <= floor)
        if at_floor.any():
            return (
                f"no point lies above the numerical floor ({floor:.2g}); "
                f"add tf below {_fmt_tf(tf.min())} ns or tighten numerics.atol"
            )
        return "no usable point (every point failed); see the points' status and message"
    last = regime[-1]
    above_floor_next = last + 1 < tf.size
    if above_floor_next:
        nxt = last + 1
        if np.isfinite(error[nxt]) and error[nxt] <= floor:
            return (
                f"only {n_have} point(s) with agreeing local slopes before the numerical "
                f"floor ({floor:.2g}) at {_fmt_tf(tf[nxt])} ns; add tf between "
                f"{_fmt_tf(tf[regime[0]])} and {_fmt_tf(tf[nxt])} ns (at least "
                f"{need} points in all) or tighten numerics.atol"
            )
        if status is not None and status[nxt] != "ok":
            return (
                f"only {n_have} point(s) with agreeing local slopes; the point at "
                f"{_fmt_tf(tf[nxt])} ns failed ({status[nxt]}); add tf above "
                f"{_fmt_tf(tf[last])} ns"
            )
    return (
        f"only {n_have} point(s) with agreeing local slopes at the large-tf end "
        f"(need {need}); add tf above {_fmt_tf(tf[last])} ns"
    )


def _extrapolated_coefficient(
    tf: NDArray[np.float64], error: NDArray[np.float64], order: float
) -> float:
    """Leading C of ``err = C tf^-(k+1) (1 + D/tf)`` with k = ``order``: intercept at 1/tf = 0."""
    y = error * tf ** (order + 1.0)
    if tf.size < 2:
        return float(y[0])
    slope, intercept = np.polyfit(1.0 / tf, y, 1)
    del slope
    return float(intercept)


def _suggest_tf(lo: float) -> str:
    """A tf range to add above ``lo``: three points over a decade."""
    pts = np.geomspace(lo, 10.0 * lo, 3)
    return (
        f"add tf from {_fmt_tf(lo)} to {_fmt_tf(10.0 * lo)} ns (e.g. "
        + ", ".join(_fmt_tf(float(p)) for p in pts)
        + " ns)"
    )


def fit_scaling(
    tf_ns: ArrayLike,
    error: ArrayLike,
    *,
    k_end: float,
    status: Sequence[str] | None = None,
    family: str = "",
    variant: str = "ideal",
    k_start: float = 0.0,
    metric: str = "trace_distance",
    floor: float = 0.0,
    slope_tol: float = DEFAULT_SLOPE_TOL,
    regime_tol: float = DEFAULT_REGIME_TOL,
    coefficient_predicted: float = math.nan,
    noise: float | None = None,
    dynamics: str = OPEN,
    time_scale_ns: float = math.nan,
    coefficient_parted: float = math.nan,
) -> ScalingFit:
    """Detect the asymptotic regime of one schedule's points and fit it.

    Parameters
    ----------
    tf_ns, error : array_like
        Anneal times (ns) and errors; any order, sorted here.
    k_end : float
        Designed flatness order at the end.
    status : sequence of str, optional
        Per-point status; only ``"ok"`` points are fitted.
    family, variant, k_start, metric : str or float
        Labels carried into the result; ``family`` and ``k_start`` also choose the
        law (see ``dynamics``).
    floor : float
        Numerical floor (see :func:`numerical_floor`); errors at or below it are
        not fitted.
    slope_tol : float
        Tolerance on the slope for ``agrees``.
    regime_tol : float
        Width of the band of local slopes within the regime.
    coefficient_predicted : float
        Predicted coefficient (see :mod:`schedforge.prediction`); when finite, the
        fitted coefficient must lie within ``COEFFICIENT_RTOL`` of it for ``agrees``.
    noise : float, optional
        Absolute noise level of the errors, used to widen each local slope's
        allowance in :func:`detect_regime`; default ``floor / DEFAULT_FLOOR_FACTOR``
        (the integrator's ``atol`` when the floor comes from :func:`numerical_floor`).
    dynamics : {"open", "closed"}
        Which law applies (:func:`schedforge.error_law.error_law`): open,
        ``tf^-(k_end + 1)``; closed, ``tf^-(min(k_start, k_end) + 1)``.
    time_scale_ns : float
        1/gap (ns) that tf must be long against (:func:`schedforge.error_law.law_time_scale_ns`);
        points below ``RELAXATION_FACTOR`` times it are never in the regime.  nan:
        not checked (the message says so).
    coefficient_parted : float
        The coefficient that anneals short of a crossover show where levels coinciding
        at s = 1 part just before it (``Prediction.coefficient_parted``); a fit that
        matches it instead of ``coefficient_predicted`` says so.  nan: none.

    Returns
    -------
    ScalingFit
    """
    tf = np.asarray(tf_ns, dtype=float).ravel()
    err = np.asarray(error, dtype=float).ravel()
    if tf.shape != err.shape:
        raise ValueError("tf_ns and error must have the same length")
    order = np.argsort(tf, kind="stable")
    tf, err = tf[order], err[order]
    st = None if status is None else [str(status[i]) for i in order]
    usable = _usable_mask(err, st, floor)
    with np.errstate(divide="ignore", invalid="ignore"):
        slopes_all = local_slopes(tf, err) if tf.size > 1 else np.zeros(0)
    both = usable[:-1] & usable[1:] if tf.size > 1 else np.zeros(0, dtype=bool)
    slopes_all = np.where(both, slopes_all, np.nan)
    law = error_law(dynamics, family, k_start, k_end)
    expected = law.slope
    tau = float(time_scale_ns)
    tf_law_min = RELAXATION_FACTOR * tau if math.isfinite(tau) else 0.0

    nan = math.nan
    common = dict(
        family=family,
        variant=variant,
        k_start=float(k_start),
        k_end=float(k_end),
        metric=metric,
        tf_ns=tuple(float(t) for t in tf),
        error=tuple(float(e) for e in err),
        usable=tuple(bool(u) for u in usable),
        slopes=tuple(float(s) for s in slopes_all),
        expected_slope=expected,
        coefficient_predicted=float(coefficient_predicted),
        floor=float(floor),
        law=law,
        time_scale_ns=tau,
    )

    def not_reached(message: str) -> ScalingFit:
        return ScalingFit(
            regime=(),
            slope=nan,
            slope_stderr=nan,
            intercept=nan,
            coefficient_fit=nan,
            verdict=NOT_REACHED,
            message=message,
            **common,
        )

    tail = _tail_run(usable)
    if len(tail) >= MIN_REGIME_POINTS:
        tail_slopes = local_slopes(tf[tail], err[tail])
        if _steepening(tail_slopes, expected, slope_tol):
            msg = (
                f"local slopes keep steepening, from {tail_slopes[0]:.3g} to "
                f"{tail_slopes[-1]:.3g} over tf {_fmt_tf(tf[tail[0]])}.."
                f"{_fmt_tf(tf[tail[-1]])} ns: faster than any power of tf"
            )
            return ScalingFit(
                regime=tuple(tail),
                slope=nan,
                slope_stderr=nan,
                intercept=nan,
                coefficient_fit=nan,
                verdict=SUPER_POLYNOMIAL,
                message=msg,
                **common,
            )

    if math.isinf(tau):
        return not_reached(
            "the final generator has no relaxation gap (1/gap infinite): the error law "
            "cannot hold at any tf"
        )
    if noise is None:
        noise = floor / DEFAULT_FLOOR_FACTOR
    long_enough = usable & (tf >= tf_law_min)
    regime = detect_regime(tf, err, long_enough, regime_tol, noise)
    if len(regime) < MIN_REGIME_POINTS:
        short = usable & ~long_enough
        if short.any() and int(np.count_nonzero(long_enough)) < MIN_REGIME_POINTS:
            n_long = int(np.count_nonzero(long_enough))
            head = (
                f"only {n_long} usable point(s) with tf >= {RELAXATION_FACTOR:g} x 1/gap = "
                f"{_fmt_tf(tf_law_min)} ns (1/gap = {tau:.3g} ns; the law cannot hold at "
                "shorter tf)"
            )
            sunk = np.isfinite(err) & (err <= floor) & (tf >= tf_law_min)
            if sunk.any():  # longer anneals only sink further: fill in below the floor
                first_sunk = float(tf[sunk].min())
                return not_reached(
                    f"{head}; {int(np.count_nonzero(sunk))} more lie at or below the "
                    f"numerical floor ({floor:.2g}) from {_fmt_tf(first_sunk)} ns on; add "
                    f"tf between {_fmt_tf(tf_law_min)} and {_fmt_tf(first_sunk)} ns (at "
                    f"least {MIN_REGIME_POINTS} points in all) or tighten numerics.atol"
                )
            return not_reached(f"{head}; {_suggest_tf(max(tf_law_min, float(tf[usable].max())))}")
        message = _not_reached_message(tf, err, long_enough, st, floor, regime)
        k0, k1 = end_orders(family, k_start, k_end)
        if law.dynamics == CLOSED and law.polynomial and k0 == k1:
            message += (
                "; with equal flatness at both ends of a closed system the two boundary "
                "terms interfere and the local slopes oscillate with tf, so a steady run "
                "may never appear (k_start != k_end gives a clean law)"
            )
        return not_reached(message)

    slope, stderr, intercept = fit_power_law(tf[regime], err[regime])
    span = f"tf {_fmt_tf(tf[regime[0]])}..{_fmt_tf(tf[regime[-1]])} ns ({len(regime)} points)"
    scale_note = (
        f"; tf >= {RELAXATION_FACTOR:g} x 1/gap = {_fmt_tf(tf_law_min)} ns"
        if math.isfinite(tau)
        else "; tf not checked against 1/gap (unknown)"
    )

    def disagrees(message: str) -> ScalingFit:
        return ScalingFit(
            regime=tuple(regime),
            slope=slope,
            slope_stderr=stderr,
            intercept=intercept,
            coefficient_fit=nan,
            verdict=DISAGREES,
            message=message,
            **common,
        )

    if not law.polynomial:
        return disagrees(
            f"slope {slope:.3f} +- {stderr:.2g} over {span}: a power law, where this "
            "family should decay faster than any power"
        )
    if abs(slope - expected) > slope_tol:
        if _drifting_toward(local_slopes(tf[regime], err[regime]), expected):
            # Pre-asymptotic: the slopes still approach the law; more tf will tell.
            return not_reached(
                f"local slopes still drift toward {expected:.3g} over {span} (fit there: "
                f"{slope:.3f}); add tf above {_fmt_tf(tf[regime[-1]])} ns"
            )
        return disagrees(
            f"slope {slope:.3f} +- {stderr:.2g} over {span}; expected {expected:.3g} "
            f"+- {slope_tol} ({law.formula})"
        )
    coeff = _extrapolated_coefficient(tf[regime], err[regime], law.order)
    pred = float(coefficient_predicted)
    base = (
        f"slope {slope:.3f} +- {stderr:.2g} over {span}; expected {expected:.3g} +- "
        f"{slope_tol} ({law.formula}){scale_note}"
    )
    if math.isfinite(pred) and pred > 0:
        ratio = coeff / pred
        parted = coeff / coefficient_parted if coefficient_parted > 0 else math.nan
        if not abs(ratio - 1.0) <= COEFFICIENT_RTOL and abs(parted - 1.0) <= COEFFICIENT_RTOL:
            return not_reached(
                f"the slope matches over {span} ({slope:.3f}) and the fitted coefficient is "
                f"{parted:.3g} x the one of the generator just before the end, where levels "
                f"that coincide at s = 1 have parted ({coefficient_parted:.4g}); L(1)'s "
                f"coefficient ({pred:.4g}), the asymptotic one, needs longer anneals: "
                f"{_suggest_tf(max(float(tf[regime[-1]]), tf_law_min))}"
            )
        if not abs(ratio - 1.0) <= COEFFICIENT_RTOL:
            return not_reached(
                f"the slope matches over {span} ({slope:.3f}), but the fitted coefficient "
                f"is {ratio:.3g} x the predicted one (tolerance {COEFFICIENT_RTOL:.0%}): the "
                f"points lie on a transient, not on the law; "
                f"{_suggest_tf(max(float(tf[regime[-1]]), tf_law_min))}"
            )
        message = f"{base}; coefficient {ratio:.4f} x predicted (within {COEFFICIENT_RTOL:.0%})"
    else:
        message = f"{base}; coefficient not checked (no prediction)"
    return ScalingFit(
        regime=tuple(regime),
        slope=slope,
        slope_stderr=stderr,
        intercept=intercept,
        coefficient_fit=coeff,
        verdict=AGREES,
        message=message,
        **common,
    )


def fit_points(
    rows: Iterable[Mapping[str, Any]],
    *,
    atol: float,
    metric: str = "trace_distance",
    floor_factor: float = DEFAULT_FLOOR_FACTOR,
    slope_tol: float = DEFAULT_SLOPE_TOL,
    regime_tol: float = DEFAULT_REGIME_TOL,
    predicted: Mapping[tuple[str, float, float], float] | None = None,
    dynamics: str = OPEN,
    time_scale_ns: float = math.nan,
    predicted_parted: Mapping[tuple[str, float, float], float] | None = None,
) -> list[ScalingFit]:
    """Fit every schedule of a sweep.

    Parameters
    ----------
    rows : iterable of mapping
        Points, e.g. from :func:`schedforge.store.read_points_csv`: keys ``family``, ``variant``
        (default ``"ideal"``), ``k_start``, ``k_end``, ``tf_ns``, ``status`` and
        the metric column.
    atol : float
        Integrator absolute tolerance; the floor is ``floor_factor * atol``.
    metric : str
        Error column to analyse.
    predicted : mapping, optional
        Predicted coefficient by ``(family, k_start, k_end)``; carried into the
        ``ideal`` fits of a metric it predicts (``Metric.predicted``: the trace
        distance) only (a realized waveform is not flat as designed).
    dynamics, time_scale_ns
        The law and the time scale (see :func:`fit_scaling`).
    predicted_parted : mapping, optional
        ``Prediction.coefficient_parted`` by the same key, carried like ``predicted``
        (see ``coefficient_parted`` of :func:`fit_scaling`).

    Returns
    -------
    list of ScalingFit
        One per (family, variant, k_start, k_end), sorted by that key.
    """
    groups: dict[tuple[str, str, float, float], list[Mapping[str, Any]]] = {}
    for r in rows:
        key = (
            str(r["family"]),
            str(r.get("variant") or "ideal"),
            float(r["k_start"]),
            float(r["k_end"]),
        )
        groups.setdefault(key, []).append(r)
    floor = numerical_floor(atol, floor_factor)
    fits = []
    for key in sorted(groups):
        family, variant, k_start, k_end = key
        pts = groups[key]
        pred = parted = math.nan
        if predicted is not None and variant == "ideal" and METRICS[metric].predicted:
            pred = float(predicted.get((family, k_start, k_end), math.nan))
            parted = float((predicted_parted or {}).get((family, k_start, k_end), math.nan))
        fits.append(
            fit_scaling(
                [float(p["tf_ns"]) for p in pts],
                [float(p[metric]) for p in pts],
                k_end=k_end,
                status=[str(p.get("status", "ok")) for p in pts],
                family=family,
                variant=variant,
                k_start=k_start,
                metric=metric,
                floor=floor,
                slope_tol=slope_tol,
                regime_tol=regime_tol,
                coefficient_predicted=pred,
                dynamics=dynamics,
                time_scale_ns=time_scale_ns,
                coefficient_parted=parted,
            )
        )
    return fits


def _csv_value(v: Any) -> str:
    if isinstance(v, float):
        return "" if math.isnan(v) else repr(v)
    return str(v)


def write_fit_csv(path: str | Path, fits: Sequence[ScalingFit]) -> Path:
    """Write ``fit.csv`` atomically (columns :data:`FIT_COLUMNS`; nan written empty)."""
    p = Path(path)
    with atomic_write(p, "w") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(FIT_COLUMNS)
        for f in fits:
            row = f.row()
            w.writerow([_csv_value(row[c]) for c in FIT_COLUMNS])
    return p


def _num(v: float, fmt: str) -> str:
    return "-" if (isinstance(v, float) and math.isnan(v)) else format(v, fmt)


def _k(fit: ScalingFit, k: float, *, end: bool = True) -> str:
    """A flatness order for a table: "-" where the family has no such k."""
    traits = FAMILIES.get(fit.family, Schedule)
    shown = traits.k_end_varies if end else traits.has_k
    return f"{k:g}" if shown else "-"


def format_fit_table(fits: Sequence[ScalingFit]) -> str:
    """A plain-text summary table: one line per schedule, honest about missing numbers.

    No slope is printed for a regime that was not reached, and no fitted
    coefficient for a fit that does not agree with the expected law.
    """
    head = (
        f"{'family':<8} {'variant':<8} {'k_start':>7} {'k_end':>5} {'slope':>14} {'expected':>8} "
        f"{'regime tf (ns)':>17} {'C fit':>10} {'C predicted':>11}  verdict"
    )
    lines = [head, "-" * len(head)]
    formulas = sorted({f.law.formula for f in fits if f.law is not None})
    if formulas:
        lines.insert(0, "error law used: " + "; ".join(formulas))
    for f in fits:
        slope = (
            "-"
            if math.isnan(f.slope)
            else f"{f.slope:.3f}"
            + ("" if math.isnan(f.slope_stderr) else f"+-{f.slope_stderr:.3f}")
        )
        regime = "-" if not f.regime else f"{f.regime_tf_min_ns:.3g}..{f.regime_tf_max_ns:.3g}"
        lines.append(
            f"{f.family:<8} {f.variant:<8} {_k(f, f.k_start, end=False):>7} "
            f"{_k(f, f.k_end):>5} {slope:>14} "
            f"{_num(f.expected_slope, '.3g'):>8} {regime:>17} "
            f"{_num(f.coefficient_fit, '.4g'):>10} {_num(f.coefficient_predicted, '.4g'):>11}"
            f"  {f.verdict}"
        )
    return "\n".join(lines)
