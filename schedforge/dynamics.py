"""One anneal: the simulation and its result (a thin driver over the integrators).

The system lives in :mod:`schedforge.system`, the integrators and their registry in
:mod:`schedforge.integrators`.  :func:`simulate` runs one anneal of duration
``tf_ns`` under a schedule with a named integrator and returns a frozen :class:`SimulationResult`.
:func:`simulate_spec` builds both from a :class:`~schedforge.spec_model.Spec`.

Target and error.  For an open system (Davies generator with a thermal bath)
the target is the steady state of the final generator L(1), the Gibbs state of
H(1); for a closed system it is the ground state of H(1) (with a conserved quantity:
per sector, weighted by the initial populations, :mod:`schedforge.system`).  The
result reports

* ``trace_distance``: ``||rho(tf) - sigma(1)||_1 / 2``;
* ``ground_infidelity``: ``1 - tr(P_0 rho(tf))`` with P_0 the projector on the
  lowest level of H(1) (for an open system this tends to the thermal excited
  population, not to zero);
* ``excess_energy_ghz``: ``tr(H(1) (rho(tf) - sigma(1)))`` as E/h in GHz, the
  energy in excess of the target state (for a closed system, of the ground
  state).

All three are computed from the integrated deviation ``rho(tf) - sigma(1)``,
so they keep their relative accuracy down to ~1e-13.

Integrators are registered by name
(:func:`schedforge.integrators.register_integrator`); ``"auto"`` resolves through
:func:`schedforge.integrators.default_integrator`.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray
from threadpoolctl import threadpool_limits

from .error_law import relaxation_warning
from .errors import InputError
from .integrators import HELD_INTEGRATOR, IntegrationOutcome, get_integrator
from .metrics import measure, metric_values, nan_metrics
from .schedules import Schedule, schedule_from_spec
from .system import System, curve_warnings

__all__ = ["SimulationResult", "simulate", "simulate_spec"]

#: Systems up to this dimension are simulated with one BLAS thread (see ``simulate``).
BLAS_SINGLE_THREAD_DIM = 64


# =============================================================================
# results
# =============================================================================
@dataclass(frozen=True)
class SimulationResult:
    """One simulated anneal.

    Attributes
    ----------
    tf_ns : float
        Anneal time (ns).
    family : str
        Schedule family.
    k_start, k_end : float
        Designed flatness at the start and end.
    trace_distance : float
        ``||rho(tf) - sigma(1)||_1 / 2`` (nan if failed).
    ground_infidelity : float
        ``1 - tr(P_0 rho(tf))``.
    excess_energy_ghz : float
        ``tr(H(1) (rho(tf) - sigma(1)))`` as E/h in GHz.
    status : str
        ``"ok"`` or ``"failed"``.
    message : str
        Empty when all went well; otherwise why it failed.
    integrator : str
        The integrator actually used.
    stats : dict
        Integrator statistics (steps, rhs evaluations, tolerances, ...).
    wall_s : float
        Wall-clock time of the simulation (s).
    variant : str
        ``"ideal"`` (designed schedule) or ``"realized"`` (what the hardware plays).
    warnings : tuple of str
        Pre-flight warnings.
    final_state : ndarray
        rho(tf) (not part of the repr or of comparisons).
    metrics : dict
        Every metric of :data:`schedforge.metrics.METRICS` by name (the three above
        and any registered later).
    """

    tf_ns: float
    family: str
    k_start: float
    k_end: float
    trace_distance: float
    ground_infidelity: float
    excess_energy_ghz: float
    status: str
    message: str
    integrator: str
    stats: dict[str, Any] = field(default_factory=dict, compare=False)
    wall_s: float = field(default=0.0, compare=False)
    variant: str = "ideal"
    warnings: tuple[str, ...] = ()
    final_state: NDArray[Any] | None = field(default=None, repr=False, compare=False)
    metrics: dict[str, float] = field(default_factory=dict, repr=False, compare=False)

    @property
    def ok(self) -> bool:
        """True when the simulation succeeded."""
        return self.status == "ok"

    def __repr__(self) -> str:
        """The point, its status and its error; ``stats`` and the rest via :meth:`to_dict`."""
        why = f", message={self.message!r}" if self.message else ""
        notes = f", warnings={len(self.warnings)}" if self.warnings else ""
        variant = "" if self.variant == "ideal" else f", variant={self.variant!r}"
        return (
            f"SimulationResult(tf_ns={self.tf_ns!r}, family={self.family!r}, "
            f"k_start={self.k_start!r}, k_end={self.k_end!r}{variant}, status={self.status!r}"
            f"{why}, trace_distance={self.trace_distance:.5g}, integrator={self.integrator!r}"
            f"{notes}, ...)"
        )

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready scalars (nan stays nan; ``final_state`` is omitted)."""
        return {
            "tf_ns": float(self.tf_ns),
            "family": self.family,
            "k_start": float(self.k_start),
            "k_end": float(self.k_end),
            "variant": self.variant,
            **metric_values(self),
            "status": self.status,
            "message": self.message,
            "integrator": self.integrator,
            "wall_s": float(self.wall_s),
            "stats": {k: _jsonable(v) for k, v in self.stats.items()},
            "warnings": list(self.warnings),
        }


def _jsonable(v: Any) -> Any:
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (np.floating,)):
        return float(v)
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    if isinstance(v, dict):
        return {str(k): _jsonable(x) for k, x in v.items()}
    return v


# =============================================================================
# simulate
# =============================================================================
def simulate(
    system: System,
    schedule: Schedule,
    tf_ns: float,
    *,
    integrator: str = "auto",
    rtol: float = 1e-10,
    atol: float = 1e-14,
) -> SimulationResult:
    """Simulate one anneal and measure its error.

    Parameters
    ----------
    system : System
        The spin system (and bath).
    schedule : Schedule
        s = f(t / tf).
    tf_ns : float
        Anneal time in ns (> 0).
    integrator : str
        A registered integrator name or ``"auto"`` (see :func:`default_integrator`).
        A schedule that jumps (``schedule.jumps``, an unfiltered hold) always goes
        to the exact ``"held"`` propagator; a warning says so when another
        integrator was named.
    rtol, atol : float
        Tolerances passed to the integrator (``atol`` applies to the deviation
        from the instantaneous steady state, whose entries are the small
        quantities of interest).

    Returns
    -------
    SimulationResult
        Frozen; ``status = "failed"`` (numbers nan, ``message`` says why) when
        the integration fails.  Never raises on numerical failure.

    Raises
    ------
    InputError
        Bad arguments (tf_ns <= 0, unknown integrator, bad tolerances).
    SteadyStateError
        The final steady state is not unique (see :meth:`System.preflight`).
    """
    if not (
        isinstance(tf_ns, (int, float, np.floating, np.integer))
        and np.isfinite(tf_ns)
        and tf_ns > 0
    ):
        raise InputError("tf_ns", f"must be a finite number > 0, got {tf_ns!r}")
    for name, val in (("numerics.rtol", rtol), ("numerics.atol", atol)):
        if not (np.isfinite(val) and val > 0):
            raise InputError(name, f"must be a finite number > 0, got {val!r}")
    start = time.perf_counter()
    warnings = tuple(system.preflight())
    short = relaxation_warning(system, float(tf_ns))  # the error law cannot hold there
    warnings += (short,) if short else ()
    if getattr(schedule, "jumps", False) and integrator != HELD_INTEGRATOR:
        # s(t) jumps (an unfiltered hold): only the exact piecewise-constant propagator
        # handles it; the others follow a continuous s(t) and would miss the jumps
        get_integrator(integrator, system)  # an unknown name is still bad input
        if integrator != "auto":
            warnings += (
                "the schedule jumps (an unfiltered hold): it is propagated exactly by the "
                f'"{HELD_INTEGRATOR}" integrator instead of {integrator!r}, which follows a '
                "continuous s(t)",
            )
        integrator = HELD_INTEGRATOR
    name, fn = get_integrator(integrator, system)
    # Small matrices: one BLAS thread.  Measured (benchmarks/RESULTS.md): a second
    # OpenBLAS thread makes 3-5 qubit points 1.4-2.7 times slower, even on an idle
    # 2-core machine (thread hand-off costs more than the products it splits).
    blas_threads = 1 if system.dim <= BLAS_SINGLE_THREAD_DIM else None
    try:
        with threadpool_limits(limits=blas_threads, user_api="blas"):
            outcome = fn(system, schedule, float(tf_ns), rtol=float(rtol), atol=float(atol))
    except (np.linalg.LinAlgError, FloatingPointError, ArithmeticError, RuntimeError) as exc:
        outcome = IntegrationOutcome.failure(system.dim, f"{type(exc).__name__}: {exc}")
    warnings = warnings + tuple(outcome.stats.pop("warnings", ()))
    name = str(outcome.stats.get("integrator", name))
    if outcome.status == "ok" and not np.all(np.isfinite(outcome.deviation)):
        outcome = replace(outcome, status="failed", message="integrator returned non-finite values")
    values = measure(system, outcome.deviation) if outcome.status == "ok" else nan_metrics()
    stats = dict(outcome.stats)
    stats.setdefault("rtol", float(rtol))
    stats.setdefault("atol", float(atol))
    stats.update(system.diagnostics)
    return SimulationResult(
        tf_ns=float(tf_ns),
        family=str(getattr(schedule, "family", type(schedule).__name__)),
        k_start=float(getattr(schedule, "k_start", 0)),
        k_end=float(getattr(schedule, "k_end", 0)),
        trace_distance=values["trace_distance"],
        ground_infidelity=values["ground_infidelity"],
        excess_energy_ghz=values["excess_energy_ghz"],
        metrics=values,
        status=outcome.status,
        message=outcome.message if outcome.status != "ok" else "",
        integrator=name,
        stats=stats,
        wall_s=time.perf_counter() - start,
        warnings=warnings,
        final_state=outcome.rho,
    )


def simulate_spec(
    spec: Any,
    *,
    tf_ns: float | None = None,
    k_end: float | None = None,
    family: str | None = None,
    k_start: float | None = None,
    variant: str = "ideal",
    system: System | None = None,
) -> SimulationResult:
    """Build the system and schedule of ``spec`` and simulate one anneal.

    Parameters
    ----------
    spec : Spec
        The study spec; its ``[numerics]`` choose the integrator and tolerances.
    tf_ns, k_end, family, k_start : optional
        Override the spec's schedule coordinates.
    variant : {"ideal", "realized"}
        ``"realized"`` simulates the waveform the hardware plays
        (:func:`schedforge.waveform.realize` with the spec's ``[waveform]``); an
        unfiltered hold (piecewise constant) is propagated exactly by the
        ``"held"`` integrator.
    system : System, optional
        The system to simulate instead of ``System.from_spec(spec)`` (e.g. a noise
        draw's, whose scaled curves a spec cannot express); anneals given the same
        object share its pre-flight.

    The result's ``warnings`` include the data-quality warnings of tabulated
    device curves (:func:`curve_warnings`).
    """
    changes = {
        key: val
        for key, val in (
            ("tf_ns", tf_ns),
            ("k_end", k_end),
            ("family", family),
            ("k_start", k_start),
        )
        if val is not None
    }
    sched_spec = replace(spec.schedule, **changes)
    from .limits import check_memory, check_run_cost  # out of reach: refused with the figure

    check_memory(spec.problem.qubits)
    check_run_cost(spec, sched_spec.tf_ns, spec.numerics.integrator, realized=variant == "realized")
    system = System.from_spec(spec) if system is None else system
    schedule = schedule_from_spec(sched_spec)
    if variant == "realized":
        if spec.waveform is None:
            raise InputError(
                "waveform", 'is required for variant "realized" (add a [waveform] section)'
            )
        from .waveform import realize

        realized = realize(schedule, sched_spec.tf_ns, spec.waveform, system.hamiltonian.curves)
        # an unfiltered hold jumps: simulate() propagates it exactly (integrators/held.py)
        run_schedule = getattr(realized, "schedule", realized)
    elif variant == "ideal":
        run_schedule = schedule
    else:
        raise InputError("variant", f'must be "ideal" or "realized", got {variant!r}')
    num = spec.numerics
    result = simulate(
        system,
        run_schedule,
        sched_spec.tf_ns,
        integrator=num.integrator,
        rtol=num.rtol,
        atol=num.atol,
    )
    table = curve_warnings(system.hamiltonian.curves, schedule.k_end)
    # report the designed coordinates, whatever the played schedule calls itself
    return replace(
        result,
        family=str(schedule.family),
        k_start=float(schedule.k_start),
        k_end=float(schedule.k_end),
        variant=variant,
        warnings=result.warnings + tuple(f"device curves: {w}" for w in table),
    )
