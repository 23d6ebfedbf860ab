"""Anneal schedules s = f(x), x = t / tf in [0, 1], with designed flat ends.

A schedule maps x in [0, 1] to s in [0, 1] with f(0) = 0, f(1) = 1, monotone
non-decreasing.  Every schedule evaluates f and its derivatives exactly (closed
forms or recurrences, never finite differences), vectorised over x, reports the
number of derivatives that vanish at each end, and checks monotonicity.

Families (the names are part of the spec contract):

``linear``
    f(x) = x, the baseline (no flat end).
``beta``
    The regularized incomplete beta function I_x(1 + k_start, 1 + k_end); real
    k allowed.
``poly``
    A base schedule (linear, or monotone interpolated control points) whose last
    ``tail`` fraction is replaced by a polynomial flat to order ``k_end`` at x = 1,
    joined with matching value and derivatives up to order ``k_end + 1``.
``gevrey``
    The normalized integral of the bump exp(-1/(1 - y)) (or exp(-1/(y (1 - y)))
    when flat at the start too): every derivative vanishes at the flat end(s).
``points``
    User control points, interpolated monotonically and smoothly
    (:class:`MonotoneInterpolant`), then given a flat polynomial tail as in
    ``poly``.

Continuity is reported in the ``continuity`` attribute: an integer n means the
schedule is C^n on [0, 1] (finitely smooth at its ``knots``), ``None`` means
infinitely smooth.
"""

from __future__ import annotations

import math
import numbers
import sys
from abc import ABC, abstractmethod
from collections.abc import Sequence
from typing import Any, ClassVar

import numpy as np
from numpy.polynomial import chebyshev as _cheb
from numpy.polynomial import polynomial as _poly
from numpy.typing import ArrayLike, NDArray
from scipy import fft, special

from .errors import InputError
from .spec_model import ScheduleSpec

__all__ = [
    "FAMILIES",
    "GEVREY_FLATNESS_CHECKED",
    "MAX_POLY_K",
    "BetaSchedule",
    "GevreySchedule",
    "LinearSchedule",
    "MonotoneInterpolant",
    "PointsSchedule",
    "PolySchedule",
    "Schedule",
    "family_class",
    "make_schedule",
    "schedule_for_point",
    "schedule_from_spec",
    "schedule_grid",
    "schedule_label",
]

#: Number of derivatives :meth:`Schedule.flatness` checks at an infinitely flat end.
GEVREY_FLATNESS_CHECKED = 12

#: Largest ``k_end`` of the ``poly`` and ``points`` families (the tail polynomial
#: has degree 2 k_end + 2; beyond this its coefficients lose precision).
MAX_POLY_K = 12

#: log of the largest double (1.8e308).
_LOG_DBL_MAX = math.log(sys.float_info.max)

#: Points this far outside [0, 1] (rounding of t / tf) are clipped onto it.
_X_SLACK = 1e-12


# -- input validation ---------------------------------------------------------
def _real(field: str, value: Any) -> float:
    """A finite real number (bools rejected), else InputError."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise InputError(field, f"must be a number, got {value!r}")
    v = float(value)
    if not math.isfinite(v):
        raise InputError(field, f"must be finite, got {value!r}")
    return v


def _check_k(field: str, value: Any, *, integer: bool = False, family: str = "") -> float:
    """A flatness order k >= 0 (a whole number if ``integer``)."""
    k = _real(field, value)
    if k < 0:
        raise InputError(field, f"must be >= 0, got {value!r}")
    if integer:
        if not k.is_integer():
            raise InputError(
                field, f"must be a whole number >= 0 for the {family} family, got {value!r}"
            )
        if k > MAX_POLY_K:
            raise InputError(field, f"must be <= {MAX_POLY_K} for the {family} family, got {k:g}")
        return int(k)
    return k


def _check_tail(value: Any) -> float:
    """The reshaped fraction of the anneal, strictly between 0 and 1."""
    tail = _real("schedule.tail", value)
    if not 0.0 < tail < 1.0:
        raise InputError("schedule.tail", f"must be strictly between 0 and 1, got {value!r}")
    return tail


def _check_points(points: Any) -> NDArray[np.float64]:
    """Control points as an (n, 2) array; see :class:`MonotoneInterpolant` for the rules."""
    field = "schedule.points"
    try:
        rows = [tuple(p) for p in points]
    except TypeError:
        raise InputError(field, "must be a list of [x, s] pairs") from None
    if len(rows) < 2:
        raise InputError(field, f"must hold at least 2 [x, s] pairs, got {len(rows)}")
    for i, row in enumerate(rows):
        if len(row) != 2:
            raise InputError(field, f"entry {i} must be an [x, s] pair, got {row!r}")
        _real(f"{field}[{i}]", row[0])
        _real(f"{field}[{i}]", row[1])
    pts = np.array(rows, dtype=float)
    x, s = pts[:, 0], pts[:, 1]
    if abs(x[0]) > _X_SLACK or abs(s[0]) > _X_SLACK:
        raise InputError(field, f"must start at (0, 0), got ({x[0]:g}, {s[0]:g})")
    if abs(x[-1] - 1.0) > _X_SLACK or abs(s[-1] - 1.0) > _X_SLACK:
        raise InputError(field, f"must end at (1, 1), got ({x[-1]:g}, {s[-1]:g})")
    pts[0] = (0.0, 0.0)
    pts[-1] = (1.0, 1.0)
    dx = np.diff(pts[:, 0])
    if np.any(dx <= 0):
        i = int(np.argmax(dx <= 0))
        raise InputError(
            field,
            f"x must be strictly increasing (entries {i} and {i + 1}: x = "
            f"{pts[i, 0]:g}, {pts[i + 1, 0]:g})",
        )
    ds = np.diff(pts[:, 1])
    if np.any(ds < 0):
        i = int(np.argmax(ds < 0))
        raise InputError(
            field,
            f"s must be non-decreasing, a schedule never goes back (entries {i} and "
            f"{i + 1}: s = {pts[i, 1]:g}, {pts[i + 1, 1]:g})",
        )
    return pts


# -- base class ---------------------------------------------------------------
class Schedule(ABC):
    """Base class of all schedules.

    Subclasses implement :meth:`_derivatives`; everything else is shared.

    Attributes
    ----------
    family : str
        Family name as used in spec files.
    k_start, k_end : float
        Designed number of vanishing derivatives at x = 0 and x = 1
        (``math.inf`` for an infinitely flat end).
    max_order : int or None
        Highest derivative order evaluated; ``None`` means any order.
    knots : tuple of float
        Interior points of (0, 1) where the schedule is only finitely smooth
        (joins of piecewise definitions).  Integrators place step boundaries there.
    continuity : int or None
        The schedule is C^continuity on [0, 1]; ``None`` means infinitely smooth
        (real k of ``beta`` aside, whose high derivatives blow up at the ends only).

    Family traits (class attributes and class methods, so that code holding only a
    family name asks :func:`family_class` instead of comparing names):

    has_k : bool
        The family has flatness orders a study varies (``linear``: nothing is flat).
    k_end_varies : bool
        The ``k_end`` parameter changes the shape (``linear`` and ``gevrey``: no; a
        study computes them once per tf, recorded with ``k_end = 0``).
    end_orders(k_start, k_end)
        The real flatness orders at the two ends for these parameters (``inf``:
        flat to every order); :mod:`schedforge.error_law` reads the law from them.
    grid_orders(k_start, k_end)
        The (k_start, k_end) a study records for these parameters.
    """

    family: str = ""
    k_start: float = 0
    k_end: float = 0
    max_order: int | None = None
    knots: tuple[float, ...] = ()
    continuity: int | None = None
    has_k: ClassVar[bool] = True
    k_end_varies: ClassVar[bool] = True

    # -- family traits ------------------------------------------------------
    @classmethod
    def end_orders(cls, k_start: float, k_end: float) -> tuple[float, float]:
        """Real flatness orders (k_start, k_end) at the two ends for these parameters."""
        return float(k_start), float(k_end)

    @classmethod
    def grid_orders(cls, k_start: float, k_end: float) -> tuple[float, float]:
        """The (k_start, k_end) a study records: 0 for an order the family ignores."""
        if not cls.has_k:
            return 0.0, 0.0
        return float(k_start), (float(k_end) if cls.k_end_varies else 0.0)

    # -- public API ---------------------------------------------------------
    def __call__(self, x: ArrayLike) -> NDArray[np.float64]:
        """Evaluate s = f(x)."""
        return self.derivatives(x, 0)[0]

    def derivatives(self, x: ArrayLike, order: int) -> NDArray[np.float64]:
        """f and its derivatives up to ``order``.

        Parameters
        ----------
        x : array_like
            Points in [0, 1] (values within 1e-12 outside are clipped onto it).
        order : int
            Highest derivative order (>= 0).

        Returns
        -------
        ndarray
            Shape ``(order + 1,) + np.shape(x)``; row n holds d^n f / dx^n.
            At a knot the piece to the right is used (at x = 1, the last piece).

        Raises
        ------
        ValueError
            ``order`` negative or above ``max_order``, or x outside [0, 1].
        """
        order = int(order)
        if order < 0:
            raise ValueError(f"derivative order must be >= 0, got {order}")
        if self.max_order is not None and order > self.max_order:
            raise ValueError(
                f"{self.family} schedule evaluates derivatives up to order "
                f"{self.max_order}, asked for {order}"
            )
        xa = np.asarray(x, dtype=float)
        flat = np.atleast_1d(xa).ravel()
        if flat.size:
            lo, hi = float(flat.min()), float(flat.max())
            if not (lo >= -_X_SLACK and hi <= 1.0 + _X_SLACK):
                raise ValueError(f"schedule argument x must lie in [0, 1], got [{lo}, {hi}]")
            if lo < 0.0 or hi > 1.0:
                flat = np.clip(flat, 0.0, 1.0)
        out = self._derivatives(flat, order)
        return out.reshape((order + 1, *xa.shape))

    def end_derivatives(self, order: int) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Derivatives 0..order at x = 0 and at x = 1."""
        d = self.derivatives(np.array([0.0, 1.0]), order)
        return d[:, 0].copy(), d[:, 1].copy()

    def flatness(self, end: str, tol: float = 1e-9, max_check: int | None = None) -> int:
        """Number of consecutive derivatives (from order 1) that vanish at an end.

        Parameters
        ----------
        end : {"start", "end"}
            Which end of the anneal.
        tol : float
            A derivative counts as zero when ``|f^(n)| <= tol * max(1, n!)``;
            an infinite derivative never counts.
        max_check : int, optional
            Highest order checked.  Default: :data:`GEVREY_FLATNESS_CHECKED` at
            an infinitely flat end, else ``max_order`` or ``ceil(k) + 8``.

        Returns
        -------
        int
            The flatness order (``max_check`` if every checked order vanishes,
            which is what an infinitely flat end reports).
        """
        if end not in ("start", "end"):
            raise ValueError("end must be 'start' or 'end'")
        k = self.k_start if end == "start" else self.k_end
        if max_check is None:
            if not math.isfinite(k):
                max_check = GEVREY_FLATNESS_CHECKED
            elif self.max_order is not None:
                max_check = self.max_order
            else:
                max_check = math.ceil(k) + 8
        x0 = 0.0 if end == "start" else 1.0
        d = self.derivatives(np.array([x0]), max_check)[:, 0]
        n = 0
        for order in range(1, max_check + 1):
            scale = math.exp(min(math.lgamma(order + 1.0), _LOG_DBL_MAX))
            if np.isfinite(d[order]) and abs(d[order]) <= tol * scale:
                n += 1
            else:
                break
        return n

    @property
    def flat_start(self) -> int:
        """Flatness order at x = 0."""
        return self.flatness("start")

    @property
    def flat_end(self) -> int:
        """Flatness order at x = 1."""
        return self.flatness("end")

    def is_monotone(self, n: int = 4097, tol: float = 1e-12) -> bool:
        """True if f' >= -tol on a fine grid (plus the knots) and f(0)=0, f(1)=1."""
        x = np.union1d(np.linspace(0.0, 1.0, n), np.asarray(self.knots, dtype=float))
        d = self.derivatives(x, 1)
        ends_ok = abs(d[0, 0]) <= 1e-12 and abs(d[0, -1] - 1.0) <= 1e-12
        return bool(ends_ok and np.all(d[1] >= -tol) and np.all(np.diff(d[0]) >= -tol))

    def describe(self) -> dict[str, Any]:
        """Parameters for metadata headers and reports."""
        return {"family": self.family, "k_start": self.k_start, "k_end": self.k_end}

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in self.describe().items() if k != "family")
        return f"{type(self).__name__}({params})"

    @classmethod
    def from_params(cls, **params: Any) -> Schedule:
        """Build from spec keyword parameters (see :func:`make_schedule`)."""
        return cls()

    # -- to implement -------------------------------------------------------
    @abstractmethod
    def _derivatives(self, x: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        """Return shape (order + 1, x.size) for a flat float array x in [0, 1]."""


class LinearSchedule(Schedule):
    """f(x) = x: the baseline, no flat end.  C^infinity (``continuity = None``)."""

    family = "linear"
    has_k = False
    k_end_varies = False

    @classmethod
    def end_orders(cls, k_start: float, k_end: float) -> tuple[float, float]:
        """Nothing is flat: (0, 0) whatever the parameters."""
        return 0.0, 0.0

    def _derivatives(self, x: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        out = np.zeros((order + 1, x.size))
        out[0] = x
        if order >= 1:
            out[1] = 1.0
        return out


# -- beta ---------------------------------------------------------------------
def _falling(a: float, j: int) -> float:
    """Falling factorial a (a-1) ... (a-j+1)."""
    r = 1.0
    for i in range(j):
        r *= a - i
    return r


def _density_derivative_at_zero(p: float, q: float, m: int, log_norm: float) -> float:
    """d^m/dy^m of y^(p-1) (1-y)^(q-1) / B at y = 0 (a one-sided limit).

    With (1-y)^(q-1) = sum_i binom(q-1, i) (-y)^i, the density is a sum of
    powers y^(p-1+i).  For integer p the value is m! times the coefficient of
    y^m; for real p it is 0 while m < p - 1 and +-inf beyond.
    """
    e = p - 1.0
    if float(e).is_integer():
        i = m - int(e)
        if i < 0:
            return 0.0
        coeff = float(special.binom(q - 1.0, i)) * (-1.0) ** i
        if coeff == 0.0:
            return 0.0
        log_mag = math.log(abs(coeff)) + math.lgamma(m + 1.0) - log_norm
        if log_mag > _LOG_DBL_MAX:  # beyond double precision (only past the first nonzero)
            return math.copysign(math.inf, coeff)
        return coeff * math.exp(math.lgamma(m + 1.0) - log_norm)
    if m < e:
        return 0.0
    return math.copysign(math.inf, _falling(e, m))


class BetaSchedule(Schedule):
    """Regularized incomplete beta schedule f(x) = I_x(1 + k_start, 1 + k_end).

    Its first ``k_start`` derivatives vanish at x = 0 and its first ``k_end``
    at x = 1; ``k_start = 0`` gives ``1 - (1 - x)**(1 + k_end)``.  Real
    (non-integer) k are allowed: then ceil(k) derivatives vanish at that end
    and those of order above k + 1 are infinite there (returned as +-inf).
    Infinitely smooth inside (0, 1); ``continuity = None``.

    Derivatives: f' is the beta density x^(a-1) (1-x)^(b-1) / B(a, b); higher
    ones follow from Leibniz's rule with falling factorials (exact), and at the
    ends from the power series of the density.  For integer k every term that
    is identically zero is skipped, so no nan appears.
    """

    family = "beta"

    def __init__(self, k_start: float = 0, k_end: float = 0) -> None:
        self.k_start = _check_k("schedule.k_start", k_start)
        self.k_end = _check_k("schedule.k_end", k_end)
        self._a = 1.0 + float(self.k_start)
        self._b = 1.0 + float(self.k_end)
        self._log_norm = float(special.betaln(self._a, self._b))
        self._check_representable()
        self._plans: dict[int, tuple[list[list[tuple[int, float]]], NDArray, NDArray]] = {}

    @staticmethod
    def _log_leading(k_here: float, k_other: float) -> float:
        """log |f^(k+1)| at the end whose order is ``k_here``: k! / B(1 + k_start, 1 + k_end)."""
        return math.lgamma(k_here + 1.0) - float(special.betaln(1.0 + k_here, 1.0 + k_other))

    def _check_representable(self) -> None:
        """Refuse orders whose leading end derivative is not a double.

        The first derivative that does not vanish at an end, of order k + 1, is
        k! / B(1 + k_start, 1 + k_end) in magnitude (from the power series of the
        beta density there).  It sets the coefficient of the error law, and
        everything built on the schedule's derivatives (the prediction, the
        flatness check, the integrators' steps) needs it finite.  It passes the
        largest double (1.8e308) at k_end = 170 when k_start = 0, and sooner when
        both orders are large; there the schedule is also a step narrower than
        1 / k of the anneal.
        """
        for name, here, other in (
            ("schedule.k_end", float(self.k_end), float(self.k_start)),
            ("schedule.k_start", float(self.k_start), float(self.k_end)),
        ):
            if self._log_leading(here, other) <= _LOG_DBL_MAX:
                continue
            lo, hi = 0.0, here  # largest order that stays representable, other fixed
            for _ in range(60):
                mid = 0.5 * (lo + hi)
                if self._log_leading(mid, other) <= _LOG_DBL_MAX:
                    lo = mid
                else:
                    hi = mid
            other_name = "k_start" if name.endswith("k_end") else "k_end"
            raise InputError(
                name,
                f"must be at most {math.floor(lo)} for the beta family with {other_name} = "
                f"{other:g}, got {here:g}: beyond it the first derivative that does not "
                "vanish at that end, k! / B(1 + k_start, 1 + k_end), which sets the error "
                "law's coefficient, exceeds the largest double (1.8e308), so the schedule "
                "can no longer be evaluated with meaning in double precision",
            )

    def _plan(self, mmax: int) -> tuple[list[list[tuple[int, float]]], NDArray, NDArray]:
        """Leibniz terms (j, coefficient / B) of each density derivative 0..mmax, and
        the end values; cached per ``mmax`` (integrators call with the same order)."""
        plan = self._plans.get(mmax)
        if plan is None:
            a, b = self._a, self._b
            inv_norm = math.exp(-self._log_norm)
            fa = [_falling(a - 1.0, j) for j in range(mmax + 1)]
            fb = [_falling(b - 1.0, j) for j in range(mmax + 1)]
            terms = []
            for m in range(mmax + 1):
                row = []
                for j in range(m + 1):
                    coeff = math.comb(m, j) * fa[j] * fb[m - j] * (-1.0) ** (m - j)
                    if coeff != 0.0:  # identically zero terms (integer k) are skipped
                        row.append((j, coeff * inv_norm))
                terms.append(row)
            at0 = np.array(
                [_density_derivative_at_zero(a, b, m, self._log_norm) for m in range(mmax + 1)]
            )
            at1 = np.array(
                [
                    (-1.0) ** m * _density_derivative_at_zero(b, a, m, self._log_norm)
                    for m in range(mmax + 1)
                ]
            )
            plan = self._plans[mmax] = (terms, at0, at1)
        return plan

    def _derivatives(self, x: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        a, b = self._a, self._b
        out = np.empty((order + 1, x.size))
        out[0] = special.betainc(a, b, x)
        if order == 0:
            return out
        terms, end0, end1 = self._plan(order - 1)
        at0, at1 = x <= 0.0, x >= 1.0
        has_ends = bool(at0.any() or at1.any())
        inner = ~(at0 | at1) if has_ends else slice(None)
        xi = x[inner]
        # powers x^(a-1-j), (1-x)^(b-1-(m-j)) computed once each
        px: dict[int, NDArray[np.float64]] = {}
        p1: dict[int, NDArray[np.float64]] = {}
        for m, row in enumerate(terms):
            total = np.zeros(xi.size)
            for j, coeff in row:
                if j not in px:
                    px[j] = np.power(xi, a - 1.0 - j)
                if m - j not in p1:
                    p1[m - j] = np.power(1.0 - xi, b - 1.0 - (m - j))
                total += coeff * px[j] * p1[m - j]
            out[m + 1, inner] = total
        if has_ends:
            out[1:, at0] = end0[:, None]
            out[1:, at1] = end1[:, None]
        return out

    @classmethod
    def from_params(cls, **params: Any) -> BetaSchedule:
        """``k_start``, ``k_end`` (defaults 0); other parameters are ignored."""
        return cls(params.get("k_start", 0), params.get("k_end", 0))


# -- monotone interpolation of control points ---------------------------------
class MonotoneInterpolant(Schedule):
    """Monotone C^m interpolation of control points (x_i, s_i) (the ``points`` base).

    On each interval [x_i, x_(i+1)] of width h_i, with z = (x - x_i) / h_i, the
    slope is a blend

        f'(x) = d_i + (d_(i+1) - d_i) S(z) + c_i T'(z),

    where S(z) = I_z(m, m) is a smooth step whose first m - 1 derivatives vanish
    at z = 0 and 1, T(z) = I_z(m + 1, m + 1) (so T' is a bump vanishing to order
    m - 1 at both ends, with unit integral), the nodal slopes are the smaller of
    the two neighbouring secant slopes (one-sided at x = 0 and 1), and c_i makes
    the interval's rise exactly s_(i+1) - s_i.  Because the nodal slopes never
    exceed the secant slope, c_i >= 0 and f' >= 0: the interpolant is monotone
    for any monotone data, passes through every point, reproduces straight-line
    data exactly, stays flat across a flat (pause) segment, and is C^m with
    f'' = ... = f^(m) = 0 at the interior points (``continuity = m``; the
    ``knots`` are the interior x_i).  The primitive is closed form:
    int_0^z I_t(m, m) dt = z I_z(m, m) - I_z(m + 1, m) / 2.

    Parameters
    ----------
    points : sequence of (x, s)
        At least two points.  Rule: x strictly increasing, s non-decreasing,
        first point (0, 0) and last point (1, 1) (within 1e-12; they are not
        added silently, since a schedule must run the whole anneal).
    smoothness : int
        m >= 1 above.

    Raises
    ------
    InputError
        ``schedule.points`` breaks a rule.
    """

    family = "interpolant"

    def __init__(self, points: Sequence[Sequence[float]], smoothness: int = 2) -> None:
        pts = _check_points(points)
        m = int(smoothness)
        if m < 1:
            raise ValueError(f"smoothness must be >= 1, got {smoothness!r}")
        self.points = tuple((float(x), float(s)) for x, s in pts)
        self.smoothness = m
        self._x = pts[:, 0].copy()
        self._s = pts[:, 1].copy()
        self._h = np.diff(self._x)
        delta = np.diff(self._s) / self._h
        slopes = np.empty(self._x.size)
        slopes[0], slopes[-1] = delta[0], delta[-1]
        slopes[1:-1] = np.minimum(delta[:-1], delta[1:])
        self._d = slopes
        self._c = delta - 0.5 * (slopes[:-1] + slopes[1:])  # >= 0 by construction
        self._step = BetaSchedule(m - 1, m - 1)  # S = I_z(m, m)
        self._step_primitive = BetaSchedule(m, m - 1)  # I_z(m + 1, m)
        self._bump = BetaSchedule(m, m)  # T = I_z(m + 1, m + 1)
        self.knots = tuple(float(v) for v in self._x[1:-1])
        self.continuity = m if self.knots else None

    def _derivatives(self, x: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        n_int = self._h.size
        i = np.clip(np.searchsorted(self._x, x, side="right") - 1, 0, n_int - 1)
        h = self._h[i]
        z = np.clip((x - self._x[i]) / h, 0.0, 1.0)
        d0 = self._d[i]
        dd = self._d[i + 1] - d0
        c = self._c[i]
        step = self._step.derivatives(z, max(order - 1, 0))
        bump = self._bump.derivatives(z, order)
        out = np.empty((order + 1, x.size))
        out[0] = self._s[i] + h * (
            d0 * z + dd * (z * step[0] - 0.5 * self._step_primitive(z)) + c * bump[0]
        )
        if order >= 1:
            out[1] = d0 + dd * step[0] + c * bump[1]
        for n in range(2, order + 1):
            out[n] = (dd * step[n - 1] + c * bump[n]) / h ** (n - 1)
        return out

    def describe(self) -> dict[str, Any]:
        return {"family": self.family, "points": self.points, "smoothness": self.smoothness}


# -- polynomial tail ----------------------------------------------------------
class PolySchedule(Schedule):
    """A base schedule with its last ``tail`` fraction replaced by a flat polynomial.

    For x < x_j = 1 - tail the schedule is the base (linear by default, or the
    :class:`MonotoneInterpolant` of control points).  On [x_j, 1], with
    z = (x - x_j) / tail, it is the Hermite polynomial

        P(z) = 1 + (1 - z)^(k+1) R(z),   deg R = k + 1,

    of degree 2k + 2 (k = ``k_end``): P(1) = 1 and its first k derivatives vanish
    at z = 1, and R is fixed by matching the base's value and derivatives up to
    order k + 1 at the join (R's Taylor coefficients are those of
    (P - 1) (1 - z)^-(k+1)).  The schedule is therefore C^(k+1) at the join
    (``continuity``; exactly k + 1 in general, or the base's own continuity if
    lower) and the join is listed in ``knots``.  The tail is monotone iff
    q(z) = (1 - z) R'(z) - (k + 1) R(z) >= 0 on [0, 1] (P' = (1 - z)^k q); this
    is checked at the ends and critical points of q (and on a grid).

    Parameters
    ----------
    k_end : int
        Derivatives vanishing at x = 1 (0 <= k_end <= :data:`MAX_POLY_K`).
    tail : float
        Fraction of the anneal reshaped, 0 < tail < 1.
    base : Schedule or sequence of (x, s), optional
        The schedule kept before the join: ``None`` for linear, control points
        (interpolated by :class:`MonotoneInterpolant` of smoothness k_end + 2),
        or any :class:`Schedule` that can evaluate derivatives to order k_end + 1.

    Raises
    ------
    InputError
        Invalid ``schedule.k_end``, ``schedule.tail`` or ``schedule.points``, or a
        tail that cannot be monotone (``schedule.tail``).
    """

    family = "poly"

    def __init__(
        self,
        k_end: int = 2,
        tail: float = 0.2,
        base: Schedule | Sequence[Sequence[float]] | None = None,
    ) -> None:
        k = int(_check_k("schedule.k_end", k_end, integer=True, family=self.family))
        tail = _check_tail(tail)
        if base is None:
            base = LinearSchedule()
        elif not isinstance(base, Schedule):
            base = MonotoneInterpolant(base, smoothness=k + 2)
        self.k_end = k
        self.k_start = base.k_start
        self.tail = tail
        self.base = base
        self._join = join = 1.0 - tail
        self._check_base_monotone()
        bj = base.derivatives(np.array([join]), k + 1)[:, 0]
        a = np.array([tail**i * bj[i] / math.factorial(i) for i in range(k + 2)])
        a[0] -= 1.0
        self._r = np.array(
            [sum(a[i] * math.comb(n - i + k, k) for i in range(n + 1)) for n in range(k + 2)]
        )
        self._check_tail_monotone()
        self._r_derivs = [_poly.polyder(self._r, j) for j in range(k + 2)]
        self.knots = (*(kn for kn in base.knots if kn < join), join)
        self.continuity = k + 1 if base.continuity is None else min(base.continuity, k + 1)

    def _check_base_monotone(self) -> None:
        x = np.union1d(np.linspace(0.0, self._join, 2049), [kn for kn in self.base.knots])
        x = x[x <= self._join]
        d = self.base.derivatives(x, 1)
        if abs(d[0, 0]) > 1e-12 or np.any(d[1] < -1e-12) or d[0, -1] > 1.0 + 1e-12:
            raise InputError(
                "schedule.base", "must start at 0 and be non-decreasing up to the tail"
            )

    def _check_tail_monotone(self) -> None:
        k = self.k_end
        r = self._r
        q = _poly.polysub(_poly.polymul([1.0, -1.0], _poly.polyder(r)), (k + 1) * r)
        # q is smallest at an end or a critical point; near-real roots come out with
        # small imaginary parts, so every root's real part in (0, 1) is tried, plus a grid
        crit = _poly.polyroots(_poly.polyder(q)).real if q.size > 2 else np.array([])
        z = np.concatenate([np.linspace(0.0, 1.0, 257), crit[(crit > 0) & (crit < 1)]])
        scale = max(1.0, float(np.max(np.abs(q))))
        if float(np.min(_poly.polyval(z, q))) < -1e-12 * scale:
            raise InputError(
                "schedule.tail",
                f"= {self.tail:g} with k_end = {k} cannot give a monotone schedule: the "
                "polynomial tail overshoots: increase schedule.tail or lower schedule.k_end",
            )

    def _derivatives(self, x: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        out = np.empty((order + 1, x.size))
        in_tail = x >= self._join
        if not in_tail.all():
            out[:, ~in_tail] = self.base.derivatives(x[~in_tail], order)
        if in_tail.any():
            out[:, in_tail] = self._tail_derivatives(x[in_tail], order)
        return out

    def _tail_derivatives(self, x: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        k, tail = self.k_end, self.tail
        w = np.clip((1.0 - x) / tail, 0.0, 1.0)  # exact 0 at x = 1
        z = 1.0 - w
        top = min(order, k + 1)
        rd = [_poly.polyval(z, self._r_derivs[j]) for j in range(top + 1)]
        # (w^(k+1))^(j) in z = (-1)^j (k+1)!/(k+1-j)! w^(k+1-j), zero for j > k+1
        wd = [(-1.0) ** j * _falling(k + 1.0, j) * w ** (k + 1 - j) for j in range(top + 1)]
        out = np.zeros((order + 1, x.size))
        for n in range(order + 1):
            total = np.zeros(x.size)
            for j in range(max(0, n - top), min(n, top) + 1):
                total += math.comb(n, j) * wd[j] * rd[n - j]
            out[n] = total / tail**n
        out[0] += 1.0
        return out

    def describe(self) -> dict[str, Any]:
        info: dict[str, Any] = {
            "family": self.family,
            "k_start": self.k_start,
            "k_end": self.k_end,
            "tail": self.tail,
        }
        if isinstance(self.base, MonotoneInterpolant):
            info["points"] = self.base.points
        else:
            info["base"] = self.base.describe()
        return info

    @classmethod
    def _k_start_must_be_zero(cls, params: dict[str, Any]) -> None:
        k_start = _check_k("schedule.k_start", params.get("k_start", 0))
        if k_start != 0:
            raise InputError(
                "schedule.k_start",
                f"must be 0 for the {cls.family} family (the start follows the base "
                f"schedule; beta and gevrey give a flat start), got {k_start:g}",
            )

    @classmethod
    def from_params(cls, **params: Any) -> PolySchedule:
        """``k_end`` (default 2), ``tail`` (0.2), ``points`` or ``base``.

        ``k_start`` must be 0 unless ``base`` is a :class:`Schedule` (whose start is kept).
        """
        base = params.get("base")
        if not isinstance(base, Schedule):
            cls._k_start_must_be_zero(params)
        if base is None:
            base = params.get("points")
        return cls(params.get("k_end", 2), params.get("tail", 0.2), base)


class PointsSchedule(PolySchedule):
    """User control points, interpolated monotonically and smoothly, with a flat tail.

    The points are interpolated by :class:`MonotoneInterpolant` (smoothness
    k_end + 2) and the last ``tail`` fraction is replaced by the polynomial of
    :class:`PolySchedule`, flat to order ``k_end`` at x = 1; points inside the
    tail are therefore not passed through.  C^(k_end+1) (``continuity``), with
    ``knots`` at the interior points before the join and at the join.

    Parameters
    ----------
    points : sequence of (x, s)
        Rule: x strictly increasing, s non-decreasing, first (0, 0), last (1, 1).
    k_end : int
        Derivatives vanishing at x = 1.
    tail : float
        Fraction of the anneal reshaped, 0 < tail < 1.
    """

    family = "points"

    def __init__(
        self, points: Sequence[Sequence[float]], k_end: int = 2, tail: float = 0.2
    ) -> None:
        if points is None:
            raise InputError("schedule.points", "is required for the points family")
        super().__init__(k_end, tail, base=points)

    @classmethod
    def from_params(cls, **params: Any) -> PointsSchedule:
        """``points`` (required), ``k_end`` (default 2), ``tail`` (0.2); ``k_start`` must be 0."""
        cls._k_start_must_be_zero(params)
        return cls(params.get("points"), params.get("k_end", 2), params.get("tail", 0.2))


# -- gevrey -------------------------------------------------------------------
def _exp_inv_derivatives(u: NDArray[np.float64], mmax: int) -> NDArray[np.float64]:
    """d^m/du^m exp(-1/u) for m = 0..mmax at u >= 0 (all zero at u = 0).

    Three-term recurrence from differentiating u^2 psi' = psi n times (Leibniz):
    u^2 psi^(n+1) = (1 - 2 n u) psi^(n) - n (n - 1) psi^(n-1).  It is run on the
    ratios r_n = psi^(n) / psi, and the result is multiplied by exp(-1/(2u)) twice
    so that values stay finite where exp(-1/u) alone would underflow.  Checked
    against arbitrary-precision differentiation to ~1e-14 relative up to order 29.
    """
    out = np.zeros((mmax + 1, u.size))
    pos = u > 0.0
    if not pos.any():
        return out
    t = 1.0 / u[pos]
    half = np.exp(-0.5 * t)
    live = half > 0.0
    with np.errstate(over="ignore", invalid="ignore"):
        r_prev = np.ones_like(t)
        r = t * t
        rows = [r_prev, r]
        for n in range(1, mmax):
            r_prev, r = r, t * t * r - 2.0 * n * t * r - n * (n - 1) * t * t * r_prev
            rows.append(r)
        for m in range(mmax + 1):
            out[m, pos] = np.where(live, (rows[m] * half) * half, 0.0)
    return out


class _PanelPrimitive:
    """Primitive F(x) = int_0^x g of a smooth function on [0, 1], to machine precision.

    [0, 1] is cut into ``n_panels`` equal panels; on each, g is interpolated at
    Chebyshev points (coefficients by a DCT), the Chebyshev series is integrated
    exactly, and the panel integrals are accumulated.  Evaluation is Clenshaw's
    recurrence, vectorised over x.  For the gevrey bumps (128 panels, degree 8)
    the error is ~1e-16 of the total (checked against arbitrary-precision
    quadrature and the E_2 closed form).
    """

    def __init__(self, g: Any, n_panels: int = 128, degree: int = 8) -> None:
        n = degree + 1
        nodes = np.cos(np.pi * (np.arange(n) + 0.5) / n)
        h = 1.0 / n_panels
        left = np.arange(n_panels) * h
        vals = g((left[:, None] + 0.5 * h * (nodes[None, :] + 1.0)).ravel()).reshape(n_panels, n)
        coef = fft.dct(vals, type=2, axis=1) / n
        coef[:, 0] *= 0.5
        coef = np.array([_cheb.chebint(c, lbnd=-1) * (0.5 * h) for c in coef])
        self._rows = [np.ascontiguousarray(col) for col in coef.T]  # one array per degree
        panel_int = _cheb.chebval(1.0, coef.T)
        self._offset = np.concatenate([[0.0], np.cumsum(panel_int)[:-1]])
        self.total = float(self._offset[-1] + panel_int[-1])
        self._n = n_panels

    def __call__(self, x: NDArray[np.float64]) -> NDArray[np.float64]:
        idx = np.minimum((x * self._n).astype(np.intp), self._n - 1)
        z = 2.0 * (x * self._n - idx) - 1.0
        rows = self._rows
        z2 = 2.0 * z
        b1 = np.zeros_like(x)
        b2 = np.zeros_like(x)
        for k in range(len(rows) - 1, 0, -1):
            b1, b2 = rows[k][idx] + z2 * b1 - b2, b1
        return self._offset[idx] + rows[0][idx] + z * b1 - b2


class GevreySchedule(Schedule):
    """Infinitely flat end(s): the normalized integral of a bump.

    f(x) = (1/Z) int_0^x phi(y) dy with phi(y) = exp(-1/(1 - y)), or
    phi(y) = exp(-1/y) exp(-1/(1 - y)) = exp(-1/(y (1 - y))) when
    ``flat_start``.  Every derivative vanishes at a flat end (Gevrey class 2),
    so ``k_end`` (and ``k_start`` when flat) is ``math.inf``; :meth:`flatness`
    checks :data:`GEVREY_FLATNESS_CHECKED` (12) derivatives there and reports
    that number when all vanish.  Without ``flat_start``, f'(0) = e^-1 / Z.
    C^infinity (``continuity = None``).

    Derivatives f^(n) = phi^(n-1) / Z come from an exact three-term recurrence
    for the derivatives of exp(-1/u) (and Leibniz's rule for the two-sided
    bump), evaluated up to ``max_order = 30``.  f itself comes from a Chebyshev
    panel quadrature of phi built at construction (machine precision), with Z the
    total integral (for the end-only bump Z = E_2(1) = 1/e - E_1(1)).

    Parameters
    ----------
    flat_start : bool
        Also flat at x = 0 (from a spec: ``k_start > 0``; ``k_end`` has no effect
        on the shape).
    """

    family = "gevrey"
    max_order = 30
    k_end_varies = False

    @classmethod
    def end_orders(cls, k_start: float, k_end: float) -> tuple[float, float]:
        """Flat to every order at the end; at the start too when ``k_start > 0``."""
        return (math.inf if float(k_start) > 0 else 0.0), math.inf

    def __init__(self, flat_start: bool = False) -> None:
        self.both_ends = bool(flat_start)
        self.k_start = math.inf if self.both_ends else 0
        self.k_end = math.inf
        self._primitive = _PanelPrimitive(lambda y: self._bump_derivatives(y, 0)[0])
        self._norm = self._primitive.total

    def _bump_derivatives(self, y: NDArray[np.float64], mmax: int) -> NDArray[np.float64]:
        """phi and its derivatives up to ``mmax``."""
        right = _exp_inv_derivatives(1.0 - y, mmax)
        sign = (-1.0) ** np.arange(mmax + 1)[:, None]
        if not self.both_ends:
            return sign * right
        left = _exp_inv_derivatives(y, mmax)
        right = sign * right
        out = np.zeros((mmax + 1, y.size))
        for m in range(mmax + 1):
            for j in range(m + 1):
                out[m] += math.comb(m, j) * left[j] * right[m - j]
        return out

    def _derivatives(self, x: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        out = np.empty((order + 1, x.size))
        f = np.clip(self._primitive(x) / self._norm, 0.0, 1.0)
        f[x <= 0.0] = 0.0
        f[x >= 1.0] = 1.0
        out[0] = f
        if order >= 1:
            out[1:] = self._bump_derivatives(x, order - 1) / self._norm
        return out

    @property
    def normalization(self) -> float:
        """Z = int_0^1 phi(y) dy."""
        return self._norm

    def describe(self) -> dict[str, Any]:
        return {
            "family": self.family,
            "k_start": self.k_start,
            "k_end": self.k_end,
            "flat_start": self.both_ends,
        }

    @classmethod
    def from_params(cls, **params: Any) -> GevreySchedule:
        """``flat_start``, or ``k_start > 0`` meaning flat at the start too.

        ``k_end`` is validated (a number >= 0) but has no effect on the shape.
        """
        _check_k("schedule.k_end", params.get("k_end", 0))
        flat_start = params.get("flat_start")
        if flat_start is None:
            flat_start = _check_k("schedule.k_start", params.get("k_start", 0)) > 0
        return cls(bool(flat_start))


# -- registry -----------------------------------------------------------------
#: Registry of schedule families by spec name.
FAMILIES: dict[str, type[Schedule]] = {
    "linear": LinearSchedule,
    "beta": BetaSchedule,
    "poly": PolySchedule,
    "gevrey": GevreySchedule,
    "points": PointsSchedule,
}

_PARAMETERS = ("k_start", "k_end", "tail", "points", "flat_start", "base")


def family_class(family: str) -> type[Schedule]:
    """The class of a named family, whose traits (``has_k``, ``end_orders``...) apply.

    Raises
    ------
    InputError
        Unknown family (naming ``schedule.family`` and the known ones).
    """
    try:
        return FAMILIES[family]
    except (KeyError, TypeError):
        known = ", ".join(sorted(FAMILIES))
        raise InputError("schedule.family", f"must be one of {known}; got {family!r}") from None


def schedule_label(family: str, k_start: float, k_end: float) -> str:
    """Short text for a study's schedule: ``"beta k=0/2"``, or ``"linear"`` for a
    family without flatness orders (names no family has are shown with their k)."""
    if not FAMILIES.get(family, Schedule).has_k:
        return family
    return f"{family} k={float(k_start):g}/{float(k_end):g}"


def schedule_grid(
    spec: Any,
    *,
    families: Sequence[str] | None = None,
    k_ends: Sequence[float] | None = None,
) -> list[tuple[str, float, float]]:
    """The distinct schedules (family, k_start, k_end) of a study, sorted.

    The one place where a study's family x k_end grid is expanded (sweep points,
    budget candidates, spec checks).  Families default to the spec's
    ``sweep.family`` or else ``schedule.family``; k_end to ``sweep.k_end`` or else
    ``schedule.k_end``; k_start is ``schedule.k_start``.  Each family records its
    orders through :meth:`Schedule.grid_orders`: ``linear`` once with
    ``k_start = k_end = 0``, ``gevrey`` once per k_start with ``k_end = 0``.

    Raises
    ------
    InputError
        An unknown family.
    """
    grid = spec.sweep
    fams = families or (grid.family if grid and grid.family else None) or (spec.schedule.family,)
    ks = k_ends or (grid.k_end if grid and grid.k_end else None) or (spec.schedule.k_end,)
    k_start = spec.schedule.k_start
    out = {
        (family, *family_class(family).grid_orders(k_start, k_end))
        for family in fams
        for k_end in ks
    }
    return sorted(out)


def make_schedule(family: str, **params: Any) -> Schedule:
    """Build a schedule of a named family.

    Parameters
    ----------
    family : str
        One of :data:`FAMILIES`.
    **params
        Family parameters: ``k_start``, ``k_end``, ``tail``, ``points`` (and, from
        Python, ``flat_start`` for gevrey, ``base`` for poly).  Parameters a family
        does not use are ignored (``linear`` ignores k, ``beta`` ignores ``tail``).
        ``gevrey`` reads ``k_start > 0`` as "flat at the start too" and ignores
        the value of ``k_end``; ``poly`` and ``points`` need ``k_start = 0``.

    Raises
    ------
    InputError
        Unknown family or parameter, or invalid parameter values.
    """
    cls = family_class(family)
    for name in params:
        if name not in _PARAMETERS:
            raise InputError(
                f"schedule.{name}", f"is not a schedule parameter ({', '.join(_PARAMETERS)})"
            )
    return cls.from_params(**params)


def schedule_from_spec(sched: ScheduleSpec) -> Schedule:
    """The schedule a validated :class:`~schedforge.spec_model.ScheduleSpec` describes.

    ``tf_ns`` is not part of the shape and is not used here.
    """
    return make_schedule(
        sched.family,
        k_start=sched.k_start,
        k_end=sched.k_end,
        tail=sched.tail,
        points=sched.points,
    )


def schedule_for_point(spec: Any, family: str, k_start: float, k_end: float) -> Schedule:
    """The schedule of one point of a study: ``spec``'s shape parameters with these coordinates."""
    return schedule_from_spec(
        spec.with_schedule(family=family, k_start=k_start, k_end=k_end).schedule
    )
