"""Cost of evaluating a realized waveform against the designed schedule (side by side).

Integrators call ``schedule.derivatives(x, 1)`` thousands of times, often for one
or a few x at a time; this script times that call for the design and for each
realized model in one run and prints the ratios, plus the one-off cost of
:func:`schedforge.waveform.realize`.  With ``--simulate`` it also times the
eigenframe integrator on the ideal and realized schedules of one qubit.

With ``--held`` it times realized *unfiltered* holds (1 GS/s, 12 bits), which the
``held`` integrator propagates exactly, next to the ideal point in the same run, and
with ``--filtered`` the same holds through a 200 MHz Gaussian filter on the eigenframe
integrator (wall time, steps, status).

Usage: ``/work/venv/bin/python benchmarks/bench_waveform.py [--tf 10000] [--simulate]
[--held] [--filtered --filtered-tf 1000 10000]``
"""

from __future__ import annotations

import argparse
import time
from dataclasses import replace

import numpy as np

from schedforge.schedules import BetaSchedule
from schedforge.spec_model import WaveformSpec
from schedforge.waveform import realize

MODELS = {
    "hold 1 GS/s (unfiltered)": WaveformSpec(sample_rate_gsps=1.0),
    "hold 1 GS/s + gaussian 100 MHz": WaveformSpec(sample_rate_gsps=1.0, bandwidth_mhz=100.0),
    "hold 1 GS/s + 14 bits + gaussian 20 MHz": WaveformSpec(
        sample_rate_gsps=1.0, dac_bits=14, bandwidth_mhz=20.0
    ),
    "hold 1 GS/s + single-pole 100 MHz": WaveformSpec(
        sample_rate_gsps=1.0, bandwidth_mhz=100.0, filter="single-pole"
    ),
    "breakpoints (tol 1e-4)": WaveformSpec(breakpoints=1000, breakpoint_tolerance=1e-4),
}


def _per_call(fn, repeat: int) -> float:
    start = time.perf_counter()
    for _ in range(repeat):
        fn()
    return (time.perf_counter() - start) / repeat


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tf", type=float, default=10_000.0, help="anneal time in ns")
    parser.add_argument("--calls", type=int, default=2000, help="scalar calls per model")
    parser.add_argument("--simulate", action="store_true", help="also time the dynamics")
    parser.add_argument("--held", action="store_true", help="time unfiltered holds (exact)")
    parser.add_argument("--filtered", action="store_true", help="time filtered holds")
    parser.add_argument(
        "--filtered-tf", type=float, nargs="+", default=[1e3, 1e4], help="tf (ns), --filtered"
    )
    parser.add_argument("--skip-models", action="store_true", help="skip the evaluation table")
    args = parser.parse_args()
    if args.held:
        held_points()
    if args.filtered:
        filtered_points(args.filtered_tf)
    if args.skip_models:
        return
    design = BetaSchedule(0, 3)
    rng = np.random.default_rng(0)
    xs = rng.uniform(0, 1, args.calls)
    xv = np.linspace(0, 1, 10_001)

    def scalar_cost(sched) -> float:
        it = iter(xs)
        return _per_call(lambda: sched.derivatives(np.array([next(it)]), 1), args.calls)

    base_scalar = scalar_cost(design)
    base_vector = _per_call(lambda: design.derivatives(xv, 1), 5)
    print(f"tf = {args.tf:g} ns; design beta k_end=3")
    print(
        f"{'model':42s} {'realize (s)':>11s} {'1 point (us)':>12s} {'ratio':>6s} "
        f"{'1e4 points (ms)':>15s} {'ratio':>6s} {'knots':>6s}"
    )
    print(
        f"{'design (beta)':42s} {'':>11s} {base_scalar * 1e6:12.1f} {1.0:6.2f} "
        f"{base_vector * 1e3:15.2f} {1.0:6.2f} {0:6d}"
    )
    for name, spec in MODELS.items():
        start = time.perf_counter()
        r = realize(design, args.tf, spec)
        build = time.perf_counter() - start
        sc = scalar_cost(r.schedule)
        vc = _per_call(lambda r=r: r.schedule.derivatives(xv, 1), 5)
        print(
            f"{name:42s} {build:11.3f} {sc * 1e6:12.1f} {sc / base_scalar:6.2f} "
            f"{vc * 1e3:15.2f} {vc / base_vector:6.2f} {len(r.schedule.knots):6d}"
        )

    if args.simulate:
        from schedforge.dynamics import simulate
        from schedforge.spec import load_spec
        from schedforge.system import System

        spec = load_spec("builtin:driven-qubit")
        system = System.from_spec(replace(spec, bath=replace(spec.bath, eta=1e-2)))
        d2 = BetaSchedule(0, 2)
        print("\neigenframe integrator, 1 qubit (driven-qubit, eta = 1e-2), beta k_end = 2")
        for tf in (300.0, 3000.0):
            t0 = time.perf_counter()
            ideal = simulate(system, d2, tf, integrator="eigenframe")
            t_ideal = time.perf_counter() - t0
            for name in ("hold 1 GS/s + gaussian 100 MHz", "breakpoints (tol 1e-4)"):
                r = realize(d2, tf, MODELS[name])
                t0 = time.perf_counter()
                res = simulate(system, r.schedule, tf, integrator="eigenframe")
                t_r = time.perf_counter() - t0
                print(
                    f"tf {tf:6g} {name:34s} ideal {t_ideal:6.2f} s err {ideal.trace_distance:.3e}"
                    f" | realized {t_r:6.2f} s ({t_r / t_ideal:5.1f}x) err "
                    f"{res.trace_distance:.3e} [{res.integrator}]"
                )


HOLD_12 = WaveformSpec(sample_rate_gsps=1.0, dac_bits=12)
HOLD_12_FILTERED = WaveformSpec(sample_rate_gsps=1.0, dac_bits=12, bandwidth_mhz=200.0)


def _systems():
    from schedforge.spec import load_spec
    from schedforge.system import System

    qubit = load_spec("builtin:driven-qubit")
    return {
        "driven qubit (eta 1e-4)": System.from_spec(qubit),
        "driven qubit (eta 1e-2)": System.from_spec(
            replace(qubit, bath=replace(qubit.bath, eta=1e-2))
        ),
        "ising-2q (eta 2e-2)": System.from_spec(load_spec("builtin:ising-2q")),
    }


def held_points() -> None:
    """Unfiltered 12-bit holds at 1 GS/s: exact propagation next to the ideal point."""
    from schedforge.dynamics import simulate
    from schedforge.integrators import held

    design = BetaSchedule(0, 2)
    print("\nunfiltered hold, 1 GS/s, 12 bits, beta k_end = 2: held (exact) vs ideal (auto)")
    print(
        f"{'system':24s} {'tf (ns)':>8s} {'ideal (s)':>9s} {'ideal error':>11s} "
        f"{'held cold (s)':>13s} {'ratio':>6s} {'warm (s)':>8s} {'ratio':>6s} {'held error':>10s} "
        f"{'segments':>8s} {'levels built':>12s}"
    )
    for name, system in _systems().items():
        system.preflight()
        for tf in (1e2, 1e3, 1e4, 1e5):
            t0 = time.perf_counter()
            ideal = simulate(system, design, tf)
            t_ideal = time.perf_counter() - t0
            r = realize(design, tf, HOLD_12)
            held._CACHES.pop(system, None)  # cold: every level built in this call
            t0 = time.perf_counter()
            res = simulate(system, r.schedule, tf)
            t_cold = time.perf_counter() - t0
            t0 = time.perf_counter()
            warm = simulate(system, r.schedule, tf)
            t_warm = time.perf_counter() - t0
            assert warm.trace_distance == res.trace_distance
            print(
                f"{name:24s} {tf:8.0e} {t_ideal:9.3f} {ideal.trace_distance:11.3e} "
                f"{t_cold:13.3f} {t_cold / t_ideal:6.2f} {t_warm:8.3f} {t_warm / t_ideal:6.2f} "
                f"{res.trace_distance:10.3e} "
                f"{res.stats['segments']:8d} {res.stats['levels_built']:12d}"
                + ("" if ideal.ok and res.ok else f"  [{ideal.status}/{res.status}]")
            )


def filtered_points(tfs: list[float]) -> None:
    """12-bit holds at 1 GS/s through a 200 MHz Gaussian filter, eigenframe integrator."""
    from schedforge.dynamics import simulate

    design = BetaSchedule(0, 2)
    system = _systems()["driven qubit (eta 1e-4)"]
    print("\nfiltered hold (gaussian 200 MHz), 1 GS/s, 12 bits, driven qubit, eigenframe")
    for tf in tfs:
        r = realize(design, tf, HOLD_12_FILTERED)
        t0 = time.perf_counter()
        res = simulate(system, r.schedule, tf, integrator="eigenframe")
        wall = time.perf_counter() - t0
        print(
            f"tf {tf:8.0e} ns: {wall:8.2f} s, steps {res.stats.get('steps')}, status "
            f"{res.status}, integrator {res.integrator}, error {res.trace_distance:.3e}"
            + (f" ({res.message})" if res.message else ""),
            flush=True,
        )


if __name__ == "__main__":
    main()
