"""The nonlinear null model: its mean error signal, the Jacobian of that signal with respect to
the fitted parameters, and the Fisher covariance of the null with nuisance parameters
marginalised. Shared by the nonlinear fits and by the design of sweeps in
:mod:`xtalkcal.calibrate`.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike, NDArray

from xtalkcal.fits.verdicts import NullModel


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

