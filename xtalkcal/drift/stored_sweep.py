"""What a re-check takes from the calibration's sweep stored in the ledger: the pair's
curvature (the prior of its analysis), the calibration pass's line-to-line couplings, and with
them the co-victims' known leak taken out of a re-check's signal.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from xtalkcal.fits import VerdictRules, fit_paraboloid

if TYPE_CHECKING:
    import xarray as xr

    from xtalkcal.store import Ledger, LedgerEntry


def _stored_sweep(ledger: Ledger | None, entry: LedgerEntry) -> xr.Dataset | None:
    """The calibration sweep behind ``entry``, or None where the ledger has none for it."""
    if ledger is None or not entry.sweep_id:
        return None
    try:
        return ledger.sweep(entry.sweep_id)
    except KeyError:  # not stored: nothing to draw on (a damaged one raises LedgerError)
        return None


# (victims, sources, C, σ_C) of a calibration pass: how each source line reaches each victim.
_Couplings = tuple[tuple[str, ...], tuple[str, ...], np.ndarray, np.ndarray]


def _pass_couplings(ledger: Ledger | None, entry: LedgerEntry) -> _Couplings | None:
    """(victims, sources, C, σ_C) of the calibration pass behind ``entry``, from its sweep.

    σ_C is 0 for sweeps stored before it was recorded."""
    ds = _stored_sweep(ledger, entry)
    if ds is None or "coupling_re" not in ds:
        return None
    names = tuple(str(v) for v in ds["victim"].values)
    sources = tuple(str(v) for v in ds["from_victim"].values)
    C = ds["coupling_re"].values + 1j * ds["coupling_im"].values
    err = ds["coupling_stderr"].values if "coupling_stderr" in ds else np.zeros(C.shape)
    return names, sources, C, np.where(np.isfinite(err), err, 0.0)


def _sweep_curvature(ledger: Ledger | None, entry: LedgerEntry) -> tuple[float, float] | None:
    """(κ, σκ) of the pair from its stored calibration sweep, or None."""
    ds = _stored_sweep(ledger, entry)
    if ds is None or entry.victim not in list(ds["victim"].values):
        return None
    s = ds.sel(victim=entry.victim)
    if "curvature" in ds and math.isfinite(float(s.curvature)):
        # The column fit's own κ (other tones and per-batch offsets modelled).
        k = float(s.curvature)
        return k, max(float(s.curvature_stderr), 0.25 * k)
    z = s.z_re.values + 1j * s.z_im.values
    rnd = ds["round"].values
    keep = rnd >= 1 if rnd.max() >= 2 else np.ones(rnd.shape, bool)
    e = fit_paraboloid(z[keep], s.signal.values[keep], s.stderr.values[keep],
                       rules=VerdictRules(mismatch_pvalue=0.0)).estimate()
    if not e.accepted:
        return None
    chi = e.reduced_chi2 if math.isfinite(e.reduced_chi2) else 1.0
    # Saturating signals are not exactly quadratic, so the curvature seen depends on the
    # ring radius: the prior is trusted to ±25 % at most.
    sk = max(e.curvature_stderr * math.sqrt(max(1.0, chi)), 0.25 * e.curvature)
    return float(e.curvature), float(sk)


def take_out_co_victim_leak(signal: np.ndarray, stderr: np.ndarray, d: np.ndarray,
                            kappa: float, tones: np.ndarray, c: np.ndarray,
                            c_err: np.ndarray, ringing: np.ndarray
                            ) -> tuple[np.ndarray, np.ndarray]:
    """A re-check's signal with the other tones' known leak onto its victim taken out.

    The victim's signal is ``S0 + κ|d + e + ℓ|²`` with ``d`` its own ring offset from the
    stored null, ``e`` the residual sought and ``ℓ = Σ_k c_k·t_k`` the leak of the other
    tones ``t_k`` through the couplings ``c_k`` the calibration's column fit measured.
    Returned: the signal less ``κ(2 Re(d̄ℓ) + |ℓ|²)``, and its error with what the
    couplings' own errors leave behind added — ``√2·κ|d|·(Σ σ_k²|t_k − t_k,centre|²)^½``
    over the tones that ring (``ringing``). A tone's constant part leaves the same error
    as in the stored value, which was found with the same couplings, so the residual is
    free of it. The ringing part's remainder is bilinear in two rings, on other harmonics
    than the victim's own, so it scatters the points rather than moving the null; on wide
    rings it can exceed the shot noise (a verification on the demo chip was judged broken,
    χ²/dof 4.1, before it was counted).

    Parameters
    ----------
    signal, stderr, d : arrays (n,)
        Signals, their errors, the victim's tone minus its stored null (point 0 the
        ring's centre).
    kappa : float
        The pair's curvature.
    tones : complex array (K, n)
        The other tones per point; ``c``, ``c_err`` (K,) their couplings and the
        couplings' √trace errors; ``ringing`` (K,) bool.
    """
    lead = (c[:, None] * tones).sum(axis=0)  # (0, n) when there are none: zeros
    moving = np.abs(tones - tones[:, :1]) * ringing[:, None]
    lead_var = ((c_err[:, None] * moving) ** 2).sum(axis=0)
    out = signal - kappa * (2 * np.real(np.conj(d) * lead) + np.abs(lead) ** 2)
    return out, np.hypot(stderr, math.sqrt(2) * kappa * np.abs(d) * np.sqrt(lead_var))
