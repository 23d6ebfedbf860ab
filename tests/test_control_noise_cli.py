"""The ``[noise]`` spec section and ``schedforge precision``.

References
----------
- One qubit: P(sign(h + N(0, sigma^2)) != sign(h)) = Phi(-|h| / sigma) (any statistics
  text); the Wilson interval (Wilson, JASA 1927) must contain it.
- Exit statuses 0 / 2 and "no partial output": common practice, no source.
"""

from __future__ import annotations

import csv
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.stats import norm

from schedforge.errors import InputError
from schedforge.spec import TEMPLATE, parse_spec

SPEC = """\
version = 1
[problem]
qubits = 1
h = [0.8]
[noise]
level = 0.5
draws = 4000
seed = 2
target = 0.05
"""

FAMILY = """
[noise.problems]
graph = "chain"
couplings = "gaussian"
sizes = [3, 5]
instances = 2
seed = 4
"""


def console(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    script = Path(sys.executable).with_name("schedforge")
    cmd = [str(script)] if script.exists() else [sys.executable, "-m", "schedforge"]
    return subprocess.run(
        [*cmd, *args],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=120,
        stdin=subprocess.DEVNULL,
    )


def test_template_noise_section_parses_when_uncommented() -> None:
    lines = []
    inside = False
    for line in TEMPLATE.splitlines():
        inside = inside or line.startswith("# [noise]")
        if inside and line.startswith("# ") and ("=" in line or line.startswith("# [noise")):
            line = line[2:]
        lines.append(line)
    import tomllib

    spec = parse_spec(tomllib.loads("\n".join(lines)))
    assert spec.noise is not None and spec.noise.problems is not None
    assert spec.noise.terms == ("h", "J")
    assert spec.noise.problems.graph == "ring"
    assert parse_spec(tomllib.loads(TEMPLATE)).noise is None


@pytest.mark.parametrize(
    ("section", "field"),
    [
        ("[noise]\nlevle = 0.1", "noise.levle"),
        ("[noise]\nlevel = -0.1", "noise.level"),
        ('[noise]\nterms = ["h", "A"]', "noise.terms[1]"),
        ("[noise]\ndraws = 0", "noise.draws"),
        ("[noise]\ntarget = 1.5", "noise.target"),
        ("[noise]\namplitude_level = 1.0", "noise.amplitude_level"),
        ('[noise.problems]\ngraph = "star"', "noise.problems.graph"),
        ("[noise.problems]\nsizes = [4, 40]", "noise.problems.sizes[1]"),
        ('[noise.problems]\ngraph = "ring"\nsizes = [2]', "noise.problems.sizes[0]"),
        ("[noise.problems]\ninstance = 2", "noise.problems.instance"),
    ],
)
def test_noise_section_errors_name_the_field(section: str, field: str) -> None:
    import tomllib

    with pytest.raises(InputError) as err:
        parse_spec(tomllib.loads("version = 1\n" + section))
    assert err.value.field == field


def test_precision_json_one_qubit_phi(run_cli, write_spec) -> None:
    code, out, err = run_cli("precision", write_spec(SPEC), "--json", "--quiet")
    assert code == 0, err
    report = json.loads(out)
    at = report["at_level"]
    exact = norm.cdf(-1.0 / 0.5)  # sigma = level * |h|
    assert at["lower"] <= exact <= at["upper"]
    # precision needed for P < 0.05: Phi(-1/level) = 0.05 at level = -1/Phi^-1(0.05),
    # up to the sampling error of the 4000 draws
    assert report["precision_needed"] == pytest.approx(-1 / norm.ppf(0.05), rel=0.05)
    assert report["degeneracy"] == 1 and report["ground_states"] == ["1"]
    s = report["search"]
    assert s["level_below"] <= report["precision_needed"] <= s["level_above"] * (1 + 1e-9)


def test_precision_options_override_the_spec(run_cli, write_spec) -> None:
    code, out, _ = run_cli(
        "precision", write_spec(SPEC), "--json", "--draws", "100", "--level", "0", "--quiet"
    )
    assert code == 0
    at = json.loads(out)["at_level"]
    assert at["draws"] == 100 and at["changed"] == 0 and at["level"] == 0.0


@pytest.mark.parametrize(
    ("args", "needle"),
    [(["--level", "-1"], "--level"), (["--target", "2"], "--target")],
)
def test_precision_bad_options_exit_2_without_output(
    run_cli, write_spec, tmp_path: Path, args: list[str], needle: str
) -> None:
    out = tmp_path / "out"
    code, _, err = run_cli("precision", write_spec(SPEC), "--out", out, *args)
    assert code == 2
    assert err.startswith("error: ") and needle in err
    assert not out.exists()


def test_precision_bad_spec_exit_2(run_cli, write_spec, tmp_path: Path) -> None:
    out = tmp_path / "out"
    code, _, err = run_cli(
        "precision", write_spec(SPEC.replace("draws = 4000", "draws = 1.5")), "--out", out
    )
    assert code == 2 and "`noise.draws`" in err
    assert not out.exists()


def test_console_script_precision_writes_outputs(tmp_path: Path, write_spec) -> None:
    spec = write_spec(SPEC.replace("draws = 4000", "draws = 300") + FAMILY)
    proc = console("precision", str(spec), "--out", "res", cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr
    assert "precision needed" in proc.stdout
    res = tmp_path / "res"
    names = sorted(p.name for p in res.iterdir())
    assert names == [
        "critical_levels.csv",
        "precision.csv",
        "precision.json",
        "precision.png",
        "sizes-summary.csv",
        "sizes.csv",
        "sizes.png",
    ]
    table = np.genfromtxt(res / "precision.csv", delimiter=",", names=True)
    assert np.all(np.diff(table["probability"]) >= 0)  # common random numbers
    assert np.all(table["lower"] <= table["probability"])
    with open(res / "sizes.csv", newline="", encoding="utf-8") as fh:
        sizes = list(csv.DictReader(fh))
    assert sorted({int(r["size"]) for r in sizes}) == [3, 5] and len(sizes) == 4
    assert sizes[0]["problem"] == "chain n=3 gaussian #0"
