"""Drift of a whole device versus simulated time, and the crosstalk it implies.

Channels: for every listed coupling a phase offset (random walk + linear rate) and
a log-magnitude offset (random walk), each walk with the coupling's own diffusion or the
``[drift]`` default; for every qubit an f01 offset (Ornstein–Uhlenbeck). The device's
scheduled steps are added on top, each from its time on (not interpolated: a step is in
the state at ``t ≥ at`` and not before; a batch of shots sees the state at its start).
The processes are :class:`simulated_device.drift.DriftTrack` channels, read lazily on a
fixed 60 s simulated-time grid and interpolated linearly in between, so a value depends
only on the seed and the time asked for — not on how or in which order the questions come
(past times included, for the ground truth).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from simulated_device.device import HOUR_S, DeviceSpec
from simulated_device.drift import DriftTrack

__all__ = ["DeviceDrift", "DriftState"]

GRID_S = 60.0


@dataclass(frozen=True)
class DriftState:
    """Drift offsets at one instant."""

    t_s: float
    phase_rad: dict[tuple[str, str], float]  # (victim, line) → phase offset
    log_mag: dict[tuple[str, str], float]
    qubit_shift_ghz: dict[str, float]


class DeviceDrift:
    """Seeded drift paths of a device (see module docstring)."""

    def __init__(self, device: DeviceSpec, *, enabled: bool = True, rng=None) -> None:
        self.device = device
        self.enabled = bool(enabled) and device.drifts
        self._rng = np.random.default_rng(rng)
        d = device.drift
        self._pairs = [(c.qubit, c.line) for c in device.couplings]
        self._qubits = [q.name for q in device.qubits]
        rates = np.array(
            [
                d.phase_rate_rad_per_hour if c.phase_rate_rad_per_hour is None
                else c.phase_rate_rad_per_hour
                for c in device.couplings
            ]
        )
        self._rate_per_s = rates / HOUR_S
        self._phase_diff = np.array([
            d.phase_diffusion_rad2_per_hour if c.phase_diffusion_rad2_per_hour is None
            else c.phase_diffusion_rad2_per_hour for c in device.couplings]) / HOUR_S
        self._mag_diff = np.array([
            d.log_magnitude_diffusion_per_hour if c.log_magnitude_diffusion_per_hour is None
            else c.log_magnitude_diffusion_per_hour for c in device.couplings]) / HOUR_S
        self._wander_std = d.qubit_wander_mhz * 1e-3
        self._wander_tau = d.qubit_wander_hours * HOUR_S
        n_p, n_q = len(self._pairs), len(self._qubits)
        # Channels: phase walks (with their linear rates), log-magnitude walks, and the
        # qubit-frequency Ornstein-Uhlenbeck wanders, drawn exactly by DriftTrack and
        # read on a fixed grid (so values depend only on the seed and the time).
        inf = math.inf
        tau = self._wander_tau
        self._track = DriftTrack(
            2 * n_p + n_q,
            diffusion=np.concatenate([self._phase_diff, self._mag_diff,
                                      np.full(n_q, 2 * self._wander_std**2 / tau)]),
            rate=np.concatenate([self._rate_per_s, np.zeros(n_p + n_q)]),
            correlation_time_s=np.concatenate([np.full(2 * n_p, inf), np.full(n_q, tau)]),
            initial="stationary",
            rng=self._rng,
            grid_step_s=GRID_S,
        )
        self._grid = [self._track.value(0.0)]
        self._n_p = n_p
        self._coupling = {(c.qubit, c.line): c for c in device.couplings}
        index = {pair: k for k, pair in enumerate(self._pairs)}
        # Steps in time order: (time s, pair index, log-magnitude change, phase change).
        self._steps = sorted(
            (s.at_s, index[(s.qubit, s.line)], s.crosstalk_db_change * math.log(10) / 20,
             s.phase_rad_change)
            for s in device.steps
        )

    def _extend(self, k: int) -> None:
        while len(self._grid) <= k:
            self._grid.append(self._track.value(len(self._grid) * GRID_S))

    def at(self, t_s: float) -> DriftState:
        """Drift offsets at simulated time ``t_s`` (s)."""
        n_p = self._n_p
        if not self.enabled:
            zeros = dict.fromkeys(self._pairs, 0.0)
            return DriftState(t_s, zeros, dict(zeros), dict.fromkeys(self._qubits, 0.0))
        if t_s < 0:
            raise ValueError("simulated time starts at 0")
        k = int(t_s // GRID_S)
        self._extend(k + 1)
        w = (t_s - k * GRID_S) / GRID_S
        v = (1 - w) * self._grid[k] + w * self._grid[k + 1]
        for at_s, i, dlog, dphase in self._steps:
            if at_s > t_s:
                break
            v[n_p + i] += dlog
            v[i] += dphase
        phase = v[:n_p]
        return DriftState(
            t_s,
            dict(zip(self._pairs, phase.tolist(), strict=True)),
            dict(zip(self._pairs, v[n_p : 2 * n_p].tolist(), strict=True)),
            dict(zip(self._qubits, v[2 * n_p :].tolist(), strict=True)),
        )

    def crosstalk(self, victim: str, line: str, freq_ghz, state: DriftState):
        """X_{victim,line}(f) at the drift state (0 for pairs that do not couple)."""
        c = self._coupling.get((victim, line))
        f = np.asarray(freq_ghz, dtype=float)
        if c is None:
            return np.zeros(f.shape, dtype=complex)
        f01 = self.device.qubit(victim).f01_ghz + state.qubit_shift_ghz[victim]
        mag = 10 ** (c.crosstalk_db / 20.0) * np.exp(state.log_mag[(victim, line)])
        phase = c.phase_rad + state.phase_rad[(victim, line)] - 2 * np.pi * (f - f01) * c.delay_ns
        return mag * np.exp(1j * phase)
