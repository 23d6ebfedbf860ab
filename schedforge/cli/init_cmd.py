"""``schedforge init``: write a commented spec template to start a study from."""

from __future__ import annotations

import argparse
from typing import Any

from ..errors import InputError
from ..fileio import atomic_write_text
from ..spec import TEMPLATE
from .options import check_output_path

__all__ = ["register", "run"]

DEFAULT_PATH = "study.toml"


def register(subparsers: Any) -> None:
    """Add the ``init`` command."""
    parser = subparsers.add_parser(
        "init",
        help="write a commented spec template",
        description="Write a commented study spec (TOML) with every key at its default value.",
    )
    parser.add_argument(
        "path",
        metavar="PATH",
        nargs="?",
        default=DEFAULT_PATH,
        help=f"where to write the template (default: {DEFAULT_PATH})",
    )
    parser.add_argument("--force", action="store_true", help="overwrite PATH if it already exists")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Write the template; refuse to overwrite an existing file without ``--force``."""
    path = check_output_path(args.path, "PATH")
    if path.exists() and not args.force:
        raise InputError("PATH", f"{str(path)!r} already exists; pass --force to overwrite it")
    atomic_write_text(path, TEMPLATE)
    print(f"wrote {path}")
    return 0
