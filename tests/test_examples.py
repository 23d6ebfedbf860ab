"""Every shipped example works for every command it says it is meant for (issue 15).

Each ``examples/*.toml`` names its commands on a ``# Meant for:`` line; this test runs
each of them (small anneal times and grids, to stay quick) and checks the exit status
and the plain outcome.  ``examples/device_curves_example.csv`` is a device table: it is
loaded through a spec and designed and inspected.

References
----------
- Exit status 0 for a successful run: the project's contract (README); common practice,
  no source.
- A Davies generator has a unique steady state when the coupling operators connect every
  pair of eigenstates of H(1) (Spohn, Rep. Math. Phys. 1977, cited from memory): with
  A(1) = 0, H(1) is diagonal in Z, so an X coupling connects them and a Z coupling does not.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from schedforge.samples import read_samples_csv

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
SPECS = sorted(EXAMPLES.glob("*.toml"))
# small anneal times that keep each command to a few seconds
QUICK_TF = {"waveform-limits.toml": 300.0, "closed-chain-3q.toml": 10.0}


def meant_for(path: Path) -> list[str]:
    match = re.search(r"^# Meant for: (.+)$", path.read_text(encoding="utf-8"), re.M)
    assert match, f"{path.name} must say what it is meant for ('# Meant for: ...')"
    return [c.strip() for c in match.group(1).split(",")]


def quick_copy(path: Path, folder: Path, tf_ns: float) -> Path:
    """The example with its [sweep] grid cut to one anneal time and one k_end."""
    text = path.read_text(encoding="utf-8")
    text = re.sub(r"^tf_ns = \[.*\]$", f"tf_ns = [{tf_ns}]", text, flags=re.M)
    text = re.sub(r"^k_end = \[.*\]$", "k_end = [1]", text, flags=re.M)
    copy = folder / path.name
    copy.write_text(text, encoding="utf-8")
    return copy


def test_every_example_is_listed() -> None:
    assert {p.name for p in SPECS} == set(QUICK_TF)


@pytest.mark.slow
@pytest.mark.parametrize("path", SPECS, ids=lambda p: p.name)
def test_example_runs_every_command_it_is_meant_for(path: Path, run_cli, tmp_path) -> None:
    commands = meant_for(path)
    tf = QUICK_TF[path.name]
    for command in commands:
        if command == "inspect":
            code, out, err = run_cli("inspect", path)
            assert code == 0, err
        elif command == "design":
            out_csv = tmp_path / "design.csv"
            code, out, err = run_cli(
                "design", path, "--out", out_csv, "--plot", tmp_path / "design.png"
            )
            assert code == 0, err  # within the example's own limits
            assert len(read_samples_csv(out_csv)) >= 2
        elif command in ("simulate", "simulate --as-played"):
            extra = ["--as-played"] if command.endswith("--as-played") else []
            code, out, err = run_cli("simulate", path, "--tf-ns", tf, "--json", "--quiet", *extra)
            assert code == 0, err
            result = json.loads(out)
            assert result["status"] == "ok"
            assert result["variant"] == ("realized" if extra else "ideal")
            assert 0 < result["trace_distance"] < 1
        elif command == "sweep":
            copy = quick_copy(path, tmp_path, tf)
            code, out, err = run_cli(
                "sweep", copy, "--out", tmp_path / "sweep", "--executor", "serial"
            )
            assert code == 0, err
            assert (tmp_path / "sweep" / "report.html").exists()
            if "[waveform]" in copy.read_text(encoding="utf-8"):  # played points said slow
                assert "as played, each far slower" in err
        elif command == "budget":
            code, out, err = run_cli("budget", path, "--error", "1e-5", "--confirm", "0", "--quiet")
            assert code == 0, err
            assert "steady state" not in out + err  # the final steady state is unique
        else:
            pytest.fail(f"{path.name}: unknown command {command!r} on its '# Meant for' line")


def test_device_table_example_designs(run_cli, write_spec, tmp_path) -> None:
    spec = write_spec(
        f'version = 1\n[device]\ncurves = "{(EXAMPLES / "device_curves_example.csv").as_posix()}"\n'
    )
    assert run_cli("inspect", spec)[0] == 0
    code, _, err = run_cli("design", spec, "--out", tmp_path / "d.csv", "--points", "11")
    assert code == 0, err
    table = read_samples_csv(tmp_path / "d.csv")
    assert table.A_ghz[0] == pytest.approx(6.805, rel=1e-6)  # first row of the table
