"""Anneal schedules s = f(x), x = t / tf in [0, 1], with designed flat ends.

A schedule maps x in [0, 1] to s in [0, 1] with f(0) = 0, f(1) = 1, monotone
non-decreasing.  Every schedule evaluates f and its derivatives exactly (closed
forms or recurrences, never finite differences), vectorised over x, reports the
number of derivatives that vanish at each end, and checks monotonicity.

Families (the names are part of the spec contract): ``linear``, ``beta``,
``poly``, ``gevrey``, ``points``.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

from .errors import InputError

__all__ = [
    "FAMILIES",
    "BetaSchedule",
    "LinearSchedule",
    "Schedule",
    "make_schedule",
]


class Schedule(ABC):
    """Base class of all schedules.

    Subclasses implement :meth:`_derivatives`; everything else is shared.

    Attributes
    ----------
    family : str
        Family name as used in spec files.
    k_start, k_end : float
        Designed number of vanishing derivatives at x = 0 and x = 1.
    max_order : int or None
        Highest derivative order evaluated exactly; ``None`` means any order.
    knots : tuple of float
        Interior points of (0, 1) where the schedule is only finitely smooth
        (joins of piecewise definitions).  Integrators place step boundaries there.
    """

    family: str = ""
    k_start: float = 0
    k_end: float = 0
    max_order: int | None = None
    knots: tuple[float, ...] = ()

    # -- public API ---------------------------------------------------------
    def __call__(self, x: ArrayLike) -> NDArray[np.float64]:
        """Evaluate s = f(x)."""
        return self.derivatives(x, 0)[0]

    def derivatives(self, x: ArrayLike, order: int) -> NDArray[np.float64]:
        """f and its derivatives up to ``order``.

        Parameters
        ----------
        x : array_like
            Points in [0, 1].
        order : int
            Highest derivative order (>= 0).

        Returns
        -------
        ndarray
            Shape ``(order + 1,) + np.shape(x)``; row n holds d^n f / dx^n.
        """
        if self.max_order is not None and order > self.max_order:
            raise ValueError(
                f"{self.family} schedule evaluates derivatives up to order "
                f"{self.max_order}, asked for {order}"
            )
        xa = np.asarray(x, dtype=float)
        out = self._derivatives(np.atleast_1d(xa).ravel(), int(order))
        return out.reshape((order + 1,) + xa.shape)

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
            A derivative counts as zero when ``|f^(n)| <= tol * max(1, n!)``.
        max_check : int, optional
            Highest order checked; defaults to ``max_order`` or ``k + 8``.

        Returns
        -------
        int
            The flatness order (``max_check`` if every checked order vanishes).
        """
        if end not in ("start", "end"):
            raise ValueError("end must be 'start' or 'end'")
        k = self.k_start if end == "start" else self.k_end
        if max_check is None:
            max_check = self.max_order if self.max_order is not None else int(np.ceil(k)) + 8
        x0 = 0.0 if end == "start" else 1.0
        d = self.derivatives(np.array([x0]), max_check)[:, 0]
        n = 0
        for order in range(1, max_check + 1):
            scale = max(1.0, float(special.factorial(order)))
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

    # -- to implement -------------------------------------------------------
    @abstractmethod
    def _derivatives(self, x: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        """Return shape (order + 1, x.size) for a flat float array x."""


class LinearSchedule(Schedule):
    """f(x) = x: the baseline, no flat end."""

    family = "linear"

    def _derivatives(self, x: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        out = np.zeros((order + 1, x.size))
        out[0] = x
        if order >= 1:
            out[1] = 1.0
        return out


def _falling(a: float, j: int) -> float:
    """Falling factorial a (a-1) ... (a-j+1)."""
    r = 1.0
    for i in range(j):
        r *= a - i
    return r


class BetaSchedule(Schedule):
    """Regularized incomplete beta schedule f(x) = I_x(1 + k_start, 1 + k_end).

    Its first ``k_start`` derivatives vanish at x = 0 and its first ``k_end``
    at x = 1; ``k_start = 0`` gives ``1 - (1 - x)**(1 + k_end)``.  Real
    (non-integer) k are allowed; then the derivative of order ceil(k) + 1 is
    infinite at that end.

    Derivatives: f' is the beta density x^(a-1) (1-x)^(b-1) / B(a, b); higher
    ones follow from Leibniz's rule with falling factorials (exact).
    """

    family = "beta"

    def __init__(self, k_start: float = 0, k_end: float = 0) -> None:
        if not (np.isfinite(k_start) and k_start >= 0):
            raise InputError("schedule.k_start", f"must be a number >= 0, got {k_start!r}")
        if not (np.isfinite(k_end) and k_end >= 0):
            raise InputError("schedule.k_end", f"must be a number >= 0, got {k_end!r}")
        self.k_start = k_start
        self.k_end = k_end
        self._a = 1.0 + float(k_start)
        self._b = 1.0 + float(k_end)
        self._log_norm = special.betaln(self._a, self._b)

    def _derivatives(self, x: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        a, b = self._a, self._b
        out = np.zeros((order + 1, x.size))
        out[0] = special.betainc(a, b, x)
        if order == 0:
            return out
        inv_norm = np.exp(-self._log_norm)
        with np.errstate(divide="ignore", invalid="ignore"):
            for n in range(1, order + 1):
                m = n - 1  # derivative order of the density
                total = np.zeros(x.size)
                for j in range(m + 1):
                    cu = _falling(a - 1.0, j)
                    cv = _falling(b - 1.0, m - j) * (-1.0) ** (m - j)
                    coeff = special.comb(m, j, exact=False) * cu * cv
                    if coeff == 0.0:
                        continue
                    total = total + coeff * np.power(x, a - 1.0 - j) * np.power(
                        1.0 - x, b - 1.0 - (m - j)
                    )
                out[n] = total * inv_norm
        return out

    def describe(self) -> dict[str, Any]:
        return {"family": self.family, "k_start": self.k_start, "k_end": self.k_end}


#: Registry of schedule families by spec name.
FAMILIES: dict[str, type[Schedule]] = {
    "linear": LinearSchedule,
    "beta": BetaSchedule,
}


def make_schedule(family: str, **params: Any) -> Schedule:
    """Build a schedule of a named family.

    Parameters
    ----------
    family : str
        One of :data:`FAMILIES`.
    **params
        Family parameters (``k_start``, ``k_end``, ``tail``, ``points``, ...).
        Parameters a family does not use are ignored (``linear`` ignores k).

    Raises
    ------
    InputError
        Unknown family or invalid parameters.
    """
    if family not in FAMILIES:
        known = ", ".join(sorted(FAMILIES))
        raise InputError("schedule.family", f"must be one of {known}; got {family!r}")
    cls = FAMILIES[family]
    if cls is LinearSchedule:
        return LinearSchedule()
    if cls is BetaSchedule:
        return BetaSchedule(params.get("k_start", 0), params.get("k_end", 0))
    return cls(**params)
