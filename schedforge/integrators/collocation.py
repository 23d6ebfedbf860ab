"""Radau IIA collocation on the unit interval, with the Levin extension.

The eigenframe integrator takes every step on the m Radau IIA nodes (Hairer &
Wanner, *Solving ODEs II*, 1996) plus the step's start, which the Levin
collocation of fast coherences also uses (Levin, Math. Comp. 38, 531, 1982).
:func:`collocation_scheme` builds the nodes and matrices once per m.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numpy.polynomial import legendre
from numpy.typing import NDArray

__all__ = ["DEFAULT_STAGES", "CollocationScheme", "collocation_scheme", "lagrange_weights"]

#: Collocation stages per step (Radau IIA of order 2m - 1).
DEFAULT_STAGES = 8


@dataclass(frozen=True)
class CollocationScheme:
    """Nodes and matrices of one step, on the unit interval.

    Attributes
    ----------
    c : ndarray
        The m Radau IIA nodes in (0, 1], last one 1.
    tau : ndarray
        ``[0, c_1, ..., c_m]``, the m + 1 nodes of the Levin collocation.
    A : ndarray
        Radau IIA matrix, ``A[i, j] = int_0^{c_i} l_j``.
    D : ndarray
        Differentiation matrix on ``tau`` (polynomials of degree m).
    w : ndarray
        Quadrature weights on ``tau`` for the integral over [0, 1].
    Acum : ndarray
        ``Acum[i, j] = int_0^{tau_i} L_j`` with L_j the Lagrange basis on ``tau``.
    tail : ndarray
        Row vector giving the highest Legendre coefficient of the interpolant
        on ``tau`` (the error indicator).
    """

    c: NDArray[np.float64]
    tau: NDArray[np.float64]
    A: NDArray[np.float64]
    D: NDArray[np.float64]
    w: NDArray[np.float64]
    Acum: NDArray[np.float64]
    tail: NDArray[np.float64]


def lagrange_weights(nodes: NDArray[np.float64], t: NDArray[np.float64]) -> NDArray[np.float64]:
    """``out[i, j] = l_j(t_i)``: the Lagrange basis on ``nodes`` evaluated at ``t``."""
    nodes = np.asarray(nodes, dtype=float)
    t = np.asarray(t, dtype=float)
    diff = t[:, None, None] - nodes[None, None, :]  # [i, j, k] = t_i - x_k
    denom = nodes[:, None] - nodes[None, :]  # [j, k] = x_j - x_k
    eye = np.eye(nodes.size, dtype=bool)
    num = np.where(eye[None], 1.0, diff)
    return np.prod(num / np.where(eye, 1.0, denom)[None], axis=2)


def _lagrange_integrals(nodes: NDArray[np.float64], upper: NDArray[np.float64]) -> NDArray:
    """``out[i, j] = int_0^{upper_i} l_j(t) dt`` for the Lagrange basis on ``nodes``."""
    n = nodes.size
    out = np.zeros((upper.size, n))
    for j in range(n):
        others = np.delete(nodes, j)
        poly = np.poly1d(np.poly(others)) / np.prod(nodes[j] - others)
        prim = np.polyint(poly)
        out[:, j] = prim(upper) - prim(0.0)
    return out


@lru_cache(maxsize=8)
def collocation_scheme(m: int = DEFAULT_STAGES) -> CollocationScheme:
    """Build the collocation scheme with ``m`` Radau IIA stages."""
    # Radau IIA nodes: zeros of P_m(2c - 1) - P_(m-1)(2c - 1)
    coef = np.zeros(m + 1)
    coef[m] = 1.0
    coef[m - 1] = -1.0
    roots = np.sort(np.real(legendre.legroots(coef)))
    c = (roots + 1.0) / 2.0
    c[-1] = 1.0
    tau = np.concatenate([[0.0], c])
    A = _lagrange_integrals(c, c)
    Acum = _lagrange_integrals(tau, tau)
    w = _lagrange_integrals(tau, np.array([1.0]))[0]
    # differentiation matrix on tau
    n = tau.size
    D = np.zeros((n, n))
    for j in range(n):
        others = np.delete(tau, j)
        poly = np.poly1d(np.poly(others)) / np.prod(tau[j] - others)
        D[:, j] = np.polyder(poly)(tau)
    # highest Legendre coefficient of the interpolant through tau
    V = legendre.legvander(2.0 * tau - 1.0, n - 1)
    tail = np.linalg.inv(V)[-1]
    return CollocationScheme(c=c, tau=tau, A=A, D=D, w=w, Acum=Acum, tail=tail)
