"""Tests of the sweep grid, the resumable run and the ``sweep`` command.

References:
- point keys are SHA-256 (FIPS 180-4) of the physics hash and canonical JSON, checked
  with Python's :mod:`hashlib`;
- identical results whichever executor ran a point: the serial run is the reference;
- resume after SIGKILL: an uninterrupted run is the reference.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import sys
import types
from dataclasses import replace

import pytest

from schedforge.errors import InputError
from schedforge.progress import (
    AnnealProgress,
    ProgressReporter,
    anneal_progress,
    format_duration,
    report_anneal_progress,
)
from schedforge.spec_model import BathSpec, NumericsSpec, Spec, SweepSpec, WaveformSpec
from schedforge.sweep import SweepPoint, point_key, run_point, sweep_points


def _spec(**sweep) -> Spec:
    grid = {"tf_ns": (10.0, 20.0), "k_end": (1.0,), **sweep}
    return Spec(sweep=SweepSpec(**grid), numerics=NumericsSpec(integrator="general"))


# -- the grid -------------------------------------------------------------------------
def test_sweep_points_sorted_unique_linear_has_no_k():
    spec = _spec(tf_ns=(100.0, 10.0, 10.0), k_end=(2.0, 0.0), family=("linear", "beta"))
    pts = sweep_points(spec)
    assert pts == [
        SweepPoint("beta", 0, 0, 10.0),
        SweepPoint("beta", 0, 0, 100.0),
        SweepPoint("beta", 0, 2, 10.0),
        SweepPoint("beta", 0, 2, 100.0),
        SweepPoint("linear", 0, 0, 10.0),
        SweepPoint("linear", 0, 0, 100.0),
    ]
    assert len(set(pts)) == len(pts)


def test_sweep_points_realized_twins_with_waveform():
    spec = replace(_spec(), waveform=WaveformSpec(sample_rate_gsps=1.0))
    pts = sweep_points(spec)
    assert len(pts) == 4
    assert [p.variant for p in pts] == ["ideal", "ideal", "realized", "realized"]
    assert {(p.tf_ns, p.k_end) for p in pts if p.variant == "realized"} == {
        (p.tf_ns, p.k_end) for p in pts if p.variant == "ideal"
    }


def test_sweep_points_default_to_schedule_without_grid():
    spec = Spec()
    assert sweep_points(spec) == [
        SweepPoint(spec.schedule.family, spec.schedule.k_start, spec.schedule.k_end, 1000.0)
    ]


def test_sweep_point_rejects_unknown_variant():
    with pytest.raises(InputError, match="variant"):
        SweepPoint("beta", 0, 1, 10.0, variant="measured")


def test_point_key_is_sha256_of_physics_and_coordinates():
    spec = _spec()
    p = SweepPoint("beta", 0, 1, 10.0)
    canonical = json.dumps(
        {"family": "beta", "k_end": "1.0", "k_start": "0.0", "tf_ns": "10.0", "variant": "ideal"},
        sort_keys=True,
    )
    expected = hashlib.sha256(f"{spec.physics_hash()}\n{canonical}".encode()).hexdigest()
    assert point_key(spec.physics_hash(), p) == expected
    # The grid is not physics; the bath is.
    wider = replace(spec, sweep=SweepSpec(tf_ns=(10.0, 20.0, 40.0), k_end=(1.0, 2.0)))
    assert point_key(wider.physics_hash(), p) == expected
    hotter = replace(spec, bath=BathSpec(temperature_mk=20.0))
    assert point_key(hotter.physics_hash(), p) != expected
    assert point_key(spec.physics_hash(), SweepPoint("beta", 0, 1, 10.000000000000002)) != expected


# -- run_point: unexpected exceptions are recorded ---------------------------------------
def test_run_point_records_unexpected_exception(monkeypatch):
    def boom(spec, **kw):
        raise ZeroDivisionError("division by zero in a test double")

    fake = types.ModuleType("schedforge.dynamics")
    fake.simulate_spec = boom
    monkeypatch.setitem(sys.modules, "schedforge.dynamics", fake)
    row = run_point(_spec(), SweepPoint("beta", 0, 1, 10.0))
    assert row["status"] == "error"
    assert row["message"].startswith("ZeroDivisionError: division by zero in a test double")
    assert math.isnan(row["trace_distance"]) and row["tf_ns"] == 10.0


# -- progress ---------------------------------------------------------------------------
class _Clock:
    def __init__(self) -> None:
        self.t = 0.0

    def __call__(self) -> float:
        return self.t


def test_progress_lines_rate_and_eta():
    out, clock = io.StringIO(), _Clock()
    rep = ProgressReporter(10, done=2, stream=out, mode="auto", clock=clock)
    assert rep.mode == "lines"  # StringIO is not a terminal
    clock.t = 4.0
    rep.advance(note="beta k=0/1 tf=10 ns: ok")
    clock.t = 8.0
    rep.advance()
    # 2 points in 8 s -> 0.25/s; 6 left -> 24 s (points done before the run are not in the rate)
    assert rep.rate == pytest.approx(0.25) and rep.eta_s == pytest.approx(24.0)
    lines = out.getvalue().splitlines()
    assert lines[0] == "[3/10 points  0.25/s  ETA 28 s]: beta k=0/1 tf=10 ns: ok"
    assert lines[1] == "[4/10 points  0.25/s  ETA 24 s]"


def test_progress_bar_on_tty_and_quiet():
    class Tty(io.StringIO):
        def isatty(self) -> bool:
            return True

    out, clock = Tty(), _Clock()
    rep = ProgressReporter(4, stream=out, clock=clock)
    assert rep.mode == "bar"
    rep.start()
    clock.t = 2.0
    rep.advance()
    rep.finish("done")
    text = out.getvalue()
    assert "\r[######..................] 1/4 points  0.5/s  ETA 6 s" in text
    assert text.endswith("\ndone\n")
    quiet = io.StringIO()
    rep = ProgressReporter(4, stream=quiet, mode="quiet")
    rep.start("x")
    rep.advance()
    rep.finish("y")
    assert quiet.getvalue() == ""


def test_anneal_progress_waits_throttles_and_counts_passes():
    out, clock = io.StringIO(), _Clock()
    rep = AnnealProgress(stream=out, clock=clock, delay=2.0, line_interval=30.0)
    with anneal_progress(rep):
        report_anneal_progress(0.1)  # within the delay: silent
        clock.t = 3.0
        report_anneal_progress(0.4)
        clock.t = 10.0
        report_anneal_progress(0.5)  # within the interval: silent
        clock.t = 40.0
        report_anneal_progress(0.05)  # fell back: a second pass
    report_anneal_progress(0.9)  # outside the block: nobody listens
    assert out.getvalue().splitlines() == [
        "anneal x = 0.400 (pass 1), 3 s so far",
        "anneal x = 0.050 (pass 2), 40 s so far",
    ]


def test_anneal_progress_redraws_one_line_on_a_terminal():
    class Tty(io.StringIO):
        def isatty(self) -> bool:
            return True

    out, clock = Tty(), _Clock()
    rep = AnnealProgress(stream=out, clock=clock, delay=2.0, bar_interval=0.5)
    assert rep.mode == "bar"
    for t, x in ((3.0, 0.2), (3.2, 0.3), (3.6, 0.4)):  # the second within the interval
        clock.t = t
        rep(x)
    rep.finish()
    assert out.getvalue() == (
        "\ranneal x = 0.200 (pass 1), 3 s so far\x1b[K"
        "\ranneal x = 0.400 (pass 1), 4 s so far\x1b[K"
        "\r\x1b[K"
    )


@pytest.mark.parametrize(
    ("seconds", "text"),
    [(0.4, "0 s"), (59.4, "59 s"), (65, "1 min 05 s"), (7620, "2 h 07 min"), (math.inf, "?")],
)
def test_format_duration(seconds, text):
    assert format_duration(seconds) == text


# -- real sweeps (need schedforge.dynamics) -------------------------------------------
SPEC_TOML = """
version = 1
[problem]
qubits = 1
h = [0.7]
[bath]
eta = {eta}
temperature_mk = 12.0
[schedule]
family = "beta"
k_start = 0
k_end = 1
[numerics]
integrator = "general"
rtol = 1e-6
atol = 1e-9
[sweep]
tf_ns = {tf}
k_end = [1, 2]
"""


def _spec_file(write_spec, eta: float = 1e-4, tf=(2.0, 5.0), name: str = "spec.toml"):
    return write_spec(SPEC_TOML.format(eta=eta, tf=list(tf)), name)


def _csv_without_wall(path) -> list[list[str]]:
    import csv

    with open(path, newline="") as fh:
        rows = list(csv.reader(fh))
    drop = rows[0].index("wall_s")
    return [r[:drop] + r[drop + 1 :] for r in rows]


def _store_counts(store_path) -> tuple[int, int]:
    import sqlite3

    if not store_path.exists():
        return (0, 0)
    con = sqlite3.connect(f"file:{store_path}?mode=ro", uri=True)
    try:
        return con.execute("SELECT COUNT(*), COUNT(DISTINCT key) FROM points").fetchone()
    except sqlite3.OperationalError:  # not created yet
        return (0, 0)
    finally:
        con.close()


@pytest.fixture(scope="module")
def dask_address():
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None
    )
    yield cluster.scheduler_address
    cluster.close()


@pytest.mark.slow
def test_executors_give_identical_points_csv(tmp_path, write_spec, dask_address):
    from schedforge.dynamics import simulate_spec
    from schedforge.executors import make_executor
    from schedforge.spec import load_spec
    from schedforge.sweep import run_sweep

    spec = load_spec(_spec_file(write_spec))
    csvs = {}
    for kind, opts in [
        ("serial", {}),
        ("processes", {"workers": 2}),
        ("dask", {"scheduler": dask_address}),
    ]:
        with make_executor(kind, **opts) as ex:
            outcome = run_sweep(spec, tmp_path / kind, executor=ex, progress="quiet")
        assert outcome.complete and outcome.n_computed == 4 and outcome.n_failed == 0
        csvs[kind] = _csv_without_wall(outcome.csv_path)
    assert csvs["serial"] == csvs["processes"] == csvs["dask"]
    assert len(csvs["serial"]) == 5  # header + 2 k_end x 2 tf
    # The stored numbers are those of a direct call (the sweep adds nothing of its own).
    direct = simulate_spec(spec, tf_ns=5.0, k_end=2.0, family="beta", k_start=0.0)
    row = next(r for r in outcome.rows if r["tf_ns"] == 5.0 and r["k_end"] == 2.0)
    assert row["trace_distance"] == direct.trace_distance
    assert row["ground_infidelity"] == direct.ground_infidelity


@pytest.mark.slow
def test_sigkill_then_rerun_completes_without_loss_or_repeat(tmp_path, write_spec):
    import os
    import signal
    import sqlite3
    import subprocess
    import time

    from schedforge.spec import load_spec
    from schedforge.sweep import run_sweep

    tfs = (2.0, 3.0, 4.0, 6.0)
    spec_path = _spec_file(write_spec, tf=tfs)
    out = tmp_path / "killed"
    cmd = [sys.executable, "-m", "schedforge", "sweep", str(spec_path), "--out", str(out)]
    cmd += ["--executor", "processes", "--workers", "2", "--quiet", "--points-only"]
    total = 2 * len(tfs)
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 120
        while _store_counts(out / "sweep.sqlite")[0] < 1:
            assert proc.poll() is None, proc.communicate()
            assert time.monotonic() < deadline, "no point stored within 120 s"
            time.sleep(0.02)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=60)
    assert proc.returncode == -signal.SIGKILL
    n_first, _ = _store_counts(out / "sweep.sqlite")
    assert 1 <= n_first < total, "the sweep finished before it could be killed"
    assert not (out / "points.csv").exists()

    rerun = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert rerun.returncode == 0, rerun.stderr
    n_rows, n_keys = _store_counts(out / "sweep.sqlite")
    assert n_rows == n_keys == total  # every point once
    con = sqlite3.connect(out / "sweep.sqlite")
    per_run = dict(con.execute("SELECT run_id, COUNT(*) FROM points GROUP BY run_id"))
    runs = con.execute("SELECT run_id, state, n_pending FROM runs ORDER BY run_id").fetchall()
    con.close()
    # The killed run never recorded its end; the rerun, holding the lock, marks it.
    assert runs[0][1] == "abandoned"
    assert runs[1][1:] == ("complete", total - n_first)
    assert per_run == {1: n_first, 2: total - n_first}  # nothing computed twice

    ref = run_sweep(load_spec(spec_path), tmp_path / "ref", executor="serial", progress="quiet")
    assert _csv_without_wall(out / "points.csv") == _csv_without_wall(ref.csv_path)
    assert os.listdir(out) and not any(n.endswith(".tmp") for n in os.listdir(out))


def test_changed_spec_refused_then_fresh_starts_over(tmp_path, write_spec, run_cli):
    spec_path = _spec_file(write_spec, tf=(2.0,))
    out = tmp_path / "out"
    code, stdout, err = run_cli(
        "sweep", spec_path, "--out", out, "--executor", "serial", "--points-only"
    )
    assert code == 0, err
    assert "2/2 points stored" in stdout
    first_csv = (out / "points.csv").read_text()
    code, _, err = run_cli(
        "sweep", spec_path, "--out", out, "--executor", "serial", "--quiet", "--points-only"
    )
    assert code == 0 and (out / "points.csv").read_text() == first_csv  # nothing to do

    changed = _spec_file(write_spec, eta=2e-4, tf=(2.0,), name="changed.toml")
    code, _, err = run_cli(
        "sweep", changed, "--out", out, "--executor", "serial", "--quiet", "--points-only"
    )
    assert code == 2
    assert "`--out`" in err and "--fresh" in err and "Traceback" not in err
    assert (out / "points.csv").read_text() == first_csv  # untouched

    code, stdout, err = run_cli(
        "sweep", changed, "--out", out, "--executor", "serial", "--fresh", "--points-only"
    )
    assert code == 0, err
    assert "archived to" in stdout
    (archive,) = (out / "archive").iterdir()
    assert (archive / "sweep.sqlite").exists() and (archive / "points.csv").read_text() == first_csv
    new_csv = (out / "points.csv").read_text()
    assert new_csv != first_csv  # eta changed the numbers
    from schedforge.spec import load_spec
    from schedforge.store import PointStore

    with PointStore(out / "sweep.sqlite") as store:
        assert store.physics_hash == load_spec(changed).physics_hash()
        assert len(store) == 2 and [r["run_id"] for r in store.runs()] == [1]
    # The folder remembers its spec (for analysis/report tools).
    from schedforge.sweep import spec_from_store

    assert spec_from_store(out) == load_spec(changed)


@pytest.mark.parametrize(
    ("args", "needle"),
    [
        (["--workers", "0"], "--workers"),
        (["--dask-local", "-2"], "--dask-local"),
        (["--executor", "serial", "--scheduler", "tcp://h:1"], "--scheduler"),
        (["--executor", "serial", "--workers", "2"], "--workers"),
    ],
)
def test_cli_rejects_bad_options(tmp_path, write_spec, run_cli, args, needle):
    spec_path = _spec_file(write_spec)
    code, _, err = run_cli("sweep", spec_path, "--out", tmp_path / "o", *args)
    assert code == 2 and needle in err and "Traceback" not in err
    assert not (tmp_path / "o" / "points.csv").exists()


def test_cli_out_must_be_a_directory(tmp_path, write_spec, run_cli):
    spec_path = _spec_file(write_spec)
    afile = tmp_path / "file"
    afile.write_text("x")
    code, _, err = run_cli("sweep", spec_path, "--out", afile, "--executor", "serial")
    assert code == 2 and "`--out`" in err and afile.read_text() == "x"


def test_failed_points_stored_listed_and_not_recomputed(tmp_path, write_spec, run_cli, monkeypatch):
    from dataclasses import replace as dc_replace

    import schedforge.dynamics as dynamics

    real = dynamics.simulate_spec
    calls = []

    def flaky(spec, **kw):
        calls.append((kw["tf_ns"], kw["k_end"]))
        if kw["tf_ns"] == 5.0 and kw["k_end"] == 1.0:
            raise RuntimeError("test double: unexpected crash")
        result = real(spec, **kw)
        if kw["tf_ns"] == 5.0:  # a numerical failure, returned as status
            nan = math.nan
            return dc_replace(
                result,
                status="failed",
                message="test double: step size too small",
                trace_distance=nan,
                ground_infidelity=nan,
                excess_energy_ghz=nan,
            )
        return result

    monkeypatch.setattr(dynamics, "simulate_spec", flaky)
    spec_path = _spec_file(write_spec)
    out = tmp_path / "out"
    code, stdout, err = run_cli(
        "sweep", spec_path, "--out", out, "--executor", "serial", "--points-only"
    )
    assert code == 0, err
    assert "points not ok (2)" in stdout
    assert "tf=5 ns: error: RuntimeError: test double: unexpected crash" in stdout
    assert "tf=5 ns: failed: test double: step size too small" in stdout
    assert "2 point(s) did not succeed" in err
    from schedforge.store import read_points_csv

    rows = {(r["k_end"], r["tf_ns"]): r for r in read_points_csv(out / "points.csv")}
    assert rows[(1.0, 5.0)]["status"] == "error" and rows[(2.0, 5.0)]["status"] == "failed"
    assert math.isnan(rows[(2.0, 5.0)]["trace_distance"])
    assert rows[(1.0, 2.0)]["status"] == "ok" and rows[(1.0, 2.0)]["trace_distance"] > 0
    n_calls = len(calls)
    assert n_calls == 4
    code, _, _ = run_cli(
        "sweep", spec_path, "--out", out, "--executor", "serial", "--quiet", "--points-only"
    )
    assert code == 0 and len(calls) == n_calls  # stored failures are not recomputed

    # --retry-failed computes exactly the points that did not succeed, and replaces them
    def healed(spec, **kw):
        calls.append((kw["tf_ns"], kw["k_end"]))
        return real(spec, **kw)

    monkeypatch.setattr(dynamics, "simulate_spec", healed)
    code, _, err = run_cli(
        "sweep",
        spec_path,
        "--out",
        out,
        "--executor",
        "serial",
        "--quiet",
        "--points-only",
        "--retry-failed",
    )
    assert code == 0, err
    assert sorted(calls[n_calls:]) == [(5.0, 1.0), (5.0, 2.0)]
    rows = {(r["k_end"], r["tf_ns"]): r for r in read_points_csv(out / "points.csv")}
    assert len(rows) == 4 and all(r["status"] == "ok" for r in rows.values())
    assert rows[(2.0, 5.0)]["trace_distance"] > 0


def test_analysis_hook_called_once_after_complete_sweep(tmp_path, write_spec, run_cli, monkeypatch):
    import schedforge.cli.sweep as cli_sweep

    seen = []
    monkeypatch.setattr(
        cli_sweep, "_analysis_hook", lambda: lambda out, spec, **kw: seen.append(out)
    )
    spec_path = _spec_file(write_spec, tf=(2.0,))
    out = tmp_path / "out"
    code, _, err = run_cli("sweep", spec_path, "--out", out, "--executor", "serial", "--quiet")
    assert code == 0, err
    assert seen == [out] and (out / "points.csv").exists()
    code, _, _ = run_cli("sweep", spec_path, "--out", out, "--executor", "serial", "--points-only")
    assert code == 0 and seen == [out]  # --points-only skips it


def test_input_error_at_a_point_stops_with_exit_2(tmp_path, write_spec, run_cli, monkeypatch):
    import schedforge.dynamics as dynamics

    real = dynamics.simulate_spec

    def strict(spec, **kw):
        if kw["tf_ns"] == 2.0:
            raise InputError("waveform.bandwidth_mhz", "is needed (test double)")
        return real(spec, **kw)

    monkeypatch.setattr(dynamics, "simulate_spec", strict)
    out = tmp_path / "out"
    code, _, err = run_cli(
        "sweep", _spec_file(write_spec), "--out", out, "--executor", "serial", "--points-only"
    )
    assert code == 2 and "Traceback" not in err
    assert "`waveform.bandwidth_mhz` is needed (test double) (found at beta k=0/" in err
    assert not (out / "points.csv").exists()
    from schedforge.store import PointStore

    with PointStore(out / "sweep.sqlite") as store:
        assert all(r["status"] == "ok" for r in store.rows())  # bad input is never stored
        assert store.runs()[-1]["state"] == "stopped: bad input"


def test_lost_points_not_stored_and_reported(tmp_path, write_spec):
    from schedforge.executors import SerialExecutor, TaskLost
    from schedforge.spec import load_spec
    from schedforge.store import PointStore
    from schedforge.sweep import format_summary, run_sweep

    class LosingExecutor(SerialExecutor):
        """Serial, but 'loses' the point tf = 2, k_end = 1 (as a dead worker would)."""

        def map_unordered(self, fn, items):
            for item in items:
                if item.tf_ns == 2.0 and item.k_end == 1.0:
                    yield item, TaskLost("worker process died (test double)")
                else:
                    yield item, fn(item)

    spec = load_spec(_spec_file(write_spec))
    out = tmp_path / "out"
    outcome = run_sweep(spec, out, executor=LosingExecutor(), progress="quiet")
    assert not outcome.complete and outcome.n_done == 3 and len(outcome.lost) == 1
    assert "the executor lost them (1)" in format_summary(outcome)
    assert len((out / "points.csv").read_text().splitlines()) == 1 + 3
    with PointStore(out / "sweep.sqlite") as store:
        assert store.runs()[-1]["state"] == "incomplete"
    again = run_sweep(spec, out, executor="serial", progress="quiet")  # rerun retries it
    assert again.complete and again.n_computed == 1 and again.n_skipped == 3


# -- families without a k; per-point warnings (issue 14) -------------------------------
def test_gevrey_is_computed_once_per_tf_not_once_per_k_end():
    """gevrey is flat to every order at the end whatever k_end says: one point per tf."""
    spec = _spec(tf_ns=(10.0, 20.0), k_end=(1.0, 2.0, 3.0), family=("beta", "gevrey", "linear"))
    pts = sweep_points(spec)
    gev = [p for p in pts if p.family == "gevrey"]
    assert [(p.k_end, p.tf_ns) for p in gev] == [(0.0, 10.0), (0.0, 20.0)]
    assert len([p for p in pts if p.family == "beta"]) == 6
    assert len([p for p in pts if p.family == "linear"]) == 2


def test_point_warnings_reach_points_csv_summary_and_report(tmp_path):
    """At 1000 ns the driven qubit is 2.8 final relaxation times into the anneal: each such
    point carries the warning in points.csv, the console summary counts it, and the
    report shows it beside the point; the 3000 ns points carry none."""
    import csv

    from schedforge.report import analyse_sweep_dir
    from schedforge.spec import load_spec
    from schedforge.store import WARNING_SEPARATOR
    from schedforge.sweep import format_summary, run_sweep

    base = load_spec("builtin:driven-qubit")
    spec = replace(
        base, sweep=SweepSpec(tf_ns=(1000.0, 3000.0), k_end=(1.0, 2.0), family=("beta", "gevrey"))
    )
    out = run_sweep(spec, tmp_path, executor="serial", progress="quiet")
    assert out.n_points == 6  # beta 2 k_end x 2 tf, gevrey 2 tf
    with open(out.csv_path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert "warnings" in rows[0]
    for r in rows:
        warned = "short against the final relaxation time" in r["warnings"]
        assert warned == (float(r["tf_ns"]) == 1000.0), r
        # sweep-wide (pre-flight) warnings are not repeated per point
        assert all(w not in r["warnings"].split(WARNING_SEPARATOR) for w in out.warnings)
    summary = format_summary(out)
    assert "3 point(s) carry warnings of their own" in summary
    assert "warned" in summary.splitlines()[0]
    analysis = analyse_sweep_dir(tmp_path, spec)
    text = analysis.report_html.read_text()
    assert "3 of 6 points carry warnings of their own" in text
    assert "short against the final relaxation time" in text
