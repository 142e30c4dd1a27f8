"""Fits of sweep data: paraboloid, ring, nonlinear and column fits of a cancellation null, their
estimates and the verdicts that accept or reject them. Pure numerics: no rig, no files.

May import: :mod:`xtalkcal.common` and :mod:`xtalkcal.exceptions` only. Nothing here imports a
later stage of the flow.
"""

from xtalkcal.fits.column import (
    ColumnNullFit,
    column_rejected,
    fit_paraboloid_column,
    linearise_fringe,
)
from xtalkcal.fits.estimates import (
    NullEstimate,
    NullFitValues,
    ParaboloidBatch,
    RingBatch,
    RingEstimate,
    RingValues,
)
from xtalkcal.fits.null_binomial import (
    fit_null,
)
from xtalkcal.fits.null_lsq import (
    fit_null_gaussian,
)
from xtalkcal.fits.null_model import (
    fisher_covariance,
    null_signal,
    null_signal_jacobian,
)
from xtalkcal.fits.paraboloid import (
    binomial_signal,
    fit_paraboloid,
    fit_paraboloid_counts,
)
from xtalkcal.fits.ring import (
    WRAP_JUMP_RAD,
    fit_ring,
    ring_wraps,
)
from xtalkcal.fits.verdicts import (
    DEFAULT_RULES,
    NullModel,
    RejectedEstimateError,
    RejectionReason,
    Verdict,
    VerdictRules,
)

__all__ = [
    "fisher_covariance",
    "null_signal_jacobian",
    "DEFAULT_RULES",
    "NullModel",
    "RejectedEstimateError",
    "RejectionReason",
    "Verdict",
    "VerdictRules",
    "NullEstimate",
    "NullFitValues",
    "ParaboloidBatch",
    "RingBatch",
    "RingEstimate",
    "RingValues",
    "fit_ring",
    "ring_wraps",
    "WRAP_JUMP_RAD",
    "fit_null",
    "fit_null_gaussian",
    "null_signal",
    "ColumnNullFit",
    "column_rejected",
    "fit_paraboloid_column",
    "linearise_fringe",
    "binomial_signal",
    "fit_paraboloid",
    "fit_paraboloid_counts",
]
