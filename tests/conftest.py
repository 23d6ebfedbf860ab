"""Shared test fixtures (kept small on purpose)."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest


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
