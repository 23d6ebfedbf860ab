"""Speed of the eigenframe integrator, side by side with its references.

Run from the repository root (about 5-15 minutes on a 2-core machine)::

    python benchmarks/bench_eigenframe.py                  # everything
    python benchmarks/bench_eigenframe.py --parts tf sweep # a subset

Parts:
- ``qutip``: QuTiP ``brmesolve`` (secular Bloch-Redfield, time-dependent H, Verner 9(8)
  at atol 1e-13 / rtol 1e-11) against the eigenframe integrator for the driven qubit at
  tf = 1e3 ns, k_end = 2: wall times, their ratio and the relative difference of the
  trace distances.
- ``general``: the same point with the general (lab-frame DOP853) integrator.
- ``tf``: eigenframe wall time per point at tf = 1e2 .. 1e5 ns and t(1e5) / t(1e2).
- ``qubits``: wall time per point against qubit count 1..8 at tf = 1e3 ns (invented,
  fully connected Ising instances with seeded random fields and couplings), each point
  in a child process stopped after 5 minutes.
- ``qubits_long``: the same for 2..5 qubits at tf = 1e4 and 1e5 ns.
- ``sweep``: 5 values of k_end x 17 tf from 1e1 to 1e5 ns for the driven qubit, serially.

Each part prints its lines; copy them to benchmarks/RESULTS.md with date and machine.
"""

from __future__ import annotations

import argparse
import os
import platform
import subprocess
import sys
import time
from dataclasses import replace
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from schedforge.dynamics import simulate
from schedforge.schedules import make_schedule
from schedforge.spec import load_spec
from schedforge.spec_model import ProblemSpec
from schedforge.system import System


def _qubit() -> System:
    return System.from_spec(load_spec("builtin:driven-qubit"))


def _instance(n: int) -> ProblemSpec:
    """An invented, fully connected Ising instance (seeded random fields and couplings).

    Unrounded values: round ones make final Bohr frequencies coincide by accident, and
    then the integrator rightly hands over to the general one.
    """
    rng = np.random.default_rng(20261201 + n)
    h = tuple(float(rng.uniform(0.3, 0.9) * rng.choice([-1.0, 1.0])) for _ in range(n))
    J = tuple((i, j, float(rng.uniform(-0.6, 0.6))) for i in range(n) for j in range(i + 1, n))
    return ProblemSpec(qubits=n, h=h, J=J)


def _timed(fn, *args, **kwargs):
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    return out, time.perf_counter() - t0


def part_qutip(tf: float = 1e3, k_end: int = 2) -> None:
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    from tests.qutip_reference import brmesolve_trace_distance

    system = _qubit()
    fast, t_fast = _timed(simulate, system, make_schedule("beta", k_end=k_end), tf)
    ref, t_ref = _timed(brmesolve_trace_distance, system, k_end, tf)
    print(
        f"qutip   tf={tf:g} k={k_end}: brmesolve {t_ref:.2f} s, eigenframe {t_fast:.3f} s, "
        f"ratio {t_ref / t_fast:.0f}x; trace distance {ref:.10e} vs "
        f"{fast.trace_distance:.10e} (rel. diff {fast.trace_distance / ref - 1:.1e})"
    )


def part_general(tf: float = 1e3, k_end: int = 2) -> None:
    system = _qubit()
    f = make_schedule("beta", k_end=k_end)
    fast, t_fast = _timed(simulate, system, f, tf)
    ref, t_ref = _timed(simulate, system, f, tf, integrator="general", rtol=1e-12, atol=1e-16)
    print(
        f"general tf={tf:g} k={k_end}: general {t_ref:.2f} s, eigenframe {t_fast:.3f} s, "
        f"ratio {t_ref / t_fast:.0f}x; rel. diff "
        f"{fast.trace_distance / ref.trace_distance - 1:.1e}"
    )


def part_tf(k_end: int = 2, repeats: int = 3) -> None:
    system = _qubit()
    f = make_schedule("beta", k_end=k_end)
    times = {}
    for tf in (1e2, 1e3, 1e4, 1e5):
        walls = []
        for _ in range(repeats):
            r, w = _timed(simulate, system, f, tf)
            walls.append(w)
        times[tf] = min(walls)
        print(
            f"tf      tf={tf:>8g} ns: {times[tf]:.3f} s (best of {repeats}), "
            f"steps {r.stats['steps']}, mode {r.stats.get('mode')}, integrator {r.integrator}"
        )
    print(f"tf      t(1e5)/t(1e2) = {times[1e5] / times[1e2]:.2f}")


def qubit_point(n: int, tf: float = 1e3) -> None:
    """One point of the ``qubits`` part (run in a child process, under a time limit)."""
    spec = load_spec("builtin:driven-qubit")
    f = make_schedule("beta", k_end=2)
    system = System.from_spec(replace(spec, problem=_instance(n)))
    t0 = time.perf_counter()
    system.preflight()
    t_pre = time.perf_counter() - t0
    r, w = _timed(simulate, system, f, tf)
    est = r.stats.get("free_mode_error_estimate")
    warned = any(w.startswith("eigenframe integrator:") for w in r.warnings)
    print(
        f"qubits  n={n} tf={tf:g}: {w:.2f} s per point (preflight {t_pre:.2f} s of it), "
        f"integrator {r.integrator}, status {r.status}, steps {r.stats.get('steps')}, "
        f"trace distance {r.trace_distance:.12e}, free-mode error estimate "
        f"{'n/a' if est is None else f'{est:.2g}'}, "
        f"warning: {'yes' if warned else 'no'}",
        flush=True,
    )
    if r.status != "ok":
        print(f"qubits  n={n} tf={tf:g}: {r.message}", flush=True)


def _qubit_points(counts: range, tf: float, limit_s: float) -> None:
    """Run ``qubit_point`` for each qubit count in a child process, under a time limit."""
    for n in counts:
        cmd = [sys.executable, __file__, "--qubit-point", str(n), "--tf", repr(tf)]
        try:
            subprocess.run(cmd, check=False, timeout=limit_s)
        except subprocess.TimeoutExpired:
            print(f"qubits  n={n} tf={tf:g}: stopped after {limit_s:.0f} s", flush=True)


def part_qubits(limit_s: float = 300.0) -> None:
    _qubit_points(range(1, 9), 1e3, limit_s)


def part_qubits_long(limit_s: float = 300.0) -> None:
    """2 to 5 qubits at tf = 1e4 and 1e5 ns (the equilibrated regime)."""
    for tf in (1e4, 1e5):
        _qubit_points(range(2, 6), tf, limit_s)


def part_sweep() -> None:
    system = _qubit()
    tfs = np.geomspace(1e1, 1e5, 17)
    t0 = time.perf_counter()
    n = 0
    for k in range(5):
        f = make_schedule("beta", k_end=k)
        for tf in tfs:
            simulate(system, f, float(tf))
            n += 1
    total = time.perf_counter() - t0
    print(f"sweep   {n} points (5 k_end x 17 tf, 1e1..1e5 ns), serial: {total:.1f} s")


PARTS = {
    "qutip": part_qutip,
    "general": part_general,
    "tf": part_tf,
    "qubits": part_qubits,
    "qubits_long": part_qubits_long,
    "sweep": part_sweep,
}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--parts", nargs="+", choices=sorted(PARTS), default=list(PARTS))
    parser.add_argument("--qubit-point", type=int, help=argparse.SUPPRESS)
    parser.add_argument("--tf", type=float, default=1e3, help=argparse.SUPPRESS)
    parser.add_argument(
        "--qubits",
        type=int,
        nargs=2,
        default=(1, 8),
        metavar=("FIRST", "LAST"),
        help="qubit counts of the qubits part (default 1 8)",
    )
    parser.add_argument(
        "--limit", type=float, default=300.0, help="seconds per multi-qubit point (default 300)"
    )
    args = parser.parse_args()
    if args.qubit_point is not None:
        qubit_point(args.qubit_point, args.tf)
        return
    print(
        f"# {datetime.now(UTC).isoformat(timespec='seconds')}  {platform.machine()} "
        f"{os.cpu_count()} cores  python {platform.python_version()}  "
        f"load {os.getloadavg()[0]:.1f}"
    )
    for name in args.parts:
        if name == "qubits":
            _qubit_points(range(args.qubits[0], args.qubits[1] + 1), 1e3, args.limit)
        elif name == "qubits_long":
            part_qubits_long(args.limit)
        else:
            PARTS[name]()


if __name__ == "__main__":
    main()
