"""The eigenframe stepper: the state of one integration and its adaptive steps.

:class:`EigenframeStepper` integrates the deviation ``delta = rho - sigma(s)`` from
the instantaneous Gibbs state over x = t / tf in [0, 1], one step at a time
(:meth:`EigenframeStepper.step`); :meth:`EigenframeStepper.run` steps to the end
and returns an :class:`~.base.IntegrationOutcome`.  The state it carries:

* ``p``: population deviations; ``c``: coherences (their slow part where a
  coherence takes exponential updates); ``A``: amplitudes of the free, decaying
  oscillations split off those coherences;
* the frame ``Vref`` the state is expressed in, the labels' energy ranks (changed by
  diabatic passages), the step length and the step-control memory.

A step builds the frame at the collocation nodes (:mod:`.frame`), passes narrow
avoided crossings diabatically (:mod:`.crossings`), re-expresses the state where
degenerate levels split, solves the slow collocation system (:mod:`.slow_step`,
with the Bohr-sector couplings of :mod:`.sectors`), and propagates the free modes
(:mod:`.free_modes`, :mod:`.sectors`), keeping a running estimate of what their
treatment leaves out.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..progress import report_anneal_progress
from .base import IntegrationOutcome
from .collocation import DEFAULT_STAGES, collocation_scheme
from .crossings import (
    FOLLOW_STEP_MIN,
    FRAME_OVERLAP_MIN,
    DiabaticPassage,
    pass_crossing,
    sudden_change,
)
from .frame import (
    EigenframeModel,
    FrameData,
    opening_levels,
    splitting_basis,
    transported,
    unsplit_groups,
)
from .free_modes import (
    join_sector_modes,
    perturbation_ratios,
    propagate_clusters,
    resonant_clusters,
    transient_dressing,
    transient_rates,
)
from .sectors import (
    as_matrices,
    propagate_sector_modes,
    resonant_coupling,
    sector_couplings,
    sector_leak,
)
from .slow_step import SlowStep, predict_step, slow_step

__all__ = [
    "DRESSING_MAX_DIM",
    "LEVIN_COMFORT",
    "LEVIN_THRESHOLD",
    "MAX_STEPS",
    "RESOLVING_STAGES",
    "EigenframeStepper",
    "clean_jump",
]

#: Free-mode dressing costs O(d^3) per node; above this dimension it is skipped and
#: the first-order terms it would have added count in the error estimate.
DRESSING_MAX_DIM = 32
#: |tf lambda h| that a jump to longer steps gives every exponentially updated coherence
#: (the Levin collocation amplifies rough forcing by about (m^2 / |tf lambda h|)^m).
LEVIN_COMFORT = 30.0
#: Where no step is clean (Bohr frequencies spread evenly, as on a sparse graph late in
#: the anneal) and the last step was set by a coherence it resolves, a jump may leave
#: coherences this close to the Levin threshold instead: the random 4-qubit chain at
#: 1e3 ns resolved one oscillation (a level pair after an avoided crossing) for 420
#: steps otherwise.  Calibrated 2026-12-03 against the general integrator (rtol 1e-12):
#: at 15 that chain took 176 steps instead of 539 and the complete 4-qubit instance 70
#: instead of 146, trace distances within 1e-7 relative (10 gave 1.6e-7 on the latter).
LEVIN_FALLBACK_COMFORT = 15.0
#: |tf lambda h| above which a coherence uses the exponential (Levin) update.
LEVIN_THRESHOLD = 3.0
#: Without dressing, free modes with less than this fraction of the largest amplitude
#: count wholly in the error estimate (their perturbation ratios are not computed).
BARE_RATIO_AMPLITUDE = 1e-3
#: Free modes whose largest amplitude is below this fraction of ``atol`` run bare and
#: unclustered: whatever their dressing would change is far below the error target.
FREE_MODE_NEGLIGIBLE = 1e-3
#: Largest growth of the step after an accepted one.
STEP_GROWTH_MAX = 4.0
#: Step budget (accepted plus rejected) of one run.
MAX_STEPS = 100_000
#: The angle an eigenvector may turn over a step is arccos(FRAME_OVERLAP_MIN); the
#: next step aims at this fraction of it (a step that turns further is rejected).
ROTATION_AIM = 0.7 * math.acos(FRAME_OVERLAP_MIN)
#: Longest exponential jump tried after an accepted one.
JUMP_LIMIT = 0.05
#: Collocation stages of the steps that resolve every coherence, from a step whose
#: length a resolved oscillation set until the next jump (no exponential updates, no
#: free modes meanwhile): a higher degree follows an oscillation further per step.
#: Exponential (Levin) steps keep ``stages``: their collocation amplifies rough forcing
#: by (m^2 / |tf lambda h|)^m.
RESOLVING_STAGES = 12


def _slowest_relaxation(W: NDArray[np.float64], pi: NDArray[np.float64]) -> float:
    """Smallest non-zero relaxation rate of the Pauli generator W (same units as W).

    Detailed balance makes ``D^(-1/2) W D^(1/2)`` symmetric (D = diag(pi)).
    """
    d = W.shape[0]
    if d > 64:  # too costly per step: use the smallest total out-rate as a proxy
        return float(np.min(-np.diag(W)))
    r = np.sqrt(np.maximum(pi, 1e-300))
    sym = W * (r[None, :] / r[:, None])
    sym = 0.5 * (sym + sym.T)
    ev = np.sort(-np.linalg.eigvalsh(sym))
    return float(max(ev[1], 0.0)) if d > 1 else 0.0


def _partition(labels: NDArray[np.intp]) -> NDArray[np.intp]:
    """Cluster labels renumbered by first appearance (equal for equal groupings)."""
    flat = labels.ravel()
    _, first, inverse = np.unique(flat, return_index=True, return_inverse=True)
    rank = np.argsort(np.argsort(first))
    return np.where(flat >= 0, rank[inverse], -1)


def _turn_angle(overlaps: NDArray[np.float64]) -> float:
    """Largest angle (rad) between an eigenvector and its reference, from their overlaps."""
    return float(np.arccos(min(float(np.min(overlaps)), 1.0)))


def clean_jump(
    lam_abs: NDArray[np.float64],
    h: float,
    h_limit: float = JUMP_LIMIT,
    comfort: float | None = None,
) -> float:
    """The longest step up to ``h_limit`` that leaves no coherence half-way.

    A coherence is well treated either resolved (|tf lambda h| <= 1) or by an exponential
    (Levin) update with room to spare (|tf lambda h| >= ``LEVIN_COMFORT``); in between the
    Levin collocation is poorly conditioned.  ``comfort`` replaces ``LEVIN_COMFORT`` (the
    fallback of :data:`LEVIN_FALLBACK_COMFORT`).  Returns ``h`` itself if nothing longer
    is clean.
    """
    lo = 1.0 / lam_abs
    hi = (LEVIN_COMFORT if comfort is None else comfort) / lam_abs
    candidates = np.concatenate([lo, hi * 1.01, [h_limit]])
    candidates = candidates[(candidates > h) & (candidates <= h_limit)]
    if candidates.size == 0:
        return h
    # a candidate is half-way for some coherence iff lo_i < c < hi_i for some i: among
    # the intervals with lo_i < c, the largest hi_i exceeds c
    order = np.argsort(lo)
    reach = np.maximum.accumulate(hi[order])
    below = np.searchsorted(lo[order], candidates, side="left")
    inside = (below > 0) & (reach[np.maximum(below - 1, 0)] > candidates)
    clean = candidates[~inside]
    return float(clean.max()) if clean.size else h


@dataclass
class _Attempt:
    """What one step attempt has built before its slow system is solved."""

    x: float
    h: float
    last: bool  # the step ends on a knot
    jumped: bool  # the step was lengthened for exponential updates
    fd: NDArray[np.float64]  # (2, m+1) s and ds/dx at the nodes
    fr: FrameData  # the frame at the nodes (diabatic states across a crossing)
    passage: DiabaticPassage | None
    adiabatic: FrameData | None  # the relabelled eigenframe after a passage
    turn: float = 0.0  # largest angle (rad) an eigenvector turned over the step


class EigenframeStepper:
    """One integration of the deviation from the instantaneous Gibbs state.

    Parameters
    ----------
    model : EigenframeModel
    schedule : Schedule
        Provides ``derivatives(x, 1)`` and ``knots``.
    tf_ns : float
        Total anneal time in ns.
    p_start : ndarray, optional
        Initial populations in the eigenbasis of H(0) (default: the Gibbs state,
        zero deviation).  Initial coherences are zero.
    rtol, atol : float
        Local error targets on the deviation: ``atol + rtol * |delta|``.
    stages : int
        Collocation stages per step; in "auto" mode ``RESOLVING_STAGES`` while every
        coherence is resolved (see :meth:`_choose_scheme`).
    max_steps : int
        Step budget (accepted plus rejected).
    h_max : float
        Longest step in x.
    mode : {"auto", "resolved"}
        "auto" uses exponential (Levin) updates for every coherence whose phase
        turns by at least ``LEVIN_THRESHOLD`` radians over a step, and resolves
        the others; "resolved" resolves every oscillation (cost grows with tf).
    degeneracy_tol : float
        Bohr frequencies (and levels) closer than this (rad/ns) form one sector of
        the Davies generator, whose couplings the steps include
        (:func:`.sectors.sector_coupling`); at least the frame's own degeneracy
        tolerance.
    dress : bool
        Dress the free oscillations (default; only up to ``DRESSING_MAX_DIM``, above
        which they run bare and the first-order terms eps_ab |A_ab| count in the error
        estimate).  ``False`` propagates them bare; the difference between the two
        measures the size of the dressing, which the registered integrator uses to
        check its error estimate.

    Attributes
    ----------
    x, h : float
        Where the integration stands in x = t / tf, and the next step's length.
    status, message : str
        ``"running"``, ``"ok"`` (at x = 1) or ``"failed"`` (``message`` says why).
    stats : dict
        Steps, rejections, iterations and what the steps met on the way.
    """

    def __init__(
        self,
        model: EigenframeModel,
        schedule: Any,
        tf_ns: float,
        p_start: NDArray[np.float64] | None = None,
        *,
        rtol: float = 1e-10,
        atol: float = 1e-14,
        stages: int = DEFAULT_STAGES,
        max_steps: int = MAX_STEPS,
        h_max: float = 0.25,
        mode: str = "auto",
        degeneracy_tol: float = 0.0,
        dress: bool = True,
    ) -> None:
        self.model = model
        self.schedule = schedule
        self.tf = float(tf_ns)
        self.rtol, self.atol = float(rtol), float(atol)
        self.schemes = {False: collocation_scheme(stages)}
        if mode != "resolved" and RESOLVING_STAGES > stages:
            self.schemes[True] = collocation_scheme(RESOLVING_STAGES)
        self.scheme = self.schemes[False]
        self.order = stages + 1
        self.resolving_only = False  # this attempt resolves every coherence, finer scheme
        self.max_steps = max_steps
        self.h_max = h_max
        self.dress = dress
        # above DRESSING_MAX_DIM the free modes run bare; their first-order terms count
        self.dressed = dress and model.dim <= DRESSING_MAX_DIM
        self.sector_tol = degeneracy_tol
        d = model.dim
        self.off = ~np.eye(d, dtype=bool)
        self.allow_levin = mode != "resolved" and d > 1
        f0 = schedule.derivatives(np.array([0.0]), 1)[:, 0]
        frame0 = model.frame(np.array([f0[0]]), None)
        self.Vref = frame0.V[0]
        self.p = np.zeros(d) if p_start is None else np.asarray(p_start, float) - frame0.pi[0]
        self.c = np.zeros((d, d), dtype=complex)  # slow part (Levin pairs) or full value
        self.A = np.zeros((d, d), dtype=complex)  # free-mode amplitudes of Levin pairs
        self.was_levin = np.zeros((d, d), dtype=bool)
        knots = getattr(schedule, "knots", ())
        self.knots = [k for k in sorted(knots) if 0.0 < k < 1.0] + [1.0]
        self.stats: dict[str, Any] = {
            "steps": 0,
            "rejected": 0,
            "iterations": 0,
            "frame_evals": 1,
            "exponential_steps": 0,
            "min_level_gap_ghz": math.inf,
            "min_bohr_gap_ghz": math.inf,
        }
        self.status, self.message = "running", ""
        self.h = 1e-3
        self.x = 0.0
        self.free_err = 0.0
        self.crossing_err = 0.0
        self.crossed: list[tuple[int, int]] = []  # label pairs passed diabatically
        self.jump_limit = JUMP_LIMIT  # longest jump to try; shrinks after a failed jump
        self.jump_pause = 0  # accepted steps to wait before trying another jump
        # past the end of a failed jump, long jumps are tried again: a jump that failed
        # where levels split near the grouping tolerance otherwise capped every later
        # jump, and the random 4-qubit chain resolved 44 rad/ns coherences for 3500 steps
        self.jump_retry_x = math.inf
        self.resolving = False  # the last step's length was set by a resolved oscillation
        self.last_frame = frame0
        self.last_fd = np.array([[f0[0]], [f0[1]]])
        self.last_labels: NDArray[np.intp] | None = None
        # the last accepted step: start, length, values at its nodes, its nodes
        self.previous: tuple[float, float, NDArray, NDArray, NDArray] | None = None
        self.ranks = np.arange(d)  # energy rank of each label (see DiabaticPassage)
        self.rebased_at = -1.0  # where the basis of splitting degenerate levels was chosen
        # degenerate levels at x = 0 that part at second order start in the basis they
        # part into: a first step too short to see them part (1e-5 on two uncoupled
        # qubits at 1e2 ns) otherwise kept an arbitrary one, and the later turn of the
        # eigenvectors passed for a crossing (3.2e-3 off)
        dH0 = model.hamiltonian_batch(np.array([f0[0]]))[1][0]
        start_groups = unsplit_groups(frame0.E[0], self.Vref, dH0)
        if start_groups:
            self._rebase(start_groups, float(f0[0]), dH0, None)

    # -- driving ------------------------------------------------------------------
    @property
    def done(self) -> bool:
        """True once the integration reached x = 1 or failed."""
        return self.status != "running"

    def run(self) -> IntegrationOutcome:
        """Step to x = 1 and return the outcome (see :meth:`outcome`)."""
        while not self.done:
            self.step()
        return self.outcome()

    def step(self) -> bool:
        """Attempt one step; True when it was accepted.

        A rejected attempt shortens the step (or re-expresses the state where
        degenerate levels split) and leaves x where it was; a failure sets
        ``status = "failed"``.
        """
        if self.done:
            return False
        if self.stats["steps"] + self.stats["rejected"] >= self.max_steps:
            return self._fail(f"step limit {self.max_steps} reached at x = {self.x:.6g}")
        attempt = self._attempt()
        if attempt is None:
            return False
        return self._solve_and_accept(attempt)

    def outcome(self) -> IntegrationOutcome:
        """The deviation rho(tf) - sigma(1) in the computational basis, and rho(tf).

        ``stats["frame"]`` is not kept: the deviation is already turned out of the
        final eigenframe.  A stepper that has not finished gives a failed outcome.
        """
        d = self.model.dim
        if self.status != "ok":
            message = self.message or f"stopped at x = {self.x:.6g}"
            return IntegrationOutcome.failure(d, message, self.stats)
        fr, fd = self.last_frame, self.last_fd
        dev = self.c + np.diag(self.p)
        if np.any(self.A != 0) and not self.dressed:
            dev = dev + self.A
        elif np.any(self.A != 0):
            # with f'' at the end: the leading dressing where f'(1) = 0 (k_end = 1); without
            # it, the driven qubit at 64 ns was 2.8e-6 off QuTiP (test_sparse_reference.py)
            fpp = float(self.schedule.derivatives(np.array([self.x]), 2)[2, 0])
            pop_d, coh_d = transient_dressing(
                self.A,
                fr.K[-1],
                fd[1][-1],
                self.tf * fr.lam[-1],
                self.tf * fr.W[-1],
                self.last_labels,
                fpp=fpp if math.isfinite(fpp) else 0.0,
            )
            dev = dev + self.A + coh_d + np.diag(pop_d)
        stats = self.stats
        stats["free_mode_amplitude"] = float(np.max(np.abs(self.A)))
        stats["free_mode_error_estimate"] = float(self.free_err)
        if self.crossing_err > 0.0 or "diabatic_crossings" in stats:
            stats["crossing_error_estimate"] = float(self.crossing_err)
        stats["mode"] = "exponential" if stats["exponential_steps"] else "resolved"
        stats["secular_tol_ghz"] = float(self.sector_tol) / (2 * math.pi)
        V1 = fr.V[-1]
        deviation = V1 @ dev @ V1.T
        deviation = 0.5 * (deviation + deviation.conj().T)
        gibbs = (V1 * fr.pi[-1]) @ V1.T
        return IntegrationOutcome(deviation, gibbs + deviation, "ok", "", stats)

    def _fail(self, message: str) -> bool:
        self.status, self.message = "failed", message
        return False

    def _reject(self, factor: float, why: str) -> bool:
        self.h *= factor
        self.stats["rejected"] += 1
        self.stats[f"rejected_{why}"] = self.stats.get(f"rejected_{why}", 0) + 1
        return False

    # -- building a step -----------------------------------------------------------
    def _step_length(self) -> tuple[float, bool, bool]:
        """The next step's length, whether it is a jump, and whether it ends on a knot."""
        x, h = self.x, self.h
        next_knot = next(k for k in self.knots if k > x + 1e-15)
        jumped = False
        if x >= self.jump_retry_x:
            self.jump_limit, self.jump_retry_x = JUMP_LIMIT, math.inf
        if self.allow_levin and self.jump_pause == 0:
            # try a step long enough for the fast coherences to take exponential updates
            lam_abs = self.tf * np.abs(self.last_frame.lam[-1][self.off])
            h_jump = clean_jump(lam_abs, h, self.jump_limit)
            if h_jump <= h and self.resolving:
                h_jump = clean_jump(lam_abs, h, self.jump_limit, LEVIN_FALLBACK_COMFORT)
            if h_jump > h:
                h, jumped = h_jump, True
        h = self._choose_scheme(h, jumped)
        remnant = next_knot - x - h
        if 0.0 < remnant < 0.05 * h:
            h = 0.5 * (next_knot - x)
        last = x + h >= next_knot - 1e-12
        if last:
            h = next_knot - x
        self.h = h
        return h, jumped, last

    def _choose_scheme(self, h: float, jumped: bool) -> float:
        """Use ``RESOLVING_STAGES`` while every coherence is resolved; the step for it.

        From a step whose length was set by a resolved oscillation on, until a jump to
        exponential updates (nothing takes them or runs free meanwhile).  The oscillation
        a step can follow grows about like the number of stages, and so does the step
        where the scheme changes (kept at the same length, a step after the finer ones was
        rejected again and again: the fully connected 3-qubit instance at 1e2 ns took
        276 rejections).
        """
        fine = (
            True in self.schemes
            and not jumped
            and (self.resolving or self.resolving_only)  # once finer, until a jump
            and not self.was_levin.any()
            and not self.A.any()
        )
        if fine != self.resolving_only:
            m_old = self.scheme.tau.size
            self.resolving_only = fine
            self.scheme = self.schemes[fine]
            self.order = self.scheme.tau.size
            if not jumped:
                h *= self.order / m_old
        return h

    def _attempt(self) -> _Attempt | None:
        """The frame of the next step, or None when the attempt ended early."""
        model, stats = self.model, self.stats
        h, jumped, last = self._step_length()
        xs = self.x + h * self.scheme.tau
        fd = self.schedule.derivatives(xs, 1)
        if not np.all(np.isfinite(fd)):
            self._fail(f"the schedule returned non-finite values near x = {self.x:.6g}")
            return None
        fr = model.frame(fd[0], self.Vref, self.ranks)
        stats["frame_evals"] += xs.size
        overlaps = np.abs(np.einsum("ia,nia->na", self.Vref, fr.V))
        passage = adiabatic = None
        if np.min(overlaps) < FRAME_OVERLAP_MIN:  # the frame turned too far within the step
            rho_diag = np.abs(self.p + self.last_frame.pi[-1])
            passed = pass_crossing(model, fd, self.Vref, fr, self.ranks, self.tf, h, rho_diag)
            stats["frame_evals"] += xs.size
            if passed is not None:
                passage, fr, adiabatic = passed
                stats["frame_evals"] += xs.size
        if passage is None and self._rebase_opening(fr):
            return None
        if np.min(overlaps) < FRAME_OVERLAP_MIN and passage is None:
            if h < FOLLOW_STEP_MIN:
                self._fail(
                    f"the eigenframe is not continuous near x = {self.x:.6g}: degenerate "
                    "levels whose eigenvectors the Hamiltonian's derivative does not separate"
                )
            else:
                self.jump_pause = max(self.jump_pause, 1)
                self._reject(0.3, "rotation")
                if jumped:  # near a crossing: no more long jumps until past this one
                    self._jump_failed(h, self.h)
            return None
        turn = 0.0 if passage is not None else _turn_angle(overlaps)
        return _Attempt(self.x, h, last, jumped, fd, fr, passage, adiabatic, turn)

    def _jump_failed(self, h_failed: float, limit: float) -> None:
        """After a failed jump of length ``h_failed``: shorter jumps until past its end."""
        self.jump_limit = max(limit, 1e-12)
        self.jump_pause = 4
        self.jump_retry_x = min(self.jump_retry_x, self.x + h_failed)

    def _rebase_opening(self, fr: FrameData) -> bool:
        """Re-express the state where degenerate levels split along the step.

        Inside their eigenspace the basis the levels split into is chosen at the
        step's start, and the state re-expressed in it (a change of basis at one
        point inside a degenerate eigenspace is exact).  True when that happened.
        """
        if self.rebased_at == self.x:
            return False
        s_start = float(self.last_fd[0][-1])
        dH_start = self.model.hamiltonian_batch(np.array([s_start]))[1][0]
        groups = opening_levels(self.last_frame.E[-1], fr.E[-1], self.Vref, dH_start)
        if not groups:
            return False
        self._rebase(groups, s_start, dH_start, fr.V[-1])
        self.previous = None
        self.rebased_at = self.x
        self.stats["splitting_levels"] = self.stats.get("splitting_levels", 0) + 1
        return True

    def _rebase(
        self,
        groups: list[NDArray[np.intp]],
        s: float,
        dH: NDArray[np.float64],
        V_end: NDArray[np.float64] | None,
    ) -> None:
        """Choose the basis degenerate ``groups`` part into at s; re-express the state.

        The limit of the eigenbasis as the levels part (:func:`.frame.splitting_basis`);
        where second order does not settle it, the eigenvectors ``V_end`` at the
        step's end (None: left as it is).  Those depend on how long the attempted
        step is: before the limit basis, a first attempt of 0.05 at x = 0 left the
        4-star at 1e2 ns 4.8e-5 off the general integrator, one of 1e-3 8.8e-7.
        """
        curvature = self.model.hamiltonian_curvature
        d2H = None if curvature is None else curvature(s)
        E = self.last_frame.E[-1]
        new_ref = self.Vref.copy()
        for members in groups:
            basis = None if d2H is None else splitting_basis(E, self.Vref, dH, d2H, members)
            if basis is None and V_end is not None:
                basis = transported(self.Vref[:, members], V_end[:, members])
            if basis is not None:
                new_ref[:, members] = basis
        labels = np.concatenate(groups)
        self.p, self.c, self.A = sudden_change(
            self.Vref, new_ref, labels, self.last_frame.pi[-1], self.p, self.c, self.A
        )
        self.Vref = new_ref
        self.last_frame = replace(self.last_frame, V=new_ref[None])

    # -- solving and accepting a step ------------------------------------------------
    def _solve_and_accept(self, at: _Attempt) -> bool:
        """Solve the step's slow system, then accept it or shorten the step."""
        d, tf, fr, fd, h = self.model.dim, self.tf, at.fr, at.fd, at.h
        stats = self.stats
        sector = sector_couplings(self.model, fr, self.sector_tol)
        if sector is not None:
            stats["sector_steps"] = stats.get("sector_steps", 0) + 1
        lam_nodes = tf * fr.lam
        levin = np.zeros((d, d), dtype=bool)
        if self.allow_levin and not self.resolving_only:
            turn = np.min(np.abs(lam_nodes[:, self.off]), axis=0) * h
            levin[self.off] = turn >= LEVIN_THRESHOLD
        entering = levin & ~self.was_levin
        # free modes stay amplitudes once split off, also where their coherence is
        # resolved again after a shorter step: folding them back would make the steps
        # follow their oscillation
        candidates = levin | (self.A != 0)
        negligible = FREE_MODE_NEGLIGIBLE * self.atol
        free_modes_matter = np.max(np.abs(self.A), initial=0.0) > negligible or entering.any()
        labels = None
        if self.dressed and candidates.any() and free_modes_matter:
            labels = resonant_clusters(fr.K, fd[1], lam_nodes, candidates, h)
            if not (labels >= 0).any():
                labels = None
        p0, c0, A0 = self.p, self.c.copy(), self.A.copy()
        if self.dressed and free_modes_matter:
            A0 = self._regroup_free(A0, labels, candidates, at)
        if at.passage is not None:
            # into the diabatic states at the step's start (tau[0] = 0)
            p0, c0, A0 = sudden_change(
                self.Vref, fr.V[0], at.passage.labels, self.last_frame.pi[-1], p0, c0, A0
            )
        guess = predict_step(self.previous, self.x, h, self.scheme.tau, entering)
        solve = self._slow_solver(h, levin, fr, fd, sector)
        with np.errstate(over="ignore", invalid="ignore"):  # divergence = rejected step
            res = solve(p0, c0, guess)
        if entering.any() and not self.dressed:
            A_new = A0 + np.where(entering, c0 - res.C[0], 0.0)
        elif entering.any():
            res, p0, A_new = self._dress_entering(
                res, solve, entering, levin, labels, p0, c0, A0, at
            )
        else:
            A_new = A0
        stats["iterations"] += res.iterations
        if not np.isfinite(res.err) or res.err > 1.0:
            fac = 0.2 if not np.isfinite(res.err) else max(0.2, 0.9 * res.err ** (-1 / self.order))
            self.h = h
            self._reject(
                fac, "jump" if at.jumped else ("error" if np.isfinite(res.err) else "unsolved")
            )
            if at.jumped:
                self._jump_failed(h, 0.25 * h)
            return False
        # accept the step
        continuing = levin & self.was_levin
        A_new = A_new + np.where(continuing, c0 - res.C[0], 0.0)  # slow-part mismatch
        free = levin | (A_new != 0)
        if free.any():
            A_new = self._propagate_free(A_new, free, labels, sector, lam_nodes, at)
        self._accept(at, res, A_new, levin, labels)
        return True

    def _slow_solver(
        self,
        h: float,
        levin: NDArray[np.bool_],
        fr: FrameData,
        fd: NDArray[np.float64],
        sector: list[Any] | None,
    ) -> Any:
        """The step's slow collocation solve as a function of (p0, c0, guess)."""

        def solve(p0: NDArray[Any], c0: NDArray[Any], guess: Any) -> SlowStep:
            return slow_step(
                h,
                p0,
                c0,
                levin,
                fr,
                fd[1],
                self.tf,
                self.scheme,
                self.rtol,
                self.atol,
                guess,
                sector,
            )

        return solve

    def _dress_entering(
        self,
        res: SlowStep,
        solve: Any,
        entering: NDArray[np.bool_],
        levin: NDArray[np.bool_],
        labels: NDArray[np.intp] | None,
        p0: NDArray[np.float64],
        c0: NDArray[np.complex128],
        A0: NDArray[np.complex128],
        at: _Attempt,
    ) -> tuple[SlowStep, NDArray[np.float64], NDArray[np.complex128]]:
        """Split entering coherences into slow part and dressed free modes.

        The new modes induce components in every other element of rho (their
        dressing, :func:`.free_modes.transient_dressing`), which the state at the
        step's start already holds: they come off the starting populations and
        resolved coherences of the slow solve, and off the amplitudes of modes that
        were free already, so the state itself carries on.  Taking them off the
        populations alone left a first-order error, the perturbation ratio times the
        new amplitude, in the resolved coherence of two levels that part at s = 0
        (2e-8 of a 2-qubit state of 2e-3 at 300 ns, against an estimate of 5e-10).
        """
        fr, fd, d = at.fr, at.fd, self.model.dim
        lam0 = self.tf * fr.lam[0]
        pop_d = np.zeros(d)
        coh_d = np.zeros((d, d), dtype=complex)
        resolved = self.off & ~levin
        for _ in range(2):
            A_try = np.where(entering, c0 - res.C[0] - coh_d, 0.0)
            pop_d, coh_d = transient_dressing(
                A_try, fr.K[0], fd[1][0], lam0, self.tf * fr.W[0], labels
            )
            with np.errstate(over="ignore", invalid="ignore"):
                res = solve(p0 - pop_d, c0 - np.where(resolved, coh_d, 0.0), (res.P, res.C))
        A_new = A0 + np.where(entering, c0 - res.C[0], 0.0) - np.where(levin, coh_d, 0.0)
        return res, p0 - pop_d, A_new

    def _regroup_free(
        self,
        A: NDArray[np.complex128],
        labels: NDArray[np.intp] | None,
        candidates: NDArray[np.bool_],
        at: _Attempt,
    ) -> NDArray[np.complex128]:
        """Free-mode amplitudes re-expressed where the clusters changed since the last step.

        Outside a cluster a free mode is a dressed mode: the coherence it stands for is
        its amplitude plus the first-order components its partners induce
        (:func:`.free_modes.transient_dressing`); inside a cluster the partners are
        propagated with it and induce nothing.  Where a partner joins or leaves a
        cluster, the amplitudes take the difference of the two dressings at the step's
        start, so the coherences themselves carry on.  Without it each change left a
        first-order error, the perturbation ratio times the partner's amplitude (1e-8 on
        the fully connected 2-qubit instance at 1e3 ns, 1e-4 of its state, against an
        estimate of eps^2 that is four orders smaller).
        """
        old = self.last_labels
        if (old is None and labels is None) or (
            old is not None
            and labels is not None
            and np.array_equal(old >= 0, labels >= 0)
            and np.array_equal(_partition(old), _partition(labels))
        ):
            return A
        fr, fd, tf = at.fr, at.fd, self.tf
        args = (fr.K[0], float(fd[1][0]), tf * fr.lam[0], tf * fr.W[0])
        _, before = transient_dressing(A, *args, old)
        _, after = transient_dressing(A, *args, labels)
        return A + np.where(candidates, before - after, 0.0)

    def _free_rates(
        self,
        A_new: NDArray[np.complex128],
        free: NDArray[np.bool_],
        labels: NDArray[np.intp] | None,
        lam_nodes: NDArray[np.complex128],
        at: _Attempt,
    ) -> tuple[NDArray[np.complex128], NDArray[np.float64]]:
        """Rates of the free modes at the nodes and their perturbation ratios eps."""
        fr, fd, d = at.fr, at.fd, self.model.dim
        rate = lam_nodes
        eps = np.zeros((d, d))
        amp = float(np.max(np.abs(A_new)))
        if not (self.dress and amp > FREE_MODE_NEGLIGIBLE * self.atol):
            return rate, eps  # the dressing only while free modes matter
        if self.dressed:
            mu, eps = transient_rates(fr.K, fd[1], lam_nodes, self.tf * fr.W, free, labels)
            rate = rate + mu
            # a dissipative mode cannot grow: a positive real part means the
            # expansion failed there, which eps (in the error estimate) shows
            return np.minimum(rate.real, 0.0) + 1j * rate.imag, eps
        # undressed: the first-order terms are what is left out, and at most the whole
        # amplitude (a nearly resonant partner takes all of it); modes of negligible
        # amplitude count wholly, which saves computing their ratios
        ends = [0, -1]
        weighty = free & (np.abs(A_new) >= BARE_RATIO_AMPLITUDE * amp)
        eps = np.where(free, 1.0, 0.0)
        ratios = perturbation_ratios(fr.K[ends], fd[1][ends], lam_nodes[ends], weighty)
        eps[weighty] = np.minimum(ratios[weighty], 1.0)
        return rate, eps

    def _propagate_free(
        self,
        A_start: NDArray[np.complex128],
        free: NDArray[np.bool_],
        labels: NDArray[np.intp] | None,
        sector: list[Any] | None,
        lam_nodes: NDArray[np.complex128],
        at: _Attempt,
    ) -> NDArray[np.complex128]:
        """Free modes over the accepted step, and the estimate of what is left out."""
        fr, fd, h, scheme, d = at.fr, at.fd, at.h, self.scheme, self.model.dim
        rate, eps = self._free_rates(A_start, free, labels, lam_nodes, at)
        amp = float(np.max(np.abs(A_start)))
        matter = amp > FREE_MODE_NEGLIGIBLE * self.atol
        growth = h * np.einsum("j,jab->ab", scheme.w, rate)
        undressed = 0.0
        A_single = np.where(free, A_start * np.exp(growth), 0.0)
        coupling = extra = None
        if sector is not None and matter:
            sector = as_matrices(sector)
            coupling = resonant_coupling(sector, fr, fd[1], self.tf)
            if labels is not None:  # clusters take in their members' sector partners
                labels = join_sector_modes(labels, coupling, free)
                extra = resonant_coupling(sector, fr, fd[1], self.tf, rotation=False)
        in_cluster = np.zeros((d, d), dtype=bool)
        if labels is not None and matter:
            in_cluster = labels >= 0
            tol = self.atol + self.rtol * max(np.max(np.abs(self.p)), np.max(np.abs(self.c)))
            A_cl, skipped, magnus_error = propagate_clusters(
                np.where(free, A_start, 0.0), labels, rate, fr.K, fd[1], scheme, h, extra, tol
            )
            undressed += magnus_error
            A_single = np.where(in_cluster & ~skipped, A_cl, A_single)
            if skipped.any():
                undressed = max(undressed, float(np.max(np.abs(A_single[skipped]))))
            self.stats["clustered_steps"] = self.stats.get("clustered_steps", 0) + 1
        if coupling is not None:
            # modes of one Bohr sector outside clusters feed each other without
            # oscillation: together
            rest = free & ~in_cluster
            A_sec, in_sector = propagate_sector_modes(
                np.where(rest, A_start, 0.0), rest, rate, coupling, h, scheme.w
            )
            A_single = np.where(in_sector, A_sec, A_single)
            if in_sector.any():
                self.stats["sector_free_modes"] = self.stats.get("sector_free_modes", 0) + 1
            undressed += sector_leak(sector, A_start, free, self.tf, h, scheme.w)
        # a-posteriori estimate of what the treatment of the free modes leaves out:
        # terms of relative size eps_ab^2 (dressed; eps_ab the perturbation ratio of
        # mode ab) or eps_ab (bare, capped at 1) times its amplitude, summed over
        # modes (conjugate pairs once), fed into populations that relax at the
        # slowest population rate.  Calibrated against runs resolving every
        # oscillation (2026-12-02): dressed, the estimate exceeded the trace-norm
        # error 1.4-37x for a qubit but fell up to 70x short of it for two qubits,
        # whose trace distance still agreed with the general integrator to 4e-8;
        # bare, it exceeded the error 3.4-80x for one to three qubits.  Two-qubit
        # errors were 3-11x smaller after the fixes of 3 Dec (dressing taken off the
        # resolved elements, Hermitian masks, checked cluster substeps), and the
        # estimate then fell 0.6-9x short of them (1.6e-9 against 5.6e-10 at 300 ns,
        # 3.1e-11 against 3.6e-12 at 1e3 ns; benchmarks/RESULTS.md).  The
        # effect-weighted mean ratio sum(eps^2 |A|) / sum(eps |A|) relates what the
        # dressing leaves out to the size of the dressing (the caller's check).
        relax = _slowest_relaxation(self.tf * fr.W[0], fr.pi[0])
        upper = np.triu(np.ones((d, d), dtype=bool), 1)
        first = float(np.sum((eps * np.abs(A_start))[upper]))
        left_out = float(np.sum((eps ** (2 if self.dressed else 1) * np.abs(A_start))[upper]))
        self.free_err = self.free_err * math.exp(-min(relax * h, 700.0)) + left_out + undressed
        if first > 0.0:
            self.stats["max_dressing_ratio"] = max(
                self.stats.get("max_dressing_ratio", 0.0), left_out / first
            )
        self.stats["exponential_steps"] += 1
        return A_single

    def _relax_crossing_error(self, at: _Attempt) -> None:
        """Let the bound on what earlier diabatic passages left out relax over the step.

        What a passage leaves out is a change of the state at the crossing; the
        dissipative dynamics after it relaxes that change like any other deviation:
        its populations at the slowest relaxation rate of the Pauli generator, its
        coherence between the crossed levels at their damping rate.  The bound decays
        at the smaller of the two over each later step (the same treatment as the
        free-mode estimate).  Without it, a crossing early in a long anneal kept a bound
        many orders above what is left of it at the end, and sent the point away.
        """
        fr = at.fr
        rate = _slowest_relaxation(fr.W[0], fr.pi[0])
        for a, b in self.crossed:
            rate = min(rate, float(-fr.lam[0][a, b].real))
        decay = max(rate, 0.0) * self.tf * at.h
        self.crossing_err *= math.exp(-min(decay, 700.0))

    def _accept(
        self,
        at: _Attempt,
        res: SlowStep,
        A_new: NDArray[np.complex128],
        levin: NDArray[np.bool_],
        labels: NDArray[np.intp] | None,
    ) -> None:
        """Move the state to the end of the accepted step and choose the next length."""
        stats, fr, passage = self.stats, at.fr, at.passage
        stats["steps"] += 1
        self.jump_pause = max(self.jump_pause - 1, 0)
        if at.jumped:
            self.jump_limit = JUMP_LIMIT
        stats["min_level_gap_ghz"] = min(
            stats["min_level_gap_ghz"], float(np.min(fr.min_level_gap[1:])) / (2 * math.pi)
        )
        stats["min_bohr_gap_ghz"] = min(
            stats["min_bohr_gap_ghz"], float(np.min(fr.min_bohr_gap[1:])) / (2 * math.pi)
        )
        if self.crossing_err > 0.0:
            self._relax_crossing_error(at)
        if passage is not None:
            self.ranks = passage.order[-1]
            self.crossing_err += passage.error
            self.crossed.extend(passage.pairs)
            stats["diabatic_crossings"] = stats.get("diabatic_crossings", 0) + len(passage.pairs)
            stats["crossing_gap_ghz"] = max(
                stats.get("crossing_gap_ghz", 0.0), passage.gap / (2 * math.pi)
            )
        self.previous = (at.x, at.h, res.P, res.C, self.scheme.tau)
        if self.resolving_only:
            stats["resolving_steps"] = stats.get("resolving_steps", 0) + 1
        self.resolving = res.resolving
        p, c, A = res.P[-1].copy(), res.C[-1].copy(), A_new
        if passage is not None:  # back from the diabatic states into the eigenframe
            assert at.adiabatic is not None
            p, c, A = sudden_change(
                fr.V[-1], at.adiabatic.V[-1], passage.labels, fr.pi[-1], p, c, A
            )
            fr = at.adiabatic
        self.p, self.c, self.A = p, c, A
        self.was_levin = levin
        self.last_labels = labels
        self.Vref = fr.V[-1]
        self.last_frame, self.last_fd = fr, at.fd
        next_knot = next(k for k in self.knots if k > at.x + 1e-15)
        self.x = next_knot if at.last else at.x + at.h
        report_anneal_progress(self.x)
        grow = max(0.2, 0.9 * max(res.err, 1e-12) ** (-1.0 / self.order))
        if at.turn > 0.0:  # near an avoided crossing the frame's turn limits the step
            grow = min(grow, ROTATION_AIM / at.turn)
        self.h = min(at.h * min(STEP_GROWTH_MAX, grow), self.h_max)
        if self.x >= 1.0 - 1e-15:
            self.status = "ok"
