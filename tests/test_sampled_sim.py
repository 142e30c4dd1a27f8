"""End to end: timelines compiled to held I/Q samples and simulated from the samples alone
must give the tone path's populations.

(a) ``SimRig`` integrates the tones with their envelopes evaluated continuously;
(b) ``SimulatedSampledRig`` compiles the same timelines (cancellation tones from the
applicator included) to per-line samples and integrates the sample-held drive.

Why they can agree to 1e-6: each sample is the midpoint-rule mean of its cell, so the
held drive differs from the smooth one only at O(dt²) — the zero-order hold's droop of a
tone at intermediate frequency ν is 1 − sinc(ν·dt) ≈ (πν·dt)²/6 (a standard DAC
result), 2.4e-6 for ν = 0.39 GHz at 256 samples/ns. The LO itself is continuous, so tones
at their line's LO see only the envelope's O(dt²). Both paths run the same master
equation; the tone path is itself checked against QuTiP in test_device_qutip.py.

Line responses: on a device whose responses are flat in frequency the waveform path's
filter is the tone path's per-tone factor exactly. With delays the filter also moves
envelopes (the tone path keeps them in place), so there the reference is the tone path
with every tone moved by its delay: H(f) ∝ e^{−i2π(f − f01)τ} applied to a signal
A(t)·e^{−i2πft} gives A(t + τ)·e^{−i2πft} times the tone path's factor H(f_k).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from simulated_device import device_from_dict
from simulated_device.rig import SimRig, SimulatedSampledRig
from xtalkcal.compensation import CompensationSettings, PairSetting, apply_to_timeline
from xtalkcal.hardware import Envelope, Rig, Timeline, Tone, check_counts

RATE = 256.0  # samples per ns: hold droop ≤ 2.4e-6 at the largest IF used here (0.39 GHz)
TOL = 1e-6


def _device(*, delays: bool = False):
    """An invented three-transmon device; with ``delays``, whole-sample delays (1/256 ns)."""
    def qubit(name, f01, alpha):
        return dict(name=name, f01_ghz=f01, anharmonicity_ghz=alpha, t1_us=40.0, t2_us=30.0,
                    readout=[[0.97, 0.02, 0.01], [0.03, 0.96, 0.01], [0.01, 0.06, 0.93]])

    def line(name, q, rabi, delay):
        return dict(name=name, qubit=q, rabi_mhz=rabi, max_amplitude=0.8, full_scale_dbm=-25.0,
                    self_delay_ns=delay if delays else 0.0)

    def coupling(ln, q, db, deg, delay):
        return dict(line=ln, qubit=q, crosstalk_db=db, phase_deg=deg,
                    delay_ns=delay if delays else 0.0)

    return device_from_dict(dict(
        format="xtalkcal-simdevice", version=1, name="trio", seed=5, levels=3,
        repetition_us=100.0, limits=dict(max_amplitude=0.9),
        electronics=dict(amplitude_jitter=0.0, phase_jitter_rad=0.0, jitter_groups=1),
        qubits=[qubit("a", 4.92, -0.21), qubit("b", 5.31, -0.205), qubit("c", 5.05, -0.2)],
        lines=[line("la", "a", 52.0, 0.25), line("lb", "b", 50.0, -0.125),
               line("lc", "c", 48.0, 0.5)],
        couplings=[coupling("la", "b", -20.0, 60.5, 1.25), coupling("lb", "a", -22.0, -40.0, 0.75),
                   coupling("la", "c", -30.0, 120.0, 2.0), coupling("lc", "a", -25.0, 10.0, 1.5)],
    ))


@pytest.fixture(scope="module")
def flat():
    dev = _device()
    return SimRig(dev, drift=False), SimulatedSampledRig(dev, samples_per_ns=RATE, drift=False)


def _cancelled(rig: SimRig, fraction: complex) -> Timeline:
    """la driven at b's frequency (a resonant leak onto b), with the applicator's copy on lb
    at ``fraction`` of the true ratio (1: full cancellation; a phase: a wrong one)."""
    r = rig.true_ratio("b", "la", 5.31) * fraction
    setting = PairSetting("la", "a", "b", "lb", 5.31, r, ((1e-8, 0.0), (0.0, 1e-8)), 0.0,
                          "rotation")
    tl = Timeline((Tone("la", 0.0, 40.0, 5.31, 0.5, 0.3, Envelope("gaussian", 8.0)),), ("a", "b"),
                  label="cancelled")
    out = apply_to_timeline(tl, CompensationSettings("trio", (setting,)), rig.chip)
    assert len(out.tones) == 2 and out.tones[1].line == "lb"
    return out


GAUSS = Envelope("gaussian", sigma_ns=8.0)
CASES = {
    "single pulse": Timeline((Tone("la", 0.0, 40.0, 4.92, 0.35, 0.0, GAUSS),), ("a", "b")),
    "train": Timeline(tuple(Tone("la", 40.0 * k, 40.0, 4.92, 0.35, 0.3 * k,
                                 Envelope("drag", 8.0, 0.4)) for k in range(3)), ("a", "b")),
    "several lines": Timeline((
        Tone("la", 2.0, 40.0, 4.92, 0.3, 0.0, GAUSS),
        Tone("lb", 10.0, 30.0, 5.31, 0.3, 1.0, Envelope("flattop", ramp_ns=6.0)),
        Tone("lc", 5.0, 20.0, 5.05, 0.2, -0.5, Envelope("square"))), ("a", "b", "c")),
    "delay": Timeline((Tone("la", 0.0, 20.0, 4.92, 0.25, 0.0, GAUSS),
                       Tone("la", 70.0, 20.0, 4.92, 0.25, 0.0, GAUSS)), ("a",), readout_ns=95.0),
    "odd duration": Timeline((
        Tone("la", 1.37, 23.71, 4.92, 0.12, 0.4, Envelope("square")),
        Tone("lb", 3.33, 17.29, 4.92, 0.1, 0.0, Envelope("flattop", ramp_ns=3.1))), ("a", "b")),
}


def _both(sim: SimRig, srig: SimulatedSampledRig, tl: Timeline, victim: str, ref=None):
    tone = sim.populations([ref or tl], victim)[0]
    wave = srig.populations([srig.compile(tl)], victim)[0]
    return tone, wave


@pytest.mark.parametrize("name", list(CASES))
def test_waveform_path_reproduces_the_tone_path(flat, name: str) -> None:
    sim, srig = flat
    tl = CASES[name]
    for victim in tl.readout:
        tone, wave = _both(sim, srig, tl, victim)
        assert np.max(np.abs(tone - wave)) <= TOL, (name, victim, tone, wave)
    # The cases drive something: populations far above the tolerance.
    assert max(sim.populations([tl], v)[0][1] for v in tl.readout) > 0.01


@pytest.mark.parametrize("fraction", [1.0, 0.5 * np.exp(0.8j)])
def test_cancellation_tone_with_phase(flat, fraction: complex) -> None:
    sim, srig = flat
    tl = _cancelled(sim, fraction)
    leak = sim.populations([Timeline(tl.tones[:1], tl.readout)], "b")[0][1]
    for victim in ("a", "b"):
        tone, wave = _both(sim, srig, tl, victim)
        assert np.max(np.abs(tone - wave)) <= TOL, (victim, tone, wave)
    residual = sim.populations([tl], "b")[0][1]
    assert leak > 0.01  # uncancelled, the leak flips b noticeably
    if fraction == 1.0:
        assert residual < 1e-4  # the true ratio cancels it
    else:
        assert 1e-3 < residual < leak


def test_hold_error_shrinks_as_dt_squared(flat) -> None:
    """The agreement is the O(dt²) of the hold, not luck: ×4 the rate, ÷16 the gap."""
    sim, _ = flat
    tl = _cancelled(sim, 0.5 * np.exp(0.8j))
    tone = sim.populations([tl], "b")[0]
    gaps = []
    for rate in (16.0, 64.0):
        srig = SimulatedSampledRig(sim.device, samples_per_ns=rate, drift=False)
        gaps.append(np.max(np.abs(srig.populations([srig.compile(tl)], "b")[0] - tone)))
    assert gaps[0] > 1e-5
    assert 10 < gaps[0] / gaps[1] < 24


def _moved(tl: Timeline, device, victim: str) -> Timeline:
    """``tl`` with each tone moved earlier by its line's delay to ``victim``."""
    own = device.line_of(victim)

    def delay(line: str) -> float:
        c = device.coupling(line, victim)
        return own.self_delay_ns + (0.0 if line == own.name or c is None else c.delay_ns)

    return replace(tl, tones=tuple(replace(t, start_ns=t.start_ns - delay(t.line))
                                   for t in tl.tones),
                   readout_ns=tl.end_ns)


def test_delays_move_envelopes_as_a_filter_must() -> None:
    dev = _device(delays=True)
    sim = SimRig(dev, drift=False)
    srig = SimulatedSampledRig(dev, samples_per_ns=RATE, drift=False)
    g = Envelope("gaussian", sigma_ns=4.0)
    tl = Timeline((Tone("la", 10.0, 24.0, 4.92, 0.4, 0.2, g),
                   Tone("lb", 14.0, 24.0, 4.92, 0.08, -1.3, g),
                   Tone("lc", 12.0, 24.0, 5.31, 0.3, 0.7, Envelope("drag", 4.0, 0.3))),
                  ("a", "b"), readout_ns=50.0)
    moved_apart = 0.0
    for victim in tl.readout:
        tone, wave = _both(sim, srig, tl, victim, ref=_moved(tl, dev, victim))
        assert np.max(np.abs(tone - wave)) <= TOL, (victim, tone, wave)
        moved_apart = max(moved_apart, np.max(np.abs(sim.populations([tl], victim)[0] - wave)))
    assert moved_apart > 1e-5  # the delays matter: the unmoved timeline is off by more


def test_sampled_simulator_is_a_rig_end_to_end(flat) -> None:
    sim, srig = flat
    assert isinstance(srig, Rig)
    tls = [CASES["single pulse"], replace(CASES["single pulse"], label="again")]
    before = srig.now()
    counts = srig.run(tls, 4000)
    check_counts(counts, batch="test", readout=("a", "b"), n_timelines=2, shots=4000)
    assert counts.started_s == before
    assert counts.finished_s == pytest.approx(before + 2 * 4000 * srig.repetition_ns * 1e-9)
    # Shot noise around the tone path's populations, read through the assignment matrix.
    pops = sim.populations(tls[:1], "a")[0]
    expect = pops @ sim.device.qubit("a").readout
    got = counts.probabilities()[:, 0, :]
    assert np.all(np.abs(got - expect) < 5 * np.sqrt(expect * (1 - expect) / 4000) + 1e-3)
    assert "SimulatedSampledRig(256 samples/ns" in srig.describe()


def test_same_batch_same_counts_on_a_fresh_rig() -> None:
    """Counts depend on the seed and the samples only (a resumed run replays them)."""
    dev = _device()
    tl = CASES["train"]
    first = SimulatedSampledRig(dev, samples_per_ns=8.0, seed=3, drift=False).run([tl], 500)
    again = SimulatedSampledRig(dev, samples_per_ns=8.0, seed=3, drift=False).run([tl], 500)
    np.testing.assert_array_equal(first.counts, again.counts)


def test_a_batch_of_different_lengths_reads_each_at_its_own_time(flat) -> None:
    """The shorter record is read at its end, not after idling to the longer one's."""
    sim, srig = flat
    short, long_ = CASES["single pulse"], CASES["train"]
    together = srig.populations([srig.compile(short), srig.compile(long_)], "a")
    alone = srig.populations([srig.compile(short)], "a")[0]
    np.testing.assert_allclose(together[0], alone, atol=1e-14)
    assert np.max(np.abs(together[0] - sim.populations([short], "a")[0])) <= TOL


def test_jitter_and_groups_reach_both_paths_alike(flat) -> None:
    """The electronics jitter multiplies a line's output: per tone on one path, per line's
    samples on the other; three groups of draws, fixed seed."""
    sim, srig = flat
    tl = CASES["several lines"]
    rng = np.random.default_rng(11)
    jit = (1 + rng.normal(0, 0.05, (1, 3, 3))) * np.exp(1j * rng.normal(0, 0.2, (1, 3, 3)))
    state = sim._drift.at(0.0)
    for victim in tl.readout:
        tone = sim._tone_populations([tl], victim, state, jit)
        wave = srig.populations([srig.compile(tl)], victim, state, jit)
        assert tone.shape == wave.shape == (3, 3)
        assert np.max(np.abs(tone - wave)) <= TOL
        assert np.ptp(tone[:, 1]) > 1e-4  # the draws differ enough to matter
