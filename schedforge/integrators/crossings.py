"""Narrow avoided crossings passed diabatically, with their Landau-Zener bound.

Excited levels of multi-qubit problems meet with gaps down to 1e-10 rad/ns and
turn the eigenvectors by 90 degrees over a stretch of s too short to follow.  There
the levels are passed diabatically: the labels follow the diabatic states, the
step across the crossing uses them as its frame, and the state is re-expressed in
the new vectors at the step's ends (the sudden limit, :func:`sudden_change`).  What
that leaves out is bounded with the Landau-Zener formula and the mixing angles at
the step's ends (:class:`DiabaticPassage`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from numpy.typing import NDArray

from .frame import EigenframeModel, FrameData, frame_tol

__all__ = [
    "FOLLOW_STEP_MIN",
    "FRAME_OVERLAP_MIN",
    "DiabaticPassage",
    "landau_zener_transition",
    "pass_crossing",
    "sudden_change",
]

#: Eigenvectors at the step's nodes must overlap the previous frame by at least this
#: much (a turn of at most 45 degrees) for the step to follow the frame.
FRAME_OVERLAP_MIN = 0.7
#: Below this step length a frame that still turns too far cannot be followed.
FOLLOW_STEP_MIN = 1e-9


@dataclass(frozen=True)
class DiabaticPassage:
    """Levels relabelled to follow the diabatic states through narrow avoided crossings.

    ``order`` (n, d) gives, per node, the energy rank of each label; ``pairs`` are the
    label pairs whose ranks swapped; ``gap`` (rad/ns) is the largest estimated minimum
    gap among them and ``error`` the Landau-Zener bound on what the passage leaves out
    (trace norm of the change of the state).
    """

    order: NDArray[np.intp]
    pairs: tuple[tuple[int, int], ...]
    gap: float
    error: float

    @property
    def labels(self) -> NDArray[np.intp]:
        """The labels that crossed, sorted."""
        return np.unique(np.array(self.pairs, dtype=np.intp))

    @property
    def groups(self) -> tuple[NDArray[np.intp], ...]:
        """The crossings, each as the sorted labels that cross one another.

        Pairs that share a label are one crossing (connected components of
        ``pairs``).  Levels of different crossings keep their coupling: on the uniform
        4-qubit ring, two crossings passed in one step and turned into diabatic states
        together mixed two levels 20 rad/ns apart (by 8e-3 in a step of 5e-3 in x, 2e-2
        over s = 0.54..0.56) and left a spurious oscillation that put the final state
        5e-8 off the general integrator at 1e3 ns (2026-12-03).
        """
        groups: list[set[int]] = []
        for a, b in self.pairs:
            joined = [g for g in groups if a in g or b in g]
            merged = {a, b}.union(*joined)
            groups = [g for g in groups if not any(g is j for j in joined)] + [merged]
        return tuple(np.array(sorted(g), dtype=np.intp) for g in sorted(groups, key=min))


def landau_zener_transition(gap: float, sweep_rate: float) -> float:
    """Probability of the adiabatic transition at a linear avoided crossing.

    Landau-Zener formula (Zener, Proc. R. Soc. A 137, 696, 1932), hbar = 1: for
    ``H(t) = [[alpha t / 2, Delta / 2], [Delta / 2, -alpha t / 2]]`` a system that
    starts in a diabatic state stays in it with probability
    ``exp(-pi Delta^2 / (2 alpha))``; this returns the rest, ``1 - exp(...)``, the
    part a diabatic passage leaves out.

    Parameters
    ----------
    gap : float
        Smallest gap Delta between the two levels, rad/ns.
    sweep_rate : float
        alpha = |d(E_a - E_b)/dt| of the diabatic energies, rad/ns^2 (1.0 is
        returned for alpha <= 0: no passage).
    """
    if sweep_rate <= 0.0:
        return 1.0
    return float(-math.expm1(-math.pi * gap**2 / (2.0 * sweep_rate)))


def _relabel(
    reference: NDArray[np.float64], fr: FrameData, order: NDArray[np.intp]
) -> tuple[NDArray[np.intp], NDArray[np.intp]] | None:
    """Per-node labels whose eigenvectors continue those of ``reference``, or None.

    ``fr`` was built with the labels ``order``.  Only the labels whose own overlap
    dropped below ``FRAME_OVERLAP_MIN`` are matched again, each to the eigenvector it
    overlaps most; None unless that is one to one with every overlap above the
    threshold.  Returns the new (n, d) order and the labels matched again.
    """
    diag = np.abs(np.einsum("ia,nia->na", reference, fr.V))
    lost = np.flatnonzero(np.min(diag, axis=0) < FRAME_OVERLAP_MIN)
    if lost.size < 2:
        return None
    sub = np.abs(np.einsum("ia,nib->nab", reference[:, lost], fr.V[:, :, lost]))
    pick = np.argmax(sub, axis=2)  # (n, L): which of the lost columns continues label
    best = np.take_along_axis(sub, pick[:, :, None], axis=2)[..., 0]
    if np.min(best) < FRAME_OVERLAP_MIN:
        return None
    if any(np.unique(row).size != lost.size for row in pick):
        return None
    new = np.tile(order, (fr.V.shape[0], 1))
    new[:, lost] = order[lost][pick]
    return new, lost


def _crossing_gap(fr: FrameData, a: int, b: int) -> tuple[float, float]:
    """Estimated smallest gap of levels a, b (rad/ns) and their smallest slope difference.

    Two-level model ``[[e_a(s), g], [g, e_b(s)]]`` with e_a - e_b linear in s: where
    the adiabatic gap is G and the frame's rotation coupling is K_ab, the smallest gap
    is ``2 g = 2 |K_ab| G^2 / |e_a' - e_b'|``.  The estimate is capped by the smallest
    sampled gap, which bounds the smallest gap from above.  The slope difference is
    per unit s.
    """
    G = np.abs(fr.E[:, a] - fr.E[:, b])
    dslope = np.abs(fr.slope[:, a] - fr.slope[:, b])
    sampled = float(np.min(G))
    coupled = (fr.K[:, a, b] != 0) & (dslope > 0)
    model = 2.0 * np.abs(fr.K[coupled, a, b]) * G[coupled] ** 2 / dslope[coupled]
    gap = min(sampled, float(np.max(model))) if model.size else sampled
    return gap, float(np.min(dslope))


def pass_crossing(
    model: EigenframeModel,
    fd: NDArray[np.float64],
    reference: NDArray[np.float64],
    fr: FrameData,
    order: NDArray[np.intp],
    tf: float,
    h: float,
    rho_diag: NDArray[np.float64],
) -> tuple[DiabaticPassage, FrameData, FrameData] | None:
    """A step's frame relabelled through narrow avoided crossings, or None to follow it.

    Called when the frame ``fr`` (built with labels ``order``; ``fd`` the schedule
    values and derivatives at the nodes) turned too far from ``reference`` within the
    step.  The crossing is passed diabatically when its estimated gap is below the
    degeneracy tolerance (there the frame holds the diabatic states and cannot follow
    the turn) or the step is already too short to follow it; else None, and the step
    is shortened.  Returns the passage, the step's frame with the crossed levels as
    diabatic states (their rotation coupling dropped: the adiabatic transition it
    drives is what the Landau-Zener bound counts) and the relabelled eigenframe.
    """
    found = _relabel(reference, fr, order)
    if found is None:
        return None
    new, lost = found
    relabelled = model.frame(fd[0], reference, new)
    if np.min(np.abs(np.einsum("ia,nia->na", reference, relabelled.V))) < FRAME_OVERLAP_MIN:
        return None
    passage = _diabatic_passage(relabelled, order, new, lost, fd[1], tf, rho_diag)
    if not passage.pairs:
        return None
    if passage.gap > frame_tol(relabelled.E) and h >= FOLLOW_STEP_MIN:
        return None
    diabatic = model.frame(fd[0], reference, new, diabatic=passage.groups)
    K = diabatic.K.copy()
    for crossed in passage.groups:
        K[:, crossed[:, None], crossed[None, :]] = 0.0
    return passage, replace(diabatic, K=K), relabelled


def sudden_change(
    before: NDArray[np.float64],
    after: NDArray[np.float64],
    labels: NDArray[np.intp],
    pi: NDArray[np.float64],
    p: NDArray[np.float64],
    c: NDArray[np.complex128],
    A: NDArray[np.complex128],
) -> tuple[NDArray[np.float64], NDArray[np.complex128], NDArray[np.complex128]]:
    """The state in the eigenvectors ``after`` of the crossed ``labels`` (sudden limit).

    A diabatic passage leaves the state unchanged while the eigenvectors of the
    crossing levels turn (beyond the swap of labels): the state is re-expressed in
    the new vectors, ``rho' = O^T rho O`` with ``O`` the overlaps of the old and new
    vectors of ``labels`` (identity elsewhere).  ``pi`` are the Gibbs populations the
    deviation p is taken from; ``c`` the coherences and ``A`` the free-mode amplitudes,
    each rotated in turn (the map is linear).  Returns the new p, c, A.
    """
    O = before[:, labels].T @ after[:, labels]
    rho = c.copy()
    rho[np.diag_indices_from(rho)] += pi + p
    out = []
    for m in (rho, A.copy()):
        m[labels, :] = O.T @ m[labels, :]
        m[:, labels] = m[:, labels] @ O
        out.append(m)
    rho, A_new = out
    p_new = np.real(np.diagonal(rho) + np.diagonal(A_new)) - pi
    np.fill_diagonal(rho, 0.0)
    np.fill_diagonal(A_new, 0.0)
    return p_new, rho, A_new


def _diabatic_passage(
    fr: FrameData,
    order: NDArray[np.intp],
    new: NDArray[np.intp],
    lost: NDArray[np.intp],
    f1: NDArray[np.float64],
    tf: float,
    weight: NDArray[np.float64],
) -> DiabaticPassage:
    """The crossings of a relabelled step and the Landau-Zener bound on their error.

    ``fr`` is the frame at the step's nodes in the new labels ``new`` (the step
    started with ``order``); ``f1`` = ds/dx at the nodes; ``weight`` the populations
    rho_aa of the current state.  A pair of labels whose energy ranks swap crossed.
    Passing it diabatically leaves out the adiabatic transition, of probability
    ``P = 1 - exp(-pi Delta^2 / (2 alpha))`` (:func:`landau_zener_transition`; Delta
    the smallest gap, alpha = |d(E_a - E_b)/dt| the diabatic sweep rate, the smallest
    over the step), which would move populations by P and
    create a coherence of size sqrt(P).  The coupling is left out over the step only,
    so the transition amplitude also misses the ends of its integral, at most the
    mixing angle ``theta = Delta / (2 |E_a - E_b|)`` at each end of the step (first
    order, integration by parts).  The bound is
    ``2 (sqrt(P) + theta_0 + theta_1) (rho_aa + rho_bb)`` in trace norm.
    """
    pairs = []
    gap_max, error = 0.0, 0.0
    speed = float(np.min(np.abs(f1)))
    for i, a in enumerate(lost):
        for b in lost[i + 1 :]:
            if (order[a] - order[b]) * (new[-1, a] - new[-1, b]) > 0:
                continue  # ranks kept: this pair did not cross
            pairs.append((int(a), int(b)))
            if float(np.max(np.abs(fr.E[:, a] - fr.E[:, b]))) <= frame_tol(fr.E):
                # degenerate all along the step (levels of two symmetry sectors that
                # coincide): their ranks swap by rounding, and nothing is left out.
                # Counted with P = 1 (no sweep), such pairs of a hand-written 5-qubit
                # star summed to a bound of 2.4e-6 and a warning
                continue
            gap, dslope = _crossing_gap(fr, a, b)
            P = landau_zener_transition(gap, dslope * speed / tf)
            ends = np.abs(fr.E[[0, -1], a] - fr.E[[0, -1], b])
            theta = float(np.sum(np.minimum(0.5 * gap / np.maximum(ends, 1e-300), 1.0)))
            gap_max = max(gap_max, gap)
            error += 2.0 * min(math.sqrt(P) + theta, 1.0) * float(weight[a] + weight[b])
    return DiabaticPassage(order=new, pairs=tuple(pairs), gap=gap_max, error=error)
