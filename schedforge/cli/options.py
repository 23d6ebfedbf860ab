"""Option helpers shared by the command modules."""

from __future__ import annotations

import argparse
import math
from collections.abc import Callable
from pathlib import Path

from ..errors import InputError
from ..executors import EXECUTOR_KINDS
from ..fileio import writable_folder_problem

__all__ = [
    "EXIT_LIMIT_VIOLATION",
    "add_executor_arguments",
    "add_spec_argument",
    "check_output_dir",
    "check_output_path",
    "executor_kind",
    "nonnegative_float",
    "positive_float",
    "positive_int",
]

#: Exit status of ``design`` when the waveform breaks a limit of the spec's [waveform].
EXIT_LIMIT_VIOLATION = 3


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


def nonnegative_float(option: str) -> Callable[[str], float]:
    """An argparse ``type`` accepting a finite number >= 0 (``option`` names it on error)."""

    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"must be a number >= 0, got {text!r}") from None
        if not (math.isfinite(value) and value >= 0):
            raise argparse.ArgumentTypeError(f"must be a number >= 0, got {text!r}")
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


def add_executor_arguments(parser: argparse.ArgumentParser) -> None:
    """Add where a study's points run: ``--executor``, ``--workers``, ``--scheduler``,
    ``--dask-local`` (read back with :func:`executor_kind`)."""
    parser.add_argument(
        "--executor",
        choices=EXECUTOR_KINDS,
        default=None,
        help="where points run: serial, local processes (default) or dask",
    )
    parser.add_argument(
        "--workers",
        type=positive_int("--workers"),
        metavar="N",
        help="processes for --executor processes (default: all cores)",
    )
    parser.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        help="join a running Dask scheduler (tcp://host:8786); its workers need the same "
        "schedforge version installed",
    )
    parser.add_argument(
        "--dask-local",
        type=positive_int("--dask-local"),
        metavar="N",
        help="start a Dask LocalCluster with N workers",
    )


def executor_kind(args: argparse.Namespace) -> str:
    """The executor kind the options of :func:`add_executor_arguments` ask for.

    ``--scheduler`` or ``--dask-local`` imply ``dask``.

    Raises
    ------
    InputError
        ``--scheduler`` or ``--dask-local`` with another ``--executor``.
    """
    uses_dask = args.scheduler is not None or args.dask_local is not None
    kind = args.executor or ("dask" if uses_dask else "processes")
    if uses_dask and kind != "dask":
        option = "--scheduler" if args.scheduler is not None else "--dask-local"
        raise InputError(option, f"needs --executor dask, not --executor {kind}")
    return kind


def check_output_path(path: str, option: str) -> Path:
    """Check that an output file can be written: its folder exists and takes new files.

    Raises
    ------
    InputError
        Naming ``option``: an empty path, a folder, a folder that does not exist,
        is a file, or cannot be written to.
    """
    p = Path(path)
    if not path or p.is_dir():
        raise InputError(option, f"must name a file, got {path!r}")
    problem = writable_folder_problem(p.parent)
    if problem is not None:
        raise InputError(option, f"cannot be written to {path!r}: {problem}")
    return p


def check_output_dir(path: str, option: str) -> Path:
    """Check that an output folder exists and takes new files, or can be created.

    Raises
    ------
    InputError
        Naming ``option``: the path is a file, or neither it nor the nearest
        existing folder above it can be written to.
    """
    p = Path(path)
    if p.exists() and not p.is_dir():
        raise InputError(option, f"must be a folder; {path!r} is a file")
    existing = p
    while not existing.exists() and existing.parent != existing:
        existing = existing.parent
    problem = writable_folder_problem(existing)
    if problem is not None:
        raise InputError(option, f"cannot be written to {path!r}: {problem}")
    return p
