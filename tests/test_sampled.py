"""Compiling timelines to sampled I/Q waveforms (xtalkcal.hardware.sampled), checked by hand.

The references are the phase convention of xtalkcal.hardware.timeline written out by hand
(V = Re[A·e^{−i2πft}], A = a·e^{iφ}·E(t − t0) on one global clock) and
``Timeline.waveform``, which evaluates that definition directly; the sample-hold rule
(midpoint of each cell, edge cells weighted by the covered fraction) is the module's own.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from xtalkcal.exceptions import RigError, SafetyLimitError, TimelineError
from xtalkcal.hardware import (
    Counts,
    Envelope,
    Rig,
    SampledRig,
    Timeline,
    Tone,
    check_timelines,
    compile_timeline,
    default_lo_ghz,
    line_loads,
)


class RecordingRig(SampledRig):
    """A plug-in as a lab would write it; ``play`` keeps what it was handed."""

    def __init__(self, chip, **kw):
        super().__init__(**kw)
        self._chip = chip
        self.played = []

    @property
    def chip(self):
        return self._chip

    @property
    def repetition_ns(self):
        return 1e5

    def describe(self):
        return "recording rig (tests)"

    def now(self):
        return 0.0

    def play(self, waveforms, shots):
        self.played.append(list(waveforms))
        readout = waveforms[0].readout
        counts = np.zeros((len(waveforms), len(readout), 3), dtype=np.int64)
        counts[:, :, 0] = shots
        return Counts(readout, counts, shots, 0.0, 1.0)


def test_iq_convention_by_hand(demo_chip) -> None:
    """A square tone 100 MHz above its LO, phase 0.7: I, Q and the rebuilt RF by hand."""
    lo = default_lo_ghz(demo_chip)["q0-line"]
    a, phi, f_if = 0.3, 0.7, 0.1
    tl = Timeline((Tone("q0-line", 3.3, 10.0, lo + f_if, a, phi, Envelope("square")),), ("q0",))
    wf = compile_timeline(tl, demo_chip, samples_per_ns=4.0)
    dt = wf.dt_ns
    assert dt == 0.25 and wf.samples_per_ns == 4.0
    k = np.arange(14, 53)  # cells wholly inside [3.3, 13.3)
    t = (k + 0.5) * dt
    i_, q_ = wf.iq("q0-line")
    # By hand: s = a·e^{iφ}·e^{−i2π(f − f_LO)t}, so I = a·cos(φ − 2π·f_if·t), Q = a·sin(…).
    np.testing.assert_allclose(i_[k], a * np.cos(phi - 2 * np.pi * f_if * t), atol=1e-14)
    np.testing.assert_allclose(q_[k], a * np.sin(phi - 2 * np.pi * f_if * t), atol=1e-14)
    # Above its LO the phasor turns clockwise: its phase falls by 2π·f_if·dt per sample.
    step = np.angle(wf.samples["q0-line"][k[1:]] / wf.samples["q0-line"][k[:-1]])
    np.testing.assert_allclose(step, -2 * np.pi * f_if * dt, atol=1e-12)
    # RF rebuilt with the stated mixer convention, I·cos(2πf_LO·t) + Q·sin(2πf_LO·t),
    # is the timeline's own definition at the sample centres.
    rf = i_[k] * np.cos(2 * np.pi * lo * t) + q_[k] * np.sin(2 * np.pi * lo * t)
    np.testing.assert_allclose(rf, tl.waveform("q0-line", t).real, atol=1e-12)
    # Every other line is silent.
    assert set(wf.samples) == set(demo_chip.line_names)
    assert all(not np.any(wf.samples[ln]) for ln in demo_chip.line_names if ln != "q0-line")


def test_phase_refers_to_the_global_clock(demo_chip) -> None:
    """The same tone started later keeps the phase of t = 0 where the two overlap."""
    lo = default_lo_ghz(demo_chip)["q1-line"]
    early = Tone("q1-line", 2.0, 20.0, lo - 0.2, 0.2, 1.1, Envelope("square"))
    late = Tone(
        "q1-line", 7.5, 14.5, lo - 0.2, 0.2, 1.1, Envelope("square")
    )  # not a whole period later
    s_early = compile_timeline(Timeline((early,), ("q1",)), demo_chip, 2.0).samples["q1-line"]
    s_late = compile_timeline(Timeline((late,), ("q1",)), demo_chip, 2.0).samples["q1-line"]
    both = slice(15, 44)  # cells inside both tones, [7.5, 22)
    np.testing.assert_allclose(s_late[both], s_early[both], atol=1e-15)
    assert np.all(s_late[:15] == 0)


@pytest.mark.parametrize("start, duration", [(1.37, 23.71), (0.0, 10.1), (2.5, 0.3), (0.1, 0.05)])
def test_odd_durations_keep_the_area(demo_chip, start: float, duration: float) -> None:
    """Edges off the sample grid: the edge cells carry the covered fraction, so Σ s·dt = a·T."""
    lo = default_lo_ghz(demo_chip)["q2-line"]
    a, phi = 0.4, -0.3
    tl = Timeline((Tone("q2-line", start, duration, lo, a, phi, Envelope("square")),), ("q2",))
    wf = compile_timeline(tl, demo_chip, samples_per_ns=2.0)
    s = wf.samples["q2-line"]
    area = s.sum() * wf.dt_ns
    assert area == pytest.approx(a * duration * complex(math.cos(phi), math.sin(phi)), abs=1e-13)
    assert np.all(np.abs(s) <= a * (1 + 1e-15))
    # The record ends at the first sample boundary at or after the readout.
    end = start + duration
    assert wf.n_samples == math.ceil(end * 2.0 - 1e-9)
    assert end <= wf.readout_ns < end + wf.dt_ns


def test_readout_on_the_grid_adds_no_sample(demo_chip) -> None:
    tl = Timeline((Tone("q0-line", 0.0, 12.0, 4.92, 0.1),), ("q0",), readout_ns=30.0)
    wf = compile_timeline(tl, demo_chip, samples_per_ns=1 / 0.3)
    assert wf.n_samples == 100 and wf.readout_ns == pytest.approx(30.0)


def test_gaussian_samples_are_the_envelope_at_sample_centres(demo_chip) -> None:
    from xtalkcal.hardware import envelope_values

    env = Envelope("drag", sigma_ns=4.0, drag_ns=0.7)
    tl = Timeline((Tone("q3-line", 0.0, 16.0, 5.245, 0.5, 0.0, env),), ("q3",))
    wf = compile_timeline(tl, demo_chip, samples_per_ns=2.0)
    t = (np.arange(32) + 0.5) * 0.5
    np.testing.assert_allclose(
        wf.samples["q3-line"], 0.5 * envelope_values(env, 16.0, t), atol=1e-15
    )


def test_tone_beyond_nyquist_is_refused(demo_chip) -> None:
    tl = Timeline((Tone("q0-line", 0.0, 10.0, 4.92 + 0.6, 0.1),), ("q0",), label="far tone")
    with pytest.raises(
        TimelineError, match=r"far tone: tone\[0\] on q0-line .*LO \(4\.92 GHz\).*±0\.5"
    ):
        compile_timeline(tl, demo_chip, samples_per_ns=1.0)
    compile_timeline(tl, demo_chip, samples_per_ns=1.0, lo_ghz={"q0-line": 5.3})  # moved LO: fine


@pytest.mark.parametrize("rate", [0.0, -1.0, math.nan, math.inf, True, "4"])
def test_bad_dac_rate_is_refused(demo_chip, rate) -> None:
    with pytest.raises(RigError, match="samples_per_ns"):
        RecordingRig(demo_chip, samples_per_ns=rate)


def test_bad_lo_plan_is_refused(demo_chip) -> None:
    tl = Timeline((Tone("q0-line", 0.0, 10.0, 4.92, 0.1),), ("q0",))
    with pytest.raises(RigError, match="lo_ghz names line 'dx'.*known: q0-line"):
        compile_timeline(tl, demo_chip, 4.0, lo_ghz={"dx": 5.0})
    with pytest.raises(RigError, match=r"lo_ghz\['q0-line'\] = nan"):
        compile_timeline(tl, demo_chip, 4.0, lo_ghz={"q0-line": math.nan})


def test_run_checks_limits_before_compiling(demo_chip, monkeypatch) -> None:
    """A timeline above a line's limit never reaches the compiler, let alone play()."""
    rig = RecordingRig(demo_chip, samples_per_ns=4.0)
    assert isinstance(rig, Rig)
    compiled = []
    real = rig.compile
    monkeypatch.setattr(rig, "compile", lambda tl: compiled.append(tl) or real(tl))
    hot = Timeline((Tone("q0-line", 0.0, 20.0, 4.92, 0.85),), ("q0",), label="hot")
    ok = Timeline((Tone("q0-line", 0.0, 20.0, 4.92, 0.5),), ("q0",), label="ok")
    with pytest.raises(SafetyLimitError, match="hot: line q0-line .*0.85.*Nothing was sent"):
        rig.run([ok, hot], 10)
    assert compiled == [] and rig.played == []
    counts = rig.run([ok], 10)
    assert len(compiled) == 1 and len(rig.played) == 1
    assert counts.qubits == ("q0",) and counts.counts.shape == (1, 1, 3)


def test_run_refuses_a_sample_above_the_limit(demo_chip, monkeypatch) -> None:
    """The second check, on the samples themselves (a compiler bug must not reach play)."""
    import xtalkcal.hardware.sampled as sampled

    rig = RecordingRig(demo_chip, samples_per_ns=4.0)
    real = sampled.compile_timeline

    def broken(tl, chip, rate, lo):  # a compiler that doubles every sample
        wf = real(tl, chip, rate, lo)
        return sampled.SampledWaveforms(wf.dt_ns, wf.lo_ghz,
                                        {k: 2 * v for k, v in wf.samples.items()},
                                        wf.readout, wf.readout_ns, wf.label)

    monkeypatch.setattr(sampled, "compile_timeline", broken)
    tl = Timeline((Tone("q0-line", 0.0, 20.0, 4.92, 0.5),), ("q0",), label="doubled")
    with pytest.raises(
        SafetyLimitError, match="doubled: line q0-line would reach sample amplitude 1"
    ):
        rig.run([tl], 10)
    assert rig.played == []


def test_run_refuses_unknown_readout_and_bad_shots(demo_chip) -> None:
    rig = RecordingRig(demo_chip, samples_per_ns=4.0)
    tl = Timeline((Tone("q0-line", 0.0, 20.0, 4.92, 0.5),), ("qx",))
    with pytest.raises(TimelineError, match="readout of unknown qubit 'qx'"):
        rig.run([tl], 10)
    with pytest.raises(TimelineError, match="shots must be a positive integer"):
        rig.run([tl], 0)
    assert rig.played == []


def test_samples_are_read_only(demo_chip) -> None:
    wf = compile_timeline(
        Timeline((Tone("q0-line", 0.0, 5.0, 4.92, 0.1),), ("q0",)), demo_chip, 4.0
    )
    with pytest.raises(ValueError):
        wf.samples["q0-line"][0] = 1.0


# ------------------------------------------------------------------ property: never above a limit

_ENVELOPES = st.one_of(
    st.just(Envelope("square")),
    st.builds(lambda s: Envelope("gaussian", sigma_ns=s), st.floats(0.5, 20.0)),
    st.builds(lambda s, b: Envelope("drag", sigma_ns=s, drag_ns=b), st.floats(0.5, 20.0),
              st.floats(-5.0, 5.0)),
    st.builds(lambda r: Envelope("flattop", ramp_ns=r), st.just(0.0) | st.floats(0.01, 4.0)),
)


@st.composite
def _timelines(draw):
    tones = []
    for _ in range(draw(st.integers(1, 5))):
        line = draw(st.sampled_from(["q0-line", "q1-line"]))
        env = draw(_ENVELOPES)
        duration = draw(st.floats(max(0.05, 2 * env.ramp_ns), 60.0))
        tones.append(Tone(line, draw(st.floats(0.0, 40.0)), duration,
                          draw(st.floats(4.5, 5.7)), draw(st.floats(0.0, 1.0)),
                          draw(st.floats(-math.pi, math.pi)), env))
    return Timeline(tuple(tones), ("q0",))


@settings(max_examples=150, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(tl=_timelines(), rate=st.sampled_from([1.5, 2.0, 4.0]), fill=st.floats(0.5, 1.0))
def test_compiled_samples_never_exceed_the_line_limit(demo_chip, tl, rate, fill) -> None:
    """Scaled so that each line's safety bound is ``fill`` × its limit (1: exactly at it)."""
    loads = line_loads(tl)
    scale = {ln: fill * demo_chip.amplitude_limit(ln) / ld.peak_amplitude
             for ln, ld in loads.items() if ld.peak_amplitude > 1e-6}
    tl = Timeline(tuple(Tone(t.line, t.start_ns, t.duration_ns, t.freq_ghz,
                             t.amplitude * scale.get(t.line, 1.0), t.phase_rad, t.envelope)
                        for t in tl.tones), tl.readout)
    check_timelines(demo_chip, [tl], 1e5)  # passes by construction
    lo = {"q0-line": 5.1, "q1-line": 5.1}  # every drawn frequency within ±0.6 GHz < Nyquist
    wf = compile_timeline(tl, demo_chip, rate, lo)
    for ln, s in wf.samples.items():
        assert np.max(np.abs(s)) <= demo_chip.amplitude_limit(ln) * (1 + 1e-12)


def test_a_wrong_answer_from_play_is_a_rig_error(demo_chip) -> None:
    class Liar(RecordingRig):
        def play(self, waveforms, shots):
            good = super().play(waveforms, shots)
            return Counts(good.qubits, good.counts - 1, shots, 0.0, 1.0)

    rig = Liar(demo_chip, samples_per_ns=4.0)
    tl = Timeline((Tone("q0-line", 0.0, 20.0, 4.92, 0.5),), ("q0",))
    with pytest.raises(RigError, match="sampled timelines: the rig returned a negative count"):
        rig.run([tl], 10)
