"""Attacks on the drive-power check: every timeline here must be refused before play.

The property test at the end holds the check against an independent audit written
here: the summed complex waveform of each line, sampled finely on the global clock
(phase convention of ``xtalkcal/hardware/timeline.py``), with its true peak and energy. No
timeline the audit finds over a limit may pass the check.
"""

from __future__ import annotations

import copy
import dataclasses
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from xtalkcal.compensation import CompensationSettings, PairSetting, apply_to_waveforms
from xtalkcal.exceptions import SafetyLimitError, TimelineError, XtalkcalError
from xtalkcal.hardware import (
    Envelope,
    PowerTally,
    Timeline,
    Tone,
    check_timelines,
    chip_from_dict,
    envelope_energy_ns,
    envelope_peak,
    envelope_values,
    limits_summary,
)

REP_NS = 1e4
CHIP = {
    "format": "xtalkcal-chip",
    "version": 1,
    "name": "two",
    "limits": {"max_amplitude": 0.9, "max_average_power_dbm": -40.0},
    "qubits": [
        {"name": "a", "f01_ghz": 5.0, "anharmonicity_ghz": -0.2},
        {"name": "b", "f01_ghz": 5.3, "anharmonicity_ghz": -0.21},
    ],
    "lines": [
        {"name": "da", "qubit": "a", "rabi_mhz": 40.0, "max_amplitude": 0.5,
         "full_scale_dbm": -20.0},
        {"name": "db", "qubit": "b", "rabi_mhz": 45.0, "full_scale_dbm": -20.0},
    ],
    "readout": {"groups": [["a", "b"]]},
}


@pytest.fixture(scope="module")
def chip():
    return chip_from_dict(CHIP)


def _forge(tone: Tone, **fields) -> Tone:
    """A tone altered after construction, as a careless plug-in could do."""
    forged = copy.copy(tone)
    for k, v in fields.items():
        object.__setattr__(forged, k, v)
    return forged


def _refused(chip, tones, rep=REP_NS):
    tl = Timeline(tuple(tones), ("a",))
    with pytest.raises(XtalkcalError) as info:
        check_timelines(chip, [tl], rep)
    assert isinstance(info.value, (SafetyLimitError, TimelineError))
    return str(info.value)


OK = Tone("da", 0.0, 20.0, 5.0, 0.2)


# --- 1. fields: refused at construction, and again in the check -------------------------

@pytest.mark.parametrize("field, value", [
    ("amplitude", -2.0), ("amplitude", math.nan), ("amplitude", math.inf),
    ("duration_ns", -20.0), ("duration_ns", math.nan), ("duration_ns", 0.0),
    ("start_ns", math.nan), ("start_ns", -1.0), ("phase_rad", math.nan),
    ("freq_ghz", math.nan), ("freq_ghz", -5.0), ("amplitude", True), ("amplitude", "0.1"),
])
def test_a_bad_field_is_refused_when_made_and_when_forged(chip, field, value):
    kwargs = dict(line="da", start_ns=0.0, duration_ns=20.0, freq_ghz=5.0, amplitude=0.2)
    kwargs[field] = value
    with pytest.raises(TimelineError, match=field):
        Tone(**kwargs)
    msg = _refused(chip, [_forge(OK, **{field: value})])
    assert field in msg and "Nothing was sent" in msg


def test_a_forged_envelope_is_refused(chip):
    bad = _forge(OK, envelope=_forge(Envelope("gaussian", sigma_ns=4.0), sigma_ns=math.nan))
    assert "sigma_ns" in _refused(chip, [bad])
    assert "not a Tone" in _refused(chip, [OK, "tone"])


@pytest.mark.parametrize("rep", [0.0, -1e4, math.nan, math.inf, None, "1e4"])
def test_a_bad_repetition_time_is_refused(chip, rep):
    assert "repetition_ns" in _refused(chip, [OK], rep=rep)


# --- 2. peaks: closed form, not sampled --------------------------------------------------

def test_narrow_drag_with_large_beta_is_refused(chip):
    # σ = 3 ps, β = 10 ns: |i·β·g'| peaks near β·e^{−1/2}/σ ≈ 2000 at 10.025 ± 0.003 ns,
    # between the 0.05 ns samples of a 20.05 ns pulse, which see nothing at all.
    env = Envelope("drag", sigma_ns=0.003, drag_ns=10.0)
    tone = Tone("da", 0.0, 20.05, 5.0, 0.2, 0.0, env)
    fine = np.linspace(10.0, 10.05, 500_001)
    true_peak = 0.2 * np.abs(envelope_values(env, 20.05, fine)).max()
    assert true_peak > 300  # the audit's own view: dangerous
    coarse = np.arange(0.0, 20.05 + 1e-9, 0.05)
    assert 0.2 * np.abs(envelope_values(env, 20.05, coarse)).max() < 0.5  # what sampling saw
    assert "peak amplitude" in _refused(chip, [tone])


@pytest.mark.parametrize("env, T", [
    (Envelope("gaussian", sigma_ns=8.0), 32.0),
    (Envelope("drag", sigma_ns=8.0, drag_ns=0.5), 32.0),
    (Envelope("drag", sigma_ns=0.3, drag_ns=4.0), 20.0),
    (Envelope("drag", sigma_ns=40.0, drag_ns=9.0), 20.0),
    (Envelope("flattop", ramp_ns=10.0), 123.0),
    (Envelope("square"), 7.0),
])
def test_closed_form_peak_bounds_and_energy_match_fine_sampling(env, T):
    tau = np.linspace(0.0, T, 2_000_001)
    mag2 = np.abs(envelope_values(env, T, tau)) ** 2
    assert envelope_peak(env, T) >= math.sqrt(mag2.max()) * (1 - 1e-12)
    assert envelope_peak(env, T) <= 1.3 * math.sqrt(mag2.max())  # a bound, not a refusal
    assert envelope_energy_ns(env, T) == pytest.approx(np.trapezoid(mag2, tau), rel=1e-6)


# --- 3. average power: amplitudes add --------------------------------------------------

def test_two_overlapping_same_frequency_tones_add_coherently(chip):
    # −20 dBm full scale, −40 dBm limit: mean |y|² ≤ 0.01. One 0.45 tone of 300 ns over
    # 10 µs: 0.45²·300/1e4 = 0.0061 (−42.2 dBm). Two in phase: the sum is 0.9 (line db's
    # limit is 0.9): 0.0243 (−36.1 dBm), though their energies alone add to 0.0122.
    one = Tone("db", 0.0, 300.0, 5.3, 0.45)
    check_timelines(chip, [Timeline((one,), ("b",))], REP_NS)
    two = Timeline((one, one), ("b",))
    with pytest.raises(SafetyLimitError, match="dBm"):
        check_timelines(chip, [two], REP_NS)
    # In antiphase the field is zero: that is no reason to refuse.
    anti = Timeline((one, Tone("db", 0.0, 300.0, 5.3, 0.45, math.pi)), ("b",))
    check_timelines(chip, [anti], REP_NS)


def test_overlapping_tones_of_other_shapes_are_bounded_not_summed(chip):
    # Same frequency, staggered starts: the cross term is bounded by Cauchy–Schwarz.
    a = Tone("db", 0.0, 300.0, 5.3, 0.45)
    b = Tone("db", 10.0, 300.0, 5.3, 0.44)
    with pytest.raises(SafetyLimitError, match="dBm"):
        check_timelines(chip, [Timeline((a, b), ("b",))], REP_NS)


# --- 4. the waveform applicator passes nothing that is not finite ------------------------

def _settings(chip, ratio):
    return CompensationSettings(chip=chip.name, pairs=(PairSetting(
        aggressor_line="da", aggressor_qubit="a", victim="b", victim_line="db",
        frequency_ghz=5.0, ratio=ratio, covariance=((0.0, 0.0), (0.0, 0.0)),
        measured_at_s=0.0, method="rotation"),))


def test_apply_to_waveforms_refuses_nan_samples(chip):
    good = np.full(64, 0.1 + 0j)
    bad = good.copy()
    bad[17] = complex(math.nan, 0.0)
    carriers = {"da": 5.0, "db": 5.3}
    with pytest.raises(SafetyLimitError, match="sample 17"):
        apply_to_waveforms({"da": bad}, carriers, _settings(chip, 0.1), dt_ns=1.0, chip=chip)
    with pytest.raises(SafetyLimitError, match="db"):
        apply_to_waveforms({"da": good, "db": bad}, carriers, _settings(chip, 0.1), dt_ns=1.0,
                           chip=chip)
    out = apply_to_waveforms({"da": good}, carriers, _settings(chip, 0.1), dt_ns=1.0, chip=chip)
    assert np.isfinite(out["db"]).all()


# --- the cryostat's total heat load: summed over lines ------------------------------------

def _total_chip(total_dbm):
    d = copy.deepcopy(CHIP)
    d["limits"]["max_total_average_power_dbm"] = total_dbm
    return chip_from_dict(d)


def test_lines_each_within_their_limit_are_refused_together_above_the_total():
    # −20 dBm full scale, −40 dBm per line. A 0.45 square tone of 300 ns per 10 µs averages
    # 0.45²·300/1e4 = 0.006075 of full scale, −42.16 dBm, on each line; two lines together
    # 2·0.006075·10 µW = 0.1215 µW, −39.15 dBm. Under a −40 dBm total that is refused,
    # though each line alone is within its own limit; under −39 dBm it passes.
    per_line_dbm = -20.0 + 10 * math.log10(0.45**2 * 300 / REP_NS)
    both_dbm = 10 * math.log10(2 * 10 ** (per_line_dbm / 10))
    assert per_line_dbm < -40.0 < both_dbm < -39.0
    tones = (Tone("da", 0.0, 300.0, 5.0, 0.45), Tone("db", 0.0, 300.0, 5.3, 0.45))
    tl = Timeline(tones, ("a", "b"))
    with pytest.raises(SafetyLimitError, match="max_total_average_power_dbm") as info:
        check_timelines(_total_chip(-40.0), [tl], REP_NS)
    assert f"{both_dbm:.2f} dBm" in str(info.value)
    check_timelines(_total_chip(-39.0), [tl], REP_NS)
    tally = PowerTally()
    tally.add(_total_chip(-39.0), [tl], REP_NS, shots=100)
    assert tally.peak == pytest.approx({"da": 0.45, "db": 0.45})
    assert tally.average_dbm == pytest.approx({"da": per_line_dbm, "db": per_line_dbm})
    assert tally.total_dbm == pytest.approx(both_dbm)
    assert (tally.batches, tally.timelines, tally.shots) == (1, 1, 100)
    with pytest.raises(SafetyLimitError):  # the tally checks as it counts
        tally.add(_total_chip(-40.0), [tl], REP_NS, shots=100)
    assert tally.batches == 1
    # One line alone at the same level is within the −40 dBm total.
    check_timelines(_total_chip(-40.0), [Timeline(tones[:1], ("a",))], REP_NS)


def test_a_total_limit_needs_every_lines_full_scale():
    d = copy.deepcopy(CHIP)
    d["limits"] = {"max_amplitude": 0.9, "max_total_average_power_dbm": -40.0}
    del d["lines"][1]["full_scale_dbm"]
    with pytest.raises(XtalkcalError, match=r"max_total_average_power_dbm.*full_scale_dbm.*db"):
        chip_from_dict(d)


def test_a_chip_built_in_code_without_full_scale_is_refused_not_skipped(chip):
    # Validation of a chip file guarantees full_scale_dbm where a power limit is set; a
    # chip built in code may lack it, and then the check refuses instead of skipping.
    line = dataclasses.replace(chip.line("db"), full_scale_dbm=None)
    bare = dataclasses.replace(chip, lines=(chip.line("da"), line))
    with pytest.raises(SafetyLimitError, match="no full_scale_dbm"):
        check_timelines(bare, [Timeline((Tone("db", 0.0, 20.0, 5.3, 0.1),), ("b",))], REP_NS)


def test_limits_are_stated_only_by_a_limits_table():
    assert chip_from_dict(CHIP).limits.stated
    bare = {k: v for k, v in CHIP.items() if k != "limits"}
    assert not chip_from_dict(bare).limits.stated
    # The table is kept when a chip is written out, so an exported chip states its limits.
    again = chip_from_dict(_total_chip(-41.0).to_dict())
    assert again.limits.stated and again.limits.max_total_average_power_dbm == -41.0


# --- 5. property: the check never passes what an independent audit finds over a limit ----

def _audit(chip, tl: Timeline, rep: float) -> bool:
    """True if the timeline's true summed waveform is over a limit (fine sampling)."""
    over = False
    for line in {t.line for t in tl.tones}:
        tones = [t for t in tl.tones if t.line == line]
        t0 = min(t.start_ns for t in tones)
        t1 = max(t.end_ns for t in tones)
        narrow = min([t.envelope.sigma_ns for t in tones if t.envelope.sigma_ns > 0],
                     default=1.0)
        dt = min(0.002, narrow / 40)
        t = np.arange(t0, t1 + dt, dt)
        y = np.zeros(t.shape, dtype=complex)
        for tone in tones:
            tau = t - tone.start_ns
            inside = (tau >= 0) & (tau < tone.duration_ns)  # [start, end)
            env = envelope_values(tone.envelope, tone.duration_ns, tau) * inside
            y += tone.complex_amplitude * env * np.exp(-2j * np.pi * tone.freq_ghz * t)
        peak = float(np.abs(y).max())
        energy = float(np.trapezoid(np.abs(y) ** 2, t))
        if peak > chip.amplitude_limit(line) * 1.001:
            over = True
        fs = chip.line(line).full_scale_dbm
        mean = energy / max(rep, tl.end_ns)
        if mean > 0 and fs + 10 * math.log10(mean) > chip.limits.max_average_power_dbm + 0.01:
            over = True
    return over


_sigmas = st.one_of(st.floats(0.001, 0.05), st.floats(0.05, 20.0))  # narrow ones hide peaks
_envelopes = st.one_of(
    st.just(Envelope("square")),
    st.builds(lambda s: Envelope("gaussian", sigma_ns=s), _sigmas),
    st.builds(lambda s, b: Envelope("drag", sigma_ns=s, drag_ns=b), _sigmas,
              st.floats(-20.0, 20.0)),
    st.builds(lambda r: Envelope("flattop", ramp_ns=r),
              st.one_of(st.just(0.0), st.floats(0.001, 10.0))),
)


@st.composite
def _timelines(draw):
    n = draw(st.integers(1, 4))
    base_start = draw(st.floats(0.0, 20.0))
    tones: list[Tone] = []
    for _ in range(n):
        amp = draw(st.floats(0.0, 0.9))
        phase = draw(st.sampled_from([0.0, 0.0, 0.7, math.pi]))
        if tones and draw(st.booleans()):
            # A copy of an earlier tone's shape: a pulse and its cancellation tone.
            tones.append(dataclasses.replace(draw(st.sampled_from(tones)), amplitude=amp,
                                             phase_rad=phase))
            continue
        env = draw(_envelopes)
        dur = draw(st.floats(max(20.0, 2 * env.ramp_ns), 400.0))
        start = base_start + draw(st.sampled_from([0.0, 0.0, 5.0, 50.0]))
        freq = 5.3 + draw(st.sampled_from([0.0, 0.0, 0.01, 0.123]))
        tones.append(Tone("db", start, dur, freq, amp, phase, env))
    return Timeline(tuple(tones), ("b",))


@settings(max_examples=200, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(tl=_timelines(), rep=st.sampled_from([2e3, 1e4]))
def test_no_timeline_over_a_limit_passes_the_check(chip, tl, rep):
    try:
        check_timelines(chip, [tl], rep)
    except SafetyLimitError:
        return
    assert not _audit(chip, tl, rep), f"passed the check but the audit finds it over: {tl}"


@pytest.mark.parametrize("env", [
    Envelope("flattop", ramp_ns=5e-324), Envelope("gaussian", sigma_ns=1e-200),
    Envelope("drag", sigma_ns=1e-9, drag_ns=1.0),
])
def test_shapes_too_fine_to_play_are_refused_before_they_make_nan(env):
    # A denormal ramp or σ overflows T/ramp or underflows σ²: the samples would be NaN.
    with pytest.raises(TimelineError, match="≥ 0.001 ns"):
        Tone("da", 0.0, 20.0, 5.0, 0.2, 0.0, env)
    assert "0.001 ns" in _refused(chip_from_dict(CHIP), [_forge(OK, envelope=env)])


def test_the_property_test_explores_both_sides(chip):
    """The random timelines must include both refused and passed ones, or it proves nothing."""
    seen = {"passed": 0, "refused": 0}

    @settings(max_examples=200, deadline=None, derandomize=True,
              suppress_health_check=[HealthCheck.too_slow])
    @given(tl=_timelines())
    def count(tl):
        try:
            check_timelines(chip, [tl], 1e4)
            seen["passed"] += 1
        except SafetyLimitError:
            seen["refused"] += 1

    count()
    assert seen["passed"] >= 20 and seen["refused"] >= 20, seen


def test_the_limits_in_force_are_named_with_their_file():
    chip = _total_chip(-38.5)
    line = limits_summary(chip)
    assert line.startswith("limits in force, from <memory>: ")
    assert "peak amplitude ≤ 0.5–0.9 of full scale (per line)" in line
    assert "average power ≤ -40 dBm per line" in line
    assert "≤ -38.5 dBm all lines together" in line and "interlock: none" in line
    bare = chip_from_dict({k: v for k, v in CHIP.items() if k != "limits"})
    assert "(no [limits] table: defaults)" in limits_summary(bare)
