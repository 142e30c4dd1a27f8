"""Where to measure next: sweep designs, their Cramér–Rao bounds, an adaptive null search.

Pure and hardware-free: everything here works on complex cancellation-tone
amplitudes ``z`` (fraction of the victim line's full scale), shot counts and
the null model of :mod:`xtalkcal.fit`. Nothing imports a rig or a simulator.

Signal model (binomial, per point ``i`` with ``N_i`` shots and amplification ``K_i``)::

    paraboloid:  p_i = S0 + K_i**2 kappa |z_i - z*|**2
    saturating:  p_i = S0 + A sin(K_i sqrt(kappa/A) |z_i - z*|)**2

Readout error enters only through the floor ``S0`` (and, for the saturating
model, through a ceiling ``S0 + A`` below 1): assignment errors mix a small,
constant probability into the signalling outcome, which is exactly a raised
floor -- there is no separate readout parameter.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize

from xtalkcal.exceptions import FitInputError, XtalkcalError
from xtalkcal.fit import (
    DEFAULT_RULES,
    NullEstimate,
    RejectionReason,
    VerdictRules,
    _fisher_covariance,
    _null_signal_jacobian,
    binomial_signal,
    fit_null,
    fit_ring,
)

__all__ = [
    "grid_design",
    "ring_design",
    "null_fisher_information",
    "cramer_rao_bound",
    "optimal_ring_radius",
    "AdaptiveNullSearch",
    "SearchStep",
    "SearchStateError",
]

DesignModel = Literal["paraboloid", "saturating"]

_GOLDEN_ANGLE = math.pi * (3.0 - math.sqrt(5.0))  # rotates successive rings


class SearchStateError(XtalkcalError, RuntimeError):
    """The adaptive search was driven out of order (tell without ask, ask when done)."""


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
        orthogonal to the others, see :func:`xtalkcal.fit.fit_ring`).
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
    p, jac = _null_signal_jacobian(z, k, zs.real, zs.imag, floor, curvature, amp, model)
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
    return _fisher_covariance(info)[:2, :2]


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


# ---------------------------------------------------------------------------
# Adaptive null search (ask/tell)
# ---------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class SearchStep:
    """One completed ask/tell round of :class:`AdaptiveNullSearch`.

    Attributes
    ----------
    index : int
    purpose : str
        ``"prior_ring"``, ``"phase_ring"`` or ``"refine"``.
    z : ndarray of complex
        Points measured (fraction of full scale).
    counts, shots : ndarray of int
    amplification : int
        ``K`` used for every point of the step.
    centre : complex
        Ring centre.
    radius : float
        Ring radius.
    estimate : NullEstimate
        Joint fit on all data up to and including this step.
    """

    index: int
    purpose: str
    z: NDArray[np.complex128]
    counts: NDArray[np.int64]
    shots: NDArray[np.int64]
    amplification: int
    centre: complex
    radius: float
    estimate: NullEstimate


@dataclass(frozen=True)
class _Plan:
    z: NDArray[np.complex128]
    amplification: int
    centre: complex
    radius: float
    purpose: str
    shots_per_point: int


class AdaptiveNullSearch:
    """Ask/tell search for a null: rings of rising amplification around the estimate.

    Strategy
    --------
    1. A ring at the prior: centred on ``prior_z`` with radius
       ``prior_radius`` (plus a centre point) -- or, with
       ``phase_ring=True`` (phase of the null unknown), a ring of radius
       ``|prior_z|`` around 0 whose first harmonic gives the direction of
       ``z*`` (:func:`~xtalkcal.fit.fit_ring`) while ``|z*|`` comes from the prior.
    2. After each tell, all data are refit jointly (:func:`~xtalkcal.fit.fit_null`,
       saturating model, curvature ``K**2 kappa``, shared ``z*``, ``S0``, ``A``).
       A joint nonlinear fit rather than per-``K`` paraboloids combined by
       inverse covariance: the groups share three parameters, early low-``K``
       groups are often too weak to fit on their own yet still carry
       information, and the amplified groups leave the quadratic region on
       purpose.
    3. Next: a ring around the current estimate, with the amplification and
       radius that minimise the new ring's Cramér–Rao bound subject to the
       unambiguity limit ``K sqrt(kappa/A) (radius + n_sigma * stderr) <=
       unambiguous_phase`` (default pi/2: every plausible null position must
       stay on the rising side of the first fringe), ``K <= max_amplification``
       and ``K`` growing at most by ``amplification_growth`` per step. The
       radius for each ``K`` comes from :func:`optimal_ring_radius`. When the
       estimate sharpens, the stderr term shrinks and ``K`` can grow: the
       information per shot grows like ``K**2`` while the unambiguous range
       shrinks like ``1/K``, which is why a geometric ladder of amplifications
       beats any fixed design (the robust-phase-estimation argument of
       Kimmel, Low & Yoder, PRA 92, 062315 (2015)).
    4. Before any estimate is accepted: ``no_signal`` doubles ``K`` (then
       widens the ring), ``saturated`` halves ``K`` (then narrows the ring),
       ``outside_region`` recentres on the fitted null and widens the ring.
       A rejection after an accepted estimate backs ``K`` off one growth step
       and plans again from the last accepted estimate; three in a row and
       that estimate is dropped, the search restarting from a ring around it.
    5. Stop when an accepted estimate has ``position_stderr <= target_stderr``,
       or when the next step no longer fits the remaining shot budget (the last
       step may use fewer shots per point, down to a quarter).

    Parameters
    ----------
    prior_z : complex
        Prior null (fraction of full scale), e.g. from the survey.
    prior_radius : float
        Radius around ``prior_z`` believed to contain the null (fraction of full scale).
    target_stderr : float
        Stop when the 1-sigma semi-major axis of the null's error ellipse is
        at or below this (fraction of full scale).
    shot_budget : int
        Total shots allowed.
    shots_per_point : int
        Shots per design point.
    points_per_ring : int
        Points on each ring (>= 5).
    centre_points : int
        Points at each ring's centre (>= 1).
    max_amplification : int
        Largest error amplification ``K`` to use.
    initial_amplification : int
        ``K`` of the first ring (pick it from the expected signal, if known).
    amplification_growth : float
        Largest factor by which ``K`` may grow per step (> 1).
    phase_ring : bool
        Start with a phase ring around 0 of radius ``|prior_z|``.
    unambiguous_phase : float
        Fringe phase (rad) that ring points plus ``n_sigma`` error may reach.
    n_sigma : float
        How many stderrs of the estimate the unambiguous range must cover.
    rules : VerdictRules
        Verdict thresholds for the fits.

    Examples
    --------
    >>> search = AdaptiveNullSearch(0.03 + 0.02j, 0.01, target_stderr=1e-4,
    ...                             shot_budget=200_000)
    >>> z, k = search.ask()          # measure z with the aggressor repeated k times
    >>> len(z), k
    (9, 1)
    """

    def __init__(
        self,
        prior_z: complex,
        prior_radius: float,
        *,
        target_stderr: float,
        shot_budget: int,
        shots_per_point: int = 1000,
        points_per_ring: int = 8,
        centre_points: int = 1,
        max_amplification: int = 64,
        initial_amplification: int = 1,
        amplification_growth: float = 2.0,
        phase_ring: bool = False,
        unambiguous_phase: float = math.pi / 2,
        n_sigma: float = 3.0,
        rules: VerdictRules = DEFAULT_RULES,
    ) -> None:
        prior_z = complex(prior_z)
        checks = [
            (math.isfinite(prior_z.real) and math.isfinite(prior_z.imag), "prior_z must be finite"),
            (prior_radius > 0 and math.isfinite(prior_radius), "prior_radius must be positive"),
            (target_stderr > 0, "target_stderr must be positive"),
            (shot_budget > 0, "shot_budget must be positive"),
            (shots_per_point >= 1, "shots_per_point must be >= 1"),
            (points_per_ring >= 5, "points_per_ring must be >= 5"),
            (centre_points >= 1, "centre_points must be >= 1"),
            (max_amplification >= 1, "max_amplification must be >= 1"),
            (
                1 <= initial_amplification <= max_amplification,
                "initial_amplification must be in [1, max_amplification]",
            ),
            (amplification_growth > 1, "amplification_growth must be > 1"),
            (0 < unambiguous_phase <= math.pi, "unambiguous_phase must be in (0, pi]"),
            (n_sigma > 0, "n_sigma must be positive"),
            (not phase_ring or abs(prior_z) > 0, "phase_ring needs a non-zero prior_z"),
        ]
        for ok, msg in checks:
            if not ok:
                raise FitInputError(msg)
        self.prior_z = prior_z
        self.prior_radius = float(prior_radius)
        self.target_stderr = float(target_stderr)
        self.shot_budget = int(shot_budget)
        self.points_per_ring = int(points_per_ring)
        self.centre_points = int(centre_points)
        self.max_amplification = int(max_amplification)
        self.amplification_growth = float(amplification_growth)
        self.phase_ring = bool(phase_ring)
        self.unambiguous_phase = float(unambiguous_phase)
        self.n_sigma = float(n_sigma)
        self.rules = rules
        self._nominal_spp = int(shots_per_point)

        self._amplification = int(initial_amplification)
        self._centre = prior_z
        self._radius = self.prior_radius
        self._steps: list[SearchStep] = []
        self._shots_used = 0
        self._estimate: NullEstimate | None = None
        self._accepted: NullEstimate | None = None
        self._stop_reason: str | None = None
        self._failures = 0  # consecutive rejections since the last accepted fit
        self._pending: _Plan | None = None
        self._next: _Plan | None = None
        self._schedule_next()

    # -- public state -----------------------------------------------------
    @property
    def done(self) -> bool:
        """True once the target is reached or the budget cannot pay for another step."""
        return self._stop_reason is not None

    @property
    def stop_reason(self) -> str | None:
        """``"target_reached"``, ``"budget_exhausted"`` or None while running."""
        return self._stop_reason

    @property
    def estimate(self) -> NullEstimate | None:
        """Latest joint fit (may be rejected; check ``.accepted``)."""
        return self._estimate

    @property
    def best_estimate(self) -> NullEstimate | None:
        """Latest *accepted* joint fit."""
        return self._accepted

    @property
    def history(self) -> tuple[SearchStep, ...]:
        """Completed steps, oldest first."""
        return tuple(self._steps)

    @property
    def shots_used(self) -> int:
        return self._shots_used

    @property
    def shots_per_point(self) -> int:
        """Shots per point to take for the pending (or next) ask."""
        plan = self._pending or self._next
        return plan.shots_per_point if plan is not None else 0

    def design(self) -> tuple[NDArray[np.complex128], NDArray[np.int64], NDArray[np.int64]]:
        """All points told so far: ``(z, shots, amplification)`` (for the CRB)."""
        if not self._steps:
            return (np.zeros(0, complex), np.zeros(0, np.int64), np.zeros(0, np.int64))
        z = np.concatenate([s.z for s in self._steps])
        n = np.concatenate([s.shots for s in self._steps])
        k = np.concatenate([np.full(s.z.size, s.amplification) for s in self._steps])
        return z, n, k

    # -- ask / tell -------------------------------------------------------
    def ask(self) -> tuple[NDArray[np.complex128], int]:
        """Next points to measure and the amplification ``K`` to use.

        Take ``self.shots_per_point`` shots at each point. Calling ask again
        before tell returns the same request.

        Raises
        ------
        SearchStateError
            When the search is done.
        """
        if self.done:
            raise SearchStateError(f"the search is done ({self._stop_reason}); nothing to ask")
        if self._pending is None:
            self._pending = self._next
        assert self._pending is not None
        return self._pending.z.copy(), self._pending.amplification

    def tell(self, z: ArrayLike, counts: ArrayLike, shots: ArrayLike) -> NullEstimate:
        """Report the counts for the last ask; refit on all data.

        Parameters
        ----------
        z : array_like of complex
            The points of the last ask (checked).
        counts : array_like of int
            Signalling counts per point.
        shots : int or array_like of int
            Shots per point.

        Returns
        -------
        NullEstimate
            The joint fit on all data so far.
        """
        plan = self._pending
        if plan is None:
            raise SearchStateError("tell() without a pending ask()")
        za = np.asarray(z, dtype=complex)
        if za.shape != plan.z.shape or not np.allclose(za, plan.z, rtol=0, atol=1e-12):
            raise FitInputError(
                f"tell() must report the {plan.z.size} points of the last ask(), "
                f"got {za.size} different points"
            )
        p_obs, _ = binomial_signal(counts, shots)  # validates counts and shots
        kc = np.broadcast_to(np.asarray(counts), za.shape).astype(np.int64)
        n = np.broadcast_to(np.asarray(shots), za.shape).astype(np.int64)
        self._pending = None
        self._shots_used += int(n.sum())

        all_z = np.concatenate([s.z for s in self._steps] + [plan.z])
        all_k = np.concatenate([s.counts for s in self._steps] + [kc])
        all_n = np.concatenate([s.shots for s in self._steps] + [n])
        all_a = np.concatenate(
            [np.full(s.z.size, s.amplification) for s in self._steps]
            + [np.full(plan.z.size, plan.amplification)]
        )
        initial = self._initial_for_fit(plan, p_obs)
        est = fit_null(all_z, all_k, all_n, amplification=all_a, initial=initial, rules=self.rules)
        if initial is not None and not est.accepted:
            # A poor start must not decide the verdict: try the default starts too.
            alt = fit_null(all_z, all_k, all_n, amplification=all_a, rules=self.rules)
            if alt.accepted:
                est = alt
        self._steps.append(
            SearchStep(
                index=len(self._steps),
                purpose=plan.purpose,
                z=plan.z.copy(),
                counts=kc.copy(),
                shots=n.copy(),
                amplification=plan.amplification,
                centre=plan.centre,
                radius=plan.radius,
                estimate=est,
            )
        )
        self._estimate = est
        self._react(est, plan)
        if est.accepted and est.position_stderr <= self.target_stderr:
            self._stop_reason = "target_reached"
        else:
            self._schedule_next()
        return est

    # -- internals --------------------------------------------------------
    def _initial_for_fit(
        self, plan: _Plan, p_obs: NDArray[np.float64]
    ) -> NullEstimate | dict[str, float | complex] | None:
        if self._accepted is not None:
            return self._accepted
        if plan.purpose == "phase_ring" and not self._steps:
            phi = np.angle(plan.z[: self.points_per_ring] - plan.centre)
            ring = fit_ring(phi, p_obs[: self.points_per_ring]).estimate()
            if not ring.accepted:
                return None
            zs = abs(self.prior_z) * np.exp(1j * ring.direction)
            s_floor = float(np.min(p_obs))
            s_centre = float(np.mean(p_obs[self.points_per_ring :]))
            k2 = plan.amplification**2
            kappa = max(s_centre - s_floor, 1e-4) / (abs(self.prior_z) ** 2 * k2)
            return {"z_star": zs, "floor": s_floor, "curvature": kappa}
        return None

    def _react(self, est: NullEstimate, plan: _Plan) -> None:
        if est.accepted:
            self._accepted = est
            self._amplification = plan.amplification
            self._failures = 0
            return
        if self._accepted is not None:
            # Lost the estimate at this amplification: back off one growth step.
            self._amplification = max(1, int(plan.amplification / self.amplification_growth))
            self._failures += 1
            if self._failures >= 3:
                # The accepted estimate keeps failing to be confirmed: stop
                # trusting it and search again around it, as from a prior.
                last = self._accepted
                self._accepted = None
                self._failures = 0
                self._centre = last.z_star
                self._radius = max(self.prior_radius / 2, 3 * last.position_stderr)
            return
        reason = est.reason
        if reason is RejectionReason.NO_SIGNAL:
            if plan.amplification < self.max_amplification:
                self._amplification = min(self.max_amplification, 2 * plan.amplification)
            else:
                self._radius = plan.radius * 1.5
        elif reason is RejectionReason.SATURATED:
            if plan.amplification > 1:
                self._amplification = max(1, plan.amplification // 2)
            else:
                self._radius = plan.radius / 2
        elif reason is RejectionReason.OUTSIDE_REGION:
            zu = est.unchecked().z_star
            if np.isfinite(zu) and abs(zu - plan.centre) < 4 * plan.radius:
                self._centre = complex(zu)
            self._radius = plan.radius * 1.5

    def _schedule_next(self) -> None:
        plan = self._plan()
        n_pts = plan.z.size
        remaining = self.shot_budget - self._shots_used
        spp = min(self._nominal_spp, remaining // n_pts)
        if spp < max(1, math.ceil(self._nominal_spp / 4)):
            self._next = None
            self._stop_reason = "budget_exhausted"
            return
        self._next = _Plan(plan.z, plan.amplification, plan.centre, plan.radius, plan.purpose, spp)

    def _plan(self) -> _Plan:
        phase0 = len(self._steps) * _GOLDEN_ANGLE
        m = self.centre_points
        if self._accepted is None:
            if self.phase_ring and not self._steps:
                centre, radius, purpose = 0j, abs(self.prior_z), "phase_ring"
            else:
                centre, radius, purpose = self._centre, self._radius, "prior_ring"
            k = self._amplification
        else:
            centre, radius, k = self._refine_choice()
            purpose = "refine"
        ring = ring_design(centre, radius, self.points_per_ring, phase0=phase0)
        z = np.concatenate([ring, np.full(m, centre, dtype=complex)])
        return _Plan(z, int(k), complex(centre), float(radius), purpose, self._nominal_spp)

    def _refine_choice(self) -> tuple[complex, float, int]:
        est = self._accepted
        assert est is not None
        centre = est.z_star
        sigma = est.position_stderr
        floor = min(max(est.floor, 0.0), 0.45)
        kappa = est.curvature
        # Plan as if readout error lowered the ceiling as much as it lifts the
        # floor: a fitted ceiling at exactly 1 (A held at 1 - S0) would
        # otherwise send the ring to the fringe top, where a real ceiling
        # just below 1 leaves no slope. A fitted A is used only when the data
        # determine it (A/stderr >= 3); a poorly known small A would shrink
        # the rings to nothing.
        amp = 1 - 2 * floor
        a_fit, a_se = est.amplitude, est.amplitude_stderr
        if a_fit is not None and a_se is not None and math.isfinite(a_se) and a_fit >= 3 * a_se:
            amp = min(max(a_fit, 0.05), amp)
        q1 = math.sqrt(kappa / amp)
        # Amplification ladder (robust phase estimation: Kimmel, Low & Yoder,
        # PRA 92, 062315 (2015)). Information per shot grows like K**2, the
        # unambiguous range shrinks like 1/K; so K may only grow while
        # K q1 (radius + n_sigma stderr) stays on the rising side of the
        # fringe, and by at most one growth step per ring.
        k_now = self._amplification
        g = self.amplification_growth
        cands = {k_now, math.ceil(k_now * math.sqrt(g)), int(k_now * g), max(1, int(k_now / g))}
        cands = {k for k in cands if 1 <= k <= self.max_amplification}
        best: tuple[float, int, float] | None = None
        spp = self._nominal_spp
        for k in sorted(cands):
            r_max = self.unambiguous_phase / (k * q1) - self.n_sigma * sigma
            if r_max <= 0:
                continue
            r = optimal_ring_radius(
                floor,
                kappa,
                amplitude=amp,
                shots_per_point=spp,
                points_per_ring=self.points_per_ring,
                centre_points=self.centre_points,
                amplification=k,
                max_radius=r_max,
            )
            z = _ring_with_centre(r, self.points_per_ring, self.centre_points)
            crb = cramer_rao_bound(
                z, spp, 0.0, floor, kappa, model="saturating", amplitude=amp, amplification=k
            )
            score = float(np.trace(crb))
            if math.isfinite(score) and (best is None or score < best[0]):
                best = (score, k, r)
        if best is None:
            # Even K = 1 cannot keep the error region unambiguous: a wide ring at K = 1.
            r = min(self.unambiguous_phase / q1 / 2, max(self.prior_radius, 3 * sigma))
            return centre, r, 1
        return centre, best[2], best[1]
