"""Tests of the resumable sweep store (schedforge.store).

References: SQLite's documented behaviour (WAL journal mode, NaN stored as NULL,
8-byte IEEE REAL), Python's ``float.__repr__`` round trip (shortest repr reads back
to the same double; Python docs, "Floating-point arithmetic").
"""

from __future__ import annotations

import math
import sqlite3
import subprocess
import sys

import pytest

from schedforge.errors import InputError
from schedforge.store import (
    CSV_COLUMNS,
    STORE_NAME,
    PointStore,
    archive_sweep_dir,
    folder_lock,
    read_points_csv,
    write_points_csv,
)

HASH_A = "a" * 64
HASH_B = "b" * 64


def _row(tf: float, k_end: float = 2.0, status: str = "ok", err: float = 1e-3) -> dict:
    return {
        "family": "beta",
        "variant": "ideal",
        "k_start": 0.0,
        "k_end": k_end,
        "tf_ns": tf,
        "trace_distance": err,
        "ground_infidelity": err / 3,
        "excess_energy_ghz": -err,
        "status": status,
        "message": "" if status == "ok" else "step size underflow",
        "integrator": "general",
        "stats": {"steps": 12},
        "wall_s": 0.25,
    }


def test_commit_and_read_back_exact_sorted(tmp_path):
    # Values spanning the errors of interest (1e-3 .. 1e-14) must round-trip bit for bit.
    values = [3.0e-3, 1.2345678901234567e-13, 2.0 / 3.0]
    with PointStore(tmp_path / STORE_NAME, HASH_A) as store:
        run = store.begin_run(executor="serial", n_points=3, n_pending=3)
        for i, (tf, v) in enumerate(zip([100.0, 10.0, 31.622776601683793], values, strict=True)):
            store.commit(f"key{i}", _row(tf, err=v), run)
        store.end_run(run, "complete")
        rows = store.rows()
        assert len(store) == 3
        assert store.runs()[0]["n_computed"] == 3
    assert [r["tf_ns"] for r in rows] == [10.0, 31.622776601683793, 100.0]
    by_tf = {r["tf_ns"]: r["trace_distance"] for r in rows}
    assert by_tf[10.0] == 1.2345678901234567e-13
    assert by_tf[100.0] == 3.0e-3
    assert rows[0]["stats_json"] == '{"steps": 12}'
    assert rows[0]["run_id"] == 1


def test_nan_stored_as_null_and_read_as_nan(tmp_path):
    # SQLite has no NaN: it stores NULL (SQLite docs, "Datatypes"); we read NaN back.
    with PointStore(tmp_path / STORE_NAME, HASH_A) as store:
        run = store.begin_run(executor="serial", n_points=1, n_pending=1)
        store.commit("k", _row(10.0, status="failed", err=math.nan), run)
        (row,) = store.rows()
    assert math.isnan(row["trace_distance"]) and row["status"] == "failed"
    raw = sqlite3.connect(tmp_path / STORE_NAME).execute("SELECT trace_distance FROM points")
    assert raw.fetchone()[0] is None


def test_wal_mode_and_duplicate_key_rejected(tmp_path):
    with PointStore(tmp_path / STORE_NAME, HASH_A) as store:
        mode = store._conn.execute("PRAGMA journal_mode").fetchone()[0]
        assert mode == "wal"
        run = store.begin_run(executor="serial", n_points=1, n_pending=1)
        store.commit("k", _row(10.0), run)
        with pytest.raises(sqlite3.IntegrityError):
            store.commit("k", _row(10.0), run)
        assert len(store) == 1


def test_committed_point_survives_without_close(tmp_path):
    # Each commit is its own transaction: another connection sees it at once.
    store = PointStore(tmp_path / STORE_NAME, HASH_A)
    run = store.begin_run(executor="serial", n_points=2, n_pending=2)
    store.commit("k1", _row(10.0), run)
    other = sqlite3.connect(tmp_path / STORE_NAME)
    assert other.execute("SELECT COUNT(*) FROM points").fetchone()[0] == 1
    other.close()
    store.close()


def test_other_physics_refused_with_out_and_fresh(tmp_path):
    PointStore(tmp_path / STORE_NAME, HASH_A).close()
    with pytest.raises(InputError) as info:
        PointStore(tmp_path / STORE_NAME, HASH_B)
    assert info.value.field == "--out"
    assert "--fresh" in str(info.value) and "different spec" in str(info.value)
    # The same physics reopens fine.
    PointStore(tmp_path / STORE_NAME, HASH_A).close()


def _open_in_other_process(path) -> str:
    """Open a writer on ``path`` in a second process; return its error text ('' if none)."""
    code = (
        "import sys\n"
        "from schedforge.store import PointStore\n"
        "from schedforge.errors import InputError\n"
        "try:\n"
        f"    PointStore({str(path)!r}, {HASH_A!r}).close()\n"
        "except InputError as e:\n"
        "    print(e)\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    return done.stdout


def test_second_writer_refused_while_first_open(tmp_path):
    first = PointStore(tmp_path / STORE_NAME, HASH_A)
    try:
        assert "in use by another running sweep" in _open_in_other_process(tmp_path / STORE_NAME)
        # The lock is re-entrant within the process that holds it.
        PointStore(tmp_path / STORE_NAME, HASH_A).close()
        assert "in use" in _open_in_other_process(tmp_path / STORE_NAME)
    finally:
        first.close()
    assert _open_in_other_process(tmp_path / STORE_NAME) == ""  # lock released


def test_folder_lock_held_across_the_with_block(tmp_path):
    with folder_lock(tmp_path):
        assert "in use" in _open_in_other_process(tmp_path / STORE_NAME)
    assert _open_in_other_process(tmp_path / STORE_NAME) == ""


def test_archive_moves_store_and_csv(tmp_path):
    with PointStore(tmp_path / STORE_NAME, HASH_A) as store:
        run = store.begin_run(executor="serial", n_points=1, n_pending=1)
        store.commit("k", _row(10.0), run)
        write_points_csv(tmp_path / "points.csv", store.rows())
    assert archive_sweep_dir(tmp_path / "nothing-here") is None
    dest = archive_sweep_dir(tmp_path)
    assert dest is not None and dest.parent == tmp_path / "archive"
    assert not (tmp_path / STORE_NAME).exists() and not (tmp_path / "points.csv").exists()
    with PointStore(dest / STORE_NAME) as old:  # read-only
        assert len(old) == 1 and old.physics_hash == HASH_A
    with PointStore(tmp_path / STORE_NAME, HASH_B) as new:
        assert len(new) == 0


def test_points_csv_repr_exact_and_deterministic(tmp_path):
    rows = [_row(10.0, err=1.0 / 3.0), _row(100.0, status="failed", err=math.nan)]
    write_points_csv(tmp_path / "a.csv", rows)
    write_points_csv(tmp_path / "b.csv", rows)
    text = (tmp_path / "a.csv").read_text()
    assert text == (tmp_path / "b.csv").read_text()
    assert text.splitlines()[0] == ",".join(CSV_COLUMNS)
    assert "0.3333333333333333" in text  # repr of 1/3 (17 significant digits needed)
    back = read_points_csv(tmp_path / "a.csv")
    assert back[0]["trace_distance"] == 1.0 / 3.0
    assert math.isnan(back[1]["trace_distance"]) and back[1]["status"] == "failed"


def test_read_points_csv_names_bad_line(tmp_path):
    path = tmp_path / "p.csv"
    write_points_csv(path, [_row(10.0)])
    path.write_text(path.read_text().replace("10.0", "ten", 1))
    with pytest.raises(InputError, match="line 2"):
        read_points_csv(path)


def test_store_without_a_metric_column_gains_it_and_resumes(tmp_path):
    # A store made before a metric was registered: its points table lacks that
    # column.  Opening it for writing adds the column (SQLite's documented
    # ALTER TABLE ... ADD COLUMN: existing rows read NULL); its points stay and read
    # back NaN there, new points store the value.
    import schedforge.store as store_mod

    path = tmp_path / STORE_NAME
    with PointStore(path, HASH_A) as store:
        run = store.begin_run(executor="serial", n_points=2, n_pending=2)
        store.commit("k1", _row(10.0), run)
    conn = sqlite3.connect(str(path))
    conn.execute("ALTER TABLE points DROP COLUMN excess_energy_ghz")  # SQLite >= 3.35
    conn.commit()
    conn.close()
    with PointStore(path) as old:  # read-only: the missing metric reads NaN
        (row,) = old.rows()
        assert math.isnan(row["excess_energy_ghz"]) and row["trace_distance"] == 1e-3
    with PointStore(path, HASH_A) as store:  # for writing: the column is added back
        assert store.keys() == {"k1"}
        run = store.begin_run(executor="serial", n_points=2, n_pending=1)
        store.commit("k2", _row(100.0), run)
        rows = {r["key"]: r for r in store.rows()}
    assert math.isnan(rows["k1"]["excess_energy_ghz"])
    assert rows["k2"]["excess_energy_ghz"] == _row(100.0)["excess_energy_ghz"]
    assert store_mod.METRIC_COLUMNS == tuple(store_mod.metric_names())


def test_finished_rows_names_what_is_missing(tmp_path):
    # A report of a grid whose points are not all stored is refused (bad input naming
    # DIR, with the count and the command that computes the rest), not drawn from part.
    with PointStore(tmp_path / STORE_NAME, HASH_A) as store:
        run = store.begin_run(executor="serial", n_points=3, n_pending=3)
        store.commit("key0", _row(10.0), run)
        store.commit("key1", _row(20.0), run)
        assert [r["tf_ns"] for r in store.finished_rows(["key1", "key0"], "sweep", "sweep")] == [
            10.0,
            20.0,
        ]
        with pytest.raises(InputError) as info:
            store.finished_rows(["key0", "key1", "key2"], "noise ensemble", "noise-sweep")
    assert info.value.field == "DIR"
    message = str(info.value)
    assert "unfinished noise ensemble (2 of 3 points stored in" in message
    assert "rerun the noise-sweep command" in message
