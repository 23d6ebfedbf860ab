"""Option helpers shared by the command modules."""

from __future__ import annotations

import argparse
import math
from collections.abc import Callable
from pathlib import Path

from ..errors import InputError

__all__ = [
    "add_spec_argument",
    "check_output_path",
    "positive_float",
    "positive_int",
]


def positive_float(option: str) -> Callable[[str], float]:
    """An argparse ``type`` accepting a finite number > 0, naming ``option`` on error.

    Parameters
    ----------
    option : str
        The option as the user writes it, e.g. ``"--rate-gsps"``.
    """

    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"must be a number > 0, got {text!r}") from None
        if not (math.isfinite(value) and value > 0):
            raise argparse.ArgumentTypeError(f"must be a number > 0, got {text!r}")
        return value

    return parse


def positive_int(option: str, minimum: int = 1) -> Callable[[str], int]:
    """An argparse ``type`` accepting an integer >= ``minimum``, naming ``option`` on error."""

    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(
                f"must be an integer >= {minimum}, got {text!r}"
            ) from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"must be an integer >= {minimum}, got {text!r}")
        return value

    return parse


def add_spec_argument(parser: argparse.ArgumentParser) -> None:
    """Add the positional SPEC argument (a TOML file or ``builtin:NAME``)."""
    parser.add_argument(
        "spec",
        metavar="SPEC",
        help="study spec file (TOML), or builtin:NAME for a packaged scenario "
        "(builtin:driven-qubit, builtin:ising-2q)",
    )


def check_output_path(path: str, option: str) -> Path:
    """Check that an output path can be written: its folder exists, it is not a folder.

    Raises
    ------
    InputError
        Naming ``option``.
    """
    p = Path(path)
    if not path or p.is_dir():
        raise InputError(option, f"must name a file, got {path!r}")
    folder = p.parent
    if not folder.is_dir():
        raise InputError(option, f"must be in an existing folder; {str(folder)!r} does not exist")
    return p
