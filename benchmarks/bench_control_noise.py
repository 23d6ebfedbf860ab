"""Exact enumeration of the classical energies under control errors (issue 17, part 1).

Times :func:`schedforge.control_noise.critical_levels` (one pass over all 2^n states
for every noise draw, split blocks: the low qubits vary inside a block, the fixed high
qubits act as fields) for several graphs and sizes, and side by side in the same run a
plain blocked product (every state's full feature row [s_i, s_i s_j] times the
coefficient matrix) computing the same per-draw critical levels.  Checks that both
give the same levels.  Peak memory of the numpy arrays from :mod:`tracemalloc`.

Target (issue 17): 20 qubits x 200 draws within 60 s on a 2-core machine.

Usage: ``python benchmarks/bench_control_noise.py [--sizes 12 16 20] [--draws 200]
[--graphs chain grid complete] [--no-plain]``
"""

from __future__ import annotations

import argparse
import os
import platform
import time
import tracemalloc

import numpy as np

from schedforge.control_noise import (
    critical_levels,
    ground_states,
    noise_directions,
    spin_configurations,
)
from schedforge.problem_families import IsingProblem, make_problem


def plain_critical_levels(problem: IsingProblem, draws: int, seed: int) -> np.ndarray:
    """The same critical levels from full feature rows, 2^13 states at a time."""
    e0, ground, tol = ground_states(problem)
    dirs = noise_directions(problem, draws, seed)
    w = np.concatenate([problem.coefficients()[:, None], dirs], axis=1)

    def feats(idx: np.ndarray) -> np.ndarray:
        s = spin_configurations(problem.n, idx).astype(float)
        return np.concatenate([s, s[:, problem.i] * s[:, problem.j]], axis=1)

    d_min = (feats(ground) @ dirs).min(axis=0)
    crit = np.full(draws, np.inf)
    step = 1 << 13
    with np.errstate(divide="ignore", invalid="ignore"):
        for start in range(0, 1 << problem.n, step):
            e = feats(np.arange(start, min(start + step, 1 << problem.n))) @ w
            gap = e[:, 0] - e0 - tol
            out = gap > 0
            deficit = d_min[None, :] - e[out, 1:]
            ratio = np.where(deficit > 0, gap[out, None] / deficit, np.inf)
            np.minimum(crit, ratio.min(axis=0), out=crit)
    return crit


def _timed(fn):  # type: ignore[no-untyped-def]
    tracemalloc.start()
    t0 = time.perf_counter()
    c0 = time.process_time()
    out = fn()
    wall = time.perf_counter() - t0
    cpu = time.process_time() - c0
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return out, wall, cpu, peak


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[12, 16, 20])
    ap.add_argument("--draws", type=int, default=200)
    ap.add_argument("--graphs", nargs="+", default=["chain", "grid", "complete"])
    ap.add_argument("--no-plain", action="store_true", help="skip the plain product")
    args = ap.parse_args()
    print(
        f"# {platform.machine()} {platform.processor() or ''} cores={os.cpu_count()} "
        f"python {platform.python_version()} numpy {np.__version__} "
        f"load {os.getloadavg()[0]:.1f}"
    )
    print(
        f"{'graph':>9} {'n':>3} {'draws':>5} {'split wall s':>12} {'cpu s':>7} {'peak MB':>8}"
        f" {'plain wall s':>12} {'peak MB':>8} {'plain/split':>11} {'same':>5}"
    )
    for graph in args.graphs:
        for n in args.sizes:
            p = make_problem(graph, n, couplings="sign", seed=1)
            crit, wall, cpu, peak = _timed(lambda p=p: critical_levels(p, args.draws, 1))
            line = f"{graph:>9} {n:>3} {args.draws:>5} {wall:>12.2f} {cpu:>7.2f} {peak / 1e6:>8.1f}"
            if not args.no_plain:
                ref, wall2, _, peak2 = _timed(lambda p=p: plain_critical_levels(p, args.draws, 1))
                same = np.allclose(crit.levels, ref, rtol=1e-9, atol=0)
                line += f" {wall2:>12.2f} {peak2 / 1e6:>8.1f} {wall2 / wall:>11.2f} {same!s:>5}"
            print(line, flush=True)


if __name__ == "__main__":
    main()
