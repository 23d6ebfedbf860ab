"""Bath spectral densities and system-bath couplings.

A spectral density (the :class:`SpectralDensity` protocol) is a callable
``gamma(omega) -> ndarray`` taking and returning angular frequencies in rad/ns
(vectorised), with two attributes: ``beta``, the inverse temperature (ns/rad) of
its bath, and ``cutoff``, the frequency scale (rad/ns) beyond which it decays.  It
is the Fourier transform of the bath correlation function, ``gamma(omega) >= 0``,
and for a bath in thermal equilibrium it satisfies detailed balance (the KMS
condition)

    gamma(-omega) = exp(-beta omega) gamma(omega).

The kinds a spec can name (``bath.spectrum``) are registered in :data:`SPECTRA`;
spec validation and the spec template list them from there, so a new spectral
density is its class plus one :func:`register_spectrum` call.  The Pauli operators
that couple each qubit to its bath (``bath.coupling``) are :data:`COUPLINGS`.

The ohmic density with exponential cutoff used by default is

    gamma(omega) = 2 pi eta omega exp(-|omega| / omega_c) / (1 - exp(-beta omega)),

with the omega -> 0 limit 2 pi eta / beta (Albash, Boixo, Lidar and Zanardi,
New J. Phys. 14, 123016 (2012)).  Each qubit couples to its own, independent
bath through one Pauli operator (X, Y or Z).

Lamb shift (off by default).  When enabled, the Davies generator includes the
Hamiltonian correction ``H_LS = sum_omega S(omega) L_omega^+ L_omega`` with the
principal-value integral (Breuer and Petruccione, The Theory of Open Quantum
Systems, 2002, section 3.3)

    S(omega) = (1 / 2 pi) P int gamma(omega') / (omega - omega') d omega'.

It is evaluated by adaptive quadrature (QUADPACK's Cauchy-weight rule) for each
distinct Bohr frequency, which is accurate but slow: keep it for small systems.
The Lamb shift commutes with H in the secular approximation, so it only turns
the phases of coherences; QuTiP's Bloch-Redfield solver omits it.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import Any, Protocol, runtime_checkable

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .checks import boolean, choice, number
from .errors import InputError
from .limits import MAX_ENERGY_GHZ, MIN_CUTOFF_GHZ
from .spec_model import BathSpec
from .units import GHZ_TO_RAD_PER_NS, beta_from_mk

__all__ = [
    "COUPLINGS",
    "LAMB_SHIFT_DEFAULT_SCALE",
    "SPECTRA",
    "Bath",
    "DensityFunction",
    "OhmicSpectralDensity",
    "SpectralDensity",
    "SpectrumKind",
    "check_bath",
    "lamb_shift_function",
    "make_bath",
    "register_spectrum",
    "steady_state_advice",
]


@runtime_checkable
class SpectralDensity(Protocol):
    """What a bath's spectral density provides (see the module notes).

    Attributes
    ----------
    beta : float
        Inverse temperature (ns/rad) at which ``gamma`` satisfies detailed
        balance, > 0; ``math.inf`` for zero temperature.  It is the bath's
        temperature: :class:`Bath` takes it from here unless given ``beta=``.
    cutoff : float
        Frequency scale (rad/ns) beyond which ``gamma`` decays; it sets the
        integration window of the Lamb shift.
    """

    @property
    def beta(self) -> float: ...

    @property
    def cutoff(self) -> float: ...

    def __call__(self, omega: ArrayLike) -> NDArray[np.float64]:
        """gamma(omega) >= 0 (rad/ns), vectorised over ``omega`` (rad/ns)."""
        ...


#: A bare spectral-density function (no ``beta``, no ``cutoff``): :class:`Bath` then
#: needs ``beta=``, and the Lamb shift integrates over :data:`LAMB_SHIFT_DEFAULT_SCALE`.
DensityFunction = Callable[[NDArray[np.float64]], NDArray[np.float64]]
#: Lamb-shift integration scale (rad/ns) for a density function without a ``cutoff``.
LAMB_SHIFT_DEFAULT_SCALE = 10.0


def _bose_factor_times_x(x: NDArray[np.float64]) -> NDArray[np.float64]:
    """x / (1 - exp(-x)), stable for all x (exactly 1 at x = 0).

    For y = |x| > 0 it is y / (1 - e^-y) (with ``expm1``), and for negative x the
    detailed-balance identity g(-y) = g(y) e^-y avoids the overflow of e^-x.
    """
    ax = np.abs(x)
    zero = ax == 0.0
    with np.errstate(invalid="ignore", divide="ignore"):
        pos = ax / -np.expm1(-ax)
    pos[zero] = 1.0
    return np.where(x >= 0.0, pos, pos * np.exp(-ax))


class OhmicSpectralDensity:
    """Ohmic spectral density with exponential cutoff.

    Parameters
    ----------
    eta : float
        Dimensionless coupling strength (eta g^2), >= 0.
    cutoff_rad_per_ns : float
        Cutoff angular frequency omega_c > 0 (rad/ns).
    beta_ns : float
        Inverse temperature hbar / (k_B T) in ns/rad, > 0; ``math.inf`` means
        zero temperature (then gamma(omega) = 2 pi eta omega e^(-omega/omega_c)
        for omega > 0 and 0 otherwise).

    Notes
    -----
    gamma(omega) = 2 pi eta omega exp(-|omega|/omega_c) / (1 - exp(-beta omega));
    the exact limit at omega = 0 is 2 pi eta / beta (no 0/0), and the
    Bose factor is evaluated with ``expm1`` and the detailed-balance identity,
    so that no intermediate overflows for large |beta omega|.
    """

    def __init__(self, eta: float, cutoff_rad_per_ns: float, beta_ns: float) -> None:
        if not (np.isfinite(eta) and eta >= 0):
            raise ValueError(f"eta must be a finite number >= 0, got {eta!r}")
        if not (np.isfinite(cutoff_rad_per_ns) and cutoff_rad_per_ns > 0):
            raise ValueError(
                f"cutoff_rad_per_ns must be a finite number > 0, got {cutoff_rad_per_ns!r}"
            )
        self.eta = float(eta)
        self.cutoff = float(cutoff_rad_per_ns)
        self.beta = float(beta_ns)

    def __call__(self, omega: ArrayLike) -> NDArray[np.float64]:
        w = np.asarray(omega, dtype=float)
        decay = np.exp(-np.abs(w) / self.cutoff)
        if math.isinf(self.beta):
            return 2.0 * math.pi * self.eta * np.where(w > 0.0, w, 0.0) * decay
        bose = _bose_factor_times_x(np.atleast_1d(self.beta * w)).reshape(w.shape)
        return (2.0 * math.pi * self.eta / self.beta) * bose * decay

    def __repr__(self) -> str:
        return (
            f"OhmicSpectralDensity(eta={self.eta!r}, cutoff_rad_per_ns={self.cutoff!r}, "
            f"beta_ns={self.beta!r})"
        )


def lamb_shift_function(
    gamma: SpectralDensity | DensityFunction,
    *,
    scale: float,
    epsabs: float = 1e-14,
    epsrel: float = 1e-11,
) -> Callable[[NDArray[np.float64]], NDArray[np.float64]]:
    """S(omega) = (1/2 pi) P int gamma(w) / (omega - w) dw, by adaptive quadrature.

    Parameters
    ----------
    gamma : callable
        The spectral density (must decay at large |omega|).
    scale : float
        A frequency scale of gamma (e.g. its cutoff); sets the integration window.
    epsabs, epsrel : float
        Quadrature tolerances.

    Returns
    -------
    callable
        Vectorised S(omega) (each distinct value is integrated once).
    """

    from scipy import integrate  # here: SciPy's quadrature is slow to import

    def f(w: float) -> float:
        return float(gamma(np.array([w]))[0])

    def one(omega: float) -> float:
        half = max(abs(omega), scale)
        lo, hi = omega - half, omega + half
        # principal value over the window around the pole: int f(w)/(w - omega)
        pv, _ = integrate.quad(
            f, lo, hi, weight="cauchy", wvar=omega, epsabs=epsabs, epsrel=epsrel, limit=400
        )
        tail_hi, _ = integrate.quad(
            lambda w: f(w) / (w - omega), hi, np.inf, epsabs=epsabs, epsrel=epsrel, limit=400
        )
        tail_lo, _ = integrate.quad(
            lambda w: f(w) / (w - omega), -np.inf, lo, epsabs=epsabs, epsrel=epsrel, limit=400
        )
        return -(pv + tail_hi + tail_lo) / (2.0 * math.pi)

    def shift(omega: ArrayLike) -> NDArray[np.float64]:
        w = np.asarray(omega, dtype=float)
        uniq, inv = np.unique(w.ravel(), return_inverse=True)
        vals = np.array([one(float(u)) for u in uniq])
        return vals[inv].reshape(w.shape)

    return shift


@dataclass(frozen=True, eq=False)
class Bath:
    """Independent baths coupled to the system through Hermitian operators.

    Parameters
    ----------
    spectral_density : SpectralDensity or callable
        ``gamma(omega)`` in rad/ns, shared by all coupling operators: a
        :class:`SpectralDensity`, or a bare function with ``beta=`` given.
    operators : tuple of ndarray
        Hermitian coupling operators A_alpha (one per independent bath).
    lamb_shift : bool
        Include the Lamb-shift Hamiltonian (default False; see the module notes).
    beta : float or None
        Inverse temperature (ns/rad) of the bath; defaults to the spectral
        density's ``beta``.  The Davies generator's steady state is the
        Gibbs state at this beta, which requires ``gamma`` to satisfy detailed
        balance at this beta (checked on construction).
    """

    spectral_density: SpectralDensity | DensityFunction
    operators: tuple[NDArray[Any], ...]
    lamb_shift: bool = False
    beta: float | None = None

    def __post_init__(self) -> None:
        ops = tuple(np.asarray(a) for a in self.operators)
        if not ops:
            raise InputError("bath.coupling", "needs at least one coupling operator")
        d = ops[0].shape[0]
        for k, a in enumerate(ops):
            if a.shape != (d, d):
                raise InputError(
                    f"bath.operators[{k}]", f"must be a ({d}, {d}) matrix, got {a.shape}"
                )
            if not np.allclose(a, a.conj().T, atol=1e-12):
                raise InputError(f"bath.operators[{k}]", "must be Hermitian")
        object.__setattr__(self, "operators", ops)
        beta = self.beta
        if beta is None and isinstance(self.spectral_density, SpectralDensity):
            beta = self.spectral_density.beta
        if beta is None or not (beta > 0):
            raise InputError(
                "bath.temperature_mk",
                "must be given: the bath needs an inverse temperature beta > 0 "
                f"(pass beta= or use a SpectralDensity, which has a beta), got {beta!r}",
            )
        object.__setattr__(self, "beta", float(beta))
        self._check_detailed_balance()

    def _check_detailed_balance(self) -> None:
        """gamma(-w) = exp(-beta w) gamma(w) on a few test frequencies (relative 1e-8)."""
        if math.isinf(self.beta):
            return
        w = np.array([0.1, 1.0, 3.0, 10.0]) / self.beta
        g_pos = np.asarray(self.spectral_density(w), dtype=float)
        g_neg = np.asarray(self.spectral_density(-w), dtype=float)
        if np.any(g_pos < 0) or np.any(g_neg < 0) or not np.all(np.isfinite(g_pos)):
            raise InputError("bath.spectrum", "spectral density must be finite and >= 0")
        expected = np.exp(-self.beta * w) * g_pos
        if not np.allclose(g_neg, expected, rtol=1e-8, atol=1e-300):
            raise InputError(
                "bath.spectrum",
                "spectral density must satisfy detailed balance gamma(-w) = exp(-beta w) gamma(w)",
            )

    @property
    def operator_stack(self) -> NDArray[Any]:
        """The coupling operators as one ``(n, d, d)`` array (cached)."""
        stack = self.__dict__.get("_stack")
        if stack is None:
            stack = np.stack(self.operators)
            object.__setattr__(self, "_stack", stack)
        return stack

    @property
    def dim(self) -> int:
        """Hilbert-space dimension of the coupling operators."""
        return int(self.operators[0].shape[0])

    def gamma(self, omega: ArrayLike) -> NDArray[np.float64]:
        """The spectral density at ``omega`` (rad/ns)."""
        return np.asarray(self.spectral_density(np.asarray(omega, dtype=float)), dtype=float)

    def lamb_shift_at(self, omega: ArrayLike) -> NDArray[np.float64]:
        """The Lamb-shift function S(omega) (rad/ns); see :func:`lamb_shift_function`."""
        fn = self.__dict__.get("_lamb_fn")
        if fn is None:
            density = self.spectral_density
            if isinstance(density, SpectralDensity):
                scale = density.cutoff
            else:
                scale = LAMB_SHIFT_DEFAULT_SCALE
            fn = lamb_shift_function(self.spectral_density, scale=scale)
            object.__setattr__(self, "_lamb_fn", fn)
        return fn(omega)

    def __getstate__(self) -> dict[str, Any]:
        state = dict(self.__dict__)
        state.pop("_lamb_fn", None)
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        for k, v in state.items():
            object.__setattr__(self, k, v)


# -- the kinds a spec names -------------------------------------------------------------
@dataclass(frozen=True)
class SpectrumKind:
    """One value of ``bath.spectrum``.

    Attributes
    ----------
    name : str
        The value in the spec.
    summary : str
        A few words for the spec template and for messages.
    build : callable or None
        ``build(bath_spec) -> SpectralDensity`` from a validated
        :class:`~schedforge.spec_model.BathSpec`; ``None`` for a closed system.
    """

    name: str
    summary: str
    build: Callable[[BathSpec], SpectralDensity] | None


#: The spectral densities a spec can name, by ``bath.spectrum`` (see :func:`register_spectrum`).
SPECTRA: dict[str, SpectrumKind] = {}
#: Pauli operators that can couple each qubit to its bath (``bath.coupling``).
COUPLINGS: tuple[str, ...] = ("x", "y", "z")


def register_spectrum(kind: SpectrumKind) -> SpectrumKind:
    """Make a spectral density available to specs as ``bath.spectrum = kind.name``."""
    if kind.name in SPECTRA:
        raise ValueError(f"spectrum {kind.name!r} is already registered")
    SPECTRA[kind.name] = kind
    return kind


def check_bath(spec: BathSpec) -> BathSpec:
    """The ``[bath]`` section's rules; the one validator of the TOML and Python paths.

    ``spectrum`` one of :data:`SPECTRA`, ``coupling`` one of :data:`COUPLINGS`,
    ``eta >= 0``, ``cutoff_ghz`` from :data:`~schedforge.limits.MIN_CUTOFF_GHZ` to
    :data:`~schedforge.limits.MAX_ENERGY_GHZ`, ``temperature_mk > 0`` (also for a
    closed system: it sets the initial Gibbs state), ``lamb_shift`` a boolean.  The
    lowest temperature a given spec affords depends on its energies and is checked
    with them (:func:`schedforge.limits.check_energy_scales`).

    Returns
    -------
    BathSpec
        ``spec`` with numbers as ``float``.

    Raises
    ------
    InputError
        Naming the field and the rule.
    """
    return replace(
        spec,
        spectrum=choice(spec.spectrum, "bath.spectrum", tuple(SPECTRA)),
        coupling=choice(spec.coupling, "bath.coupling", COUPLINGS),
        eta=number(spec.eta, "bath.eta", ge=0),
        cutoff_ghz=number(spec.cutoff_ghz, "bath.cutoff_ghz", ge=MIN_CUTOFF_GHZ, le=MAX_ENERGY_GHZ),
        temperature_mk=number(spec.temperature_mk, "bath.temperature_mk", gt=0),
        lamb_shift=boolean(spec.lamb_shift, "bath.lamb_shift"),
    )


def _ohmic(spec: BathSpec) -> OhmicSpectralDensity:
    return OhmicSpectralDensity(
        spec.eta, GHZ_TO_RAD_PER_NS * spec.cutoff_ghz, beta_from_mk(spec.temperature_mk)
    )


register_spectrum(
    SpectrumKind("ohmic", "ohmic with an exponential cutoff (eta, cutoff_ghz)", _ohmic)
)
register_spectrum(SpectrumKind("none", "no bath: a closed system", None))


def make_bath(spec: BathSpec, n_qubits: int) -> Bath | None:
    """Build the bath of a :class:`~schedforge.spec_model.BathSpec`.

    Returns ``None`` for a closed system (``spectrum = "none"``).  Otherwise each
    qubit couples to its own bath of the registered spectral density through the
    Pauli operator named by ``coupling``.  The spec's values are validated once,
    by :func:`check_bath` (which the spec reader also uses).
    """
    from .hamiltonian import pauli_operator  # local: hamiltonian imports nothing from here

    check_bath(spec)
    kind = SPECTRA[spec.spectrum]
    if kind.build is None:
        return None
    density = kind.build(spec)
    coupling = spec.coupling
    ops = tuple(pauli_operator(coupling, q, n_qubits) for q in range(n_qubits))
    return Bath(density, ops, lamb_shift=bool(spec.lamb_shift))


def steady_state_advice(h_final: NDArray[Any], operators: Sequence[NDArray[Any]]) -> str:
    """What to change when the final generator has several steady states.

    Parameters
    ----------
    h_final : ndarray
        H(1), a ``(2**n, 2**n)`` matrix.
    operators : sequence of ndarray
        The coupling operators, one per qubit (qubit q is ``operators[q]``).

    Returns
    -------
    str
        One sentence: the qubits H(1) does not act on (no field or coupling left
        at s = 1; no bath coupling can relax them), else the coupling operators
        that commute with H(1), else a generic hint.
    """
    from .hamiltonian import pauli_operator

    n = len(operators)
    scale = max(1.0, float(np.max(np.abs(h_final))))

    def commutes(op: NDArray[Any]) -> bool:
        return bool(np.allclose(h_final @ op - op @ h_final, 0.0, atol=1e-12 * scale))

    idle = [q for q in range(n) if all(commutes(pauli_operator(k, q, n)) for k in ("x", "y", "z"))]
    if idle:
        which = ", ".join(str(q) for q in idle)
        return (
            f"H(1) does not act on qubit(s) {which} (no field h_i or coupling J left on them at "
            "s = 1), so no bath coupling can relax them: give each a field h_i or a coupling "
            "J_ij, or use device curves with A(1) > 0"
        )
    if all(commutes(op) for op in operators):
        return (
            'the coupling operators commute with H(1) (e.g. coupling = "z" when A(1) = 0): '
            "use a coupling that does not (x or y), or device curves with A(1) > 0"
        )
    return (
        "the bath does not connect some degenerate levels of H(1): add fields h_i that break "
        "the degeneracy, or use device curves with A(1) > 0"
    )
