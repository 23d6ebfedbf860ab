"""Ohmic spectral density, detailed balance, the Lamb-shift integral, make_bath."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special

from schedforge.bath import Bath, OhmicSpectralDensity, lamb_shift_function, make_bath
from schedforge.errors import InputError
from schedforge.hamiltonian import pauli_operator
from schedforge.spec_model import BathSpec
from schedforge.units import beta_from_mk

ETA, WC, BETA = 1e-4, 2 * np.pi * 8.0, beta_from_mk(12.0)


def test_ohmic_matches_the_defining_formula() -> None:
    # gamma(w) = 2 pi eta w exp(-|w|/wc) / (1 - exp(-beta w))
    # (Albash, Boixo, Lidar & Zanardi, New J. Phys. 14, 123016, 2012)
    g = OhmicSpectralDensity(ETA, WC, BETA)
    w = np.array([-30.0, -5.0, -0.3, 0.01, 0.3, 5.0, 30.0])
    ref = 2 * np.pi * ETA * w * np.exp(-np.abs(w) / WC) / (1 - np.exp(-BETA * w))
    np.testing.assert_allclose(g(w), ref, rtol=1e-13)


def test_zero_frequency_limit_is_exact() -> None:
    # lim_{w->0} gamma = 2 pi eta / beta; no 0/0 nan at w = 0
    g = OhmicSpectralDensity(ETA, WC, BETA)
    assert g(np.array([0.0]))[0] == pytest.approx(2 * np.pi * ETA / BETA, rel=1e-15)
    tiny = np.array([-1e-9, 1e-9])
    np.testing.assert_allclose(g(tiny), 2 * np.pi * ETA / BETA, rtol=1e-8)


def test_detailed_balance_and_stability_at_large_beta_omega() -> None:
    g = OhmicSpectralDensity(ETA, WC, BETA)
    w = np.array([0.5, 5.0, 50.0, 500.0, 2000.0])  # beta w up to ~1300: e^(beta w) overflows
    with np.errstate(over="raise", invalid="raise", divide="raise", under="ignore"):
        pos, neg = g(w), g(-w)
    assert np.all(np.isfinite(pos)) and np.all(np.isfinite(neg)) and np.all(neg >= 0)
    # KMS: gamma(-w) = exp(-beta w) gamma(w), compared in logs (values underflow at the end)
    ok = neg > 0
    np.testing.assert_allclose(np.log(neg[ok]), np.log(pos[ok]) - BETA * w[ok], rtol=1e-12)


def test_zero_temperature_limit() -> None:
    g = OhmicSpectralDensity(ETA, WC, math.inf)
    w = np.array([-3.0, 0.0, 3.0])
    np.testing.assert_allclose(
        g(w), [0.0, 0.0, 2 * np.pi * ETA * 3.0 * np.exp(-3.0 / WC)], rtol=1e-15
    )


def test_lamb_shift_matches_exponential_integral_at_zero_temperature() -> None:
    # At T = 0, S(w) = (1/2pi) P int gamma(w')/(w - w') dw' = eta [-wc + w e^(-w/wc) Ei(w/wc)],
    # from P int_0^inf e^(-x)/(x - a) dx = -e^(-a) Ei(a) (Abramowitz & Stegun 1964, eq. 5.1.2);
    # values from scipy.special.expi.
    eta, wc = 0.01, 5.0
    shift = lamb_shift_function(OhmicSpectralDensity(eta, wc, math.inf), scale=wc)
    w = np.array([-7.0, -1.0, 0.5, 2.0, 11.0])
    ref = eta * (-wc + w * np.exp(-w / wc) * special.expi(w / wc))
    np.testing.assert_allclose(shift(w), ref, rtol=1e-7, atol=1e-12)


def test_bath_checks_detailed_balance_and_hermiticity() -> None:
    x = pauli_operator("x", 0, 1)
    with pytest.raises(InputError, match="detailed balance"):
        Bath(lambda w: np.abs(w) + 1.0, (x,), beta=1.0)
    with pytest.raises(InputError, match="Hermitian"):
        Bath(OhmicSpectralDensity(ETA, WC, BETA), (np.array([[0, 1], [0, 0]]),))
    bath = Bath(OhmicSpectralDensity(ETA, WC, BETA), (x,))
    assert bath.beta == BETA and bath.dim == 2


def test_make_bath_from_spec() -> None:
    assert make_bath(BathSpec(spectrum="none"), 2) is None
    bath = make_bath(BathSpec(coupling="y", eta=2e-4, cutoff_ghz=4.0, temperature_mk=20.0), 2)
    assert bath is not None and len(bath.operators) == 2
    np.testing.assert_array_equal(bath.operators[1], pauli_operator("y", 1, 2))
    g = bath.spectral_density
    assert (
        g.eta == 2e-4
        and g.cutoff == pytest.approx(2 * np.pi * 4.0)
        and g.beta == beta_from_mk(20.0)
    )
    with pytest.raises(InputError) as err:
        make_bath(BathSpec(coupling="w"), 1)
    assert err.value.field == "bath.coupling"
    with pytest.raises(InputError) as err:
        make_bath(BathSpec(spectrum="lorentz"), 1)
    assert err.value.field == "bath.spectrum"


class _CubicDensity:
    """A super-ohmic density, gamma ~ omega^3 e^(-|omega|/omega_c) (an invented kind)."""

    def __init__(self, eta: float, cutoff: float, beta: float) -> None:
        self.eta, self.cutoff, self.beta = eta, cutoff, beta

    def __call__(self, omega: np.ndarray) -> np.ndarray:
        w = np.asarray(omega, dtype=float)
        # w^3 / (1 - e^(-beta w)) = w^2 * [w / (1 - e^(-beta w))]; detailed balance by design
        g = OhmicSpectralDensity(self.eta, self.cutoff, self.beta)(w)
        return g * (w / self.cutoff) ** 2


def test_spectral_density_protocol_and_a_registered_kind() -> None:
    from schedforge.bath import SPECTRA, SpectralDensity, SpectrumKind, register_spectrum
    from schedforge.spec import parse_spec
    from schedforge.units import GHZ_TO_RAD_PER_NS

    assert isinstance(OhmicSpectralDensity(ETA, WC, BETA), SpectralDensity)
    assert not isinstance(lambda w: w, SpectralDensity)  # a bare function needs beta=
    with pytest.raises(InputError, match="beta"):
        Bath(lambda w: np.exp(-np.abs(w)), (pauli_operator("x", 0, 1),))

    def build(spec: BathSpec) -> _CubicDensity:
        return _CubicDensity(
            spec.eta, GHZ_TO_RAD_PER_NS * spec.cutoff_ghz, beta_from_mk(spec.temperature_mk)
        )

    register_spectrum(SpectrumKind("test-cubic", "invented for a test", build))
    try:
        with pytest.raises(ValueError, match="already registered"):
            register_spectrum(SpectrumKind("test-cubic", "again", build))
        spec = parse_spec({"version": 1, "bath": {"spectrum": "test-cubic"}})
        bath = make_bath(spec.bath, 1)
        assert bath is not None and isinstance(bath.spectral_density, _CubicDensity)
        assert bath.beta == beta_from_mk(12.0)  # read off the density (the protocol)
    finally:
        del SPECTRA["test-cubic"]
    with pytest.raises(InputError) as err:
        parse_spec({"version": 1, "bath": {"spectrum": "test-cubic"}})
    assert err.value.field == "bath.spectrum"


@pytest.mark.parametrize(
    ("changes", "field"),
    [
        ({"coupling": "w"}, "bath.coupling"),
        ({"spectrum": "lorentz"}, "bath.spectrum"),
        ({"eta": -1e-4}, "bath.eta"),
        ({"cutoff_ghz": 0.0}, "bath.cutoff_ghz"),
        ({"temperature_mk": float("nan")}, "bath.temperature_mk"),
        ({"temperature_mk": -5.0}, "bath.temperature_mk"),
        ({"spectrum": "none", "temperature_mk": 0.0}, "bath.temperature_mk"),
        ({"lamb_shift": 1}, "bath.lamb_shift"),
    ],
)
def test_bath_rules_are_the_same_from_toml_and_from_python(
    changes: dict[str, object], field: str
) -> None:
    from schedforge.spec import parse_spec

    with pytest.raises(InputError) as from_toml:
        parse_spec({"version": 1, "bath": changes})
    with pytest.raises(InputError) as from_python:
        make_bath(BathSpec(**changes), 1)  # type: ignore[arg-type]
    assert from_toml.value.field == from_python.value.field == field
    assert str(from_toml.value) == str(from_python.value)
