"""``schedforge report DIR``: rebuild the fits, plots and HTML report of a finished sweep."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from ..errors import InputError

__all__ = ["register", "run"]


def register(subparsers: Any) -> None:
    """Add the ``report`` command."""
    p = subparsers.add_parser(
        "report",
        help="rebuild fit.csv, the plots and report.html of a finished sweep folder",
        description="Rebuild DIR/fit.csv, DIR/plots/*.png and DIR/report.html (one "
        "self-contained file) from DIR/points.csv and DIR/spec.toml of a finished sweep.",
    )
    p.add_argument("dir", metavar="DIR", help="sweep folder written by `schedforge sweep`")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Handler: 0 on success; bad input raises InputError (exit 2)."""
    from ..report import analyse_sweep_dir

    folder = Path(args.dir)
    if not folder.is_dir():
        raise InputError("DIR", f"must be an existing sweep folder, got {args.dir!r}")
    if not (folder / "points.csv").is_file():
        raise InputError("DIR", f"must hold points.csv (a finished sweep); none in {folder}")
    result = analyse_sweep_dir(folder)
    print(result.table)
    print(f"wrote {result.fit_csv}")
    print(f"wrote {result.report_html}")
    return 0
