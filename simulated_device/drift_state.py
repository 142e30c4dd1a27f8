"""Drift of a whole device versus simulated time, and the crosstalk it implies.

Channels: for every listed coupling a phase offset (random walk + linear rate) and
a log-magnitude offset (random walk); for every qubit an f01 offset
(Ornstein–Uhlenbeck). Paths are generated lazily on a fixed simulated-time grid and
interpolated linearly in between, so a value depends only on the seed and the time
asked for — not on how or in which order the questions come.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from simulated_device.device import HOUR_S, DeviceSpec

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
        self.enabled = bool(enabled) and device.drift.enabled
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
        self._phase_diff = d.phase_diffusion_rad2_per_hour / HOUR_S
        self._mag_diff = d.log_magnitude_diffusion_per_hour / HOUR_S
        self._wander_std = d.qubit_wander_mhz * 1e-3
        self._wander_tau = d.qubit_wander_hours * HOUR_S
        n_p, n_q = len(self._pairs), len(self._qubits)
        # Grid values: columns = phase walk (n_p), log-mag walk (n_p), qubit OU (n_q).
        first = np.concatenate(
            [np.zeros(2 * n_p), self._wander_std * self._rng.standard_normal(n_q)]
        )
        self._grid = [first]
        self._n_p = n_p
        self._coupling = {(c.qubit, c.line): c for c in device.couplings}

    def _extend(self, k: int) -> None:
        n_p = self._n_p
        a = np.exp(-GRID_S / self._wander_tau)
        while len(self._grid) <= k:
            z = self._rng.standard_normal(self._grid[0].size)
            prev = self._grid[-1]
            nxt = np.empty_like(prev)
            nxt[:n_p] = prev[:n_p] + np.sqrt(self._phase_diff * GRID_S) * z[:n_p]
            nxt[n_p : 2 * n_p] = prev[n_p : 2 * n_p] + np.sqrt(self._mag_diff * GRID_S) * z[
                n_p : 2 * n_p
            ]
            nxt[2 * n_p :] = a * prev[2 * n_p :] + self._wander_std * np.sqrt(1 - a * a) * z[
                2 * n_p :
            ]
            self._grid.append(nxt)

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
        phase = v[:n_p] + self._rate_per_s * t_s
        return DriftState(
            t_s,
            dict(zip(self._pairs, phase.tolist())),
            dict(zip(self._pairs, v[n_p : 2 * n_p].tolist())),
            dict(zip(self._qubits, v[2 * n_p :].tolist())),
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
