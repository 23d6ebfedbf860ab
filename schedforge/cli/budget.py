"""``schedforge budget SPEC --error EPS``: the shortest anneal that meets an error budget."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from .options import add_spec_argument, positive_float

__all__ = ["register", "run"]


def register(subparsers: Any) -> None:
    """Add the ``budget`` command."""
    p = subparsers.add_parser(
        "budget",
        help="rank schedules and k_end by the anneal time that meets an error budget",
        description="Predict, for every family and k_end of the spec's sweep grid (or those "
        "given), the anneal time tf = (C_k / EPS)^(1/(k+1)) at which the trace distance to "
        "the final steady state meets EPS; estimate whether tf lies in the regime where the "
        "law holds; confirm the fastest candidates with a real simulation (a candidate is "
        "confirmed when its simulated error is <= EPS, no tolerance, and within 10%% of the "
        "law; tf is lengthened by the measured shortfall when needed).",
    )
    add_spec_argument(p)
    p.add_argument(
        "--error",
        dest="eps",
        required=True,
        type=positive_float("--error"),
        metavar="EPS",
        help="error budget on the trace distance, in (0, 1)",
    )
    p.add_argument("--family", action="append", default=None, help="schedule family (repeatable)")
    p.add_argument(
        "--k-end",
        action="append",
        type=float,
        default=None,
        dest="k_end",
        help="flatness order at the end (repeatable); default: the sweep grid's",
    )
    p.add_argument(
        "--confirm",
        type=int,
        default=2,
        metavar="N",
        help="simulate the N fastest candidates, shortest predicted tf first (default 2; 0: none)",
    )
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Handler: prints the budget table; 0 on success."""
    from ..budget import format_budget_table, plan_budget
    from ..spec import load_spec

    spec = load_spec(args.spec)

    def say(msg: str) -> None:
        if not args.quiet:
            print(msg, file=sys.stderr, flush=True)

    plan = plan_budget(
        spec,
        args.eps,
        families=args.family,
        k_values=args.k_end,
        confirm=args.confirm,
        progress=say,
    )
    print(format_budget_table(plan))
    return 0
