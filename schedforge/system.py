"""The spin system of an anneal: H(s), its bath, the initial state and the pre-flight.

A :class:`System` holds H(s), an optional bath and the initial-state choice;
:meth:`System.from_spec` builds one from a :class:`~schedforge.spec_model.Spec`
(systems of the same spec parts are shared, so their pre-flight runs once).
:meth:`System.preflight` checks that the problem is well posed before any
dynamics: a unique final steady state (open) or ground state (closed), the
Liouvillian gap along s, and the stretches of s where the secular approximation
is doubtful.  :func:`curve_warnings` gives the data-quality warnings of
tabulated device curves.

Target.  For an open system (Davies generator with a thermal bath) the target is
the steady state of the final generator L(1), the Gibbs state of H(1); for a
closed system it is the ground state of H(1).  When an operator that splits the
Hilbert space into sectors is conserved (the spin-flip parity of a zero-field problem,
with X coupling for an open system, :mod:`schedforge.symmetry`), the population of
each sector is fixed by the initial state.  Open: L(1) has one steady state per sector
and the target is the Gibbs state of each sector weighted by the initial state's
sector populations.  Closed: the target is the ground state of H(1) within each
sector, weighted the same way (well defined even where the ground level of H(1) is
degenerate across sectors, as it always is for a zero-field Ising problem with
A(1) = 0).  See :attr:`System.conserved` and :meth:`System.sector_parts`; the
integrators then run sector by sector.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .bath import Bath, make_bath, steady_state_advice
from .davies import (
    SECULAR_RTOL,
    DaviesGenerator,
    EigenDecomposition,
    GeneratorSpectrum,
    eigen_decomposition,
)
from .device import make_device_curves
from .errors import InputError, SteadyStateError
from .hamiltonian import AnnealingHamiltonian
from .spec_model import INITIAL_STATES
from .symmetry import (
    SECTOR_COHERENCE_MAX,
    SECTOR_WEIGHT_MIN,
    ConservedQuantity,
    Sector,
    SectorHamiltonian,
    find_conserved,
)
from .units import GHZ_TO_RAD_PER_NS, beta_from_mk

__all__ = ["SectorPart", "System", "curve_warnings"]

#: Number of s points of the pre-flight scan of the gap and Bohr frequencies, by dimension
#: (the spectrum of L(s) costs more for larger systems).
PREFLIGHT_POINTS = {8: 33, 32: 17}
PREFLIGHT_POINTS_LARGE = 9
#: Largest sparse generator (stored entries) the pre-flight scan assembles at one s.
PREFLIGHT_MAX_ENTRIES = 20_000_000


def _preflight_points(dim: int) -> int:
    for limit, n in sorted(PREFLIGHT_POINTS.items()):
        if dim <= limit:
            return n
    return PREFLIGHT_POINTS_LARGE


@dataclass(frozen=True, eq=False)
class SectorPart:
    """One sector of a conserved quantity, as a system of its own.

    Attributes
    ----------
    sector : Sector
        The eigenspace (its basis embeds the sector's operators in the full space).
    weight : float
        The initial population ``tr(Pi_p rho(0))``, conserved by the anneal.
    system : System
        H(s), the bath and the initial state restricted to the sector (initial state
        normalised: the full state is ``sum_p weight_p U_p rho_p U_p^+``).
    """

    sector: Sector
    weight: float
    system: System

    @property
    def matters(self) -> bool:
        """The sector holds more than ``SECTOR_WEIGHT_MIN`` of the population."""
        return self.weight > SECTOR_WEIGHT_MIN


_UNSET: Any = object()


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
        elif initial not in INITIAL_STATES:
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
        self._conserved: Any = _UNSET
        self._parts: tuple[SectorPart, ...] | None = None

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
        Davies generator; uniqueness is checked by :meth:`preflight`.  With a
        conserved quantity (:attr:`conserved`) it is the Gibbs state of each sector
        weighted by the initial populations, ``sum_p w_p Gibbs_p(H(s))`` (closed: the
        ground state of each sector, ``sum_p w_p G_p(s)``).
        """
        parts = self.sector_parts()
        if parts:
            return sum(
                (p.weight * p.sector.embed(p.system.steady_state(s)) for p in parts if p.weight),
                np.zeros((self.dim, self.dim), dtype=complex),
            )
        return self.eigen(s).target_state(self.target_beta)

    def target_state(self) -> NDArray[Any]:
        """sigma(1), the state the anneal should end in."""
        return self.steady_state(1.0)

    def ground_space(self) -> NDArray[Any]:
        """Orthonormal columns spanning P_0, the ground space the ground infidelity measures.

        The lowest level of H(1); for a closed system with a conserved quantity, the
        lowest level of H(1) within each sector the initial state populates (the
        target's support: a parity-even start can only reach the even ground state).
        With A(1) = 0 and zero fields both are the same space restricted to the
        populated sectors.
        """
        parts = self.sector_parts() if self.closed else ()
        if parts:
            return np.hstack(
                [p.sector.basis @ p.system.ground_space() for p in parts if p.weight > 0.0]
            )
        eig = self.eigen(1.0)
        return eig.vectors[:, eig.labels == 0]

    def target_ground_population(self) -> float:
        """``tr(P_0 sigma(1))``: the target's population of :meth:`ground_space`."""
        eig = self.eigen(1.0)
        if not self.sector_parts():
            return float(np.sum(eig.target_weights(self.target_beta)[eig.labels == 0]))
        v0 = self.ground_space()
        return float(np.real(np.trace(v0.conj().T @ self.target_state() @ v0)))

    # -- conserved quantities ----------------------------------------------------------
    @property
    def conserved(self) -> ConservedQuantity | None:
        """A conserved quantity of the dynamics that splits it into sectors, or None.

        Tried: :data:`schedforge.symmetry.CANDIDATES` (the spin-flip parity), checked
        numerically against the driver, the problem Hamiltonian and, for an open
        system, every coupling operator (a closed system has none).
        """
        if self._conserved is _UNSET:
            found = None
            ham = self.hamiltonian
            if hasattr(ham, "driver"):
                operators = () if self.bath is None else self.bath.operators
                found = find_conserved((ham.driver, ham.problem_matrix), operators, ham.n_qubits)
            self._conserved = found
        return self._conserved

    def sector_parts(self) -> tuple[SectorPart, ...]:
        """The sectors of :attr:`conserved` with their initial populations and systems.

        Empty when nothing is conserved.  Sectors the initial state does not populate
        are left out; the others' systems share this system's bath spectrum (none for
        a closed system), temperature and grouping tolerance.
        """
        if self._parts is None:
            conserved = self.conserved
            if conserved is None:
                self._parts = ()
            else:
                rho0 = self.initial_state()
                weights = conserved.weights(rho0)
                self._parts = tuple(
                    SectorPart(sec, float(w), self._sector_system(sec, float(w), rho0))
                    for sec, w in zip(conserved.sectors, weights, strict=True)
                    if w > 0.0
                )
        return self._parts

    def _sector_system(self, sector: Sector, weight: float, rho0: NDArray[Any]) -> System:
        bath = None
        if self.bath is not None:
            bath = Bath(
                self.bath.spectral_density,
                tuple(np.real_if_close(sector.restrict(a)) for a in self.bath.operators),
                lamb_shift=self.bath.lamb_shift,
                beta=self.bath.beta,
            )
        initial: Any = self.initial
        if initial == "custom":
            initial = sector.restrict(rho0) / weight
        return System(
            SectorHamiltonian(self.hamiltonian, sector),  # type: ignore[arg-type]
            bath,
            initial,
            beta=self.beta,
            degeneracy_tol=self.degeneracy_tol,
        )

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
        reported.  Closed system: the ground state of H(1) must be non-degenerate
        (within each populated sector when a quantity is conserved; otherwise the
        refusal names the degenerate classical configurations).  The results are
        cached; :attr:`diagnostics` holds the numbers.
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
        if self.closed:
            if self.sector_parts():
                return self._sector_preflight()
            mult = self.eigen(1.0).ground_multiplicity
            if mult > 1:
                raise SteadyStateError("problem", _degenerate_ground_rule(self, mult))
            return self._scan_closed()
        if self.sector_parts():
            return self._sector_preflight()
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
        return self._scan_open(final)

    def _scan_closed(self) -> list[str]:
        """The spectral-gap scan of a closed system (its lowest two distinct levels)."""
        grid = np.linspace(0.0, 1.0, _preflight_points(self.dim))
        gaps = []
        for s in grid:
            e = self.eigen(float(s))
            gap = np.inf if e.n_clusters == 1 else float(np.unique(e.levels)[1] - e.levels[0])
            gaps.append(gap)
        k = int(np.argmin(gaps))
        self._diagnostics = {
            "min_spectral_gap_ghz": gaps[k] / GHZ_TO_RAD_PER_NS,
            "s_at_min_spectral_gap": float(grid[k]),
        }
        if gaps[k] < 1e-3 * GHZ_TO_RAD_PER_NS:
            return [
                f"the spectral gap of H(s) falls to {gaps[k] / GHZ_TO_RAD_PER_NS:.3g} GHz near "
                f"s = {grid[k]:.3f}: expect slow adiabatic convergence"
            ]
        return []

    def _scan_open(self, final: GeneratorSpectrum) -> list[str]:
        """The gap and secular scans of an open system whose L(1) is ``final``."""
        warnings: list[str] = []
        grid = np.linspace(0.0, 1.0, _preflight_points(self.dim))
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

    def _sector_preflight(self) -> list[str]:
        """Pre-flight of a system with a conserved quantity, sector by sector.

        The initial state must have no coherence between sectors (the sectors are
        integrated apart).  Each populated sector must have a unique target of its own:
        open, its generator L_p(1) a unique steady state; closed, its H_p(1) a
        non-degenerate ground state.  The gap scans (and, open, the secular scan) run
        per sector (distinct sectors never couple), their diagnostics merged (the
        smallest gap), their warnings named.
        """
        conserved = self.conserved
        assert conserved is not None
        rho0 = self.initial_state()
        coherence = conserved.coherence(rho0)
        if coherence > SECTOR_COHERENCE_MAX:
            raise SteadyStateError(
                "initial.state",
                f"has coherences between the sectors of the conserved {conserved.name} "
                f"(norm {coherence:.3g}); schedforge integrates the sectors apart and needs an "
                "initial state that commutes with it (the Gibbs or ground state of H(0) does)",
            )
        parts = [p for p in self.sector_parts() if p.matters]
        scans = [(p, self._sector_scan(p)) for p in parts]
        warnings = [f"{p.sector.name} sector: {w}" for p, scan in scans for w in scan]
        diag: dict[str, Any] = {}
        gap_key = "min_spectral_gap_ghz" if self.closed else "liouvillian_gap_min_ghz"
        at_key = "s_at_min_spectral_gap" if self.closed else "s_at_liouvillian_gap_min"
        for part, _ in scans:
            sub = part.system._diagnostics
            if not diag or sub[gap_key] < diag[gap_key]:
                diag.update({k: sub[k] for k in (gap_key, at_key)})
            if self.closed:
                continue
            diag["liouvillian_gap_final_ghz"] = min(
                diag.get("liouvillian_gap_final_ghz", math.inf), sub["liouvillian_gap_final_ghz"]
            )
            for interval in sub.get("secular_doubtful_intervals", []):
                if interval not in diag.setdefault("secular_doubtful_intervals", []):
                    diag["secular_doubtful_intervals"].append(interval)
        populated = ", ".join(f"{p.sector.name} {p.weight:.6g}" for p in self.sector_parts())
        diag["conserved"] = conserved.name
        diag["sector_weights"] = {p.sector.name: p.weight for p in self.sector_parts()}
        if self.closed:
            mult = self.eigen(1.0).ground_multiplicity
            level = f"{mult}-fold degenerate" if mult > 1 else "non-degenerate"
            warnings.insert(
                0,
                f"conserved: {conserved.name} commutes with H(s), so the closed evolution keeps "
                f"the population of each of its sectors ({populated}); target = ground state of "
                f"H(1) within each sector weighted by the initial populations (the ground level "
                f"of the full H(1) is {level}; each populated sector's own is non-degenerate)",
            )
        else:
            full = self.spectrum(1.0).zero_count
            diag["final_steady_states"] = full
            warnings.insert(
                0,
                f"conserved: {conserved.name} commutes with H(s) and every coupling operator, "
                f"so the population of each of its sectors is fixed by the initial state "
                f"({populated}); target = Gibbs state per sector weighted by the initial "
                f"populations (the full L(1) has {full} independent steady states, coherences "
                "between sectors included; each populated sector's own generator has one)",
            )
        self._diagnostics = diag
        return warnings

    def _sector_scan(self, part: SectorPart) -> list[str]:
        """One populated sector's own checks and scans (refused when its target is not unique)."""
        conserved = self.conserved
        assert conserved is not None
        sub = part.system
        if sub.closed:
            mult = sub.eigen(1.0).ground_multiplicity
            if mult > 1:
                raise SteadyStateError(
                    "problem",
                    f"conserves the {conserved.name}, and even within its {part.sector.name} "
                    f"sector (initial population {part.weight:.6g}) the final ground state of "
                    f"this closed system is {mult}-fold degenerate, so the target state is not "
                    "unique and the error is undefined: "
                    + _degeneracy_advice(self.hamiltonian.matrix(1.0)),
                )
            return sub._scan_closed()
        assert self.bath is not None
        final = sub.spectrum(1.0)
        if final.zero_count > 1:
            raise SteadyStateError(
                "bath.coupling",
                f"conserves the {conserved.name}, and even within its {part.sector.name} "
                f"sector the final generator has {final.zero_count} independent steady "
                "states, so the state the anneal relaxes to is undetermined: "
                + steady_state_advice(self.hamiltonian.matrix(1.0), self.bath.operators),
            )
        return sub._scan_open(final)

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


def _degeneracy_advice(h_final: NDArray[Any]) -> str:
    """What a degenerate final ground level is made of, and how to lift it."""
    diagonal = not np.any(np.abs(h_final - np.diag(np.diag(h_final))) > 0.0)
    hint = "add a small field h_i that breaks the degeneracy"
    if not diagonal:
        return hint
    e = np.real(np.diag(h_final))
    tol = 1e-9 * max(1.0, float(np.max(np.abs(e))))
    ground = np.flatnonzero(e <= e.min() + tol)
    n = round(math.log2(e.size))
    shown = ", ".join(format(int(i), f"0{n}b") for i in ground[:6])
    more = f" and {ground.size - 6} more" if ground.size > 6 else ""
    return (
        f"the lowest classical configurations of H(1) are {shown}{more} (qubit 0 first, 0 for "
        f"Z_i = +1); {hint}"
    )


def _degenerate_ground_rule(system: System, mult: int) -> str:
    """Why a closed system whose final ground level is ``mult``-fold degenerate is refused."""
    return (
        f"gives a closed system whose final ground state is {mult}-fold degenerate, and no "
        "conserved quantity explains it (the spin-flip parity is conserved only when every "
        "field h_i is 0), so the target state is not unique and the error is undefined: "
        + _degeneracy_advice(system.hamiltonian.matrix(1.0))
    )


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
    bath = make_bath(bath_spec, ham.n_qubits)  # checks the [bath] section, temperature included
    tol = None if secular_tol_ghz is None else secular_tol_ghz * GHZ_TO_RAD_PER_NS
    return System(
        ham, bath, initial.state, beta=beta_from_mk(bath_spec.temperature_mk), degeneracy_tol=tol
    )


#: Systems built from the same spec parts are shared (their pre-flight runs once).
_cached_system = lru_cache(maxsize=16)(_system_from_parts)
