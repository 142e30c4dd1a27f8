"""The binomial nonlinear null fit :func:`fit_null`: shot-noise exact maximum likelihood by
iterated reweighting around lmfit, the choice between a free and a held fringe ceiling for the
saturating model, and the finish -- Fisher covariance with parameters on a bound held there,
and the verdict.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from xtalkcal.exceptions import FitInputError
from xtalkcal.fits.estimates import NullEstimate
from xtalkcal.fits.null_lsq import (
    _judged,
    _lmfit_least_squares,
    _LmfitOutcome,
    _make_params,
    _match_points,
    _model_mean,
    _screen,
    _Start,
    _start_values,
    _Sweep,
    _weighted_residual,
)
from xtalkcal.fits.null_model import fisher_covariance, null_signal_jacobian
from xtalkcal.fits.paraboloid import _as_complex, _as_real, _counts_shots, binomial_signal
from xtalkcal.fits.verdicts import (
    _BRANCH_PREFERENCE,
    DEFAULT_RULES,
    NullModel,
    RejectionReason,
    VerdictRules,
)


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
    za, kc, n, ka = _binomial_inputs(z, counts, shots, amplification, model, min_amplitude)
    amps = tuple(int(v) for v in np.unique(ka))
    n_par = 5 if model == "saturating" else 4
    method = f"lmfit_{model}_binomial"
    sweep = _screen(method, za, n_par, f"the {model} model", int(np.sum(n)), amps, rules)
    if isinstance(sweep, NullEstimate):
        return sweep
    p_obs, sig = binomial_signal(kc, n)
    saturating = model == "saturating"
    starts = _start_values(initial, sweep, p_obs, sig, ka, second_ceiling=saturating)
    best = _best_branch(sweep.zn, kc, n, ka, starts, model, min_amplitude)
    if best is None:
        return sweep.rejected(
            RejectionReason.FIT_FAILED, "the optimizer returned non-finite values"
        )
    return _finish_binomial(best, sweep, kc, n, ka, model)


def _binomial_inputs(
    z: ArrayLike,
    counts: ArrayLike,
    shots: ArrayLike,
    amplification: ArrayLike,
    model: NullModel,
    min_amplitude: float,
) -> tuple[NDArray[np.complex128], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Checked inputs of :func:`fit_null`: ``(z, counts, shots, amplification)`` per point."""
    if model not in ("saturating", "paraboloid"):
        raise FitInputError(f"model must be 'saturating' or 'paraboloid', got {model!r}")
    if not 0 <= min_amplitude < 1:
        raise FitInputError(f"min_amplitude must be in [0, 1), got {min_amplitude!r}")
    za = _as_complex(z, "z")
    if za.ndim != 1:
        raise FitInputError(f"fit_null takes one sweep: z must be 1-D, got shape {za.shape}")
    kc, n = _counts_shots(counts, shots)
    kc, n = _match_points(za, counts=kc, shots=n)
    return za, kc, n, _amplification_array(amplification, za.size)


def _amplification_array(amplification: ArrayLike, n: int) -> NDArray[np.float64]:
    """Amplification ``K`` per point: positive integers, one or one per point."""
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


# ---------------------------------------------------------------------------
# Iterated reweighting and the choice of branch
# ---------------------------------------------------------------------------


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
    residual = _weighted_residual(zn, ka, p_obs, sqrt_w, model)  # sqrt_w updated in place
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


def _best_branch(
    zn: NDArray[np.complex128],
    kc: NDArray[np.float64],
    n: NDArray[np.float64],
    ka: NDArray[np.float64],
    starts: list[_Start],
    model: NullModel,
    min_amplitude: float,
) -> _LmfitOutcome | None:
    """The fit kept among the starts (and, saturating, the held ceiling); None if none is finite.

    The fringe amplitude is free only when the data demand it: see :func:`fit_null`.
    """

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
        return None
    return min(candidates, key=lambda o: o.objective)


# ---------------------------------------------------------------------------
# Finish: Fisher covariance and verdict
# ---------------------------------------------------------------------------


def _finish_binomial(
    best: _LmfitOutcome,
    sweep: _Sweep,
    kc: NDArray[np.float64],
    n: NDArray[np.float64],
    ka: NDArray[np.float64],
    model: NullModel,
) -> NullEstimate:
    """The estimate of the kept fit: Pearson chi-square, Fisher covariance, verdict."""
    v = best.values
    zn = sweep.zn
    floor = v["floor"]
    amp = (1 - floor) * v["frac"] if model == "saturating" else math.nan
    p, jac = null_signal_jacobian(zn, ka, v["x"], v["y"], floor, v["kappa"], amp, model)
    pt = np.clip(p, 0.5 / n, 1 - 0.5 / n)
    w = n / (pt * (1 - pt))
    chi2 = float(np.sum((kc - n * p) ** 2 / (n * pt * (1 - pt))))
    jf, names = _free_columns(jac, v, model)
    cov = fisher_covariance(jf.T @ (jf * w[:, None]))
    if not np.all(np.isfinite(cov[:2, :2])):
        return sweep.rejected(
            RejectionReason.FIT_FAILED,
            "the data do not identify the null (singular Fisher information)",
        )
    u_min = None
    if model == "saturating":
        q = math.sqrt(v["kappa"] / amp)
        u_min = float(np.min(ka * q * np.abs(zn - complex(v["x"], v["y"]))))
    return _judged(
        sweep,
        v,
        names,
        cov,
        chi2,
        best.success,
        checks_floor=True,
        u_min=u_min,
        amplitude=amp if model == "saturating" else None,
    )


def _free_columns(
    jac: NDArray[np.float64], v: Mapping[str, float], model: NullModel
) -> tuple[NDArray[np.float64], list[str]]:
    """Jacobian columns of the free parameters and their names; those on a bound are held.

    Held: ``S0`` at 0, and (saturating) ``f = 1``, i.e. ``A = 1 - S0``.
    """
    cols = [jac[:, 0], jac[:, 1]]
    names = ["x", "y"]
    floor_at_bound = v["floor"] <= 1e-9
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
    return np.stack(cols, axis=-1), names
