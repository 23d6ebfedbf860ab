"""A sweep folder that describes one study, and inputs that cannot crash, hang or lie.

References: SQLite's documented behaviour (``PRAGMA quick_check`` on a damaged file,
"file is not a database"); IEEE 754 double precision (largest finite double
1.797e308, so exp(x) overflows past x = 709.78 and underflows to 0 past 745);
CODATA 2018 exact constants hbar and k_B (through ``schedforge.units``);
the regularized incomplete beta function's derivative at x = 1 from
scipy.special (Abramowitz and Stegun 26.5); Python's ``math.lgamma``.
"""

from __future__ import annotations

import math
import os
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest
from scipy import special

from schedforge.errors import InputError
from schedforge.spec import load_spec
from schedforge.spec_model import Spec
from schedforge.store import STORE_NAME, PointStore, archive_sweep_dir, read_points_csv
from schedforge.sweep import spec_from_store

# A small open-system study: one qubit, three anneal times (about 1 s of computing).
STUDY_A = """version = 1
[problem]
qubits = 1
h = [0.7]
[schedule]
family = "beta"
k_end = 1
[sweep]
tf_ns = [100.0, 300.0, 1000.0]
"""
STUDY_B = STUDY_A.replace("h = [0.7]", "h = [0.5]")


def _sweep(run_cli, spec: Path, out: Path, *extra: str) -> tuple[int, str, str]:
    return run_cli("sweep", spec, "--out", out, "--executor", "serial", "--quiet", *extra)


# -- the folder describes one study ----------------------------------------------------
def test_fresh_archives_every_output_and_report_uses_the_store(tmp_path, write_spec, run_cli):
    a = write_spec(STUDY_A, "a.toml")
    b = write_spec(STUDY_B, "b.toml")
    out = tmp_path / "study"
    code, _, err = _sweep(run_cli, a, out)
    assert code == 0, err
    for name in ("points.csv", "fit.csv", "spec.toml", "report.html", "plots"):
        assert (out / name).exists(), name
    code, _, err = _sweep(run_cli, b, out, "--fresh", "--points-only")
    assert code == 0, err
    # Nothing of study A stays beside B's points: it all went to one archive folder.
    (archive,) = (out / "archive").iterdir()
    for name in ("sweep.sqlite", "points.csv", "fit.csv", "spec.toml", "report.html", "plots"):
        assert (archive / name).exists(), name
    for name in ("fit.csv", "spec.toml", "report.html", "plots"):
        assert not (out / name).exists(), name
    # report on a --points-only folder: spec from the store (study B), not A's copy.
    code, _, err = run_cli("report", out)
    assert code == 0, err
    assert load_spec(out / "spec.toml").problem.h == (0.5,)
    assert load_spec(archive / "spec.toml").problem.h == (0.7,)


def test_report_replaces_a_foreign_spec_copy_with_the_stores(tmp_path, write_spec, run_cli):
    out = tmp_path / "study"
    assert _sweep(run_cli, write_spec(STUDY_B, "b.toml"), out, "--points-only")[0] == 0
    # A stale spec.toml of another study in the folder (as after the old --fresh).
    shutil.copy(write_spec(STUDY_A, "a.toml"), out / "spec.toml")
    code, _, err = run_cli("report", out)
    assert code == 0, err
    assert "did not describe the study in the store" in err
    assert load_spec(out / "spec.toml").physics_hash() == spec_from_store(out).physics_hash()


def test_lock_held_until_fit_and_report_are_written(tmp_path, write_spec, run_cli, monkeypatch):
    from schedforge.cli import sweep as sweep_cmd

    seen: list[str] = []

    def hook(out_dir, spec, echo=True):
        # While the fits are made, another process must not be able to start a sweep.
        code = (
            "from schedforge.store import archive_sweep_dir\n"
            "from schedforge.errors import InputError\n"
            "try:\n"
            f"    archive_sweep_dir({str(out_dir)!r})\n"
            "except InputError as e:\n"
            "    print(e)\n"
        )
        done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
        seen.append(done.stdout)

    monkeypatch.setattr(sweep_cmd, "_analysis_hook", lambda: hook)
    code, _, err = _sweep(run_cli, write_spec(STUDY_A), tmp_path / "s")
    assert code == 0, err
    assert seen and "in use by another running sweep" in seen[0]


def test_killed_run_is_marked_abandoned_on_next_open(tmp_path):
    path = tmp_path / STORE_NAME
    code = (
        "import os\n"
        "from schedforge.store import PointStore\n"
        f"s = PointStore({str(path)!r}, 'a' * 64)\n"
        "s.begin_run(executor='serial', n_points=3, n_pending=3)\n"
        "os._exit(9)\n"  # dies without end_run
    )
    subprocess.run([sys.executable, "-c", code], check=False)
    with PointStore(path) as ro:
        assert [r["state"] for r in ro.runs()] == ["running"]
    with PointStore(path, "a" * 64) as store:
        assert [r["state"] for r in store.runs()] == ["abandoned"]


# -- the store notices changed curves, not moved ones -----------------------------------
CURVES = "s,A_ghz,B_ghz\n" + "".join(
    f"{s:.2f},{3.5 * (1 - s):.6f},{2.5 * s:.6f}\n" for s in [i / 10 for i in range(11)]
)


def test_curves_hashed_by_content_not_path(tmp_path, write_spec):
    spec_text = 'version = 1\n[device]\ncurves = "curves.csv"\n'
    first = write_spec(spec_text, "one/spec.toml")
    (tmp_path / "one" / "curves.csv").write_text(CURVES)
    second = write_spec(spec_text, "two/spec.toml")
    (tmp_path / "two" / "curves.csv").write_text(CURVES)
    h1 = load_spec(first).physics_hash()
    assert load_spec(second).physics_hash() == h1  # same contents elsewhere: same study
    (tmp_path / "one" / "curves.csv").write_text(CURVES.replace("1.00,0.000000", "1.00,0.010000"))
    assert load_spec(first).physics_hash() != h1  # same path, new contents: another study


def test_curves_changed_after_loading_are_refused(tmp_path, write_spec):
    from schedforge.system import System

    path = write_spec('version = 1\n[device]\ncurves = "c.csv"\n')
    (tmp_path / "c.csv").write_text(CURVES)
    spec = load_spec(path)
    (tmp_path / "c.csv").write_text(CURVES + "\n# edited\n")
    with pytest.raises(InputError, match="contents changed"):
        System.from_spec(spec)


def test_physics_hash_of_existing_stores_unchanged():
    # Hashes written by schedforge before content hashing (linear curves): an existing
    # store must still be recognised.
    assert Spec().physics_hash() == (
        "9bbce94710b01e78b2a9a34b957c7f0571a2722b93e74b43588b32ba85c316fe"
    )
    assert load_spec("builtin:ising-2q").physics_hash() == (
        "4497d262f68f4822d932cfbb88fe9e5a4af01b2da14984a27d0223cae63a0874"
    )


# -- a damaged store ----------------------------------------------------------------------
@pytest.mark.parametrize("damage", ["truncate", "overwrite"])
def test_damaged_store_named_and_fresh_moves_it_aside_intact(tmp_path, write_spec, run_cli, damage):
    spec = write_spec(STUDY_A)
    out = tmp_path / "s"
    assert _sweep(run_cli, spec, out, "--points-only")[0] == 0
    store = out / STORE_NAME
    with sqlite3.connect(store) as conn:  # fold the WAL in, so the file is the whole store
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    data = store.read_bytes()
    damaged = data[: len(data) // 2] if damage == "truncate" else b"garbage " * 1000
    store.write_bytes(damaged)
    code, _, err = _sweep(run_cli, spec, out)
    assert code == 2 and "damaged sweep store" in err and "--fresh" in err
    code, _, err = _sweep(run_cli, spec, out, "--fresh")
    assert code == 0, err
    (archive,) = (out / "archive").iterdir()
    assert (archive / STORE_NAME).read_bytes() == damaged  # moved aside intact
    with PointStore(store) as new:
        assert len(new) == 3


def test_truncated_points_csv_named_by_file_and_line(tmp_path, write_spec, run_cli):
    out = tmp_path / "s"
    assert _sweep(run_cli, write_spec(STUDY_A), out, "--points-only")[0] == 0
    csv_path = out / "points.csv"
    text = csv_path.read_text()
    csv_path.write_text(text[: text.rindex("\n", 0, len(text) - 1) + 12])  # cut mid-line
    with pytest.raises(InputError) as info:
        read_points_csv(csv_path)
    assert info.value.field == f"{csv_path}: line 4"
    assert "truncated" in str(info.value)
    # The report of a folder without its store says so too (it said k_start "must be
    # finite" before).
    (out / STORE_NAME).unlink()
    code, _, err = run_cli("report", out)
    assert code == 2 and "points.csv: data row 3" in err and "truncated" in err


# -- inputs that crashed --------------------------------------------------------------------
def test_deeply_nested_toml_is_an_input_error(write_spec):
    path = write_spec("version = 1\nx = " + "[" * 5000 + "]" * 5000 + "\n")
    with pytest.raises(InputError, match="too deeply"):
        load_spec(path)


def test_byte_order_mark_accepted_in_spec_and_curves(tmp_path):
    (tmp_path / "c.csv").write_bytes(b"\xef\xbb\xbf" + CURVES.encode())
    spec = tmp_path / "s.toml"
    spec.write_bytes(b'\xef\xbb\xbfversion = 1\n[device]\ncurves = "c.csv"\n')
    from schedforge.system import System

    assert System.from_spec(load_spec(spec)).hamiltonian.curves.s.size == 11


def test_spec_size_and_echo_capped(write_spec, tmp_path):
    path = write_spec('version = 1\n[schedule]\nfamily = "' + "x" * 100_000 + '"\n')
    with pytest.raises(InputError) as info:
        load_spec(path)
    assert info.value.field == "schedule.family" and len(str(info.value)) < 400
    big = tmp_path / "big.toml"
    big.write_text("version = 1\n# " + "x" * (1024 * 1024) + "\n")
    with pytest.raises(InputError, match="at most 1024 KiB"):
        load_spec(big)


def test_explicit_tf_list_capped_like_log_grid(write_spec):
    times = ", ".join(str(float(t)) for t in range(1, 1002))
    with pytest.raises(InputError) as info:
        load_spec(write_spec(f"version = 1\n[sweep]\ntf_ns = [{times}]\n"))
    assert info.value.field == "sweep.tf_ns" and "at most 1000" in str(info.value)


@pytest.mark.parametrize(
    ("text", "field"),
    [
        ("[problem]\nh = [1e150]", "problem.h[0]"),
        ("[device]\nA0_ghz = 1e150", "device.A0_ghz"),
        ("[bath]\ncutoff_ghz = 1e-300", "bath.cutoff_ghz"),
        ("[problem]\nh = [0.0]", "problem.h"),
        ("[problem]\nh = [1e5]\n[bath]\ntemperature_mk = 1e5", "bath.cutoff_ghz"),
        ("[bath]\ntemperature_mk = 0.01", "bath.temperature_mk"),
        ("[bath]\ntemperature_mk = 0.1", "bath.temperature_mk"),
    ],
)
def test_out_of_range_energies_name_their_field(write_spec, text, field):
    with pytest.raises(InputError) as info:
        load_spec(write_spec(f"version = 1\n{text}\n"))
    assert info.value.field == field


def test_lowest_temperature_is_where_beta_times_spread_reaches_1400(write_spec):
    from schedforge.units import HBAR_OVER_KB_K_NS

    # One qubit, A0 = 3.5 GHz, B0 h = 1.75 GHz: the spread is n A0 = 3.5 GHz.
    t_min = 1e3 * HBAR_OVER_KB_K_NS * 2 * math.pi * 3.5 / 1400  # mK, CODATA constants
    assert 0.11 < t_min < 0.13
    load_spec(write_spec(f"version = 1\n[bath]\ntemperature_mk = {t_min * 1.01}\n"))
    with pytest.raises(InputError, match=f"at least {t_min:.3g} mK"):
        load_spec(write_spec(f"version = 1\n[bath]\ntemperature_mk = {t_min * 0.99}\n"))


def test_curve_values_and_all_zero_table(tmp_path, write_spec):
    from schedforge.system import System

    path = write_spec('version = 1\n[device]\ncurves = "c.csv"\n')
    (tmp_path / "c.csv").write_text(CURVES.replace("0.50,1.750000", "0.50,1e308"))
    with pytest.raises(InputError) as info:
        System.from_spec(load_spec(path))
    assert info.value.field.endswith("column A_ghz") and "line 7" in info.value.field
    zeros = "s,A_ghz,B_ghz\n" + "".join(f"{i / 10},0,0\n" for i in range(11))
    (tmp_path / "c.csv").write_text(zeros)
    with pytest.raises(InputError) as info:
        System.from_spec(load_spec(path))
    assert info.value.field.startswith("device.curves")


def test_breakpoints_without_sample_rate_in_design(tmp_path, write_spec, run_cli):
    spec = write_spec('version = 1\n[schedule]\nfamily = "linear"\n[waveform]\nbreakpoints = 8\n')
    code, _, err = run_cli("design", spec, "--out", tmp_path / "bp.csv")
    assert code == 0, err


def test_scheduler_address_checked():
    pytest.importorskip("distributed")
    from schedforge.executors import check_scheduler_address, make_executor

    for bad in ("not a url", "http://host:8786", "tcp://", "tcp://host"):
        with pytest.raises(InputError) as info:
            make_executor("dask", scheduler=bad)
        assert info.value.field == "--scheduler"
    assert check_scheduler_address("tcp://127.0.0.1:8786")
    assert check_scheduler_address("localhost:8786")


def test_scheduler_without_workers_times_out_with_a_message():
    distributed = pytest.importorskip("distributed")
    from schedforge.executors import DaskExecutor

    with distributed.LocalCluster(n_workers=0, dashboard_address=None, processes=False) as c:
        with pytest.raises(InputError, match="no workers"):
            DaskExecutor(scheduler=c.scheduler_address, worker_timeout_s=0.5)


# -- numbers that were silently wrong: beta orders past double precision --------------------
def test_beta_order_limit_is_where_the_leading_derivative_overflows(write_spec):
    from schedforge.schedules import BetaSchedule

    # k_start = 0: |f^(k+1)(1)| = k! / B(1, 1 + k) = (k + 1)!, finite up to 170! (IEEE).
    sched = BetaSchedule(0, 169)
    d = sched.derivatives([1.0], 170)[:, 0]
    assert d[170] == pytest.approx(-math.exp(math.lgamma(171)), rel=1e-9)
    assert math.isfinite(d[170]) and sched.flat_end == 169
    assert special.betainc(1.0, 170.0, 0.5) == pytest.approx(float(sched(0.5)), rel=1e-14)
    for text, field in [
        ("[schedule]\nk_end = 170", "schedule.k_end"),
        ("[schedule]\nk_start = 1e4", "schedule.k_start"),
        ("[schedule]\nk_end = 1e10", "schedule.k_end"),
        ("[schedule]\nk_start = 150\nk_end = 150", "schedule.k_end"),
    ]:
        with pytest.raises(InputError) as info:
            load_spec(write_spec(f"version = 1\n{text}\n"))
        assert info.value.field == field and "largest double" in str(info.value)


def test_inspect_with_large_k_is_an_input_error(write_spec, run_cli):
    code, _, err = run_cli("inspect", write_spec("version = 1\n[schedule]\nk_end = 170\n"))
    assert code == 2 and "schedule.k_end" in err


# -- limits that are real -----------------------------------------------------------------
def test_general_integrator_with_huge_tf_refused_before_running(write_spec):
    from schedforge.dynamics import simulate_spec

    spec = load_spec(write_spec('version = 1\n[numerics]\nintegrator = "general"\n'))
    with pytest.raises(InputError) as info:
        simulate_spec(spec, tf_ns=1e12)
    assert info.value.field == "schedule.tf_ns" and "periods" in str(info.value)


def test_realized_waveform_with_too_many_samples_refused(write_spec):
    from schedforge.dynamics import simulate_spec

    spec = load_spec(write_spec("version = 1\n[waveform]\nsample_rate_gsps = 1.0\n"))
    with pytest.raises(InputError) as info:
        simulate_spec(spec, tf_ns=1e7, variant="realized")
    assert info.value.field == "schedule.tf_ns" and "1e+07 waveform samples" in str(info.value)


def test_qubit_limit_and_memory_estimate(write_spec, monkeypatch):
    from schedforge import limits

    with pytest.raises(InputError, match="<= 8"):
        load_spec(write_spec("version = 1\n[problem]\nqubits = 9\nh = [0.1]\n"))
    assert limits.memory_estimate_bytes(8) == pytest.approx(5.3e9, rel=0.01)  # measured
    assert limits.memory_estimate_bytes(9) > 24 * 2**30  # beyond the 24 GB machine
    monkeypatch.setattr(limits, "available_memory_bytes", lambda: 4.0 * 2**30)
    with pytest.raises(InputError, match=r"needs about 4\.9 GiB.*4\.0 GiB is available"):
        limits.check_memory(8)
    limits.check_memory(3)


def test_archive_of_an_empty_folder_does_nothing(tmp_path):
    assert archive_sweep_dir(tmp_path) is None
    assert not os.listdir(tmp_path)


def test_input_error_never_echoes_a_huge_value_whole():
    err = InputError("spec." + "k" * 10_000, "must be short, got " + "x" * 1_000_000)
    assert len(str(err)) < 2400 and str(err).startswith("`spec.kkk")


def test_at_the_beta_order_limit_both_integrators_agree(write_spec):
    # At the largest allowed k_start (167 with k_end = 2) the schedule turns within a few
    # thousandths of the anneal; the eigenframe must still agree with the general
    # (reference) integrator.  Beyond the limit it had returned 0.0 against 0.706.
    import dataclasses

    from schedforge.dynamics import simulate_spec

    spec = load_spec(write_spec("version = 1\n"))
    out = {}
    for name in ("eigenframe", "general"):
        num = dataclasses.replace(spec.numerics, integrator=name)
        r = simulate_spec(dataclasses.replace(spec, numerics=num), tf_ns=20.0, k_start=167, k_end=2)
        assert r.status == "ok" and r.integrator == name
        out[name] = r.trace_distance
    assert out["eigenframe"] == pytest.approx(out["general"], rel=1e-8)
    assert out["general"] > 0.1  # nearly sudden: far from the steady state
