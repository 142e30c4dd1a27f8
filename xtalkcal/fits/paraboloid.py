"""Weighted least-squares paraboloid fits of a null, one at a time or batched over many pairs.

The paraboloid ``S(x, y) = S0 + K·((x − x0)² + (y − y0)²)`` (with optional anisotropy) is the
small-signal form of every error signal the probes read near a cancellation null.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from xtalkcal.exceptions import FitInputError
from xtalkcal.fits.estimates import ParaboloidBatch
from xtalkcal.fits.verdicts import _CODE, DEFAULT_RULES, RejectionReason, VerdictRules

# ---------------------------------------------------------------------------
# Input checks
# ---------------------------------------------------------------------------


def _as_complex(z: ArrayLike, name: str = "z") -> NDArray[np.complex128]:
    arr = np.asarray(z)
    if arr.dtype.kind not in "biufc":
        raise FitInputError(f"{name} must be numeric (complex amplitudes), got dtype {arr.dtype}")
    arr = arr.astype(np.complex128)
    if arr.ndim == 0:
        raise FitInputError(f"{name} must have a points axis, got a scalar")
    if not np.all(np.isfinite(arr)):
        raise FitInputError(f"{name} contains non-finite values")
    return arr


def _as_real(a: ArrayLike, name: str) -> NDArray[np.float64]:
    arr = np.asarray(a)
    if arr.dtype.kind not in "biuf":
        raise FitInputError(f"{name} must be real numbers, got dtype {arr.dtype}")
    arr = arr.astype(float)
    if not np.all(np.isfinite(arr)):
        raise FitInputError(f"{name} contains non-finite values")
    return arr


def _broadcast(**arrays: NDArray[Any]) -> tuple[NDArray[Any], ...]:
    shapes = {k: v.shape for k, v in arrays.items()}
    try:
        shape = np.broadcast_shapes(*shapes.values())
    except ValueError:
        raise FitInputError(
            "inputs do not broadcast to one (..., n_points) shape: "
            + ", ".join(f"{k}{s}" for k, s in shapes.items())
        ) from None
    return tuple(np.broadcast_to(v, shape) for v in arrays.values())


def _weighted(
    points_name: str, points: NDArray[Any], s: NDArray[np.float64], sigma: ArrayLike | None
) -> tuple[NDArray[Any], NDArray[np.float64], NDArray[np.float64]]:
    """Points and signals broadcast together, with weights ``1/sigma**2`` (ones without sigma).

    ``points_name`` names the points array in a broadcast error.
    """
    if sigma is None:
        pts, sa = _broadcast(**{points_name: points, "s": s})
        return pts, sa, np.ones(sa.shape)
    sg = _as_real(sigma, "sigma")
    if np.any(sg <= 0):
        raise FitInputError("sigma must be positive at every point")
    pts, sa, sg = _broadcast(**{points_name: points, "s": s, "sigma": sg})
    return pts, sa, 1.0 / (sg * sg)


def binomial_signal(
    counts: ArrayLike, shots: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Probability estimate and its standard error from binomial counts.

    Parameters
    ----------
    counts : array_like of int
        Number of shots in the signalling outcome (e.g. found in ``|2>``).
    shots : array_like of int
        Shots per point (broadcast against ``counts``).

    Returns
    -------
    p : ndarray
        ``counts / shots``.
    sigma : ndarray
        ``sqrt(p~ (1 - p~) / shots)`` with ``p~ = (counts + 1/2) / (shots + 1)``
        (Jeffreys-smoothed, so a point with zero counts keeps a finite weight).
    """
    k, n = _counts_shots(counts, shots)
    pt = (k + 0.5) / (n + 1.0)
    return k / n, np.sqrt(pt * (1.0 - pt) / n)


def _counts_shots(
    counts: ArrayLike, shots: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    k = _as_real(counts, "counts")
    n = _as_real(shots, "shots")
    k, n = _broadcast(counts=k, shots=n)
    if np.any(n <= 0):
        raise FitInputError("shots must be positive at every point")
    if np.any(k < 0) or np.any(k > n):
        raise FitInputError("counts must satisfy 0 <= counts <= shots at every point")
    return k, n


# ---------------------------------------------------------------------------
# Linear paraboloid (vectorised)
# ---------------------------------------------------------------------------


def _normalise(z: NDArray[np.complex128]) -> tuple[Any, Any, Any, Any]:
    """Centre and scale the points so the fit is well conditioned."""
    centre = z.mean(axis=-1)
    dz = z - centre[..., None]
    scale = np.abs(dz).max(axis=-1)
    degenerate = ~(scale > 0)
    safe = np.where(degenerate, 1.0, scale)
    return centre, safe, dz / safe[..., None], degenerate


def _region_ok(zn: NDArray[np.complex128], zs: NDArray[Any], margin: float) -> NDArray[np.bool_]:
    """Null inside the (margin-enlarged) bounding box and circle of the points."""
    x, y = zn.real, zn.imag
    xmin, xmax = x.min(-1), x.max(-1)
    ymin, ymax = y.min(-1), y.max(-1)
    wx, wy = xmax - xmin, ymax - ymin
    # A sweep along a line has zero box width across it; let the circle rule
    # govern that direction instead of rejecting everything.
    wide = np.maximum(wx, wy)
    mx = margin * np.where(wx > 0, wx, wide)
    my = margin * np.where(wy > 0, wy, wide)
    with np.errstate(invalid="ignore"):
        in_box = (
            (zs.real >= xmin - mx)
            & (zs.real <= xmax + mx)
            & (zs.imag >= ymin - my)
            & (zs.imag <= ymax + my)
        )
        in_circle = np.abs(zs) <= 1.0 + margin  # zn has max radius 1 by construction
    ok: NDArray[np.bool_] = in_box & in_circle
    return ok


def _batched_wls(
    basis: NDArray[np.float64], s: NDArray[np.float64], w: NDArray[np.float64]
) -> tuple[Any, Any, Any, Any]:
    """Weighted least squares for a batch: returns (coef, inv normal matrix, chi2, singular)."""
    p = basis.shape[-1]
    bw = basis * w[..., None]
    m = np.swapaxes(bw, -1, -2) @ basis
    rhs = (np.swapaxes(bw, -1, -2) @ s[..., None])[..., 0]
    # Normalise by the diagonal before judging and solving: cheap and makes the
    # singularity test scale-free.
    d = np.sqrt(np.clip(np.diagonal(m, axis1=-2, axis2=-1), 1e-300, None))
    mn = m / (d[..., :, None] * d[..., None, :])
    ev = np.linalg.eigvalsh(mn)
    singular = ~(ev[..., 0] > 1e-12 * ev[..., -1])
    eye = np.eye(p)
    mn_safe = np.where(singular[..., None, None], eye, mn)
    rhs_n = rhs / d
    stacked = np.concatenate([rhs_n[..., None], np.broadcast_to(eye, mn.shape)], axis=-1)
    sol = np.linalg.solve(mn_safe, stacked)
    coef = sol[..., 0] / d
    minv = sol[..., 1:] / (d[..., :, None] * d[..., None, :])
    resid = s - (basis @ coef[..., None])[..., 0]
    chi2 = np.sum(w * resid * resid, axis=-1)
    return coef, minv, chi2, singular


def _paraboloid_core(
    z: NDArray[np.complex128],
    s: NDArray[np.float64],
    w: NDArray[np.float64],
    absolute: bool,
    rules: VerdictRules,
) -> tuple[dict[str, NDArray[Any]], NDArray[np.int64], NDArray[np.float64], int]:
    shape = s.shape[:-1]
    n = s.shape[-1]
    dof = n - 4
    nan = np.full(shape, np.nan)
    if n < max(rules.min_points, 5):
        raw = {
            "z_star": nan + 1j * nan,
            "covariance": np.full(shape + (2, 2), np.nan),
            "floor": nan,
            "floor_stderr": nan,
            "curvature": nan,
            "curvature_stderr": nan,
            "coefficients": np.full(shape + (4,), np.nan),
            "snr": nan,
            "pvalue": nan,
            "offset_radius": nan,
        }
        codes = np.full(shape, _CODE[RejectionReason.TOO_FEW_POINTS], dtype=np.int64)
        return raw, codes, nan, dof

    centre, scale, zn, degenerate = _normalise(z)
    x, y = zn.real, zn.imag
    basis = np.stack([np.ones_like(x), x, y, x * x + y * y], axis=-1)
    coef, minv, chi2, singular = _batched_wls(basis, s, w)
    if absolute:
        cov_c = minv
        redchi = chi2 / dof
        pvalue = stats.chi2.sf(chi2, dof)
    else:
        cov_c = minv * (chi2 / dof)[..., None, None]
        redchi = np.full(shape, np.nan)
        pvalue = np.full(shape, np.nan)

    c0, c1, c2, c3 = (coef[..., i] for i in range(4))
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        xs = -c1 / (2 * c3)
        ys = -c2 / (2 * c3)
        r2 = xs * xs + ys * ys
        floor = c0 - c3 * r2
        # Delta method. Jacobians of (x*, y*) and S0 with respect to (c0..c3).
        zero = np.zeros(shape)
        jx = np.stack([zero, -1 / (2 * c3), zero, -xs / c3], axis=-1)
        jy = np.stack([zero, zero, -1 / (2 * c3), -ys / c3], axis=-1)
        jz = np.stack([jx, jy], axis=-2)  # (...,2,4)
        cov_zn = jz @ cov_c @ np.swapaxes(jz, -1, -2)
        js = np.stack([np.ones(shape), xs, ys, r2], axis=-1)
        var_floor = np.einsum("...i,...ij,...j->...", js, cov_c, js)
        var_k = cov_c[..., 3, 3]
        k_se = np.sqrt(var_k)
        snr = c3 / k_se
    zs_n = xs + 1j * ys
    failed = singular | degenerate | ~np.isfinite(snr)
    in_region = _region_ok(zn, zs_n, rules.region_margin)

    raw = {
        "z_star": centre + scale * zs_n,
        "covariance": cov_zn * (scale**2)[..., None, None],
        "floor": floor,
        "floor_stderr": np.sqrt(var_floor),
        "curvature": c3 / scale**2,
        "curvature_stderr": k_se / scale**2,
        "coefficients": _coefficients_original(coef, centre, scale),
        "snr": snr,
        "pvalue": pvalue,
        "offset_radius": np.abs(zs_n),
    }
    conds = [
        failed,
        ~(snr >= rules.min_curvature_snr),
        ~in_region,
        (pvalue < rules.mismatch_pvalue) if absolute else np.zeros(shape, bool),
    ]
    codes_list = [
        _CODE[RejectionReason.FIT_FAILED],
        _CODE[RejectionReason.NO_SIGNAL],
        _CODE[RejectionReason.OUTSIDE_REGION],
        _CODE[RejectionReason.MODEL_MISMATCH],
    ]
    codes = np.select(conds, codes_list, default=_CODE[RejectionReason.NONE]).astype(np.int64)
    return raw, codes, redchi, dof


def _coefficients_original(
    coef: NDArray[np.float64], centre: NDArray[Any], scale: NDArray[Any]
) -> NDArray[np.float64]:
    """Map c0..c3 fitted on normalised points back to the original z units."""
    c0, c1, c2, c3 = (coef[..., i] for i in range(4))
    a, b = centre.real, centre.imag
    k3 = c3 / scale**2
    k1 = c1 / scale - 2 * k3 * a
    k2 = c2 / scale - 2 * k3 * b
    k0 = c0 - (c1 * a + c2 * b) / scale + k3 * (a * a + b * b)
    return np.stack([k0, k1, k2, k3], axis=-1)


def fit_paraboloid(
    z: ArrayLike,
    s: ArrayLike,
    sigma: ArrayLike | None = None,
    *,
    shots: ArrayLike | None = None,
    rules: VerdictRules = DEFAULT_RULES,
) -> ParaboloidBatch:
    """Fit ``S = c0 + c1 x + c2 y + c3 (x**2 + y**2)`` by weighted linear least squares.

    Vectorised over any leading batch dimensions: the normal equations of every
    sweep are formed and solved together (no Python loop over fits).

    The null and its parameters follow from the coefficients::

        z* = -(c1 + i c2) / (2 c3),   kappa = c3,   S0 = c0 - kappa |z*|**2

    with the covariance of ``(Re z*, Im z*)`` and the stderr of ``S0`` by the
    delta method. Internally the points are centred and scaled to unit radius
    so that the normal equations stay well conditioned for any amplitude scale.

    Parameters
    ----------
    z : array_like of complex, shape (..., n)
        Cancellation-tone amplitudes (fraction of full scale).
    s : array_like of float, shape (..., n)
        Error signal at each point (probability, or rad for a Stark phase).
    sigma : array_like of float, optional
        Standard error of each ``s`` (same units). When given, the fit is
        weighted by ``1/sigma**2`` and the covariance is absolute; when
        omitted, the fit is unweighted, the covariance is scaled by the
        residual variance, and ``reduced_chi2`` is NaN.
    shots : array_like of int, optional
        Shots behind each point, only recorded (``total_shots``).
    rules : VerdictRules
        Verdict thresholds.

    Returns
    -------
    ParaboloidBatch
        Arrays with the batch shape, NaN where rejected; ``.estimate(i)``.

    Raises
    ------
    FitInputError
        Non-numeric or non-finite input, shapes that do not broadcast, or a
        non-positive sigma.

    Notes
    -----
    Verdict rules, first match wins:

    1. ``too_few_points``: fewer than ``rules.min_points`` (5) points.
    2. ``fit_failed``: the points do not determine the four coefficients
       (e.g. all on one circle or one line).
    3. ``no_signal``: ``kappa / stderr(kappa) < rules.min_curvature_snr`` (3):
       the curvature is not significantly positive.
    4. ``outside_region``: ``z*`` outside the bounding box of the points (each
       side pushed out by ``rules.region_margin`` = 10 % of the width) or
       outside the circle about their centroid through the farthest point,
       enlarged by the same 10 %.
    5. ``model_mismatch`` (only with ``sigma``): the chi-square tail
       probability of the residuals with ``n - 4`` dof is below
       ``rules.mismatch_pvalue`` (1e-3).

    Examples
    --------
    >>> import numpy as np
    >>> from xtalkcal.calibrate import grid_design
    >>> z = grid_design(0.02 + 0.01j, 0.01, 5)
    >>> s = 0.01 + 40.0 * np.abs(z - (0.021 + 0.012j)) ** 2
    >>> est = fit_paraboloid(z, s).estimate()
    >>> round(est.z_star.real, 6), round(est.z_star.imag, 6)
    (0.021, 0.012)
    """
    za = _as_complex(z, "z")
    sa = _as_real(s, "s")
    if sa.ndim == 0:
        raise FitInputError("s must have a points axis, got a scalar")
    if za.shape[-1] != sa.shape[-1]:
        raise FitInputError(
            f"z and s must have the same number of points on the last axis, "
            f"got {za.shape[-1]} and {sa.shape[-1]}"
        )
    za, sa, w = _weighted("z", za, sa, sigma)
    total = None
    if shots is not None:
        sh = _as_real(shots, "shots")
        (sh,) = _broadcast(shots=np.broadcast_to(sh, sa.shape))
        total = np.sum(sh, axis=-1).astype(np.int64)
    raw, codes, redchi, dof = _paraboloid_core(za, sa, w, sigma is not None, rules)
    return _make_batch(raw, codes, redchi, dof, sa, total, "paraboloid_wls", rules)


def _make_batch(
    raw: dict[str, NDArray[Any]],
    codes: NDArray[np.int64],
    redchi: NDArray[np.float64],
    dof: int,
    s: NDArray[np.float64],
    total: NDArray[np.int64] | None,
    method: str,
    rules: VerdictRules,
) -> ParaboloidBatch:
    for v in raw.values():
        v.setflags(write=False)
    accepted = codes == _CODE[RejectionReason.NONE]
    return ParaboloidBatch(
        shape=s.shape[:-1],
        n_points=s.shape[-1],
        method=method,
        accepted=accepted,
        reason_codes=codes,
        reduced_chi2=np.asarray(redchi, dtype=float),
        dof=dof,
        total_shots=total,
        _raw=raw,
        rules=rules,
    )


def fit_paraboloid_counts(
    z: ArrayLike,
    counts: ArrayLike,
    shots: ArrayLike,
    *,
    iterations: int = 3,
    rules: VerdictRules = DEFAULT_RULES,
) -> ParaboloidBatch:
    """Linear paraboloid fit of binomial counts, vectorised, with iterated reweighting.

    The first pass weights each point by the Jeffreys-smoothed binomial
    variance of its own counts (:func:`binomial_signal`); each further pass
    re-weights by the binomial variance ``p (1 - p) / shots`` of the *fitted
    paraboloid* at that point (clipped to ``[0.5/shots, 1 - 0.5/shots]``).
    The fixed point of this reweighting solves the binomial score equations
    of the linear model, i.e. it is the maximum-likelihood paraboloid, and the
    covariance is then the inverse Fisher information. ``reduced_chi2`` is the
    Pearson chi-square per dof under the final weights.

    Parameters
    ----------
    z : array_like of complex, shape (..., n)
        Cancellation-tone amplitudes (fraction of full scale).
    counts, shots : array_like of int, shape (..., n)
        Signalling counts and shots per point.
    iterations : int
        Reweighting passes after the first (3 is ample in practice).
    rules : VerdictRules
        Verdict thresholds; same rules as :func:`fit_paraboloid` with sigma.
    """
    za = _as_complex(z, "z")
    k, n = _counts_shots(counts, shots)
    if za.shape[-1] != k.shape[-1]:
        raise FitInputError(
            f"z and counts must have the same number of points on the last axis, "
            f"got {za.shape[-1]} and {k.shape[-1]}"
        )
    za, k, n = _broadcast(z=za, counts=k, shots=n)
    p_obs, sigma = binomial_signal(k, n)
    total = np.sum(n, axis=-1).astype(np.int64)
    raw, codes, redchi, dof = _paraboloid_core(za, p_obs, 1 / sigma**2, True, rules)
    for _ in range(max(0, int(iterations))):
        c = raw["coefficients"]
        if not np.any(np.isfinite(c)):
            break
        x, y = za.real, za.imag
        pred = c[..., 0, None] + c[..., 1, None] * x + c[..., 2, None] * y
        pred = pred + c[..., 3, None] * (x * x + y * y)
        pt = np.clip(pred, 0.5 / n, 1 - 0.5 / n)
        new_sigma = np.sqrt(pt * (1 - pt) / n)
        usable = np.all(np.isfinite(new_sigma), axis=-1, keepdims=True)
        sigma = np.where(usable, new_sigma, sigma)
        raw, codes, redchi, dof = _paraboloid_core(za, p_obs, 1 / sigma**2, True, rules)
    return _make_batch(raw, codes, redchi, dof, p_obs, total, "paraboloid_binomial_irls", rules)
