"""``schedforge noise-sweep SPEC --out DIR``: ensembles of noisy anneals per schedule.

Every (schedule, tf) of the spec's ``[sweep]`` grid is simulated for the noiseless
problem and for each noise draw of ``[noise]``, through the sweep engine (resumable
``DIR/sweep.sqlite``, executors, progress).  Writes ``DIR/points.csv``, the ensemble
tables (``ensemble*.csv``) and one report, ``DIR/report.html``: the control-error
section (:mod:`schedforge.noise_report`) above the sweep report of the noiseless points
(with ``DIR/fit.csv``, ``DIR/spec.toml`` and ``DIR/plots/``).
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
from pathlib import Path
from typing import Any

from ..errors import InputError
from ..executors import make_executor
from .options import add_executor_arguments, add_spec_argument, executor_kind, positive_int

__all__ = ["register", "run"]


def register(subparsers: Any) -> None:
    """Add the ``noise-sweep`` command."""
    p = subparsers.add_parser(
        "noise-sweep",
        help="simulate each schedule of the grid under an ensemble of control-error draws",
        description=(
            "For every schedule and tf of the spec's [sweep] grid, simulate the noiseless "
            "problem and each noise draw of [noise] (errors on h, J and the amplitudes of "
            "A(s), B(s)); report per schedule the distribution of the trace distance to the "
            "noisy problem's own steady state and of the intended ground-state probability, "
            "and whether the error slope survives draw by draw. Resumable like sweep."
        ),
    )
    add_spec_argument(p)
    p.add_argument("--out", required=True, metavar="DIR", help="folder (created if needed)")
    p.add_argument(
        "--draws", type=positive_int("--draws"), metavar="N", help="override noise.draws"
    )
    add_executor_arguments(p)
    p.add_argument("--fresh", action="store_true", help="archive an existing store, start over")
    p.add_argument("--retry-failed", action="store_true", help="recompute points not ok")
    p.add_argument("--quiet", action="store_true", help="no progress output")
    p.set_defaults(handler=run)


def _name(r: Any) -> str:
    """``"beta 0/2"``, ``"linear"``, with ``" played"`` for a realized twin."""
    from ..schedules import FAMILIES, Schedule

    has_k = FAMILIES.get(r["family"], Schedule).has_k
    name = f"{r['family']} {r['k_start']:g}/{r['k_end']:g}" if has_k else r["family"]
    return name + (" played" if r.get("variant") == "realized" else "")


def format_ensemble(outcome: Any) -> str:
    """Plain-text summary: per schedule the slope survival, per point the spreads."""

    def num(v: float) -> str:
        return f"{v:.3g}" if v == v else "-"

    lines = [
        f"{'schedule':<20} {'expected':>8} {'nominal':>8} {'draws':>5} {'agree':>5} "
        f"{'slope mean':>10} {'slope std':>9}"
    ]
    for r in outcome.per_schedule:
        name = _name(r)
        lines.append(
            f"{name:<20} {num(r['expected_slope']):>8} {num(r['nominal_slope']):>8} "
            f"{r['draws']:>5} {r['agrees']:>5} {num(r['slope_mean']):>10} {num(r['slope_std']):>9}"
        )
    lines.append("")
    lines.append(
        f"{'schedule':<20} {'tf_ns':>8} {'ok':>5} {'TD nominal':>10} {'TD mean':>9} "
        f"{'TD spread':>9} {'P0 mean':>8} {'P0 spread':>9}"
    )
    for r in outcome.per_point:
        name = _name(r)
        lines.append(
            f"{name:<20} {r['tf_ns']:>8g} {r['ok']:>5} {num(r['nominal_trace_distance']):>10} "
            f"{num(r['trace_distance_mean']):>9} {num(r['trace_distance_spread']):>9} "
            f"{num(r['intended_probability_mean']):>8} "
            f"{num(r['intended_probability_spread']):>9}"
        )
    lines.append(
        "TD: trace distance to the noisy steady state; P0: intended ground-state probability"
    )
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    """Handler of ``schedforge noise-sweep``.

    0: complete (failed points are listed); 1: points lost by the executor; 2: bad
    input; 130: interrupted (finished points are stored).
    """
    from ..noise_ensemble import run_noise_sweep
    from ..noise_report import ensemble_notes, write_noise_report
    from ..spec import load_spec

    kind = executor_kind(args)
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise InputError("--out", f"must be a directory, {out} is a file")
    spec = load_spec(args.spec)
    if spec.noise is None:
        raise InputError("noise", "is required: add a [noise] section (see schedforge init)")
    if args.draws is not None:
        spec = dataclasses.replace(spec, noise=dataclasses.replace(spec.noise, draws=args.draws))
    progress = "quiet" if args.quiet else "auto"
    with make_executor(kind, args.workers, args.scheduler, args.dask_local) as ex:
        try:
            outcome = run_noise_sweep(
                spec, out, ex, progress, args.fresh, retry_failed=args.retry_failed
            )
        except KeyboardInterrupt:
            print(
                f"interrupted: every finished point is stored in {out / 'sweep.sqlite'}; "
                "rerun the same command to compute the rest",
                file=sys.stderr,
            )
            return 130
    notes = ensemble_notes(outcome.sweep.rows)
    analysis = write_noise_report(out, spec, outcome.sweep.rows, notes=notes)
    if not args.quiet:
        print(format_ensemble(outcome))
        for n in [*(f"warning (every point): {w}" for w in outcome.sweep.warnings), *notes]:
            print(n)
        for path in [*outcome.files.values(), analysis.fit_csv, analysis.report_html]:
            print(f"wrote {path}")
    if not outcome.sweep.complete:
        missing = outcome.sweep.n_points - outcome.sweep.n_done
        print(
            f"error: noise sweep incomplete: {missing} of {outcome.sweep.n_points} points "
            "missing; rerun the same command to retry them",
            file=sys.stderr,
        )
        return 1
    return 0
