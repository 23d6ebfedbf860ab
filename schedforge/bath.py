"""Bath spectral densities and system-bath couplings.

A spectral density is any callable ``gamma(omega) -> ndarray`` taking and
returning angular frequencies in rad/ns (vectorised).  It is the Fourier
transform of the bath correlation function, ``gamma(omega) >= 0``, and for a
bath in thermal equilibrium it satisfies detailed balance (the KMS condition)

    gamma(-omega) = exp(-beta omega) gamma(omega).

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
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import integrate

from .errors import InputError
from .units import GHZ_TO_RAD_PER_NS, beta_from_mk

__all__ = [
    "Bath",
    "OhmicSpectralDensity",
    "SpectralDensity",
    "lamb_shift_function",
    "make_bath",
    "steady_state_advice",
]

#: A spectral density: rad/ns in, rad/ns out, vectorised.
SpectralDensity = Callable[[NDArray[np.float64]], NDArray[np.float64]]


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
            raise InputError("bath.eta", f"must be a finite number >= 0, got {eta!r}")
        if not (np.isfinite(cutoff_rad_per_ns) and cutoff_rad_per_ns > 0):
            raise InputError(
                "bath.cutoff_ghz", f"must be a finite number > 0, got {cutoff_rad_per_ns!r}"
            )
        if not (beta_ns > 0) or np.isnan(beta_ns):
            raise InputError("bath.temperature_mk", f"must give beta > 0, got beta = {beta_ns!r}")
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
    gamma: SpectralDensity, *, scale: float, epsabs: float = 1e-14, epsrel: float = 1e-11
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
    spectral_density : callable
        ``gamma(omega)`` in rad/ns, shared by all coupling operators.
    operators : tuple of ndarray
        Hermitian coupling operators A_alpha (one per independent bath).
    lamb_shift : bool
        Include the Lamb-shift Hamiltonian (default False; see the module notes).
    beta : float or None
        Inverse temperature (ns/rad) of the bath; defaults to
        ``spectral_density.beta``.  The Davies generator's steady state is the
        Gibbs state at this beta, which requires ``gamma`` to satisfy detailed
        balance at this beta (checked on construction).
    """

    spectral_density: SpectralDensity
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
        beta = self.beta if self.beta is not None else getattr(self.spectral_density, "beta", None)
        if beta is None or not (beta > 0):
            raise InputError(
                "bath.temperature_mk",
                "must be given: the bath needs an inverse temperature beta > 0 "
                "(pass beta= or use a spectral density with a .beta attribute)",
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
            scale = getattr(self.spectral_density, "cutoff", 10.0)
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


_SPECTRA = ("ohmic", "none")
_COUPLINGS = ("x", "y", "z")


def make_bath(spec: Any, n_qubits: int) -> Bath | None:
    """Build the bath of a :class:`~schedforge.spec_model.BathSpec`.

    Returns ``None`` for a closed system (``spectrum = "none"``).  Otherwise each
    qubit couples to its own ohmic bath through the Pauli operator named by
    ``coupling``.
    """
    from .hamiltonian import pauli_operator  # local: hamiltonian imports nothing from here

    if spec.spectrum not in _SPECTRA:
        raise InputError(
            "bath.spectrum", f"must be one of {', '.join(_SPECTRA)}; got {spec.spectrum!r}"
        )
    if spec.spectrum == "none":
        return None
    coupling = str(spec.coupling).lower()
    if coupling not in _COUPLINGS:
        raise InputError("bath.coupling", f"must be one of x, y, z; got {spec.coupling!r}")
    if not (np.isfinite(spec.temperature_mk) and spec.temperature_mk > 0):
        raise InputError(
            "bath.temperature_mk", f"must be a finite number > 0, got {spec.temperature_mk!r}"
        )
    if not (np.isfinite(spec.cutoff_ghz) and spec.cutoff_ghz > 0):
        raise InputError("bath.cutoff_ghz", f"must be a finite number > 0, got {spec.cutoff_ghz!r}")
    density = OhmicSpectralDensity(
        spec.eta, GHZ_TO_RAD_PER_NS * spec.cutoff_ghz, beta_from_mk(spec.temperature_mk)
    )
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
