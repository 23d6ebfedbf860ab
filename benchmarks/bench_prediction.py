"""Cost of the predicted coefficient C_k against simulations that measure it.

Side by side in one run, for the built-in driven-qubit scenario and a ``beta``
schedule with k_end = 2:

* ``predicted_coefficient`` (final generator only, no time integration);
* one simulation with the eigenframe integrator at tf = 1e5 ns (in the
  equilibrated regime, where the simulated error times tf^3 matches C_2);
* one simulation with the general integrator at tf = 100 ns (far from the
  regime: the general integrator's cost grows with tf, so a regime point is out
  of reach for it in a benchmark);
* the analysis of a finished 32-point sweep (fits, figures, report).

Usage: ``/work/venv/bin/python benchmarks/bench_prediction.py``.
"""

from __future__ import annotations

import dataclasses
import platform
import tempfile
import time
from datetime import UTC, datetime

import numpy as np

from schedforge.dynamics import simulate_spec
from schedforge.prediction import predicted_coefficient
from schedforge.report import analyse_sweep_dir
from schedforge.schedules import make_schedule
from schedforge.spec import load_spec
from schedforge.spec_model import SweepSpec
from schedforge.sweep import run_sweep
from schedforge.system import System


def _timed(fn, repeat=1):
    best = float("inf")
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def main() -> None:
    spec = load_spec("builtin:driven-qubit")
    fast = dataclasses.replace(
        spec, numerics=dataclasses.replace(spec.numerics, integrator="eigenframe")
    )
    slow = dataclasses.replace(
        spec, numerics=dataclasses.replace(spec.numerics, integrator="general")
    )
    system = System.from_spec(spec)
    sched = make_schedule("beta", k_start=0, k_end=2)
    system.preflight()
    t_pred, pred = _timed(lambda: predicted_coefficient(system, sched), repeat=5)
    t_fast, res = _timed(
        lambda: simulate_spec(fast, tf_ns=1e5, k_end=2, family="beta", k_start=0), repeat=3
    )
    t_slow, _ = _timed(lambda: simulate_spec(slow, tf_ns=100.0, k_end=2, family="beta", k_start=0))
    grid = SweepSpec(tf_ns=tuple(float(t) for t in np.geomspace(3e3, 1e6, 8)), k_end=(0, 1, 2, 3))
    with tempfile.TemporaryDirectory() as tmp:
        run_sweep(dataclasses.replace(fast, sweep=grid), tmp, executor="serial", progress="quiet")
        t_an, _ = _timed(lambda: analyse_sweep_dir(tmp, dataclasses.replace(fast, sweep=grid)))
    print(f"date {datetime.now(UTC):%Y-%m-%d %H:%M} UTC; {platform.machine()}, "
          f"{platform.python_version()}")  # fmt: skip
    print(f"C_2 predicted {pred.coefficient:.6g}; simulated err*tf^3 at 1e5 ns "
          f"{res.trace_distance * 1e15:.6g} ({res.integrator})")  # fmt: skip
    rows = [
        ("predicted_coefficient (k_end=2)", t_pred),
        ("simulate, eigenframe, tf=1e5 ns", t_fast),
        ("simulate, general, tf=100 ns", t_slow),
        ("analyse_sweep_dir, 32 points", t_an),
    ]
    print("| task | time (s) | ratio to prediction |")
    print("|---|---|---|")
    for name, t in rows:
        print(f"| {name} | {t:.4f} | {t / t_pred:.1f} |")


if __name__ == "__main__":
    main()
