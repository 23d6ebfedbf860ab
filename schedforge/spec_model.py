"""The validated, immutable model of a study spec (``version = 1``).

These frozen dataclasses are what the rest of schedforge consumes.  They are
produced by :func:`schedforge.spec.load_spec` / :func:`schedforge.spec.parse_spec`
after schema and semantic validation, or built directly in Python.  Everything
here is picklable, so a :class:`Spec` can be shipped to worker processes and to
Dask workers.

Units: energies are E/h in GHz, times in ns, temperatures in mK.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import MISSING, Field, dataclass, field, fields, is_dataclass, replace
from typing import Any

__all__ = [
    "INITIAL_STATES",
    "BathSpec",
    "DeviceSpec",
    "InitialSpec",
    "NoiseSpec",
    "NumericsSpec",
    "ProblemFamilySpec",
    "ProblemSpec",
    "ScheduleSpec",
    "Spec",
    "SweepSpec",
    "WaveformSpec",
]


@dataclass(frozen=True)
class DeviceSpec:
    """Energy curves A(s), B(s) of H(s) = -(A/2) sum X_i + (B/2) H_problem.

    ``curves`` is ``"linear"`` (A = A0 (1 - s), B = B0 s) or the path of a CSV
    file with columns ``s, A_ghz, B_ghz`` (resolved to an absolute path).
    ``curves_sha256`` is the SHA-256 (hex) of that file's bytes, recorded when
    the spec is read: the study is what the file held then, wherever it lies
    (the path is not part of the physics), and a file changed since is refused
    when the curves are built.
    """

    curves: str = "linear"
    A0_ghz: float = 3.5
    B0_ghz: float = 2.5
    curves_sha256: str | None = None

    def curves_digest(self) -> str | None:
        """SHA-256 of the curves file (``None`` for linear curves); read if not recorded."""
        if self.curves == "linear":
            return None
        if self.curves_sha256 is not None:
            return self.curves_sha256
        from .device_table import file_sha256

        return file_sha256(self.curves)


@dataclass(frozen=True)
class ProblemSpec:
    """Ising problem H_problem = sum_i h_i Z_i + sum_(i<j) J_ij Z_i Z_j (dimensionless)."""

    qubits: int = 1
    h: tuple[float, ...] = (0.7,)
    J: tuple[tuple[int, int, float], ...] = ()


@dataclass(frozen=True)
class BathSpec:
    """Independent ohmic baths, one per qubit, coupled through one Pauli operator.

    ``spectrum = "none"`` means a closed system.
    """

    spectrum: str = "ohmic"
    coupling: str = "x"
    eta: float = 1e-4
    cutoff_ghz: float = 8.0
    temperature_mk: float = 12.0
    lamb_shift: bool = False

    @property
    def closed(self) -> bool:
        """True for a closed (unitary) system."""
        return self.spectrum == "none"


@dataclass(frozen=True)
class ScheduleSpec:
    """One schedule s = f(t / tf).

    ``tail`` is the fraction of the anneal reshaped by the ``poly`` and
    ``points`` families; ``points`` holds the (x, s) control points of the
    ``points`` family (and an optional base for ``poly``).
    """

    family: str = "beta"
    k_start: float = 0
    k_end: float = 2
    tf_ns: float = 1000.0
    tail: float = 0.2
    points: tuple[tuple[float, float], ...] | None = None


#: Initial states a spec can name (``initial.state``).
INITIAL_STATES: tuple[str, ...] = ("gibbs", "ground")


@dataclass(frozen=True)
class InitialSpec:
    """Initial state: the Gibbs state (``"gibbs"``) or ground state (``"ground"``) of H(0)."""

    state: str = "gibbs"


@dataclass(frozen=True)
class NumericsSpec:
    """Integrator choice and tolerances.

    ``integrator`` is ``"auto"`` or the name of a registered integrator.
    """

    integrator: str = "auto"
    rtol: float = 1e-10
    atol: float = 1e-14
    #: Bohr frequencies (and levels) closer than this (GHz) form one sector of the Davies
    #: generator; None: ``davies.SECULAR_RTOL`` times the Hamiltonian's scale.
    secular_tol_ghz: float | None = None


@dataclass(frozen=True)
class SweepSpec:
    """Grid of points: every combination of family x k_end x tf_ns."""

    tf_ns: tuple[float, ...] = ()
    k_end: tuple[float, ...] = ()
    family: tuple[str, ...] = ()


@dataclass(frozen=True)
class WaveformSpec:
    """What the hardware can play; ``None`` fields mean "no such limit"."""

    sample_rate_gsps: float | None = None
    dac_bits: int | None = None
    bandwidth_mhz: float | None = None
    filter: str = "gaussian"
    max_slope_per_ns: float | None = None
    breakpoints: int | None = None
    breakpoint_tolerance: float = 1e-4


@dataclass(frozen=True)
class ProblemFamilySpec:
    """Problems generated from a seed, for the ground state's fragility against size.

    ``graph`` is ``chain``, ``ring``, ``grid`` or ``complete``; ``couplings`` is
    ``sign`` (J = +-1) or ``gaussian`` (J from N(0, 1)); ``fields`` is ``none``,
    ``sign`` or ``gaussian`` (times ``field_scale``).  Each size gets ``instances``
    problems (see :func:`schedforge.problem_families.make_problem`).
    """

    graph: str = "ring"
    couplings: str = "sign"
    fields: str = "none"
    field_scale: float = 1.0
    sizes: tuple[int, ...] = (4, 8, 12, 16)
    instances: int = 3
    seed: int = 0


@dataclass(frozen=True)
class NoiseSpec:
    """Control errors on the programmed problem (the ``[noise]`` section).

    ``level`` is the standard deviation of the Gaussian error of each programmed
    h_i and J_ij (those named in ``terms``) as a fraction of the problem's largest
    |h_i|, |J_ij|; ``amplitude_level`` the relative standard deviation of one
    amplitude error of A(s) and one of B(s) per draw (dynamics only).  ``draws``
    draws come from ``seed``; ``target`` is the largest acceptable probability that
    the ground state changes, ``confidence`` the level of the Wilson intervals;
    ``levels`` (optional) the levels at which to tabulate the probability.
    Not part of :meth:`Spec.physics_dict`: it does not change a noiseless sweep.
    """

    level: float = 0.02
    terms: tuple[str, ...] = ("h", "J")
    amplitude_level: float = 0.0
    draws: int = 200
    seed: int = 0
    target: float = 0.05
    confidence: float = 0.95
    levels: tuple[float, ...] = ()
    problems: ProblemFamilySpec | None = None


@dataclass(frozen=True)
class Spec:
    """A whole study.  ``source`` is the file it came from (not part of the physics)."""

    version: int = 1
    device: DeviceSpec = field(default_factory=DeviceSpec)
    problem: ProblemSpec = field(default_factory=ProblemSpec)
    bath: BathSpec = field(default_factory=BathSpec)
    schedule: ScheduleSpec = field(default_factory=ScheduleSpec)
    initial: InitialSpec = field(default_factory=InitialSpec)
    numerics: NumericsSpec = field(default_factory=NumericsSpec)
    sweep: SweepSpec | None = None
    waveform: WaveformSpec | None = None
    noise: NoiseSpec | None = None
    source: str | None = field(default=None, compare=False)

    def physics_dict(self) -> dict[str, Any]:
        """The part of the spec that determines every simulated number.

        It excludes the schedule's own coordinates (family, k, tf), which a sweep
        varies, the sweep grid itself and the noise model (see :data:`NOT_PHYSICS`);
        it includes the schedule's shape parameters (``tail``, ``points``), the
        integrator settings and the waveform.  A curves CSV enters through the
        SHA-256 of its contents, not its path.

        A field added after stores were first written (one not in
        :data:`HASHED_FROM_THE_START`) enters only when it differs from its default:
        a spec that leaves it at its default describes the physics it described
        before the field existed, and keeps its hash, so existing stores are still
        recognised.  Fields declared ``float`` are hashed as floats (``eta = 1`` and
        ``eta = 1.0`` are the same physics).
        """
        out: dict[str, Any] = {}
        for f in fields(self):
            if f.name in NOT_PHYSICS:
                continue
            value = getattr(self, f.name)
            if f.name == "schedule":
                out["schedule_shape"] = _physics_fields(value, exclude=SCHEDULE_COORDINATES)
            elif f.name in HASHED_FROM_THE_START[Spec]:
                out[f.name] = _physics_value(value)
            elif value != _default(f):
                out[f.name] = _physics_value(value)
        if self.device.curves != "linear":  # what the file holds, not where it lies
            out["device"]["curves"] = f"sha256:{self.device.curves_digest()}"
        return out

    def physics_hash(self) -> str:
        """SHA-256 of :meth:`physics_dict` in canonical JSON (stable across runs)."""
        text = json.dumps(self.physics_dict(), sort_keys=True, default=list)
        return hashlib.sha256(text.encode()).hexdigest()

    def with_schedule(self, **changes: Any) -> Spec:
        """A copy with some schedule fields changed (``family``, ``k_end``, ``tf_ns``...)."""
        return replace(self, schedule=replace(self.schedule, **changes))


#: Spec fields that are not physics: the sweep grid, the noise model (noise ensembles
#: add it to their own hash) and the file the spec came from.
NOT_PHYSICS: frozenset[str] = frozenset({"sweep", "noise", "source"})
#: The schedule's coordinates, which a sweep varies (not part of the physics hash).
SCHEDULE_COORDINATES: frozenset[str] = frozenset({"family", "k_start", "k_end", "tf_ns"})
#: Fields hashed whatever their value, as they were when stores were first written.
#: Any other field enters :meth:`Spec.physics_dict` only when it differs from its default.
#: Do not add to these sets: a new field is hashed by the rule for later fields.
HASHED_FROM_THE_START: dict[type, frozenset[str]] = {
    Spec: frozenset(
        {"version", "device", "problem", "bath", "schedule", "initial", "numerics", "waveform"}
    ),
    DeviceSpec: frozenset({"curves", "A0_ghz", "B0_ghz"}),
    ProblemSpec: frozenset({"qubits", "h", "J"}),
    BathSpec: frozenset(
        {"spectrum", "coupling", "eta", "cutoff_ghz", "temperature_mk", "lamb_shift"}
    ),
    ScheduleSpec: frozenset({"tail", "points"}),
    InitialSpec: frozenset({"state"}),
    NumericsSpec: frozenset({"integrator", "rtol", "atol"}),
    WaveformSpec: frozenset(
        {
            "sample_rate_gsps",
            "dac_bits",
            "bandwidth_mhz",
            "filter",
            "max_slope_per_ns",
            "breakpoints",
            "breakpoint_tolerance",
        }
    ),
}
#: Fields that never enter the hash: the curves file's digest enters through ``curves``.
_NEVER_HASHED: frozenset[str] = frozenset({"curves_sha256"})
_FLOAT_TYPES = ("float", "float | None")


def _default(f: Field[Any]) -> Any:
    if f.default is not MISSING:
        return f.default
    if f.default_factory is not MISSING:
        return f.default_factory()
    return MISSING  # a required field: always differs


def _hashed_from_the_start(section: Any) -> frozenset[str]:
    for cls in type(section).__mro__:  # a subclass that adds fields keeps its base's set
        if cls in HASHED_FROM_THE_START:
            return HASHED_FROM_THE_START[cls]
    return frozenset()


def _physics_fields(section: Any, exclude: frozenset[str] = frozenset()) -> dict[str, Any]:
    """A section's fields for the physics hash (see :meth:`Spec.physics_dict`)."""
    always = _hashed_from_the_start(section)
    out: dict[str, Any] = {}
    for f in fields(section):
        if f.name in exclude or f.name in _NEVER_HASHED:
            continue
        value = getattr(section, f.name)
        if f.name in always or value != _default(f):
            if f.type in _FLOAT_TYPES and value is not None:
                value = float(value)
            out[f.name] = _physics_value(value)
    return out


def _physics_value(value: Any) -> Any:
    if is_dataclass(value) and not isinstance(value, type):
        return _physics_fields(value)
    return value
