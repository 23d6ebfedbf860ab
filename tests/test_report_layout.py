"""The report as a reader sees it (issue 15): tables that fit, readable headers with
units, plots scaled to their data with legends off it, failed points counted, and no
warnings for a sweep of one point.

The points are synthetic demo data (a power law with one failed point); the checks
are about layout, not numbers.  Units of C_k (ns^(k+1)) follow from err = C_k /
tf^(k+1) with tf in ns.  The rendered page was also checked by eye in headless
Chromium at 1440 and 1024 px (see the issue-15 note).
"""

from __future__ import annotations

import csv
import itertools
import math
import re
import warnings

import numpy as np
import pytest

from schedforge.analysis import fit_points
from schedforge.plotting.scaling import plot_error_vs_tf, plot_local_slopes
from schedforge.report import analyse_sweep_dir
from schedforge.spec import load_spec


def _rows(tfs, k=1, fail=()):
    rows = []
    for i, tf in enumerate(tfs):
        err = 400.0 * tf ** -(k + 1.0)
        bad = i in fail
        rows.append(
            dict(family="beta", variant="ideal", k_start=0.0, k_end=float(k), tf_ns=float(tf),
                 trace_distance=math.nan if bad else err,
                 ground_infidelity=math.nan if bad else err,
                 excess_energy_ghz=math.nan if bad else err,
                 status="failed" if bad else "ok", wall_s=0.01)
        )  # fmt: skip
    return rows


def _write(folder, rows):
    with open(folder / "points.csv", "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)


def test_one_point_sweep_reports_without_warnings(tmp_path) -> None:
    rows = _rows([1000.0])
    _write(tmp_path, rows)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a matplotlib UserWarning would fail here
        analyse_sweep_dir(tmp_path, load_spec("builtin:driven-qubit"))
    assert (tmp_path / "report.html").exists()


def test_report_counts_failed_points_and_reads_plainly(tmp_path) -> None:
    rows = _rows(np.geomspace(3e3, 1e5, 5), fail=(1, 3))
    _write(tmp_path, rows)
    analyse_sweep_dir(tmp_path, load_spec("builtin:driven-qubit"))
    text = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert "5 points: 3 ok, 2 failed" in text
    headers = re.findall(r"<th[^>]*>(.*?)</th>", text)
    assert headers and not [h for h in headers if re.search(r"[a-z]_[a-z]", h)], headers
    assert "C<sub>k</sub> fitted (ns<sup>p</sup>)" in headers
    assert "C<sub>k</sub> predicted (ns<sup>p</sup>)" in headers
    assert "both in ns<sup>p</sup>" in text
    # every table can scroll sideways instead of running off the page
    assert text.count('<div class="scroll"><table>') == text.count("<table>")
    if "agrees</td>" not in text:  # no fit agrees: the definition does not say one does
        assert "Verdict <i>agrees</i>" not in text


def test_error_plot_fits_the_data_not_the_floor() -> None:
    fits = fit_points(
        _rows(np.geomspace(3e3, 3e4, 5)), atol=1e-14, predicted={("beta", 0.0, 1.0): 400.0}
    )
    fig = plot_error_vs_tf(fits[0])
    ax = fig.axes[0]
    lo, hi = ax.get_ylim()
    err = np.asarray(fits[0].error)
    assert lo >= err.min() / 10 and hi <= err.max() * 10  # floor 1e-11 is far below
    # the legend sits outside the axes: it covers no data
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    renderer = FigureCanvasAgg(fig).get_renderer()
    fig.draw(renderer)
    legend = ax.get_legend().get_window_extent(renderer)
    assert not legend.overlaps(ax.get_window_extent(renderer))
    label = " ".join(t.get_text() for t in ax.get_legend().get_texts())
    assert "ns$^{2}$" in label  # unit of C_1


def test_local_slopes_without_slopes_has_no_legend() -> None:
    fits = fit_points(_rows([1000.0, 2000.0], fail=(0, 1)), atol=1e-14)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fig = plot_local_slopes(fits)
    assert fig.axes[0].get_legend() is None
    assert any("no local slopes" in t.get_text() for t in fig.axes[0].texts)


@pytest.mark.parametrize("k", [1])
def test_local_slopes_legend_lists_only_drawn_lines(k) -> None:
    fits = fit_points(
        _rows(np.geomspace(1e3, 1e4, 4), k=k) + _rows([500.0, 700.0], k=k + 1, fail=(0, 1)),
        atol=1e-14,
    )
    fig = plot_local_slopes(fits)
    labels = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert labels == [f"beta k_end={k}"]


@pytest.mark.parametrize("span", [(3e3, 5e4), (1e2, 1e3), (1e1, 1e5)])
def test_tf_axis_labels_do_not_run_into_each_other(span) -> None:
    # a sweep from 3e3 to 5e4 ns had matplotlib label 2, 3, 4 and 6 x 10^n on a panel
    # 5 inches wide, where they overlapped; the labels drawn must keep apart, and the
    # axis must still carry at least two of them
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    fits = fit_points(_rows(np.geomspace(*span, 5)), atol=1e-14)
    for fig in (plot_error_vs_tf(fits[0]), plot_local_slopes(fits)):
        ax = fig.axes[0]
        renderer = FigureCanvasAgg(fig).get_renderer()
        fig.draw(renderer)
        lo, hi = ax.get_xlim()
        boxes = [
            t.get_window_extent(renderer)
            for t in ax.get_xticklabels(minor=False) + ax.get_xticklabels(minor=True)
            if t.get_text() and t.get_visible() and lo <= t.get_position()[0] <= hi
        ]
        assert len(boxes) >= 2, span
        boxes.sort(key=lambda b: b.x0)
        assert all(a.x1 <= b.x0 for a, b in itertools.pairwise(boxes)), span
