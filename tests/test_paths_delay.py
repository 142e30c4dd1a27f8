"""Leak paths that delay the envelope as well as the carrier (device file version 3).

Outside references:

* the floor left by a cancellation copy aligned to the aggressor when the leak is delayed
  by τ is ``10·log10(1 − ρ²)`` of the uncancelled Stark effect, ρ the envelope's
  normalised autocorrelation at τ (least squares on ∫|A(t−τ) − c·A(t)|²; the two-level
  Stark shift Ω²/(2Δ) of an off-resonant drive is the textbook AC Stark result, e.g.
  Krantz et al., Appl. Phys. Rev. 6, 021318 (2019)). For a flat-top of 123 ns with 20 ns
  cosine rises the figures computed outside this project are −35, −29, −23 and −17 dB
  at τ = 0.5, 1, 2 and 4 ns;
* the waveform path's filter, whose delays move envelopes (``test_sampled_sim.py`` checks
  it against the tone path with each tone moved by hand).
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
import tomli_w

from simulated_device import demo_device_path, device_from_dict
from simulated_device.device import load_device
from simulated_device.paths import envelope_floor_db
from simulated_device.rig import SimRig, SimulatedSampledRig
from xtalkcal.common import FieldErrors
from xtalkcal.hardware import Envelope, Timeline, Tone

FA, FB = 4.92, 5.31


def device_dict(*, version=3, delay=1.0, self_delay=0.0, db=-6.0, levels=3, **extra):
    """An invented two-transmon device: line lb of qubit b leaks onto qubit a."""
    def qubit(name, f01):
        return dict(name=name, f01_ghz=f01, anharmonicity_ghz=-0.21, t1_us=1e4, t2_us=1e4)

    d = dict(
        format="xtalkcal-simdevice", version=version, name="pair", seed=3, levels=levels,
        repetition_us=100.0, limits=dict(max_amplitude=0.9),
        electronics=dict(amplitude_jitter=0.0, phase_jitter_rad=0.0),
        qubits=[qubit("a", FA), qubit("b", FB)],
        lines=[dict(name="la", qubit="a", rabi_mhz=52.0, max_amplitude=0.8,
                    self_delay_ns=self_delay),
               dict(name="lb", qubit="b", rabi_mhz=50.0, max_amplitude=0.8)],
        couplings=[dict(line="lb", qubit="a", crosstalk_db=db, phase_deg=40.0,
                        delay_ns=delay)],
    )
    d.update(extra)
    return d


def _flattop(dt: float = 1e-3, total: float = 123.0, ramp: float = 20.0) -> np.ndarray:
    """The flat-top envelope with cosine rises, sampled and padded with zeros."""
    t = np.arange(0.0, total, dt)
    a = np.ones_like(t)
    up, down = t < ramp, t > total - ramp
    a[up] = 0.5 * (1 - np.cos(np.pi * t[up] / ramp))
    a[down] = 0.5 * (1 - np.cos(np.pi * (total - t[down]) / ramp))
    pad = np.zeros(int(10.0 / dt))
    return np.concatenate([pad, a, pad])


@pytest.mark.parametrize(("tau", "outside_db"), [(0.5, -35.0), (1.0, -29.0), (2.0, -23.0),
                                                 (4.0, -17.0)])
def test_autocorrelation_floor_matches_the_outside_figures(tau, outside_db) -> None:
    assert envelope_floor_db(_flattop(), 1e-3, tau) == pytest.approx(outside_db, abs=0.2)


def _ramsey(rig: SimRig, cancel: complex, theta: float, half_pi: float) -> Tone | Timeline:
    """Ramsey on a around a Stark pulse from lb at b's frequency, plus a copy on la."""
    sq = Envelope("square")
    ft = Envelope("flattop", ramp_ns=20.0)
    tones = [Tone("la", 0.0, 20.0, FA, half_pi, 0.0, sq),
             Tone("lb", 30.0, 123.0, FB, 0.5, 0.0, ft)]
    if cancel:
        tones.append(Tone("la", 30.0, 123.0, FB, abs(cancel), float(np.angle(cancel)), ft))
    tones.append(Tone("la", 170.0, 20.0, FA, half_pi, theta, sq))
    return Timeline(tuple(tones), ("a",), readout_ns=195.0)


def _stark_phase(rig: SimRig, cancel: complex, half_pi: float) -> float:
    """Phase (rad) the Stark pulse gives a, from four Ramsey phases (robust to contrast)."""
    p = [rig.populations([_ramsey(rig, cancel, th, half_pi)], "a")[0, 1]
         for th in (0.0, 0.5 * np.pi, np.pi, 1.5 * np.pi)]
    return float(np.arctan2(p[1] - p[3], p[0] - p[2]))


def _half_pi(rig: SimRig) -> float:
    """Amplitude of the 20 ns square π/2 on a (one rescale; little leaks to level 2)."""
    amp = 0.24
    tl = Timeline((Tone("la", 0.0, 20.0, FA, amp, 0.0, Envelope("square")),), ("a",),
                  readout_ns=25.0)
    p1 = rig.populations([tl], "a")[0, 1]
    return amp * (0.5 * np.pi) / (2 * math.asin(math.sqrt(p1)))


@pytest.mark.parametrize(("tau", "outside_db"), [(1.0, -29.0), (2.0, -23.0), (4.0, -17.0)])
def test_aligned_copy_leaves_the_delay_floor_on_the_stark_phase(tau, outside_db) -> None:
    rig = SimRig(device_from_dict(device_dict(delay=tau)), drift=False)
    half_pi = _half_pi(rig)
    leak = rig.true_crosstalk("a", "lb", FB) * 0.5  # what lb's tone puts on a, in la units
    phi0 = _stark_phase(rig, 0j, half_pi)
    ref = _stark_phase(replace_rig_without_pulse(rig), 0j, half_pi)
    phi0 -= ref
    assert abs(phi0) > 0.02
    # Along the aligned copy's scale s the Stark phase is a parabola with its least at ρ.
    rho = 10 ** (envelope_floor_db(_flattop(), 1e-3, tau) / 10)
    rho = math.sqrt(1 - rho)
    s = np.array([rho - 0.05, rho, rho + 0.05])
    phi = np.array([_stark_phase(rig, -leak * si, half_pi) - ref for si in s])
    c2, c1, c0 = np.polyfit(s, phi, 2)
    floor = c0 - c1 * c1 / (4 * c2)
    measured_db = 10 * math.log10(abs(floor / phi0))
    assert measured_db == pytest.approx(outside_db, abs=1.0)
    assert -c1 / (2 * c2) == pytest.approx(rho, abs=2e-3)
    # The carrier-only model (version 2 behaviour) cancels the same leak far deeper.
    old = SimRig(replace(rig.device, envelope_delay=False), drift=False)
    deep = _stark_phase(old, -leak, half_pi) - ref
    assert abs(deep / phi0) < 10 ** ((measured_db - 15.0) / 10)


def replace_rig_without_pulse(rig: SimRig) -> SimRig:
    """The same device with the leak removed: the Ramsey's own phase (the reference)."""
    return SimRig(replace(rig.device, couplings=()), drift=False)


def test_the_bundled_chip_and_version_2_files_are_untouched() -> None:
    dev = load_device(demo_device_path())
    assert dev.envelope_delay is False
    assert all(ln.electronics is None for ln in dev.lines)
    assert all(not c.resonances for c in dev.couplings)
    rig = SimRig(dev, drift=False)
    cols = tuple(np.zeros((2, 1)) for _ in range(9))
    ntones = np.ones(2, dtype=np.int64)
    out, n = rig._hardware_tones("q0", cols, ntones, np.ones(2))
    assert out is cols and n is ntones
    # A version 3 file that turns the delay off gives exactly the version 2 numbers.
    tl = Timeline((Tone("lb", 0.0, 40.0, FA, 0.4, 0.3, Envelope("gaussian", 8.0)),
                   Tone("la", 5.0, 40.0, FA, 0.1, 0.0, Envelope("gaussian", 8.0))), ("a",))
    v2 = SimRig(device_from_dict(device_dict(version=2, self_delay=0.3)), drift=False)
    v3 = SimRig(device_from_dict(device_dict(self_delay=0.3, paths=dict(envelope_delay=False))),
                drift=False)
    on = SimRig(device_from_dict(device_dict(self_delay=0.3)), drift=False)
    assert np.array_equal(v2.populations([tl], "a"), v3.populations([tl], "a"))
    assert not np.allclose(on.populations([tl], "a"), v2.populations([tl], "a"), atol=1e-6)


@pytest.mark.parametrize("version", [1, 2])
def test_version_3_fields_are_refused_in_older_files(version, tmp_path) -> None:
    d = device_dict(version=version, paths=dict(envelope_delay=True))
    d["couplings"][0]["resonances"] = [[5.2, 20.0, 0.5]]
    d["lines"][1]["image_dbc"] = -35.0
    path = tmp_path / "old.toml"
    path.write_bytes(tomli_w.dumps(d).encode())
    with pytest.raises(FieldErrors) as err:
        load_device(path)
    text = str(err.value)
    for field in ("paths", "couplings[0].resonances", "lines[1].image_dbc"):
        assert field in text and "needs version = 3" in text
    assert "old.toml" in text


def test_tone_path_with_envelope_delay_agrees_with_the_waveform_filter() -> None:
    """Whole-sample delays (1/256 ns) so that the filter is an exact shift."""
    d = device_dict(delay=1.25, self_delay=0.25, db=-10.0, levels=3)
    dev = device_from_dict(d)
    sim = SimRig(dev, drift=False)
    srig = SimulatedSampledRig(dev, samples_per_ns=256.0, drift=False)
    g = Envelope("gaussian", sigma_ns=4.0)
    tl = Timeline((Tone("lb", 10.0, 24.0, FA, 0.6, 0.2, g),
                   Tone("la", 14.0, 24.0, FA, 0.05, -1.3, g)), ("a",), readout_ns=50.0)
    tone = sim.populations([tl], "a")[0]
    wave = srig.populations([srig.compile(tl)], "a")[0]
    assert np.max(np.abs(tone - wave)) <= 1e-6
    carrier_only = SimRig(replace(dev, envelope_delay=False), drift=False)
    assert np.max(np.abs(carrier_only.populations([tl], "a")[0] - wave)) > 1e-5


def test_resonance_shapes_x_but_keeps_it_at_the_victims_f01() -> None:
    d = device_dict(delay=0.0)
    d["couplings"][0]["resonances"] = [[5.2, 40.0, 2.0]]
    res = SimRig(device_from_dict(d), drift=False)
    flat = SimRig(device_from_dict(device_dict(delay=0.0)), drift=False)
    assert res.true_crosstalk("a", "lb", FA) == pytest.approx(flat.true_crosstalk("a", "lb", FA))
    # Lorentzian written out: R(f) = 1 + s·(w/2)/(w/2 + i(f − f_r)), X ∝ R(f)/R(f01).
    def r(f):
        return 1 + 2.0 * 0.02 / (0.02 + 1j * (f - 5.2))

    ratio = res.true_crosstalk("a", "lb", 5.2) / flat.true_crosstalk("a", "lb", 5.2)
    assert ratio == pytest.approx(r(5.2) / r(FA), rel=1e-12)
    assert abs(ratio) > 2.5
    # The tone path sees it: a leak at the resonance drives a harder than a flat path does.
    tl = Timeline((Tone("lb", 0.0, 40.0, 5.2, 0.3, 0.0, Envelope("gaussian", 8.0)),), ("a",))
    assert res.populations([tl], "a")[0, 1] > flat.populations([tl], "a")[0, 1]
