"""The adaptive null search: rings that follow the fitted null and shrink as it sharpens, until
the stated error is small enough or the budget is spent.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from xtalkcal.calibrate.design import (
    _GOLDEN_ANGLE,
    _ring_with_centre,
    cramer_rao_bound,
    optimal_ring_radius,
    ring_design,
)
from xtalkcal.exceptions import FitInputError, XtalkcalError
from xtalkcal.fits import (
    DEFAULT_RULES,
    NullEstimate,
    RejectionReason,
    VerdictRules,
    binomial_signal,
    fit_null,
    fit_ring,
)


class SearchStateError(XtalkcalError, RuntimeError):
    """The adaptive search was driven out of order (tell without ask, ask when done)."""


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
       ``z*`` (:func:`~xtalkcal.fits.fit_ring`) while ``|z*|`` comes from the prior.
    2. After each tell, all data are refit jointly (:func:`~xtalkcal.fits.fit_null`,
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
