"""``schedforge inspect``: derivatives of a spec's schedule at both ends, flatness, monotonicity."""

from __future__ import annotations

import argparse
import json
import math
from typing import Any

import numpy as np

from ..device import make_device_curves
from ..schedules import Schedule, schedule_from_spec
from ..spec import load_spec
from ..system import curve_warnings
from .options import add_spec_argument

__all__ = ["inspect_schedule", "register", "run"]


def register(subparsers: Any) -> None:
    """Add the ``inspect`` command."""
    parser = subparsers.add_parser(
        "inspect",
        help="show the schedule's end derivatives, flatness and monotonicity",
        description=(
            "Report the derivatives d^n s/dx^n (x = t/tf) of the schedule of SPEC at the "
            "start and at the end of the anneal for n = 0 .. ceil(max(k_start, k_end)) + 2, "
            "how many derivatives vanish at each end, and whether s is monotone."
        ),
    )
    add_spec_argument(parser)
    parser.add_argument(
        "--json",
        action="store_true",
        help="print a JSON object (keys start_derivatives, end_derivatives, flat_start, "
        "flat_end, monotone, curve_warnings, ...) instead of a table",
    )
    parser.set_defaults(handler=run)


def _finite_or_none(values: np.ndarray) -> list[float | None]:
    # "+ 0.0" turns -0.0 into 0.0 so that exact zeros print as 0
    return [float(v) + 0.0 if math.isfinite(v) else None for v in values]


def _number_or_none(value: float) -> float | None:
    return value if math.isfinite(value) else None


def inspect_schedule(schedule: Schedule) -> dict[str, Any]:
    """End derivatives, flatness and monotonicity of a schedule.

    Parameters
    ----------
    schedule : Schedule
        The schedule to inspect.

    Returns
    -------
    dict
        ``start_derivatives`` and ``end_derivatives``: lists indexed by order n of
        d^n s/dx^n at x = 0 and x = 1 (``None`` where the derivative is infinite
        or undefined, as for real-valued k); ``flat_start``, ``flat_end``: number
        of vanishing derivatives; ``monotone``; ``family``, ``k_start``,
        ``k_end``; ``notes``: plain-language remarks.
    """
    notes = []
    ks = [float(schedule.k_start), float(schedule.k_end)]
    finite = [k for k in ks if math.isfinite(k)]
    top = math.ceil(max(finite)) + 2 if finite else 0
    if not all(math.isfinite(k) for k in ks):
        checked = max(schedule.flat_start, schedule.flat_end)
        top = max(top, checked + 1)
        notes.append(
            f"k is infinite for this {schedule.family} schedule (every derivative vanishes "
            f"at a flat end); orders up to {top} are shown and {checked} were checked"
        )
    if schedule.max_order is not None and top > schedule.max_order:
        notes.append(
            f"derivatives are shown up to order {schedule.max_order}, the highest this "
            f"{schedule.family} schedule evaluates exactly"
        )
        top = schedule.max_order
    with np.errstate(all="ignore"):
        start, end = schedule.end_derivatives(top)
    for side, values in (("start", start), ("end", end)):
        bad = [n for n, v in enumerate(values) if not math.isfinite(v)]
        if bad:
            notes.append(
                f"at the {side} the derivative(s) of order {', '.join(map(str, bad))} "
                "are infinite or undefined (shown as null)"
            )
    return {
        "family": schedule.family,
        "k_start": _number_or_none(schedule.k_start),
        "k_end": _number_or_none(schedule.k_end),
        "derivatives_of": "s with respect to x = t/tf (multiply order n by tf^-n for t)",
        "start_derivatives": _finite_or_none(start),
        "end_derivatives": _finite_or_none(end),
        "flat_start": schedule.flat_start,
        "flat_end": schedule.flat_end,
        "monotone": schedule.is_monotone(),
        "notes": notes,
    }


def _k_text(k: float | None) -> str:
    return "infinite" if k is None else f"{k:g}"


def _format_table(report: dict[str, Any]) -> str:
    def cell(v: float | None) -> str:
        return "inf/undefined" if v is None else f"{v:.10g}"

    lines = [
        f"{report['family']} schedule, k_start = {_k_text(report['k_start'])}, "
        f"k_end = {_k_text(report['k_end'])}",
        "derivatives d^n s/dx^n, x = t/tf:",
        f"{'n':>3}  {'at start (x=0)':>18}  {'at end (x=1)':>18}",
    ]
    for n, (a, b) in enumerate(
        zip(report["start_derivatives"], report["end_derivatives"], strict=True)
    ):
        lines.append(f"{n:>3}  {cell(a):>18}  {cell(b):>18}")
    lines.append(f"flat start: first {report['flat_start']} derivative(s) vanish")
    lines.append(f"flat end:   first {report['flat_end']} derivative(s) vanish")
    lines.append(f"monotone:   {'yes' if report['monotone'] else 'NO'}")
    lines.extend(f"note: {note}" for note in report["notes"])
    lines.extend(f"warning: device curves: {w}" for w in report.get("curve_warnings", ()))
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    """Print the inspection report of the spec's schedule."""
    spec = load_spec(args.spec)
    schedule = schedule_from_spec(spec.schedule)
    report = inspect_schedule(schedule)
    report["tf_ns"] = spec.schedule.tf_ns
    # data-quality warnings of a tabulated [device] curves file (none for analytic curves)
    report["curve_warnings"] = curve_warnings(make_device_curves(spec.device), schedule.k_end)
    if args.json:
        print(json.dumps(report, indent=2, allow_nan=False))
    else:
        print(_format_table(report))
    return 0
