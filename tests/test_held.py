"""Exact propagation of held (piecewise-constant) schedules, and curve-table warnings.

References
----------
- QuTiP 5 ``bloch_redfield_tensor`` (secular Bloch-Redfield tensor of a static H; in the
  strict secular limit the Davies generator), propagated with ``scipy.linalg.expm``.
- QuTiP ``liouvillian`` of H + H_LS with the Davies jump operators built from spectral
  projectors (Albash, Boixo, Lidar and Zanardi, New J. Phys. 14, 123016, 2012), for the
  Lamb-shift case that ``bloch_redfield_tensor`` omits.
- Closed system: products of ``scipy.linalg.expm(-1j H dt)``.
- Ideal error law C_k / tf^(k+1) for an open system (Venuti, Albash, Lidar and Zanardi,
  Phys. Rev. A 93, 032118, 2016; from memory).
- The Gaussian-filter limit: a zero-phase Gaussian smooths each step symmetrically, so
  the filtered and the held propagators differ at second order in sigma ~ 1/B (our
  analysis, no source); the general (DOP853) integrator is the independent side.
"""

from __future__ import annotations

import json
from dataclasses import replace

import numpy as np
import pytest
import qutip
from scipy.linalg import expm

from schedforge.bath import Bath, OhmicSpectralDensity
from schedforge.device import LinearCurves
from schedforge.dynamics import simulate, simulate_spec
from schedforge.errors import InputError
from schedforge.hamiltonian import AnnealingHamiltonian, pauli_operator
from schedforge.integrators import held
from schedforge.integrators.held import (
    held_segments,
    integrate_held,
    level_propagator,
    propagate_levels,
)
from schedforge.schedules import BetaSchedule
from schedforge.spec import load_spec
from schedforge.spec_model import ProblemSpec, WaveformSpec
from schedforge.system import System
from schedforge.units import beta_from_mk
from schedforge.waveform import realize

BETA = beta_from_mk(12.0)
PROBLEMS = {
    "1q": ProblemSpec(1, (0.7,), ()),
    "2q-generic": ProblemSpec(2, (0.7, -0.4), ((0, 1, 0.9),)),
    "2q-degenerate": ProblemSpec(2, (0.5, 0.5), ((0, 1, 1.0),)),  # symmetric
}
# (levels of s, durations in ns): long enough to relax partly and rotate many times
SEGMENTS = {
    1: ([0.55], [37.0]),
    3: ([0.2, 0.6, 1.0], [13.0, 7.5, 41.0]),
}


def _system(problem: ProblemSpec, *, eta: float = 1e-2, lamb: bool = False) -> System:
    ham = AnnealingHamiltonian(LinearCurves(3.5, 2.5), problem)
    ops = tuple(pauli_operator("x", q, problem.qubits) for q in range(problem.qubits))
    density = OhmicSpectralDensity(eta, 2 * np.pi * 8.0, BETA)
    return System(ham, Bath(density, ops, lamb_shift=lamb))


def _mixed_state(d: int, seed: int = 3) -> np.ndarray:
    """A state with populations and coherences in every basis: 0.7 |psi><psi| + 0.3 I/d."""
    rng = np.random.default_rng(seed)
    psi = rng.normal(size=d) + 1j * rng.normal(size=d)
    psi /= np.linalg.norm(psi)
    return 0.7 * np.outer(psi, psi.conj()) + 0.3 * np.eye(d) / d


def _dims(system: System) -> list[list[int]]:
    n = system.hamiltonian.n_qubits
    return [[2] * n, [2] * n]


def _qutip_brtensor(system: System, s: float) -> np.ndarray:
    dims = _dims(system)
    h = qutip.Qobj(system.hamiltonian.matrix(s), dims=dims)
    a_ops = [
        [qutip.Qobj(a, dims=dims), lambda w: float(system.bath.gamma(np.array([w]))[0])]
        for a in system.bath.operators
    ]
    return qutip.bloch_redfield_tensor(h, a_ops, sec_cutoff=1e-6, fock_basis=True).full()


def _propagate_reference(generators: list[np.ndarray], dts, rho0: np.ndarray) -> np.ndarray:
    """Column-stacking superoperators (QuTiP's convention), exp(L dt) one after another."""
    d = rho0.shape[0]
    v = rho0.flatten(order="F")
    for gen, dt in zip(generators, dts, strict=True):
        v = expm(gen * dt) @ v
    return v.reshape(d, d, order="F")


# -- against QuTiP ------------------------------------------------------------------------
@pytest.mark.parametrize("name", list(PROBLEMS))
@pytest.mark.parametrize("n_segments", sorted(SEGMENTS))
def test_open_system_matches_qutip_bloch_redfield(name: str, n_segments: int) -> None:
    system = _system(PROBLEMS[name])
    levels, dts = SEGMENTS[n_segments]
    if name == "2q-degenerate":
        levels = [0.0, *levels]  # H(0) = -A/2 (X1 + X2): degenerate levels, equal Bohr freqs
        dts = [9.0, *dts]
    rho0 = _mixed_state(system.dim)
    # At s = 0 the levels of the symmetric problem are degenerate to 1e-15: there QuTiP's
    # bloch_redfield_tensor differs from the Davies generator by 0.05 rad/ns (measured; it
    # also differs from the projector construction by as much, which agrees with ours to
    # 1e-14), so that level takes the projector construction as its reference.
    gens = [
        _lindblad_reference(system, s) if s == 0.0 else _qutip_brtensor(system, s) for s in levels
    ]
    ref = _propagate_reference(gens, dts, rho0)
    out = propagate_levels(system, levels, dts, rho0)
    assert out.status == "ok"
    np.testing.assert_allclose(out.rho, ref, rtol=0, atol=1e-10)
    np.testing.assert_allclose(out.deviation, ref - system.target_state(), rtol=0, atol=1e-10)
    # the state did change: partial relaxation, not a trivial identity
    assert np.abs(ref - rho0).max() > 1e-2
    if name == "2q-degenerate":  # coherences sharing a Bohr frequency: a coupled block
        blocks = level_propagator(system, 0.0).blocks
        assert any(idx.size > 1 and np.all(idx % 5 != 0) for idx, _, _ in blocks)


def _lindblad_reference(system: System, s: float, tol: float = 1e-7) -> np.ndarray:
    """QuTiP liouvillian(H + H_LS, sqrt(gamma(w)) L_w), L_w from spectral projectors.

    The Davies generator written out as in Albash et al. (2012); H_LS only if the bath
    has the Lamb shift on.
    """
    h = system.hamiltonian.matrix(s)
    e, v = np.linalg.eigh(h)
    labels = np.concatenate(([0], np.cumsum(np.diff(e) > tol)))
    levels = [float(e[labels == k].mean()) for k in range(labels[-1] + 1)]
    proj = [v[:, labels == k] @ v[:, labels == k].conj().T for k in range(len(levels))]
    freqs: list[float] = []
    for e1 in levels:
        for e2 in levels:
            if not any(abs(e2 - e1 - f) < tol for f in freqs):
                freqs.append(e2 - e1)
    bath = system.bath
    c_ops, hls = [], np.zeros_like(h, dtype=complex)
    for a in bath.operators:
        for w in freqs:
            lw = sum(
                proj[i] @ a @ proj[j]
                for i in range(len(levels))
                for j in range(len(levels))
                if abs(levels[j] - levels[i] - w) < tol
            )
            c_ops.append(np.sqrt(float(bath.gamma(np.array([w]))[0])) * lw)
            if bath.lamb_shift:
                hls = hls + float(bath.lamb_shift_at(np.array([w]))[0]) * (lw.conj().T @ lw)
    dims = _dims(system)
    lv = qutip.liouvillian(
        qutip.Qobj(h + hls, dims=dims), [qutip.Qobj(c, dims=dims) for c in c_ops]
    )
    return lv.full()


def test_lamb_shift_matches_qutip_liouvillian() -> None:
    system = _system(PROBLEMS["2q-degenerate"], lamb=True)
    levels, dts = [0.0, 0.45, 1.0], [6.0, 11.0, 17.0]
    rho0 = _mixed_state(4, seed=5)
    ref = _propagate_reference([_lindblad_reference(system, s) for s in levels], dts, rho0)
    out = propagate_levels(system, levels, dts, rho0)
    np.testing.assert_allclose(out.rho, ref, rtol=0, atol=1e-10)
    # the Lamb shift matters at this precision: without it the result differs
    plain = propagate_levels(_system(PROBLEMS["2q-degenerate"]), levels, dts, rho0)
    assert np.abs(plain.rho - ref).max() > 1e-6


@pytest.mark.parametrize("name", ["1q", "2q-generic", "2q-degenerate"])
def test_closed_system_matches_products_of_unitaries(name: str) -> None:
    ham = AnnealingHamiltonian(LinearCurves(3.5, 2.5), PROBLEMS[name])
    system = System(ham, None, "ground")
    levels, dts = [0.0, 0.3, 0.7, 1.0], [2.0, 5.5, 3.25, 8.0]
    psi = np.linalg.eigh(ham.matrix(0.0))[1][:, 0]
    for s, dt in zip(levels, dts, strict=True):
        psi = expm(-1j * ham.matrix(s) * dt) @ psi
    rho_ref = np.outer(psi, psi.conj())
    out = propagate_levels(system, levels, dts)
    np.testing.assert_allclose(out.rho, rho_ref, rtol=0, atol=1e-10)
    # a mixed start evolves by U rho U^+
    rho0 = _mixed_state(system.dim)
    u = np.eye(system.dim, dtype=complex)
    for s, dt in zip(levels, dts, strict=True):
        u = expm(-1j * ham.matrix(s) * dt) @ u
    out = propagate_levels(system, levels, dts, rho0)
    np.testing.assert_allclose(out.rho, u @ rho0 @ u.conj().T, rtol=0, atol=1e-10)


def test_block_exponentials_match_scipy_expm() -> None:
    # 2 x 2 blocks use a closed form, larger ones a batched expm; both against
    # scipy.linalg.expm one by one, from tiny to very long holds (|M| up to 1e5).
    rng = np.random.default_rng(7)
    mats = []
    for scale in (0.0, 1e-9, 1e-3, 0.7, 1.3, 40.0, 1e5):
        rates = rng.uniform(0, 1, 2) * scale * np.array([1.0, 10 ** rng.uniform(-12, 0)])
        mats.append(np.array([[-rates[0], rates[1]], [rates[0], -rates[1]]]))  # rate matrix
        coh = -np.diag(rng.uniform(0, 1, 2)) * scale + 0.2 * scale * rng.normal(size=(2, 2))
        mats.append(coh + 1j * np.diag([1.0, -1.0]) * min(scale, 1e3))  # coupled coherences
        r3 = rng.uniform(0, 1, (3, 3)) * min(scale, 50.0)
        np.fill_diagonal(r3, 0.0)
        mats.append(r3 - np.diag(r3.sum(axis=0)))
    got = held.block_exponentials(mats)
    for m, g in zip(mats, got, strict=True):
        ref = expm(m)
        assert g.dtype == ref.dtype
        np.testing.assert_allclose(g, ref, rtol=0, atol=1e-10 * max(1.0, np.abs(ref).max()))


# -- segments of a realized waveform ------------------------------------------------------
def test_held_segments_of_a_quantized_hold() -> None:
    design = BetaSchedule(0, 2)
    r = realize(design, 100.0, WaveformSpec(sample_rate_gsps=1.0, dac_bits=4))
    seg = held_segments(r.schedule)
    # every played level appears once (monotone design), on the 4-bit grid, in order
    np.testing.assert_array_equal(seg.levels, np.unique(r.s))
    np.testing.assert_allclose(seg.levels * 15, np.round(seg.levels * 15), atol=1e-12)
    assert seg.bounds[0] == 0.0 and seg.bounds[-1] == 1.0
    assert seg.durations_ns(100.0).sum() == pytest.approx(100.0, rel=1e-14)
    # each level starts at the first sample that plays it
    first = np.searchsorted(r.s, seg.levels)
    np.testing.assert_allclose(seg.bounds[:-1] * 100.0, r.t_ns[first], atol=1e-12)


def test_held_refuses_a_continuous_schedule() -> None:
    system = _system(PROBLEMS["1q"])
    with pytest.raises(InputError) as err:
        simulate(system, BetaSchedule(0, 2), 50.0, integrator="held")
    assert err.value.field == "numerics.integrator" and "piecewise-constant" in str(err.value)


def test_simulate_sends_jumping_schedules_to_the_exact_propagator() -> None:
    system = _system(PROBLEMS["1q"])
    tf = 60.0
    r = realize(BetaSchedule(0, 2), tf, WaveformSpec(sample_rate_gsps=1.0, dac_bits=6))
    auto = simulate(system, r.schedule, tf)
    named = simulate(system, r.schedule, tf, integrator="general")
    assert auto.integrator == named.integrator == "held" and auto.ok
    assert not any("held" in w for w in auto.warnings)
    assert any('"held" integrator instead of' in w for w in named.warnings)
    assert named.trace_distance == auto.trace_distance
    # against QuTiP's tensor, level by level
    seg = held_segments(r.schedule)
    gens = [_qutip_brtensor(system, s) for s in seg.levels]
    ref = _propagate_reference(gens, seg.durations_ns(tf), system.initial_state())
    dev = ref - system.target_state()
    td = 0.5 * np.abs(np.linalg.eigvalsh(0.5 * (dev + dev.conj().T))).sum()
    assert auto.trace_distance == pytest.approx(td, rel=1e-7)
    assert auto.stats["segments"] == len(seg) and auto.stats["distinct_levels"] == len(seg)


# -- consequences for the dynamics --------------------------------------------------------
def _driven_qubit(eta: float = 1e-2) -> System:
    spec = load_spec("builtin:driven-qubit")
    return System.from_spec(replace(spec, bath=replace(spec.bath, eta=eta)))


@pytest.mark.slow
def test_wide_gaussian_filter_approaches_the_held_result() -> None:
    # 1 qubit, tf = 20 ns, 1 GS/s, 3 bits: the filtered waveform (general integrator)
    # tends to the unfiltered hold (exact) as the bandwidth grows, at second order.
    system = _driven_qubit()
    design, tf = BetaSchedule(0, 2), 20.0
    held = simulate(
        system, realize(design, tf, WaveformSpec(sample_rate_gsps=1.0, dac_bits=3)).schedule, tf
    )
    assert held.integrator == "held"
    diffs = []
    for bw in (2000.0, 4000.0, 8000.0):
        limits = WaveformSpec(sample_rate_gsps=1.0, dac_bits=3, bandwidth_mhz=bw)
        res = simulate(system, realize(design, tf, limits).schedule, tf, integrator="general")
        assert res.ok and res.integrator == "general"
        diffs.append(float(np.abs(res.final_state - held.final_state).max()))
    ratios = np.array(diffs[:-1]) / np.array(diffs[1:])
    np.testing.assert_allclose(ratios, 4.0, rtol=0.12)  # measured 3.75, 3.93
    assert diffs[-1] < 2e-2 * held.trace_distance  # held: 1.4e-2, diff at 8 GHz: 1.8e-4


def test_quantized_end_departs_from_the_ideal_law() -> None:
    # Open system (driven qubit, eta = 1e-2), beta k_end = 2, 1 GS/s and 12 bits.  The
    # ideal error falls as tf^-3; the held waveform is constant at s = 1 after its last
    # DAC step, so its error is what remains of that step: the deviation
    # sigma(s_before) - sigma(1) relaxed by exp(L(1) tau), tau = tf - t_last, which falls
    # exponentially with tf (tau is a fixed fraction of tf), not as a power law.
    system = _driven_qubit()
    design = BetaSchedule(0, 2)
    tfs = np.array([300.0, 1000.0, 3000.0])
    ideal = [simulate(system, design, float(tf)).trace_distance for tf in tfs]
    slopes = np.diff(np.log(ideal)) / np.diff(np.log(tfs))
    np.testing.assert_allclose(slopes, -3.0, atol=0.05)
    held, predicted = [], []
    l1 = system.generator(1.0)
    for tf in tfs[:2]:
        r = realize(design, float(tf), WaveformSpec(sample_rate_gsps=1.0, dac_bits=12))
        res = simulate(system, r.schedule, float(tf))
        assert res.ok and res.integrator == "held"
        held.append(res.trace_distance)
        x, before, after = r.schedule.jump_points()
        assert after[-1] == 1.0
        step = system.steady_state(float(before[-1])) - system.target_state()
        v = expm(l1 * tf * (1.0 - x[-1])) @ step.flatten(order="F")
        dev = v.reshape(2, 2, order="F")
        predicted.append(0.5 * np.abs(np.linalg.eigvalsh(0.5 * (dev + dev.conj().T))).sum())
    # measured: held 5.06e-6, 2.94e-10; last-step prediction 4.97e-6, 2.95e-10
    np.testing.assert_allclose(held, predicted, rtol=0.03)
    assert held[0] > 100 * ideal[0]
    held_slope = np.log(held[1] / held[0]) / np.log(tfs[1] / tfs[0])
    assert held_slope < -7.0  # far steeper than the ideal -3: the law does not hold


def test_simulate_spec_realized_unfiltered_runs(write_spec) -> None:
    path = write_spec(
        """version = 1
[problem]
qubits = 1
h = [0.7]
[bath]
eta = 1e-2
[schedule]
family = "beta"
k_end = 2
tf_ns = 100.0
[waveform]
sample_rate_gsps = 1.0
dac_bits = 8
"""
    )
    spec = load_spec(path)
    res = simulate_spec(spec, variant="realized")
    assert res.status == "ok" and res.integrator == "held" and res.variant == "realized"
    direct = integrate_held(
        System.from_spec(spec),
        realize(BetaSchedule(0, 2), 100.0, spec.waveform).schedule,
        100.0,
    )
    dev = direct.deviation
    td = 0.5 * np.abs(np.linalg.eigvalsh(dev)).sum()
    assert res.trace_distance == pytest.approx(td, rel=1e-12)
    ideal = simulate_spec(spec)
    assert ideal.ok and res.trace_distance > 10 * ideal.trace_distance


# -- curve-table warnings where users look ------------------------------------------------
def test_coarse_curve_table_warnings_are_shown(write_spec, run_cli) -> None:
    s = np.linspace(0, 1, 11)  # too coarse for this curvature (tests/test_device_table.py)
    rows = "\n".join(
        f"{a:.17g},{b:.17g},{c:.17g}"
        for a, b, c in zip(s, 6 * np.exp(-5 * s), 1 + 6 * s**2, strict=True)
    )
    table = write_spec("s,A_ghz,B_ghz\n" + rows + "\n", name="coarse.csv")
    path = write_spec(
        f"""version = 1
[device]
curves = "{table.name}"
[schedule]
family = "beta"
k_end = 2
tf_ns = 50.0
"""
    )
    code, out, err = run_cli("inspect", path)
    assert code == 0
    assert "warning: device curves: A_ghz: the table is too coarse" in out
    code, out, err = run_cli("inspect", path, "--json")
    report = json.loads(out)
    assert any("too coarse" in w for w in report["curve_warnings"])
    code, out, err = run_cli("design", path, "--out", path.with_name("d.csv"))
    assert code == 0 and "warning: device curves: A_ghz: the table is too coarse" in err
    # and in the simulation result
    res = simulate_spec(load_spec(path), tf_ns=5.0)
    assert any(w.startswith("device curves: A_ghz: the table is too coarse") for w in res.warnings)
    # analytic curves: none
    code, out, err = run_cli("inspect", write_spec(SIMPLE, name="lin.toml"), "--json")
    assert json.loads(out)["curve_warnings"] == []


SIMPLE = """version = 1
[schedule]
family = "gevrey"
tf_ns = 50.0
"""
