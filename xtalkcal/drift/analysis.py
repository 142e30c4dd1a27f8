"""Re-check analysis: fit the ring's paraboloid about a stored null, estimate how far the null
moved, and decide whether the pair is within tolerance, drifted or broken.

:func:`analyse_recheck` runs in steps: check the inputs, fit the paraboloid (with the
calibration's curvature as a prior, if given), derive the null shift and its errors, then apply
the decision rules.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from xtalkcal.drift.inputs import (
    _DB_PER_NEPER,
    DriftInputError,
    _as_1d,
    _check_tolerance,
    _db,
    _lin,
    _parse_prior,
)
from xtalkcal.drift.outcome import (
    DEFAULT_RECHECK_RULES,
    RecheckDecision,
    RecheckOutcome,
    RecheckRules,
)
from xtalkcal.fits import RejectionReason, binomial_signal


def _mag_stderr(v: complex, cov: NDArray[np.float64]) -> float:
    """Standard error of ``|v|`` by the delta method (largest axis when ``v = 0``)."""
    m = abs(v)
    if not np.all(np.isfinite(cov)):
        return math.nan
    if m > 0:
        u = np.array([v.real, v.imag]) / m
        return float(math.sqrt(max(u @ cov @ u, 0.0)))
    return float(math.sqrt(max(np.linalg.eigvalsh(cov)[-1], 0.0)))


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
    if not (np.all(np.isfinite(m)) and np.all(np.isfinite(rhs))):
        return None
    d = np.sqrt(np.clip(np.diag(m), 1e-300, None))
    mn = m / np.outer(d, d)
    try:
        ev = np.linalg.eigvalsh(mn)
    except np.linalg.LinAlgError:
        return None
    if not ev[0] > 1e-10 * ev[-1]:
        return None
    inv = np.linalg.inv(mn) / np.outer(d, d)
    return inv @ rhs, inv



@dataclass(frozen=True)
class _RecheckInput:
    """The checked inputs of one re-check, with the probe offsets and radius."""

    z: NDArray[np.complex128]  # probe points
    signal: NDArray[np.float64]
    stderr: NDArray[np.float64]
    z_stored: complex
    amplitude: complex
    tolerance_db: float
    prior: tuple[float, float] | None  # (kappa, stderr); stderr 0 holds kappa fixed
    offsets: NDArray[np.complex128]  # z - z_stored
    rho: float  # largest distance of a probe point from the stored null

    @property
    def n(self) -> int:
        """Number of probe points."""
        return int(self.z.size)

    @property
    def dof(self) -> int:
        """Degrees of freedom of the fit (the prior counts as one more observation)."""
        return self.n - 4 + (1 if self.prior is not None else 0)


def _checked_input(
    z_points: ArrayLike,
    signal: ArrayLike,
    stderr: ArrayLike,
    z_stored: complex,
    amplitude: complex,
    tolerance_db: float,
    curvature_prior: float | tuple[float, float] | None,
) -> _RecheckInput:
    """Check the arguments of :func:`analyse_recheck` and bundle them.

    Raises
    ------
    DriftInputError
        As listed in :func:`analyse_recheck`.
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
    with np.errstate(over="ignore", divide="ignore"):
        if not np.all(np.isfinite(1.0 / (sg * sg))):  # the weights 1/stderr**2 overflow
            raise DriftInputError("stderr must be at least 1e-150 at every point")
    zs = complex(z_stored)
    amp = complex(amplitude)
    if not (math.isfinite(zs.real) and math.isfinite(zs.imag)):
        raise DriftInputError(f"z_stored must be finite, got {zs!r}")
    if not (math.isfinite(amp.real) and math.isfinite(amp.imag)) or amp == 0:
        raise DriftInputError(f"amplitude must be finite and non-zero, got {amp!r}")
    tol_db = _check_tolerance(tolerance_db)
    prior = _parse_prior(curvature_prior)
    wz = za - zs
    rho = float(np.max(np.abs(wz))) if za.size else 0.0
    return _RecheckInput(za, sa, sg, zs, amp, tol_db, prior, wz, rho)


# Outcome fields that are NaN unless the fit provides them (a broken outcome's diagnostics).
_NAN_REAL_FIELDS = (
    "residual",
    "residual_stderr",
    "residual_db",
    "residual_db_stderr",
    "residual_upper_db",
    "curvature",
    "curvature_stderr",
    "data_curvature",
    "data_curvature_stderr",
    "floor",
    "floor_stderr",
    "reduced_chi2",
)
_NAN_COMPLEX_FIELDS = ("shift", "null_shift", "z_null")
_NAN_MATRIX_FIELDS = ("shift_covariance", "null_covariance")


def _outcome(
    inp: _RecheckInput,
    decision: RecheckDecision,
    reason: str,
    cause: RejectionReason = RejectionReason.NONE,
    **numbers: Any,
) -> RecheckOutcome:
    """A :class:`RecheckOutcome` of ``inp``: the given numbers, NaN for the others."""
    nan2 = np.full((2, 2), math.nan)
    nanc = complex(math.nan, math.nan)
    base: dict[str, Any] = dict(confident=False, comfortable=False, dof=inp.dof)
    base.update(dict.fromkeys(_NAN_REAL_FIELDS, math.nan))
    base.update(dict.fromkeys(_NAN_COMPLEX_FIELDS, nanc))
    base.update(dict.fromkeys(_NAN_MATRIX_FIELDS, nan2))
    base.update(numbers)
    return RecheckOutcome(
        decision=decision,
        reason=reason,
        cause=cause,
        n_points=inp.n,
        probe_radius=inp.rho,
        tolerance_db=inp.tolerance_db,
        amplitude=inp.amplitude,
        used_prior=inp.prior is not None,
        **base,
    )


def _design_problem(inp: _RecheckInput) -> tuple[str, RejectionReason] | None:
    """Rule 1 of :func:`analyse_recheck` before any fit: too few points, or no ring."""
    n_par = 3 if inp.prior is not None and inp.prior[1] == 0.0 else 4
    if inp.n < n_par:
        return (
            f"{inp.n} probe points; the re-check needs at least {n_par}",
            RejectionReason.TOO_FEW_POINTS,
        )
    if not inp.rho > 0:
        return (
            "all probe points sit on the stored null; a ring around it is needed",
            RejectionReason.FIT_FAILED,
        )
    return None


@dataclass(frozen=True)
class _RingFit:
    """The weighted fit of ``c0 + c1 x + c2 y + c3 r**2`` (coordinates scaled by ``rho``)."""

    coef: NDArray[np.float64] | None  # (c0, c1, c2, c3); None: the design does not fix them
    cov: NDArray[np.float64] | None  # covariance of coef
    chi2: float  # data and prior pull (NaN when coef is None)
    data_curvature: float  # kappa from the data alone (NaN if they do not determine it)
    data_curvature_stderr: float


def _fit_ring(inp: _RecheckInput) -> _RingFit:
    """Fit the paraboloid to the re-check, the curvature prior (if any) as a ridge term."""
    rho, n, sa, prior = inp.rho, inp.n, inp.signal, inp.prior
    # Scaled coordinates: the normal equations stay well conditioned whatever the amplitude
    # scale; c3 is then kappa * rho**2.
    x, y = inp.offsets.real / rho, inp.offsets.imag / rho
    r2 = x * x + y * y
    w = 1.0 / (inp.stderr * inp.stderr)
    full_basis = np.stack([np.ones(n), x, y, r2], axis=-1)

    data_fit = _wls(full_basis, sa, w) if n >= 4 else None
    data_k = data_k_se = math.nan
    if data_fit is not None:
        data_k = float(data_fit[0][3]) / rho**2
        data_k_se = math.sqrt(max(data_fit[1][3, 3], 0.0)) / rho**2

    prior_chi2 = 0.0
    if prior is None:
        sol = data_fit
    elif prior[1] == 0.0:  # kappa held fixed: fit c0, c1, c2 to what the prior leaves
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
        return _RingFit(None, None, math.nan, data_k, data_k_se)
    resid = sa - full_basis @ sol[0]
    chi2 = float(np.sum(w * resid * resid)) + prior_chi2
    return _RingFit(sol[0], sol[1], chi2, data_k, data_k_se)


@dataclass(frozen=True)
class _Estimate:
    """What a fit says about the null: the outcome's numbers and the values the rules test."""

    numbers: dict[str, Any]  # RecheckOutcome fields
    null_shift: complex  # d
    residual: float  # |dX|
    residual_stderr: float
    curvature: float
    curvature_stderr: float
    chi2: float
    pvalue: float
    finite: bool  # all of |dX|, its stderr, kappa and cov(dX) finite


def _estimate(inp: _RecheckInput, fit: _RingFit, rules: RecheckRules) -> _Estimate:
    """Null shift, ``dX``, floor and curvature with their errors (delta method) from ``fit``."""
    assert fit.coef is not None and fit.cov is not None
    rho, cov_c = inp.rho, fit.cov
    data_k, data_k_se = fit.data_curvature, fit.data_curvature_stderr
    # numpy scalars: a curvature of exactly 0 gives inf/NaN (judged broken below), where
    # Python floats would raise ZeroDivisionError.
    c0, c1, c2, c3 = (np.float64(c) for c in fit.coef)
    dof = inp.dof
    redchi = fit.chi2 / dof if dof > 0 else math.nan
    pvalue = float(stats.chi2.sf(fit.chi2, dof)) if dof > 0 else math.nan

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
    mult = -1.0 / inp.amplitude
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
        z_null=inp.z_stored + d,
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
    finite = bool(
        math.isfinite(res)
        and math.isfinite(res_se)
        and math.isfinite(kappa)
        and np.all(np.isfinite(cov_x))
    )
    return _Estimate(numbers, d, res, res_se, kappa, kappa_se, fit.chi2, pvalue, finite)


def _prior_disagreement(inp: _RecheckInput, fit: _RingFit) -> float:
    """Combined standard errors between the data's own curvature and the prior (0 without)."""
    prior, data_k, data_k_se = inp.prior, fit.data_curvature, fit.data_curvature_stderr
    if prior is None or not math.isfinite(data_k):
        return 0.0
    spread = math.sqrt(data_k_se**2 + prior[1] ** 2)
    gap = abs(data_k - prior[0])
    return gap / spread if spread > 0 else (math.inf if gap > 0 else 0.0)


def _widened_prior(inp: _RecheckInput, fit: _RingFit, rules: RecheckRules
                   ) -> tuple[float, float] | None:
    """The prior widened to the gap when the data's curvature disagrees with it but lies within
    ``rules.curvature_ratio`` of it (see :class:`RecheckRules`); None otherwise."""
    prior, data_k = inp.prior, fit.data_curvature
    if prior is None or not (math.isfinite(data_k) and data_k > 0 and prior[0] > 0):
        return None
    if _prior_disagreement(inp, fit) <= rules.prior_consistency_sigma:
        return None
    ratio = data_k / prior[0]
    if not 1 / rules.curvature_ratio <= ratio <= rules.curvature_ratio:
        return None
    return prior[0], max(prior[1], abs(data_k - prior[0]))


def _refit_widened(inp: _RecheckInput, prior: tuple[float, float]
                   ) -> tuple[_RecheckInput, _RingFit]:
    """The fit again with the widened prior (the data alone determined the paraboloid, so a
    wider prior leaves it determined)."""
    inp = dataclasses.replace(inp, prior=prior)
    fit = _fit_ring(inp)
    assert fit.coef is not None
    return inp, fit


def _broken_by(inp: _RecheckInput, fit: _RingFit, est: _Estimate, rules: RecheckRules
               ) -> tuple[str, RejectionReason] | None:
    """Rules 2-5 of :func:`analyse_recheck` (and non-finite numbers): why the re-check is
    broken, or None."""
    if not est.finite:
        if est.curvature == 0:
            return ("the fitted curvature is exactly zero: the ring sees no paraboloid",
                    RejectionReason.NO_SIGNAL)
        return "the fit returned non-finite values", RejectionReason.FIT_FAILED
    prior, rho, dof = inp.prior, inp.rho, inp.dof
    data_k, data_k_se = fit.data_curvature, fit.data_curvature_stderr
    if prior is not None and math.isfinite(data_k):
        zk = _prior_disagreement(inp, fit)
        if zk > rules.prior_consistency_sigma:
            return (
                f"the re-check's curvature {data_k:.4g} +/- {data_k_se:.2g} disagrees with the "
                f"calibration's {prior[0]:.4g} +/- {prior[1]:.2g} ({zk:.1f} sigma > "
                f"{rules.prior_consistency_sigma:g}): the landscape changed",
                RejectionReason.MODEL_MISMATCH,
            )
    if dof > 0 and est.pvalue < rules.mismatch_pvalue:
        return (
            f"the paraboloid does not describe the re-check (chi-square {est.chi2:.3g} with "
            f"{dof} dof, tail probability {est.pvalue:.2g} < {rules.mismatch_pvalue:g})",
            RejectionReason.MODEL_MISMATCH,
        )
    kappa, kappa_se = est.curvature, est.curvature_stderr
    snr = kappa / kappa_se if kappa_se > 0 else (math.inf if kappa > 0 else -math.inf)
    if not snr >= rules.min_curvature_snr:
        return (
            f"curvature is not significantly positive (kappa/stderr = {snr:.2f}, need >= "
            f"{rules.min_curvature_snr:g})",
            RejectionReason.NO_SIGNAL,
        )
    d = est.null_shift
    if abs(d) > rules.region_factor * rho:
        return (
            f"the null moved {abs(d) / rho:.2f} ring radii from the stored value (more than "
            f"{rules.region_factor:g}): it left the probed region",
            RejectionReason.OUTSIDE_REGION,
        )
    return None


def _decide(inp: _RecheckInput, est: _Estimate, rules: RecheckRules) -> RecheckOutcome:
    """Rules 6-7 of :func:`analyse_recheck`: drifted or within, and how confidently."""
    res, res_se, k = est.residual, est.residual_stderr, rules.confidence_sigma
    tol = _lin(inp.tolerance_db)
    summary = (
        f"residual {_db(res):.1f} dB (1 sigma {_db(res_se):.1f} dB, upper {k:g}-sigma bound "
        f"{_db(res + k * res_se):.1f} dB) against the tolerance {inp.tolerance_db:g} dB"
    )
    if res > tol:
        confident = res - k * res_se > tol
        how = "confidently" if confident else "by the point estimate only"
        return _outcome(
            inp,
            RecheckDecision.DRIFTED,
            f"drifted ({how}): {summary}",
            confident=confident,
            **est.numbers,
        )
    confident = res + k * res_se < tol
    comfortable = res + k * res_se <= tol * _lin(-rules.comfort_db)
    how = "comfortably" if comfortable else ("confidently" if confident else "not confidently")
    return _outcome(
        inp,
        RecheckDecision.WITHIN,
        f"within tolerance ({how}): {summary}",
        confident=confident,
        comfortable=comfortable,
        **est.numbers,
    )


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
       ``model_mismatch``), unless it lies within ``rules.curvature_ratio`` (1.5) of the
       prior: then the prior's stderr is widened to the gap and the fit redone.
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
    inp = _checked_input(
        z_points, signal, stderr, z_stored, amplitude, tolerance_db, curvature_prior
    )
    unfit = _design_problem(inp)
    if unfit is not None:
        return _outcome(inp, RecheckDecision.BROKEN, *unfit)
    fit = _fit_ring(inp)
    if fit.coef is None:
        return _outcome(
            inp,
            RecheckDecision.BROKEN,
            "the probe points do not determine the paraboloid (degenerate design)",
            RejectionReason.FIT_FAILED,
            data_curvature=fit.data_curvature,
            data_curvature_stderr=fit.data_curvature_stderr,
        )
    widened = _widened_prior(inp, fit, rules)
    if widened is not None:
        inp, fit = _refit_widened(inp, widened)
    est = _estimate(inp, fit, rules)
    broken = _broken_by(inp, fit, est, rules)
    if broken is not None:
        return _outcome(inp, RecheckDecision.BROKEN, *broken, **est.numbers)
    out = _decide(inp, est, rules)
    if widened is not None:
        out = dataclasses.replace(out, reason=out.reason + (
            f"; the curvature {fit.data_curvature:.4g} is within x{rules.curvature_ratio:g} "
            f"of the calibration's, whose prior was widened to +/- {widened[1]:.2g}"))
    return out


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
