"""A schedule sampled in time, and its CSV form for the lab.

:func:`sample_schedule` evaluates s(t), ds/dt and the device energies A(s(t)),
B(s(t)) on a time grid that contains t = 0 and t = tf exactly, either at a
sample rate (the grid of an arbitrary waveform generator) or at a number of
evenly spaced points.  :func:`write_samples_csv` writes the table with ``#``
metadata lines and shortest round-trip floats; :func:`read_samples_csv` reads it
back, checking every line.

CSV layout: always :data:`HEADER_LINES` (12) ``#`` lines, one per key of
:data:`HEADER_KEYS` after the title (``none`` where a key does not apply), then
the column names, then one row per sample::

    # schedforge schedule samples: 12 '#' lines, then the column names, then the samples
    # spec: builtin:driven-qubit
    # schedule: family = "beta", k_start = 0, k_end = 2, tf_ns = 1000
    # ...
    t_ns,s,ds_dt_per_ns,A_ghz,B_ghz
    0,0,0.003,3.5,0
    ...

so every file reads with the same line, e.g. ``np.genfromtxt(path, delimiter=",",
names=True, skip_header=12)`` or ``pandas.read_csv(path, skiprows=12)``.
Parameter lines (``schedule``, ``device``, ``waveform``, ``waveform_check``) are
the body of a TOML inline table (:func:`toml_fields`, read back with
:func:`parse_fields`).  Numbers are written as the shortest decimal that reads
back to the identical double (Python's ``repr``): no digits beyond what the value
holds, and an exact round trip.  With a DAC (``dac_bits``) a sixth column
``dac_code`` holds the integer converter code j of s = j / (2^bits - 1).
"""

from __future__ import annotations

import math
import os
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import IO, Any

import numpy as np
from numpy.typing import NDArray

from . import __version__
from .device import DeviceCurves
from .errors import InputError
from .fileio import atomic_write_all
from .schedules import Schedule

__all__ = [
    "COLUMNS",
    "DAC_COLUMN",
    "DEFAULT_POINTS",
    "HEADER_KEYS",
    "HEADER_LINES",
    "MAX_SAMPLES",
    "UNITS",
    "SampleTable",
    "parse_fields",
    "read_samples_csv",
    "sample_schedule",
    "samples_metadata",
    "toml_fields",
    "write_samples",
    "write_samples_csv",
]

#: Column names of the samples table and CSV header, in order.
COLUMNS: tuple[str, ...] = ("t_ns", "s", "ds_dt_per_ns", "A_ghz", "B_ghz")
#: Optional sixth column: the DAC code j of s = j / (2^bits - 1).
DAC_COLUMN = "dac_code"
#: Keys of the ``# key: value`` header lines, in order; every file has all of them.
HEADER_KEYS: tuple[str, ...] = (
    "spec",
    "schedule",
    "device",
    "grid",
    "export",
    "waveform",
    "waveform_check",
    "columns",
    "caution",
    "schedforge_version",
    "created_utc",
)
#: Number of ``#`` lines before the column names in every samples CSV (title + keys).
HEADER_LINES = 1 + len(HEADER_KEYS)
#: Units line written into every CSV file.
UNITS = "t_ns in ns; s dimensionless; ds_dt_per_ns in 1/ns; A_ghz and B_ghz as E/h in GHz"
#: Number of evenly spaced points when neither a rate nor a count is given.
DEFAULT_POINTS = 1001
#: Largest table :func:`sample_schedule` builds (about 400 MB of floats).
MAX_SAMPLES = 10_000_000

_TITLE = (
    f"schedforge schedule samples: {HEADER_LINES} '#' lines, then the column names, "
    "then the samples"
)
_CAUTION = "check against the device's documented limits and the lab's practice before playing"


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
        ``key: value`` notes (keys of :data:`HEADER_KEYS`, or the header of a
        file read back).
    dac_code : ndarray of int, optional
        The converter code j of each ``s = j / (2^bits - 1)`` (quantized waveforms).
    """

    t_ns: NDArray[np.float64]
    s: NDArray[np.float64]
    ds_dt_per_ns: NDArray[np.float64]
    A_ghz: NDArray[np.float64]
    B_ghz: NDArray[np.float64]
    metadata: Mapping[str, str] = field(default_factory=dict)
    dac_code: NDArray[np.int64] | None = None

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
        if self.dac_code is not None:
            code = np.array(self.dac_code, dtype=np.int64)
            if code.shape != (n,):
                raise ValueError("SampleTable.dac_code must have the length of the columns")
            code.setflags(write=False)
            object.__setattr__(self, "dac_code", code)
        object.__setattr__(self, "metadata", dict(self.metadata))

    def __len__(self) -> int:
        return int(self.t_ns.size)

    @property
    def columns(self) -> tuple[str, ...]:
        """Column names as written: :data:`COLUMNS`, plus ``dac_code`` when present."""
        return COLUMNS + ((DAC_COLUMN,) if self.dac_code is not None else ())

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
        t = np.arange(steps + 1, dtype=float) / rate_gsps  # n / R, correctly rounded
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
    """The notebook metadata of a sampled schedule: schedule and device parameters.

    Returns
    -------
    dict
        ``schedule``: the parameters of :meth:`Schedule.describe` and ``tf_ns``;
        ``device``: those of :meth:`DeviceCurves.describe`; each the body of a
        TOML inline table (:func:`toml_fields`).
    """
    return {
        "schedule": toml_fields({**schedule.describe(), "tf_ns": float(tf_ns)}),
        "device": toml_fields(curves.describe()),
    }


def _toml_value(value: Any) -> str:
    """One value in TOML syntax (numbers shortest round-trip, nested tables inline)."""
    if isinstance(value, bool | np.bool_):
        return "true" if value else "false"
    if isinstance(value, int | np.integer):
        return str(int(value))
    if isinstance(value, float | np.floating):
        v = float(value)
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return str(int(v)) if v.is_integer() and abs(v) < 1e15 else repr(v)
    if isinstance(value, Mapping):
        return "{" + toml_fields(value) + "}"
    if isinstance(value, list | tuple | np.ndarray):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    text = " ".join(str(value).split())
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'


def toml_fields(values: Mapping[str, Any]) -> str:
    """``key = value, ...``: the body of a TOML inline table, on one line.

    Examples
    --------
    >>> toml_fields({"family": "beta", "k_end": 2.0, "tf_ns": 1000.0 / 3})
    'family = "beta", k_end = 2, tf_ns = 333.3333333333333'
    """
    return ", ".join(f"{key} = {_toml_value(v)}" for key, v in values.items())


def parse_fields(text: str) -> dict[str, Any]:
    """Read back a :func:`toml_fields` line (``"none"`` gives an empty dict).

    Raises
    ------
    InputError
        When the text is not the body of a TOML inline table.
    """
    if text.strip() == "none":
        return {}
    try:
        return dict(tomllib.loads(f"fields = {{{text}}}")["fields"])
    except tomllib.TOMLDecodeError as exc:
        raise InputError("header", f"is not a list of key = value fields: {exc}") from None


def _text(value: Any) -> str:
    """One-line text of a metadata value (floats shortest round-trip)."""
    if isinstance(value, float):
        return repr(value)
    return " ".join(str(value).split())


def _header(table: SampleTable, metadata: Mapping[str, Any]) -> list[str]:
    meta: dict[str, str] = {key: "none" for key in HEADER_KEYS}
    unknown = [key for key in metadata if key not in HEADER_KEYS]
    if unknown:
        raise ValueError(f"unknown samples header key(s) {unknown}; known: {HEADER_KEYS}")
    for source in (table.metadata, metadata):  # other notes of the table are not written
        for key, value in source.items():
            if key in HEADER_KEYS:
                meta[key] = _text(value) or "none"
    columns = UNITS
    if table.metadata.get("columns"):
        columns += "; " + _text(table.metadata["columns"])
    if table.dac_code is not None:
        columns += f"; {DAC_COLUMN} is the integer converter code j of s = j / (2^dac_bits - 1)"
    meta["columns"] = columns
    meta["caution"] = _CAUTION
    meta["schedforge_version"] = __version__
    meta["created_utc"] = datetime.now(UTC).isoformat(timespec="seconds")
    lines = [f"# {_TITLE}"] + [f"# {key}: {value}" for key, value in meta.items()]
    assert len(lines) == HEADER_LINES
    return lines


def write_samples(fh: IO[bytes], table: SampleTable, metadata: Mapping[str, Any]) -> None:
    """Write a samples table as CSV to an open binary file (see :func:`write_samples_csv`)."""
    fh.write(("\n".join([*_header(table, metadata), ",".join(table.columns)]) + "\n").encode())
    data = table.as_array()
    codes = None if table.dac_code is None else table.dac_code.tolist()
    chunk = 65536
    for start in range(0, len(table), chunk):
        rows = data[start : start + chunk].tolist()
        if codes is None:
            lines = [",".join(map(repr, row)) for row in rows]
        else:
            lines = [
                ",".join(map(repr, row)) + f",{code}"
                for row, code in zip(rows, codes[start : start + chunk], strict=True)
            ]
        fh.write(("\n".join(lines) + "\n").encode())


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
        Header entries, keys from :data:`HEADER_KEYS` (see
        :func:`samples_metadata`); ``table.metadata`` supplies the others
        (``grid``, ...).  Keys not given are written as ``none``; ``columns``
        (units), ``caution``, the version and the UTC time are always filled in.

    Notes
    -----
    Always :data:`HEADER_LINES` ``#`` lines.  Floats are written as the shortest
    decimal that reads back to the identical double (``repr``).
    """
    atomic_write_all([(path, lambda fh: write_samples(fh, table, metadata))])


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
            if names not in (COLUMNS, (*COLUMNS, DAC_COLUMN)):
                raise InputError(where, f"must be the header {','.join(COLUMNS)}, got {line!r}")
            header_seen = True
            continue
        cells = line.split(",")
        if len(cells) != len(names):
            raise InputError(
                where, f"must have {len(names)} comma-separated numbers, got {len(cells)}"
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
    codes = None
    if len(names) > len(COLUMNS):
        codes = data[:, len(COLUMNS)]
        if not np.array_equal(codes, np.round(codes)):
            raise InputError(str(p), f"column {DAC_COLUMN} must hold integers")
        codes = codes.astype(np.int64)
    return SampleTable(*(data[:, i] for i in range(len(COLUMNS))), metadata=meta, dac_code=codes)
