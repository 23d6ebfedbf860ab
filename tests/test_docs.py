"""The README and the spec template say what the program does (issue 15).

These checks keep the words next to the code: every command-line option is in the
README's entry for its command, the qubit range of the template is the README's and the
spec's, the template names every integrator, and every statistic ``simulate --json``
prints is explained.  Facts of the project itself; no outside source.
"""

from __future__ import annotations

import argparse
import re
from pathlib import Path

import pytest

from schedforge.cli import build_parser
from schedforge.dynamics import simulate_spec
from schedforge.integrators import INTEGRATORS
from schedforge.spec import MAX_QUBITS, TEMPLATE, load_spec, parse_spec

README = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")


def _commands() -> dict[str, argparse.ArgumentParser]:
    parser = build_parser()
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            return dict(action.choices)
    raise AssertionError("no subcommands")


def _readme_entry(command: str) -> str:
    """The README's bullet for ``schedforge COMMAND``, up to the next bullet."""
    match = re.search(rf"^- `schedforge {command}\b.*?(?=^- `schedforge |^\S)", README, re.M | re.S)
    assert match, f"README has no entry for `schedforge {command}`"
    return match.group(0)


@pytest.mark.parametrize("command", sorted(_commands()))
def test_readme_lists_every_option_of_every_command(command: str) -> None:
    entry = _readme_entry(command)
    for action in _commands()[command]._actions:
        for option in action.option_strings:
            if option in ("-h", "--help"):
                continue
            assert re.search(rf"{re.escape(option)}\b", entry), (
                f"README's entry for `schedforge {command}` does not mention {option}"
            )


def test_readme_mentions_the_top_level_options() -> None:
    assert "`--help`" in README and "`--version`" in README


def test_qubit_range_is_the_same_in_template_readme_and_spec() -> None:
    assert f"1 to {MAX_QUBITS} qubits" in TEMPLATE
    assert f"1 to {MAX_QUBITS} qubits" in " ".join(README.split())
    spec = parse_spec({"version": 1, "problem": {"qubits": MAX_QUBITS, "h": [0.1] * MAX_QUBITS}})
    assert spec.problem.qubits == MAX_QUBITS


def test_template_names_every_integrator_and_explains_the_families() -> None:
    assert INTEGRATORS
    for name in INTEGRATORS:
        assert f'"{name}"' in TEMPLATE, name
    for family in ("linear", "beta", "poly", "points", "gevrey"):
        assert re.search(rf"^#\s+{family}\s+\S", TEMPLATE, re.M), family
    assert "base" in TEMPLATE  # what poly reshapes


def test_every_simulate_statistic_is_explained_in_the_readme() -> None:
    section = README[README.index("### Statistics of `simulate --json`") :]
    section = section[: section.index("\n## ")]
    runs = [
        (load_spec("builtin:driven-qubit"), {"tf_ns": 100.0}),  # eigenframe
        (load_spec("builtin:ising-2q"), {"tf_ns": 100.0}),  # eigenframe, clustered steps
        (
            parse_spec({"version": 1, "numerics": {"integrator": "general"}}),
            {"tf_ns": 10.0},
        ),
        (
            parse_spec(
                {
                    "version": 1,
                    "bath": {"spectrum": "none"},
                    "initial": {"state": "ground"},
                }
            ),
            {"tf_ns": 10.0},
        ),
        (
            parse_spec(
                {"version": 1, "schedule": {"tf_ns": 50.0}, "waveform": {"sample_rate_gsps": 0.5}}
            ),
            {"variant": "realized"},
        ),  # held
    ]
    for spec, kwargs in runs:
        result = simulate_spec(spec, **kwargs)
        assert result.ok, result.message
        for key in result.stats:
            documented = re.sub(r"^rejected_\w+$", "rejected_<reason>", key)
            assert f"`{documented}`" in section, f"{result.integrator}: stats[{key!r}]"


def _python_examples() -> list[tuple[str, str]]:
    """Each ```python block of the README with the ```text block that follows it."""
    pattern = r"```python\n(.*?)```\s*\n+prints\s*\n+```text\n(.*?)```"
    return re.findall(pattern, README, re.S)


def test_readme_python_example_runs_and_prints_what_it_shows(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    examples = _python_examples()
    assert examples, "README has no Python example followed by its output"
    monkeypatch.chdir(tmp_path)
    for code, shown in examples:
        exec(compile(code, "README.md", "exec"), {"__name__": "readme_example"})
        assert capsys.readouterr().out == shown


def test_public_api_is_reexported_lazily() -> None:
    import subprocess
    import sys

    import schedforge

    assert set(schedforge.__all__) == {"__version__", *schedforge._EXPORTS}
    for name, module in schedforge._EXPORTS.items():
        assert getattr(schedforge, name) is getattr(
            __import__(f"schedforge.{module}", fromlist=[name]), name
        )
    # `import schedforge` alone loads neither NumPy nor the simulation modules
    code = (
        "import sys, schedforge; "
        "print(sorted(m for m in sys.modules if m.startswith(('numpy', 'schedforge.'))))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
