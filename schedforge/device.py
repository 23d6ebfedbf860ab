"""Device energy curves A(s), B(s) from a spec: linear or tabulated.

The curve kinds live in their own modules, below this one:
:class:`~schedforge.device_curves.DeviceCurves` (the interface) and
:class:`~schedforge.device_curves.LinearCurves` in :mod:`schedforge.device_curves`,
:class:`~schedforge.device_table.TabulatedCurves` (a CSV table) in
:mod:`schedforge.device_table`.  They are re-exported here.
"""

from __future__ import annotations

from .device_curves import DeviceCurves, LinearCurves
from .device_table import TabulatedCurves
from .spec_model import DeviceSpec

__all__ = ["DeviceCurves", "LinearCurves", "TabulatedCurves", "make_device_curves"]


def make_device_curves(spec: DeviceSpec) -> DeviceCurves:
    """Build the curves of a :class:`~schedforge.spec_model.DeviceSpec`.

    ``curves = "linear"`` gives :class:`LinearCurves`; any other value is the path
    of a CSV table, read by :meth:`TabulatedCurves.from_csv` (which checks the
    file's SHA-256 against ``curves_sha256`` when it is recorded).
    """
    if spec.curves == "linear":
        return LinearCurves(spec.A0_ghz, spec.B0_ghz)
    return TabulatedCurves.from_csv(spec.curves, sha256=spec.curves_sha256)
