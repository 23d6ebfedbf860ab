"""Device energy curves A(s) and B(s) (E/h in GHz): the interface and the linear curves.

H(s) = -(A(s)/2) sum_i X_i + (B(s)/2) H_problem.  A curve set evaluates A, B and
their derivatives in s exactly (closed forms or piecewise polynomials), so that
the Hamiltonian stays as smooth as the schedule demands.  Tabulated curves live in
:mod:`schedforge.device_table`; :func:`schedforge.device.make_device_curves` builds
either from a :class:`~schedforge.spec_model.DeviceSpec`.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = ["DeviceCurves", "LinearCurves"]


class DeviceCurves(ABC):
    """A(s) and B(s) with derivatives.

    Attributes
    ----------
    continuity : int or None
        The curves are C^continuity in s; ``None`` means infinitely smooth.
    """

    continuity: int | None = None

    def derivatives(self, s: ArrayLike, order: int) -> NDArray[np.float64]:
        """A, B and their s-derivatives up to ``order``.

        Returns
        -------
        ndarray
            Shape ``(2, order + 1) + np.shape(s)``: ``[0, n]`` is d^n A / ds^n and
            ``[1, n]`` is d^n B / ds^n, in GHz.
        """
        sa = np.asarray(s, dtype=float)
        out = self._derivatives(np.atleast_1d(sa).ravel(), int(order))
        return out.reshape((2, order + 1, *sa.shape))

    def A(self, s: ArrayLike) -> NDArray[np.float64]:
        """Driver energy A(s) in GHz."""
        return self.derivatives(s, 0)[0, 0]

    def B(self, s: ArrayLike) -> NDArray[np.float64]:
        """Problem energy B(s) in GHz."""
        return self.derivatives(s, 0)[1, 0]

    @abstractmethod
    def _derivatives(self, s: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        """Return shape (2, order + 1, s.size) for a flat float array s."""

    @abstractmethod
    def describe(self) -> dict[str, Any]:
        """Metadata for headers and reports."""


class LinearCurves(DeviceCurves):
    """A(s) = A0 (1 - s), B(s) = B0 s."""

    continuity = None

    def __init__(self, A0_ghz: float, B0_ghz: float) -> None:
        for name, v in (("A0_ghz", A0_ghz), ("B0_ghz", B0_ghz)):  # the spec: check_device
            if not (np.isfinite(v) and v > 0):
                raise ValueError(f"{name} must be a finite number > 0, got {v!r}")
        self.A0_ghz = float(A0_ghz)
        self.B0_ghz = float(B0_ghz)

    def _derivatives(self, s: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        out = np.zeros((2, order + 1, s.size))
        out[0, 0] = self.A0_ghz * (1.0 - s)
        out[1, 0] = self.B0_ghz * s
        if order >= 1:
            out[0, 1] = -self.A0_ghz
            out[1, 1] = self.B0_ghz
        return out

    def describe(self) -> dict[str, Any]:
        return {"curves": "linear", "A0_ghz": self.A0_ghz, "B0_ghz": self.B0_ghz}
