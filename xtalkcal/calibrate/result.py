"""What a calibration returns: one :class:`PairResult` per measured pair and the
:class:`CalibrationResult` of the chip.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr

from xtalkcal.hardware import Chip
from xtalkcal.measure import Protocol


@dataclass(frozen=True)
class PairResult:
    """What was learnt about one (aggressor line, victim qubit) pair."""

    aggressor: str
    victim: str
    method: str
    freq_ghz: float
    accepted: bool
    reason: str
    x: complex | None  # crosstalk element X (None if rejected)
    x_cov: np.ndarray | None  # 2×2 covariance of (Re X, Im X)
    nulled: bool  # above threshold, so a null search ran
    shots: int
    repeats: int
    measured_at_s: float
    stage: str  # "survey" or "null"
    sweep_id: str = ""  # key of the raw sweep in CalibrationResult.sweeps
    quality: float = math.nan  # reduced chi-square of the fit

    @property
    def stderr(self) -> float:
        """sqrt(trace of the covariance) of X (linear)."""
        return float(np.sqrt(np.trace(self.x_cov))) if self.x_cov is not None else math.nan

    @property
    def magnitude_db(self) -> float:
        return 20 * math.log10(abs(self.x)) if self.x else -math.inf

    @property
    def ratio(self) -> complex | None:
        """Compensation ratio r = −X."""
        return None if self.x is None else -self.x


@dataclass
class CalibrationResult:
    """Outcome of :func:`calibrate_chip`."""

    chip: Chip
    protocol: Protocol
    rig_description: str
    pairs: list[PairResult] = field(default_factory=list)
    sweeps: dict[str, xr.Dataset] = field(default_factory=dict)
    shots: int = 0
    rig_seconds: float = 0.0
    risk: list[dict[str, Any]] = field(default_factory=list)
    # Per sweep key: (victims, sources, C, stderr) with C[i, k] the field at victim i from
    # the line of qubit sources[k] at the aggressor's frequency (X_ik(f_j)), measured in
    # the column sweep (sources: the pass's victims, then its companion tones).
    couplings: dict[str, tuple[tuple[str, ...], tuple[str, ...], np.ndarray, np.ndarray]] = (
        field(default_factory=dict))

    def pair(self, aggressor: str, victim: str) -> PairResult:
        for p in self.pairs:
            if p.aggressor == aggressor and p.victim == victim:
                return p
        raise KeyError((aggressor, victim))


def measured_couplings(result: CalibrationResult):
    """The line-to-line couplings measured in the column sweeps, as a lookup function.

    Returns ``get(victim, line, freq_ghz) -> X`` (0 where not measured): the field at
    ``victim`` from ``line`` (another victim's own line) at an aggressor frequency, as
    fitted by :func:`xtalkcal.fits.fit_paraboloid_column`. This is what the multi-victim
    solve needs (:func:`xtalkcal.compensation.multi_victim_settings`, ``couplings=``):
    X between victims at the aggressor's frequency, not at the victims' own.
    """
    chip = result.chip
    table: dict[tuple[str, str, float], complex] = {}
    for key, (victims, sources, C, _err) in result.couplings.items():
        f = float(result.sweeps[key].attrs["frequency_ghz"])
        for i, v in enumerate(victims):
            for k, u in enumerate(sources):
                if u != v and np.isfinite(C[i, k]):
                    table[(v, chip.line_of(u).name, round(f, 9))] = complex(C[i, k])

    def get(victim: str, line: str, freq_ghz: float) -> complex:
        return table.get((victim, line, round(float(freq_ghz), 9)), 0j)

    return get
