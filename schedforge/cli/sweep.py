"""``schedforge sweep SPEC --out DIR``: run every point of the spec's grid, resumably.

Each finished point is committed at once to ``DIR/sweep.sqlite``; rerunning the
same command after a crash, Ctrl-C or ``kill -9`` computes only the missing points.
``DIR/points.csv`` is regenerated from the store at the end.  After a complete
sweep :func:`schedforge.report.analyse_sweep_dir` adds the fits and the report to
``DIR`` (not with ``--points-only``, which moves an older study's fits and report to
``DIR/archive/`` instead, so that they never sit beside points they were not
made from).

The folder's lock is held from the start (and the ``--fresh`` archive) until the
fits and the report are written: no other sweep or report can change the folder
meanwhile.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from ..executors import make_executor
from ..store import POINTS_CSV_NAME, STUDY_OUTPUTS, archive_outputs, folder_lock
from .options import add_executor_arguments, add_spec_argument, check_output_dir, executor_kind

__all__ = ["register", "run"]


def register(subparsers: Any) -> None:
    """Add the ``sweep`` command."""
    p = subparsers.add_parser(
        "sweep",
        help="simulate every point of the spec's [sweep] grid (resumable)",
        description=(
            "Simulate every point of the spec's [sweep] grid (family x k_end x tf_ns; "
            "realized-waveform twins when the spec has [waveform]). Finished points are "
            "stored in DIR/sweep.sqlite at once; rerun the same command to resume after an "
            "interruption. Writes DIR/points.csv. The linear family has no flat end: one "
            "point per tf_ns, recorded with k_start = k_end = 0."
        ),
    )
    add_spec_argument(p)
    p.add_argument("--out", required=True, metavar="DIR", help="sweep folder (created if needed)")
    add_executor_arguments(p)
    p.add_argument(
        "--fresh",
        action="store_true",
        help="move the study in DIR (store, points.csv, fits, spec copy, plots, report; a "
        "damaged store intact) to DIR/archive/<time>/ and start over",
    )
    p.add_argument(
        "--retry-failed",
        action="store_true",
        help="compute again the stored points that did not succeed (by default they are "
        "kept and listed, not recomputed)",
    )
    p.add_argument(
        "--points-only",
        action="store_true",
        help="compute and store the points and write points.csv, but skip the fits and "
        "the report (make them later from DIR)",
    )
    p.add_argument("--quiet", action="store_true", help="no progress output")
    p.set_defaults(handler=run)


def _analyse(out: Path, spec: Any, *, echo: bool) -> None:
    """Fits, plots, spec copy and report of the finished sweep; the table on stdout."""
    from ..report import analyse_sweep_dir

    result = analyse_sweep_dir(out, spec)
    if echo:
        print(result.table)
        print(f"wrote {result.fit_csv}")
        print(f"wrote {result.report_html}")


def _analysis_hook() -> Any:
    """What runs after a complete sweep (a seam for tests)."""
    return _analyse


def run(args: argparse.Namespace) -> int:
    """Handler of ``schedforge sweep``; returns the exit status.

    0: every point is stored (some may have failed: they are listed);
    1: some points could not be computed (the executor lost them);
    2: bad input (raised as InputError and reported by the CLI);
    130: interrupted (Ctrl-C); the finished points are stored.
    """
    from ..spec import load_spec

    kind = executor_kind(args)
    out = check_output_dir(args.out, "--out")
    spec = load_spec(args.spec)
    out.mkdir(parents=True, exist_ok=True)
    with folder_lock(out):
        return _run_locked(args, spec, kind, out)


def _run_locked(args: argparse.Namespace, spec: Any, kind: str, out: Path) -> int:
    """The sweep, its points.csv, fits and report, with the folder lock held."""
    from ..limits import check_memory
    from ..sweep import format_summary, run_sweep

    progress = "quiet" if args.quiet else "auto"
    with make_executor(kind, args.workers, args.scheduler, args.dask_local) as ex:
        local = 1 + (getattr(ex, "workers", 1) if kind == "processes" else 0)
        check_memory(spec.problem.qubits, workers=local)  # the main process and its workers
        try:
            outcome = run_sweep(
                spec,
                out,
                executor=ex,
                progress=progress,
                fresh=args.fresh,
                retry_failed=args.retry_failed,
            )
        except KeyboardInterrupt:
            print(
                f"interrupted: every finished point is stored in {out / 'sweep.sqlite'}; "
                "rerun the same command to compute the rest",
                file=sys.stderr,
            )
            return 130
    if not args.quiet:
        print(format_summary(outcome))
        if outcome.archived is not None:
            print(f"old study archived to {outcome.archived}")
        print(f"wrote {outcome.csv_path}")
    if args.points_only:
        stale = [n for n in STUDY_OUTPUTS if n != POINTS_CSV_NAME]
        moved = archive_outputs(out, stale)
        if moved is not None:
            print(
                f"note: fits and report made from earlier points moved to {moved} "
                f"(`schedforge report {out}` makes new ones)",
                file=sys.stderr,
            )
    if not outcome.complete:
        print(
            f"error: sweep incomplete: {outcome.n_points - outcome.n_done} of "
            f"{outcome.n_points} points missing; rerun the same command to retry them",
            file=sys.stderr,
        )
        return 1
    if outcome.failed:
        where = "listed above" if not args.quiet else f"see the status column of {outcome.csv_path}"
        print(
            f"warning: sweep complete, but {outcome.n_failed} point(s) did not succeed "
            f"({where}); their numbers are NaN and must not be used (--retry-failed "
            "computes them again)",
            file=sys.stderr,
        )
    if not args.points_only:
        _analysis_hook()(out, spec, echo=not args.quiet)
    return 0
