"""``schedforge design``: sample a spec's schedule in time and write it as CSV."""

from __future__ import annotations

import argparse
import io
import math
import sys
from pathlib import Path
from typing import Any

from ..device import make_device_curves
from ..dynamics import curve_warnings
from ..errors import InputError
from ..fileio import atomic_write_bytes
from ..samples import DEFAULT_POINTS, sample_schedule, samples_metadata, write_samples_csv
from ..schedules import schedule_from_spec
from ..spec import BUILTIN_PREFIX, load_spec
from .options import add_spec_argument, check_output_path, positive_float, positive_int

__all__ = ["register", "run"]


def register(subparsers: Any) -> None:
    """Add the ``design`` command."""
    parser = subparsers.add_parser(
        "design",
        help="sample the spec's schedule in time and write a CSV",
        description=(
            "Sample the schedule of SPEC over its anneal time and write a CSV with columns "
            "t_ns, s, ds_dt_per_ns, A_ghz, B_ghz, preceded by '#' metadata lines.  The grid "
            "includes t = 0 and t = tf; without --rate-gsps or --points it uses "
            "waveform.sample_rate_gsps from the spec, else "
            f"{DEFAULT_POINTS} evenly spaced points."
        ),
    )
    add_spec_argument(parser)
    parser.add_argument("--out", required=True, metavar="FILE.csv", help="CSV file to write")
    grid = parser.add_mutually_exclusive_group()
    grid.add_argument(
        "--rate-gsps",
        type=positive_float("--rate-gsps"),
        metavar="R",
        help="sample rate in GS/s (samples every 1/R ns)",
    )
    grid.add_argument(
        "--points",
        type=positive_int("--points", minimum=2),
        metavar="N",
        help="number of evenly spaced samples",
    )
    parser.add_argument(
        "--plot",
        metavar="FILE.png",
        help="also draw s(t) and its first two derivatives (png, pdf or svg)",
    )
    parser.set_defaults(handler=run)


_PLOT_FORMATS = ("png", "pdf", "svg")


def _plot_format(path: Path) -> str:
    fmt = path.suffix.lower().lstrip(".")
    if fmt not in _PLOT_FORMATS:
        raise InputError("--plot", f"must end in .png, .pdf or .svg, got {str(path)!r}")
    return fmt


def run(args: argparse.Namespace) -> int:
    """Sample the schedule, write the CSV (and the figure), print a summary."""
    out = check_output_path(args.out, "--out")
    plot_path = None if args.plot is None else check_output_path(args.plot, "--plot")
    if plot_path is not None:
        fmt = _plot_format(plot_path)
        if plot_path.resolve() == out.resolve():
            raise InputError("--plot", "must differ from --out")
    spec_path = None if args.spec.startswith(BUILTIN_PREFIX) else Path(args.spec).resolve()
    for option, path in (("--out", out), ("--plot", plot_path)):
        if path is not None and path.resolve() == spec_path:
            raise InputError(option, "must differ from the spec file")
    spec = load_spec(args.spec)
    schedule = schedule_from_spec(spec.schedule)
    curves = make_device_curves(spec.device)
    tf_ns = spec.schedule.tf_ns
    rate, points = args.rate_gsps, args.points
    realized = None  # with [waveform] and no grid option: export what the device plays
    if rate is None and points is None and spec.waveform is not None:
        from ..waveform import played_samples, realize

        realized = realize(schedule, tf_ns, spec.waveform, curves)
        rate = spec.waveform.sample_rate_gsps
    if realized is not None and realized.mode != "analog":
        table = played_samples(realized, curves)
    else:
        table = sample_schedule(schedule, tf_ns, curves, rate_gsps=rate, points=points)
    meta = {"spec": spec.source or "", **samples_metadata(schedule, tf_ns, curves)}
    if spec.waveform is not None:
        meta["export"] = table.metadata.get("played", "the designed schedule (no waveform model)")

    figure_bytes = None
    if plot_path is not None:
        from ..plotting.schedule import plot_schedule

        buffer = io.BytesIO()
        plot_schedule(schedule, tf_ns).savefig(buffer, format=fmt, dpi=120)
        figure_bytes = buffer.getvalue()  # rendered before any file is written

    write_samples_csv(out, table, meta)
    print(
        f"wrote {out}: {len(table)} samples ({table.metadata['grid']}), "
        f"{schedule.family} schedule, tf = {tf_ns:g} ns, flat end: first "
        f"{schedule.flat_end} derivative(s) of s vanish at t = tf"
        + (" (every order: k = inf)" if math.isinf(float(schedule.k_end)) else "")
    )
    if figure_bytes is not None:
        atomic_write_bytes(plot_path, figure_bytes)
        print(f"wrote {plot_path}")
    if realized is not None:
        for line in realized.summary()[2:]:
            print(f"waveform: {line}")
        print(
            "caution: schedforge does not know the device's safety limits; check the file "
            "against the device's documentation and the lab's practice before playing it",
            file=sys.stderr,
        )
    if not schedule.is_monotone():
        print("warning: this schedule is not monotone in t", file=sys.stderr)
    for w in curve_warnings(curves, schedule.k_end):
        print(f"warning: device curves: {w}", file=sys.stderr)
    return 0
