"""Re-checks of one pair: the cross about the stored null, the two shot stages, the widened
curvature prior.

Data are drawn from the paraboloid ``S0 + kappa |z - z*|**2`` (Gaussian noise, fixed seeds),
so the true shift of X is known. The false-alarm rate of the second stage's sizing is
checked against the non-central chi-square law of ``|dX|**2 / sigma**2`` (2 degrees of
freedom, non-centrality ``|dX_true|**2 / sigma**2``; SciPy's ``stats.ncx2``).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from xtalkcal.drift import (
    CROSS_POINTS,
    MAX_SECOND_STAGE,
    RecheckDecision,
    RecheckRules,
    analyse_recheck,
    recheck_design,
    residual_axis,
    second_stage_shots,
    second_stage_target,
)
from xtalkcal.drift.recheck import _pooled
from xtalkcal.fits import RejectionReason

A = 0.8
Z_STORED = -0.008 + 0.002j
RHO = 0.004
KAPPA = 5000.0
FLOOR = 0.01
TOL_DB = -45.0
TOL = 10 ** (TOL_DB / 20)


def cross() -> np.ndarray:
    return recheck_design(Z_STORED, RHO, CROSS_POINTS)


def landscape(z: np.ndarray, shift: complex, kappa: float = KAPPA) -> np.ndarray:
    return FLOOR + kappa * np.abs(z - (Z_STORED - A * shift)) ** 2


def point_error_for(axis: float) -> float:
    """Per-point stderr that gives the cross's ``dX`` a standard error ``axis`` on each axis
    (curvature known): ``c1 = (S(+x) - S(-x))/2`` has variance ``s**2/2`` in ring-radius
    units, and ``d = -rho c1 / (2 kappa rho**2)``, ``dX = -d/A``."""
    return axis * 2 * math.sqrt(2) * KAPPA * RHO * A


def test_the_cross_and_its_centre_determine_the_shift_exactly() -> None:
    z = cross()
    assert z.size == CROSS_POINTS + 1 and z[-1] == Z_STORED
    assert np.allclose(np.abs(z[:-1] - Z_STORED), RHO)
    shift = 0.6 * TOL * np.exp(0.7j)
    o = analyse_recheck(z, landscape(z, shift), 1e-3, Z_STORED, A, tolerance_db=TOL_DB)
    assert o.shift == pytest.approx(shift, rel=1e-9)
    assert o.dof == 1
    # equal point errors and a known curvature: the cross measures both axes of dX alike
    o = analyse_recheck(z, landscape(z, shift), 1e-3, Z_STORED, A, tolerance_db=TOL_DB,
                        curvature_prior=(KAPPA, 0.0))
    c = np.asarray(o.shift_covariance)
    assert c[0, 0] == pytest.approx(c[1, 1], rel=1e-6) and abs(c[0, 1]) < 1e-9 * c[0, 0]


def test_second_stage_target_is_a_quarter_of_the_margin_within_its_limits() -> None:
    assert second_stage_target(TOL / 3, TOL_DB) == pytest.approx(TOL / 6)
    assert second_stage_target(0.0, TOL_DB) == pytest.approx(TOL / 4)
    # near or above the tolerance: the floor of half the tolerance, then a fresh null's margin
    assert second_stage_target(0.9 * TOL, TOL_DB) == pytest.approx(TOL / 8)
    assert second_stage_target(3 * TOL, TOL_DB) == pytest.approx(TOL / 4)
    assert second_stage_target(math.nan, TOL_DB) == pytest.approx(TOL / 4)


def test_second_stage_shots_reach_the_target_and_stop_at_the_cap() -> None:
    first = 400
    assert second_stage_shots(first, 0.9 * TOL / 4, TOL / 4) == 0
    more = second_stage_shots(first, 2.0 * TOL / 4, TOL / 4)
    pooled = 2.0 * TOL / 4 * math.sqrt(first / (first + more))
    assert pooled <= TOL / 4 and more == 3 * first
    assert second_stage_shots(first, 100 * TOL, TOL / 4) == MAX_SECOND_STAGE * first
    assert second_stage_shots(first, math.inf, TOL / 4) == 3 * first


def test_pooled_stages_are_the_pooled_fraction_of_counts() -> None:
    k1, n1 = np.array([10.0, 40.0, 3.0]), np.full(3, 400.0)
    k2, n2 = np.array([33.0, 90.0, 20.0]), np.full(3, 1200.0)
    p1, p2 = k1 / n1, k2 / n2
    e1, e2 = np.sqrt(p1 * (1 - p1) / n1), np.sqrt(p2 * (1 - p2) / n2)
    s, e, shots = _pooled([(p1, e1, n1), (p2, e2, n2)])
    assert s == pytest.approx((k1 + k2) / (n1 + n2))
    assert shots == 4800
    assert np.all(e < np.minimum(e1, e2))


def test_false_alarm_rate_at_the_margin_matches_the_noncentral_chi_square() -> None:
    # A pair truly a third of the tolerance away from its stored null, re-checked with the
    # error the second stage aims at: "confidently within" (|dX| + 2 sigma < tol) fails when
    # |dX| > 4 sigma, which a non-central chi-square with 2 dof and non-centrality 4 gives.
    true = TOL / 3 * np.exp(0.4j)
    sigma = second_stage_target(abs(true), TOL_DB)
    expected = float(stats.ncx2.sf((TOL / sigma - 2) ** 2, 2, (abs(true) / sigma) ** 2))
    assert expected == pytest.approx(0.034, abs=0.001)
    z, se = cross(), point_error_for(sigma)
    rng = np.random.default_rng(13)
    n, alarms, broken, axes = 4000, 0, 0, []
    for _ in range(n):
        s = landscape(z, true) + se * rng.standard_normal(z.size)
        o = analyse_recheck(z, s, se, Z_STORED, A, tolerance_db=TOL_DB,
                            curvature_prior=(KAPPA, 0.0))
        if o.decision is RecheckDecision.BROKEN:
            # the chi-square and curvature-consistency rules at their own tail rates
            broken += 1
            continue
        alarms += not o.confident
        axes.append(residual_axis(o))
    assert broken < 0.005 * n
    n -= broken
    assert np.median(axes) == pytest.approx(sigma, rel=1e-6)
    band = 4 * math.sqrt(expected * (1 - expected) / n)
    assert abs(alarms / n - expected) < band, (alarms / n, expected)


def _tight_prior_case(ratio: float) -> tuple[np.ndarray, np.ndarray, float]:
    z = cross()
    s = landscape(z, 0.3 * TOL, kappa=ratio * KAPPA)
    return z, s, 1e-4


@pytest.mark.parametrize("ratio", [1 / 1.4, 1.3])
def test_a_curvature_within_the_ratio_widens_the_prior(ratio: float) -> None:
    z, s, se = _tight_prior_case(ratio)
    prior = (KAPPA, 0.02 * KAPPA)
    strict = analyse_recheck(z, s, se, Z_STORED, A, tolerance_db=TOL_DB, curvature_prior=prior,
                             rules=RecheckRules(curvature_ratio=1.0))
    assert strict.decision is RecheckDecision.BROKEN
    assert strict.cause is RejectionReason.MODEL_MISMATCH
    o = analyse_recheck(z, s, se, Z_STORED, A, tolerance_db=TOL_DB, curvature_prior=prior)
    assert o.decision is RecheckDecision.WITHIN
    assert "widened" in o.reason
    assert o.shift == pytest.approx(0.3 * TOL, rel=1e-3)


def test_a_curvature_beyond_the_ratio_still_breaks_the_recheck() -> None:
    z, s, se = _tight_prior_case(2.0)
    o = analyse_recheck(z, s, se, Z_STORED, A, tolerance_db=TOL_DB,
                        curvature_prior=(KAPPA, 0.02 * KAPPA))
    assert o.decision is RecheckDecision.BROKEN and o.cause is RejectionReason.MODEL_MISMATCH
    assert "landscape changed" in o.reason


def test_curvature_ratio_below_one_is_refused() -> None:
    from xtalkcal.drift import DriftInputError

    with pytest.raises(DriftInputError, match="curvature_ratio"):
        RecheckRules(curvature_ratio=0.9)


def _walk_history(seed: int, n: int = 6, sigma: float = TOL / 4):
    """A pair at -30 dB whose phase walks 0.02 rad/√h, re-checked every 4 h with an error of
    a quarter of the tolerance: the walk's steps are about the size of the errors."""
    from xtalkcal.store import LedgerEntry

    rng = np.random.default_rng(seed)
    t = 4.0 * np.arange(n)
    phase = np.concatenate([[0.0], np.cumsum(0.02 * 2.0 * rng.standard_normal(n - 1))])
    x = 10 ** (-30 / 20) * np.exp(1j * phase)
    x = x + sigma * (rng.standard_normal(n) + 1j * rng.standard_normal(n))
    return [LedgerEntry(aggressor="q1-line", victim="q2", frequency_ghz=5.1, value=complex(v),
                        covariance=((sigma**2, 0.0), (0.0, sigma**2)), method="stark",
                        shots=8000, amplification=4, quality=1.0, verdict="accepted",
                        measured_at_s=3600.0 * tk, measured_at_utc="2031-01-01T00:00:00+00:00",
                        rig="invented", software_version="test", kind="recheck")
            for tk, v in zip(t, x, strict=True)]


def test_the_diffusion_upper_bound_caps_a_walk_estimated_as_none() -> None:
    from xtalkcal.drift import pair_trend

    seen_zero = 0
    for seed in range(40):
        hist = _walk_history(seed)
        now = hist[-1].measured_at_s
        plain = pair_trend(hist, tolerance_db=TOL_DB, now_s=now)
        upper = pair_trend(hist, tolerance_db=TOL_DB, now_s=now, diffusion_sigma=1.0)
        assert plain.phase.diffusion == upper.phase.diffusion  # the estimate is unchanged
        assert upper.hours_to_tolerance <= plain.hours_to_tolerance
        if plain.phase.diffusion == 0.0:
            seen_zero += 1
            assert math.isfinite(upper.hours_to_tolerance)
            assert upper.hours_to_tolerance < plain.hours_to_tolerance
    assert seen_zero > 0  # the case the bound is for does occur at these errors
    with pytest.raises(Exception, match="diffusion_sigma"):
        pair_trend(hist, tolerance_db=TOL_DB, now_s=now, diffusion_sigma=-1.0)


def _drifted(residual: float, stderr: float) -> object:
    from types import SimpleNamespace

    return SimpleNamespace(decision=RecheckDecision.DRIFTED, confident=True, tolerance_db=TOL_DB,
                           residual=residual, residual_stderr=stderr)


def test_a_step_is_a_residual_confidently_beyond_twice_the_tolerance() -> None:
    from xtalkcal.drift.recheck import STEP_TAG, is_step, since_step

    assert is_step(_drifted(4 * TOL, 0.1 * TOL))
    assert not is_step(_drifted(2.1 * TOL, 0.1 * TOL))  # within 2 sigma of twice the tolerance
    assert not is_step(_drifted(1.5 * TOL, 0.01 * TOL))  # an ordinary drift
    # the trend starts again at the latest step entry (accepted or not)
    hist = _walk_history(0, n=6)
    import dataclasses

    hist[3] = dataclasses.replace(hist[3], tag=STEP_TAG, verdict="rejected")
    assert since_step(hist) == hist[3:]
    assert since_step(hist[:3]) == hist[:3]


def test_stark_victims_due_together_or_soon_share_one_train() -> None:
    from types import SimpleNamespace

    from xtalkcal.drift import Schedule
    from xtalkcal.drift.recheck import SHARE_AHEAD, _DueRun
    from xtalkcal.measure import RecheckSettings

    settings = RecheckSettings(tolerance_db=TOL_DB, interval_hours=12.0)
    schedule = Schedule(settings)
    h = 3600.0
    for v, due_h, iv in (("q0", 10.0, 4.0), ("q2", 10.0 + SHARE_AHEAD * 4.0 - 0.1, 4.0),
                         ("q3", 10.0 + SHARE_AHEAD * 4.0 + 0.1, 4.0), ("q4", 10.0, 4.0)):
        schedule.calibrated(("q1-line", v), (due_h - iv) * h, interval_h=iv)
    methods = {"q0": "stark", "q2": "stark", "q3": "stark", "q4": "leakage"}
    snap = {("q1-line", v): SimpleNamespace(kind="null", method=m) for v, m in methods.items()}
    run = _DueRun(SimpleNamespace(now=lambda: 10.0 * h), None, None, schedule, None, print,
                  None, None)
    run.snapshot = snap
    # q0 is due, q2 is due within SHARE_AHEAD of its interval, q3 is not, q4 is not Stark
    assert run.shared_group("q1-line", ["q0", "q4"]) == ["q0", "q2"]
    # a lone Stark victim, or none due, shares nothing
    assert run.shared_group("q1-line", ["q4"]) == []
    schedule.calibrated(("q1-line", "q2"), 10.0 * h, interval_h=4.0)
    assert run.shared_group("q1-line", ["q0"]) == []
