"""Driven, damped dynamics of one transmon under many tones — the fast path and a reference path.

Model (DESIGN.md section 4). In the frame rotating at a frequency ``f`` the victim's
Hamiltonian is ::

    H/h = Σ_n (ε_n − n·f)|n⟩⟨n| + Σ_k ½[Ω_k(t)·e^{−i2π(f_k − f)t}·Σ_n λ_n|n+1⟩⟨n| + h.c.]

(rotating-wave, one term per tone k at carrier f_k with complex Rabi rate Ω_k(t) in GHz,
i.e. cycles per ns), with Lindblad relaxation (jump √(Γ1)·Σ√n|n−1⟩⟨n|, so level n decays
at n·Γ1) and pure dephasing (jump √(2Γφ)·n̂, so ρ_mk decays at Γφ·(m−k)²),
Γ1 = 1/T1, Γφ = 1/T2 − 1/(2T1). Units: ns, GHz.

Method of the fast path (compiled with numba, parallel over runs)
------------------------------------------------------------------
A run's time axis is cut at every tone start/end and at the ends of flat-top ramps.

* An interval where every active tone shares one frequency and has a constant
  envelope (square tones, flat tops, or no tone at all) has a *static* generator
  in the frame of that frequency. Its propagator is the exact exponential of the
  L²×L² Lindblad generator (scaling and squaring + Taylor), one per interval, however
  long: long flat-top Stark pulses and idle waits cost the same as a short one.
* Other intervals are stepped with the fourth-order Magnus integrator (two
  Gauss–Legendre points and one commutator; Blanes et al., Phys. Rep. 470, 151 (2009))
  in the frame of the strongest tone, where a single-frequency drive is slow, so
  the step is set by the envelope and by the spread of the remaining frequencies,
  not by the carrier. Each step's unitary is an exact matrix exponential; the
  weak dissipation is applied by Strang splitting with its exact channel. The
  dissipator commutes with the diagonal part of H (it is phase covariant), so the
  splitting error involves only the drive: ~ T·dt²·Ω²·Γ/12.

The reference path (:func:`evolve_reference`) integrates the same master equation
with SciPy's adaptive Runge–Kutta at tight tolerances; it is slow and exists for tests.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba as nb
import numpy as np
from scipy.integrate import solve_ivp

__all__ = ["ToneBatch", "evolve_populations", "evolve_reference", "StepControl"]

TWO_PI = 2.0 * math.pi
SQRT3 = math.sqrt(3.0)

# Envelope codes, same order as xtalkcal.timeline.ENVELOPE_KINDS.
GAUSSIAN, DRAG, FLATTOP, SQUARE = 0, 1, 2, 3


@dataclass(frozen=True)
class StepControl:
    """Accuracy knobs of the Magnus stepper.

    Parameters
    ----------
    max_step_ns : float
        Longest step (ns) inside a time-dependent interval.
    phase_per_step : float
        Largest phase (rad) that the fastest residual frequency (spread of the
        diagonal, or a tone's offset from the working frame) may advance per step.
    envelope_fraction : float
        Steps per Gaussian σ or cosine ramp are at least ``1/envelope_fraction``.
    """

    max_step_ns: float = 0.5
    phase_per_step: float = 0.3
    envelope_fraction: float = 0.125


@dataclass(frozen=True)
class ToneBatch:
    """Tones as seen by one victim, for R runs padded to M tones each.

    Attributes
    ----------
    start_ns, duration_ns, freq_ghz : float arrays (R, M)
    omega_ghz : complex array (R, M)
        Complex Rabi rate at the victim's 0–1 transition (GHz), envelope peak 1.
    env_code : int array (R, M)
    sigma_ns, drag_ns, ramp_ns : float arrays (R, M)
    n_tones : int array (R,)
    end_ns : float array (R,)
        Readout time of each run.
    """

    start_ns: np.ndarray
    duration_ns: np.ndarray
    freq_ghz: np.ndarray
    omega_ghz: np.ndarray
    env_code: np.ndarray
    sigma_ns: np.ndarray
    drag_ns: np.ndarray
    ramp_ns: np.ndarray
    n_tones: np.ndarray
    end_ns: np.ndarray


# ----------------------------------------------------------------------------- kernels


@nb.njit(cache=True, fastmath=False)
def _envelope(code, t_rel, T, sigma, drag, ramp):
    if t_rel < 0.0 or t_rel > T:
        return 0.0 + 0.0j
    if code == GAUSSIAN or code == DRAG:
        edge = math.exp(-((0.5 * T) ** 2) / (2.0 * sigma * sigma))
        x = t_rel - 0.5 * T
        gauss = math.exp(-(x * x) / (2.0 * sigma * sigma))
        g = (gauss - edge) / (1.0 - edge)
        if code == DRAG:
            dg = -x / (sigma * sigma) * gauss / (1.0 - edge)
            return g + 1j * drag * dg
        return g + 0.0j
    if code == FLATTOP:
        if ramp > 0.0:
            if t_rel < ramp:
                return 0.5 * (1.0 - math.cos(math.pi * t_rel / ramp)) + 0.0j
            if t_rel > T - ramp:
                return 0.5 * (1.0 - math.cos(math.pi * (T - t_rel) / ramp)) + 0.0j
        return 1.0 + 0.0j
    return 1.0 + 0.0j


@nb.njit(cache=True)
def _matmul(A, B):
    n = A.shape[0]
    C = np.zeros((n, n), dtype=np.complex128)
    for i in range(n):
        for k in range(n):
            a = A[i, k]
            if a != 0:
                for j in range(n):
                    C[i, j] += a * B[k, j]
    return C


@nb.njit(cache=True)
def _expm(A):
    """exp(A) for a small dense complex matrix: scaling and squaring with Taylor order 12."""
    n = A.shape[0]
    norm = 0.0
    for i in range(n):
        row = 0.0
        for j in range(n):
            row += abs(A[i, j])
        norm = max(norm, row)
    s = 0
    if norm > 0.5:
        s = int(math.ceil(math.log2(norm / 0.5)))
    scale = 1.0 / (2.0**s)
    X = A * scale
    E = np.eye(n, dtype=np.complex128)
    term = np.eye(n, dtype=np.complex128)
    for k in range(1, 13):
        term = _matmul(term, X) / k
        E += term
    for _ in range(s):
        E = _matmul(E, E)
    return E


@nb.njit(cache=True)
def _hamiltonian(t, f_frame, levels_ghz, ladder, start, dur, freq, omega, code, sigma, drag, ramp,
                 n_tones):
    """H/h (GHz) in the frame rotating at f_frame, at time t."""
    L = levels_ghz.shape[0]
    H = np.zeros((L, L), dtype=np.complex128)
    for n in range(L):
        H[n, n] = levels_ghz[n] - n * f_frame
    drive = 0.0 + 0.0j
    for k in range(n_tones):
        tr = t - start[k]
        if tr < 0.0 or tr > dur[k]:
            continue
        e = _envelope(code[k], tr, dur[k], sigma[k], drag[k], ramp[k])
        ph = -TWO_PI * (freq[k] - f_frame) * t
        drive += 0.5 * omega[k] * e * complex(math.cos(ph), math.sin(ph))
    for n in range(L - 1):
        H[n + 1, n] += drive * ladder[n]
        H[n, n + 1] += np.conj(drive) * ladder[n]
    return H


@nb.njit(cache=True)
def _generator(H, gamma1, gamma_phi):
    """Row-major vec(ρ) Lindblad generator (1/ns) for H (GHz)."""
    L = H.shape[0]
    N = L * L
    G = np.zeros((N, N), dtype=np.complex128)
    for m in range(L):
        for k in range(L):
            row = m * L + k
            for p in range(L):
                # -i2π (H ρ)[m,k] = -i2π Σ_p H[m,p] ρ[p,k]
                G[row, p * L + k] += -1j * TWO_PI * H[m, p]
                # +i2π (ρ H)[m,k] = +i2π Σ_q ρ[m,q] H[q,k]
                G[row, m * L + p] += 1j * TWO_PI * H[p, k]
            # relaxation: J = √Γ1 Σ √n |n-1><n|;  J ρ J† -> ρ[m+1,k+1] √((m+1)(k+1)) Γ1
            if m + 1 < L and k + 1 < L:
                G[row, (m + 1) * L + (k + 1)] += gamma1 * math.sqrt((m + 1.0) * (k + 1.0))
            # -(1/2){J†J, ρ}: J†J = Γ1 n̂  and dephasing -Γφ (m-k)^2
            G[row, row] += -0.5 * gamma1 * (m + k) - gamma_phi * (m - k) ** 2
    return G


@nb.njit(cache=True)
def _apply_super(S, rho):
    L = rho.shape[0]
    N = L * L
    v = np.empty(N, dtype=np.complex128)
    for m in range(L):
        for k in range(L):
            v[m * L + k] = rho[m, k]
    out = np.zeros((L, L), dtype=np.complex128)
    for r in range(N):
        acc = 0.0 + 0.0j
        for c in range(N):
            acc += S[r, c] * v[c]
        out[r // L, r % L] = acc
    return out


@nb.njit(cache=True)
def _change_frame(rho, f_old, f_new, t):
    """ρ_new[m,k] = ρ_old[m,k]·exp(i2π(f_new − f_old)(m − k)t)."""
    L = rho.shape[0]
    d = TWO_PI * (f_new - f_old) * t
    for m in range(L):
        for k in range(L):
            if m != k:
                ph = d * (m - k)
                rho[m, k] *= complex(math.cos(ph), math.sin(ph))
    return rho


@nb.njit(cache=True)
def _evolve_one(levels_ghz, ladder, gamma1, gamma_phi, start, dur, freq, omega, code, sigma, drag,
                ramp, n_tones, t_end, max_step, phase_per_step, env_fraction):
    L = levels_ghz.shape[0]
    rho = np.zeros((L, L), dtype=np.complex128)
    rho[0, 0] = 1.0
    # breakpoints
    nb_max = 2 + 4 * n_tones
    bp = np.empty(nb_max)
    nbp = 0
    bp[nbp] = 0.0
    nbp += 1
    bp[nbp] = t_end
    nbp += 1
    for k in range(n_tones):
        for tt in (start[k], start[k] + dur[k]):
            if tt < t_end:
                bp[nbp] = tt
                nbp += 1
        if code[k] == FLATTOP and ramp[k] > 0.0:
            for tt in (start[k] + ramp[k], start[k] + dur[k] - ramp[k]):
                if tt < t_end:
                    bp[nbp] = tt
                    nbp += 1
    bps = np.sort(bp[:nbp])
    f_cur = levels_ghz[1] - levels_ghz[0]
    diss = np.zeros((L, L), dtype=np.complex128)  # placeholder H for dissipation-only generator
    for ib in range(nbp - 1):
        ta = bps[ib]
        tb = bps[ib + 1]
        span = tb - ta
        if span <= 1e-12:
            continue
        tm = 0.5 * (ta + tb)
        # active tones and the strongest one
        best = -1
        best_mag = -1.0
        static = True
        f_first = 0.0
        n_act = 0
        for k in range(n_tones):
            if start[k] <= tm <= start[k] + dur[k]:
                mag = abs(omega[k])
                if n_act == 0:
                    f_first = freq[k]
                elif abs(freq[k] - f_first) > 1e-12:
                    static = False
                n_act += 1
                if code[k] == GAUSSIAN or code[k] == DRAG:
                    static = False
                elif code[k] == FLATTOP and ramp[k] > 0.0:
                    tr = tm - start[k]
                    if tr < ramp[k] or tr > dur[k] - ramp[k]:
                        static = False
                if mag > best_mag:
                    best_mag = mag
                    best = k
        f_new = f_cur if best < 0 else freq[best]
        rho = _change_frame(rho, f_cur, f_new, ta)
        f_cur = f_new
        if static:
            H = _hamiltonian(tm, f_cur, levels_ghz, ladder, start, dur, freq, omega, code, sigma,
                             drag, ramp, n_tones)
            S = _expm(_generator(H, gamma1, gamma_phi) * span)
            rho = _apply_super(S, rho)
            continue
        # time-dependent interval: Magnus-4 steps
        spread = 0.0
        dmin = 1e300
        dmax = -1e300
        for n in range(L):
            dn = levels_ghz[n] - n * f_cur
            dmin = min(dmin, dn)
            dmax = max(dmax, dn)
        spread = dmax - dmin
        step = max_step
        for k in range(n_tones):
            if start[k] <= tm <= start[k] + dur[k]:
                off = abs(freq[k] - f_cur)
                if off > spread:
                    spread = off
                if code[k] == GAUSSIAN or code[k] == DRAG:
                    step = min(step, env_fraction * sigma[k])
                elif code[k] == FLATTOP and ramp[k] > 0.0:
                    step = min(step, env_fraction * ramp[k])
        if spread > 0.0:
            step = min(step, phase_per_step / (TWO_PI * spread))
        nsteps = int(math.ceil(span / step))
        dt = span / nsteps
        Dh = _expm(_generator(diss, gamma1, gamma_phi) * (0.5 * dt))
        c1 = 0.5 - SQRT3 / 6.0
        c2 = 0.5 + SQRT3 / 6.0
        for s in range(nsteps):
            t0 = ta + s * dt
            H1 = _hamiltonian(t0 + c1 * dt, f_cur, levels_ghz, ladder, start, dur, freq, omega,
                              code, sigma, drag, ramp, n_tones)
            H2 = _hamiltonian(t0 + c2 * dt, f_cur, levels_ghz, ladder, start, dur, freq, omega,
                              code, sigma, drag, ramp, n_tones)
            A1 = -1j * TWO_PI * H1
            A2 = -1j * TWO_PI * H2
            Om = (0.5 * dt) * (A1 + A2) + (SQRT3 / 12.0) * dt * dt * (_matmul(A2, A1) - _matmul(A1, A2))
            U = _expm(Om)
            rho = _apply_super(Dh, rho)
            rho = _matmul(_matmul(U, rho), np.conj(U.T))
            rho = _apply_super(Dh, rho)
    pops = np.empty(L)
    for n in range(L):
        pops[n] = rho[n, n].real
    return pops


@nb.njit(cache=True, parallel=True)
def _evolve_batch(levels_ghz, ladder, gamma1, gamma_phi, start, dur, freq, omega, code, sigma,
                  drag, ramp, n_tones, t_end, max_step, phase_per_step, env_fraction):
    R = start.shape[0]
    L = levels_ghz.shape[1]
    out = np.empty((R, L))
    for r in nb.prange(R):
        out[r] = _evolve_one(levels_ghz[r], ladder[r], gamma1[r], gamma_phi[r], start[r], dur[r],
                             freq[r], omega[r], code[r], sigma[r], drag[r], ramp[r], n_tones[r],
                             t_end[r], max_step, phase_per_step, env_fraction)
    return out


# ----------------------------------------------------------------------------- wrappers


def _rates(t1_ns: np.ndarray, t2_ns: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    g1 = np.where(np.isfinite(t1_ns), 1.0 / t1_ns, 0.0)
    g2 = np.where(np.isfinite(t2_ns), 1.0 / t2_ns, 0.0)
    gphi = g2 - 0.5 * g1
    if np.any(gphi < -1e-15):
        raise ValueError("T2 > 2·T1 is unphysical")
    return g1, np.maximum(gphi, 0.0)


def evolve_populations(
    levels_ghz: np.ndarray,
    ladder: np.ndarray,
    t1_ns: np.ndarray,
    t2_ns: np.ndarray,
    tones: ToneBatch,
    *,
    control: StepControl | None = None,
) -> np.ndarray:
    """Final level populations of R runs, each starting in |0⟩.

    Parameters
    ----------
    levels_ghz : (R, L) array
        Level energies ε_n (GHz), ε_0 = 0.
    ladder : (R, L−1) array
        Ladder matrix elements λ_n (λ_0 = 1).
    t1_ns, t2_ns : (R,) arrays
        Relaxation and Ramsey times (ns); ``inf`` disables.
    tones : ToneBatch
    control : StepControl, optional

    Returns
    -------
    (R, L) array of populations.
    """
    c = control or StepControl()
    R = tones.start_ns.shape[0]
    g1, gphi = _rates(np.broadcast_to(t1_ns, (R,)).astype(float),
                      np.broadcast_to(t2_ns, (R,)).astype(float))
    levels = np.ascontiguousarray(np.broadcast_to(levels_ghz, (R, np.shape(levels_ghz)[-1])),
                                  dtype=float)
    lad = np.ascontiguousarray(np.broadcast_to(ladder, (R, levels.shape[1] - 1)), dtype=float)
    pops = _evolve_batch(levels, lad, g1, gphi,
                         np.ascontiguousarray(tones.start_ns, dtype=float),
                         np.ascontiguousarray(tones.duration_ns, dtype=float),
                         np.ascontiguousarray(tones.freq_ghz, dtype=float),
                         np.ascontiguousarray(tones.omega_ghz, dtype=complex),
                         np.ascontiguousarray(tones.env_code, dtype=np.int64),
                         np.ascontiguousarray(tones.sigma_ns, dtype=float),
                         np.ascontiguousarray(tones.drag_ns, dtype=float),
                         np.ascontiguousarray(tones.ramp_ns, dtype=float),
                         np.ascontiguousarray(tones.n_tones, dtype=np.int64),
                         np.ascontiguousarray(tones.end_ns, dtype=float),
                         c.max_step_ns, c.phase_per_step, c.envelope_fraction)
    # Round-off can leave populations a hair outside [0, 1]; the sampler needs valid ones.
    pops = np.clip(pops, 0.0, 1.0)
    return pops / pops.sum(axis=1, keepdims=True)


def evolve_reference(
    levels_ghz: np.ndarray,
    ladder: np.ndarray,
    t1_ns: float,
    t2_ns: float,
    tones: ToneBatch,
    run: int = 0,
    *,
    rtol: float = 1e-10,
    atol: float = 1e-12,
) -> np.ndarray:
    """Slow reference: the same master equation for one run, by SciPy's DOP853.

    Integrated in the frame of the victim's 0–1 frequency, interval by interval
    (so that the integrator never steps across a pulse edge).
    """
    L = len(levels_ghz)
    g1, gphi = _rates(np.array([t1_ns], float), np.array([t2_ns], float))
    g1, gphi = float(g1[0]), float(gphi[0])
    n_t = int(tones.n_tones[run])
    args = tuple(np.ascontiguousarray(a[run, :n_t]) for a in (
        tones.start_ns, tones.duration_ns, tones.freq_ghz, tones.omega_ghz, tones.env_code,
        tones.sigma_ns, tones.drag_ns, tones.ramp_ns))
    start, dur, freq, omega, code, sigma, drag, ramp = args
    levels = np.asarray(levels_ghz, float)
    lad = np.asarray(ladder, float)
    f_frame = levels[1] - levels[0]
    zero = np.zeros((L, L), complex)
    Gd = _generator(zero, g1, gphi)

    def rhs(t, y):
        H = _hamiltonian(t, f_frame, levels, lad, start, dur, freq, omega, code.astype(np.int64),
                         sigma, drag, ramp, n_t)
        rho = y.reshape(L, L)
        comm = -1j * TWO_PI * (H @ rho - rho @ H)
        return comm.ravel() + Gd @ y

    t_end = float(tones.end_ns[run])
    cuts = {0.0, t_end}
    for k in range(n_t):
        for tt in (start[k], start[k] + dur[k]):
            if 0 < tt < t_end:
                cuts.add(float(tt))
    cuts = sorted(cuts)
    y = np.zeros(L * L, complex)
    y[0] = 1.0
    for a, b in zip(cuts[:-1], cuts[1:]):
        sol = solve_ivp(rhs, (a, b), y, method="DOP853", rtol=rtol, atol=atol)
        y = sol.y[:, -1]
    return np.real(np.diag(y.reshape(L, L)))
