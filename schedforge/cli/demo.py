"""``schedforge demo [--out DIR]``: the whole study on two built-in scenarios of our own.

The demo sweeps two invented scenarios (``builtin:driven-qubit``, one qubit, and
``builtin:ising-2q``, a two-qubit Ising problem) over the anneal times of their
``[sweep]`` sections, which reach their equilibrated regimes, fits the error laws (the
law of the scenario's dynamics, named in the table: both are open systems, so
tf^-(k_end+1)), compares them with the coefficients predicted from the final
generator, writes one report per scenario, and plans an error budget for the qubit
(the fastest candidate is confirmed by simulation; "meets" means simulated <= EPS).
Every number printed comes from a real simulation or from the analysis of one; fits
whose regime is not reached are reported as such, without a slope.
"""

from __future__ import annotations

import argparse
import sys
import time
from typing import Any

from .options import check_output_dir

__all__ = ["register", "run"]

#: Error budget of the demo's planning step (trace distance).
DEMO_EPS = 1e-6


def _demo_specs() -> list[tuple[str, Any]]:
    """(name, spec) of the demo's scenarios: the packaged ones, as they are."""
    from ..spec import load_spec

    return [(name, load_spec(f"builtin:{name}")) for name in ("driven-qubit", "ising-2q")]


def register(subparsers: Any) -> None:
    """Add the ``demo`` command."""
    p = subparsers.add_parser(
        "demo",
        help="run the whole study on built-in scenarios and write the reports",
        description="Sweep two built-in scenarios of our own (a driven qubit and a small "
        "Ising problem), fit the error laws, compare with the predicted coefficients, "
        "write DIR/<scenario>/report.html and plan an error budget.",
    )
    p.add_argument(
        "--out", default="demo-out", metavar="DIR", help="output folder (default demo-out)"
    )
    p.add_argument(
        "--executor",
        choices=("serial", "processes"),
        default="processes",
        help="how to run the points (default processes: all cores)",
    )
    p.add_argument(
        "--fresh",
        action="store_true",
        help="archive results of an earlier demo in DIR and start over",
    )
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Handler: 0 when every scenario ran; 1 if points are missing."""
    from ..budget import format_budget_table, plan_budget
    from ..report import analyse_sweep_dir
    from ..sweep import run_sweep

    out = check_output_dir(args.out, "--out")
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    status = 0
    first_spec = None
    for name, spec in _demo_specs():
        first_spec = first_spec or spec
        folder = out / name
        grid = spec.sweep
        assert grid is not None
        print(
            f"== {name}: {len(grid.tf_ns)} anneal times x k_end "
            f"{', '.join(f'{k:g}' for k in grid.k_end)} (integrator {spec.numerics.integrator})",
            flush=True,
        )
        outcome = run_sweep(
            spec,
            folder,
            executor=args.executor,
            progress="quiet" if args.quiet else "auto",
            fresh=args.fresh,
        )
        if not outcome.complete:
            print(f"error: {name}: {outcome.n_points - outcome.n_done} points missing; rerun")
            status = 1
            continue
        if outcome.failed:
            print(f"warning: {name}: {outcome.n_failed} point(s) failed (see points.csv)")
        warned = sum(1 for r in outcome.rows if r.get("warnings"))
        if warned:
            print(
                f"warning: {name}: {warned} point(s) carry warnings of their own (column "
                "`warnings` of points.csv, and the report)"
            )
        result = analyse_sweep_dir(
            folder,
            spec,
            title=f"schedforge demo: {name}",
            notes=(
                f"Scenario {name!r}, invented for this demo (not a real device), with the "
                "demo's own anneal-time grid.",
            ),
        )
        print(result.table)
        print(f"wrote {result.report_html}", flush=True)
    if first_spec is not None:
        print(f"== error budget EPS = {DEMO_EPS:g} for driven-qubit", flush=True)
        plan = plan_budget(first_spec, DEMO_EPS, confirm=1)
        print(format_budget_table(plan))
    print(f"demo finished in {time.perf_counter() - t0:.0f} s; reports under {out}/")
    sys.stdout.flush()
    return status
