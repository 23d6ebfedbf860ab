"""A schedule sampled in time, and its CSV form for the lab.

:func:`sample_schedule` evaluates s(t), ds/dt and the device energies A(s(t)),
B(s(t)) on a time grid that contains t = 0 and t = tf exactly, either at a
sample rate (the grid of an arbitrary waveform generator) or at a number of
evenly spaced points.  :func:`write_samples_csv` writes the table with ``#``
metadata lines and repr-exact floats; :func:`read_samples_csv` reads it back,
checking every line.

CSV layout::

    # schedforge schedule samples
    # family: beta
    # ...                       (one "# key: value" line per metadata item)
    t_ns,s,ds_dt_per_ns,A_ghz,B_ghz
    0,0,0.003,3.5,0
    ...
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from . import __version__
from .device import DeviceCurves
from .errors import InputError
from .fileio import atomic_write
from .schedules import Schedule

__all__ = [
    "COLUMNS",
    "DEFAULT_POINTS",
    "MAX_SAMPLES",
    "UNITS",
    "SampleTable",
    "read_samples_csv",
    "sample_schedule",
    "samples_metadata",
    "write_samples_csv",
]

#: Column names of the samples table and CSV header, in order.
COLUMNS: tuple[str, ...] = ("t_ns", "s", "ds_dt_per_ns", "A_ghz", "B_ghz")
#: Units line written into every CSV file.
UNITS = "t_ns in ns; s dimensionless; ds_dt_per_ns in 1/ns; A_ghz and B_ghz as E/h in GHz"
#: Number of evenly spaced points when neither a rate nor a count is given.
DEFAULT_POINTS = 1001
#: Largest table :func:`sample_schedule` builds (about 400 MB of floats).
MAX_SAMPLES = 10_000_000

_TITLE = "schedforge schedule samples"


@dataclass(frozen=True)
class SampleTable:
    """Samples of one schedule on a time grid (read-only arrays of equal length).

    Attributes
    ----------
    t_ns : ndarray
        Times in ns, strictly increasing, from 0 to tf.
    s : ndarray
        Anneal fraction s(t).
    ds_dt_per_ns : ndarray
        ds/dt in 1/ns.
    A_ghz, B_ghz : ndarray
        Device energies A(s(t)) and B(s(t)), E/h in GHz.
    metadata : Mapping[str, str]
        Free-form ``key: value`` notes (grid description, or the header of a
        file read back).
    """

    t_ns: NDArray[np.float64]
    s: NDArray[np.float64]
    ds_dt_per_ns: NDArray[np.float64]
    A_ghz: NDArray[np.float64]
    B_ghz: NDArray[np.float64]
    metadata: Mapping[str, str] = field(default_factory=dict)

    def __post_init__(self) -> None:
        n = None
        for name in COLUMNS:
            arr = np.array(getattr(self, name), dtype=float)
            if arr.ndim != 1:
                raise ValueError(f"SampleTable.{name} must be one-dimensional")
            if n is not None and arr.size != n:
                raise ValueError("SampleTable columns must have equal lengths")
            n = arr.size
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        object.__setattr__(self, "metadata", dict(self.metadata))

    def __len__(self) -> int:
        return int(self.t_ns.size)

    def as_array(self) -> NDArray[np.float64]:
        """The table as an ``(n, 5)`` array in :data:`COLUMNS` order."""
        return np.column_stack([getattr(self, name) for name in COLUMNS])


def _time_grid(
    tf_ns: float, rate_gsps: float | None, points: int | None
) -> tuple[NDArray[np.float64], str]:
    """Time grid including 0 and tf exactly, and a one-line description of it."""
    if rate_gsps is not None and points is not None:
        raise InputError("rate_gsps", "and points exclude each other; give one of them")
    if rate_gsps is not None:
        if not (math.isfinite(rate_gsps) and rate_gsps > 0):
            raise InputError("rate_gsps", f"must be a finite number > 0, got {rate_gsps!r}")
        dt = 1.0 / rate_gsps
        steps = math.floor(tf_ns * rate_gsps * (1.0 + 1e-12))
        if steps + 2 > MAX_SAMPLES:
            raise InputError(
                "rate_gsps",
                f"gives about {steps + 1} samples over {tf_ns:g} ns, more than the "
                f"limit of {MAX_SAMPLES}",
            )
        t = np.arange(steps + 1, dtype=float) * dt
        if t[-1] >= tf_ns * (1.0 - 1e-12):
            t[-1] = tf_ns  # tf is a whole number of sample periods
            last = dt
        else:
            last = tf_ns - t[-1]
            t = np.append(t, tf_ns)
        if t.size < 2:
            t = np.array([0.0, tf_ns])
            last = tf_ns
        note = f"sample rate {rate_gsps:g} GS/s (dt = {dt:g} ns)"
        if not math.isclose(last, dt, rel_tol=1e-9):
            note += f"; the final interval is shortened to {last:.6g} ns so the grid ends at tf"
        return t, note
    n = DEFAULT_POINTS if points is None else points
    if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 2:
        raise InputError("points", f"must be an integer >= 2, got {points!r}")
    if n > MAX_SAMPLES:
        raise InputError("points", f"must be at most {MAX_SAMPLES}, got {n}")
    t = np.linspace(0.0, tf_ns, int(n))
    t[-1] = tf_ns
    return t, f"{int(n)} evenly spaced points"


def sample_schedule(
    schedule: Schedule,
    tf_ns: float,
    curves: DeviceCurves,
    *,
    rate_gsps: float | None = None,
    points: int | None = None,
) -> SampleTable:
    """Sample a schedule and the device energies along it.

    Parameters
    ----------
    schedule : Schedule
        s = f(x) with x = t / tf.
    tf_ns : float
        Anneal time in ns (> 0).
    curves : DeviceCurves
        A(s) and B(s) in GHz.
    rate_gsps : float, optional
        Sample rate in GS/s: samples every 1/rate ns from t = 0, plus t = tf if
        tf is not a whole number of periods (the final interval is then shorter;
        the table's metadata says so).
    points : int, optional
        Number of evenly spaced samples (>= 2).  Exclusive with ``rate_gsps``;
        with neither, :data:`DEFAULT_POINTS` are used.

    Returns
    -------
    SampleTable
        Includes t = 0 and t = tf exactly; ``ds_dt_per_ns = f'(t/tf) / tf``.

    Raises
    ------
    InputError
        For tf <= 0, a rate <= 0, fewer than 2 points, both grid options, or a
        grid larger than :data:`MAX_SAMPLES`.
    """
    if not (math.isfinite(tf_ns) and tf_ns > 0):
        raise InputError("tf_ns", f"must be a finite number > 0, got {tf_ns!r}")
    t, note = _time_grid(float(tf_ns), rate_gsps, points)
    x = np.clip(t / tf_ns, 0.0, 1.0)
    d = schedule.derivatives(x, 1)
    s = d[0]
    energies = curves.derivatives(s, 0)
    return SampleTable(
        t_ns=t,
        s=s,
        ds_dt_per_ns=d[1] / tf_ns,
        A_ghz=energies[0, 0],
        B_ghz=energies[1, 0],
        metadata={"grid": note, "samples": str(t.size)},
    )


def samples_metadata(schedule: Schedule, tf_ns: float, curves: DeviceCurves) -> dict[str, str]:
    """The notebook metadata of a sampled schedule: family, k, tf, device curves.

    Returns
    -------
    dict
        ``family``, ``k_start``, ``k_end`` and any other schedule parameters from
        :meth:`Schedule.describe`, ``tf_ns``, and ``device.*`` entries from
        :meth:`DeviceCurves.describe`.
    """
    meta = {key: _text(value) for key, value in schedule.describe().items()}
    meta["tf_ns"] = _text(tf_ns)
    for key, value in curves.describe().items():
        meta[f"device.{key}"] = _text(value)
    return meta


def _text(value: Any) -> str:
    """One-line text of a metadata value (floats repr-exact)."""
    if isinstance(value, float):
        return repr(value)
    return " ".join(str(value).split())


def write_samples_csv(
    path: str | os.PathLike[str], table: SampleTable, metadata: Mapping[str, Any]
) -> None:
    """Write a samples table as CSV with ``#`` metadata lines, atomically.

    Parameters
    ----------
    path : path-like
        Output file; written through a temporary file and renamed, so a failure
        leaves no partial file.
    table : SampleTable
        The samples.
    metadata : Mapping
        Notebook entries (see :func:`samples_metadata`); ``table.metadata`` is
        added, followed by the schedforge version, the UTC time (ISO 8601) and
        the units.

    Notes
    -----
    Floats are written with ``%.17g``, which reads back to the identical double.
    """
    meta: dict[str, str] = {key: _text(value) for key, value in metadata.items()}
    for key, value in table.metadata.items():
        meta.setdefault(key, _text(value))
    meta["schedforge_version"] = __version__
    meta["created_utc"] = datetime.now(UTC).isoformat(timespec="seconds")
    meta["units"] = UNITS
    for key in meta:
        if ":" in key or not key.strip() or "\n" in key:
            raise ValueError(f"metadata key {key!r} must be non-empty without ':'")
    with atomic_write(path, "w", newline="\n") as fh:
        fh.write(f"# {_TITLE}\n")
        for key, value in meta.items():
            fh.write(f"# {key}: {value}\n")
        fh.write(",".join(COLUMNS) + "\n")
        np.savetxt(fh, table.as_array(), fmt="%.17g", delimiter=",")


def read_samples_csv(path: str | os.PathLike[str]) -> SampleTable:
    """Read a samples CSV written by :func:`write_samples_csv`.

    Parameters
    ----------
    path : path-like
        The CSV file.

    Returns
    -------
    SampleTable
        With ``metadata`` holding the ``# key: value`` header entries.

    Raises
    ------
    InputError
        Naming the file and line: missing file, a header other than
        ``t_ns,s,ds_dt_per_ns,A_ghz,B_ghz``, a row without 5 finite numbers,
        times not strictly increasing, or fewer than 2 rows.
    """
    p = Path(path)
    try:
        lines = p.read_text(encoding="utf-8").splitlines()
    except FileNotFoundError:
        raise InputError(str(p), "does not exist") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(str(p), f"could not be read: {exc}") from None
    meta: dict[str, str] = {}
    rows: list[list[float]] = []
    header_seen = False
    for number, raw in enumerate(lines, start=1):
        line = raw.strip()
        where = f"{p}: line {number}"
        if not line:
            continue
        if line.startswith("#"):
            key, sep, value = line[1:].partition(":")
            if sep and not header_seen:
                meta[key.strip()] = value.strip()
            continue
        if not header_seen:
            names = tuple(c.strip() for c in line.split(","))
            if names != COLUMNS:
                raise InputError(where, f"must be the header {','.join(COLUMNS)}, got {line!r}")
            header_seen = True
            continue
        cells = line.split(",")
        if len(cells) != len(COLUMNS):
            raise InputError(
                where, f"must have {len(COLUMNS)} comma-separated numbers, got {len(cells)}"
            )
        try:
            values = [float(c) for c in cells]
        except ValueError:
            raise InputError(where, f"must hold only numbers, got {line!r}") from None
        if not all(math.isfinite(v) for v in values):
            raise InputError(where, f"must hold finite numbers, got {line!r}")
        if rows and values[0] <= rows[-1][0]:
            raise InputError(
                where, f"t_ns must increase strictly, got {cells[0]} after {rows[-1][0]!r}"
            )
        rows.append(values)
    if not header_seen:
        raise InputError(str(p), f"has no header line {','.join(COLUMNS)}")
    if len(rows) < 2:
        raise InputError(str(p), f"must have at least 2 data rows, got {len(rows)}")
    data = np.array(rows, dtype=float)
    return SampleTable(*(data[:, i] for i in range(len(COLUMNS))), metadata=meta)
