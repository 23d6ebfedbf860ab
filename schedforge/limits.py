"""What a study can afford: numeric ranges, memory and cost, checked before a run.

Each check raises :class:`~schedforge.errors.InputError` naming the field that is
out of range and the figure behind the limit, instead of letting a run overflow,
return numbers without meaning, run out of memory or run for days.

Energy scales (:func:`check_energy_scales`, called when a spec is read)
    W(s) = n A(s) + B(s) (sum |h_i| + sum |J_ij|) bounds the spread of the
    energies of H(s) (in GHz; n qubits), because -(A/2) sum X_i spans n A and
    (B/2) H_problem spans at most B (sum |h| + sum |J|).

    * Temperature: the Davies generator is made symmetric with the factors
      exp(+-beta (E_a - E_b) / 2) (detailed balance), which overflow double
      precision (exp(709.78)) once beta W > 1419.6.  Measured on the driven
      qubit: the trace distance changes smoothly with beta W up to 1400 and the
      run returned status ok with overflow warnings at 1500.  Hence
      ``bath.temperature_mk`` must give beta W <= :data:`BETA_SPREAD_MAX`.
    * Cutoff: every relaxation rate carries exp(-omega / omega_c); past
      omega / omega_c = 745 it is exactly 0 in double precision (below
      :data:`CUTOFF_RATIO_MAX` = 700 it is at least 1e-304), and with all rates 0 the
      final state is not unique.  The final spread W(1) must stay below 700
      cutoffs.
    * H(1) = 0 (all-zero problem with A(1) = 0) has no final state to aim at.

Memory and cost (:func:`check_memory`, :func:`check_run_cost`, before a simulation)
    The memory of a system grows as d^4 past 7 qubits (measured: 5.3 GB at 8);
    a run that would not fit in the memory available is refused with the figure.
    The general integrator follows every oscillation of the state, so its
    number of steps grows with tf times the largest Bohr frequency; a realized
    waveform is simulated sample by sample.  Both are estimated before the run
    and refused beyond :data:`MAX_GENERAL_CYCLES` periods and
    :data:`MAX_HELD_SAMPLES` samples, with the figure.
"""

from __future__ import annotations

import os
from typing import Any

from .errors import InputError
from .units import GHZ_TO_RAD_PER_NS, HBAR_OVER_KB_K_NS

__all__ = [
    "BETA_SPREAD_MAX",
    "CUTOFF_RATIO_MAX",
    "MAX_COEFFICIENT",
    "MAX_ENERGY_GHZ",
    "MAX_GENERAL_CYCLES",
    "MAX_HELD_SAMPLES",
    "MAX_QUBITS",
    "MIN_CUTOFF_GHZ",
    "available_memory_bytes",
    "check_energy_scales",
    "check_memory",
    "check_run_cost",
    "energy_spread_ghz",
    "memory_estimate_bytes",
]

#: Largest number of qubits a spec may declare: 8 qubits need about 5.3 GB to set up
#: (measured, see :data:`_MEASURED_PEAK_BYTES`) and hours per point; 9 would need about
#: 85 GB.
MAX_QUBITS = 8
#: Largest |h_i|, |J_ij| (dimensionless multipliers of B(s)).
MAX_COEFFICIENT = 1e6
#: Largest energy scale (A0_ghz, B0_ghz, cutoff_ghz, a curves table's A and B) in GHz.
#: Qubit energies are of order 1-100 GHz (common practice, no source); far beyond,
#: numbers stop being energies and products of them overflow.
MAX_ENERGY_GHZ = 1e6
#: Smallest bath cutoff in GHz (1 kHz): below it every relaxation rate is zero.
MIN_CUTOFF_GHZ = 1e-6
#: Largest beta W (W: spread of the energies over the anneal, rad/ns; beta in ns/rad).
BETA_SPREAD_MAX = 1400.0
#: Largest W(1) / omega_c (final energy spread over the bath cutoff).
CUTOFF_RATIO_MAX = 700.0
#: Largest tf W / (2 pi) (oscillation periods of the fastest Bohr frequency) that the
#: general integrator is allowed to follow.
MAX_GENERAL_CYCLES = 1e7
#: Largest number of held samples (tf x sample rate) of a realized waveform simulated.
MAX_HELD_SAMPLES = 1_000_000


def _curve_samples(device: Any) -> tuple[list[float], list[float]]:
    """A(s), B(s) at the table rows (or at s = 0 and 1 for linear curves), GHz."""
    if device.curves == "linear":
        return [device.A0_ghz, 0.0], [0.0, device.B0_ghz]
    from .device_table import TabulatedCurves

    curves = TabulatedCurves.from_csv(device.curves, sha256=device.curves_sha256)
    values = curves.values
    return [float(v) for v in values[:, 0]], [float(v) for v in values[:, 1]]


def energy_spread_ghz(spec: Any) -> tuple[float, float]:
    """Upper bounds of the energy spread of H(s): over the anneal, and at s = 1 (GHz).

    W(s) = n A(s) + B(s) (sum |h_i| + sum |J_ij|); it is linear in A and B, so
    its largest value over a linear or tabulated curve is at a table row.
    """
    n = int(spec.problem.qubits)
    c = sum(abs(h) for h in spec.problem.h) + sum(abs(j[2]) for j in spec.problem.J)
    a, b = _curve_samples(spec.device)
    spreads = [n * ai + c * bi for ai, bi in zip(a, b, strict=True)]
    return max(spreads), spreads[-1]


def check_energy_scales(spec: Any) -> None:
    """Refuse a spec whose energies, cutoff and temperature leave double precision.

    See the module notes.  Closed systems (``bath.spectrum = "none"``) only need
    H(1) != 0.

    Raises
    ------
    InputError
        Naming ``bath.temperature_mk``, ``bath.cutoff_ghz``, ``problem.h`` or
        ``device.curves`` with the limit for this spec.
    """
    try:
        spread, final = energy_spread_ghz(spec)
    except InputError:  # a bad curves table: reported when the system is built
        return
    if final <= 0.0:
        if spec.device.curves != "linear":
            raise InputError("device.curves", "must not have A_ghz = B_ghz = 0 at s = 1")
        raise InputError(
            "problem.h",
            "and problem.J are all zero while A(1) = 0: H(1) vanishes and there is no final "
            "state to aim at; give the problem a field or a coupling",
        )
    bath = spec.bath
    if bath.spectrum == "none":
        return
    spread_rad = GHZ_TO_RAD_PER_NS * spread
    t_min_mk = 1e3 * HBAR_OVER_KB_K_NS * spread_rad / BETA_SPREAD_MAX
    if bath.temperature_mk < t_min_mk:
        raise InputError(
            "bath.temperature_mk",
            f"must be at least {t_min_mk:.3g} mK for this spec, got {bath.temperature_mk:g}: "
            f"the energies spread over up to {spread:.4g} GHz during the anneal, and beta "
            f"times that spread must stay below {BETA_SPREAD_MAX:g}, where the detailed-"
            "balance factors exp(beta E / 2) of the Davies generator overflow double "
            "precision (the result would not mean anything)",
        )
    ratio = final / bath.cutoff_ghz
    if ratio > CUTOFF_RATIO_MAX:
        raise InputError(
            "bath.cutoff_ghz",
            f"must be at least {final / CUTOFF_RATIO_MAX:.3g} GHz for this spec, got "
            f"{bath.cutoff_ghz:g}: the final energies spread over up to {final:.4g} GHz, "
            f"{ratio:.3g} cutoffs, and beyond {CUTOFF_RATIO_MAX:g} the factor "
            "exp(-omega / omega_c) of the relaxation rates is 0 in double precision, so the "
            "final state is not unique (or lower the energies: device, problem.h, problem.J)",
        )


# -- memory ----------------------------------------------------------------------------
#: Peak resident memory (bytes) of building a system and its pre-flight, measured by
#: number of qubits (Ising chain, linear curves; 2026-12-02, 2-core machine, see
#: benchmarks/RESULTS.md).  Up to 5 qubits about 0.1 GB.
_MEASURED_PEAK_BYTES: dict[int, float] = {
    4: 86e6,
    5: 105e6,
    6: 454e6,
    7: 341e6,
    8: 5.30e9,
}
#: Growth per extra qubit beyond the last measurement: the pre-flight's
#: superoperator work scales as d^4 = 16^n (5.3 GB at 8 qubits is 16 x 0.34 GB).
_GROWTH_PER_QUBIT = 16.0


def memory_estimate_bytes(n_qubits: int) -> float:
    """Estimated peak memory of setting up one simulation of ``n_qubits`` qubits (bytes).

    Measured up to 8 qubits (:data:`_MEASURED_PEAK_BYTES`), extrapolated as d^4
    beyond: 9 qubits about 85 GB, far past a 24 GB machine.  The integration
    itself may need more.
    """
    n = int(n_qubits)
    top = max(_MEASURED_PEAK_BYTES)
    if n <= top:
        return max(v for k, v in _MEASURED_PEAK_BYTES.items() if k <= max(n, 4))
    return _MEASURED_PEAK_BYTES[top] * _GROWTH_PER_QUBIT ** (n - top)


def available_memory_bytes() -> float | None:
    """Memory available to a new process (``MemAvailable`` of /proc/meminfo), or None."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024.0
    except OSError:
        pass
    try:
        return float(os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return None


def check_memory(n_qubits: int, workers: int = 1) -> None:
    """Refuse a run whose estimated memory exceeds what the machine has available."""
    need = memory_estimate_bytes(n_qubits) * max(1, workers)
    have = available_memory_bytes()
    if have is not None and need > have:
        raise InputError(
            "problem.qubits",
            f"= {n_qubits} needs about {need / 2**30:.1f} GiB"
            + (f" ({workers} workers)" if workers > 1 else "")
            + f", but {have / 2**30:.1f} GiB is available: use fewer qubits or workers",
        )


# -- cost ------------------------------------------------------------------------------
#: Measured on one qubit (2026-12-02, 2-core machine): the general integrator takes about
#: 10 ms per period of the fastest oscillation (30 right-hand sides of 0.33 ms); the
#: realized waveform about 0.25 ms per held sample and 7 ms per filtered sample.
_GENERAL_S_PER_CYCLE = 0.010
_HELD_S_PER_SAMPLE = 0.25e-3
_FILTERED_S_PER_SAMPLE = 7e-3


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    if seconds < 3 * 86400:
        return f"{seconds / 3600:.0f} h"
    return f"{seconds / 86400:.3g} days"


def _resolved_integrator(spec: Any, integrator: str) -> str:
    if integrator != "auto":
        return integrator
    if spec.bath.spectrum == "none":
        return "closed"
    return "general" if spec.bath.lamb_shift else "eigenframe"


def check_run_cost(spec: Any, tf_ns: float, integrator: str, *, realized: bool = False) -> None:
    """Refuse a simulation whose cost is out of reach, with the figure.

    Parameters
    ----------
    spec : Spec
    tf_ns : float
        Anneal time.
    integrator : str
        The integrator named in the spec (``"auto"`` is resolved as
        :mod:`schedforge.dynamics` does: closed systems and the Lamb shift use the
        general integrator).
    realized : bool
        The hardware's waveform (one step per sample) is simulated.

    Raises
    ------
    InputError
        Naming ``schedule.tf_ns`` when the general integrator would follow more
        than :data:`MAX_GENERAL_CYCLES` oscillations, or the realized waveform
        would have more than :data:`MAX_HELD_SAMPLES` samples.
    """
    wf = spec.waveform
    if realized and wf is not None and wf.sample_rate_gsps:
        samples = tf_ns * wf.sample_rate_gsps
        if samples > MAX_HELD_SAMPLES:
            per = _FILTERED_S_PER_SAMPLE if wf.bandwidth_mhz else _HELD_S_PER_SAMPLE
            raise InputError(
                "schedule.tf_ns",
                f"= {tf_ns:g} ns gives {samples:.3g} waveform samples at "
                f"{wf.sample_rate_gsps:g} GS/s; the realized waveform is simulated sample "
                f"by sample (about {_duration(samples * per)} for one qubit), and at most "
                f"{MAX_HELD_SAMPLES:.0e} samples are simulated: use a shorter tf_ns",
            )
    name = _resolved_integrator(spec, integrator)
    if name in ("general", "closed"):
        spread, _ = energy_spread_ghz(spec)
        cycles = tf_ns * spread
        if cycles > MAX_GENERAL_CYCLES:
            raise InputError(
                "schedule.tf_ns",
                f"= {tf_ns:g} ns is too long for the {name} integrator: it follows every "
                f"oscillation, about {cycles:.3g} periods here (energies up to {spread:.3g} "
                f"GHz; about {_duration(cycles * _GENERAL_S_PER_CYCLE)} for one qubit), and "
                f"at most {MAX_GENERAL_CYCLES:.0e} are allowed"
                + ('; integrator "auto" does not grow with tf' if name == "general" else ""),
            )
