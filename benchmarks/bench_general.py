"""Cost and accuracy of the general (reference) integrator.

Run from the repository root::

    python benchmarks/bench_general.py                # tf = 1e2, 1e3 ns (a few minutes)
    python benchmarks/bench_general.py --tf 100 1000 10000   # the full table (long)

Prints one line per point (wall time, steps, rhs evaluations, time ratio to the first
tf), then the accuracy achieved against a tighter-tolerance reference run at a small tf.
When an ``eigenframe`` integrator is registered it is timed side by side (ratio).
Spec: the default 1-qubit scenario (A0 3.5, B0 2.5 GHz, h = 0.7, ohmic X coupling,
eta 1e-4, cutoff 8 GHz, 12 mK), beta schedule k_start = 0, k_end = 2.
"""

from __future__ import annotations

import argparse
import platform
import time
from datetime import UTC, datetime

from schedforge.dynamics import simulate
from schedforge.integrators import INTEGRATORS
from schedforge.schedules import make_schedule
from schedforge.spec_model import Spec
from schedforge.system import System


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--tf", type=float, nargs="+", default=[100.0, 1000.0])
    parser.add_argument("--accuracy-tf", type=float, default=30.0)
    args = parser.parse_args()
    print(
        f"# {datetime.now(UTC).isoformat(timespec='seconds')}  "
        f"{platform.processor() or platform.machine()}"
        f"  python {platform.python_version()}"
    )
    system = System.from_spec(Spec())
    sched = make_schedule("beta", k_start=0, k_end=2)
    others = [name for name in ("eigenframe",) if name in INTEGRATORS]
    first = None
    for tf in args.tf:
        t0 = time.perf_counter()
        r = simulate(system, sched, tf, integrator="general")
        wall = time.perf_counter() - t0
        first = first or wall
        line = (
            f"general  tf={tf:>8g} ns  wall={wall:8.2f} s  ratio={wall / first:7.2f}  "
            f"steps={r.stats.get('steps')}  rhs={r.stats.get('rhs_evaluations')}  "
            f"trace_distance={r.trace_distance:.10e}  status={r.status}"
        )
        for name in others:
            t1 = time.perf_counter()
            o = simulate(system, sched, tf, integrator=name)
            w2 = time.perf_counter() - t1
            line += (
                f"\n{name:<8} tf={tf:>8g} ns  wall={w2:8.2f} s  general/{name}={wall / w2:7.1f}  "
                f"trace_distance={o.trace_distance:.10e}  "
                f"rel.diff={o.trace_distance / r.trace_distance - 1:.2e}"
            )
        print(line, flush=True)
    tf = args.accuracy_tf
    ref = simulate(system, sched, tf, integrator="general", rtol=1e-13, atol=1e-17)
    print(
        f"accuracy at tf={tf:g} ns vs reference (rtol 1e-13, atol 1e-17): "
        f"trace distance {ref.trace_distance:.15e}"
    )
    for rtol, atol in ((1e-8, 1e-12), (1e-10, 1e-14), (1e-11, 1e-15)):
        r = simulate(system, sched, tf, integrator="general", rtol=rtol, atol=atol)
        dev_err = abs(r.final_state - ref.final_state).max()
        print(
            f"  rtol={rtol:.0e} atol={atol:.0e}: |rho - rho_ref|_max = {dev_err:.2e}  "
            f"trace-distance rel. error = {abs(r.trace_distance / ref.trace_distance - 1):.2e}  "
            f"steps={r.stats['steps']}  wall={r.wall_s:.2f} s",
            flush=True,
        )


if __name__ == "__main__":
    main()
