"""The resumable store of a sweep: one SQLite file, one row per finished point.

``DIR/sweep.sqlite`` (WAL journal, ``synchronous=FULL``) holds

``meta``
    ``schema_version``, ``physics_hash`` (see :meth:`schedforge.spec_model.Spec.physics_hash`),
    ``physics_json``, ``created_at``, ``schedforge_version``.
``points``
    One row per finished point, keyed by the point key (SHA-256 of the physics
    hash and the point's coordinates): the coordinates, every scalar of the
    simulation result, ``status``, ``message``, ``integrator``, ``stats_json``,
    ``schedforge_version``, ``computed_at`` (UTC ISO-8601), ``run_id`` (which run
    computed it) and ``worker`` (host:pid).
``runs``
    One row per invocation: start/end time, executor, numbers of points, final
    state, the full spec as JSON.

Every point is committed in its own transaction the moment it arrives, by the one
process that writes (the sweep's main process), so a crash or ``kill -9`` loses
at most the points that were still being computed.  A second sweep writing into
the same folder at the same time is refused (an exclusive lock on
``DIR/sweep.lock``, released by the operating system if the process dies).

A store made for a different physics (different ``physics_hash``) is refused with
an :class:`~schedforge.errors.InputError` naming ``--out``;
:func:`archive_sweep_dir` moves the old store aside for ``--fresh``.

NaN results are stored as SQL NULL (SQLite has no NaN) and read back as NaN.
"""

from __future__ import annotations

import contextlib
import csv
import datetime as _dt
import json
import math
import os
import socket
import sqlite3
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

from . import __version__
from .errors import InputError
from .fileio import atomic_write

__all__ = [
    "CSV_COLUMNS",
    "LOCK_NAME",
    "POINTS_CSV_NAME",
    "RESULT_FLOAT_COLUMNS",
    "SCHEMA_VERSION",
    "STORE_NAME",
    "WARNING_SEPARATOR",
    "PointStore",
    "archive_sweep_dir",
    "point_warnings",
    "read_points_csv",
    "utc_now",
    "write_points_csv",
]

SCHEMA_VERSION = 1
STORE_NAME = "sweep.sqlite"
LOCK_NAME = "sweep.lock"
POINTS_CSV_NAME = "points.csv"

#: Coordinates of a point, in sort order of points.csv.
COORD_COLUMNS: tuple[str, ...] = ("family", "variant", "k_start", "k_end", "tf_ns")
#: Float-valued result columns (NaN stored as NULL).
RESULT_FLOAT_COLUMNS: tuple[str, ...] = (
    "trace_distance",
    "ground_infidelity",
    "excess_energy_ghz",
    "wall_s",
)
#: Columns of points.csv, in order.
CSV_COLUMNS: tuple[str, ...] = (
    "family",
    "variant",
    "k_start",
    "k_end",
    "tf_ns",
    "trace_distance",
    "ground_infidelity",
    "excess_energy_ghz",
    "status",
    "wall_s",
    "integrator",
    "message",
    "warnings",
)
#: Columns of points.csv that an older points.csv may lack (read back as "").
_OPTIONAL_CSV_COLUMNS = frozenset({"warnings"})
#: Separator of a point's warnings in the ``warnings`` column.
WARNING_SEPARATOR = " | "
_FLOAT_COLUMNS = frozenset(("k_start", "k_end", "tf_ns", *RESULT_FLOAT_COLUMNS))
_ROW_COLUMNS: tuple[str, ...] = (
    *COORD_COLUMNS,
    "trace_distance",
    "ground_infidelity",
    "excess_energy_ghz",
    "status",
    "message",
    "integrator",
    "stats_json",
    "wall_s",
    "schedforge_version",
    "computed_at",
    "worker",
)

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (name TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS runs (
    run_id INTEGER PRIMARY KEY AUTOINCREMENT,
    started_at TEXT NOT NULL,
    finished_at TEXT,
    state TEXT NOT NULL,
    executor TEXT,
    n_points INTEGER,
    n_pending INTEGER,
    n_computed INTEGER,
    spec_json TEXT,
    schedforge_version TEXT,
    host TEXT,
    pid INTEGER
);
CREATE TABLE IF NOT EXISTS points (
    key TEXT PRIMARY KEY,
    family TEXT NOT NULL,
    variant TEXT NOT NULL,
    k_start REAL NOT NULL,
    k_end REAL NOT NULL,
    tf_ns REAL NOT NULL,
    trace_distance REAL,
    ground_infidelity REAL,
    excess_energy_ghz REAL,
    status TEXT NOT NULL,
    message TEXT NOT NULL DEFAULT '',
    integrator TEXT NOT NULL DEFAULT '',
    stats_json TEXT NOT NULL DEFAULT '{}',
    wall_s REAL,
    schedforge_version TEXT NOT NULL,
    computed_at TEXT NOT NULL,
    worker TEXT NOT NULL DEFAULT '',
    run_id INTEGER NOT NULL REFERENCES runs(run_id)
);
"""


def utc_now() -> str:
    """Current UTC time, ISO-8601 with microseconds (``2026-01-01T12:00:00.000001Z``)."""
    return _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _lock_file(path: Path) -> Any:
    """Take an exclusive, non-blocking lock on ``path``; return the open file."""
    fh = open(path, "a+")  # held open (locked) for the store's lifetime
    try:
        import fcntl
    except ImportError:  # not POSIX: no inter-process lock, single user assumed
        return fh
    try:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        fh.close()
        raise InputError(
            "--out",
            f"is in use by another running sweep ({path} is locked): wait for it to "
            "finish or choose another directory",
        ) from None
    return fh


class PointStore:
    """Open (or create) the SQLite store of a sweep.

    Parameters
    ----------
    path : str or path-like
        The store file (``DIR/sweep.sqlite``); its folder must exist.
    physics_hash : str, optional
        Physics hash of the spec being swept.  A new store records it; an
        existing store with a different hash is refused.  ``None`` opens an
        existing store for reading only (no lock, no check).
    physics : mapping, optional
        The physics part of the spec, saved as JSON for later readers.

    Raises
    ------
    InputError
        The store belongs to another spec, another schema version, or is locked
        by a running sweep; the message names ``--out`` and suggests ``--fresh``.
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        physics_hash: str | None = None,
        *,
        physics: Mapping[str, Any] | None = None,
    ) -> None:
        self.path = Path(path)
        self.readonly = physics_hash is None
        self._lock = None
        if self.readonly:
            if not self.path.exists():
                raise InputError(str(self.path), "does not exist (no sweep store there)")
            uri = f"file:{self.path.resolve()}?mode=ro"
            self._conn = sqlite3.connect(uri, uri=True, isolation_level=None)
        else:
            self._lock = _lock_file(self.path.with_name(LOCK_NAME))
            self._conn = sqlite3.connect(str(self.path), isolation_level=None, timeout=30.0)
            self._conn.execute("PRAGMA journal_mode=WAL")
            self._conn.execute("PRAGMA synchronous=FULL")
            self._conn.executescript(_SCHEMA)
            self._bind(physics_hash, physics)
        self._conn.row_factory = sqlite3.Row

    # -- meta ---------------------------------------------------------------
    def meta(self) -> dict[str, str]:
        """All meta entries."""
        return {r[0]: r[1] for r in self._conn.execute("SELECT name, value FROM meta")}

    @property
    def physics_hash(self) -> str:
        """The physics hash this store was made for."""
        return self.meta()["physics_hash"]

    def _bind(self, physics_hash: str, physics: Mapping[str, Any] | None) -> None:
        meta = self.meta()
        if not meta:
            values = {
                "schema_version": str(SCHEMA_VERSION),
                "physics_hash": physics_hash,
                "physics_json": json.dumps(physics or {}, sort_keys=True, default=list),
                "created_at": utc_now(),
                "schedforge_version": __version__,
            }
            self._conn.execute("BEGIN IMMEDIATE")
            self._conn.executemany("INSERT INTO meta VALUES (?, ?)", values.items())
            self._conn.execute("COMMIT")
            return
        folder = self.path.parent
        if meta.get("schema_version") != str(SCHEMA_VERSION):
            self.close()
            raise InputError(
                "--out",
                f"{folder} holds a sweep store of schema version "
                f"{meta.get('schema_version')!r}, this schedforge writes {SCHEMA_VERSION}: "
                "choose another directory, or rerun with --fresh to archive the old store",
            )
        if meta.get("physics_hash") != physics_hash:
            self.close()
            raise InputError(
                "--out",
                f"{folder} holds a sweep of a different spec (physics hash "
                f"{meta.get('physics_hash', '?')[:12]}, this spec {physics_hash[:12]}): "
                "choose another directory, or rerun with --fresh to archive the old "
                "store and start over",
            )

    # -- runs ---------------------------------------------------------------
    def begin_run(
        self, *, executor: str, n_points: int, n_pending: int, spec_json: str = ""
    ) -> int:
        """Record the start of a run; return its ``run_id``."""
        cur = self._conn.execute(
            "INSERT INTO runs (started_at, state, executor, n_points, n_pending, n_computed,"
            " spec_json, schedforge_version, host, pid) VALUES (?, 'running', ?, ?, ?, 0, ?, ?,"
            " ?, ?)",
            (
                utc_now(),
                executor,
                n_points,
                n_pending,
                spec_json,
                __version__,
                socket.gethostname(),
                os.getpid(),
            ),
        )
        return int(cur.lastrowid)

    def end_run(self, run_id: int, state: str) -> None:
        """Record how run ``run_id`` ended (``complete``, ``incomplete``, ``interrupted``)."""
        self._conn.execute(
            "UPDATE runs SET finished_at = ?, state = ?,"
            " n_computed = (SELECT COUNT(*) FROM points WHERE run_id = ?) WHERE run_id = ?",
            (utc_now(), state, run_id, run_id),
        )

    def runs(self) -> list[dict[str, Any]]:
        """All runs, oldest first."""
        return [dict(r) for r in self._conn.execute("SELECT * FROM runs ORDER BY run_id")]

    # -- points -------------------------------------------------------------
    def keys(self) -> set[str]:
        """Keys of all stored points."""
        return {r[0] for r in self._conn.execute("SELECT key FROM points")}

    def __len__(self) -> int:
        return int(self._conn.execute("SELECT COUNT(*) FROM points").fetchone()[0])

    def commit(self, key: str, row: Mapping[str, Any], run_id: int) -> None:
        """Store one finished point in its own transaction.

        Parameters
        ----------
        key : str
            The point key.
        row : mapping
            Coordinates and result: at least ``family, variant, k_start, k_end,
            tf_ns, status``; missing result fields are stored as NULL / empty.
        run_id : int
            The run that computed it.

        Raises
        ------
        sqlite3.IntegrityError
            The key is already stored (a point would be counted twice).
        """
        values: list[Any] = []
        for col in _ROW_COLUMNS:
            v = row.get(col)
            if col in _FLOAT_COLUMNS:
                v = None if v is None or math.isnan(float(v)) else float(v)
            elif col == "stats_json" and v is None:
                v = json.dumps(row.get("stats") or {}, sort_keys=True, default=str)
            elif col == "schedforge_version" and v is None:
                v = __version__
            elif col == "computed_at" and v is None:
                v = utc_now()
            elif v is None:
                v = ""
            values.append(v)
        cols = ", ".join(("key", *_ROW_COLUMNS, "run_id"))
        marks = ", ".join("?" * (len(_ROW_COLUMNS) + 2))
        self._conn.execute(
            f"INSERT INTO points ({cols}) VALUES ({marks})", (key, *values, int(run_id))
        )

    def forget(self, keys: Iterable[str]) -> int:
        """Remove the points of ``keys`` (one transaction); return how many were removed.

        Used to compute points again that did not succeed (``--retry-failed``).
        """
        wanted = [(k,) for k in keys]
        with self._conn:
            cur = self._conn.executemany("DELETE FROM points WHERE key = ?", wanted)
        return int(cur.rowcount)

    def rows(self, keys: Iterable[str] | None = None) -> list[dict[str, Any]]:
        """Stored rows (all, or those of ``keys``), sorted by family, variant, k_start,
        k_end, tf_ns; NULL floats come back as NaN; ``warnings`` is the point's own
        warnings (:func:`point_warnings`) joined by :data:`WARNING_SEPARATOR`."""
        cur = self._conn.execute(
            "SELECT * FROM points ORDER BY family, variant, k_start, k_end, tf_ns, key"
        )
        wanted = None if keys is None else set(keys)
        out = []
        for r in cur:
            if wanted is not None and r["key"] not in wanted:
                continue
            d = dict(r)
            for col in _FLOAT_COLUMNS:
                if d[col] is None:
                    d[col] = math.nan
            d["warnings"] = WARNING_SEPARATOR.join(point_warnings(d))
            out.append(d)
        return out

    # -- lifetime -----------------------------------------------------------
    def close(self) -> None:
        """Close the connection and release the lock (idempotent)."""
        conn = getattr(self, "_conn", None)
        if conn is not None:
            with contextlib.suppress(sqlite3.Error):
                conn.close()
            self._conn = None  # type: ignore[assignment]
        if self._lock is not None:
            self._lock.close()
            self._lock = None

    def __enter__(self) -> PointStore:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def archive_sweep_dir(out_dir: str | os.PathLike[str]) -> Path | None:
    """Move an existing store and points.csv of ``out_dir`` aside (for ``--fresh``).

    The store is copied, consistent and self-contained (``VACUUM INTO``), to
    ``out_dir/archive/<UTC timestamp>/sweep.sqlite`` together with ``points.csv``;
    the originals (and the WAL files) are then deleted.

    Parameters
    ----------
    out_dir : str or path-like
        The sweep folder.

    Returns
    -------
    Path or None
        The archive folder, or ``None`` when there was nothing to archive.

    Raises
    ------
    InputError
        A sweep is running in ``out_dir`` (its lock is held).
    """
    folder = Path(out_dir)
    store = folder / STORE_NAME
    csv_path = folder / POINTS_CSV_NAME
    if not store.exists() and not csv_path.exists():
        return None
    lock = _lock_file(folder / LOCK_NAME)
    try:
        stamp = _dt.datetime.now(_dt.UTC).strftime("%Y%m%dT%H%M%S.%fZ")
        dest = folder / "archive" / stamp
        dest.mkdir(parents=True)
        if store.exists():
            conn = sqlite3.connect(str(store), isolation_level=None)
            try:
                conn.execute("VACUUM INTO ?", (str(dest / STORE_NAME),))
            finally:
                conn.close()
            for suffix in ("", "-wal", "-shm"):
                with contextlib.suppress(FileNotFoundError):
                    Path(f"{store}{suffix}").unlink()
        if csv_path.exists():
            os.replace(csv_path, dest / POINTS_CSV_NAME)
    finally:
        lock.close()
    return dest


def point_warnings(row: Mapping[str, Any]) -> list[str]:
    """The point's own warnings, kept in ``stats_json["warnings"]`` ([] if none)."""
    try:
        stats = json.loads(row.get("stats_json") or "{}")
    except (TypeError, ValueError):
        return []
    found = stats.get("warnings", []) if isinstance(stats, dict) else []
    return [str(w) for w in found] if isinstance(found, list) else [str(found)]


def _format_cell(col: str, value: Any) -> str:
    if col in _FLOAT_COLUMNS:
        return repr(float(value))
    return "" if value is None else str(value)


def write_points_csv(path: str | os.PathLike[str], rows: Sequence[Mapping[str, Any]]) -> None:
    """Write rows to a points CSV atomically, columns :data:`CSV_COLUMNS`.

    Floats are written with ``repr`` (shortest string that reads back to the same
    double; ``nan`` for missing values); the output is deterministic for given rows.
    """
    with atomic_write(path, "w", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(CSV_COLUMNS)
        for row in rows:
            writer.writerow([_format_cell(c, row.get(c)) for c in CSV_COLUMNS])


def read_points_csv(path: str | os.PathLike[str]) -> list[dict[str, Any]]:
    """Read a points CSV written by :func:`write_points_csv` (floats as float).

    Raises
    ------
    InputError
        A required column is missing or a number does not parse (the line is named).
    """
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        missing = [
            c
            for c in CSV_COLUMNS
            if c not in (reader.fieldnames or []) and c not in _OPTIONAL_CSV_COLUMNS
        ]
        if missing:
            raise InputError(str(path), f"must have the columns {', '.join(missing)}")
        out = []
        for lineno, rec in enumerate(reader, start=2):
            row: dict[str, Any] = dict(rec)
            for col in _OPTIONAL_CSV_COLUMNS:
                row.setdefault(col, "")
            for col in _FLOAT_COLUMNS & set(CSV_COLUMNS):
                try:
                    row[col] = float(rec[col])
                except (TypeError, ValueError):
                    raise InputError(
                        f"{path}: line {lineno}", f"column {col} must be a number, got {rec[col]!r}"
                    ) from None
            out.append(row)
    return out
