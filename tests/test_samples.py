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
    HEADER_LINES,
    SampleTable,
    parse_fields,
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
    schedule = parse_fields(meta["schedule"])
    assert schedule == {"family": "beta", "k_start": 0, "k_end": 2, "tf_ns": tf}
    device = parse_fields(meta["device"])
    assert device == {"curves": "linear", "A0_ghz": 3.5, "B0_ghz": 2.5}
    assert meta["schedforge_version"]
    assert datetime.fromisoformat(meta["created_utc"]).utcoffset().total_seconds() == 0
    assert "GHz" in meta["columns"] and "ns" in meta["columns"]
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


# -- files a lab reads (issue 15) ---------------------------------------------------
_LAB_SCHEDULES = [
    make_schedule("linear"),
    make_schedule("beta", k_start=1, k_end=3),
    make_schedule("poly", k_end=2, tail=0.3),
    make_schedule("points", points=((0.0, 0.0), (0.5, 0.4), (1.0, 1.0)), k_end=2),
    make_schedule("gevrey", k_start=1),
]


def _played_table() -> tuple[SampleTable, dict[str, str]]:
    from schedforge.spec_model import WaveformSpec
    from schedforge.waveform import played_samples, realize

    sched = make_schedule("beta", k_start=0, k_end=2)
    realized = realize(sched, 40.0, WaveformSpec(sample_rate_gsps=0.5, dac_bits=10))
    return played_samples(realized, CURVES), samples_metadata(sched, 40.0, CURVES)


def test_every_samples_file_has_the_same_header_length(tmp_path: Path) -> None:
    """Every file reads with one line (the README's recipe), whatever it holds."""
    tables = [
        (sample_schedule(s, 30.0, CURVES, points=7), samples_metadata(s, 30.0, CURVES))
        for s in _LAB_SCHEDULES
    ]
    tables.append(_played_table())
    for i, (table, meta) in enumerate(tables):
        path = tmp_path / f"s{i}.csv"
        write_samples_csv(path, table, {"spec": "x.toml", **meta})
        lines = path.read_text().splitlines()
        n_hash = next(j for j, line in enumerate(lines) if not line.startswith("#"))
        assert n_hash == HEADER_LINES == 12
        assert lines[0].startswith(f"# schedforge schedule samples: {HEADER_LINES} '#' lines")
        # the README's NumPy recipe
        data = np.genfromtxt(path, delimiter=",", names=True, skip_header=12)
        assert data.dtype.names == table.columns
        np.testing.assert_array_equal(data["s"], table.s)
        try:
            import pandas as pd
        except ImportError:
            continue
        frame = pd.read_csv(path, skiprows=12)  # the README's pandas recipe
        assert tuple(frame.columns) == table.columns
        np.testing.assert_array_equal(frame["s"].to_numpy(), table.s)


def test_parameters_are_toml_fields_not_python_dicts(tmp_path: Path) -> None:
    import tomllib

    sched = _LAB_SCHEDULES[2]  # poly: a nested base schedule
    path = tmp_path / "p.csv"
    write_samples_csv(
        path, sample_schedule(sched, 30.0, CURVES, points=3), samples_metadata(sched, 30.0, CURVES)
    )
    header = dict(line[2:].split(": ", 1) for line in path.read_text().splitlines()[1:12])
    assert "{'" not in header["schedule"]  # no Python dict repr
    parsed = tomllib.loads(f"x = {{{header['schedule']}}}")["x"]  # TOML 1.0 inline table
    assert parsed["family"] == "poly" and parsed["tail"] == 0.3 and parsed["k_end"] == 2
    assert parsed["base"] == {"family": "linear", "k_start": 0, "k_end": 0}
    assert header["waveform"] == "none"


def test_numbers_are_written_without_float_noise(tmp_path: Path) -> None:
    """Each number is the shortest decimal that reads back to the same double.

    %.17g wrote 0.1 * 3 as 0.30000000000000004 and 0.25 as 0.25 but 0.1 as
    0.10000000000000001; the shortest round-trip form is Python's repr (Steele and
    White 1990 / Gay 1990 shortest-digit printing).
    """
    sched = make_schedule("linear")
    table = sample_schedule(sched, 1.0, CURVES, rate_gsps=10.0)
    path = tmp_path / "r.csv"
    write_samples_csv(path, table, samples_metadata(sched, 1.0, CURVES))
    rows = [line.split(",") for line in path.read_text().splitlines()[13:]]
    assert [r[0] for r in rows[:4]] == ["0.0", "0.1", "0.2", "0.3"]  # t = n / R
    for row in rows:
        for cell in row:
            assert cell == repr(float(cell))
    np.testing.assert_array_equal(read_samples_csv(path).as_array(), table.as_array())


def test_dac_code_column_round_trips(tmp_path: Path) -> None:
    table, meta = _played_table()
    path = tmp_path / "d.csv"
    write_samples_csv(path, table, meta)
    back = read_samples_csv(path)
    assert back.columns == (*COLUMNS, "dac_code")
    np.testing.assert_array_equal(back.dac_code, table.dac_code)
    np.testing.assert_array_equal(back.dac_code / 1023.0, back.s)  # s = j / (2^10 - 1)
    assert parse_fields(back.metadata["waveform"])["dac_bits"] == 10
