"""The control-error section of the study report: which schedule degrades least.

A noise-ensemble folder (``schedforge noise-sweep SPEC --out DIR``) gets one report,
``DIR/report.html``: the sweep report of its noiseless (nominal) points, which are a
complete sweep of the spec's grid (fits, predicted coefficients, error against tf,
schedules, gaps: :func:`schedforge.report.analyse_sweep_dir`), with the section made
here at the top:

* the noise model in words;
* per schedule, how many draws keep the error law of the dynamics (per-draw fits);
* per schedule and tf, the distribution over the draws (mean, std, spread) of the
  trace distance to each draw's own steady state and of the intended ground-state
  probability;
* figures: histograms per schedule at the longest tf, the spread against tf, and the
  probability that the ground state changes against the noise level (the static study
  of the problem, with the precision it needs).

The figures are also written to ``DIR/plots/noise_*.png``.  ``schedforge report DIR``
rebuilds the same report from the folder's store (:func:`load_noise_study`).
"""

from __future__ import annotations

import html
import json
import math
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

from .schedules import schedule_label
from .spec_model import Spec

__all__ = [
    "NOISE_PLOT_PREFIX",
    "NOISE_REPORT_TITLE",
    "ensemble_notes",
    "load_noise_study",
    "noise_figures",
    "noise_section",
    "nominal_sweep_rows",
    "write_noise_report",
]

#: Title of the report of a noise-ensemble folder.
NOISE_REPORT_TITLE = "schedforge noise-ensemble report"
#: File-name prefix of the ensemble's figures in ``DIR/plots``.
NOISE_PLOT_PREFIX = "noise_"


def _label(r: Mapping[str, Any]) -> str:
    """``"beta k=0/2"`` (``"linear"``), with ``" played"`` for a realized twin."""
    name = schedule_label(r["family"], r["k_start"], r["k_end"])
    return name + (" played" if r.get("variant") == "realized" else "")


# -- figures ----------------------------------------------------------------------------
def noise_figures(
    rows: Sequence[Mapping[str, Any]],
    per_point: Sequence[Mapping[str, Any]],
    precision: Any = None,
) -> dict[str, bytes]:
    """PNG figures of an ensemble, by name.

    Parameters
    ----------
    rows, per_point : sequence of mapping
        From :func:`schedforge.noise_ensemble.tabulate_ensemble`.
    precision : ProblemPrecision, optional
        The static study of the problem
        (:func:`schedforge.control_noise.problem_precision`): its probability curve
        is drawn when given.

    Returns
    -------
    dict of str to bytes
        ``histogram_trace_distance``, ``histogram_intended_ground_probability``,
        ``histogram_relative_trace_distance`` (at the longest tf), ``spread_*`` (against
        tf) and ``precision_curve``.
    """
    from .plotting.noise import plot_ensemble_histograms, plot_flip_curve, plot_spread_vs_tf
    from .report import _png

    pngs: dict[str, bytes] = {}
    draws = [r for r in rows if r["draw"] >= 0]
    if draws:
        tf_max = max(r["tf_ns"] for r in draws)
        last = [r for r in draws if r["tf_ns"] == tf_max]
        for key, xlabel, log in (
            ("trace_distance", "trace distance to the noisy steady state", True),
            ("intended_ground_probability", "probability of the intended ground space", False),
        ):
            values: dict[str, list[float]] = {}
            for r in last:
                values.setdefault(_label(r), []).append(r[key])
            fig = plot_ensemble_histograms(values, f"{xlabel} (tf = {tf_max:g} ns)", log=log)
            pngs[f"histogram_{key}"] = _png(fig)
        nominal = {
            _label(r): r["nominal_trace_distance"] for r in per_point if r["tf_ns"] == tf_max
        }
        relative: dict[str, list[float]] = {}
        for r in last:
            ref = nominal.get(_label(r), math.nan)
            if ref > 0:
                relative.setdefault(_label(r), []).append(r["trace_distance"] / ref - 1.0)
        fig = plot_ensemble_histograms(
            relative, f"trace distance / noiseless - 1 (tf = {tf_max:g} ns)", log=False
        )
        pngs["histogram_relative_trace_distance"] = _png(fig)
    for key, ylabel in (
        ("trace_distance_spread", "spread (std / mean) of the trace distance"),
        ("intended_probability_spread", "spread of the intended ground-state probability"),
    ):
        series: dict[str, tuple[list[float], list[float]]] = {}
        for r in per_point:
            tf, vals = series.setdefault(_label(r), ([], []))
            tf.append(r["tf_ns"])
            vals.append(r[key])
        pngs[f"spread_{key}"] = _png(plot_spread_vs_tf(series, ylabel))
    if precision is not None:
        pngs["precision_curve"] = _png(plot_flip_curve(precision))
    return pngs


# -- HTML -------------------------------------------------------------------------------
def _model_text(spec: Spec) -> str:
    noise = spec.noise
    if noise is None:
        return ""
    return (
        f"Noise model: Gaussian errors on {', '.join(noise.terms) or 'no coefficient'} with "
        f"standard deviation {noise.level:g} of the largest |h_i|, |J_ij|; relative "
        f"amplitude errors of A(s) and B(s) with standard deviation "
        f"{noise.amplitude_level:g}; {noise.draws} draws from seed {noise.seed}."
    )


def _precision_text(precision: Any) -> str:
    if precision is None:
        return ""
    search = precision.search
    if math.isfinite(precision.crossing):
        found = (
            f"the probability that the ground state changes reaches the target "
            f"{search.target:g} at noise level {precision.crossing:.3g} (search: "
            f"{search.status})"
        )
    else:
        found = f"the target {search.target:g} is not reached (search: {search.status})"
    return (
        "Static study of the problem (no dynamics, the same draws): "
        + found
        + "; the figure shows the estimate with its Wilson intervals (Wilson, JASA 1927)."
    )


#: Column headings of the section's tables (the CSV column names, in words).
_LABELS = {
    "nominal_slope": "slope without noise",
    "nominal_verdict": "verdict without noise",
    "fitted": "draws fitted",
    "agrees": "draws agreeing",
    "slope_mean": "slope mean",
    "slope_std": "slope std",
    "nominal_trace_distance": "trace distance without noise",
    "trace_distance_mean": "trace distance mean",
    "trace_distance_std": "trace distance std",
    "trace_distance_spread": "trace distance spread",
    "nominal_intended_probability": "intended probability without noise",
    "intended_probability_mean": "intended probability mean",
    "intended_probability_std": "intended probability std",
    "intended_probability_spread": "intended probability spread",
}


def noise_section(
    spec: Spec,
    per_schedule: Sequence[Mapping[str, Any]],
    per_point: Sequence[Mapping[str, Any]],
    pngs: Mapping[str, bytes],
    *,
    notes: Sequence[str] = (),
    precision: Any = None,
) -> str:
    """The report section (an HTML fragment) of an ensemble.

    Parameters
    ----------
    spec : Spec
        With its ``[noise]`` section.
    per_schedule, per_point : sequence of mapping
        From :func:`schedforge.noise_ensemble.tabulate_ensemble`.
    pngs : mapping
        From :func:`noise_figures`.
    notes : sequence of str
        Paragraphs about the ensemble (failed points, hand-overs...).
    precision : ProblemPrecision, optional
        The static study, summarized in words under its figure.
    """
    from .error_law import dynamics_kind
    from .report import _html_table, _img

    law = (
        "tf<sup>&minus;(min(k_start, k_end)+1)</sup> (closed dynamics)"
        if dynamics_kind(spec) == "closed"
        else "tf<sup>&minus;(k_end+1)</sup> (open dynamics)"
    )
    sched_cols = ["family", "variant", "k_start", "k_end", "error_law", "nominal_slope",
                  "nominal_verdict", "draws", "fitted", "agrees", "slope_mean",
                  "slope_std"]  # fmt: skip
    point_cols = ["family", "variant", "k_start", "k_end", "tf_ns", "draws", "ok",
                  "nominal_trace_distance", "trace_distance_mean", "trace_distance_std",
                  "trace_distance_spread", "nominal_intended_probability",
                  "intended_probability_mean", "intended_probability_std",
                  "intended_probability_spread"]  # fmt: skip
    text_cols = [_LABELS.get(c, c) for c in ("family", "variant", "error_law", "nominal_verdict")]

    def table(columns: Sequence[str], rows: Sequence[Mapping[str, Any]]) -> str:
        shown = [{_LABELS.get(k, k): v for k, v in r.items()} for r in rows]
        return _html_table([_LABELS.get(c, c) for c in columns], shown, text_cols)

    parts = [
        '<section id="control-errors">',
        "<h2>Control errors: which schedule degrades least</h2>",
        f"<p>{html.escape(_model_text(spec))}</p>",
        *(f"<p>{html.escape(n)}</p>" for n in notes),
        "<p>Trace distance: to the final steady state of each draw's own (noisy) problem. "
        "Intended ground-state probability: weight of rho(tf) on the ground space of the "
        "noiseless H(1). Spread: standard deviation over mean across the draws whose "
        "simulation succeeded. Per draw, the trace distance against tf is fitted like a "
        f"sweep, against the law {law}, trusting only tf long against that draw's own "
        "time scale (<i>agrees</i>: the law survives for that draw). <i>played</i>: the "
        "waveform the hardware plays, on each draw's device. The sections after this "
        "one are the sweep report of the noiseless points.</p>",
        "<h3>Error law per draw</h3>",
        table(sched_cols, per_schedule),
        "<h3>Distribution per schedule and anneal time</h3>",
        table(point_cols, per_point),
        "<h3>Figures</h3>",
        '<div class="plots">'
        + "\n".join(_img(name, png) for name, png in pngs.items() if name != "precision_curve")
        + "</div>",
    ]
    if "precision_curve" in pngs:
        parts += [
            "<h3>Precision the problem needs</h3>",
            f"<p>{html.escape(_precision_text(precision))}</p>",
            _img("precision_curve", pngs["precision_curve"], wide=True),
        ]
    parts.append("</section>")
    return "\n".join(parts)


# -- the report of a folder ---------------------------------------------------------------
def ensemble_notes(store_rows: Sequence[Mapping[str, Any]]) -> list[str]:
    """Plain statements about the stored points: how many failed, how many were handed
    over to the general integrator."""
    notes = []
    failed = [r for r in store_rows if r["status"] != "ok"]
    if failed:
        notes.append(
            f"{len(failed)} of {len(store_rows)} point(s) did not succeed; they are left out "
            "of the statistics (see the status column of points.csv)."
        )
    handed = sum("fallback" in str(r.get("integrator", "")) for r in store_rows)
    if handed:
        notes.append(
            f"{handed} of {len(store_rows)} points were handed over to the general "
            "integrator (see points.csv)."
        )
    return notes


def nominal_sweep_rows(store_rows: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """The noiseless points of an ensemble as sweep rows (variant ``ideal``/``realized``)."""
    from .noise_ensemble import NOMINAL, parse_variant

    out = []
    for r in store_rows:
        parsed = parse_variant(str(r["variant"]))
        if parsed is not None and parsed[0] == NOMINAL:
            out.append({**r, "variant": parsed[1]})
    return out


def write_noise_report(
    out_dir: str | Path,
    spec: Spec,
    store_rows: Sequence[Mapping[str, Any]],
    *,
    notes: Sequence[str] | None = None,
    progress: Callable[[str], None] | None = None,
) -> Any:
    """Write ``DIR/report.html`` of an ensemble folder, with fit.csv, spec.toml, the plots.

    Parameters
    ----------
    out_dir : path
        The folder.
    spec : Spec
        The study with its ``[noise]`` section.
    store_rows : sequence of mapping
        Every stored point of the ensemble (nominal and draws).
    notes : sequence of str, optional
        Paragraphs for the control-error section (default :func:`ensemble_notes`).
    progress : callable, optional
        Receives one line of text per step.

    Returns
    -------
    SweepAnalysis
        What :func:`schedforge.report.analyse_sweep_dir` wrote, with the ensemble's
        figures added to ``plots``.
    """
    import dataclasses

    from .control_noise import problem_precision
    from .fileio import atomic_write_bytes
    from .noise_ensemble import tabulate_ensemble
    from .problem_families import IsingProblem
    from .report import PLOTS_DIR, analyse_sweep_dir

    rows, per_point, _, per_schedule = tabulate_ensemble(spec, store_rows)
    precision = (
        None
        if spec.noise is None
        else problem_precision(IsingProblem.from_spec(spec.problem), spec.noise)
    )
    pngs = noise_figures(rows, per_point, precision)
    if notes is None:
        notes = ensemble_notes(store_rows)
    section = noise_section(spec, per_schedule, per_point, pngs, notes=notes, precision=precision)
    analysis = analyse_sweep_dir(
        out_dir,
        spec,
        rows=nominal_sweep_rows(store_rows),
        progress=progress,
        title=NOISE_REPORT_TITLE,
        sections=[section],
    )
    plots = dict(analysis.plots)
    folder = Path(out_dir) / PLOTS_DIR
    for name, data in pngs.items():
        plots[NOISE_PLOT_PREFIX + name] = folder / f"{NOISE_PLOT_PREFIX}{name}.png"
        atomic_write_bytes(plots[NOISE_PLOT_PREFIX + name], data)
    return dataclasses.replace(analysis, plots=plots)


def load_noise_study(folder: str | Path) -> tuple[Spec, list[dict[str, Any]]] | None:
    """The spec and stored points of the ensemble in ``folder``; None for a plain sweep.

    Reads the spec of the store's latest run; the ensemble is recognized by its
    ``[noise]`` section and a store keyed by its noise model
    (:func:`schedforge.noise_ensemble.noise_physics_hash`).

    Raises
    ------
    InputError
        An ensemble whose points are not all stored (rerun noise-sweep), or one
        copied without its store (``points.csv`` lacks the per-point statistics).
    """
    from .errors import InputError
    from .noise_ensemble import ensemble_points, noise_physics_hash, parse_variant
    from .spec import spec_from_dict
    from .store import POINTS_CSV_NAME, STORE_NAME, PointStore, read_points_csv
    from .sweep import point_key

    path = Path(folder) / STORE_NAME
    if not path.exists():
        try:
            rows = read_points_csv(Path(folder) / POINTS_CSV_NAME)
        except InputError:  # missing or damaged: the sweep report's own checks say how
            return None
        if any(parse_variant(str(r["variant"])) is not None for r in rows):
            raise InputError(
                "DIR",
                f"holds a noise ensemble without its store {STORE_NAME}: its report needs the "
                "statistics kept there (points.csv lacks them); copy the folder with its store, "
                "or rerun noise-sweep",
            )
        return None
    with PointStore(path) as store:
        runs = [r for r in store.runs() if r.get("spec_json")]
        if not runs:
            return None
        data = json.loads(runs[-1]["spec_json"])
        if not data.get("noise"):
            return None
        spec = spec_from_dict(data)
        if noise_physics_hash(spec) != store.physics_hash:
            return None
        keys = [point_key(store.physics_hash, p) for p in ensemble_points(spec)]
        rows = store.finished_rows(keys, "noise ensemble", "noise-sweep")
    return spec, rows
