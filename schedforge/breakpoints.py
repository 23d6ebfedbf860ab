"""Piecewise-linear approximation of a schedule through adaptively chosen breakpoints.

Some waveform generators play a list of (time, value) breakpoints joined by
straight lines instead of dense samples.  :func:`design_breakpoints` chooses
the breakpoint times for a designed schedule so that the piecewise-linear
waveform stays within a tolerance of the design with as few points as it can:

* the breakpoints lie on the schedule (vertex values ``s_j = f(x_j)``), except
  the level end below;
* the waveform ends on a level segment: from the first candidate after which
  the schedule stays within the tolerance of its final value, the played
  value is that final value (``flat_end=True``), so the end is exactly flat
  rather than a chord of nonzero slope (which would set a tf^-1 error law);
* starting at x = 0, each next breakpoint is the farthest candidate whose
  chord stays within the tolerance of f over the whole segment ("greedy
  farthest reach": points fall densely where the schedule bends and sparsely
  where it is straight, so near a flat end they follow the curvature of the
  final approach);
* candidates are a fine uniform grid in x (or the device's sample grid when
  a time step is given), and the deviation is checked on a grid 8 times finer;
* the result is then verified on an independent uniform grid of
  :data:`VERIFY_POINTS` points; if the verified deviation exceeds the
  tolerance (an excursion between check points), the design is repeated
  with a tighter internal tolerance.

The greedy farthest reach gives the fewest vertices-on-the-curve points
whenever "a segment that meets the tolerance keeps meeting it when it is
shortened" (true for convex or concave pieces); in general it is close to the
fewest.  :func:`uniform_points_needed` gives the number of evenly spaced
points that the same tolerance needs, for comparison.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from .errors import InputError
from .schedules import Schedule

__all__ = [
    "CANDIDATE_POINTS",
    "VERIFY_POINTS",
    "BreakpointDesign",
    "design_breakpoints",
    "piecewise_linear_deviation",
    "uniform_points_needed",
]

#: Candidate breakpoint positions on [0, 1] when no time step is imposed.
CANDIDATE_POINTS = 16_385
#: Points of the independent uniform grid on which a design is verified.
VERIFY_POINTS = 262_145
_REFINE = 8  # check points per candidate interval


@dataclass(frozen=True)
class BreakpointDesign:
    """Breakpoints of a piecewise-linear waveform and their verified accuracy.

    Attributes
    ----------
    t_ns : ndarray
        Breakpoint times in ns, from 0 to tf.
    s : ndarray
        Values at the breakpoints (on the schedule).
    max_deviation : float
        Largest ``|PL(t) - f(t / tf)|`` on the verification grid.
    t_max_deviation_ns : float
        Where that deviation occurs.
    tolerance : float
        The tolerance that was asked for.
    verify_points : int
        Size of the uniform verification grid (plus the check grid).
    """

    t_ns: NDArray[np.float64]
    s: NDArray[np.float64]
    max_deviation: float
    t_max_deviation_ns: float
    tolerance: float
    verify_points: int

    def __len__(self) -> int:
        return int(self.t_ns.size)


def piecewise_linear_deviation(
    schedule: Schedule, x_points: NDArray[np.float64], s_points: NDArray[np.float64], n: int
) -> tuple[float, float]:
    """Largest deviation of a piecewise-linear curve from a schedule on a grid.

    Parameters
    ----------
    schedule : Schedule
        The design f(x).
    x_points, s_points : ndarray
        Vertices of the piecewise-linear curve (x increasing, from 0 to 1).
    n : int
        Size of the uniform grid on [0, 1]; the vertices are added to it.

    Returns
    -------
    (float, float)
        The maximum of ``|PL(x) - f(x)|`` and the x where it occurs.
    """
    x = np.union1d(np.linspace(0.0, 1.0, n), x_points)
    dev = np.abs(np.interp(x, x_points, s_points) - schedule(x))
    i = int(np.argmax(dev))
    return float(dev[i]), float(x[i])


def _check_tolerance(tolerance: float) -> float:
    if not (isinstance(tolerance, int | float) and math.isfinite(tolerance) and tolerance > 0):
        raise InputError(
            "waveform.breakpoint_tolerance", f"must be a finite number > 0, got {tolerance!r}"
        )
    return float(tolerance)


def _candidates(tf_ns: float, time_step_ns: float | None) -> NDArray[np.float64]:
    """Candidate breakpoint positions in x, including 0 and 1."""
    if time_step_ns is None:
        return np.linspace(0.0, 1.0, CANDIDATE_POINTS)
    n = math.floor(tf_ns / time_step_ns * (1.0 + 1e-12))
    x = np.arange(n + 1, dtype=float) * time_step_ns / tf_ns
    x = x[x < 1.0 - 1e-12]
    return np.append(x, 1.0)


def _greedy(
    x_check: NDArray[np.float64],
    f_check: NDArray[np.float64],
    refine: int,
    tol: float,
    end_value: float | None = None,
) -> list[int]:
    """Greedy farthest reach over candidate indices (check index = candidate * refine).

    ``end_value`` replaces the schedule's value at the last candidate (a flat end).
    """
    n_cand = (x_check.size - 1) // refine + 1

    def feasible(i: int, j: int) -> bool:
        a, b = i * refine, j * refine
        xs, fs = x_check[a : b + 1], f_check[a : b + 1]
        last = fs[-1] if end_value is None or j < n_cand - 1 else end_value
        chord = fs[0] + (last - fs[0]) * (xs - xs[0]) / (xs[-1] - xs[0])
        return bool(np.max(np.abs(chord - fs)) <= tol)

    chosen = [0]
    i = 0
    while i < n_cand - 1:
        if feasible(i, n_cand - 1):
            chosen.append(n_cand - 1)
            break
        # gallop to bracket the reach, then bisect: lo feasible, hi not
        lo, step = i + 1, 1
        hi = min(i + 1 + step, n_cand - 1)
        while feasible(i, hi):
            lo = hi
            step *= 2
            hi = min(i + 1 + step, n_cand - 1)
        while hi - lo > 1:
            mid = (lo + hi) // 2
            if feasible(i, mid):
                lo = mid
            else:
                hi = mid
        chosen.append(lo)
        i = lo
    return chosen


def _design(
    x_cand: NDArray[np.float64],
    x_check: NDArray[np.float64],
    f_check: NDArray[np.float64],
    tol: float,
    flat_end: bool,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Breakpoints (x, s) by greedy reach, optionally ending on a level final segment."""
    n_cand = x_cand.size
    f_end = float(f_check[-1])
    flat = n_cand - 1
    if flat_end:
        # first candidate from which the schedule stays within tol of its end value
        within = np.abs(f_check - f_end) <= tol
        tail = np.logical_and.accumulate(within[::-1])[::-1]
        first = int(np.argmax(tail))  # tail[-1] is True
        flat = min(-(-first // _REFINE), n_cand - 1)
    if flat < n_cand - 1:
        sub = slice(0, flat * _REFINE + 1)
        idx = _greedy(x_check[sub], f_check[sub], _REFINE, tol, end_value=f_end)
        xb = np.append(x_cand[idx], 1.0)
        sb = np.append(f_check[np.asarray(idx) * _REFINE], f_end)
        sb[-2] = f_end
        return xb, sb
    idx = _greedy(x_check, f_check, _REFINE, tol)
    return x_cand[idx], f_check[np.asarray(idx) * _REFINE]


def _check_grid(
    schedule: Schedule, x_cand: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Candidates refined ``_REFINE`` times, with the schedule evaluated there."""
    frac = np.arange(_REFINE) / _REFINE
    inner = (x_cand[:-1, None] + np.diff(x_cand)[:, None] * frac[None, :]).ravel()
    x_check = np.append(inner, 1.0)
    return x_check, schedule(x_check)


def design_breakpoints(
    schedule: Schedule,
    tf_ns: float,
    tolerance: float,
    max_points: int | None = None,
    *,
    time_step_ns: float | None = None,
    flat_end: bool = True,
) -> BreakpointDesign:
    """Choose breakpoints so that the piecewise-linear waveform meets a tolerance.

    Parameters
    ----------
    schedule : Schedule
        The designed s = f(t / tf).
    tf_ns : float
        Anneal time in ns (sets the time axis only; the design is made in x).
    tolerance : float
        Largest allowed ``|PL(t) - s(t)|`` (in units of s).
    max_points : int, optional
        Breakpoint budget (``waveform.breakpoints``); ``None`` means no limit.
    time_step_ns : float, optional
        Breakpoint times must be multiples of this step (the device's sample
        period); tf is always a breakpoint.
    flat_end : bool
        End on a level segment at the final value, from the first candidate
        after which the schedule stays within the tolerance of it (default).
        The played end is then exactly flat (its slope and every derivative
        vanish at tf) instead of ending on a chord of nonzero slope.

    Returns
    -------
    BreakpointDesign
        The breakpoints and the deviation verified on a fine uniform grid.

    Raises
    ------
    InputError
        ``waveform.breakpoint_tolerance`` if it is not a positive number;
        ``waveform.breakpoints`` if the budget is smaller than 2 or cannot
        meet the tolerance (the message gives the number of points needed).
    """
    tol = _check_tolerance(tolerance)
    if max_points is not None and (
        isinstance(max_points, bool) or not isinstance(max_points, int) or max_points < 2
    ):
        raise InputError("waveform.breakpoints", f"must be an integer >= 2, got {max_points!r}")
    x_cand = _candidates(float(tf_ns), time_step_ns)
    x_check, f_check = _check_grid(schedule, x_cand)
    finest = float(np.max(np.abs(np.interp(x_check, x_cand, f_check[::_REFINE]) - f_check)))
    if finest > tol:
        where = "every sample of the device's grid" if time_step_ns else "every candidate"
        raise InputError(
            "waveform.breakpoint_tolerance",
            f"= {tol:.3g} cannot be met: even a breakpoint at {where} deviates by {finest:.3g}",
        )
    inner_tol = tol
    for _attempt in range(4):
        xb, sb = _design(x_cand, x_check, f_check, inner_tol, flat_end)
        dev, x_dev = piecewise_linear_deviation(schedule, xb, sb, VERIFY_POINTS)
        if dev <= tol:
            break
        inner_tol *= 0.8 * tol / dev
    else:  # pragma: no cover - would need a pathological schedule
        raise InputError(
            "waveform.breakpoint_tolerance",
            f"= {tol:.3g} could not be met: the best design deviates by {dev:.3g}",
        )
    if max_points is not None and xb.size > max_points:
        raise InputError(
            "waveform.breakpoints",
            f"= {max_points} cannot meet breakpoint_tolerance = {tol:.3g}: the adaptive "
            f"design needs {xb.size} points; raise the budget or the tolerance",
        )
    return BreakpointDesign(
        t_ns=xb * tf_ns,
        s=sb,
        max_deviation=dev,
        t_max_deviation_ns=x_dev * tf_ns,
        tolerance=tol,
        verify_points=VERIFY_POINTS,
    )


def uniform_points_needed(schedule: Schedule, tolerance: float, limit: int = 1 << 20) -> int:
    """Fewest evenly spaced points (on the schedule) whose polyline meets a tolerance.

    Parameters
    ----------
    schedule : Schedule
        The design f(x).
    tolerance : float
        Largest allowed deviation.
    limit : int
        Give up above this many points (returns ``limit + 1``).

    Returns
    -------
    int
        The smallest n >= 2 such that the polyline through ``f(linspace(0, 1, n))``
        deviates by at most ``tolerance`` on a grid of 16 points per interval.
    """
    tol = _check_tolerance(tolerance)

    def ok(n: int) -> bool:
        x = np.linspace(0.0, 1.0, n)
        dev, _ = piecewise_linear_deviation(schedule, x, schedule(x), max(16 * n, 4097))
        return dev <= tol

    hi = 2
    while not ok(hi):
        if hi > limit:
            return limit + 1
        hi *= 2
    lo = hi // 2
    if lo < 2:
        return hi
    while hi - lo > 1:  # ok(hi), not ok(lo) (approximately monotone in n)
        mid = (lo + hi) // 2
        if ok(mid):
            hi = mid
        else:
            lo = mid
    return hi
