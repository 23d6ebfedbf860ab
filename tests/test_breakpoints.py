"""Tests of the adaptive breakpoint design (schedforge.breakpoints).

Reference: the error of linear interpolation on an interval of width h is at most
h^2 max|f''| / 8 and, for constant f'', exactly h^2 |f''| / 8 at the midpoint
(textbook, e.g. Burden & Faires, Numerical Analysis, ch. 3).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from schedforge.breakpoints import design_breakpoints, uniform_points_needed
from schedforge.errors import InputError
from schedforge.schedules import BetaSchedule


def _deviation(schedule, x_pts, s_pts, n=1_000_003):
    x = np.linspace(0.0, 1.0, n)
    return float(np.max(np.abs(np.interp(x, x_pts, s_pts) - schedule(x))))


@pytest.mark.parametrize(("k_start", "k_end"), [(0, 3), (2, 3), (1, 5)])
def test_adaptive_breakpoints_meet_the_tolerance_with_fewer_points(k_start, k_end) -> None:
    design = BetaSchedule(k_start, k_end)
    tol, tf = 1e-4, 800.0
    bp = design_breakpoints(design, tf, tol)
    assert bp.t_ns[0] == 0.0 and bp.t_ns[-1] == tf
    # independent check on a grid of a million points (not the design's grids)
    dev = _deviation(design, bp.t_ns / tf, bp.s)
    assert dev <= tol
    assert bp.max_deviation <= tol
    assert dev == pytest.approx(bp.max_deviation, rel=1e-3)
    n_uniform = uniform_points_needed(design, tol)
    assert len(bp) < n_uniform
    # uniform_points_needed is itself right: n works, n - 1 does not (independent grid)
    x = np.linspace(0, 1, n_uniform)
    assert _deviation(design, x, design(x)) <= tol
    x = np.linspace(0, 1, n_uniform - 1)
    assert _deviation(design, x, design(x)) > tol


def test_constant_curvature_needs_the_textbook_number_of_points() -> None:
    # f = 1 - (1 - x)^2 has |f''| = 2: error h^2 / 4 per interval, so uniform spacing
    # needs n - 1 >= 1 / (2 sqrt(tol)) intervals: 51 points for tol = 1e-4.
    design = BetaSchedule(0, 1)
    tol = 1e-4
    assert uniform_points_needed(design, tol) == 51
    # for constant curvature no placement beats equal intervals; the greedy design on
    # its candidate grid loses at most one point
    n = len(design_breakpoints(design, 100.0, tol))
    assert 51 <= n <= 52


def test_breakpoints_are_denser_where_the_schedule_bends() -> None:
    # Each segment's length h obeys the interpolation error law: the greedy reach stops
    # where h^2 |f''| / 8 reaches the tolerance, so sqrt(8 tol / max|f''|) <= h (up to the
    # candidate grid) and h <= sqrt(8 tol / min|f''|) on the segment.
    design = BetaSchedule(2, 4)
    tol = 1e-5
    bp = design_breakpoints(design, 1.0, tol)
    x = bp.t_ns
    for a, b in itertools.pairwise(x[:-1]):  # all but the final segment
        xs = np.linspace(a, b, 201)
        curv = np.abs(design.derivatives(xs, 2)[2])
        h = b - a
        assert h <= math.sqrt(8 * tol / max(curv.min(), 1e-300)) * (1 + 1e-9)
        assert h >= 0.97 * math.sqrt(8 * tol / curv.max()) - 2 / 16384
    # flat ends bend little: the first and last segments are longer than the median
    lengths = np.diff(x)
    assert lengths[0] > np.median(lengths) and lengths[-1] > np.median(lengths)


def test_breakpoints_on_the_sample_grid() -> None:
    bp = design_breakpoints(BetaSchedule(0, 2), 100.0, 1e-3, time_step_ns=0.5)
    np.testing.assert_allclose(bp.t_ns * 2, np.round(bp.t_ns * 2), atol=1e-9)
    assert bp.max_deviation <= 1e-3


def test_budget_too_small_names_the_field_and_the_need() -> None:
    design = BetaSchedule(0, 3)
    need = len(design_breakpoints(design, 10.0, 1e-4))
    with pytest.raises(InputError) as info:
        design_breakpoints(design, 10.0, 1e-4, max_points=need - 1)
    assert info.value.field == "waveform.breakpoints"
    assert f"needs {need} points" in str(info.value)
    assert len(design_breakpoints(design, 10.0, 1e-4, max_points=need)) == need


@pytest.mark.parametrize("tol", [0.0, -1e-3, float("nan")])
def test_bad_tolerance_names_the_field(tol: float) -> None:
    with pytest.raises(InputError) as info:
        design_breakpoints(BetaSchedule(0, 2), 10.0, tol)
    assert info.value.field == "waveform.breakpoint_tolerance"


def test_tolerance_beyond_the_sample_grid_is_refused() -> None:
    # f = 1 - (1 - x)^3 sampled every 1/1.7 ns over 7.3 ns: the polyline through every
    # sample already deviates by more than 1e-3, so no choice of samples can do better.
    with pytest.raises(InputError) as info:
        design_breakpoints(BetaSchedule(0, 2), 7.3, 1e-3, time_step_ns=1 / 1.7)
    assert info.value.field == "waveform.breakpoint_tolerance"
    assert "every sample" in info.value.rule
