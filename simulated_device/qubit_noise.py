"""Noise of the simulated qubits themselves: thermal preparation, f01 noise, defects, T1.

Every effect is off when its device-file field is absent (all defaults are zero), and then
nothing here draws a random number, so a device without these fields gives exactly the
numbers it gave before.

* Thermal preparation: the qubit starts in the Gibbs state of its own levels,
  p_n ∝ exp(−ε_n/kT), with kT chosen so that p_1 is the file's ``thermal_population``.
  Typical fixed-frequency transmons show 1–5 % (a value from memory of the field).
* Quasi-static f01 noise, two parts: ``f01_noise_mhz`` is constant over one batch and drawn
  afresh for each batch (the slow, 1/f-like part), ``f01_shot_noise_mhz`` is constant over one
  shot group and drawn per (timeline, jitter group) (the part that varies shot to shot within
  a batch). Both Gaussian. Averaged over shots, a Ramsey fringe then decays as
  exp(−(2πσt)²/2) (quasi-static Gaussian noise; Ithier et al., Phys. Rev. B 72, 134519 (2005)).
* A two-level defect (TLS) coupled to the qubit: a random telegraph process of the clock time
  that shifts f01 by ``tls_shift_mhz`` while it is up, switching at ``tls_rate_per_hour`` each
  way. The switch times are a Poisson process drawn from the device seed alone, so the state
  at a given clock time is the same whatever ran before (resumed sweeps reproduce).
* Slow T1 fluctuation: T1 of one batch is T1·exp(s·z), z ~ N(0, 1), s =
  ``t1_fluctuation``; T2 is capped at 2·T1 of the batch (the Lindblad model's bound).

Per-batch draws come from a child of the batch's generator (``SimRig._batch_rng``), so the
batch's other draws (jitter, shots) do not move when these effects are turned on.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["QubitNoise", "thermal_populations", "TelegraphDefect", "BatchQubitNoise",
           "draw_batch_noise"]


@dataclass(frozen=True)
class QubitNoise:
    """Per-qubit noise fields of the device file (all zero: off)."""

    thermal_population: float = 0.0
    f01_noise_mhz: float = 0.0
    f01_shot_noise_mhz: float = 0.0
    tls_shift_mhz: float = 0.0
    tls_rate_per_hour: float = 0.0
    t1_fluctuation: float = 0.0

    @property
    def enabled(self) -> bool:
        return any(v != 0.0 for v in (self.thermal_population, self.f01_noise_mhz,
                                      self.f01_shot_noise_mhz, self.tls_shift_mhz,
                                      self.t1_fluctuation))


def thermal_populations(energies_ghz: np.ndarray, p1: float) -> np.ndarray:
    """Gibbs populations p_n ∝ exp(−β ε_n) of the levels, with β set so that p_1 = ``p1``.

    Parameters
    ----------
    energies_ghz : (L,) array
        Level energies, ε_0 = 0, increasing.
    p1 : float
        Wanted population of level 1, 0 ≤ p1 < 1/2 (higher is not a positive temperature
        for a two-level system).

    Returns
    -------
    (L,) array summing to 1.
    """
    e = np.asarray(energies_ghz, float) - float(energies_ghz[0])
    ground = np.zeros(len(e))
    ground[0] = 1.0
    if p1 <= 0.0:
        return ground

    def pops(beta: float) -> np.ndarray:
        w = np.exp(-beta * e)
        return w / w.sum()

    # p_1(β) falls monotonically from 1/L (β = 0) to 0 (β → ∞); bisection on log β.
    lo, hi = -20.0, 20.0
    if pops(math.exp(lo))[1] < p1:
        raise ValueError(f"thermal_population {p1} is above the infinite-temperature value")
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if pops(math.exp(mid))[1] > p1 else (lo, mid)
    return pops(math.exp(0.5 * (lo + hi)))


class TelegraphDefect:
    """Random telegraph state (0 or 1) of one defect as a function of the clock time.

    Switch times form a Poisson process of rate ``rate_per_hour`` drawn lazily, in order, from
    a generator seeded by ``seed`` only, so :meth:`state` at a time does not depend on the
    order of queries. The state starts at 0 or 1 with probability ½ (the stationary law).
    """

    def __init__(self, rate_per_hour: float, seed: tuple[int, ...]):
        self.rate_per_s = float(rate_per_hour) / 3600.0
        self._rng = np.random.default_rng(np.random.SeedSequence(list(seed)))
        self._first = int(self._rng.integers(0, 2))
        self._times = np.zeros(0)

    def state(self, t_s: float) -> int:
        """Defect state at clock time ``t_s`` (s)."""
        if self.rate_per_s <= 0.0:
            return self._first
        while self._times.size == 0 or self._times[-1] <= t_s:
            gaps = self._rng.exponential(1.0 / self.rate_per_s, size=256)
            last = self._times[-1] if self._times.size else 0.0
            self._times = np.concatenate([self._times, last + np.cumsum(gaps)])
        n = int(np.searchsorted(self._times, t_s, side="right"))
        return (self._first + n) % 2


@dataclass(frozen=True)
class BatchQubitNoise:
    """What one batch sees of one qubit: f01 offset per run (GHz), T1 and T2 (ns), ρ0."""

    shift_ghz: np.ndarray  # (R·G,)
    t1_ns: float
    t2_ns: float
    rho0: np.ndarray | None  # (L, L) thermal start, or None for |0⟩


def draw_batch_noise(noise: QubitNoise, energies_ghz: np.ndarray, t1_us: float, t2_us: float,
                     runs: int, rng: np.random.Generator | None, tls_state: int
                     ) -> BatchQubitNoise:
    """The batch's draws for one qubit (``runs`` = timelines × jitter groups).

    ``rng`` may be None only if no per-batch effect is on. Draw order is fixed (batch
    offset, shot offsets, T1) so a batch reproduces from its generator.
    """
    shift = np.zeros(runs)
    t1 = t1_us * 1e3
    t2 = t2_us * 1e3
    if noise.f01_noise_mhz > 0.0:
        shift += rng.normal(0.0, noise.f01_noise_mhz * 1e-3)
    if noise.f01_shot_noise_mhz > 0.0:
        shift += rng.normal(0.0, noise.f01_shot_noise_mhz * 1e-3, size=runs)
    if noise.t1_fluctuation > 0.0 and math.isfinite(t1):
        t1 = t1 * math.exp(noise.t1_fluctuation * rng.normal())
        t2 = min(t2, 2.0 * t1)
    shift += tls_state * noise.tls_shift_mhz * 1e-3
    rho0 = None
    if noise.thermal_population > 0.0:
        rho0 = np.diag(thermal_populations(energies_ghz, noise.thermal_population)).astype(complex)
    return BatchQubitNoise(shift, t1, t2, rho0)
