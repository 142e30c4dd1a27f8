"""Seeded drift of hidden device parameters versus simulated time.

Every drifting parameter is one channel of a scalar Gauss–Markov process

    dx = (μ − x/τ) dt + √D dW,

which covers the three kinds the device needs:

* Wiener walk with a linear rate (τ = ∞): ``Var x(t) = D·t``, ``E x(t) = x0 + μ·t`` — the phase
  of a coupling;
* multiplicative walk: the same walk applied to a log-magnitude, the magnitude being
  ``m0·exp(x)`` — the size of a coupling;
* Ornstein–Uhlenbeck (finite τ, μ = 0): bounded wander with stationary variance
  ``σ² = D·τ/2`` and autocorrelation ``e^(−|Δt|/τ)`` — a qubit frequency.

:class:`DriftTrack` holds K independent channels and answers ``value(t)``; every value is drawn
exactly from the process law (no Euler steps): the transition over dt is Gaussian with
``x(t+dt) = φ·x + c + √q·ξ``, ``φ = e^(−dt/τ)``, ``c = μτ(1 − φ)``, ``q = (Dτ/2)(1 − φ²)``,
which tends to ``(1, μ·dt, D·dt)`` as τ → ∞.

How values depend on the seed
-----------------------------
Paths live on a fixed grid of step Δ (``grid_step_s``): the value at every grid time kΔ is a
function of the seed alone, whatever times were asked for, in whatever batches. The grid is
built in two levels so that long jumps stay cheap: a coarse chain with step B·Δ
(``block_steps`` = B), and inside each coarse step the B fine values drawn from their exact
conditional law given both ends (Gaussian conditioning of an unconditioned path, "Matheron's
rule"), each from its own seed-keyed stream. A time between grid points gets an exact
Brownian-bridge (or Ornstein–Uhlenbeck-bridge) draw conditioned on the previous answer and the
next grid value; these draws come from one sequential stream, so off-grid values depend on the
seed and on the sequence of query times within the current grid cell, but never on how the
queries were batched. Two tracks with the same seed queried at different times agree exactly
on the grid and differ in between only by the bridge spread, ``√(D·Δ)/2`` at most.

Times must not go backwards: the track keeps no history, and a query earlier than the
previous one raises ``ValueError``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Literal

import numpy as np
import numpy.typing as npt

__all__ = ["DriftSpec", "DriftTrack"]

SeedLike = int | np.random.SeedSequence | np.random.Generator | None

# Seed-keyed random streams of one track.
_STREAM_COARSE, _STREAM_FINE, _STREAM_BRIDGE, _STREAM_START = range(4)
_COARSE_CHUNK = 64  # coarse steps drawn per keyed stream
_ON_GRID_TOLERANCE = 1e-9  # |t/Δ − k| below this counts as the grid time kΔ


def _seed_sequence(rng: SeedLike) -> np.random.SeedSequence:
    if isinstance(rng, np.random.SeedSequence):
        return rng
    if isinstance(rng, np.random.Generator):
        # Draw the entropy from the caller's generator: deterministic given its state.
        return np.random.SeedSequence([int(v) for v in rng.integers(0, 2**63, size=4)])
    if rng is None or (isinstance(rng, (int, np.integer)) and not isinstance(rng, bool)):
        return np.random.SeedSequence(rng)
    raise ValueError(f"rng must be an int, SeedSequence, Generator or None, got {rng!r}")


def _integral(dt: npt.ArrayLike, rate: np.ndarray) -> np.ndarray:
    """∫_0^dt e^(−rate·s) ds = (1 − e^(−rate·dt))/rate, equal to dt at rate 0 (stable)."""
    dt = np.asarray(dt, dtype=float)
    positive = rate > 0.0
    safe = np.where(positive, rate, 1.0)
    return np.where(positive, -np.expm1(-dt * safe) / safe, dt)


def _channel_parameter(
    value: npt.ArrayLike,
    n_channels: int,
    name: str,
    *,
    minimum: float | None = None,
    allow_inf: bool = False,
    open_minimum: bool = False,
) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    try:
        arr = np.array(np.broadcast_to(arr, (n_channels,)))
    except ValueError:
        raise ValueError(
            f"{name} must be a scalar or have shape ({n_channels},), got shape {arr.shape}"
        ) from None
    finite_ok = np.isfinite(arr) | (allow_inf & (arr == np.inf))
    if not np.all(finite_ok):
        raise ValueError(f"{name} must be finite{' or +inf' if allow_inf else ''}, got {arr}")
    if minimum is not None:
        bad = arr <= minimum if open_minimum else arr < minimum
        if np.any(bad):
            bound = ">" if open_minimum else "≥"
            raise ValueError(f"{name} must be {bound} {minimum}, got {arr[bad]}")
    arr.setflags(write=False)
    return arr


class DriftTrack:
    """K independent drifting channels, ``dx = (μ − x/τ) dt + √D dW``, answered exactly.

    Parameters
    ----------
    n_channels : int
        Number of channels K ≥ 0.
    diffusion : float or array_like (K,), default 0
        D, variance growth rate of the noise in (unit of x)²/s, ≥ 0. For a Wiener channel
        ``Var x(t) = D·t``; for an Ornstein–Uhlenbeck channel of stationary std σ use
        ``D = 2σ²/τ`` (or :meth:`ornstein_uhlenbeck`).
    rate : float or array_like (K,), default 0
        μ, linear drift rate in (unit of x)/s. With finite τ it sets the mean level μτ.
    correlation_time_s : float or array_like (K,), default inf
        τ in s, > 0; ``inf`` for no mean reversion (Wiener walk).
    initial : float, array_like (K,) or "stationary", default 0
        x(0). ``"stationary"`` draws channels with finite τ from their stationary law
        N(μτ, Dτ/2) (seeded) and starts the others at 0.
    rng : int, SeedSequence, Generator or None, keyword-only
        Seed of the paths; None draws fresh entropy (not reproducible). A Generator is
        consumed once to derive the seed.
    grid_step_s : float, default 1
        Δ, step in s of the grid on which values are fixed by the seed alone.
    block_steps : int, default 256
        B, fine steps per coarse step; memory per track is about (B + 1)·K floats.

    Raises
    ------
    ValueError
        Bad shapes or values of any parameter.

    Examples
    --------
    >>> track = DriftTrack.wiener(3, diffusion=1e-4, rate=1e-3, rng=7)
    >>> track.value(0.0).tolist()
    [0.0, 0.0, 0.0]
    >>> later = track.value([10.0, 60.5])
    >>> later.shape
    (2, 3)
    """

    def __init__(
        self,
        n_channels: int,
        *,
        diffusion: npt.ArrayLike = 0.0,
        rate: npt.ArrayLike = 0.0,
        correlation_time_s: npt.ArrayLike = math.inf,
        initial: npt.ArrayLike | Literal["stationary"] = 0.0,
        rng: SeedLike = None,
        grid_step_s: float = 1.0,
        block_steps: int = 256,
    ) -> None:
        if isinstance(n_channels, bool) or not isinstance(n_channels, (int, np.integer)):
            raise ValueError(f"n_channels must be an integer, got {n_channels!r}")
        if n_channels < 0:
            raise ValueError(f"n_channels must be ≥ 0, got {n_channels}")
        if isinstance(block_steps, bool) or not isinstance(block_steps, (int, np.integer)):
            raise ValueError(f"block_steps must be an integer, got {block_steps!r}")
        if block_steps < 1:
            raise ValueError(f"block_steps must be ≥ 1, got {block_steps}")
        grid_step_s = float(grid_step_s)
        if not (math.isfinite(grid_step_s) and grid_step_s > 0.0):
            raise ValueError(f"grid_step_s must be a finite positive time, got {grid_step_s}")
        k = int(n_channels)
        self._n = k
        self._diffusion = _channel_parameter(diffusion, k, "diffusion", minimum=0.0)
        self._rate = _channel_parameter(rate, k, "rate")
        tau = _channel_parameter(
            correlation_time_s,
            k,
            "correlation_time_s",
            minimum=0.0,
            open_minimum=True,
            allow_inf=True,
        )
        self._inv_tau = np.where(np.isinf(tau), 0.0, 1.0 / tau)
        self._step = grid_step_s
        self._block = int(block_steps)
        self._seed = _seed_sequence(rng)

        if isinstance(initial, str):
            if initial != "stationary":
                raise ValueError(
                    f"initial must be a number, an array or 'stationary', got {initial!r}"
                )
            reverting = self._inv_tau > 0.0
            draw = self._keyed_rng(_STREAM_START, 0).standard_normal(k)
            level = self._rate * np.where(reverting, tau, 0.0)
            spread = np.sqrt(0.5 * self._diffusion * np.where(reverting, tau, 0.0))
            start = np.where(reverting, level + spread * draw, 0.0)
        else:
            start = _channel_parameter(initial, k, "initial")
        self._initial = np.array(start, dtype=float)
        self._initial.setflags(write=False)

        self._deterministic = not np.any(self._diffusion > 0.0)
        self._walk = self._inv_tau == 0.0  # channels whose fine path is a plain cumulative sum
        # Matheron weights Cov(x_s, x_T)/Var(x_T) = φ(T − s)·q(s)/q(T) inside a block depend on
        # 1/τ only (D cancels), so they are computed once per distinct τ.
        kappas, self._kappa_group = np.unique(self._inv_tau, return_inverse=True)
        s = self._step * np.arange(self._block + 1)[:, None]
        q_s = _integral(s, 2.0 * kappas)
        self._block_weight = np.exp(-kappas * (s[-1] - s)) * q_s / q_s[-1]
        self._bridge_rng = self._keyed_rng(_STREAM_BRIDGE, 0)
        self._coarse_chunk = -1
        self._coarse_values = np.empty((0, k))
        self._block_index = -1
        self._block_values = np.empty((0, k))
        self._last_t = 0.0
        self._last_x = self._initial.copy()

    # ------------------------------------------------------------------ constructors

    @classmethod
    def wiener(
        cls,
        n_channels: int,
        *,
        diffusion: npt.ArrayLike,
        rate: npt.ArrayLike = 0.0,
        initial: npt.ArrayLike = 0.0,
        rng: SeedLike = None,
        grid_step_s: float = 1.0,
        block_steps: int = 256,
    ) -> DriftTrack:
        """Random walk with linear rate: ``E x = x0 + rate·t``, ``Var x = diffusion·t``."""
        return cls(
            n_channels,
            diffusion=diffusion,
            rate=rate,
            initial=initial,
            rng=rng,
            grid_step_s=grid_step_s,
            block_steps=block_steps,
        )

    @classmethod
    def ornstein_uhlenbeck(
        cls,
        n_channels: int,
        *,
        std: npt.ArrayLike,
        correlation_time_s: npt.ArrayLike,
        initial: npt.ArrayLike | Literal["stationary"] = 0.0,
        rng: SeedLike = None,
        grid_step_s: float = 1.0,
        block_steps: int = 256,
    ) -> DriftTrack:
        """Mean-zero wander of stationary std ``std`` and correlation time τ (s, finite)."""
        tau = np.asarray(correlation_time_s, dtype=float)
        if not np.all(np.isfinite(tau) & (tau > 0.0)):
            raise ValueError(f"correlation_time_s must be finite and > 0, got {tau}")
        std = np.asarray(std, dtype=float)
        if not np.all(np.isfinite(std) & (std >= 0.0)):
            raise ValueError(f"std must be finite and ≥ 0, got {std}")
        return cls(
            n_channels,
            diffusion=2.0 * std**2 / tau,
            correlation_time_s=tau,
            initial=initial,
            rng=rng,
            grid_step_s=grid_step_s,
            block_steps=block_steps,
        )

    # ------------------------------------------------------------------ public API

    @property
    def n_channels(self) -> int:
        """Number of channels K."""
        return self._n

    @property
    def initial(self) -> np.ndarray:
        """x(0), shape (K,) (read-only)."""
        return self._initial

    @property
    def last_time_s(self) -> float:
        """Latest time asked for (0 before any query); earlier times now raise."""
        return self._last_t

    def mean(self, t_s: npt.ArrayLike) -> np.ndarray:
        """E[x(t) | x(0)], shape ``(*t.shape, K)``; any times ≥ 0, no state change."""
        t = self._check_times(t_s)[..., None]
        phi, c, _ = self._transition(t)
        return phi * self._initial + c

    def variance(self, t_s: npt.ArrayLike) -> np.ndarray:
        """Var[x(t) | x(0)], shape ``(*t.shape, K)``; any times ≥ 0, no state change."""
        t = self._check_times(t_s)[..., None]
        return self._transition(t)[2]

    def value(self, t_s: npt.ArrayLike) -> np.ndarray:
        """Channel values at simulated time(s) ``t_s`` (s).

        Parameters
        ----------
        t_s : float or array_like
            Times ≥ 0, non-decreasing in order and not earlier than :attr:`last_time_s`.

        Returns
        -------
        ndarray
            Shape (K,) for a scalar time, ``(*t.shape, K)`` otherwise.

        Raises
        ------
        ValueError
            A negative or non-finite time, or a time earlier than the one before.
        """
        t = self._check_times(t_s)
        flat = t.ravel()
        if flat.size and (flat[0] < self._last_t or np.any(np.diff(flat) < 0.0)):
            raise ValueError(
                f"query times must not decrease: last time was {self._last_t} s, "
                f"got {flat.tolist() if flat.size <= 8 else flat}"
            )
        out = np.empty((flat.size, self._n))
        for i, ti in enumerate(flat):
            out[i] = self._value_at(float(ti))
        return out.reshape(*t.shape, self._n)

    # ------------------------------------------------------------------ internals

    def _check_times(self, t_s: npt.ArrayLike) -> np.ndarray:
        t = np.asarray(t_s, dtype=float)
        if not np.all(np.isfinite(t) & (t >= 0.0)):
            raise ValueError(f"simulated times must be finite and ≥ 0 s, got {t}")
        return t

    def _keyed_rng(self, stream: int, index: int) -> np.random.Generator:
        base = self._seed
        child = np.random.SeedSequence(
            entropy=base.entropy,
            spawn_key=(*base.spawn_key, stream, index),
            pool_size=base.pool_size,
        )
        return np.random.Generator(np.random.PCG64(child))

    def _transition(self, dt: npt.ArrayLike) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(φ, c, q) of the exact Gaussian transition over ``dt`` (broadcast against K)."""
        k = self._inv_tau
        phi = np.exp(-np.asarray(dt, dtype=float) * k)
        return phi, self._rate * _integral(dt, k), self._diffusion * _integral(dt, 2.0 * k)

    def _coarse(self, index: int) -> np.ndarray:
        """Coarse-chain value at time ``index·B·Δ``; chunks are generated in order."""
        chunk = index // _COARSE_CHUNK
        while self._coarse_chunk < chunk:
            if self._coarse_chunk < 0:
                x = self._initial
            else:
                x = self._coarse_values[-1]
            self._coarse_chunk += 1
            phi, c, q = self._transition(self._block * self._step)
            noise = np.sqrt(q) * self._keyed_rng(
                _STREAM_COARSE, self._coarse_chunk
            ).standard_normal((_COARSE_CHUNK, self._n))
            values = np.empty((_COARSE_CHUNK + 1, self._n))
            values[0] = x
            for j in range(_COARSE_CHUNK):
                values[j + 1] = phi * values[j] + c + noise[j]
            self._coarse_values = values
        return self._coarse_values[index - chunk * _COARSE_CHUNK]

    def _grid(self, k: int) -> np.ndarray:
        """Value at the grid time k·Δ."""
        block, j = divmod(k, self._block)
        if j == 0 and block == self._block_index + 1 and block > 0:
            return self._block_values[-1]  # end of the current block: no need to move on
        if block != self._block_index:
            self._fill_block(block)
        return self._block_values[j]

    def _fill_block(self, block: int) -> None:
        # Order matters: the end value may live in the next coarse chunk.
        start = self._coarse(block).copy()
        end = self._coarse(block + 1)
        phi, c, q = self._transition(self._step)
        noise = np.sqrt(q) * self._keyed_rng(_STREAM_FINE, block).standard_normal(
            (self._block, self._n)
        )
        noise += c
        free = np.empty((self._block + 1, self._n))  # unconditioned path from `start`
        free[0] = start
        walk = self._walk
        free[1:, walk] = start[walk] + np.cumsum(noise[:, walk], axis=0)
        if not np.all(walk):
            reverting = ~walk
            phi_r, noise_r = phi[reverting], noise[:, reverting]
            path = np.empty((self._block + 1, noise_r.shape[1]))
            path[0] = start[reverting]
            for j in range(self._block):
                path[j + 1] = phi_r * path[j] + noise_r[j]
            free[:, reverting] = path
        # Matheron's rule: path | x_T = end is free + Cov(x_s, x_T)/Var(x_T)·(end − free_T).
        values = free + self._block_weight[:, self._kappa_group] * (end - free[-1])
        values[-1] = end  # exact, not end up to rounding
        self._block_values = values
        self._block_index = block

    def _value_at(self, t: float) -> np.ndarray:
        if t == self._last_t:
            return self._last_x.copy()
        if self._deterministic:
            phi, c, _ = self._transition(t)
            x = phi * self._initial + c
        else:
            x = self._stochastic_value_at(t)
        self._last_t, self._last_x = t, x
        return x.copy()

    def _stochastic_value_at(self, t: float) -> np.ndarray:
        r = t / self._step
        k = round(r)
        if abs(r - k) <= max(_ON_GRID_TOLERANCE, 8.0 * np.finfo(float).eps * r):
            return self._grid(k).copy()
        k = math.floor(r)
        left_t = k * self._step
        if self._last_t > left_t:  # an earlier answer in this cell: condition on it
            left_t, left_x = self._last_t, self._last_x
        else:
            left_x = self._grid(k)
        right_t = (k + 1) * self._step
        right_x = self._grid(k + 1)
        # Bridge: x(t) | x(a) = xa, x(b) = xb is Gaussian. From a: mean m = φ_at·xa + c_at,
        # variance q_at; to b: x(b) = φ_tb·x(t) + c_tb + noise(q_tb).
        phi_at, c_at, q_at = self._transition(t - left_t)
        phi_tb, c_tb, q_tb = self._transition(right_t - t)
        _, _, q_ab = self._transition(right_t - left_t)
        prior_mean = phi_at * left_x + c_at
        has_noise = q_ab > 0.0
        gain = np.divide(phi_tb * q_at, q_ab, out=np.zeros_like(q_ab), where=has_noise)
        var = np.divide(q_at * q_tb, q_ab, out=np.zeros_like(q_ab), where=has_noise)
        mean = prior_mean + gain * (right_x - c_tb - phi_tb * prior_mean)
        return mean + np.sqrt(np.maximum(var, 0.0)) * self._bridge_rng.standard_normal(self._n)


@dataclass(frozen=True)
class DriftSpec:
    """How a device's hidden parameters drift (all zero: no drift).

    Parameters
    ----------
    phase_diffusion_rad2_per_s : float, default 0
        Coupling phase random walk: variance grows by this many rad² per second, ≥ 0.
    phase_rate_rad_per_s : float, default 0
        Linear phase drift of every coupling, rad/s.
    log_magnitude_diffusion_per_s : float, default 0
        Coupling magnitude multiplicative walk: Var ln(m/m0) grows by this per second, ≥ 0.
    frequency_wander_std_ghz : float, default 0
        Stationary std of each qubit's f01 wander (Ornstein–Uhlenbeck), GHz, ≥ 0.
    frequency_correlation_time_s : float, default 3600
        Correlation time of the f01 wander, s, finite and > 0.

    Raises
    ------
    ValueError
        A negative diffusion or std, a non-finite value, or a non-positive correlation time.
    """

    phase_diffusion_rad2_per_s: float = 0.0
    phase_rate_rad_per_s: float = 0.0
    log_magnitude_diffusion_per_s: float = 0.0
    frequency_wander_std_ghz: float = 0.0
    frequency_correlation_time_s: float = 3600.0

    def __post_init__(self) -> None:
        for f in fields(self):
            value = float(getattr(self, f.name))
            if not math.isfinite(value):
                raise ValueError(f"{f.name} must be finite, got {value}")
            object.__setattr__(self, f.name, value)
        for name in (
            "phase_diffusion_rad2_per_s",
            "log_magnitude_diffusion_per_s",
            "frequency_wander_std_ghz",
        ):
            if getattr(self, name) < 0.0:
                raise ValueError(f"{name} must be ≥ 0, got {getattr(self, name)}")
        if self.frequency_correlation_time_s <= 0.0:
            raise ValueError(
                f"frequency_correlation_time_s must be > 0, got {self.frequency_correlation_time_s}"
            )

    @classmethod
    def off(cls) -> DriftSpec:
        """No drift at all."""
        return cls()

    @property
    def is_off(self) -> bool:
        """True when nothing drifts."""
        return (
            self.phase_diffusion_rad2_per_s == 0.0
            and self.phase_rate_rad_per_s == 0.0
            and self.log_magnitude_diffusion_per_s == 0.0
            and self.frequency_wander_std_ghz == 0.0
        )

    def track(
        self,
        n_couplings: int,
        n_qubits: int,
        *,
        phase_rates_rad_per_s: npt.ArrayLike | None = None,
        stationary_start: bool = False,
        rng: SeedLike = None,
        grid_step_s: float = 1.0,
        block_steps: int = 256,
    ) -> DriftTrack:
        """One :class:`DriftTrack` for a whole device.

        Channel layout: ``[0, n)`` coupling phase offsets (rad), ``[n, 2n)`` coupling
        log-magnitude offsets (magnitude factor ``exp``), ``[2n, 2n + n_qubits)`` qubit f01
        offsets (GHz), with ``n = n_couplings``.

        Parameters
        ----------
        n_couplings, n_qubits : int
            Numbers of drifting couplings and qubits, ≥ 0.
        phase_rates_rad_per_s : array_like (n_couplings,), optional
            Per-coupling linear phase rates in rad/s, replacing ``phase_rate_rad_per_s``.
        stationary_start : bool, default False
            Draw the f01 offsets at t = 0 from their stationary law instead of starting at 0
            (the other channels always start at 0, so t = 0 is the nominal device).
        rng, grid_step_s, block_steps
            As for :class:`DriftTrack`.
        """
        n_c, n_q = int(n_couplings), int(n_qubits)
        if n_c < 0 or n_q < 0:
            raise ValueError(f"channel counts must be ≥ 0, got {n_couplings}, {n_qubits}")
        rates = (
            self.phase_rate_rad_per_s if phase_rates_rad_per_s is None else phase_rates_rad_per_s
        )
        tau = self.frequency_correlation_time_s
        wander_diffusion = 2.0 * self.frequency_wander_std_ghz**2 / tau
        return DriftTrack(
            2 * n_c + n_q,
            diffusion=np.concatenate(
                [
                    np.full(n_c, self.phase_diffusion_rad2_per_s),
                    np.full(n_c, self.log_magnitude_diffusion_per_s),
                    np.full(n_q, wander_diffusion),
                ]
            ),
            rate=np.concatenate(
                [_channel_parameter(rates, n_c, "phase_rates_rad_per_s"), np.zeros(n_c + n_q)]
            ),
            correlation_time_s=np.concatenate([np.full(2 * n_c, math.inf), np.full(n_q, tau)]),
            initial="stationary" if stationary_start else 0.0,
            rng=rng,
            grid_step_s=grid_step_s,
            block_steps=block_steps,
        )
