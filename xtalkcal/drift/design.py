"""Re-check design: the ring of probe points about a stored null, and its radius.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from xtalkcal.drift.inputs import DriftInputError, _check_tolerance, _finite_real, _lin


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
