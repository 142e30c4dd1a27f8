"""Re-check analysis and intervals under inputs at the edges: zero curvature, flat or
saturated data, pairs without history.

The analysis must answer every finite input with a decision (a broken one where the data
do not determine a null), never with an arithmetic error; the checks of the outcome are the
decision rules of :func:`xtalkcal.drift.analyse_recheck` themselves.
"""

from __future__ import annotations

import math

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
