"""Per-coupling drift parameters and scheduled steps of a device file (version 2).

References outside the code under test:

* a coupling's phase (and log-magnitude) random walk is a Wiener process: its increment over
  a time t is Gaussian with mean 0 and variance ``Var = D·t`` (standard property of Brownian
  motion; a random walk is common practice as a model of slow drift). The sample variance
  of N independent Gaussian draws has relative standard deviation √(2/(N−1)) (the
  chi-squared distribution with N − 1 degrees of freedom), which sets the tolerance;
* a step of ``Δ`` dB multiplies |X| by 10^(Δ/20) (definition of the decibel for an
  amplitude ratio) and a phase change ``δ`` multiplies X by e^{iδ}.
"""

from __future__ import annotations

import copy
import math
import re
from typing import Any

import numpy as np
import pytest

from simulated_device import SimRig, demo_device_path, device_from_dict, load_device
from simulated_device.drift_state import DeviceDrift
from xtalkcal.exceptions import ConfigError
from xtalkcal.hardware import Envelope, Timeline, Tone

HOUR_S = 3600.0
D_DEFAULT = 4e-4  # rad²/h (and 1/h for log-magnitudes)
D_OWN = 2.5e-3  # a pair's own diffusion, about six times the default


def device_dict(n: int = 6, **overrides: Any) -> dict[str, Any]:
    """An invented device with n qubits, every line coupled to every other qubit."""
    qubits = [{"name": f"q{i}", "f01_ghz": 4.6 + 0.11 * i, "anharmonicity_ghz": -0.2,
               "t1_us": 50.0, "t2_us": 40.0} for i in range(n)]
    lines = [{"name": f"q{i}-line", "qubit": f"q{i}", "rabi_mhz": 40.0, "max_amplitude": 0.8}
             for i in range(n)]
    couplings = [{"line": f"q{j}-line", "qubit": f"q{i}", "crosstalk_db": -30.0 - i - j,
                  "phase_deg": 10.0 * (i + 2 * j), "delay_ns": 1.0}
                 for j in range(n) for i in range(n) if i != j]
    data: dict[str, Any] = {
        "format": "xtalkcal-simdevice", "version": 2, "name": "drift-params-test",
        "seed": 5, "levels": 3, "repetition_us": 50.0,
        "electronics": {"amplitude_jitter": 0.0, "phase_jitter_rad": 0.0},
        "drift": {"phase_diffusion_rad2_per_hour": D_DEFAULT,
                  "log_magnitude_diffusion_per_hour": D_DEFAULT},
        "limits": {"max_amplitude": 0.9},
        "qubits": qubits, "lines": lines, "couplings": couplings,
    }
    data.update(overrides)
    return data


def _increments(data: dict[str, Any], t_h: float, seeds: range) -> tuple[np.ndarray, ...]:
    """Phase and log-magnitude increments over [0, t] of every pair, one row per seed."""
    dev = device_from_dict(data)
    pairs = [(c.qubit, c.line) for c in dev.couplings]
    ph, lm = [], []
    for seed in seeds:
        drift = DeviceDrift(dev, rng=seed)
        s0, s1 = drift.at(0.0), drift.at(t_h * HOUR_S)
        ph.append([s1.phase_rad[p] - s0.phase_rad[p] for p in pairs])
        lm.append([s1.log_mag[p] - s0.log_mag[p] for p in pairs])
    return np.array(ph), np.array(lm)


def _within(sample: np.ndarray, expected_var: float, n_sigma: float = 4.0) -> None:
    """The sample variance (mean known to be 0) matches ``expected_var`` within n_sigma."""
    n = sample.size
    var = float(np.mean(sample**2))  # mean 0 is known: N degrees of freedom
    tol = n_sigma * math.sqrt(2.0 / n)
    assert abs(var / expected_var - 1.0) < tol, (var, expected_var, tol)


def test_phase_walk_variance_grows_as_d_times_t():
    """Wiener process: Var[φ(t) − φ(0)] = D·t, at two times (growth linear in t)."""
    data = device_dict()
    for t_h in (1.0, 6.0):
        ph, lm = _increments(data, t_h, range(30))  # 30 seeds × 30 pairs = 900 draws
        _within(ph, D_DEFAULT * t_h)
        _within(lm, D_DEFAULT * t_h)
        assert abs(ph.mean()) < 4 * math.sqrt(D_DEFAULT * t_h / ph.size)


def test_own_diffusion_overrides_the_default_and_others_keep_it():
    data = device_dict()
    own = set(range(0, len(data["couplings"]), 3))  # every third pair has its own walk
    for k in own:
        data["couplings"][k]["phase_diffusion_rad2_per_hour"] = D_OWN
        data["couplings"][k]["log_magnitude_diffusion_per_hour"] = D_OWN / 4
    # One pair with diffusion 0 of its own does not move at all (no rate either).
    data["couplings"][1]["phase_diffusion_rad2_per_hour"] = 0.0
    data["couplings"][1]["log_magnitude_diffusion_per_hour"] = 0.0
    t_h = 4.0
    ph, lm = _increments(data, t_h, range(40))
    mine = np.array(sorted(own))
    rest = np.array([k for k in range(ph.shape[1]) if k not in own and k != 1])
    _within(ph[:, mine], D_OWN * t_h)
    _within(lm[:, mine], D_OWN / 4 * t_h)
    _within(ph[:, rest], D_DEFAULT * t_h)
    _within(lm[:, rest], D_DEFAULT * t_h)
    assert np.all(ph[:, 1] == 0.0) and np.all(lm[:, 1] == 0.0)


def test_own_diffusion_alone_makes_a_device_drift():
    """No [drift] table, one coupling with its own walk: that pair drifts, the rest not."""
    data = device_dict(n=3)
    del data["drift"]
    data["couplings"][2]["phase_diffusion_rad2_per_hour"] = 1.0
    dev = device_from_dict(data)
    assert dev.drifts and not dev.drift.enabled
    drift = DeviceDrift(dev, rng=1)
    s = drift.at(HOUR_S)
    moved = [p for p, v in s.phase_rad.items() if v != 0.0]
    c = dev.couplings[2]
    assert moved == [(c.qubit, c.line)]


def _step_device(at_h: float = 2.0, **drift: float) -> dict[str, Any]:
    data = device_dict(n=3)
    data["drift"] = dict(drift)
    data["steps"] = [{"at_hours": at_h, "line": "q1-line", "qubit": "q0",
                      "crosstalk_db_change": 3.0, "phase_deg_change": 20.0}]
    return data


def test_a_step_is_in_the_truth_exactly_from_its_time():
    data = _step_device(at_h=2.0)
    rig = SimRig(device_from_dict(data), seed=3)
    c = data["couplings"][[(b["line"], b["qubit"]) for b in data["couplings"]].index(
        ("q1-line", "q0"))]
    f = 4.6  # the victim q0's f01: arg X there is phase_deg
    base = 10 ** (c["crosstalk_db"] / 20) * np.exp(1j * math.radians(c["phase_deg"]))
    stepped = base * 10 ** (3.0 / 20) * np.exp(1j * math.radians(20.0))
    at = 2.0 * HOUR_S
    for t in (0.0, at - 1.0, at - 1e-6, math.nextafter(at, 0.0)):
        assert rig.true_crosstalk("q0", "q1-line", f, t) == pytest.approx(base, rel=1e-12), t
    for t in (at, at + 1e-6, at + 30.0, 10 * at):
        assert rig.true_crosstalk("q0", "q1-line", f, t) == pytest.approx(stepped, rel=1e-12), t
    # The other pairs do not move; the matrix (at each aggressor's f01) holds the step.
    before, after = rig.true_matrix(at - 1.0), rig.true_matrix(at)
    changed = np.argwhere(before != after)
    assert changed.tolist() == [[0, 1]]
    assert after[0, 1] == pytest.approx(before[0, 1] * stepped / base, rel=1e-12)


def test_a_step_adds_to_the_random_walk_and_drift_off_has_none():
    """With walks on, the step multiplies the walked X by its factor at its time."""
    data = _step_device(at_h=1.0, phase_diffusion_rad2_per_hour=D_DEFAULT,
                        log_magnitude_diffusion_per_hour=D_DEFAULT)
    plain = copy.deepcopy(data)
    del plain["steps"]
    rig, ref = SimRig(device_from_dict(data), seed=9), SimRig(device_from_dict(plain), seed=9)
    factor = 10 ** (3.0 / 20) * np.exp(1j * math.radians(20.0))
    for t in (0.0, 1800.0, 3599.0, 3600.0, 7200.5):
        x, x0 = (
            rig.true_crosstalk("q0", "q1-line", 4.9, t),
            ref.true_crosstalk("q0", "q1-line", 4.9, t),
        )
        assert x == pytest.approx(x0 * (factor if t >= 3600.0 else 1.0), rel=1e-12)
        assert rig.true_crosstalk("q1", "q0-line", 4.9, t) == ref.true_crosstalk(
            "q1", "q0-line", 4.9, t
        )
    frozen = SimRig(device_from_dict(data), seed=9, drift=False)
    assert frozen.true_crosstalk("q0", "q1-line", 4.9, 7200.0) == frozen.true_crosstalk(
        "q0", "q1-line", 4.9, 0.0)


def test_counts_before_a_step_are_those_of_the_device_without_it():
    data = _step_device(at_h=1.0, phase_diffusion_rad2_per_hour=D_DEFAULT)
    plain = copy.deepcopy(data)
    del plain["steps"]
    # q1-line driven at q0's f01: its leak turns q0 by about 2 rad in 400 ns.
    tl = Timeline((Tone("q1-line", 0.0, 400.0, 4.6, 0.8, 0.0, Envelope("square")),), ("q0", "q2"))
    out = []
    for d in (data, plain):
        rig = SimRig(device_from_dict(d), seed=4)
        before = rig.run([tl] * 4, 200).counts
        rig.wait(HOUR_S)
        out.append((before, rig.run([tl] * 4, 200).counts))
    assert np.array_equal(out[0][0], out[1][0])
    assert not np.array_equal(out[0][1], out[1][1])  # +3 dB on q1-line → q0 shows in the counts


# ------------------------------------------------------------------ validation


def _problems(data: dict[str, Any]) -> list[str]:
    with pytest.raises(ConfigError) as info:
        device_from_dict(data, source="dev.toml")
    return [str(e) for e in getattr(info.value, "errors", (info.value,))]


@pytest.mark.parametrize(("where", "key", "bad"), [
    ("couplings", "phase_diffusion_rad2_per_hour", -1e-6),
    ("couplings", "phase_diffusion_rad2_per_hour", 1e3),
    ("couplings", "log_magnitude_diffusion_per_hour", -1.0),
    ("couplings", "log_magnitude_diffusion_per_hour", math.inf),
    ("steps", "at_hours", -0.5),
    ("steps", "at_hours", 1e308),
    ("steps", "crosstalk_db_change", 41.0),
    ("steps", "crosstalk_db_change", -1e308),
    ("steps", "crosstalk_db_change", math.nan),
    ("steps", "phase_deg_change", 400.0),
    ("steps", "phase_deg_change", -360.5),
    ("steps", "at_hours", "soon"),
])
def test_every_new_number_is_bounded_in_one_line(where, key, bad):
    data = _step_device()
    data[where][0][key] = bad
    lines = _problems(data)
    assert len(lines) == 1, lines
    assert lines[0].startswith(f"dev.toml: {where}[0].{key}: "), lines
    assert re.search(r"accepted: \S+ ≤ x ≤ \S+", lines[0]), lines  # both bounds stated


def test_step_problems_name_the_field():
    data = _step_device()
    data["steps"].append({"at_hours": 1.0, "line": "q1-line", "qubit": "q1",
                          "crosstalk_db_change": 1.0})
    data["steps"].append({"at_hours": 1.0, "line": "q9-line", "qubit": "q0",
                          "crosstalk_db_change": 1.0, "when": 3})
    data["steps"].append({"line": "q0-line", "qubit": "q1"})
    lines = _problems(data)
    assert any(ln.startswith("dev.toml: steps[1].qubit: ") and "not a listed coupling" in ln
               for ln in lines), lines
    assert any(ln.startswith("dev.toml: steps[2].line: ") for ln in lines), lines
    assert any(ln.startswith("dev.toml: steps[2].when: ") for ln in lines), lines
    assert any(ln.startswith("dev.toml: steps[3].at_hours: missing") for ln in lines), lines
    assert any(ln.startswith("dev.toml: steps[3].crosstalk_db_change: missing")
               for ln in lines), lines


def test_version_1_files_refuse_the_new_fields():
    data = _step_device()
    data["version"] = 1
    data["couplings"][0]["phase_diffusion_rad2_per_hour"] = 1e-4
    lines = _problems(data)
    assert any(ln.startswith("dev.toml: steps: needs version = 2") for ln in lines), lines
    assert any(ln.startswith("dev.toml: couplings[0].phase_diffusion_rad2_per_hour: needs "
                             "version = 2") for ln in lines), lines
    assert len(lines) == 2, lines


def test_the_demo_device_is_a_version_1_file_with_no_steps():
    dev = load_device(demo_device_path())
    assert dev.steps == ()
    assert all(c.phase_diffusion_rad2_per_hour is None for c in dev.couplings)
