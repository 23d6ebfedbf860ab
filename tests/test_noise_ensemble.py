"""Noise ensembles of anneals through the sweep engine (issue 17, part 2).

References
----------
- A draw of the ensemble is rebuilt here by hand from numpy's SeedSequence (the
  documented layout: fields, couplings, then A and B amplitudes) and run alone
  through ``simulate_spec``; the ensemble must give the same numbers.
- One qubit with linear curves: A(1) = 0, so H(1) = (B(1)/2) h Z and the intended
  ground state of h > 0 is |1> (Z = -1); its probability is rho_11 (common practice,
  no source).
- Sample mean and standard deviation (ddof = 1) against numpy; a pure power law
  C tf^-(k+1) must be fitted with the slope -(k+1) (Avron, Fraas, Graf and Grech 2012,
  as in the README; the law here is exact by construction).
"""

from __future__ import annotations

import dataclasses
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from schedforge.dynamics import simulate_spec
from schedforge.errors import InputError
from schedforge.noise_ensemble import (
    NOMINAL,
    ensemble_points,
    noise_physics_hash,
    noisy_spec,
    run_noise_sweep,
    summarize_ensemble,
)
from schedforge.spec import parse_spec

BASE = {
    "version": 1,
    "device": {"curves": "linear", "A0_ghz": 3.5, "B0_ghz": 2.5},
    "problem": {"qubits": 1, "h": [0.7]},
    "bath": {"eta": 2e-2},
    "schedule": {"family": "beta", "k_start": 0, "k_end": 1, "tf_ns": 100.0},
    "sweep": {"tf_ns": [60.0, 120.0]},
    "noise": {"level": 0.1, "amplitude_level": 0.05, "draws": 3, "seed": 9},
}


def make_spec(**noise: object) -> object:
    data = json.loads(json.dumps(BASE))
    data["noise"].update(noise)
    return parse_spec(data)


def by_point(rows: list[dict]) -> dict[tuple[float, int], dict]:
    return {(r["tf_ns"], r["draw"]): r for r in rows}


def test_points_cover_grid_and_draws() -> None:
    pts = ensemble_points(make_spec())
    assert len(pts) == 2 * (3 + 1)
    assert {p.draw for p in pts} == {NOMINAL, 0, 1, 2}
    assert len({p.canonical() for p in pts}) == len(pts)


def test_level_zero_reproduces_the_noiseless_results(tmp_path: Path) -> None:
    spec = make_spec(level=0.0, amplitude_level=0.0)
    for d in range(3):
        assert noisy_spec(spec, d).physics_hash() == spec.physics_hash()
    out = run_noise_sweep(spec, tmp_path / "zero", "serial", progress="quiet")
    rows = by_point(out.rows)
    for tf in (60.0, 120.0):
        alone = simulate_spec(spec, tf_ns=tf)
        for d in (NOMINAL, 0, 1, 2):
            assert rows[(tf, d)]["trace_distance"] == alone.trace_distance
    for r in out.per_point:
        assert r["trace_distance_std"] == 0.0


def test_a_draw_equals_the_same_noisy_problem_run_alone(tmp_path: Path) -> None:
    spec = make_spec()
    out = run_noise_sweep(spec, tmp_path / "ens", "serial", progress="quiet")
    rows = by_point(out.rows)
    draw, tf = 2, 120.0
    z = np.random.default_rng(np.random.SeedSequence([9, draw])).standard_normal(3)
    h = 0.7 + 0.1 * 0.7 * z[0]  # level x largest |coefficient| x z
    by_hand = dataclasses.replace(
        spec,
        problem=dataclasses.replace(spec.problem, h=(h,)),
        device=dataclasses.replace(
            spec.device, A0_ghz=3.5 * (1 + 0.05 * z[1]), B0_ghz=2.5 * (1 + 0.05 * z[2])
        ),
    )
    alone = simulate_spec(by_hand, tf_ns=tf)
    row = rows[(tf, draw)]
    assert row["status"] == "ok"
    assert row["trace_distance"] == pytest.approx(alone.trace_distance, rel=1e-12, abs=1e-16)
    assert row["factor_A"] == pytest.approx(1 + 0.05 * z[1], rel=1e-15)
    p_intended = float(np.real(alone.final_state[1, 1]))  # |1> is the ground state of h > 0
    assert row["intended_ground_probability"] == pytest.approx(p_intended, abs=1e-12)
    # the errors matter: the draw differs from the nominal point
    assert row["trace_distance"] != rows[(tf, NOMINAL)]["trace_distance"]


def test_summary_moments_match_numpy(tmp_path: Path) -> None:
    out = run_noise_sweep(make_spec(), tmp_path / "m", "serial", progress="quiet")
    for summary in out.per_point:
        vals = [
            r["trace_distance"]
            for r in out.rows
            if r["tf_ns"] == summary["tf_ns"] and r["draw"] != NOMINAL
        ]
        assert summary["trace_distance_mean"] == pytest.approx(np.mean(vals), rel=1e-12)
        assert summary["trace_distance_std"] == pytest.approx(np.std(vals, ddof=1), rel=1e-12)
        assert summary["trace_distance_spread"] == pytest.approx(
            np.std(vals, ddof=1) / np.mean(vals), rel=1e-12
        )


def test_per_draw_fit_recovers_an_exact_power_law() -> None:
    tf = np.geomspace(100, 10000, 6)
    rows = []
    for d, c in ((NOMINAL, 1.0), (0, 2.0), (1, 0.5)):
        for t in tf:
            rows.append(
                {"family": "beta", "k_start": 0.0, "k_end": 2.0, "tf_ns": float(t), "draw": d,
                 "trace_distance": c * 1e3 * t**-3.0, "intended_ground_probability": 0.9,
                 "status": "ok"}
            )  # fmt: skip
    _, per_draw, per_schedule = summarize_ensemble(rows)
    assert all(r["slope"] == pytest.approx(-3.0, abs=1e-9) for r in per_draw)
    assert per_schedule[0]["agrees"] == 2 and per_schedule[0]["nominal_verdict"] == "agrees"


def test_resume_and_more_draws_compute_only_what_is_missing(tmp_path: Path) -> None:
    spec = make_spec(draws=2)
    folder = tmp_path / "r"
    first = run_noise_sweep(spec, folder, "serial", progress="quiet")
    assert first.sweep.n_computed == 2 * 3
    again = run_noise_sweep(spec, folder, "serial", progress="quiet")
    assert again.sweep.n_computed == 0
    more = run_noise_sweep(make_spec(draws=3), folder, "serial", progress="quiet")
    assert more.sweep.n_computed == 2  # only draw 2, at both tf
    assert noise_physics_hash(make_spec(draws=2)) == noise_physics_hash(make_spec(draws=3))
    assert noise_physics_hash(make_spec(seed=1)) != noise_physics_hash(spec)
    with pytest.raises(InputError) as err:  # another noise model in the same folder
        run_noise_sweep(make_spec(draws=2, level=0.2), folder, "serial", progress="quiet")
    assert err.value.field == "--out"


@pytest.fixture(scope="module")
def dask_threads():
    """A light Dask cluster: two single-threaded workers inside this process."""
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None
    )
    yield cluster.scheduler_address
    cluster.close()


def test_draws_are_the_same_on_every_executor(tmp_path: Path, dask_threads: str) -> None:
    """Draw d's numbers come from SeedSequence([seed, d]) alone: serial, local processes
    and Dask (which run the points in other orders) store the same numbers, bit for bit,
    and draw 1 is the noisy problem rebuilt by hand from numpy's SeedSequence."""
    from schedforge.executors import make_executor

    spec = make_spec(draws=2)
    runs = {"serial": run_noise_sweep(spec, tmp_path / "a", "serial", progress="quiet")}
    with make_executor("processes", 2) as ex:
        runs["processes"] = run_noise_sweep(spec, tmp_path / "b", ex, progress="quiet")
    with make_executor("dask", scheduler=dask_threads) as ex:
        runs["dask"] = run_noise_sweep(spec, tmp_path / "c", ex, progress="quiet")
    keep = ("tf_ns", "draw", "trace_distance", "intended_ground_probability", "factor_A",
            "factor_B", "status")  # fmt: skip
    tables = {k: [{c: r[c] for c in keep} for r in o.rows] for k, o in runs.items()}
    assert tables["serial"] == tables["processes"] == tables["dask"]
    assert len(tables["dask"]) == 2 * 3
    z = np.random.default_rng(np.random.SeedSequence([9, 1])).standard_normal(3)
    (row,) = [r for r in runs["dask"].rows if r["draw"] == 1 and r["tf_ns"] == 60.0]
    assert row["factor_B"] == pytest.approx(1 + 0.05 * z[2], rel=1e-15)


def test_bad_noise_input() -> None:
    data = json.loads(json.dumps(BASE))
    del data["noise"]
    with pytest.raises(InputError) as err:
        ensemble_points(parse_spec(data))
    assert err.value.field == "noise"
    big = make_spec(amplitude_level=0.9, draws=200)
    with pytest.raises(InputError) as err:  # some draw has 1 + 0.9 z <= 0
        from schedforge.noise_ensemble import check_draws

        check_draws(big)
    assert "non-positive amplitude" in err.value.rule


def test_cli_noise_sweep_errors_exit_2(run_cli, write_spec, tmp_path: Path) -> None:
    spec = write_spec("version = 1\n[sweep]\ntf_ns = [100.0]\n")
    out = tmp_path / "o"
    code, _, err = run_cli("noise-sweep", spec, "--out", out, "--executor", "serial")
    assert code == 2 and "`noise`" in err
    assert not out.exists()
    # some draw of 200 has 1 + 0.9 z <= 0: refused before anything is computed or written
    text = "version = 1\n[sweep]\ntf_ns = [100.0]\n[noise]\namplitude_level = 0.9\n"
    code, _, err = run_cli("noise-sweep", write_spec(text), "--out", out, "--executor", "serial")
    assert code == 2 and "`noise.amplitude_level`" in err and "non-positive" in err
    assert not out.exists()


def test_console_script_noise_sweep_writes_one_report(tmp_path: Path, write_spec) -> None:
    """noise-sweep writes one report.html: the control-error section above the sweep report
    of the noiseless points; `schedforge report DIR` rebuilds it from the store."""
    text = (
        "version = 1\n[problem]\nqubits = 1\nh = [0.7]\n[bath]\neta = 2e-2\n"
        "[schedule]\nk_end = 1\n[sweep]\ntf_ns = [60.0, 120.0]\n"
        "[noise]\nlevel = 0.1\ndraws = 2\nseed = 1\n"
    )
    spec = write_spec(text)
    script = Path(sys.executable).with_name("schedforge")
    cmd = [str(script)] if script.exists() else [sys.executable, "-m", "schedforge"]
    proc = subprocess.run(
        [*cmd, "noise-sweep", str(spec), "--out", "res", "--executor", "serial", "--quiet"],
        cwd=tmp_path, capture_output=True, text=True, timeout=300, stdin=subprocess.DEVNULL,
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    res = tmp_path / "res"
    for name in ("ensemble.csv", "ensemble-summary.csv", "ensemble-slopes.csv",
                 "ensemble-schedules.csv", "report.html", "fit.csv", "spec.toml",
                 "points.csv", "plots/noise_precision_curve.png"):  # fmt: skip
        assert (res / name).is_file(), name
    assert not (res / "noise-report.html").exists()
    html = (res / "report.html").read_text(encoding="utf-8")
    section = html[html.index('<section id="control-errors">') : html.index("</section>")]
    assert "which schedule degrades least" in section
    assert section.count("<img") == 6  # 3 histograms, 2 spreads, the precision curve
    assert html.index("</section>") < html.index("<h2>Scaling fits</h2>")
    # the mean shown is the mean over the draws in ensemble.csv (numpy)
    import csv

    with open(res / "ensemble.csv", newline="") as fh:
        table = list(csv.DictReader(fh))
    td = [float(r["trace_distance"]) for r in table if r["draw"] != "-1" and r["tf_ns"] == "120.0"]
    assert f"{np.mean(td):.4g}" in section
    # the sweep part fits the noiseless points, as ideal
    with open(res / "fit.csv", newline="") as fh:
        fits = list(csv.DictReader(fh))
    assert [(f["family"], f["variant"]) for f in fits] == [("beta", "ideal")]
    (res / "report.html").unlink()
    proc = subprocess.run(
        [*cmd, "report", "res"], cwd=tmp_path, capture_output=True, text=True, timeout=300,
        stdin=subprocess.DEVNULL,
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    again = (res / "report.html").read_text(encoding="utf-8")
    assert again.count("<img") == html.count("<img") and f"{np.mean(td):.4g}" in again
    # copied without its store: refused (points.csv lacks the statistics), nothing rewritten
    (res / "sweep.sqlite").rename(tmp_path / "elsewhere.sqlite")
    proc = subprocess.run(
        [*cmd, "report", "res"], cwd=tmp_path, capture_output=True, text=True, timeout=300,
        stdin=subprocess.DEVNULL,
    )  # fmt: skip
    assert proc.returncode == 2 and "noise ensemble without its store" in proc.stderr
    assert (res / "report.html").read_text(encoding="utf-8") == again


# -- the error law of the dynamics (closed systems) ------------------------------------
CLOSED = {
    "version": 1,
    "device": {"curves": "linear", "A0_ghz": 1.0, "B0_ghz": 1.0},
    "problem": {"qubits": 1, "h": [0.5]},
    "bath": {"spectrum": "none"},
    "schedule": {"family": "beta", "k_start": 0, "k_end": 2, "tf_ns": 40.0},
    "initial": {"state": "ground"},
    "sweep": {"tf_ns": [40.0, 80.0, 160.0]},
    "noise": {"level": 0.05, "amplitude_level": 0.02, "draws": 2, "seed": 3},
}


def test_closed_ensemble_fits_use_the_closed_law(tmp_path: Path) -> None:
    """Closed (unitary) dynamics, k_start = 0, k_end = 2: every draw falls as tf^-1, the
    boundary term of the start (Lidar, Rezakhani and Hamma, J. Math. Phys. 50, 102106
    (2009), from memory; the local slope is measured directly here against numpy), not
    tf^-3 as the open-system law would say."""
    spec = parse_spec(json.loads(json.dumps(CLOSED)), ".")
    out = run_noise_sweep(spec, tmp_path / "closed", "serial", progress="quiet")
    assert all(r["status"] == "ok" for r in out.rows)
    for d in (NOMINAL, 0, 1):
        td = [r["trace_distance"] for r in out.rows if r["draw"] == d]
        measured = np.polyfit(np.log([40.0, 80.0, 160.0]), np.log(td), 1)[0]
        assert measured == pytest.approx(-1.0, abs=0.05)
    (sched,) = out.per_schedule
    assert sched["expected_slope"] == -1.0
    assert sched["nominal_verdict"] == "agrees"
    assert sched["agrees"] == 2 and sched["fitted"] == 2
    for r in out.per_draw:
        assert r["slope"] == pytest.approx(-1.0, abs=0.05)
        assert r["error_law"].startswith("closed")


# -- played (realized) waveforms ---------------------------------------------------------
def test_played_twins_run_under_each_draw(tmp_path: Path) -> None:
    """With a [waveform] section each draw also runs the waveform the hardware plays; a
    played draw equals the noisy problem rebuilt by hand from numpy's SeedSequence and
    run alone as played through simulate_spec."""
    data = json.loads(json.dumps(BASE))
    data["sweep"]["tf_ns"] = [60.0]
    data["noise"]["draws"] = 1
    data["waveform"] = {"sample_rate_gsps": 1.0, "dac_bits": 14, "bandwidth_mhz": 250.0,
                        "filter": "gaussian"}  # fmt: skip
    spec = parse_spec(data)
    points = ensemble_points(spec)
    assert sorted((p.draw, p.sweep_variant) for p in points) == [
        (NOMINAL, "ideal"), (NOMINAL, "realized"), (0, "ideal"), (0, "realized")
    ]  # fmt: skip
    import io

    log = io.StringIO()
    out = run_noise_sweep(
        spec, tmp_path / "played", "serial", progress="lines", progress_stream=log
    )
    assert "2 of them as played" in log.getvalue()  # the start line warns of their cost
    played = {(r["draw"], r["variant"]): r for r in out.rows}
    z = np.random.default_rng(np.random.SeedSequence([9, 0])).standard_normal(3)
    by_hand = dataclasses.replace(
        spec,
        problem=dataclasses.replace(spec.problem, h=(0.7 + 0.1 * 0.7 * z[0],)),
        device=dataclasses.replace(
            spec.device, A0_ghz=3.5 * (1 + 0.05 * z[1]), B0_ghz=2.5 * (1 + 0.05 * z[2])
        ),
    )
    alone = simulate_spec(by_hand, tf_ns=60.0, variant="realized")
    row = played[(0, "realized")]
    assert row["status"] == "ok"
    assert row["trace_distance"] == pytest.approx(alone.trace_distance, rel=1e-9)
    # the played waveform is not the designed one: the twins differ
    assert abs(row["trace_distance"] / played[(0, "ideal")]["trace_distance"] - 1) > 0.1
    variants = {(r["variant"], r["draw"]) for r in out.per_draw}
    assert variants == {("ideal", NOMINAL), ("ideal", 0), ("realized", NOMINAL), ("realized", 0)}
    assert {r["variant"] for r in out.per_point} == {"ideal", "realized"}


# -- amplitude errors of tabulated device curves -----------------------------------------
def _linear_table(path: Path) -> Path:
    """The linear curves of BASE as a table: a quintic spline reproduces a straight line
    exactly (a spline of degree d contains every polynomial of degree <= d: de Boor,
    A Practical Guide to Splines, 1978), so these curves are BASE's to rounding."""
    s = [i / 10 for i in range(11)]
    rows = "\n".join(f"{x!r},{3.5 * (1 - x)!r},{2.5 * x!r}" for x in s)
    path.write_text("# invented table: the linear curves of the tests\ns,A_ghz,B_ghz\n" + rows)
    return path


def test_amplitude_errors_of_tabulated_curves(tmp_path: Path) -> None:
    """A draw on tabulated curves scales the interpolated A(s), B(s) by (1 + level z_A/B):
    it equals the same noisy problem on linear curves with A0, B0 scaled by hand from
    numpy's SeedSequence, run alone through simulate_spec."""
    data = json.loads(json.dumps(BASE))
    data["device"] = {"curves": str(_linear_table(tmp_path / "curves.csv"))}
    data["sweep"]["tf_ns"] = [120.0]
    spec = parse_spec(data)
    out = run_noise_sweep(spec, tmp_path / "tab", "serial", progress="quiet")
    rows = by_point(out.rows)
    z = np.random.default_rng(np.random.SeedSequence([9, 2])).standard_normal(3)
    linear = make_spec()
    by_hand = dataclasses.replace(
        linear,
        problem=dataclasses.replace(linear.problem, h=(0.7 + 0.1 * 0.7 * z[0],)),
        device=dataclasses.replace(
            linear.device, A0_ghz=3.5 * (1 + 0.05 * z[1]), B0_ghz=2.5 * (1 + 0.05 * z[2])
        ),
    )
    alone = simulate_spec(by_hand, tf_ns=120.0)
    row = rows[(120.0, 2)]
    assert row["status"] == "ok"
    assert row["factor_A"] == pytest.approx(1 + 0.05 * z[1], rel=1e-15)
    assert row["trace_distance"] == pytest.approx(alone.trace_distance, rel=1e-8)  # 3e-12 seen
    nominal = simulate_spec(linear, tf_ns=120.0)
    assert abs(row["trace_distance"] / nominal.trace_distance - 1) > 1e-3  # errors matter


# -- each draw's system is built once --------------------------------------------------------
def test_each_draw_builds_its_system_and_preflight_once(tmp_path: Path, monkeypatch) -> None:
    """20 draws at 2 anneal times (more draws than any small cache of systems): every
    draw's pre-flight runs once, not once per point."""
    from schedforge.system import System as system_class

    calls: list[int] = []
    original = system_class._run_preflight

    def counting(self):  # type: ignore[no-untyped-def]
        calls.append(1)
        return original(self)

    monkeypatch.setattr(system_class, "_run_preflight", counting)
    spec = make_spec(draws=20, seed=21)
    out = run_noise_sweep(spec, tmp_path / "once", "serial", progress="quiet")
    assert out.sweep.n_computed == 2 * 21
    assert len(calls) <= 21 + 1  # each draw and the nominal system (+ the sweep's check)
