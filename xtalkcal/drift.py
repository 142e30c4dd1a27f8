"""Drift logic: few-point re-checks, per-pair trends, and the adaptive re-check schedule.

Pure and hardware-free. This module turns numbers into decisions; the code that plays a
re-check on a rig, fits its counts and writes the ledger lives elsewhere and calls in here.
It imports only :mod:`xtalkcal.fit` vocabulary, :mod:`xtalkcal.exceptions` and, for type hints
only, :mod:`xtalkcal.ledger` and :mod:`xtalkcal.protocol` (the protocol module pulls in the
probes, which this layer must not load).

Three pieces
------------
``analyse_recheck``
    A re-check measures the pair's error signal at a few cancellation-tone points around the
    stored null ``z_s`` (a small ring of radius ``rho`` plus its centre), with the same probe
    settings as the calibration. Near the null ``S(z) = S0 + kappa |z - z*|**2``; with
    ``d = z* - z_s`` and ``w = z - z_s`` this is linear in ``(1, Re w, Im w, |w|**2)``::

        S = [S0 + kappa |d|**2] - 2 kappa Re(d) Re(w) - 2 kappa Im(d) Im(w) + kappa |w|**2

    so on a ring point ``w = rho e^{i theta}``: ``S = S0 + kappa (rho**2 + |d|**2)
    - 2 kappa rho Re(d e^{-i theta})`` and at the centre ``S0 + kappa |d|**2``. The crosstalk
    element is ``X = -z*/A`` (``A``: aggressor amplitude), so the shift of X since the stored
    value is ``dX = -d/A``; the stored compensation ``r = -X_s`` leaves the residual
    ``|X + r| = |dX|``. A decision follows (within tolerance / drifted / broken).
``pair_trend``
    From a pair's accepted history: rates of phase (rad/h) and log-magnitude (dB/h) with
    standard errors, random-walk diffusion constants, and the predicted time until the stored
    compensation leaves tolerance.
``next_check`` and ``Schedule``
    Adaptive intervals within the protocol's ``[min_interval_hours, max_interval_hours]`` and a
    per-pair table of due times (rig clock, s) kept on disk as JSON between runs.

Units: rig time in s (``measured_at_s``, ``now_s``), intervals and rates per hour, phases in
rad, magnitudes linear inside and dB (``20 log10``) in the reported views.
"""

from __future__ import annotations

import contextlib
import dataclasses
import enum
import json
import math
import os
import uuid
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import linalg, optimize, stats

from xtalkcal.exceptions import ConfigError, XtalkcalError
from xtalkcal.fit import RejectionReason, _json_float, _readonly, binomial_signal
from xtalkcal.tomlfields import (
    RECHECK_INTERVAL_RANGE_H,
    RIG_TIME_RANGE_S,
    load_json,
    name_problem,
    parse_json,
    short_repr,
)

if TYPE_CHECKING:
    from xtalkcal.chip import Chip
    from xtalkcal.ledger import LedgerEntry
    from xtalkcal.protocol import RecheckSettings

__all__ = [
    # vocabulary
    "RecheckDecision",
    "FollowUp",
    "RecheckRules",
    "DriftInputError",
    "ScheduleFileError",
    # re-check analysis
    "RecheckOutcome",
    "analyse_recheck",
    "analyse_recheck_counts",
    "recheck_design",
    "recheck_radius",
    # trends
    "RandomWalkRate",
    "PairTrend",
    "pair_trend",
    # schedule
    "NextCheck",
    "next_check",
    "PairSlot",
    "Schedule",
    "SCHEDULE_FORMAT",
    "SCHEDULE_SCHEMA_VERSION",
]

_DB_PER_NEPER = 20.0 / math.log(10.0)  # dB of amplitude per unit of ln|X|
_SECONDS_PER_HOUR = 3600.0


class DriftInputError(XtalkcalError, ValueError):
    """Data handed to the drift logic has the wrong shape, non-finite values or mixed pairs."""


class ScheduleFileError(ConfigError):
    """A schedule file or record is malformed: names the file, the field and what is accepted.

    A :class:`~xtalkcal.exceptions.ConfigError` (``source``, ``field``, ``problem``).
    """


# --------------------------------------------------------------------------------------------
# Vocabulary
# --------------------------------------------------------------------------------------------


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
        default as :class:`xtalkcal.fit.VerdictRules`.
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
    """

    min_curvature_snr: float = 3.0
    mismatch_pvalue: float = 1e-3
    region_factor: float = 2.0
    confidence_sigma: float = 2.0
    prior_consistency_sigma: float = 4.0
    comfort_db: float = 6.0

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
        if not (math.isfinite(self.comfort_db) and self.comfort_db >= 0):
            raise DriftInputError(
                f"RecheckRules.comfort_db must be >= 0 and finite, got {self.comfort_db!r}"
            )


DEFAULT_RECHECK_RULES = RecheckRules()


def _db(x: float) -> float:
    return 20.0 * math.log10(x) if x > 0 else -math.inf


def _lin(db: float) -> float:
    return 10.0 ** (db / 20.0)


def _finite_real(name: str, v: object) -> float:
    if isinstance(v, bool):
        raise DriftInputError(f"{name} must be a real number, got bool")
    try:
        f = float(v)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise DriftInputError(f"{name} must be a real number, got {type(v).__name__}") from None
    if not math.isfinite(f):
        raise DriftInputError(f"{name} must be finite, got {f!r}")
    return f


def _check_tolerance(tolerance_db: float) -> float:
    tol = _finite_real("tolerance_db", tolerance_db)
    if tol >= 0:
        raise DriftInputError(f"tolerance_db must be negative (a residual below 1), got {tol!r}")
    return tol


def _mag_stderr(v: complex, cov: NDArray[np.float64]) -> float:
    """Standard error of ``|v|`` by the delta method (largest axis when ``v = 0``)."""
    m = abs(v)
    if not np.all(np.isfinite(cov)):
        return math.nan
    if m > 0:
        u = np.array([v.real, v.imag]) / m
        return float(math.sqrt(max(u @ cov @ u, 0.0)))
    return float(math.sqrt(max(np.linalg.eigvalsh(cov)[-1], 0.0)))


# --------------------------------------------------------------------------------------------
# Re-check designs
# --------------------------------------------------------------------------------------------


def recheck_design(
    z_stored: complex, radius: float, ring_points: int, *, phase0: float = 0.0
) -> NDArray[np.complex128]:
    """Probe points of a re-check: a ring about the stored null, then its centre.

    Parameters
    ----------
    z_stored : complex
        Stored null (cancellation-tone amplitude, fraction of full scale).
    radius : float
        Ring radius ``rho`` (fraction of full scale), > 0.
    ring_points : int
        Points on the ring, >= 3 (uniform spacing, so the first harmonic that carries the
        shift is orthogonal to the ring mean).
    phase0 : float
        Angle of the first ring point (rad).

    Returns
    -------
    ndarray of complex, shape (ring_points + 1,)
        The ring points in angle order, the centre ``z_stored`` last.
    """
    rho = _finite_real("radius", radius)
    if rho <= 0:
        raise DriftInputError(f"radius must be positive, got {rho!r}")
    if int(ring_points) != ring_points or ring_points < 3:
        raise DriftInputError(f"ring_points must be an integer >= 3, got {ring_points!r}")
    theta = phase0 + 2 * np.pi * np.arange(int(ring_points)) / int(ring_points)
    zs = complex(z_stored)
    return np.concatenate([zs + rho * np.exp(1j * theta), [zs]]).astype(np.complex128)


def recheck_radius(
    amplitude: complex,
    tolerance_db: float,
    *,
    floor: float,
    curvature: float,
    max_signal_rise: float = 0.25,
) -> float:
    """A ring radius for re-checks of one pair (fraction of full scale).

    ``rho = max(|A| * tol, sqrt(S0/kappa))``, capped at ``sqrt(max_signal_rise/kappa)``:

    * ``|A| * tol`` is the null shift at which the residual reaches the tolerance; with the
      broken rule at ``2 rho`` the ring then classifies shifts up to twice the tolerance
      (+6 dB) as drifted rather than broken.
    * ``sqrt(S0/kappa)`` is the floor knee: for binomial signals the information per ring
      point on the null position rises as ``rho**2 / (S0/kappa + rho**2)``, half its plateau at
      the knee (see :func:`xtalkcal.design.optimal_ring_radius`).
    * the cap keeps the ring signal ``kappa rho**2`` in the region where a driven fringe
      ``sin(u)**2`` is close to its quadratic start (at ``u**2 = 0.25`` it is 8 % low).

    Parameters
    ----------
    amplitude : complex
        Aggressor amplitude ``A`` of the probe (fraction of full scale).
    tolerance_db : float
        Allowed residual ``|X + r|``, dB (negative).
    floor : float
        Signal at the null ``S0`` (signal units, >= 0).
    curvature : float
        ``kappa`` at the probe's amplification (signal per full-scale fraction squared), > 0.
    max_signal_rise : float
        Largest ``kappa rho**2`` allowed (signal units).
    """
    tol = _lin(_check_tolerance(tolerance_db))
    a = abs(complex(amplitude))
    kap = _finite_real("curvature", curvature)
    s0 = _finite_real("floor", floor)
    if a <= 0 or kap <= 0 or s0 < 0 or not max_signal_rise > 0:
        raise DriftInputError(
            "need |amplitude| > 0, curvature > 0, floor >= 0 and max_signal_rise > 0; got "
            f"{a!r}, {kap!r}, {s0!r}, {max_signal_rise!r}"
        )
    rho = max(a * tol, math.sqrt(s0 / kap))
    return float(min(rho, math.sqrt(max_signal_rise / kap)))


# --------------------------------------------------------------------------------------------
# Re-check analysis
# --------------------------------------------------------------------------------------------


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
    cause : xtalkcal.fit.RejectionReason
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
        object.__setattr__(self, "shift_covariance", _readonly(self.shift_covariance))
        object.__setattr__(self, "null_covariance", _readonly(self.null_covariance))

    @property
    def shift_stderr(self) -> tuple[float, float]:
        """Standard errors of ``(Re dX, Im dX)``."""
        c = self.shift_covariance
        return (float(math.sqrt(max(c[0, 0], 0.0))), float(math.sqrt(max(c[1, 1], 0.0))))

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able record (non-finite numbers as ``None``)."""

        def cplx(v: complex) -> list[float | None]:
            return [_json_float(v.real), _json_float(v.imag)]

        def mat(m: NDArray[np.float64]) -> list[list[float | None]]:
            return [[_json_float(x) for x in row] for row in m]

        return {
            "schema": "xtalkcal.recheck_outcome",
            "schema_version": 1,
            "decision": self.decision.value,
            "reason": self.reason,
            "cause": self.cause.value,
            "confident": self.confident,
            "comfortable": self.comfortable,
            "shift": cplx(self.shift),
            "shift_covariance": mat(self.shift_covariance),
            "residual": _json_float(self.residual),
            "residual_stderr": _json_float(self.residual_stderr),
            "residual_db": _json_float(self.residual_db),
            "residual_db_stderr": _json_float(self.residual_db_stderr),
            "residual_upper_db": _json_float(self.residual_upper_db),
            "null_shift": cplx(self.null_shift),
            "z_null": cplx(self.z_null),
            "null_covariance": mat(self.null_covariance),
            "curvature": _json_float(self.curvature),
            "curvature_stderr": _json_float(self.curvature_stderr),
            "data_curvature": _json_float(self.data_curvature),
            "data_curvature_stderr": _json_float(self.data_curvature_stderr),
            "floor": _json_float(self.floor),
            "floor_stderr": _json_float(self.floor_stderr),
            "reduced_chi2": _json_float(self.reduced_chi2),
            "dof": int(self.dof),
            "n_points": int(self.n_points),
            "probe_radius": _json_float(self.probe_radius),
            "tolerance_db": float(self.tolerance_db),
            "amplitude": cplx(self.amplitude),
            "used_prior": self.used_prior,
        }


def _as_1d(name: str, a: ArrayLike, *, complex_ok: bool) -> NDArray[Any]:
    arr = np.asarray(a)
    kinds = "biufc" if complex_ok else "biuf"
    if arr.dtype.kind not in kinds:
        raise DriftInputError(f"{name} must be numeric, got dtype {arr.dtype}")
    if arr.ndim != 1:
        raise DriftInputError(f"{name} must be 1-D (one re-check), got shape {arr.shape}")
    arr = arr.astype(np.complex128 if complex_ok else float)
    if not np.all(np.isfinite(arr)):
        raise DriftInputError(f"{name} contains non-finite values")
    return arr


def _parse_prior(prior: float | tuple[float, float] | None) -> tuple[float, float] | None:
    if prior is None:
        return None
    if isinstance(prior, tuple | list):
        if len(prior) != 2:
            raise DriftInputError(
                f"curvature_prior must be kappa or (kappa, stderr), got {len(prior)} values"
            )
        k, s = _finite_real("curvature_prior[0]", prior[0]), _finite_real(
            "curvature_prior[1]", prior[1]
        )
    else:
        k, s = _finite_real("curvature_prior", prior), 0.0
    if k <= 0 or s < 0:
        raise DriftInputError(
            f"curvature_prior needs kappa > 0 and stderr >= 0, got kappa={k!r}, stderr={s!r}"
        )
    return k, s


def _wls(
    basis: NDArray[np.float64],
    s: NDArray[np.float64],
    w: NDArray[np.float64],
    extra_info: NDArray[np.float64] | None = None,
    extra_rhs: NDArray[np.float64] | None = None,
) -> tuple[NDArray[np.float64], NDArray[np.float64]] | None:
    """Weighted least squares (optionally with Gaussian prior terms); None if singular."""
    m = basis.T @ (basis * w[:, None])
    rhs = basis.T @ (w * s)
    if extra_info is not None and extra_rhs is not None:
        m = m + extra_info
        rhs = rhs + extra_rhs
    d = np.sqrt(np.clip(np.diag(m), 1e-300, None))
    mn = m / np.outer(d, d)
    ev = np.linalg.eigvalsh(mn)
    if not ev[0] > 1e-10 * ev[-1]:
        return None
    inv = np.linalg.inv(mn) / np.outer(d, d)
    return inv @ rhs, inv


def analyse_recheck(
    z_points: ArrayLike,
    signal: ArrayLike,
    stderr: ArrayLike,
    z_stored: complex,
    amplitude: complex,
    *,
    tolerance_db: float,
    curvature_prior: float | tuple[float, float] | None = None,
    rules: RecheckRules = DEFAULT_RECHECK_RULES,
) -> RecheckOutcome:
    """Estimate how far a pair's null moved since calibration, and decide what to do.

    The paraboloid ``S = c0 + c1 x + c2 y + c3 (x**2 + y**2)`` in ``w = z - z_s = x + i y``
    (coordinates scaled by the probe radius for conditioning) is fitted by weighted linear
    least squares with weights ``1/stderr**2``; then ``kappa = c3``,
    ``d = -(c1 + i c2)/(2 kappa)``, ``S0 = c0 - kappa |d|**2`` and ``dX = -d/A``, with
    covariances by the delta method (``d`` is a ratio; its Gaussian error is good when
    ``kappa`` is many standard errors from zero, which the broken rule below enforces).

    With ``curvature_prior = (kappa_p, sigma_p)`` from the calibration (at the same
    amplification), the prior enters as one more Gaussian observation of ``c3`` (a ridge term
    in the normal equations); ``kappa_p`` alone (or ``sigma_p = 0``) holds ``kappa`` fixed.
    On a ring centred on ``z_s`` the shift comes from the first harmonic (``c1, c2``) and
    ``kappa`` from the ring mean minus the centre, so a noisy centre point makes ``kappa`` -
    and through the ratio, ``d`` - noisy; the prior removes that noise.

    Decision rules, first match wins (``tol = 10**(tolerance_db/20)``, ``k`` =
    ``rules.confidence_sigma``, ``sigma`` = stderr of ``|dX|``):

    1. **broken**, fit rejected: fewer points than parameters (4, or 3 with a fixed
       curvature: ``too_few_points``), or a design that does not determine them
       (``fit_failed``).
    2. **broken**, with a prior: the data's own ``kappa`` differs from the prior by more than
       ``rules.prior_consistency_sigma`` combined standard errors (the landscape changed:
       ``model_mismatch``).
    3. **broken**, fit rejected: the chi-square tail probability (data, plus the prior's
       pull when a prior is given) is below ``rules.mismatch_pvalue`` (``model_mismatch``).
    4. **broken**, ``kappa / stderr(kappa) < rules.min_curvature_snr``: the curvature is not
       significantly positive (``no_signal``). With a prior this uses the combined estimate,
       so a flat landscape is caught only as far as rule 2's data-only ``kappa`` resolves it.
    5. **broken**, ``|d| > rules.region_factor * rho``: the null left the probed region
       (``outside_region``); the ring cannot measure such a shift.
    6. **drifted**, ``|dX| > tol`` (the point estimate exceeds the tolerance); ``confident``
       if also ``|dX| - k sigma > tol``.
    7. **within** otherwise; ``confident`` if ``|dX| + k sigma < tol``; ``comfortable`` if
       ``|dX| + k sigma`` is at least ``rules.comfort_db`` below ``tol``.

    Parameters
    ----------
    z_points : array_like of complex, shape (n,)
        Cancellation-tone amplitudes probed (fraction of full scale), e.g. from
        :func:`recheck_design`.
    signal : array_like of float, shape (n,)
        Error signal at each point (probability, or rad for a Stark phase), oriented so the
        null is a minimum.
    stderr : array_like of float, shape (n,) or scalar
        Standard error of each signal value (same units), > 0. For binomial counts use
        :func:`analyse_recheck_counts`, which weights by the model's variance.
    z_stored : complex
        The stored null ``z_s`` the re-check was centred on (fraction of full scale).
    amplitude : complex
        Aggressor amplitude ``A`` of the probe (fraction of full scale), as in the calibration.
    tolerance_db : float
        Allowed residual crosstalk ``|X + r|``, dB (negative), e.g. the protocol's
        ``RecheckSettings.tolerance_db``.
    curvature_prior : float or (float, float), optional
        Calibration's ``kappa`` (and its stderr) at the same amplification.
    rules : RecheckRules
        Decision thresholds.

    Returns
    -------
    RecheckOutcome

    Raises
    ------
    DriftInputError
        Shapes that differ, non-finite values, non-positive stderr, ``A = 0``, a
        non-negative tolerance or an invalid prior.

    Examples
    --------
    >>> import numpy as np
    >>> z = recheck_design(-0.008 + 0.002j, 0.004, 6)
    >>> s = 0.01 + 5000.0 * np.abs(z - (-0.008 + 0.002j + 0.001)) ** 2
    >>> out = analyse_recheck(z, s, 0.003, -0.008 + 0.002j, 0.8, tolerance_db=-45.0)
    >>> out.decision.value, round(out.shift.real, 6)
    ('within', -0.00125)
    """
    za = _as_1d("z_points", z_points, complex_ok=True)
    sa = _as_1d("signal", signal, complex_ok=False)
    sg_in = np.asarray(stderr)
    if sg_in.ndim == 0:
        sg_in = np.full(sa.shape, float(sg_in))
    sg = _as_1d("stderr", sg_in, complex_ok=False)
    if not (za.shape == sa.shape == sg.shape):
        raise DriftInputError(
            f"z_points, signal and stderr must have one value per point, got shapes "
            f"{za.shape}, {sa.shape}, {sg.shape}"
        )
    if np.any(sg <= 0):
        raise DriftInputError("stderr must be positive at every point")
    zs = complex(z_stored)
    amp = complex(amplitude)
    if not (math.isfinite(zs.real) and math.isfinite(zs.imag)):
        raise DriftInputError(f"z_stored must be finite, got {zs!r}")
    if not (math.isfinite(amp.real) and math.isfinite(amp.imag)) or amp == 0:
        raise DriftInputError(f"amplitude must be finite and non-zero, got {amp!r}")
    tol_db = _check_tolerance(tolerance_db)
    tol = _lin(tol_db)
    prior = _parse_prior(curvature_prior)

    n = za.size
    wz = za - zs
    rho = float(np.max(np.abs(wz))) if n else 0.0
    nan2 = np.full((2, 2), math.nan)
    nanc = complex(math.nan, math.nan)

    def outcome(
        decision: RecheckDecision,
        reason: str,
        cause: RejectionReason = RejectionReason.NONE,
        **numbers: Any,
    ) -> RecheckOutcome:
        base: dict[str, Any] = dict(
            confident=False,
            comfortable=False,
            shift=nanc,
            shift_covariance=nan2,
            residual=math.nan,
            residual_stderr=math.nan,
            residual_db=math.nan,
            residual_db_stderr=math.nan,
            residual_upper_db=math.nan,
            null_shift=nanc,
            z_null=nanc,
            null_covariance=nan2,
            curvature=math.nan,
            curvature_stderr=math.nan,
            data_curvature=math.nan,
            data_curvature_stderr=math.nan,
            floor=math.nan,
            floor_stderr=math.nan,
            reduced_chi2=math.nan,
            dof=n - 4 + (1 if prior is not None else 0),
        )
        base.update(numbers)
        return RecheckOutcome(
            decision=decision,
            reason=reason,
            cause=cause,
            n_points=n,
            probe_radius=rho,
            tolerance_db=tol_db,
            amplitude=amp,
            used_prior=prior is not None,
            **base,
        )

    fixed = prior is not None and prior[1] == 0.0
    n_par = 3 if fixed else 4
    if n < n_par:
        return outcome(
            RecheckDecision.BROKEN,
            f"{n} probe points; the re-check needs at least {n_par}",
            RejectionReason.TOO_FEW_POINTS,
        )
    if not rho > 0:
        return outcome(
            RecheckDecision.BROKEN,
            "all probe points sit on the stored null; a ring around it is needed",
            RejectionReason.FIT_FAILED,
        )

    # Scaled coordinates: the normal equations stay well conditioned whatever the amplitude
    # scale; c3 is then kappa * rho**2.
    x, y = wz.real / rho, wz.imag / rho
    r2 = x * x + y * y
    w = 1.0 / (sg * sg)
    full_basis = np.stack([np.ones(n), x, y, r2], axis=-1)

    data_fit = _wls(full_basis, sa, w) if n >= 4 else None
    data_k = data_k_se = math.nan
    if data_fit is not None:
        data_k = float(data_fit[0][3]) / rho**2
        data_k_se = math.sqrt(max(data_fit[1][3, 3], 0.0)) / rho**2

    prior_chi2 = 0.0
    if prior is None:
        sol = data_fit
    elif fixed:
        kp = prior[0] * rho**2
        part = _wls(full_basis[:, :3], sa - kp * r2, w)
        if part is None:
            sol = None
        else:
            coef3, inv3 = part
            coef = np.append(coef3, kp)
            inv = np.zeros((4, 4))
            inv[:3, :3] = inv3
            sol = (coef, inv)
    else:
        kp, sp = prior[0] * rho**2, prior[1] * rho**2
        info = np.zeros((4, 4))
        info[3, 3] = 1.0 / sp**2
        rhs = np.zeros(4)
        rhs[3] = kp / sp**2
        sol = _wls(full_basis, sa, w, info, rhs)
        if sol is not None:
            prior_chi2 = float((sol[0][3] - kp) ** 2 / sp**2)

    if sol is None:
        return outcome(
            RecheckDecision.BROKEN,
            "the probe points do not determine the paraboloid (degenerate design)",
            RejectionReason.FIT_FAILED,
            data_curvature=data_k,
            data_curvature_stderr=data_k_se,
        )
    coef, cov_c = sol
    c0, c1, c2, c3 = (float(c) for c in coef)
    resid = sa - full_basis @ coef
    chi2 = float(np.sum(w * resid * resid)) + prior_chi2
    dof = n - 4 + (1 if prior is not None else 0)
    redchi = chi2 / dof if dof > 0 else math.nan
    pvalue = float(stats.chi2.sf(chi2, dof)) if dof > 0 else math.nan

    kappa = c3 / rho**2
    kappa_se = math.sqrt(max(cov_c[3, 3], 0.0)) / rho**2
    with np.errstate(divide="ignore", invalid="ignore"):
        dxn, dyn = -c1 / (2 * c3), -c2 / (2 * c3)
        # Jacobian of (Re d, Im d) (scaled units) with respect to (c0, c1, c2, c3).
        jac = np.array(
            [[0.0, -1 / (2 * c3), 0.0, -dxn / c3], [0.0, 0.0, -1 / (2 * c3), -dyn / c3]]
        )
        cov_dn = jac @ cov_c @ jac.T
    # S0 = c0 - c3 |d|^2 with d = -(c1, c2)/(2 c3):  S0 = c0 - (c1^2 + c2^2)/(4 c3).
    with np.errstate(divide="ignore", invalid="ignore"):
        js = np.array(
            [1.0, -c1 / (2 * c3), -c2 / (2 * c3), (c1 * c1 + c2 * c2) / (4 * c3 * c3)]
        )
        floor = c0 - (c1 * c1 + c2 * c2) / (4 * c3)
    floor_se = math.sqrt(max(float(js @ cov_c @ js), 0.0)) if np.all(np.isfinite(js)) else math.nan

    d = complex(dxn, dyn) * rho
    cov_d = cov_dn * rho**2
    # dX = -d / A: multiplication by the complex number m = -1/A is the real 2x2 matrix
    # [[Re m, -Im m], [Im m, Re m]] acting on (Re d, Im d).
    mult = -1.0 / amp
    rot = np.array([[mult.real, -mult.imag], [mult.imag, mult.real]])
    shift = d * mult
    cov_x = rot @ cov_d @ rot.T
    res = abs(shift)
    res_se = _mag_stderr(shift, cov_x)
    k = rules.confidence_sigma
    numbers: dict[str, Any] = dict(
        shift=shift,
        shift_covariance=cov_x,
        residual=res,
        residual_stderr=res_se,
        residual_db=_db(res),
        residual_db_stderr=_DB_PER_NEPER * res_se / res if res > 0 else math.inf,
        residual_upper_db=_db(res + k * res_se),
        null_shift=d,
        z_null=zs + d,
        null_covariance=cov_d,
        curvature=kappa,
        curvature_stderr=kappa_se,
        data_curvature=data_k,
        data_curvature_stderr=data_k_se,
        floor=floor,
        floor_stderr=floor_se,
        reduced_chi2=redchi,
        dof=dof,
    )
    finite = (
        math.isfinite(res)
        and math.isfinite(res_se)
        and math.isfinite(kappa)
        and np.all(np.isfinite(cov_x))
    )
    if not finite:
        return outcome(
            RecheckDecision.BROKEN,
            "the fit returned non-finite values (zero curvature)",
            RejectionReason.FIT_FAILED,
            **numbers,
        )
    if prior is not None and math.isfinite(data_k):
        zk = abs(data_k - prior[0]) / math.sqrt(data_k_se**2 + prior[1] ** 2)
        if zk > rules.prior_consistency_sigma:
            return outcome(
                RecheckDecision.BROKEN,
                f"the re-check's curvature {data_k:.4g} +/- {data_k_se:.2g} disagrees with the "
                f"calibration's {prior[0]:.4g} +/- {prior[1]:.2g} ({zk:.1f} sigma > "
                f"{rules.prior_consistency_sigma:g}): the landscape changed",
                RejectionReason.MODEL_MISMATCH,
                **numbers,
            )
    if dof > 0 and pvalue < rules.mismatch_pvalue:
        return outcome(
            RecheckDecision.BROKEN,
            f"the paraboloid does not describe the re-check (chi-square {chi2:.3g} with "
            f"{dof} dof, tail probability {pvalue:.2g} < {rules.mismatch_pvalue:g})",
            RejectionReason.MODEL_MISMATCH,
            **numbers,
        )
    snr = kappa / kappa_se if kappa_se > 0 else (math.inf if kappa > 0 else -math.inf)
    if not snr >= rules.min_curvature_snr:
        return outcome(
            RecheckDecision.BROKEN,
            f"curvature is not significantly positive (kappa/stderr = {snr:.2f}, need >= "
            f"{rules.min_curvature_snr:g})",
            RejectionReason.NO_SIGNAL,
            **numbers,
        )
    if abs(d) > rules.region_factor * rho:
        return outcome(
            RecheckDecision.BROKEN,
            f"the null moved {abs(d) / rho:.2f} ring radii from the stored value (more than "
            f"{rules.region_factor:g}): it left the probed region",
            RejectionReason.OUTSIDE_REGION,
            **numbers,
        )
    summary = (
        f"residual {_db(res):.1f} dB (1 sigma {_db(res_se):.1f} dB, upper {k:g}-sigma bound "
        f"{_db(res + k * res_se):.1f} dB) against the tolerance {tol_db:g} dB"
    )
    if res > tol:
        confident = res - k * res_se > tol
        how = "confidently" if confident else "by the point estimate only"
        return outcome(
            RecheckDecision.DRIFTED,
            f"drifted ({how}): {summary}",
            confident=confident,
            **numbers,
        )
    confident = res + k * res_se < tol
    comfortable = res + k * res_se <= tol * _lin(-rules.comfort_db)
    how = "comfortably" if comfortable else ("confidently" if confident else "not confidently")
    return outcome(
        RecheckDecision.WITHIN,
        f"within tolerance ({how}): {summary}",
        confident=confident,
        comfortable=comfortable,
        **numbers,
    )


def analyse_recheck_counts(
    z_points: ArrayLike,
    counts: ArrayLike,
    shots: ArrayLike,
    z_stored: complex,
    amplitude: complex,
    *,
    tolerance_db: float,
    curvature_prior: float | tuple[float, float] | None = None,
    rules: RecheckRules = DEFAULT_RECHECK_RULES,
    iterations: int = 3,
) -> RecheckOutcome:
    """:func:`analyse_recheck` for binomial counts (leakage or rotation probabilities).

    The first pass weights each point by the Jeffreys-smoothed variance of its own counts
    (:func:`xtalkcal.fit.binomial_signal`); each further pass by the binomial variance
    ``p (1 - p) / shots`` of the fitted paraboloid ``S0 + kappa |z - z_null|**2`` (clipped to
    ``[0.5/shots, 1 - 0.5/shots]``), as :func:`xtalkcal.fit.fit_paraboloid_counts` does. Weights
    taken from each point's own counts favour points that fluctuated low (a floor point with
    few counts looks precise); the model's variance does not, and the fixed point of this
    reweighting solves the binomial score equations of the linear model.

    Parameters
    ----------
    z_points : array_like of complex, shape (n,)
        Cancellation-tone amplitudes probed (fraction of full scale).
    counts, shots : array_like of int, shape (n,) (shots may be a scalar)
        Signalling counts and shots per point.
    z_stored, amplitude, tolerance_db, curvature_prior, rules
        As for :func:`analyse_recheck`.
    iterations : int
        Reweighting passes after the first (>= 0).

    Returns
    -------
    RecheckOutcome
    """
    za = _as_1d("z_points", z_points, complex_ok=True)
    k = np.asarray(counts)
    nshots = np.asarray(shots)
    try:
        k, nshots = np.broadcast_arrays(k, nshots)
    except ValueError:
        raise DriftInputError(
            f"counts and shots must broadcast together, got {k.shape} and {nshots.shape}"
        ) from None
    k = _as_1d("counts", k, complex_ok=False)
    nshots = _as_1d("shots", nshots, complex_ok=False)
    if k.shape != za.shape:
        raise DriftInputError(f"counts must have one value per point: {k.shape} vs {za.shape}")
    if np.any(nshots <= 0) or np.any(k < 0) or np.any(k > nshots):
        raise DriftInputError("need shots > 0 and 0 <= counts <= shots at every point")
    if int(iterations) != iterations or iterations < 0:
        raise DriftInputError(f"iterations must be an integer >= 0, got {iterations!r}")
    p_obs, sigma = binomial_signal(k, nshots)
    kwargs: dict[str, Any] = dict(
        tolerance_db=tolerance_db, curvature_prior=curvature_prior, rules=rules
    )
    out = analyse_recheck(za, p_obs, sigma, z_stored, amplitude, **kwargs)
    for _ in range(int(iterations)):
        if not (math.isfinite(out.floor) and math.isfinite(out.curvature)):
            break
        if not (math.isfinite(out.z_null.real) and math.isfinite(out.z_null.imag)):
            break
        pred = out.floor + out.curvature * np.abs(za - out.z_null) ** 2
        pt = np.clip(pred, 0.5 / nshots, 1 - 0.5 / nshots)
        sigma = np.sqrt(pt * (1 - pt) / nshots)
        out = analyse_recheck(za, p_obs, sigma, z_stored, amplitude, **kwargs)
    return out


# --------------------------------------------------------------------------------------------
# Trends
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RandomWalkRate:
    """A linear rate plus a random walk fitted to one coordinate of a pair's history.

    Model (one coordinate ``y``: unwrapped phase in rad, or ``20 log10|X|`` in dB)::

        y_k = y_0 + rate * t_k + W(t_k) + e_k

    with ``W`` a Wiener process of diffusion constant ``D`` (``Var[W(t + h) - W(t)] = D h``)
    and ``e_k`` the measurement error of entry ``k`` (variance from its covariance).

    Attributes
    ----------
    rate, rate_stderr : float
        Linear drift rate, unit per hour (rad/h or dB/h).
    diffusion, diffusion_stderr : float
        ``D``, unit squared per hour (rad**2/h or dB**2/h); the stderr is the inverse square
        root of the expected restricted Fisher information (a guide, not a Gaussian interval,
        near ``D = 0``).
    n_points : int
        Entries used.
    unit : str
        ``"rad"`` or ``"dB"``.
    """

    rate: float
    rate_stderr: float
    diffusion: float
    diffusion_stderr: float
    n_points: int
    unit: str

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able record."""
        return {
            "rate": _json_float(self.rate),
            "rate_stderr": _json_float(self.rate_stderr),
            "diffusion": _json_float(self.diffusion),
            "diffusion_stderr": _json_float(self.diffusion_stderr),
            "n_points": self.n_points,
            "unit": self.unit,
        }


class _IncrementModel:
    """Increments of a drifting random walk observed with independent errors.

    Differencing removes ``y_0``; the increments ``dy_k = rate dt_k + dW_k + e_{k+1} - e_k``
    have the tridiagonal covariance ``Sigma_kk = D dt_k + v_k + v_{k+1}``,
    ``Sigma_k,k+1 = -v_{k+1}``. For a given ``D`` the rate is the generalised least squares
    estimate; ``D`` maximises the restricted (rate-profiled) likelihood of the increments.
    Banded Cholesky keeps every evaluation O(n).
    """

    def __init__(self, t_h: NDArray[np.float64], y: NDArray[np.float64], v: NDArray[np.float64]):
        self.dt = np.diff(t_h)
        self.dy = np.diff(y)
        self.v = v
        self.m = self.dt.size

    def _banded(self, diffusion: float) -> NDArray[np.float64]:
        ab = np.zeros((2, self.m))
        ab[1] = diffusion * self.dt + self.v[:-1] + self.v[1:]
        ab[0, 1:] = -self.v[1:-1]
        return ab

    def solve(self, diffusion: float) -> tuple[float, float, float] | None:
        """(rate, rate variance, restricted negative log-likelihood) at ``D``; None if singular."""
        try:
            cb = linalg.cholesky_banded(self._banded(diffusion), lower=False)
        except linalg.LinAlgError:
            return None
        if not np.all(cb[1] > 0):
            return None
        sol = linalg.cho_solve_banded((cb, False), np.stack([self.dt, self.dy], axis=-1))
        a = float(self.dt @ sol[:, 0])
        if not a > 0:
            return None
        rate = float(self.dt @ sol[:, 1]) / a
        r = self.dy - rate * self.dt
        q = float(r @ (sol[:, 1] - rate * sol[:, 0]))
        logdet = 2.0 * float(np.sum(np.log(cb[1])))
        return rate, 1.0 / a, 0.5 * (logdet + math.log(a) + q)

    def diffusion_information(self, diffusion: float) -> float:
        """Expected restricted Fisher information on ``D``: ``tr(P S P S)/2``, ``S = diag(dt)``."""
        ab = self._banded(diffusion)
        cov = np.diag(ab[1]) + np.diag(ab[0, 1:], 1) + np.diag(ab[0, 1:], -1)
        inv = np.linalg.inv(cov)
        g = inv @ self.dt
        p = inv - np.outer(g, g) / float(self.dt @ g)
        ps = p * self.dt[None, :]
        return 0.5 * float(np.sum(ps * ps.T))

    def fit(self, unit: str, n_points: int) -> RandomWalkRate:
        mean_rate = float(np.sum(self.dy) / np.sum(self.dt))
        scatter = float(np.sum((self.dy - mean_rate * self.dt) ** 2) / np.sum(self.dt))
        scale = max(scatter, 1e-300)
        candidates: list[tuple[float, float]] = []  # (nll, D)
        base = self.solve(0.0)
        if base is not None:
            candidates.append((base[2], 0.0))
        grid = np.linspace(math.log(scale * 1e-8), math.log(scale * 1e2), 41)
        vals = []
        for g in grid:
            s = self.solve(math.exp(g))
            vals.append(math.inf if s is None else s[2])
        i = int(np.argmin(vals))
        if math.isfinite(vals[i]):
            best_g, best_val = float(grid[i]), float(vals[i])
            if 0 < i < len(grid) - 1:

                def nll(log_d: float) -> float:
                    s = self.solve(math.exp(log_d))
                    return math.inf if s is None else s[2]

                res = optimize.minimize_scalar(
                    nll, bounds=(grid[i - 1], grid[i + 1]), method="bounded",
                    options={"xatol": 1e-6},
                )
                if res.fun < best_val:
                    best_g, best_val = float(res.x), float(res.fun)
            candidates.append((best_val, math.exp(best_g)))
        if not candidates:
            raise DriftInputError(
                "the history's covariances make the increments singular (zero measurement "
                "variance with repeated timestamps?)"
            )
        # D = 0 wins ties: no evidence for a random walk means none is claimed.
        _, d_hat = min(candidates, key=lambda c: (c[0], c[1]))
        out = self.solve(d_hat)
        assert out is not None  # the candidate was evaluated above
        rate, rate_var, _ = out
        info = self.diffusion_information(d_hat)
        d_se = 1.0 / math.sqrt(info) if info > 0 else math.inf
        return RandomWalkRate(
            rate=rate,
            rate_stderr=math.sqrt(rate_var),
            diffusion=d_hat,
            diffusion_stderr=d_se,
            n_points=n_points,
            unit=unit,
        )


@dataclass(frozen=True, eq=False)
class PairTrend:
    """Drift of one pair's crosstalk element over its history, and when it leaves tolerance.

    Attributes
    ----------
    aggressor, victim : str
    frequency_ghz : float
        Frequency of the entries used, GHz.
    n_entries : int
        Accepted entries used.
    first_s, last_s, now_s : float
        Rig times of the first and last entry used, and of the evaluation, s.
    last_value : complex
        ``X`` of the last entry.
    last_covariance : ndarray, shape (2, 2)
        Its covariance of ``(Re X, Im X)``.
    reference_value : complex
        ``X`` the stored compensation was set from (``r = -X_ref``).
    reference_covariance : ndarray, shape (2, 2)
    reference_is_last : bool
        True when the reference is the last entry itself (then its error counts once).
    phase : RandomWalkRate or None
        Phase trend (rad/h, rad**2/h); None with fewer than 3 entries.
    magnitude : RandomWalkRate or None
        Magnitude trend in dB (dB/h, dB**2/h); None with fewer than 3 entries.
    tolerance_db : float
    hours_to_tolerance : float or None
        Hours after the last entry at which the predicted residual plus one sigma reaches the
        tolerance (see :meth:`predicted_residual`); 0 if it already does at the last entry,
        ``inf`` if not within 1e5 h; None when the rates are unknown.
    """

    aggressor: str
    victim: str
    frequency_ghz: float
    n_entries: int
    first_s: float
    last_s: float
    now_s: float
    last_value: complex
    last_covariance: NDArray[np.float64]
    reference_value: complex
    reference_covariance: NDArray[np.float64]
    reference_is_last: bool
    phase: RandomWalkRate | None
    magnitude: RandomWalkRate | None
    tolerance_db: float
    hours_to_tolerance: float | None = field(default=None)

    def __post_init__(self) -> None:
        object.__setattr__(self, "last_covariance", _readonly(self.last_covariance))
        object.__setattr__(self, "reference_covariance", _readonly(self.reference_covariance))

    # -- derived views ---------------------------------------------------------------------

    @property
    def pair(self) -> tuple[str, str]:
        return (self.aggressor, self.victim)

    @property
    def age_hours(self) -> float:
        """Hours from the last entry to ``now_s``."""
        return (self.now_s - self.last_s) / _SECONDS_PER_HOUR

    @property
    def span_hours(self) -> float:
        """Hours from the first to the last entry used."""
        return (self.last_s - self.first_s) / _SECONDS_PER_HOUR

    @property
    def phase_rate(self) -> float | None:
        """Phase drift rate, rad/h (None if unknown)."""
        return None if self.phase is None else self.phase.rate

    @property
    def magnitude_rate_db(self) -> float | None:
        """Magnitude drift rate, dB/h (None if unknown)."""
        return None if self.magnitude is None else self.magnitude.rate

    @property
    def hours_left(self) -> float | None:
        """Hours from ``now_s`` until the tolerance is predicted to be reached (may be < 0)."""
        if self.hours_to_tolerance is None:
            return None
        return self.hours_to_tolerance - self.age_hours

    def predicted_residual(self, hours_after_last: float) -> tuple[float, float]:
        """Predicted residual of the stored compensation, mean and one sigma (linear).

        With ``tau`` the hours after the last entry, ``phi`` the last entry's phase,
        ``g = magnitude.rate * ln(10)/20`` (1/h) and ``w = phase.rate`` (rad/h)::

            mean(tau)  = | X_last exp((g + i w) tau) - X_ref |
            Sigma(tau) = C_last [+ C_ref if the reference is another entry]
                         + |X_last|**2 R diag(D_ln tau + s_g**2 tau**2,
                                              D_phi tau + s_w**2 tau**2) R^T
            sigma(tau) = sqrt(largest eigenvalue of Sigma(tau))

        where ``R`` rotates (radial, tangential) axes onto (Re, Im) at the last value,
        ``D_ln = magnitude.diffusion * (ln(10)/20)**2`` and ``D_phi = phase.diffusion``
        (random-walk variance grows linearly in ``tau``), and ``s_g, s_w`` are the rates'
        standard errors (their uncertainty grows linearly in ``tau``). The linearised
        covariance is the first-order propagation of small phase and log-magnitude errors.
        Rates unknown (fewer than 3 entries): only the measurement errors, no drift.

        Parameters
        ----------
        hours_after_last : float
            ``tau`` >= 0, h.

        Returns
        -------
        (float, float)
            ``mean(tau)`` and ``sigma(tau)`` (dimensionless, linear).
        """
        tau = max(_finite_real("hours_after_last", hours_after_last), 0.0)
        xl, xr = self.last_value, self.reference_value
        cov = np.array(self.last_covariance, dtype=float)
        if not self.reference_is_last:
            cov = cov + self.reference_covariance
        if self.phase is None or self.magnitude is None:
            return abs(xl - xr), float(math.sqrt(max(np.linalg.eigvalsh(cov)[-1], 0.0)))
        to_ln = 1.0 / _DB_PER_NEPER
        g = self.magnitude.rate * to_ln
        w = self.phase.rate
        mean = abs(xl * np.exp(complex(g, w) * tau) - xr)
        mag2 = abs(xl) ** 2
        var_rad = mag2 * (
            self.magnitude.diffusion * to_ln**2 * tau
            + (self.magnitude.rate_stderr * to_ln * tau) ** 2
        )
        var_tan = mag2 * (self.phase.diffusion * tau + (self.phase.rate_stderr * tau) ** 2)
        phi = math.atan2(xl.imag, xl.real)
        rot = np.array([[math.cos(phi), -math.sin(phi)], [math.sin(phi), math.cos(phi)]])
        cov = cov + rot @ np.diag([var_rad, var_tan]) @ rot.T
        return float(mean), float(math.sqrt(max(np.linalg.eigvalsh(cov)[-1], 0.0)))

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able record (non-finite numbers as ``None``)."""
        return {
            "schema": "xtalkcal.pair_trend",
            "schema_version": 1,
            "aggressor": self.aggressor,
            "victim": self.victim,
            "frequency_ghz": self.frequency_ghz,
            "n_entries": self.n_entries,
            "first_s": self.first_s,
            "last_s": self.last_s,
            "now_s": self.now_s,
            "last_value": [self.last_value.real, self.last_value.imag],
            "reference_value": [self.reference_value.real, self.reference_value.imag],
            "phase": None if self.phase is None else self.phase.to_dict(),
            "magnitude": None if self.magnitude is None else self.magnitude.to_dict(),
            "tolerance_db": self.tolerance_db,
            "hours_to_tolerance": _json_float(self.hours_to_tolerance),
            "hours_left": _json_float(self.hours_left),
        }


_HORIZON_H = 1e5  # prediction horizon: beyond ~11 years "never" is the honest answer


def _hours_to_tolerance(trend: PairTrend, tol: float) -> float:
    """First ``tau >= 0`` with ``mean(tau) + sigma(tau) = tol`` (0 if already, inf if never)."""

    def f(tau: float) -> float:
        m, s = trend.predicted_residual(tau)
        return m + s - tol

    if f(0.0) >= 0:
        return 0.0
    # Geometric scan then Brent: factor 1.25 steps cannot jump over an excursion above tol
    # unless the tolerance exceeds ~2|X| (phase swinging almost all the way round).
    lo, tau = 0.0, 1e-3
    while tau <= _HORIZON_H:
        if f(tau) >= 0:
            return float(optimize.brentq(f, lo, tau, xtol=1e-9, rtol=1e-10))
        lo, tau = tau, tau * 1.25
    return math.inf


def _polar_series(
    entries: Sequence[LedgerEntry],
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Unwrapped phase (rad) and magnitude (dB) with their variances from each covariance."""
    vals = np.array([e.value for e in entries], dtype=complex)
    covs = np.array([e.covariance_matrix for e in entries])
    mag = np.abs(vals)
    phi = np.angle(vals)
    radial = np.stack([np.cos(phi), np.sin(phi)], axis=-1)
    tangential = np.stack([-np.sin(phi), np.cos(phi)], axis=-1)
    var_r = np.einsum("ki,kij,kj->k", radial, covs, radial)
    var_t = np.einsum("ki,kij,kj->k", tangential, covs, tangential)
    phase = np.unwrap(phi)
    var_phase = var_t / mag**2
    mag_db = 20.0 * np.log10(mag)
    var_db = _DB_PER_NEPER**2 * var_r / mag**2
    return phase, var_phase, mag_db, var_db


def pair_trend(
    history_entries: Iterable[LedgerEntry],
    *,
    tolerance_db: float,
    now_s: float,
    kinds: Sequence[str] = ("null", "recheck", "manual"),
    reference: LedgerEntry | None = None,
    frequency_tolerance_ghz: float = 1e-3,
) -> PairTrend:
    """Drift rates of one pair from its ledger history, and when it will leave tolerance.

    Uses the accepted entries of the given kinds, measured at the latest entry's frequency
    (within ``frequency_tolerance_ghz``: ``X`` depends on frequency through the lines'
    electrical delays, so entries from another drive frequency are not the same quantity),
    in time order. Surveys are left out by default: they screen with a coarser estimator whose
    systematic errors are not in their covariance (a judgment, not a measured fact).

    For each of the unwrapped phase ``arg X`` (rad) and the magnitude ``20 log10|X|`` (dB) a
    linear rate plus random walk is fitted (:class:`RandomWalkRate`) from the successive
    differences: the rate by generalised weighted least squares, which reduces to the
    measurement-error weighted regression when the random walk vanishes, and the diffusion
    constant by restricted maximum likelihood of the increments (their scatter beyond the
    measurement errors). With a random walk present, ordinary regression on the values would
    understate the rate's error; the increment model does not. Needs >= 3 entries (two
    increments); with 1-2 entries the rates are None and no time to tolerance is predicted
    (`next_check` then keeps the current or default interval).

    Limits (measured on synthetic histories of 25 entries): the rate's 1-sigma coverage is
    close to 68 % when the random walk is identifiable (step variance ``D dt`` not small
    against the measurement variance); when it is weakly identified, ``D`` is often estimated
    as zero and the plug-in rate stderr is optimistic (coverage ~58 % with ``D dt`` a fifth of
    the measurement variance), and with no walk at all it is slightly conservative (~75 %).

    The stored compensation is held fixed at ``reference`` (default: the last entry used, which
    is what the ledger's current matrix holds). The time to tolerance solves
    ``mean(tau) + sigma(tau) = tol`` with the formula of :meth:`PairTrend.predicted_residual`.

    Parameters
    ----------
    history_entries : iterable of LedgerEntry
        One pair's entries, e.g. ``Ledger.history(aggressor, victim)`` (rejected ones and
        other kinds are skipped here).
    tolerance_db : float
        Allowed residual ``|X + r|``, dB (negative).
    now_s : float
        Rig time of the evaluation, s.
    kinds : sequence of str
        Entry kinds to use.
    reference : LedgerEntry, optional
        Entry the stored compensation was set from.
    frequency_tolerance_ghz : float
        Entries within this of the latest entry's frequency are used, GHz.

    Returns
    -------
    PairTrend

    Raises
    ------
    DriftInputError
        Entries of more than one pair, no usable entry, or a non-finite time or tolerance.
    """
    tol_db = _check_tolerance(tolerance_db)
    now = _finite_real("now_s", now_s)
    all_entries = list(history_entries)
    pairs = {(e.aggressor, e.victim) for e in all_entries}
    if len(pairs) > 1:
        raise DriftInputError(f"history of one pair expected, got {len(pairs)}: {sorted(pairs)}")
    usable = [
        e
        for e in all_entries
        if e.accepted
        and e.kind in kinds
        and math.isfinite(abs(e.value))
        and abs(e.value) > 0
        and np.all(np.isfinite(e.covariance_matrix))
    ]
    if not usable:
        which = f" {next(iter(pairs))}" if pairs else ""
        raise DriftInputError(
            f"no accepted entry of kinds {tuple(kinds)} with a finite non-zero value for "
            f"pair{which}"
        )
    usable.sort(key=lambda e: (e.measured_at_s, e.seq, e.position))
    f_ref = usable[-1].frequency_ghz
    usable = [e for e in usable if abs(e.frequency_ghz - f_ref) <= frequency_tolerance_ghz]
    last = usable[-1]
    ref = last if reference is None else reference
    t_h = np.array([e.measured_at_s for e in usable]) / _SECONDS_PER_HOUR
    phase_fit = mag_fit = None
    if len(usable) >= 3 and t_h[-1] > t_h[0]:
        phase, var_phase, mag_db, var_db = _polar_series(usable)
        phase_fit = _IncrementModel(t_h, phase, var_phase).fit("rad", len(usable))
        mag_fit = _IncrementModel(t_h, mag_db, var_db).fit("dB", len(usable))
    trend = PairTrend(
        aggressor=last.aggressor,
        victim=last.victim,
        frequency_ghz=last.frequency_ghz,
        n_entries=len(usable),
        first_s=usable[0].measured_at_s,
        last_s=last.measured_at_s,
        now_s=now,
        last_value=last.value,
        last_covariance=last.covariance_matrix,
        reference_value=ref.value,
        reference_covariance=ref.covariance_matrix,
        reference_is_last=ref is last or (ref.entry_id != "" and ref.entry_id == last.entry_id),
        phase=phase_fit,
        magnitude=mag_fit,
        tolerance_db=tol_db,
    )
    if phase_fit is None:
        return trend
    hours = _hours_to_tolerance(trend, _lin(tol_db))
    return dataclasses.replace(trend, hours_to_tolerance=hours)


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
    if not 0 < safety <= 1:
        raise DriftInputError(f"safety must lie in (0, 1], got {safety!r}")
    if not (lengthen >= modest_lengthen >= 1 > shorten > 0):
        raise DriftInputError(
            "need lengthen >= modest_lengthen >= 1 > shorten > 0, got "
            f"{lengthen!r}, {modest_lengthen!r}, {shorten!r}"
        )
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
    outcome = outcomes[0] if outcomes else None
    trend = trends[0] if trends else None
    base = start if previous_interval_h is None else _finite_real(
        "previous_interval_h", previous_interval_h
    )
    if base <= 0:
        raise DriftInputError(f"previous_interval_h must be positive, got {base!r}")

    follow_up = FollowUp.NONE
    decision = None if outcome is None else outcome.decision
    hours_left = None if trend is None else trend.hours_left
    use_trend = True
    if outcome is None:
        proposal = base if trend is None or hours_left is None else lengthen * base
        why = (
            "trend without rates: interval kept"
            if hours_left is None
            else f"trend: lengthened x{lengthen:g} unless the prediction says otherwise"
        )
    elif outcome.decision is RecheckDecision.BROKEN:
        proposal, follow_up, use_trend = lo, FollowUp.RECALIBRATE, False
        why = f"re-check broken ({outcome.cause.value}): recalibrate, then check at the minimum"
    elif outcome.decision is RecheckDecision.DRIFTED:
        proposal, use_trend = shorten * base, False
        tol = _lin(outcome.tolerance_db)
        axis = math.sqrt(max(float(np.linalg.eigvalsh(outcome.shift_covariance)[-1]), 0.0))
        # Adopting the re-check's null leaves its estimation error as the new residual; it
        # must sit well inside the tolerance. (Shifts beyond the probed region are already
        # broken, so no distance rule is needed here.)
        adoptable = rules.confidence_sigma * axis < tol
        follow_up = FollowUp.RECENTRE if adoptable else FollowUp.RECALIBRATE
        why = (
            f"drifted: shortened x{shorten:g}; "
            + (
                "the re-check's null is precise enough to adopt (re-centre)"
                if adoptable
                else "the re-check's null is too uncertain to adopt (recalibrate)"
            )
        )
    elif outcome.comfortable:
        proposal, why = lengthen * base, f"comfortably within: lengthened x{lengthen:g}"
    elif outcome.confident:
        proposal, why = modest_lengthen * base, f"within: lengthened x{modest_lengthen:g}"
    else:
        proposal, why = base, "within, but not confidently: interval kept"

    if use_trend and hours_left is not None:
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
        follow_up=follow_up,
        reason=why,
        decision=decision,
        hours_left=hours_left,
    )


# --------------------------------------------------------------------------------------------
# Schedule
# --------------------------------------------------------------------------------------------

SCHEDULE_FORMAT = "xtalkcal-schedule"
SCHEDULE_SCHEMA_VERSION = 2  # 2: set_aside added (version 1 files are read)
_NOTE_MAX = 2000  # characters of a note or a set-aside reason

Pair = tuple[str, str]


@dataclass(frozen=True)
class PairSlot:
    """Schedule state of one (aggressor, victim) pair.

    Attributes
    ----------
    aggressor, victim : str
    interval_h : float
        Current re-check interval, h.
    due_s : float
        Rig time at which the next re-check is due, s.
    last_checked_s : float or None
        Rig time of the last recorded re-check, s.
    last_decision : RecheckDecision or None
    follow_up : FollowUp
        Work pending before the next re-check.
    note : str
        Why the interval was chosen.
    set_aside : str
        Why the pair is no longer re-checked ("" while it is): its stored compensation
        cannot be played within the victim line's limits, so re-checking it would fail the
        same way on every run. A fresh calibration of the pair (:meth:`Schedule.calibrated`)
        takes it back.
    set_aside_entry_s : float or None
        ``measured_at_s`` of the stored entry that was set aside: once the pair's current
        ledger entry is another one (a new calibration), it is scheduled again.
    """

    aggressor: str
    victim: str
    interval_h: float
    due_s: float
    last_checked_s: float | None = None
    last_decision: RecheckDecision | None = None
    follow_up: FollowUp = FollowUp.NONE
    note: str = ""
    set_aside: str = ""
    set_aside_entry_s: float | None = None

    @property
    def pair(self) -> Pair:
        return (self.aggressor, self.victim)

    def to_dict(self) -> dict[str, Any]:
        return {
            "aggressor": self.aggressor,
            "victim": self.victim,
            "interval_hours": self.interval_h,
            "due_s": self.due_s,
            "last_checked_s": self.last_checked_s,
            "last_decision": None if self.last_decision is None else self.last_decision.value,
            "follow_up": self.follow_up.value,
            "note": self.note,
            "set_aside": self.set_aside,
            "set_aside_entry_s": self.set_aside_entry_s,
        }


def _slot_from_dict(d: object, source: str, where: str) -> PairSlot:
    """One entry of ``pairs``; every value checked against its physical range."""
    if not isinstance(d, Mapping):
        raise ScheduleFileError(source, where, f"expected an object, got {type(d).__name__}")
    known = {
        "aggressor", "victim", "interval_hours", "due_s", "last_checked_s", "last_decision",
        "follow_up", "note", "set_aside", "set_aside_entry_s",
    }
    extra = sorted(set(d) - known)
    if extra:
        raise ScheduleFileError(source, where, f"unknown field(s) {_names(extra)}; "
                                               f"accepted: {', '.join(sorted(known))}")

    def bad(key: str, problem: str) -> ScheduleFileError:
        return ScheduleFileError(source, f"{where}.{key}", problem)

    def name(key: str) -> str:
        v = d.get(key)
        problem = name_problem(v)
        if problem is not None:
            raise bad(key, problem)
        return v  # type: ignore[return-value]

    def text(key: str) -> str:
        v = d.get(key, "")
        if not isinstance(v, str) or len(v) > _NOTE_MAX:
            raise bad(key, f"expected a string of at most {_NOTE_MAX} characters, got "
                           f"{type(v).__name__}" + (f" of {len(v)}" if isinstance(v, str) else ""))
        return v

    def number(key: str, lo: float, hi: float, unit: str, *, optional: bool = False
               ) -> float | None:
        v = d.get(key)
        if v is None and optional:
            return None
        accepted = f"accepted: {lo:g} ≤ x ≤ {hi:g} {unit}"
        if isinstance(v, bool) or not isinstance(v, int | float):
            raise bad(key, f"expected a number, got {type(v).__name__}; {accepted}")
        if not lo <= v <= hi:  # NaN and ±inf fail too; int-float comparisons are exact
            shown = f"{v:g}" if isinstance(v, float) else short_repr(v)
            raise bad(key, f"{shown} is out of range; {accepted}")
        return float(v)

    def choice(key: str, enum_type: type[enum.Enum], *, optional: bool) -> Any:
        v = d.get(key)
        if v is None and optional:
            return None
        try:
            return enum_type(v)
        except (ValueError, TypeError):
            raise bad(key, f"{short_repr(v)} is not one of "
                           f"{', '.join(repr(m.value) for m in enum_type)}") from None

    t_lo, t_hi = RIG_TIME_RANGE_S
    interval = number("interval_hours", *RECHECK_INTERVAL_RANGE_H, "h")
    due = number("due_s", t_lo, t_hi, "s")
    assert interval is not None and due is not None  # not optional
    return PairSlot(
        aggressor=name("aggressor"),
        victim=name("victim"),
        interval_h=interval,
        due_s=due,
        last_checked_s=number("last_checked_s", t_lo, t_hi, "s", optional=True),
        last_decision=choice("last_decision", RecheckDecision, optional=True),
        follow_up=choice("follow_up", FollowUp, optional=False),
        note=text("note"),
        set_aside=text("set_aside"),
        set_aside_entry_s=number("set_aside_entry_s", t_lo, t_hi, "s", optional=True),
    )


def _names(keys: Iterable[object]) -> str:
    return ", ".join(short_repr(k) for k in keys)


def _check_pair(pair: object) -> Pair:
    if (
        not isinstance(pair, tuple)
        or len(pair) != 2
        or not all(isinstance(p, str) and p for p in pair)
    ):
        raise DriftInputError(f"a pair is (aggressor, victim), two non-empty strings; got {pair!r}")
    return (pair[0], pair[1])


class Schedule:
    """Per-pair re-check intervals and due times (rig clock), kept on disk between runs.

    A cron-friendly command loads the schedule, runs the re-checks of :meth:`due` pairs (and
    the follow-ups of :meth:`pending` ones), :meth:`record`\\ s each outcome and saves. Policy
    (tolerance, interval limits) comes from the protocol's ``RecheckSettings``, passed in; the
    file holds only state.

    Parameters
    ----------
    settings : RecheckSettings
        Interval limits and the starting interval.
    slots : iterable of PairSlot, optional
        Initial state.

    Notes
    -----
    File format (JSON, UTF-8)::

        {"format": "xtalkcal-schedule", "schema_version": 1,
         "pairs": [{"aggressor": "d1", "victim": "q2", "interval_hours": 6.0,
                    "due_s": 21600.0, "last_checked_s": null, "last_decision": null,
                    "follow_up": "none", "note": ""}, ...]}

    :meth:`save` writes a temporary file in the same directory, ``fsync``\\ s it and renames it
    over the target with ``os.replace`` (atomic on POSIX), then ``fsync``\\ s the directory: a
    crash leaves either the old or the new file, never a torn one. Concurrent writers are
    not serialised here; a command that may overlap with itself should hold a lock file.
    """

    def __init__(self, settings: RecheckSettings, slots: Iterable[PairSlot] = ()) -> None:
        _interval_limits(settings)
        self._settings = settings
        self.source = "<memory>"  # the file it was loaded from, for messages
        self._slots: dict[Pair, PairSlot] = {}
        for s in slots:
            if s.pair in self._slots:
                raise DriftInputError(f"pair {s.pair} given twice")
            self._slots[s.pair] = s

    # -- views -----------------------------------------------------------------------------

    @property
    def settings(self) -> RecheckSettings:
        return self._settings

    def __len__(self) -> int:
        return len(self._slots)

    def __contains__(self, pair: object) -> bool:
        return pair in self._slots

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Schedule):
            return NotImplemented
        return self._slots == other._slots

    __hash__ = None  # type: ignore[assignment]  # mutable container

    def __repr__(self) -> str:
        return f"Schedule({len(self)} pairs)"

    def pairs(self) -> list[Pair]:
        """All scheduled pairs, sorted."""
        return sorted(self._slots)

    def slot(self, pair: Pair) -> PairSlot:
        """The state of one pair (KeyError if it is not scheduled)."""
        return self._slots[_check_pair(pair)]

    def due(self, now_s: float) -> list[Pair]:
        """Pairs whose re-check is due at rig time ``now_s`` (``due_s <= now_s``).

        Most overdue first, ties by pair name. Pairs set aside are never due.
        """
        now = _finite_real("now_s", now_s)
        ready = [s for s in self._slots.values() if s.due_s <= now and not s.set_aside]
        return [s.pair for s in sorted(ready, key=lambda s: (s.due_s, s.pair))]

    def set_aside_pairs(self) -> dict[Pair, str]:
        """Pairs set aside (see :meth:`set_aside`) with their reasons, sorted by pair."""
        return {p: s.set_aside for p, s in sorted(self._slots.items()) if s.set_aside}

    def set_aside(self, pair: Pair, reason: str, entry_s: float) -> PairSlot:
        """Stop re-checking ``pair`` until it is calibrated afresh, and say why.

        For a pair whose stored compensation cannot be played within its line's limits:
        every re-check would fail the same way, and one bad pair must not stop the rest of
        the schedule on every run. The reason is kept in the file and reported by later runs;
        ``entry_s`` is the ``measured_at_s`` of the stored entry that cannot be played.
        """
        p = _check_pair(pair)
        now = _finite_real("entry_s", entry_s)
        if not isinstance(reason, str) or not reason.strip():
            raise DriftInputError("a set-aside pair needs a reason (a non-empty string)")
        slot = dataclasses.replace(self._slots[p], set_aside=reason[:_NOTE_MAX],
                                   set_aside_entry_s=now, follow_up=FollowUp.NONE)
        self._slots[p] = slot
        return slot

    def pending(self) -> dict[Pair, FollowUp]:
        """Pairs with a follow-up (re-centre or recalibrate) waiting, sorted by pair."""
        return {
            p: s.follow_up
            for p, s in sorted(self._slots.items())
            if s.follow_up is not FollowUp.NONE
        }

    # -- changes ---------------------------------------------------------------------------

    def calibrated(self, pair: Pair, now_s: float, *, interval_h: float | None = None) -> PairSlot:
        """Register a fresh calibration (or re-centre) of ``pair`` at rig time ``now_s``.

        Adds the pair if needed (with ``settings.interval_hours``), clears its follow-up and
        makes its next re-check due one interval from now. ``interval_h`` overrides the
        interval (clamped to the settings' limits).
        """
        p = _check_pair(pair)
        now = _finite_real("now_s", now_s)
        lo, hi, start = _interval_limits(self._settings)
        old = self._slots.get(p)
        if interval_h is not None:
            iv = _finite_real("interval_h", interval_h)
        else:
            iv = start if old is None else old.interval_h
        iv = min(max(iv, lo), hi)
        slot = PairSlot(
            aggressor=p[0],
            victim=p[1],
            interval_h=iv,
            due_s=now + iv * _SECONDS_PER_HOUR,
            last_checked_s=None if old is None else old.last_checked_s,
            last_decision=None if old is None else old.last_decision,
            follow_up=FollowUp.NONE,
            note="calibrated",
        )
        self._slots[p] = slot
        return slot

    def remove(self, pair: Pair) -> None:
        """Stop scheduling ``pair`` (KeyError if absent)."""
        del self._slots[_check_pair(pair)]

    def record(
        self,
        pair: Pair,
        outcome: RecheckOutcome,
        now_s: float,
        *,
        trend: PairTrend | None = None,
        **policy: float,
    ) -> NextCheck:
        """Record a re-check of ``pair`` at rig time ``now_s`` and reschedule it.

        The interval comes from :func:`next_check` (``outcome``, optional ``trend``, the
        pair's current interval; ``policy`` passes ``safety``/``lengthen``/... through). A
        pair not yet scheduled is added with ``settings.interval_hours`` as its previous
        interval.
        """
        p = _check_pair(pair)
        now = _finite_real("now_s", now_s)
        if not isinstance(outcome, RecheckOutcome):
            raise DriftInputError(f"outcome must be a RecheckOutcome, got {type(outcome).__name__}")
        if trend is not None and trend.pair != p:
            raise DriftInputError(f"trend is for pair {trend.pair}, not {p}")
        old = self._slots.get(p)
        evidence: list[RecheckOutcome | PairTrend] = [outcome]
        if trend is not None:
            evidence.append(trend)
        nxt = next_check(
            evidence, None if old is None else old.interval_h, self._settings, **policy
        )
        self._slots[p] = PairSlot(
            aggressor=p[0],
            victim=p[1],
            interval_h=nxt.interval_h,
            due_s=now + nxt.interval_h * _SECONDS_PER_HOUR,
            last_checked_s=now,
            last_decision=outcome.decision,
            follow_up=nxt.follow_up,
            note=nxt.reason,
        )
        return nxt

    # -- persistence -----------------------------------------------------------------------

    def to_dict(self) -> dict[str, Any]:
        """The JSON document (see the class notes)."""
        return {
            "format": SCHEDULE_FORMAT,
            "schema_version": SCHEDULE_SCHEMA_VERSION,
            "pairs": [self._slots[p].to_dict() for p in self.pairs()],
        }

    def to_json(self) -> str:
        """The document as JSON text (stable key order, ends with a newline)."""
        return json.dumps(self.to_dict(), indent=1, ensure_ascii=False, allow_nan=False) + "\n"

    @classmethod
    def from_dict(
        cls, doc: object, settings: RecheckSettings, *, source: str = "<memory>"
    ) -> Schedule:
        """Rebuild a schedule from :meth:`to_dict` output (ScheduleFileError names the field).

        Version 1 documents (without ``set_aside``) are read too.
        """
        if not isinstance(doc, Mapping):
            raise ScheduleFileError(source, "(top level)",
                                    f"expected a JSON object, got {type(doc).__name__}")
        if doc.get("format") != SCHEDULE_FORMAT:
            raise ScheduleFileError(source, "format", f"expected {SCHEDULE_FORMAT!r}, got "
                                                      f"{short_repr(doc.get('format'))}")
        version = doc.get("schema_version")
        if isinstance(version, bool) or not isinstance(version, int) or version < 1:
            raise ScheduleFileError(source, "schema_version",
                                    f"expected an integer from 1 to {SCHEDULE_SCHEMA_VERSION}, "
                                    f"got {short_repr(version)}")
        if version > SCHEDULE_SCHEMA_VERSION:
            raise ScheduleFileError(source, "schema_version",
                                    f"{short_repr(version)} is newer than this code "
                                    f"reads; accepted: 1 to {SCHEDULE_SCHEMA_VERSION} (or "
                                    "upgrade xtalkcal)")
        extra = sorted(set(doc) - {"format", "schema_version", "pairs"})
        if extra:
            raise ScheduleFileError(source, "(top level)",
                                    f"unknown top-level field(s) {_names(extra)}; accepted: "
                                    "format, schema_version, pairs")
        raw = doc.get("pairs")
        if not isinstance(raw, list):
            raise ScheduleFileError(source, "pairs", "expected a list of objects, got "
                                                     f"{type(raw).__name__}")
        slots = []
        for i, d in enumerate(raw):
            for key in ("set_aside", "set_aside_entry_s"):
                if version < 2 and isinstance(d, Mapping) and key in d:
                    raise ScheduleFileError(source, f"pairs[{i}].{key}",
                                            "unknown field in a version 1 schedule")
            slots.append(_slot_from_dict(d, source, f"pairs[{i}]"))
        seen: set[Pair] = set()
        for i, sl in enumerate(slots):
            if sl.pair in seen:
                raise ScheduleFileError(source, f"pairs[{i}]",
                                        f"pair {sl.aggressor} → {sl.victim} appears twice")
            seen.add(sl.pair)
        schedule = cls(settings, slots)
        schedule.source = source
        return schedule

    @classmethod
    def from_json(
        cls, text: str, settings: RecheckSettings, *, source: str = "<memory>"
    ) -> Schedule:
        """Parse :meth:`to_json` output (strict JSON: no NaN, no duplicate keys)."""
        try:
            doc = parse_json(text, source)
        except ConfigError as exc:
            raise ScheduleFileError(exc.source, exc.field, exc.problem) from None
        return cls.from_dict(doc, settings, source=source)

    def check_against(self, chip: Chip) -> None:
        """Refuse pairs naming a line or qubit ``chip`` does not have (before any rig time).

        Raises
        ------
        ScheduleFileError
            Naming the schedule file and the first bad ``pairs[i]`` field (and how many
            more there are).
        """
        lines, qubits = chip.line_names, chip.qubit_names
        problems = []
        for i, p in enumerate(self._slots):  # in file order, so pairs[i] is the file's
            if p[0] not in lines:
                problems.append((f"pairs[{i}].aggressor", f"{p[0]!r} is not a drive line of "
                                 f"chip {chip.name!r}; known: {', '.join(lines)}"))
            elif p[1] not in qubits:
                problems.append((f"pairs[{i}].victim", f"{p[1]!r} is not a qubit of chip "
                                 f"{chip.name!r}; known: {', '.join(qubits)}"))
            elif chip.line(p[0]).qubit == p[1]:
                problems.append((f"pairs[{i}].victim", f"{p[1]!r} is the qubit line {p[0]} "
                                 "drives; accepted: another qubit"))
        if problems:
            field, problem = problems[0]
            more = f" ({len(problems) - 1} more pairs like it)" if len(problems) > 1 else ""
            raise ScheduleFileError(self.source, field, problem + more)

    def save(self, path: str | os.PathLike[str]) -> Path:
        """Write the schedule to ``path`` atomically (temporary file, fsync, rename)."""
        target = Path(path)
        text = self.to_json()
        tmp = target.with_name(f".{target.name}.tmp-{os.getpid()}-{uuid.uuid4().hex}")
        try:
            with open(tmp, "w", encoding="utf-8") as fh:
                fh.write(text)
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, target)
        except BaseException:
            with contextlib.suppress(FileNotFoundError):
                tmp.unlink()
            raise
        # Make the rename itself durable; directories cannot be opened on every platform.
        with contextlib.suppress(OSError):
            fd = os.open(target.parent, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        return target

    @classmethod
    def load(cls, path: str | os.PathLike[str], settings: RecheckSettings) -> Schedule:
        """Read a schedule written by :meth:`save`."""
        try:
            doc, source = load_json(path)
        except ConfigError as exc:  # not readable, not UTF-8, not JSON, nested too deeply
            raise ScheduleFileError(exc.source, exc.field, exc.problem) from None
        return cls.from_dict(doc, settings, source=source)

    @classmethod
    def load_or_new(cls, path: str | os.PathLike[str], settings: RecheckSettings) -> Schedule:
        """:meth:`load` if ``path`` exists, else an empty schedule."""
        return cls.load(path, settings) if Path(path).exists() else cls(settings)
