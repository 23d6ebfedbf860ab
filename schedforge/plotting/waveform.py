"""Figure of a realized waveform: design against what is played, near the end, and the deviation."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from ..waveform import RealizedWaveform

__all__ = ["plot_played", "plot_waveform"]


def plot_waveform(
    realized: RealizedWaveform,
    ax: Sequence[Axes] | None = None,
    *,
    window_fraction: float = 0.1,
    n: int = 4001,
) -> Figure:
    """Plot the design and the played waveform near the end, and their difference.

    Parameters
    ----------
    realized : RealizedWaveform
        From :func:`schedforge.waveform.realize`.
    ax : sequence of 2 Axes, optional
        Axes for the two panels; a new figure (Agg canvas) is made when omitted.
    window_fraction : float
        Fraction of the anneal shown in the top panel (the final stretch).
    n : int
        Plot points per panel (the played points are added).

    Returns
    -------
    matplotlib.figure.Figure
        Top: 1 - s(t) for the design and the played waveform over the final
        ``window_fraction`` of the anneal (log scale, where flatness shows), with
        the played points marked.  Bottom: played minus design over the whole
        anneal, with the largest deviation and every limit violation marked.
    """
    if ax is None:
        fig = Figure(figsize=(7.0, 6.5), layout="constrained")
        axes = list(fig.subplots(2, 1))
    else:
        axes = list(ax)
        if len(axes) != 2:
            raise ValueError(f"ax must hold 2 Axes, got {len(axes)}")
        fig = axes[0].get_figure()
    sched, tf = realized.schedule, realized.tf_ns
    design = sched.design

    # -- top: the final stretch, 1 - s on a log scale --------------------------------
    t0 = tf * (1.0 - window_fraction)
    pts = realized.t_ns[realized.t_ns >= t0]
    t = np.union1d(np.linspace(t0, tf, n), pts)
    played = sched.derivatives_t(t, 0)[0]
    ideal = design(t / tf)
    top = axes[0]
    floor = 1e-18
    top.semilogy(t, np.maximum(1.0 - ideal, floor), label="design", color="C0")
    top.semilogy(
        t, np.maximum(1.0 - played, floor), label=f"played ({realized.mode})", color="C3", lw=1
    )
    if pts.size and realized.mode != "analog":
        top.semilogy(pts, np.maximum(1.0 - realized.s[-pts.size :], floor), ".", color="C3", ms=3)
    top.axvline(tf, ls="--", color="0.5", lw=0.8)
    top.set_xlabel("t (ns)")
    top.set_ylabel("1 - s(t)  (0 drawn at 1e-18)")
    top.set_title(
        f"end of the anneal: effective flatness {realized.effective_k_end} "
        f"(designed {design.k_end:g})",
        fontsize=10,
    )
    top.legend(fontsize=8)

    # -- bottom: deviation over the whole anneal ----------------------------------------
    t = np.union1d(np.linspace(0.0, tf, n), realized.t_ns)
    dev = sched.derivatives_t(t, 0)[0] - design(t / tf)
    bottom = axes[1]
    bottom.plot(t, dev, color="C3", lw=0.8)
    bottom.axhline(0.0, color="0.5", lw=0.5)
    t_worst = realized.t_max_deviation_ns
    worst = sched.derivatives_t(np.array([t_worst]), 0)[0] - design(np.array([t_worst / tf]))
    bottom.plot(
        [t_worst],
        worst,
        "v",
        color="k",
        label=f"max |deviation| {realized.max_deviation:.2g}",
    )
    for i, v in enumerate(realized.violations):
        bottom.axvspan(
            v.t_start_ns,
            max(v.t_end_ns, v.t_start_ns + 1e-3 * tf),
            color="C1",
            alpha=0.25,
            label="limit violation" if i == 0 else None,
        )
    bottom.set_xlabel("t (ns)")
    bottom.set_ylabel("played - design")
    bottom.legend(fontsize=8)
    return fig


def plot_played(realized: RealizedWaveform, curves: Any, *, n: int = 4001) -> Figure:
    """The figure of ``schedforge design --plot`` with a ``[waveform]`` section.

    Parameters
    ----------
    realized : RealizedWaveform
        From :func:`schedforge.waveform.realize`.
    curves : DeviceCurves
        A(s), B(s) of the device.
    n : int
        Plot points per panel.

    Returns
    -------
    matplotlib.figure.Figure
        Four panels: s(t) played against the design over the whole anneal; the
        end of the anneal and the deviation (:func:`plot_waveform`); A(t) and
        B(t) along the played waveform.
    """
    fig = Figure(figsize=(7.5, 11.0), layout="constrained")
    axes = list(fig.subplots(4, 1))
    sched, tf = realized.schedule, realized.tf_ns
    t = np.union1d(np.linspace(0.0, tf, n), realized.t_ns)
    played = sched.derivatives_t(t, 0)[0]
    first = axes[0]
    first.plot(t, sched.design(t / tf), color="C0", label="design")
    first.plot(t, played, color="C3", lw=1, label=f"played ({realized.mode})")
    first.set_xlabel("t (ns)")
    first.set_ylabel("s(t)")
    first.set_title(
        f"{sched.design.family} schedule, tf = {tf:g} ns, as played by the device model",
        fontsize=10,
    )
    first.legend(fontsize=8, loc="upper left")
    plot_waveform(realized, ax=axes[1:3], n=n)
    energies = curves.derivatives(np.clip(played, 0.0, 1.0), 0)
    last = axes[3]
    last.plot(t, energies[0, 0], color="C2", label="A(t)")
    last.plot(t, energies[1, 0], color="C4", label="B(t)")
    last.set_xlabel("t (ns)")
    last.set_ylabel("E/h (GHz)")
    last.set_title("device energies along the played waveform", fontsize=10)
    last.legend(fontsize=8, loc="center left")
    return fig
