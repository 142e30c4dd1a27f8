"""Leak paths as they are on hardware: envelope delay and package resonances.

**Envelope delay.** A coupling's ``delay_ns`` sets the slope of its phase across
frequency, ``arg X(f) = phase − 2π(f − f01)·delay``. A path that delays the carrier delays
the envelope with it. With ``[paths] envelope_delay = true`` (the default of a version 3
file; version 1–2 files keep the carrier-only model, so their numbers do not change) the
tone path moves every tone's envelope by its path's delay too, as the waveform path's
filter always has. Sign: the simulator's tones are ``Ω·e^{−i2πft}``, for which the factor
``e^{−i2πfτ}`` is an *advance* of the signal by τ; so the envelope moves by ``−τ``, the
same shift the filter of :class:`simulated_device.rig.SimulatedSampledRig` gives. Which
way it moves does not change what a cancellation tone can do (the remainder depends on |τ|).
The shift at a victim is its own line's ``self_delay_ns`` for its own line's tones and
``self_delay_ns + delay_ns`` for a leak: only the difference matters to a cancellation.

**Resonances.** A coupling may list package or box modes,
``resonances = [[f_ghz, width_mhz, strength], …]``, each adding a Lorentzian
``strength·(w/2)/(w/2 + i(f − f_r))`` (``w`` the full width at half power in GHz) to a flat
path, ``R(f) = 1 + Σ_k …``. The path's X is multiplied by ``R(f)/R(f01)``, so that
``crosstalk_db`` and ``phase_deg`` keep their meaning (X at the victim's f01).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from xtalkcal.common import Fields, valid

__all__ = ["Resonance", "read_resonances", "resonance_factor", "envelope_floor_db",
           "envelope_correlation"]


@dataclass(frozen=True)
class Resonance:
    """One package or box mode seen by a leak path."""

    freq_ghz: float
    width_mhz: float
    strength: float


def read_resonances(ct: Fields, version_3: bool) -> tuple[Resonance, ...]:
    """A ``[[couplings]]`` block's ``resonances`` (empty where absent)."""
    if "resonances" not in ct.data:
        return ()
    rows = ct.matrix("resonances", None, lo=0.0, hi=1e3)
    if not version_3:
        ct.report("resonances", "needs version = 3 (path resonances are new in version 3)")
        return ()
    if not valid(rows) or rows is None:
        return ()
    out = []
    for row in rows:
        if len(row) != 3 or not (0.1 <= row[0] <= 50.0 and 0.001 <= row[1] <= 1e3
                                 and row[2] <= 100.0):
            ct.report("resonances", "expected rows [f_ghz, width_mhz, strength] with f_ghz in "
                                    "[0.1, 50], width_mhz in [0.001, 1000], strength in [0, 100]")
            return ()
        out.append(Resonance(*row))
    return tuple(out)


def _sum(f: np.ndarray, res: tuple[Resonance, ...]) -> np.ndarray:
    total = np.ones_like(np.asarray(f, dtype=float), dtype=complex)
    for r in res:
        half = 0.5 * r.width_mhz * 1e-3
        total = total + r.strength * half / (half + 1j * (np.asarray(f) - r.freq_ghz))
    return total


def resonance_factor(f: np.ndarray, f01: np.ndarray | float, res: tuple[Resonance, ...]
                     ) -> np.ndarray:
    """``R(f)/R(f01)``: the resonances' effect on X, unity at the victim's f01."""
    return _sum(f, res) / _sum(np.asarray(f01, dtype=float), res)


def envelope_correlation(env: np.ndarray, dt_ns: float, tau_ns: float) -> float:
    """Normalised autocorrelation ρ(τ) = ∫A(t)A(t−τ)dt / ∫A² of a sampled real envelope."""
    t = np.arange(len(env)) * dt_ns
    shifted = np.interp(t - tau_ns, t, env, left=0.0, right=0.0)
    return float(np.sum(env * shifted) / np.sum(env * env))


def envelope_floor_db(env: np.ndarray, dt_ns: float, tau_ns: float) -> float:
    """Best remainder (dB of the uncancelled leak) of an aligned copy against one delayed by τ.

    Minimising ``∫|A(t−τ) − c·A(t)|²`` over the copy's scale ``c`` leaves the fraction
    ``1 − ρ²`` of the leak's energy (least squares; ρ from :func:`envelope_correlation`).
    """
    rho = envelope_correlation(env, dt_ns, tau_ns)
    return float(10.0 * np.log10(max(1.0 - rho * rho, 1e-300)))
