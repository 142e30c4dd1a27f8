"""The effect variants of benchmarks/bench_calibration.py: each turns on what it names only."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest

from simulated_device import SimRig, demo_device_path, device_from_dict, load_device
from xtalkcal.common import load_toml

BENCH = Path(__file__).resolve().parents[1] / "benchmarks" / "bench_calibration.py"


@pytest.fixture(scope="module")
def variants():
    spec = importlib.util.spec_from_file_location("bench_calibration", BENCH)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    data, _ = load_toml(demo_device_path())
    return mod, data, mod.effect_variants(data)


def _effects(dev):
    """What is on in a loaded device, as a set of labels."""
    on = set()
    if dev.envelope_delay:
        on.add("envelope delay")
    if any(c.resonances for c in dev.couplings):
        on.add("package resonance")
    for ln in dev.lines:
        el = ln.electronics
        if el is not None:
            on |= {k for k, v in (("IQ image", el.image), ("LO leakage", el.lo_leak),
                                  ("compression", el.saturation)) if v is not None}
    for q in dev.qubits:
        n = q.noise
        on |= {k for k, v in (("thermal population", n.thermal_population),
                              ("f01 noise", n.f01_noise_mhz + n.f01_shot_noise_mhz),
                              ("telegraph defects", n.tls_shift_mhz),
                              ("T1 fluctuation", n.t1_fluctuation)) if v}
    return on


def test_each_variant_turns_on_its_effect_alone_and_all_turns_on_every_one(variants):
    mod, data, out = variants
    assert list(out) == ["none", *mod.EFFECTS, "all together"]
    for name, d in out.items():
        on = _effects(device_from_dict(d))
        expected = set() if name == "none" else set(mod.EFFECTS) if name == "all together" \
            else {name}
        assert on == expected, name


def test_variants_leave_the_input_alone_and_none_is_the_original_chip(variants):
    mod, data, out = variants
    again, _ = load_toml(demo_device_path())
    assert data == again  # the input dict is not modified
    orig = SimRig(load_device(demo_device_path()), seed=3, drift=False)
    none = SimRig(device_from_dict(out["none"]), seed=3, drift=False)
    assert np.array_equal(orig.true_matrix(), none.true_matrix())
    assert none.true_envelope_delay("q5", "q4-line") == 0.0


def test_the_truth_sees_the_effects_it_should(variants):
    """Resonance moves X off the victim's f01; compression makes X fall with amplitude."""
    mod, data, out = variants
    none = SimRig(device_from_dict(out["none"]), seed=3, drift=False)
    res = SimRig(device_from_dict(out["package resonance"]), seed=3, drift=False)
    comp = SimRig(device_from_dict(out["compression"]), seed=3, drift=False)
    f = none.chip.qubit("q4").f01_ghz
    assert abs(res.true_crosstalk("q5", "q4-line", f)) != pytest.approx(
        abs(none.true_crosstalk("q5", "q4-line", f)), rel=1e-3)
    a = np.array([0.1, 0.64])
    x = comp.true_crosstalk_at_amplitude("q5", "q4-line", f, a)
    assert abs(x[1]) < abs(x[0])
