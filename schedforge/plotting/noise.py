"""Figures of the control-error studies: probability curve, growth with size, ensembles.

Every function takes ``ax=None`` and returns the figure (made with
:class:`matplotlib.figure.Figure` directly: no display, no pyplot state).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from .scaling import _axes

__all__ = [
    "plot_ensemble_histograms",
    "plot_flip_curve",
    "plot_size_growth",
    "plot_spread_vs_tf",
]


def plot_flip_curve(precision: Any, ax: Axes | None = None) -> Figure:
    """Probability that the ground state changes against the noise level.

    Points with their Wilson intervals; the exact step curve of the estimate
    (common random numbers); the target (dashed) and the precision needed (dotted).

    Parameters
    ----------
    precision : ProblemPrecision
        From :func:`schedforge.control_noise.problem_precision`.
    """
    fig, ax = _axes(ax, (5.2, 3.8))
    curve = precision.curve
    lv = np.array([e.level for e in curve])
    p = np.array([e.probability for e in curve])
    lo = np.array([e.lower for e in curve])
    hi = np.array([e.upper for e in curve])
    ax.errorbar(lv, p, yerr=[p - lo, hi - p], fmt="o", ms=4, color="C0", label="estimate (Wilson)")
    crit = np.sort(precision.critical.levels)
    finite = crit[np.isfinite(crit)]
    if finite.size and lv.size:
        xs = np.concatenate([[0.0], finite[finite <= lv.max()], [lv.max()]])
        ys = np.searchsorted(crit, xs, side="right") / crit.size
        ax.step(xs, ys, where="post", color="C0", lw=0.8, alpha=0.6)
    target = precision.search.target
    ax.axhline(target, ls="--", color="C3", lw=1, label=f"target {target:g}")
    if math.isfinite(precision.crossing):
        ax.axvline(
            precision.crossing,
            ls=":",
            color="C3",
            lw=1,
            label=f"precision needed {precision.crossing:.3g}",
        )
    ax.set_xlabel("noise level (std / largest |coefficient|)")
    ax.set_ylabel("P(ground state changes)")
    ax.set_ylim(-0.02, 1.02)
    ax.legend(fontsize=8)
    return fig


def plot_size_growth(
    summary: Sequence[Mapping[str, Any]], level: float, ax: Axes | None = None
) -> Figure:
    """Mean probability over instances against the problem size (range: min..max)."""
    fig, ax = _axes(ax, (5.2, 3.8))
    n = np.array([r["size"] for r in summary], dtype=float)
    mean = np.array([r["probability_mean"] for r in summary])
    lo = np.array([r["probability_min"] for r in summary])
    hi = np.array([r["probability_max"] for r in summary])
    ax.errorbar(n, mean, yerr=[mean - lo, hi - mean], fmt="o-", color="C0", capsize=3)
    ax.set_xlabel("qubits")
    ax.set_ylabel(f"P(ground state changes) at level {level:g}")
    ax.set_ylim(-0.02, 1.02)
    ax.set_title("mean over instances (bars: smallest..largest)", fontsize=9)
    return fig


def plot_ensemble_histograms(
    values: Mapping[str, Sequence[float]], xlabel: str, ax: Axes | None = None, log: bool = True
) -> Figure:
    """Histograms of one quantity per schedule (one tf), over the noise draws."""
    fig, ax = _axes(ax, (5.2, 3.8))
    arrays = {k: np.asarray(v, dtype=float) for k, v in values.items()}
    finite = [a[np.isfinite(a) & ((a > 0) if log else True)] for a in arrays.values()]
    allv = np.concatenate(finite) if finite else np.zeros(0)
    if allv.size:
        lo, hi = float(allv.min()), float(allv.max())
        if log:
            bins = np.geomspace(lo, hi * 1.0001, 30) if hi > lo else np.array([lo / 1.1, lo * 1.1])
            ax.set_xscale("log")
        else:
            bins = np.linspace(lo, hi, 30) if hi > lo else np.array([lo - 0.5e-3, hi + 0.5e-3])
        for (name, _), data in zip(arrays.items(), finite, strict=True):
            ax.hist(data, bins=bins, histtype="step", lw=1.3, label=name)
        ax.legend(fontsize=8)
    ax.set_xlabel(xlabel)
    ax.set_ylabel("draws")
    return fig


def plot_spread_vs_tf(
    series: Mapping[str, tuple[Sequence[float], Sequence[float]]],
    ylabel: str,
    ax: Axes | None = None,
) -> Figure:
    """Spread (std / mean) of one quantity against tf, one line per schedule."""
    fig, ax = _axes(ax, (5.2, 3.8))
    for name, (tf, spread) in series.items():
        ax.semilogx(np.asarray(tf), np.asarray(spread), "o-", ms=4, label=name)
    ax.set_xlabel("tf (ns)")
    ax.set_ylabel(ylabel)
    ax.legend(fontsize=8)
    return fig
