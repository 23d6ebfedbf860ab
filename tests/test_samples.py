"""Schedule samples, their CSV form, atomic writes and the schedule figure.

References
----------
- I_x(1, b) = 1 - (1 - x)**b: the regularized incomplete beta function with a = 1
  in closed form (NIST DLMF, Olver et al. 2010, section 8.17, from definition 8.17.2).
- scipy.special.betainc (reference library) for k_start > 0.
- Linear device curves A = A0 (1 - s), B = B0 s: the spec contract (issue 2).
"""

from __future__ import annotations

import math
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest
from scipy import special

from schedforge.device import LinearCurves
from schedforge.errors import InputError
from schedforge.fileio import atomic_write, atomic_write_text
from schedforge.samples import (
    COLUMNS,
    DEFAULT_POINTS,
    SampleTable,
    read_samples_csv,
    sample_schedule,
    samples_metadata,
    write_samples_csv,
)
from schedforge.schedules import make_schedule

CURVES = LinearCurves(3.5, 2.5)


@pytest.mark.parametrize("k_end", [0, 1, 2, 3])
def test_beta_samples_match_closed_form(k_end: int) -> None:
    tf = 750.0
    table = sample_schedule(make_schedule("beta", k_start=0, k_end=k_end), tf, CURVES, points=401)
    x = table.t_ns / tf
    b = k_end + 1
    s_ref = 1.0 - (1.0 - x) ** b  # DLMF 8.17 with a = 1
    np.testing.assert_allclose(table.s, s_ref, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(table.ds_dt_per_ns, b * (1.0 - x) ** (b - 1) / tf, rtol=1e-12)
    np.testing.assert_allclose(table.A_ghz, 3.5 * (1.0 - s_ref), rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(table.B_ghz, 2.5 * s_ref, rtol=1e-12)


def test_beta_samples_match_scipy_betainc_with_flat_start() -> None:
    tf = 2000.0
    table = sample_schedule(make_schedule("beta", k_start=1, k_end=2), tf, CURVES, rate_gsps=0.5)
    x = table.t_ns / tf
    np.testing.assert_allclose(table.s, special.betainc(2.0, 3.0, x), rtol=1e-12, atol=1e-15)
    # f' is the beta density x (1-x)^2 / B(2, 3), B(2, 3) = 1/12
    np.testing.assert_allclose(table.ds_dt_per_ns, 12.0 * x * (1 - x) ** 2 / tf, atol=1e-15)


def test_grid_contains_both_ends_exactly() -> None:
    sched = make_schedule("linear")
    even = sample_schedule(sched, 123.4, CURVES)
    assert len(even) == DEFAULT_POINTS
    assert even.t_ns[0] == 0.0 and even.t_ns[-1] == 123.4
    assert even.s[0] == 0.0 and even.s[-1] == 1.0

    whole = sample_schedule(sched, 100.0, CURVES, rate_gsps=2.0)  # 200 periods exactly
    assert len(whole) == 201 and whole.t_ns[-1] == 100.0
    np.testing.assert_allclose(np.diff(whole.t_ns), 0.5, rtol=1e-12)
    assert "shortened" not in whole.metadata["grid"]

    ragged = sample_schedule(sched, 100.3, CURVES, rate_gsps=2.0)
    assert ragged.t_ns[-1] == 100.3 and len(ragged) == 202
    np.testing.assert_allclose(np.diff(ragged.t_ns)[:-1], 0.5, rtol=1e-12)
    assert math.isclose(ragged.t_ns[-1] - ragged.t_ns[-2], 0.3, rel_tol=1e-9)
    assert "shortened to 0.3 ns" in ragged.metadata["grid"]


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"rate_gsps": 0.0}, "rate_gsps"),
        ({"rate_gsps": -2.0}, "rate_gsps"),
        ({"rate_gsps": 1.0, "points": 10}, "rate_gsps"),
        ({"points": 1}, "points"),
        ({"rate_gsps": 1e9}, "rate_gsps"),
        ({"tf_ns": 0.0}, "tf_ns"),
        ({"tf_ns": -5.0}, "tf_ns"),
    ],
)
def test_bad_grid_arguments(kwargs: dict, field: str) -> None:
    tf = kwargs.pop("tf_ns", 1000.0)
    with pytest.raises(InputError) as info:
        sample_schedule(make_schedule("linear"), tf, CURVES, **kwargs)
    assert info.value.field == field


def test_table_is_read_only_and_checked() -> None:
    table = sample_schedule(make_schedule("linear"), 10.0, CURVES, points=3)
    with pytest.raises(ValueError):
        table.s[0] = 0.5
    with pytest.raises(ValueError, match="equal lengths"):
        SampleTable(np.zeros(3), np.zeros(2), np.zeros(3), np.zeros(3), np.zeros(3))


def test_csv_round_trip_is_exact_and_readable_by_numpy(tmp_path: Path) -> None:
    sched = make_schedule("beta", k_start=0, k_end=2)
    tf = 1000.0 / 3.0  # a value with no short decimal form
    table = sample_schedule(sched, tf, CURVES, points=257)
    path = tmp_path / "samples.csv"
    write_samples_csv(path, table, samples_metadata(sched, tf, CURVES))

    # numpy reads it back; every column equals the schedule evaluated directly
    n_meta = sum(1 for line in path.read_text().splitlines() if line.startswith("#"))
    data = np.genfromtxt(path, delimiter=",", skip_header=n_meta, names=True)
    assert data.dtype.names == COLUMNS
    x = data["t_ns"] / tf
    direct = sched.derivatives(x, 1)
    np.testing.assert_array_equal(data["t_ns"], table.t_ns)
    np.testing.assert_array_equal(data["s"], direct[0])
    np.testing.assert_array_equal(data["ds_dt_per_ns"], direct[1] / tf)
    np.testing.assert_allclose(data["s"], 1.0 - (1.0 - x) ** 3, rtol=1e-12, atol=1e-15)
    np.testing.assert_array_equal(data["A_ghz"], CURVES.A(direct[0]))
    np.testing.assert_array_equal(data["B_ghz"], CURVES.B(direct[0]))

    back = read_samples_csv(path)
    np.testing.assert_array_equal(back.as_array(), table.as_array())
    meta = back.metadata
    assert meta["family"] == "beta"
    assert float(meta["k_start"]) == 0.0 and float(meta["k_end"]) == 2.0
    assert float(meta["tf_ns"]) == tf
    assert meta["device.curves"] == "linear" and float(meta["device.A0_ghz"]) == 3.5
    assert meta["schedforge_version"]
    assert datetime.fromisoformat(meta["created_utc"]).utcoffset().total_seconds() == 0
    assert "GHz" in meta["units"] and "ns" in meta["units"]
    assert meta["grid"] == "257 evenly spaced points"


@pytest.mark.parametrize(
    ("body", "line", "fragment"),
    [
        ("t,s,ds_dt_per_ns,A_ghz,B_ghz\n0,0,0,0,0\n", 2, "must be the header"),
        ("t_ns,s,ds_dt_per_ns,A_ghz,B_ghz\n0,0,0,0,0\n1,1,0,0\n", 4, "5 comma-separated"),
        ("t_ns,s,ds_dt_per_ns,A_ghz,B_ghz\n0,0,0,0,0\n1,x,0,0,0\n", 4, "only numbers"),
        ("t_ns,s,ds_dt_per_ns,A_ghz,B_ghz\n0,0,0,0,0\n1,nan,0,0,0\n", 4, "finite"),
        ("t_ns,s,ds_dt_per_ns,A_ghz,B_ghz\n1,0,0,0,0\n1,1,0,0,0\n", 4, "increase strictly"),
    ],
)
def test_read_rejects_bad_lines(tmp_path: Path, body: str, line: int, fragment: str) -> None:
    path = tmp_path / "bad.csv"
    path.write_text("# note: x\n" + body)
    with pytest.raises(InputError) as info:
        read_samples_csv(path)
    assert info.value.field == f"{path}: line {line}"
    assert fragment in str(info.value)


def test_read_rejects_missing_and_short_files(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="does not exist"):
        read_samples_csv(tmp_path / "none.csv")
    short = tmp_path / "short.csv"
    short.write_text("t_ns,s,ds_dt_per_ns,A_ghz,B_ghz\n0,0,0,0,0\n")
    with pytest.raises(InputError, match="at least 2 data rows"):
        read_samples_csv(short)


# -- atomic writes -----------------------------------------------------------------
def test_atomic_write_failure_leaves_target_untouched(tmp_path: Path) -> None:
    target = tmp_path / "out.txt"
    target.write_text("old\n")
    with pytest.raises(RuntimeError), atomic_write(target) as fh:
        fh.write("half of the new content")
        raise RuntimeError("disk on fire")
    assert target.read_text() == "old\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.txt"]  # no temp files left


def test_atomic_write_creates_and_replaces(tmp_path: Path) -> None:
    target = tmp_path / "new.bin"
    with atomic_write(target, "wb") as fh:
        fh.write(b"\x00\x01")
    assert target.read_bytes() == b"\x00\x01"
    atomic_write_text(target, "text")
    assert target.read_text() == "text"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["new.bin"]
    with pytest.raises(ValueError), atomic_write(target, "a"):
        pass


# -- figure ------------------------------------------------------------------------
def test_plot_schedule_draws_s_and_its_time_derivatives() -> None:
    from schedforge.plotting.schedule import plot_schedule

    tf = 500.0
    fig = plot_schedule(make_schedule("beta", k_start=0, k_end=2), tf, n=101)
    axes = fig.get_axes()
    assert len(axes) == 3
    for order, ax in enumerate(axes):
        t, y = ax.get_lines()[0].get_data()
        x = np.asarray(t) / tf
        # f = 1 - (1-x)^3 (DLMF 8.17, a = 1), time derivatives carry tf^-n
        ref = [1 - (1 - x) ** 3, 3 * (1 - x) ** 2 / tf, -6 * (1 - x) / tf**2][order]
        np.testing.assert_allclose(y, ref, rtol=1e-12, atol=1e-18)
    assert "first 2 derivative(s) vanish" in axes[0].texts[0].get_text()
