"""Speed-up of local processes over serial for a 20-point sweep, side by side.

Run from the repository root::

    /work/venv/bin/python benchmarks/bench_sweep.py [--workers 2] [--repeat 1]

Both executors run the same 20-point sweep (1 qubit, ohmic bath, ``beta`` family,
k_end 0..3 x 5 anneal times, general integrator) into fresh temporary folders, in
this one process run, alternating serial / processes so that machine load affects
both alike.  CPU seconds (this process plus its reaped worker processes) show the
overhead of the worker processes independently of machine load.  The script checks
that both give identical points.csv (every column but ``wall_s``) and prints a
Markdown block for ``benchmarks/RESULTS.md``: wall and CPU times, the ratio
serial / processes, the machine and its load average.

On a shared machine the wall-time ratio says little: with the kernel's autogroup
scheduling (``/proc/sys/kernel/sched_autogroup_enabled``), CPU time is shared
between sessions, so extra worker processes of one busy session get no extra
share of the cores.  Run it on a quiet machine for the figure that matters.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import os
import platform
import tempfile
import time
from pathlib import Path

from schedforge.executors import make_executor
from schedforge.spec_model import NumericsSpec, Spec, SweepSpec
from schedforge.sweep import run_sweep, sweep_points

TF_NS = (5.0, 10.0, 15.0, 20.0, 30.0)
K_END = (0.0, 1.0, 2.0, 3.0)


def bench_spec() -> Spec:
    """The benchmark study: 20 points of the default 1-qubit spec."""
    return Spec(
        sweep=SweepSpec(tf_ns=TF_NS, k_end=K_END, family=("beta",)),
        numerics=NumericsSpec(integrator="general"),
    )


def _csv_without_wall(path: Path) -> list[dict[str, str]]:
    with open(path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    for r in rows:
        r.pop("wall_s")
    return rows


def _cpu() -> float:
    """CPU seconds of this process and its reaped children (the worker processes)."""
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def _timed(spec: Spec, kind: str, workers: int | None, folder: Path) -> tuple[float, float, Path]:
    """Wall and CPU seconds of one sweep (executor start-up and shut-down included)."""
    c0, t0 = _cpu(), time.perf_counter()
    with make_executor(kind, workers=workers) as ex:
        outcome = run_sweep(spec, folder, executor=ex, progress="quiet")
    wall, cpu = time.perf_counter() - t0, _cpu() - c0
    if not outcome.complete or outcome.n_computed != outcome.n_points:
        raise RuntimeError(f"{kind}: sweep incomplete ({outcome.n_done}/{outcome.n_points})")
    return wall, cpu, outcome.csv_path


def _load(avg: tuple[float, float, float]) -> str:
    return "/".join(f"{x:.1f}" for x in avg)


def main() -> None:
    """Run the benchmark and print the Markdown block."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--workers", type=int, default=os.cpu_count() or 1)
    parser.add_argument("--repeat", type=int, default=1)
    args = parser.parse_args()
    spec = bench_spec()
    n = len(sweep_points(spec))
    load_start = os.getloadavg()
    serial, procs = [], []
    with tempfile.TemporaryDirectory() as tmp:
        for i in range(args.repeat):
            ts, cs, csv_s = _timed(spec, "serial", None, Path(tmp) / f"serial{i}")
            tp, cp, csv_p = _timed(spec, "processes", args.workers, Path(tmp) / f"procs{i}")
            rows_s, rows_p = _csv_without_wall(csv_s), _csv_without_wall(csv_p)
            diffs = [
                (a["tf_ns"], a["k_end"], col, a[col], b[col])
                for a, b in zip(rows_s, rows_p, strict=True)
                for col in a
                if a[col] != b[col]
            ]
            if diffs:
                raise RuntimeError(f"serial and processes points.csv differ: {diffs}")
            serial.append((ts, cs))
            procs.append((tp, cp))
            print(
                f"repeat {i + 1}: serial {ts:.2f} s (CPU {cs:.2f} s), "
                f"processes {tp:.2f} s (CPU {cp:.2f} s), ratio {ts / tp:.2f}"
            )
    load_end = os.getloadavg()
    (best_s, cpu_s), (best_p, cpu_p) = min(serial), min(procs)
    print()
    print(f"### Sweep: processes vs serial ({dt.date.today().isoformat()})")
    print()
    print(
        f"Machine: {platform.machine()}, {os.cpu_count()} cores, {platform.platform()}, "
        f"Python {platform.python_version()}"
    )
    print(
        f"Sweep: {n} points (1 qubit, beta, k_end {K_END}, tf_ns {TF_NS}), general integrator; "
        f"best of {args.repeat}; points.csv identical (all columns but wall_s)."
    )
    print(
        f"Load average (1/5/15 min) at start {_load(load_start)}, at end {_load(load_end)}: "
        "a load above the core count means other work competed for the cores."
    )
    print()
    print("| executor | wall time (s) | CPU time (s) | speed-up vs serial (wall) |")
    print("|---|---|---|---|")
    print(f"| serial | {best_s:.2f} | {cpu_s:.2f} | 1.00 |")
    print(
        f"| processes ({args.workers} workers) | {best_p:.2f} | {cpu_p:.2f} | "
        f"{best_s / best_p:.2f} |"
    )


if __name__ == "__main__":
    main()
