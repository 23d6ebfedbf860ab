"""Figure of a schedule in time: s(t), ds/dt and d2s/dt2, with the flat end marked."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from ..schedules import Schedule

__all__ = ["plot_schedule"]

_PANELS = (
    ("s", "s(t)"),
    ("ds/dt", "ds/dt (1/ns)"),
    ("d2s/dt2", "d²s/dt² (1/ns²)"),
)


def plot_schedule(
    schedule: Schedule,
    tf_ns: float,
    ax: Sequence[Axes] | None = None,
    *,
    n: int = 2001,
) -> Figure:
    """Plot s(t) and its first two time derivatives over the anneal.

    Parameters
    ----------
    schedule : Schedule
        s = f(t / tf).
    tf_ns : float
        Anneal time in ns.
    ax : sequence of 3 Axes, optional
        Axes for the s, ds/dt and d2s/dt2 panels; a new figure (Agg canvas, no
        display needed) with three stacked panels is made when omitted.
    n : int
        Number of evenly spaced plot points (the schedule's knots are added).

    Returns
    -------
    matplotlib.figure.Figure
        The figure holding the panels.  The end of the anneal is marked by a
        dashed line and labelled with the number of vanishing derivatives
        (``flat_end``); a flat start is labelled likewise.
    """
    if ax is None:
        fig = Figure(figsize=(7.0, 7.5), layout="constrained")
        axes = list(fig.subplots(3, 1, sharex=True))
    else:
        axes = list(ax)
        if len(axes) != len(_PANELS):
            raise ValueError(f"ax must hold {len(_PANELS)} Axes, got {len(axes)}")
        fig = axes[0].get_figure()
    x = np.union1d(np.linspace(0.0, 1.0, n), np.asarray(schedule.knots, dtype=float))
    t = x * tf_ns
    top = len(_PANELS) - 1
    if schedule.max_order is not None:
        top = min(top, schedule.max_order)
    d = schedule.derivatives(x, top)
    scale = np.array([1.0, 1.0 / tf_ns, 1.0 / tf_ns**2])
    flat_end = schedule.flat_end
    flat_start = schedule.flat_start
    for order, (panel, (name, label)) in enumerate(zip(axes, _PANELS, strict=True)):
        if order <= top:
            panel.plot(t, d[order] * scale[order], color="C0", label=name)
        else:
            panel.text(0.5, 0.5, "not available for this family", transform=panel.transAxes)
        panel.axvline(tf_ns, color="C3", linestyle="--", linewidth=1.0)
        panel.axhline(0.0, color="0.6", linewidth=0.6)
        panel.set_ylabel(label)
        panel.grid(alpha=0.3)
    every = " (every order: k = inf)" if np.isinf(float(schedule.k_end)) else ""
    notes = [f"flat end: first {flat_end} derivative(s) vanish at t = tf{every} (dashed)"]
    if flat_start:
        notes.append(f"flat start: first {flat_start} derivative(s) vanish at t = 0")
    axes[0].text(
        0.95,
        0.06,
        "\n".join(notes),
        transform=axes[0].transAxes,
        ha="right",
        va="bottom",
        color="C3",
        bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.8},
    )
    axes[-1].set_xlabel("t (ns)")
    axes[0].set_title(
        f"{schedule.family} schedule (k_start={schedule.k_start:g}, "
        f"k_end={schedule.k_end:g}), tf = {tf_ns:g} ns"
    )
    return fig
