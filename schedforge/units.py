"""Units of the trade and their conversion to internal units.

Users speak in E/h in GHz, time in ns and temperature in mK.  Internally
hbar = 1, energies are angular frequencies in rad/ns and the inverse
temperature ``beta`` is in ns/rad, so that ``beta * omega`` is dimensionless.
"""

from __future__ import annotations

import math

__all__ = [
    "GHZ_TO_RAD_PER_NS",
    "HBAR_OVER_KB_K_NS",
    "beta_from_mk",
    "ghz_to_rad_per_ns",
    "rad_per_ns_to_ghz",
]

#: 1 GHz of E/h is 2 pi rad/ns of angular frequency.
GHZ_TO_RAD_PER_NS: float = 2.0 * math.pi

#: hbar / k_B in kelvin nanoseconds (CODATA 2018 exact SI constants).
HBAR_OVER_KB_K_NS: float = 1.054571817e-34 / 1.380649e-23 * 1e9


def ghz_to_rad_per_ns(energy_ghz: float) -> float:
    """Convert an energy E/h in GHz to an angular frequency in rad/ns."""
    return GHZ_TO_RAD_PER_NS * energy_ghz


def rad_per_ns_to_ghz(omega: float) -> float:
    """Convert an angular frequency in rad/ns to E/h in GHz."""
    return omega / GHZ_TO_RAD_PER_NS


def beta_from_mk(temperature_mk: float) -> float:
    """Inverse temperature hbar/(k_B T) in ns/rad for a temperature in mK.

    Examples
    --------
    >>> round(beta_from_mk(12.0), 4)
    0.6365
    """
    return HBAR_OVER_KB_K_NS / (temperature_mk * 1e-3)
