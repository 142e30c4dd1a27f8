"""Qubit noise of the simulated device against closed forms.

References outside the code under test:

* thermal state: Gibbs populations p_n ∝ exp(−ε_n/kT) (Boltzmann), so ln(p_n/p_0) is linear
  in ε_n with one slope −1/kT;
* quasi-static Gaussian f01 noise of standard deviation σ: the shot-averaged coherence decays
  as exp(−(2πσt)²/2) on top of e^{−t/T2} (Ithier et al., Phys. Rev. B 72, 134519 (2005));
* symmetric random telegraph signal with switching rate γ each way: stationary occupation ½,
  dwell times exponential with mean 1/γ, autocovariance ¼·exp(−2γτ) (Machlup,
  J. Appl. Phys. 25, 341 (1954));
* a lognormal T1: ln(T1_batch/T1) ~ N(0, s²). Tolerances follow the Monte-Carlo standard
  error of the number of draws.
"""

from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import test_device_qutip as tq
from test_device_drift_params import device_dict

from simulated_device import SimRig, device_from_dict
from simulated_device.dynamics import evolve_states
from simulated_device.qubit_noise import (
    QubitNoise,
    TelegraphDefect,
    draw_batch_noise,
    thermal_populations,
)
from xtalkcal.exceptions import ConfigError
from xtalkcal.hardware import Envelope, Timeline, Tone


@pytest.mark.parametrize("p1", [0.01, 0.03, 0.05])
def test_thermal_populations_are_gibbs(p1: float) -> None:
    energies = tq.duffing(4.8, -0.2, 4).levels_ghz
    p = thermal_populations(energies, p1)
    assert p.sum() == pytest.approx(1.0, abs=1e-15)
    assert p[1] == pytest.approx(p1, rel=1e-12)
    slopes = np.log(p[1:] / p[0]) / energies[1:]
    assert np.allclose(slopes, slopes[0], rtol=1e-12)


def _noisy(**noise) -> dict:
    data = device_dict(n=2)
    data["qubits"][0].update(noise)
    return data


def test_thermal_start_shows_in_the_rig() -> None:
    """An idle timeline read at once: P(1) is the thermal population (T1 decay negligible)."""
    rig = SimRig(device_from_dict(_noisy(thermal_population=0.04)), seed=1, drift=False)
    tl = Timeline((), readout=("q0",), readout_ns=1.0)
    noise = rig.qubit_noise("q0", 1, None, 0.0)
    pops = rig._tone_populations([tl], "q0", rig._drift.at(0.0),
                                 np.ones((1, 1, 2), complex), {"q0": noise})
    p = thermal_populations(rig.device.qubit("q0").levels.energies_ghz, 0.04)
    g1t = 1.0 / 50e3  # Γ1·t: level 1 loses Γ1·p1·t and gains 2Γ1·p2·t (rate equations)
    assert pops[0, :2].sum() + pops[0, 2] == pytest.approx(1.0, abs=1e-12)
    assert pops[0, 1] == pytest.approx(p[1] * (1 - g1t) + 2 * g1t * p[2], rel=1e-8)


def test_quasi_static_noise_gives_gaussian_ramsey_decay() -> None:
    sigma_mhz, t1, t2 = 0.3, 80e3, 60e3
    victim = tq.duffing(t1_ns=t1, t2_ns=t2)
    rng = np.random.default_rng(11)
    runs = 4000
    noise = draw_batch_noise(QubitNoise(f01_shot_noise_mhz=sigma_mhz), victim.levels_ghz,
                             t1 / 1e3, t2 / 1e3, runs, rng, 0)
    psi = np.zeros(victim.n_levels, complex)
    psi[:2] = 1 / math.sqrt(2)
    n = np.arange(victim.n_levels)
    levels = victim.levels_ghz[None, :] + noise.shift_ghz[:, None] * n
    for wait in (500.0, 1000.0):
        batch = tq.tone_batch([tq.Run((), wait)] * runs)
        rho = evolve_states(levels, victim.ladder, np.array([t1]), np.array([t2]), batch,
                            psi0=psi)
        # ρ comes in the frame of each run's own f01, where the coherence only decays ...
        assert np.allclose(rho[:, 0, 1], 0.5 * math.exp(-wait / t2), atol=1e-12)
        # ... and the shot average is taken in the common frame of the nominal f01.
        common = np.mean(rho[:, 0, 1] * np.exp(2j * math.pi * noise.shift_ghz * wait))
        expected = 0.5 * math.exp(-wait / t2) * math.exp(-((2 * math.pi * sigma_mhz * 1e-3
                                                             * wait) ** 2) / 2)
        assert abs(common) == pytest.approx(expected, abs=3 * 0.5 / math.sqrt(runs))


def test_telegraph_statistics() -> None:
    rate_h = 36.0
    gamma = rate_h / 3600.0
    d = TelegraphDefect(rate_h, (3, 15, 0))
    t = np.arange(0.0, 4e5, 5.0)
    s = np.array([d.state(x) for x in t], float)
    n_switch = np.count_nonzero(np.diff(s))
    expected_switches = gamma * t[-1]
    assert s.mean() == pytest.approx(0.5, abs=4 / math.sqrt(expected_switches))
    assert n_switch == pytest.approx(expected_switches, rel=4 / math.sqrt(expected_switches))
    for lag_s in (20.0, 50.0):
        k = int(lag_s / 5.0)
        cov = np.mean((s[:-k] - 0.5) * (s[k:] - 0.5))
        assert cov == pytest.approx(0.25 * math.exp(-2 * gamma * lag_s), abs=0.02)
    # The state at a time does not depend on the order of the questions.
    d2 = TelegraphDefect(rate_h, (3, 15, 0))
    assert [d2.state(x) for x in t[::-1][:200]] == [d.state(x) for x in t[::-1][:200]]


def test_t1_fluctuation_is_lognormal_and_t2_stays_physical() -> None:
    rng = np.random.default_rng(5)
    s = 0.2
    draws = [draw_batch_noise(QubitNoise(t1_fluctuation=s), np.array([0, 5.0, 9.8]), 40.0,
                              75.0, 1, rng, 0) for _ in range(3000)]
    logs = np.log([b.t1_ns / 40e3 for b in draws])
    assert logs.mean() == pytest.approx(0.0, abs=4 * s / math.sqrt(3000))
    assert logs.std(ddof=1) == pytest.approx(s, rel=4 * math.sqrt(0.5 / 3000))
    assert all(b.t2_ns <= 2 * b.t1_ns + 1e-9 for b in draws)


def _ramsey(rig: SimRig, wait: float) -> Timeline:
    env = Envelope("gaussian", sigma_ns=5.0)
    amp = 0.25 / (2 * math.pi * 0.04 * 0.8 * 10.0)  # roughly π/2, not needed exactly
    f = rig.device.qubit("q0").f01_ghz
    tones = (Tone("q0-line", 0.0, 20.0, f, amp, 0.0, env),
             Tone("q0-line", 20.0 + wait, 20.0, f, amp, 0.0, env))
    return Timeline(tones, readout=("q0", "q1"), readout_ns=40.0 + wait)


def test_noise_off_changes_nothing_and_draws_stay_isolated() -> None:
    """Noise on q0 leaves q1's counts bit for bit; zero-valued fields equal absent ones."""
    plain = device_dict(n=2)
    zeros = copy.deepcopy(plain)
    zeros["qubits"][0].update(thermal_population=0.0, f01_noise_mhz=0.0, tls_shift_mhz=0.0)
    noisy = _noisy(thermal_population=0.03, f01_noise_mhz=0.2, f01_shot_noise_mhz=0.1,
                   tls_shift_mhz=0.3, tls_rate_per_hour=10.0, t1_fluctuation=0.1)
    counts = {}
    for key, data in (("plain", plain), ("zeros", zeros), ("noisy", noisy)):
        rig = SimRig(device_from_dict(data), seed=8, drift=False)
        counts[key] = rig.run([_ramsey(rig, w) for w in (0.0, 200.0, 400.0)], 500).counts
    assert np.array_equal(counts["plain"], counts["zeros"])
    assert np.array_equal(counts["plain"][:, 1], counts["noisy"][:, 1])
    assert not np.array_equal(counts["plain"][:, 0], counts["noisy"][:, 0])


def test_resumed_batch_reproduces() -> None:
    """The same batch at the same clock time gives the same counts on a fresh rig."""
    data = _noisy(f01_noise_mhz=0.2, tls_shift_mhz=0.5, tls_rate_per_hour=100.0,
                  t1_fluctuation=0.1, f01_shot_noise_mhz=0.05)
    a = SimRig(device_from_dict(data), seed=2, drift=False)
    first = a.run([_ramsey(a, 300.0)], 300)
    second = a.run([_ramsey(a, 500.0)], 300)
    b = SimRig(device_from_dict(data), seed=2, drift=False)
    b.advance_clock_to(second.started_s)
    assert np.array_equal(b.run([_ramsey(b, 500.0)], 300).counts, second.counts)
    assert first.counts.shape == second.counts.shape


@pytest.mark.parametrize("field,value", [("thermal_population", 0.5), ("f01_noise_mhz", -1.0),
                                         ("t1_fluctuation", 2.0), ("tls_rate_per_hour", "x")])
def test_bad_noise_field_names_file_and_field(field: str, value) -> None:
    with pytest.raises(ConfigError, match=field):
        device_from_dict(_noisy(**{field: value}), source="dev.toml")
