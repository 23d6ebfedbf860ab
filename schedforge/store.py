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
:func:`archive_sweep_dir` moves the old study aside for ``--fresh``: the store and
every output made from it (:data:`STUDY_OUTPUTS`), so that the folder never mixes
two studies.  A damaged store file (truncated, overwritten) is reported as such
(an :class:`~schedforge.errors.InputError`); ``--fresh`` moves it aside intact.

The folder lock (:func:`folder_lock`) is re-entrant within one process, so the
``sweep`` command can hold it from the archive of an old study until the new
study's fits and report are written, while the store and the archive take it
again inside.  A run whose process died without recording its end (``kill -9``,
power loss) is marked ``abandoned`` the next time the store is opened for
writing: the writer holds the lock, so no other run can still be going.

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
from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

from . import __version__
from .errors import InputError
from .fileio import atomic_write
from .metrics import metric_names

__all__ = [
    "ABANDONED",
    "CSV_COLUMNS",
    "LOCK_NAME",
    "METRIC_COLUMNS",
    "POINTS_CSV_NAME",
    "RESULT_FLOAT_COLUMNS",
    "SCHEMA_1_METRICS",
    "SCHEMA_VERSION",
    "STORE_NAME",
    "STUDY_OUTPUTS",
    "WARNING_SEPARATOR",
    "PointStore",
    "archive_outputs",
    "archive_sweep_dir",
    "check_csv_complete",
    "folder_lock",
    "point_warnings",
    "read_points_csv",
    "utc_now",
    "write_points_csv",
]

SCHEMA_VERSION = 1
STORE_NAME = "sweep.sqlite"
LOCK_NAME = "sweep.lock"
POINTS_CSV_NAME = "points.csv"
#: Files and folders of a sweep folder made from its store: archived with it by
#: ``--fresh`` so that the folder always describes one study.
STUDY_OUTPUTS: tuple[str, ...] = (
    POINTS_CSV_NAME,
    "fit.csv",
    "spec.toml",
    "report.html",
    "plots",
)
#: State given to a run found still "running" when the store is next opened for writing.
ABANDONED = "abandoned"

#: Coordinates of a point, in sort order of points.csv.
COORD_COLUMNS: tuple[str, ...] = ("family", "variant", "k_start", "k_end", "tf_ns")
#: The metric columns of a store made with schema version 1 (every metric registered
#: since is added to an older store when it is next opened for writing).
SCHEMA_1_METRICS: tuple[str, ...] = ("trace_distance", "ground_infidelity", "excess_energy_ghz")
#: Metric columns: every metric of :data:`schedforge.metrics.METRICS`, in its order.
METRIC_COLUMNS: tuple[str, ...] = metric_names()
#: Float-valued result columns (NaN stored as NULL).
RESULT_FLOAT_COLUMNS: tuple[str, ...] = (*METRIC_COLUMNS, "wall_s")
#: Columns of points.csv, in order.
CSV_COLUMNS: tuple[str, ...] = (
    *COORD_COLUMNS,
    *METRIC_COLUMNS,
    "status",
    "wall_s",
    "integrator",
    "message",
    "warnings",
)
#: Columns of points.csv that an older (or hand-made) points.csv may lack: the text
#: columns (read back as "") and metrics registered after schema 1 (read back as NaN).
_OPTIONAL_CSV_COLUMNS = frozenset(
    {"integrator", "message", "warnings"} | (set(METRIC_COLUMNS) - set(SCHEMA_1_METRICS))
)
#: Separator of a point's warnings in the ``warnings`` column.
WARNING_SEPARATOR = " | "
_FLOAT_COLUMNS = frozenset(("k_start", "k_end", "tf_ns", *RESULT_FLOAT_COLUMNS))
_ROW_COLUMNS: tuple[str, ...] = (
    *COORD_COLUMNS,
    *METRIC_COLUMNS,
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
{metric_columns}
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
""".replace("{metric_columns}", "\n".join(f"    {name} REAL," for name in METRIC_COLUMNS))


def utc_now() -> str:
    """Current UTC time, ISO-8601 with microseconds (``2026-01-01T12:00:00.000001Z``)."""
    return _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


#: Locks this process holds: resolved lock path -> [open file, depth].
_HELD_LOCKS: dict[str, list[Any]] = {}


def _in_use(path: Path) -> InputError:
    return InputError(
        "--out",
        f"is in use by another running sweep or report ({path} is locked): wait for it "
        "to finish or choose another directory",
    )


def _acquire(path: Path) -> str:
    """Take the exclusive, non-blocking lock on ``path`` (re-entrant); return its key."""
    key = str(path.resolve())
    held = _HELD_LOCKS.get(key)
    if held is not None:
        held[1] += 1
        return key
    try:
        import fcntl
    except ImportError:  # not POSIX: no inter-process lock, single user assumed
        fcntl = None  # type: ignore[assignment]
    for _attempt in range(5):
        fh = open(path, "a+")  # held open (locked) while the lock is held
        if fcntl is None:
            break
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            fh.close()
            raise _in_use(path) from None
        # The lock file may have been removed (and made anew by another process)
        # between our open and our lock: then we locked a file nobody else sees.
        try:
            same = os.path.samestat(os.fstat(fh.fileno()), os.stat(path))
        except FileNotFoundError:
            same = False
        if same:
            break
        fh.close()
    else:  # pragma: no cover - the lock file keeps being replaced
        raise _in_use(path)
    _HELD_LOCKS[key] = [fh, 1]
    return key


def _release(key: str) -> None:
    held = _HELD_LOCKS.get(key)
    if held is None:
        return
    held[1] -= 1
    if held[1] <= 0:
        del _HELD_LOCKS[key]
        with contextlib.suppress(OSError):  # no sweep.lock left behind in a finished folder
            os.unlink(key)  # while still held: a newcomer re-locks the new file (see above)
        held[0].close()


class _Lock:
    """A held folder lock; :meth:`close` releases this hold (idempotent)."""

    def __init__(self, path: Path) -> None:
        self._key: str | None = _acquire(path)

    def close(self) -> None:
        if self._key is not None:
            _release(self._key)
            self._key = None


def _lock_file(path: Path) -> _Lock:
    """Take an exclusive, non-blocking lock on ``path`` (re-entrant within a process)."""
    return _Lock(path)


@contextlib.contextmanager
def folder_lock(folder: str | os.PathLike[str]) -> Iterator[None]:
    """Hold the sweep folder's lock (``DIR/sweep.lock``) for the ``with`` block.

    Re-entrant within one process: the store and :func:`archive_sweep_dir` take
    it again inside.  Another process trying to write or report into the folder
    meanwhile is refused (:class:`~schedforge.errors.InputError` naming ``--out``).
    The operating system releases it if the process dies; the lock file is removed
    when the last hold is released.
    """
    lock = _lock_file(Path(folder) / LOCK_NAME)
    try:
        yield
    finally:
        lock.close()


def _damaged(path: Path, exc: BaseException | str) -> InputError:
    return InputError(
        "--out",
        f"holds a damaged sweep store: {path} is not a readable SQLite database ({exc}). "
        "Rerun with --fresh to move it aside intact (to DIR/archive/<time>/) and start "
        "over, or restore it from a backup",
    )


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
        self._lock: _Lock | None = None
        self._conn: sqlite3.Connection | None = None
        try:
            if self.readonly:
                if not self.path.exists():
                    raise InputError(str(self.path), "does not exist (no sweep store there)")
                uri = f"file:{self.path.resolve()}?mode=ro"
                self._conn = sqlite3.connect(uri, uri=True, isolation_level=None)
                self._check_integrity()
            else:
                self._lock = _lock_file(self.path.with_name(LOCK_NAME))
                self._conn = sqlite3.connect(str(self.path), isolation_level=None, timeout=30.0)
                self._check_integrity()
                self._conn.execute("PRAGMA journal_mode=WAL")
                self._conn.execute("PRAGMA synchronous=FULL")
                self._conn.executescript(_SCHEMA)
                self._bind(physics_hash, physics)
                self._add_metric_columns()
                self._close_abandoned_runs()
        except sqlite3.DatabaseError as exc:
            self.close()
            raise _damaged(self.path, exc) from None
        except BaseException:
            self.close()
            raise
        self._conn.row_factory = sqlite3.Row

    def _check_integrity(self) -> None:
        """Refuse a damaged file (SQLite's ``quick_check``; cheap for a sweep's size)."""
        if self.path.exists() and self.path.stat().st_size == 0:
            return  # a new, empty store
        rows = self._conn.execute("PRAGMA quick_check").fetchall()
        verdict = "; ".join(str(r[0]) for r in rows[:3])
        if verdict != "ok":
            raise _damaged(self.path, f"integrity check: {verdict[:300]}")

    def _add_metric_columns(self) -> None:
        """Give a store made before a metric was registered that metric's column.

        Its old points read back NaN there (not computed); nothing else changes, so
        the store keeps its schema version and resumes as before.
        """
        present = {r[1] for r in self._conn.execute("PRAGMA table_info(points)")}
        for name in METRIC_COLUMNS:
            if name not in present:
                self._conn.execute(f"ALTER TABLE points ADD COLUMN {name} REAL")

    def _close_abandoned_runs(self) -> None:
        """Mark runs still "running" as abandoned: we hold the lock, so none is."""
        self._conn.execute(
            "UPDATE runs SET state = ?,"
            " n_computed = (SELECT COUNT(*) FROM points WHERE points.run_id = runs.run_id)"
            " WHERE state = 'running'",
            (ABANDONED,),
        )

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

    def finished_rows(self, keys: Iterable[str], study: str, command: str) -> list[dict[str, Any]]:
        """The stored rows of every one of ``keys``, or bad input naming what is missing.

        Parameters
        ----------
        keys : iterable of str
            The point keys of a study's grid.
        study, command : str
            What the folder holds ("sweep", "noise ensemble") and the command that
            computes the rest, for the message.

        Raises
        ------
        InputError
            Naming ``DIR`` when some points of the grid are not stored.
        """
        keys = list(keys)
        rows = self.rows(keys)
        if len(rows) < len(keys):
            raise InputError(
                "DIR",
                f"holds an unfinished {study} ({len(rows)} of {len(keys)} points stored in "
                f"{self.path}): rerun the {command} command to compute the rest",
            )
        return rows

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
                if d.get(col) is None:  # NULL, or a metric this (older) store lacks
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
        lock = getattr(self, "_lock", None)
        if lock is not None:
            lock.close()
            self._lock = None

    def __enter__(self) -> PointStore:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _archive_folder(folder: Path) -> Path:
    stamp = _dt.datetime.now(_dt.UTC).strftime("%Y%m%dT%H%M%S.%fZ")
    dest = folder / "archive" / stamp
    dest.mkdir(parents=True)
    return dest


def _move_store(store: Path, dest: Path) -> str:
    """Archive the store into ``dest``; return how ("copied" or "moved intact").

    A readable store is copied, consistent and self-contained (``VACUUM INTO``),
    then deleted with its WAL files.  A damaged one is moved aside as it is, WAL
    files included, so that nothing of it is lost.
    """
    try:
        conn = sqlite3.connect(str(store), isolation_level=None)
        try:
            conn.execute("VACUUM INTO ?", (str(dest / STORE_NAME),))
        finally:
            conn.close()
        how = "copied"
    except sqlite3.DatabaseError:
        with contextlib.suppress(FileNotFoundError):
            (dest / STORE_NAME).unlink()  # a partial copy
        for suffix in ("", "-wal", "-shm"):
            with contextlib.suppress(FileNotFoundError):
                os.replace(f"{store}{suffix}", dest / f"{STORE_NAME}{suffix}")
        return "moved intact (damaged)"
    for suffix in ("", "-wal", "-shm"):
        with contextlib.suppress(FileNotFoundError):
            Path(f"{store}{suffix}").unlink()
    return how


def archive_outputs(
    out_dir: str | os.PathLike[str], names: Sequence[str] = STUDY_OUTPUTS
) -> Path | None:
    """Move the outputs ``names`` of ``out_dir`` that exist into a new archive folder.

    Returns the archive folder (``out_dir/archive/<UTC timestamp>/``), or
    ``None`` when none of them exists.  Takes the folder lock (re-entrant).
    """
    folder = Path(out_dir)
    present = [n for n in names if (folder / n).exists()]
    if not present:
        return None
    with folder_lock(folder):
        dest = _archive_folder(folder)
        for name in present:
            with contextlib.suppress(FileNotFoundError):
                os.replace(folder / name, dest / name)
    return dest


def archive_sweep_dir(out_dir: str | os.PathLike[str]) -> Path | None:
    """Move the whole study of ``out_dir`` aside (for ``--fresh``).

    The store is copied, consistent and self-contained (``VACUUM INTO``), to
    ``out_dir/archive/<UTC timestamp>/sweep.sqlite`` and the original (with its
    WAL files) deleted; a damaged store is moved there intact instead.  Every
    output made from the store (:data:`STUDY_OUTPUTS`: ``points.csv``,
    ``fit.csv``, ``spec.toml``, ``report.html``, ``plots/``) goes with it, so
    that no output of the old study stays beside the new one.

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
    outputs = [n for n in STUDY_OUTPUTS if (folder / n).exists()]
    if not store.exists() and not outputs:
        return None
    with folder_lock(folder):
        dest = _archive_folder(folder)
        if store.exists():
            _move_store(store, dest)
        for name in outputs:
            with contextlib.suppress(FileNotFoundError):
                os.replace(folder / name, dest / name)
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
        A required column is missing, a line has too few or too many cells (a
        truncated or damaged file), or a number does not parse; the file and the
        line are named; or there is no such file.
    """
    if not Path(path).is_file():
        raise InputError(str(path), "must be an existing points.csv file")
    with open(path, newline="", encoding="utf-8-sig") as fh:
        reader = csv.DictReader(fh, restkey="\0extra")
        missing = [
            c
            for c in CSV_COLUMNS
            if c not in (reader.fieldnames or []) and c not in _OPTIONAL_CSV_COLUMNS
        ]
        if missing:
            raise InputError(str(path), f"must have the columns {', '.join(missing)}")
        width = len(reader.fieldnames or [])
        out = []
        for rec in reader:
            where = f"{path}: line {reader.line_num}"
            extra = rec.pop("\0extra", None)
            n_cells = width - sum(v is None for v in rec.values()) + len(extra or ())
            if n_cells != width:
                raise InputError(
                    where,
                    f"has {n_cells} cells, the header {width}: the file is truncated or "
                    "damaged (rebuild it from the store: rerun the sweep command)",
                )
            row: dict[str, Any] = dict(rec)
            for col in _OPTIONAL_CSV_COLUMNS:
                row.setdefault(col, "nan" if col in _FLOAT_COLUMNS else "")
            for col in _FLOAT_COLUMNS & set(CSV_COLUMNS):
                try:
                    row[col] = float(row[col])
                except (TypeError, ValueError):
                    raise InputError(
                        where, f"column {col} must be a number, got {_clip(row[col])}"
                    ) from None
            out.append(row)
    return out


def check_csv_complete(path: str | os.PathLike[str]) -> None:
    """Refuse a CSV file with a line of too few or too many cells (truncated, damaged).

    Lines starting with ``#`` and blank lines are skipped; the first other line is
    the header.

    Raises
    ------
    InputError
        Naming the file and the line.
    """
    with open(path, newline="", encoding="utf-8-sig") as fh:
        reader = csv.reader(line for line in fh if line.strip() and not line.startswith("#"))
        width = None
        for n, cells in enumerate(reader, start=1):
            if width is None:
                width = len(cells)
                header_line = reader.line_num
                continue
            if len(cells) != width:
                raise InputError(
                    f"{path}: data row {n - 1} (after the header on line {header_line})",
                    f"has {len(cells)} cells, the header {width}: the file is truncated or damaged",
                )


def _clip(value: Any, limit: int = 60) -> str:
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."
