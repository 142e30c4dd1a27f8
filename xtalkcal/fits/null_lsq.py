"""Nonlinear least squares of the null model through lmfit, and the steps every nonlinear fit
shares: input matching, screening a sweep (too few points, coincident points), starting values,
bounded parameters, one least-squares pass, the verdict, and the estimate built from a fit and
its Fisher covariance. Also the Gaussian-noise fit :func:`fit_null_gaussian`; the binomial fit
:func:`~xtalkcal.fits.null_binomial.fit_null` builds on the same steps.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import lmfit
import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from xtalkcal.exceptions import FitInputError
from xtalkcal.fits.estimates import NullEstimate, NullFitValues
from xtalkcal.fits.null_model import fisher_covariance, null_signal_jacobian
from xtalkcal.fits.paraboloid import _as_complex, _as_real, _normalise, _paraboloid_core, _region_ok
from xtalkcal.fits.verdicts import (
    DEFAULT_RULES,
    NullModel,
    RejectionReason,
    Verdict,
    VerdictRules,
    _verdict_for,
)

# ---------------------------------------------------------------------------
# Inputs and the screened sweep
# ---------------------------------------------------------------------------


def _match_points(
    za: NDArray[np.complex128], **arrays: NDArray[np.float64]
) -> tuple[NDArray[np.float64], ...]:
    """Broadcast two per-point arrays to the points of ``za`` (as float copies).

    The error names the two arrays by their keywords and shows their shapes as they stood
    when the broadcast failed.
    """
    names = list(arrays)
    out = list(arrays.values())
    try:
        for i, a in enumerate(out):
            out[i] = np.broadcast_to(a, za.shape).astype(float)
    except ValueError:
        raise FitInputError(
            f"{names[0]} and {names[1]} must match z's {za.size} points, "
            f"got {out[0].shape} and {out[1].shape}"
        ) from None
    return tuple(out)


def _rejected(
    method: str,
    reason: RejectionReason,
    message: str,
    n_points: int,
    total_shots: int | None,
    dof: int,
    amplifications: tuple[int, ...],
) -> NullEstimate:
    """A rejected estimate: no values, no quality figure."""
    return NullEstimate(
        method=method,
        verdict=Verdict.REJECTED,
        reason=reason,
        message=message,
        n_points=n_points,
        total_shots=total_shots,
        reduced_chi2=math.nan,
        dof=dof,
        amplifications=amplifications,
    )


@dataclass(frozen=True)
class _Sweep:
    """One sweep in the fit's centred, scaled coordinates, with what its estimate records.

    ``zn = (z - centre) / scale``; the fits run on ``zn`` and map back at the end.
    """

    method: str
    zn: NDArray[np.complex128]
    centre: complex
    scale: float
    total_shots: int | None
    dof: int
    amplifications: tuple[int, ...]
    rules: VerdictRules

    @property
    def n_points(self) -> int:
        """Sweep points."""
        return int(self.zn.size)

    def rejected(self, reason: RejectionReason, message: str) -> NullEstimate:
        """This sweep's estimate, rejected for ``reason``."""
        return _rejected(
            self.method,
            reason,
            message,
            self.n_points,
            self.total_shots,
            self.dof,
            self.amplifications,
        )


def _screen(
    method: str,
    za: NDArray[np.complex128],
    n_par: int,
    model_phrase: str,
    total_shots: int | None,
    amplifications: tuple[int, ...],
    rules: VerdictRules,
) -> _Sweep | NullEstimate:
    """The normalised sweep, or the rejection of one that cannot be fitted at all.

    Rejected: fewer than ``max(rules.min_points, n_par + 1)`` points (``model_phrase`` names
    the model in the message), or all points at one place.
    """
    npts = za.size
    dof = npts - n_par
    need = max(rules.min_points, n_par + 1)
    if npts < need:
        return _rejected(
            method,
            RejectionReason.TOO_FEW_POINTS,
            f"{npts} sweep points; {model_phrase} needs at least {need}",
            npts,
            total_shots,
            dof,
            amplifications,
        )
    centre, scale, zn, degenerate = _normalise(za)
    sweep = _Sweep(
        method, zn, complex(centre), float(scale), total_shots, dof, amplifications, rules
    )
    if bool(degenerate):
        return sweep.rejected(RejectionReason.FIT_FAILED, "all sweep points coincide")
    return sweep


# ---------------------------------------------------------------------------
# Starting values
# ---------------------------------------------------------------------------


@dataclass
class _Start:
    """Starting values in normalised coordinates; ``kappa`` at amplification 1."""

    x: float
    y: float
    floor: float
    kappa: float  # normalised coordinates, amplification 1
    amp: float | None


def _start_from_initial(
    initial: NullEstimate | Mapping[str, Any],
    centre: complex,
    scale: float,
) -> _Start:
    """Starting values from an estimate or a mapping given in the original units."""
    if isinstance(initial, NullEstimate):
        v = initial.unchecked()
        zs, fl, ka, am = v.z_star, v.floor, v.curvature, v.amplitude
    elif isinstance(initial, Mapping):
        try:
            zs = complex(initial["z_star"])
            fl = float(initial["floor"])
            ka = float(initial["curvature"])
        except (KeyError, TypeError, ValueError) as err:
            raise FitInputError(
                "initial must be a NullEstimate or a mapping with keys "
                f"'z_star', 'floor', 'curvature' (optional 'amplitude'); got {dict(initial)!r}"
            ) from err
        am = initial.get("amplitude")
    else:
        raise FitInputError(
            f"initial must be a NullEstimate or a mapping, got {type(initial).__name__}"
        )
    zn = (zs - centre) / scale
    vals = [zn.real, zn.imag, fl, ka]
    if not all(math.isfinite(v) for v in vals):
        raise FitInputError("initial values must be finite")
    return _Start(zn.real, zn.imag, fl, ka * scale * scale, None if am is None else float(am))


def _default_start(
    zn: NDArray[np.complex128],
    s: NDArray[np.float64],
    sigma: NDArray[np.float64],
    k: NDArray[np.float64],
) -> _Start:
    """Starting values from per-amplification paraboloid fits, with fallbacks."""
    best: tuple[float, _Start] | None = None
    for kv in np.unique(k):
        sel = k == kv
        if np.count_nonzero(sel) < 5:
            continue
        raw, _, _, _ = _paraboloid_core(
            zn[sel][None, :], s[sel][None, :], 1 / sigma[sel][None, :] ** 2, True, DEFAULT_RULES
        )
        snr = float(raw["snr"][0])
        zs = complex(raw["z_star"][0])
        kap = float(raw["curvature"][0]) / (kv * kv)
        if not (math.isfinite(snr) and snr > 0 and abs(zs) < 4):
            continue
        cand = _Start(zs.real, zs.imag, float(raw["floor"][0]), kap, None)
        if best is None or snr > best[0]:
            best = (snr, cand)
    if best is not None:
        return best[1]
    # Fallback: the lowest point is near the null; curvature from the spread.
    i = int(np.argmin(s))
    z0 = zn[i]
    r2 = np.abs(zn - z0) ** 2
    kmax = float(np.max(k))
    spread = float(np.max(s) - np.min(s))
    kap = max(spread, 1e-3) / max(float(np.max(r2)), 1e-12) / (kmax * kmax)
    return _Start(z0.real, z0.imag, float(np.min(s)), kap, None)


def _start_values(
    initial: NullEstimate | Mapping[str, Any] | None,
    sweep: _Sweep,
    s: NDArray[np.float64],
    sigma: NDArray[np.float64],
    k: NDArray[np.float64],
    *,
    second_ceiling: bool = False,
) -> list[_Start]:
    """Starting values: the caller's if given, else those from the data.

    With ``second_ceiling`` (saturating model) and no caller's values, a second start follows
    with the fringe ceiling at the data maximum.
    """
    if initial is not None:
        return [_start_from_initial(initial, sweep.centre, sweep.scale)]
    st = _default_start(sweep.zn, s, sigma, k)
    if not second_ceiling:
        return [st]
    top = float(np.max(s)) - max(st.floor, 0.0)
    alt_amp = float(np.clip(top, 0.02, 0.999 * (1 - max(st.floor, 0.0))))
    return [st, _Start(st.x, st.y, st.floor, st.kappa, alt_amp)]


# ---------------------------------------------------------------------------
# One least-squares pass with lmfit
# ---------------------------------------------------------------------------


@dataclass
class _LmfitOutcome:
    """What one fit of a branch returns: normalised values, convergence, objective."""

    values: dict[str, float]
    success: bool
    objective: float  # -2 log-likelihood (up to a constant) or chi-square
    nfev: int


def _make_params(
    st: _Start, model: NullModel, bounded_floor: bool, hold_ceiling: bool = False
) -> lmfit.Parameters:
    """lmfit parameters ``x, y, floor, kappa`` (and ``frac = A / (1 - S0)``) with their bounds.

    ``bounded_floor`` keeps ``S0`` a probability; ``hold_ceiling`` fixes ``frac = 1``.
    """
    lim = 5.0  # normalised units: 5 sweep radii from the centroid
    pars = lmfit.Parameters()
    pars.add("x", value=float(np.clip(st.x, -lim * 0.99, lim * 0.99)), min=-lim, max=lim)
    pars.add("y", value=float(np.clip(st.y, -lim * 0.99, lim * 0.99)), min=-lim, max=lim)
    if bounded_floor:
        pars.add("floor", value=float(np.clip(st.floor, 1e-6, 0.95)), min=0.0, max=1.0)
    else:
        pars.add("floor", value=float(st.floor))
    pars.add("kappa", value=float(max(st.kappa, 1e-6)), min=1e-12)
    if model == "saturating":
        amp = st.amp if st.amp is not None else 0.98 * (1 - st.floor)
        frac = amp / max(1 - pars["floor"].value, 1e-6)
        if hold_ceiling:
            pars.add("frac", value=1.0, vary=False)
        else:
            pars.add("frac", value=float(np.clip(frac, 1e-3, 1 - 1e-6)), min=1e-4, max=1.0)
    return pars


def _model_mean(zn: Any, k: Any, v: Mapping[str, float], model: NullModel) -> Any:
    """Mean signal of the model at the normalised values ``v``."""
    amp = (1 - v["floor"]) * v["frac"] if model == "saturating" else math.nan
    p, _ = null_signal_jacobian(zn, k, v["x"], v["y"], v["floor"], v["kappa"], amp, model)
    return p


def _weighted_residual(
    zn: NDArray[np.complex128],
    k: NDArray[np.float64],
    s: NDArray[np.float64],
    weight: NDArray[np.float64],
    model: NullModel,
) -> Callable[[lmfit.Parameters], NDArray[np.float64]]:
    """Residual ``(s - model) * weight`` for lmfit.

    ``weight`` is read at every call, so a caller may update it in place between passes.
    """

    def residual(params: lmfit.Parameters) -> NDArray[np.float64]:
        r: NDArray[np.float64] = (s - _model_mean(zn, k, params.valuesdict(), model)) * weight
        return r

    return residual


def _lmfit_least_squares(residual: Any, pars: lmfit.Parameters) -> lmfit.minimizer.MinimizerResult:
    """lmfit's trust-region least squares (native bounds).

    lmfit always derives its own covariance after ``least_squares``; we do not
    use it (the covariance here is the Fisher one, with bounded parameters
    held), and its floating-point warnings on an ill-conditioned Jacobian --
    e.g. a parameter resting on a bound -- are silenced for that reason only.
    """
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return lmfit.minimize(residual, pars, method="least_squares")


# ---------------------------------------------------------------------------
# Verdict and estimate
# ---------------------------------------------------------------------------


def _null_verdict(
    *,
    zn: NDArray[np.complex128],
    zs_n: complex,
    snr: float,
    chi2: float,
    dof: int,
    u_min: float | None,
    floor: float | None,
    rules: VerdictRules,
) -> tuple[RejectionReason, str]:
    """Reason and message for a converged fit; the first rule that fails wins.

    ``floor`` (binomial fits) is checked against the saturation floor and ``u_min``
    (saturating model) against the saturation phase; ``None`` skips either check.
    """
    if floor is not None and floor >= rules.saturation_floor:
        return (
            RejectionReason.SATURATED,
            f"the fitted floor sits at {floor:.3f} >= {rules.saturation_floor:g}: the "
            "signal is pinned near its ceiling and no null is in view",
        )
    if not snr >= rules.min_curvature_snr:
        return (
            RejectionReason.NO_SIGNAL,
            f"curvature is not significantly positive (kappa/stderr = {snr:.2f}, "
            f"need >= {rules.min_curvature_snr:g})",
        )
    if u_min is not None and u_min > rules.saturation_phase:
        return (
            RejectionReason.SATURATED,
            f"the data never come near the floor: even the sweep point nearest the null "
            f"is {u_min:.2f} rad up the fringe (limit {rules.saturation_phase:.2f}), so the "
            "curvature is not identified",
        )
    if not bool(_region_ok(zn, np.asarray(zs_n), rules.region_margin)):
        return (
            RejectionReason.OUTSIDE_REGION,
            f"the fitted null lies outside the swept region ({abs(zs_n):.2f} sweep radii "
            "from the centroid)",
        )
    if dof > 0:
        pv = float(stats.chi2.sf(chi2, dof))
        if pv < rules.mismatch_pvalue:
            return (
                RejectionReason.MODEL_MISMATCH,
                f"the model does not describe the data (chi-square {chi2:.1f} on {dof} dof, "
                f"tail probability {pv:.2g})",
            )
    return RejectionReason.NONE, "accepted"


def _judged(
    sweep: _Sweep,
    v: Mapping[str, float],
    names: list[str],
    cov: NDArray[np.float64],
    chi2: float,
    success: bool,
    *,
    checks_floor: bool,
    u_min: float | None = None,
    amplitude: float | None = None,
) -> NullEstimate:
    """The estimate of a finished fit, with its verdict, in the original units.

    ``v`` holds the normalised values (``x``, ``y``, ``floor``, ``kappa``); ``cov`` is their
    Fisher covariance over the free parameters ``names`` (a held parameter is missing from
    ``names`` and its stderr is NaN). ``success`` is the optimizer's convergence;
    ``checks_floor`` applies the saturation-floor rule; ``amplitude`` (saturating model) is
    reported with the stderr of ``amp``.
    """
    se = {nm: math.sqrt(max(cov[i, i], 0.0)) for i, nm in enumerate(names)}
    kap_se = se["kappa"]
    snr = v["kappa"] / kap_se if kap_se > 0 else math.inf
    zs_n = complex(v["x"], v["y"])
    if not success:
        reason, message = RejectionReason.FIT_FAILED, "the optimizer did not converge"
    else:
        reason, message = _null_verdict(
            zn=sweep.zn,
            zs_n=zs_n,
            snr=snr,
            chi2=chi2,
            dof=sweep.dof,
            u_min=u_min,
            floor=v["floor"] if checks_floor else None,
            rules=sweep.rules,
        )
    scale = sweep.scale
    values = NullFitValues(
        z_star=sweep.centre + scale * zs_n,
        covariance=cov[:2, :2] * scale * scale,
        floor=v["floor"],
        floor_stderr=se.get("floor", math.nan),
        curvature=v["kappa"] / scale**2,
        curvature_stderr=kap_se / scale**2,
        amplitude=amplitude,
        amplitude_stderr=None if amplitude is None else se.get("amp", math.nan),
    )
    dof = sweep.dof
    return NullEstimate(
        method=sweep.method,
        verdict=_verdict_for(reason),
        reason=reason,
        message=message,
        n_points=sweep.n_points,
        total_shots=sweep.total_shots,
        reduced_chi2=chi2 / dof if dof > 0 else math.nan,
        dof=dof,
        amplifications=sweep.amplifications,
        _values=values,
    )


# ---------------------------------------------------------------------------
# Gaussian-noise fit
# ---------------------------------------------------------------------------


def fit_null_gaussian(
    z: ArrayLike,
    s: ArrayLike,
    sigma: ArrayLike,
    *,
    initial: NullEstimate | Mapping[str, Any] | None = None,
    rules: VerdictRules = DEFAULT_RULES,
) -> NullEstimate:
    """Fit the paraboloid ``S = S0 + kappa |z - z*|**2`` to Gaussian data with lmfit.

    For signals with a known standard error rather than counts -- the Stark
    phase of a quadrature Ramsey (rad). The signal must be oriented so the
    null is a *minimum* (the Stark probe multiplies by the sign of the
    detuning). Parameters ``x*, y*, S0`` (unbounded) and ``kappa > 0`` are fit
    directly, weighted by ``1/sigma**2``, with an absolute covariance (inverse
    Fisher information). Within the region where the paraboloid holds this is
    the same estimator as :func:`fit_paraboloid` with sigma, reparametrised,
    so the two agree; this variant gives the nonlinear machinery (starting
    values, bounds, a common result type) for the Gaussian case.

    Parameters
    ----------
    z : array_like of complex, shape (n,)
        Cancellation-tone amplitudes (fraction of full scale).
    s, sigma : array_like of float, shape (n,)
        Signal and its standard error (same units, e.g. rad).
    initial : NullEstimate or mapping, optional
        Starting values; default from :func:`fit_paraboloid`.
    rules : VerdictRules

    Notes
    -----
    Verdicts as :func:`fit_paraboloid` with sigma (no ``saturated``).
    """
    za, sa, sg = _gaussian_inputs(z, s, sigma)
    sweep = _screen("lmfit_paraboloid_gaussian", za, 4, "the paraboloid", None, (1,), rules)
    if isinstance(sweep, NullEstimate):
        return sweep
    ones = np.ones(sweep.n_points)
    (st,) = _start_values(initial, sweep, sa, sg, ones)
    inv_sig = 1 / sg
    out = _lmfit_least_squares(
        _weighted_residual(sweep.zn, ones, sa, inv_sig, "paraboloid"),
        _make_params(st, "paraboloid", bounded_floor=False),
    )
    v = dict(out.params.valuesdict())
    if not all(math.isfinite(x) for x in v.values()):
        return sweep.rejected(
            RejectionReason.FIT_FAILED, "the optimizer returned non-finite values"
        )
    p, jac = null_signal_jacobian(
        sweep.zn, ones, v["x"], v["y"], v["floor"], v["kappa"], math.nan, "paraboloid"
    )
    chi2 = float(np.sum(((sa - p) * inv_sig) ** 2))
    cov = fisher_covariance(jac.T @ (jac * (inv_sig**2)[:, None]))
    if not np.all(np.isfinite(cov[:2, :2])):
        return sweep.rejected(RejectionReason.FIT_FAILED, "the data do not identify the null")
    names = ["x", "y", "floor", "kappa"]
    return _judged(sweep, v, names, cov, chi2, bool(out.success), checks_floor=False)


def _gaussian_inputs(
    z: ArrayLike, s: ArrayLike, sigma: ArrayLike
) -> tuple[NDArray[np.complex128], NDArray[np.float64], NDArray[np.float64]]:
    """Checked inputs of :func:`fit_null_gaussian`: one sweep, a positive sigma per point."""
    za = _as_complex(z, "z")
    if za.ndim != 1:
        raise FitInputError(f"fit_null_gaussian takes one sweep: z must be 1-D, got {za.shape}")
    sa, sg = _match_points(za, s=_as_real(s, "s"), sigma=_as_real(sigma, "sigma"))
    if np.any(sg <= 0):
        raise FitInputError("sigma must be positive at every point")
    return za, sa, sg
