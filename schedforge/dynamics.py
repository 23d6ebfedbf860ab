"""Open- and closed-system anneals: the system, the simulation and its result.

A :class:`System` holds H(s), an optional bath and the initial-state choice.
:func:`simulate` runs one anneal of duration ``tf_ns`` under a schedule with a
named integrator and returns a frozen :class:`SimulationResult`.
:func:`simulate_spec` builds both from a :class:`~schedforge.spec_model.Spec`.

Target and error.  For an open system (Davies generator with a thermal bath)
the target is the steady state of the final generator L(1), the Gibbs state of
H(1); for a closed system it is the ground state of H(1).  The result reports

* ``trace_distance``: ``||rho(tf) - sigma(1)||_1 / 2``;
* ``ground_infidelity``: ``1 - tr(P_0 rho(tf))`` with P_0 the projector on the
  lowest level of H(1) (for an open system this tends to the thermal excited
  population, not to zero);
* ``excess_energy_ghz``: ``tr(H(1) (rho(tf) - sigma(1)))`` as E/h in GHz, the
  energy in excess of the target state (for a closed system, of the ground
  state).

All three are computed from the integrated deviation ``rho(tf) - sigma(1)``,
so they keep their relative accuracy down to ~1e-13.

Integrators are registered by name (:func:`register_integrator`); ``"auto"``
resolves through :func:`default_integrator`.
"""

from __future__ import annotations

import importlib
import importlib.util
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from functools import lru_cache
from typing import Any

import numpy as np
from numpy.typing import NDArray
from threadpoolctl import threadpool_limits

from .bath import Bath, make_bath, steady_state_advice
from .davies import (
    SECULAR_RTOL,
    DaviesGenerator,
    EigenDecomposition,
    GeneratorSpectrum,
    eigen_decomposition,
)
from .device import make_device_curves
from .error_law import relaxation_warning
from .errors import InputError, SteadyStateError
from .hamiltonian import AnnealingHamiltonian
from .metrics import measure, metric_values, nan_metrics
from .schedules import Schedule, schedule_from_spec
from .units import GHZ_TO_RAD_PER_NS, beta_from_mk

__all__ = [
    "INTEGRATORS",
    "IntegrationOutcome",
    "SimulationResult",
    "System",
    "curve_warnings",
    "default_integrator",
    "get_integrator",
    "register_integrator",
    "simulate",
    "simulate_spec",
]

#: Number of s points of the pre-flight scan of the gap and Bohr frequencies, by dimension
#: (the spectrum of L(s) costs more for larger systems).
PREFLIGHT_POINTS = {8: 33, 32: 17}
PREFLIGHT_POINTS_LARGE = 9
#: Systems up to this dimension are simulated with one BLAS thread (see ``simulate``).
BLAS_SINGLE_THREAD_DIM = 64
#: Largest sparse generator (stored entries) the pre-flight scan assembles at one s.
PREFLIGHT_MAX_ENTRIES = 20_000_000


def _preflight_points(dim: int) -> int:
    for limit, n in sorted(PREFLIGHT_POINTS.items()):
        if dim <= limit:
            return n
    return PREFLIGHT_POINTS_LARGE


# =============================================================================
# system
# =============================================================================
class System:
    """A spin system under H(s), optionally coupled to a bath.

    Parameters
    ----------
    hamiltonian : AnnealingHamiltonian
        H(s) in rad/ns.
    bath : Bath or None
        ``None`` for a closed system (von Neumann / Schrodinger evolution).
    initial : {"gibbs", "ground"} or ndarray
        Initial state: the Gibbs state of H(0) at the bath temperature, the
        ground state of H(0), or an explicit density matrix (Hermitian, unit
        trace, positive semidefinite; then ``.initial == "custom"``).
    beta : float, optional
        Inverse temperature (ns/rad) of the initial Gibbs state; defaults to
        the bath's.  Needed for a closed system that starts in a Gibbs state.
    degeneracy_tol : float, optional
        Absolute tolerance (rad/ns) for grouping levels and Bohr frequencies into the
        sectors of the Davies generator (``numerics.secular_tol_ghz``); default
        ``davies.SECULAR_RTOL * max(1, |H|)``.
    """

    def __init__(
        self,
        hamiltonian: AnnealingHamiltonian,
        bath: Bath | None = None,
        initial: str = "gibbs",
        *,
        beta: float | None = None,
        degeneracy_tol: float | None = None,
    ) -> None:
        self._custom_initial: NDArray[Any] | None = None
        if isinstance(initial, np.ndarray):
            self._custom_initial = _check_density_matrix(initial, hamiltonian.dim)
            initial = "custom"
        elif initial not in ("gibbs", "ground"):
            raise InputError("initial.state", f'must be "gibbs" or "ground", got {initial!r}')
        if bath is not None and bath.dim != hamiltonian.dim:
            raise InputError(
                "bath.operators", f"must be {hamiltonian.dim}-dimensional, got {bath.dim}"
            )
        if beta is None and bath is not None:
            beta = bath.beta
        if initial == "gibbs" and beta is None:
            raise InputError("initial.state", '"gibbs" needs a temperature (pass beta=)')
        self.hamiltonian = hamiltonian
        self.bath = bath
        self.initial = initial
        self.beta = beta
        if degeneracy_tol is None:
            degeneracy_tol = SECULAR_RTOL * max(1.0, hamiltonian.scale())
        self.degeneracy_tol = float(degeneracy_tol)
        self._preflight: list[str] | None = None
        self._diagnostics: dict[str, Any] = {}

    # -- construction from a spec -----------------------------------------------
    @classmethod
    def from_spec(cls, spec: Any) -> System:
        """Build the system of a :class:`~schedforge.spec_model.Spec`."""
        parts = (
            spec.device,
            spec.problem,
            spec.bath,
            spec.initial,
            getattr(spec.numerics, "secular_tol_ghz", None),
        )
        try:
            return _cached_system(*parts)
        except TypeError:  # unhashable parts (lists instead of tuples): build without the cache
            return _system_from_parts(*parts)

    # -- basic properties ----------------------------------------------------------
    @property
    def closed(self) -> bool:
        """True for a closed system (no bath)."""
        return self.bath is None

    @property
    def dim(self) -> int:
        """Hilbert-space dimension."""
        return self.hamiltonian.dim

    @property
    def target_beta(self) -> float | None:
        """Inverse temperature of the target (None: the ground state)."""
        return None if self.bath is None else self.bath.beta

    def eigen(self, s: float) -> EigenDecomposition:
        """Eigen-decomposition of H(s) with degenerate levels grouped."""
        return eigen_decomposition(self.hamiltonian.matrix(s), self.degeneracy_tol)

    def davies(self, s: float) -> DaviesGenerator:
        """The generator at s in the eigenbasis of H(s) (coherent only if closed)."""
        return DaviesGenerator(self.eigen(s), self.bath, bohr_tol=self.degeneracy_tol)

    def generator(self, s: float) -> NDArray[np.complex128]:
        """The generator L(s) as a dense d^2 x d^2 matrix (rad/ns).

        Column-stacking convention, ``vec(rho)[a + c d] = rho[a, c]``; computational
        basis; limited to d <= 32.
        """
        return self.davies(s).superoperator("computational")

    def steady_state(self, s: float) -> NDArray[Any]:
        """The instantaneous target sigma(s): Gibbs state of H(s) (open) or ground state (closed).

        For a thermal (KMS) bath the Gibbs state is the steady state of the
        Davies generator; uniqueness is checked by :meth:`preflight`.
        """
        return self.eigen(s).target_state(self.target_beta)

    def target_state(self) -> NDArray[Any]:
        """sigma(1), the state the anneal should end in."""
        return self.steady_state(1.0)

    def initial_state(self) -> NDArray[Any]:
        """rho(0): Gibbs state of H(0) at ``beta``, or its ground state."""
        if self._custom_initial is not None:
            return self._custom_initial.copy()
        eig = self.eigen(0.0)
        return eig.target_state(self.beta if self.initial == "gibbs" else None)

    def spectrum(self, s: float) -> GeneratorSpectrum:
        """Eigenvalues of L(s) with steady-state count and Liouvillian gap."""
        return self.davies(s).spectrum()

    def liouvillian_gap(self, s: float) -> float:
        """Smallest non-zero |Re lambda| of L(s) (rad/ns); 0 for a closed system."""
        return 0.0 if self.closed else self.spectrum(s).gap

    # -- pre-flight ------------------------------------------------------------------
    def preflight(self) -> list[str]:
        """Check that the problem is well posed; return warnings.

        Open system: the final steady state must be unique (else
        :class:`SteadyStateError`); the Liouvillian gap along s is scanned, and
        near-crossings of Bohr frequencies (closer than 10 times the largest
        relaxation rate, where the secular approximation is doubtful) are
        reported.  Closed system: the ground state of H(1) must be non-degenerate.
        The results are cached; :attr:`diagnostics` holds the numbers.
        """
        if self._preflight is None:
            self._preflight = self._run_preflight()
        return list(self._preflight)

    @property
    def diagnostics(self) -> dict[str, Any]:
        """Numbers found by :meth:`preflight` (gaps in rad/ns and GHz, locations)."""
        self.preflight()
        return dict(self._diagnostics)

    def _run_preflight(self) -> list[str]:
        warnings: list[str] = []
        grid = np.linspace(0.0, 1.0, _preflight_points(self.dim))
        eig1 = self.eigen(1.0)
        if self.closed:
            mult = eig1.ground_multiplicity
            if mult > 1:
                raise SteadyStateError(
                    "problem",
                    f"gives a closed system whose final ground state is {mult}-fold degenerate, "
                    "so the target state is not unique and the error is undefined; add a small "
                    "field h_i that breaks the degeneracy",
                )
            gaps = []
            for s in grid:
                e = self.eigen(float(s))
                gaps.append(
                    np.inf if e.n_clusters == 1 else float(np.unique(e.levels)[1] - e.levels[0])
                )
            k = int(np.argmin(gaps))
            self._diagnostics = {
                "min_spectral_gap_ghz": gaps[k] / GHZ_TO_RAD_PER_NS,
                "s_at_min_spectral_gap": float(grid[k]),
            }
            if eig1.ground_multiplicity == 1 and gaps[k] < 1e-3 * GHZ_TO_RAD_PER_NS:
                warnings.append(
                    f"the spectral gap of H(s) falls to {gaps[k] / GHZ_TO_RAD_PER_NS:.3g} GHz near "
                    f"s = {grid[k]:.3f}: expect slow adiabatic convergence"
                )
            return warnings
        final = self.spectrum(1.0)
        if final.zero_count > 1:
            raise SteadyStateError(
                "bath.coupling",
                f"leaves the final generator L(1) with {final.zero_count} independent "
                "steady states "
                "(its zero eigenvalue is degenerate), so the distance to 'the' steady state is "
                "undefined: "
                + steady_state_advice(self.hamiltonian.matrix(1.0), self.bath.operators),
            )
        gaps = np.full(grid.size, np.nan)
        skipped = []
        for i, s in enumerate(grid):
            if s == 1.0:
                gaps[i] = final.gap
            elif self.davies(float(s)).assembly_entries() > PREFLIGHT_MAX_ENTRIES:
                skipped.append(float(s))  # degenerate Bohr groups: d^4 entries
            else:
                gaps[i] = self.liouvillian_gap(float(s))
        if skipped:
            warnings.append(
                "the Liouvillian gap was not scanned at s = "
                + ", ".join(f"{s:.3g}" for s in skipped)
                + f": degenerate levels there make the Davies generator of this {self.dim}-level "
                "system too large to assemble (the other points were scanned)"
            )
        k = int(np.nanargmin(gaps))
        self._diagnostics = {
            "liouvillian_gap_final_ghz": final.gap / GHZ_TO_RAD_PER_NS,
            "liouvillian_gap_min_ghz": float(gaps[k]) / GHZ_TO_RAD_PER_NS,
            "s_at_liouvillian_gap_min": float(grid[k]),
        }
        if final.gap == 0.0:
            warnings.append(
                "the final generator has an undamped mode (gap 0): rho(tf) need not approach "
                "the steady state"
            )
        elif gaps[k] < 1e-6 * final.gap:
            warnings.append(
                f"the Liouvillian gap nearly closes near s = {grid[k]:.3f} "
                f"({gaps[k] / GHZ_TO_RAD_PER_NS:.3g} GHz vs "
                f"{final.gap / GHZ_TO_RAD_PER_NS:.3g} GHz at s = 1)"
            )
        crossing = self._bohr_near_crossing(grid)
        if crossing is not None:
            warnings.append(crossing)
        if self.bath.lamb_shift:
            warnings.append(
                "the Lamb shift is evaluated by adaptive quadrature for every distinct Bohr "
                "frequency at every step (tens of ms per step): practical for small systems "
                "and short anneals only"
            )
        return warnings

    def _bohr_near_crossing(self, grid: NDArray[np.float64]) -> str | None:
        """Every stretch of s where distinct Bohr frequencies come within 10 rates.

        Frequencies closer than the grouping tolerance form one sector (the secular
        approximation keeps their coupling); distinct ones closer than 10 times the
        largest relaxation rate are where the approximation is doubtful.  The grid
        points where that happens are merged into intervals, each named.
        """
        assert self.bath is not None
        found: list[tuple[float, float, float]] = []  # (s, separation, ratio)
        for s in grid:
            gen = self.davies(float(s))
            weights = sum(np.abs(gen.eig.to_eigen(a)) ** 2 for a in self.bath.operators)
            coupled = (weights > 1e-20) & (gen.omega != 0.0)
            freqs = np.unique(gen.omega[coupled])
            if freqs.size < 2:
                continue
            gid = np.concatenate(([0], np.cumsum(np.diff(freqs) > self.degeneracy_tol)))
            reps = np.bincount(gid, weights=freqs) / np.bincount(gid)
            if reps.size < 2:
                continue
            sep = float(np.min(np.diff(np.sort(reps))))
            rate = float(np.max(gen.gamma * weights))
            ratio = sep / rate if rate > 0 else np.inf
            if ratio < 10.0:
                found.append((float(s), sep, ratio))
        if not found:
            return None
        step = float(grid[1] - grid[0]) if grid.size > 1 else 1.0
        intervals: list[list[float]] = []
        for s, sep, _ in found:
            if intervals and s - intervals[-1][1] <= 1.5 * step:
                intervals[-1][1] = s
                intervals[-1][2] = min(intervals[-1][2], sep)
            else:
                intervals.append([s, s, sep])
        names = ", ".join(
            f"s = {a:.3f}" if a == b else f"s = {a:.3f} to {b:.3f}" for a, b, _ in intervals
        )
        closest = min(sep for _, _, sep in intervals)
        self._diagnostics["secular_doubtful_intervals"] = [(a, b) for a, b, _ in intervals]
        return (
            f"distinct Bohr frequencies come closer than 10 times the largest relaxation rate "
            f"(down to {closest / GHZ_TO_RAD_PER_NS:.3g} GHz apart; grouping tolerance "
            f"{self.degeneracy_tol / GHZ_TO_RAD_PER_NS:.3g} GHz, numerics.secular_tol_ghz) "
            f"at {names} (scanned on {grid.size} points): the secular (Davies) approximation "
            "is doubtful there"
        )

    def __repr__(self) -> str:
        kind = "closed" if self.closed else "open"
        return f"System({self.hamiltonian!r}, {kind}, initial={self.initial!r})"


def curve_warnings(curves: Any, k_end: float) -> list[str]:
    """Data-quality warnings of tabulated device curves for a schedule flat to order k_end.

    Parameters
    ----------
    curves : DeviceCurves
        Analytic curves have none; a :class:`~schedforge.device_table.TabulatedCurves`
        gives its table's warnings (too coarse, too noisy) and what
        :meth:`~schedforge.device_table.TabulatedCurves.smoothness_warnings` says for
        ``k_end``.
    k_end : float
        Designed flatness at the end (``inf`` for a schedule flat to every order).

    Returns
    -------
    list of str
    """
    check = getattr(curves, "smoothness_warnings", None)
    if check is None:
        return []
    k = float(k_end)
    if math.isfinite(k):
        return list(check(k))
    continuity = int(curves.continuity)
    out = list(check(max(continuity - 1, 0)))
    out.append(
        f"the curves are C^{continuity}: a schedule flat to every order (k_end = inf) keeps "
        f"the error law only up to k_end = {max(continuity - 1, 0)} on them"
    )
    return out


def _check_density_matrix(rho: NDArray[Any], dim: int) -> NDArray[np.complex128]:
    rho = np.asarray(rho, dtype=complex)
    if rho.shape != (dim, dim):
        raise InputError(
            "initial.state", f"must be a ({dim}, {dim}) density matrix, got {rho.shape}"
        )
    if not np.allclose(rho, rho.conj().T, atol=1e-12):
        raise InputError("initial.state", "must be Hermitian")
    if abs(np.trace(rho) - 1.0) > 1e-10:
        raise InputError("initial.state", f"must have unit trace, got {np.trace(rho).real:.12g}")
    if np.linalg.eigvalsh(0.5 * (rho + rho.conj().T)).min() < -1e-12:
        raise InputError("initial.state", "must be positive semidefinite")
    return 0.5 * (rho + rho.conj().T)


def _system_from_parts(
    device: Any, problem: Any, bath_spec: Any, initial: Any, secular_tol_ghz: float | None = None
) -> System:
    curves = make_device_curves(device)
    ham = AnnealingHamiltonian(curves, problem)
    bath = make_bath(bath_spec, ham.n_qubits)
    if not (np.isfinite(bath_spec.temperature_mk) and bath_spec.temperature_mk > 0):
        raise InputError(
            "bath.temperature_mk", f"must be a finite number > 0, got {bath_spec.temperature_mk!r}"
        )
    tol = None if secular_tol_ghz is None else secular_tol_ghz * GHZ_TO_RAD_PER_NS
    return System(
        ham, bath, initial.state, beta=beta_from_mk(bath_spec.temperature_mk), degeneracy_tol=tol
    )


#: Systems built from the same spec parts are shared (their pre-flight runs once).
_cached_system = lru_cache(maxsize=16)(_system_from_parts)


# =============================================================================
# results
# =============================================================================
@dataclass(frozen=True)
class IntegrationOutcome:
    """What an integrator returns.

    Attributes
    ----------
    deviation : ndarray
        ``rho(tf) - sigma(1)`` (d x d), computed as directly as possible.
    rho : ndarray
        ``rho(tf)``.
    status : str
        ``"ok"`` or ``"failed"``.
    message : str
        What happened (the solver's message on failure).
    stats : dict
        Steps, right-hand-side evaluations and anything else worth reporting.
    """

    deviation: NDArray[Any] = field(repr=False)
    rho: NDArray[Any] = field(repr=False)
    status: str
    message: str
    stats: dict[str, Any] = field(default_factory=dict)

    @classmethod
    def failure(
        cls, dim: int, message: str, stats: dict[str, Any] | None = None
    ) -> IntegrationOutcome:
        """A failed outcome with nan matrices."""
        nan = np.full((dim, dim), np.nan, dtype=complex)
        return cls(nan, nan.copy(), "failed", message, dict(stats or {}))


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
# integrator registry
# =============================================================================
Integrator = Callable[..., IntegrationOutcome]

#: Registered integrators by name: ``fn(system, schedule, tf_ns, *, rtol, atol)``.
INTEGRATORS: dict[str, Integrator] = {}

_BUILTIN_MODULES = (
    "schedforge.integrators.general",
    "schedforge.integrators.eigenframe",
    "schedforge.integrators.held",
)

#: The integrator of piecewise-constant schedules (unfiltered holds), whatever was asked.
HELD_INTEGRATOR = "held"


def register_integrator(name: str, fn: Integrator) -> None:
    """Register an integrator under ``name`` (replacing any previous one)."""
    INTEGRATORS[name] = fn


def _load_builtin_integrators() -> None:
    for mod in _BUILTIN_MODULES:
        if importlib.util.find_spec(mod) is not None:
            importlib.import_module(mod)


def default_integrator(system: System) -> str:
    """The integrator that ``"auto"`` selects for ``system`` (the one place to change it).

    Open systems get the fast eigenframe integrator, which meets the general
    integrator's accuracy (see ``tests/test_eigenframe.py``) and hands over to it
    by itself where its assumptions fail; closed systems get the general one.
    """
    if system.closed or "eigenframe" not in INTEGRATORS:
        return "general"
    return "eigenframe"


def get_integrator(name: str, system: System) -> tuple[str, Integrator]:
    """Resolve ``name`` (or ``"auto"``) to a registered integrator."""
    _load_builtin_integrators()
    resolved = default_integrator(system) if name == "auto" else name
    if resolved not in INTEGRATORS:
        known = ", ".join(sorted(["auto", *INTEGRATORS]))
        raise InputError("numerics.integrator", f"must be one of {known}; got {name!r}")
    return resolved, INTEGRATORS[resolved]


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
