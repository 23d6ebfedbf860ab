"""Sparse and symmetric problems: does every point return a number, and at what cost?

Run from the repository root (about 10-30 minutes on a 2-core machine)::

    python benchmarks/bench_sparse.py                       # every problem
    python benchmarks/bench_sparse.py --problems chain ring  # a subset
    python benchmarks/bench_sparse.py --tf 1e3 1e5 --k-end 1

For each invented problem of the kind users write first (equal fields, uncoupled
qubits, chains, stars, rings and triangles with uniform couplings, a chain with random
couplings, a 5-qubit chain and a 6-qubit ring) and each tf and k_end, one point of the
default (``auto``) integrator runs in a child process, stopped after ``--limit``
seconds.  Beside it, the fully connected random instance of the same size from
``bench_eigenframe.py`` runs at the same tf and k_end, so the cost is read as a ratio
measured in the same run (the machine is shared and noisy).  The bath and device are
those of ``builtin:driven-qubit``.

Each line: problem, qubits, tf, k_end, status, integrator, wall time, the complete
instance's wall time and the ratio.  Copy the lines to benchmarks/RESULTS.md with the
date and machine.
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

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_eigenframe import _instance

from schedforge.dynamics import simulate
from schedforge.schedules import make_schedule
from schedforge.spec import load_spec
from schedforge.spec_model import ProblemSpec
from schedforge.system import System

#: Invented problems with round numbers: degenerate levels, coinciding Bohr frequencies.
PROBLEMS = {
    "equal-fields": ProblemSpec(qubits=2, h=(0.3, 0.3), J=()),
    "uncoupled": ProblemSpec(qubits=2, h=(0.5, 0.3), J=()),
    "chain": ProblemSpec(qubits=3, h=(0.1, 0.1, 0.1), J=((0, 1, -1.0), (1, 2, -1.0))),
    "triangle": ProblemSpec(qubits=3, h=(0.1,) * 3, J=((0, 1, 1.0), (1, 2, 1.0), (0, 2, 1.0))),
    "star": ProblemSpec(
        qubits=4, h=(0.1, 0.2, 0.2, 0.2), J=((0, 1, -1.0), (0, 2, -1.0), (0, 3, -1.0))
    ),
    "ring": ProblemSpec(
        qubits=4, h=(0.1,) * 4, J=((0, 1, -1.0), (1, 2, -1.0), (2, 3, -1.0), (0, 3, -1.0))
    ),
    "random-chain": ProblemSpec(
        qubits=4, h=(0.13, -0.07, 0.21, 0.05), J=((0, 1, -0.83), (1, 2, 0.61), (2, 3, -0.94))
    ),
    "chain-5": ProblemSpec(
        qubits=5, h=(0.1,) * 5, J=((0, 1, -1.0), (1, 2, -1.0), (2, 3, -1.0), (3, 4, -1.0))
    ),
    "ring-6": ProblemSpec(
        qubits=6,
        h=(0.1,) * 6,
        J=((0, 1, -1.0), (1, 2, -1.0), (2, 3, -1.0), (3, 4, -1.0), (4, 5, -1.0), (0, 5, -1.0)),
    ),
}


def point(name: str, tf: float, k_end: int) -> None:
    """One point (child process): print status, integrator and wall time."""
    spec = load_spec("builtin:driven-qubit")
    problem = PROBLEMS[name] if name in PROBLEMS else _instance(int(name.split("-")[1]))
    system = System.from_spec(replace(spec, problem=problem))
    system.preflight()
    start = time.perf_counter()
    res = simulate(system, make_schedule("beta", k_end=k_end), tf)
    wall = time.perf_counter() - start
    warned = "warning" if res.stats.get("warnings") else "-"
    print(f"{res.status}|{res.integrator}|{wall:.2f}|{res.trace_distance:.6e}|{warned}")


def _run(name: str, tf: float, k_end: int, limit: float) -> tuple[str, str, float, str]:
    cmd = [sys.executable, __file__, "--point", name, str(tf), str(k_end)]
    env = {**os.environ, "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}
    try:
        out = subprocess.run(cmd, capture_output=True, text=True, timeout=limit, env=env)
    except subprocess.TimeoutExpired:
        return "stopped", "-", limit, "-"
    line = out.stdout.strip().splitlines()[-1] if out.stdout.strip() else ""
    if not line:
        return "crashed", out.stderr.strip().splitlines()[-1:], float("nan"), "-"
    status, integrator, wall, td, _ = line.split("|")
    return status, integrator, float(wall), td


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--problems", nargs="*", default=list(PROBLEMS))
    parser.add_argument("--tf", nargs="*", type=float, default=[1e2, 1e3, 1e4, 1e5])
    parser.add_argument("--k-end", nargs="*", type=int, default=[1, 2])
    parser.add_argument("--limit", type=float, default=600.0)
    parser.add_argument("--point", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.point:
        point(args.point[0], float(args.point[1]), int(args.point[2]))
        return
    print(f"# {datetime.now(UTC):%Y-%m-%d %H:%M} UTC, {platform.node()}, {os.cpu_count()} cores")
    complete: dict[tuple[int, float, int], float] = {}
    for name in args.problems:
        n = PROBLEMS[name].qubits
        for tf in args.tf:
            for k in args.k_end:
                status, integrator, wall, td = _run(name, tf, k, args.limit)
                key = (n, tf, k)
                if key not in complete:
                    complete[key] = _run(f"complete-{n}", tf, k, args.limit)[2]
                ratio = wall / complete[key]
                print(
                    f"{name:13s} n={n} tf={tf:8.0e} k={k}  {status:8s} {integrator:38s} "
                    f"{wall:8.2f} s  td={td:>13s}  complete {complete[key]:8.2f} s  "
                    f"ratio {ratio:5.2f}",
                    flush=True,
                )


if __name__ == "__main__":
    main()
