"""Shared test fixtures (kept small on purpose)."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest

ZERO_FIELD_RING_TOML = """
version = 1
[device]
curves = "linear"
A0_ghz = 3.5
B0_ghz = 2.5
[problem]
qubits = 4
h = [0.0, 0.0, 0.0, 0.0]
J = [[0, 1, -1.0], [1, 2, -1.0], [2, 3, -1.0], [0, 3, -1.0]]
[bath]
spectrum = "ohmic"
coupling = "x"
eta = 1e-3
cutoff_ghz = 8.0
temperature_mk = 20.0
"""


@pytest.fixture(scope="session")
def zero_field_ring():
    """A uniform ferromagnetic 4-qubit ring without fields, bath coupled through X.

    The problem a new user writes first: spin-flip parity is conserved, and the
    classical levels of H(1) are degenerate and split by the driver just before it.
    """
    import tomllib

    from schedforge.spec import parse_spec
    from schedforge.system import System

    return System.from_spec(parse_spec(tomllib.loads(ZERO_FIELD_RING_TOML)))


@pytest.fixture
def write_spec(tmp_path: Path) -> Callable[..., Path]:
    """Write TOML text to ``tmp_path / name`` and return the path."""

    def write(text: str, name: str = "spec.toml") -> Path:
        path = tmp_path / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")
        return path

    return write


@pytest.fixture
def run_cli(capsys: pytest.CaptureFixture[str]) -> Callable[..., tuple[int, str, str]]:
    """Run ``schedforge.cli.main`` in-process; return (exit status, stdout, stderr)."""
    from schedforge.cli import main

    def run(*argv: str) -> tuple[int, str, str]:
        code = main([str(a) for a in argv])
        captured = capsys.readouterr()
        return code, captured.out, captured.err

    return run
