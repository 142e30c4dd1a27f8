"""Fit of one ring of points around a provisional null: the centre's offset and the curvature.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike

from xtalkcal.exceptions import FitInputError
from xtalkcal.fits.estimates import RingBatch
from xtalkcal.fits.paraboloid import _as_real, _batched_wls, _weighted
from xtalkcal.fits.verdicts import _CODE, DEFAULT_RULES, RejectionReason, VerdictRules

# ---------------------------------------------------------------------------
# Ring (first harmonic) fit
# ---------------------------------------------------------------------------


def fit_ring(
    phi: ArrayLike,
    s: ArrayLike,
    sigma: ArrayLike | None = None,
    *,
    rules: VerdictRules = DEFAULT_RULES,
) -> RingBatch:
    """Direction of the null from points on a ring ``z = c + rho exp(i phi)``.

    Fits ``S = a0 + a1 cos(phi) + a2 sin(phi)`` by weighted linear least
    squares (vectorised over leading batch dims). The signal is lowest towards
    the null, so ``phi* = atan2(-a2, -a1)`` is the angle of ``z* - c``; the
    amplitude is ``sqrt(a1**2 + a2**2)`` (equal to ``2 kappa rho |z* - c|`` for
    a paraboloid). Stderrs by the delta method.

    Whatever the landscape, the signal on the ring is an even function of
    ``phi - phi*``. Under the paraboloid it is a pure first harmonic; a
    saturating landscape adds higher harmonics, which on a uniformly spaced
    ring of ``n`` points are orthogonal to the first except harmonics
    ``n - 1, n + 1, ...`` that alias onto it -- small (a noiseless strongly
    saturated 5-point ring is off by ~1e-4 rad, an 8-point ring by ~1e-10).
    The reduced chi-square is therefore reported but not used to reject.

    Parameters
    ----------
    phi : array_like of float, shape (..., n)
        Ring angles (rad).
    s : array_like of float, shape (..., n)
        Error signal (probability or rad).
    sigma : array_like of float, optional
        Standard errors of ``s``; without it the covariance is scaled by the
        residual variance.
    rules : VerdictRules
        ``min_points`` and ``min_curvature_snr`` (used as amplitude/stderr).

    Returns
    -------
    RingBatch

    Notes
    -----
    Verdicts: ``too_few_points`` (< 5 points), ``fit_failed`` (angles that do
    not determine a sinusoid), ``no_signal`` (amplitude/stderr below
    ``rules.min_curvature_snr``).
    """
    ph = _as_real(phi, "phi")
    sa = _as_real(s, "s")
    if ph.ndim == 0 or sa.ndim == 0:
        raise FitInputError("phi and s must have a points axis")
    if ph.shape[-1] != sa.shape[-1]:
        raise FitInputError(
            f"phi and s must have the same number of points, got {ph.shape[-1]} and {sa.shape[-1]}"
        )
    ph, sa, w = _weighted("phi", ph, sa, sigma)
    shape, n = sa.shape[:-1], sa.shape[-1]
    dof = n - 3
    nan = np.full(shape, np.nan)
    keys = ("direction", "direction_stderr", "amplitude", "amplitude_stderr", "offset")
    if n < max(rules.min_points, 4):
        raw = {k: nan for k in keys + ("offset_stderr", "snr")}
        codes = np.full(shape, _CODE[RejectionReason.TOO_FEW_POINTS], dtype=np.int64)
        return RingBatch(shape, n, codes == 0, codes, nan, dof, raw)
    basis = np.stack([np.ones_like(ph), np.cos(ph), np.sin(ph)], axis=-1)
    coef, minv, chi2, singular = _batched_wls(basis, sa, w)
    if sigma is not None:
        cov = minv
        redchi = chi2 / dof
    else:
        cov = minv * (chi2 / dof)[..., None, None]
        redchi = nan
    a0, a1, a2 = coef[..., 0], coef[..., 1], coef[..., 2]
    with np.errstate(divide="ignore", invalid="ignore"):
        amp = np.hypot(a1, a2)
        c11, c12, c22 = cov[..., 1, 1], cov[..., 1, 2], cov[..., 2, 2]
        var_phi = (a2 * a2 * c11 - 2 * a1 * a2 * c12 + a1 * a1 * c22) / amp**4
        var_amp = (a1 * a1 * c11 + 2 * a1 * a2 * c12 + a2 * a2 * c22) / amp**2
        snr = amp / np.sqrt(var_amp)
    raw = {
        "direction": np.arctan2(-a2, -a1),
        "direction_stderr": np.sqrt(var_phi),
        "amplitude": amp,
        "amplitude_stderr": np.sqrt(var_amp),
        "offset": a0,
        "offset_stderr": np.sqrt(cov[..., 0, 0]),
        "snr": snr,
    }
    codes = np.select(
        [singular | ~np.isfinite(snr), ~(snr >= rules.min_curvature_snr)],
        [_CODE[RejectionReason.FIT_FAILED], _CODE[RejectionReason.NO_SIGNAL]],
        default=_CODE[RejectionReason.NONE],
    ).astype(np.int64)
    for v in raw.values():
        v.setflags(write=False)
    accepted = codes == _CODE[RejectionReason.NONE]
    return RingBatch(shape, n, accepted, codes, np.asarray(redchi, float), dof, raw)


# ---------------------------------------------------------------------------
# Wrapped phase readings on a ring
# ---------------------------------------------------------------------------

#: A jump (rad) between angular neighbours on a ring of phase readings beyond which the
#: readings have wrapped: half a turn, far above what a smooth ring shows between
#: neighbours (at most ≈ 2·A·sin(π/n) for a first harmonic of amplitude A: 1.5 rad for a
#: 3 rad rise on 13 points) and above shot noise of a few hundredths of a radian.
WRAP_JUMP_RAD = math.pi


def ring_wraps(z: ArrayLike, s: ArrayLike, *, jump: float = WRAP_JUMP_RAD) -> bool:
    """Whether phase readings ``s`` on one ring of points ``z`` (centre first) wrapped.

    A phase is read modulo 2π. Around a ring the true phase is a smooth function of the
    angle (a paraboloid gives a first harmonic; other tones' leak adds small others), so
    neighbouring angles read close values unless the true phase crossed the edge of the
    read-out range between them, where the reading jumps by about 2π. A ring whose
    readings wrap looks flat or noisy to a fit (a strong null outside the ring then reads
    as "no signal"); this tells it apart. Points at the centre (distance below half the
    ring's radius) are not part of the ring.

    Parameters
    ----------
    z : array_like of complex (n,)
        The ring's points: its centre first (as :func:`ring_around` lays them out).
    s : array_like of float (n,)
        The phase readings (rad) at those points.
    jump : float
        The jump between angular neighbours that counts as a wrap.

    Returns
    -------
    bool
    """
    zz = np.asarray(z, dtype=complex).ravel()
    ss = np.asarray(s, dtype=float).ravel()
    if zz.shape != ss.shape:
        raise FitInputError(f"z and s must have the same number of points, got {zz.size} "
                            f"and {ss.size}")
    if zz.size < 3:
        return False
    d = zz - zz[0]
    r = np.abs(d)
    on = r > 0.5 * r.max() if r.max() > 0 else np.zeros(r.shape, bool)
    if on.sum() < 3:
        return False
    order = np.argsort(np.angle(d[on]))
    ring = ss[on][order]
    steps = np.abs(np.diff(np.concatenate([ring, ring[:1]])))
    return bool(steps.max() > jump)
