"""Noise ensembles of anneals: one system (and pre-flight) per draw against one per point.

Runs :func:`schedforge.noise_ensemble.run_noise_sweep` serially on a built-in scenario
with a ``[noise]`` model, twice in the same run:

* ``shared``: as the package does, each draw's system is built once per process
  (:func:`schedforge.noise_ensemble.draw_system`) and its pre-flight runs once;
* ``per point``: every anneal builds its draw's system again through
  ``System.from_spec`` (whose small cache cannot hold more draws than 16), as before.

Counts the pre-flights and checks that both runs store the same numbers.

Usage: ``python benchmarks/bench_noise_ensemble.py [--scenario ising-2q] [--draws 30]
[--tf 60 120] [--k-end 1]``
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import platform
import tempfile
import time

from schedforge import noise_ensemble
from schedforge.spec import load_spec, parse_spec
from schedforge.system import System


def main() -> None:
    """Run both modes and print one table row each."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenario", default="ising-2q")
    ap.add_argument("--draws", type=int, default=30)
    ap.add_argument("--tf", type=float, nargs="+", default=[60.0, 120.0])
    ap.add_argument("--k-end", type=float, nargs="+", default=[1.0])
    args = ap.parse_args()
    extra = parse_spec(
        {
            "version": 1,
            "noise": {"level": 0.05, "amplitude_level": 0.02, "draws": args.draws, "seed": 5},
            "sweep": {"tf_ns": args.tf, "k_end": args.k_end},
        }
    )
    spec = dataclasses.replace(
        load_spec(f"builtin:{args.scenario}"), noise=extra.noise, sweep=extra.sweep
    )
    calls: list[int] = []
    original = System._run_preflight

    def counting(self: System) -> list[str]:
        calls.append(1)
        return original(self)

    System._run_preflight = counting  # type: ignore[method-assign]
    shared = noise_ensemble.draw_system
    results = {}
    print(f"{platform.machine()} {platform.processor() or ''} load {os.getloadavg()[0]:.1f}")
    print("| mode | points | pre-flights | wall (s) |")
    print("|---|---|---|---|")
    for mode in ("shared", "per point"):
        noise_ensemble.draw_system = (
            shared if mode == "shared" else noise_ensemble._build_draw_system
        )
        calls.clear()
        with tempfile.TemporaryDirectory() as folder:
            t0 = time.perf_counter()
            out = noise_ensemble.run_noise_sweep(spec, folder, "serial", progress="quiet")
            wall = time.perf_counter() - t0
        results[mode] = [(r["draw"], r["tf_ns"], r["trace_distance"]) for r in out.rows]
        print(f"| {mode} | {out.sweep.n_computed} | {len(calls)} | {wall:.1f} |")
    noise_ensemble.draw_system = shared
    print("same numbers:", results["shared"] == results["per point"])


if __name__ == "__main__":
    main()
