"""``schedforge design``: sample a spec's schedule in time and write it as CSV.

Exit status: 0 on success; 2 on bad input; 3 when the waveform breaks a limit of
the spec's ``[waveform]`` section (nothing is written unless
``--allow-limit-violations`` is given); 1 on an internal failure.  Every output
(``--out``, ``--plot``) is checked before any computation and written together:
all of them or none.
"""

from __future__ import annotations

import argparse
import io
import math
import sys
from pathlib import Path
from typing import Any

from ..device import make_device_curves
from ..errors import InputError
from ..fileio import atomic_write_all
from ..samples import DEFAULT_POINTS, sample_schedule, samples_metadata, write_samples
from ..schedules import schedule_from_spec
from ..spec import BUILTIN_PREFIX, load_spec
from ..system import curve_warnings
from .options import (
    EXIT_LIMIT_VIOLATION,
    add_spec_argument,
    check_output_path,
    nonnegative_float,
    positive_float,
    positive_int,
)

__all__ = ["register", "run"]


def register(subparsers: Any) -> None:
    """Add the ``design`` command."""
    parser = subparsers.add_parser(
        "design",
        help="sample the spec's schedule in time and write a CSV",
        description=(
            "Sample the schedule of SPEC over its anneal time and write a CSV with columns "
            "t_ns, s, ds_dt_per_ns, A_ghz, B_ghz (and dac_code with waveform.dac_bits), "
            "preceded by 12 '#' metadata lines.  With a [waveform] section it writes what "
            "the device plays (samples after quantization, or breakpoints) and refuses, "
            "with exit status 3, a waveform that breaks one of its limits.  Without it the "
            "grid includes t = 0 and t = tf; without --rate-gsps or --points it uses "
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
        help="sample the ideal design at R GS/s (samples every 1/R ns); with a [waveform] "
        "section this skips the device model (said on stderr), the limits are still checked",
    )
    grid.add_argument(
        "--points",
        type=positive_int("--points", minimum=2),
        metavar="N",
        help="sample the ideal design at N evenly spaced points (as --rate-gsps)",
    )
    parser.add_argument(
        "--tf-ns",
        type=positive_float("--tf-ns"),
        default=None,
        metavar="T",
        help="anneal time in ns (default: schedule.tf_ns of the spec)",
    )
    parser.add_argument(
        "--k-end",
        type=nonnegative_float("--k-end"),
        default=None,
        metavar="K",
        help="number of vanishing derivatives at the end (default: schedule.k_end)",
    )
    parser.add_argument(
        "--plot",
        metavar="FILE.png",
        help="also draw a figure (png, pdf or svg): s(t) and its first two derivatives, or "
        "with [waveform] the played waveform against the design, the deviation and A(t), B(t)",
    )
    parser.add_argument(
        "--allow-limit-violations",
        action="store_true",
        help="write the outputs even when the waveform breaks a limit of [waveform] "
        f"(the exit status is still {EXIT_LIMIT_VIOLATION})",
    )
    parser.set_defaults(handler=run)


_PLOT_FORMATS = ("png", "pdf", "svg")


def _plot_format(path: Path) -> str:
    fmt = path.suffix.lower().lstrip(".")
    if fmt not in _PLOT_FORMATS:
        raise InputError("--plot", f"must end in .png, .pdf or .svg, got {str(path)!r}")
    return fmt


def _figure_bytes(figure: Any, fmt: str) -> bytes:
    buffer = io.BytesIO()
    figure.savefig(buffer, format=fmt, dpi=120)
    return buffer.getvalue()


def run(args: argparse.Namespace) -> int:
    """Sample the schedule, check the limits, write the CSV (and the figure), print a summary."""
    out = check_output_path(args.out, "--out")
    plot_path = None if args.plot is None else check_output_path(args.plot, "--plot")
    fmt = ""
    if plot_path is not None:
        fmt = _plot_format(plot_path)
        if plot_path.resolve() == out.resolve():
            raise InputError("--plot", "must differ from --out")
    spec_path = None if args.spec.startswith(BUILTIN_PREFIX) else Path(args.spec).resolve()
    for option, path in (("--out", out), ("--plot", plot_path)):
        if path is not None and path.resolve() == spec_path:
            raise InputError(option, "must differ from the spec file")
    spec = load_spec(args.spec)
    changes = {
        key: value
        for key, value in (("tf_ns", args.tf_ns), ("k_end", args.k_end))
        if value is not None
    }
    if changes:
        spec = spec.with_schedule(**changes)
    schedule = schedule_from_spec(spec.schedule)
    curves = make_device_curves(spec.device)
    tf_ns = spec.schedule.tf_ns
    rate, points = args.rate_gsps, args.points
    realized = None  # with [waveform] and no grid option: export what the device plays
    if spec.waveform is not None and (rate is not None or points is not None):
        option = "--rate-gsps" if rate is not None else "--points"
        print(
            f"note: {option} samples the ideal design: the [waveform] device model "
            "(sample grid, quantization, filter, breakpoints) is not applied, so this is "
            "not what the device plays; its limits are checked on these samples.  Leave "
            f"out {option} to export the played waveform.",
            file=sys.stderr,
        )
    if rate is None and points is None and spec.waveform is not None:
        from ..waveform import played_samples, realize

        realized = realize(schedule, tf_ns, spec.waveform, curves)
        rate = spec.waveform.sample_rate_gsps
    if realized is not None and realized.mode != "analog":
        table = played_samples(realized, curves)
    else:
        table = sample_schedule(schedule, tf_ns, curves, rate_gsps=rate, points=points)
    meta = {"spec": spec.source or "", **samples_metadata(schedule, tf_ns, curves)}
    violations: tuple[Any, ...] = ()
    if realized is not None:
        violations = realized.violations
        if realized.mode == "analog":
            meta["export"] = "the designed schedule (no sample grid, bits or breakpoints given)"
    elif spec.waveform is not None:
        from ..waveform import sampled_violations

        violations = sampled_violations(table.t_ns, table.s, table.ds_dt_per_ns, spec.waveform)
        meta["export"] = "the ideal design on the grid asked for (device model not applied)"
    else:
        meta["export"] = "the designed schedule (no [waveform] section)"

    if realized is not None:
        for line in realized.summary()[2:]:
            print(f"waveform: {line}")
    elif violations:
        for v in violations:
            print(f"waveform: limit violation: {v}")
    if violations and not args.allow_limit_violations:
        print(
            f"error: the waveform breaks {len(violations)} limit(s) entered in [waveform] "
            f"(listed above); nothing written.  Change the design (tf, k_end, family) or the "
            "limits, or pass --allow-limit-violations to write it anyway",
            file=sys.stderr,
        )
        return EXIT_LIMIT_VIOLATION

    outputs: list[tuple[Path, Any]] = [(out, lambda fh: write_samples(fh, table, meta))]
    if plot_path is not None:
        if realized is not None:
            from ..plotting.waveform import plot_played

            figure = plot_played(realized, curves)
        else:
            from ..plotting.schedule import plot_schedule

            figure = plot_schedule(schedule, tf_ns)
        data = _figure_bytes(figure, fmt)  # rendered before any file is written
        outputs.append((plot_path, lambda fh: fh.write(data)))
    atomic_write_all(outputs)

    print(
        f"wrote {out}: {len(table)} samples ({table.metadata['grid']}), "
        f"{schedule.family} schedule, tf = {tf_ns:g} ns, flat end: first "
        f"{schedule.flat_end} derivative(s) of s vanish at t = tf"
        + (" (every order: k = inf)" if math.isinf(float(schedule.k_end)) else "")
    )
    if plot_path is not None:
        print(f"wrote {plot_path}")
    if spec.waveform is not None:
        print(
            "caution: schedforge does not know the device's safety limits; check the file "
            "against the device's documentation and the lab's practice before playing it",
            file=sys.stderr,
        )
    if violations:
        print(
            f"warning: written with --allow-limit-violations although it breaks "
            f"{len(violations)} limit(s) entered in [waveform] (exit status "
            f"{EXIT_LIMIT_VIOLATION})",
            file=sys.stderr,
        )
    if not schedule.is_monotone():
        print("warning: this schedule is not monotone in t", file=sys.stderr)
    for w in curve_warnings(curves, schedule.k_end):
        print(f"warning: device curves: {w}", file=sys.stderr)
    return EXIT_LIMIT_VIOLATION if violations else 0
