"""``schedforge precision SPEC``: how much analog precision the problem needs.

Static (no dynamics): every basis state's classical energy is enumerated for each
noise draw of the spec's ``[noise]`` section (defaults when absent).  Prints the
probability that the noisy problem's ground state leaves the intended ground-state
set, with its Wilson interval, and the largest noise level that keeps it below the
target; with ``[noise.problems]``, the same probability for generated problems of
growing size.  ``--out DIR`` writes the tables, figures and a JSON summary.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import sys
from pathlib import Path
from typing import Any

from ..errors import InputError
from .options import add_spec_argument, positive_float, positive_int

__all__ = ["format_precision", "register", "run"]

#: Ground states listed in the text output (the rest are counted).
_SHOWN_STATES = 8


def register(subparsers: Any) -> None:
    """Add the ``precision`` command."""
    p = subparsers.add_parser(
        "precision",
        help="probability that control errors change the ground state, and the precision needed",
        description=(
            "Enumerate the classical energies of the spec's problem for every noise draw of "
            "[noise] (Gaussian errors on h and J, as a fraction of the largest coefficient; "
            "the same draws at every level). Report the probability that the noisy ground "
            "state leaves the intended ground-state set (Wilson interval), the largest "
            "noise level that keeps it below noise.target, and, with [noise.problems], how "
            "the probability grows with the size of generated problems. No dynamics."
        ),
    )
    add_spec_argument(p)
    p.add_argument("--out", metavar="DIR", help="write tables, figures and a JSON summary here")
    p.add_argument("--level", type=float, metavar="L", help="override noise.level (>= 0)")
    p.add_argument(
        "--draws", type=positive_int("--draws"), metavar="N", help="override noise.draws"
    )
    p.add_argument(
        "--seed", type=positive_int("--seed", 0), metavar="S", help="override noise.seed"
    )
    p.add_argument(
        "--target", type=positive_float("--target"), metavar="P", help="override noise.target"
    )
    p.add_argument(
        "--problem-only",
        action="store_true",
        help="skip the generated problems of [noise.problems]",
    )
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.set_defaults(handler=run)


def _noise_from_args(spec: Any, args: argparse.Namespace) -> Any:
    from ..spec_model import NoiseSpec

    noise = spec.noise if spec.noise is not None else NoiseSpec()
    changes: dict[str, Any] = {}
    if args.level is not None:
        if not (math.isfinite(args.level) and args.level >= 0):
            raise InputError("--level", f"must be a number >= 0, got {args.level!r}")
        changes["level"] = float(args.level)
    if args.draws is not None:
        changes["draws"] = args.draws
    if args.seed is not None:
        changes["seed"] = args.seed
    if args.target is not None:
        if args.target > 1:
            raise InputError("--target", f"must be a number in (0, 1], got {args.target!r}")
        changes["target"] = args.target
    if args.problem_only:
        changes["problems"] = None
    return dataclasses.replace(noise, **changes)


def _bits(n: int, index: int) -> str:
    return format(int(index), f"0{n}b")


def _summary(precision: Any, noise: Any, sizes: list[dict[str, Any]] | None) -> dict[str, Any]:
    crit = precision.critical
    search = precision.search
    n = crit.problem.n
    return {
        "qubits": n,
        "problem_scale": crit.problem.scale(),
        "ground_energy": crit.ground_energy,
        "ground_states": [_bits(n, i) for i in crit.ground_states],
        "degeneracy": crit.degeneracy,
        "rule": (
            "a draw keeps the ground state when every ground state of the noisy problem "
            "lies in the intended ground-state set (energies within tol of the lowest); "
            "ties count as changed"
        ),
        "tol": crit.tol,
        "noise": dataclasses.asdict(noise),
        "at_level": precision.at_level.row(),
        "precision_needed": precision.crossing,
        "precision_conservative": precision.conservative,
        "search": dataclasses.asdict(search),
        "sizes": sizes,
    }


def _num(v: float, fmt: str = ".4g") -> str:
    return format(v, fmt) if math.isfinite(v) else ("inf" if v > 0 else "nan")


def format_precision(summary: dict[str, Any]) -> str:
    """Plain-text report of :func:`_summary`'s dictionary."""
    noise = summary["noise"]
    at = summary["at_level"]
    search = summary["search"]
    gs = summary["ground_states"]
    shown = ", ".join(gs[:_SHOWN_STATES]) + (
        f" ... ({len(gs) - _SHOWN_STATES} more)" if len(gs) > _SHOWN_STATES else ""
    )
    conf = f"{100 * at['confidence']:g}%"
    lines = [
        f"problem: {summary['qubits']} qubits, largest |coefficient| "
        f"{_num(summary['problem_scale'])}, ground energy {_num(summary['ground_energy'])}",
        f"intended ground states ({summary['degeneracy']}; bit 0 = Z +1, qubit 0 first): {shown}",
        f"rule: {summary['rule']}",
        f"noise: Gaussian on {', '.join(noise['terms']) or 'nothing'}, {noise['draws']} draws, "
        f"seed {noise['seed']} (same draws at every level)"
        + ("" if summary.get("noise_in_spec", True) else "; defaults: the spec has no [noise]"),
        f"at level {at['level']:g}: ground state changed in {at['changed']} of {at['draws']} "
        f"draws, P = {_num(at['probability'])} ({conf} Wilson interval "
        f"{_num(at['lower'])} .. {_num(at['upper'])})",
    ]
    target = noise["target"]
    if search["status"] == "not reached":
        lines.append(
            f"precision needed: the estimate stays below {target:g} up to level "
            f"{_num(search['level_below'])} (the largest searched); no crossing found"
        )
    else:
        lines.append(
            f"precision needed for P < {target:g}: level < {_num(summary['precision_needed'])} "
            f"(search bracket {_num(search['level_below'], '.6g')} .. "
            f"{_num(search['level_above'], '.6g')}, "
            f"{search['evaluations']} evaluations); with the {conf} Wilson upper bound below "
            f"{target:g}: level < {_num(summary['precision_conservative'])}"
        )
    sizes = summary.get("sizes")
    if sizes:
        lines.append("")
        lines.append(f"generated problems at level {noise['level']:g}:")
        head = (
            f"{'qubits':>6} {'inst.':>5} {'P mean':>8} {'P min':>8} {'P max':>8} "
            f"{'precision needed (median)':>26}"
        )
        lines += [head, "-" * len(head)]
        for r in sizes:
            lines.append(
                f"{r['size']:>6} {r['instances']:>5} {_num(r['probability_mean']):>8} "
                f"{_num(r['probability_min']):>8} {_num(r['probability_max']):>8} "
                f"{_num(r['crossing_median']):>26}"
            )
    return "\n".join(lines)


def _write_outputs(
    out: Path, precision: Any, rows: list[Any], summary: dict[str, Any]
) -> list[Path]:
    from ..control_noise import summarize_sizes, write_table_csv
    from ..fileio import atomic_write_bytes, atomic_write_text
    from ..plotting.noise import plot_flip_curve, plot_size_growth
    from ..report import _png

    out.mkdir(parents=True, exist_ok=True)
    written = []
    path = out / "precision.csv"
    write_table_csv(path, [e.row() for e in precision.curve])
    written.append(path)
    path = out / "critical_levels.csv"
    write_table_csv(
        path,
        [{"draw": d, "critical_level": float(c)} for d, c in enumerate(precision.critical.levels)],
    )
    written.append(path)
    path = out / "precision.png"
    atomic_write_bytes(path, _png(plot_flip_curve(precision)))
    written.append(path)
    if rows:
        path = out / "sizes.csv"
        write_table_csv(path, [r.row() for r in rows])
        written.append(path)
        path = out / "sizes-summary.csv"
        write_table_csv(path, summarize_sizes(rows))
        written.append(path)
        path = out / "sizes.png"
        atomic_write_bytes(
            path, _png(plot_size_growth(summarize_sizes(rows), summary["noise"]["level"]))
        )
        written.append(path)
    path = out / "precision.json"
    atomic_write_text(path, json.dumps(_clean(summary), indent=2, sort_keys=True) + "\n")
    written.append(path)
    return written


def _clean(value: Any) -> Any:
    """JSON-safe: non-finite floats become strings."""
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    return value


def run(args: argparse.Namespace) -> int:
    """Handler of ``schedforge precision``; 0 on success."""
    from ..control_noise import problem_precision, size_growth, summarize_sizes
    from ..problem_families import IsingProblem
    from ..spec import load_spec

    out = Path(args.out) if args.out else None
    if out is not None and out.exists() and not out.is_dir():
        raise InputError("--out", f"must be a directory, {out} is a file")
    spec = load_spec(args.spec)
    noise = _noise_from_args(spec, args)

    def say(msg: str) -> None:
        if not args.quiet:
            print(msg, file=sys.stderr, flush=True)

    precision = problem_precision(IsingProblem.from_spec(spec.problem), noise)
    rows = size_growth(noise, say) if noise.problems is not None else []
    summary = _summary(precision, noise, summarize_sizes(rows) if rows else None)
    summary["noise_in_spec"] = spec.noise is not None
    if args.json:
        print(json.dumps(_clean(summary), indent=2, sort_keys=True))
    else:
        print(format_precision(summary))
    if out is not None:
        for path in _write_outputs(out, precision, rows, summary):
            say(f"wrote {path}")
    return 0
