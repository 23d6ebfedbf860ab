"""The ``schedforge`` command line: a thin layer over the library.

Each command lives in its own module, listed in :data:`COMMAND_MODULES`.  A
command module provides ``register(subparsers)``, which adds its parser and sets
``handler=run`` with ``run(args) -> int``.  :func:`main` turns
:class:`~schedforge.errors.InputError` into ``error: ...`` and exit status 2
(no traceback), and any other exception into ``internal error: ...`` and exit
status 1 (with the traceback only when ``SCHEDFORGE_DEBUG=1``).
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import os
import sys
import traceback
from collections.abc import Sequence

from .. import __version__
from ..errors import InputError

__all__ = ["COMMAND_MODULES", "build_parser", "main"]

#: Command modules, in the order they appear in ``--help``.  Add one line per command.
COMMAND_MODULES: list[str] = [
    "schedforge.cli.init_cmd",
    "schedforge.cli.design",
    "schedforge.cli.inspect_cmd",
    "schedforge.cli.simulate",
    "schedforge.cli.sweep",
    "schedforge.cli.report",
    "schedforge.cli.budget",
    "schedforge.cli.precision",
    "schedforge.cli.noise_sweep",
    "schedforge.cli.demo",
]

_DESCRIPTION = (
    "Design anneal schedules whose first k derivatives vanish at the end of the anneal, "
    "simulate small open spin systems under them, and export waveforms. "
    "Units: E/h in GHz, time in ns, temperature in mK."
)


def build_parser() -> argparse.ArgumentParser:
    """The top-level parser with one subcommand per module in :data:`COMMAND_MODULES`."""
    parser = argparse.ArgumentParser(prog="schedforge", description=_DESCRIPTION)
    parser.add_argument("--version", action="version", version=f"schedforge {__version__}")
    subparsers = parser.add_subparsers(title="commands", metavar="COMMAND")
    for name in COMMAND_MODULES:
        importlib.import_module(name).register(subparsers)
    return parser


def _exit_status(exc: SystemExit) -> int:
    code = exc.code
    if code is None:
        return 0
    return code if isinstance(code, int) else 2


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line and return the exit status.

    Parameters
    ----------
    argv : sequence of str, optional
        Arguments without the program name; ``sys.argv[1:]`` when omitted.

    Returns
    -------
    int
        0 on success, 2 on bad input (including argument errors), 1 on an
        internal failure.
    """
    try:
        parser = build_parser()
        try:
            args = parser.parse_args(argv)
        except SystemExit as exc:  # --help, --version and usage errors
            return _exit_status(exc)
        handler = getattr(args, "handler", None)
        if handler is None:
            parser.print_usage(sys.stderr)
            print("error: a command is required (see schedforge --help)", file=sys.stderr)
            return 2
        return int(handler(args))
    except InputError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except BrokenPipeError:  # output piped into a command that stopped reading
        with contextlib.suppress(OSError, ValueError, AttributeError):
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        return 1
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except Exception as exc:
        if os.environ.get("SCHEDFORGE_DEBUG") == "1":
            traceback.print_exc()
            print(f"internal error: {type(exc).__name__}: {exc}", file=sys.stderr)
        else:
            print(
                f"internal error: {type(exc).__name__}: {exc} "
                "(set SCHEDFORGE_DEBUG=1 for the traceback)",
                file=sys.stderr,
            )
        return 1
