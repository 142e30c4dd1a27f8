"""Compensation settings: pairwise and multi-victim solves, files, applicators, the simulator."""

from __future__ import annotations

import cmath
import json
import math
from datetime import timezone
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from simulated_device import SimRig, demo_device_path
from xtalkcal.calibrate import CalibrationResult, PairResult
from xtalkcal.compensation import (
    CSV_COLUMNS,
    SETTINGS_SCHEMA,
    CompensationSettings,
    CrosstalkElement,
    PairSetting,
    apply_to_timeline,
    apply_to_waveforms,
    as_elements,
    multi_victim_settings,
    pairwise_settings,
    residuals,
)
from xtalkcal.exceptions import ConfigError, SafetyLimitError
from xtalkcal.hardware import Chip, DriveLine, Envelope, Qubit, SafetyLimits, Timeline, Tone
from xtalkcal.measure import ColumnProbe, protocol_from_dict
from xtalkcal.store import LedgerEntry, MatrixSnapshot, utc_timestamp

COV = [[1e-8, 2e-9], [2e-9, 4e-8]]


def make_chip(n: int = 2, *, power_dbm: float | None = None, name: str = "bench") -> Chip:
    """n qubits at 5.0, 5.3, 5.6, ... GHz, line d<k> drives q<k>; line limit 0.8, lab 0.9."""
    qubits = tuple(Qubit(f"q{k}", 5.0 + 0.3 * k, -0.2, 4.8 + 0.3 * k) for k in range(n))
    fs = -20.0 if power_dbm is not None else None
    lines = tuple(DriveLine(f"q{k}-line", f"q{k}", 50.0, 0.8, fs) for k in range(n))
    return Chip(name, qubits, lines, (tuple(q.name for q in qubits),),
                SafetyLimits(0.9, power_dbm))


def element(x: complex, f: float, cov=COV, t: float = 10.0, method: str = "manual"):
    return (x, cov, f, t, method)


# --------------------------------------------------------------------------------------------
# A two-line case worked by hand
# --------------------------------------------------------------------------------------------
#
# X_{q1,q0-line}(5.0 GHz) = 0.03 + 0.04j:  |X| = 0.05 → 20·log10(0.05) = −26.0206 dB,
#                                     arg X = atan2(0.04, 0.03) = 0.92730 rad = 53.130°.
# r = −X = −0.03 − 0.04j:            |r| = 0.05, arg r = 0.92730 − π = −2.21430 rad = −126.870°.
# Aggressor tone on q0-line: a = 0.5, φ = 0.3 rad, 5.0 GHz, square, 10–50 ns.
# Its copy on q1-line: a = 0.5·0.05 = 0.025, φ = 0.3 − 2.21430 = −1.91430 rad, same 10–50 ns at
# 5.0 GHz. A q0-line tone at 4.8 GHz and q1-line's own tone at 5.3 GHz get no copy.
# Sampled at carriers 5.0 (q0-line) and 5.3 (q1-line): Δb_1(t) = r·b_0(t)·e^{−i2π(5.0 − 5.3)t}; at
# t = 10 ns the shift factor is e^{i2π·3} = 1, so Δb_1 = 0.025·e^{−1.91430i}; at t = 10.5 ns
# it is e^{i2π·0.15} = e^{0.3πi}, so Δb_1 = 0.025·e^{(−1.91430 + 0.94248)i} = 0.025·e^{−0.97182i}.


@pytest.fixture()
def two():
    chip = make_chip(2)
    matrix = {("q0-line", "q1"): element(0.03 + 0.04j, 5.0)}
    return chip, pairwise_settings(matrix, chip)


def test_hand_computed_two_line_case(two):
    chip, s = two
    p = s.pair("q0-line", "q1")
    assert (p.aggressor_qubit, p.victim_line, p.solve) == ("q0", "q1-line", "pairwise")
    assert p.ratio == -0.03 - 0.04j
    assert p.magnitude_db == pytest.approx(-26.0206, abs=1e-4)
    assert math.degrees(p.phase_rad) == pytest.approx(-126.870, abs=1e-3)
    assert np.array_equal(p.covariance_matrix, np.array(COV))

    sq = Envelope("square")
    tl = Timeline((Tone("q0-line", 10.0, 40.0, 5.0, 0.5, 0.3, sq),
                   Tone("q0-line", 60.0, 20.0, 4.8, 0.4, 0.0, sq),
                   Tone("q1-line", 60.0, 20.0, 5.3, 0.6, 0.0, sq)), ("q0", "q1"), label="hand")
    new = apply_to_timeline(tl, s, chip)
    assert new.tones[:3] == tl.tones and len(new.tones) == 4
    copy = new.tones[3]
    assert (copy.line, copy.start_ns, copy.duration_ns, copy.freq_ghz) == (
        "q1-line",
        10.0,
        40.0,
        5.0,
    )
    assert copy.amplitude == pytest.approx(0.025, rel=1e-12)
    assert copy.phase_rad == pytest.approx(-1.91430, abs=1e-5)
    assert (new.readout, new.label) == (tl.readout, tl.label)

    (res,) = residuals(s, {("q0-line", "q1"): element(0.03 + 0.04j, 5.0)})
    assert res.pairwise == 0 and res.pairwise_db == -math.inf and res.all_on == 0

    t = np.array([10.0, 10.5])
    b0 = tl.waveform("q0-line", t) * np.exp(2j * np.pi * 5.0 * t)
    out = apply_to_waveforms(
        {"q0-line": b0}, {"q0-line": 5.0, "q1-line": 5.3}, s, dt_ns=0.5, t0_ns=10.0, chip=chip
    )
    assert out["q1-line"] == pytest.approx(0.025 * np.exp(1j * np.array([-1.91430, -0.97182])),
                                      abs=1e-6)
    assert np.array_equal(out["q0-line"], b0)


# --------------------------------------------------------------------------------------------
# Adapters
# --------------------------------------------------------------------------------------------


def test_snapshot_and_calibration_adapters():
    chip = make_chip(3)
    entry = LedgerEntry(aggressor="q0-line", victim="q1", frequency_ghz=5.0, value=0.02 - 0.01j,
                        covariance=COV, method="leakage", shots=100, amplification=2,
                        quality=1.0, verdict="accepted", measured_at_s=42.0,
                        measured_at_utc=utc_timestamp(), rig="bench", software_version="0",
                        kind="null", seq=3, position=1)
    snap = MatrixSnapshot("bench", {("q0-line", "q1"): entry}, math.inf, 3)
    s = pairwise_settings(snap, chip)
    p = s.pair("q0-line", "q1")
    assert (p.ratio, p.measured_at_s, p.method, p.source) == (-0.02 + 0.01j, 42.0, "leakage",
                                                              "ledger:3.1")
    with pytest.raises(ValueError, match="for chip 'other'"):
        pairwise_settings(MatrixSnapshot("other", {}, math.inf, 0), chip)

    def pr(victim, accepted, nulled, x):
        return PairResult(
            "q0-line",
            victim,
            "stark",
            5.0,
            accepted,
            "" if accepted else "no signal",
            x,
            np.array(COV) if x is not None else None,
            nulled,
            1000,
            1,
            7.0,
            "null" if nulled else "survey",
        )

    result = CalibrationResult(chip, protocol_from_dict({"name": "t"}), "bench",
                               pairs=[pr("q1", True, True, 0.01j), pr("q2", True, False, 0.002),
                                      PairResult("q1-line", "q2", "stark", 5.3, False, "no signal",
                                                 None, None, False, 10, 1, 7.0, "survey")])
    s = pairwise_settings(result, chip)
    assert [p.key for p in s] == [("q0-line", "q1")]  # accepted and nulled only
    assert s.pair("q0-line", "q1").source == "calibration:null"
    with pytest.raises(ValueError, match="q2-line→q0"):
        pairwise_settings(result, chip, pairs=[("q2-line", "q0")])
    with pytest.raises(ValueError, match="own qubit"):
        pairwise_settings({("q0-line", "q0"): element(0.1, 5.0)}, chip)
    with pytest.raises(ValueError, match="expected \\(X, covariance"):
        as_elements({("q0-line", "q1"): (0.1, COV)})
    assert as_elements(snap.entries) == as_elements(snap)  # ledger entries as mapping values


# --------------------------------------------------------------------------------------------
# Multi-victim solve
# --------------------------------------------------------------------------------------------

# Aggressor q0-line with victims q1, q2, whose lines leak onto each other (frequency-independent
# truth, so the matrix-only solve is exact here).
TRUTH3 = {
    ("q0-line", "q1"): 0.05,
    ("q0-line", "q2"): 0.04j,
    ("q2-line", "q1"): 0.1,
    ("q1-line", "q2"): -0.08j,
    ("q1-line", "q0"): 0.01,
    ("q2-line", "q0"): -0.02j,
}


def matrix3(cov=COV):
    chip = make_chip(3)
    f_of = {ln.name: chip.qubit(ln.qubit).f01_ghz for ln in chip.lines}
    return chip, {k: element(complex(x), f_of[k[0]], cov) for k, x in TRUTH3.items()}


def truth3(victim: str, line: str, freq_ghz: float) -> complex:
    return complex(TRUTH3.get((line, victim), 0.0))


def test_multi_victim_solve_matches_numpy_and_zeroes_the_all_on_field():
    chip, m = matrix3()
    col = [("q0-line", "q1"), ("q0-line", "q2")]
    mv = multi_victim_settings(m, chip, pairs=col)
    pw = pairwise_settings(m, chip, pairs=col)
    M = np.array([[1, TRUTH3[("q2-line", "q1")]], [TRUTH3[("q1-line", "q2")], 1]], dtype=complex)
    r = np.linalg.solve(M, -np.array([TRUTH3[("q0-line", "q1")], TRUTH3[("q0-line", "q2")]]))
    assert [p.ratio for p in mv] == pytest.approx(list(r), abs=1e-15)
    assert all(p.solve == "multi-victim" for p in mv)

    for truth in (m, truth3):
        res_mv = residuals(mv, truth)
        res_pw = residuals(pw, truth)
        assert max(abs(x.all_on) for x in res_mv) < 1e-15
        # pairwise cancels each pair alone, but each victim keeps the other victim's tone:
        # q1 gets X_{q1,q2-line}·r_2 = 0.1·(−0.04j), q2 gets X_{q2,q1-line}·r_1 = −0.08j·(−0.05)
        assert [x.pairwise for x in res_pw] == [0, 0]
        assert [x.all_on for x in res_pw] == pytest.approx([-0.004j, 0.004j], abs=1e-15)
        assert res_pw[0].all_on_db == pytest.approx(-47.96, abs=0.01)
        # the solve trades an exact pairwise null for the exact all-on one
        assert all(abs(x.pairwise) > 1e-3 for x in res_mv)

    # one victim alone, or no coupling, gives back the pairwise setting
    alone = multi_victim_settings(m, chip, pairs=[("q0-line", "q1")])
    assert alone.pair("q0-line", "q1").ratio == -0.05
    np.testing.assert_allclose(alone.pair("q0-line", "q1").covariance_matrix, COV, rtol=1e-12)
    # all columns at once: every column solved separately, order kept
    full = multi_victim_settings(m, chip)
    assert [p.key for p in full] == list(m)
    assert full.pair("q0-line", "q1").ratio == pytest.approx(complex(r[0]), abs=1e-15)


def test_multi_victim_covariance_matches_monte_carlo():
    sigma = 2e-4
    chip, m = matrix3(cov=[[sigma**2, 0.0], [0.0, sigma**2]])
    col = [("q0-line", "q1"), ("q0-line", "q2")]
    mv = multi_victim_settings(m, chip, pairs=col)
    rng = np.random.default_rng(7)
    n = 4000
    samples = []
    for _ in range(n):
        noisy = {k: (v[0] + sigma * complex(*rng.standard_normal(2)),) + v[1:]
                 for k, v in m.items()}
        samples.append([p.ratio for p in multi_victim_settings(noisy, chip, pairs=col)])
    z = np.array(samples)
    for a, p in enumerate(mv):
        emp = np.cov(np.vstack([z[:, a].real, z[:, a].imag]))
        # sample variances of 4000 draws scatter by ~2.2 %
        np.testing.assert_allclose(np.diag(emp), np.diag(p.covariance_matrix), rtol=0.1)
        assert abs(emp[0, 1] - p.covariance[0][1]) < 0.1 * sigma**2
    # the cross terms add to the pairwise covariance (X_ik·r_k is uncertain too)
    assert mv.pair("q0-line", "q1").stderr > math.sqrt(2) * sigma


def test_multi_victim_refuses_a_singular_system():
    chip = make_chip(3)
    m = {("q0-line", "q1"): element(0.05, 5.0), ("q0-line", "q2"): element(0.05, 5.0),
         ("q2-line", "q1"): element(1.0, 5.6), ("q1-line", "q2"): element(1.0, 5.3)}
    with pytest.raises(ValueError, match="ill-conditioned"):
        multi_victim_settings(m, chip, pairs=[("q0-line", "q1"), ("q0-line", "q2")])


def test_multi_victim_on_the_demo_device_needs_couplings_at_the_aggressor_frequency():
    """Numbers quoted in the module docstring (true matrix of the bundled chip)."""
    rig = SimRig(demo_device_path(), seed=1, drift=False)
    chip = rig.chip
    truth = rig.true_matrix()
    m = {}
    for i, v in enumerate(chip.qubit_names):
        for j, ln in enumerate(chip.lines):
            if ln.qubit != v:
                m[(ln.name, v)] = element(truth[i, j], chip.qubit(ln.qubit).f01_ghz, t=0.0)

    def worst(s):
        return max(r.all_on_db for r in residuals(s, rig.true_crosstalk))

    pw = pairwise_settings(m, chip)
    at_fk = multi_victim_settings(m, chip)
    at_fj = multi_victim_settings(m, chip, couplings=rig.true_crosstalk)
    assert worst(pw) == pytest.approx(-44.0, abs=0.5)
    assert worst(at_fk) == pytest.approx(-40.0, abs=0.5)
    assert worst(at_fj) < -250
    # against the matrix it was solved from, the f_k solve is exact too
    assert max(r.all_on_db for r in residuals(at_fk, m)) < -250


# --------------------------------------------------------------------------------------------
# Files
# --------------------------------------------------------------------------------------------

# Names under the documented rule (xtalkcal.common.NAME_RULE).
names = st.from_regex(r"\A[A-Za-z][A-Za-z0-9_-]{0,5}\Z")
finite = st.floats(-10, 10, allow_nan=False, allow_infinity=False)


@st.composite
def pair_settings(draw):
    sd = draw(st.tuples(st.floats(0, 1e-2), st.floats(0, 1e-2)))
    rho = draw(st.floats(-1, 1))
    c01 = rho * sd[0] * sd[1]
    ratio = draw(st.one_of(st.just(0j), st.builds(complex, finite, finite)))
    return PairSetting(
        aggressor_line="L" + draw(names), aggressor_qubit="a" + draw(names),
        victim="v" + draw(names), victim_line="l" + draw(names),
        frequency_ghz=draw(st.floats(0.1, 20)), ratio=ratio,
        covariance=((sd[0] ** 2, c01), (c01, sd[1] ** 2)),
        measured_at_s=draw(st.floats(-1e9, 1e9)), method=draw(names),
        solve=draw(st.sampled_from(["pairwise", "multi-victim"])),
        source=draw(st.text(max_size=12)))


settings_sets = st.builds(
    CompensationSettings,
    chip=names,
    pairs=st.lists(pair_settings(), max_size=4, unique_by=lambda p: p.key).map(tuple),
    created_utc=st.datetimes(timezones=st.just(timezone.utc)).map(utc_timestamp),
    software=st.text(max_size=10),
)


@given(settings_sets)
@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
def test_json_round_trip(s):
    text = s.to_json()
    back = CompensationSettings.from_json(text)
    assert back == s
    assert json.loads(text)["format"] + "/1" == SETTINGS_SCHEMA


@given(settings_sets.filter(lambda s: len(s) > 0))
@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])
def test_csv_round_trip(s):
    assert CompensationSettings.from_csv(s.to_csv()) == s


def test_files_are_written_atomically_and_read_back(two, tmp_path: Path):
    _, s = two
    pj = s.write_json(tmp_path / "settings.json")
    pc = s.write_csv(tmp_path / "settings.csv")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["settings.csv", "settings.json"]
    assert CompensationSettings.read_json(pj) == s
    assert CompensationSettings.read_csv(pc) == s
    doc = json.loads(pj.read_text())
    pair = doc["pairs"][0]
    assert pair["ratio"]["magnitude_db"] == pytest.approx(-26.0206, abs=1e-4)
    assert pair["ratio"]["phase_deg"] == pytest.approx(-126.870, abs=1e-3)
    assert pair["stderr_db"] == pytest.approx(20 * math.log10(math.sqrt(5e-8)))
    assert pc.read_text().splitlines()[0] == ",".join(CSV_COLUMNS)
    # overwrite in place: still exactly one file
    s.write_json(pj)
    assert len(list(tmp_path.iterdir())) == 2
    # a header-only CSV needs the chip name
    empty = CompensationSettings("bench")
    with pytest.raises(ConfigError, match="pass chip="):
        CompensationSettings.from_csv(empty.to_csv())
    assert CompensationSettings.from_csv(empty.to_csv(), chip="bench").pairs == ()


def test_malformed_files_name_the_field(two):
    _, s = two
    doc = s.to_dict()
    with pytest.raises(ConfigError, match="version: expected 1"):
        CompensationSettings.from_dict(doc | {"version": 2})
    first = {k: v for k, v in doc.items() if k not in ("format", "version")}
    with pytest.raises(ConfigError, match="schema: expected 'xtalkcal-settings/1'"):
        CompensationSettings.from_dict(first | {"schema": "xtalkcal-settings/2"})
    edited = json.loads(s.to_json())
    edited["pairs"][0]["ratio"]["magnitude_db"] = -30.0  # edited display value only
    with pytest.raises(ConfigError, match=r"pairs\[0\]\.ratio\.magnitude_db: .*authoritative"):
        CompensationSettings.from_dict(edited)
    bad = json.loads(s.to_json())
    bad["pairs"][0]["covariance"] = [[1.0, 2.0], [2.0, 1.0]]
    with pytest.raises(ConfigError, match=r"pairs\[0\].*positive semidefinite"):
        CompensationSettings.from_dict(bad)
    bad = json.loads(s.to_json())
    bad["pairs"][0]["frequency"] = 5.0
    with pytest.raises(ConfigError, match=r"pairs\[0\]\.frequency: unknown field"):
        CompensationSettings.from_dict(bad)
    with pytest.raises(ConfigError, match="not valid JSON"):
        CompensationSettings.from_json("{")
    rows = s.to_csv().splitlines()
    with pytest.raises(ConfigError, match="<header>"):
        CompensationSettings.from_csv("\n".join([rows[0].replace("ratio_re", "re")] + rows[1:]))
    with pytest.raises(ConfigError, match="row 2: ratio_im: expected a finite number"):
        CompensationSettings.from_csv(s.to_csv().replace(repr(-0.04), "nan"))


# --------------------------------------------------------------------------------------------
# Applicators: limits, consistency of timeline and waveform forms
# --------------------------------------------------------------------------------------------


def test_refuses_rather_than_clips(two):
    chip, s = two
    sq = Envelope("square")
    # q1-line already plays 0.79 while q0-line plays 0.5: the 0.025 copy would take q1-line
    # to 0.815 > 0.8
    tl = Timeline((Tone("q0-line", 0.0, 40.0, 5.0, 0.5, 0.0, sq),
                   Tone("q1-line", 20.0, 40.0, 5.3, 0.79, 0.0, sq)), ("q1",), label="busy")
    with pytest.raises(
        SafetyLimitError, match=r"busy: line q1-line .*0\.815.*q0-line → q1.*clipped"
    ):
        apply_to_timeline(tl, s, chip)
    # no overlap: fine
    ok = Timeline((Tone("q0-line", 0.0, 40.0, 5.0, 0.5, 0.0, sq),
                   Tone("q1-line", 40.0, 40.0, 5.3, 0.79, 0.0, sq)), ("q1",))
    assert len(apply_to_timeline(ok, s, chip).tones) == 3

    t = np.arange(0, 60, 0.25)
    b = {"q0-line": busy_b(tl, "q0-line", 5.0, t), "q1-line": busy_b(tl, "q1-line", 5.3, t)}
    before = {k: v.copy() for k, v in b.items()}
    with pytest.raises(SafetyLimitError, match=r"waveforms: line q1-line .*q0-line → q1"):
        apply_to_waveforms(b, {"q0-line": 5.0, "q1-line": 5.3}, s, dt_ns=0.25, chip=chip)
    assert all(np.array_equal(b[k], before[k]) for k in b)  # inputs untouched

    with pytest.raises(ValueError, match="for chip 'bench', not 'other'"):
        apply_to_timeline(ok, s, make_chip(2, name="other"))


def busy_b(tl: Timeline, line: str, carrier: float, t: np.ndarray) -> np.ndarray:
    return tl.waveform(line, t) * np.exp(2j * np.pi * carrier * t)


def test_average_power_refusal_names_the_pairs():
    chip = make_chip(2, power_dbm=-40.0)  # full scale −20 dBm: mean |a|² ≤ 0.01
    s = pairwise_settings({("q0-line", "q1"): element(0.3, 5.0)}, chip)
    sq = Envelope("square")
    # Energies ∫|a|²dt: q0-line 0.25·100 = 25 ns; q1-line's own tone 25 ns, plus the copy
    # 0.3²·25 = 2.25 ns. Over 2600 ns: q0-line 25/2600 → −40.17 dBm (fine), q1-line 27.25/2600 →
    # −39.80 dBm: only the compensation pushes q1-line over.
    tl = Timeline((Tone("q0-line", 0.0, 100.0, 5.0, 0.5, 0.0, sq),
                   Tone("q1-line", 100.0, 100.0, 5.3, 0.5, 0.0, sq)), ("q1",), label="hot")
    with pytest.raises(
        SafetyLimitError,
        match=r"compensation refused: .*q0-line → q1.* on line q1-line: hot: line q1-line .*"
        r"-39\.80 dBm",
    ):
        apply_to_timeline(tl, s, chip, repetition_ns=2600.0)
    assert len(apply_to_timeline(tl, s, chip, repetition_ns=1e6).tones) == 3
    # without the repetition time only peaks are checked (the rig checks power before playing)
    assert len(apply_to_timeline(tl, s, chip).tones) == 3
    with pytest.raises(SafetyLimitError, match="refused before any compensation"):
        apply_to_timeline(tl, s, chip, repetition_ns=2000.0)


def test_waveform_applicator_agrees_with_timeline_waveform():
    chip, m = matrix3()
    s = multi_victim_settings(m, chip, pairs=[("q0-line", "q1"), ("q0-line", "q2")])
    g = Envelope("gaussian", sigma_ns=6.0)
    drag = Envelope("drag", sigma_ns=5.0, drag_ns=0.7)
    tl = Timeline((Tone("q0-line", 5.0, 24.0, 5.0, 0.6, 0.4, g),
                   Tone("q0-line", 40.0, 20.0, 5.0, 0.5, -1.2, drag),
                   Tone("q1-line", 20.0, 24.0, 5.3, 0.3, 0.0, g),
                   Tone("q2-line", 50.0, 24.0, 5.6, 0.2, 2.0, g)), ("q1", "q2"))
    carriers = {"q0-line": 5.0, "q1-line": 5.3, "q2-line": 5.6}
    new = apply_to_timeline(tl, s, chip)
    assert len(new.tones) == 8
    dt, t0 = 0.05, 2.5
    t = t0 + dt * np.arange(2000)
    b = {ln: busy_b(tl, ln, f, t) for ln, f in carriers.items()}
    out = apply_to_waveforms(b, carriers, s, dt_ns=dt, t0_ns=t0, chip=chip)
    for ln, f in carriers.items():
        y = new.waveform(ln, t)
        np.testing.assert_allclose(out[ln] * np.exp(-2j * np.pi * f * t), y, atol=1e-12)
    # the copies really are there (and a flipped frequency shift would not match)
    assert np.max(np.abs(out["q1-line"] - b["q1-line"])) > 0.02
    wrong = b["q1-line"] + s.pair("q0-line", "q1").ratio * b["q0-line"] * np.exp(
        +2j * np.pi * (5.0 - 5.3) * t
    )
    assert np.max(np.abs(wrong - out["q1-line"])) > 0.02
    # a line missing from the samples is created; its carrier is needed
    only = apply_to_waveforms({"q0-line": b["q0-line"]}, carriers, s, dt_ns=dt, t0_ns=t0, chip=chip)
    assert set(only) == {"q0-line", "q1-line", "q2-line"}
    with pytest.raises(ValueError, match="no carrier for victim line 'q1-line'"):
        apply_to_waveforms({"q0-line": b["q0-line"]}, {"q0-line": 5.0}, s, dt_ns=dt, chip=chip)
    # a carrier other than the setting's frequency: nothing copied
    off = apply_to_waveforms(b, carriers | {"q0-line": 4.9}, s, dt_ns=dt, t0_ns=t0, chip=chip)
    assert all(np.array_equal(off[k], b[k]) for k in b)


# --------------------------------------------------------------------------------------------
# Against the simulated device
# --------------------------------------------------------------------------------------------


def test_true_ratio_cancels_leakage_on_the_simulated_device():
    rig = SimRig(demo_device_path(), seed=1, drift=False)
    chip = rig.chip
    f = chip.qubit("q4").f01_ghz
    assert f == 4.78
    x = rig.true_crosstalk("q5", "q4-line", f)
    assert rig.true_ratio("q5", "q4-line", f) == -x
    s = pairwise_settings({("q4-line", "q5"): CrosstalkElement(x, np.zeros((2, 2)), f, rig.now(),
                                                          "manual", "truth")}, chip)
    assert cmath.isclose(s.pair("q4-line", "q5").ratio, rig.true_ratio("q5", "q4-line", f))
    probe = ColumnProbe(chip, "q4-line", ("q5",), amplitude=0.7, repeats=8)
    # one timeline per point, or several (e.g. a cycle of preparation phases): all of them
    bare = probe.timelines(np.zeros((1, 1)))
    cancelled = [apply_to_timeline(tl, s, chip, repetition_ns=rig.repetition_ns) for tl in bare]
    for b, c in zip(bare, cancelled, strict=True):
        added = c.tones[len(b.tones):]
        assert c.tones[:len(b.tones)] == b.tones
        assert len(added) == 8 and {t.line for t in added} == {"q5-line"}
        assert all(t.freq_ghz == f for t in added)
    shots = 4000
    counts = rig.run(bare + cancelled, shots)
    p2 = counts.of("q5")[:, 2] / shots
    n = len(bare)
    assert p2[:n].mean() > 0.3  # uncancelled: strong leakage of q5 to |2⟩
    assert p2[n:].mean() < 0.02  # cancelled: the readout floor
