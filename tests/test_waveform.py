"""Tests of the realized waveform (schedforge.waveform).

References are named beside each check: textbook results (RC step response,
-3 dB bandwidth definition, uniform quantizer bound), SymPy and SciPy as
independent reference implementations, and hand-derived finite differences.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import sympy as sp
from scipy import integrate, special

from schedforge.device import LinearCurves
from schedforge.errors import InputError
from schedforge.schedules import BetaSchedule, LinearSchedule
from schedforge.spec_model import WaveformSpec
from schedforge.waveform import (
    gaussian_sigma_ns,
    played_samples,
    quantize,
    realize,
    single_pole_tau_ns,
)


# -- quantization -----------------------------------------------------------------
@pytest.mark.parametrize("bits", [4, 8, 12])
def test_played_values_lie_on_the_dac_grid_within_half_a_step(bits: int) -> None:
    # Uniform rounding quantizer: error at most half a step (common practice, no source).
    design = BetaSchedule(1, 3)
    tf = 200.0
    r = realize(design, tf, WaveformSpec(sample_rate_gsps=2.0, dac_bits=bits))
    steps = 2**bits - 1
    codes = r.s * steps
    np.testing.assert_allclose(codes, np.round(codes), atol=1e-9)
    err = np.abs(r.s - design(r.t_ns / tf))
    half = 0.5 / steps
    assert err.max() <= half * (1 + 1e-12)
    assert err.max() > 0.8 * half  # rounding really happened (401 samples spread over levels)
    assert r.s[0] == 0.0 and r.s[-1] == 1.0


def test_quantize_rounds_to_nearest_level() -> None:
    # 3 bits: levels j / 7; 0.5 lies between 3/7 = 0.4286 and 4/7 = 0.5714, nearer 4/7.
    np.testing.assert_array_equal(
        quantize([0.0, 0.5, 0.07, 0.072, 1.2], 3), [0, 4 / 7, 0, 1 / 7, 1]
    )


# -- filters ----------------------------------------------------------------------
def _unit_step_at_half(filter_name: str, bandwidth_mhz: float, tf: float):
    """A linear design quantized to 1 bit: one unit step at t = tf / 2, then filtered."""
    spec = WaveformSpec(dac_bits=1, bandwidth_mhz=bandwidth_mhz, filter=filter_name)
    return realize(LinearSchedule(), tf, spec).schedule


def test_single_pole_step_response_is_the_rc_exponential() -> None:
    # Textbook RC low-pass: step response 1 - exp(-t / tau), tau = 1 / (2 pi f_3dB).
    tf, bw = 200.0, 100.0
    sched = _unit_step_at_half("single-pole", bw, tf)
    tau = 1.0 / (2 * math.pi * bw * 1e-3)
    assert single_pole_tau_ns(bw) == pytest.approx(tau, rel=1e-15)
    t = np.linspace(0.0, tf, 2001)
    d = sched.derivatives_t(t, 2)
    u = np.clip(t - tf / 2, 0.0, None)
    expect = np.where(t >= tf / 2, 1.0 - np.exp(-u / tau), 0.0)
    np.testing.assert_allclose(d[0], expect, rtol=0, atol=1e-14)
    np.testing.assert_allclose(d[1], np.where(t >= tf / 2, np.exp(-u / tau) / tau, 0.0), atol=1e-13)
    np.testing.assert_allclose(
        d[2], np.where(t >= tf / 2, -np.exp(-u / tau) / tau**2, 0.0), atol=1e-13
    )
    assert sched.knots == (0.5,)


@pytest.mark.parametrize("filter_name", ["gaussian", "single-pole"])
def test_filter_gain_at_the_bandwidth_is_minus_3_db(filter_name: str) -> None:
    # Definition of the -3 dB bandwidth: |H(B)| = 1/sqrt(2) (common practice, no source).
    # H(f) is computed independently as the Fourier integral of the impulse response
    # (the derivative of the realized step response) with scipy.integrate.quad.
    tf, bw = 400.0, 50.0
    sched = _unit_step_at_half(filter_name, bw, tf)
    f_ghz = bw * 1e-3
    t0 = tf / 2

    def h(t: float) -> float:
        return float(sched.derivatives_t(np.array([t]), 1)[1, 0])

    lo, hi = (t0 - 60.0, t0 + 60.0) if filter_name == "gaussian" else (t0, tf)
    w = 2 * math.pi * f_ghz
    re = integrate.quad(lambda t: h(t) * math.cos(w * (t - t0)), lo, hi, limit=400)[0]
    im = integrate.quad(lambda t: h(t) * math.sin(w * (t - t0)), lo, hi, limit=400)[0]
    assert math.hypot(re, im) == pytest.approx(1 / math.sqrt(2), abs=1e-6)
    dc = integrate.quad(h, lo, hi, limit=400)[0]
    assert dc == pytest.approx(1.0, abs=1e-9)


def test_gaussian_derivatives_match_sympy() -> None:
    # Reference: SymPy differentiates s0 + sum_j a_j (1 + erf((t - t_j)/(sigma sqrt 2)))/2.
    tf, rate, bw = 100.0, 0.05, 60.0
    r = realize(BetaSchedule(0, 2), tf, WaveformSpec(sample_rate_gsps=rate, bandwidth_mhz=bw))
    sigma = gaussian_sigma_ns(bw)
    t = sp.Symbol("t", real=True)
    steps = np.diff(np.concatenate([[r.s[0]], r.s]))
    expr = sum(
        sp.Float(float(a), 30)
        * (1 + sp.erf((t - sp.Float(float(tj), 30)) / (sp.Float(sigma, 30) * sp.sqrt(2))))
        / 2
        for a, tj in zip(steps, r.t_ns, strict=True)
    ) + sp.Float(float(r.s[0]), 30)
    points = np.array([3.0, 17.5, 40.0, 61.2, 99.0, 100.0])
    got = r.schedule.derivatives_t(points, 4)
    for n in range(5):
        dn = sp.lambdify(t, sp.diff(expr, t, n), "mpmath")
        ref = np.array([float(dn(float(p))) for p in points])
        scale = max(1.0, float(np.max(np.abs(ref))))
        np.testing.assert_allclose(got[n], ref, rtol=0, atol=1e-12 * scale)
    # the schedule's x-derivatives are tf^n times the t-derivatives
    gx = r.schedule.derivatives(points / tf, 2)
    np.testing.assert_allclose(gx[2], got[2] * tf**2, rtol=1e-13, atol=1e-15)
    assert r.schedule.knots == ()


def test_gaussian_filtered_polyline_matches_numerical_convolution() -> None:
    # Reference: y(t) = integral of u(t - v) exp(-v^2 / 2 sigma^2) / (sigma sqrt(2 pi)) dv
    # evaluated with scipy.integrate.quad on the unfiltered polyline u.
    tf, bw = 300.0, 20.0
    spec = WaveformSpec(breakpoints=40, breakpoint_tolerance=2e-3, bandwidth_mhz=bw)
    r = realize(BetaSchedule(1, 2), tf, spec)
    sigma = gaussian_sigma_ns(bw)
    for t0 in (0.0, 37.0, 150.0, 290.0, 300.0):

        def integrand(v: float, t0: float = t0) -> float:
            return float(np.interp(t0 - v, r.t_ns, r.s)) * math.exp(-0.5 * (v / sigma) ** 2)

        kinks = [t0 - tb for tb in r.t_ns if abs(t0 - tb) < 14 * sigma]  # corners of u
        ref = integrate.quad(
            integrand, -14 * sigma, 14 * sigma, points=[0.0, *kinks], limit=500, epsabs=1e-14
        )[0]
        ref /= sigma * math.sqrt(2 * math.pi)
        assert float(r.schedule.derivatives_t(np.array([t0]), 0)[0, 0]) == pytest.approx(
            ref, abs=1e-10
        )


def test_single_pole_filtered_polyline_solves_the_rc_equation() -> None:
    # Reference: the RC low-pass obeys tau y' + y = u (textbook), with y(0) = u(0).
    tf, bw = 500.0, 10.0
    spec = WaveformSpec(
        breakpoints=30, breakpoint_tolerance=3e-3, bandwidth_mhz=bw, filter="single-pole"
    )
    r = realize(BetaSchedule(0, 3), tf, spec)
    tau = single_pole_tau_ns(bw)
    t = np.linspace(0.0, tf, 5001)
    d = r.schedule.derivatives_t(t, 2)
    u = np.interp(t, r.t_ns, r.s)
    np.testing.assert_allclose(tau * d[1] + d[0], u, atol=1e-13)
    # C^1: the second derivative jumps by (slope change) / tau at each breakpoint
    tb = r.t_ns[1:-1]
    right = r.schedule.derivatives_t(tb, 2, side="right")[2]
    left = r.schedule.derivatives_t(tb, 2, side="left")[2]
    slopes = np.diff(r.s) / np.diff(r.t_ns)
    np.testing.assert_allclose(right - left, np.diff(slopes) / tau, atol=1e-15)
    assert r.schedule.continuity == 1


# -- effective flatness -------------------------------------------------------------
def test_effective_flatness_of_coarse_and_dense_sampling() -> None:
    design = BetaSchedule(0, 3)  # f = 1 - (1 - x)^4
    tf = 1000.0
    coarse = realize(design, tf, WaveformSpec(sample_rate_gsps=0.01))
    dense = realize(design, tf, WaveformSpec(sample_rate_gsps=4.0))
    assert coarse.effective_k_end < 3
    assert dense.effective_k_end == 3
    # Hand-derived backward differences of g(j) = -(j h)^4 at the end (binomial sums):
    # grad^1 = h^4, grad^2 = -14 h^4, grad^3 = 36 h^4, so n! f[...] = h^4 (1, -14, 36) / h^n.
    # (dense: the values near 1 carry double rounding, amplified by 1/h^n)
    for r, rate, rtol in ((coarse, 0.01, 1e-9), (dense, 4.0, 2e-2)):
        h = 1.0 / (tf * rate)
        np.testing.assert_allclose(r.end_derivatives_x[1:4], [h**3, -14 * h**2, 36 * h], rtol=rtol)
    assert coarse.effective_k_end == 1  # 14 h^2 = 0.14 > 1e-3 x 12 at h = 0.1


def test_filtered_dense_samples_keep_the_designed_flatness() -> None:
    r = realize(BetaSchedule(0, 3), 2000.0, WaveformSpec(sample_rate_gsps=2.0, bandwidth_mhz=300.0))
    assert r.effective_k_end == 3
    assert r.end_derivative_method.startswith("exact")
    # The design's 4th derivative jumps from -24 to 0 at tf (the hold continues after
    # tf); the hold delays by half a period T/2 and the zero-phase Gaussian averages
    # the jump: about -24 Phi(T / (2 sigma)) (derived here, to first order).
    sigma = gaussian_sigma_ns(300.0)
    expect = -24.0 * float(special.ndtr(0.25 / sigma))
    assert r.end_derivatives_x[4] == pytest.approx(expect, rel=5e-2)


# -- limits and violations --------------------------------------------------------------
def test_slope_violation_interval_and_time() -> None:
    # f = 1 - (1 - x)^4 has ds/dt = 4 (1 - x)^3 / tf, above L until x = 1 - (L tf / 4)^(1/3).
    tf, limit = 100.0, 0.02
    r = realize(BetaSchedule(0, 3), tf, WaveformSpec(max_slope_per_ns=limit))
    (v,) = r.violations
    assert v.kind == "slope"
    assert v.t_ns == pytest.approx(0.0, abs=1e-9)
    assert v.value == pytest.approx(0.04, rel=1e-12)
    t_cross = tf * (1 - (limit * tf / 4) ** (1 / 3))
    assert v.t_end_ns == pytest.approx(t_cross, abs=2 * tf / 20000)
    # a held waveform: the step to the next sample per sample period
    held = realize(LinearSchedule(), tf, WaveformSpec(sample_rate_gsps=0.1, max_slope_per_ns=0.009))
    assert len(held.violations) == 1
    assert held.violations[0].value == pytest.approx(0.01, rel=1e-12)


def test_unfiltered_hold_reports_its_jumps() -> None:
    r = realize(LinearSchedule(), 10.0, WaveformSpec(sample_rate_gsps=1.0))
    assert r.schedule.jumps and r.schedule.continuity == -1
    x, before, after = r.schedule.jump_points()
    np.testing.assert_allclose(x, np.arange(1, 11) / 10)
    np.testing.assert_allclose(after - before, 0.1, rtol=1e-12)
    assert any("jumps" in n for n in r.notes)
    # max deviation of a hold: just before each edge, one sample step
    assert r.max_deviation == pytest.approx(0.1, rel=1e-12)
    assert r.schedule(1.0) == 1.0
    # edges of the played waveform (the integrators' step budget grows with them):
    # tf x sample rate = 10 sample changes; a 3-bit DAC on a ramp crosses 2^3 - 1 half
    # levels; a filter keeps the edges; the design played as it is has none
    assert r.schedule.n_edges == 10
    assert realize(LinearSchedule(), 10.0, WaveformSpec(dac_bits=3)).schedule.n_edges == 7
    filtered = realize(
        LinearSchedule(), 10.0, WaveformSpec(sample_rate_gsps=1.0, bandwidth_mhz=200.0)
    )
    assert filtered.schedule.n_edges == 10
    assert realize(LinearSchedule(), 10.0, WaveformSpec()).schedule.n_edges == 0


def test_tf_off_the_sample_grid_is_said() -> None:
    r = realize(LinearSchedule(), 10.5, WaveformSpec(sample_rate_gsps=1.0))
    assert r.t_ns[-1] == 10.0
    assert any("not a whole number of sample periods" in n for n in r.notes)


def test_breakpoint_mode_keeps_the_tolerance_with_quantization() -> None:
    spec = WaveformSpec(breakpoints=64, breakpoint_tolerance=1e-3, dac_bits=12)
    design = BetaSchedule(2, 3)
    r = realize(design, 50.0, spec)
    x = np.linspace(0, 1, 200_001)
    assert np.max(np.abs(np.interp(x * 50.0, r.t_ns, r.s) - design(x))) <= 1e-3
    assert r.max_deviation <= 1e-3
    assert not r.violations


@pytest.mark.parametrize(
    ("spec", "field"),
    [
        (WaveformSpec(bandwidth_mhz=10.0), "waveform.bandwidth_mhz"),
        (WaveformSpec(sample_rate_gsps=1.0, filter="boxcar"), "waveform.filter"),
        (WaveformSpec(dac_bits=0), "waveform.dac_bits"),
        (WaveformSpec(sample_rate_gsps=-1.0), "waveform.sample_rate_gsps"),
        (
            WaveformSpec(breakpoints=10, breakpoint_tolerance=1e-4, dac_bits=8),
            "waveform.breakpoint_tolerance",
        ),
        (WaveformSpec(breakpoints=3, breakpoint_tolerance=1e-4), "waveform.breakpoints"),
    ],
)
def test_bad_waveform_limits_name_the_field(spec: WaveformSpec, field: str) -> None:
    with pytest.raises(InputError) as info:
        realize(BetaSchedule(0, 2), 100.0, spec)
    assert info.value.field == field
    assert f"`{field}`" in str(info.value)


def test_played_samples_table_for_export() -> None:
    curves = LinearCurves(3.5, 2.5)
    r = realize(BetaSchedule(0, 2), 20.0, WaveformSpec(sample_rate_gsps=0.5, dac_bits=6))
    table = played_samples(r, curves)
    np.testing.assert_array_equal(table.t_ns, np.arange(11) * 2.0)
    np.testing.assert_array_equal(table.s, r.s)
    np.testing.assert_allclose(table.A_ghz, 3.5 * (1 - r.s), rtol=1e-15)
    np.testing.assert_allclose(table.ds_dt_per_ns[:-1], np.diff(r.s) / 2.0, rtol=1e-15)
    assert table.ds_dt_per_ns[-1] == 0.0
    assert "held samples" in table.metadata["export"]
    # the converter codes j of s = j / (2^6 - 1) (uniform quantizer: common practice, no source)
    np.testing.assert_array_equal(table.dac_code / 63.0, r.s)
    assert table.dac_code.dtype.kind == "i" and table.dac_code.max() == 63


def test_plot_waveform_draws_design_and_played() -> None:
    from schedforge.plotting.waveform import plot_waveform

    r = realize(BetaSchedule(0, 2), 100.0, WaveformSpec(sample_rate_gsps=0.5, dac_bits=8))
    fig = plot_waveform(r)
    top, bottom = fig.axes
    design_line, played_line = top.get_lines()[:2]
    t = played_line.get_xdata()
    np.testing.assert_allclose(1 - played_line.get_ydata(), r.schedule.derivatives_t(t, 0)[0])
    np.testing.assert_allclose(1 - design_line.get_ydata(), BetaSchedule(0, 2)(t / 100.0))
    # a hold's worst deviation is a left limit, which a sampled curve approaches from below
    shown = np.max(np.abs(bottom.get_lines()[0].get_ydata()))
    assert 0.9 * r.max_deviation <= shown <= r.max_deviation


# -- consequence for the dynamics ---------------------------------------------------------
def test_realized_polyline_departs_from_the_ideal_error_law() -> None:
    # Ideal law: a schedule with k vanishing end derivatives leaves an error ~ tf^-(k+1)
    # under a Davies generator with a unique steady state (Venuti, Albash, Lidar &
    # Zanardi, Phys. Rev. A 93, 032118, 2016; from memory).  A naive polyline's last
    # segment has a nonzero slope (effective order 0), so its error falls only as tf^-1:
    # the floor that imperfect end flatness introduces.  The default design ends on a
    # level segment: exactly flat, its error falls below the ideal one.  One qubit of the
    # invented driven-qubit scenario with a stronger bath (eta = 1e-2) so that tf of
    # 300-3000 ns is asymptotic.
    from dataclasses import replace

    from schedforge.dynamics import simulate
    from schedforge.spec import load_spec
    from schedforge.system import System

    spec = load_spec("builtin:driven-qubit")
    system = System.from_spec(replace(spec, bath=replace(spec.bath, eta=1e-2)))
    design = BetaSchedule(0, 2)
    limits = WaveformSpec(breakpoints=100, breakpoint_tolerance=1e-3, bandwidth_mhz=50.0)
    tfs = np.array([300.0, 1000.0, 3000.0])

    def error(schedule, tf: float) -> float:
        res = simulate(system, schedule, tf, integrator="eigenframe")
        assert res.status == "ok", res.message
        return res.trace_distance

    ideal, naive = [], []
    for tf in tfs:
        realized = realize(design, float(tf), limits, flat_rtol=1e-6, level_end=False)
        assert realized.effective_k_end == 0  # (at the default 1e-3 the small slope passes)
        ideal.append(error(design, float(tf)))
        naive.append(error(realized.schedule, float(tf)))
    slope_ideal = np.diff(np.log(ideal)) / np.diff(np.log(tfs))
    slope_naive = np.diff(np.log(naive)) / np.diff(np.log(tfs))
    np.testing.assert_allclose(slope_ideal, -3.0, atol=0.05)
    np.testing.assert_allclose(slope_naive, -1.0, atol=0.15)
    assert naive[-1] > 100 * ideal[-1]
    level = realize(design, 3000.0, limits)
    assert level.s[-2] == level.s[-1] == 1.0
    assert error(level.schedule, 3000.0) < ideal[-1]


# -- export through `schedforge design` -------------------------------------------------------
_SPEC = """version = 1
[problem]
qubits = 1
h = [0.7]
[schedule]
family = "beta"
k_end = 2
tf_ns = 100.0
[waveform]
sample_rate_gsps = 0.5
dac_bits = 8
"""


def test_design_exports_played_samples_on_the_dac_grid(tmp_path, capsys) -> None:
    # Uniform rounding quantizer: exported values on the 2^bits grid, error at most half a
    # step from the design (common practice, no source).
    from schedforge.cli import main
    from schedforge.samples import read_samples_csv

    spec = tmp_path / "w.toml"
    spec.write_text(_SPEC, encoding="utf-8")
    out = tmp_path / "played.csv"
    assert main(["design", str(spec), "--out", str(out)]) == 0
    table = read_samples_csv(out)
    np.testing.assert_array_equal(table.t_ns, np.arange(51) * 2.0)
    codes = table.s * 255
    np.testing.assert_allclose(codes, np.round(codes), atol=1e-9)
    err = np.abs(table.s - BetaSchedule(0, 2)(table.t_ns / 100.0))
    assert 0.4 / 255 < err.max() <= 0.5 / 255 * (1 + 1e-12)
    assert "held samples" in table.metadata["export"]
    assert "caution" in capsys.readouterr().err

    # with breakpoints the file holds the breakpoints, within the tolerance of the design
    spec.write_text(_SPEC + "breakpoints = 40\nbreakpoint_tolerance = 5e-3\n", encoding="utf-8")
    assert main(["design", str(spec), "--out", str(out)]) == 0
    table = read_samples_csv(out)
    assert "breakpoints" in table.metadata["export"] and len(table) <= 40
    x = np.linspace(0, 1, 100_001)
    poly = np.interp(x * 100.0, table.t_ns, table.s)
    assert np.max(np.abs(poly - BetaSchedule(0, 2)(x))) <= 5e-3

    # a budget that cannot meet the tolerance: exit 2, the field named, no file
    spec.write_text(_SPEC + "breakpoints = 3\nbreakpoint_tolerance = 5e-3\n", encoding="utf-8")
    out2 = tmp_path / "none.csv"
    assert main(["design", str(spec), "--out", str(out2)]) == 2
    assert "waveform.breakpoints" in capsys.readouterr().err
    assert not out2.exists()


def test_polyline_derivatives_at_knots_are_left_limits() -> None:
    # At a kink the schedule gives the slope of the piece that ends there (integrators
    # step onto knots); at x = 0 the first piece.
    tf = 3.0
    r = realize(BetaSchedule(0, 2), tf, WaveformSpec(breakpoints=50, breakpoint_tolerance=1e-3))
    slopes = np.diff(r.s) / np.diff(r.t_ns)
    x = np.asarray(r.schedule.knots)
    d = r.schedule.derivatives(x, 1)
    np.testing.assert_allclose(d[1] / tf, slopes[:-1], rtol=1e-12)
    assert float(r.schedule.derivatives(np.array([0.0]), 1)[1, 0]) == pytest.approx(
        slopes[0] * tf, rel=1e-12
    )
    assert float(r.schedule.derivatives(np.array([1.0]), 1)[1, 0]) == 0.0  # level end
