"""Validation of the dynamics against published results and reference libraries.

* Bloch equations of a damped qubit (Breuer & Petruccione, The Theory of Open Quantum
  Systems, 2002, sec. 3.4): T1 = 1 / (gamma(w) + gamma(-w)), T2 = 2 T1 for transverse
  coupling, pure dephasing 2 gamma(0) for longitudinal coupling.
* Landau-Zener transition probability exp(-pi Delta^2 / (2 v)) (Zener, Proc. R. Soc. A 137,
  696, 1932), and the same finite sweep with QuTiP's sesolve.
* The boundary-cancellation law: trace distance ~ tf^-(k_end + 1) in the equilibrated regime,
  slope within +-0.03 (common practice, no source); a both-ends-flat schedule gives no
  advantage over an end-only one (the law says the error ratio is the ratio of the
  (k+1)-th end derivatives, (2k+1)! / ((k+1) k!^2), checked within 10%).
* Trace, Hermiticity and positivity of the final state; failures are returned, not raised.
"""

from __future__ import annotations

import json
from math import factorial
from typing import Any

import numpy as np
import pytest
import qutip
from scipy import linalg

from schedforge.bath import Bath, OhmicSpectralDensity
from schedforge.device import DeviceCurves
from schedforge.dynamics import simulate, simulate_spec
from schedforge.errors import InputError, SteadyStateError
from schedforge.hamiltonian import AnnealingHamiltonian, pauli_operator
from schedforge.integrators import INTEGRATORS, IntegrationOutcome, register_integrator
from schedforge.progress import anneal_progress
from schedforge.schedules import LinearSchedule, Schedule, make_schedule
from schedforge.spec import load_spec
from schedforge.spec_model import BathSpec, DeviceSpec, ProblemSpec, Spec
from schedforge.system import System
from schedforge.units import GHZ_TO_RAD_PER_NS, beta_from_mk


class _AffineCurves(DeviceCurves):
    """A(s) = a (constant), B(s) = b0 + b1 s: static or Landau-Zener Hamiltonians (test only)."""

    continuity = None

    def __init__(self, a: float, b0: float, b1: float) -> None:
        self.a, self.b0, self.b1 = a, b0, b1

    def _derivatives(self, s: np.ndarray, order: int) -> np.ndarray:
        out = np.zeros((2, order + 1, s.size))
        out[0, 0] = self.a
        out[1, 0] = self.b0 + self.b1 * s
        if order >= 1:
            out[1, 1] = self.b1
        return out

    def describe(self) -> dict[str, Any]:
        return {"curves": "affine-test"}


# ----------------------------------------------------------------------------- Bloch
ETA, BETA = 0.01, beta_from_mk(20.0)
DENSITY = OhmicSpectralDensity(ETA, GHZ_TO_RAD_PER_NS * 8.0, BETA)
PLUS = np.full((2, 2), 0.5, dtype=complex)  # |+><+|: populations and coherence both off equilibrium


def _bloch_solution(t: float, w0: float, t1: float | None, t2: float) -> np.ndarray:
    """rho(t) for H = (w0/2) Z (|0> excited), from rho(0) = |+><+|."""
    if t1 is None:
        p_exc = 0.5
    else:
        g_dn, g_up = DENSITY(np.array([w0]))[0], DENSITY(np.array([-w0]))[0]
        p_inf = g_up / (g_dn + g_up)
        p_exc = p_inf + (0.5 - p_inf) * np.exp(-t / t1)
    coh = 0.5 * np.exp(-1j * w0 * t - t / t2)
    return np.array([[p_exc, coh], [np.conj(coh), 1 - p_exc]])


def test_bloch_relaxation_transverse_coupling_full_simulation() -> None:
    b = 1.0  # GHz: H = (2 pi b / 2) Z, w0 = 2 pi b
    w0 = GHZ_TO_RAD_PER_NS * b
    ham = AnnealingHamiltonian(_AffineCurves(0.0, b, 0.0), ProblemSpec(1, (1.0,), ()))
    system = System(ham, Bath(DENSITY, (pauli_operator("x", 0, 1),)), PLUS)
    rate = float(DENSITY(np.array([w0]))[0] + DENSITY(np.array([-w0]))[0])
    t1 = 1.0 / rate
    tf = 1.5 * t1
    result = simulate(system, LinearSchedule(), tf)
    assert result.ok
    np.testing.assert_allclose(result.final_state, _bloch_solution(tf, w0, t1, 2 * t1), atol=1e-11)


@pytest.mark.parametrize("coupling", ["x", "z"])
def test_bloch_equations_from_the_generator(coupling: str) -> None:
    b = 1.0
    w0 = GHZ_TO_RAD_PER_NS * b
    ham = AnnealingHamiltonian(_AffineCurves(0.0, b, 0.0), ProblemSpec(1, (1.0,), ()))
    system = System(ham, Bath(DENSITY, (pauli_operator(coupling, 0, 1),)), PLUS)
    sup = system.generator(0.5)
    if coupling == "x":
        t1 = 1.0 / float(DENSITY(np.array([w0]))[0] + DENSITY(np.array([-w0]))[0])
        t2 = 2 * t1
    else:
        t1, t2 = None, 1.0 / (2 * float(DENSITY(np.array([0.0]))[0]))
    for t in (0.3, 2.0, 7.0):
        rho_t = (linalg.expm(sup * t) @ PLUS.reshape(-1, order="F")).reshape(2, 2, order="F")
        np.testing.assert_allclose(rho_t, _bloch_solution(t, w0, t1, t2), atol=1e-12)


# ----------------------------------------------------------------------------- Landau-Zener
def test_landau_zener_transition_probability() -> None:
    # H = (v t / 2) Z + (Delta / 2) X swept linearly through the crossing; start in the ground
    # state, the probability to end in the excited state is exp(-pi Delta^2 / (2 v)).
    a, c = 0.05, 2.0  # GHz: Delta = 2 pi a; B(s) = c (2 s - 1), end detunings +-2 pi c >> Delta
    delta = GHZ_TO_RAD_PER_NS * a
    v = 0.2237  # rad/ns^2, gives P ~ 0.5
    tf = 4 * np.pi * c / v
    ham = AnnealingHamiltonian(_AffineCurves(a, -c, 2 * c), ProblemSpec(1, (1.0,), ()))
    system = System(ham, None, "ground")
    result = simulate(system, LinearSchedule(), tf)
    assert result.ok and result.integrator == "closed"
    p_lz = np.exp(-np.pi * delta**2 / (2 * v))
    # the finite sweep (end detuning 40 Delta) differs from the asymptotic formula by ~1e-6
    # (measured)
    assert result.ground_infidelity == pytest.approx(p_lz, abs=2e-5)
    # pure final state: trace distance^2 = infidelity
    assert result.trace_distance**2 == pytest.approx(result.ground_infidelity, rel=1e-10)
    # the same finite sweep with QuTiP's sesolve
    h = [
        [qutip.Qobj(ham.driver), lambda t: -0.5 * delta],
        [qutip.Qobj(ham.problem_matrix), lambda t: np.pi * c * (2 * t / tf - 1)],
    ]
    psi0 = qutip.Qobj(np.linalg.eigh(ham.matrix(0.0))[1][:, :1])
    res = qutip.sesolve(
        h,
        psi0,
        [0.0, tf],
        options={"method": "vern9", "atol": 1e-12, "rtol": 1e-12, "nsteps": 10**7},
    )
    ground1 = np.linalg.eigh(ham.matrix(1.0))[1][:, 0]
    p_ref = 1.0 - abs(np.vdot(ground1, res.states[-1].full().ravel())) ** 2
    assert result.ground_infidelity == pytest.approx(p_ref, abs=1e-8)


# ----------------------------------------------------------------------------- boundary law
# A driven qubit of our own with fast relaxation, so that the equilibrated regime starts early.
LAW_SPEC = Spec(
    device=DeviceSpec(A0_ghz=0.5, B0_ghz=0.5),
    problem=ProblemSpec(1, (0.8,), ()),
    bath=BathSpec(eta=0.02, cutoff_ghz=8.0, temperature_mk=12.0),
)
LAW_TF = (100.0, 200.0)


@pytest.mark.parametrize("k_end", [0, 1, 2, 3])
def test_boundary_cancellation_slope(k_end: int) -> None:
    # k_end = 0 approaches its slope more slowly (measured -0.988 between 75 and 150 ns)
    tfs = LAW_TF if k_end == 0 else (75.0, 150.0)
    errors = [
        simulate_spec(LAW_SPEC, tf_ns=tf, k_end=k_end, family="beta", k_start=0).trace_distance
        for tf in tfs
    ]
    slope = np.log(errors[1] / errors[0]) / np.log(tfs[1] / tfs[0])
    assert slope == pytest.approx(-(k_end + 1), abs=0.03)


@pytest.mark.slow
@pytest.mark.parametrize("k", [1, 2])
def test_both_ends_flat_gives_no_advantage(k: int) -> None:
    tf = LAW_TF[1]
    end_only = simulate_spec(LAW_SPEC, tf_ns=tf, k_end=k, k_start=0, family="beta")
    both = simulate_spec(LAW_SPEC, tf_ns=tf, k_end=k, k_start=k, family="beta")
    assert both.trace_distance >= end_only.trace_distance
    ratio = factorial(2 * k + 1) / (
        (k + 1) * factorial(k) ** 2
    )  # |f_both^(k+1)(1) / f_end^(k+1)(1)|
    # leading order only: at tf = 200 ns the next-order terms shift the ratio by a few per cent
    # (measured 9.35 for k = 2, ratio 10); a wrong law would be off by factors
    assert both.trace_distance / end_only.trace_distance == pytest.approx(ratio, rel=0.1)


# ----------------------------------------------------------------------------- state sanity
@pytest.mark.parametrize("initial", ["gibbs", "ground"])
def test_final_state_is_a_density_matrix(initial: str) -> None:
    spec = Spec(
        problem=ProblemSpec(2, (0.7, -0.2), ((0, 1, 0.5),)),
        bath=BathSpec(eta=1e-3),
        initial=type(Spec().initial)(state=initial),
    )
    result = simulate_spec(spec, tf_ns=8.0, k_end=1)
    rho = result.final_state
    assert result.ok and result.stats["trace_error"] < 1e-13
    assert abs(np.trace(rho) - 1) < 1e-13
    np.testing.assert_allclose(rho, rho.conj().T, atol=1e-15)
    assert np.linalg.eigvalsh(rho).min() > -1e-12


def test_closed_system_gibbs_start_uses_von_neumann() -> None:
    spec = Spec(bath=BathSpec(spectrum="none", temperature_mk=200.0))
    result = simulate_spec(spec, tf_ns=5.0, k_end=1)
    assert result.ok and result.stats["state"] == "density-matrix deviation"
    rho = result.final_state
    # unitary evolution keeps the spectrum of the initial Gibbs state
    sys_ = System.from_spec(spec)
    np.testing.assert_allclose(
        np.linalg.eigvalsh(rho), np.linalg.eigvalsh(sys_.initial_state()), atol=1e-11
    )


class _BrokenSchedule(Schedule):
    """A schedule whose derivative turns to nan half way: the solver must give up."""

    family = "broken"

    def _derivatives(self, x: np.ndarray, order: int) -> np.ndarray:
        out = np.zeros((order + 1, x.size))
        out[0] = x
        if order >= 1:
            out[1] = np.where(x < 0.5, 1.0, np.nan)
        return out


def test_numerical_failure_is_returned_not_raised() -> None:
    result = simulate(System.from_spec(Spec()), _BrokenSchedule(), 2.0, integrator="general")
    assert result.status == "failed"
    assert "DOP853" in result.message and np.isnan(result.trace_distance)
    assert np.isnan(result.to_dict()["ground_infidelity"])


def test_eigenframe_failure_is_returned_not_raised() -> None:
    # the fast integrator gives up at once and hands over to the general one,
    # whose failure is returned with its message
    result = simulate(System.from_spec(Spec()), _BrokenSchedule(), 2.0)
    assert result.status == "failed"
    assert np.isnan(result.trace_distance)
    assert result.stats.get("fallback", "").startswith("the schedule returned non-finite")


def test_integrators_plug_in_by_name(monkeypatch: pytest.MonkeyPatch) -> None:
    calls = []

    def fake(
        system: System, schedule: Schedule, tf_ns: float, *, rtol: float, atol: float
    ) -> IntegrationOutcome:
        calls.append(tf_ns)
        dev = np.zeros((system.dim, system.dim), complex)
        return IntegrationOutcome(dev, system.target_state(), "ok", "", {"steps": 0})

    monkeypatch.setitem(INTEGRATORS, "test-fake", fake)  # registered for this test only
    register_integrator("test-fake", fake)
    result = simulate(System.from_spec(Spec()), LinearSchedule(), 3.0, integrator="test-fake")
    assert calls == [3.0] and result.integrator == "test-fake" and result.trace_distance == 0.0
    with pytest.raises(InputError) as err:
        simulate(System.from_spec(Spec()), LinearSchedule(), 3.0, integrator="no-such")
    assert err.value.field == "numerics.integrator"
    with pytest.raises(InputError) as err:
        simulate(System.from_spec(Spec()), LinearSchedule(), -1.0)
    assert err.value.field == "tf_ns"


# ----------------------------------------------------------------------------- refusals, CLI
def test_closed_system_with_degenerate_final_ground_state_is_refused() -> None:
    # fields that cancel (h = (0.5, -0.5), J = -1): 00 and 11 share the lowest energy of
    # H(1) when A(1) = 0, and no conserved quantity explains it (zero fields, where the
    # spin-flip parity does: tests/test_closed_parity.py)
    problem = ProblemSpec(2, (0.5, -0.5), ((0, 1, -1.0),))
    spec = Spec(problem=problem, bath=BathSpec(spectrum="none"))
    with pytest.raises(SteadyStateError) as err:
        simulate_spec(spec, tf_ns=5.0)
    assert err.value.field == "problem" and "degenerate" in str(err.value)


def test_closed_generator_is_the_von_neumann_superoperator() -> None:
    # column-stacking: vec(-i[H, rho]) = -i (I kron H - H^T kron I) vec(rho)
    system = System.from_spec(
        Spec(problem=ProblemSpec(2, (0.3, -0.1), ((0, 1, 0.5),)), bath=BathSpec(spectrum="none"))
    )
    h = system.hamiltonian.matrix(0.4)
    eye = np.eye(4)
    np.testing.assert_allclose(
        system.generator(0.4), -1j * (np.kron(eye, h) - np.kron(h.T, eye)), atol=1e-12
    )


def test_cli_simulate_json(run_cli) -> None:
    code, out, err = run_cli(
        "simulate", "builtin:driven-qubit", "--tf-ns", "4", "--k-end", "1", "--json"
    )
    assert code == 0, err
    data = json.loads(out)
    for key in (
        "tf_ns",
        "k_end",
        "trace_distance",
        "ground_infidelity",
        "excess_energy_ghz",
        "status",
    ):
        assert key in data
    assert data["tf_ns"] == 4.0 and data["k_end"] == 1.0 and data["status"] == "ok"
    direct = simulate_spec(load_spec("builtin:driven-qubit"), tf_ns=4.0, k_end=1)
    assert data["trace_distance"] == pytest.approx(direct.trace_distance, rel=1e-12)


def test_cli_simulate_bad_input(run_cli, write_spec) -> None:
    code, out, err = run_cli("simulate", "builtin:driven-qubit", "--k-end", "-1")
    assert code == 2 and "--k-end" in err and "Traceback" not in err
    path = write_spec('version = 1\n[bath]\ncoupling = "z"\n')
    code, out, err = run_cli("simulate", str(path), "--tf-ns", "5")
    assert code == 2 and "bath.coupling" in err and "Traceback" not in err and out == ""


def test_integrators_report_anneal_progress_up_to_the_end():
    system = System.from_spec(load_spec("builtin:driven-qubit"))
    schedule = make_schedule("beta", k_end=1)
    for name in ("eigenframe", "general"):
        seen: list[float] = []
        with anneal_progress(seen.append):
            simulate(system, schedule, 20.0, integrator=name)
        assert seen and seen[-1] == pytest.approx(1.0), name
        assert all(0.0 <= x <= 1.0 for x in seen), name
