"""Randomized benchmarking: Clifford group, pulses, fits and simultaneous RB on the simulator."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy.linalg import expm

from simulated_device import SimRig, ToneBatch, demo_device_path, evolve_populations
from xtalkcal.exceptions import FitInputError, TimelineError
from xtalkcal.verification import (
    CLIFFORD_DECOMPOSITIONS,
    PRIMITIVES,
    PRIMITIVES_PER_CLIFFORD,
    GateSet,
    clifford_group,
    coherence_limited_error_per_gate,
    drag_coefficient_ns,
    draw_sequences,
    fit_rb_decay,
    rb_timelines,
    readout_offsets,
    rotation_unitary,
    run_rb,
    simultaneous_rb,
)

PAULIS = [np.array([[0, 1], [1, 0]], complex), np.array([[0, -1j], [1j, 0]], complex),
          np.array([[1, 0], [0, -1]], complex)]


def _sequence_unitary(names):
    u = np.eye(2, dtype=complex)
    for n in names:
        u = rotation_unitary(*PRIMITIVES[n]) @ u
    return u


def _equal_up_to_phase(a, b, tol=1e-9):
    return abs(abs(np.trace(a.conj().T @ b)) - 2.0) < tol


# --------------------------------------------------------------------------- group


def test_decompositions_are_24_distinct_cliffords_with_mean_1875():
    us = [_sequence_unitary(d) for d in CLIFFORD_DECOMPOSITIONS]
    assert len(us) == 24
    for i in range(24):
        for j in range(i):
            assert not _equal_up_to_phase(us[i], us[j]), (CLIFFORD_DECOMPOSITIONS[i],
                                                          CLIFFORD_DECOMPOSITIONS[j])
    # Clifford property checked independently of our tables: Paulis map to ±Paulis.
    for u in us:
        for s in PAULIS:
            c = u @ s @ u.conj().T
            assert any(np.allclose(c, sign * t) for t in PAULIS for sign in (1, -1))
    assert PRIMITIVES_PER_CLIFFORD == pytest.approx(1.875)


def test_group_closes_and_inverses_are_correct():
    g = clifford_group()
    assert np.allclose(g.unitaries[0], np.eye(2))
    for a in range(24):
        for b in range(24):
            prod = g.unitaries[b] @ g.unitaries[a]
            assert _equal_up_to_phase(prod, g.unitaries[g.compose[a, b]])
        assert _equal_up_to_phase(g.unitaries[g.inverse[a]] @ g.unitaries[a], np.eye(2))
    # every row of the multiplication table is a permutation (group property)
    assert all(sorted(row) == list(range(24)) for row in g.compose.tolist())
    with pytest.raises(ValueError):
        g.index(rotation_unitary(math.pi / 4, 0.0))


def test_ideal_sequences_compose_to_identity():
    seqs = draw_sequences(["q0", "q1"], [0, 1, 7, 40], 5, rng=11)
    for li in range(len(seqs.lengths)):
        for s in range(seqs.n_sequences):
            for q in seqs.qubits:
                u = _sequence_unitary(seqs.primitives(li, s, q))
                assert _equal_up_to_phase(u, np.eye(2), tol=1e-8)
    # independent draws per qubit
    assert seqs.cliffords[3][0][0] != seqs.cliffords[3][0][1]


def test_rotation_matches_the_timeline_phase_convention():
    """exp(−i2π∫H) with H = ½(Ω a† + Ω* a), Ω = Ω₀e^{iφ}
    (xtalkcal.hardware.timeline), on {|0⟩,|1⟩}."""
    adag = np.array([[0, 0], [1, 0]], complex)
    for phi in (0.0, math.pi / 2, math.pi, -math.pi / 2, 0.7):
        for theta in (math.pi / 2, math.pi):
            omega = theta / (2 * math.pi) * np.exp(1j * phi)  # GHz·ns: area 1 ns
            h = 0.5 * (omega * adag + np.conj(omega) * adag.conj().T)
            assert np.allclose(expm(-2j * math.pi * h), rotation_unitary(theta, phi))
    # x for φ = 0, y for φ = π/2
    assert np.allclose(rotation_unitary(math.pi, 0.0), -1j * PAULIS[0])
    assert np.allclose(rotation_unitary(math.pi, math.pi / 2), -1j * PAULIS[1])


# --------------------------------------------------------------------------- pulses


def _own_populations(rig, qubit, tones, end_ns, *, decoherence=False):
    """Level populations of ``qubit`` under tones on its own line at its f01.

    The simulator's field at its own line and frequency is gain·a·e^{iφ}·E (no
    frequency response at df = 0), so the ToneBatch can be built directly.
    """
    q = rig.device.qubit(qubit)
    rabi = rig.device.line_of(qubit).rabi_mhz * 1e-3
    n = len(tones)

    def row(values, dtype=float):
        return np.array([values], dtype=dtype)

    batch = ToneBatch(
        row([t.start_ns for t in tones]), row([t.duration_ns for t in tones]),
        row([t.freq_ghz for t in tones]), row([t.complex_amplitude * rabi for t in tones], complex),
        row([t.envelope.code for t in tones], np.int64), row([t.envelope.sigma_ns for t in tones]),
        row([t.envelope.drag_ns for t in tones]), row([0.0] * n), np.array([n]),
        np.array([end_ns], float))
    t1 = q.t1_us * 1e3 if decoherence else np.inf
    t2 = q.t2_us * 1e3 if decoherence else np.inf
    return evolve_populations(q.levels.energies_ghz, q.levels.ladder, np.array([t1]),
                              np.array([t2]), batch)[0]


def test_drag_sign_and_values_for_a_transmon():
    assert drag_coefficient_ns(-0.21, "leakage") == pytest.approx(1 / (2 * math.pi * 0.21))
    assert drag_coefficient_ns(-0.21, "phase") == pytest.approx(0.5 / (2 * math.pi * 0.21))
    assert drag_coefficient_ns(-0.21, "off") == 0.0
    assert drag_coefficient_ns(-0.21) > 0  # α < 0 → β > 0 in our convention
    with pytest.raises(ValueError):
        drag_coefficient_ns(0.0)


def test_drag_reduces_leakage_and_phase_error_of_an_isolated_pulse(demo_rig):
    """Coherent errors only (T1, T2 off): one π pulse, and 20 (X/2, −X/2) pairs.

    A pair is ideally the identity; the AC-Stark phase error tilts the rotation axis
    and adds up coherently (a common-practice DRAG calibration sequence).
    """
    chip = demo_rig.chip
    q = "q5"
    res = {}
    for cond in ("off", "leakage", "phase"):
        g = GateSet(drag=cond)
        pi = _own_populations(demo_rig, q, [g.tone(chip, q, "X", 0.0)], 32.0)
        pairs = []
        for k in range(20):
            pairs += [g.tone(chip, q, "X/2", 64.0 * k), g.tone(chip, q, "-X/2", 64.0 * k + 32)]
        amp = _own_populations(demo_rig, q, pairs, 64.0 * 20)
        res[cond] = {"leak": pi[2], "pi_err": 1 - pi[1], "pairs": amp[1]}
    off, leak, phase = res["off"], res["leakage"], res["phase"]
    # Motzoi condition: leakage of the π pulse essentially gone.
    assert leak["leak"] < 1e-3 * off["leak"]
    # Wrong sign would add leakage: check that −β is worse than β = 0.
    g_wrong = GateSet(drag="leakage")
    tone = g_wrong.tone(chip, q, "X", 0.0)
    tone = replace(tone, envelope=replace(tone.envelope, drag_ns=-tone.envelope.drag_ns))
    assert _own_populations(demo_rig, q, [tone], 32.0)[2] > 2 * off["leak"]
    # Phase condition: less leakage than β = 0 and far less phase error.
    assert phase["leak"] < 0.5 * off["leak"]
    assert phase["pi_err"] < 0.01 * off["pi_err"]
    assert phase["pairs"] < 1e-3 * off["pairs"]
    assert off["pairs"] > 0.05 and leak["pairs"] > 0.05  # the error really is there


def test_axes_on_the_simulator_match_the_clifford_table(demo_rig):
    """P(1) after each Clifford played on the simulator vs |⟨1|U|0⟩|² from the table.

    Populations from |0⟩ cannot tell +y from −y (conjugation by X maps one convention
    onto the other and leaves them unchanged), so this checks that φ = π/2 is the axis
    perpendicular to x in the equator and that ±π/2, π angles and the order are right;
    the handedness is fixed by the Hamiltonian check above.
    """
    chip = demo_rig.chip
    q = "q4"
    g = GateSet()
    rng = np.random.default_rng(5)
    cases = [(c,) for c in range(24)] + [tuple(rng.integers(0, 24, 3)) for _ in range(8)]
    group = clifford_group()
    for case in cases:
        prims = [p for c in case for p in CLIFFORD_DECOMPOSITIONS[c]]
        tones = [g.tone(chip, q, p, k * g.slot_ns) for k, p in enumerate(prims)]
        tones = [t for t in tones if t is not None]
        pops = _own_populations(demo_rig, q, tones, len(prims) * g.slot_ns) if tones else [1, 0]
        u = group.unitaries[group.product(case)]
        assert pops[1] == pytest.approx(abs(u[1, 0]) ** 2, abs=2e-3), case


def test_gate_amplitudes_stay_within_the_chip_limits(demo_rig):
    chip = demo_rig.chip
    g = GateSet()
    for qname in chip.qubit_names:
        t = g.tone(chip, qname, "X", 0.0)
        assert 0 < t.amplitude < chip.amplitude_limit(t.line)
        assert t.freq_ghz == chip.qubit(qname).f01_ghz


# --------------------------------------------------------------------------- fits


@pytest.mark.parametrize("offset", [None, 0.5])
def test_fit_recovers_p_from_synthetic_decays(offset):
    rng = np.random.default_rng(3)
    m = np.array([1, 20, 50, 100, 200, 400])
    p_true, a_true, b_true = 0.996, 0.47, 0.5
    hits, trials = 0, 30
    for _ in range(trials):
        # per-draw spread of the decay (sequence dependence) plus binomial shot noise
        y = []
        for mm in m:
            pm = a_true * (p_true * (1 + 2e-4 * rng.normal(size=10))) ** mm + b_true
            y.append(rng.binomial(2000, np.clip(pm, 0, 1)) / 2000)
        fit = fit_rb_decay(m, np.array(y), offset=offset, n_boot=100, rng=rng)
        assert fit.converged, fit.message
        assert abs(fit.p - p_true) < 5 * fit.p_stderr
        hits += abs(fit.p - p_true) < fit.p_stderr
    # about 68 % within one standard error
    assert 0.4 * trials < hits < 0.95 * trials
    assert fit.error_per_clifford == pytest.approx((1 - fit.p) / 2)
    assert fit.error_per_gate == pytest.approx(fit.error_per_clifford / 1.875)


def test_fit_refuses_bad_input():
    with pytest.raises(FitInputError):
        fit_rb_decay([1, 2, 3], np.ones((2, 4)))
    with pytest.raises(FitInputError):
        fit_rb_decay([1, 2], np.ones((2, 4)))  # three parameters, two lengths
    with pytest.raises(FitInputError):
        fit_rb_decay([1, 2, 3], np.array([[1.0], [np.nan], [0.5]]))


def test_coherence_limit_formula_against_qutip():
    """1 − F of an idle with T1, T2 vs QuTiP's average gate fidelity of the Lindblad channel."""
    qutip = pytest.importorskip("qutip")
    t1, t2, t = 60e3, 45e3, 32.0
    gphi = 1 / t2 - 1 / (2 * t1)
    a = qutip.destroy(2)
    c_ops = [np.sqrt(1 / t1) * a, np.sqrt(gphi / 2) * qutip.sigmaz()]
    channel = qutip.propagator(qutip.qzero(2), t, c_ops)
    f = qutip.average_gate_fidelity(channel)
    assert coherence_limited_error_per_gate(t, t1, t2) == pytest.approx(1 - f, rel=1e-6)
    tphi = 1 / gphi
    approx = t / (3 * t1) + t / (3 * tphi)
    assert coherence_limited_error_per_gate(t, t1, t2) == pytest.approx(approx, rel=1e-3)


# --------------------------------------------------------------------------- timelines


def test_timelines_are_right_aligned_and_isolated_keeps_the_timing(demo_chip):
    seqs = draw_sequences(["q4", "q5"], [3, 10], 2, rng=2)
    g = GateSet()
    sim = rb_timelines(demo_chip, seqs, g)
    iso = rb_timelines(demo_chip, seqs, g, playing=["q5"])
    assert len(sim) == len(iso) == 4
    for k, (a, b) in enumerate(zip(sim, iso, strict=True)):
        li, s = divmod(k, 2)
        assert a.end_ns == b.end_ns == seqs.n_slots(li, s) * g.slot_ns
        assert {t.line for t in b.tones} <= {"q5-line"}
        assert set(b.tones) <= set(a.tones)
        for q in ("q4", "q5"):
            tones = [t for t in a.tones if t.line == demo_chip.line_of(q).name]
            if tones:  # the last primitive of every qubit ends at the readout
                last = max(t.end_ns for t in tones)
                assert last == pytest.approx(a.end_ns) or seqs.primitives(li, s, q)[-1] == "I"


def test_bad_sequence_requests_raise_timeline_errors(demo_chip):
    with pytest.raises(TimelineError):
        draw_sequences([], [1], 2)
    with pytest.raises(TimelineError):
        draw_sequences(["q0", "q0"], [1], 2)
    with pytest.raises(TimelineError):
        draw_sequences(["q0"], [-1], 2)
    seqs = draw_sequences(["q0"], [2], 1, rng=0)
    with pytest.raises(TimelineError):
        rb_timelines(demo_chip, seqs, playing=["q1"])


# --------------------------------------------------------------------------- simulator


def test_readout_offsets_match_the_hidden_assignment_matrix(demo_device):
    """B = ½[P(read 0|0) + P(read 0|1)] against the device file's readout matrices."""
    rig = SimRig(demo_device, seed=5, drift=False)
    b = readout_offsets(rig, ["q4", "q5", "q6"], shots=40000)
    for q, value in b.items():
        a = demo_device.qubit(q).readout
        expected = 0.5 * (a[0, 0] + a[1, 0])
        # shot noise ~ 0.5·√(2·0.25/40000) ≈ 2e-3; the π pulse error is ~1e-5
        assert value == pytest.approx(expected, abs=6e-3)


def test_isolated_rb_is_coherence_limited(demo_device):
    """Drift off: the error per gate of q5 alone is the T1/T2 limit (within a factor 2).

    Coherence limit per slot (module docstring of xtalkcal.verification; Nielsen 2002); the
    identity Clifford is an idle slot, so every primitive lasts one slot.
    """
    rig = SimRig(demo_device, seed=7, drift=False)
    seqs = draw_sequences(["q5"], [1, 100, 250, 500], 6, rng=4)
    b = readout_offsets(rig, ["q5"])
    data = run_rb(rig, seqs, mode="isolated", shots=20000)
    fit = fit_rb_decay(seqs.lengths, data["survival"].sel(qubit="q5").values, offset=b["q5"],
                       rng=1)
    q = demo_device.qubit("q5")
    limit = coherence_limited_error_per_gate(GateSet().slot_ns, q.t1_us * 1e3, q.t2_us * 1e3)
    assert fit.converged
    assert 0.5 * limit < fit.error_per_gate < 2.0 * limit
    assert fit.error_per_gate_stderr < 0.3 * fit.error_per_gate
    assert data.attrs["victim_timelines"] == 4 * 6


def test_simultaneous_rb_shows_the_leakage_pair(demo_device):
    """q4's drive at 4.780 GHz leaks q5 (1–2 transition 20 MHz above): q5 much worse.

    Crosstalk error as the difference of simultaneous and isolated RB (Gambetta et al.,
    PRL 109, 240504 (2012)); cancellation with the true ratios removes it.
    """
    rig = SimRig(demo_device, seed=3, drift=False)
    seqs = draw_sequences(["q4", "q5"], [1, 25, 50, 100], 16, rng=8)
    # best-case cancellation from the simulator's truth, r = −X
    r54 = rig.true_ratio("q5", "q4-line", rig.chip.qubit("q4").f01_ghz)
    r45 = rig.true_ratio("q4", "q5-line", rig.chip.qubit("q5").f01_ghz)

    def cancel(tl):
        extra = [t.scaled(r54, "q5-line") for t in tl.tones if t.line == "q4-line"]
        extra += [t.scaled(r45, "q4-line") for t in tl.tones if t.line == "q5-line"]
        return replace(tl, tones=tl.tones + tuple(extra))

    rep = simultaneous_rb(rig, seqs, transforms={"uncompensated": None, "compensated": cancel},
                          shots=20000, n_boot=60, rng=2)
    q5 = rep.comparison("q5")
    sim, iso = q5.simultaneous["uncompensated"], q5.isolated
    assert sim.error_per_gate > 3 * iso.error_per_gate
    assert sim.error_per_gate - iso.error_per_gate > 5 * math.hypot(
        sim.error_per_gate_stderr, iso.error_per_gate_stderr)
    # q4 hardly feels q5 (q5's drive is 230 MHz away from both q4 transitions)
    ratio, err = rep.comparison("q4").ratio["uncompensated"]
    assert abs(ratio - 1) < 0.2
    # cancelling the q4-line → q5 leak brings q5 back to its isolated error
    ratio, err = q5.ratio["compensated"]
    assert abs(ratio - 1) < max(0.1, 3 * err), (ratio, err)
    ds = rep.to_dataset()
    assert ds["error_per_gate"].attrs["units"] == "1"
    assert list(ds["condition"].values) == ["isolated", "uncompensated", "compensated"]
    assert rep.victim_timelines["uncompensated"] == 2 * 4 * 16
    assert "q5" in rep.table()


def test_transform_hook_is_applied_to_every_timeline(demo_device):
    """Removing the aggressor's tones by the hook makes q5's simultaneous run isolated."""
    rig = SimRig(demo_device, seed=3, drift=False)
    seqs = draw_sequences(["q4", "q5"], [1, 60], 3, rng=9)
    seen = []

    def drop_d4(tl):
        seen.append(tl.label)
        return replace(tl, tones=tuple(t for t in tl.tones if t.line != "q4-line"))

    data = run_rb(rig, seqs, transform=drop_d4, shots=20000)
    iso = run_rb(rig, seqs, mode="isolated", shots=20000)
    assert len(seen) == 6
    assert data.attrs["compensated"] == 1
    # same physics for q5 → equal survival within shot noise
    diff = data["survival"].sel(qubit="q5") - iso["survival"].sel(qubit="q5")
    assert float(np.abs(diff).max()) < 0.015


def test_own_drive_trim_matches_the_simulators_second_order_factor():
    """With every cancellation tone on, qubit j's own drive changes by
    1 + Σ_k X_jk(f_j)·r_kj (the tones other lines play at f_j reach j too). The
    amplitude-amplification measurement must find |that| − 1 (simulator truth)."""
    from xtalkcal.verification import own_drive_trims

    rig = SimRig(demo_device_path(), seed=5, drift=False)
    chip = rig.chip

    def transform(tl):  # compensation from the simulator's true matrix
        extra = [t.scaled(rig.true_ratio(q, t.line, t.freq_ghz), chip.line_of(q).name)
                 for t in tl.tones for q in chip.qubit_names
                 if chip.line_of(q).name != t.line]
        return replace(tl, tones=tl.tones + tuple(extra))

    trims = own_drive_trims(rig, ["q1", "q5"], transform, shots=20000)
    for q in ("q1", "q5"):
        line, f = chip.line_of(q).name, chip.qubit(q).f01_ghz
        factor = 1 + sum(rig.true_crosstalk(q, chip.line_of(v).name, f)
                         * rig.true_ratio(v, line, f) for v in chip.qubit_names if v != q)
        want = abs(factor) - 1
        assert abs(want) > 3e-3  # a change worth trimming on this chip
        assert abs(trims[q].change - want) < 0.1 * abs(want) + 3 * trims[q].stderr, q
