"""Error budget: which schedule and which k_end reach an error EPS in the shortest anneal.

For every candidate schedule (family, k_end) the predicted leading coefficient
C_k (:mod:`schedforge.prediction`) gives the anneal time at which the error law
``C_k tf^-(k+1)`` meets the budget:

    tf(k) = (C_k / EPS)^(1 / (k + 1)).

The law holds only in the equilibrated regime, so each tf is checked against an
estimate of where that regime starts (our heuristic, documented here; the
confirming simulation is what counts):

* the memory of the start of the anneal must have decayed below the budget:
  ``tf * mean_x gap(f(x)) >= ln(10 / EPS)``, with ``gap`` the Liouvillian gap
  along the anneal (rad/ns);
* the next term of the adiabatic expansion, smaller than the leading one by a
  factor of order ``1 / (gap(1) tf)``, must be a small correction:
  ``gap(1) tf >= REGIME_FACTOR`` (default 20, i.e. a few per cent).

The regime start is the larger of the two.  The best candidates are then
confirmed by a real simulation at their recommended tf; the table reports the
simulated error beside the budget.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .errors import InputError
from .prediction import Prediction, predicted_coefficient
from .schedules import Schedule, schedule_for_point
from .spec_model import Spec

__all__ = [
    "REGIME_FACTOR",
    "BudgetCandidate",
    "BudgetPlan",
    "candidate_schedules",
    "format_budget_table",
    "plan_budget",
    "regime_start_ns",
]

#: gap(1) * tf must exceed this for the leading term to dominate.
REGIME_FACTOR: float = 20.0
#: Default k_end values when the spec's sweep does not list any.
DEFAULT_K_VALUES: tuple[int, ...] = (0, 1, 2, 3, 4)
#: Points of the s grid on which the Liouvillian gap is averaged.
GAP_POINTS: int = 33


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
        Recommended anneal time ``(C_k / EPS)^(1/(k+1))``; nan if unavailable.
    regime_tf_min_ns : float
        Estimated start of the equilibrated regime (ns).
    in_regime : bool
        ``tf_ns >= regime_tf_min_ns``.
    error_simulated : float
        Trace distance simulated at ``tf_ns`` (nan if not simulated or failed).
    simulation_status : str
        ``"not simulated"``, ``"ok"`` or the simulation's failure status.
    note : str
        Why a number is missing, or a caution.
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


@dataclass(frozen=True)
class BudgetPlan:
    """The ranked candidates for an error budget.

    Attributes
    ----------
    eps : float
        The error budget (trace distance).
    candidates : tuple of BudgetCandidate
        Available candidates ranked by ``tf_ns`` (shortest first), then the
        unavailable ones.
    warnings : tuple of str
    """

    eps: float
    candidates: tuple[BudgetCandidate, ...]
    warnings: tuple[str, ...] = field(default=())

    @property
    def recommended(self) -> BudgetCandidate | None:
        """The shortest candidate that is in its regime and, if simulated, meets the budget."""
        for c in self.candidates:
            if not (c.in_regime and math.isfinite(c.tf_ns)):
                continue
            if c.simulation_status == "ok" and not c.error_simulated <= 1.2 * self.eps:
                continue
            return c
        return None


def candidate_schedules(
    spec: Spec,
    families: Sequence[str] | None = None,
    k_values: Sequence[float] | None = None,
) -> list[tuple[str, float, float]]:
    """The (family, k_start, k_end) candidates: the spec's sweep grid by default.

    ``linear`` contributes one candidate with k_end = 0; ``gevrey`` has no power
    law and is skipped (say so to the user elsewhere).
    """
    grid = spec.sweep
    fams = list(families or (grid.family if grid and grid.family else (spec.schedule.family,)))
    ks = list(k_values or (grid.k_end if grid and grid.k_end else DEFAULT_K_VALUES))
    out: list[tuple[str, float, float]] = []
    for fam in fams:
        if fam == "linear":
            out.append(("linear", 0.0, 0.0))
            continue
        for k in ks:
            out.append((fam, float(spec.schedule.k_start), float(k)))
    return sorted(set(out))


def regime_start_ns(
    schedule: Schedule,
    gap_of_s: Callable[[float], float],
    eps: float,
    *,
    factor: float = REGIME_FACTOR,
) -> float:
    """Estimated start (ns) of the equilibrated regime for ``schedule`` and budget ``eps``.

    See the module docstring: ``max(ln(10/eps) / mean_x gap(f(x)), factor / gap(1))``.
    Returns inf when the gap vanishes.
    """
    s_grid = np.linspace(0.0, 1.0, GAP_POINTS)
    gaps = np.array([gap_of_s(float(s)) for s in s_grid])
    x = np.linspace(0.0, 1.0, 4 * GAP_POINTS + 1)
    mean_gap = float(np.trapezoid(np.interp(schedule(x), s_grid, gaps), x))
    gap1 = float(gaps[-1])
    if not (mean_gap > 0 and gap1 > 0):
        return math.inf
    return max(math.log(10.0 / eps) / mean_gap, factor / gap1)


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
        Number of best in-regime candidates to confirm by a simulation at their
        recommended tf (0: none).
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
    from .dynamics import System, simulate_spec

    say = progress or (lambda _msg: None)
    system = System.from_spec(spec)
    warnings = list(system.preflight())
    gap_cache: dict[float, float] = {}

    def gap_of_s(s: float) -> float:
        if s not in gap_cache:
            gap_cache[s] = float(system.liouvillian_gap(s))
        return gap_cache[s]

    cands: list[BudgetCandidate] = []
    for family, k_start, k_end in candidate_schedules(spec, families, k_values):
        if family == "gevrey":
            warnings.append("gevrey schedules have no power law: no budget prediction")
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
        start = regime_start_ns(sched, gap_of_s, eps)
        in_regime = tf >= start
        note = (
            ""
            if in_regime
            else f"tf below the estimated regime start {start:.3g} ns: prediction not reliable"
        )
        cands.append(
            BudgetCandidate(
                family, k_start, k_end, pred.coefficient, tf, start, in_regime, note=note
            )
        )
        say(f"budget: {family} k_end={k_end:g}: C = {pred.coefficient:.4g}, tf = {tf:.4g} ns")

    cands.sort(key=lambda c: (not math.isfinite(c.tf_ns), c.tf_ns))
    sim = simulate or simulate_spec
    confirmed: list[BudgetCandidate] = []
    n_done = 0
    for c in cands:
        if n_done < confirm and c.in_regime and math.isfinite(c.tf_ns):
            say(f"budget: simulating {c.family} k_end={c.k_end:g} at tf = {c.tf_ns:.4g} ns")
            res = sim(spec, tf_ns=c.tf_ns, k_end=c.k_end, family=c.family, k_start=c.k_start)
            n_done += 1
            status = str(res.status)
            err = float(res.trace_distance) if status == "ok" else math.nan
            note = c.note
            if status != "ok":
                note = f"simulation {status}: {getattr(res, 'message', '')}"
            elif err > 1.2 * eps:
                note = f"simulated error {err / eps:.2f} x the budget: lengthen tf"
            c = BudgetCandidate(
                c.family, c.k_start, c.k_end, c.coefficient, c.tf_ns, c.regime_tf_min_ns,
                c.in_regime, err, status, note,
            )  # fmt: skip
        confirmed.append(c)
    return BudgetPlan(float(eps), tuple(confirmed), tuple(warnings))


def _cell(v: float, fmt: str) -> str:
    return "-" if not math.isfinite(v) else format(v, fmt)


def format_budget_table(plan: BudgetPlan) -> str:
    """Plain-text table: family, k_end, C_k, tf predicted, regime, error simulated."""
    head = (
        f"{'family':<8} {'k_end':>5} {'C_k (ns^(k+1))':>15} {'tf_ns predicted':>16} "
        f"{'regime from':>12} {'error simulated':>16}  note"
    )
    lines = [f"error budget EPS = {plan.eps:.3g} (trace distance)", head, "-" * len(head)]
    for c in plan.candidates:
        sim = _cell(c.error_simulated, ".3g") if c.simulation_status == "ok" else "-"
        lines.append(
            f"{c.family:<8} {c.k_end:>5g} {_cell(c.coefficient, '.4g'):>15} "
            f"{_cell(c.tf_ns, '.4g'):>16} {_cell(c.regime_tf_min_ns, '.3g'):>12} {sim:>16}"
            f"  {c.note}"
        )
    rec = plan.recommended
    if rec is None:
        lines.append("no candidate meets the budget inside its equilibrated regime")
    else:
        lines.append(
            f"recommended: {rec.family} k_end = {rec.k_end:g} at tf = {rec.tf_ns:.4g} ns"
            + (
                f" (simulated error {rec.error_simulated:.3g})"
                if rec.simulation_status == "ok"
                else " (not confirmed by simulation)"
            )
        )
    for w in plan.warnings:
        lines.append(f"warning: {w}")
    return "\n".join(lines)
