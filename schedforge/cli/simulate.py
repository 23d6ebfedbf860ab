"""``schedforge simulate``: one anneal of a spec, with its error to the target state."""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any

from ..analysis import DEFAULT_FLOOR_FACTOR, numerical_floor
from ..dynamics import SimulationResult, simulate_spec
from ..errors import InputError
from ..progress import AnnealProgress, anneal_progress
from ..spec import load_spec
from .options import add_spec_argument, nonnegative_float, positive_float

__all__ = ["format_result", "register", "run"]


#: What the progress line says while a played waveform is simulated.
PLAYED_NOTE = "played waveform: far slower than the design (it follows every sample)"


def register(subparsers: Any) -> None:
    """Add the ``simulate`` command."""
    parser = subparsers.add_parser(
        "simulate",
        help="simulate one anneal and report its distance to the target state",
        description=(
            "Simulate the anneal of SPEC (open system: time-dependent Davies master equation; "
            'bath spectrum "none": closed system) and report the trace distance of the final '
            "state to the target (the Gibbs state of H(1), or the ground state for a closed "
            "system), the ground-state infidelity and the excess energy over the target."
        ),
    )
    add_spec_argument(parser)
    parser.add_argument(
        "--tf-ns",
        type=positive_float("--tf-ns"),
        default=None,
        help="anneal time in ns (default: schedule.tf_ns of the spec)",
    )
    parser.add_argument(
        "--k-end",
        type=nonnegative_float("--k-end"),
        default=None,
        help="number of vanishing derivatives at the end (default: schedule.k_end)",
    )
    parser.add_argument(
        "--as-played",
        action="store_true",
        help="simulate the waveform the device plays (the spec's [waveform] model: samples, "
        "quantization, filter or breakpoints) instead of the ideal design; this costs far "
        "more (one qubit at 3 us: about 16 s instead of 0.05 s)",
    )
    parser.add_argument(
        "--json",
        action="store_true",
        help="print one JSON object (tf_ns, k_end, trace_distance, "
        "ground_infidelity, excess_energy_ghz, status, ...)",
    )
    parser.add_argument(
        "--quiet",
        action="store_true",
        help="no progress line while a long anneal runs (shown after 2 s on stderr)",
    )
    parser.set_defaults(handler=run)


def _clean(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_clean(v) for v in value]
    return value


def _floor(result: SimulationResult) -> float:
    """The numerical floor the analysis uses for this result (nan without an atol)."""
    atol = result.stats.get("atol")
    return numerical_floor(float(atol)) if atol is not None else math.nan


def format_result(result: SimulationResult) -> str:
    """A readable multi-line summary of one simulation."""
    lines = [
        f"schedule        {result.family} "
        f"(k_start = {result.k_start:g}, k_end = {result.k_end:g}), "
        f"{result.variant}",
        f"anneal time     {result.tf_ns:g} ns",
        f"integrator      {result.integrator} ({_work(result.stats)}{result.wall_s:.2f} s)",
        f"status          {result.status}",
    ]
    if result.ok:
        floor = _floor(result)
        lines += [
            f"trace distance  {result.trace_distance:.6e}   (||rho(tf) - sigma(1)||_1 / 2)",
        ]
        if result.trace_distance <= floor:
            lines.append(
                f"                below the numerical floor {floor:.2g} (= "
                f"{DEFAULT_FLOOR_FACTOR:g} x numerics.atol): not resolved by the integrator, "
                f"read it as < {floor:.2g}"
            )
        lines += [
            f"ground infid.   {result.ground_infidelity:.6e}   (1 - <ground|rho(tf)|ground>)",
            f"excess energy   {result.excess_energy_ghz:.6e} GHz "
            "(tr H(1)(rho(tf) - sigma(1)), E/h)",
        ]
    else:
        lines.append(f"failure         {result.message}")
        lines.append("no error figures: the integration did not finish")
    conserved = result.stats.get("conserved")
    if conserved:
        weights = result.stats.get("sector_weights") or {}
        shares = ", ".join(f"{name} {w:.6g}" for name, w in weights.items())
        # closed systems report the spectral gap of H(s), open ones the Liouvillian gap
        target = "ground state of H(1)" if "min_spectral_gap_ghz" in result.stats else "Gibbs state"
        lines.append(
            f"conserved       {conserved}: target = {target} per sector weighted by the "
            f"initial populations ({shares})"
        )
    gap = result.stats.get("liouvillian_gap_final_ghz")
    if gap is not None:
        lines.append(
            f"Liouvillian gap {gap:.4g} GHz at s = 1 "
            f"(min {result.stats['liouvillian_gap_min_ghz']:.4g}"
            f" GHz at s = {result.stats['s_at_liouvillian_gap_min']:.3f})"
        )
    return "\n".join(lines)


def _work(stats: dict[str, Any]) -> str:
    """The integrator's work counts that it reports, e.g. ``"29 steps, "``."""
    parts = [
        f"{stats[key]} {words}"
        for key, words in (("steps", "steps"), ("rhs_evaluations", "right-hand-side evaluations"))
        if isinstance(stats.get(key), int) and stats[key] > 0
    ]
    return "".join(f"{p}, " for p in parts)


def run(args: argparse.Namespace) -> int:
    """Run the command; bad input raises InputError (exit 2 via the CLI)."""
    spec = load_spec(args.spec)
    if args.as_played and spec.waveform is None:
        raise InputError("--as-played", "needs a [waveform] section in the spec (what is played)")
    progress = AnnealProgress(
        mode="quiet" if args.quiet else "auto", note=PLAYED_NOTE if args.as_played else ""
    )
    try:
        with anneal_progress(progress):
            result = simulate_spec(
                spec,
                tf_ns=args.tf_ns,
                k_end=args.k_end,
                variant="realized" if args.as_played else "ideal",
            )
    finally:
        progress.finish()
    if args.json:
        data = result.to_dict()
        floor = _floor(result)
        data["numerical_floor"] = floor
        data["below_numerical_floor"] = bool(result.ok and result.trace_distance <= floor)
        print(json.dumps(_clean(data), indent=2, sort_keys=True))
    else:
        print(format_result(result))
        for w in result.warnings:  # like the other commands: warnings on stderr
            print(f"warning: {w}", file=sys.stderr)
    return 0 if result.ok else 1
