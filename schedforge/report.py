"""Analysis of a finished sweep folder and its self-contained HTML report.

:func:`analyse_sweep_dir` is the hook the ``sweep`` command calls once the
points are done (and what ``schedforge report DIR`` reruns).  From
``DIR/points.csv`` and the spec it

* predicts the leading coefficient C_k of every ideal schedule from the final
  generator (:mod:`schedforge.prediction`),
* detects the equilibrated regime and fits every schedule, ideal and realized
  (:mod:`schedforge.analysis`), writing ``DIR/fit.csv``,
* draws the figures (``DIR/plots/*.png``): error vs tf per schedule with the
  fitted and predicted lines and the regime, local slopes, the schedules and
  their derivatives, the gaps along s,
* writes ``DIR/spec.toml`` (the spec, so that the report can be rebuilt) and
  ``DIR/report.html``: one file with the plots embedded as base64 PNG, the
  spec, the tables and the cautions.

Every file is written atomically.
"""

from __future__ import annotations

import base64
import html
import io
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
from matplotlib.figure import Figure

from . import __version__
from .analysis import (
    DEFAULT_FLOOR_FACTOR,
    DEFAULT_REGIME_TOL,
    DEFAULT_SLOPE_TOL,
    ScalingFit,
    fit_points,
    format_fit_table,
    write_fit_csv,
)
from .error_law import COEFFICIENT_RTOL, RELAXATION_FACTOR, dynamics_kind, law_time_scale_ns
from .errors import InputError
from .fileio import atomic_write_bytes, atomic_write_text
from .metrics import METRICS, fitted_metric
from .plotting.scaling import (
    plot_error_vs_tf,
    plot_gap,
    plot_local_slopes,
    plot_schedule_derivatives,
)
from .prediction import Prediction, predicted_coefficient
from .schedules import schedule_for_point
from .spec import spec_to_toml
from .spec_model import Spec
from .store import POINTS_CSV_NAME, read_points_csv
from .units import GHZ_TO_RAD_PER_NS

__all__ = [
    "CAUTION",
    "SweepAnalysis",
    "analyse_sweep_dir",
    "write_report",
]

#: The hardware caution shown in every report.
CAUTION = (
    "schedforge does not know your device's safety limits. Waveforms derived from this "
    "study are meant for real, delicate hardware: before playing one, check it against "
    "the device's documented limits (amplitude, slope, bandwidth, sample rate, timing) "
    "and the lab's own practice, and start from conservative settings."
)
#: Largest Hilbert-space dimension for which the Liouvillian gap is drawn.
GAP_PLOT_MAX_DIM = 16
#: Points along s of the gap plot.
GAP_POINTS = 65
_FIT_TEXT_COLS = ("family", "variant", "error_law", "verdict", "message")
SPEC_NAME = "spec.toml"
FIT_NAME = "fit.csv"
REPORT_NAME = "report.html"
PLOTS_DIR = "plots"


@dataclass(frozen=True)
class SweepAnalysis:
    """What :func:`analyse_sweep_dir` produced.

    Attributes
    ----------
    fits : tuple of ScalingFit
    predictions : dict
        Prediction per (family, k_start, k_end).
    fit_csv, report_html, spec_toml : Path
    plots : dict of str to Path
        PNG files by figure name.
    table : str
        The plain-text summary table.
    """

    fits: tuple[ScalingFit, ...]
    predictions: dict[tuple[str, float, float], Prediction]
    fit_csv: Path
    report_html: Path
    spec_toml: Path
    plots: dict[str, Path]
    table: str


# -- the study's spec -------------------------------------------------------------
def _spec_copy(out_dir: str | Path) -> Spec:
    """The spec a sweep folder keeps beside its points (``DIR/spec.toml``)."""
    from .spec import load_spec

    path = Path(out_dir) / SPEC_NAME
    if not path.is_file():
        raise InputError(
            "DIR",
            f"must be a finished sweep folder holding {SPEC_NAME}; {path} is missing "
            "(rerun `schedforge sweep SPEC --out DIR`, which writes it)",
        )
    return load_spec(path)


# -- numbers for the figures ------------------------------------------------------
def _predictions(
    spec: Spec, system: Any, keys: Sequence[tuple[str, float, float]]
) -> dict[tuple[str, float, float], Prediction]:
    out = {}
    for key in keys:
        out[key] = predicted_coefficient(system, schedule_for_point(spec, *key))
    return out


def _gap_along_s(system: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    s = np.linspace(0.0, 1.0, GAP_POINTS)
    spectral = []
    for si in s:
        levels = np.unique(system.eigen(float(si)).levels)
        spectral.append((levels[1] - levels[0]) / GHZ_TO_RAD_PER_NS if levels.size > 1 else np.nan)
    lgap = None
    if not system.closed and system.dim <= GAP_PLOT_MAX_DIM:
        lgap = np.array([system.liouvillian_gap(float(si)) for si in s]) / GHZ_TO_RAD_PER_NS
    return s, np.array(spectral), lgap


def _png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110)
    return buf.getvalue()


def _make_figures(
    spec: Spec,
    system: Any,
    fits: Sequence[ScalingFit],
    keys: Sequence[tuple[str, float, float]],
) -> dict[str, Figure]:
    figs: dict[str, Figure] = {}
    for fit in fits:
        name = f"error_{fit.family}_k{fit.k_end:g}_{fit.variant}"
        figs[name] = plot_error_vs_tf(fit)
    figs["local_slopes"] = plot_local_slopes(fits)
    figs["schedules"] = plot_schedule_derivatives([schedule_for_point(spec, *k) for k in keys])
    s, spectral, lgap = _gap_along_s(system)
    figs["gap"] = plot_gap(s, spectral, lgap)
    return figs


# -- HTML ---------------------------------------------------------------------------
def _law_paragraph(spec: Spec) -> str:
    """Which error law the fits use, in words, with its sources."""
    if dynamics_kind(spec) == "closed":
        return (
            "Closed (unitary) dynamics: the boundary terms of both ends count, so the error "
            "law is tf<sup>&minus;(min(k_start, k_end)+1)</sup> (Lidar, Rezakhani and "
            "Hamma, J. Math. Phys. 50, 102106 (2009), cited from memory; checked on a "
            "closed qubit in the test suite). With equal orders at both ends the two terms "
            "interfere and the local slopes oscillate."
        )
    return (
        "Open (Davies) dynamics: relaxation erases the start, so the error law is "
        "tf<sup>&minus;(k_end+1)</sup> (Avron, Fraas, Graf and Grech 2012; Campos Venuti, "
        "Albash, Lidar and Zanardi 2016; cited from memory)."
    )


_CSS = """
body { font-family: sans-serif; max-width: 1200px; margin: 2em auto; padding: 0 1em;
       color: #222; line-height: 1.4; }
.scroll { overflow-x: auto; margin: 0.5em 0 1.5em; }
table { border-collapse: collapse; font-size: 0.85em; }
th, td { border: 1px solid #bbb; padding: 3px 7px; text-align: right; vertical-align: top; }
th { background: #eee; font-weight: 600; text-align: center; }
td.t { text-align: left; }
td.msg { text-align: left; min-width: 13em; max-width: 36em; }
td.n { white-space: nowrap; }
tr.detail td { text-align: left; color: #444; border-top: none; padding-left: 2em; }
.caution { border: 2px solid #c33; background: #fff3f3; padding: 0.8em 1em; }
.summary { font-size: 1.05em; }
.plots { display: flex; flex-wrap: wrap; gap: 1%; }
.plots img { width: 49%; margin: 0.5% 0; border: 1px solid #ddd; box-sizing: border-box; }
img.wide { max-width: 100%; width: 760px; }
pre { background: #f6f6f6; padding: 0.8em; overflow-x: auto; font-size: 0.85em; }
.agrees { color: #060; } .disagrees { color: #a00; } .failed { color: #a00; }
@media (max-width: 800px) { .plots img { width: 100%; } }
"""

#: Column headers of the report's tables (the CSV column name is the cell's tooltip).
_HEADERS = {
    "k_start": "k start",
    "k_end": "k end",
    "slope_stderr": "std. error",
    "expected_slope": "expected slope",
    "regime_tf_ns": "regime tf (ns)",
    "n_points": "points in regime",
    "error_law": "error law",
    "coefficient_fit": "C<sub>k</sub> fitted (ns<sup>p</sup>)",
    "coefficient_predicted": "C<sub>k</sub> predicted (ns<sup>p</sup>)",
    "C_k": "C<sub>k</sub>",
    "tf_ns": "tf (ns)",
    **{name: html.escape(m.heading) for name, m in METRICS.items()},
    "wall_s": "wall time (s)",
}
_MESSAGE_COLUMNS = ("message", "warnings")


def _fmt(v: Any) -> str:
    if isinstance(v, float):
        return "&ndash;" if not math.isfinite(v) else f"{v:.4g}"
    return html.escape(str(v))


def _html_table(
    columns: Sequence[str],
    rows: Sequence[Mapping[str, Any]],
    text_cols: Sequence[str] = (),
    *,
    detail: str | None = None,
) -> str:
    """A table in a sideways-scrolling box; ``detail`` (a long text column) goes on a
    full-width line under each row instead of a narrow column."""
    columns = [c for c in columns if c != detail]
    head = "".join(
        f'<th title="{html.escape(c)}">{_HEADERS.get(c, html.escape(c))}</th>' for c in columns
    )
    out = ['<div class="scroll"><table><tr>' + head + "</tr>"]
    for r in rows:
        cells = []
        for c in columns:
            val = r.get(c, "")
            if c in _MESSAGE_COLUMNS:
                cls = ' class="msg"'
            elif c == "verdict" or c == "status":
                cls = f' class="t {html.escape(str(val)).replace(" ", "-")}"'
            elif c in text_cols:
                cls = ' class="t"'
            else:
                cls = ' class="n"'
            cells.append(f"<td{cls}>{_fmt(val)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
        if detail is not None and r.get(detail):
            out.append(
                f'<tr class="detail"><td colspan="{len(columns)}">'
                f"{_HEADERS.get(detail, html.escape(detail))}: {_fmt(r[detail])}</td></tr>"
            )
    out.append("</table></div>")
    return "\n".join(out)


def _fit_display_row(row: Mapping[str, Any]) -> dict[str, Any]:
    """A fit.csv row with the regime's two ends in one cell (``3000 to 1e+06``)."""
    out = dict(row)
    lo, hi = row.get("regime_tf_min_ns"), row.get("regime_tf_max_ns")
    both = all(isinstance(v, float) and math.isfinite(v) for v in (lo, hi))
    out["regime_tf_ns"] = f"{lo:.4g} to {hi:.4g}" if both else math.nan
    return out


def _points_summary(rows: Sequence[Mapping[str, Any]]) -> str:
    """``"15 points: 11 ok, 4 failed"`` (every status that occurs, counted)."""
    counts: dict[str, int] = {}
    for r in rows:
        status = str(r.get("status", "") or "unknown")
        counts[status] = counts.get(status, 0) + 1
    parts = [f"{n} {status}" for status, n in sorted(counts.items(), key=lambda i: i[0] != "ok")]
    return f"{len(rows)} point{'s' if len(rows) != 1 else ''}" + (
        ": " + ", ".join(parts) if parts else ""
    )


def _page_head(title: str, spec: Any, now: str) -> list[str]:
    """The opening of a report page: title, version and time, spec, caution box."""
    return [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
        f"<p>schedforge {__version__}, generated {now} (UTC). Spec: "
        f"{html.escape(spec.source or 'given in Python')}.</p>",
        f'<div class="caution"><b>Caution.</b> {html.escape(CAUTION)}</div>',
    ]


def _img(name: str, png: bytes, wide: bool = False) -> str:
    data = base64.b64encode(png).decode("ascii")
    cls = ' class="wide"' if wide else ""
    label = html.escape(name)
    return f'<img{cls} alt="{label}" title="{label}" src="data:image/png;base64,{data}">'


def render_report(
    spec: Spec,
    fits: Sequence[ScalingFit],
    rows: Sequence[Mapping[str, Any]],
    pngs: Mapping[str, bytes],
    predictions: Mapping[tuple[str, float, float], Prediction],
    *,
    title: str = "schedforge sweep report",
    notes: Sequence[str] = (),
    sections: Sequence[str] = (),
) -> str:
    """The report as one self-contained HTML string (plots as base64 PNG).

    ``sections`` are HTML fragments of other studies of the same points (e.g. the
    control-error section of :mod:`schedforge.noise_report`), placed first.
    """
    now = datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    fit_cols = ["family", "variant", "k_start", "k_end", "error_law", "slope", "slope_stderr",
                "expected_slope", "regime_tf_ns", "n_points",
                "coefficient_fit", "coefficient_predicted", "verdict", "message"]  # fmt: skip
    fit_rows = [_fit_display_row(f.row()) for f in fits]
    pred_rows = [
        {"family": k[0], "k_start": k[1], "k_end": k[2], "C_k": p.coefficient,
         "unit": f"ns^{p.k + 1}" if p.ok else "", "status": p.status, "message": p.message}
        for k, p in sorted(predictions.items())
    ]  # fmt: skip
    point_cols = ["family", "variant", "k_start", "k_end", "tf_ns", *METRICS, "status",
                  "wall_s", "warnings"]  # fmt: skip
    warned = [r for r in rows if r.get("warnings")]
    error_imgs = [_img(n, b) for n, b in pngs.items() if n.startswith("error_")]
    parts = [
        *_page_head(title, spec, now),
    ]
    n_bad = sum(1 for r in rows if str(r.get("status", "")) != "ok")
    summary = html.escape(_points_summary(rows))
    if n_bad:
        summary += (
            f' <span class="failed">({n_bad} did not succeed: their numbers are NaN and '
            "never fitted; see the Points table)</span>"
        )
    parts.append(f'<p class="summary"><b>Points.</b> {summary}.</p>')
    parts += [f"<p>{html.escape(n)}</p>" for n in notes]
    parts += list(sections)
    agrees = any(f.verdict == "agrees" for f in fits)
    parts += [
        "<h2>Scaling fits</h2>",
        f"<p>{_law_paragraph(spec)} "
        + (
            "Verdict <i>agrees</i> needs all of: "
            if agrees
            else "No fit agrees with its law; the verdict <i>agrees</i> would need all of: "
        )
        + f"fitted slope within &plusmn;{DEFAULT_SLOPE_TOL} of the law's (common practice, "
        "no source); steady "
        f"local slopes; every regime point at tf &ge; {RELAXATION_FACTOR:g} &times; 1/gap "
        "(final relaxation time of an open system, adiabatic time 1/min gap of H(s) of a "
        "closed one); and, when C<sub>k</sub> is predicted, a fitted coefficient within "
        f"{COEFFICIENT_RTOL:.0%} of it. Otherwise the verdict is <i>regime not "
        "reached</i> with the tf range to add. The column error law names the law used. "
        "Points at or below the numerical floor "
        f"({DEFAULT_FLOOR_FACTOR:g} &times; numerics.atol = "
        f"{DEFAULT_FLOOR_FACTOR * spec.numerics.atol:.2g}) and failed points are never "
        "fitted; the regime is the longest run of points at the large-tf end whose local "
        f"slopes lie within a band of width {DEFAULT_REGIME_TOL} (widened by each slope's "
        "noise). No slope is given where the regime was not reached. "
        "C<sub>k</sub> fitted is the intercept of err&middot;tf<sup>p</sup> against 1/tf "
        "over the regime, with p = &minus;(expected slope) the law's exponent; C<sub>k</sub> "
        "predicted is from the final generator; both in ns<sup>p</sup> (err = C<sub>k</sub> "
        "/ tf<sup>p</sup>, tf in ns).</p>",
        _html_table(fit_cols, fit_rows, (*_FIT_TEXT_COLS, "regime_tf_ns"), detail="message"),
        "<h2>Predicted leading coefficients</h2>",
        "<p>C<sub>k</sub> = ||(L<sub>1</sub><sup>+</sup>)<sup>k+1</sup> "
        "d&sigma;/ds(1)||<sub>1</sub>"
        " |f<sup>(k+1)</sup>(1)| / 2 (adiabatic expansion: Phys. Rev. A 93, 032118 (2016); "
        "Phys. Rev. A 98, 022315 (2018)); L<sub>1</sub> in rad/ns, tf in ns.</p>",
        _html_table(
            ["family", "k_start", "k_end", "C_k", "unit", "status", "message"],
            pred_rows,
            ("family", "unit", "status", "message"),
        ),
        "<h2>Error vs anneal time</h2>",
        '<div class="plots">' + "\n".join(error_imgs) + "</div>",
        "<h2>Local slopes</h2>",
        _img("local_slopes", pngs["local_slopes"], wide=True),
        "<h2>Schedules and their derivatives</h2>",
        _img("schedules", pngs["schedules"], wide=True),
        "<h2>Gaps along the anneal</h2>",
        _img("gap", pngs["gap"], wide=True),
        "<h2>Points</h2>",
        f"<p>{len(warned)} of {len(rows)} points carry warnings of their own"
        + (" (listed here; the whole table is below)" if warned else "")
        + ".</p>",
        _html_table(point_cols, warned, ("family", "variant", "status", "warnings"))
        if warned
        else "",
        f"<details><summary>{html.escape(_points_summary(rows))}</summary>",
        _html_table(point_cols, rows, ("family", "variant", "status", "warnings")),
        "</details>",
        "<h2>Spec</h2>",
        f"<pre>{html.escape(spec_to_toml(spec))}</pre>",
        "</body></html>",
    ]
    return "\n".join(parts)


def write_report(path: str | Path, text: str) -> Path:
    """Write the HTML report atomically."""
    p = Path(path)
    atomic_write_text(p, text)
    return p


def analyse_sweep_dir(
    out_dir: str | Path,
    spec: Spec | None = None,
    *,
    rows: Sequence[Mapping[str, Any]] | None = None,
    metric: str | None = None,
    progress: Callable[[str], None] | None = None,
    title: str = "schedforge sweep report",
    notes: Sequence[str] = (),
    sections: Sequence[str] = (),
) -> SweepAnalysis:
    """Fit a finished sweep folder and write fit.csv, the plots, spec.toml and report.html.

    Parameters
    ----------
    out_dir : path
        The sweep folder (holding ``points.csv``).
    spec : Spec, optional
        The sweep's spec; read from ``DIR/spec.toml`` when omitted.
    rows : sequence of mapping, optional
        The points; read from ``DIR/points.csv`` when omitted.
    metric : str, optional
        Error column to analyse (default: :func:`schedforge.metrics.fitted_metric`).
    progress : callable, optional
        Receives one line of text per step.
    title, notes : str
        Report heading and extra paragraphs.
    sections : sequence of str
        HTML fragments placed first in the report (see :func:`render_report`).

    Returns
    -------
    SweepAnalysis
    """
    say = progress or (lambda _m: None)
    folder = Path(out_dir)
    if spec is None:
        spec = _spec_copy(folder)
    if rows is None:
        rows = read_points_csv(folder / POINTS_CSV_NAME)
    rows = [dict(r) for r in rows]
    spec_path = folder / SPEC_NAME
    atomic_write_text(spec_path, spec_to_toml(spec))
    keys = sorted({(str(r["family"]), float(r["k_start"]), float(r["k_end"])) for r in rows})
    from .system import System, curve_warnings

    system = System.from_spec(spec)  # built once: predictions, warnings, law, gap plot
    say(f"analysis: predicting C_k for {len(keys)} schedule(s) from the final generator")
    predictions = _predictions(spec, system, keys)
    warnings = [f"Pre-flight warning: {w}" for w in system.preflight()]
    for k_end in sorted({k[2] for k in keys}):  # tabulated device curves: data quality
        for w in curve_warnings(system.hamiltonian.curves, k_end):
            if f"Device curves: {w}" not in warnings:
                warnings.append(f"Device curves: {w}")
    dynamics = dynamics_kind(system)
    time_scale = law_time_scale_ns(system)
    fits = fit_points(
        rows,
        atol=spec.numerics.atol,
        metric=metric or fitted_metric(),
        predicted={k: p.coefficient for k, p in predictions.items()},
        dynamics=dynamics,
        time_scale_ns=time_scale,
        predicted_parted={k: p.coefficient_parted for k, p in predictions.items()},
    )
    fit_path = write_fit_csv(folder / FIT_NAME, fits)
    say(f"analysis: wrote {fit_path}; drawing figures")
    figs = _make_figures(spec, system, fits, keys)
    pngs = {name: _png(fig) for name, fig in figs.items()}
    plot_dir = folder / PLOTS_DIR
    plot_dir.mkdir(exist_ok=True)
    plot_paths = {}
    for name, data in pngs.items():
        plot_paths[name] = plot_dir / f"{name}.png"
        atomic_write_bytes(plot_paths[name], data)
    text = render_report(
        spec,
        fits,
        rows,
        pngs,
        predictions,
        title=title,
        notes=[*notes, *warnings],
        sections=sections,
    )
    report_path = write_report(folder / REPORT_NAME, text)
    say(f"analysis: wrote {report_path}")
    return SweepAnalysis(
        fits=tuple(fits),
        predictions=predictions,
        fit_csv=fit_path,
        report_html=report_path,
        spec_toml=spec_path,
        plots=plot_paths,
        table=format_fit_table(fits),
    )
