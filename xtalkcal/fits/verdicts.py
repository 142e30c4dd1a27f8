"""Verdicts on a fitted null, the reasons a fit is rejected and the rules that decide them.
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass
from typing import Literal

from xtalkcal.exceptions import XtalkcalError

NullModel = Literal["saturating", "paraboloid"]

_SCHEMA_VERSION = 1

# Likelihood-ratio margin (in -2 log L, i.e. 3 sigma for one extra parameter)
# by which a free fringe amplitude must beat the ceiling held at 1.
_BRANCH_PREFERENCE = 9.0


# ---------------------------------------------------------------------------
# Verdict vocabulary
# ---------------------------------------------------------------------------


class Verdict(str, enum.Enum):
    """Whether an estimate may be used."""

    ACCEPTED = "accepted"
    REJECTED = "rejected"

    def __str__(self) -> str:  # the value, as StrEnum does (numpy compares via str)
        return self.value


class RejectionReason(str, enum.Enum):
    """Why an estimate was rejected (``NONE`` for accepted estimates)."""

    NONE = "none"
    TOO_FEW_POINTS = "too_few_points"
    FIT_FAILED = "fit_failed"
    NO_SIGNAL = "no_signal"
    SATURATED = "saturated"
    OUTSIDE_REGION = "outside_region"
    MODEL_MISMATCH = "model_mismatch"

    def __str__(self) -> str:
        return self.value


# Integer codes used inside batch arrays; index into this tuple.
_REASONS: tuple[RejectionReason, ...] = tuple(RejectionReason)
_CODE = {r: i for i, r in enumerate(_REASONS)}


def _verdict_for(reason: RejectionReason) -> Verdict:
    """``accepted`` when nothing rejected the estimate, else ``rejected``."""
    return Verdict.ACCEPTED if reason is RejectionReason.NONE else Verdict.REJECTED


class RejectedEstimateError(XtalkcalError, ValueError):
    """A value was requested from an estimate whose verdict is *rejected*."""


@dataclass(frozen=True)
class VerdictRules:
    """The thresholds behind every verdict.

    Parameters
    ----------
    min_points : int
        Fewer sweep points than this (or than the number of free parameters
        plus one) is ``too_few_points``.
    min_curvature_snr : float
        The curvature must exceed this many of its standard errors
        (``kappa / stderr(kappa)``), else ``no_signal``. For ring fits the
        same threshold applies to the sinusoid amplitude.
    region_margin : float
        The null must lie inside the bounding box of the sweep points, each
        side pushed out by this fraction of the box width, *and* inside the
        circle about the points' centroid through the farthest point, radius
        enlarged by this fraction; else ``outside_region``.
    mismatch_pvalue : float
        When the noise level is known (sigma given, or binomial counts), a
        chi-square tail probability below this is ``model_mismatch``.
    saturation_phase : float
        Saturating model only (radians): if even the sweep point nearest the
        null has ``K * sqrt(kappa/A) * |z - z*|`` above this, the signal there
        is more than half-way up the fringe (``pi/4`` -> ``S0 + A/2``), the data
        never came near the floor, and the verdict is ``saturated``.
    saturation_floor : float
        Binomial nonlinear fits: a fitted floor at or above this probability
        means the signal is pinned near its ceiling (no null in view):
        ``saturated``.
    """

    min_points: int = 5
    min_curvature_snr: float = 3.0
    region_margin: float = 0.1
    mismatch_pvalue: float = 1e-3
    saturation_phase: float = math.pi / 4
    saturation_floor: float = 0.9


DEFAULT_RULES = VerdictRules()
