"""Re-check analysis and intervals under inputs at the edges: zero curvature, flat or
saturated data, pairs without history.

The analysis must answer every finite input with a decision (a broken one where the data
do not determine a null), never with an arithmetic error; the checks of the outcome are the
decision rules of :func:`xtalkcal.drift.analyse_recheck` themselves.
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from xtalkcal.drift import (
    FIRST_INTERVAL_FRACTION,
    DriftInputError,
    RecheckDecision,
    analyse_recheck,
    analyse_recheck_counts,
    first_interval,
    recheck_design,
)
from xtalkcal.fits import RejectionReason
from xtalkcal.measure import RecheckSettings

A = 0.8
Z_STORED = -0.008 + 0.002j
RHO = 0.004
TOL_DB = -45.0


@pytest.mark.parametrize("prior", [None, (5000.0, 1000.0)])
def test_exactly_zero_curvature_is_broken_not_an_error(prior) -> None:
    # All-zero signals make every fitted coefficient exactly 0: the null position -c1/(2 c3)
    # is 0/0. Formerly a ZeroDivisionError.
    z = recheck_design(Z_STORED, RHO, 6)
    o = analyse_recheck(z, np.zeros(z.size), 0.003, Z_STORED, A, tolerance_db=TOL_DB,
                        curvature_prior=prior)
    assert o.decision is RecheckDecision.BROKEN
    assert o.cause in (RejectionReason.NO_SIGNAL, RejectionReason.MODEL_MISMATCH)
    assert not o.confident and not o.comfortable


def test_zero_curvature_without_prior_says_no_signal() -> None:
    z = recheck_design(Z_STORED, RHO, 6)
    o = analyse_recheck(z, np.zeros(z.size), 0.003, Z_STORED, A, tolerance_db=TOL_DB)
    assert o.cause is RejectionReason.NO_SIGNAL
    assert "zero" in o.reason


@pytest.mark.parametrize("level", [0, 1000])
def test_counts_all_dark_or_all_bright_are_broken(level: int) -> None:
    z = recheck_design(Z_STORED, RHO, 6)
    o = analyse_recheck_counts(z, np.full(z.size, level), 1000, Z_STORED, A,
                               tolerance_db=TOL_DB)
    assert o.decision is RecheckDecision.BROKEN


finite = st.floats(min_value=-1e3, max_value=1e3, allow_nan=False, allow_infinity=False)


@settings(max_examples=300, deadline=None, derandomize=True)
@given(
    ring=st.integers(min_value=3, max_value=9),
    kappa=st.sampled_from([0.0, 1e-12, 1.0, 5000.0, -5000.0]),
    floor=st.sampled_from([0.0, 0.01, 0.5]),
    noise=st.lists(finite, min_size=10, max_size=10),
    scale=st.sampled_from([0.0, 1e-9, 1e-3]),
    shift=st.complex_numbers(max_magnitude=0.02, allow_nan=False, allow_infinity=False),
    prior=st.sampled_from([None, 5000.0, (5000.0, 0.0), (5000.0, 1250.0), (1e-9, 1e-12)]),
    stderr=st.sampled_from([1e-140, 1e-6, 0.003, 10.0]),
)
def test_any_finite_recheck_gets_a_decision(ring, kappa, floor, noise, scale, shift, prior,
                                            stderr) -> None:
    z = recheck_design(Z_STORED, RHO, ring)
    s = floor + kappa * np.abs(z - (Z_STORED + shift)) ** 2 + scale * np.array(noise[: z.size])
    o = analyse_recheck(z, s, stderr, Z_STORED, A, tolerance_db=TOL_DB, curvature_prior=prior)
    if o.decision is RecheckDecision.BROKEN:
        assert o.cause is not RejectionReason.NONE
        assert not o.confident and not o.comfortable
    else:
        # rules 6-7 only ever see finite numbers with a significantly positive curvature
        assert math.isfinite(o.residual) and math.isfinite(o.residual_stderr)
        assert o.curvature > 0
        assert (o.decision is RecheckDecision.DRIFTED) == (o.residual > 10 ** (TOL_DB / 20))


@settings(max_examples=100, deadline=None, derandomize=True)
@given(
    counts=st.lists(st.integers(min_value=0, max_value=200), min_size=7, max_size=7),
    prior=st.sampled_from([None, 5000.0, (5000.0, 1250.0)]),
)
def test_any_counts_get_a_decision(counts, prior) -> None:
    z = recheck_design(Z_STORED, RHO, 6)
    o = analyse_recheck_counts(z, counts, 200, Z_STORED, A, tolerance_db=TOL_DB,
                               curvature_prior=prior)
    assert isinstance(o.decision, RecheckDecision)


def test_stderr_whose_weight_overflows_is_refused() -> None:
    z = recheck_design(Z_STORED, RHO, 6)
    with pytest.raises(DriftInputError, match="stderr"):
        analyse_recheck(z, np.zeros(z.size), 1e-300, Z_STORED, A, tolerance_db=TOL_DB)


def _settings(start: float, lo: float = 0.5, hi: float = 48.0) -> RecheckSettings:
    return RecheckSettings(tolerance_db=TOL_DB, interval_hours=start, min_interval_hours=lo,
                           max_interval_hours=hi, points=4, shots_per_point=1000)


def test_first_interval_is_a_fraction_of_the_protocol_interval_within_its_limits() -> None:
    assert first_interval(_settings(12.0)) == pytest.approx(FIRST_INTERVAL_FRACTION * 12.0)
    assert first_interval(_settings(2.0)) == 0.5  # clamped to the minimum
    assert first_interval(_settings(12.0, lo=0.1, hi=1.0)) == 1.0  # and to the maximum


def test_a_step_is_caught_at_the_first_recheck_after_it_and_handled_at_once(tmp_path) -> None:
    """A 3 dB step of one coupling (the demo chip, drift otherwise off): the pair's first
    re-check after the step does not call it within, the same run_due call re-centres or
    recalibrates it, and the compensation in use is back within tolerance."""
    import tomllib

    from simulated_device import SimRig, demo_device_path, device_from_dict
    from xtalkcal.calibrate import calibrate_chip
    from xtalkcal.drift import Schedule, run_due, schedule_after_calibration
    from xtalkcal.measure import protocol_from_dict
    from xtalkcal.store import Ledger, ledger_entries, ledger_sweeps

    with open(demo_device_path(), "rb") as fh:
        doc = tomllib.load(fh)
    doc["version"] = 2
    doc["drift"] = {"phase_diffusion_rad2_per_hour": 0.0, "log_magnitude_diffusion_per_hour": 0.0,
                    "qubit_wander_mhz": 0.0}
    for c in doc["couplings"]:
        c.pop("phase_rate_rad_per_hour", None)
    step_h = 3.0
    doc["steps"] = [{"at_hours": step_h, "line": "q4-line", "qubit": "q5",
                     "crosstalk_db_change": 3.0}]
    rig = SimRig(device_from_dict(doc), seed=5, drift=True)
    proto = protocol_from_dict({"name": "leak", "methods": {"only": ["leakage"]},
                                "survey": {"shots": 500}, "null": {"max_rounds": 3}})
    res = calibrate_chip(rig, proto, aggressors=["q4-line"])
    led = Ledger.create(tmp_path / "ledger", chip=rig.chip.name)
    led.append(ledger_entries(res, run_tag="cal"), sweeps=ledger_sweeps(res, run_tag="cal"))
    schedule = Schedule(proto.recheck)
    schedule_after_calibration(schedule, res, rig.now())
    pair = ("q4-line", "q5")
    assert pair in schedule
    for _ in range(40):
        rig.wait(max(0.0, min(schedule.slot(p).due_s for p in schedule.pairs()) - rig.now()))
        rep = run_due(rig, proto, led, schedule)
        mine = [c for c in rep.checked if (c.aggressor, c.victim) == pair]
        if mine and rep.now_s >= step_h * 3600:
            break
    else:
        pytest.fail("no re-check of the pair after the step")
    assert mine[0].outcome.decision is not RecheckDecision.WITHIN
    assert pair in rep.recentred or "q4-line" in rep.recalibrated
    fresh = led.current()[pair]
    truth = rig.true_crosstalk("q5", "q4-line", fresh.frequency_ghz)
    assert 20 * math.log10(abs(fresh.value - truth)) < proto.recheck.tolerance_db


def _entry(t_h: float, x: complex, *, kind: str = "recheck", tag: str = "within",
           verdict: str = "accepted", sigma: float = 2e-4):
    from xtalkcal.store import LedgerEntry

    return LedgerEntry(
        aggressor="q1-line", victim="q2", frequency_ghz=5.1, value=complex(x),
        covariance=((sigma**2, 0.0), (0.0, sigma**2)), method="stark", shots=8000,
        amplification=4, quality=1.0, verdict=verdict, measured_at_s=3600.0 * t_h,
        measured_at_utc="2031-01-01T00:00:00.000000+00:00", rig="invented",
        software_version="test", kind=kind, tag=tag)


class _Ledger:
    def __init__(self, entries):
        self.entries = entries

    def history(self, aggressor, victim):
        return tuple(self.entries)


def _due_run(entries, now_h: float):
    from types import SimpleNamespace

    from xtalkcal.drift.recheck import _DueRun

    rig = SimpleNamespace(now=lambda: 3600.0 * now_h)
    protocol = SimpleNamespace(recheck=_settings(12.0))
    return _DueRun(rig, protocol, _Ledger(entries), None, None, print, None, None)


def test_a_measured_fast_drift_survives_recalibration() -> None:
    # |X| = -20 dB turning at 0.05 rad/h: the residual reaches -45 dB (5.6e-3) about 1.1 h
    # after a fresh null. A recalibration at 6 h must not put it back on a long interval.
    x0, w = 0.1, 0.05
    hist = [_entry(t, x0 * np.exp(1j * w * t), kind="null" if t == 0 else "recheck")
            for t in (0.0, 1.5, 3.0, 4.5)]
    hist.append(_entry(6.0, x0 * np.exp(1j * w * 6.0), kind="null", tag="calibrated"))
    run = _due_run(hist, 6.0)
    iv = run.fresh_interval(("q1-line", "q2"), 48.0)
    assert iv <= 0.5 * 1.2  # at most the policy's safety (0.5) times the hours left
    assert iv < 12.0
    # without history the pair is first checked early
    assert _due_run([hist[0]], 0.0).fresh_interval(("q1-line", "q2"), None) == first_interval(
        _settings(12.0))


class _Snap:
    """The part of a MatrixSnapshot that picking re-checks reads."""

    def __init__(self, kinds: dict) -> None:
        self.entries = {p: SimpleNamespace(kind=k) for p, k in kinds.items()}

    def __contains__(self, pair) -> bool:
        return pair in self.entries

    def __getitem__(self, pair):
        return self.entries[pair]


def test_only_the_due_pairs_are_rechecked_each_with_its_co_victims_off() -> None:
    # A due pair does not bring its co-victims along (each keeps the interval its own drift
    # sets), a survey-only pair is neither re-checked nor played, and in a pair's re-check
    # the column's other tones are off: their leak through the victim lines' mutual
    # couplings would otherwise move the measured null.
    snap = _Snap(
        {
            ("q1-line", "q0"): "null",
            ("q1-line", "q2"): "recheck",
            ("q1-line", "q3"): "null",
            ("q1-line", "q4"): "survey",
            ("q2-line", "q1"): "null",
        }
    )
    run = _due_run([_entry(0.0, 0.1, kind="null")], 1.0)
    run.snapshot = snap
    assert run.due_columns([("q1-line", "q2"), ("q2-line", "q1"), ("q1-line", "q4")]) == {
        "q1-line": ["q2"], "q2-line": ["q1"]}
    assert sorted(run.co_victims("q1-line", "q2")) == ["q0", "q3"]
    assert run.co_victims("q2-line", "q1") == []
