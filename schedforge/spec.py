"""Loading and validating study spec files (TOML, ``version = 1``).

A spec file describes one study: the device's energy curves, the Ising problem,
the bath, the schedule, the initial state, integrator settings, an optional
sweep grid and optional hardware waveform limits.  :func:`load_spec` reads a
file (or a packaged scenario, ``builtin:NAME``) with :mod:`tomllib`, checks it
against a closed schema (every section has a fixed set of keys; each key has a
type), then runs semantic checks, and returns a frozen
:class:`~schedforge.spec_model.Spec`.

Every problem is raised as :class:`~schedforge.errors.InputError` naming the key
path (``problem.J[2]``, ``sweep.tf_ns.start``) and the rule it broke; misspelt
keys get the nearest known key as a suggestion.  Defaults are the dataclass
defaults of :mod:`schedforge.spec_model`.
"""

from __future__ import annotations

import dataclasses
import math
import os
import tomllib
import typing
from collections.abc import Callable, Sequence
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

from .bath import COUPLINGS, SPECTRA, check_bath
from .checks import ECHO_CHARS, boolean, choice, clip, integer, number, shown, suggest
from .device import check_device
from .errors import InputError
from .hamiltonian import check_problem
from .limits import MAX_COEFFICIENT, MAX_ENERGY_GHZ, MAX_QUBITS, MIN_CUTOFF_GHZ
from .spec_model import (
    INITIAL_STATES,
    BathSpec,
    DeviceSpec,
    InitialSpec,
    NoiseSpec,
    NumericsSpec,
    ProblemFamilySpec,
    ProblemSpec,
    ScheduleSpec,
    Spec,
    SweepSpec,
    WaveformSpec,
)
from .waveform import FILTERS, check_waveform

__all__ = [
    "BUILTIN_PREFIX",
    "MAX_COEFFICIENT",
    "MAX_ENERGY_GHZ",
    "MAX_QUBITS",
    "MAX_SPEC_BYTES",
    "MAX_SWEEP_GRID",
    "MIN_CUTOFF_GHZ",
    "SPEC_VERSION",
    "TEMPLATE",
    "builtin_scenarios",
    "load_spec",
    "parse_spec",
    "spec_from_dict",
    "spec_to_toml",
]

#: The only spec format version this release reads.
SPEC_VERSION = 1
#: Prefix selecting a packaged scenario in :func:`load_spec`.
BUILTIN_PREFIX = "builtin:"
#: Largest number of tf values of a sweep, as a ``{start, stop, num}`` grid or an
#: explicit list (guards against typos).
MAX_SWEEP_GRID = 1000
#: Largest spec file read (a spec is a few kB; 1 MiB leaves room for long lists).
MAX_SPEC_BYTES = 1024 * 1024

_SECTIONS: dict[str, type] = {
    "device": DeviceSpec,
    "problem": ProblemSpec,
    "bath": BathSpec,
    "schedule": ScheduleSpec,
    "initial": InitialSpec,
    "numerics": NumericsSpec,
    "sweep": SweepSpec,
    "waveform": WaveformSpec,
    "noise": NoiseSpec,
}
_TOP_KEYS = ("version", *_SECTIONS)


# ---------------------------------------------------------------------------
# value readers (the checks shared with the model's validators, and TOML shapes)
# ---------------------------------------------------------------------------
_ECHO_CHARS = ECHO_CHARS
_clip = clip
_shown = shown
_number = number
_integer = integer
_string = choice
_boolean = boolean
_suggest = suggest


def _clip_path(path: Any) -> str:
    """A path for messages: its end kept when it is very long."""
    text = os.fspath(path)
    return repr(text if len(text) <= 300 else "..." + text[-297:])


def _order(value: Any, path: str) -> float:
    """A derivative-count k >= 0 (integer or real); integers stay integers."""
    x = _number(value, path, ge=0)
    return value if isinstance(value, int) else x


def _array(value: Any, path: str, *, nonempty: bool = False) -> list[Any]:
    if not isinstance(value, list):
        raise InputError(path, f"must be an array, got {_shown(value)}")
    if nonempty and not value:
        raise InputError(path, "must not be empty")
    return value


def _table(value: Any, path: str) -> dict[str, Any]:
    if not isinstance(value, dict):
        raise InputError(path, f"must be a table, got {_shown(value)}")
    return value


def _check_keys(table: dict[str, Any], known: Sequence[str], where: str) -> None:
    """Reject keys outside the closed set ``known`` of a section."""
    for key in table:
        if key not in known:
            shown = key if len(key) <= _ECHO_CHARS else key[: _ECHO_CHARS - 3] + "..."
            path = f"{where}.{shown}" if where else shown
            what = "a known key" if where else "a known section"
            listing = ", ".join(known)
            raise InputError(path, f"is not {what}{_suggest(key, known)} (known: {listing})")


def _no_repeats(values: Sequence[Any], path: str) -> None:
    seen: set[Any] = set()
    for i, v in enumerate(values):
        if v in seen:
            raise InputError(f"{path}[{i}]", f"repeats the value {_clip(v)}; list each value once")
        seen.add(v)


def _known_families() -> tuple[str, ...]:
    from .schedules import FAMILIES  # the registry grows as families are added

    return tuple(sorted(FAMILIES))


# ---------------------------------------------------------------------------
# sections
# ---------------------------------------------------------------------------
def _section(
    data: dict[str, Any],
    name: str,
    readers: dict[str, Callable[[Any, str], Any]],
) -> dict[str, Any]:
    """Validate one section and return the dataclass keyword arguments it sets."""
    cls = _SECTIONS[name]
    known = [f.name for f in dataclasses.fields(cls)]
    table = _table(data.get(name, {}), name)
    _check_keys(table, known, name)
    out: dict[str, Any] = {}
    for key, value in table.items():
        out[key] = readers[key](value, f"{name}.{key}")
    return out


def _positive(value: Any, path: str) -> float:
    return _number(value, path, gt=0)


def _device(data: dict[str, Any], base_dir: Path) -> DeviceSpec:
    spec = _validated(data, "device", check_device)
    curves = spec.curves
    if curves == "linear":
        return spec
    path = Path(os.path.expanduser(curves))
    if not path.is_absolute():
        path = base_dir / path
    path = path.resolve()
    if not path.is_file():
        raise InputError(
            "device.curves",
            f'must be "linear" or an existing CSV file (columns s, A_ghz, B_ghz); '
            f"{_clip_path(path)} does not exist (relative paths are resolved from the "
            f"spec file's folder)",
        )
    from .device_table import file_sha256

    digest = file_sha256(path)
    pinned = spec.curves_sha256
    if pinned is not None and pinned != digest:
        raise InputError(
            "device.curves_sha256",
            f"does not match {path} (its SHA-256 is {digest[:12]}..., the spec pins "
            f"{pinned[:12]}...): the file changed since this spec was written",
        )
    return dataclasses.replace(spec, curves=str(path), curves_sha256=digest)


def _validated(data: dict[str, Any], name: str, validator: Callable[[Any], Any]) -> Any:
    """A section whose own validator checks every value (types included): the closed
    schema here, the rules in one place for TOML and Python (``validator``)."""
    known = [f.name for f in dataclasses.fields(_SECTIONS[name])]
    table = _table(data.get(name, {}), name)
    _check_keys(table, known, name)
    return validator(_SECTIONS[name](**table))


def _problem(data: dict[str, Any]) -> ProblemSpec:
    return _validated(data, "problem", check_problem)


def _bath(data: dict[str, Any]) -> BathSpec:
    return _validated(data, "bath", check_bath)


def _points(value: Any, path: str) -> tuple[tuple[float, float], ...]:
    items = _array(value, path, nonempty=True)
    out: list[tuple[float, float]] = []
    for n, entry in enumerate(items):
        where = f"{path}[{n}]"
        if not isinstance(entry, list) or len(entry) != 2:
            raise InputError(where, f"must be an array [x, s], got {_shown(entry)}")
        x = _number(entry[0], f"{where}[0]", ge=0, le=1)
        s = _number(entry[1], f"{where}[1]", ge=0, le=1)
        if out and x <= out[-1][0]:
            raise InputError(
                f"{where}[0]", f"must be larger than the previous x ({out[-1][0]:g}), got {x:g}"
            )
        out.append((x, s))
    return tuple(out)


def _family(value: Any, path: str) -> str:
    return _string(value, path, _known_families())


def _schedule(data: dict[str, Any]) -> ScheduleSpec:
    kw = _section(
        data,
        "schedule",
        {
            "family": _family,
            "k_start": _order,
            "k_end": _order,
            "tf_ns": _positive,
            "tail": lambda v, p: _number(v, p, gt=0, lt=1),
            "points": _points,
        },
    )
    return ScheduleSpec(**kw)


def _initial(data: dict[str, Any]) -> InitialSpec:
    kw = _section(data, "initial", {"state": lambda v, p: _string(v, p, INITIAL_STATES)})
    return InitialSpec(**kw)


def _integrator_name(value: Any, path: str) -> str:
    name = _string(value, path)
    if not name.strip():
        raise InputError(path, 'must be "auto" or the name of an integrator')
    return name


def _numerics(data: dict[str, Any]) -> NumericsSpec:
    kw = _section(
        data,
        "numerics",
        {
            "integrator": _integrator_name,
            "rtol": lambda v, p: _number(v, p, gt=0, lt=1),
            "atol": lambda v, p: _number(v, p, gt=0, lt=1),
            "secular_tol_ghz": lambda v, p: _number(v, p, gt=0, lt=1),
        },
    )
    return NumericsSpec(**kw)


def _tf_grid(value: Any, path: str) -> tuple[float, ...]:
    if isinstance(value, dict):
        _check_keys(value, ("start", "stop", "num"), path)
        for key in ("start", "stop", "num"):
            if key not in value:
                raise InputError(
                    f"{path}.{key}", "is required in a log grid {start = .., stop = .., num = ..}"
                )
        start = _number(value["start"], f"{path}.start", gt=0)
        stop = _number(value["stop"], f"{path}.stop", gt=0)
        num = _integer(value["num"], f"{path}.num", ge=1, le=MAX_SWEEP_GRID)
        if stop < start:
            raise InputError(f"{path}.stop", f"must be >= start ({start:g}), got {stop:g}")
        if num == 1 and stop != start:
            raise InputError(f"{path}.num", "must be >= 2 when start and stop differ")
        if num > 1 and stop == start:
            raise InputError(f"{path}.num", "must be 1 when start equals stop")
        # 12 significant digits: the grid's own values, without the last-bit noise of
        # geomspace (2000.0000000000002); the end points stay exactly as written
        grid = [float(f"{t:.12g}") for t in np.geomspace(start, stop, num)]
        grid[0], grid[-1] = start, stop
        return tuple(grid)
    if not isinstance(value, list):
        raise InputError(
            path,
            f"must be an array of times in ns or a table {{start, stop, num}}, got {_shown(value)}",
        )
    items = _array(value, path, nonempty=True)
    if len(items) > MAX_SWEEP_GRID:
        raise InputError(
            path, f"must hold at most {MAX_SWEEP_GRID} times (like a log grid), got {len(items)}"
        )
    out = tuple(_number(v, f"{path}[{i}]", gt=0) for i, v in enumerate(items))
    _no_repeats(out, path)
    return out


def _k_list(value: Any, path: str) -> tuple[float, ...]:
    items = _array(value, path, nonempty=True)
    out = tuple(_order(v, f"{path}[{i}]") for i, v in enumerate(items))
    _no_repeats(out, path)
    return out


def _family_list(value: Any, path: str) -> tuple[str, ...]:
    items = _array(value, path, nonempty=True)
    out = tuple(_family(v, f"{path}[{i}]") for i, v in enumerate(items))
    _no_repeats(out, path)
    return out


def _sweep(data: dict[str, Any]) -> SweepSpec | None:
    if "sweep" not in data:
        return None
    kw = _section(data, "sweep", {"tf_ns": _tf_grid, "k_end": _k_list, "family": _family_list})
    if "tf_ns" not in kw:
        raise InputError("sweep.tf_ns", "is required in a [sweep] section")
    return SweepSpec(**kw)


def _waveform(data: dict[str, Any]) -> WaveformSpec | None:
    if "waveform" not in data:
        return None
    return _validated(data, "waveform", check_waveform)


# -- [noise]: control errors (issue 17) -------------------------------------------
#: Largest number of noise draws (guards against typos).
MAX_NOISE_DRAWS = 1_000_000
#: Largest size of a generated problem (2^n states are enumerated).
MAX_FAMILY_QUBITS = 22


def _noise_terms(value: Any, path: str) -> tuple[str, ...]:
    from .control_noise import NOISE_TERMS

    items = _array(value, path)
    out = tuple(_string(v, f"{path}[{i}]", NOISE_TERMS) for i, v in enumerate(items))
    _no_repeats(out, path)
    return out


def _noise_levels(value: Any, path: str) -> tuple[float, ...]:
    items = _array(value, path)
    out = tuple(_number(v, f"{path}[{i}]", ge=0) for i, v in enumerate(items))
    _no_repeats(out, path)
    return out


def _family_sizes(value: Any, path: str) -> tuple[int, ...]:
    items = _array(value, path, nonempty=True)
    out = tuple(
        _integer(v, f"{path}[{i}]", ge=2, le=MAX_FAMILY_QUBITS) for i, v in enumerate(items)
    )
    _no_repeats(out, path)
    return out


def _problem_family(value: Any, path: str) -> ProblemFamilySpec:
    from .problem_families import COUPLING_KINDS, FIELD_KINDS, GRAPHS

    table = _table(value, path)
    _check_keys(table, [f.name for f in dataclasses.fields(ProblemFamilySpec)], path)
    readers: dict[str, Callable[[Any, str], Any]] = {
        "graph": lambda v, p: _string(v, p, GRAPHS),
        "couplings": lambda v, p: _string(v, p, COUPLING_KINDS),
        "fields": lambda v, p: _string(v, p, FIELD_KINDS),
        "field_scale": lambda v, p: _number(v, p, ge=0),
        "sizes": _family_sizes,
        "instances": lambda v, p: _integer(v, p, ge=1, le=1000),
        "seed": lambda v, p: _integer(v, p, ge=0),
    }
    fam = ProblemFamilySpec(**{k: readers[k](v, f"{path}.{k}") for k, v in table.items()})
    if fam.graph == "ring":
        for i, n in enumerate(fam.sizes):
            if n < 3:
                raise InputError(f"{path}.sizes[{i}]", f"must be >= 3 for a ring, got {n}")
    return fam


def _noise(data: dict[str, Any]) -> NoiseSpec | None:
    if "noise" not in data:
        return None
    kw = _section(
        data,
        "noise",
        {
            "level": lambda v, p: _number(v, p, ge=0),
            "terms": _noise_terms,
            "amplitude_level": lambda v, p: _number(v, p, ge=0, lt=1),
            "draws": lambda v, p: _integer(v, p, ge=1, le=MAX_NOISE_DRAWS),
            "seed": lambda v, p: _integer(v, p, ge=0),
            "target": lambda v, p: _number(v, p, gt=0, le=1),
            "confidence": lambda v, p: _number(v, p, gt=0, lt=1),
            "levels": _noise_levels,
            "problems": _problem_family,
        },
    )
    return NoiseSpec(**kw)


def _check_schedules(spec: Spec) -> None:
    """Build the spec's schedule, and every schedule of the sweep, to apply each family's
    own rules (the sweep's schedules from :func:`schedforge.schedules.schedule_grid`)."""
    from .schedules import schedule_from_spec, schedule_grid

    schedule_from_spec(spec.schedule)
    if spec.sweep is None:
        return
    for family, k_start, k_end in schedule_grid(spec):
        variant = spec.with_schedule(family=family, k_start=k_start, k_end=k_end)
        try:
            schedule_from_spec(variant.schedule)
        except InputError as err:
            raise InputError(
                err.field, f"{err.rule} (in the sweep, family = {family!r}, k_end = {k_end:g})"
            ) from None


# ---------------------------------------------------------------------------
# public API
# ---------------------------------------------------------------------------
def parse_spec(
    data: dict[str, Any],
    base_dir: str | os.PathLike[str] | None = None,
    *,
    source: str | None = None,
) -> Spec:
    """Validate a spec given as a dict (as read by :func:`tomllib.load`).

    Parameters
    ----------
    data : dict
        The parsed TOML document.
    base_dir : path-like, optional
        Folder against which a relative ``device.curves`` CSV path is resolved;
        defaults to the current directory.
    source : str, optional
        Where the spec came from (stored in ``Spec.source``).

    Returns
    -------
    Spec
        The validated, frozen spec.

    Raises
    ------
    InputError
        Naming the key path and the rule, for unknown sections or keys, wrong
        types, out-of-range values and inconsistent combinations (the schedule,
        and each family x k_end of the sweep, is built once to apply the
        family's own rules).
    """
    data = _table(data, "spec")
    _check_keys(data, _TOP_KEYS, "")
    if "version" not in data:
        raise InputError("version", f"is required; write `version = {SPEC_VERSION}` at the top")
    version = _integer(data["version"], "version")
    if version != SPEC_VERSION:
        raise InputError(
            "version", f"must be {SPEC_VERSION} (the only format this release reads), got {version}"
        )
    base = Path(base_dir) if base_dir is not None else Path.cwd()
    spec = Spec(
        version=version,
        device=_device(data, base),
        problem=_problem(data),
        bath=_bath(data),
        schedule=_schedule(data),
        initial=_initial(data),
        numerics=_numerics(data),
        sweep=_sweep(data),
        waveform=_waveform(data),
        noise=_noise(data),
        source=source,
    )
    _check_schedules(spec)
    from .limits import check_energy_scales

    check_energy_scales(spec)
    return spec


def builtin_scenarios() -> tuple[str, ...]:
    """Names of the packaged scenarios usable as ``builtin:NAME``."""
    folder = resources.files("schedforge") / "data" / "scenarios"
    return tuple(
        sorted(p.name[: -len(".toml")] for p in folder.iterdir() if p.name.endswith(".toml"))
    )


def _read_toml(text: str, label: str) -> dict[str, Any]:
    """Parse TOML text; a leading UTF-8 byte-order mark is accepted."""
    text = text.removeprefix("\ufeff")
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(label, f"is not valid TOML: {exc}") from None
    except RecursionError:  # arrays or inline tables nested thousands deep
        raise InputError(
            label, "nests arrays or tables too deeply to be a spec (is it the right file?)"
        ) from None


def load_spec(path_or_name: str | os.PathLike[str]) -> Spec:
    """Read and validate a spec file, or a packaged scenario ``builtin:NAME``.

    Parameters
    ----------
    path_or_name : str or path-like
        Path of a TOML file, or ``"builtin:NAME"`` with NAME one of
        :func:`builtin_scenarios` (e.g. ``builtin:driven-qubit``).

    Returns
    -------
    Spec
        With ``source`` set to the file path or the ``builtin:NAME`` string.

    Raises
    ------
    InputError
        If the file is missing or unreadable, is not valid TOML, or fails
        validation (see :func:`parse_spec`).
    """
    name = os.fspath(path_or_name)
    if name.startswith(BUILTIN_PREFIX):
        key = name[len(BUILTIN_PREFIX) :]
        known = builtin_scenarios()
        if key not in known:
            raise InputError(
                "spec",
                f"names an unknown built-in scenario {key!r}{_suggest(key, known)} "
                f"(known: {', '.join(known)})",
            )
        resource = resources.files("schedforge") / "data" / "scenarios" / f"{key}.toml"
        data = _read_toml(resource.read_text(encoding="utf-8"), name)
        with resources.as_file(resource) as real:
            return parse_spec(data, Path(real).parent, source=name)
    path = Path(name)
    if not path.is_file():
        raise InputError("spec", f"must be an existing TOML file; {_clip_path(name)} was not found")
    try:
        size = path.stat().st_size
        if size > MAX_SPEC_BYTES:
            raise InputError(
                "spec",
                f"must be a file of at most {MAX_SPEC_BYTES // 1024} KiB; {_clip_path(name)} has "
                f"{size / 1024:.0f} KiB (is it the right file?)",
            )
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError("spec", f"could not be read from {_clip_path(name)}: {exc}") from None
    data = _read_toml(text, name)
    return parse_spec(data, path.resolve().parent, source=str(path))


_SPECTRA_TEXT = "\n".join(f'#   "{k.name}": {k.summary}' for k in SPECTRA.values())
_COUPLINGS_TEXT = ", ".join(COUPLINGS)
_FILTERS_TEXT = " or ".join(f'"{name}"' for name in FILTERS)

TEMPLATE = f"""\
# schedforge study spec.  Units: energies E/h in GHz, times in ns, temperatures in mK.
# Every key below shows its default value; delete what you do not need.
version = {SPEC_VERSION}

[device]
# Energy curves of H(s) = -(A(s)/2) sum_i X_i + (B(s)/2) H_problem.
# "linear" means A(s) = A0_ghz (1 - s) and B(s) = B0_ghz s.  Alternatively give the
# path of a CSV table with columns s, A_ghz, B_ghz (relative to this file's folder).
curves = "linear"
A0_ghz = 3.5
B0_ghz = 2.5
# curves_sha256 = "..."  # optional: the SHA-256 the CSV must have (spec copies pin it)

[problem]
# H_problem = sum_i h_i Z_i + sum_(i<j) J_ij Z_i Z_j (dimensionless), 1 to {MAX_QUBITS} qubits
# (cost per point: seconds up to 5 qubits, about a minute at 6, longer at 7, hours at 8).
qubits = 1
h = [0.7]          # one entry per qubit
J = []             # couplings as [i, j, J_ij] with 0 <= i < j < qubits, e.g. [[0, 1, -1.0]]

[bath]
# spectrum, the bath's spectral density:
{_SPECTRA_TEXT}
spectrum = "ohmic"
# coupling: each qubit has its own bath, coupled through this Pauli ({_COUPLINGS_TEXT})
coupling = "x"
eta = 1e-4               # dimensionless coupling strength eta*g^2 (>= 0)
cutoff_ghz = 8.0         # ohmic cutoff frequency
temperature_mk = 12.0
lamb_shift = false       # include the bath-induced energy shift

[schedule]
# s = f(t / tf).  k_start / k_end: how many derivatives of s vanish at t = 0 / t = tf.
# Families and the keys they use:
#   linear  s = x; no flat end (k_start, k_end, tail ignored)
#   beta    regularized incomplete beta I_x(1 + k_start, 1 + k_end); real k allowed
#   poly    a base curve (the straight line s = x, or the curve through `points` when
#           given) whose last `tail` of the anneal is replaced by a polynomial with k_end
#           vanishing derivatives at the end; k_start must be 0
#   points  a monotone curve through the control `points`, its last `tail` reshaped
#           like poly (k_end vanishing derivatives at the end); k_start must be 0
#   gevrey  every derivative vanishes at the end (k = inf; the value of k_end is not
#           used); k_start > 0 makes the start flat to every order too
family = "beta"          # linear, beta, poly, gevrey or points
k_start = 0
k_end = 2
tf_ns = 1000.0           # anneal time
tail = 0.2               # fraction of the anneal reshaped by the poly and points families
# points = [[0.0, 0.0], [0.5, 0.4], [1.0, 1.0]]   # [x, s] control points (points, poly)

[initial]
state = "gibbs"          # "gibbs" (thermal state of H(0)) or "ground"

[numerics]
# integrator: "auto" (eigenframe for open systems, general for closed ones), or one of
#   "eigenframe" (open systems; cost independent of tf), "general" (adaptive DOP853, the
#   reference; cost grows with tf), "closed" (the general one on a closed system, as it
#   is reported), "held" (piecewise-constant played waveforms; used for them whatever
#   is named)
integrator = "auto"
rtol = 1e-10
atol = 1e-14
# secular_tol_ghz: Bohr frequencies (and levels) closer than this (E/h, GHz) count as
#   equal in the Davies generator, whose secular approximation then couples them.
#   Default: 1e-7 of the largest |energy| of H(s) (the resolution of eigenvectors in
#   double precision).  Pre-flight names every stretch of s where distinct frequencies
#   come closer than 10 times the relaxation rates (the approximation is doubtful there).
# secular_tol_ghz = 1e-6

# A sweep runs every combination of family x k_end x tf_ns.
# [sweep]
# tf_ns = [300.0, 1000.0, 3000.0]        # or a log grid: {{start = 100.0, stop = 10000.0, num = 9}}
# k_end = [0, 1, 2]
# family = ["beta"]                      # optional; defaults to schedule.family

# What the hardware can play; leave a limit out when there is none.
# Check every value against your device's documented limits.
# [waveform]
# sample_rate_gsps = 1.0
# dac_bits = 14
# bandwidth_mhz = 200.0
# filter = "gaussian"                    # {_FILTERS_TEXT}
# max_slope_per_ns = 0.01
# breakpoints = 32
# breakpoint_tolerance = 1e-4

# Control errors on the programmed h_i, J_ij (schedforge precision / noise-sweep).
# [noise]
# level = 0.02                 # std of each coefficient's error / largest |h_i|, |J_ij|
# terms = ["h", "J"]           # which coefficients carry errors
# amplitude_level = 0.0        # relative std of the amplitude of A(s) and of B(s) (dynamics)
# draws = 200
# seed = 0
# target = 0.05                # largest acceptable probability that the ground state changes
# confidence = 0.95            # of the Wilson intervals
# levels = []                  # levels to tabulate; default: a grid up to the crossing
# [noise.problems]             # optional: generated problems, fragility against size
# graph = "ring"               # chain, ring, grid or complete
# couplings = "sign"           # sign (+-1) or gaussian
# fields = "none"              # none, sign or gaussian (times field_scale)
# field_scale = 1.0
# sizes = [4, 8, 12, 16]       # qubits (2..{MAX_FAMILY_QUBITS}); every state is enumerated
# instances = 3
# seed = 0
"""


# ---------------------------------------------------------------------------
# writing specs back: dict (the store's run record) and TOML (a study's spec.toml)
# ---------------------------------------------------------------------------
def _nested_dataclass(annotation: Any) -> type | None:
    """The dataclass a field holds (``X`` or ``X | None``), else None."""
    if dataclasses.is_dataclass(annotation):
        return annotation  # type: ignore[return-value]
    return next((a for a in typing.get_args(annotation) if dataclasses.is_dataclass(a)), None)


def _from_plain(value: Any, annotation: Any) -> Any:
    nested = _nested_dataclass(annotation)
    if isinstance(value, dict) and nested is not None:
        hints = typing.get_type_hints(nested)
        return nested(**{k: _from_plain(v, hints.get(k)) for k, v in value.items()})
    if isinstance(value, list):
        return tuple(_from_plain(v, None) for v in value)
    return value


def spec_from_dict(data: dict[str, Any]) -> Spec:
    """Rebuild a :class:`Spec` from :func:`dataclasses.asdict` output (e.g. read back from JSON).

    For specs this package wrote itself (the store's record of a run): the values are
    trusted, not validated again; lists become tuples and nested tables dataclasses.
    Fields missing from an older record take their defaults.
    """
    hints = typing.get_type_hints(Spec)
    sections = {
        name: None if data.get(name) is None else _from_plain(data[name], hints[name])
        for name in _SECTIONS
    }
    return Spec(version=data["version"], source=data.get("source"), **sections)


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, list | tuple):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def _toml_table(name: str, table: dict[str, Any]) -> list[str]:
    lines = ["", f"[{name}]"]
    nested = []
    for key, value in table.items():
        if value is None:
            continue
        if name == "sweep" and isinstance(value, list | tuple) and not value:
            continue
        if isinstance(value, dict):
            nested.append((key, value))
            continue
        lines.append(f"{key} = {_toml_value(value)}")
    for key, value in nested:
        lines += _toml_table(f"{name}.{key}", value)
    return lines


def spec_to_toml(spec: Spec) -> str:
    """The spec as TOML text that :func:`load_spec` reads back to an equal spec.

    Fields that are ``None`` (no such limit / section) and empty sweep lists are
    omitted; nested tables (``[noise.problems]``) follow their section.
    """
    from . import __version__

    data = dataclasses.asdict(spec)
    lines = [
        f"# spec copy written by schedforge {__version__}"
        + (f" (from {spec.source})" if spec.source else ""),
        f"version = {int(data['version'])}",
    ]
    for section in _SECTIONS:
        if data.get(section) is not None:
            lines += _toml_table(section, data[section])
    return "\n".join(lines) + "\n"
