"""Fast eigenframe integrator for the time-dependent Davies master equation.

The general integrator follows every oscillation of the coherences, so its cost
grows linearly with the anneal time tf.  This integrator works in the
instantaneous eigenframe of H(s), where the Davies generator is (for a spectrum
with distinct levels and distinct Bohr frequencies) block diagonal:

* populations p obey a Pauli rate equation ``p' = tf W(s) p``, a *real*, stiff but
  non-oscillatory system;
* every coherence c_ab obeys the scalar equation
  ``c_ab' = tf lambda_ab(s) c_ab + g_ab`` with ``lambda_ab = -i omega_ab - Gamma_ab``;
* the slow coupling between them is the rotation of the frame,
  ``-f'(x) [K(s), rho]`` with ``K = V^T dV/ds``, whose size does not grow with tf.

We integrate the deviation ``delta = rho - sigma(s)`` from the instantaneous Gibbs
state, in x = t / tf, with steps whose size is set by the smoothness of the
slow solution, not by tf:

* populations: Radau IIA collocation (L-stable, stiffly accurate), the classical
  choice for stiff relaxation (Hairer & Wanner, *Solving ODEs II*, 1996);
* coherences whose phase turns little over the step: the same collocation;
* coherences whose phase turns a lot (``|tf lambda h|`` large): an exponential
  integrator in the spirit of Hochbruck & Ostermann (Acta Numerica 19, 209, 2010)
  and of the adiabatic integrators of Jahnke & Lubich (Numer. Math. 94, 289,
  2003).  The slow particular solution q of ``q' = tf lambda q + g`` on the step
  is found by Levin-type collocation (Levin, Math. Comp. 38, 531, 1982); the
  remainder ``c - q`` is a free, decaying oscillation propagated exactly by
  ``exp(tf * integral of lambda)``.  Any particular solution makes this update
  exact, so the collocation only has to resolve the slow forcing.

The free oscillations (transients from the start of the anneal) feed back into
the other equations through the frame rotation.  They are carried as amplitudes
A_ab of modes dressed to first order in |f' K| / |tf (lambda_ab - lambda_m)| (the
components they induce elsewhere), with the second-order (adiabatic-elimination)
shift of their rates; modes nearly resonant with a coupled partner are propagated
together by a fourth-order Magnus method (Blanes, Casas & Ros, 2000).  What this
leaves out is estimated along the way; when the estimate exceeds ``FREE_MODE_RTOL``
of the result, the point is redone with every oscillation resolved (short
anneals) or by the general integrator, or returned with a warning when neither is
affordable.  Levels that are degenerate at a point (s = 0 of a multi-qubit
driver) are rotated to diagonalise dH/ds, the limit of the eigenbasis.

Once split off, a free mode stays an amplitude even where a shorter step resolves
its coherence again (folding it back would make the steps follow its oscillation).
Clusters of nearly resonant modes are the connected components of the coupling
graph above a threshold that is raised until no cluster exceeds ``CLUSTER_MAX_SIZE``
modes; the coupling left between clusters counts in the error estimate.  Above
``DRESSING_MAX_DIM`` levels the free modes run bare, and the first-order terms that
leaves out (eps_ab |A_ab|, at most the whole amplitude) count in the estimate.

The collocation equations of a step are linear.  They are solved block by block
(populations, each coherence) for a given frame-rotation coupling, and that
fixed-point (block-Jacobi) iteration is replaced by GMRES (Saad & Schultz, 1986)
preconditioned with the same block solves when it contracts too slowly, as it does
when the coupling is comparable to the spacing of the levels it connects (dense
multi-qubit spectra).

Local errors are estimated from the spectral tail (the highest Legendre
coefficient) of the collocation polynomials and steps are adapted to
``rtol * |delta| + atol``; step boundaries fall on the schedule's knots.

Narrow avoided crossings (excited levels of multi-qubit problems meet with gaps
down to 1e-10 rad/ns) turn the eigenvectors by 90 degrees over a stretch of s too
short to follow, and below the degeneracy tolerance the frame cannot resolve the
turn at all.  There the levels are passed diabatically, as the dynamics does when
the gap is small: the labels follow the diabatic states, the step across the
crossing uses them as its frame (``frame.diabatic_states``, one crossing at a
time), and the state is re-expressed in the new vectors at the step's ends (the
sudden limit).  What that leaves out is bounded with the Landau-Zener formula and
the mixing angles at the step's ends (``crossings._diabatic_passage``); when the
bound exceeds ``FREE_MODE_RTOL`` of the result the point is handed over or carries
a warning, as for the free modes.

Bohr-frequency sectors.  On sparse or symmetric problems (chains, rings, stars,
uniform couplings) Bohr frequencies coincide and levels are degenerate over whole
stretches of the anneal, and the Davies generator couples every element of rho with
the others of its sector (equal Bohr frequency; the zero sector holds the populations
and the coherences inside degenerate levels).  Where that happens the step adds those
couplings (:func:`.sectors.sector_coupling`, the generator minus the diagonal rates and
the Pauli matrix) to the frame rotation in its collocation system, and free modes that
a sector (or the frame's rotation inside degenerate levels) couples without oscillation
are propagated together (:func:`.sectors.propagate_sector_modes`).  Levels that stay
degenerate get a transported frame inside their eigenspace (``_transported``: the basis
closest to the previous one) whose rotation there is known exactly
(``_transport_rotation``); where degenerate levels split along a step, the basis they
split into is chosen at the step's start and the state re-expressed in it
(``_opening_levels``, exact: a change of basis inside a degenerate eigenspace).  Which
frequencies count as equal is ``numerics.secular_tol_ghz`` (``System.degeneracy_tol``),
the same for both integrators.

Where the assumptions fail (a Lamb shift, a custom initial state, a closed system), the
integrator hands over to the general one and says so in the outcome's
``stats["fallback"]``.

Where things live: the eigenframe model in :mod:`.frame`, the diabatic passage of
narrow crossings in :mod:`.crossings`, the solve of one step's slow part in
:mod:`.slow_step`, the Bohr-frequency sectors in :mod:`.sectors`, the free modes
(ratios, clusters, rates, dressing) in :mod:`.free_modes`, the collocation nodes in
:mod:`.collocation`, and the state of one integration with its adaptive steps in
:mod:`.stepper` (:class:`~.stepper.EigenframeStepper`).  This module holds the
registered integrator: the checks of the stepper's estimates, the redo with resolved
steps, and the handover to the general integrator.
"""

from __future__ import annotations

from functools import partial
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..metrics import trace_distance as _trace_distance
from ..system import System
from .base import INTEGRATORS, IntegrationOutcome, register_integrator
from .conserved import integrate_by_sector
from .frame import EigenframeModel
from .stepper import DRESSING_MAX_DIM, MAX_STEPS, EigenframeStepper

__all__ = ["eigenframe_integrator", "integrate_eigenframe"]


def integrate_eigenframe(
    model: EigenframeModel,
    schedule: Any,
    tf_ns: float,
    p_start: NDArray[np.float64] | None = None,
    **options: Any,
) -> IntegrationOutcome:
    """Integrate the deviation from the instantaneous Gibbs state over x in [0, 1].

    The whole run of an :class:`~.stepper.EigenframeStepper` (``options`` are its
    keyword arguments: ``rtol``, ``atol``, ``stages``, ``max_steps``, ``h_max``,
    ``mode``, ``degeneracy_tol``, ``dress``).  Returns its outcome: the deviation
    rho(tf) - sigma(1) in the computational basis, rho(tf), status and statistics.
    """
    return EigenframeStepper(model, schedule, tf_ns, p_start, **options).run()


# --------------------------------------------------------------------------
# the registered integrator
# --------------------------------------------------------------------------
#: Extra steps allowed per edge of a played waveform (``n_edges`` of a realized
#: schedule): a filtered hold took up to about 40 steps per level change at 1e5 ns.
STEPS_PER_EDGE = 60
#: Wall time of the general integrator per radian of phase (tf times the spread of the
#: levels), by Hilbert-space dimension.  Measured 2026-12-02 on the 2-core machine of
#: benchmarks/RESULTS.md under load (random fully connected instances, tf 10-100 ns,
#: beta schedule): 1-4 qubits 1.6-3.4 ms/rad, 5 qubits 17 ms/rad, 6 qubits 0.79 s/rad
#: (its generator has d^4 = 1.7e7 entries); the upper figures are kept.
GENERAL_S_PER_RAD = {2: 3.4e-3, 4: 3.4e-3, 8: 3.4e-3, 16: 3.4e-3, 32: 1.7e-2, 64: 0.79}
#: The general integrator takes over from the eigenframe integrator only where its
#: estimated time (:func:`general_time_estimate`) stays below this many seconds.
HANDOVER_BUDGET_S = 120.0
#: Largest phase (rad) for which resolved eigenframe steps replace failed exponential ones.
RESOLVED_PHASE_LIMIT = 1.0e4
#: Collocation stages of those resolved runs: their steps are set by the oscillations
#: they follow, which a higher degree follows further per step.  Measured 2026-12-03,
#: tf = 1e2 ns, k_end 1, resolved runs with 8 / 10 / 12 stages: fully connected 3 qubits
#: 3.07 / 1.78 / 1.28 s, 4 qubits 5.42 / 4.07 / 3.25 s, uniform triangle 8.45 / 4.88 /
#: 3.47 s, 4-star 20.95 / 12.7 / 9.29 s, trace distances within 4e-10 relative (the star
#: 2.1e-8; it is 5.5e-8 off the general integrator at 8 stages).
RESOLVED_STAGES = 12
#: Largest accepted estimate of the neglected free-oscillation terms, relative to
#: the trace distance.  In calibration on the driven qubit (tf 30..180 ns, k_end 0..4,
#: against resolved runs) the estimate exceeded the true error by 2.4x or more, so this
#: keeps the true error below 1e-6.
FREE_MODE_RTOL = 2.0e-6
#: Factor on the sharper free-mode estimate (the dressing's effect times its ratio).
#: Calibrated on the driven qubit, k_end 0 and 1, tf 40-140 ns, against resolved runs
#: at rtol 1e-12: the true error was 0.27-2.84 times the unscaled estimate.
SHARPENED_SAFETY = 3.0
#: A Landau-Zener bound above this fraction of the trace distance leaves no number to
#: report: the point fails (with the bound in its message) instead of carrying a warning.
CROSSING_TRUST = 0.1


def _unsupported(system: System) -> str | None:
    """Why the eigenframe integrator cannot run this system, or None."""
    if system.closed:
        return "closed system"
    if system.bath.lamb_shift:
        return "Lamb shift enabled"
    if system.initial not in ("gibbs", "ground"):
        return "custom initial state"
    h0 = system.hamiltonian.matrix(0.0)
    if np.iscomplexobj(h0) and np.any(np.abs(np.imag(h0)) > 0):
        return "complex Hamiltonian"
    return None


def general_time_estimate(dim: int, phase: float) -> float:
    """Estimated wall time (s) of the general integrator over ``phase`` radians.

    Beyond the measured dimensions (:data:`GENERAL_S_PER_RAD`) the cost per radian
    grows as d^4, the size of the generator.
    """
    known = max(GENERAL_S_PER_RAD)
    if dim <= known:
        per_rad = GENERAL_S_PER_RAD[min(k for k in GENERAL_S_PER_RAD if k >= dim)]
    else:
        per_rad = GENERAL_S_PER_RAD[known] * (dim / known) ** 4
    return per_rad * phase


def _handover_affordable(system: System, phase: float) -> bool:
    """True when the general integrator can take this point over within the budget."""
    return system.closed or general_time_estimate(system.dim, phase) <= HANDOVER_BUDGET_S


def _fallback(
    system: System,
    schedule: Any,
    tf_ns: float,
    reason: str,
    rtol: float,
    atol: float,
    stats: dict[str, Any] | None = None,
) -> Any:
    """Run the general integrator instead and say so."""
    name = "closed" if system.closed else "general"
    phase = _phase(system, tf_ns)
    if not _handover_affordable(system, phase):
        estimate = general_time_estimate(system.dim, phase)
        return IntegrationOutcome.failure(
            system.dim,
            f"eigenframe integrator not applicable ({reason}) and tf is too long for the "
            f"general integrator here (about {phase:.3g} rad of phase to follow, an "
            f"estimated {estimate / 60:.3g} min, more than {HANDOVER_BUDGET_S / 60:.3g} min; "
            'name integrator "general" in [numerics] to run it anyway)',
            {**(stats or {}), "integrator": "eigenframe", "fallback": reason},
        )
    out = INTEGRATORS[name](system, schedule, tf_ns, rtol=rtol, atol=atol)
    new_stats = {
        **out.stats,
        "integrator": f"{name} (fallback from eigenframe)",
        "fallback": reason,
    }
    return type(out)(out.deviation, out.rho, out.status, out.message, new_stats)


def _error_allowance(td: float, atol: float) -> float:
    """How large an error bound may be before it matters.

    ``FREE_MODE_RTOL`` of the result, but never below ``atol``: a trace distance of
    3e-12 at a long anneal otherwise drew a warning for an estimate of 1e-17, far
    below anything the steps resolve.
    """
    return max(FREE_MODE_RTOL * td, atol)


def _needs_resolving(out: IntegrationOutcome, atol: float) -> bool:
    """Exponential steps failed, or their free-oscillation error estimate is too large."""
    if out.stats.get("exponential_steps", 0) == 0:
        return False
    if out.status != "ok":
        return True
    td = _trace_distance(out.deviation)
    return out.stats.get("free_mode_error_estimate", 0.0) > _error_allowance(td, atol)


def _phase(system: System, tf_ns: float) -> float:
    """Radians of phase the fastest coherence turns over the anneal (tf times the spread)."""
    ham = system.hamiltonian
    spread = max(
        np.ptp(np.linalg.eigvalsh(ham.matrix(0.0))), np.ptp(np.linalg.eigvalsh(ham.matrix(1.0)))
    )
    return float(tf_ns * spread)


def _sharpen_estimate(out: IntegrationOutcome, run: Any) -> None:
    """Replace the running free-mode estimate by the dressing's second-order effect.

    A sharper check than the running estimate: the dressing changes the result by a
    first-order amount; what it leaves out is that times the ratio again.  In place.
    """
    bare = run(dress=False)
    if bare.status == "ok":
        effect = _trace_distance(out.deviation - bare.deviation)
        second = SHARPENED_SAFETY * effect * out.stats["max_dressing_ratio"]
        out.stats["free_mode_error_estimate"] = min(out.stats["free_mode_error_estimate"], second)
        out.stats["dressing_effect"] = effect


def _integrate(
    system: System, schedule: Any, tf_ns: float, rtol: float, atol: float, phase: float
) -> IntegrationOutcome:
    """Exponential steps, checked, and redone resolved where that is needed and cheap."""
    model = EigenframeModel.from_system(system)
    p_start = None
    if system.initial == "ground":
        p_start = np.zeros(system.dim)
        p_start[0] = 1.0
    # a played waveform with many edges (a filtered hold) needs a few steps per edge
    max_steps = max(MAX_STEPS, STEPS_PER_EDGE * int(getattr(schedule, "n_edges", 0)))
    run = partial(
        integrate_eigenframe,
        model,
        schedule,
        tf_ns,
        p_start,
        rtol=rtol,
        atol=atol,
        degeneracy_tol=system.degeneracy_tol,
        max_steps=max_steps,
    )
    out = run()
    if (
        _needs_resolving(out, atol)
        and out.status == "ok"
        and "max_dressing_ratio" in out.stats
        and model.dim <= DRESSING_MAX_DIM  # above, the free modes ran bare already
    ):
        _sharpen_estimate(out, run)
    sector_free_modes = out.status == "ok" and out.stats.get("sector_free_modes", 0) > 0
    if (_needs_resolving(out, atol) or sector_free_modes) and phase <= RESOLVED_PHASE_LIMIT:
        # short anneals: resolve the oscillations instead, while that stays cheap.  Free
        # modes inside Bohr sectors are not dressed by their sector couplings, and on
        # symmetric problems (a uniform ring) that left 2e-6 to 1e-5 relative at
        # 30-100 ns, below the estimate; resolved steps agreed to 2.5e-8
        out = run(mode="resolved", stages=RESOLVED_STAGES)
    return out


def _crossing_doubt(stats: dict[str, Any], td: float, atol: float) -> str | None:
    """What the diabatic passages leave in doubt, when their bound matters, else None."""
    crossing = stats.get("crossing_error_estimate", 0.0)
    if crossing <= _error_allowance(td, atol):
        return None
    return (
        f"{stats.get('diabatic_crossings', 0)} narrow avoided crossing(s) passed "
        f"diabatically (gap up to {stats.get('crossing_gap_ghz', 0.0):.2g} GHz; "
        f"Landau-Zener bound on the error {crossing:.2g} in trace norm, more than "
        f"{FREE_MODE_RTOL:g} of the result {td:.3g})"
    )


def eigenframe_integrator(
    system: System, schedule: Any, tf_ns: float, *, rtol: float = 1e-10, atol: float = 1e-14
) -> IntegrationOutcome:
    """Registered as ``"eigenframe"``: the fast integrator, with fallbacks.

    Parameters
    ----------
    system : schedforge.system.System
    schedule : schedforge.schedules.Schedule
    tf_ns : float
    rtol, atol : float
        Local error targets on the deviation from the instantaneous Gibbs state.

    Returns
    -------
    IntegrationOutcome
        ``stats["integrator"]`` names what actually ran; ``stats["fallback"]``
        gives the reason when the general integrator ran instead.
    """
    by_sector = integrate_by_sector(
        eigenframe_integrator, system, schedule, tf_ns, rtol=rtol, atol=atol
    )
    if by_sector is not None:  # a conserved quantity: each sector from its own Gibbs state
        return by_sector
    reason = _unsupported(system)
    if reason is not None:
        return _fallback(system, schedule, tf_ns, reason, rtol, atol)
    phase = _phase(system, tf_ns)
    out = _integrate(system, schedule, tf_ns, rtol, atol, phase)
    stats = dict(out.stats)
    stats["integrator"] = "eigenframe"
    too_long = "the general integrator would take too long at this tf"
    if out.status != "ok":
        return _fallback(system, schedule, tf_ns, out.message, rtol, atol, stats)
    if _needs_resolving(out, atol):
        if _handover_affordable(system, phase):
            why = "free oscillations not resolved to the accuracy target"
            return _fallback(system, schedule, tf_ns, why, rtol, atol, stats)
        estimate = stats.get("free_mode_error_estimate", 0.0)
        stats["warnings"] = (
            f"eigenframe integrator: estimated error from free oscillations {estimate:.2g} "
            f"(absolute in trace distance) exceeds {FREE_MODE_RTOL:g} of the result and "
            f"atol {atol:g}; {too_long}",
        )
    td = _trace_distance(out.deviation)
    what = _crossing_doubt(stats, td, atol)
    if what is not None:
        if _handover_affordable(system, phase):
            return _fallback(system, schedule, tf_ns, what, rtol, atol, stats)
        if stats["crossing_error_estimate"] > CROSSING_TRUST * td:
            # a bound of the order of the result: no digit of it can be stood behind
            return IntegrationOutcome.failure(
                system.dim,
                f"eigenframe integrator: {what}: the result is not known to even "
                f"{CROSSING_TRUST:.0%}, and {too_long}",
                stats,
            )
        stats["warnings"] = (
            *stats.get("warnings", ()),
            f"eigenframe integrator: {what}; {too_long}",
        )
    deviation = out.deviation
    stats["trace_error"] = float(abs(np.trace(deviation)))
    rho = system.target_state() + deviation
    return IntegrationOutcome(deviation, rho, "ok", "", stats)


register_integrator("eigenframe", eigenframe_integrator)
