"""Integrating a system with a conserved quantity sector by sector.

When an operator P is conserved (:attr:`schedforge.system.System.conserved`, the
spin-flip parity of a zero-field problem with X coupling), the state stays block
diagonal in P's sectors, ``rho = sum_p w_p U_p rho_p U_p^+``, and each block evolves
under the Davies generator of H restricted to its sector
(:meth:`~schedforge.system.System.sector_parts`), relaxing to the sector's own Gibbs
state.  The integrators integrate the deviation from an instantaneous steady state;
against the Gibbs state of the full space that deviation is of order one here (the
sector populations are frozen, not thermal), which would cost the small final
deviation its precision.  Run sector by sector instead, each deviation is from its
sector's Gibbs state, so it is as small (and as precise) as for any other problem; the
final deviation from the target ``sum_p w_p Gibbs_p(1)`` is
``sum_p w_p U_p (rho_p(tf) - Gibbs_p(1)) U_p^+``.

A closed system splits the same way: each block evolves unitarily under H restricted to
its sector, and the target is the sector's ground state of H(1).

Sectors holding at most :data:`~schedforge.symmetry.SECTOR_WEIGHT_MIN` of the
population are not integrated (their share of the deviation is below twice that);
a one-dimensional sector has nothing to integrate (its state is fixed).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..system import System
from .base import IntegrationOutcome, Integrator

__all__ = ["integrate_by_sector", "merge_sector_stats"]


def integrate_by_sector(
    fn: Integrator, system: System, schedule: Any, tf_ns: float, *, rtol: float, atol: float
) -> IntegrationOutcome | None:
    """Run ``fn`` on each populated sector of ``system`` and combine; None without sectors.

    Parameters
    ----------
    fn : callable
        An integrator ``fn(system, schedule, tf_ns, *, rtol, atol)``.
    system : System
        A system whose :meth:`~schedforge.system.System.sector_parts` may be empty (then
        None is returned and the caller integrates as usual).
    schedule, tf_ns, rtol, atol
        As for any integrator.

    Returns
    -------
    IntegrationOutcome or None
        The deviation from ``system.target_state()``; ``stats`` merged over the
        sectors (counts summed, error estimates weighted by the sector populations),
        with each sector's own under ``stats["sectors"]`` and ``stats["conserved"]``
        naming the conserved quantity.  A sector that fails fails the point (its
        message names the sector).
    """
    parts = system.sector_parts()
    if not parts:
        return None
    d = system.dim
    deviation = np.zeros((d, d), dtype=complex)
    outcomes: list[tuple[str, float, IntegrationOutcome]] = []
    skipped = []
    for part in parts:
        if not part.matters or part.system.dim == 1:
            skipped.append(part.sector.name)
            continue
        out = fn(part.system, schedule, tf_ns, rtol=rtol, atol=atol)
        outcomes.append((part.sector.name, part.weight, out))
        if out.status != "ok":
            stats = merge_sector_stats(outcomes)
            stats["conserved"] = system.conserved.name if system.conserved else ""
            return IntegrationOutcome.failure(d, f"{part.sector.name} sector: {out.message}", stats)
        deviation += part.weight * part.sector.embed(out.deviation)
    deviation = 0.5 * (deviation + deviation.conj().T)
    stats = merge_sector_stats(outcomes)
    assert system.conserved is not None
    stats["conserved"] = system.conserved.name
    if skipped:
        stats["sectors_not_integrated"] = skipped
    stats["trace_error"] = float(abs(np.trace(deviation)))
    return IntegrationOutcome(deviation, system.target_state() + deviation, "ok", "", stats)


def merge_sector_stats(outcomes: list[tuple[str, float, IntegrationOutcome]]) -> dict[str, Any]:
    """One statistics dict for the sectors' outcomes ``(name, weight, outcome)``.

    Integer counts are summed; ``min_*`` / ``max_*`` values take the extreme; other
    numbers equal in every sector are kept, the rest (error estimates, amplitudes) are
    weighted by the sector populations and summed; strings that differ are listed per
    sector; ``warnings`` are concatenated with the sector named.
    """
    merged: dict[str, Any] = {}
    keys: list[str] = []
    for _, _, out in outcomes:
        keys += [k for k in out.stats if k not in keys]
    for key in keys:
        have = [(name, w, out.stats[key]) for name, w, out in outcomes if key in out.stats]
        values = [v for _, _, v in have]
        if key == "warnings":
            merged[key] = tuple(f"{name} sector: {w}" for name, _, vs in have for w in vs)
        elif all(isinstance(v, bool) for v in values):
            merged[key] = any(values)
        elif all(isinstance(v, (int, np.integer)) for v in values):
            merged[key] = int(sum(values))
        elif all(isinstance(v, (int, float, np.number)) for v in values):
            if key.startswith("min_"):
                merged[key] = float(min(values))
            elif key.startswith("max_"):
                merged[key] = float(max(values))
            elif all(v == values[0] for v in values):
                merged[key] = values[0]
            else:
                merged[key] = float(sum(w * v for _, w, v in have))
        elif all(v == values[0] for v in values):
            merged[key] = values[0]
        else:
            merged[key] = "; ".join(f"{name}: {v}" for name, _, v in have)
    merged["sectors"] = {
        name: {k: v for k, v in out.stats.items() if k != "warnings"} for name, _, out in outcomes
    }
    return merged
