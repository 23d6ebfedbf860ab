"""Tests of the sweep analysis outputs: fit.csv, plots, spec copy and report.html.

The points are synthetic (a power law C tf^-(k+1) with a 1/tf correction and
noise at the integrator tolerance, our own demo data); the coefficients C come
from the prediction for the built-in driven-qubit scenario, so the predicted and
fitted lines of the report must coincide.  The checks are about the files:
every plot is present, embedded, and a valid PNG.
"""

from __future__ import annotations

import base64
import csv
import html
import re

import numpy as np
import pytest

from schedforge.analysis import FIT_COLUMNS
from schedforge.cli import main
from schedforge.prediction import predicted_coefficient
from schedforge.report import CAUTION, analyse_sweep_dir
from schedforge.schedules import make_schedule
from schedforge.spec import load_spec, spec_to_toml
from schedforge.system import System

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def sweep_dir(tmp_path_factory):
    spec = load_spec("builtin:driven-qubit")
    system = System.from_spec(spec)
    folder = tmp_path_factory.mktemp("sweep")
    rng = np.random.default_rng(0)
    rows = []
    for k in (0, 1, 2):
        c = predicted_coefficient(system, make_schedule("beta", k_start=0, k_end=k)).coefficient
        for variant in ("ideal", "realized"):
            for tf in np.geomspace(1e3, 1e6, 10):
                err = c * tf ** -(k + 1.0) * (1.0 + 300.0 / tf) + 1e-14 * rng.random()
                if variant == "realized":
                    err += 1e-9  # imperfect flatness of the played waveform: a floor
                rows.append(
                    dict(family="beta", variant=variant, k_start=0.0, k_end=float(k), tf_ns=tf,
                         trace_distance=err, ground_infidelity=err, excess_energy_ghz=err,
                         status="ok", wall_s=0.01)
                )  # fmt: skip
    with open(folder / "points.csv", "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    result = analyse_sweep_dir(folder, spec)
    return folder, spec, result


def test_fit_csv_has_contract_columns_and_rows(sweep_dir):
    folder, _, result = sweep_dir
    with open(folder / "fit.csv", newline="") as fh:
        reader = csv.DictReader(fh)
        rows = list(reader)
        assert tuple(reader.fieldnames) == FIT_COLUMNS
    assert len(rows) == 6  # 3 k_end x (ideal, realized)
    ideal = [r for r in rows if r["variant"] == "ideal"]
    for r in ideal:
        assert r["verdict"] == "agrees"
        k = float(r["k_end"])
        assert float(r["expected_slope"]) == -(k + 1)
        # The synthetic data were built from the prediction: the fit recovers it.
        assert float(r["coefficient_fit"]) == pytest.approx(float(r["coefficient_predicted"]),
                                                            rel=0.01)  # fmt: skip
    realized = [r for r in rows if r["variant"] == "realized"]
    assert all(r["coefficient_predicted"] == "" for r in realized)
    assert any(r["verdict"] != "agrees" for r in realized)
    assert "agrees" in result.table


def test_report_is_self_contained_and_holds_every_plot(sweep_dir):
    folder = sweep_dir[0]
    text = (folder / "report.html").read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>") and text.rstrip().endswith("</html>")
    # Every plot written to plots/ is embedded (one image each), and nothing external.
    names = sorted(p.stem for p in (folder / "plots").glob("*.png"))
    expected = {f"error_beta_k{k}_{v}" for k in (0, 1, 2) for v in ("ideal", "realized")}
    assert set(names) == expected | {"local_slopes", "schedules", "gap"}
    images = re.findall(r'<img[^>]*alt="([^"]+)"[^>]*src="data:image/png;base64,([^"]+)"', text)
    assert sorted(n for n, _ in images) == names
    for name, data in images:
        png = base64.b64decode(data)
        assert png.startswith(PNG_MAGIC)
        assert png == (folder / "plots" / f"{name}.png").read_bytes()
    assert not re.search(r'(src|href)="(https?:|file:|/)', text)
    # Cautions, tables and the spec.
    assert html.escape(CAUTION) in text
    assert "regime tf (ns)" in text and "coefficient_predicted" in text  # header, its tooltip
    assert "[bath]" in text and "temperature_mk = 12.0" in text


def test_spec_copy_round_trips(sweep_dir):
    folder, spec, _ = sweep_dir
    back = load_spec(folder / "spec.toml")
    assert back.physics_hash() == spec.physics_hash()
    assert back.sweep == spec.sweep
    assert spec_to_toml(back).splitlines()[1:] == spec_to_toml(spec).splitlines()[1:]


def test_report_command_rebuilds(sweep_dir, capsys):
    folder, _, _ = sweep_dir
    (folder / "report.html").unlink()
    assert main(["report", str(folder)]) == 0
    out = capsys.readouterr().out
    assert "agrees" in out and "report.html" in out
    assert (folder / "report.html").is_file()


def test_report_command_bad_dir(tmp_path, capsys):
    assert main(["report", str(tmp_path / "nowhere")]) == 2
    err = capsys.readouterr().err
    assert "DIR" in err and "Traceback" not in err
    # A folder without points.csv is refused, and nothing is written into it.
    assert main(["report", str(tmp_path)]) == 2
    assert list(tmp_path.iterdir()) == []


def test_sweep_command_calls_the_analysis_hook(tmp_path, capsys):
    # End to end through the CLI: a small real sweep of an invented one-qubit
    # scenario (the built-in driven qubit's physics) in its equilibrated regime.
    spec_file = tmp_path / "study.toml"
    spec_file.write_text(
        "version = 1\n"
        "[problem]\nqubits = 1\nh = [0.7]\n"
        '[numerics]\nintegrator = "eigenframe"\n'
        "[sweep]\ntf_ns = [2e4, 4e4, 8e4, 1.6e5]\nk_end = [1, 2]\n"
    )
    out = tmp_path / "run"
    assert main(["sweep", str(spec_file), "--out", str(out), "--executor", "serial",
                 "--quiet"]) == 0  # fmt: skip
    assert capsys.readouterr().out == ""  # --quiet: the summary table is not printed
    with open(out / "fit.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["verdict"] for r in rows] == ["agrees", "agrees"]
    for r in rows:
        assert float(r["coefficient_fit"]) == pytest.approx(float(r["coefficient_predicted"]),
                                                            rel=0.01)  # fmt: skip
    assert (out / "report.html").is_file() and (out / "spec.toml").is_file()


def test_predicted_trace_distance_is_never_drawn_above_one():
    """A trace distance is at most 1 (||rho - sigma||_1 / 2 of two states; Nielsen and
    Chuang 2000): the predicted line C tf^-(k+1) is not drawn where it exceeds 1."""
    from schedforge.analysis import fit_scaling
    from schedforge.plotting.scaling import plot_error_vs_tf

    tf = np.geomspace(10.0, 1e4, 8)
    fit = fit_scaling(tf, 1e-3 * tf**-2.0, k_end=1, family="beta", coefficient_predicted=1e5)
    fig = plot_error_vs_tf(fit)
    (pred,) = [ln for ln in fig.axes[0].get_lines() if ln.get_label().startswith("predicted")]
    y = np.asarray(pred.get_ydata(), dtype=float)
    assert np.nanmax(y) <= 1.0
    assert np.isfinite(y).sum() > 10  # the part below 1 is still drawn
    t = np.asarray(pred.get_xdata(), dtype=float)
    assert np.isnan(y[t < np.sqrt(1e5) * 0.99]).all()  # C tf^-2 > 1 below tf = 316 ns
