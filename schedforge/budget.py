"""Error budget: which schedule and which k_end reach an error EPS in the shortest anneal.

For every candidate schedule (family, k_end) the predicted leading coefficient
C_k (:mod:`schedforge.prediction`) gives the anneal time at which the error law
``C_k tf^-(k+1)`` meets the budget:

    tf(k) = (C_k / EPS)^(1 / (k + 1)).

**Regime estimate** (for candidates not simulated; our heuristic): the law holds once

* the memory of the start of the anneal has decayed below the budget:
  ``tf * mean_x gap(f(x)) >= ln(10 D0 / EPS)``, with ``gap`` the Liouvillian gap
  along the anneal (rad/ns) and ``D0`` the trace distance of the initial state
  from the steady state of L(0) (0 for the default Gibbs start: nothing to forget;
  until this calibration D0 was taken as 1, which rejected the driven-qubit
  candidates k_end = 2, 3 at EPS = 1e-6 that simulate within 1.3 % of the law);
* tf is long against the final relaxation time:
  ``gap(1) tf >= RELAXATION_FACTOR`` (:data:`schedforge.error_law.RELAXATION_FACTOR`
  = 5, calibrated there: on the built-in scenarios the simulated error differed from
  the law by at most 2 % from gap(1) tf = 7.5, 8 % at 5.7, 41 % at 3.6).

**Confirmation** (what counts).  The ``confirm`` *fastest* candidates (shortest
predicted tf first, whether or not the estimate calls them in regime) are simulated
at their predicted tf.  A simulated error within ``COEFFICIENT_RTOL`` (10 %) of
``C_k tf^-(k+1)`` shows that the law holds there, whatever the estimate said.  If
such a candidate is over the budget, tf is lengthened by the measured factor,
``tf * (err / EPS)^(1/(k+1)) * (1 + LENGTHEN_MARGIN)``, and simulated again (at most
:data:`MAX_LENGTHENINGS` times).  A simulated error outside that tolerance means
the law does not hold at that tf (a transient, or a lucky dip of an oscillating
error), so the candidate is not recommended even if it happens to be under EPS.

**Meets** means exactly: the simulated trace distance at the tf shown is ``<= EPS``
(no tolerance).  A candidate is **confirmed** when it meets the budget and its
simulated error is consistent with the law (above).  The recommendation is the
confirmed candidate with the shortest tf; with none confirmed, the fastest
candidate the estimate calls in regime, marked "not confirmed by simulation".
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from .error_law import CLOSED, COEFFICIENT_RTOL, OPEN, RELAXATION_FACTOR, error_law
from .errors import InputError
from .metrics import trace_norm
from .prediction import Prediction, predicted_coefficient
from .schedules import Schedule, schedule_for_point, schedule_grid
from .spec_model import Spec

__all__ = [
    "LENGTHEN_MARGIN",
    "MAX_LENGTHENINGS",
    "REGIME_FACTOR",
    "BudgetCandidate",
    "BudgetPlan",
    "candidate_schedules",
    "format_budget_table",
    "plan_budget",
    "regime_start_ns",
]

#: gap(1) * tf must exceed this for the leading term to dominate (the calibrated
#: :data:`schedforge.error_law.RELAXATION_FACTOR`, shared with the analysis).
REGIME_FACTOR: float = RELAXATION_FACTOR
#: Default k_end values when the spec's sweep does not list any.
DEFAULT_K_VALUES: tuple[int, ...] = (0, 1, 2, 3, 4)
#: Points of the s grid on which the Liouvillian gap is averaged.
GAP_POINTS: int = 33
#: How many times a confirmed-but-over-budget candidate's tf is lengthened.
MAX_LENGTHENINGS: int = 2
#: Extra relative length when tf is lengthened (0.5 %: the error then falls by about
#: (k + 1) x 0.5 % more than the measured shortfall; our choice).
LENGTHEN_MARGIN: float = 0.005


@dataclass(frozen=True)
class BudgetCandidate:
    """One (family, k_end) candidate of an error budget.

    Attributes
    ----------
    family : str
    k_start, k_end : float
    coefficient : float
        Predicted C_k (ns^(k+1)); nan if unavailable.
    tf_ns : float
        Predicted anneal time ``(C_k / EPS)^(1/(k+1))``; nan if unavailable.
    regime_tf_min_ns : float
        Estimated start of the regime where the law holds (ns).
    in_regime : bool
        ``tf_ns >= regime_tf_min_ns`` (the estimate; a simulation overrules it).
    error_simulated : float
        Trace distance simulated at ``tf_simulated_ns`` (nan if not simulated or failed).
    simulation_status : str
        ``"not simulated"``, ``"ok"`` or the simulation's failure status.
    note : str
        Why a number is missing, or a caution.
    tf_simulated_ns : float
        The tf of the last simulation (nan if none).
    law_ratio : float
        Simulated error over ``C_k tf^-(k+1)`` at ``tf_simulated_ns``.
    meets : bool
        The simulated error is ``<= EPS`` (no tolerance).
    confirmed : bool
        Meets the budget and ``|law_ratio - 1| <= COEFFICIENT_RTOL``.
    n_simulations : int
        Simulations run for this candidate.
    """

    family: str
    k_start: float
    k_end: float
    coefficient: float
    tf_ns: float
    regime_tf_min_ns: float
    in_regime: bool
    error_simulated: float = math.nan
    simulation_status: str = "not simulated"
    note: str = ""
    tf_simulated_ns: float = math.nan
    law_ratio: float = math.nan
    meets: bool = False
    confirmed: bool = False
    n_simulations: int = 0

    @property
    def tf_recommended_ns(self) -> float:
        """The tf to use: the simulated one when confirmed, else the predicted one."""
        return self.tf_simulated_ns if self.confirmed else self.tf_ns


@dataclass(frozen=True)
class BudgetPlan:
    """The ranked candidates for an error budget.

    Attributes
    ----------
    eps : float
        The error budget (trace distance).
    candidates : tuple of BudgetCandidate
        Available candidates ranked by predicted ``tf_ns`` (shortest first), then
        the unavailable ones.
    warnings : tuple of str
    """

    eps: float
    candidates: tuple[BudgetCandidate, ...]
    warnings: tuple[str, ...] = field(default=())

    @property
    def recommended(self) -> BudgetCandidate | None:
        """The confirmed candidate with the shortest tf; else the fastest unsimulated
        candidate the regime estimate accepts (not confirmed); else None."""
        confirmed = [c for c in self.candidates if c.confirmed]
        if confirmed:
            return min(confirmed, key=lambda c: c.tf_simulated_ns)
        for c in self.candidates:
            if c.simulation_status == "not simulated" and c.in_regime and math.isfinite(c.tf_ns):
                return c
        return None


def candidate_schedules(
    spec: Spec,
    families: Sequence[str] | None = None,
    k_values: Sequence[float] | None = None,
) -> list[tuple[str, float, float]]:
    """The (family, k_start, k_end) candidates: the spec's sweep grid by default.

    Expanded by :func:`schedforge.schedules.schedule_grid` (k_end defaults to the
    sweep's, else :data:`DEFAULT_K_VALUES`): ``linear`` contributes one candidate
    with k_end = 0, ``gevrey`` one with k_end = 0 (it has no power law: the plan
    says so and skips it).
    """
    grid = spec.sweep
    ks = k_values or (grid.k_end if grid and grid.k_end else DEFAULT_K_VALUES)
    return schedule_grid(spec, families=families, k_ends=ks)


def regime_start_ns(
    schedule: Schedule,
    gap_of_s: Callable[[float], float],
    eps: float,
    *,
    factor: float = REGIME_FACTOR,
    initial_deviation: float = 1.0,
) -> float:
    """Estimated start (ns) of the equilibrated regime for ``schedule`` and budget ``eps``.

    See the module docstring: ``max(ln(10 D0/eps) / mean_x gap(f(x)), factor / gap(1))``
    with ``D0 = initial_deviation`` (the first term is left out when ``10 D0 <= eps``).
    Returns inf when the gap vanishes.
    """
    s_grid = np.linspace(0.0, 1.0, GAP_POINTS)
    gaps = np.array([gap_of_s(float(s)) for s in s_grid])
    x = np.linspace(0.0, 1.0, 4 * GAP_POINTS + 1)
    mean_gap = float(np.trapezoid(np.interp(schedule(x), s_grid, gaps), x))
    gap1 = float(gaps[-1])
    if not (mean_gap > 0 and gap1 > 0):
        return math.inf
    memory = 10.0 * float(initial_deviation) / eps
    return max(math.log(memory) / mean_gap if memory > 1.0 else 0.0, factor / gap1)


def plan_budget(
    spec: Spec,
    eps: float,
    *,
    families: Sequence[str] | None = None,
    k_values: Sequence[float] | None = None,
    confirm: int = 2,
    simulate: Callable[..., Any] | None = None,
    progress: Callable[[str], None] | None = None,
) -> BudgetPlan:
    """Rank schedules by the anneal time that meets an error budget.

    Parameters
    ----------
    spec : Spec
        The study (system, bath, device, numerics; the sweep grid supplies the
        default candidates).
    eps : float
        Error budget on the trace distance, in (0, 1).
    families, k_values : sequence, optional
        Override the candidates.
    confirm : int
        Number of candidates to confirm by simulation, fastest (shortest predicted
        tf) first, whatever the regime estimate says (0: none).  Each may take up
        to ``1 + MAX_LENGTHENINGS`` simulations (see the module docstring).
    simulate : callable, optional
        ``simulate(spec, tf_ns=, k_end=, family=, k_start=)`` returning a result
        with ``trace_distance`` and ``status``; default
        :func:`schedforge.dynamics.simulate_spec`.
    progress : callable, optional
        Receives one line of text per step.

    Returns
    -------
    BudgetPlan

    Raises
    ------
    InputError
        ``eps`` outside (0, 1) or ``confirm`` negative.
    """
    if not (isinstance(eps, int | float) and math.isfinite(eps) and 0.0 < eps < 1.0):
        raise InputError("--error", f"must be a number in (0, 1), got {eps!r}")
    if confirm < 0:
        raise InputError("--confirm", f"must be an integer >= 0, got {confirm!r}")
    from .dynamics import simulate_spec
    from .system import System

    say = progress or (lambda _msg: None)
    system = System.from_spec(spec)
    warnings = list(system.preflight())
    gap_cache: dict[float, float] = {}
    # distance of the initial state from the steady state of L(0): what the start
    # leaves to forget (0 for the default Gibbs start)
    d0 = (
        0.0
        if system.closed
        else 0.5 * trace_norm(system.initial_state() - system.steady_state(0.0))
    )

    def gap_of_s(s: float) -> float:
        if s not in gap_cache:
            gap_cache[s] = float(system.liouvillian_gap(s))
        return gap_cache[s]

    if system.closed:
        ks = sorted({k for _, k, _ in candidate_schedules(spec, families, k_values)})
        laws = sorted({error_law(CLOSED, f, k0, k1).label for f, k0, k1 in
                       candidate_schedules(spec, families, k_values)})  # fmt: skip
        warnings.append(
            f"both ends count for a closed system (error law {'; '.join(laws)}; k_start = "
            f"{', '.join(f'{k:g}' for k in ks)}, so a flatter end alone does not help) and "
            "no coefficient is predicted for closed dynamics: no budget can be planned; "
            "sweep tf to measure the error instead"
        )
    cands: list[BudgetCandidate] = []
    for family, k_start, k_end in candidate_schedules(spec, families, k_values):
        if not error_law(OPEN, family, k_start, k_end).polynomial:
            warnings.append(f"{family} schedules have no power law: no budget prediction")
            continue
        sched = schedule_for_point(spec, family, k_start, k_end)
        pred: Prediction = predicted_coefficient(system, sched)
        if not pred.ok:
            cands.append(
                BudgetCandidate(
                    family, k_start, k_end, math.nan, math.nan, math.nan, False, note=pred.message
                )
            )
            continue
        tf = pred.tf_for_error(eps)
        start = regime_start_ns(sched, gap_of_s, eps, initial_deviation=d0)
        in_regime = tf >= start
        note = (
            ""
            if in_regime
            else f"tf below the estimated regime start {start:.3g} ns: not reliable "
            "unless a simulation confirms it"
        )
        cands.append(
            BudgetCandidate(
                family, k_start, k_end, pred.coefficient, tf, start, in_regime, note=note
            )
        )
        say(f"budget: {family} k_end={k_end:g}: C = {pred.coefficient:.4g}, tf = {tf:.4g} ns")

    cands.sort(key=lambda c: (not math.isfinite(c.tf_ns), c.tf_ns))
    sim = simulate or simulate_spec
    out: list[BudgetCandidate] = []
    n_done = 0
    for c in cands:  # fastest first
        if n_done < confirm and math.isfinite(c.tf_ns):
            c = _confirm(c, spec, float(eps), sim, say)
            n_done += 1
        out.append(c)
    return BudgetPlan(float(eps), tuple(out), tuple(warnings))


def _confirm(
    c: BudgetCandidate,
    spec: Spec,
    eps: float,
    sim: Callable[..., Any],
    say: Callable[[str], None],
) -> BudgetCandidate:
    """Simulate one candidate; lengthen tf while the law holds and the budget is missed."""
    k = float(c.k_end)
    tf = float(c.tf_ns)
    n = 0
    for _ in range(1 + MAX_LENGTHENINGS):
        say(f"budget: simulating {c.family} k_end={k:g} at tf = {tf:.6g} ns")
        res = sim(spec, tf_ns=tf, k_end=c.k_end, family=c.family, k_start=c.k_start)
        n += 1
        status = str(res.status)
        if status != "ok":
            return replace(
                c,
                simulation_status=status,
                tf_simulated_ns=tf,
                n_simulations=n,
                note=f"simulation {status}: {getattr(res, 'message', '')}",
            )
        err = float(res.trace_distance)
        ratio = err / (c.coefficient * tf ** -(k + 1.0))
        consistent = abs(ratio - 1.0) <= COEFFICIENT_RTOL
        meets = err <= eps
        done = replace(
            c,
            error_simulated=err,
            simulation_status="ok",
            tf_simulated_ns=tf,
            law_ratio=ratio,
            meets=meets,
            confirmed=meets and consistent,
            n_simulations=n,
        )
        if not consistent:
            return replace(
                done,
                note=f"simulated error is {ratio:.3g} x the law's C_k tf^-(k+1) (tolerance "
                f"{COEFFICIENT_RTOL:.0%}): the law does not hold at this tf; not recommended",
            )
        if meets:
            lengthened = "" if n == 1 else f" (tf lengthened from {c.tf_ns:.6g} ns)"
            return replace(done, note=f"confirmed: meets the budget, law holds{lengthened}")
        tf = tf * (err / eps) ** (1.0 / (k + 1.0)) * (1.0 + LENGTHEN_MARGIN)
    return replace(
        done,
        note=f"simulated error {done.error_simulated / eps:.4g} x the budget after "
        f"{n} simulations: not confirmed",
    )


def _cell(v: float, fmt: str) -> str:
    return "-" if not math.isfinite(v) else format(v, fmt)


def format_budget_table(plan: BudgetPlan) -> str:
    """Plain-text table: family, k_end, C_k, tf predicted, regime, simulation, note."""
    head = (
        f"{'family':<8} {'k_end':>5} {'C_k (ns^(k+1))':>15} {'tf_ns predicted':>16} "
        f"{'regime from':>12} {'tf_ns simulated':>16} {'error simulated':>16} "
        f"{'sim/law':>8}  note"
    )
    lines = [
        f"error budget EPS = {plan.eps:.3g} (trace distance)",
        f"meets: simulated trace distance <= EPS at the simulated tf (no tolerance); "
        f"confirmed: meets and the simulated error lies within {COEFFICIENT_RTOL:.0%} of "
        "C_k tf^-(k+1) (the law holds there)",
        head,
        "-" * len(head),
    ]
    for c in plan.candidates:
        ok = c.simulation_status == "ok"
        lines.append(
            f"{c.family:<8} {c.k_end:>5g} {_cell(c.coefficient, '.4g'):>15} "
            f"{_cell(c.tf_ns, '.4g'):>16} {_cell(c.regime_tf_min_ns, '.3g'):>12} "
            f"{_cell(c.tf_simulated_ns, '.6g'):>16} "
            f"{_cell(c.error_simulated, '.4g') if ok else '-':>16} "
            f"{_cell(c.law_ratio, '.4f') if ok else '-':>8}  {c.note}"
        )
    rec = plan.recommended
    if rec is None:
        lines.append("no candidate is confirmed or inside its estimated regime: none recommended")
    elif rec.confirmed:
        lines.append(
            f"recommended: {rec.family} k_end = {rec.k_end:g} at tf = "
            f"{rec.tf_simulated_ns:.6g} ns (simulated error {rec.error_simulated:.4g} <= "
            f"EPS {plan.eps:.3g}; confirmed by simulation)"
        )
    else:
        lines.append(
            f"recommended: {rec.family} k_end = {rec.k_end:g} at tf = {rec.tf_ns:.4g} ns "
            "(predicted; not confirmed by simulation)"
        )
    for w in plan.warnings:
        lines.append(f"warning: {w}")
    return "\n".join(lines)
