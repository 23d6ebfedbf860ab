"""The leading coefficient C_k of the error law, from the final generator alone.

For a time-dependent master equation ``drho/dt = L(s(t/tf)) rho`` with a unique
instantaneous steady state ``sigma(s)``, the adiabatic expansion in the
dimensionless time x = t / tf (Phys. Rev. A 93, 032118 (2016), arXiv:1508.05558)
reads ``rho = sigma + sum_(n>=1) tf^-n rho_n`` with

    rho_1 = L^+ dsigma/dx,    rho_(n+1) = L^+ d rho_n / dx,

where ``L^+`` is the inverse of ``L`` on traceless operators (the sign follows
from ``d rho/dx = tf L rho``: order tf^(1-n) gives ``L rho_n = d rho_(n-1)/dx``).
If the schedule s = f(x) is flat to order k at the end (f', ..., f^(k) vanish
at x = 1), every term of ``rho_n(1)`` with n <= k carries a vanishing derivative
of f, and the only surviving term of ``rho_(k+1)(1)`` is the one where all k+1
derivatives act on sigma through f^(k+1):

    rho(tf) - sigma(1) ~ tf^-(k+1) (L_1^+)^(k+1) f^(k+1)(1) dsigma/ds(1)

in the equilibrated regime (the boundary layer from the initial state has
decayed; end-boundary version: Phys. Rev. A 98, 022315 (2018),
arXiv:1806.06310).  The trace distance therefore falls as ``C_k tf^-(k+1)`` with

    C_k = || (L_1^+)^(k+1) dsigma/ds(1) ||_1 |f^(k+1)(1)| / 2,

``L_1`` in rad/ns and tf in ns, so C_k is in ns^(k+1).  No time integration is
needed: only ``L(1)``, ``sigma(1)`` and ``dsigma/ds(1)``.

``dsigma/ds(1)`` is taken by a one-sided finite difference of high order
(:data:`FD_ORDER` nodes s = 1, 1 - h, ..., Fornberg weights), since the
schedule ends at s = 1 and the device curves need not exist beyond it.

``L^+`` is applied through the invertible matrix ``M = L + |sigma><1|`` (where
``<1|`` is the trace functional): for traceless ``Y``, ``X = M^-1 Y`` is the
unique traceless solution of ``L X = Y``.  ``M`` is singular exactly when the
steady state is not unique; that case is reported, not hidden.

The expansion needs ``L(s)`` smooth near the end.  Where levels or Bohr frequencies
that coincide at s = 1 part before it (zero fields and uniform couplings: the
vanishing driver splits the classical levels as A(s) -> 0), the Davies generator
groups them at s = 1 and not just before.  L(1)'s coefficient is then still the
asymptotic one, but anneals whose last relaxation times fall where the levels have
parted show the parted generator's instead, up to a crossover in tf.  A 4-qubit
zero-field ring (tests/conftest.py), k_end 1: 0.2924 ns^2 from L(1 - 1e-5), 0.3743
from L(1); simulated 0.303, 0.295, 0.306, 0.348, 0.3735, 0.3742 at tf = 1e3, 1e4,
3e4, 1e5, 3e5, 1e6 ns (k_end 2: 17.8 and 25.6; simulated 18.1 at 1e3 ns, 25.6 from
3e4 ns on).  Such an end (:func:`parting_at_end`) keeps L(1)'s coefficient and
carries the parted one (``coefficient_parted``) when the two differ by more than
:data:`PARTED_RTOL`, with a message that says so; the fits name it where the points
follow it.

Limits: the generator is a dense ``d^2 x d^2`` matrix, so the prediction is
offered up to :data:`MAX_DIM` levels; schedules whose first non-vanishing end
derivative is infinite (``beta`` with non-integer k) or that are flat to every
order (``gevrey``) have no such coefficient, and the result says so.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import linalg

from .davies import bohr_groups
from .metrics import trace_norm
from .schedules import Schedule

__all__ = [
    "FD_ORDER",
    "MAX_DIM",
    "PARTED_RTOL",
    "PARTING_PROBES",
    "PLATEAU_RTOL",
    "Prediction",
    "one_sided_derivative",
    "parting_at_end",
    "predict_from_generator",
    "predicted_coefficient",
    "trace_norm",
    "traceless_inverse",
]

#: Number of nodes of the one-sided finite difference for dsigma/ds(1).
FD_ORDER: int = 7
#: Default step of that finite difference.
FD_STEP: float = 2e-3
#: Largest Hilbert-space dimension for which the dense generator is used.
MAX_DIM: int = 32
#: Reciprocal condition number below which the steady state is declared not unique.
RCOND_MIN: float = 1e-13
#: Distances 1 - s at which the grouping of levels and Bohr frequencies is compared with
#: the one at s = 1 (:func:`parting_at_end`): splittings of first order in 1 - s show at
#: the smallest, second-order ones (two driver flips) by 1e-3.
PARTING_PROBES: tuple[float, ...] = (1e-5, 1e-4, 1e-3)
#: The parted generator's coefficient is reported when it differs from L(1)'s by more
#: than this (half the fits' coefficient tolerance): smaller differences are the
#: generator's smooth drift over the probe distance (a uniform 3-qubit chain with
#: fields: 1.4 % at 1 - s = 1e-3, 0.12 % at 1e-4), not a different law.
PARTED_RTOL: float = 0.05
#: ... and when the parted generator's coefficient stays within this between the probe
#: distance and twice it (a plateau that anneals can show).
PLATEAU_RTOL: float = 0.01


@dataclass(frozen=True)
class Prediction:
    """Predicted leading coefficient of the error law err ~ C tf^-(k+1).

    Attributes
    ----------
    coefficient : float
        C_k in ns^(k+1) (nan when not available).
    k : int
        Flatness order used (the first non-vanishing end derivative is k + 1).
    end_derivative : float
        f^(k+1)(1).
    status : str
        ``"ok"`` or ``"not available"``.
    message : str
        Why the prediction is not available, or a short description.
    leading_deviation : ndarray or None
        The operator ``(L_1^+)^(k+1) f^(k+1)(1) dsigma/ds(1)`` (d x d): the
        predicted ``tf^(k+1) (rho(tf) - sigma(1))``.
    liouvillian_gap : float
        Smallest |Re| of the non-zero eigenvalues of L_1 (rad/ns), nan if unknown.
    coefficient_parted : float
        Where levels that coincide at s = 1 part just before it (:func:`parting_at_end`)
        and the generator there gives a coefficient more than :data:`PARTED_RTOL` away:
        that coefficient, which anneals below a crossover in tf show; else nan.
    """

    coefficient: float
    k: int
    end_derivative: float
    status: str
    message: str
    leading_deviation: NDArray[np.complex128] | None = field(default=None, repr=False)
    liouvillian_gap: float = math.nan
    coefficient_parted: float = math.nan

    @property
    def ok(self) -> bool:
        """True when a coefficient is available."""
        return self.status == "ok"

    def error_at(self, tf_ns: float) -> float:
        """Predicted trace distance C_k tf^-(k+1) at anneal time ``tf_ns``."""
        return self.coefficient * float(tf_ns) ** -(self.k + 1)

    def tf_for_error(self, eps: float) -> float:
        """Anneal time (ns) at which the predicted error equals ``eps``."""
        return (self.coefficient / float(eps)) ** (1.0 / (self.k + 1))


def _vec(a: NDArray[Any]) -> NDArray[Any]:
    """Column-stacking vec."""
    return np.asarray(a).reshape(-1, order="F")


def _unvec(v: NDArray[Any], d: int) -> NDArray[Any]:
    return np.asarray(v).reshape((d, d), order="F")


def traceless_inverse(
    generator: NDArray[Any], sigma: NDArray[Any]
) -> Callable[[NDArray[Any]], NDArray[Any]]:
    """The map ``Y -> X`` with ``L X = Y`` and ``tr X = 0`` for traceless ``Y``.

    Parameters
    ----------
    generator : ndarray
        ``L`` as a ``d^2 x d^2`` superoperator (column-stacking vec).
    sigma : ndarray
        Its steady state (d x d, unit trace).

    Returns
    -------
    callable
        Acts on d x d operators.

    Raises
    ------
    ValueError
        When ``L + |sigma><1|`` is singular to working precision: the steady
        state is not unique.
    """
    n = generator.shape[0]
    d = math.isqrt(n)
    if d * d != n or generator.shape != (n, n):
        raise ValueError(f"generator must be d^2 x d^2, got {generator.shape}")
    trace_row = _vec(np.eye(d)).astype(complex)
    m = np.asarray(generator, dtype=complex) + np.outer(_vec(sigma), trace_row)
    with warnings.catch_warnings():
        # A singular M is reported below through its condition number.
        warnings.simplefilter("ignore", linalg.LinAlgWarning)
        lu = linalg.lu_factor(m, check_finite=True)
    with np.errstate(divide="ignore"):
        rcond = 1.0 / np.linalg.cond(m, 1)
    if not np.isfinite(rcond) or rcond < RCOND_MIN:
        raise ValueError(
            f"the generator's steady state is not unique (reciprocal condition number "
            f"{rcond:.1e} of L + |sigma><1|)"
        )

    def apply(y: NDArray[Any]) -> NDArray[Any]:
        return _unvec(linalg.lu_solve(lu, _vec(y).astype(complex)), d)

    return apply


def fornberg_weights(nodes: NDArray[np.float64], x0: float, order: int) -> NDArray[np.float64]:
    """Finite-difference weights for the ``order``-th derivative at ``x0``.

    Fornberg's algorithm (B. Fornberg, Math. Comp. 51, 699 (1988)).
    """
    n = len(nodes)
    c = np.zeros((n, order + 1))
    c1 = 1.0
    c4 = nodes[0] - x0
    c[0, 0] = 1.0
    for i in range(1, n):
        mn = min(i, order)
        c2 = 1.0
        c5 = c4
        c4 = nodes[i] - x0
        for j in range(i):
            c3 = nodes[i] - nodes[j]
            c2 *= c3
            if j == i - 1:
                for k in range(mn, 0, -1):
                    c[i, k] = c1 * (k * c[i - 1, k - 1] - c5 * c[i - 1, k]) / c2
                c[i, 0] = -c1 * c5 * c[i - 1, 0] / c2
            for k in range(mn, 0, -1):
                c[j, k] = (c4 * c[j, k] - k * c[j, k - 1]) / c3
            c[j, 0] = c4 * c[j, 0] / c3
        c1 = c2
    return c[:, order]


def one_sided_derivative(
    func: Callable[[float], NDArray[Any]],
    s: float = 1.0,
    *,
    step: float = FD_STEP,
    n_nodes: int = FD_ORDER,
) -> NDArray[Any]:
    """d func / ds at ``s`` from the left: nodes s, s - h, ..., s - (n-1) h.

    The truncation error is O(h^(n-1)); with the defaults (h = 2e-3, 7 nodes) it
    is ~1e-16 times the 7th derivative's scale, below the rounding error
    (~1e-16 / h).
    """
    nodes = s - step * np.arange(n_nodes, dtype=float)
    w = fornberg_weights(nodes, s, 1)
    return sum(wi * np.asarray(func(float(si))) for wi, si in zip(w, nodes, strict=True))


def _end_order(schedule: Schedule) -> tuple[int, float, str]:
    """(k, f^(k+1)(1), problem) for the schedule's end; problem is "" when fine."""
    k_design = schedule.k_end  # linear: 0 (nothing is flat); gevrey: inf
    if math.isinf(float(k_design)):
        return 0, 0.0, f"a {schedule.family} schedule is flat to every order: no power law, no C_k"
    if not math.isfinite(float(k_design)) or float(k_design) != int(k_design):
        return (
            0,
            math.nan,
            f"k_end = {k_design} is not an integer: f^(k+1)(1) is infinite and the "
            "coefficient involves a fractional power of L_1 (not computed)",
        )
    k = int(k_design)
    d = schedule.derivatives(np.array([1.0]), k + 1)[:, 0]
    scale = max(1.0, float(np.max(np.abs(d[: k + 2]))))
    lower = d[1 : k + 1]
    if lower.size and np.max(np.abs(lower)) > 1e-9 * scale:
        j = int(np.argmax(np.abs(lower) > 1e-9 * scale)) + 1
        return (
            k,
            math.nan,
            f"the schedule is not flat to order {k} at the end (f^({j})(1) = {lower[j - 1]:.3g})",
        )
    fk1 = float(d[k + 1])
    if not math.isfinite(fk1) or fk1 == 0.0:
        return k, fk1, f"f^({k + 1})(1) = {fk1}: the leading term is not of order tf^-{k + 1}"
    return k, fk1, ""


def predict_from_generator(
    generator: Callable[[float], NDArray[Any]],
    steady_state: Callable[[float], NDArray[Any]],
    schedule: Schedule,
    *,
    dsigma_ds: NDArray[Any] | None = None,
    fd_step: float = FD_STEP,
) -> Prediction:
    """Predicted C_k from a generator ``L(s)`` and its steady state ``sigma(s)``.

    Parameters
    ----------
    generator : callable
        ``s -> L(s)``, a ``d^2 x d^2`` superoperator in rad/ns (column-stacking
        vec); only ``L(1)`` is used.
    steady_state : callable
        ``s -> sigma(s)`` (d x d); evaluated at s = 1 and at a few s < 1 for the
        derivative (unless ``dsigma_ds`` is given).
    schedule : Schedule
        The schedule; its end derivative f^(k+1)(1) enters.
    dsigma_ds : ndarray, optional
        dsigma/ds at s = 1 when known analytically.
    fd_step : float
        Step of the one-sided finite difference.

    Returns
    -------
    Prediction
    """
    k, fk1, problem = _end_order(schedule)
    if problem:
        return Prediction(math.nan, k, fk1, "not available", problem)
    l1 = np.asarray(generator(1.0))
    sigma1 = np.asarray(steady_state(1.0))
    evals = np.linalg.eigvals(l1)
    nonzero = np.sort(np.abs(evals.real))[1:]
    gap = float(nonzero[0]) if nonzero.size else math.nan
    try:
        inv = traceless_inverse(l1, sigma1)
    except ValueError as exc:
        return Prediction(math.nan, k, fk1, "not available", str(exc), liouvillian_gap=gap)
    ds = (
        np.asarray(dsigma_ds)
        if dsigma_ds is not None
        else one_sided_derivative(steady_state, 1.0, step=fd_step)
    )
    # Remove the trace of the difference quotient (zero up to rounding).
    d = ds.shape[0]
    x = ds - np.trace(ds) / d * np.eye(d)
    for _ in range(k + 1):
        x = inv(x)
    lead = fk1 * x
    coeff = 0.5 * trace_norm(lead)
    return Prediction(
        coefficient=coeff,
        k=k,
        end_derivative=fk1,
        status="ok",
        message=f"C_{k} = {coeff:.6g} ns^{k + 1} from L(1) (Liouvillian gap {gap:.3g} rad/ns)",
        leading_deviation=lead,
        liouvillian_gap=gap,
    )


def predicted_coefficient(system: Any, schedule: Schedule, **kwargs: Any) -> Prediction:
    """Predicted C_k for a :class:`schedforge.system.System` and a schedule.

    Uses ``system.generator(s)`` and ``system.steady_state(s)``; a closed system
    has no steady state to relax to, and systems above :data:`MAX_DIM` levels
    are refused (dense generator); both come back as ``"not available"``.
    Keyword arguments go to :func:`predict_from_generator`.
    """
    if getattr(system, "closed", False):
        k, fk1, _ = _end_order(schedule)
        return Prediction(
            math.nan,
            k,
            fk1,
            "not available",
            "closed system: no steady state to relax to; the error law is "
            "tf^-(min(k_start,k_end)+1) and its coefficient is not predicted",
        )
    dim = int(getattr(getattr(system, "hamiltonian", None), "dim", 0) or 0)
    if dim > MAX_DIM:
        k, fk1, _ = _end_order(schedule)
        return Prediction(
            math.nan,
            k,
            fk1,
            "not available",
            f"the prediction uses the dense d^2 x d^2 generator, offered up to d = {MAX_DIM} "
            f"(this system has d = {dim})",
        )
    pred = _predict(system, schedule, 0.0, **kwargs)
    eps = parting_at_end(system) if pred.ok else None
    if eps is None:
        return pred
    # the parted generator's coefficient, where it forms a plateau: the same grouping and
    # the same coefficient at twice the distance (else the generator drifts too fast
    # there to speak of one: the frustrated triangle's grows like 1 - s, and its anneals
    # go straight from a transient to L(1)'s value)
    parted = _predict(system, schedule, eps, **kwargs).coefficient
    same = _signature(system, 1.0 - 2.0 * eps) == _signature(system, 1.0 - eps)
    if not same or not abs(parted / pred.coefficient - 1.0) > PARTED_RTOL:
        return pred
    further = _predict(system, schedule, 2.0 * eps, **kwargs).coefficient
    if not abs(further / parted - 1.0) <= PLATEAU_RTOL:
        return pred
    return replace(
        pred,
        coefficient_parted=parted,
        message=(
            f"{pred.message}; levels or Bohr frequencies that coincide at s = 1 part before "
            f"the end (by s = 1 - {eps:g}), where the Davies generator stops grouping them: "
            f"anneals whose last relaxation times fall where they have parted show "
            f"C_{pred.k} = {parted:.4g} (from L(1 - {eps:g})) instead, up to a crossover in tf"
        ),
    )


def _populated_sectors(system: Any) -> list[Any]:
    """The sectors of a conserved quantity that the initial state populates (or none)."""
    return [p for p in getattr(system, "sector_parts", tuple)() if p.matters]


def _predict(system: Any, schedule: Schedule, eps: float, **kwargs: Any) -> Prediction:
    """C_k from the generator at ``1 - eps`` (``eps = 0``: L(1)), sector by sector."""
    parts = _populated_sectors(system)
    if parts:  # a conserved quantity: each sector's L_p(1) has a unique steady state
        return _sector_prediction(system, parts, schedule, eps, **kwargs)
    return predict_from_generator(
        lambda s: system.generator(s - eps),
        lambda s: system.steady_state(s - eps),
        schedule,
        **kwargs,
    )


def _sector_prediction(
    system: Any, parts: list[Any], schedule: Schedule, eps: float, **kwargs: Any
) -> Prediction:
    """C_k of a system with a conserved quantity: the sectors' leading terms, weighted.

    The state stays block diagonal in the sectors, each block relaxing to its own Gibbs
    state with the sector's generator, so the leading deviation is
    ``sum_p w_p U_p lead_p U_p^+`` with ``lead_p`` each sector's own.
    """
    preds = [(p, _predict(p.system, schedule, eps, **kwargs)) for p in parts]
    bad = [(p, q) for p, q in preds if q.status != "ok"]
    if bad:
        messages = "; ".join(f"{p.sector.name} sector: {q.message}" for p, q in bad)
        return replace(bad[0][1], message=messages)
    lead = sum(p.weight * p.sector.embed(q.leading_deviation) for p, q in preds)
    coeff = 0.5 * trace_norm(lead)
    gap = min(q.liouvillian_gap for _, q in preds)
    k, fk1 = preds[0][1].k, preds[0][1].end_derivative
    return Prediction(
        coeff,
        k,
        fk1,
        "ok",
        f"C_{k} = {coeff:.6g} ns^{k + 1} from the sectors' L_p(1) ({system.conserved.name} "
        f"conserved; smallest Liouvillian gap {gap:.3g} rad/ns)",
        leading_deviation=lead,
        liouvillian_gap=gap,
    )


def _signature(system: Any, s: float) -> tuple[Any, ...]:
    """Distinct levels and Bohr frequencies of H(s), grouped as the generator groups them.

    With a conserved quantity, per populated sector (levels of different sectors do
    not interact).
    """
    parts = _populated_sectors(system)
    if parts:
        return tuple(_signature(p.system, s) for p in parts)
    eig = system.eigen(s)
    return eig.n_clusters, bohr_groups(eig.levels, system.degeneracy_tol)[2]


def parting_at_end(system: Any) -> float | None:
    """The first probe 1 - s where the grouping differs from that at s = 1, else None.

    Levels (or Bohr frequencies) that coincide at s = 1 but not just before it make
    the Davies generator discontinuous at the end (see the module notes).  Probed at
    :data:`PARTING_PROBES`.
    """
    at_end = _signature(system, 1.0)
    for eps in PARTING_PROBES:
        if _signature(system, 1.0 - eps) != at_end:
            return eps
    return None
