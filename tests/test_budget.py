"""Tests of the error budget (``plan_budget`` and ``schedforge budget``).

The recommendation is checked against real simulations: at the recommended tf
the simulated trace distance must lie within a factor 1.2 of the budget (the
factor is the issue's acceptance rule; our choice, no source).
"""

from __future__ import annotations

import dataclasses
import math

import pytest

from schedforge.budget import candidate_schedules, format_budget_table, plan_budget
from schedforge.cli import main
from schedforge.dynamics import INTEGRATORS, get_integrator
from schedforge.errors import InputError
from schedforge.spec import load_spec


def _fast(spec):
    """The spec with the fast eigenframe integrator when it is registered."""
    get_integrator("general", None)  # loads the built-in integrators into the registry
    name = "eigenframe" if "eigenframe" in INTEGRATORS else spec.numerics.integrator
    return dataclasses.replace(spec, numerics=dataclasses.replace(spec.numerics, integrator=name))


@pytest.fixture(scope="module")
def qubit_spec():
    return load_spec("builtin:driven-qubit")


@pytest.mark.parametrize("eps", [0.0, 1.0, 2.0, -1e-3, math.nan])
def test_budget_rejects_bad_eps(qubit_spec, eps):
    with pytest.raises(InputError, match="--error"):
        plan_budget(qubit_spec, eps, confirm=0)


def test_candidates_follow_the_sweep_grid(qubit_spec):
    cands = candidate_schedules(qubit_spec)
    assert cands == [("beta", 0.0, float(k)) for k in qubit_spec.sweep.k_end]
    assert candidate_schedules(qubit_spec, families=["linear", "beta"], k_values=[2]) == [
        ("beta", 0.0, 2.0),
        ("linear", 0.0, 0.0),
    ]


def test_budget_ranks_by_predicted_tf(qubit_spec):
    plan = plan_budget(qubit_spec, 1e-6, confirm=0)
    tfs = [c.tf_ns for c in plan.candidates]
    assert tfs == sorted(tfs)
    for c in plan.candidates:
        # tf(k) = (C_k / EPS)^(1/(k+1)) solves C_k tf^-(k+1) = EPS.
        assert c.coefficient * c.tf_ns ** -(c.k_end + 1) == pytest.approx(1e-6, rel=1e-12)
        assert c.simulation_status == "not simulated"
    table = format_budget_table(plan)
    assert "not confirmed by simulation" in table


def test_budget_recommendation_meets_the_budget_in_simulation(qubit_spec):
    spec = _fast(qubit_spec)
    eps = 1e-6
    plan = plan_budget(spec, eps, confirm=2)
    simulated = [c for c in plan.candidates if c.simulation_status == "ok"]
    assert len(simulated) == 2
    for c in simulated:
        assert c.in_regime
        assert eps / 1.2 <= c.error_simulated <= 1.2 * eps, (c, format_budget_table(plan))
    rec = plan.recommended
    assert rec is not None and rec.simulation_status == "ok"
    assert rec.tf_ns == min(c.tf_ns for c in plan.candidates if c.in_regime)


def test_budget_cli(capsys):
    assert main(["budget", "builtin:driven-qubit", "--error", "2"]) == 2
    err = capsys.readouterr().err
    assert "--error" in err and "Traceback" not in err
    assert main(["budget", "builtin:driven-qubit", "--error", "1e-5", "--confirm", "0",
                 "--quiet"]) == 0  # fmt: skip
    out = capsys.readouterr().out
    assert "tf_ns predicted" in out and "recommended:" in out
