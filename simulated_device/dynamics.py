"""Driven, damped dynamics of one transmon under many tones — the fast path and a reference path.

Model. In the frame rotating at a frequency ``f`` the victim's
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
  L²×L² Lindblad generator, one per interval, however long: long flat-top Stark
  pulses and idle waits cost the same as a short one.
* Other intervals are stepped with the fourth-order Magnus integrator (two
  Gauss–Legendre points and one commutator; Blanes et al., Phys. Rep. 470, 151 (2009))
  in the frame of the strongest tone, where a single-frequency drive is slow, so
  the step is set by the envelope and by the spread of the remaining frequencies,
  not by the carrier. Each step's unitary is an exact matrix exponential; the
  weak dissipation is applied by Strang splitting with its exact channel. The
  dissipator commutes with the diagonal part of H (it is phase covariant), so the
  splitting error involves only the drive: ~ T·dt²·Ω²·Γ/12.

How the stepper is kept cheap (none of this changes the result beyond round-off):

* H is tridiagonal (diagonal levels plus the ladder), so the Magnus exponent, commutator
  included, is written out entry by entry; its diagonal is centred (a global phase, which
  cancels in UρU†) to lower its norm.
* Matrix exponentials are Taylor polynomials evaluated by Paterson–Stockmeyer (degree 12 in
  five products); the degree (6 to 15) is the lowest whose remainder bound at the argument's
  norm is below 1e-16, with scaling and squaring beyond that.
* The dissipation channel for the step is computed once per interval and applied along the
  diagonals of ρ, the only entries it couples; the half steps of consecutive steps merge.
* Envelope constants are computed once per interval, and each tone's rotating phase
  e^{−i2π(f_k − f)t} is advanced by a complex product per step, re-evaluated every 16 steps.
* All work arrays are allocated once per run: the kernel allocates nothing per step.

The waveform-level path (:func:`evolve_held`) integrates the same master equation under
sample-held drives (what a DAC plays), with the same kernels: a plug-in's compiled
waveforms can be checked against the tone path before any hardware is touched.

The reference path (:func:`evolve_reference`) integrates the same master equation
with SciPy's adaptive Runge–Kutta at tight tolerances; it is slow and exists for tests.

About 1000 lines because the three paths share the stepper's compiled kernels, which stay
private to this module.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba as nb
import numpy as np
from scipy.integrate import solve_ivp

__all__ = ["ToneBatch", "evolve_populations", "evolve_states", "evolve_held", "evolve_reference",
           "initial_density", "StepControl"]

TWO_PI = 2.0 * math.pi
SQRT3 = math.sqrt(3.0)

# Envelope codes, same order as xtalkcal.hardware.ENVELOPE_KINDS.
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
    phase_per_step: float = 0.125
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


# Taylor polynomials for every matrix exponential (per-step unitaries and interval channels).
# The degree is the lowest of _PS_DEGREES whose remainder bound at the norm of the (scaled)
# argument is below _TAYLOR_TOL; the tolerance is relative to a norm-1 result and applies per
# step, so 10⁴ steps still keep the truncation below 1e-12.
_TAYLOR_TOL = 1e-16
_PS_DEGREES = (6, 9, 12, 15)
_INV_FACT = tuple(1.0 / math.factorial(k) for k in range(_PS_DEGREES[-1] + 1))


def _taylor_reach(degree: int, tol: float) -> float:
    """Largest θ with Σ_{k>m} θ^k/k! ≤ θ^{m+1}/(m+1)!·1/(1 − θ/(m+2)) ≤ tol (bisection)."""
    lo, hi = 0.0, 2.0
    for _ in range(100):
        mid = 0.5 * (lo + hi)
        tail = mid ** (degree + 1) / math.factorial(degree + 1) / (1.0 - mid / (degree + 2))
        lo, hi = (mid, hi) if tail <= tol else (lo, mid)
    return lo


_PS_REACH = tuple(_taylor_reach(m, _TAYLOR_TOL) for m in _PS_DEGREES)

# Re-evaluating each tone's rotating phase by cos/sin every this many steps (and advancing it
# by one complex product in between) bounds its accumulated round-off to ~16 ulp.
_PHASE_REFRESH = 16

# Envelope branches of an active tone inside one interval (the branch cannot change inside an
# interval, since every ramp end is a breakpoint).
_ENV_ONE, _ENV_GAUSS, _ENV_DRAG, _ENV_RISE, _ENV_FALL = 0, 1, 2, 3, 4


@nb.njit(cache=True)
def _mm(A, B, out):
    """out = A·B for small square matrices (out must not alias A or B)."""
    n = A.shape[0]
    for i in range(n):
        for j in range(n):
            acc = 0.0 + 0.0j
            for k in range(n):
                acc += A[i, k] * B[k, j]
            out[i, j] = acc


@nb.njit(cache=True)
def _expm_into(X, out, X2, X3, tmp):
    """out = exp(X) for a small dense matrix, without allocating; X is overwritten.

    Taylor polynomial of degree m = 3q ∈ ``_PS_DEGREES`` (the lowest whose remainder bound is
    ≤ ``_TAYLOR_TOL``), by Paterson–Stockmeyer in powers of Y = X³: p = Σ_j B_j Y^j with
    B_j = c_{3j} + c_{3j+1}X + c_{3j+2}X², evaluated by Horner in Y — q + 1 products instead
    of m. Beyond the reach of the highest degree, scaling by 2^−s and s squarings.
    """
    n = X.shape[0]
    theta = 0.0
    for i in range(n):
        row = 0.0
        for j in range(n):
            # |x| without hypot's overflow guard (entries are far from overflow; it is a bound)
            x = X[i, j]
            row += math.sqrt(x.real * x.real + x.imag * x.imag)
        theta = max(theta, row)
    s = 0
    q = _PS_DEGREES[-1] // 3
    found = False
    for i in range(len(_PS_DEGREES)):
        if not found and theta <= _PS_REACH[i]:
            q = _PS_DEGREES[i] // 3
            found = True
    if not found:
        s = int(math.ceil(math.log2(theta / _PS_REACH[-1])))
        scale = 1.0 / (2.0**s)
        for i in range(n):
            for j in range(n):
                X[i, j] *= scale
    _mm(X, X, X2)
    _mm(X2, X, X3)
    m = 3 * q
    j = q - 1
    for a in range(n):
        for b in range(n):
            out[a, b] = (_INV_FACT[m] * X3[a, b] + _INV_FACT[3 * j + 1] * X[a, b]
                         + _INV_FACT[3 * j + 2] * X2[a, b])
        out[a, a] += _INV_FACT[3 * j]
    for j in range(q - 2, -1, -1):
        _mm(X3, out, tmp)
        for a in range(n):
            for b in range(n):
                out[a, b] = (tmp[a, b] + _INV_FACT[3 * j + 1] * X[a, b]
                             + _INV_FACT[3 * j + 2] * X2[a, b])
            out[a, a] += _INV_FACT[3 * j]
    for _ in range(s):
        _mm(out, out, tmp)
        for a in range(n):
            for b in range(n):
                out[a, b] = tmp[a, b]


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
def _apply_super(S, rho, v):
    """ρ ← S·vec(ρ) in place (row-major vec); ``v`` is an L² work vector."""
    L = rho.shape[0]
    N = L * L
    for m in range(L):
        for k in range(L):
            v[m * L + k] = rho[m, k]
    for r in range(N):
        acc = 0.0 + 0.0j
        for c in range(N):
            acc += S[r, c] * v[c]
        rho[r // L, r % L] = acc


@nb.njit(cache=True)
def _scaled_into(A, c, out):
    """out = c·A."""
    n = A.shape[0]
    for i in range(n):
        for j in range(n):
            out[i, j] = c * A[i, j]


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
def _dissipate(S, rho):
    """ρ ← S ρ in place, for S = exp(τ·G) of the dissipation-only generator.

    That channel only moves ρ[m+j, k+j] into ρ[m, k] (j ≥ 0), so S is zero elsewhere and the
    dense product reduces to these few terms — the same sum in the same order. Going through
    (m, k) in increasing order reads every ρ[m+j, k+j], j ≥ 1, before it is overwritten.
    """
    L = rho.shape[0]
    for m in range(L):
        for k in range(L):
            r = m * L + k
            acc = S[r, r] * rho[m, k]
            j = 1
            while m + j < L and k + j < L:
                acc += S[r, r + j * (L + 1)] * rho[m + j, k + j]
                j += 1
            rho[m, k] = acc


@nb.njit(cache=True)
def _active_envelope(kind, p, i, t):
    """E(t) of active tone ``i`` from its per-interval constants ``p[i]``.

    Gaussian/DRAG: p = (centre, 1/(2σ²), edge, 1/(1 − edge), drag/(σ²(1 − edge)));
    ramps: p = (ramp's outer end, π/ramp). Same formulas as :func:`_envelope`.
    """
    if kind == _ENV_GAUSS or kind == _ENV_DRAG:
        x = t - p[i, 0]
        gauss = math.exp(-(x * x) * p[i, 1])
        g = (gauss - p[i, 2]) * p[i, 3]
        if kind == _ENV_DRAG:
            return complex(g, -p[i, 4] * x * gauss)
        return complex(g, 0.0)
    if kind == _ENV_RISE:
        return complex(0.5 * (1.0 - math.cos(p[i, 1] * (t - p[i, 0]))), 0.0)
    if kind == _ENV_FALL:
        return complex(0.5 * (1.0 - math.cos(p[i, 1] * (p[i, 0] - t))), 0.0)
    return 1.0 + 0.0j


@nb.njit(cache=True)
def _frame_diagonal(levels_ghz, ladder, f_cur, dvec, lam2):
    """Fill d_n = ε_n − n·f and λ_n² for the frame ``f_cur``; return the spread of d."""
    L = levels_ghz.shape[0]
    for n in range(L):
        dvec[n] = levels_ghz[n] - n * f_cur
    for n in range(L - 1):
        lam2[n] = ladder[n] * ladder[n]
    dmin = dvec[0]
    dmax = dvec[0]
    for n in range(L):
        dmin = min(dmin, dvec[n])
        dmax = max(dmax, dvec[n])
    return dmax - dmin


@nb.njit(cache=True)
def _active_tones(tm, f_cur, spread, max_step, env_fraction, start, dur, freq, omega, code, sigma,
                  drag, ramp, n_tones, kind, par, half_om, wph):
    """Gather the tones active at ``tm`` with their per-interval envelope constants.

    For active tone ``i`` this fills its envelope branch ``kind[i]`` and constants ``par[i]``
    (see :func:`_active_envelope`), half its Rabi rate ``half_om[i]`` and the angular rate
    ``wph[i]`` of its phase in the frame ``f_cur``. A Gaussian σ or a ramp bounds the step
    (``env_fraction`` of it), and each tone's offset from the frame widens ``spread``.

    Returns
    -------
    n_act, step, spread
        Number of active tones, the step bound from ``max_step`` and the envelopes, and the
        largest residual frequency (diagonal spread or a tone's offset).
    """
    step = max_step
    n_act = 0
    for k in range(n_tones):
        if not (start[k] <= tm <= start[k] + dur[k]):
            continue
        off = abs(freq[k] - f_cur)
        if off > spread:
            spread = off
        half_om[n_act] = 0.5 * omega[k]
        wph[n_act] = -TWO_PI * (freq[k] - f_cur)
        if code[k] == GAUSSIAN or code[k] == DRAG:
            step = min(step, env_fraction * sigma[k])
            s2 = sigma[k] * sigma[k]
            edge = math.exp(-((0.5 * dur[k]) ** 2) / (2.0 * s2))
            kind[n_act] = _ENV_GAUSS if code[k] == GAUSSIAN else _ENV_DRAG
            par[n_act, 0] = start[k] + 0.5 * dur[k]
            par[n_act, 1] = 1.0 / (2.0 * s2)
            par[n_act, 2] = edge
            par[n_act, 3] = 1.0 / (1.0 - edge)
            par[n_act, 4] = drag[k] / s2 / (1.0 - edge)
        elif code[k] == FLATTOP and ramp[k] > 0.0:
            step = min(step, env_fraction * ramp[k])
            tr = tm - start[k]
            par[n_act, 1] = math.pi / ramp[k]
            if tr < ramp[k]:
                kind[n_act] = _ENV_RISE
                par[n_act, 0] = start[k]
            elif tr > dur[k] - ramp[k]:
                kind[n_act] = _ENV_FALL
                par[n_act, 0] = start[k] + dur[k]
            else:
                kind[n_act] = _ENV_ONE
        else:
            kind[n_act] = _ENV_ONE
        n_act += 1
    return n_act, step, spread


@nb.njit(cache=True)
def _step_phases(n_act, wph, dt, c1, c2, rot, p1, p2):
    """Per-step phase factors of each active tone: one step, and the two Gauss points."""
    for i in range(n_act):
        rot[i] = complex(math.cos(wph[i] * dt), math.sin(wph[i] * dt))
        p1[i] = complex(math.cos(wph[i] * c1 * dt), math.sin(wph[i] * c1 * dt))
        p2[i] = complex(math.cos(wph[i] * c2 * dt), math.sin(wph[i] * c2 * dt))


@nb.njit(cache=True)
def _split_channels(gen_diss, dt, sarg, d_half, d_full, sX2, sX3, stmp):
    """Dissipation channels exp(G·dt/2) into ``d_half`` and exp(G·dt) into ``d_full``."""
    _scaled_into(gen_diss, 0.5 * dt, sarg)
    _expm_into(sarg, d_half, sX2, sX3, stmp)
    _scaled_into(gen_diss, dt, sarg)
    _expm_into(sarg, d_full, sX2, sX3, stmp)


@nb.njit(cache=True)
def _gauss_point_drives(n_act, kind, par, half_om, zph, p1, p2, rot, t0, c1, c2, dt):
    """Drive amplitudes z1, z2 at the step's two Gauss points; advances ``zph`` by one step."""
    z1 = 0.0 + 0.0j
    z2 = 0.0 + 0.0j
    for i in range(n_act):
        ki = kind[i]
        z1 += half_om[i] * _active_envelope(ki, par, i, t0 + c1 * dt) * (zph[i] * p1[i])
        z2 += half_om[i] * _active_envelope(ki, par, i, t0 + c2 * dt) * (zph[i] * p2[i])
        zph[i] *= rot[i]
    return z1, z2


@nb.njit(cache=True)
def _magnus_exponent(om, z1, z2, dvec, lam2, ladder, dt, a_lin, kap):
    """Fill the tridiagonal Magnus exponent Ω of one step (closed form, see
    :func:`_magnus_interval`); entries off the tridiagonal are left as they are (zero)."""
    L = dvec.shape[0]
    sz = z1 + z2
    dz = z1 - z2
    im21 = (z2 * np.conj(z1)).imag
    # Diagonal of Ω (purely imaginary); a common shift is a global phase of U, which
    # cancels in UρU†, so it is centred to lower the norm (and the Taylor degree).
    vmin = 1e300
    vmax = -1e300
    for n in range(L):
        comm = 0.0
        if n >= 1:
            comm += lam2[n - 1]
        if n <= L - 2:
            comm -= lam2[n]
        v = -TWO_PI * dt * dvec[n] + 2.0 * kap * im21 * comm
        om[n, n] = complex(0.0, v)
        vmin = min(vmin, v)
        vmax = max(vmax, v)
    centre = 0.5 * (vmin + vmax)
    for n in range(L):
        om[n, n] = complex(0.0, om[n, n].imag - centre)
    for n in range(L - 1):
        dd = dvec[n + 1] - dvec[n]
        om[n + 1, n] = (a_lin * sz + kap * dz * dd) * ladder[n]
        om[n, n + 1] = (a_lin * np.conj(sz) - kap * np.conj(dz) * dd) * ladder[n]


@nb.njit(cache=True)
def _conjugate(U, rho, T):
    """ρ ← UρU† in place, computing the upper triangle and mirroring it (ρ stays Hermitian);
    ``T`` is an L×L work matrix."""
    L = rho.shape[0]
    _mm(U, rho, T)
    for m in range(L):
        for k in range(m, L):
            acc = 0.0 + 0.0j
            for p in range(L):
                acc += T[m, p] * np.conj(U[k, p])
            rho[m, k] = acc
            if k != m:
                rho[k, m] = np.conj(acc)


@nb.njit(cache=True)
def _magnus_interval(rho, ta, span, f_cur, levels_ghz, ladder, gamma1, gamma_phi, gen_diss,
                     start, dur, freq, omega, code, sigma, drag, ramp, n_tones, max_step,
                     phase_per_step, env_fraction, w, sw):
    """Advance ρ (in place) over a time-dependent interval [ta, ta + span] by Magnus-4 steps.

    ``w`` and ``sw`` hold the run's L×L and L²×L² work arrays (allocated once per run by
    ``_evolve_one``). The Hamiltonian is tridiagonal, H = D + z(t)·X + z̄(t)·X† with
    D = diag(ε_n − n·f) and X = Σ λ_n|n+1⟩⟨n|, so the Magnus exponent
    Ω = (dt/2)(A1 + A2) + (√3/12)dt²[A2, A1] (A = −i2πH at the two Gauss points) is written
    out in closed form, without products:
    [H2, H1] = (z1 − z2)[D, X] + (z̄1 − z̄2)[D, X†] + 2i·Im(z2 z̄1)[X, X†], where
    [D, X] = Σ (d_{n+1} − d_n)λ_n|n+1⟩⟨n| and [X, X†] = Σ (λ_{n−1}² − λ_n²)|n⟩⟨n|.

    Steps: the frame's diagonal, the active tones (which bound the step), the phase factors
    per step, the split dissipation channels, then per step the drive at the Gauss points,
    Ω, U = exp(Ω), ρ ← UρU† and the dissipation channel.
    """
    (om, U, X2, X3, tmp, T, dvec, lam2, kind, par, half_om, wph, zph, rot, p1, p2) = w
    sarg, _, sX2, sX3, stmp, d_half, d_full, _ = sw
    tm = ta + 0.5 * span
    spread = _frame_diagonal(levels_ghz, ladder, f_cur, dvec, lam2)
    n_act, step, spread = _active_tones(tm, f_cur, spread, max_step, env_fraction, start, dur,
                                        freq, omega, code, sigma, drag, ramp, n_tones, kind, par,
                                        half_om, wph)
    if spread > 0.0:
        step = min(step, phase_per_step / (TWO_PI * spread))
    nsteps = int(math.ceil(span / step))
    dt = span / nsteps
    c1 = 0.5 - SQRT3 / 6.0
    c2 = 0.5 + SQRT3 / 6.0
    _step_phases(n_act, wph, dt, c1, c2, rot, p1, p2)
    # Strang splitting: the half-step channels of consecutive steps merge into one full step.
    damped = gamma1 > 0.0 or gamma_phi > 0.0
    if damped:
        _split_channels(gen_diss, dt, sarg, d_half, d_full, sX2, sX3, stmp)
        _dissipate(d_half, rho)
    a_lin = -1j * math.pi * dt  # (dt/2)·(−i2π)
    kap = -(SQRT3 / 3.0) * math.pi * math.pi * dt * dt  # (√3/12)·dt²·(−i2π)²
    for s in range(nsteps):
        t0 = ta + s * dt
        if s % _PHASE_REFRESH == 0:
            for i in range(n_act):
                zph[i] = complex(math.cos(wph[i] * t0), math.sin(wph[i] * t0))
        z1, z2 = _gauss_point_drives(n_act, kind, par, half_om, zph, p1, p2, rot, t0, c1, c2, dt)
        _magnus_exponent(om, z1, z2, dvec, lam2, ladder, dt, a_lin, kap)
        _expm_into(om, U, X2, X3, tmp)
        _conjugate(U, rho, T)
        if damped:
            _dissipate(d_half if s == nsteps - 1 else d_full, rho)


@nb.njit(cache=True)
def _evolve_one(levels_ghz, ladder, gamma1, gamma_phi, start, dur, freq, omega, code, sigma, drag,
                ramp, n_tones, t_end, max_step, phase_per_step, env_fraction, rho0):
    L = levels_ghz.shape[0]
    rho = rho0.copy()
    # Work arrays of the Magnus stepper, allocated once per run (small allocations per step
    # used to dominate its cost). Ω's entries off the tridiagonal stay zero throughout.
    M = max(n_tones, 1)
    work = (np.zeros((L, L), dtype=np.complex128), np.empty((L, L), dtype=np.complex128),
            np.empty((L, L), dtype=np.complex128), np.empty((L, L), dtype=np.complex128),
            np.empty((L, L), dtype=np.complex128), np.empty((L, L), dtype=np.complex128),
            np.empty(L), np.empty(L), np.empty(M, dtype=np.int64), np.zeros((M, 5)),
            np.empty(M, dtype=np.complex128), np.empty(M), np.empty(M, dtype=np.complex128),
            np.empty(M, dtype=np.complex128), np.empty(M, dtype=np.complex128),
            np.empty(M, dtype=np.complex128))
    N = L * L
    swork = (np.empty((N, N), dtype=np.complex128), np.empty((N, N), dtype=np.complex128),
             np.empty((N, N), dtype=np.complex128), np.empty((N, N), dtype=np.complex128),
             np.empty((N, N), dtype=np.complex128), np.empty((N, N), dtype=np.complex128),
             np.empty((N, N), dtype=np.complex128), np.empty(N, dtype=np.complex128))
    sarg, sprop, sX2, sX3, stmp, _, _, vec = swork
    gen_diss = _generator(np.zeros((L, L), dtype=np.complex128), gamma1, gamma_phi)
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
            _scaled_into(_generator(H, gamma1, gamma_phi), span, sarg)
            _expm_into(sarg, sprop, sX2, sX3, stmp)
            _apply_super(sprop, rho, vec)
            continue
        _magnus_interval(rho, ta, span, f_cur, levels_ghz, ladder, gamma1, gamma_phi, gen_diss,
                         start, dur, freq, omega, code, sigma, drag, ramp, n_tones, max_step,
                         phase_per_step, env_fraction, work, swork)
    # Back to the frame of the 0–1 frequency, the frame the caller's ρ is read in.
    return _change_frame(rho, f_cur, levels_ghz[1] - levels_ghz[0], t_end)


@nb.njit(cache=True, parallel=True)
def _evolve_batch(levels_ghz, ladder, gamma1, gamma_phi, start, dur, freq, omega, code, sigma,
                  drag, ramp, n_tones, t_end, max_step, phase_per_step, env_fraction, rho0):
    R = start.shape[0]
    L = levels_ghz.shape[1]
    out = np.empty((R, L, L), dtype=np.complex128)
    for r in nb.prange(R):
        out[r] = _evolve_one(levels_ghz[r], ladder[r], gamma1[r], gamma_phi[r], start[r], dur[r],
                             freq[r], omega[r], code[r], sigma[r], drag[r], ramp[r], n_tones[r],
                             t_end[r], max_step, phase_per_step, env_fraction, rho0[r])
    return out


@nb.njit(cache=True)
def _evolve_held_one(levels_ghz, ladder, gamma1, gamma_phi, omega, freq, dt, nsub, f_frame,
                     n_cells, rho0):
    """One run under a sample-held drive: carrier p holds Rabi rate ``omega[p, k]`` over
    cell k = [k·dt, (k + 1)·dt), k < ``n_cells``, and turns at ``freq[p]``; ``nsub``
    Magnus-4 steps per cell
    (one cell never straddles a step), with the same Strang-split dissipation as
    :func:`_magnus_interval`."""
    L = levels_ghz.shape[0]
    P = omega.shape[0]
    rho = rho0.copy()
    om = np.zeros((L, L), dtype=np.complex128)  # entries off the tridiagonal stay zero
    small = np.empty((5, L, L), dtype=np.complex128)  # work arrays, allocated once per run
    U, X2, X3, tmp, T = small[0], small[1], small[2], small[3], small[4]
    dvec = np.empty(L)
    lam2 = np.empty(L)
    big = np.empty((6, L * L, L * L), dtype=np.complex128)
    sarg, sX2, sX3, stmp, d_half, d_full = big[0], big[1], big[2], big[3], big[4], big[5]
    _frame_diagonal(levels_ghz, ladder, f_frame, dvec, lam2)
    h = dt / nsub
    c1 = 0.5 - SQRT3 / 6.0
    c2 = 0.5 + SQRT3 / 6.0
    damped = gamma1 > 0.0 or gamma_phi > 0.0
    if damped:
        gen_diss = _generator(np.zeros((L, L), dtype=np.complex128), gamma1, gamma_phi)
        _split_channels(gen_diss, h, sarg, d_half, d_full, sX2, sX3, stmp)
        _dissipate(d_half, rho)
    a_lin = -1j * math.pi * h
    kap = -(SQRT3 / 3.0) * math.pi * math.pi * h * h
    total = n_cells * nsub
    for s in range(total):
        k = s // nsub
        t0 = s * h
        z1 = 0.0 + 0.0j
        z2 = 0.0 + 0.0j
        for p in range(P):
            w = omega[p, k]
            if w == 0.0:
                continue
            rate = -TWO_PI * (freq[p] - f_frame)
            z1 += 0.5 * w * complex(math.cos(rate * (t0 + c1 * h)), math.sin(rate * (t0 + c1 * h)))
            z2 += 0.5 * w * complex(math.cos(rate * (t0 + c2 * h)), math.sin(rate * (t0 + c2 * h)))
        _magnus_exponent(om, z1, z2, dvec, lam2, ladder, h, a_lin, kap)
        _expm_into(om, U, X2, X3, tmp)
        _conjugate(U, rho, T)
        if damped:
            _dissipate(d_half if s == total - 1 else d_full, rho)
    return _change_frame(rho, f_frame, levels_ghz[1] - levels_ghz[0], total * h)


@nb.njit(cache=True, parallel=True)
def _evolve_held_batch(levels_ghz, ladder, gamma1, gamma_phi, omega, freq, dt, nsub, f_frame,
                       n_cells, rho0):
    R = omega.shape[0]
    L = levels_ghz.shape[1]
    out = np.empty((R, L, L), dtype=np.complex128)
    for r in nb.prange(R):
        out[r] = _evolve_held_one(levels_ghz[r], ladder[r], gamma1[r], gamma_phi[r], omega[r],
                                  freq[r], dt, nsub[r], f_frame[r], n_cells[r], rho0[r])
    return out


# ----------------------------------------------------------------------------- wrappers


def _rates(t1_ns: np.ndarray, t2_ns: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    g1 = np.where(np.isfinite(t1_ns), 1.0 / t1_ns, 0.0)
    g2 = np.where(np.isfinite(t2_ns), 1.0 / t2_ns, 0.0)
    gphi = g2 - 0.5 * g1
    if np.any(gphi < -1e-15):
        raise ValueError("T2 > 2·T1 is unphysical")
    return _c(g1, float), _c(np.maximum(gphi, 0.0), float)


def _c(a, dtype) -> np.ndarray:
    """``a`` as a C-contiguous, writeable array of ``dtype``.

    numba compiles one specialisation per array layout and per read-only flag, so a read-only
    or strided input (a broadcast view, a memory-mapped file) would compile every kernel a
    second time; a copy of a few arrays costs microseconds, a compilation tens of seconds.
    """
    return np.require(a, dtype=dtype, requirements=("C", "W", "A"))


def initial_density(R: int, L: int, psi0: np.ndarray | None = None,
                    rho0: np.ndarray | None = None) -> np.ndarray:
    """Initial density matrices (R, L, L) from a pure state, a density matrix or neither.

    Parameters
    ----------
    R, L : int
        Runs and levels.
    psi0 : complex array (L,) or (R, L), optional
        Pure initial state, shared by all runs or one per run; normalised here.
    rho0 : complex array (L, L) or (R, L, L), optional
        Initial density matrix, shared or per run (Hermitian, trace 1, checked).

    Returns
    -------
    (R, L, L) complex array; |0⟩⟨0| for every run if neither is given.
    """
    if psi0 is not None and rho0 is not None:
        raise ValueError("give psi0 or rho0, not both")
    if psi0 is not None:
        psi = np.asarray(psi0, dtype=complex)
        if psi.shape not in ((L,), (R, L)):
            raise ValueError(f"psi0 has shape {psi.shape}; accepted: ({L},) or ({R}, {L})")
        psi = np.broadcast_to(psi, (R, L))
        norm = np.linalg.norm(psi, axis=1)
        if np.any(norm == 0):
            raise ValueError("psi0 has a zero vector")
        psi = psi / norm[:, None]
        rho = psi[:, :, None] * psi.conj()[:, None, :]
    elif rho0 is not None:
        r = np.asarray(rho0, dtype=complex)
        if r.shape not in ((L, L), (R, L, L)):
            raise ValueError(f"rho0 has shape {r.shape}; accepted: ({L}, {L}) or ({R}, {L}, {L})")
        rho = np.broadcast_to(r, (R, L, L))
        if not np.allclose(rho, np.conj(np.swapaxes(rho, 1, 2)), atol=1e-12):
            raise ValueError("rho0 is not Hermitian")
        if not np.allclose(np.trace(rho, axis1=1, axis2=2), 1.0, atol=1e-10):
            raise ValueError("rho0 does not have trace 1")
    else:
        rho = np.zeros((R, L, L), dtype=complex)
        rho[:, 0, 0] = 1.0
    return _c(rho, complex)


def _populations(rho: np.ndarray) -> np.ndarray:
    # Round-off can leave populations a hair outside [0, 1]; the sampler needs valid ones.
    pops = np.clip(np.real(np.diagonal(rho, axis1=1, axis2=2)), 0.0, 1.0)
    return pops / pops.sum(axis=1, keepdims=True)


def _per_run(levels_ghz, ladder, t1_ns, t2_ns, R):
    """Levels, ladder and rates broadcast to R runs, as the kernels take them."""
    g1, gphi = _rates(np.broadcast_to(t1_ns, (R,)).astype(float),
                      np.broadcast_to(t2_ns, (R,)).astype(float))
    levels = _c(np.broadcast_to(levels_ghz, (R, np.shape(levels_ghz)[-1])), float)
    lad = _c(np.broadcast_to(ladder, (R, levels.shape[1] - 1)), float)
    return levels, lad, g1, gphi


def evolve_states(
    levels_ghz: np.ndarray,
    ladder: np.ndarray,
    t1_ns: np.ndarray,
    t2_ns: np.ndarray,
    tones: ToneBatch,
    *,
    psi0: np.ndarray | None = None,
    rho0: np.ndarray | None = None,
    control: StepControl | None = None,
) -> np.ndarray:
    """Final density matrices of R runs under the tones, from any initial state.

    ρ is returned in the frame rotating at the run's 0–1 frequency ε_1 − ε_0 (the frame of
    the module docstring with f = f01), so a coherence ρ_01 carries the phase of a drive at
    f01; the frame coincides with the lab frame at t = 0, where the initial state is given.

    Parameters
    ----------
    levels_ghz, ladder, t1_ns, t2_ns, tones, control
        As :func:`evolve_populations`.
    psi0, rho0 : arrays, optional
        Initial state, see :func:`initial_density` (default |0⟩ for every run).

    Returns
    -------
    (R, L, L) complex array.
    """
    c = control or StepControl()
    R = tones.start_ns.shape[0]
    levels, lad, g1, gphi = _per_run(levels_ghz, ladder, t1_ns, t2_ns, R)
    rho_init = initial_density(R, levels.shape[1], psi0, rho0)
    return _evolve_batch(levels, lad, g1, gphi,
                         _c(tones.start_ns, float), _c(tones.duration_ns, float),
                         _c(tones.freq_ghz, float), _c(tones.omega_ghz, complex),
                         _c(tones.env_code, np.int64), _c(tones.sigma_ns, float),
                         _c(tones.drag_ns, float), _c(tones.ramp_ns, float),
                         _c(tones.n_tones, np.int64), _c(tones.end_ns, float),
                         float(c.max_step_ns), float(c.phase_per_step),
                         float(c.envelope_fraction), rho_init)


def evolve_populations(
    levels_ghz: np.ndarray,
    ladder: np.ndarray,
    t1_ns: np.ndarray,
    t2_ns: np.ndarray,
    tones: ToneBatch,
    *,
    control: StepControl | None = None,
    psi0: np.ndarray | None = None,
    rho0: np.ndarray | None = None,
) -> np.ndarray:
    """Final level populations of R runs, each starting in |0⟩ (or ``psi0``/``rho0``).

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
    psi0, rho0 : arrays, optional
        Initial state, see :func:`initial_density`.

    Returns
    -------
    (R, L) array of populations.
    """
    return _populations(evolve_states(levels_ghz, ladder, t1_ns, t2_ns, tones, psi0=psi0,
                                      rho0=rho0, control=control))


def evolve_held(
    levels_ghz: np.ndarray,
    ladder: np.ndarray,
    t1_ns: np.ndarray,
    t2_ns: np.ndarray,
    omega_ghz: np.ndarray,
    carrier_ghz: np.ndarray,
    dt_ns: float,
    *,
    n_cells: np.ndarray | None = None,
    control: StepControl | None = None,
    psi0: np.ndarray | None = None,
    rho0: np.ndarray | None = None,
    density: bool = False,
) -> np.ndarray:
    """Final level populations of R runs under sample-held drives, each starting in |0⟩.

    The waveform-level counterpart of :func:`evolve_populations`, for drives that come as
    sample arrays rather than tones: in cell k = [k·dt, (k + 1)·dt) carrier p contributes
    the rotating-wave term ``½·Ω_p[k]·e^{−i2π(f_p − f01)t}·Σλ_n|n+1⟩⟨n| + h.c.`` with Ω_p[k]
    held constant (a DAC's zero-order hold; ``f_p`` is an LO, continuous in time). Same
    master equation and the same Magnus-4 / Strang-split steps as the fast path, in the
    frame of the strongest carrier; each cell is cut into equal steps short enough for
    ``control`` (``max_step_ns`` and ``phase_per_step`` against the fastest residual
    frequency). Where one carrier drives alone the steps are exact (a constant generator).

    Parameters
    ----------
    levels_ghz : (R, L) array
        Level energies ε_n (GHz), ε_0 = 0.
    ladder : (R, L−1) array
        Ladder matrix elements λ_n.
    t1_ns, t2_ns : (R,) arrays
        Relaxation and Ramsey times (ns); ``inf`` disables.
    omega_ghz : complex (R, P, N) array
        Held complex Rabi rate (GHz) of each carrier in each of N cells.
    carrier_ghz : (R, P) array
        Frequency of each carrier (GHz).
    dt_ns : float
        Cell length (ns).
    n_cells : (R,) int array, optional
        Cells of each run (≤ N; default N): run r ends, and is read, at ``n_cells[r]·dt``.
    control : StepControl, optional
    psi0, rho0 : arrays, optional
        Initial state, see :func:`initial_density` (default |0⟩).
    density : bool
        Return the final density matrices (R, L, L), in the frame of f01 as
        :func:`evolve_states`, instead of the populations.

    Returns
    -------
    (R, L) array of populations, or (R, L, L) density matrices with ``density``.
    """
    c = control or StepControl()
    omega = _c(omega_ghz, complex)
    R = omega.shape[0]
    freq = _c(np.broadcast_to(carrier_ghz, omega.shape[:2]), float)
    levels, lad, g1, gphi = _per_run(levels_ghz, ladder, t1_ns, t2_ns, R)
    # Frame: the carrier carrying the most drive, so that a lone carrier is static.
    strength = np.abs(omega).sum(axis=2)
    f_frame = np.where(strength.max(axis=1) > 0, freq[np.arange(R), strength.argmax(axis=1)],
                       levels[:, 1] - levels[:, 0])
    spread = np.ptp(levels - np.arange(levels.shape[1]) * f_frame[:, None], axis=1)
    driven = strength > 0
    offset = np.where(driven, np.abs(freq - f_frame[:, None]), 0.0).max(axis=1)
    fastest = np.maximum(spread, offset)
    step = np.minimum(c.max_step_ns, np.where(fastest > 0, c.phase_per_step /
                                              (TWO_PI * np.maximum(fastest, 1e-300)), np.inf))
    nsub = np.maximum(1, np.ceil(float(dt_ns) / step - 1e-12)).astype(np.int64)
    cells = np.full(R, omega.shape[2], dtype=np.int64) if n_cells is None else np.minimum(
        np.asarray(n_cells, dtype=np.int64), omega.shape[2])
    rho = _evolve_held_batch(levels, lad, g1, gphi, omega, freq, float(dt_ns), nsub,
                             _c(f_frame, float), _c(np.broadcast_to(cells, (R,)), np.int64),
                             initial_density(R, levels.shape[1], psi0, rho0))
    return rho if density else _populations(rho)


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
    rho0: np.ndarray | None = None,
    density: bool = False,
) -> np.ndarray:
    """Slow reference: the same master equation for one run, by SciPy's DOP853.

    Integrated in the frame of the victim's 0–1 frequency, interval by interval
    (so that the integrator never steps across a pulse edge). ``rho0`` (L, L) is the
    initial state (default |0⟩⟨0|); ``density`` returns the final ρ instead of populations.
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
    y = initial_density(1, L, rho0=rho0)[0].ravel()
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        sol = solve_ivp(rhs, (a, b), y, method="DOP853", rtol=rtol, atol=atol)
        y = sol.y[:, -1]
    rho = y.reshape(L, L)
    return rho if density else np.real(np.diag(rho))
