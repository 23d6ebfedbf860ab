"""What a new user meets in the first hour (issue 15): safe waveforms, all-or-nothing
outputs, writable folders, design overrides, the played-waveform figure.

References
----------
- Exit statuses (0 success, 1 internal failure, 2 bad input, 3 a waveform beyond the
  limits entered): the project's contract (README, "Exit status"); distinct statuses
  for distinct outcomes are common practice, no source.
- beta k_start = 0: f = I_x(1, 1 + k) = 1 - (1 - x)^(k+1), so max f' = k + 1 at x = 0
  (NIST DLMF, Olver et al. 2010, 8.17.2 with a = 1).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

from schedforge.fileio import writable_folder_problem
from schedforge.samples import parse_fields, read_samples_csv

# beta k_start = 0, k_end = 1 over 100 ns: ds/dt peaks at 2 / 100 = 0.02 per ns at t = 0
LIMITED = """\
version = 1
[schedule]
family = "beta"
k_start = 0
k_end = 1
tf_ns = 100.0
[waveform]
sample_rate_gsps = 1.0
dac_bits = 12
max_slope_per_ns = {slope}
"""


@pytest.fixture
def unwritable_dir(tmp_path: Path) -> Path:
    """A folder that exists but takes no new file, even for the super-user."""
    if hasattr(os, "geteuid") and os.geteuid() != 0:
        folder = tmp_path / "read-only"
        folder.mkdir()
        folder.chmod(0o555)
        yield folder
        folder.chmod(0o755)
        return
    for candidate in (Path("/proc"), Path("/sys")):
        if candidate.is_dir() and writable_folder_problem(candidate) is not None:
            yield candidate
            return
    pytest.skip("no folder on this machine refuses new files")


# -- priority 1: a waveform beyond the user's limits --------------------------------
def test_design_refuses_a_waveform_beyond_the_limits(run_cli, write_spec, tmp_path) -> None:
    spec = write_spec(LIMITED.format(slope=0.005))
    out = tmp_path / "w.csv"
    code, stdout, err = run_cli("design", spec, "--out", out)
    assert code == 3
    assert not out.exists()
    assert "slope" in stdout and "nothing written" in err and "--allow-limit-violations" in err


def test_design_writes_beyond_the_limits_only_when_asked(run_cli, write_spec, tmp_path) -> None:
    spec = write_spec(LIMITED.format(slope=0.005))
    out = tmp_path / "w.csv"
    code, _, err = run_cli("design", spec, "--out", out, "--allow-limit-violations")
    assert code == 3 and out.exists()
    check = parse_fields(read_samples_csv(out).metadata["waveform_check"])
    assert check["limit_violations"] >= 1
    assert "allow-limit-violations" in err


def test_design_within_the_limits_exits_0(run_cli, write_spec, tmp_path) -> None:
    spec = write_spec(LIMITED.format(slope=0.03))  # above the design's 0.02 per ns
    out = tmp_path / "w.csv"
    code, _, err = run_cli("design", spec, "--out", out)
    assert code == 0, err
    table = read_samples_csv(out)
    assert table.dac_code is not None
    np.testing.assert_array_equal(table.dac_code / 4095.0, table.s)


def test_design_on_a_user_grid_says_the_device_model_is_skipped_and_checks_limits(
    run_cli, write_spec, tmp_path
) -> None:
    spec = write_spec(LIMITED.format(slope=0.005))
    out = tmp_path / "w.csv"
    code, _, err = run_cli("design", spec, "--out", out, "--rate-gsps", "2")
    assert code == 3 and not out.exists()
    assert "device model" in err and "not what the device plays" in err
    code, _, err = run_cli(
        "design", write_spec(LIMITED.format(slope=0.03)), "--out", out, "--points", "11"
    )
    assert code == 0 and "not what the device plays" in err
    assert "ideal design" in read_samples_csv(out).metadata["export"]


# -- priority 2: outputs all or nothing, folders the user named -----------------------
def test_design_writes_nothing_when_the_plot_folder_is_unwritable(
    run_cli, write_spec, tmp_path, unwritable_dir
) -> None:
    spec = write_spec(LIMITED.format(slope=0.03))
    out = tmp_path / "w.csv"
    code, _, err = run_cli("design", spec, "--out", out, "--plot", unwritable_dir / "w.png")
    assert code == 2, err
    assert not out.exists()
    assert str(unwritable_dir) in err and "internal error" not in err


def test_unwritable_folders_are_input_errors(run_cli, tmp_path, unwritable_dir) -> None:
    code, _, err = run_cli("init", unwritable_dir / "study.toml")
    assert code == 2 and str(unwritable_dir) in err and "internal error" not in err
    code, _, err = run_cli(
        "design", "builtin:driven-qubit", "--out", unwritable_dir / "x.csv", "--points", "3"
    )
    assert code == 2 and str(unwritable_dir) in err
    code, _, err = run_cli(
        "sweep", "builtin:driven-qubit", "--out", unwritable_dir / "sweep", "--quiet"
    )
    assert code == 2 and str(unwritable_dir) in err and "internal error" not in err


def test_a_file_in_place_of_a_folder_is_named(run_cli, tmp_path) -> None:
    afile = tmp_path / "afile"
    afile.write_text("x")
    code, _, err = run_cli("design", "builtin:driven-qubit", "--out", afile / "x.csv")
    assert code == 2 and "is a file" in err and "does not exist" not in err
    code, _, err = run_cli("sweep", "builtin:driven-qubit", "--out", afile / "sub", "--quiet")
    assert code == 2 and "is a file" in err


def test_atomic_write_all_writes_all_or_none(tmp_path) -> None:
    from schedforge.fileio import atomic_write_all

    def fail(fh) -> None:
        fh.write(b"half")
        raise OSError("disk full")

    first, second = tmp_path / "a.csv", tmp_path / "b.png"
    with pytest.raises(OSError):
        atomic_write_all([(first, lambda fh: fh.write(b"ok")), (second, fail)])
    assert sorted(p.name for p in tmp_path.iterdir()) == []  # no target, no temporary file
    atomic_write_all([(first, lambda fh: fh.write(b"1")), (second, lambda fh: fh.write(b"2"))])
    assert first.read_bytes() == b"1" and second.read_bytes() == b"2"


# -- design overrides and figure -------------------------------------------------------
def test_design_tf_and_k_end_overrides(run_cli, tmp_path) -> None:
    out = tmp_path / "o.csv"
    code, _, err = run_cli(
        "design",
        "builtin:driven-qubit",
        "--out",
        out,
        "--points",
        "5",
        "--tf-ns",
        "80",
        "--k-end",
        "3",
    )
    assert code == 0, err
    table = read_samples_csv(out)
    schedule = parse_fields(table.metadata["schedule"])
    assert schedule["tf_ns"] == 80 and schedule["k_end"] == 3
    x = table.t_ns / 80.0
    np.testing.assert_allclose(table.s, 1 - (1 - x) ** 4, rtol=1e-12, atol=1e-15)


def test_design_plot_with_waveform_draws_what_is_played(
    run_cli, write_spec, tmp_path, monkeypatch
) -> None:
    import schedforge.plotting.waveform as wf

    drawn = []
    original = wf.plot_played

    def spy(realized, curves, **kw):
        fig = original(realized, curves, **kw)
        drawn.append([ax.get_ylabel() for ax in fig.axes])
        return fig

    monkeypatch.setattr(wf, "plot_played", spy)
    spec = write_spec(LIMITED.format(slope=0.03))
    code, _, err = run_cli(
        "design", spec, "--out", tmp_path / "w.csv", "--plot", tmp_path / "w.png"
    )
    assert code == 0, err
    assert drawn and drawn[0][0] == "s(t)" and "played - design" in drawn[0]
    assert drawn[0][-1] == "E/h (GHz)"
    assert (tmp_path / "w.png").read_bytes()[:4] == b"\x89PNG"


def test_finished_sweep_leaves_no_lock_file(run_cli, write_spec, tmp_path) -> None:
    spec = write_spec(
        'version = 1\n[bath]\nspectrum = "none"\n[initial]\nstate = "ground"\n'
        '[schedule]\nfamily = "beta"\nk_end = 1\ntf_ns = 10.0\n'
        "[sweep]\ntf_ns = [10.0, 20.0]\nk_end = [1]\n"
    )
    out = tmp_path / "sw"
    code, _, err = run_cli(
        "sweep", spec, "--out", out, "--executor", "serial", "--points-only", "--quiet"
    )
    assert code == 0, err
    assert (out / "sweep.sqlite").exists() and not (out / "sweep.lock").exists()


# -- simulate: warnings on stderr, no unknown counts, the played waveform -----------------
def test_simulate_prints_warnings_on_stderr_and_no_unknown_counts(run_cli, write_spec) -> None:
    table = Path(__file__).resolve().parents[1] / "examples" / "device_curves_example.csv"
    spec = write_spec(
        f'version = 1\n[device]\ncurves = "{table.as_posix()}"\n'
        '[schedule]\nfamily = "gevrey"\ntf_ns = 200.0\n'
    )
    code, out, err = run_cli("simulate", spec, "--quiet")
    assert code == 0, err
    assert "?" not in out  # the eigenframe integrator counts no right-hand sides
    assert "warning:" in err and "warning:" not in out


def test_simulate_as_played_needs_a_waveform(run_cli) -> None:
    code, _, err = run_cli("simulate", "builtin:driven-qubit", "--as-played")
    assert code == 2 and "--as-played" in err and "[waveform]" in err


def test_progress_line_carries_a_note() -> None:
    import io

    from schedforge.progress import AnnealProgress

    clock = iter([0.0, 5.0]).__next__
    stream = io.StringIO()
    progress = AnnealProgress(stream=stream, mode="lines", clock=clock, note="played waveform")
    progress(0.5)
    assert stream.getvalue().rstrip().endswith("; played waveform")


# -- messages ------------------------------------------------------------------------------
def test_wrong_case_choice_gets_a_suggestion(run_cli, write_spec) -> None:
    code, _, err = run_cli("inspect", write_spec('version = 1\n[bath]\ncoupling = "X"\n'))
    assert code == 2 and "did you mean `x`?" in err


def test_idle_qubit_is_named_instead_of_a_coupling_it_already_has(run_cli, write_spec) -> None:
    # qubit 1 has no field and no coupling: with A(1) = 0, H(1) does not act on it, so the
    # final Davies generator has a steady state per state of that qubit (Spohn 1977, from
    # memory: uniqueness needs the couplings to connect the levels of H(1))
    spec = write_spec("version = 1\n[problem]\nqubits = 2\nh = [0.5, 0.0]\nJ = []\n")
    code, _, err = run_cli("simulate", spec, "--quiet")
    assert code == 2
    assert "qubit(s) 1" in err and "x or y" not in err and '"x" or "y"' not in err
    spec = write_spec('version = 1\n[bath]\ncoupling = "z"\n')
    code, _, err = run_cli("simulate", spec, "--quiet")
    assert code == 2 and "x or y" in err


def test_dask_hint_installs_from_what_exists(monkeypatch) -> None:
    """The hint names the dependency of the project's own extra (pyproject.toml)."""
    import sys
    import tomllib

    from schedforge.errors import InputError
    from schedforge.executors import _import_distributed

    monkeypatch.setitem(sys.modules, "distributed", None)  # import fails
    with pytest.raises(InputError) as info:
        _import_distributed()
    message = str(info.value)
    assert "schedforge[dask]" not in message and 'pip install -e ".[dask]"' in message
    project = Path(__file__).resolve().parents[1] / "pyproject.toml"
    extra = tomllib.loads(project.read_text())["project"]["optional-dependencies"]["dask"]
    assert f'pip install "{extra[0]}"' in message


@pytest.mark.parametrize(
    "limits",
    ["dac_bits = 6", "breakpoints = 20\nbreakpoint_tolerance = 5e-3\ndac_bits = 10"],
)
def test_design_exports_waveforms_without_a_sample_rate(run_cli, write_spec, tmp_path, limits):
    """Quantized levels or breakpoints without a sample grid (was an internal error)."""
    spec = write_spec(f"version = 1\n[schedule]\ntf_ns = 100.0\nk_end = 1\n[waveform]\n{limits}\n")
    out = tmp_path / "w.csv"
    code, _, err = run_cli("design", spec, "--out", out, "--plot", tmp_path / "w.png")
    assert code == 0, err
    table = read_samples_csv(out)
    bits = parse_fields(table.metadata["waveform"])["dac_bits"]
    np.testing.assert_array_equal(table.dac_code / (2**bits - 1), table.s)
