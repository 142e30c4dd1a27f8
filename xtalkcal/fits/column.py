"""Column fits: one aggressor's tone swept while several victims are read at once, each victim's
null fitted from the shared points.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from xtalkcal.exceptions import FitInputError
from xtalkcal.fits.estimates import NullEstimate, NullFitValues
from xtalkcal.fits.verdicts import DEFAULT_RULES, RejectionReason, Verdict, VerdictRules

# ----------------------------------------------------------------------------- column fits

# Refits at most, each with the dropped second-order term taken out at the last estimates.
_REFITS = 12


@dataclass(frozen=True)
class ColumnNullFit:
    """Nulls of all victims of one aggressor from one column-parallel sweep.

    Attributes
    ----------
    estimates : tuple of NullEstimate
        Per victim: the null of the aggressor's leak alone (the other victims' tones
        modelled, not absorbed).
    couplings : ndarray (V, V + C) complex
        ``couplings[i, k]``: field at victim i from victim k's line relative to victim
        i's own line, at the sweep's frequency (the crosstalk element X_{i,k} at the
        aggressor's frequency); columns V.. are the signal-less ``tones``. NaN where not
        determined (diagonal, tones that did not vary, rejected fits).
    couplings_stderr : ndarray (V, V + C)
        sqrt of the trace of each coupling's 2×2 covariance.
    """

    estimates: tuple[NullEstimate, ...]
    couplings: NDArray[np.complex128]
    couplings_stderr: NDArray[np.float64]


def fit_paraboloid_column(
    z: ArrayLike,
    s: ArrayLike,
    sigma: ArrayLike,
    *,
    groups: ArrayLike | None = None,
    tones: ArrayLike | None = None,
    rules: VerdictRules = DEFAULT_RULES,
) -> ColumnNullFit:
    """Fit every victim's null of a column sweep, with the other victims' tones in the model.

    In a column-parallel sweep victim i's field is ``w_i ∝ z_i − a_i + Σ_k c_ik·z_k``:
    the other victims' cancellation tones leak onto it. Its signal near the null is
    ``S0 + κ|w_i|²``; expanding, and dropping the small ``|Σ c z|²`` term, gives a model
    linear in its coefficients::

        S = b0 + b1·x_i + b2·y_i + κ·|z_i|² + Σ_k [g_k·conj(z_i)·z_k + h_k·z_k]  (real parts)

    with ``a_i = −(b1 + i·b2)/(2κ)`` (the null of the aggressor's leak alone) and
    ``c_ik = conj-coefficient(g_k)/(2κ)`` (the coupling of line k at this frequency).
    Victims whose tone does not vary over the sweep are left out of the others' models
    (their constant leak shifts the null, as it will in use).

    Parameters
    ----------
    z, s, sigma : arrays (V, n)
        Cancellation-tone amplitudes, signals and their standard errors per victim.
    groups : int array (n,) or (V, n), optional
        Points with one label share an offset of their own (``b0`` per group, per
        victim): e.g. the batches of a Stark sweep, whose signals are all referred to one
        reference measurement per batch, so that the reference's error is common to the
        batch and must not be averaged as if it were independent per point. Default: one
        offset for all points.
    tones : complex array (C, n), optional
        Further cancellation tones that vary over the sweep on other lines but carry no
        signal of their own (e.g. the tones of victims nulled in another pass, which
        cannot be read out in this one): modelled in every victim's fit like the other
        victims' tones, so their couplings come out and their leak does not shift the
        nulls.
    rules : VerdictRules
        ``min_points`` (at least parameters + 1), ``min_curvature_snr`` and
        ``region_margin`` apply; ``mismatch_pvalue`` does not (the caller scales by the
        reduced chi-square).

    Returns
    -------
    ColumnNullFit
    """
    Z = np.atleast_2d(np.asarray(z, dtype=complex))
    S = np.atleast_2d(np.asarray(s, dtype=float))
    E = np.atleast_2d(np.asarray(sigma, dtype=float))
    if Z.shape != S.shape or Z.shape != E.shape:
        raise FitInputError(f"z, s and sigma must have one shape (V, n), got {Z.shape}, "
                            f"{S.shape}, {E.shape}")
    if not (np.all(np.isfinite(Z)) and np.all(np.isfinite(S)) and np.all(E > 0)):
        raise FitInputError("z and s must be finite and sigma positive")
    V, n = Z.shape
    if tones is not None:
        T = np.atleast_2d(np.asarray(tones, dtype=complex))
        if T.shape[1:] != (n,) or not np.all(np.isfinite(T)):
            raise FitInputError(f"tones must be finite, of shape (C, {n}), got {T.shape}")
        Z = np.vstack([Z, T])  # rows V.. are tones without a signal
    if groups is None:
        G = np.zeros((V, n), dtype=np.int64)
    else:
        G = np.asarray(groups)
        if G.ndim == 1:
            G = np.broadcast_to(G, (V, G.shape[0]))
        if G.shape != (V, n) or not np.issubdtype(G.dtype, np.integer):
            raise FitInputError(f"groups must be integer labels of shape ({n},) or ({V}, {n}),"
                                f" got {G.dtype} {G.shape}")
    W = Z.shape[0]
    coup = np.full((V, W), np.nan + 0j)
    coup_err = np.full((V, W), np.nan)
    out: list[NullEstimate] = []
    for i in range(V):
        # Points weighted down by more than 1e3 in sigma are left out of victim i's fit
        # (a caller's way of dropping them for one victim only).
        act = E[i] <= 1e3 * E[i].min()
        Zi = Z[:, act]
        varies = np.ptp(Zi.real, axis=1) + np.ptp(Zi.imag, axis=1) > 0
        gi = G[i, act]
        est, c_row, c_err = _column_victim(Zi, S[i, act], E[i, act], gi, i, varies, rules)
        # The dropped term κ|Σ c_k z_k|² is second order; subtract it with the estimates
        # so far and refit, until the null settles. Once was not enough: a ring's centre
        # point alone tells κ from the offset, and a companion ring 4× the victim's
        # behind a −13 dB coupling moved that contrast by 80 %, so one refit left the
        # null 2·10⁻³ off (noise-free).
        for _ in range(_REFITS):
            if not est.accepted:
                break
            lead = np.nan_to_num(c_row) @ Zi
            est2, c2, e2 = _column_victim(Zi, S[i, act] - est.curvature * np.abs(lead) ** 2,
                                          E[i, act], gi, i, varies, rules)
            if not est2.accepted:
                break
            moved = abs(est2.z_star - est.z_star)
            est, c_row, c_err = est2, c2, e2
            if moved <= 1e-3 * est.position_stderr:
                break
        out.append(est)
        coup[i] = c_row
        coup_err[i] = c_err
    return ColumnNullFit(tuple(out), coup, coup_err)


def _column_victim(
    Z: NDArray[np.complex128],
    si: NDArray[np.float64],
    ei: NDArray[np.float64],
    gi: NDArray[np.int64],
    i: int,
    varies: NDArray[np.bool_],
    rules: VerdictRules,
) -> tuple[NullEstimate, NDArray[np.complex128], NDArray[np.float64]]:
    """One victim's column fit: (estimate, coupling row, coupling-stderr row)."""
    V, n = Z.shape
    zi = Z[i]
    coup = np.full(V, np.nan + 0j)
    coup_err = np.full(V, np.nan)
    others = [k for k in range(V) if k != i and varies[k]]
    # Coefficients: b1, b2, κ, then one offset per group, then 4 per other victim.
    labels = np.unique(gi)
    cols = [zi.real, zi.imag, np.abs(zi) ** 2] + [(gi == g).astype(float) for g in labels]
    first = 3 + len(labels)
    for k in others:
        prod = np.conj(zi) * Z[k]
        cols += [prod.real, prod.imag, Z[k].real, Z[k].imag]
    A = np.stack(cols, axis=1)
    p = A.shape[1]
    if n < max(rules.min_points, p + 1):
        return (_column_rejected(RejectionReason.TOO_FEW_POINTS,
                                 f"{n} points for {p} coefficients", n, n - p), coup, coup_err)
    w = 1.0 / ei
    Aw = A * w[:, None]
    normal = Aw.T @ Aw
    if not np.all(np.isfinite(normal)) or np.linalg.cond(normal) > 1e14:
        return (_column_rejected(RejectionReason.FIT_FAILED, "degenerate design", n, n - p),
                coup, coup_err)
    cov_b = np.linalg.inv(normal)
    b = cov_b @ (Aw.T @ (si * w))
    resid = (si - A @ b) * w
    dof = n - p
    chi2 = float(resid @ resid)
    kappa, sk = float(b[2]), float(math.sqrt(cov_b[2, 2]))
    if kappa <= 0 or kappa / sk < rules.min_curvature_snr:
        return (_column_rejected(RejectionReason.NO_SIGNAL,
                                 f"curvature {kappa:.3g} ± {sk:.2g} is not significantly "
                                 "positive", n, dof), coup, coup_err)
    a = complex(-b[0], -b[1]) / (2 * kappa)
    # Delta method for a = −(b1 + i b2)/(2κ).
    J = np.array([[-1 / (2 * kappa), 0.0, b[0] / (2 * kappa**2)],
                  [0.0, -1 / (2 * kappa), b[1] / (2 * kappa**2)]])
    sub = cov_b[:3, :3]
    cov_a = J @ sub @ J.T
    # The floor of the most recent group (the largest label): the offset now.
    off = first - 1
    centre = zi.mean()
    reach = float(np.abs(zi - centre).max())
    # The region is judged where the swept landscape is lowest: the aggressor's null
    # moved by the other tones' leak at their mean settings (a − Σ c_ik·z̄_k), which is
    # where the rings are centred; the null of the aggressor's leak alone may lie
    # outside them by the companions' leak.
    seen = a
    for j, k in enumerate(others):
        g = complex(b[first + 4 * j], b[first + 1 + 4 * j])
        seen -= complex(g.real, -g.imag) / (2 * kappa) * Z[k].mean()
    if abs(seen - centre) > (1 + rules.region_margin) * reach:
        reason, msg = RejectionReason.OUTSIDE_REGION, "the null lies outside the swept points"
    else:
        reason, msg = RejectionReason.NONE, "accepted"
    values = NullFitValues(z_star=a, covariance=0.5 * (cov_a + cov_a.T),
                           floor=float(b[off] - kappa * abs(a) ** 2),
                           floor_stderr=float(math.sqrt(cov_b[off, off])), curvature=kappa,
                           curvature_stderr=sk)
    verdict = Verdict.ACCEPTED if reason is RejectionReason.NONE else Verdict.REJECTED
    est = NullEstimate(method="paraboloid-column", verdict=verdict, reason=reason, message=msg,
                       n_points=n, total_shots=None,
                       reduced_chi2=chi2 / dof if dof > 0 else math.nan, dof=dof,
                       _values=values)
    if verdict is Verdict.ACCEPTED:
        for j, k in enumerate(others):
            g = complex(b[first + 4 * j], b[first + 1 + 4 * j])
            # 2κ·Re(conj(z_i)·c·z_k) = 2κ[c_r·Re(conj z_i z_k) − c_i·Im(conj z_i z_k)]
            coup[k] = complex(g.real, -g.imag) / (2 * kappa)
            idx = [first + 4 * j, first + 1 + 4 * j]
            coup_err[k] = float(math.sqrt(np.trace(cov_b[np.ix_(idx, idx)])) / (2 * kappa))
    return est, coup, coup_err


def _column_rejected(reason: RejectionReason, message: str, n: int, dof: int) -> NullEstimate:
    return column_rejected(reason, message, n, dof)


def column_rejected(reason: RejectionReason, message: str, n: int, dof: int) -> NullEstimate:
    """A rejected column estimate (for a caller whose own check of the data rejects a fit).

    Parameters
    ----------
    reason : RejectionReason
    message : str
        One sentence on why.
    n, dof : int
        Points and degrees of freedom of the fit it replaces.
    """
    return NullEstimate(method="paraboloid-column", verdict=Verdict.REJECTED, reason=reason,
                        message=message, n_points=n, total_shots=None, reduced_chi2=math.nan,
                        dof=dof)


def linearise_fringe(
    s: ArrayLike, sigma: ArrayLike, floor: ArrayLike, ceiling: float = 1.0
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Undo the saturation of a driven-rotation signal, so that a paraboloid fits it exactly.

    A rotation or leakage probe reads ``S = S0 + A sin²(u)`` with ``u ∝ K|w|`` (the
    ``"saturating"`` model of :func:`fit_null`, ``A = ceiling − S0``). Returned is
    ``S0 + A·arcsin(√((S − S0)/A))² = S0 + A·u²``, quadratic in the field at any
    height below the fringe top, with its standard error propagated
    (``dq/dS = arcsin(x)/(x√(1 − x²))``, ``x = √((S − S0)/A)``, → 1 near the floor).

    Why: fitted as they are, points high up the fringe of a ring that is off-centre
    pull the paraboloid's null towards the ring's centre (on the simulator: 15–18 % of
    the offset at a rise of 0.25–0.35, i.e. 3σ at a raised K). Points below the
    floor (noise) are mapped by the odd extension, points past the top are clipped.

    Parameters
    ----------
    s, sigma : array_like
        Signals (probabilities) and their standard errors.
    floor : array_like
        ``S0``, e.g. from a first paraboloid fit; broadcast against ``s``.
    ceiling : float
        ``S0 + A``; 1 holds the ceiling as :func:`fit_null` does by default.

    Returns
    -------
    q, q_sigma : ndarray
    """
    s_ = np.asarray(s, dtype=float)
    s0 = np.broadcast_to(np.asarray(floor, dtype=float), s_.shape)
    amp = np.maximum(ceiling - s0, 1e-9)
    x2 = np.clip((s_ - s0) / amp, -0.99, 0.99)
    x = np.sqrt(np.abs(x2))
    u = np.arcsin(x)
    q = s0 + np.sign(x2) * amp * u * u
    with np.errstate(invalid="ignore", divide="ignore"):
        slope = np.where(x > 1e-6, u / (x * np.sqrt(1 - x * x)), 1.0)
    return q, np.asarray(sigma, dtype=float) * slope
