"""The grid of points of a study and the resumable run over it.

A *point* is one simulation: a schedule family, its flat-start and flat-end orders
``k_start``, ``k_end``, an anneal time ``tf_ns`` and a ``variant`` ("ideal": the
designed schedule; "realized": the waveform the hardware plays, present only when
the spec has a ``[waveform]`` section, then as the twin of every ideal point).

:func:`sweep_points` expands a spec's ``[sweep]`` grid into points in canonical
order; :func:`run_sweep` computes every point not yet in ``DIR/sweep.sqlite`` with
an executor (serial, local processes, Dask), commits each result the moment it
arrives, and regenerates ``DIR/points.csv`` from the store.  Rerunning after a
crash computes only what is missing.

For the ``linear`` family ``k_start`` and ``k_end`` are meaningless (nothing is
flat): it contributes one point per ``tf_ns``, recorded with ``k_start = k_end = 0``.
A ``gevrey`` schedule is flat to every order at the end whatever ``k_end`` says: it
also contributes one point per ``tf_ns`` (per ``k_start``), recorded with ``k_end = 0``.

Each stored point keeps its own warnings (those of its simulation that are not
already warnings of the whole sweep, such as a tf short against the final
relaxation time) in ``stats_json["warnings"]``; they reach ``points.csv`` (column
``warnings``), the report and the console summary.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import math
import os
import socket
import time
import traceback
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from . import __version__
from .errors import InputError
from .executors import Executor, TaskLost, make_executor
from .metrics import metric_values, nan_metrics
from .progress import ProgressReporter
from .schedules import schedule_from_spec, schedule_grid, schedule_label
from .spec import spec_from_dict
from .spec_model import Spec
from .store import (
    POINTS_CSV_NAME,
    STORE_NAME,
    WARNING_SEPARATOR,
    PointStore,
    archive_sweep_dir,
    utc_now,
    write_points_csv,
)

__all__ = [
    "INPUT_ERROR",
    "VARIANTS",
    "PointPlan",
    "SweepOutcome",
    "SweepPoint",
    "failed_columns",
    "format_summary",
    "point_key",
    "result_columns",
    "run_point",
    "run_sweep",
    "spec_from_store",
    "sweep_points",
]

VARIANTS = ("ideal", "realized")
#: Status of a row that carries an input error instead of a result (never stored).
INPUT_ERROR = "input-error"


@dataclass(frozen=True, order=True)
class SweepPoint:
    """Coordinates of one simulation (frozen, hashable, ordered like points.csv).

    Field order is the sort order: family, variant, k_start, k_end, tf_ns.
    """

    family: str
    variant: str = field(default="ideal", kw_only=True)
    k_start: float = 0.0
    k_end: float = 0.0
    tf_ns: float = 1000.0

    def __post_init__(self) -> None:
        if self.variant not in VARIANTS:
            raise InputError(
                "variant", f"must be one of {', '.join(VARIANTS)}, got {self.variant!r}"
            )
        for name in ("k_start", "k_end", "tf_ns"):
            object.__setattr__(self, name, float(getattr(self, name)))

    def canonical(self) -> str:
        """Canonical JSON of the coordinates (floats as ``repr``), used in the key."""
        return json.dumps(
            {
                "family": self.family,
                "variant": self.variant,
                "k_start": repr(self.k_start),
                "k_end": repr(self.k_end),
                "tf_ns": repr(self.tf_ns),
            },
            sort_keys=True,
        )

    def label(self) -> str:
        """Short text, e.g. ``"beta k=0/2 tf=100 ns"`` (``" realized"`` appended)."""
        v = "" if self.variant == "ideal" else f" {self.variant}"
        return f"{schedule_label(self.family, self.k_start, self.k_end)} tf={self.tf_ns:g} ns{v}"


def point_key(physics_hash: str, point: SweepPoint) -> str:
    """SHA-256 (hex) of the spec's physics hash and the point's canonical coordinates."""
    return hashlib.sha256(f"{physics_hash}\n{point.canonical()}".encode()).hexdigest()


def sweep_points(spec: Spec) -> list[SweepPoint]:
    """Every point of the spec's ``[sweep]`` grid, without duplicates, sorted.

    Families default to ``[spec.schedule.family]``, k_end to ``[spec.schedule.k_end]``
    and tf_ns to ``[spec.schedule.tf_ns]`` (so a spec without ``[sweep]`` gives one
    point); k_start is ``spec.schedule.k_start``.  The schedules come from
    :func:`schedforge.schedules.schedule_grid`: ``linear`` gives one point per tf
    with ``k_start = k_end = 0``, ``gevrey`` one per tf with ``k_end = 0`` (its end
    is flat to every order whatever k_end).  With a ``[waveform]`` section every
    point has a ``"realized"`` twin.

    Parameters
    ----------
    spec : Spec

    Returns
    -------
    list of SweepPoint
    """
    grid = spec.sweep
    tfs = (grid.tf_ns if grid and grid.tf_ns else None) or (spec.schedule.tf_ns,)
    for tf in tfs:
        if not (isinstance(tf, int | float) and math.isfinite(tf) and tf > 0):
            raise InputError("sweep.tf_ns", f"must hold numbers > 0, got {tf!r}")
    variants = VARIANTS if spec.waveform is not None else ("ideal",)
    points = {
        SweepPoint(family, k_start, k_end, tf, variant=variant)
        for family, k_start, k_end in schedule_grid(spec)
        for tf in tfs
        for variant in variants
    }
    return sorted(points)


def _json_default(obj: Any) -> Any:
    item = getattr(obj, "item", None)  # numpy scalars
    if callable(item):
        return item()
    if isinstance(obj, tuple | set | frozenset):
        return list(obj)
    return str(obj)


def failed_columns(wall_s: float) -> dict[str, Any]:
    """The store's result columns of a point that produced no numbers (NaN metrics)."""
    return {
        **nan_metrics(),
        "integrator": "",
        "stats_json": "{}",
        "wall_s": wall_s,
    }


def _played_note(pending: Sequence[SweepPoint]) -> str:
    """The start line's note on played-waveform points, which cost far more."""
    # a plan's points (noise draws) name their sweep variant apart from the stored one
    n = sum(1 for p in pending if getattr(p, "sweep_variant", p.variant) == "realized")
    if not n:
        return ""
    return (
        f"; {n} of them as played, each far slower than its ideal twin (it follows every "
        "sample: one qubit at 3 us, 16 s instead of 0.05 s)"
    )


def result_columns(result: Any) -> dict[str, Any]:
    """The store's columns that a :class:`~schedforge.dynamics.SimulationResult` fills.

    Every metric of :data:`schedforge.metrics.METRICS`, ``wall_s``, status, message
    and the integrator that ran; shared by the sweep and the noise ensembles so both
    store a point the same way.
    """
    row: dict[str, Any] = {**metric_values(result), "wall_s": float(result.wall_s)}
    row["status"] = str(result.status)
    row["message"] = str(result.message or "")
    row["integrator"] = str(result.integrator or "")
    return row


def run_point(
    spec: Spec, point: SweepPoint, *, common_warnings: Sequence[str] = ()
) -> dict[str, Any]:
    """Simulate one point; return its store row (a plain, picklable dict).

    A module-level pure function, so executors can ship it to worker processes.
    Numerical failure comes back from :func:`schedforge.dynamics.simulate_spec`
    as ``status="failed"``; any *unexpected* exception is caught here and
    recorded as ``status="error"`` with its message, so one point never stops a
    sweep.  An :class:`~schedforge.errors.InputError` (bad input found only when
    this point is built) is returned as ``status="input-error"`` with
    ``input_field`` and the rule in ``message``: :func:`run_sweep` does not store
    it but stops and raises it (it would hit every similar point).

    Parameters
    ----------
    spec : Spec
    point : SweepPoint
    common_warnings : sequence of str
        Warnings of the whole sweep (the system's pre-flight), left out of the
        point's own ``warnings``.

    Returns
    -------
    dict
        Coordinates, every metric (:data:`schedforge.metrics.METRICS`),
        ``status``, ``message``, ``integrator``,
        ``stats_json`` (with the point's own warnings under ``"warnings"``),
        ``warnings`` (the same, joined by :data:`WARNING_SEPARATOR`), ``wall_s``,
        ``schedforge_version``, ``computed_at``, ``worker``.
    """
    row: dict[str, Any] = {
        "family": point.family,
        "variant": point.variant,
        "k_start": point.k_start,
        "k_end": point.k_end,
        "tf_ns": point.tf_ns,
        "schedforge_version": __version__,
        "worker": f"{socket.gethostname()}:{os.getpid()}",
    }
    t0 = time.perf_counter()
    try:
        from .dynamics import simulate_spec

        result = simulate_spec(
            spec,
            tf_ns=point.tf_ns,
            k_end=point.k_end,
            family=point.family,
            k_start=point.k_start,
            variant=point.variant,
        )
        row.update(result_columns(result))
        own = [w for w in result.warnings if w not in set(common_warnings)]
        stats = dict(result.stats or {})
        if own:
            stats["warnings"] = own
        row["stats_json"] = json.dumps(stats, sort_keys=True, default=_json_default)
        row["warnings"] = WARNING_SEPARATOR.join(own)
    except InputError as exc:  # bad input: not a result; run_sweep stops and reports it
        row.update(failed_columns(time.perf_counter() - t0))
        row.update(status=INPUT_ERROR, message=exc.rule, input_field=exc.field)
    except Exception as exc:  # recorded as status "error": must not stop the sweep
        tb = traceback.extract_tb(exc.__traceback__)
        where = f" (at {tb[-1].filename}:{tb[-1].lineno})" if tb else ""
        row.update(failed_columns(time.perf_counter() - t0))
        row.update(status="error", message=f"{type(exc).__name__}: {exc}{where}")
    row["computed_at"] = utc_now()
    return row


@dataclass(frozen=True)
class SweepOutcome:
    """What :func:`run_sweep` did.

    Attributes
    ----------
    out_dir, store_path, csv_path : Path
        The sweep folder, its store and its points.csv.
    n_points : int
        Points in the grid.
    n_skipped : int
        Points found already done in the store (not recomputed).
    n_computed : int
        Points computed and committed by this run.
    rows : list of dict
        The stored rows of the grid's points, sorted as in points.csv.
    failed : list of dict
        Rows whose status is not "ok" ("failed": integration failed;
        "error": unexpected exception).
    lost : list of (SweepPoint, str)
        Points the executor could not compute (worker died); not stored, rerun
        to retry.
    archived : Path or None
        Where ``fresh=True`` moved an old store.
    warnings : tuple of str
        Warnings of the system's preflight (e.g. where the secular approximation
        is doubtful); they apply to every point.
    executor : str
        Description of the executor used.
    wall_s : float
        Duration of this run.
    """

    out_dir: Path
    store_path: Path
    csv_path: Path
    n_points: int
    n_skipped: int
    n_computed: int
    rows: list[dict[str, Any]]
    failed: list[dict[str, Any]]
    lost: list[tuple[SweepPoint, str]]
    archived: Path | None
    warnings: tuple[str, ...]
    executor: str
    wall_s: float

    @property
    def n_done(self) -> int:
        """Grid points now in the store."""
        return len(self.rows)

    @property
    def n_failed(self) -> int:
        """Stored grid points whose status is not "ok"."""
        return len(self.failed)

    @property
    def complete(self) -> bool:
        """True when every grid point is in the store."""
        return self.n_done == self.n_points


@dataclass(frozen=True)
class PointPlan:
    """Points other than the spec's grid, run by :func:`run_sweep` with their own task.

    Used by studies that run many variants of one spec (e.g. the noise ensembles of
    :mod:`schedforge.noise_ensemble`) through the same store, executors and progress.

    Attributes
    ----------
    points : sequence
        Hashable objects with ``family``, ``k_start``, ``k_end``, ``tf_ns``,
        ``canonical()`` (text for the point key) and ``label()``.
    task : callable
        Picklable, module-level ``task(point) -> row`` (a store row, as
        :func:`run_point` returns).
    physics_hash : str
        Keys the store (instead of ``spec.physics_hash()``).
    physics : dict
        Saved in the store's meta data.
    """

    points: Sequence[Any]
    task: Callable[[Any], dict[str, Any]]
    physics_hash: str
    physics: dict[str, Any]


def _preflight(spec: Spec, points: Sequence[SweepPoint]) -> list[str]:
    """Check in this process what would fail identically at every point.

    Builds each distinct schedule (bad family / k raise :class:`InputError`),
    resolves the integrator name and runs the system's preflight (a non-unique
    final steady state raises :class:`~schedforge.errors.SteadyStateError`).
    Returns the system's warnings.
    """
    for fam, k0, k1 in sorted({(p.family, p.k_start, p.k_end) for p in points}):
        schedule_from_spec(dataclasses.replace(spec.schedule, family=fam, k_start=k0, k_end=k1))
    from .integrators import get_integrator
    from .system import System

    system = System.from_spec(spec)
    get_integrator(spec.numerics.integrator, system)  # an unknown integrator name is bad input
    return list(system.preflight() or [])


def run_sweep(
    spec: Spec,
    out_dir: str | os.PathLike[str],
    executor: Executor | str | None = None,
    progress: str = "auto",
    fresh: bool = False,
    *,
    retry_failed: bool = False,
    progress_stream: Any = None,
    after_point: Callable[[SweepPoint, dict[str, Any]], None] | None = None,
    plan: PointPlan | None = None,
) -> SweepOutcome:
    """Compute every point of the spec's grid that is not yet stored in ``out_dir``.

    Parameters
    ----------
    spec : Spec
        The study; its physics hash keys the store.
    out_dir : str or path-like
        Sweep folder (created if needed): ``sweep.sqlite`` and ``points.csv``.
    executor : Executor or str, optional
        An open executor (the caller closes it), or a kind for
        :func:`~schedforge.executors.make_executor` (default ``"processes"``,
        closed here).
    progress : {"auto", "bar", "lines", "quiet"}
        Progress display on ``progress_stream`` (default stderr).
    fresh : bool
        Archive an existing store of ``out_dir`` (to ``out_dir/archive/<time>/``)
        and start over; otherwise a store of another spec is refused.
    retry_failed : bool
        Compute again the stored points whose status is not "ok" (their rows are
        replaced by the new results); by default they are kept and not recomputed.
    progress_stream : text stream, optional
        Where progress goes.
    after_point : callable, optional
        Called as ``after_point(point, row)`` after each point is committed.
    plan : PointPlan, optional
        Run these points with their task instead of the spec's grid.

    Returns
    -------
    SweepOutcome

    Raises
    ------
    InputError
        Bad grid, a store of another spec in ``out_dir``, a sweep already running
        there, or a spec that a point rejects as bad input (the sweep stops
        there; the points finished before stay stored, points.csv is not written).
    KeyboardInterrupt
        Propagated after the finished points are safely stored.
    """
    t0 = time.perf_counter()
    folder = Path(out_dir)
    if folder.exists() and not folder.is_dir():
        raise InputError("--out", f"must be a directory, {folder} is a file")
    points = sweep_points(spec) if plan is None else list(plan.points)
    warnings = _preflight(spec, points)
    folder.mkdir(parents=True, exist_ok=True)
    archived = archive_sweep_dir(folder) if fresh else None
    physics_hash = spec.physics_hash() if plan is None else plan.physics_hash
    physics = spec.physics_dict() if plan is None else plan.physics
    keys = {p: point_key(physics_hash, p) for p in points}
    spec_json = json.dumps(dataclasses.asdict(spec), sort_keys=True, default=_json_default)
    lost: list[tuple[SweepPoint, str]] = []
    with PointStore(folder / STORE_NAME, physics_hash, physics=physics) as store:
        if retry_failed:
            store.forget(r["key"] for r in store.rows(keys.values()) if r["status"] != "ok")
        done_keys = store.keys()
        # Longest first (cost grows with tf): fewer idle workers at the end.
        pending = sorted((p for p in points if keys[p] not in done_keys), key=lambda p: -p.tf_ns)
        own_executor = not isinstance(executor, Executor)
        if own_executor and not (executor is None or isinstance(executor, str)):
            raise TypeError(f"executor must be an Executor or a kind, got {executor!r}")
        ex: Executor = make_executor(executor or "processes") if own_executor else executor
        reporter = ProgressReporter(
            len(points), done=len(points) - len(pending), stream=progress_stream, mode=progress
        )
        run_id = store.begin_run(
            executor=ex.describe(),
            n_points=len(points),
            n_pending=len(pending),
            spec_json=spec_json,
        )
        reporter.start(
            f"sweep: {len(points)} points, {len(points) - len(pending)} already in "
            f"{folder / STORE_NAME}, {len(pending)} to compute on {ex.describe()}"
            + (f" (old store archived to {archived})" if archived else "")
            + _played_note(pending)
        )
        for w in warnings:
            reporter.log(f"warning: {w}")
        state = "interrupted"
        n_computed = 0
        try:
            task = (
                functools.partial(run_point, spec, common_warnings=tuple(warnings))
                if plan is None
                else plan.task
            )
            for point, row in ex.map_unordered(task, pending):
                if isinstance(row, TaskLost):
                    lost.append((point, row.reason))
                    reporter.log(f"lost {point.label()}: {row.reason} (rerun to retry)")
                    continue
                if row["status"] == INPUT_ERROR:
                    raise InputError(
                        row["input_field"], f"{row['message']} (found at {point.label()})"
                    )
                store.commit(keys[point], row, run_id)
                n_computed += 1
                if after_point is not None:
                    after_point(point, row)
                note = row["status"]
                if row["status"] != "ok":
                    note += f" ({row['message'][:120]})"
                reporter.advance(note=f"{point.label()}: {note}")
            state = "complete" if not lost else "incomplete"
        except InputError:
            state = "stopped: bad input"
            raise
        finally:
            store.end_run(run_id, state)
            reporter.finish()
            if own_executor:
                ex.close()
        rows = store.rows(keys.values())
    csv_path = folder / POINTS_CSV_NAME
    write_points_csv(csv_path, rows)
    return SweepOutcome(
        out_dir=folder,
        store_path=folder / STORE_NAME,
        csv_path=csv_path,
        n_points=len(points),
        n_skipped=len(points) - len(pending),
        n_computed=n_computed,
        rows=rows,
        failed=[r for r in rows if r["status"] != "ok"],
        lost=lost,
        archived=archived,
        warnings=tuple(warnings),
        executor=ex.describe(),
        wall_s=time.perf_counter() - t0,
    )


def spec_from_store(out_dir: str | os.PathLike[str]) -> Spec:
    """The spec of the latest run recorded in ``out_dir/sweep.sqlite``.

    For tools that work on a finished sweep folder (analysis, report).  The
    rebuilt spec is checked against the store's physics hash.

    Parameters
    ----------
    out_dir : str or path-like
        A sweep folder.

    Returns
    -------
    Spec

    Raises
    ------
    InputError
        No store there, no run recorded, or the recorded spec does not match
        the store's physics hash.
    """
    path = Path(out_dir) / STORE_NAME
    with PointStore(path) as store:
        runs = [r for r in store.runs() if r.get("spec_json")]
        physics_hash = store.physics_hash
    if not runs:
        raise InputError(str(path), "records no sweep run (no spec to read)")
    spec = spec_from_dict(json.loads(runs[-1]["spec_json"]))
    if spec.physics_hash() != physics_hash:
        raise InputError(str(path), "holds a spec that does not match its physics hash (corrupt?)")
    return spec


def _num(value: float, fmt: str = ".3g") -> str:
    return format(value, fmt) if math.isfinite(value) else "-"


def _point_warning_lines(rows: Sequence[dict[str, Any]], limit: int = 5) -> list[str]:
    """Count of points with warnings of their own, and the first few of them."""
    warned = [r for r in rows if r.get("warnings")]
    if not warned:
        return []
    out = [
        f"{len(warned)} point(s) carry warnings of their own (column `warnings` of "
        f"{POINTS_CSV_NAME}):"
    ]
    for r in warned[:limit]:
        p = SweepPoint(r["family"], r["k_start"], r["k_end"], r["tf_ns"], variant=r["variant"])
        out.append(f"  {p.label()}: {r['warnings']}")
    if len(warned) > limit:
        out.append(f"  ... and {len(warned) - limit} more")
    return out


def format_summary(outcome: SweepOutcome) -> str:
    """Plain-text summary: one line per schedule, then warnings, failed and lost points.

    Error figures are shown only from points whose status is "ok"; ``warned``
    counts the points with warnings of their own, the first of which are listed.
    """
    groups: dict[tuple[str, str, float, float], list[dict[str, Any]]] = {}
    for r in outcome.rows:
        groups.setdefault((r["family"], r["variant"], r["k_start"], r["k_end"]), []).append(r)
    head = (
        f"{'family':<10} {'variant':<9} {'k_start':>7} {'k_end':>6} {'points':>6} "
        f"{'ok':>4} {'warned':>6} {'tf_ns range':>17} "
        f"{'trace dist. at min..max tf (ok points)':>40}"
    )
    lines = [head, "-" * len(head)]
    for (fam, var, k0, k1), rows in groups.items():
        ok = [r for r in rows if r["status"] == "ok"]
        tfs = [r["tf_ns"] for r in rows]
        span = f"{min(tfs):g}..{max(tfs):g}"
        if ok:
            lo = min(ok, key=lambda r: r["tf_ns"])
            hi = max(ok, key=lambda r: r["tf_ns"])
            err = f"{_num(lo['trace_distance'])} .. {_num(hi['trace_distance'])}"
        else:
            err = "no ok point"
        warned = sum(1 for r in rows if r.get("warnings"))
        lines.append(
            f"{fam:<10} {var:<9} {k0:>7g} {k1:>6g} {len(rows):>6} {len(ok):>4} {warned:>6} "
            f"{span:>17} {err:>40}"
        )
    lines.append(
        f"{outcome.n_done}/{outcome.n_points} points stored ({outcome.n_computed} computed now, "
        f"{outcome.n_skipped} found done); {outcome.n_failed} not ok; "
        f"{outcome.wall_s:.1f} s on {outcome.executor}"
    )
    for w in outcome.warnings:
        lines.append(f"warning (every point): {w}")
    lines += _point_warning_lines(outcome.rows)
    if outcome.failed:
        lines.append(f"points not ok ({outcome.n_failed}):")
        for r in outcome.failed:
            p = SweepPoint(r["family"], r["k_start"], r["k_end"], r["tf_ns"], variant=r["variant"])
            lines.append(f"  {p.label()}: {r['status']}: {r['message']}")
    if outcome.lost:
        lines.append(f"points not computed, the executor lost them ({len(outcome.lost)}):")
        for p, reason in outcome.lost:
            lines.append(f"  {p.label()}: {reason}")
    return "\n".join(lines)
