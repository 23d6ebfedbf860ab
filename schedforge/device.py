"""Device energy curves A(s), B(s) from a spec: linear or tabulated.

The curve kinds live in their own modules, below this one:
:class:`~schedforge.device_curves.DeviceCurves` (the interface) and
:class:`~schedforge.device_curves.LinearCurves` in :mod:`schedforge.device_curves`,
:class:`~schedforge.device_table.TabulatedCurves` (a CSV table) in
:mod:`schedforge.device_table`.  They are re-exported here.
"""

from __future__ import annotations

from dataclasses import replace

from .checks import choice, clip, number
from .device_curves import DeviceCurves, LinearCurves
from .device_table import TabulatedCurves
from .errors import InputError
from .limits import MAX_ENERGY_GHZ
from .spec_model import DeviceSpec

__all__ = [
    "DeviceCurves",
    "LinearCurves",
    "TabulatedCurves",
    "check_device",
    "make_device_curves",
]


def check_device(spec: DeviceSpec) -> DeviceSpec:
    """The ``[device]`` section's value rules; shared by the TOML and Python paths.

    ``curves`` is ``"linear"`` or a non-empty path; ``A0_ghz``, ``B0_ghz`` lie in
    (0, :data:`~schedforge.limits.MAX_ENERGY_GHZ`]; ``curves_sha256``, when given, is 64
    lowercase hex digits and belongs to a curves file.  (Resolving a relative path and
    reading the file's digest is the spec reader's job: it knows the spec's folder.)

    Returns
    -------
    DeviceSpec
        With the energies as ``float``.

    Raises
    ------
    InputError
        Naming the field and the rule.
    """
    curves = choice(spec.curves, "device.curves")
    a0 = number(spec.A0_ghz, "device.A0_ghz", gt=0, le=MAX_ENERGY_GHZ)
    b0 = number(spec.B0_ghz, "device.B0_ghz", gt=0, le=MAX_ENERGY_GHZ)
    digest = spec.curves_sha256
    if digest is not None:
        text = choice(digest, "device.curves_sha256")
        if len(text) != 64 or any(c not in "0123456789abcdef" for c in text):
            raise InputError(
                "device.curves_sha256",
                f"must be 64 lowercase hex digits (a SHA-256), got {clip(text)}",
            )
        if curves == "linear":
            raise InputError("device.curves_sha256", 'applies only to a curves CSV, not "linear"')
    if not curves.strip():
        raise InputError("device.curves", 'must be "linear" or the path of a CSV file')
    return replace(spec, A0_ghz=a0, B0_ghz=b0)


def make_device_curves(spec: DeviceSpec) -> DeviceCurves:
    """Build the curves of a :class:`~schedforge.spec_model.DeviceSpec`.

    ``curves = "linear"`` gives :class:`LinearCurves`; any other value is the path
    of a CSV table, read by :meth:`TabulatedCurves.from_csv` (which checks the
    file's SHA-256 against ``curves_sha256`` when it is recorded).  The spec's values
    are checked by :func:`check_device`.
    """
    spec = check_device(spec)
    if spec.curves == "linear":
        return LinearCurves(spec.A0_ghz, spec.B0_ghz)
    return TabulatedCurves.from_csv(spec.curves, sha256=spec.curves_sha256)
