"""The reference integrator: adaptive explicit Runge-Kutta in x = t / tf.

Registered as ``"general"`` (and as ``"closed"``, which accepts only closed
systems).  Correctness first: it follows every oscillation of the coherences,
so its cost grows linearly with tf.

Open system (and closed system started in a Gibbs state).  We integrate the
deviation from the instantaneous target ``delta(x) = rho(x) - sigma(s(x))``,

    d delta / dx = tf L(s) delta - f'(x) d sigma / ds,

which holds because ``L(s) sigma(s) = 0`` (Gibbs state of a Davies generator;
any function of H(s) for ``-i [H, .]``).  A closed system integrates against the
Gibbs state of H(s) at its initial temperature (so delta(0) = 0 from a Gibbs start,
and sigma(s) stays smooth where the lowest level of H(s) splits, as it does at s = 0
within the odd parity sector), and the end adds ``sigma(1) - target``; without a
temperature (a custom start), against the ground projector.  ``d sigma / ds`` is exact, from the
eigen-decomposition of H(s) (Daleckii-Krein divided differences), so the solver's
absolute tolerance applies directly to the small quantity whose norm is the
reported error.  The state is the complex d x d matrix delta in the
computational basis; each right-hand side costs one ``eigh`` of H(s) and a few
d x d products.

With a conserved quantity (:mod:`.conserved`) both run sector by sector.

Closed system started in the ground state.  We integrate the Schrodinger
equation for the deviation ``chi`` of ``psi = exp(-i theta) (g(s) + chi)``
from the instantaneous ground state ``g(s)`` (real, sign fixed by the
Perron-Frobenius property of this stoquastic H: positive component sum; parallel
transport gauge), with the dynamical phase removed:

    d chi / dx = -i tf (H - E_0) chi - f'(x) d g / ds.

Solver: SciPy's ``solve_ivp`` with DOP853 (Dormand-Prince 8(5,3); Hairer,
Norsett and Wanner, Solving ODEs I, 1993).  Segments end exactly on the
schedule's knots (and on knots of tabulated device curves).  Default
tolerances: ``rtol = 1e-10``, ``atol = 1e-14``; measured accuracy is in
``benchmarks/RESULTS.md`` and ``tests/test_dynamics_validation.py``.
"""

from __future__ import annotations

import itertools
import warnings
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from ..davies import DaviesGenerator, eigen_decomposition
from ..errors import InputError
from ..progress import report_anneal_progress
from ..schedules import Schedule
from ..system import System
from .base import IntegrationOutcome, register_integrator
from .conserved import integrate_by_sector

__all__ = ["integrate_closed", "integrate_general", "segment_boundaries"]

METHOD = "DOP853"


def segment_boundaries(system: System, schedule: Schedule) -> list[float]:
    """Points of x in [0, 1] where the right-hand side is only finitely smooth.

    The schedule's ``knots`` and the x images of any ``knots`` in s of the device
    curves, with 0 and 1.
    """
    points = {0.0, 1.0}
    points.update(float(k) for k in getattr(schedule, "knots", ()) if 0.0 < k < 1.0)
    for sk in getattr(system.hamiltonian.curves, "knots", ()) or ():
        sk = float(sk)
        if not 0.0 < sk < 1.0:
            continue
        try:
            points.add(
                float(brentq(lambda x, sk=sk: float(schedule(x)) - sk, 0.0, 1.0, xtol=1e-15))
            )
        except ValueError:
            continue
    return sorted(points)


def _run_segments(
    rhs: Any, y0: NDArray[Any], bounds: list[float], rtol: float, atol: float
) -> tuple[NDArray[Any] | None, dict[str, Any], str]:
    y = y0
    steps = 0
    nfev = 0

    def tracked(x: float, y: NDArray[Any]) -> NDArray[Any]:
        report_anneal_progress(x)
        return rhs(x, y)

    for a, b in itertools.pairwise(bounds):
        if b <= a:
            continue
        with warnings.catch_warnings():
            # a failing solve (nan/inf in the state) is reported below, not as warnings
            warnings.simplefilter("ignore", RuntimeWarning)
            sol = solve_ivp(tracked, (a, b), y, method=METHOD, rtol=rtol, atol=atol)
        steps += max(len(sol.t) - 1, 0)
        nfev += int(sol.nfev)
        if sol.status != 0 or not np.all(np.isfinite(sol.y[:, -1])):
            stats = {
                "steps": steps,
                "rhs_evaluations": nfev,
                "segments": len(bounds) - 1,
                "solver": METHOD,
                "failed_at_x": float(sol.t[-1]) if len(sol.t) else a,
            }
            return (
                None,
                stats,
                f"{METHOD} failed near x = {stats['failed_at_x']:.6g}: {sol.message}",
            )
        y = sol.y[:, -1]
    return (
        y,
        {"steps": steps, "rhs_evaluations": nfev, "segments": len(bounds) - 1, "solver": METHOD},
        "",
    )


def _schedule_point(schedule: Schedule, x: float) -> tuple[float, float]:
    fd = schedule.derivatives(np.array([min(max(x, 0.0), 1.0)]), 1)[:, 0]
    return min(max(float(fd[0]), 0.0), 1.0), float(fd[1])


def integrate_general(
    system: System, schedule: Schedule, tf_ns: float, *, rtol: float = 1e-10, atol: float = 1e-14
) -> IntegrationOutcome:
    """Integrate one anneal (any system) and return rho(tf) - sigma(1).

    Parameters
    ----------
    system : System
    schedule : Schedule
    tf_ns : float
        Anneal time (ns).
    rtol, atol : float
        Tolerances of the adaptive solver, applied to the deviation from the
        instantaneous target.
    """
    if system.closed and system.initial == "ground":
        return integrate_closed(system, schedule, tf_ns, rtol=rtol, atol=atol)
    by_sector = integrate_by_sector(
        integrate_general, system, schedule, tf_ns, rtol=rtol, atol=atol
    )
    if by_sector is not None:  # a conserved quantity: each sector from its own Gibbs state
        return by_sector
    d = system.dim
    ham = system.hamiltonian
    bath = system.bath
    # the reference sigma(s): the target's kind (open), the initial Gibbs state's (closed)
    beta = system.beta if system.closed else system.target_beta
    tol = system.degeneracy_tol

    def rhs(x: float, y: NDArray[Any]) -> NDArray[Any]:
        s, fp = _schedule_point(schedule, x)
        h, dh = ham.matrix_and_derivative(s)
        eig = eigen_decomposition(h, tol)
        gen = DaviesGenerator(eig, bath, bohr_tol=tol)
        delta_e = eig.to_eigen(y.reshape(d, d))
        out = tf_ns * gen.apply_eigen(delta_e)
        if fp != 0.0:
            out -= fp * eig.target_derivative_eigen(eig.to_eigen(dh), beta)
        return eig.from_eigen(out).reshape(-1)

    delta0 = system.initial_state() - system.eigen(0.0).target_state(beta)
    y, stats, message = _run_segments(
        rhs, delta0.astype(complex).reshape(-1), segment_boundaries(system, schedule), rtol, atol
    )
    stats["integrator"] = "general"
    stats["state"] = "density-matrix deviation"
    if y is None:
        return IntegrationOutcome.failure(d, message, stats)
    target = system.target_state()
    dev = y.reshape(d, d)
    if beta != system.target_beta:  # closed: from the reference at s = 1 to the target
        dev = dev + (system.eigen(1.0).target_state(beta) - target)
    dev = 0.5 * (dev + dev.conj().T)
    stats["trace_error"] = float(abs(np.trace(dev)))
    rho = target + dev
    return IntegrationOutcome(dev, rho, "ok", "", stats)


def _ground_vector(eig: Any) -> NDArray[np.float64]:
    g = np.real(eig.vectors[:, 0])
    total = float(np.sum(g))
    if total == 0.0:
        total = float(g[np.argmax(np.abs(g))])
    return g if total > 0 else -g


def integrate_closed(
    system: System, schedule: Schedule, tf_ns: float, *, rtol: float = 1e-10, atol: float = 1e-14
) -> IntegrationOutcome:
    """Closed-system anneal.  Ground start: Schrodinger deviation; Gibbs start: von Neumann.

    Raises ``InputError`` for an open system.
    """
    if not system.closed:
        raise InputError(
            "numerics.integrator", '"closed" needs a closed system (bath spectrum = "none")'
        )
    if system.initial != "ground":
        out = integrate_general(system, schedule, tf_ns, rtol=rtol, atol=atol)
        out.stats["integrator"] = "closed"
        return out
    by_sector = integrate_by_sector(integrate_closed, system, schedule, tf_ns, rtol=rtol, atol=atol)
    if by_sector is not None:  # a conserved quantity: each sector from its own ground state
        return by_sector
    d = system.dim
    ham = system.hamiltonian
    tol = system.degeneracy_tol

    def rhs(x: float, y: NDArray[Any]) -> NDArray[Any]:
        s, fp = _schedule_point(schedule, x)
        h, dh = ham.matrix_and_derivative(s)
        eig = eigen_decomposition(h, tol)
        out = -1j * tf_ns * (h @ y - eig.energies[0] * y)
        if fp != 0.0:
            g = _ground_vector(eig)
            v = eig.vectors
            coef = v.T @ (dh @ g)
            denom = eig.energies[0] - eig.energies
            coef[0] = 0.0
            coef[1:] /= denom[1:]
            out -= fp * (v @ coef)
        return out

    y, stats, message = _run_segments(
        rhs, np.zeros(d, dtype=complex), segment_boundaries(system, schedule), rtol, atol
    )
    stats["integrator"] = "closed"
    stats["state"] = "wavefunction deviation"
    if y is None:
        return IntegrationOutcome.failure(d, message, stats)
    g = _ground_vector(system.eigen(1.0)).astype(complex)
    overlap = np.vdot(g, y)
    perp = y - overlap * g
    c = 1.0 + overlap
    perp2 = float(np.real(np.vdot(perp, perp)))
    norm2 = abs(c) ** 2 + perp2
    stats["norm_error"] = abs(norm2 - 1.0)
    dev = (
        -perp2 * np.outer(g, g.conj())
        + c * np.outer(g, perp.conj())
        + np.conj(c) * np.outer(perp, g.conj())
        + np.outer(perp, perp.conj())
    ) / norm2
    rho = np.outer(g, g.conj()) + dev
    return IntegrationOutcome(dev, rho, "ok", "", stats)


def _closed_only(
    system: System, schedule: Schedule, tf_ns: float, *, rtol: float = 1e-10, atol: float = 1e-14
) -> IntegrationOutcome:
    return integrate_closed(system, schedule, tf_ns, rtol=rtol, atol=atol)


register_integrator("general", integrate_general)
register_integrator("closed", _closed_only)
