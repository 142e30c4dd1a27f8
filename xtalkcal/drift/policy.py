"""The next-check policy: when each pair is looked at again, from its trend and its margin.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from xtalkcal.measure import RecheckSettings
from xtalkcal.drift.inputs import DriftInputError, _finite_real, _lin
from xtalkcal.drift.outcome import (
    DEFAULT_RECHECK_RULES,
    FollowUp,
    RecheckDecision,
    RecheckOutcome,
    RecheckRules,
)
from xtalkcal.drift.trends import PairTrend

# --------------------------------------------------------------------------------------------
# Adaptive intervals
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class NextCheck:
    """When to re-check a pair next, and what it needs before then.

    Attributes
    ----------
    interval_h : float
        Hours until the next re-check, within the protocol's ``[min, max]`` interval.
    follow_up : FollowUp
        Work the pair needs now (re-centre, recalibrate) or ``NONE``.
    reason : str
        How the interval was chosen.
    decision : RecheckDecision or None
        The re-check decision the interval was based on (None for a trend alone).
    hours_left : float or None
        The trend's predicted hours from now until the tolerance is reached, if known.
    """

    interval_h: float
    follow_up: FollowUp
    reason: str
    decision: RecheckDecision | None = None
    hours_left: float | None = None


def _interval_limits(settings: RecheckSettings) -> tuple[float, float, float]:
    lo = _finite_real("settings.min_interval_hours", settings.min_interval_hours)
    hi = _finite_real("settings.max_interval_hours", settings.max_interval_hours)
    start = _finite_real("settings.interval_hours", settings.interval_hours)
    if not 0 < lo <= hi:
        raise DriftInputError(
            f"settings need 0 < min_interval_hours <= max_interval_hours, got {lo!r}, {hi!r}"
        )
    return lo, hi, start


# A pair without a measured drift rate is first checked after this fraction of the
# protocol's interval: with doubling after each comfortable check, its first three entries
# (hence a rate) are in by ~3/8 of the protocol's interval (common practice for back-off:
# start short, grow geometrically).
FIRST_INTERVAL_FRACTION = 0.125


# Fraction of the trend's predicted hours left (mean + 1 sigma of the residual at the
# tolerance) at which run_due checks a pair again. For a residual driven by a random walk the
# variance grows linearly in time, so at a quarter of the hours left the 1-sigma band is half
# the tolerance: the check lands where mean + 2 sigma reaches it. A 1-D walk from a fresh null
# then spends ~1 % of each interval beyond the tolerance (the time average of
# 2 Phi(-tol / sigma(t))); at 0.5 (sigma = 0.71 tol) it was ~6 %.
DUE_SAFETY = 0.25
# The interval factors run_due passes to next_check: a confident "within" doubles the
# interval, as a comfortable one does. A pair re-checked alone is measured to a quarter of
# its margin (drift.recheck.second_stage_target), so its upper 2-sigma bound is rarely 6 dB
# below the tolerance even at a null just adopted; the trend's cap (DUE_SAFETY) is what
# keeps the interval short where the drift demands it.
# run_due predicts with each pair's diffusion constants raised by one standard error
# (drift.pair_trend's diffusion_sigma), so a walk not yet resolved from the entries' errors
# still caps the interval.
DUE_DIFFUSION_SIGMA = 1.0
DUE_POLICY = dict(safety=DUE_SAFETY, lengthen=2.0, modest_lengthen=2.0)


def first_interval(settings: RecheckSettings) -> float:
    """First re-check interval of a pair without history (h), within the protocol's limits.

    ``FIRST_INTERVAL_FRACTION`` of ``settings.interval_hours``, clamped to
    ``[min_interval_hours, max_interval_hours]``.
    """
    lo, hi, start = _interval_limits(settings)
    return float(min(max(FIRST_INTERVAL_FRACTION * start, lo), hi))


@dataclass(frozen=True)
class _Factors:
    """The interval factors of :func:`next_check`, checked."""

    safety: float
    lengthen: float
    modest_lengthen: float
    shorten: float

    def __post_init__(self) -> None:
        if not 0 < self.safety <= 1:
            raise DriftInputError(f"safety must lie in (0, 1], got {self.safety!r}")
        if not (self.lengthen >= self.modest_lengthen >= 1 > self.shorten > 0):
            raise DriftInputError(
                "need lengthen >= modest_lengthen >= 1 > shorten > 0, got "
                f"{self.lengthen!r}, {self.modest_lengthen!r}, {self.shorten!r}"
            )


@dataclass(frozen=True)
class _Step:
    """An interval proposed from the evidence, before the trend's cap and the clamp."""

    proposal: float
    follow_up: FollowUp
    why: str
    use_trend: bool  # False when the trend describes the value being replaced


def _evidence(
    outcome_or_trend: RecheckOutcome | PairTrend | Sequence[RecheckOutcome | PairTrend],
) -> tuple[RecheckOutcome | None, PairTrend | None]:
    """The re-check outcome and the trend handed to :func:`next_check` (at most one of each)."""
    items = (
        list(outcome_or_trend)
        if isinstance(outcome_or_trend, Sequence)
        else [outcome_or_trend]
    )
    outcomes = [x for x in items if isinstance(x, RecheckOutcome)]
    trends = [x for x in items if isinstance(x, PairTrend)]
    if len(outcomes) + len(trends) != len(items) or len(outcomes) > 1 or len(trends) > 1:
        raise DriftInputError(
            "next_check takes a RecheckOutcome, a PairTrend, or one of each; got "
            + ", ".join(type(x).__name__ for x in items)
        )
    if not items:
        raise DriftInputError("next_check needs a RecheckOutcome or a PairTrend")
    return (outcomes[0] if outcomes else None), (trends[0] if trends else None)


def _trend_step(
    trend: PairTrend | None, hours_left: float | None, base: float, factors: _Factors
) -> _Step:
    """The proposal from a trend alone (no re-check outcome)."""
    proposal = base if trend is None or hours_left is None else factors.lengthen * base
    why = (
        "trend without rates: interval kept"
        if hours_left is None
        else f"trend: lengthened x{factors.lengthen:g} unless the prediction says otherwise"
    )
    return _Step(proposal, FollowUp.NONE, why, True)


def _outcome_step(
    outcome: RecheckOutcome, base: float, lo: float, rules: RecheckRules, factors: _Factors
) -> _Step:
    """The proposal from a re-check outcome: broken, drifted or within."""
    if outcome.decision is RecheckDecision.BROKEN:
        why = f"re-check broken ({outcome.cause.value}): recalibrate, then check at the minimum"
        return _Step(lo, FollowUp.RECALIBRATE, why, False)
    if outcome.decision is RecheckDecision.DRIFTED:
        tol = _lin(outcome.tolerance_db)
        axis = math.sqrt(max(float(np.linalg.eigvalsh(outcome.shift_covariance)[-1]), 0.0))
        # Adopting the re-check's null leaves its estimation error as the new residual; it
        # must sit well inside the tolerance. (Shifts beyond the probed region are already
        # broken, so no distance rule is needed here.)
        adoptable = rules.confidence_sigma * axis < tol
        why = (
            f"drifted: shortened x{factors.shorten:g}; "
            + (
                "the re-check's null is precise enough to adopt (re-centre)"
                if adoptable
                else "the re-check's null is too uncertain to adopt (recalibrate)"
            )
        )
        follow_up = FollowUp.RECENTRE if adoptable else FollowUp.RECALIBRATE
        return _Step(factors.shorten * base, follow_up, why, False)
    if outcome.comfortable:
        proposal = factors.lengthen * base
        why = f"comfortably within: lengthened x{factors.lengthen:g}"
    elif outcome.confident:
        proposal = factors.modest_lengthen * base
        why = f"within: lengthened x{factors.modest_lengthen:g}"
    else:
        proposal, why = base, "within, but not confidently: interval kept"
    return _Step(proposal, FollowUp.NONE, why, True)


def next_check(
    outcome_or_trend: RecheckOutcome | PairTrend | Sequence[RecheckOutcome | PairTrend],
    previous_interval_h: float | None,
    settings: RecheckSettings,
    *,
    rules: RecheckRules = DEFAULT_RECHECK_RULES,
    safety: float = 0.5,
    lengthen: float = 2.0,
    modest_lengthen: float = 1.5,
    shorten: float = 0.5,
) -> NextCheck:
    """Choose the next re-check interval of a pair from its latest re-check and/or trend.

    ``base`` is ``previous_interval_h`` (``settings.interval_hours`` when None). Rules:

    * **broken**: ``min_interval_hours`` and follow-up ``recalibrate`` (full calibration).
    * **drifted**: ``shorten * base`` (0.5); follow-up ``recentre`` when the re-check's own
      estimate is good enough to adopt (``k`` times the largest stderr axis of ``dX`` below the
      tolerance, ``k = rules.confidence_sigma``), else ``recalibrate``. The trend is not used:
      it describes the value being replaced.
    * **within**: ``lengthen * base`` (2) when comfortable (upper ``k``-sigma bound at least
      ``rules.comfort_db`` below the tolerance), ``modest_lengthen * base`` (1.5) when
      confidently within, ``base`` otherwise.
    * **trend** (with a within, or alone): the interval is capped at ``safety * hours_left``
      (0.5 of the predicted hours from now until ``mean + 1 sigma`` of the residual reaches
      the tolerance, :meth:`PairTrend.predicted_residual`), so a check lands well before the
      predicted exit. A trend alone proposes ``lengthen * base`` under that cap; a trend
      without rates (1-2 entries) keeps ``base``.

    Growth is therefore at most ``lengthen`` per check (common practice for back-off schemes:
    grow geometrically, never jump). The result is clamped to
    ``[min_interval_hours, max_interval_hours]``.

    Parameters
    ----------
    outcome_or_trend : RecheckOutcome, PairTrend, or a sequence of at most one of each
        The evidence.
    previous_interval_h : float or None
        Interval that led to this check, h.
    settings : RecheckSettings
        The protocol's ``[recheck]`` table (interval limits and the starting interval).
    rules : RecheckRules
        ``confidence_sigma`` for the re-centre test.
    safety : float
        Fraction of the predicted hours left at which to check, in (0, 1].
    lengthen, modest_lengthen, shorten : float
        Interval factors (``lengthen >= modest_lengthen >= 1 > shorten > 0``).

    Returns
    -------
    NextCheck
    """
    lo, hi, start = _interval_limits(settings)
    factors = _Factors(safety, lengthen, modest_lengthen, shorten)
    outcome, trend = _evidence(outcome_or_trend)
    base = start if previous_interval_h is None else _finite_real(
        "previous_interval_h", previous_interval_h
    )
    if base <= 0:
        raise DriftInputError(f"previous_interval_h must be positive, got {base!r}")

    hours_left = None if trend is None else trend.hours_left
    if outcome is None:
        step = _trend_step(trend, hours_left, base, factors)
    else:
        step = _outcome_step(outcome, base, lo, rules, factors)
    proposal, why = step.proposal, step.why
    if step.use_trend and hours_left is not None:
        cap = safety * hours_left
        if cap < proposal:
            proposal = cap
            why += (
                f"; capped at {safety:g} of the {hours_left:.3g} h predicted before the "
                "residual reaches the tolerance"
            )
    interval = min(max(proposal, lo), hi)
    if interval != proposal:
        why += f"; clamped to [{lo:g}, {hi:g}] h"
    return NextCheck(
        interval_h=float(interval),
        follow_up=step.follow_up,
        reason=why,
        decision=None if outcome is None else outcome.decision,
        hours_left=hours_left,
    )
