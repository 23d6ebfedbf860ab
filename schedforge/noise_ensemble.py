"""Which schedule degrades least under control errors: ensembles of noisy anneals.

For every schedule and anneal time of a spec's ``[sweep]`` grid, an ensemble of
noise draws (the ``[noise]`` section) is simulated through the sweep engine
(:func:`schedforge.sweep.run_sweep` with a :class:`~schedforge.sweep.PointPlan`):
resumable store, serial / processes / Dask executors, progress.  Each draw programs

    h_i' = h_i + level M z_i,  J_ij' = J_ij + level M z_ij   (terms in ``noise.terms``)
    A'(s) = (1 + amplitude_level z_A) A(s),  B'(s) = (1 + amplitude_level z_B) B(s)

with M the largest |h_i|, |J_ij| and the z of draw d from
``default_rng(SeedSequence([seed, d]))`` (:func:`schedforge.control_noise.draw_normals`:
the same h, J errors as draw d of ``schedforge precision``), so a draw is the same
whichever executor runs it.  The amplitude errors are constant in s (a miscalibrated
gain) and apply to any device curves, linear or tabulated (:class:`ScaledCurves`).

A draw's system (:func:`draw_system`: noisy problem, scaled curves, the spec's bath) is
built once per process and shared by every anneal of that draw, so its pre-flight (the
steady-state check and the gap scan) runs once per draw, not once per point.

Per point the store keeps the trace distance to the *noisy* problem's own final
steady state and, in ``stats_json["noise"]``, the probability of the *intended*
(noiseless) ground space of H(1) at the end.  The points of draw ``d`` are stored with
``variant = "draw-<d>"``; the noiseless points (``variant = "nominal"``) are run too,
for reference.  When the spec has a ``[waveform]`` section, every point also has a
played twin (the sweep's ``"realized"`` variant: the samples the hardware plays, on the
draw's device), stored with ``"-realized"`` appended to the variant.  The store is
keyed by the spec's physics and the noise model (level, terms, amplitude level, seed),
not by the number of draws: asking for more draws later computes only the new ones.

:func:`summarize_ensemble` gives per schedule and tf the mean, standard deviation and
spread (std / mean) of both quantities, and per schedule and draw a scaling fit of
the trace distance against tf (:func:`schedforge.analysis.fit_scaling`), to see
whether the error law survives the noise draw by draw.  The law is the one of the
dynamics (:func:`schedforge.error_law.error_law`: open, ``tf^-(k_end + 1)``; closed,
``tf^-(min(k_start, k_end) + 1)``), and each draw's fit only trusts anneal times long
against that draw's own time scale (:func:`schedforge.error_law.law_time_scale_ns` of
its noisy system, stored with each point).
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import math
import os
import socket
import threading
import time
import traceback
from collections import OrderedDict
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from . import __version__
from .control_noise import draw_normals, noisy_problem
from .device_curves import DeviceCurves, LinearCurves
from .error_law import CLOSED, OPEN, law_time_scale_ns
from .errors import InputError
from .problem_families import IsingProblem
from .schedules import schedule_label
from .spec_model import NoiseSpec, Spec

__all__ = [
    "DRAW_SYSTEM_CACHE_BYTES",
    "DRAW_SYSTEM_CACHE_MAX",
    "NOMINAL",
    "REALIZED_SUFFIX",
    "TABLE_FILES",
    "DrawErrors",
    "EnsemblePoint",
    "NoiseSweepOutcome",
    "ScaledCurves",
    "check_draws",
    "draw_errors",
    "draw_system",
    "ensemble_points",
    "intended_ground_probability",
    "noise_physics_hash",
    "noisy_spec",
    "parse_variant",
    "read_ensemble_rows",
    "run_ensemble_point",
    "run_noise_sweep",
    "scale_curves",
    "summarize_ensemble",
    "tabulate_ensemble",
    "write_ensemble_tables",
]

#: Draw index of the noiseless reference points.
NOMINAL = -1


# ---------------------------------------------------------------------------
# draws
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class DrawErrors:
    """The programmed problem and curve factors of one draw.

    Attributes
    ----------
    draw : int
    problem : IsingProblem
        The programmed (noisy) problem.
    factor_A, factor_B : float
        A'(s) = factor_A A(s), B'(s) = factor_B B(s).
    """

    draw: int
    problem: IsingProblem
    factor_A: float
    factor_B: float


def _noise(spec: Spec) -> NoiseSpec:
    if spec.noise is None:
        raise InputError("noise", "is required: add a [noise] section (see schedforge init)")
    return spec.noise


def draw_errors(spec: Spec, draw: int) -> DrawErrors:
    """The errors of draw ``draw`` (``NOMINAL``: none) of the spec's noise model."""
    base = IsingProblem.from_spec(spec.problem)
    if draw == NOMINAL:
        return DrawErrors(draw, base, 1.0, 1.0)
    noise = _noise(spec)
    width = base.n + base.n_couplings
    z_a, z_b = draw_normals(noise.seed, draw, width + 2)[width:]
    amp = noise.amplitude_level
    return DrawErrors(
        draw,
        noisy_problem(base, noise.level, noise.seed, draw, noise.terms),
        1.0 + amp * float(z_a),
        1.0 + amp * float(z_b),
    )


def noisy_spec(spec: Spec, draw: int) -> Spec:
    """The spec of draw ``draw`` with its programmed (noisy) problem h', J'.

    The draw's amplitude errors are not in it (a spec cannot scale tabulated curves):
    :func:`draw_system` applies them.

    Raises
    ------
    InputError
        A draw whose amplitude factor is not positive.
    """
    err = draw_errors(spec, draw)
    if err.factor_A <= 0 or err.factor_B <= 0:
        raise InputError(
            "noise.amplitude_level",
            f"gives draw {draw} a non-positive amplitude factor "
            f"(A x {err.factor_A:.3g}, B x {err.factor_B:.3g}); lower it",
        )
    return dataclasses.replace(spec, problem=err.problem.to_spec())


class ScaledCurves(DeviceCurves):
    """Device curves with relative amplitude errors: A'(s) = a A(s), B'(s) = b B(s).

    Any curves (linear or tabulated): every derivative is scaled by the same factor.
    The data-quality checks of a table (:meth:`smoothness_warnings`) are those of the
    curves it scales (their thresholds are relative, so a gain does not change them).

    Parameters
    ----------
    curves : DeviceCurves
        The designed curves.
    factor_A, factor_B : float
        The gains a, b (> 0).
    """

    def __init__(self, curves: DeviceCurves, factor_A: float, factor_B: float) -> None:
        if not (factor_A > 0 and factor_B > 0):
            raise ValueError(f"factors must be > 0, got {factor_A!r}, {factor_B!r}")
        self.curves = curves
        self.factors = np.array([float(factor_A), float(factor_B)])
        self.continuity = curves.continuity

    def __getattr__(self, name: str) -> Any:
        if name in ("smoothness_warnings", "warnings"):  # tabulated curves' checks
            return getattr(self.curves, name)
        raise AttributeError(name)

    def _derivatives(self, s: NDArray[np.float64], order: int) -> NDArray[np.float64]:
        return self.curves.derivatives(s, order) * self.factors[:, None, None]

    def describe(self) -> dict[str, Any]:
        return {
            **self.curves.describe(),
            "factor_A": float(self.factors[0]),
            "factor_B": float(self.factors[1]),
        }


def scale_curves(curves: DeviceCurves, factor_A: float, factor_B: float) -> DeviceCurves:
    """``curves`` with A, B scaled: linear curves as linear curves with A0, B0 scaled
    (no cost per evaluation), any other curves wrapped in :class:`ScaledCurves`."""
    if type(curves) is LinearCurves:
        return LinearCurves(curves.A0_ghz * factor_A, curves.B0_ghz * factor_B)
    return ScaledCurves(curves, factor_A, factor_B)


#: Memory (bytes) for the systems of recent draws kept in each process; a system
#: holds at most 16 d^2 (n + 2) bytes of matrices (H(s)'s two parts and one coupling
#: operator per qubit).  Our choice: small against a worker's memory.
DRAW_SYSTEM_CACHE_BYTES = 256 * 2**20
#: At most this many draw systems per process.
DRAW_SYSTEM_CACHE_MAX = 1024
_draw_systems: OrderedDict[tuple[Spec, int], Any] = OrderedDict()
_draw_systems_lock = threading.Lock()


def _build_draw_system(spec: Spec, draw: int) -> Any:
    from .hamiltonian import AnnealingHamiltonian
    from .system import System

    err = draw_errors(spec, draw)
    base = System.from_spec(noisy_spec(spec, draw))
    if (err.factor_A, err.factor_B) == (1.0, 1.0):
        return base
    curves = scale_curves(base.hamiltonian.curves, err.factor_A, err.factor_B)
    # the grouping tolerance: the spec's, else the default of the scaled H (as System does)
    tol = None if spec.numerics.secular_tol_ghz is None else base.degeneracy_tol
    return System(
        AnnealingHamiltonian(curves, base.hamiltonian.problem),
        base.bath,
        base.initial,
        beta=base.beta,
        degeneracy_tol=tol,
    )


def draw_system(spec: Spec, draw: int) -> Any:
    """The system of draw ``draw`` (``NOMINAL``: the spec's own), shared within a process.

    Noisy problem (:func:`noisy_spec`), the designed curves scaled by the draw's
    amplitude factors (:func:`scale_curves`), the spec's bath and initial state.
    The most recent draws' systems are kept (:data:`DRAW_SYSTEM_CACHE_BYTES`), so the
    anneals of one draw share one pre-flight.  Safe: a system is a pure function of
    (spec, draw), and its pre-flight caches only what that determines.

    Raises
    ------
    InputError
        Bad curves or bath, or a non-positive amplitude factor.
    """
    key = (spec, int(draw))
    with _draw_systems_lock:
        system = _draw_systems.get(key)
        if system is not None:
            _draw_systems.move_to_end(key)
            return system
    system = _build_draw_system(spec, int(draw))
    room = DRAW_SYSTEM_CACHE_BYTES // (16 * system.dim**2 * (system.hamiltonian.n_qubits + 2))
    with _draw_systems_lock:
        _draw_systems[key] = system
        while len(_draw_systems) > max(2, min(DRAW_SYSTEM_CACHE_MAX, room)):
            _draw_systems.popitem(last=False)
    return system


# ---------------------------------------------------------------------------
# points
# ---------------------------------------------------------------------------
#: Suffix of the store variant of a point run as the hardware plays it.
REALIZED_SUFFIX = "-realized"


@dataclass(frozen=True, order=True)
class EnsemblePoint:
    """One anneal of the ensemble: a schedule, an anneal time and a draw (-1: nominal).

    ``played`` points run the waveform the hardware plays (the sweep's ``"realized"``
    variant, :func:`schedforge.waveform.realize` with the spec's ``[waveform]``)
    under the draw's errors: the samples are those of the designed schedule (the
    control errors do not change what the generator plays), the device that plays
    them is the draw's.
    """

    family: str
    k_start: float
    k_end: float
    tf_ns: float
    draw: int
    played: bool = False

    @property
    def sweep_variant(self) -> str:
        """The sweep's variant: ``"ideal"`` (designed) or ``"realized"`` (played)."""
        return "realized" if self.played else "ideal"

    @property
    def variant(self) -> str:
        """The store's variant column: ``"nominal"`` or ``"draw-<d>"``, with
        ``"-realized"`` appended for played points."""
        base = "nominal" if self.draw == NOMINAL else f"draw-{self.draw:05d}"
        return base + (REALIZED_SUFFIX if self.played else "")

    def canonical(self) -> str:
        """Canonical JSON of the coordinates (floats as ``repr``), used in the key.

        A designed point's text is what it was before played points existed, so a
        store of designed points keeps its keys.
        """
        coords: dict[str, Any] = {
            "family": self.family,
            "k_start": repr(float(self.k_start)),
            "k_end": repr(float(self.k_end)),
            "tf_ns": repr(float(self.tf_ns)),
            "draw": int(self.draw),
        }
        if self.played:
            coords["variant"] = "realized"
        return json.dumps(coords, sort_keys=True)

    def label(self) -> str:
        """Short text, e.g. ``"beta k=0/2 tf=100 ns draw 7"`` (``" realized"`` appended)."""
        name = schedule_label(self.family, self.k_start, self.k_end)
        d = "nominal" if self.draw == NOMINAL else f"draw {self.draw}"
        return f"{name} tf={self.tf_ns:g} ns {d}" + (" realized" if self.played else "")


def parse_variant(variant: str) -> tuple[int, str] | None:
    """``(draw, sweep variant)`` of a store variant of an ensemble; None for others.

    ``"nominal"`` -> ``(NOMINAL, "ideal")``, ``"draw-00007-realized"`` ->
    ``(7, "realized")``.
    """
    played = variant.endswith(REALIZED_SUFFIX)
    base = variant[: -len(REALIZED_SUFFIX)] if played else variant
    kind = "realized" if played else "ideal"
    if base == "nominal":
        return NOMINAL, kind
    if base.startswith("draw-") and base[5:].isdigit():
        return int(base[5:]), kind
    return None


def ensemble_points(spec: Spec) -> list[EnsemblePoint]:
    """Every point of the spec's grid x (nominal + ``noise.draws`` draws), sorted.

    With a ``[waveform]`` section the grid has played ("realized") twins, and so
    does the ensemble: each draw runs the played waveform too.
    """
    from .sweep import sweep_points

    noise = _noise(spec)
    draws = [NOMINAL, *range(noise.draws)]
    return sorted(
        EnsemblePoint(p.family, p.k_start, p.k_end, p.tf_ns, d, p.variant == "realized")
        for p in sweep_points(spec)
        for d in draws
    )


def noise_physics_hash(spec: Spec) -> str:
    """Store key: the spec's physics hash and the noise model (without the draw count)."""
    noise = _noise(spec)
    model = {
        "level": noise.level,
        "terms": list(noise.terms),
        "amplitude_level": noise.amplitude_level,
        "seed": noise.seed,
    }
    text = spec.physics_hash() + "\n" + json.dumps(model, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()


@functools.lru_cache(maxsize=4)
def _intended_ground_space(spec: Spec) -> NDArray[Any]:
    """Orthonormal basis (columns) of the ground space of the noiseless H(1)."""
    eig = draw_system(spec, NOMINAL).eigen(1.0)
    v0 = eig.vectors[:, eig.labels == 0]
    v0.setflags(write=False)
    return v0


def intended_ground_probability(spec: Spec, rho: Any) -> float:
    """tr(P_0 rho) with P_0 the ground space of the *noiseless* H(1) of ``spec``."""
    v0 = _intended_ground_space(spec)
    return float(np.real(np.trace(v0.conj().T @ np.asarray(rho) @ v0)))


def _json_default(obj: Any) -> Any:
    item = getattr(obj, "item", None)
    if callable(item):
        return item()
    if isinstance(obj, tuple | set | frozenset):
        return list(obj)
    return str(obj)


def run_ensemble_point(spec: Spec, point: EnsemblePoint) -> dict[str, Any]:
    """Simulate one anneal of the ensemble; return its store row (picklable dict).

    Like :func:`schedforge.sweep.run_point`: numerical failure comes back as
    ``status = "failed"``, an unexpected exception as ``"error"``, bad input as
    ``"input-error"`` (the sweep stops on it).  ``stats_json["noise"]`` holds the
    draw, its amplitude factors and ``intended_ground_probability``.
    """
    from .dynamics import simulate_spec
    from .sweep import INPUT_ERROR, result_columns

    row: dict[str, Any] = {
        "family": point.family,
        "variant": point.variant,  # nominal / draw-<d>, with -realized for played points
        "k_start": float(point.k_start),
        "k_end": float(point.k_end),
        "tf_ns": float(point.tf_ns),
        "schedforge_version": __version__,
        "worker": f"{socket.gethostname()}:{os.getpid()}",
    }
    nan = math.nan
    t0 = time.perf_counter()
    try:
        errs = draw_errors(spec, point.draw)
        result = simulate_spec(
            noisy_spec(spec, point.draw),
            system=draw_system(spec, point.draw),
            tf_ns=point.tf_ns,
            k_end=point.k_end,
            family=point.family,
            k_start=point.k_start,
            variant=point.sweep_variant,
        )
        row.update(result_columns(result))
        p_int = (
            intended_ground_probability(spec, result.final_state)
            if result.ok and result.final_state is not None
            else nan
        )
        stats = dict(result.stats or {})
        stats["noise"] = {
            "draw": point.draw,
            "factor_A": errs.factor_A,
            "factor_B": errs.factor_B,
            "intended_ground_probability": p_int,
        }
        row["stats_json"] = json.dumps(stats, sort_keys=True, default=_json_default)
    except InputError as exc:
        row.update(_failed(time.perf_counter() - t0, INPUT_ERROR, exc.rule))
        row["input_field"] = exc.field
    except Exception as exc:  # recorded as status "error": must not stop the sweep
        tb = traceback.extract_tb(exc.__traceback__)
        where = f" (at {tb[-1].filename}:{tb[-1].lineno})" if tb else ""
        row.update(
            _failed(time.perf_counter() - t0, "error", f"{type(exc).__name__}: {exc}{where}")
        )
    from .store import utc_now

    row["computed_at"] = utc_now()
    return row


def _failed(wall_s: float, status: str, message: str) -> dict[str, Any]:
    from .sweep import failed_columns

    return {**failed_columns(wall_s), "status": status, "message": message}


# ---------------------------------------------------------------------------
# analysis
# ---------------------------------------------------------------------------
def read_ensemble_rows(rows: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """Flat ensemble rows from store rows: coordinates, draw, both quantities, status."""
    out = []
    for r in rows:
        parsed = parse_variant(str(r["variant"]))
        if parsed is None:
            continue
        draw, variant = parsed
        stats = json.loads(r.get("stats_json") or "{}")
        info = stats.get("noise", {})
        ok = r["status"] == "ok"
        # the draw's own pre-flight numbers (System.diagnostics, copied into the stats)
        closed = "min_spectral_gap_ghz" in stats and "liouvillian_gap_final_ghz" not in stats
        time_scale = law_time_scale_ns(SimpleNamespace(diagnostics=stats, closed=closed))
        p = info.get("intended_ground_probability", math.nan)
        out.append(
            {
                "family": r["family"],
                "variant": variant,
                "k_start": float(r["k_start"]),
                "k_end": float(r["k_end"]),
                "tf_ns": float(r["tf_ns"]),
                "draw": draw,
                "trace_distance": float(r["trace_distance"]) if ok else math.nan,
                "intended_ground_probability": float(p) if ok and p is not None else math.nan,
                "factor_A": float(info.get("factor_A", math.nan)),
                "factor_B": float(info.get("factor_B", math.nan)),
                "time_scale_ns": time_scale,
                "status": r["status"],
                "message": r.get("message", ""),
            }
        )
    out.sort(
        key=lambda x: (x["family"], x["variant"], x["k_start"], x["k_end"], x["tf_ns"], x["draw"])
    )
    return out


def _moments(values: Sequence[float]) -> tuple[float, float, float]:
    a = np.asarray(values, dtype=float)
    a = a[np.isfinite(a)]
    if a.size == 0:
        return math.nan, math.nan, math.nan
    if np.all(a == a[0]):
        # identical draws (level zero) spread by exactly nothing: the vectorised mean can
        # differ from them in the last bit on some CPUs (std 2.6e-22 on an AMD machine)
        mean, std = float(a[0]), (0.0 if a.size > 1 else math.nan)
    else:
        mean = float(a.mean())
        std = float(a.std(ddof=1)) if a.size > 1 else math.nan
    spread = std / abs(mean) if mean != 0 and math.isfinite(std) else math.nan
    return mean, std, spread


def _schedule_key(r: Mapping[str, Any]) -> tuple[str, str, float, float]:
    """(family, variant, k_start, k_end) of an ensemble row (variant "ideal" if absent)."""
    return (str(r["family"]), str(r.get("variant", "ideal")), r["k_start"], r["k_end"])


def summarize_ensemble(
    rows: Sequence[Mapping[str, Any]], *, atol: float = 1e-14, dynamics: str = OPEN
) -> tuple[list[dict[str, Any]], list[dict[str, Any]], list[dict[str, Any]]]:
    """Distribution per (schedule, tf), and the error slope per (schedule, draw).

    A schedule is (family, variant, k_start, k_end): a played ("realized") twin is
    summarized and fitted on its own.

    Parameters
    ----------
    rows : sequence of mapping
        From :func:`read_ensemble_rows`.
    atol : float
        The integrator's ``atol`` (sets the numerical floor of the fits).
    dynamics : {"open", "closed"}
        Which error law the per-draw fits expect
        (:func:`schedforge.error_law.dynamics_kind` of the spec).  A row's
        ``time_scale_ns`` (when present) is the time tf must be long against.

    Returns
    -------
    per_point : list of dict
        family, variant, k_start, k_end, tf_ns, draws, ok, the nominal values, and
        the mean, std and spread (std / mean) over the draws of the trace distance
        and of the intended ground-state probability (only draws whose status is ok).
    per_draw : list of dict
        family, variant, k_start, k_end, draw, slope, slope_stderr, expected_slope,
        error_law, verdict, message.
    per_schedule : list of dict
        The nominal fit and, over the draws: how many were fitted, how many agree
        with the expected slope, and the mean and std of their slopes.
    """
    from .analysis import AGREES, fit_scaling, numerical_floor

    if dynamics not in (OPEN, CLOSED):
        raise ValueError(f"dynamics must be {OPEN!r} or {CLOSED!r}, got {dynamics!r}")
    groups: dict[tuple[Any, ...], list[Mapping[str, Any]]] = {}
    for r in rows:
        groups.setdefault((*_schedule_key(r), r["tf_ns"]), []).append(r)
    per_point = []
    for (fam, var, k0, k1, tf), group in sorted(groups.items()):
        draws = [r for r in group if r["draw"] != NOMINAL]
        ok = [r for r in draws if r["status"] == "ok"]
        nominal = [r for r in group if r["draw"] == NOMINAL]
        td = _moments([r["trace_distance"] for r in ok])
        pg = _moments([r["intended_ground_probability"] for r in ok])
        per_point.append(
            {
                "family": fam,
                "variant": var,
                "k_start": k0,
                "k_end": k1,
                "tf_ns": tf,
                "draws": len(draws),
                "ok": len(ok),
                "nominal_trace_distance": nominal[0]["trace_distance"] if nominal else math.nan,
                "trace_distance_mean": td[0],
                "trace_distance_std": td[1],
                "trace_distance_spread": td[2],
                "nominal_intended_probability": nominal[0]["intended_ground_probability"]
                if nominal
                else math.nan,
                "intended_probability_mean": pg[0],
                "intended_probability_std": pg[1],
                "intended_probability_spread": pg[2],
            }
        )
    series: dict[tuple[Any, ...], list[Mapping[str, Any]]] = {}
    for r in rows:
        series.setdefault((*_schedule_key(r), r["draw"]), []).append(r)
    per_draw = []
    floor = numerical_floor(atol)
    for (fam, var, k0, k1, d), group in sorted(series.items()):
        scales = [float(r.get("time_scale_ns", math.nan)) for r in group]
        known = [t for t in scales if not math.isnan(t)]
        fit = fit_scaling(
            [r["tf_ns"] for r in group],
            [r["trace_distance"] for r in group],
            k_end=k1,
            status=[r["status"] for r in group],
            family=fam,
            variant=var,
            k_start=k0,
            floor=floor,
            noise=atol,
            dynamics=dynamics,
            time_scale_ns=max(known) if known else math.nan,
        )
        per_draw.append(
            {
                "family": fam,
                "variant": var,
                "k_start": k0,
                "k_end": k1,
                "draw": d,
                "slope": fit.slope,
                "slope_stderr": fit.slope_stderr,
                "expected_slope": fit.expected_slope,
                "error_law": fit.law.label,
                "verdict": fit.verdict,
                "message": fit.message,
            }
        )
    per_schedule = []
    for key in sorted({_schedule_key(r) for r in per_draw}):
        mine = [r for r in per_draw if _schedule_key(r) == key]
        nominal = [r for r in mine if r["draw"] == NOMINAL]
        draws = [r for r in mine if r["draw"] != NOMINAL]
        slopes = [r["slope"] for r in draws if math.isfinite(r["slope"])]
        mean, std, _ = _moments(slopes)
        per_schedule.append(
            {
                "family": key[0],
                "variant": key[1],
                "k_start": key[2],
                "k_end": key[3],
                "expected_slope": mine[0]["expected_slope"],
                "error_law": mine[0]["error_law"],
                "nominal_slope": nominal[0]["slope"] if nominal else math.nan,
                "nominal_verdict": nominal[0]["verdict"] if nominal else "",
                "draws": len(draws),
                "fitted": len(slopes),
                "agrees": sum(r["verdict"] == AGREES for r in draws),
                "slope_mean": mean,
                "slope_std": std,
            }
        )
    return per_point, per_draw, per_schedule


# ---------------------------------------------------------------------------
# the run
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class NoiseSweepOutcome:
    """What :func:`run_noise_sweep` did.

    Attributes
    ----------
    sweep : SweepOutcome
        The engine's outcome (store, points.csv, failed and lost points).
    rows : list of dict
        :func:`read_ensemble_rows` of the stored points of this ensemble.
    per_point, per_draw, per_schedule : list of dict
        :func:`summarize_ensemble`.
    files : dict of str to Path
        The tables written: ``ensemble``, ``summary``, ``slopes``, ``schedules``.
    """

    sweep: Any
    rows: list[dict[str, Any]]
    per_point: list[dict[str, Any]]
    per_draw: list[dict[str, Any]]
    per_schedule: list[dict[str, Any]]
    files: dict[str, Path]


def tabulate_ensemble(
    spec: Spec, store_rows: Sequence[Mapping[str, Any]]
) -> tuple[list[dict[str, Any]], list[dict[str, Any]], list[dict[str, Any]], list[dict[str, Any]]]:
    """``(rows, per_point, per_draw, per_schedule)`` of the stored points of an ensemble.

    :func:`read_ensemble_rows`, then :func:`summarize_ensemble` with the spec's
    ``atol`` and the error law of its dynamics.
    """
    from .error_law import dynamics_kind

    rows = read_ensemble_rows(store_rows)
    per_point, per_draw, per_schedule = summarize_ensemble(
        rows, atol=spec.numerics.atol, dynamics=dynamics_kind(spec)
    )
    return rows, per_point, per_draw, per_schedule


#: File names of the ensemble tables, by table.
TABLE_FILES = {
    "ensemble": "ensemble.csv",
    "summary": "ensemble-summary.csv",
    "slopes": "ensemble-slopes.csv",
    "schedules": "ensemble-schedules.csv",
}


def write_ensemble_tables(
    out_dir: str | os.PathLike[str], tables: Sequence[Sequence[Mapping[str, Any]]]
) -> dict[str, Path]:
    """Write the four tables of :func:`tabulate_ensemble` (:data:`TABLE_FILES`), each atomically."""
    from .control_noise import write_table_csv

    folder = Path(out_dir)
    files = {name: folder / file for name, file in TABLE_FILES.items()}
    for name, table in zip(TABLE_FILES, tables, strict=True):
        write_table_csv(files[name], table)
    return files


def check_draws(spec: Spec) -> None:
    """Build every draw's spec once, so that bad input stops the run before it starts."""
    noise = _noise(spec)
    for d in range(noise.draws):
        noisy_spec(spec, d)


def run_noise_sweep(
    spec: Spec,
    out_dir: str | os.PathLike[str],
    executor: Any = None,
    progress: str = "auto",
    fresh: bool = False,
    *,
    retry_failed: bool = False,
    progress_stream: Any = None,
) -> NoiseSweepOutcome:
    """Run the ensemble of every (schedule, tf) through the sweep engine and tabulate it.

    Parameters are those of :func:`schedforge.sweep.run_sweep`.  Writes, next to
    ``DIR/sweep.sqlite`` and ``DIR/points.csv``, the tables ``ensemble.csv`` (one row
    per anneal), ``ensemble-summary.csv`` (per schedule and tf), ``ensemble-slopes.csv``
    (per schedule and draw) and ``ensemble-schedules.csv`` (per schedule).

    Raises
    ------
    InputError
        No ``[noise]`` section, amplitude errors on tabulated curves, a draw with a
        non-positive amplitude factor, or the engine's own input errors.
    """
    from .sweep import PointPlan, run_sweep

    check_draws(spec)
    points = ensemble_points(spec)
    physics = {**spec.physics_dict(), "noise": dataclasses.asdict(_noise(spec))}
    plan = PointPlan(
        points=points,
        task=functools.partial(run_ensemble_point, spec),
        physics_hash=noise_physics_hash(spec),
        physics=physics,
    )
    outcome = run_sweep(
        spec,
        out_dir,
        executor,
        progress,
        fresh,
        retry_failed=retry_failed,
        progress_stream=progress_stream,
        plan=plan,
    )
    rows, per_point, per_draw, per_schedule = tables = tabulate_ensemble(spec, outcome.rows)
    files = write_ensemble_tables(out_dir, tables)
    return NoiseSweepOutcome(outcome, rows, per_point, per_draw, per_schedule, files)
