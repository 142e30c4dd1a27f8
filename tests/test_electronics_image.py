"""Line electronics (device file version 3): IQ image, LO leakage, Rapp compression.

Outside references:

* QuTiP (``sesolve``) on a three-level Duffing transmon driven by the main tone and its
  image, built here from the rotating-wave model of ``test_device_qutip.py``'s docstring;
* first-order perturbation theory for a weak near-resonant tone, P1 ≈ |π∫Ω(t)e^{i2πδt}dt|²;
* the figure computed outside the project: an image at −35 dBc within 7 MHz of a victim's
  f01 leaves P1 ≈ 4e-4 … 3e-3 per pulse;
* the Rapp AM/AM curve (C. Rapp, ECSC 1991) written out here.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import qutip as qt
import tomli_w

from simulated_device import device_from_dict
from simulated_device.device import load_device
from simulated_device.electronics import LineElectronics, apply_to_samples, rapp
from simulated_device.rig import SimRig, SimulatedSampledRig
from xtalkcal.common import FieldErrors
from xtalkcal.hardware import Envelope, Timeline, Tone, envelope_values

FA, FB, RABI_A = 4.92, 5.31, 52.0
GAUSS = Envelope("gaussian", sigma_ns=8.0)


def device(*, lo=FA + 0.15, image_dbc=-35.0, leak_dbc=None, sat=None, levels=3):
    line_a = dict(name="la", qubit="a", rabi_mhz=RABI_A, max_amplitude=0.8, lo_ghz=lo)
    if image_dbc is not None:
        line_a.update(image_dbc=image_dbc, image_phase_deg=25.0)
    if leak_dbc is not None:
        line_a.update(lo_leak_dbc=leak_dbc, lo_leak_phase_deg=-60.0)
    line_b = dict(name="lb", qubit="b", rabi_mhz=50.0, max_amplitude=0.8)
    if sat is not None:
        line_b.update(compression_amplitude=sat, compression_smoothness=2.0)

    def qubit(name, f01):
        return dict(name=name, f01_ghz=f01, anharmonicity_ghz=-0.21, t1_us=1e4, t2_us=1e4)

    return device_from_dict(dict(
        format="xtalkcal-simdevice", version=3, name="pair-el", seed=4, levels=levels,
        repetition_us=100.0, limits=dict(max_amplitude=0.9),
        electronics=dict(amplitude_jitter=0.0, phase_jitter_rad=0.0),
        qubits=[qubit("a", FA), qubit("b", FB)], lines=[line_a, line_b],
        couplings=[dict(line="lb", qubit="a", crosstalk_db=-20.0, phase_deg=40.0,
                        delay_ns=0.0)]))


def _pi_amplitude() -> float:
    """Peak amplitude of a π rotation on a with the 40 ns Gaussian (area from the envelope)."""
    t = np.linspace(0.0, 40.0, 40001)
    area = np.trapezoid(np.real(envelope_values(GAUSS, 40.0, t)), t)
    return 0.5 / (RABI_A * 1e-3 * area)


def _image_timeline(delta_mhz: float) -> Timeline:
    """la plays a π-area pulse whose image lands ``delta_mhz`` above a's f01."""
    lo = FA + 0.15
    f_tone = 2 * lo - (FA + delta_mhz * 1e-3)
    return Timeline((Tone("la", 0.0, 40.0, f_tone, _pi_amplitude(), 0.4, GAUSS),), ("a",),
                    readout_ns=45.0)


def _qutip_two_tones(tones: list[tuple[float, complex]], levels: np.ndarray) -> np.ndarray:
    """QuTiP populations of a Duffing transmon under tones (freq, Ω) with the Gaussian."""
    f = levels[1]
    L = len(levels)
    n = np.arange(L)
    h0 = qt.Qobj(np.diag(2 * math.pi * (levels - n * f)).astype(complex))
    up = qt.Qobj(np.diag(np.sqrt(n[1:]).astype(float), -1).astype(complex))

    def coeff(t: float) -> complex:
        e = complex(envelope_values(GAUSS, 40.0, np.array([t]))[0])
        return sum(math.pi * om * e * complex(math.cos(-2 * math.pi * (fk - f) * t),
                                              math.sin(-2 * math.pi * (fk - f) * t))
                   for fk, om in tones)

    H = qt.QobjEvo([h0, [up, coeff], [up.dag(), lambda t: coeff(t).conjugate()]])
    res = qt.sesolve(H, qt.basis(L, 0), [0.0, 45.0],
                     options={"atol": 1e-12, "rtol": 1e-10, "max_step": 0.05, "nsteps": 10**7})
    return np.abs(res.states[-1].full().ravel()) ** 2


@pytest.mark.parametrize("delta_mhz", [0.0, 3.0, 7.0])
def test_image_tone_against_qutip_and_first_order(delta_mhz) -> None:
    dev = device()
    rig = SimRig(dev, drift=False)
    tl = _image_timeline(delta_mhz)
    p = rig.populations([tl], "a")[0]
    # QuTiP, the main tone and its image built from the device's numbers by hand.
    t = tl.tones[0]
    g = 10 ** (-35.0 / 20) * np.exp(1j * math.radians(25.0))
    main = t.complex_amplitude * RABI_A * 1e-3
    image = g * np.conj(t.complex_amplitude) * RABI_A * 1e-3
    q = dev.qubit("a")
    ref = _qutip_two_tones([(t.freq_ghz, main), (2 * (FA + 0.15) - t.freq_ghz, image)],
                           q.levels.energies_ghz)
    assert np.max(np.abs(p - ref)) < 1e-6
    # Without the image the far-off main tone leaves almost nothing: the P1 is the image's.
    alone = _qutip_two_tones([(t.freq_ghz, main)], q.levels.energies_ghz)
    assert alone[1] < 0.05 * p[1]
    tt = np.linspace(0.0, 40.0, 40001)
    e = np.real(envelope_values(GAUSS, 40.0, tt))
    first = abs(math.pi * abs(image) * np.trapezoid(e * np.exp(2j * np.pi * delta_mhz * 1e-3 * tt),
                                                    tt)) ** 2
    assert p[1] == pytest.approx(first, rel=0.1)
    if delta_mhz == 0.0:  # a π-area pulse's image on resonance: inside the outside range
        assert 4e-4 <= p[1] <= 3e-3


def test_waveform_path_agrees_with_tone_path_on_image_and_lo_leak() -> None:
    dev = device(leak_dbc=-30.0, lo=FA + 0.004)
    sim = SimRig(dev, drift=False)
    srig = SimulatedSampledRig(dev, samples_per_ns=256.0, drift=False,
                               lo_ghz={"la": FA + 0.004, "lb": FB})
    tl = Timeline((Tone("la", 2.0, 40.0, FA + 0.02, 0.3, 0.4, GAUSS),
                   Tone("lb", 5.0, 40.0, FA, 0.5, -0.2, GAUSS)), ("a",), readout_ns=50.0)
    tone = sim.populations([tl], "a")[0]
    wave = srig.populations([srig.compile(tl)], "a")[0]
    assert np.max(np.abs(tone - wave)) < 1e-5
    clean = SimRig(device(image_dbc=None), drift=False).populations([tl], "a")[0]
    assert np.max(np.abs(clean - tone)) > 1e-4


def test_lo_leak_drives_even_an_empty_shot() -> None:
    dev = device(image_dbc=None, leak_dbc=-40.0, lo=FA)
    rig = SimRig(dev, drift=False)
    tl = Timeline((), ("a",), readout_ns=80.0)
    p1 = rig.populations([tl], "a")[0, 1]
    rate = 10 ** (-40.0 / 20) * RABI_A * 1e-3  # GHz, resonant square drive of 80 ns
    assert p1 == pytest.approx(math.sin(math.pi * rate * 80.0) ** 2, rel=1e-3)
    off = SimRig(device(image_dbc=None), drift=False).populations([tl], "a")[0, 1]
    assert off < 1e-12


def test_rapp_curve_and_x_against_amplitude() -> None:
    a = np.array([0.1, 0.5, 0.8])
    y = rapp(a * np.exp(0.3j), 1.0, 2.0)
    assert np.allclose(np.abs(y), a / (1 + a ** 4) ** 0.25)
    assert np.allclose(np.angle(y), 0.3)
    rig = SimRig(device(image_dbc=None, sat=1.0), drift=False)
    x = rig.true_crosstalk_at_amplitude("a", "lb", FB, a)
    x0 = rig.true_crosstalk("a", "lb", FB)
    assert np.allclose(x / x0, 1 / (1 + a ** 4) ** 0.25)
    # The simulated leak follows the same curve: a resonant leak's rotation angle scales as |g(a)|.
    ps = []
    for amp in (0.1, 0.8):
        tl = Timeline((Tone("lb", 0.0, 40.0, FA, amp, 0.0, GAUSS),), ("a",), readout_ns=45.0)
        ps.append(rig.populations([tl], "a")[0, 1])
    ratio = math.asin(math.sqrt(ps[1])) / math.asin(math.sqrt(ps[0])) / 8.0
    assert ratio == pytest.approx((1 + 0.1 ** 4) ** 0.25 / (1 + 0.8 ** 4) ** 0.25, rel=2e-3)


def test_samples_through_the_electronics() -> None:
    s = np.array([0.2 + 0.1j, -0.3j, 0.0])
    el = LineElectronics(lo_ghz=5.0, image=0.01j, lo_leak=0.003 + 0j)
    out = apply_to_samples(el, s)
    assert np.allclose(out, s + 0.01j * np.conj(s) + 0.003)


def test_collisions_list_the_image_near_a_victim() -> None:
    rig = SimRig(device(lo=(FA + FB) / 2 + 0.002), drift=False)
    hits = rig.spurious_collisions(window_mhz=10.0)
    kinds = {(h["line"], h["kind"], h["victim"], h["transition"]) for h in hits}
    assert ("la", "image", "b", "f01") in kinds
    hit = next(h for h in hits if h["victim"] == "b")
    assert hit["offset_mhz"] == pytest.approx(4.0, abs=1e-6)
    assert SimRig(device(image_dbc=None), drift=False).spurious_collisions() == []


def test_bad_electronics_fields_name_file_field_and_range(tmp_path) -> None:
    d = dict(format="xtalkcal-simdevice", version=3, name="bad", levels=3,
             limits=dict(max_amplitude=0.9),
             qubits=[dict(name="a", f01_ghz=FA, anharmonicity_ghz=-0.21, t1_us=50.0,
                          t2_us=40.0)],
             lines=[dict(name="la", qubit="a", rabi_mhz=50.0, max_amplitude=0.8,
                         image_dbc=-35.0, compression_amplitude=500.0)])
    path = tmp_path / "bad.toml"
    path.write_bytes(tomli_w.dumps(d).encode())
    with pytest.raises(FieldErrors) as err:
        load_device(path)
    text = str(err.value)
    assert "bad.toml" in text and "lines[0].image_dbc" in text and "needs lo_ghz" in text
    assert "lines[0].compression_amplitude" in text and "100" in text
