"""Sweep designs for a null search: grids, rings, their Fisher information, the Cramér–Rao bound
and the ring radius that minimises it.
"""

from __future__ import annotations

import math
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize

from xtalkcal.exceptions import FitInputError
from xtalkcal.fits import fisher_covariance, null_signal_jacobian

DesignModel = Literal["paraboloid", "saturating"]

_GOLDEN_ANGLE = math.pi * (3.0 - math.sqrt(5.0))  # rotates successive rings


# ---------------------------------------------------------------------------
# Designs
# ---------------------------------------------------------------------------


def grid_design(center: complex, half_width: float, n: int) -> NDArray[np.complex128]:
    """An ``n x n`` square grid of amplitudes.

    Parameters
    ----------
    center : complex
        Grid centre (fraction of full scale).
    half_width : float
        Half the side of the square (fraction of full scale), > 0.
    n : int
        Points per side, >= 2.

    Returns
    -------
    ndarray of complex, shape (n*n,)
        Row-major: ``reshape(n, n)[iy, ix]`` has Im increasing with ``iy`` and
        Re increasing with ``ix``.
    """
    if not (half_width > 0 and math.isfinite(half_width)):
        raise FitInputError(f"half_width must be positive and finite, got {half_width!r}")
    if int(n) != n or n < 2:
        raise FitInputError(f"n must be an integer >= 2, got {n!r}")
    t = np.linspace(-half_width, half_width, int(n))
    x, y = np.meshgrid(t, t)
    return complex(center) + (x + 1j * y).ravel()


def ring_design(
    center: complex, radius: float, n_points: int, *, phase0: float = 0.0
) -> NDArray[np.complex128]:
    """``n_points`` amplitudes evenly spaced on a circle.

    Parameters
    ----------
    center : complex
        Ring centre (fraction of full scale).
    radius : float
        Ring radius (fraction of full scale), > 0.
    n_points : int
        Points on the ring, >= 3 (uniform spacing makes the first harmonic
        orthogonal to the others, see :func:`xtalkcal.fits.fit_ring`).
    phase0 : float
        Angle of the first point (rad).
    """
    if not (radius > 0 and math.isfinite(radius)):
        raise FitInputError(f"radius must be positive and finite, got {radius!r}")
    if int(n_points) != n_points or n_points < 3:
        raise FitInputError(f"n_points must be an integer >= 3, got {n_points!r}")
    phi = phase0 + 2 * np.pi * np.arange(int(n_points)) / int(n_points)
    z: NDArray[np.complex128] = complex(center) + radius * np.exp(1j * phi)
    return z


# ---------------------------------------------------------------------------
# Fisher information and the Cramér–Rao bound
# ---------------------------------------------------------------------------


def null_fisher_information(
    z_design: ArrayLike,
    shots: ArrayLike,
    z_star: complex,
    floor: float,
    curvature: float,
    *,
    model: DesignModel = "paraboloid",
    amplitude: float | None = None,
    amplification: ArrayLike = 1,
) -> NDArray[np.float64]:
    """Binomial Fisher information of a null-sweep design.

    ``I = sum_i N_i / (p_i (1 - p_i)) * grad p_i grad p_i^T`` with ``p_i``
    the model signal (probabilities clipped to ``[1e-9, 1 - 1e-9]`` so a point
    exactly on a zero floor stays finite).

    Parameters
    ----------
    z_design : array_like of complex, shape (n,)
        Design points (fraction of full scale).
    shots : int or array_like of int
        Shots per point.
    z_star : complex
        Null at which the information is evaluated.
    floor : float
        ``S0``, probability at the null (includes readout error).
    curvature : float
        ``kappa`` at amplification 1 (probability per full-scale fraction squared).
    model : {"paraboloid", "saturating"}
    amplitude : float, optional
        Fringe amplitude ``A``; required for (and only for) ``"saturating"``.
    amplification : int or array_like of int
        Error amplification ``K`` per point.

    Returns
    -------
    ndarray, shape (4, 4) or (5, 5)
        Parameter order ``(Re z*, Im z*, S0, kappa[, A])``.
    """
    z = np.atleast_1d(np.asarray(z_design, dtype=complex))
    if z.ndim != 1 or not np.all(np.isfinite(z)):
        raise FitInputError("z_design must be a finite 1-D array of complex amplitudes")
    try:
        n = np.broadcast_to(np.asarray(shots, dtype=float), z.shape)
        k = np.broadcast_to(np.asarray(amplification, dtype=float), z.shape)
    except ValueError:
        raise FitInputError(
            f"shots and amplification must be scalars or one per design point ({z.size})"
        ) from None
    if np.any(n <= 0):
        raise FitInputError("shots must be positive")
    if model == "saturating":
        if amplitude is None or not amplitude > 0:
            raise FitInputError("the saturating model needs a positive amplitude A")
        amp = float(amplitude)
    elif model == "paraboloid":
        if amplitude is not None:
            raise FitInputError("amplitude is only meaningful with model='saturating'")
        amp = math.nan
    else:
        raise FitInputError(f"model must be 'paraboloid' or 'saturating', got {model!r}")
    zs = complex(z_star)
    p, jac = null_signal_jacobian(z, k, zs.real, zs.imag, floor, curvature, amp, model)
    pt = np.clip(p, 1e-9, 1 - 1e-9)
    w = n / (pt * (1 - pt))
    info = jac.T @ (jac * w[:, None])
    return 0.5 * (info + info.T)  # exactly symmetric, whatever the matmul rounding


def cramer_rao_bound(
    z_design: ArrayLike,
    shots: ArrayLike,
    z_star: complex,
    floor: float,
    curvature: float,
    *,
    model: DesignModel = "paraboloid",
    amplitude: float | None = None,
    amplification: ArrayLike = 1,
) -> NDArray[np.float64]:
    """2x2 covariance bound on ``(Re z*, Im z*)`` for a design.

    All parameters (``x*, y*, S0, kappa`` and ``A`` for the saturating model)
    are taken as unknown; the nuisance ones are marginalised by the Schur
    complement of the full Fisher matrix (with a pseudo-inverse, so a design
    that cannot separate ``S0`` from ``kappa`` -- one ring centred on the null
    -- still bounds the null when the null itself is identified). Returns
    ``inf`` entries when the design does not identify the null.

    Parameters are those of :func:`null_fisher_information`.
    """
    info = null_fisher_information(
        z_design,
        shots,
        z_star,
        floor,
        curvature,
        model=model,
        amplitude=amplitude,
        amplification=amplification,
    )
    return fisher_covariance(info)[:2, :2]


def _ring_with_centre(
    radius: float, points_per_ring: int, centre_points: int
) -> NDArray[np.complex128]:
    ring = ring_design(0.0, radius, points_per_ring)
    return np.concatenate([ring, np.zeros(centre_points, dtype=complex)])


def optimal_ring_radius(
    floor: float,
    curvature: float,
    *,
    amplitude: float | None = None,
    shots_per_point: int = 1000,
    points_per_ring: int = 8,
    centre_points: int = 1,
    amplification: int = 1,
    max_radius: float | None = None,
) -> float:
    """Ring radius that minimises the Cramér–Rao bound of the null.

    The design is a ring of ``points_per_ring`` points centred on the current
    estimate (taken as the truth) plus ``centre_points`` points at its centre
    (they pin the floor; on a single centred ring the floor and the curvature
    are not separable). The objective is ``trace CRB(x*, y*)``; it is
    minimised by a coarse logarithmic scan followed by bounded Brent
    refinement on ``(0, max_radius]``.

    What sets the optimum (per ring point, averaged over the ring angle, the
    information on ``x*`` is ``N (dp/dr)**2 / (2 p (1 - p))``):

    * Paraboloid: ``dp/dr = 2 kappa r`` and ``p = S0 + kappa r**2`` give
      ``2 N kappa**2 r**2 / (p (1 - p))``. For ``p << 1`` this rises as
      ``r**2 / (S0/kappa + r**2)``: half of its plateau is reached at the
      *floor knee* ``r_k = sqrt(S0/kappa)`` and little is gained beyond -- but
      it never turns over (the ``1 - p`` factor even keeps it rising), so the
      bound alone has no interior optimum and the answer is ``max_radius``
      (default: where the paraboloid reaches ``p = 1/2``, the limit of its
      validity). Below ``r_k`` the floor's shot noise swamps the signal.
    * Saturating (``amplitude`` given): with ``s = sin(u)**2``,
      ``u = K sqrt(kappa/A) r``, ``a = S0/A`` and ``b = (1 - S0 - A)/A``, the
      information is proportional to ``s (1 - s) / ((a + s)(b + 1 - s))``:
      the floor knee at ``s ~ a`` (``r ~ sqrt(S0/kappa)``) and a ceiling knee
      at ``1 - s ~ b``. Its maximum solves
      ``a / (s (a + s)) = b / ((1 - s)(b + 1 - s))`` -- a finite radius; for a
      floor and ceiling gap of equal size (``a = b``, symmetric readout
      error) it is mid-fringe, ``u* = pi/4``. Default ``max_radius`` is the
      fringe top ``u = pi/2`` (beyond it the signal is no longer monotonic in
      ``r``).

    Parameters
    ----------
    floor : float
        ``S0`` (probability).
    curvature : float
        ``kappa`` at amplification 1 (probability per full-scale fraction squared).
    amplitude : float, optional
        Fringe amplitude ``A``: selects the saturating model.
    shots_per_point : int
        Shots per design point (scales the bound, not the optimum).
    points_per_ring, centre_points : int
    amplification : int
        ``K`` used for the ring.
    max_radius : float, optional
        Upper end of the search (fraction of full scale).

    Returns
    -------
    float
        Optimal radius (fraction of full scale).
    """
    if not (curvature > 0 and math.isfinite(curvature)):
        raise FitInputError(f"curvature must be positive and finite, got {curvature!r}")
    if not 0 <= floor < 1:
        raise FitInputError(f"floor must be a probability in [0, 1), got {floor!r}")
    k2kappa = amplification**2 * curvature
    if amplitude is None:
        if max_radius is None:
            if floor >= 0.5:
                raise FitInputError("floor >= 1/2 leaves no paraboloid region; pass max_radius")
            max_radius = math.sqrt((0.5 - floor) / k2kappa)
        model: DesignModel = "paraboloid"
    else:
        if not 0 < amplitude <= 1 - floor:
            raise FitInputError(f"amplitude must be in (0, 1 - floor], got {amplitude!r}")
        if max_radius is None:
            max_radius = (math.pi / 2) / math.sqrt(k2kappa / amplitude)
        model = "saturating"
    if not (max_radius > 0 and math.isfinite(max_radius)):
        raise FitInputError(f"max_radius must be positive and finite, got {max_radius!r}")

    def objective(log_r: float) -> float:
        z = _ring_with_centre(math.exp(log_r), points_per_ring, centre_points)
        crb = cramer_rao_bound(
            z,
            shots_per_point,
            0.0,
            floor,
            curvature,
            model=model,
            amplitude=amplitude,
            amplification=amplification,
        )
        t = float(np.trace(crb))
        return t if math.isfinite(t) else 1e300

    hi = math.log(max_radius)
    lo = hi - math.log(1e3)
    grid = np.linspace(lo, hi, 49)
    vals = np.array([objective(g) for g in grid])
    i = int(np.argmin(vals))
    if i == len(grid) - 1:
        return float(max_radius)
    a, b = grid[max(i - 1, 0)], grid[min(i + 1, len(grid) - 1)]
    res = optimize.minimize_scalar(
        objective, bounds=(a, b), method="bounded", options={"xatol": 1e-4}
    )
    best = float(res.x) if res.fun <= vals[i] else float(grid[i])
    return float(math.exp(best))
