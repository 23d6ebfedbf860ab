"""The command line: init, design, inspect, error handling and exit statuses.

End-to-end runs go through the installed console script (or ``python -m
schedforge``); the many error paths call ``main([...])`` in-process.

References
----------
- End derivatives of the beta schedules are compared with SymPy (reference
  library): f = I_x(1 + k_start, 1 + k_end) is the integral of the beta density
  x^k_start (1 - x)^k_end / B(1 + k_start, 1 + k_end) (DLMF, Olver et al. 2010, 8.17.2).
- Exit statuses 0 / 1 / 2 and argparse's usage errors: common practice, no source.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import sympy as sp

from schedforge import __version__
from schedforge.samples import parse_fields, read_samples_csv
from schedforge.spec import TEMPLATE, load_spec
from schedforge.spec_model import Spec

SPEC = """\
version = 1
[schedule]
family = "beta"
k_start = {k_start}
k_end = {k_end}
tf_ns = {tf_ns}
"""


def console_command() -> list[str]:
    """The installed ``schedforge`` script, else ``python -m schedforge``."""
    script = Path(sys.executable).with_name("schedforge")
    if script.exists():
        return [str(script)]
    found = shutil.which("schedforge")
    return [found] if found else [sys.executable, "-m", "schedforge"]


def run_process(args: list[str], cwd: Path) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "SCHEDFORGE_DEBUG": "0"}
    return subprocess.run(
        args,
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=120,
        env=env,
        stdin=subprocess.DEVNULL,
    )


def sympy_beta_derivatives(k_start: int, k_end: int, order: int) -> tuple[list, list]:
    """Exact derivatives 0..order of I_x(1 + k_start, 1 + k_end) at x = 0 and x = 1."""
    x, u = sp.symbols("x u")
    density = u**k_start * (1 - u) ** k_end
    f = sp.integrate(density, (u, 0, x)) / sp.integrate(density, (u, 0, 1))
    derivs = [sp.diff(f, x, n) for n in range(order + 1)]
    return [float(d.subs(x, 0)) for d in derivs], [float(d.subs(x, 1)) for d in derivs]


# -- end to end through the installed entry points ----------------------------------
def test_console_script_design_writes_csv_and_plot(tmp_path: Path) -> None:
    proc = run_process(
        [
            *console_command(),
            "design",
            "builtin:driven-qubit",
            "--out",
            "samples.csv",
            "--plot",
            "schedule.png",
            "--rate-gsps",
            "0.25",
        ],
        tmp_path,
    )
    assert proc.returncode == 0, proc.stderr
    assert "wrote samples.csv" in proc.stdout
    table = read_samples_csv(tmp_path / "samples.csv")
    spec = load_spec("builtin:driven-qubit")
    tf = spec.schedule.tf_ns
    assert len(table) == round(tf * 0.25) + 1
    x = table.t_ns / tf
    # beta k_start = 0, k_end = 2: f = 1 - (1 - x)^3 (DLMF 8.17 with a = 1)
    np.testing.assert_allclose(table.s, 1 - (1 - x) ** 3, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(table.B_ghz, 2.5 * table.s, rtol=1e-12)
    assert table.metadata["spec"] == "builtin:driven-qubit"
    assert parse_fields(table.metadata["schedule"])["family"] == "beta"
    assert (tmp_path / "schedule.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_python_m_inspect_json_matches_sympy(tmp_path: Path, write_spec) -> None:
    spec = write_spec(SPEC.format(k_start=1, k_end=3, tf_ns=500.0))
    proc = run_process(
        [sys.executable, "-m", "schedforge", "inspect", str(spec), "--json"], tmp_path
    )
    assert proc.returncode == 0, proc.stderr
    report = json.loads(proc.stdout)
    start, end = sympy_beta_derivatives(1, 3, 5)  # orders 0 .. max(k) + 2
    np.testing.assert_allclose(report["start_derivatives"], start, rtol=1e-10, atol=1e-9)
    np.testing.assert_allclose(report["end_derivatives"], end, rtol=1e-10, atol=1e-9)
    assert report["flat_start"] == 1 and report["flat_end"] == 3
    assert report["monotone"] is True


def test_version_and_help(run_cli) -> None:
    code, out, _ = run_cli("--version")
    assert code == 0 and out.strip() == f"schedforge {__version__}"
    for command in ([], ["init"], ["design"], ["inspect"]):
        code, out, _ = run_cli(*command, "--help")
        assert code == 0 and "usage: schedforge" in out
    code, _, err = run_cli()
    assert code == 2 and "a command is required" in err


# -- in-process ---------------------------------------------------------------------
def test_inspect_table_and_json_default_scenario(run_cli) -> None:
    code, out, _ = run_cli("inspect", "builtin:driven-qubit", "--json")
    assert code == 0
    report = json.loads(out)
    start, end = sympy_beta_derivatives(0, 2, 4)
    np.testing.assert_allclose(report["start_derivatives"], start, atol=1e-12)
    np.testing.assert_allclose(report["end_derivatives"], end, atol=1e-12)
    assert (report["flat_start"], report["flat_end"], report["monotone"]) == (0, 2, True)
    code, out, _ = run_cli("inspect", "builtin:driven-qubit")
    assert code == 0 and "flat end:   first 2 derivative(s) vanish" in out


def test_inspect_real_k_reports_infinite_orders_as_null(run_cli, write_spec) -> None:
    spec = write_spec(SPEC.format(k_start=0, k_end=1.5, tf_ns=100.0))
    code, out, _ = run_cli("inspect", spec, "--json")
    assert code == 0
    report = json.loads(out)
    end = report["end_derivatives"]
    # f' is proportional to (1 - x)^1.5: orders 1, 2 vanish, orders 3, 4 diverge at x = 1
    assert end[0] == pytest.approx(1.0) and end[1] == 0.0 and end[2] == 0.0
    assert end[3] is None and end[4] is None
    assert report["flat_end"] == 2
    assert any("infinite" in note for note in report["notes"])


def test_design_points_and_round_trip(run_cli, write_spec, tmp_path: Path) -> None:
    spec = write_spec(SPEC.format(k_start=2, k_end=2, tf_ns=40.0))
    out = tmp_path / "s.csv"
    code, _, err = run_cli("design", spec, "--out", out, "--points", "9")
    assert code == 0, err
    table = read_samples_csv(out)
    np.testing.assert_array_equal(table.t_ns, np.linspace(0.0, 40.0, 9))
    schedule = parse_fields(table.metadata["schedule"])
    assert schedule["k_start"] == 2 and schedule["tf_ns"] == 40


def test_design_uses_waveform_rate_from_spec(run_cli, write_spec, tmp_path: Path) -> None:
    spec = write_spec(
        SPEC.format(k_start=0, k_end=1, tf_ns=10.0) + "[waveform]\nsample_rate_gsps = 2.0\n"
    )
    out = tmp_path / "s.csv"
    assert run_cli("design", spec, "--out", out)[0] == 0
    assert len(read_samples_csv(out)) == 21


def test_init_writes_template_and_refuses_to_overwrite(run_cli, tmp_path: Path) -> None:
    target = tmp_path / "study.toml"
    code, out, _ = run_cli("init", target)
    assert f"wrote {target}" in out
    assert code == 0 and target.read_text() == TEMPLATE
    assert load_spec(target) == Spec()
    target.write_text("version = 1\n# edited\n")
    code, _, err = run_cli("init", target)
    assert code == 2 and "already exists" in err and "--force" in err
    assert target.read_text() == "version = 1\n# edited\n"
    code, _, _ = run_cli("init", target, "--force")
    assert code == 0 and target.read_text() == TEMPLATE


GOOD = SPEC.format(k_start=0, k_end=2, tf_ns=100.0)


@pytest.mark.parametrize(
    ("spec_text", "extra", "field"),
    [
        (GOOD.replace('"beta"', '"betta"'), [], "schedule.family"),
        (GOOD.replace("k_end = 2", "k_end = -1"), [], "schedule.k_end"),
        (GOOD.replace("k_start = 0", "k_start = -2"), [], "schedule.k_start"),
        (GOOD.replace("tf_ns = 100.0", "tf_ns = 0.0"), [], "schedule.tf_ns"),
        (GOOD.replace("tf_ns = 100.0", "tf_ns = -3.0"), [], "schedule.tf_ns"),
        (GOOD, ["--rate-gsps", "0"], "--rate-gsps"),
        (GOOD, ["--rate-gsps", "-1.5"], "--rate-gsps"),
        (GOOD, ["--rate-gsps", "fast"], "--rate-gsps"),
        (GOOD, ["--points", "1"], "--points"),
        (GOOD, ["--points", "1", "--rate-gsps", "1"], "--rate-gsps"),
        (GOOD + "[bath]\ntemprature_mk = 5.0\n", [], "bath.temprature_mk"),
        (GOOD + "[bath\n", [], "spec.toml"),
        ("[schedule]\nk_end = 1\n", [], "version"),
        (GOOD, ["--plot", "figure.jpeg"], "--plot"),
        (GOOD, ["--plot", "missing/figure.png"], "--plot"),
        (GOOD, ["--plot", "s.csv"], "--plot"),
    ],
)
def test_design_errors_exit_2_and_name_the_field(
    run_cli, write_spec, tmp_path: Path, spec_text: str, extra: list[str], field: str
) -> None:
    spec = write_spec(spec_text)
    out = tmp_path / "s.csv"
    code, stdout, err = run_cli("design", spec, "--out", out, *extra)
    assert stdout == ""
    assert code == 2
    assert "error:" in err and field in err
    assert "Traceback" not in err
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["spec.toml"]  # no partial files


@pytest.mark.parametrize(
    ("argv", "field"),
    [
        (["design", "{dir}/absent.toml", "--out", "{dir}/s.csv"], "absent.toml"),
        (["design", "builtin:nothing", "--out", "{dir}/s.csv"], "unknown built-in scenario"),
        (["design", "builtin:driven-qubit", "--out", "{dir}/no/s.csv"], "--out"),
        (["design", "builtin:driven-qubit"], "--out"),
        (["inspect", "{dir}/absent.toml"], "absent.toml"),
        (["init", "{dir}/no/such/study.toml"], "PATH"),
        (["frobnicate"], "invalid choice"),
    ],
)
def test_other_bad_input_exit_2(run_cli, tmp_path: Path, argv: list[str], field: str) -> None:
    code, _, err = run_cli(*(a.format(dir=tmp_path) for a in argv))
    assert code == 2
    assert field in err and "Traceback" not in err
    assert list(tmp_path.iterdir()) == []


def test_design_never_overwrites_its_spec(
    run_cli, write_spec, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    spec = write_spec(GOOD)
    monkeypatch.chdir(tmp_path)
    code, _, err = run_cli("design", "spec.toml", "--out", "./spec.toml")
    assert code == 2 and "--out" in err and "spec file" in err
    assert spec.read_text() == GOOD


def test_internal_failure_exits_1_and_leaves_no_partial_file(
    run_cli, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from schedforge.samples import SampleTable

    def broken(self: SampleTable) -> np.ndarray:
        raise RuntimeError("simulated failure while writing")

    monkeypatch.setattr(SampleTable, "as_array", broken)  # fails after the header is written
    out = tmp_path / "s.csv"
    code, _, err = run_cli("design", "builtin:driven-qubit", "--out", out)
    assert code == 1
    assert "internal error: RuntimeError: simulated failure while writing" in err
    assert "Traceback" not in err
    assert list(tmp_path.iterdir()) == []

    monkeypatch.setenv("SCHEDFORGE_DEBUG", "1")
    code, _, err = run_cli("design", "builtin:driven-qubit", "--out", out)
    assert code == 1 and "Traceback" in err
    assert list(tmp_path.iterdir()) == []


def test_broken_command_module_is_an_internal_error(
    run_cli, monkeypatch: pytest.MonkeyPatch
) -> None:
    import schedforge.cli as cli

    monkeypatch.setattr(cli, "COMMAND_MODULES", [*cli.COMMAND_MODULES, "schedforge.cli.absent"])
    code, _, err = run_cli("--version")
    assert code == 1 and err.startswith("internal error: ModuleNotFoundError")


def test_inspect_infinitely_flat_family(run_cli, write_spec) -> None:
    """gevrey: f' = exp(-1/(1-x)) / Z with Z = E_2(1) (scipy.special.expn).

    Every derivative of exp(-1/u) tends to 0 as u -> 0+ (Cauchy's classic smooth,
    non-analytic function), so all end derivatives vanish and k_end is infinite.
    """
    from scipy import special

    spec = write_spec('version = 1\n[schedule]\nfamily = "gevrey"\ntf_ns = 10.0\n')
    code, out, _ = run_cli("inspect", spec, "--json")
    assert code == 0
    report = json.loads(out)
    assert report["k_end"] is None and report["flat_end"] >= 12
    assert report["end_derivatives"][0] == pytest.approx(1.0, abs=1e-12)
    assert all(v == 0.0 for v in report["end_derivatives"][1:])
    assert report["start_derivatives"][1] == pytest.approx(
        math.exp(-1.0) / special.expn(2, 1.0), rel=1e-10
    )
    assert any("infinite" in note for note in report["notes"])
    code, out, _ = run_cli("inspect", spec)
    assert code == 0 and "k_end = infinite" in out
