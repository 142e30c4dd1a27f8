"""Nonlinear null fits: the full fringe model, least squares through lmfit, and the binomial
(shot-noise exact) path with its Fisher covariance.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import lmfit
import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from xtalkcal.exceptions import FitInputError
from xtalkcal.fits.estimates import NullEstimate, NullFitValues
from xtalkcal.fits.paraboloid import (
    _as_complex,
    _as_real,
    _counts_shots,
    _normalise,
    _paraboloid_core,
    _region_ok,
    binomial_signal,
)
from xtalkcal.fits.verdicts import (
    _BRANCH_PREFERENCE,
    DEFAULT_RULES,
    NullModel,
    RejectionReason,
    Verdict,
    VerdictRules,
)

# ---------------------------------------------------------------------------
# Nonlinear null models (shared with xtalkcal.calibrate)
# ---------------------------------------------------------------------------


def null_signal(
    z: ArrayLike,
    z_star: complex,
    floor: float,
    curvature: float,
    *,
    amplitude: float | None = None,
    amplification: ArrayLike = 1,
) -> NDArray[np.float64]:
    """Mean error signal of the null model at amplitudes ``z``.

    ``amplitude=None`` gives the paraboloid ``S0 + K**2 kappa |z - z*|**2``;
    otherwise the saturating ``S0 + A sin(K sqrt(kappa/A) |z - z*|)**2``.

    Parameters
    ----------
    z : array_like of complex
        Cancellation-tone amplitudes (fraction of full scale).
    z_star : complex
        Null (fraction of full scale).
    floor : float
        ``S0`` (signal units).
    curvature : float
        ``kappa`` at amplification 1 (signal per full-scale fraction squared).
    amplitude : float, optional
        Fringe amplitude ``A`` (probability).
    amplification : int or array_like of int
        Error amplification ``K`` per point.
    """
    zz = np.asarray(z, dtype=complex)
    kk = np.broadcast_to(np.asarray(amplification, dtype=float), zz.shape)
    model: NullModel = "paraboloid" if amplitude is None else "saturating"
    p, _ = null_signal_jacobian(
        zz.ravel(),
        kk.ravel(),
        z_star.real,
        z_star.imag,
        floor,
        curvature,
        math.nan if amplitude is None else amplitude,
        model,
    )
    return p.reshape(zz.shape)


def null_signal_jacobian(
    z: NDArray[np.complex128],
    k: NDArray[np.float64],
    xs: float,
    ys: float,
    floor: float,
    kappa: float,
    amp: float,
    model: NullModel,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Mean signal and its Jacobian w.r.t. (x*, y*, S0, kappa[, A]).

    The Jacobian uses the sinc form so it stays exact at the null:
    ``dS/dx* = -2 K**2 kappa sinc(2u) (x - x*)``, ``dS/dkappa = K**2 r**2 sinc(2u)``,
    ``dS/dA = sin(u)**2 - u**2 sinc(2u)`` with ``u = K sqrt(kappa/A) r`` and
    ``sinc(t) = sin(t)/t``.
    """
    dx = z.real - xs
    dy = z.imag - ys
    r2 = dx * dx + dy * dy
    k2 = k * k
    if model == "paraboloid":
        p = floor + k2 * kappa * r2
        jac = np.stack([-2 * k2 * kappa * dx, -2 * k2 * kappa * dy, np.ones_like(r2), k2 * r2], -1)
        return p, jac
    q = math.sqrt(max(kappa, 0.0) / amp)
    u = k * q * np.sqrt(r2)
    sin_u = np.sin(u)
    sinc2u = np.sinc(2 * u / np.pi)  # numpy's sinc is sin(pi t)/(pi t)
    p = floor + amp * sin_u * sin_u
    jac = np.stack(
        [
            -2 * k2 * kappa * sinc2u * dx,
            -2 * k2 * kappa * sinc2u * dy,
            np.ones_like(r2),
            k2 * r2 * sinc2u,
            sin_u * sin_u - u * u * sinc2u,
        ],
        -1,
    )
    return p, jac


def fisher_covariance(info: NDArray[np.float64], n_interest: int = 2) -> NDArray[np.float64]:
    """Covariance from a Fisher matrix, nuisance parameters marginalised.

    The interest block is the inverse of the Schur complement
    ``I_xx - I_xn pinv(I_nn) I_nx``; the pseudo-inverse lets a design that
    cannot separate some nuisance parameters (one ring centred on the null
    cannot tell S0 from kappa) still bound the null, as long as the null
    itself is identified. The full matrix returned has the interest block
    replaced accordingly; nuisance entries come from the pseudo-inverse.
    Returns all-inf when the interest block is not identified.
    """
    d = np.sqrt(np.clip(np.diag(info), 0, None))
    if not np.all(d[:n_interest] > 0):
        return np.full(info.shape, np.inf)
    d = np.where(d > 0, d, 1.0)
    im = info / np.outer(d, d)
    ixx = im[:n_interest, :n_interest]
    ixn = im[:n_interest, n_interest:]
    inn = im[n_interest:, n_interest:]
    inn_pinv = np.linalg.pinv(inn, rcond=1e-12, hermitian=True)
    schur = ixx - ixn @ inn_pinv @ ixn.T
    ev = np.linalg.eigvalsh(schur)
    if not ev[0] > 1e-12 * max(ev[-1], 1e-300):
        return np.full(info.shape, np.inf)
    cov = np.linalg.pinv(im, rcond=1e-12, hermitian=True)
    cov[:n_interest, :n_interest] = np.linalg.inv(schur)
    out: NDArray[np.float64] = cov / np.outer(d, d)
    return out


# ---------------------------------------------------------------------------
# Nonlinear fits with lmfit
# ---------------------------------------------------------------------------


@dataclass
class _Start:
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


@dataclass
class _LmfitOutcome:
    values: dict[str, float]
    success: bool
    objective: float  # -2 log-likelihood (up to a constant) or chi-square
    nfev: int


def _make_params(
    st: _Start, model: NullModel, bounded_floor: bool, hold_ceiling: bool = False
) -> lmfit.Parameters:
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
    amp = (1 - v["floor"]) * v["frac"] if model == "saturating" else math.nan
    p, _ = null_signal_jacobian(zn, k, v["x"], v["y"], v["floor"], v["kappa"], amp, model)
    return p


def _lmfit_least_squares(residual: Any, pars: lmfit.Parameters) -> lmfit.minimizer.MinimizerResult:
    """lmfit's trust-region least squares (native bounds).

    lmfit always derives its own covariance after ``least_squares``; we do not
    use it (the covariance here is the Fisher one, with bounded parameters
    held), and its floating-point warnings on an ill-conditioned Jacobian --
    e.g. a parameter resting on a bound -- are silenced for that reason only.
    """
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return lmfit.minimize(residual, pars, method="least_squares")


def _binomial_irls(
    zn: NDArray[np.complex128],
    kc: NDArray[np.float64],
    n: NDArray[np.float64],
    ka: NDArray[np.float64],
    st: _Start,
    model: NullModel,
    max_iter: int = 8,
    hold_ceiling: bool = False,
) -> _LmfitOutcome:
    """Binomial maximum likelihood by iterated reweighting around lmfit.

    Each pass minimises ``sum w_i (k_i/n_i - p_i(theta))**2`` with weights
    ``w_i = n_i / (p~_i (1 - p~_i))`` frozen at the previous pass's model.
    At the fixed point the normal equations coincide with the binomial score
    equations, so the result is the maximum-likelihood estimate.
    """
    p_obs = kc / n
    pars = _make_params(st, model, bounded_floor=True, hold_ceiling=hold_ceiling)
    lo, hi = 0.5 / n, 1 - 0.5 / n
    p_prev = np.clip(_model_mean(zn, ka, pars.valuesdict(), model), lo, hi)
    sqrt_w = np.sqrt(n / (p_prev * (1 - p_prev)))

    def residual(params: lmfit.Parameters) -> NDArray[np.float64]:
        r: NDArray[np.float64] = (p_obs - _model_mean(zn, ka, params.valuesdict(), model)) * sqrt_w
        return r

    success = True
    nfev = 0
    for _ in range(max_iter):
        out = _lmfit_least_squares(residual, pars)
        nfev += int(out.nfev)
        success = bool(out.success)
        pars = out.params
        p_new = np.clip(_model_mean(zn, ka, pars.valuesdict(), model), lo, hi)
        # Converged when the weights no longer move on the scale of the noise.
        change = np.max(np.abs(p_new - p_prev) / np.sqrt(p_prev * (1 - p_prev) / n))
        p_prev = p_new
        sqrt_w[:] = np.sqrt(n / (p_new * (1 - p_new)))
        if change < 1e-3:
            break
    p_fit = np.clip(_model_mean(zn, ka, pars.valuesdict(), model), 1e-12, 1 - 1e-12)
    nll2 = -2.0 * float(np.sum(kc * np.log(p_fit) + (n - kc) * np.log1p(-p_fit)))
    return _LmfitOutcome(dict(pars.valuesdict()), success, nll2, nfev)


def _null_verdict(
    *,
    zn: NDArray[np.complex128],
    zs_n: complex,
    snr: float,
    chi2: float,
    dof: int,
    checks_mismatch: bool,
    u_min: float | None,
    floor: float | None,
    rules: VerdictRules,
) -> tuple[RejectionReason, str]:
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
    if checks_mismatch and dof > 0:
        pv = float(stats.chi2.sf(chi2, dof))
        if pv < rules.mismatch_pvalue:
            return (
                RejectionReason.MODEL_MISMATCH,
                f"the model does not describe the data (chi-square {chi2:.1f} on {dof} dof, "
                f"tail probability {pv:.2g})",
            )
    return RejectionReason.NONE, "accepted"


def _rejected(
    method: str,
    reason: RejectionReason,
    message: str,
    n_points: int,
    total_shots: int | None,
    dof: int,
    amplifications: tuple[int, ...],
) -> NullEstimate:
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


def _amplification_array(amplification: ArrayLike, n: int) -> NDArray[np.float64]:
    ka = _as_real(amplification, "amplification")
    try:
        ka = np.broadcast_to(ka, (n,)).astype(float)
    except ValueError:
        raise FitInputError(
            f"amplification must be a scalar or one value per point ({n}), got shape {ka.shape}"
        ) from None
    if np.any(ka < 1) or np.any(ka != np.round(ka)):
        raise FitInputError("amplification must be a positive integer at every point")
    return ka


def fit_null(
    z: ArrayLike,
    counts: ArrayLike,
    shots: ArrayLike,
    *,
    model: NullModel = "saturating",
    initial: NullEstimate | Mapping[str, Any] | None = None,
    amplification: ArrayLike = 1,
    min_amplitude: float = 0.2,
    rules: VerdictRules = DEFAULT_RULES,
) -> NullEstimate:
    """Fit the nonlinear null model to binomial counts with lmfit.

    Models (``K`` the amplification of each point, ``r = |z - z*|``):

    ``"saturating"``
        ``S = S0 + A sin(K sqrt(kappa/A) r)**2`` -- the paraboloid near the
        null, saturating at ``S0 + A`` as a driven rotation does. Parameters
        ``x*, y*, S0 in [0, 1], kappa > 0`` and ``A = (1 - S0) f`` with
        ``f in (0, 1]`` (so the ceiling never exceeds 1).
    ``"paraboloid"``
        ``S = S0 + K**2 kappa r**2``.

    Data taken at several amplifications share ``z*``, ``S0`` and ``A``
    while the curvature scales as ``K**2`` (the aggressor's error amplitude
    adds coherently over ``K`` repetitions); the fit is joint over all points,
    so every shot informs every shared parameter and groups too weak to fit on
    their own still contribute.

    The fringe amplitude ``A`` is left free only when the data demand it:
    the saturating fit is also run with the ceiling held at 1 (``A = 1 - S0``,
    which is the paraboloid until the fringe top) and the free-``A`` result
    is kept only when it lowers ``-2 log L`` by more than 9 (a 3-sigma
    likelihood-ratio test for the one extra parameter). Data that stay in
    the quadratic region cannot tell ``A`` from ``kappa``; holding the ceiling
    keeps the curvature identified there.

    Weighting: binomial variance of the *model*, iterated -- each lmfit
    least-squares pass uses weights ``shots / (p (1 - p))`` from the previous
    pass's model until they stop moving; the fixed point is the binomial
    maximum-likelihood estimate. The covariance is the inverse expected
    Fisher information at the estimate (analytic Jacobian), with any
    parameter sitting on a bound held there (``S0 = 0``, or ``f = 1`` i.e.
    ``A = 1 - S0``; the latter is typical when the data stay in the quadratic
    region and leave ``A`` unidentified). The fit runs in centred, scaled
    coordinates; inputs are never modified.

    Parameters
    ----------
    z : array_like of complex, shape (n,)
        Cancellation-tone amplitudes (fraction of full scale).
    counts, shots : array_like of int, shape (n,)
        Signalling counts and shots per point (shots may be a scalar).
    model : {"saturating", "paraboloid"}
    initial : NullEstimate or mapping, optional
        Starting values (``z_star``, ``floor``, ``curvature`` at K = 1,
        optional ``amplitude``). Default: the linear paraboloid fit of the
        best-determined amplification group; for the saturating model two
        starts (ceiling near 1, and ceiling at the data maximum) are tried.
    amplification : int or array_like of int
        Error amplification ``K`` per point (default 1).
    min_amplitude : float
        Smallest fringe amplitude ``A`` a free-``A`` fit may report
        (probability). Driven rotations and leakage fringes reach nearly full
        contrast (a detuned drive flattens the quadratic rise rather than
        lowering the ceiling), so a free fit that lands on a small ``A`` is
        discarded in favour of the held ceiling.
    rules : VerdictRules

    Returns
    -------
    NullEstimate
        ``method`` is ``"lmfit_<model>_binomial"``; ``curvature`` at K = 1.

    Raises
    ------
    FitInputError
        Bad shapes, non-finite values, counts outside ``[0, shots]``, bad
        amplification or unknown model.

    Notes
    -----
    Verdict rules, first match wins: ``too_few_points`` (fewer than
    ``max(rules.min_points, n_parameters + 1)`` points); ``fit_failed``
    (optimizer failure, non-finite result, or a Fisher matrix that does not
    identify the null); ``saturated`` (fitted floor >= ``rules.saturation_floor``);
    ``no_signal`` (``kappa/stderr < 3``); ``saturated`` (saturating model:
    the nearest point is more than ``rules.saturation_phase`` up the fringe --
    the data never come near the floor); ``outside_region`` (as in
    :func:`fit_paraboloid`); ``model_mismatch`` (Pearson chi-square tail
    probability < ``rules.mismatch_pvalue``).
    """
    if model not in ("saturating", "paraboloid"):
        raise FitInputError(f"model must be 'saturating' or 'paraboloid', got {model!r}")
    if not 0 <= min_amplitude < 1:
        raise FitInputError(f"min_amplitude must be in [0, 1), got {min_amplitude!r}")
    za = _as_complex(z, "z")
    if za.ndim != 1:
        raise FitInputError(f"fit_null takes one sweep: z must be 1-D, got shape {za.shape}")
    kc, n = _counts_shots(counts, shots)
    try:
        kc = np.broadcast_to(kc, za.shape).astype(float)
        n = np.broadcast_to(n, za.shape).astype(float)
    except ValueError:
        raise FitInputError(
            f"counts and shots must match z's {za.size} points, got {kc.shape} and {n.shape}"
        ) from None
    ka = _amplification_array(amplification, za.size)
    amps = tuple(int(v) for v in np.unique(ka))
    method = f"lmfit_{model}_binomial"
    n_par = 5 if model == "saturating" else 4
    npts = za.size
    total = int(np.sum(n))
    dof = npts - n_par
    if npts < max(rules.min_points, n_par + 1):
        return _rejected(
            method,
            RejectionReason.TOO_FEW_POINTS,
            f"{npts} sweep points; the {model} model needs at least "
            f"{max(rules.min_points, n_par + 1)}",
            npts,
            total,
            dof,
            amps,
        )
    centre_a, scale_a, zn_a, degenerate = _normalise(za)
    centre, scale, zn = complex(centre_a), float(scale_a), zn_a
    if bool(degenerate):
        return _rejected(
            method, RejectionReason.FIT_FAILED, "all sweep points coincide", npts, total, dof, amps
        )
    p_obs, sig = binomial_signal(kc, n)
    if initial is not None:
        starts = [_start_from_initial(initial, centre, scale)]
    else:
        st = _default_start(zn, p_obs, sig, ka)
        starts = [st]
        if model == "saturating":
            top = float(np.max(p_obs)) - max(st.floor, 0.0)
            alt_amp = float(np.clip(top, 0.02, 0.999 * (1 - max(st.floor, 0.0))))
            starts.append(_Start(st.x, st.y, st.floor, st.kappa, alt_amp))

    def finite(o: _LmfitOutcome) -> bool:
        return all(math.isfinite(v) for v in o.values.values())

    free = [o for o in (_binomial_irls(zn, kc, n, ka, s, model) for s in starts) if finite(o)]
    candidates = free
    if model == "saturating":
        # A is free only when the data demand it. With the data in the
        # quadratic region, a small A trades against kappa on noise alone; the
        # fit with the ceiling held at 1 (A = 1 - S0) is then kept unless the
        # free fit beats it clearly (likelihood ratio, -2 log L lower by > 9).
        held = _binomial_irls(zn, kc, n, ka, starts[0], model, hold_ceiling=True)
        candidates = [held] if finite(held) else []
        # A fringe that tops out far below full contrast is not what a driven
        # rotation or leakage does; such a branch is a flat, noisy landscape
        # masquerading as a saturated one.
        free = [o for o in free if (1 - o.values["floor"]) * o.values["frac"] >= min_amplitude]
        if free:
            best_free = min(free, key=lambda o: o.objective)
            if not candidates or best_free.objective < held.objective - _BRANCH_PREFERENCE:
                candidates = [best_free]
    if not candidates:
        return _rejected(
            method,
            RejectionReason.FIT_FAILED,
            "the optimizer returned non-finite values",
            npts,
            total,
            dof,
            amps,
        )
    best = min(candidates, key=lambda o: o.objective)
    return _finish_binomial(best, zn, kc, n, ka, centre, scale, model, rules, method, amps)


def _finish_binomial(
    best: _LmfitOutcome,
    zn: NDArray[np.complex128],
    kc: NDArray[np.float64],
    n: NDArray[np.float64],
    ka: NDArray[np.float64],
    centre: complex,
    scale: float,
    model: NullModel,
    rules: VerdictRules,
    method: str,
    amps: tuple[int, ...],
) -> NullEstimate:
    v = best.values
    npts = zn.size
    total = int(np.sum(n))
    n_par = 5 if model == "saturating" else 4
    dof = npts - n_par
    floor = v["floor"]
    amp = (1 - floor) * v["frac"] if model == "saturating" else math.nan
    p, jac = null_signal_jacobian(zn, ka, v["x"], v["y"], floor, v["kappa"], amp, model)
    pt = np.clip(p, 0.5 / n, 1 - 0.5 / n)
    w = n / (pt * (1 - pt))
    chi2 = float(np.sum((kc - n * p) ** 2 / (n * pt * (1 - pt))))

    # Free parameters for the covariance; those on a bound are held there.
    cols = [jac[:, 0], jac[:, 1]]
    names = ["x", "y"]
    floor_at_bound = floor <= 1e-9
    frac_at_bound = model == "saturating" and v["frac"] >= 1 - 1e-7
    if not floor_at_bound:
        # With A = 1 - S0 held, moving S0 also moves A by -1.
        cols.append(jac[:, 2] - (jac[:, 4] if frac_at_bound else 0.0))
        names.append("floor")
    cols.append(jac[:, 3])
    names.append("kappa")
    if model == "saturating" and not frac_at_bound:
        cols.append(jac[:, 4])
        names.append("amp")
    jf = np.stack(cols, axis=-1)
    info = jf.T @ (jf * w[:, None])
    cov = fisher_covariance(info)
    if not np.all(np.isfinite(cov[:2, :2])):
        return _rejected(
            method,
            RejectionReason.FIT_FAILED,
            "the data do not identify the null (singular Fisher information)",
            npts,
            total,
            dof,
            amps,
        )
    se = {nm: math.sqrt(max(cov[i, i], 0.0)) for i, nm in enumerate(names)}
    floor_se = se.get("floor", math.nan)
    if model == "saturating":
        amp_se = se["amp"] if "amp" in se else math.nan
    kap_se = se["kappa"]
    snr = v["kappa"] / kap_se if kap_se > 0 else math.inf
    zs_n = complex(v["x"], v["y"])
    u_min = None
    if model == "saturating":
        q = math.sqrt(v["kappa"] / amp)
        u_min = float(np.min(ka * q * np.abs(zn - zs_n)))
    reason, message = (
        (RejectionReason.FIT_FAILED, "the optimizer did not converge")
        if not best.success
        else _null_verdict(
            zn=zn,
            zs_n=zs_n,
            snr=snr,
            chi2=chi2,
            dof=dof,
            checks_mismatch=True,
            u_min=u_min,
            floor=floor,
            rules=rules,
        )
    )
    values = NullFitValues(
        z_star=centre + scale * zs_n,
        covariance=cov[:2, :2] * scale * scale,
        floor=floor,
        floor_stderr=floor_se,
        curvature=v["kappa"] / scale**2,
        curvature_stderr=kap_se / scale**2,
        amplitude=amp if model == "saturating" else None,
        amplitude_stderr=amp_se if model == "saturating" else None,
    )
    return NullEstimate(
        method=method,
        verdict=Verdict.ACCEPTED if reason is RejectionReason.NONE else Verdict.REJECTED,
        reason=reason,
        message=message,
        n_points=npts,
        total_shots=total,
        reduced_chi2=chi2 / dof if dof > 0 else math.nan,
        dof=dof,
        amplifications=amps,
        _values=values,
    )


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
    za = _as_complex(z, "z")
    if za.ndim != 1:
        raise FitInputError(f"fit_null_gaussian takes one sweep: z must be 1-D, got {za.shape}")
    sa = _as_real(s, "s")
    sg = _as_real(sigma, "sigma")
    try:
        sa = np.broadcast_to(sa, za.shape).astype(float)
        sg = np.broadcast_to(sg, za.shape).astype(float)
    except ValueError:
        raise FitInputError(
            f"s and sigma must match z's {za.size} points, got {sa.shape} and {sg.shape}"
        ) from None
    if np.any(sg <= 0):
        raise FitInputError("sigma must be positive at every point")
    method = "lmfit_paraboloid_gaussian"
    npts = za.size
    dof = npts - 4
    if npts < max(rules.min_points, 5):
        return _rejected(
            method,
            RejectionReason.TOO_FEW_POINTS,
            f"{npts} sweep points; the paraboloid needs at least {max(rules.min_points, 5)}",
            npts,
            None,
            dof,
            (1,),
        )
    centre_a, scale_a, zn, degenerate = _normalise(za)
    centre, scale = complex(centre_a), float(scale_a)
    if bool(degenerate):
        return _rejected(
            method, RejectionReason.FIT_FAILED, "all sweep points coincide", npts, None, dof, (1,)
        )
    ones = np.ones(npts)
    if initial is not None:
        st = _start_from_initial(initial, centre, scale)
    else:
        st = _default_start(zn, sa, sg, ones)
    pars = _make_params(st, "paraboloid", bounded_floor=False)
    inv_sig = 1 / sg

    def residual(params: lmfit.Parameters) -> NDArray[np.float64]:
        r: NDArray[np.float64] = (
            sa - _model_mean(zn, ones, params.valuesdict(), "paraboloid")
        ) * inv_sig
        return r

    out = _lmfit_least_squares(residual, pars)
    v = dict(out.params.valuesdict())
    if not all(math.isfinite(x) for x in v.values()):
        return _rejected(
            method,
            RejectionReason.FIT_FAILED,
            "the optimizer returned non-finite values",
            npts,
            None,
            dof,
            (1,),
        )
    p, jac = null_signal_jacobian(
        zn, ones, v["x"], v["y"], v["floor"], v["kappa"], math.nan, "paraboloid"
    )
    chi2 = float(np.sum(((sa - p) * inv_sig) ** 2))
    info = jac.T @ (jac * (inv_sig**2)[:, None])
    cov = fisher_covariance(info)
    if not np.all(np.isfinite(cov[:2, :2])):
        return _rejected(
            method,
            RejectionReason.FIT_FAILED,
            "the data do not identify the null",
            npts,
            None,
            dof,
            (1,),
        )
    kap_se = math.sqrt(max(cov[3, 3], 0.0))
    snr = v["kappa"] / kap_se if kap_se > 0 else math.inf
    zs_n = complex(v["x"], v["y"])
    if not out.success:
        reason, message = RejectionReason.FIT_FAILED, "the optimizer did not converge"
    else:
        reason, message = _null_verdict(
            zn=zn,
            zs_n=zs_n,
            snr=snr,
            chi2=chi2,
            dof=dof,
            checks_mismatch=True,
            u_min=None,
            floor=None,
            rules=rules,
        )
    values = NullFitValues(
        z_star=centre + scale * zs_n,
        covariance=cov[:2, :2] * scale * scale,
        floor=v["floor"],
        floor_stderr=math.sqrt(max(cov[2, 2], 0.0)),
        curvature=v["kappa"] / scale**2,
        curvature_stderr=kap_se / scale**2,
    )
    return NullEstimate(
        method=method,
        verdict=Verdict.ACCEPTED if reason is RejectionReason.NONE else Verdict.REJECTED,
        reason=reason,
        message=message,
        n_points=npts,
        total_shots=None,
        reduced_chi2=chi2 / dof if dof > 0 else math.nan,
        dof=dof,
        _values=values,
    )
