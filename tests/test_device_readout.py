"""SimRig as an instrument: readout statistics, clock, seeds, drift growth and refusals.

The readout model (device field `readout`): the final level populations p of a victim pass
through its assignment matrix A (rows P(assigned | level)), q = p·A, and the counts of a
timeline are one multinomial draw of ``shots`` trials with probabilities q. A multinomial
has mean n·q_i, variance n·q_i(1 − q_i) and covariance −n·q_i·q_j (standard properties of
the multinomial distribution). The populations p come from the integrator, which is validated
against QuTiP in tests/test_device_qutip.py; here they are recomputed directly from the
device file's numbers, not through the rig.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest

import xtalkcal.hardware.rig
from simulated_device import SimRig, device_from_dict
from simulated_device.drift_state import DeviceDrift
from simulated_device.dynamics import ToneBatch, evolve_populations
from xtalkcal.exceptions import SafetyLimitError
from xtalkcal.hardware import Envelope, Timeline, Tone, pulse_area_ns

HOUR_S = 3600.0

# Readout errors chosen asymmetric so that p·A and A·p (a transposed matrix) differ by many σ.
READOUT_Q0 = [[0.90, 0.07, 0.03], [0.12, 0.80, 0.08], [0.05, 0.25, 0.70]]
READOUT_Q1 = [[0.95, 0.05], [0.15, 0.85]]  # 2×2 on 3 levels: |2⟩ is read like |1⟩
REPS, SHOTS = 1000, 100  # repetitions of the probe timeline in the statistics test


def device_dict(**overrides: Any) -> dict[str, Any]:
    """A small invented two-qubit device: no jitter, no drift unless asked for."""
    data: dict[str, Any] = {
        "format": "xtalkcal-simdevice",
        "version": 1,
        "name": "readout-test-pair",
        "seed": 424242,
        "levels": 3,
        "repetition_us": 50.0,
        "electronics": {"amplitude_jitter": 0.0, "phase_jitter_rad": 0.0, "jitter_groups": 1},
        "limits": {"max_amplitude": 0.9},
        "qubits": [
            {"name": "q0", "f01_ghz": 5.0, "anharmonicity_ghz": -0.22, "t1_us": 40.0,
             "t2_us": 30.0, "readout": READOUT_Q0},
            {"name": "q1", "f01_ghz": 5.12, "anharmonicity_ghz": -0.2, "t1_us": 60.0,
             "t2_us": 50.0, "readout": READOUT_Q1},
        ],
        "lines": [
            {"name": "q0-line", "qubit": "q0", "rabi_mhz": 50.0, "max_amplitude": 0.6},
            {"name": "q1-line", "qubit": "q1", "rabi_mhz": 45.0, "max_amplitude": 0.8},
        ],
        "couplings": [
            {"line": "q0-line", "qubit": "q1", "crosstalk_db": -6.0, "phase_deg": 40.0,
             "delay_ns": 0.7},
        ],
    }
    data.update(overrides)
    return data


def probe_timeline() -> Timeline:
    """A 2π/3-ish Gaussian on q0 and a pulse on q1 that leaks it into |2⟩ (both read out)."""
    env = Envelope("gaussian", sigma_ns=6.0)
    slow = Envelope("gaussian", sigma_ns=8.0)
    return Timeline(
        tones=(
            Tone("q0-line", 0.0, 24.0, 5.0, 0.35, 0.3, env),
            # q1: a π pulse on 0–1, then a pulse at its 1–2 frequency.
            Tone("q1-line", 24.0, 32.0, 5.12, 0.5 / (0.045 * pulse_area_ns(slow, 32.0)), 0.0, slow),
            Tone("q1-line", 56.0, 32.0, 4.92, 0.3, 0.0, slow),
        ),
        readout=("q0", "q1"),
        label="probe",
    )


def expected_assigned(dev_data: dict[str, Any], timeline: Timeline) -> dict[str, np.ndarray]:
    """q = p·A per qubit, from the device file's numbers.

    Ω = (own line Rabi rate)·a·e^{iφ}·X(f) with X = 1 on the own line and, for a listed
    coupling, X(f) = 10^(dB/20)·exp(i(θ − 2π(f − f01)τ)).
    """
    qubits = {q["name"]: q for q in dev_data["qubits"]}
    own_line = {ln["qubit"]: ln for ln in dev_data["lines"]}
    couplings = {(c["qubit"], c["line"]): c for c in dev_data["couplings"]}
    out = {}
    for name in timeline.readout:
        q = qubits[name]
        rabi = own_line[name]["rabi_mhz"] * 1e-3
        tones = []
        for t in timeline.tones:
            if t.line == own_line[name]["name"]:
                x = 1.0 + 0j
            elif (name, t.line) in couplings:
                c = couplings[(name, t.line)]
                x = 10 ** (c["crosstalk_db"] / 20) * np.exp(
                    1j * (math.radians(c["phase_deg"])
                          - 2 * math.pi * (t.freq_ghz - q["f01_ghz"]) * c["delay_ns"]))
            else:
                continue
            tones.append((t, rabi * t.complex_amplitude * x))
        n = np.arange(dev_data["levels"], dtype=float)
        levels = n * q["f01_ghz"] + 0.5 * n * (n - 1) * q["anharmonicity_ghz"]
        m = len(tones)
        batch = ToneBatch(
            np.array([[t.start_ns for t, _ in tones]]),
            np.array([[t.duration_ns for t, _ in tones]]),
            np.array([[t.freq_ghz for t, _ in tones]]),
            np.array([[om for _, om in tones]], dtype=complex),
            np.array([[t.envelope.code for t, _ in tones]], dtype=np.int64),
            np.array([[t.envelope.sigma_ns for t, _ in tones]]),
            np.zeros((1, m)), np.zeros((1, m)), np.array([m]), np.array([timeline.end_ns]))
        pops = evolve_populations(levels, np.sqrt(n[1:]), np.array([q["t1_us"] * 1e3]),
                                  np.array([q["t2_us"] * 1e3]), batch)[0]
        a = np.asarray(q["readout"], float)
        k = a.shape[0]
        lumped = np.concatenate([pops[: k - 1], [pops[k - 1:].sum()]])
        out[name] = lumped @ a
    return out


# ----------------------------------------------------------------------------- statistics


def test_counts_have_multinomial_mean_and_covariance() -> None:
    """1000 repetitions of one timeline: mean n·q, covariance n(diag q − q qᵀ), per qubit.

    Tolerances are 4.5 standard errors: of the mean, σ_i·√(1/R); of a (co)variance, from
    the fourth moments of the multinomial, estimated from the sample itself.
    """
    data = device_dict()
    rig = SimRig(device_from_dict(data), drift=False)
    reps, shots = REPS, SHOTS
    counts = rig.run([probe_timeline()] * reps, shots)
    expected = expected_assigned(data, probe_timeline())
    # The probe populates every outcome, so the check has teeth everywhere.
    assert min(expected["q0"]) > 0.03 and min(expected["q1"]) > 0.03
    for name, q in expected.items():
        c = counts.of(name)[:, : len(q)].astype(float)
        assert np.all(c.sum(axis=1) == shots)
        assert np.all(counts.of(name)[:, len(q):] == 0)  # padding of a smaller matrix
        mean_exp = shots * q
        cov_exp = shots * (np.diag(q) - np.outer(q, q))
        se_mean = np.sqrt(np.diag(cov_exp) / reps)
        assert np.all(np.abs(c.mean(axis=0) - mean_exp) < 4.5 * se_mean), name
        dev = c - mean_exp
        for i in range(len(q)):
            for j in range(len(q)):
                prod = dev[:, i] * dev[:, j]
                se = prod.std(ddof=1) / math.sqrt(reps)
                assert abs(prod.mean() - cov_exp[i, j]) < 4.5 * se, (name, i, j)
        # Poisson counts (variance = mean) would be far outside that band: for the likeliest
        # outcome the multinomial variance is only (1 − q) ≤ ½ of the mean.
        k = int(np.argmax(q))
        assert c[:, k].var(ddof=1) / mean_exp[k] < 0.6


def test_transposed_assignment_would_be_seen() -> None:
    """Guard of the test above: A·p instead of p·A changes q0's mean count by ≫ 4.5 σ."""
    data = device_dict()
    q = expected_assigned(data, probe_timeline())["q0"]
    a = np.asarray(READOUT_Q0)
    p = np.linalg.solve(a.T, q)  # the populations behind q
    wrong = a @ p
    se_mean = np.sqrt(SHOTS * q * (1 - q) / REPS)
    assert np.max(np.abs(SHOTS * (wrong - q)) / se_mean) > 20


# ----------------------------------------------------------------------------- clock, seeds


def test_clock_advances_by_repetition_time_per_shot() -> None:
    """now() grows by repetition × shots × timelines per run; wait() adds its argument."""
    rig = SimRig(device_from_dict(device_dict()), drift=False)
    rep_s = 50e-6
    assert rig.now() == 0.0 and rig.repetition_ns == pytest.approx(50e3)
    c1 = rig.run([probe_timeline()] * 3, 100)
    assert c1.started_s == 0.0
    assert c1.finished_s == pytest.approx(3 * 100 * rep_s, rel=1e-12)
    assert rig.now() == c1.finished_s
    rig.wait(2.5)
    c2 = rig.run([probe_timeline()], 7)
    assert c2.started_s == pytest.approx(3 * 100 * rep_s + 2.5, rel=1e-12)
    assert rig.now() == pytest.approx(c2.started_s + 7 * rep_s, rel=1e-12)
    assert rig.shots_spent == 3 * 100 + 7


def test_same_seed_same_counts_other_seed_other_counts() -> None:
    """Reproducible from the seed (given or from the file); another seed draws otherwise."""
    spec = device_from_dict(device_dict(
        drift={"phase_diffusion_rad2_per_hour": 0.5, "qubit_wander_mhz": 0.05}))
    tls = [probe_timeline()] * 5

    def session(rig: SimRig) -> list[np.ndarray]:
        out = [rig.run(tls, 200).counts]
        rig.wait(1800.0)  # drift moves on
        out.append(rig.run(tls, 200).counts)
        out.append(rig.run(tls, 200).counts)  # an identical batch again
        return out

    a = session(SimRig(spec))
    b = session(SimRig(spec, seed=spec.seed))
    c = session(SimRig(spec, seed=spec.seed + 1))
    for x, y in zip(a, b, strict=True):
        np.testing.assert_array_equal(x, y)
    assert all(not np.array_equal(x, z) for x, z in zip(a, c, strict=True))
    assert not np.array_equal(a[1], a[2])  # a repeated batch gets fresh draws


# ----------------------------------------------------------------------------- drift


@pytest.mark.parametrize("channel", ["phase", "log_magnitude"])
def test_drift_random_walk_variance_grows_linearly(channel: str) -> None:
    """Var of a coupling's phase (and log-magnitude) walk = D·t over many seeds.

    D·t is the variance of a Wiener process of diffusion constant D (its definition), which
    is the drift model of simulated_device/drift_state.py (phase random walk plus linear rate).

    Each increment is independent with variance D·Δt, and the phase's mean follows the
    linear rate. 1200 seeds: the standard error of a variance is √(2/1200) ≈ 4 %; the
    tolerance is 4.5 of those. One time (1830.5 s) is off the 60 s grid, where the value is
    interpolated; the variance deficit there is at most D·60 s/4 (1 % at that time).
    """
    d_phase, d_mag, rate = 0.4, 0.02, 0.3  # rad²/h, 1/h, rad/h
    spec = device_from_dict(device_dict(drift={
        "phase_diffusion_rad2_per_hour": d_phase,
        "phase_rate_rad_per_hour": rate,
        "log_magnitude_diffusion_per_hour": d_mag,
    }))
    times = np.array([900.0, 1830.5, 3600.0, 7200.0, 14400.0])
    n_seeds = 1200
    values = np.empty((n_seeds, len(times)))
    for s in range(n_seeds):
        drift = DeviceDrift(spec, rng=np.random.default_rng(1000 + s))
        for k, t in enumerate(times):
            state = drift.at(float(t))
            values[s, k] = (state.phase_rad if channel == "phase" else state.log_mag)[
                ("q1", "q0-line")
            ]
    diffusion = d_phase if channel == "phase" else d_mag
    mean_rate = rate if channel == "phase" else 0.0
    tol = 4.5 * math.sqrt(2.0 / n_seeds)
    hours = times / HOUR_S
    mean = values.mean(axis=0)
    var = values.var(axis=0, ddof=1)
    assert np.all(np.abs(mean - mean_rate * hours) < 4.5 * np.sqrt(diffusion * hours / n_seeds))
    assert np.all(np.abs(var / (diffusion * hours) - 1.0) < tol), var / (diffusion * hours)
    increments = np.diff(values - mean_rate * hours, axis=1, prepend=0.0)
    inc_var = increments.var(axis=0, ddof=1) / (diffusion * np.diff(hours, prepend=0.0))
    assert np.all(np.abs(inc_var - 1.0) < tol), inc_var
    # Growth is linear, not diffusive in √t or ballistic in t²: variance ratio 16 over 16×.
    assert 16 * (1 - tol) < var[-1] / var[0] < 16 * (1 + tol)


# ----------------------------------------------------------------------------- refusals


def test_over_limit_timeline_is_refused_before_anything_runs() -> None:
    """A tone over q0-line's limit (0.6) refuses the whole batch; clock, shots, draws untouched."""
    spec = device_from_dict(device_dict())
    rig = SimRig(spec, drift=False)
    rig.run([probe_timeline()], 10)
    clock, spent = rig.now(), rig.shots_spent
    env = Envelope("gaussian", sigma_ns=6.0)
    loud = Timeline((Tone("q0-line", 0.0, 24.0, 5.0, 0.61, 0.0, env),), ("q0", "q1"), label="loud")
    # Two tones within the limit each but overlapping on one line: the sum is what counts.
    stacked = Timeline((Tone("q0-line", 0.0, 24.0, 5.0, 0.35, 0.0, env),
                        Tone("q0-line", 10.0, 24.0, 5.2, 0.35, 0.0, env)), ("q0", "q1"),
                       label="stacked")
    for bad in ([loud], [probe_timeline(), loud], [stacked]):
        with pytest.raises(SafetyLimitError, match="q0-line"):
            rig.run(bad, 1000)
        assert rig.now() == clock and rig.shots_spent == spent
    # No random draws were spent either: the next batch is what a fresh rig gives.
    fresh = SimRig(spec, drift=False)
    fresh.run([probe_timeline()], 10)
    np.testing.assert_array_equal(rig.run([probe_timeline()] * 4, 50).counts,
                                  fresh.run([probe_timeline()] * 4, 50).counts)
    # At the limit itself the tone is accepted.
    rig.run([Timeline((Tone("q0-line", 0.0, 24.0, 5.0, 0.6, 0.0, env),), ("q0", "q1"))], 1)


def test_simrig_satisfies_the_rig_protocol() -> None:
    rig = SimRig(device_from_dict(device_dict()))
    assert isinstance(rig, xtalkcal.hardware.Rig)
    assert rig.chip.line_names == ("q0-line", "q1-line")
    assert "readout-test-pair" in rig.describe()
