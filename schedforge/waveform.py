"""What the hardware plays: the realized waveform of a designed schedule.

A designed schedule s(t) = f(t / tf) is an ideal curve.  A waveform generator
plays something else; :func:`realize` models it, reports what survives of the
design, and returns the played waveform as a :class:`RealizedSchedule`, an
ordinary :class:`~schedforge.schedules.Schedule` (so the dynamics never learns
about converters or filters).

The model (every limit that is ``None`` is not applied)
-------------------------------------------------------
1. **Sampling and hold** (``sample_rate_gsps`` = R): the design is sampled at
   t_n = n / R, n = 0 .. N with N = floor(tf R); sample n is held from t_n to
   t_(n+1) (zero-order hold) and the last sample is held for ever.  If tf is
   not a whole number of periods the last sample falls before tf and the
   report says so.
2. **Quantization** (``dac_bits`` = b): values are rounded to the nearest of
   the 2^b levels j / (2^b - 1), j = 0 .. 2^b - 1, spanning s in [0, 1]
   (error at most half a step).  Without a sample rate the continuous design
   is quantized: the waveform jumps by one step where f crosses a half level.
3. **Breakpoints** (``breakpoints`` = N): instead of dense samples the device
   plays straight lines through at most N breakpoints chosen by
   :func:`schedforge.breakpoints.design_breakpoints` within
   ``breakpoint_tolerance`` (times on the sample grid if a rate is given,
   values quantized if bits are given; the tolerance then leaves room for
   half a step).  The polyline ends on a level segment at the final value,
   so its end is exactly flat.
4. **Filter** (``bandwidth_mhz`` = B, -3 dB bandwidth; needs 1-3 first):

   * ``"gaussian"``: impulse response a Gaussian of standard deviation
     sigma = sqrt(ln 2) / (2 pi B) (|H(f)| = exp(-2 pi^2 sigma^2 f^2) = 1/sqrt 2
     at f = B).  The model is zero-phase: the filter's constant group delay is
     taken as compensated by the lab's timing, so the output already moves a
     little before a step (at t = 0 about 0.4 sigma ds/dt(0)), which the
     reported deviation includes.  A held step becomes an erf
     step, a corner of a line a smoothed corner; the output is infinitely
     smooth and its derivatives are exact (Hermite functions).  Only pieces
     within 12 sigma of t contribute to the difference from the unfiltered
     waveform.
   * ``"single-pole"``: the textbook RC low-pass, tau = 1 / (2 pi B); step
     response 1 - exp(-t / tau).  Causal; the output is continuous (C^1 for
     breakpoints) with a kink at every sample edge, exact between them.  The
     exponential memory is carried by a recursion over the edges, so one
     evaluation costs O(log N).

   A filter with unit DC gain and a positive impulse response never leaves
   [0, 1] and keeps a monotone input monotone.

What :func:`realize` reports (:class:`RealizedWaveform`)
--------------------------------------------------------
* the played samples or breakpoints, values exactly as played;
* the realized end derivatives d^n s / dt^n at t = tf (n = 0 .. k_end + 2, or
  0 .. 8 for a design flat to every order):
  the exact one-sided (left) derivatives, except for an unfiltered hold of
  samples, which has no derivatives: then the backward divided differences
  n! s[t_(N-n), ..., t_N] of the played samples (what any smooth
  reconstruction of the samples has, to first order in the spacing).  A
  quantized hold without sample rate is exactly constant after its last
  jump, a polyline is straight on its last segment: their exact derivatives;
* the effective flatness order: how many consecutive derivatives from order 1
  are below ``flat_rtol`` times the design's scale for that order, where the
  scale is max(1, max_x |f^(n)(x)|) in the dimensionless time x = t / tf
  (default ``flat_rtol`` = 1e-3: our choice, no source);
* the largest deviation from the design and where it occurs (on a uniform
  grid plus the left limits at jumps);
* every limit violation with its time (ds/dt above ``max_slope_per_ns``, grouped
  into contiguous intervals with the peak; values outside [0, 1]; breakpoints
  beyond their tolerance);
* notes: jumps, a final sample before tf, a quantized end plateau.

What to expect from the dynamics
--------------------------------
Imperfections fixed in nanoseconds (a sample period, a filter) shrink in
x = t / tf as tf grows: the realized error keeps the ideal -(k+1) law with a
different coefficient.  Imperfections fixed in x or in s (breakpoints chosen in
x, DAC levels) do not: a naive polyline's last segment has a nonzero slope,
so its error falls only as tf^-1 once that term dominates (which is why the
breakpoint design ends on a level segment), and a quantized waveform
is exactly constant after its last level crossing (in an open system the error
then falls exponentially; a closed system keeps the excitation of the last
jump).  The effective flatness order is a statement at a tolerance: any
nonzero end derivative of order m eventually sets a tf^-m law.

Integrators and knots
---------------------
A Gaussian-filtered waveform has no knots.  A polyline and a single-pole
output are continuous with kinks at their knots (integrators step onto them;
a single-pole output has one per sample, which is slow for long anneals).  An
unfiltered hold jumps at every sample: ``RealizedSchedule.jumps`` is True and
:meth:`RealizedSchedule.jump_points` lists the jumps.  Such a waveform is
piecewise constant, and ``schedforge.integrators.held`` propagates it exactly
from jump to jump (``simulate`` sends every jumping schedule there).

Caution
-------
The waveform is meant for real, delicate hardware.  schedforge does not know a
device's safety limits: check every exported waveform against the device's
documented limits (ranges, slew rates, sample grid, memory) and the lab's own
practice before playing it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

from .breakpoints import BreakpointDesign, design_breakpoints
from .checks import choice, integer, number
from .errors import InputError
from .schedules import Schedule
from .spec_model import WaveformSpec

__all__ = [
    "DEFAULT_FLAT_RTOL",
    "FILTERS",
    "GAUSSIAN_WINDOW_SIGMAS",
    "RealizedSchedule",
    "RealizedWaveform",
    "Violation",
    "check_waveform",
    "gaussian_sigma_ns",
    "played_samples",
    "quantize",
    "realize",
    "sampled_violations",
    "single_pole_tau_ns",
]

#: Filter models known to ``waveform.filter`` (spec validation and the template list these).
FILTERS: tuple[str, ...] = ("gaussian", "single-pole")
#: A realized derivative counts as zero below this fraction of the design's scale.
DEFAULT_FLAT_RTOL = 1e-3
#: Half-width of the Gaussian filter's window, in standard deviations.
GAUSSIAN_WINDOW_SIGMAS = 12.0
_CHUNK = 1 << 20  # elements of a (points x window) block
_MAX_GRID = 1 << 18  # points of the deviation / slope grid
_MAX_SAMPLES = 10_000_000  # largest played sample count modelled
_ORDERS_IF_INFINITE = 8  # end derivatives reported for a design flat to every order
_SQRT_2PI = math.sqrt(2.0 * math.pi)


# ---------------------------------------------------------------------------
# small pure helpers
# ---------------------------------------------------------------------------
def gaussian_sigma_ns(bandwidth_mhz: float) -> float:
    """Standard deviation (ns) of a Gaussian impulse response with a -3 dB bandwidth.

    |H(f)| = exp(-2 pi^2 sigma^2 f^2) equals 1/sqrt(2) at f = B, so
    sigma = sqrt(ln 2) / (2 pi B).
    """
    return math.sqrt(math.log(2.0)) / (2.0 * math.pi * bandwidth_mhz * 1e-3)


def single_pole_tau_ns(bandwidth_mhz: float) -> float:
    """Time constant (ns) of a single-pole (RC) low-pass with a -3 dB bandwidth: 1/(2 pi B)."""
    return 1.0 / (2.0 * math.pi * bandwidth_mhz * 1e-3)


def quantize(s: ArrayLike, bits: int) -> NDArray[np.float64]:
    """Round values in [0, 1] to the nearest of the 2^bits levels j / (2^bits - 1).

    Values outside [0, 1] are clipped first (the converter's range).
    """
    steps = float(2**bits - 1)
    return np.round(np.clip(np.asarray(s, dtype=float), 0.0, 1.0) * steps) / steps


def _hermite_e(m: int, z: NDArray[np.float64]) -> NDArray[np.float64]:
    """Probabilists' Hermite polynomial He_m(z) by recurrence."""
    if m == 0:
        return np.ones_like(z)
    prev, cur = np.ones_like(z), z.copy()
    for j in range(1, m):
        prev, cur = cur, z * cur - j * prev
    return cur


# ---------------------------------------------------------------------------
# the played input before the filter: a sum of steps or of ramps
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class _Pieces:
    """u(t) = s0 + sum_j a_j G(t - tau_j), G a unit step (``ramps=False``) or ramp.

    For steps, ``level[j]`` is u just after edge j; for ramps, (tau, level) are
    the polyline's vertices and ``slope[j]`` its slope after vertex j.
    """

    tau: NDArray[np.float64]
    a: NDArray[np.float64]
    s0: float
    ramps: bool
    level: NDArray[np.float64]
    slope: NDArray[np.float64]

    @classmethod
    def steps(cls, tau: NDArray[np.float64], values: NDArray[np.float64], s0: float) -> _Pieces:
        """A hold that takes ``values[j]`` from ``tau[j]`` on (``s0`` before)."""
        a = np.diff(np.concatenate([[s0], values]))
        return cls(tau, a, float(s0), False, values.copy(), np.zeros_like(values))

    @classmethod
    def polyline(cls, tau: NDArray[np.float64], values: NDArray[np.float64]) -> _Pieces:
        """Straight lines through (tau, values), constant outside."""
        slope = np.append(np.diff(values) / np.diff(tau), 0.0)
        a = np.diff(np.concatenate([[0.0], slope]))
        return cls(tau, a, float(values[0]), True, values.copy(), slope)

    def unfiltered(
        self, t: NDArray[np.float64], order: int, side: str = "right"
    ) -> NDArray[np.float64]:
        """u and its derivatives (zero for a hold; slope, then zero, for a polyline).

        ``side="right"`` counts an edge at t as passed (right limits), ``"left"``
        gives the left limits.
        """
        out = np.zeros((order + 1, t.size))
        idx = np.searchsorted(self.tau, t, side=side)  # edges passed at t
        if self.ramps:
            out[0] = np.interp(t, self.tau, self.level)
            if order >= 1:
                out[1] = np.where(idx > 0, self.slope[np.maximum(idx - 1, 0)], 0.0)
        else:
            out[0] = np.where(idx > 0, self.level[np.maximum(idx - 1, 0)], self.s0)
        return out


# ---------------------------------------------------------------------------
# filters acting on pieces
# ---------------------------------------------------------------------------
class _Gaussian:
    """Zero-phase Gaussian filter: y = u + sum over nearby pieces of a_j (G - U)."""

    def __init__(self, sigma_ns: float) -> None:
        self.sigma = sigma_ns
        self.smooth = True

    def knots(self, pieces: _Pieces) -> NDArray[np.float64]:
        return np.empty(0)

    @staticmethod
    def _kernel(z: NDArray[np.float64], q: int, sigma: float) -> NDArray[np.float64]:
        """d^q/dt^q of a unit step's (q >= 0) or ramp's (q = -1) filtered minus unfiltered form."""
        if q == -1:  # ramp: sigma * (phi(|z|) - |z| Phi(-|z|)), even in z
            w = np.abs(z)
            return sigma * (np.exp(-0.5 * w * w) / _SQRT_2PI - w * special.ndtr(-w))
        if q == 0:  # step: Phi(z) - H(z), exact in both tails
            return np.where(z < 0.0, special.ndtr(z), -special.ndtr(-z))
        sign = -1.0 if (q - 1) % 2 else 1.0
        phi = np.exp(-0.5 * z * z) / _SQRT_2PI
        return sign * _hermite_e(q - 1, z) * phi / sigma**q

    def apply(
        self, pieces: _Pieces, t: NDArray[np.float64], order: int, side: str = "right"
    ) -> NDArray[np.float64]:
        out = pieces.unfiltered(t, order)  # smooth: no left/right distinction
        if pieces.tau.size == 0:
            return out
        half = GAUSSIAN_WINDOW_SIGMAS * self.sigma
        lo = np.searchsorted(pieces.tau, t - half, side="left")
        hi = np.searchsorted(pieces.tau, t + half, side="right")
        width = int(np.max(hi - lo)) if t.size else 0
        if width == 0:
            return out
        rows = max(1, _CHUNK // width)
        offs = np.arange(width)
        shift = 1 if pieces.ramps else 0  # a ramp is one order below a step
        for start in range(0, t.size, rows):
            sl = slice(start, start + rows)
            idx = lo[sl, None] + offs[None, :]
            mask = idx < hi[sl, None]
            idx = np.minimum(idx, pieces.tau.size - 1)
            z = (t[sl, None] - pieces.tau[idx]) / self.sigma
            a = np.where(mask, pieces.a[idx], 0.0)
            for n in range(order + 1):
                out[n, sl] += np.sum(a * self._kernel(z, n - shift, self.sigma), axis=1)
        return out


class _SinglePole:
    """Causal RC filter; the exponential memory E(t) is carried by a recursion over edges.

    E(t) = sum_(tau_j <= t) a_j exp(-(t - tau_j) / tau).  Steps: y = u - E.
    Ramps: y = u - tau u' + tau E.  Between edges d^n E / dt^n = (-1 / tau)^n E.
    """

    def __init__(self, tau_ns: float, pieces: _Pieces) -> None:
        self.tau = tau_ns
        self.smooth = False
        decay = np.exp(-np.diff(pieces.tau) / tau_ns)
        mem = np.empty_like(pieces.a)
        acc = 0.0
        for m, a_m in enumerate(pieces.a.tolist()):  # O(N) once, sequential
            acc = (acc * float(decay[m - 1]) if m else 0.0) + a_m
            mem[m] = acc
        self._memory = mem

    def knots(self, pieces: _Pieces) -> NDArray[np.float64]:
        return pieces.tau

    def apply(
        self, pieces: _Pieces, t: NDArray[np.float64], order: int, side: str = "right"
    ) -> NDArray[np.float64]:
        u = pieces.unfiltered(t, max(order, 1), side)
        if pieces.tau.size == 0:
            return u[: order + 1]
        idx = np.searchsorted(pieces.tau, t, side=side)
        j = np.maximum(idx - 1, 0)
        e = np.where(idx > 0, self._memory[j] * np.exp(-(t - pieces.tau[j]) / self.tau), 0.0)
        k = -1.0 / self.tau
        out = np.empty((order + 1, t.size))
        if pieces.ramps:
            out[0] = u[0] - self.tau * u[1] + self.tau * e
            for n in range(1, order + 1):
                out[n] = u[n] + self.tau * k**n * e
        else:
            for n in range(order + 1):
                out[n] = u[n] - k**n * e
        return out


# ---------------------------------------------------------------------------
# the realized schedule
# ---------------------------------------------------------------------------
class RealizedSchedule(Schedule):
    """The waveform the hardware plays, as a schedule s = f_r(t / tf).

    Evaluates exactly from the model in the module docstring, vectorised.
    ``family``, ``k_start`` and ``k_end`` are the design's (the realized twin
    of a designed point); ``variant`` is ``"realized"``.

    At a knot, :meth:`derivatives` gives the right limits for a hold (the
    sample played from that time on; s itself jumps there) and the left limits
    for a continuous waveform with kinks (a polyline, a single-pole output),
    except at x = 0; :meth:`derivatives_t` takes an explicit ``side``.

    Attributes
    ----------
    design : Schedule
        The designed schedule.
    tf_ns : float
        Anneal time in ns.
    jumps : bool
        True if the waveform is discontinuous (an unfiltered hold): the
        integrators step onto ``knots``, where s jumps.
    continuity : int or None
        The waveform is C^continuity in t (-1 for jumps; ``None``: smooth).
    n_edges : int
        Edges of the played waveform (sample or level changes, polyline vertices);
        0 when the design is played as it is.  Integrators that follow each edge
        scale their step budget with it.
    """

    variant = "realized"

    def __init__(
        self,
        design: Schedule,
        tf_ns: float,
        pieces: _Pieces | None,
        filt: _Gaussian | _SinglePole | None,
        model: dict[str, Any],
    ) -> None:
        self.design = design
        self.tf_ns = float(tf_ns)
        self.family = design.family
        self.k_start = design.k_start
        self.k_end = design.k_end
        self.max_order = design.max_order if pieces is None else None
        self._pieces = pieces
        self._filter = filt
        self.model = dict(model)
        self.n_edges = 0 if pieces is None else int(np.count_nonzero(pieces.a))
        if pieces is None:
            self.knots = tuple(design.knots)
            self.jumps = False
            self.continuity: int | None = None
        else:
            edges = pieces.tau if filt is None else filt.knots(pieces)
            x = edges / self.tf_ns
            self.knots = tuple(float(v) for v in x[(x > 0.0) & (x < 1.0)])
            smooth = filt is not None and filt.smooth
            self.jumps = filt is None and not pieces.ramps
            if smooth:
                self.continuity = None
            elif filt is None:
                self.continuity = 0 if pieces.ramps else -1
            else:
                self.continuity = 1 if pieces.ramps else 0

    def derivatives_t(
        self, t_ns: ArrayLike, order: int, side: str = "right"
    ) -> NDArray[np.float64]:
        """d^n s / dt^n (per ns^n) at times in ns; shape ``(order + 1,) + shape``.

        At a knot, ``side="right"`` (the default, also used by :meth:`derivatives`)
        gives the right limits and ``side="left"`` the left limits.
        """
        ta = np.asarray(t_ns, dtype=float)
        flat = np.atleast_1d(ta).ravel()
        if self._pieces is None:
            d = self.design.derivatives(flat / self.tf_ns, order)
            out = d / self.tf_ns ** np.arange(order + 1)[:, None]
        elif self._filter is None:
            out = self._pieces.unfiltered(flat, order, side)
        else:
            out = self._filter.apply(self._pieces, flat, order, side)
        return out.reshape((order + 1, *ta.shape))

    def _derivatives(self, x: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        if self._pieces is None:
            return self.design.derivatives(x, order)
        t = x * self.tf_ns
        if self.jumps or not self.knots:  # a hold is right-continuous; smooth: no sides
            d = self.derivatives_t(t, order)
        else:
            # Continuous with kinks: at a knot give the left limits (the piece that ends
            # there), after snapping t = x tf onto the edge it rounds near.  Integrators
            # step onto knots; their last node then sees its own piece.  At t = 0 the
            # right limits (the first piece).
            tau = self._pieces.tau
            j = np.clip(np.searchsorted(tau, t), 1, tau.size - 1)
            j = np.where(np.abs(tau[j - 1] - t) < np.abs(tau[j] - t), j - 1, j)
            near = np.abs(tau[j] - t) <= 8.0 * np.finfo(float).eps * self.tf_ns
            t = np.where(near, tau[j], t)
            left = t > 0.0
            d = np.empty((order + 1, t.size))
            d[:, left] = self.derivatives_t(t[left], order, side="left")
            d[:, ~left] = self.derivatives_t(t[~left], order, side="right")
        return d * self.tf_ns ** np.arange(order + 1)[:, None]

    def jump_points(
        self,
    ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
        """Where an unfiltered hold jumps: x in (0, 1], s just before and just after.

        Empty arrays for a continuous waveform.  An integrator of the deviation
        from the instantaneous steady state must add sigma(s_before) -
        sigma(s_after) to the deviation at each jump (the state itself is
        continuous).
        """
        if not self.jumps or self._pieces is None:
            return np.empty(0), np.empty(0), np.empty(0)
        x = self._pieces.tau / self.tf_ns
        keep = (x > 0.0) & (x <= 1.0) & (self._pieces.a != 0.0)
        after = self._pieces.level[keep]
        return x[keep], after - self._pieces.a[keep], after

    def describe(self) -> dict[str, Any]:
        out = dict(self.design.describe())
        out["variant"] = "realized"
        out.update(self.model)
        return out


# ---------------------------------------------------------------------------
# the report
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class Violation:
    """One limit violation: a contiguous interval where a limit is exceeded.

    Attributes
    ----------
    kind : str
        ``"slope"`` (|ds/dt| above ``max_slope_per_ns``), ``"range"`` (s outside
        [0, 1]) or ``"breakpoint_tolerance"``.
    t_ns : float
        Time of the worst point.
    value, limit : float
        The worst value and the limit it exceeds.
    t_start_ns, t_end_ns : float
        The interval (on the checking grid) over which the limit is exceeded.
    """

    kind: str
    t_ns: float
    value: float
    limit: float
    t_start_ns: float
    t_end_ns: float

    def __str__(self) -> str:
        return (
            f"{self.kind}: {self.value:.6g} exceeds {self.limit:.6g} at t = {self.t_ns:.6g} ns "
            f"(from {self.t_start_ns:.6g} to {self.t_end_ns:.6g} ns)"
        )


@dataclass(frozen=True)
class RealizedWaveform:
    """A realized waveform and what survives of the design.

    Attributes
    ----------
    schedule : RealizedSchedule
        The played waveform as a schedule (run it like any other).
    tf_ns : float
        Anneal time in ns.
    mode : str
        ``"analog"`` (no limits), ``"samples"`` (held samples), ``"levels"``
        (quantized continuous design) or ``"breakpoints"``.
    t_ns, s : ndarray
        The played samples or breakpoints, values exactly as played.
    end_derivatives : ndarray
        Realized d^n s / dt^n at t = tf, n = 0 .. len - 1, per ns^n.
    end_derivatives_x : ndarray
        The same in the dimensionless time x = t / tf (d^n s / dx^n).
    design_end_derivatives_x : ndarray
        The design's d^n f / dx^n at x = 1.
    derivative_scale_x : ndarray
        The scale each order is compared with: max(1, max_x |f^(n)|).
    end_derivative_method : str
        ``"exact"`` or how the derivatives were estimated.
    effective_k_end : int
        Consecutive orders from 1 whose realized end derivative is below
        ``flat_rtol * derivative_scale_x`` (capped at ``len - 1``).
    flat_rtol : float
        The tolerance used for ``effective_k_end``.
    max_deviation, t_max_deviation_ns : float
        Largest |played - design| and where it occurs.
    grid_points : int
        Size of the uniform grid used for the deviation and slope checks.
    violations : tuple of Violation
        Every limit violation, in time order.
    notes : tuple of str
        Plain statements about the waveform (jumps, truncated grid...).
    breakpoints : BreakpointDesign or None
        The breakpoint design, in breakpoint mode.
    """

    schedule: RealizedSchedule
    tf_ns: float
    mode: str
    t_ns: NDArray[np.float64]
    s: NDArray[np.float64]
    end_derivatives: NDArray[np.float64]
    end_derivatives_x: NDArray[np.float64]
    design_end_derivatives_x: NDArray[np.float64]
    derivative_scale_x: NDArray[np.float64]
    end_derivative_method: str
    effective_k_end: int
    flat_rtol: float
    max_deviation: float
    t_max_deviation_ns: float
    grid_points: int
    violations: tuple[Violation, ...]
    notes: tuple[str, ...]
    breakpoints: BreakpointDesign | None = field(default=None, repr=False)

    def summary(self) -> list[str]:
        """Readable lines for a terminal or a report."""
        d = self.schedule.design
        lines = [
            f"realized waveform ({self.mode}) of {d.family} k_end={d.k_end:g} at tf = "
            f"{self.tf_ns:g} ns: {self.t_ns.size} played points",
            f"model: {self.schedule.model}",
            f"effective flatness order at the end: {self.effective_k_end} (designed "
            f"{d.k_end:g}; derivatives below {self.flat_rtol:g} x the design's scale "
            f"count as zero; {self.end_derivative_method})",
            "realized end derivatives d^n s/dt^n (per ns^n): "
            + ", ".join(f"{v:.3g}" for v in self.end_derivatives),
            f"largest deviation from the design: {self.max_deviation:.3g} at t = "
            f"{self.t_max_deviation_ns:.6g} ns (grid of {self.grid_points} points)",
        ]
        if self.violations:
            lines.append(f"{len(self.violations)} limit violation(s):")
            lines.extend(f"  {v}" for v in self.violations)
        else:
            lines.append("no limit violations")
        lines.extend(f"note: {n}" for n in self.notes)
        return lines

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready scalars and short lists (not the samples)."""
        return {
            "mode": self.mode,
            "tf_ns": self.tf_ns,
            "played_points": int(self.t_ns.size),
            "model": dict(self.schedule.model),
            "end_derivatives_per_ns": [float(v) for v in self.end_derivatives],
            "end_derivatives_x": [float(v) for v in self.end_derivatives_x],
            "design_end_derivatives_x": [float(v) for v in self.design_end_derivatives_x],
            "end_derivative_method": self.end_derivative_method,
            "effective_k_end": self.effective_k_end,
            "design_k_end": self.schedule.k_end,
            "flat_rtol": self.flat_rtol,
            "max_deviation": self.max_deviation,
            "t_max_deviation_ns": self.t_max_deviation_ns,
            "violations": [vars(v).copy() for v in self.violations],
            "notes": list(self.notes),
        }


# ---------------------------------------------------------------------------
# realize
# ---------------------------------------------------------------------------
def check_waveform(spec: WaveformSpec) -> WaveformSpec:
    """The ``[waveform]`` section's rules; the one validator of the TOML and Python paths.

    Each limit is absent (``None``) or: ``sample_rate_gsps``, ``bandwidth_mhz``,
    ``max_slope_per_ns`` > 0; ``dac_bits`` an integer from 1 to 32; ``breakpoints`` an
    integer >= 2.  ``filter`` is one of :data:`FILTERS`; ``breakpoint_tolerance`` > 0.

    Returns
    -------
    WaveformSpec
        ``spec`` with numbers as ``float`` (counts as ``int``).

    Raises
    ------
    InputError
        Naming the ``waveform.*`` key and the rule.
    """
    out: dict[str, Any] = {}
    for name in ("sample_rate_gsps", "bandwidth_mhz", "max_slope_per_ns"):
        value = getattr(spec, name)
        out[name] = None if value is None else number(value, f"waveform.{name}", gt=0)
    if spec.dac_bits is not None:
        out["dac_bits"] = integer(spec.dac_bits, "waveform.dac_bits", ge=1, le=32)
    out["filter"] = choice(spec.filter, "waveform.filter", FILTERS)
    if spec.breakpoints is not None:
        out["breakpoints"] = integer(spec.breakpoints, "waveform.breakpoints", ge=2)
    out["breakpoint_tolerance"] = number(
        spec.breakpoint_tolerance, "waveform.breakpoint_tolerance", gt=0
    )
    return replace(spec, **out)


def _check_spec(waveform: WaveformSpec) -> dict[str, Any]:
    """Validated limits of a WaveformSpec (None = not applied)."""
    check_waveform(waveform)

    def real(value: float | None) -> float | None:
        return None if value is None else float(value)

    return {
        "rate": real(waveform.sample_rate_gsps),
        "bits": waveform.dac_bits,
        "bandwidth": real(waveform.bandwidth_mhz),
        "filter": waveform.filter,
        "max_slope": real(waveform.max_slope_per_ns),
        "breakpoints": waveform.breakpoints,
        "tolerance": waveform.breakpoint_tolerance,
    }


def _level_crossings(
    design: Schedule, bits: int
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """x where a monotone design crosses each half level, and the level taken there."""
    steps = 2**bits - 1
    if steps > 1 << 20:
        raise InputError(
            "waveform.dac_bits",
            f"= {bits} without sample_rate_gsps gives more than 2^20 level crossings; "
            "give a sample rate",
        )
    if not design.is_monotone():
        raise InputError("waveform.dac_bits", "without sample_rate_gsps needs a monotone schedule")
    bounds = (np.arange(steps) + 0.5) / steps  # between level j and j + 1
    lo, hi = np.zeros(steps), np.ones(steps)
    for _ in range(60):  # bisection on every boundary at once (f monotone)
        mid = 0.5 * (lo + hi)
        above = design(mid) >= bounds
        hi = np.where(above, mid, hi)
        lo = np.where(above, lo, mid)
    x = hi
    start = float(design(np.array([0.0]))[0])
    keep = (x < 1.0) & (bounds > start)  # boundaries crossed inside the anneal
    # the design is rounded up at the crossing: level j+1 from there on
    levels = (np.arange(steps) + 1.0) / steps
    return x[keep], levels[keep]


def _build_pieces(
    design: Schedule, tf_ns: float, lim: dict[str, Any], level_end: bool = True
) -> tuple[
    str,
    _Pieces | None,
    NDArray[np.float64],
    NDArray[np.float64],
    BreakpointDesign | None,
    list[str],
]:
    """The played input (before the filter), its points, and notes."""
    notes: list[str] = []
    rate, bits = lim["rate"], lim["bits"]
    period = None if rate is None else 1.0 / rate
    if lim["breakpoints"] is not None:
        tol = lim["tolerance"]
        if bits is not None:
            half = 0.5 / (2**bits - 1)
            if not (isinstance(tol, int | float) and tol > half):
                raise InputError(
                    "waveform.breakpoint_tolerance",
                    f"must exceed half a DAC step ({half:.3g} with dac_bits = {bits}), got {tol!r}",
                )
            tol = tol - half
        bp = design_breakpoints(design, tf_ns, tol, time_step_ns=period, flat_end=level_end)
        if len(bp) > lim["breakpoints"]:
            kept = "" if bits is None else f" (half a DAC step of {bits} bits kept for rounding)"
            raise InputError(
                "waveform.breakpoints",
                f"= {lim['breakpoints']} cannot meet breakpoint_tolerance = "
                f"{lim['tolerance']:.3g}{kept}: the adaptive design needs {len(bp)} points; "
                "raise the budget or the tolerance",
            )
        values = bp.s if bits is None else quantize(bp.s, bits)
        pieces = _Pieces.polyline(bp.t_ns, values)
        return "breakpoints", pieces, bp.t_ns, values, bp, notes
    if rate is not None:
        n = math.floor(tf_ns * rate * (1.0 + 1e-12))
        if n > _MAX_SAMPLES:
            raise InputError(
                "waveform.sample_rate_gsps",
                f"gives {n + 1} samples over tf = {tf_ns:g} ns, more than {_MAX_SAMPLES}",
            )
        t = np.arange(n + 1, dtype=float) * period
        if abs(t[-1] - tf_ns) <= 1e-9 * tf_ns:
            t[-1] = tf_ns
        else:
            notes.append(
                f"tf = {tf_ns:g} ns is not a whole number of sample periods ({period:g} ns): "
                f"the last sample is at {t[-1]:.6g} ns and is held to tf"
            )
        values = design(np.clip(t / tf_ns, 0.0, 1.0))
        if bits is not None:
            values = quantize(values, bits)
        return "samples", _Pieces.steps(t, values, float(values[0])), t, values, None, notes
    if bits is not None:
        x, levels = _level_crossings(design, bits)
        s0 = float(quantize(design(np.array([0.0])), bits)[0])
        t = x * tf_ns
        return (
            "levels",
            _Pieces.steps(t, levels, s0),
            np.append(0.0, t),
            np.append(s0, levels),
            None,
            notes,
        )
    if lim["bandwidth"] is not None:
        raise InputError(
            "waveform.bandwidth_mhz",
            "needs sample_rate_gsps, dac_bits or breakpoints: the filter acts on the "
            "played samples",
        )
    return "analog", None, np.array([0.0, tf_ns]), design(np.array([0.0, 1.0])), None, notes


def _runs(mask: NDArray[np.bool_]) -> list[tuple[int, int]]:
    """Index ranges [a, b] of contiguous True runs."""
    if not mask.any():
        return []
    padded = np.concatenate([[False], mask, [False]]).astype(np.int8)
    edges = np.flatnonzero(np.diff(padded))
    return [(int(a), int(b) - 1) for a, b in zip(edges[::2], edges[1::2], strict=True)]


def _interval_violations(
    kind: str,
    t: NDArray[np.float64],
    value: NDArray[np.float64],
    limit: float,
    over: NDArray[np.bool_],
) -> list[Violation]:
    out = []
    for a, b in _runs(over):
        i = a + int(np.argmax(np.abs(value[a : b + 1])))
        out.append(Violation(kind, float(t[i]), float(value[i]), limit, float(t[a]), float(t[b])))
    return out


def _divided_end_derivatives(
    t: NDArray[np.float64], s: NDArray[np.float64], order: int
) -> NDArray[np.float64]:
    """n! s[t_(N-n), ..., t_N] for n = 0 .. order (zero where there are too few points)."""
    out = np.zeros(order + 1)
    out[0] = s[-1]
    table = np.asarray(s, dtype=float).copy()
    for n in range(1, order + 1):
        if t.size <= n:
            break
        table = (table[1:] - table[:-1]) / (t[n:] - t[:-n])
        out[n] = math.factorial(n) * table[-1]
    return out


def _design_scale(design: Schedule, order: int) -> NDArray[np.float64]:
    """max(1, max_x |f^(n)(x)|) for n = 0 .. order, on a uniform grid (finite values)."""
    d = design.derivatives(np.linspace(0.0, 1.0, 2049), order)
    d = np.where(np.isfinite(d), np.abs(d), 0.0)
    return np.maximum(1.0, d.max(axis=1))


def realize(
    schedule: Schedule,
    tf_ns: float,
    waveform: Any,
    curves: Any = None,
    *,
    flat_rtol: float = DEFAULT_FLAT_RTOL,
    level_end: bool = True,
) -> RealizedWaveform:
    """Model what a waveform generator plays for a designed schedule.

    Parameters
    ----------
    schedule : Schedule
        The designed s = f(t / tf).
    tf_ns : float
        Anneal time in ns.
    waveform : WaveformSpec
        The device's limits (``None`` fields are not applied).
    curves : DeviceCurves, optional
        Unused by the model itself (the export adds A and B); accepted so that
        callers can pass the spec's curves uniformly.
    flat_rtol : float
        Relative tolerance of the effective flatness order (see module docstring).
    level_end : bool
        Breakpoint mode: end on a level segment at the final value (the default;
        see :func:`schedforge.breakpoints.design_breakpoints`, ``flat_end``).
        ``False`` plays the naive polyline through points of the design up to
        tf, whose last segment has a nonzero slope.

    Returns
    -------
    RealizedWaveform
        The played waveform (``.schedule``) and what survives of the design.

    Raises
    ------
    InputError
        Invalid limits (naming the ``waveform.*`` key), a breakpoint budget
        that cannot meet its tolerance, or a filter without anything to filter.
    """
    del curves  # the played waveform does not depend on A(s), B(s)
    if not (math.isfinite(tf_ns) and tf_ns > 0):
        raise InputError("tf_ns", f"must be a finite number > 0, got {tf_ns!r}")
    tf = float(tf_ns)
    lim = _check_spec(waveform)
    mode, pieces, t_pts, s_pts, bp, notes = _build_pieces(schedule, tf, lim, level_end)
    filt: _Gaussian | _SinglePole | None = None
    model: dict[str, Any] = {"mode": mode}
    for key, name in (
        ("rate", "sample_rate_gsps"),
        ("bits", "dac_bits"),
        ("breakpoints", "breakpoints"),
    ):
        if lim[key] is not None:
            model[name] = lim[key]
    if lim["bandwidth"] is not None and pieces is not None:
        model["bandwidth_mhz"] = lim["bandwidth"]
        model["filter"] = lim["filter"]
        if lim["filter"] == "gaussian":
            filt = _Gaussian(gaussian_sigma_ns(lim["bandwidth"]))
            model["sigma_ns"] = filt.sigma
        else:
            filt = _SinglePole(single_pole_tau_ns(lim["bandwidth"]), pieces)
            model["tau_ns"] = filt.tau
    realized = RealizedSchedule(schedule, tf, pieces, filt, model)

    # -- end derivatives and effective flatness -------------------------------
    k_end = float(schedule.k_end)
    order = math.ceil(k_end) + 2 if math.isfinite(k_end) else _ORDERS_IF_INFINITE
    if schedule.max_order is not None:
        order = min(order, schedule.max_order)
    design_end = schedule.derivatives(np.array([1.0]), order)[:, 0]
    scale = _design_scale(schedule, order)
    if pieces is None or filt is not None or mode != "samples":
        end_x = realized.derivatives_t(np.array([tf]), order, side="left")[:, 0]
        end_x = end_x * tf ** np.arange(order + 1)
        method = "exact one-sided derivatives at tf"
        if mode == "levels" and filt is None:
            method = "exact: the quantized waveform is constant after its last jump"
    else:
        t_end = t_pts[-order - 1 :]
        end_t = _divided_end_derivatives(t_end, s_pts[-order - 1 :], order)
        end_x = end_t * tf ** np.arange(order + 1)
        method = "backward divided differences of the played samples (a hold has no derivatives)"
    end_t = end_x / tf ** np.arange(order + 1)
    effective = 0
    for n in range(1, order + 1):
        if np.isfinite(end_x[n]) and abs(end_x[n]) <= flat_rtol * scale[n]:
            effective += 1
        else:
            break

    # -- deviation and limit checks on a grid -----------------------------------
    per = 8
    if filt is not None:
        step = min(filt.sigma if isinstance(filt, _Gaussian) else filt.tau, tf)
        per_t = step / 4.0
    elif pieces is not None and pieces.tau.size > 1:
        per_t = float(np.min(np.diff(pieces.tau))) / per if pieces.ramps else tf / 20000
    else:
        per_t = tf / 20000
    n_grid = int(min(_MAX_GRID, max(20001, math.ceil(tf / per_t) + 1)))
    tg = np.linspace(0.0, tf, n_grid)
    if pieces is not None:
        tg = np.union1d(tg, pieces.tau[(pieces.tau >= 0) & (pieces.tau <= tf)])
    dg = realized.derivatives_t(tg, 1)
    design_g = schedule(np.clip(tg / tf, 0.0, 1.0))
    dev = np.abs(dg[0] - design_g)
    i_dev = int(np.argmax(dev))
    max_dev, t_dev = float(dev[i_dev]), float(tg[i_dev])
    if realized.jumps and pieces is not None:  # left limits at the jumps
        inside = (pieces.tau > 0) & (pieces.tau <= tf)
        tj = pieces.tau[inside]
        left = pieces.level[inside] - pieces.a[inside]
        dl = np.abs(left - schedule(tj / tf))
        if dl.size and dl.max() > max_dev:
            i = int(np.argmax(dl))
            max_dev, t_dev = float(dl[i]), float(tj[i])

    violations: list[Violation] = []
    if lim["max_slope"] is not None:
        period = None if lim["rate"] is None else 1.0 / lim["rate"]
        if realized.jumps and pieces is not None:
            if period is not None:
                slope = pieces.a / period
                violations += _interval_violations(
                    "slope", pieces.tau, slope, lim["max_slope"], np.abs(slope) > lim["max_slope"]
                )
            else:
                notes.append(
                    "the slope of an unfiltered quantized waveform without a sample rate is "
                    "not defined (it jumps); give sample_rate_gsps or bandwidth_mhz to check "
                    "max_slope_per_ns"
                )
        else:
            violations += _interval_violations(
                "slope", tg, dg[1], lim["max_slope"], np.abs(dg[1]) > lim["max_slope"]
            )
    out_of_range = (dg[0] < -1e-12) | (dg[0] > 1.0 + 1e-12)
    violations += _interval_violations(
        "range", tg, np.where(dg[0] < 0, dg[0], dg[0] - 1.0), 0.0, out_of_range
    )
    if bp is not None:
        pl_dev = np.abs(np.interp(tg, t_pts, s_pts) - design_g)
        violations += _interval_violations(
            "breakpoint_tolerance", tg, pl_dev, float(lim["tolerance"]), pl_dev > lim["tolerance"]
        )
    violations.sort(key=lambda v: v.t_ns)

    # -- plain notes ----------------------------------------------------------------
    if realized.jumps:
        xj, before, after = realized.jump_points()
        tj, aj = xj * tf, after - before
        notes.append(
            f"the played waveform jumps at {int(np.count_nonzero(aj))} edges (unfiltered hold; "
            f"largest jump {np.max(np.abs(aj)) if aj.size else 0.0:.3g}): a real output is "
            "band-limited, give bandwidth_mhz for a faithful model"
        )
        if mode == "levels" and tj.size:
            notes.append(
                f"the quantized waveform is constant (s = {s_pts[-1]:.6g}) from t = "
                f"{tj[-1]:.6g} ns to tf; its last jump of {aj[-1]:.3g} excites a closed "
                "system whatever tf is"
            )
    if abs(end_x[0] - design_end[0]) > 0:
        notes.append(
            f"the played value at tf is {end_x[0]:.17g} (design {design_end[0]:.17g}, "
            f"difference {end_x[0] - design_end[0]:.3g})"
        )
    if pieces is not None and pieces.tau.size > 100_000 and not (filt is not None and filt.smooth):
        notes.append(f"{len(realized.knots)} knots: integrators step onto each, which is slow")

    return RealizedWaveform(
        schedule=realized,
        tf_ns=tf,
        mode=mode,
        t_ns=np.asarray(t_pts, dtype=float),
        s=np.asarray(s_pts, dtype=float),
        end_derivatives=end_t,
        end_derivatives_x=end_x,
        design_end_derivatives_x=design_end,
        derivative_scale_x=scale,
        end_derivative_method=method,
        effective_k_end=effective,
        flat_rtol=float(flat_rtol),
        max_deviation=max_dev,
        t_max_deviation_ns=t_dev,
        grid_points=int(tg.size),
        violations=tuple(violations),
        notes=tuple(notes),
        breakpoints=bp,
    )


def sampled_violations(
    t_ns: ArrayLike, s: ArrayLike, ds_dt_per_ns: ArrayLike, waveform: Any
) -> tuple[Violation, ...]:
    """Limit violations of a sampled curve (e.g. the ideal design on a chosen grid).

    Checks the spec's ``max_slope_per_ns`` against ``|ds/dt|`` and the range
    [0, 1] of ``s`` at the given points; the other limits (rate, bits, filter)
    describe a played waveform and do not apply to sampled values.
    """
    lim = _check_spec(waveform)
    t = np.asarray(t_ns, dtype=float)
    sv = np.asarray(s, dtype=float)
    slope = np.asarray(ds_dt_per_ns, dtype=float)
    found: list[Violation] = []
    if lim["max_slope"] is not None:
        found += _interval_violations(
            "slope", t, slope, lim["max_slope"], np.abs(slope) > lim["max_slope"]
        )
    out_of_range = (sv < -1e-12) | (sv > 1.0 + 1e-12)
    found += _interval_violations("range", t, np.where(sv < 0, sv, sv - 1.0), 0.0, out_of_range)
    return tuple(sorted(found, key=lambda v: v.t_ns))


def played_samples(realized: RealizedWaveform, curves: Any) -> Any:
    """The played points as a samples table for export.

    Parameters
    ----------
    realized : RealizedWaveform
        From :func:`realize`.
    curves : DeviceCurves
        A(s), B(s) for the energy columns.

    Returns
    -------
    schedforge.samples.SampleTable
        ``t_ns`` and ``s`` exactly as played (the sample grid, or the
        breakpoints); ``ds_dt_per_ns`` is the slope the device plays after
        each point: the segment slope for breakpoints, (s_(n+1) - s_n) times
        the rate for held samples (0 after the last point); ``A_ghz``,
        ``B_ghz`` at the played s.  ``metadata`` says which it is.
    """
    from .samples import SampleTable, toml_fields  # export layer

    t, s = realized.t_ns, realized.s
    slope = np.zeros_like(s)
    if t.size > 1:
        slope[:-1] = np.diff(s) / np.diff(t)
    energies = curves.derivatives(s, 0)
    kind = {
        "breakpoints": "breakpoints (straight lines between points)",
        "samples": "held samples on the device's sample grid",
        "levels": "jump points of the quantized waveform (held between points)",
        "analog": "end points only (no waveform limits given)",
    }[realized.mode]
    rate = realized.schedule.model.get("sample_rate_gsps")
    grid = {
        "breakpoints": f"{t.size} breakpoints",
        "samples": "the device's sample grid"
        + (f" ({rate:g} GS/s)" if rate is not None and t.size > 2 else ""),
        "levels": f"{t.size} jump points",
        "analog": "end points",
    }[realized.mode]
    bits = realized.schedule.model.get("dac_bits")
    codes = None
    if bits is not None and realized.mode in ("samples", "levels", "breakpoints"):
        levels = 2 ** int(bits) - 1
        codes = np.rint(s * levels).astype(np.int64)
        if not np.allclose(codes / levels, s, rtol=0.0, atol=1e-12):
            codes = None  # not the converter's levels: no code to state
    meta = {
        "grid": grid,
        "export": kind,
        "columns": "ds_dt_per_ns is the slope from each point to the next, as played",
        "waveform": toml_fields(realized.schedule.model),
        "waveform_check": toml_fields(
            {
                "effective_k_end": realized.effective_k_end,
                "max_deviation_from_design": realized.max_deviation,
                "limit_violations": len(realized.violations),
            }
        ),
    }
    return SampleTable(
        t_ns=t,
        s=s,
        ds_dt_per_ns=slope,
        A_ghz=energies[0, 0],
        B_ghz=energies[1, 0],
        metadata=meta,
        dac_code=codes,
    )
