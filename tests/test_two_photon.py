"""The two-photon 0–2 process of a transmon: the simulator against outside references, and
the calibration of a victim that sits on it.

Physics checked here (three-level Duffing transmon, rotating frame at f01, drive at f):

* the simulator's |2⟩ population after a train of Gaussian pulses at (f01 + f12)/2 agrees
  with QuTiP's master-equation solver (model built in ``test_device_qutip`` from the
  equations alone);
* with a square drive exactly on the bare two-photon resonance, eliminating |1⟩
  adiabatically (detuned by −α/2 from both |0⟩ and |2⟩; e.g. Brion, Pedersen and Mølmer,
  J. Phys. A 40, 1033 (2007); reference from memory) leaves a two-level system {|0⟩, |2⟩}
  with coupling C = √2·g²/E (g = Ω/2, E = −α/2), i.e. the textbook two-photon Rabi rate
  2C = Ω01·Ω12/(2Δ), and a differential light shift g²/E. So
  P2(t) = (8/9)·sin²(π·W·t), W = 3g²/E, which the simulator must follow;
* near the null P2 grows as |w|⁴ with the field and as K² with coherent repetition.

Then a Stark victim on its two-photon line (a generated chip whose pair reads −29 dB) is
calibrated: it is nulled, to within its stated error.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from test_device_qutip import ALPHA, F01, Drive, Run, duffing, fast, qutip_populations

from simulated_device import SimRig, device_from_dict
from simulated_device.family import FamilyParams, generate_device
from xtalkcal.calibrate import CalibrationResult, calibrate_chip
from xtalkcal.calibrate.plan import (
    STARK_PHASE_MAX,
    STRONGEST_DB,
    TWO_PHOTON_STARK_SCALE,
    pass_amplitude,
    stark_phase_scale,
    two_photon_hazard,
    two_photon_stark_repeats,
)
from xtalkcal.hardware import Envelope
from xtalkcal.measure import (
    ColumnProbe,
    PulseShape,
    default_protocol,
    near_two_photon,
    two_photon_detuning_ghz,
)

F_TWO = F01 + ALPHA / 2  # (f01 + f12)/2 of the Duffing victim


def train(omega: float, k: int, spacing: float = 36.0, sigma: float = 8.0,
          duration: float = 32.0) -> Run:
    """K Gaussian pulses at (f01 + f12)/2, in phase for the two-photon line (bare resonance)."""
    env = Envelope("gaussian", sigma_ns=sigma)
    drives = tuple(Drive(i * spacing, duration, F_TWO, omega + 0j, env) for i in range(k))
    return Run(drives, (k - 1) * spacing + duration + 4.0)


def test_pulse_train_two_photon_population_matches_qutip():
    victim = duffing(F01, ALPHA, 3, t1_ns=40e3, t2_ns=30e3)
    run = train(0.03, 8)
    ours, ref = fast(victim, run), qutip_populations(victim, run)
    assert ref[2] > 1e-3  # the process is really driven in this case
    assert np.max(np.abs(ours - ref)) <= 1e-4


@pytest.mark.parametrize("fraction", [0.25, 0.5])
def test_square_drive_follows_the_two_photon_rabi_rate(fraction):
    omega = 0.004  # GHz: g/E = 0.02, corrections of order (g/E)² ≈ 4e-4
    g, e = omega / 2, -ALPHA / 2
    w = 3 * g * g / e  # generalised two-photon Rabi frequency (cycles/ns)
    t = fraction / w
    run = Run((Drive(0.0, t, F_TWO, omega + 0j, Envelope("square")),), t)
    p2 = fast(duffing(F01, ALPHA, 3), run)[2]
    expect = 8 / 9 * math.sin(math.pi * w * t) ** 2
    assert p2 == pytest.approx(expect, rel=0.02)


def test_two_photon_population_grows_as_field_to_the_fourth_and_k_squared():
    victim = duffing(F01, ALPHA, 3)
    # weak drive: the light shift's phase over the train stays small (≈ 0.05 rad)
    p = {(a, k): fast(victim, train(a, k))[2] for a in (0.003, 0.006) for k in (4, 8)}
    assert p[(0.006, 4)] / p[(0.003, 4)] == pytest.approx(16.0, rel=0.05)
    assert p[(0.003, 8)] / p[(0.003, 4)] == pytest.approx(4.0, rel=0.05)


# --- the calibration of a two-photon victim -------------------------------------------

# A six-qubit grid whose pair q0-line → q3 sits on q3's two-photon line (0 MHz) at −29 dB.
PARAMS = FamilyParams(n_qubits=6, layout="grid", leakage_hazards=2, near_resonant_hazards=1,
                      two_photon_hazards=1, nearest_db=-25.878277257890126,
                      falloff_db=13.230373131853028, delay_ns=(0.0, 3.587798689647377))


@pytest.fixture(scope="module")
def two_photon_rig():
    doc = generate_device(PARAMS, 1)
    return SimRig(device_from_dict(doc, source=doc["name"]), drift=False, seed=3)


def test_far_two_photon_pairs_are_no_hazard():
    # Rabi's bound Ω2²/(Ω2² + δ2²) at the planned field: on the demo chip q4-line → q7 sits
    # 8 MHz from q7's two-photon line (δ2 = 16 MHz), far beyond Ω2 (≈ 0.5 MHz)
    from simulated_device import demo_device_path

    chip = SimRig(demo_device_path(), drift=False).chip
    amp = pass_amplitude(default_protocol(), chip, "q4-line")
    assert near_two_photon(chip, "q4-line", "q7")
    assert not two_photon_hazard(chip, "q4-line", "q7", amp)


def test_plan_gives_a_two_photon_victim_a_short_train(two_photon_rig):
    chip = two_photon_rig.chip
    proto = default_protocol()
    assert near_two_photon(chip, "q0-line", "q3")
    assert abs(two_photon_detuning_ghz(chip, "q0-line", "q3")) < 1e-3
    amp = pass_amplitude(proto, chip, "q0-line")
    assert two_photon_hazard(chip, "q0-line", "q3", amp)
    assert stark_phase_scale(chip, "q0-line", "q3", amp) == TWO_PHOTON_STARK_SCALE
    assert stark_phase_scale(chip, "q0-line", "q1", amp) == 1.0
    k_max = int(proto.survey.max_train_ns // proto.pulse.duration_ns)
    shape = PulseShape(proto.pulse.duration_ns, proto.pulse.sigma_ns)
    k = two_photon_stark_repeats(chip, "q0-line", "q3", amp, k_max, shape)
    assert 1 <= k < k_max
    # the whole train's Stark phase at 1.5× the strongest planned null is within the bound
    probe = ColumnProbe(chip, "q0-line", ("q3",), amplitude=amp, repeats=k, methods=("stark",),
                        shape=shape, merged=True)
    z = 1.5 * amp * 10 ** (STRONGEST_DB / 20)
    assert probe.stark_gain("q3") * z * z <= TWO_PHOTON_STARK_SCALE * STARK_PHASE_MAX


def test_two_photon_victim_is_nulled_within_its_error(two_photon_rig):
    rig = two_photon_rig
    proto = default_protocol()
    res: CalibrationResult = calibrate_chip(rig, proto, aggressors=["q0-line"])
    p = res.pair("q0-line", "q3")
    f = rig.chip.qubit("q0").f01_ghz
    truth = rig.true_crosstalk("q3", "q0-line", f)
    assert 20 * math.log10(abs(truth)) > -32  # a strong pair
    assert p.accepted and p.nulled and p.method == "stark"
    err = abs(p.x - truth)
    assert 20 * math.log10(err) <= -50
    assert err <= 4 * p.stderr
