"""Figures of the scaling analysis: error vs tf, local slopes, schedules, gaps.

Every function takes ``ax=None`` (or a sequence of axes) and returns the
figure; figures are made with :class:`matplotlib.figure.Figure` directly, so no
display or global pyplot state is involved.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, NullFormatter
from numpy.typing import ArrayLike

from ..analysis import ScalingFit
from ..metrics import METRICS
from ..schedules import FAMILIES, Schedule

__all__ = [
    "BOUNDED_METRICS",
    "plot_error_vs_tf",
    "plot_gap",
    "plot_local_slopes",
    "plot_schedule_derivatives",
]


#: Error metrics that cannot exceed 1 (predicted lines are not drawn above it).
BOUNDED_METRICS: frozenset[str] = frozenset(m.name for m in METRICS.values() if m.bounded)


def _axes(ax: Axes | None, figsize: tuple[float, float]) -> tuple[Figure, Axes]:
    if ax is None:
        fig = Figure(figsize=figsize, layout="constrained")
        return fig, fig.add_subplot(1, 1, 1)
    fig = ax.get_figure()
    assert isinstance(fig, Figure)
    return fig, ax


def _label(fit: ScalingFit) -> str:
    k = f" k_end={fit.k_end:g}" if FAMILIES.get(fit.family, Schedule).k_end_varies else ""
    v = "" if fit.variant == "ideal" else f" ({fit.variant})"
    return f"{fit.family}{k}{v}"


def _power_unit(power: float) -> str:
    """``ns^power`` in mathtext: the unit of C_k in err = C_k / tf^power (power = k + 1)."""
    return f"ns$^{{{power:g}}}$" if math.isfinite(power) else ""


def _data_limits(values: ArrayLike, margin: float = 3.0) -> tuple[float, float] | None:
    """Log-axis limits that hold the positive finite ``values`` with a margin factor."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v) & (v > 0)]
    if not v.size:
        return None
    return float(v.min()) / margin, float(v.max()) * margin


def _tidy_log_x(ax: Axes) -> None:
    """Labels of a log x axis that spans a decade or more: decades, and 2 and 5 x 10^n.

    Matplotlib labels the minor ticks 2, 3, 4 and 6 x 10^n up to about two decades,
    and on a panel 5 inches wide they ran into each other (a sweep from 3e3 to 5e4
    ns).  Beyond two decades only the decades are labelled; the grid shows the rest.
    """
    lo, hi = ax.get_xlim()
    if lo <= 0 or hi / lo < 10.0:
        return
    if hi / lo >= 100.0:
        ax.xaxis.set_minor_formatter(NullFormatter())
        return

    def label(x: float, _pos: int) -> str:
        exponent = math.floor(math.log10(x) + 1e-9)
        mantissa = round(x / 10.0**exponent)
        return rf"${mantissa}\times10^{{{exponent}}}$" if mantissa in (2, 5) else ""

    ax.xaxis.set_minor_formatter(FuncFormatter(label))


def _legend_below(ax: Axes, ncol: int = 2) -> None:
    """A legend under the axes, off the data; none when nothing is labelled."""
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(
            handles,
            labels,
            fontsize=7,
            loc="upper center",
            bbox_to_anchor=(0.5, -0.2),
            ncol=ncol,
            frameon=False,
        )


def plot_error_vs_tf(fit: ScalingFit, ax: Axes | None = None) -> Figure:
    """Error vs tf (log-log) of one schedule, with the regime, the fit and the prediction.

    Filled markers: usable points; open grey markers: points not fitted (at the
    numerical floor or failed); large ring: the fitted regime.  Solid line: the
    fitted power law over the regime; dashed: the predicted law
    ``C_k tf^(expected slope)``, not drawn where it would exceed 1 for a bounded
    metric (a trace distance is at most 1); dotted: the numerical floor (drawn when it
    lies within the data's range).  The y axis is fitted to the points, not to the
    floor or the lines; the legend sits under the axes.
    """
    fig, ax = _axes(ax, (5.0, 4.3))
    tf = np.asarray(fit.tf_ns)
    err = np.asarray(fit.error)
    use = np.asarray(fit.usable, dtype=bool)
    finite = np.isfinite(err) & (err > 0)
    ax.loglog(tf[use], err[use], "o", color="C0", ms=5, label="points")
    bad = finite & ~use
    if bad.any():
        ax.loglog(tf[bad], err[bad], "o", mfc="none", color="0.6", ms=5, label="not fitted")
    if fit.regime:
        r = list(fit.regime)
        ax.loglog(tf[r], err[r], "o", mfc="none", color="C1", ms=10, mew=1.5, label="regime")
        ax.axvspan(tf[r[0]], tf[r[-1]], color="C1", alpha=0.08)
    if math.isfinite(fit.slope):
        lo, hi = fit.regime_tf_min_ns, fit.regime_tf_max_ns
        t_line = np.geomspace(lo / 1.5, hi * 1.5, 50)
        ax.loglog(
            t_line,
            np.exp(fit.intercept) * t_line**fit.slope,
            "-",
            color="C1",
            label=f"fit: slope {fit.slope:.3f}",
        )
    if math.isfinite(fit.coefficient_predicted) and math.isfinite(fit.expected_slope) and tf.size:
        t_line = np.geomspace(tf.min(), tf.max(), 50)
        predicted = fit.coefficient_predicted * t_line**fit.expected_slope
        if fit.metric in BOUNDED_METRICS:
            # a trace distance (or an infidelity) is at most 1: the law says nothing above
            predicted = np.where(predicted <= 1.0, predicted, np.nan)
        if np.isfinite(predicted).any():
            ax.loglog(
                t_line,
                predicted,
                "--",
                color="C2",
                label=f"predicted: $C_{{{fit.k_end:g}}}$ = {fit.coefficient_predicted:.3g} "
                + _power_unit(-fit.expected_slope),
            )
    limits = _data_limits(err[finite])
    if limits is None:  # nothing to scale to: say so instead of an empty frame
        ax.text(
            0.5,
            0.5,
            f"no point with an error to draw ({tf.size} point(s), none successful)",
            transform=ax.transAxes,
            ha="center",
            va="center",
            fontsize=9,
        )
    else:
        if fit.floor > 0 and limits[0] <= fit.floor <= limits[1]:
            ax.axhline(
                fit.floor, color="0.4", linestyle=":", linewidth=1.0, label="numerical floor"
            )
        ax.set_ylim(*limits)
    t_lim = _data_limits(tf, margin=1.5)
    if t_lim is not None:
        ax.set_xlim(*t_lim)
    _tidy_log_x(ax)
    ax.set_xlabel("tf (ns)")
    known = METRICS.get(fit.metric)
    ax.set_ylabel(known.heading if known else fit.metric.replace("_", " "))
    ax.set_title(f"{_label(fit)}: {fit.verdict}", fontsize=10)
    ax.grid(alpha=0.3, which="both")
    _legend_below(ax)
    return fig


def plot_local_slopes(fits: Sequence[ScalingFit], ax: Axes | None = None) -> Figure:
    """Local slopes d log(err) / d log(tf) vs tf for several schedules.

    Each slope is drawn at the geometric mean of its two tf values; the
    expected slope of each schedule's error law is a dashed line of the same
    colour.
    """
    fig, ax = _axes(ax, (7.0, 4.0))
    drawn = 0
    for i, fit in enumerate(fits):
        color = f"C{i % 10}"
        tf = np.asarray(fit.tf_ns)
        slopes = np.asarray(fit.slopes, dtype=float)
        if tf.size < 2 or not np.isfinite(slopes).any():
            continue  # nothing to draw: no entry in the legend either
        mid = np.sqrt(tf[:-1] * tf[1:])
        style = "o-" if fit.variant == "ideal" else "s:"
        ax.semilogx(mid, slopes, style, color=color, ms=4, label=_label(fit))
        if math.isfinite(fit.expected_slope):
            ax.axhline(fit.expected_slope, color=color, linestyle="--", linewidth=0.8)
        drawn += 1
    if drawn:
        _tidy_log_x(ax)
    ax.set_xlabel("tf (ns)")
    ax.set_ylabel("local slope d log(err) / d log(tf)")
    ax.grid(alpha=0.3, which="both")
    if drawn:
        ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.02, 1.0), frameon=False)
    else:
        ax.text(
            0.5,
            0.5,
            "no local slopes: no schedule has two successful points in a row",
            transform=ax.transAxes,
            ha="center",
            va="center",
            fontsize=9,
        )
        ax.set_xticks([])
        ax.set_yticks([])
    return fig


def plot_schedule_derivatives(
    schedules: Sequence[Schedule],
    ax: Sequence[Axes] | None = None,
    *,
    orders: int = 3,
    n: int = 1001,
) -> Figure:
    """f(x) and its derivatives up to ``orders`` for several schedules, x = t / tf.

    One panel per order; the flat end (x = 1) is where the curves of order
    1..k_end meet zero.
    """
    if ax is None:
        fig = Figure(figsize=(7.0, 2.0 * (orders + 1)), layout="constrained")
        axes = list(fig.subplots(orders + 1, 1, sharex=True))
    else:
        axes = list(ax)
        if len(axes) != orders + 1:
            raise ValueError(f"ax must hold {orders + 1} Axes, got {len(axes)}")
        fig = axes[0].get_figure()
    for i, sched in enumerate(schedules):
        x = np.union1d(np.linspace(0.0, 1.0, n), np.asarray(sched.knots, dtype=float))
        top = orders if sched.max_order is None else min(orders, sched.max_order)
        with np.errstate(all="ignore"):
            d = sched.derivatives(x, top)
        k = f" k_end={sched.k_end:g}" if FAMILIES.get(sched.family, Schedule).has_k else ""
        for order in range(top + 1):
            axes[order].plot(x, d[order], color=f"C{i % 10}", label=f"{sched.family}{k}")
    for order, panel in enumerate(axes):
        panel.set_ylabel("f(x)" if order == 0 else f"f^({order})(x)")
        panel.axhline(0.0, color="0.6", linewidth=0.6)
        panel.grid(alpha=0.3)
    axes[0].legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.02, 1.0), frameon=False)
    axes[-1].set_xlabel("x = t / tf")
    return fig


def plot_gap(
    s: ArrayLike,
    spectral_gap_ghz: ArrayLike,
    liouvillian_gap_ghz: ArrayLike | None = None,
    ax: Axes | None = None,
) -> Figure:
    """The gap of H(s) and, for an open system, the Liouvillian gap along s (GHz, log scale)."""
    fig, ax = _axes(ax, (6.0, 3.8))
    s = np.asarray(s, dtype=float)
    ax.semilogy(s, np.asarray(spectral_gap_ghz, dtype=float), "-", color="C0",
                label="spectral gap of H(s) (E/h)")  # fmt: skip
    if liouvillian_gap_ghz is not None:
        lg = np.asarray(liouvillian_gap_ghz, dtype=float)
        ok = np.isfinite(lg) & (lg > 0)
        ax.semilogy(s[ok], lg[ok], "-", color="C3", label="Liouvillian gap / 2 pi")
    ax.set_xlabel("s")
    ax.set_ylabel("GHz")
    ax.grid(alpha=0.3, which="both")
    _legend_below(ax)
    return fig
