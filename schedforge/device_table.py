"""Device curves A(s), B(s) tabulated in a CSV file (a measured or published table).

File layout (``[device] curves = "file.csv"``)::

    # comment lines start with '#'; blank lines are ignored
    s,A_ghz,B_ghz
    0.0,6.8,0.15
    ...
    1.0,0.005,7.0

The header names the three columns (in any order).  Every row must hold three
finite numbers; s must increase strictly from exactly 0 to exactly 1; A and B
must be >= 0.  Each violation raises :class:`~schedforge.errors.InputError`
naming the file, the line and the column.

Interpolation and smoothness
----------------------------
Each column is interpolated by a spline of odd degree d (default 5, quintic)
through every row, with not-a-knot end conditions
(:func:`scipy.interpolate.make_interp_spline`).  A degree-d spline is C^(d-1):
the quintic one is C^4, so A(s), B(s) and H(s) have continuous derivatives up
to order 4 (``continuity``) and the derivatives used by the dynamics are the
spline's own, exact.  Order d is piecewise constant and higher orders are zero.

Why this matters: for a schedule with k vanishing end derivatives, the time
derivatives of H(s(t)) at tf up to order k vanish whatever the curves are, and
order k + 1 (which sets the leading error coefficient) involves A'(1), B'(1);
the error law also needs H smooth in the interior, so the curves should be at
least C^(k+1): :meth:`TabulatedCurves.smoothness_warnings` says when they are
not, or when the table is too noisy for derivatives of that order.

Warnings (``warnings`` attribute, and :meth:`smoothness_warnings` for a k_end):

* *too coarse*: between two rows, the degree-d and the cubic interpolants
  differ by more than :data:`COARSE_RTOL` of the column's range (an estimate
  of the interpolation error; our choice of threshold, no source);
* *too noisy*: the interpolant's derivative of order m changes sign between
  more than a quarter of consecutive rows (with at least 12 rows).  A smooth
  curve's derivative changes sign a few times; interpolated noise alternates.

A(s) and B(s) must stay >= 0: if the interpolant dips below zero between rows
(an overshoot of a too coarse table), loading fails with a message that names
the interval, rather than silently clipping.
"""

from __future__ import annotations

import hashlib
import math
import os
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.interpolate import BSpline, make_interp_spline

from .device_curves import DeviceCurves
from .errors import InputError

__all__ = ["COARSE_RTOL", "COLUMNS", "MAX_CURVES_BYTES", "TabulatedCurves", "file_sha256"]

#: Column names of a curves file.
COLUMNS: tuple[str, ...] = ("s", "A_ghz", "B_ghz")
#: Relative difference between the degree-d and cubic interpolants that counts as too coarse.
COARSE_RTOL = 1e-4
#: Largest curves file read (16 MiB: about half a million rows).
MAX_CURVES_BYTES = 16 * 1024 * 1024
#: Largest |A|, |B| in GHz accepted from a table (common practice, no source: qubit
#: energy scales are of order 1-100 GHz; beyond 1e6 GHz numbers stop meaning energies).
MAX_CURVE_GHZ = 1e6
_NOISE_FRACTION = 0.25


def _read_bytes(path: Path) -> bytes:
    """The curves file's bytes (size capped); InputError naming ``device.curves``."""
    try:
        size = path.stat().st_size
        if size > MAX_CURVES_BYTES:
            raise InputError(
                "device.curves",
                f"names a file of {size / 2**20:.1f} MiB ({path}); at most "
                f"{MAX_CURVES_BYTES // 2**20} MiB is read",
            )
        return path.read_bytes()
    except FileNotFoundError:
        raise InputError("device.curves", f"names a file that does not exist: {path}") from None
    except OSError as exc:
        raise InputError("device.curves", f"could not be read ({path}): {exc}") from None


def file_sha256(path: str | os.PathLike[str]) -> str:
    """SHA-256 (hex) of a curves file's bytes (InputError if it cannot be read)."""
    return hashlib.sha256(_read_bytes(Path(path))).hexdigest()


_NOISE_MIN_ROWS = 12


class TabulatedCurves(DeviceCurves):
    """A(s), B(s) interpolated from a table by splines of odd degree (default quintic).

    Parameters
    ----------
    s, A_ghz, B_ghz : array_like
        The table (validated: finite, s strictly increasing from 0 to 1, A, B >= 0).
    source : str
        Where the table came from (for messages and metadata).
    degree : int
        Odd spline degree 3, 5, 7 or 9; the curves are C^(degree - 1).

    Attributes
    ----------
    continuity : int
        ``degree - 1``.
    warnings : tuple of str
        Data-quality warnings found when loading (coarse or noisy table).
    """

    def __init__(
        self,
        s: ArrayLike,
        A_ghz: ArrayLike,
        B_ghz: ArrayLike,
        *,
        source: str = "table",
        degree: int = 5,
    ) -> None:
        if degree not in (3, 5, 7, 9):
            raise ValueError(f"degree must be 3, 5, 7 or 9, got {degree!r}")
        self.source = source
        self.sha256: str | None = None  # of the file read by from_csv
        self.degree = int(degree)
        self.continuity = self.degree - 1
        field = f"device.curves ({Path(source).name})"
        self.s = np.array(s, dtype=float)
        self.values = np.column_stack([np.asarray(A_ghz, float), np.asarray(B_ghz, float)])
        if self.s.size < self.degree + 1:
            raise InputError(
                field,
                f"must have at least {self.degree + 1} rows for a degree-{self.degree} "
                f"spline, got {self.s.size}",
            )
        self._spline: BSpline = make_interp_spline(self.s, self.values, k=self.degree)
        self._check_nonnegative(field)
        self.warnings: tuple[str, ...] = tuple(self._coarse_warnings() + self._noise_warnings(2))

    # -- construction ----------------------------------------------------------
    @classmethod
    def from_csv(
        cls, path: str | os.PathLike[str], *, degree: int = 5, sha256: str | None = None
    ) -> TabulatedCurves:
        """Read and validate a curves CSV file (see the module docstring).

        Parameters
        ----------
        path : path-like
            The file (UTF-8, a byte-order mark is accepted).
        degree : int
            Spline degree.
        sha256 : str, optional
            The SHA-256 (hex) the file's bytes must have: the contents the study
            was made with (``DeviceSpec.curves_sha256``).

        Raises
        ------
        InputError
            Naming ``device.curves (FILE): line N, column C`` and the rule broken,
            or a file whose contents differ from ``sha256``.
        """
        p = Path(path)
        field = f"device.curves ({p.name})"
        data = _read_bytes(p)
        digest = hashlib.sha256(data).hexdigest()
        if sha256 is not None and digest != sha256:
            raise InputError(
                "device.curves",
                f"names a file whose contents changed since the spec was read ({p}: "
                f"SHA-256 {digest[:12]}, the study was made with {sha256[:12]}); a study's "
                "curves must not change: restore the file, or start a new study",
            )
        try:
            lines = data.decode("utf-8-sig").splitlines()
        except UnicodeDecodeError as exc:
            raise InputError("device.curves", f"could not be read ({p}): {exc}") from None
        order: list[int] | None = None
        rows: list[tuple[float, float, float]] = []
        first_line = last_line = 0
        for number, raw in enumerate(lines, start=1):
            line = raw.strip()
            if not line or line.startswith("#"):
                continue
            where = f"{field}: line {number}"
            cells = [c.strip() for c in line.split(",")]
            if order is None:
                if sorted(cells) != sorted(COLUMNS) or len(cells) != 3:
                    raise InputError(
                        where,
                        f"must be the header {','.join(COLUMNS)} (any order), got {_clip(line)}",
                    )
                order = [cells.index(name) for name in COLUMNS]
                continue
            if len(cells) != 3:
                raise InputError(where, f"must have 3 comma-separated numbers, got {len(cells)}")
            vals = []
            for name, col in zip(COLUMNS, order, strict=True):
                try:
                    v = float(cells[col])
                except ValueError:
                    raise InputError(
                        f"{where}, column {name}", f"must be a number, got {_clip(cells[col])}"
                    ) from None
                if not math.isfinite(v):
                    raise InputError(
                        f"{where}, column {name}", f"must be finite, got {_clip(cells[col])}"
                    )
                if name != "s" and abs(v) > MAX_CURVE_GHZ:
                    raise InputError(
                        f"{where}, column {name}",
                        f"must be at most {MAX_CURVE_GHZ:g} GHz, got {v:g}",
                    )
                vals.append(v)
            s_val, a_val, b_val = vals
            if not 0.0 <= s_val <= 1.0:
                raise InputError(f"{where}, column s", f"must lie in [0, 1], got {s_val!r}")
            if rows and s_val <= rows[-1][0]:
                raise InputError(
                    f"{where}, column s",
                    f"must increase strictly, got {s_val!r} after {rows[-1][0]!r}",
                )
            for name, v in (("A_ghz", a_val), ("B_ghz", b_val)):
                if v < 0.0:
                    raise InputError(f"{where}, column {name}", f"must be >= 0, got {v!r}")
            if not rows:
                first_line = number
            last_line = number
            rows.append((s_val, a_val, b_val))
        if order is None:
            raise InputError(field, f"has no header line {','.join(COLUMNS)}")
        if not rows:
            raise InputError(field, "has no data rows")
        if rows[0][0] != 0.0:
            raise InputError(
                f"{field}: line {first_line}, column s",
                f"must start the table at s = 0 exactly, got {rows[0][0]!r}",
            )
        if rows[-1][0] != 1.0:
            raise InputError(
                f"{field}: line {last_line}, column s",
                f"must end the table at s = 1 exactly, got {rows[-1][0]!r}",
            )
        table = np.array(rows)
        if not np.any(table[-1, 1:] > 0.0):
            raise InputError(
                f"{field}: line {last_line}",
                "must not have A_ghz = B_ghz = 0 at s = 1: H(1) would vanish, and with it "
                "the final state the anneal aims at",
            )
        curves = cls(table[:, 0], table[:, 1], table[:, 2], source=str(p), degree=degree)
        curves.sha256 = digest
        return curves

    # -- checks ------------------------------------------------------------------
    def _fine_grid(self, per: int = 16) -> NDArray[np.float64]:
        frac = np.arange(per) / per
        inner = (self.s[:-1, None] + np.diff(self.s)[:, None] * frac[None, :]).ravel()
        return np.append(inner, 1.0)

    def _check_nonnegative(self, field: str) -> None:
        grid = self._fine_grid()
        vals = self._spline(grid)
        for c, name in enumerate(COLUMNS[1:]):
            scale = max(float(np.max(np.abs(self.values[:, c]))), 1e-300)
            i = int(np.argmin(vals[:, c]))
            if vals[i, c] < -1e-12 * scale:
                j = int(np.searchsorted(self.s, grid[i], side="right")) - 1
                j = min(max(j, 0), self.s.size - 2)
                raise InputError(
                    field,
                    f"column {name}: the degree-{self.degree} interpolant dips below 0 (to "
                    f"{vals[i, c]:.3g} GHz near s = {grid[i]:.6g}) between the rows at s = "
                    f"{self.s[j]:.6g} and s = {self.s[j + 1]:.6g}; the table is too coarse "
                    "there: add rows",
                )

    def _coarse_warnings(self) -> list[str]:
        if self.degree == 3 or self.s.size < 4:
            return []
        mid = 0.5 * (self.s[:-1] + self.s[1:])
        cubic = make_interp_spline(self.s, self.values, k=3)
        diff = np.abs(self._spline(mid) - cubic(mid))
        out = []
        for c, name in enumerate(COLUMNS[1:]):
            span = float(np.ptp(self.values[:, c])) or 1.0
            i = int(np.argmax(diff[:, c]))
            if diff[i, c] > COARSE_RTOL * span:
                out.append(
                    f"{name}: the table is too coarse between s = {self.s[i]:.6g} and "
                    f"{self.s[i + 1]:.6g} (degree-{self.degree} and cubic interpolants differ "
                    f"by {diff[i, c]:.3g} GHz, {diff[i, c] / span:.2g} of the range): add rows"
                )
        return out

    def _noise_warnings(self, order: int) -> list[str]:
        if order > self.degree or self.s.size < _NOISE_MIN_ROWS:
            return []
        mid = 0.5 * (self.s[:-1] + self.s[1:])
        d = self._spline(mid, nu=order)
        out = []
        for c, name in enumerate(COLUMNS[1:]):
            sign = np.sign(d[:, c])
            sign = sign[sign != 0]
            changes = int(np.count_nonzero(sign[1:] != sign[:-1]))
            if changes > max(4, _NOISE_FRACTION * mid.size):
                out.append(
                    f"{name}: the interpolant's derivative of order {order} changes sign "
                    f"{changes} times over {mid.size} intervals: the table is too noisy (or "
                    f"too coarse) for derivatives of order {order}; smooth it or fit a "
                    "smooth model"
                )
        return out

    def smoothness_warnings(self, k_end: float) -> list[str]:
        """Warnings for a schedule with ``k_end`` vanishing end derivatives.

        Parameters
        ----------
        k_end : float
            Designed flatness order at the end of the anneal.

        Returns
        -------
        list of str
            Empty if the curves are at least C^(ceil(k_end) + 1) and the table
            is smooth enough for derivatives of that order; otherwise plain
            statements of what falls short.
        """
        need = math.ceil(k_end) + 1
        out = list(self.warnings)
        if self.continuity < need:
            out.append(
                f"the curves are C^{self.continuity} (degree-{self.degree} spline) but "
                f"k_end = {k_end:g} needs derivatives of H up to order {need}: use a spline "
                f"of degree >= {need + 1 if need % 2 == 0 else need + 2}"
            )
        out.extend(w for w in self._noise_warnings(min(need, self.continuity)) if w not in out)
        return out

    # -- DeviceCurves interface -------------------------------------------------------
    def _derivatives(self, s: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        out = np.zeros((2, order + 1, s.size))
        for n in range(min(order, self.degree) + 1):
            out[:, n, :] = self._spline(s, nu=n).T
        return out

    def describe(self) -> dict[str, Any]:
        return {
            "curves": "table",
            "source": self.source,
            "sha256": self.sha256,
            "rows": int(self.s.size),
            "interpolation": f"degree-{self.degree} spline (C^{self.continuity})",
        }


def _clip(value: object, limit: int = 60) -> str:
    """``repr(value)`` cut to ``limit`` characters (for messages)."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."
