"""The vocabulary of a re-check: its decisions and follow-ups, the rules behind a decision and
the outcome record of one pair's re-check.
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from xtalkcal.common import (
    json_float,
    readonly,
)
from xtalkcal.drift.inputs import DriftInputError
from xtalkcal.fits import RejectionReason

OUTCOME_FORMAT = "xtalkcal-recheck-outcome"  # written before as schema "xtalkcal.recheck_outcome"
OUTCOME_VERSION = 1


class RecheckDecision(str, enum.Enum):
    """What a re-check says about a pair's stored compensation."""

    WITHIN = "within"  # residual inside the tolerance: keep the stored value
    DRIFTED = "drifted"  # residual above the tolerance: re-centre or recalibrate the pair
    BROKEN = "broken"  # the re-check itself failed: escalate to a full calibration

    def __str__(self) -> str:
        return self.value


class FollowUp(str, enum.Enum):
    """Work a pair needs before its next re-check."""

    NONE = "none"
    RECENTRE = "recentre"  # adopt the re-check's null estimate (cheap)
    RECALIBRATE = "recalibrate"  # run the full null search for the pair

    def __str__(self) -> str:
        return self.value


@dataclass(frozen=True)
class RecheckRules:
    """Thresholds behind a re-check decision.

    Parameters
    ----------
    min_curvature_snr : float
        ``kappa / stderr(kappa)`` below this is "not significantly positive" (broken). Same
        default as :class:`xtalkcal.fits.VerdictRules`.
    mismatch_pvalue : float
        A chi-square tail probability of the residuals below this rejects the fit (broken).
    region_factor : float
        The null has left the probed region when ``|d| > region_factor * rho`` (``rho``: the
        largest distance of a probe point from the stored null). Beyond about ``2 rho`` the
        ring sees the null from outside and the paraboloid no longer describes the landscape
        it probes (common practice: trust a quadratic model only inside or near the points).
    confidence_sigma : float
        ``k`` in the confidence statements ``|dX| - k sigma > tol`` (confidently drifted) and
        ``|dX| + k sigma < tol`` (confidently within).
    prior_consistency_sigma : float
        With a curvature prior: the data's own curvature must agree with the prior within this
        many combined standard errors, else the landscape changed since the calibration
        (broken).
    comfort_db : float
        A "within" is comfortable when the upper bound ``|dX| + k sigma`` is at least this many
        dB below the tolerance (6 dB: a factor 2 in amplitude). Used by `next_check`.
    curvature_ratio : float
        A data curvature that disagrees with the prior (``prior_consistency_sigma``) but lies
        within this factor of it widens the prior (its stderr becomes the gap) instead of
        judging the re-check broken: the landscape is the same paraboloid, its curvature
        moved with the drift (a qubit's wander changes its detuning from the aggressor, so
        its response), and a ring's saturating signal reads a little lower than the
        calibration's wider sweep. Beyond the factor the landscape changed.
    """

    min_curvature_snr: float = 3.0
    mismatch_pvalue: float = 1e-3
    region_factor: float = 2.0
    confidence_sigma: float = 2.0
    prior_consistency_sigma: float = 4.0
    comfort_db: float = 6.0
    curvature_ratio: float = 1.5

    def __post_init__(self) -> None:
        for name in (
            "min_curvature_snr",
            "region_factor",
            "confidence_sigma",
            "prior_consistency_sigma",
        ):
            v = getattr(self, name)
            if not (math.isfinite(v) and v > 0):
                raise DriftInputError(f"RecheckRules.{name} must be positive and finite, got {v!r}")
        if not 0 < self.mismatch_pvalue < 1:
            raise DriftInputError(
                f"RecheckRules.mismatch_pvalue must lie in (0, 1), got {self.mismatch_pvalue!r}"
            )
        if not (math.isfinite(self.curvature_ratio) and self.curvature_ratio >= 1):
            raise DriftInputError(
                f"RecheckRules.curvature_ratio must be >= 1 and finite, got "
                f"{self.curvature_ratio!r}"
            )
        if not (math.isfinite(self.comfort_db) and self.comfort_db >= 0):
            raise DriftInputError(
                f"RecheckRules.comfort_db must be >= 0 and finite, got {self.comfort_db!r}"
            )


DEFAULT_RECHECK_RULES = RecheckRules()


@dataclass(frozen=True, eq=False)
class RecheckOutcome:
    """Result of one re-check of one pair.

    For a ``broken`` outcome the numbers are diagnostics only (NaN where the fit could not
    produce them); never store or act on them.

    Attributes
    ----------
    decision : RecheckDecision
    reason : str
        One human sentence on the decision, with the numbers behind it.
    cause : xtalkcal.fits.RejectionReason
        Why the fit behind a ``broken`` outcome was rejected (``NONE`` otherwise).
    confident : bool
        ``drifted``: ``|dX| - k sigma > tol``; ``within``: ``|dX| + k sigma < tol``
        (``k = rules.confidence_sigma``); always False for ``broken``.
    comfortable : bool
        ``within`` with the upper bound ``|dX| + k sigma`` at least ``rules.comfort_db`` below
        the tolerance.
    shift : complex
        ``dX = -d/A``: change of the crosstalk element since the stored value (dimensionless).
    shift_covariance : ndarray, shape (2, 2)
        Covariance of ``(Re dX, Im dX)``.
    residual, residual_stderr : float
        ``|dX|`` (linear) and its delta-method standard error.
    residual_db, residual_db_stderr : float
        ``20 log10 |dX|`` and ``(20/ln 10) stderr/|dX|``, dB (the dB stderr is only meaningful
        when ``|dX|`` is several standard errors from zero).
    residual_upper_db : float
        ``20 log10(|dX| + k sigma)``, dB: the bound used for confidence and comfort.
    null_shift : complex
        ``d = z* - z_s`` (fraction of full scale).
    z_null : complex
        ``z_s + d``: the re-check's estimate of the current null (what re-centring adopts).
    null_covariance : ndarray, shape (2, 2)
        Covariance of ``(Re d, Im d)`` (full-scale fraction squared).
    curvature, curvature_stderr : float
        ``kappa`` as estimated (with the prior, if one was given), signal per full-scale
        fraction squared, at the probe's amplification.
    data_curvature, data_curvature_stderr : float
        ``kappa`` from the re-check data alone (NaN if they do not determine it).
    floor, floor_stderr : float
        ``S0`` (signal units).
    reduced_chi2 : float
        Chi-square per degree of freedom (NaN with no degrees of freedom).
    dof : int
    n_points : int
    probe_radius : float
        Largest distance of a probe point from the stored null, ``rho``.
    tolerance_db : float
    amplitude : complex
        Aggressor amplitude ``A`` used to convert null shifts to ``dX``.
    used_prior : bool
        True if a curvature prior entered the estimate.
    """

    decision: RecheckDecision
    reason: str
    cause: RejectionReason
    confident: bool
    comfortable: bool
    shift: complex
    shift_covariance: NDArray[np.float64]
    residual: float
    residual_stderr: float
    residual_db: float
    residual_db_stderr: float
    residual_upper_db: float
    null_shift: complex
    z_null: complex
    null_covariance: NDArray[np.float64]
    curvature: float
    curvature_stderr: float
    data_curvature: float
    data_curvature_stderr: float
    floor: float
    floor_stderr: float
    reduced_chi2: float
    dof: int
    n_points: int
    probe_radius: float
    tolerance_db: float
    amplitude: complex
    used_prior: bool

    def __post_init__(self) -> None:
        object.__setattr__(self, "shift_covariance", readonly(self.shift_covariance))
        object.__setattr__(self, "null_covariance", readonly(self.null_covariance))

    @property
    def shift_stderr(self) -> tuple[float, float]:
        """Standard errors of ``(Re dX, Im dX)``."""
        c = self.shift_covariance
        return (float(math.sqrt(max(c[0, 0], 0.0))), float(math.sqrt(max(c[1, 1], 0.0))))

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able record (non-finite numbers as ``None``)."""

        def cplx(v: complex) -> list[float | None]:
            return [json_float(v.real), json_float(v.imag)]

        def mat(m: NDArray[np.float64]) -> list[list[float | None]]:
            return [[json_float(x) for x in row] for row in m]

        return {
            "format": OUTCOME_FORMAT,
            "version": OUTCOME_VERSION,
            "decision": self.decision.value,
            "reason": self.reason,
            "cause": self.cause.value,
            "confident": self.confident,
            "comfortable": self.comfortable,
            "shift": cplx(self.shift),
            "shift_covariance": mat(self.shift_covariance),
            "residual": json_float(self.residual),
            "residual_stderr": json_float(self.residual_stderr),
            "residual_db": json_float(self.residual_db),
            "residual_db_stderr": json_float(self.residual_db_stderr),
            "residual_upper_db": json_float(self.residual_upper_db),
            "null_shift": cplx(self.null_shift),
            "z_null": cplx(self.z_null),
            "null_covariance": mat(self.null_covariance),
            "curvature": json_float(self.curvature),
            "curvature_stderr": json_float(self.curvature_stderr),
            "data_curvature": json_float(self.data_curvature),
            "data_curvature_stderr": json_float(self.data_curvature_stderr),
            "floor": json_float(self.floor),
            "floor_stderr": json_float(self.floor_stderr),
            "reduced_chi2": json_float(self.reduced_chi2),
            "dof": int(self.dof),
            "n_points": int(self.n_points),
            "probe_radius": json_float(self.probe_radius),
            "tolerance_db": float(self.tolerance_db),
            "amplitude": cplx(self.amplitude),
            "used_prior": self.used_prior,
        }

