"""Tests of tabulated device curves (schedforge.device_table).

References: spline interpolation of degree d reproduces polynomials of degree <= d
exactly and converges as h^(d+1) for smooth functions (de Boor, A Practical Guide
to Splines, 1978); SymPy differentiates the reference polynomials.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import sympy as sp

from schedforge.device import make_device_curves
from schedforge.device_table import TabulatedCurves
from schedforge.errors import InputError
from schedforge.spec_model import DeviceSpec

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "device_curves_example.csv"


def _write(tmp_path: Path, rows: list[str], name: str = "curves.csv") -> Path:
    p = tmp_path / name
    p.write_text("\n".join(rows) + "\n", encoding="utf-8")
    return p


def _table(s, a, b) -> list[str]:
    return ["s,A_ghz,B_ghz"] + [
        f"{x:.17g},{y:.17g},{z:.17g}" for x, y, z in zip(s, a, b, strict=True)
    ]


def test_quintic_polynomials_are_reproduced_with_exact_derivatives(tmp_path: Path) -> None:
    # A degree-5 spline reproduces any quintic exactly (de Boor 1978); derivatives from SymPy.
    x = sp.Symbol("s")
    A = 5 * (1 - x) ** 3 + sp.Rational(1, 4) * x**4 * (1 - x) + sp.Rational(1, 10)
    B = 3 * x**2 - x**5 + 2 * x
    s = np.sort(np.concatenate([[0.0, 1.0], np.random.default_rng(3).uniform(0, 1, 15)]))
    fa, fb = sp.lambdify(x, A), sp.lambdify(x, B)
    curves = TabulatedCurves.from_csv(_write(tmp_path, _table(s, fa(s), fb(s))))
    assert curves.continuity == 4
    q = np.linspace(0, 1, 37)
    got = curves.derivatives(q, 6)
    for n in range(7):
        ra = sp.lambdify(x, sp.diff(A, x, n))(q) * np.ones_like(q)
        rb = sp.lambdify(x, sp.diff(B, x, n))(q) * np.ones_like(q)
        np.testing.assert_allclose(got[0, n], ra, atol=1e-8 * 10**n)
        np.testing.assert_allclose(got[1, n], rb, atol=1e-8 * 10**n)


def test_smooth_curve_converges_at_the_spline_rate() -> None:
    # For smooth f the quintic spline error falls as h^6 (de Boor 1978): halving h cuts
    # it by about 64 in the interior.
    errors = []
    for n in (41, 81):
        s = np.linspace(0, 1, n)
        c = TabulatedCurves(s, 3.0 * np.exp(-4 * s), 2.0 + np.sin(2 * s))
        q = np.linspace(0.2, 0.8, 1001)
        errors.append(np.max(np.abs(c.A(q) - 3.0 * np.exp(-4 * q))))
    assert 30 < errors[0] / errors[1] < 130
    assert errors[1] < 1e-10


def test_continuity_is_c4_and_the_fifth_derivative_jumps() -> None:
    s = np.linspace(0, 1, 21)
    c = TabulatedCurves(s, np.exp(-3 * s), 1 + s**6)
    knots = c._spline.t[6:-6]  # interior knots of the degree-5 spline
    eps = 1e-9
    left = c.derivatives(knots - eps, 5)
    right = c.derivatives(knots + eps, 5)
    jump = np.abs(right - left)
    assert np.all(jump[:, :5] < 1e-5)
    assert np.max(jump[1, 5]) > 1e-3  # the sixth power is not a quintic


def test_example_file_loads_without_warnings() -> None:
    c = make_device_curves(DeviceSpec(curves=str(EXAMPLE)))
    assert isinstance(c, TabulatedCurves)
    assert c.warnings == ()
    assert c.smoothness_warnings(3) == []
    # the invented formula in the file's header, at a point between rows
    s = 0.505
    a = 6.8 * (np.exp(-4.6 * s) - np.exp(-4.6)) / (1 - np.exp(-4.6)) + 0.005
    assert float(c.A(s)) == pytest.approx(a, rel=1e-8)
    assert float(c.B(s)) == pytest.approx(0.15 + 9.6 * s**2 / (1 + 0.4 * s), rel=1e-8)


def test_coarse_and_noisy_tables_are_warned_about() -> None:
    s = np.linspace(0, 1, 11)
    coarse = TabulatedCurves(s, 6.0 * np.exp(-5 * s), 1 + 6 * s**2)
    assert any("too coarse" in w and "A_ghz" in w for w in coarse.warnings)
    s = np.linspace(0, 1, 101)
    noise = 1 + 1e-5 * np.random.default_rng(0).standard_normal(s.size)
    noisy = TabulatedCurves(s, 6.0 * np.exp(-5 * s) * noise, 1 + 6 * s**2)
    assert noisy.smoothness_warnings(1) == []  # curvature still fine
    assert any("too noisy" in w and "order 4" in w for w in noisy.smoothness_warnings(3))
    assert any("C^4" in w for w in noisy.smoothness_warnings(4))


@pytest.mark.parametrize(
    ("rows", "where", "rule"),
    [
        (["s,A_ghz"], "line 1", "header"),
        (["s,A_ghz,B_ghz", "0,1,0", "0.5,x,1", "1,0,2"], "line 3, column A_ghz", "number"),
        (["s,A_ghz,B_ghz", "0,1,0", "0.5,nan,1", "1,0,2"], "line 3, column A_ghz", "finite"),
        (["s,A_ghz,B_ghz", "0,1,0", "0.5,1,-0.2", "1,0,2"], "line 3, column B_ghz", ">= 0"),
        (["s,A_ghz,B_ghz", "0,1,0", "0.5,1,1", "0.5,1,1"], "line 4, column s", "increase"),
        (["s,A_ghz,B_ghz", "0,1,0", "1.5,1,1"], "line 3, column s", "[0, 1]"),
        (["# note", "s,A_ghz,B_ghz", "0.1,1,0", "1,1,1"], "line 3, column s", "s = 0"),
        (["s,A_ghz,B_ghz", "0,1,0", "0.9,1,1"], "line 3, column s", "s = 1"),
        (["s,A_ghz,B_ghz", "0,1,0", "0.5,1"], "line 3", "3 comma-separated"),
        (["s,A_ghz,B_ghz", "0,1,0", "1,0,1"], "curves.csv)", "at least 6 rows"),
    ],
)
def test_bad_tables_name_file_line_and_column(tmp_path: Path, rows, where, rule) -> None:
    with pytest.raises(InputError) as info:
        TabulatedCurves.from_csv(_write(tmp_path, rows))
    assert info.value.field.startswith("device.curves (curves.csv)")
    assert where in info.value.field
    assert rule in info.value.rule


def test_missing_file_and_negative_overshoot(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="does not exist"):
        TabulatedCurves.from_csv(tmp_path / "none.csv")
    # A drops to 0 abruptly: the quintic interpolant overshoots below zero
    s = np.linspace(0, 1, 11)
    a = np.where(s < 0.75, 1.0, 0.0)
    with pytest.raises(InputError, match="dips below 0"):
        TabulatedCurves.from_csv(_write(tmp_path, _table(s, a, s)))


@pytest.mark.parametrize(
    ("changes", "field"),
    [
        ({"A0_ghz": 0.0}, "device.A0_ghz"),
        ({"B0_ghz": float("inf")}, "device.B0_ghz"),
        ({"A0_ghz": 2e6}, "device.A0_ghz"),
        ({"curves_sha256": "abc"}, "device.curves_sha256"),
        ({"curves_sha256": "0" * 64}, "device.curves_sha256"),  # not for linear curves
        ({"curves": " "}, "device.curves"),
    ],
)
def test_device_rules_are_the_same_from_toml_and_from_python(
    changes: dict[str, object], field: str
) -> None:
    from schedforge.spec import parse_spec
    from schedforge.spec_model import DeviceSpec

    with pytest.raises(InputError) as from_toml:
        parse_spec({"version": 1, "device": changes})
    with pytest.raises(InputError) as from_python:
        make_device_curves(DeviceSpec(**changes))  # type: ignore[arg-type]
    assert from_toml.value.field == from_python.value.field == field
    assert str(from_toml.value) == str(from_python.value)
