"""Re-check design and analysis: a short ring around a stored null, and whether the pair is still
within tolerance, re-centred or broken.
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from xtalkcal.common import (
    json_float,
    readonly,
)
from xtalkcal.exceptions import XtalkcalError
from xtalkcal.fits import RejectionReason, binomial_signal

if TYPE_CHECKING:
    pass


_DB_PER_NEPER = 20.0 / math.log(10.0)  # dB of amplitude per unit of ln|X|
_SECONDS_PER_HOUR = 3600.0


class DriftInputError(XtalkcalError, ValueError):
    """Data handed to the drift logic has the wrong shape, non-finite values or mixed pairs."""


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
      the knee (see :func:`xtalkcal.calibrate.optimal_ring_radius`).
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
            "schema": "xtalkcal.recheck_outcome",
            "schema_version": 1,
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
    (:func:`xtalkcal.fits.binomial_signal`); each further pass by the binomial variance
    ``p (1 - p) / shots`` of the fitted paraboloid ``S0 + kappa |z - z_null|**2`` (clipped to
    ``[0.5/shots, 1 - 0.5/shots]``), as :func:`xtalkcal.fits.fit_paraboloid_counts` does. Weights
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
