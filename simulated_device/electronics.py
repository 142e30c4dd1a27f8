"""Imperfect electronics of one drive line: IQ image, LO leakage and compression.

Each effect is off unless its field is in the device file (version 3, ``[[lines]]``):

* **IQ image.** An IQ mixer with gain and phase imbalance turns baseband samples ``s`` into
  ``s + g·conj(s)``: every tone at ``f`` gets a mirror copy at ``2·f_LO − f`` with
  complex amplitude ``g·conj(a)``, ``|g|`` = ``image_dbc`` (a standard single-sideband
  mixer result, common practice).
* **LO leakage.** A carrier at ``f_LO`` of amplitude ``lo_leak_dbc`` relative to full scale
  (amplitude 1), on through every shot whether the line plays or not.
* **Compression.** The Rapp model of an amplifier's AM/AM curve (C. Rapp, "Effects of HPA
  nonlinearity on 4-DPSK/OFDM signals for a digital sound broadcasting system", ECSC 1991):
  ``|y| = |x| / (1 + (|x|/A_sat)^{2p})^{1/(2p)}``, phase kept (no AM/PM).

The waveform path applies all three sample by sample. The tone path applies compression to
each tone's peak amplitude (its envelope keeps its shape) and adds the image and leakage as
tones of their own; both reach every qubit through the line's leak paths.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from xtalkcal.common import Fields, valid

__all__ = ["LineElectronics", "read_line_electronics", "rapp", "apply_to_samples",
           "ELECTRONICS_FIELDS"]

#: ``[[lines]]`` fields read here (all version 3).
ELECTRONICS_FIELDS = ("lo_ghz", "image_dbc", "image_phase_deg", "lo_leak_dbc",
                      "lo_leak_phase_deg", "compression_amplitude", "compression_smoothness")


@dataclass(frozen=True)
class LineElectronics:
    """The imperfections of one line (None fields: effect off)."""

    lo_ghz: float | None = None
    image: complex | None = None  # g: image amplitude per conj(tone amplitude)
    lo_leak: complex | None = None  # leaked carrier's complex amplitude (full scale = 1)
    saturation: float | None = None  # Rapp A_sat (amplitude units)
    smoothness: float = 2.0  # Rapp p

    @property
    def any(self) -> bool:
        return any(v is not None for v in (self.image, self.lo_leak, self.saturation))

    def compress(self, a: np.ndarray) -> np.ndarray:
        """Complex amplitudes after the line's compression (unchanged without one)."""
        if self.saturation is None:
            return a
        return rapp(a, self.saturation, self.smoothness)


def rapp(a: np.ndarray, saturation: float, smoothness: float) -> np.ndarray:
    """Rapp AM/AM compression of complex amplitudes ``a`` (phase kept)."""
    a = np.asarray(a)
    x = np.abs(a) / saturation
    return a / (1.0 + x ** (2.0 * smoothness)) ** (1.0 / (2.0 * smoothness))


def apply_to_samples(el: LineElectronics, s: np.ndarray) -> np.ndarray:
    """One line's held baseband samples as the mixer and amplifier put them out."""
    out = np.asarray(s, dtype=complex)
    if el.image is not None:
        out = out + el.image * np.conj(out)
    if el.lo_leak is not None:
        out = out + el.lo_leak
    return el.compress(out)


def _dbc(lt: Fields, level_key: str, phase_key: str) -> Any:
    level = lt.number(level_key, None, lo=-150.0, hi=0.0, unit="dBc")
    phase = lt.number(phase_key, 0.0, lo=-360.0, hi=360.0, unit="deg")
    if level is None or not valid(level, phase):
        return None
    return 10 ** (level / 20.0) * complex(math.cos(math.radians(phase)),
                                          math.sin(math.radians(phase)))


def read_line_electronics(lt: Fields, version_3: bool) -> LineElectronics | None:
    """A ``[[lines]]`` block's electronics fields (None: none given)."""
    present = [k for k in ELECTRONICS_FIELDS if k in lt.data]
    if not present:
        return None
    if not version_3:
        for key in present:
            lt.report(key, "needs version = 3 (line electronics are new in version 3)")
            lt._read.add(key)  # reported once here, not again as unknown
        return None
    lo = lt.number("lo_ghz", None, lo=0.1, hi=50.0, unit="GHz")
    image = _dbc(lt, "image_dbc", "image_phase_deg")
    leak = _dbc(lt, "lo_leak_dbc", "lo_leak_phase_deg")
    sat = lt.number("compression_amplitude", None, lo=0.01, hi=100.0, unit="amplitude")
    p = lt.number("compression_smoothness", 2.0, lo=0.5, hi=50.0)
    for key in ("image_dbc", "lo_leak_dbc"):
        if key in lt.data and lo is None and not lt.reported("lo_ghz"):
            lt.report(key, "needs lo_ghz in the same [[lines]] block (a spurious tone sits "
                           "at or around the line's LO)")
    if not valid(lo, sat, p):
        return None
    return LineElectronics(lo, image, leak, sat, p)

