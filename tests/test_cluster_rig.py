"""SimRig simulates a victim with exchange neighbours together with them, as one cluster.

Checked against outside references, each named beside its check:

* the full two-transmon Hamiltonian, driven through SimRig's timelines, against QuTiP's
  ``mesolve`` (density-matrix elements, tight tolerances);
* static ZZ read from a SimRig Ramsey experiment against the second-order formula
  ZZ = 2J²(α_A+α_B)/((Δ+α_A)(Δ−α_B)) (Pettersson Fors, Fernández-Pendás, Frisk Kockum,
  arXiv:2408.15402 (2024)) and against exact diagonalisation in QuTiP;
* the leak of A's line onto B with A prepared in |0⟩ and in |1⟩ against first-order
  (Rayleigh–Schrödinger) perturbation theory in J: −J/Δ and J/Δ − 2J/(Δ + α_A).

The rig reads a victim in the dressed basis (each eigenstate of the undriven cluster reported
as the bare state it overlaps most), as a dispersive readout does.
"""

from __future__ import annotations

import copy
import math
import warnings

import numpy as np
import pytest
import qutip as qt
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from simulated_device.coupled import ClusterWarning
from simulated_device.device import device_from_dict
from simulated_device.rig import SimRig, SimulatedSampledRig
from xtalkcal.hardware import Envelope, Timeline, Tone, pulse_area_ns

FA, FB, ALPHA, J_MHZ = 4.8, 5.0, -0.3, 3.0  # Δ = f_A − f_B = −200 MHz
RABI = 50.0  # MHz at amplitude 1, both lines
GAUSS = Envelope("gaussian", sigma_ns=10.0)


def pair_data(*, j_mhz=J_MHZ, x_ab_db=-30.0, x_ba_db=-35.0, t1_us=40.0, t2_us=30.0) -> dict:
    """Victim b, neighbour a; a's line leaks onto b at ``x_ab_db`` (40°), b's onto a."""
    def qubit(name, f):
        return {"name": name, "f01_ghz": f, "anharmonicity_ghz": ALPHA, "t1_us": t1_us,
                "t2_us": t2_us}

    def line(q):
        return {"name": f"{q}-line", "qubit": q, "rabi_mhz": RABI, "max_amplitude": 0.9}

    couplings = []
    if x_ab_db is not None:
        couplings.append({"line": "a-line", "qubit": "b", "crosstalk_db": x_ab_db,
                          "phase_deg": 40.0})
    if x_ba_db is not None:
        couplings.append({"line": "b-line", "qubit": "a", "crosstalk_db": x_ba_db,
                          "phase_deg": -20.0})
    return {"format": "xtalkcal-simdevice", "version": 3, "name": "pair", "seed": 5,
            "levels": 3, "electronics": {"amplitude_jitter": 0.0, "phase_jitter_rad": 0.0},
            "qubits": [qubit("b", FB), qubit("a", FA)], "lines": [line("b"), line("a")],
            "couplings": couplings,
            "exchange": [{"qubit_a": "a", "qubit_b": "b", "j_mhz": j_mhz}]}


def pair_rig(**kw) -> SimRig:
    return SimRig(device_from_dict(pair_data(**kw)), drift=False)


def pi_amplitude(env=GAUSS, duration=40.0, angle=math.pi) -> float:
    """Amplitude of a rotation by ``angle`` on a line's own qubit: θ = 2π·Ω·a·∫E."""
    return angle / (2 * math.pi * RABI * 1e-3 * pulse_area_ns(env, duration))


def test_uncoupled_chips_have_no_cluster():
    from simulated_device import demo_device_path

    assert SimRig(demo_device_path(), drift=False).clusters == {}
    rig = pair_rig()
    assert rig.clusters == {"b": ("b", "a"), "a": ("a", "b")}


def test_driven_pair_through_the_rig_against_mesolve():
    rig = pair_rig()
    flat = Envelope("flattop", ramp_ns=8.0)
    tl = Timeline((Tone("b-line", 0.0, 40.0, FB, 0.25, 0.0, GAUSS),
                   Tone("a-line", 5.0, 40.0, FA, 0.12, 0.3, flat)), readout=("b",),
                   readout_ns=50.0)
    cluster, rho = rig.cluster_density([tl], "b")
    assert cluster.names == ("b", "a")
    tp = 2 * math.pi
    b, a, i3 = qt.destroy(3), qt.destroy(3), qt.qeye(3)
    B, A = qt.tensor(b, i3), qt.tensor(i3, a)
    # Complex Rabi rates from the device file alone: own line RABI, leaks RABI·|X|e^{iφ}.
    xab = 10 ** (-30 / 20) * np.exp(1j * math.radians(40.0))
    xba = 10 ** (-35 / 20) * np.exp(1j * math.radians(-20.0))
    om = {("b-line", "b"): RABI * 1e-3 * 0.25, ("b-line", "a"): RABI * 1e-3 * 0.25 * xba,
          ("a-line", "a"): RABI * 1e-3 * 0.12 * np.exp(0.3j),
          ("a-line", "b"): RABI * 1e-3 * 0.12 * np.exp(0.3j) * xab}

    def gauss(t):
        edge = math.exp(-(20.0**2) / 200.0)
        return (math.exp(-((t - 20) ** 2) / 200.0) - edge) / (1 - edge) if 0 <= t <= 40 else 0.0

    def flattop(t):
        tr = t - 5.0
        if not 0 <= tr <= 40:
            return 0.0
        return 0.5 * (1 - math.cos(math.pi * min(tr, 40 - tr, 8.0) / 8)) if min(tr, 40 - tr) < 8 \
            else 1.0

    terms = [tp * ALPHA / 2 * (B.dag() * B.dag() * B * B + A.dag() * A.dag() * A * A),
             [tp * J_MHZ * 1e-3 * A.dag() * B, lambda t: np.exp(1j * tp * (FA - FB) * t)],
             [tp * J_MHZ * 1e-3 * A * B.dag(), lambda t: np.exp(-1j * tp * (FA - FB) * t)]]
    # Frame rotating at each transmon's own f01: a tone at f drives q with e^{−i2π(f−f_q)t}.
    for (ln, q), w in om.items():
        env, f = (gauss, FB) if ln == "b-line" else (flattop, FA)
        op, fq = (B, FB) if q == "b" else (A, FA)
        terms.append([tp * 0.5 * w * op.dag(),
                      lambda t, env=env, d=f - fq: env(t) * np.exp(-1j * tp * d * t)])
        terms.append([tp * 0.5 * np.conj(w) * op,
                      lambda t, env=env, d=f - fq: env(t) * np.exp(1j * tp * d * t)])
    g1, g2 = 1 / 40e3, 1 / 30e3
    gphi = g2 - g1 / 2
    c_ops = [math.sqrt(g1) * B, math.sqrt(g1) * A, math.sqrt(2 * gphi) * B.dag() * B,
             math.sqrt(2 * gphi) * A.dag() * A]
    opts = {"atol": 1e-12, "rtol": 1e-10, "max_step": 0.05, "nsteps": 10**8,
            "method": "dop853", "progress_bar": False}
    res = qt.mesolve(qt.QobjEvo(terms), qt.ket2dm(qt.tensor(qt.basis(3, 0), qt.basis(3, 0))),
                     [0.0, 50.0], c_ops=c_ops, options=opts)
    ref = res.states[-1].full()
    assert np.max(np.abs(rho[0] - ref)) < 1e-6
    # The readout reports dressed states: QuTiP's state in the laboratory frame, projected on
    # the eigenstates of QuTiP's static Hamiltonian, each labelled by its largest bare overlap.
    phi = np.add.outer(FB * np.arange(3), FA * np.arange(3)).ravel()
    lab = ref * np.exp(-1j * tp * np.subtract.outer(phi, phi) * 50.0)
    h0 = (FB * B.dag() * B + FA * A.dag() * A + ALPHA / 2 * (B.dag() * B.dag() * B * B
          + A.dag() * A.dag() * A * A) + J_MHZ * 1e-3 * (A.dag() * B + A * B.dag()))
    _, vecs = h0.eigenstates()
    ref_b = np.zeros(3)
    for v in vecs:
        v = v.full().ravel()
        ref_b[int(np.argmax(np.abs(v))) // 3] += np.real(v.conj() @ lab @ v)
    pops = rig.populations([tl], "b")[0]
    assert np.max(np.abs(pops - ref_b)) < 1e-6
    assert pops[1] > 0.1  # the pulse really rotated b


def test_weak_exchange_reproduces_the_single_transmon_path():
    """Same conventions (phases, DRAG, delays, images) on both paths: J → 0 agrees."""
    data = pair_data(j_mhz=1e-6)
    data["couplings"][0]["delay_ns"] = 2.0
    data["lines"][1].update(lo_ghz=4.85, image_dbc=-20.0)
    alone = copy.deepcopy(data)
    del alone["exchange"]
    drag = Envelope("drag", sigma_ns=6.0, drag_ns=0.8)
    tls = [Timeline((Tone("a-line", 0.0, 30.0, FB + 0.01 * k, 0.6, 0.4 * k, drag),
                     Tone("b-line", 10.0, 30.0, FB, 0.1, 1.0 + k, GAUSS)), readout=("b",))
           for k in range(3)]
    p_c = SimRig(device_from_dict(data), drift=False).populations(tls, "b")
    p_1 = SimRig(device_from_dict(alone), drift=False).populations(tls, "b")
    assert np.max(np.abs(p_c - p_1)) < 1e-7
    assert np.min(p_1[:, 1]) > 1e-3


def ramsey_phase(rig, prepare_a: bool, wait_ns: float) -> float:
    """Phase (rad) b's coherence gathers over ``wait_ns`` in a Ramsey sequence at the chip's
    f01 of b, with a prepared in |1⟩ by a π pulse on a's own line or left in |0⟩."""
    fa, fb = rig.chip.qubit("a").f01_ghz, rig.chip.qubit("b").f01_ghz
    half = pi_amplitude(angle=math.pi / 2)
    t0 = 50.0 if prepare_a else 0.0
    pre = (Tone("a-line", 0.0, 40.0, fa, pi_amplitude(), 0.0, GAUSS),) if prepare_a else ()
    tls = []
    for ph in (0.0, math.pi / 2):
        tls.append(Timeline(pre + (Tone("b-line", t0, 40.0, fb, half, 0.0, GAUSS),
                                   Tone("b-line", t0 + 40 + wait_ns, 40.0, fb, half, ph, GAUSS)),
                            readout=("b",)))
    p = rig.populations(tls, "b")[:, 1]
    # Second π/2 at phase φ: P1 = ½(1 + cos(θ − φ)) for a gathered phase θ (up to a sign
    # convention common to every run, which the differences below remove).
    return math.atan2(2 * p[1] - 1, 2 * p[0] - 1)


def test_zz_from_a_ramsey_against_the_second_order_formula():
    rig = pair_rig(x_ab_db=None, x_ba_db=None, t1_us=1e5, t2_us=1e5)
    waits = (200.0, 1200.0)

    def zz_phase(w):
        d = ramsey_phase(rig, True, w) - ramsey_phase(rig, False, w)
        return math.remainder(d, 2 * math.pi)

    zz_meas = abs(zz_phase(waits[1]) - zz_phase(waits[0])) / (2 * math.pi * (waits[1] - waits[0]))
    delta = FA - FB
    formula = 2 * (J_MHZ * 1e-3) ** 2 * (2 * ALPHA) / ((delta + ALPHA) * (delta - ALPHA))
    assert zz_meas == pytest.approx(abs(formula), rel=0.01)
    # The rig's truth accessor against QuTiP's exact diagonalisation.
    b, a, i3 = qt.destroy(3), qt.destroy(3), qt.qeye(3)
    B, A = qt.tensor(b, i3), qt.tensor(i3, a)
    h = (FB * B.dag() * B + ALPHA / 2 * B.dag() * B.dag() * B * B + FA * A.dag() * A
         + ALPHA / 2 * A.dag() * A.dag() * A * A + J_MHZ * 1e-3 * (A.dag() * B + A * B.dag()))
    e = np.sort(h.eigenenergies())
    e11 = min(e[3:], key=lambda x: abs(x - (FA + FB)))
    assert rig.true_zz_ghz("b", "a") == pytest.approx(e11 - e[1] - e[2] + e[0], abs=1e-12)
    assert zz_meas == pytest.approx(abs(rig.true_zz_ghz("b", "a")), rel=0.003)


def test_leak_depends_on_the_neighbour_state_as_first_order_theory_says():
    """a's line, tuned to b's dressed transition, rotates b by 2π·|Ω·X_s|·a·∫E, where X_s is
    the hybridisation leak with a in s: −J/Δ (s = 0) or J/Δ − 2J/(Δ + α_A) (s = 1)."""
    rig = pair_rig(x_ab_db=None, x_ba_db=None, t1_us=1e5, t2_us=1e5)
    cluster, _ = rig.cluster_density([Timeline((), readout=("b",), readout_ns=1.0)], "b")
    fa = rig.chip.qubit("a").f01_ghz
    env, dur, amp = Envelope("gaussian", sigma_ns=25.0), 150.0, 0.2
    delta, j = FA - FB, J_MHZ * 1e-3
    theory = {0: -j / delta, 1: j / delta - 2 * j / (delta + ALPHA)}
    truth = rig.true_coupled_crosstalk("b", "a-line", fa)
    for s, x_pt in theory.items():
        f_b = cluster.transition_elements(0, [s])[1]
        pre = (Tone("a-line", 0.0, 60.0, fa, pi_amplitude(Envelope("gaussian", sigma_ns=15.0),
                                                           60.0),
                    0.0, Envelope("gaussian", sigma_ns=15.0)),) if s else ()
        t0 = 70.0 if s else 0.0
        tl = Timeline(pre + (Tone("a-line", t0, dur, f_b, amp, 0.0, env),), readout=("b",))
        p1 = rig.populations([tl], "b")[0, 1]
        # The rotation's size, as a leak: sin²(π·|Ω X|·a·∫E) = P1.
        x_seen = math.asin(math.sqrt(p1)) / (math.pi * RABI * 1e-3 * amp
                                             * pulse_area_ns(env, dur))
        assert x_seen == pytest.approx(abs(x_pt), rel=0.03)
        x_truth = rig.true_coupled_crosstalk("b", "a-line", f_b).by_state[(s,)]
        assert x_seen == pytest.approx(abs(x_truth), rel=0.01)
    assert truth.conditional["a"] == pytest.approx(
        2 * j * ALPHA / (delta * (delta + ALPHA)), rel=0.05)
    assert 20 * math.log10(abs(truth.by_state[(0,)])) == pytest.approx(
        20 * math.log10(j / abs(delta)), abs=0.1)


def test_truth_adds_classical_and_hybridisation_leaks():
    rig = pair_rig(x_ba_db=None)
    fa = rig.chip.qubit("a").f01_ghz
    classical = rig.true_crosstalk("b", "a-line", fa)
    hyb = pair_rig(x_ab_db=None, x_ba_db=None).true_coupled_crosstalk("b", "a-line", fa)
    both = rig.true_coupled_crosstalk("b", "a-line", fa)
    assert both.neighbours == ("a",)
    assert both.average == pytest.approx(classical + hyb.average, abs=2e-3 * abs(classical))
    assert abs(both.conditional["a"]) > 0.1 * abs(hyb.average)
    # A victim without neighbours: the classical X, nothing conditional.
    lone = SimRig(device_from_dict({k: v for k, v in pair_data().items() if k != "exchange"}),
                  drift=False).true_coupled_crosstalk("b", "a-line", fa)
    assert lone.average == pytest.approx(classical) and lone.conditional == {}


def test_chip_file_lists_the_dressed_frequencies():
    rig = pair_rig()
    j, delta = J_MHZ * 1e-3, FA - FB
    # Second order: b moves by −J²/Δ_{a−b}·… = J²/(f_B − f_A) (level repulsion).
    assert rig.chip.qubit("b").f01_ghz == pytest.approx(FB + j**2 / -delta, abs=2e-6)
    assert rig.chip.qubit("a").f01_ghz == pytest.approx(FA + j**2 / delta, abs=2e-6)


def test_a_capped_cluster_is_announced_at_load():
    data = pair_data(x_ab_db=None, x_ba_db=None)
    for k, (name, f) in enumerate((("c", 5.25), ("d", 4.6))):
        data["qubits"].append({"name": name, "f01_ghz": f, "anharmonicity_ghz": ALPHA,
                               "t1_us": 40.0, "t2_us": 30.0})
        data["lines"].append({"name": f"{name}-line", "qubit": name, "rabi_mhz": RABI,
                              "max_amplitude": 0.9})
        data["exchange"].append({"qubit_a": "b", "qubit_b": name, "j_mhz": 2.0 - k})
    with pytest.warns(ClusterWarning, match=r"left out d \(J = 1 MHz\)"):
        rig = SimRig(device_from_dict(data, source="chip.toml"), drift=False)
    assert rig.clusters["b"] == ("b", "a", "c")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        SimRig(device_from_dict(pair_data()), drift=False)  # nobody left out: silent


def test_the_rig_plays_a_preparation_of_the_aggressors_own_qubit():
    """A π pulse on a's own line, then a's line plays at b's frequency (200 MHz from a): the
    rig checks and plays it like any timeline, and a is read in |1⟩."""
    rig = pair_rig(t1_us=1e5, t2_us=1e5)
    fa, fb = rig.chip.qubit("a").f01_ghz, rig.chip.qubit("b").f01_ghz
    pi = Tone("a-line", 0.0, 40.0, fa, pi_amplitude(), 0.0, GAUSS)
    tl = Timeline((pi, Tone("a-line", 50.0, 40.0, fb, 0.3, 0.0, GAUSS)), readout=("b", "a"))
    counts = rig.run([tl], 2000)
    assert counts.counts.shape[:2] == (1, 2) and counts.counts[0, 1, 1] > 1000
    p_a = rig.populations([Timeline((pi,), readout=("a",))], "a")[0]
    assert p_a[1] == pytest.approx(1.0, abs=2e-3)


def test_coupled_matrix_and_the_waveform_path_warning():
    rig = pair_rig()
    avg, cond = rig.true_coupled_matrix()
    names = rig.chip.qubit_names
    ib, ja = names.index("b"), [ln.name for ln in rig.chip.lines].index("a-line")
    x = rig.true_coupled_crosstalk("b", "a-line")
    assert avg[ib, ja] == x.average and cond[ib, ja] == x.conditional["a"]
    with pytest.warns(ClusterWarning, match="exchange"):
        SimulatedSampledRig(device_from_dict(pair_data()))


@settings(max_examples=25, deadline=None, derandomize=True)
@given(j_mhz=st.floats(0.5, 5.0), delta_mhz=st.floats(150.0, 400.0), sign=st.sampled_from([-1, 1]),
       alpha=st.floats(-0.3, -0.18))
def test_hybridisation_leak_follows_first_order_theory(j_mhz, delta_mhz, sign, alpha):
    """Over pairs (J, Δ = f_A − f_B, α_A = α_B) away from the |Δ| = |α| collisions, the
    rig's truth for a's line on b (no classical leak) is −J/Δ with a in |0⟩ and its
    conditional part 2Jα/(Δ(Δ + α)) (first-order Rayleigh–Schrödinger perturbation theory),
    to within the second order, a few (J/min|denominator|)."""
    delta = sign * delta_mhz * 1e-3
    assume(min(abs(delta + alpha), abs(delta - alpha)) > 0.06)
    data = pair_data(j_mhz=j_mhz, x_ab_db=None, x_ba_db=None)
    data["qubits"][1]["f01_ghz"] = FB + delta
    for q in data["qubits"]:
        q["anharmonicity_ghz"] = alpha
    x = SimRig(device_from_dict(data), drift=False).true_coupled_crosstalk("b", "a-line")
    j = j_mhz * 1e-3
    small = j / min(abs(delta), abs(delta + alpha), abs(delta - alpha))
    assert abs(x.by_state[(0,)] / (-j / delta) - 1) < 3 * small
    cond = 2 * j * alpha / (delta * (delta + alpha))
    assert abs(x.conditional["a"] / cond - 1) < 3 * small


def test_a_members_noise_shift_is_a_moved_transmon():
    """A batch's f01 offset of a cluster member (quasi-static noise) acts exactly as that
    transmon's frequency moved in the device file, and its thermal start is the member's."""
    from simulated_device.qubit_noise import BatchQubitNoise

    s = 0.0007  # GHz
    rig = pair_rig()
    fb = rig.chip.qubit("b").f01_ghz
    tl = Timeline((Tone("b-line", 0.0, 40.0, fb, 0.2, 0.0, GAUSS),
                   Tone("b-line", 540.0, 40.0, fb, 0.2, 0.5, GAUSS)), readout=("b",))
    jit = np.ones((1, 1, 2), complex)
    state = rig._drift.at(0.0)
    noise = {"a": BatchQubitNoise(np.array([s]), 40e3, 30e3, None)}
    p_noise = rig._tone_populations([tl], "b", state, jit, noise)
    moved = pair_data()
    moved["qubits"][1]["f01_ghz"] = FA + s
    rig_m = SimRig(device_from_dict(moved), drift=False)
    p_moved = rig_m._tone_populations([tl], "b", rig_m._drift.at(0.0), jit)
    # Not to round-off: the readout's dressed basis is the batch's, not each run's (their
    # difference is of order (J/Δ)²·(s/Δ)² in population).
    assert np.max(np.abs(p_noise - p_moved)) < 1e-8
    assert np.max(np.abs(p_noise - rig.populations([tl], "b"))) > 1e-6  # the shift mattered
    # Thermal start of b alone (a in |0⟩): an idle readout shows it.
    rho0 = np.diag([0.9, 0.08, 0.02]).astype(complex)
    idle = Timeline((), readout=("b",), readout_ns=1e-3)
    p = rig._tone_populations([idle], "b", state, jit,
                              {"b": BatchQubitNoise(np.zeros(1), 40e3, 30e3, rho0)})
    assert p[0] == pytest.approx([0.9, 0.08, 0.02], abs=1e-6)


def test_a_cancellation_tone_drives_the_aggressor_conditionally():
    """b's line (where a cancellation tone for a → b plays) drives a through the exchange;
    the state-dependent half of that drive, (X_{b=1} − X_{b=0})/2, is J·α_B/(Δ(Δ − α_B)),
    Δ = f_A − f_B, to first order in J (Rayleigh–Schrödinger; −27 dB for this pair)."""
    rig = pair_rig(x_ab_db=None, x_ba_db=None)
    x = rig.true_coupled_crosstalk("a", "b-line")
    delta, j = FA - FB, J_MHZ * 1e-3
    first = j * ALPHA / (delta * (delta - ALPHA))
    assert x.conditional["b"] / 2 == pytest.approx(first, rel=0.03)
    assert x.by_state[(0,)] == pytest.approx(j / delta, rel=0.02)  # −J/(f_B − f_A)
