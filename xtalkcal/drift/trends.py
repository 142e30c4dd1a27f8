"""Trend models of a pair's history: random-walk rates and linear drift, with the time left to
tolerance.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray
from scipy import linalg, optimize

from xtalkcal.common import (
    json_float,
    readonly,
)

if TYPE_CHECKING:
    from xtalkcal.store import LedgerEntry
from xtalkcal.drift.inputs import (
    _DB_PER_NEPER,
    _SECONDS_PER_HOUR,
    DriftInputError,
    _check_tolerance,
    _finite_real,
    _lin,
)

# --------------------------------------------------------------------------------------------
# Trends
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RandomWalkRate:
    """A linear rate plus a random walk fitted to one coordinate of a pair's history.

    Model (one coordinate ``y``: unwrapped phase in rad, or ``20 log10|X|`` in dB)::

        y_k = y_0 + rate * t_k + W(t_k) + e_k

    with ``W`` a Wiener process of diffusion constant ``D`` (``Var[W(t + h) - W(t)] = D h``)
    and ``e_k`` the measurement error of entry ``k`` (variance from its covariance).

    Attributes
    ----------
    rate, rate_stderr : float
        Linear drift rate, unit per hour (rad/h or dB/h).
    diffusion, diffusion_stderr : float
        ``D``, unit squared per hour (rad**2/h or dB**2/h); the stderr is the inverse square
        root of the expected restricted Fisher information (a guide, not a Gaussian interval,
        near ``D = 0``).
    n_points : int
        Entries used.
    unit : str
        ``"rad"`` or ``"dB"``.
    """

    rate: float
    rate_stderr: float
    diffusion: float
    diffusion_stderr: float
    n_points: int
    unit: str

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able record."""
        return {
            "rate": json_float(self.rate),
            "rate_stderr": json_float(self.rate_stderr),
            "diffusion": json_float(self.diffusion),
            "diffusion_stderr": json_float(self.diffusion_stderr),
            "n_points": self.n_points,
            "unit": self.unit,
        }


class _IncrementModel:
    """Increments of a drifting random walk observed with independent errors.

    Differencing removes ``y_0``; the increments ``dy_k = rate dt_k + dW_k + e_{k+1} - e_k``
    have the tridiagonal covariance ``Sigma_kk = D dt_k + v_k + v_{k+1}``,
    ``Sigma_k,k+1 = -v_{k+1}``. For a given ``D`` the rate is the generalised least squares
    estimate; ``D`` maximises the restricted (rate-profiled) likelihood of the increments.
    Banded Cholesky keeps every evaluation O(n).
    """

    def __init__(self, t_h: NDArray[np.float64], y: NDArray[np.float64], v: NDArray[np.float64]):
        self.dt = np.diff(t_h)
        self.dy = np.diff(y)
        self.v = v
        self.m = self.dt.size

    def _banded(self, diffusion: float) -> NDArray[np.float64]:
        ab = np.zeros((2, self.m))
        ab[1] = diffusion * self.dt + self.v[:-1] + self.v[1:]
        ab[0, 1:] = -self.v[1:-1]
        return ab

    def solve(self, diffusion: float) -> tuple[float, float, float] | None:
        """(rate, rate variance, restricted negative log-likelihood) at ``D``; None if singular."""
        try:
            cb = linalg.cholesky_banded(self._banded(diffusion), lower=False)
        except linalg.LinAlgError:
            return None
        if not np.all(cb[1] > 0):
            return None
        sol = linalg.cho_solve_banded((cb, False), np.stack([self.dt, self.dy], axis=-1))
        a = float(self.dt @ sol[:, 0])
        if not a > 0:
            return None
        rate = float(self.dt @ sol[:, 1]) / a
        r = self.dy - rate * self.dt
        q = float(r @ (sol[:, 1] - rate * sol[:, 0]))
        logdet = 2.0 * float(np.sum(np.log(cb[1])))
        return rate, 1.0 / a, 0.5 * (logdet + math.log(a) + q)

    def diffusion_information(self, diffusion: float) -> float:
        """Expected restricted Fisher information on ``D``: ``tr(P S P S)/2``, ``S = diag(dt)``."""
        ab = self._banded(diffusion)
        cov = np.diag(ab[1]) + np.diag(ab[0, 1:], 1) + np.diag(ab[0, 1:], -1)
        inv = np.linalg.inv(cov)
        g = inv @ self.dt
        p = inv - np.outer(g, g) / float(self.dt @ g)
        ps = p * self.dt[None, :]
        return 0.5 * float(np.sum(ps * ps.T))

    def fit(self, unit: str, n_points: int) -> RandomWalkRate:
        mean_rate = float(np.sum(self.dy) / np.sum(self.dt))
        scatter = float(np.sum((self.dy - mean_rate * self.dt) ** 2) / np.sum(self.dt))
        scale = max(scatter, 1e-300)
        candidates: list[tuple[float, float]] = []  # (nll, D)
        base = self.solve(0.0)
        if base is not None:
            candidates.append((base[2], 0.0))
        grid = np.linspace(math.log(scale * 1e-8), math.log(scale * 1e2), 41)
        vals = []
        for g in grid:
            s = self.solve(math.exp(g))
            vals.append(math.inf if s is None else s[2])
        i = int(np.argmin(vals))
        if math.isfinite(vals[i]):
            best_g, best_val = float(grid[i]), float(vals[i])
            if 0 < i < len(grid) - 1:

                def nll(log_d: float) -> float:
                    s = self.solve(math.exp(log_d))
                    return math.inf if s is None else s[2]

                res = optimize.minimize_scalar(
                    nll, bounds=(grid[i - 1], grid[i + 1]), method="bounded",
                    options={"xatol": 1e-6},
                )
                if res.fun < best_val:
                    best_g, best_val = float(res.x), float(res.fun)
            candidates.append((best_val, math.exp(best_g)))
        if not candidates:
            raise DriftInputError(
                "the history's covariances make the increments singular (zero measurement "
                "variance with repeated timestamps?)"
            )
        # D = 0 wins ties: no evidence for a random walk means none is claimed.
        _, d_hat = min(candidates, key=lambda c: (c[0], c[1]))
        out = self.solve(d_hat)
        assert out is not None  # the candidate was evaluated above
        rate, rate_var, _ = out
        info = self.diffusion_information(d_hat)
        d_se = 1.0 / math.sqrt(info) if info > 0 else math.inf
        return RandomWalkRate(
            rate=rate,
            rate_stderr=math.sqrt(rate_var),
            diffusion=d_hat,
            diffusion_stderr=d_se,
            n_points=n_points,
            unit=unit,
        )


@dataclass(frozen=True, eq=False)
class PairTrend:
    """Drift of one pair's crosstalk element over its history, and when it leaves tolerance.

    Attributes
    ----------
    aggressor, victim : str
    frequency_ghz : float
        Frequency of the entries used, GHz.
    n_entries : int
        Accepted entries used.
    first_s, last_s, now_s : float
        Rig times of the first and last entry used, and of the evaluation, s.
    last_value : complex
        ``X`` of the last entry.
    last_covariance : ndarray, shape (2, 2)
        Its covariance of ``(Re X, Im X)``.
    reference_value : complex
        ``X`` the stored compensation was set from (``r = -X_ref``).
    reference_covariance : ndarray, shape (2, 2)
    reference_is_last : bool
        True when the reference is the last entry itself (then its error counts once).
    phase : RandomWalkRate or None
        Phase trend (rad/h, rad**2/h); None with fewer than 3 entries.
    magnitude : RandomWalkRate or None
        Magnitude trend in dB (dB/h, dB**2/h); None with fewer than 3 entries.
    tolerance_db : float
    hours_to_tolerance : float or None
        Hours after the last entry at which the predicted residual plus one sigma reaches the
        tolerance (see :meth:`predicted_residual`); 0 if it already does at the last entry,
        ``inf`` if not within 1e5 h; None when the rates are unknown.
    diffusion_sigma : float
        The predictions use the diffusion constants raised by this many of their standard
        errors (0: the estimates themselves).
    """

    aggressor: str
    victim: str
    frequency_ghz: float
    n_entries: int
    first_s: float
    last_s: float
    now_s: float
    last_value: complex
    last_covariance: NDArray[np.float64]
    reference_value: complex
    reference_covariance: NDArray[np.float64]
    reference_is_last: bool
    phase: RandomWalkRate | None
    magnitude: RandomWalkRate | None
    tolerance_db: float
    hours_to_tolerance: float | None = field(default=None)
    diffusion_sigma: float = 0.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "last_covariance", readonly(self.last_covariance))
        object.__setattr__(self, "reference_covariance", readonly(self.reference_covariance))

    # -- derived views ---------------------------------------------------------------------

    @property
    def pair(self) -> tuple[str, str]:
        return (self.aggressor, self.victim)

    @property
    def age_hours(self) -> float:
        """Hours from the last entry to ``now_s``."""
        return (self.now_s - self.last_s) / _SECONDS_PER_HOUR

    @property
    def span_hours(self) -> float:
        """Hours from the first to the last entry used."""
        return (self.last_s - self.first_s) / _SECONDS_PER_HOUR

    @property
    def phase_rate(self) -> float | None:
        """Phase drift rate, rad/h (None if unknown)."""
        return None if self.phase is None else self.phase.rate

    @property
    def magnitude_rate_db(self) -> float | None:
        """Magnitude drift rate, dB/h (None if unknown)."""
        return None if self.magnitude is None else self.magnitude.rate

    @property
    def hours_left(self) -> float | None:
        """Hours from ``now_s`` until the tolerance is predicted to be reached (may be < 0)."""
        if self.hours_to_tolerance is None:
            return None
        return self.hours_to_tolerance - self.age_hours

    def predicted_residual(self, hours_after_last: float) -> tuple[float, float]:
        """Predicted residual of the stored compensation, mean and one sigma (linear).

        With ``tau`` the hours after the last entry, ``phi`` the last entry's phase,
        ``g = magnitude.rate * ln(10)/20`` (1/h) and ``w = phase.rate`` (rad/h)::

            mean(tau)  = | X_last exp((g + i w) tau) - X_ref |
            Sigma(tau) = C_last [+ C_ref if the reference is another entry]
                         + |X_last|**2 R diag(D_ln tau + s_g**2 tau**2,
                                              D_phi tau + s_w**2 tau**2) R^T
            sigma(tau) = sqrt(largest eigenvalue of Sigma(tau))

        where ``R`` rotates (radial, tangential) axes onto (Re, Im) at the last value,
        ``D_ln = magnitude.diffusion * (ln(10)/20)**2`` and ``D_phi = phase.diffusion``
        (random-walk variance grows linearly in ``tau``), and ``s_g, s_w`` are the rates'
        standard errors (their uncertainty grows linearly in ``tau``). The linearised
        covariance is the first-order propagation of small phase and log-magnitude errors.
        Rates unknown (fewer than 3 entries): only the measurement errors, no drift.

        Parameters
        ----------
        hours_after_last : float
            ``tau`` >= 0, h.

        Returns
        -------
        (float, float)
            ``mean(tau)`` and ``sigma(tau)`` (dimensionless, linear).
        """
        tau = max(_finite_real("hours_after_last", hours_after_last), 0.0)
        xl, xr = self.last_value, self.reference_value
        cov = np.array(self.last_covariance, dtype=float)
        if not self.reference_is_last:
            cov = cov + self.reference_covariance
        if self.phase is None or self.magnitude is None:
            return abs(xl - xr), float(math.sqrt(max(np.linalg.eigvalsh(cov)[-1], 0.0)))
        to_ln = 1.0 / _DB_PER_NEPER
        g = self.magnitude.rate * to_ln
        w = self.phase.rate
        mean = abs(xl * np.exp(complex(g, w) * tau) - xr)
        mag2 = abs(xl) ** 2
        d_mag, d_phase = (
            r.diffusion + self.diffusion_sigma * (r.diffusion_stderr
                                                  if math.isfinite(r.diffusion_stderr) else 0.0)
            for r in (self.magnitude, self.phase)
        )
        var_rad = mag2 * (
            d_mag * to_ln**2 * tau + (self.magnitude.rate_stderr * to_ln * tau) ** 2
        )
        var_tan = mag2 * (d_phase * tau + (self.phase.rate_stderr * tau) ** 2)
        phi = math.atan2(xl.imag, xl.real)
        rot = np.array([[math.cos(phi), -math.sin(phi)], [math.sin(phi), math.cos(phi)]])
        cov = cov + rot @ np.diag([var_rad, var_tan]) @ rot.T
        return float(mean), float(math.sqrt(max(np.linalg.eigvalsh(cov)[-1], 0.0)))

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able record (non-finite numbers as ``None``)."""
        return {
            "format": "xtalkcal-pair-trend",
            "version": 1,
            "aggressor": self.aggressor,
            "victim": self.victim,
            "frequency_ghz": self.frequency_ghz,
            "n_entries": self.n_entries,
            "first_s": self.first_s,
            "last_s": self.last_s,
            "now_s": self.now_s,
            "last_value": [self.last_value.real, self.last_value.imag],
            "reference_value": [self.reference_value.real, self.reference_value.imag],
            "phase": None if self.phase is None else self.phase.to_dict(),
            "magnitude": None if self.magnitude is None else self.magnitude.to_dict(),
            "tolerance_db": self.tolerance_db,
            "hours_to_tolerance": json_float(self.hours_to_tolerance),
            "hours_left": json_float(self.hours_left),
        }


def _nonnegative(name: str, value: float) -> float:
    v = _finite_real(name, value)
    if v < 0:
        raise DriftInputError(f"{name} must be >= 0, got {value!r}")
    return v


_HORIZON_H = 1e5  # prediction horizon: beyond ~11 years "never" is the honest answer


def _hours_to_tolerance(trend: PairTrend, tol: float) -> float:
    """First ``tau >= 0`` with ``mean(tau) + sigma(tau) = tol`` (0 if already, inf if never)."""

    def f(tau: float) -> float:
        m, s = trend.predicted_residual(tau)
        return m + s - tol

    if f(0.0) >= 0:
        return 0.0
    # Geometric scan then Brent: factor 1.25 steps cannot jump over an excursion above tol
    # unless the tolerance exceeds ~2|X| (phase swinging almost all the way round).
    lo, tau = 0.0, 1e-3
    while tau <= _HORIZON_H:
        if f(tau) >= 0:
            return float(optimize.brentq(f, lo, tau, xtol=1e-9, rtol=1e-10))
        lo, tau = tau, tau * 1.25
    return math.inf


def _polar_series(
    entries: Sequence[LedgerEntry],
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Unwrapped phase (rad) and magnitude (dB) with their variances from each covariance."""
    vals = np.array([e.value for e in entries], dtype=complex)
    covs = np.array([e.covariance_matrix for e in entries])
    mag = np.abs(vals)
    phi = np.angle(vals)
    radial = np.stack([np.cos(phi), np.sin(phi)], axis=-1)
    tangential = np.stack([-np.sin(phi), np.cos(phi)], axis=-1)
    var_r = np.einsum("ki,kij,kj->k", radial, covs, radial)
    var_t = np.einsum("ki,kij,kj->k", tangential, covs, tangential)
    phase = np.unwrap(phi)
    var_phase = var_t / mag**2
    mag_db = 20.0 * np.log10(mag)
    var_db = _DB_PER_NEPER**2 * var_r / mag**2
    return phase, var_phase, mag_db, var_db


def pair_trend(
    history_entries: Iterable[LedgerEntry],
    *,
    tolerance_db: float,
    now_s: float,
    kinds: Sequence[str] = ("null", "recheck", "manual"),
    reference: LedgerEntry | None = None,
    frequency_tolerance_ghz: float = 1e-3,
    diffusion_sigma: float = 0.0,
) -> PairTrend:
    """Drift rates of one pair from its ledger history, and when it will leave tolerance.

    Uses the accepted entries of the given kinds, measured at the latest entry's frequency
    (within ``frequency_tolerance_ghz``: ``X`` depends on frequency through the lines'
    electrical delays, so entries from another drive frequency are not the same quantity),
    in time order. Surveys are left out by default: they screen with a coarser estimator whose
    systematic errors are not in their covariance (a judgment, not a measured fact).

    For each of the unwrapped phase ``arg X`` (rad) and the magnitude ``20 log10|X|`` (dB) a
    linear rate plus random walk is fitted (:class:`RandomWalkRate`) from the successive
    differences: the rate by generalised weighted least squares, which reduces to the
    measurement-error weighted regression when the random walk vanishes, and the diffusion
    constant by restricted maximum likelihood of the increments (their scatter beyond the
    measurement errors). With a random walk present, ordinary regression on the values would
    understate the rate's error; the increment model does not. Needs >= 3 entries (two
    increments); with 1-2 entries the rates are None and no time to tolerance is predicted
    (`next_check` then keeps the current or default interval).

    Limits (measured on synthetic histories of 25 entries): the rate's 1-sigma coverage is
    close to 68 % when the random walk is identifiable (step variance ``D dt`` not small
    against the measurement variance); when it is weakly identified, ``D`` is often estimated
    as zero and the plug-in rate stderr is optimistic (coverage ~58 % with ``D dt`` a fifth of
    the measurement variance), and with no walk at all it is slightly conservative (~75 %).

    The stored compensation is held fixed at ``reference`` (default: the last entry used, which
    is what the ledger's current matrix holds). The time to tolerance solves
    ``mean(tau) + sigma(tau) = tol`` with the formula of :meth:`PairTrend.predicted_residual`.

    Parameters
    ----------
    history_entries : iterable of LedgerEntry
        One pair's entries, e.g. ``Ledger.history(aggressor, victim)`` (rejected ones and
        other kinds are skipped here).
    tolerance_db : float
        Allowed residual ``|X + r|``, dB (negative).
    now_s : float
        Rig time of the evaluation, s.
    kinds : sequence of str
        Entry kinds to use.
    reference : LedgerEntry, optional
        Entry the stored compensation was set from.
    frequency_tolerance_ghz : float
        Entries within this of the latest entry's frequency are used, GHz.
    diffusion_sigma : float
        Predict with each diffusion raised by this many stderrs (>= 0): a walk small against
        the entries' errors is often estimated as D = 0; its upper bound is not.

    Returns
    -------
    PairTrend

    Raises
    ------
    DriftInputError
        Entries of more than one pair, no usable entry, or a non-finite time or tolerance.
    """
    tol_db = _check_tolerance(tolerance_db)
    now = _finite_real("now_s", now_s)
    all_entries = list(history_entries)
    pairs = {(e.aggressor, e.victim) for e in all_entries}
    if len(pairs) > 1:
        raise DriftInputError(f"history of one pair expected, got {len(pairs)}: {sorted(pairs)}")
    usable = [
        e
        for e in all_entries
        if e.accepted
        and e.kind in kinds
        and math.isfinite(abs(e.value))
        and abs(e.value) > 0
        and np.all(np.isfinite(e.covariance_matrix))
    ]
    if not usable:
        which = f" {next(iter(pairs))}" if pairs else ""
        raise DriftInputError(
            f"no accepted entry of kinds {tuple(kinds)} with a finite non-zero value for "
            f"pair{which}"
        )
    usable.sort(key=lambda e: (e.measured_at_s, e.seq, e.position))
    f_ref = usable[-1].frequency_ghz
    usable = [e for e in usable if abs(e.frequency_ghz - f_ref) <= frequency_tolerance_ghz]
    last = usable[-1]
    ref = last if reference is None else reference
    t_h = np.array([e.measured_at_s for e in usable]) / _SECONDS_PER_HOUR
    phase_fit = mag_fit = None
    if len(usable) >= 3 and t_h[-1] > t_h[0]:
        phase, var_phase, mag_db, var_db = _polar_series(usable)
        phase_fit = _IncrementModel(t_h, phase, var_phase).fit("rad", len(usable))
        mag_fit = _IncrementModel(t_h, mag_db, var_db).fit("dB", len(usable))
    trend = PairTrend(
        aggressor=last.aggressor,
        victim=last.victim,
        frequency_ghz=last.frequency_ghz,
        n_entries=len(usable),
        first_s=usable[0].measured_at_s,
        last_s=last.measured_at_s,
        now_s=now,
        last_value=last.value,
        last_covariance=last.covariance_matrix,
        reference_value=ref.value,
        reference_covariance=ref.covariance_matrix,
        reference_is_last=ref is last or (ref.entry_id != "" and ref.entry_id == last.entry_id),
        phase=phase_fit,
        magnitude=mag_fit,
        tolerance_db=tol_db,
        diffusion_sigma=_nonnegative("diffusion_sigma", diffusion_sigma),
    )
    if phase_fit is None:
        return trend
    hours = _hours_to_tolerance(trend, _lin(tol_db))
    return dataclasses.replace(trend, hours_to_tolerance=hours)
