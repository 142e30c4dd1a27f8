"""The bundled device files besides the demo chip: a minimal one with every effect off, and a
hard one with every effect on (its scenario invented and written in the file)."""

from __future__ import annotations

import math

import pytest
import tomllib

from simulated_device import SimRig, hard_device_path, load_device, minimal_device_path
from simulated_device.qubit_noise import thermal_populations
from xtalkcal.hardware import Timeline


def test_minimal_device_has_every_effect_off():
    dev = load_device(minimal_device_path())
    assert not dev.envelope_delay and dev.exchange == () and dev.steps == ()
    assert not dev.drifts and dev.amplitude_jitter == 0 and dev.phase_jitter_rad == 0
    assert all(ln.electronics is None or not ln.electronics.any for ln in dev.lines)
    assert all(ln.self_delay_ns == 0 and ln.self_slope_db_per_ghz == 0 for ln in dev.lines)
    assert all(not q.noise.enabled for q in dev.qubits)
    assert all(c.delay_ns == 0 and c.resonances == () for c in dev.couplings)
    assert SimRig(dev).clusters == {}


def test_minimal_device_documents_every_field():
    """Every field set in the file carries its own explanation on its line."""
    with open(minimal_device_path(), encoding="utf-8") as fh:
        lines = fh.read().splitlines()
    first = {}
    for ln in lines:
        code = ln.split("#", 1)[0]
        if "=" in code:
            key = code.split("=", 1)[0].strip()
            first.setdefault(key, "#" in ln)
    assert first and all(first.values()), [k for k, v in first.items() if not v]


def test_hard_device_has_the_stated_effects():
    dev = load_device(hard_device_path())
    with open(hard_device_path(), "rb") as fh:
        assert tomllib.load(fh)["name"] == dev.name
    with open(hard_device_path(), encoding="utf-8") as fh:
        assert "Invented" in fh.readline()
    f01 = {q.name: q.f01_ghz for q in dev.qubits}
    ratios = [e.j_mhz * 1e-3 / abs(f01[e.qubit_a] - f01[e.qubit_b]) for e in dev.exchange]
    assert max(ratios) == pytest.approx(0.1, abs=0.01)
    assert dev.envelope_delay and max(c.delay_ns for c in dev.couplings) == 5.0
    band = (min(f01.values()), max(f01.values()))
    modes = [r for c in dev.couplings for r in c.resonances]
    assert len(modes) == 1 and band[0] < modes[0].freq_ghz < band[1]
    images = [ln.electronics.image for ln in dev.lines
              if ln.electronics is not None and ln.electronics.image is not None]
    assert [round(20 * math.log10(abs(g)), 6) for g in images] == [-35.0]
    assert all(q.noise.thermal_population == 0.03 for q in dev.qubits)


def test_hard_device_image_lands_near_another_qubit():
    rig = SimRig(hard_device_path(), drift=False)
    near = [c for c in rig.spurious_collisions(7.0) if c["kind"] == "image"
            and c["transition"] == "f01" and c["victim"] != rig.device.line(c["line"]).qubit]
    assert near and all(abs(c["offset_mhz"]) < 7.0 for c in near)


def test_hard_device_runs_through_the_cluster_path():
    rig = SimRig(hard_device_path(), drift=False)
    assert set(rig.clusters) == {"p0", "p1", "p2", "p3"}
    counts = rig.run([Timeline((), readout=("p2", "p3"), readout_ns=1.0)], 20000)
    # Idle: the thermal start seen through the readout.
    q = rig.device.qubit("p2")
    p = thermal_populations(q.levels.energies_ghz, 0.03) @ q.readout
    frac = counts.counts[0, 0, :3] / 20000
    assert frac[1] == pytest.approx(p[1], abs=5 * math.sqrt(p[1] / 20000))
    truth = rig.true_coupled_crosstalk("p2", "p3-line")
    assert abs(truth.conditional["p3"]) > 0.05  # near-resonant: a large conditional part
