"""``schedforge report DIR``: rebuild the fits, plots and HTML report of a finished sweep.

The study is read from the folder's store (``DIR/sweep.sqlite``) when there is
one: the spec of its latest run and the stored points of that run's grid, so
that the fits are always made against the spec the points were computed with
(an older ``spec.toml`` or ``points.csv`` in the folder is replaced, and said
so).  A folder without a store (copied without it) is read from
``DIR/points.csv`` and ``DIR/spec.toml``.  The folder lock is held throughout:
a sweep running in DIR is not disturbed.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from ..errors import InputError

__all__ = ["register", "run", "study_from_store"]


def register(subparsers: Any) -> None:
    """Add the ``report`` command."""
    p = subparsers.add_parser(
        "report",
        help="rebuild fit.csv, the plots and report.html of a finished sweep folder",
        description="Rebuild DIR/fit.csv, DIR/plots/*.png and DIR/report.html (one "
        "self-contained file) of a finished sweep (also one run with --points-only). The "
        "spec and the points are taken from DIR/sweep.sqlite, so they always belong to "
        "the same study; without a store, from DIR/points.csv and DIR/spec.toml.",
    )
    p.add_argument("dir", metavar="DIR", help="sweep folder written by `schedforge sweep`")
    p.set_defaults(handler=run)


def study_from_store(folder: Path) -> tuple[Any, list[dict[str, Any]]]:
    """The spec of the store's latest run and the stored rows of its grid.

    Raises
    ------
    InputError
        A damaged store, no run recorded, or a grid whose points are not all stored.
    """
    from ..store import STORE_NAME, PointStore
    from ..sweep import point_key, spec_from_store, sweep_points

    spec = spec_from_store(folder)
    with PointStore(folder / STORE_NAME) as store:
        keys = [point_key(store.physics_hash, p) for p in sweep_points(spec)]
        rows = store.finished_rows(keys, "sweep", "sweep")
    return spec, rows


def _spec_copy_disagrees(folder: Path, spec: Any) -> bool:
    from ..report import SPEC_NAME
    from ..spec import load_spec

    path = folder / SPEC_NAME
    if not path.is_file():
        return False
    try:
        return load_spec(path).physics_hash() != spec.physics_hash()
    except InputError:
        return True


def run(args: argparse.Namespace) -> int:
    """Handler: 0 on success; bad input raises InputError (exit 2)."""
    from ..report import SPEC_NAME, analyse_sweep_dir
    from ..store import (
        POINTS_CSV_NAME,
        STORE_NAME,
        check_csv_complete,
        folder_lock,
        write_points_csv,
    )

    folder = Path(args.dir)
    if not folder.is_dir():
        raise InputError("DIR", f"must be an existing sweep folder, got {args.dir!r}")
    has_store = (folder / STORE_NAME).exists()
    if not has_store and not (folder / POINTS_CSV_NAME).is_file():
        raise InputError("DIR", f"must hold {STORE_NAME} or points.csv (a sweep); none in {folder}")
    with folder_lock(folder):
        from ..noise_report import load_noise_study, write_noise_report

        noise = load_noise_study(folder)
        if noise is not None:  # a noise-sweep folder: its own points and report section
            write_points_csv(folder / POINTS_CSV_NAME, noise[1])
            result = write_noise_report(folder, *noise)
        elif has_store:
            spec, rows = study_from_store(folder)
            if _spec_copy_disagrees(folder, spec):
                print(
                    f"note: {folder / SPEC_NAME} did not describe the study in the store; "
                    "it is replaced by the store's spec",
                    file=sys.stderr,
                )
            write_points_csv(folder / POINTS_CSV_NAME, rows)
            result = analyse_sweep_dir(folder, spec, rows=rows)
        else:  # a folder copied without its store: points.csv and spec.toml
            check_csv_complete(folder / POINTS_CSV_NAME)
            result = analyse_sweep_dir(folder)
    print(result.table)
    print(f"wrote {result.fit_csv}")
    print(f"wrote {result.report_html}")
    return 0
