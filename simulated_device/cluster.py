"""Driven, damped dynamics of a small cluster of exchange-coupled transmons.

Model. Transmons q = 1…n (levels ε_{q,m}, ladder elements λ_{q,m} = ⟨m+1|a_q†|m⟩, as
:class:`simulated_device.transmon.TransmonLevels` gives them) coupled pairwise by exchange
(:mod:`simulated_device.exchange`), in the frame rotating at one frequency f for every
transmon (U = e^{i2πf·N̂t}, N̂ the total excitation number, which H_J conserves)::

    H/h = Σ_q Σ_m (ε_{q,m} − m f)|m⟩⟨m|_q + Σ_{p<q} J_pq (a_p† a_q + a_p a_q†)
          + Σ_k Σ_q ½[Ω_{k,q}(t)·e^{−i2π(f_k − f)t}·a_q† + h.c.]

(rotating-wave; every tone k drives every transmon q with that transmon's own complex Rabi
rate Ω_{k,q} in GHz: the rig gives it from the tone's line as ``field_factor``). Lindblad
relaxation and dephasing act on each transmon as in :mod:`simulated_device.dynamics`: jump
√Γ1·a_q and √(2Γφ)·n̂_q, Γ1 = 1/T1, Γφ = 1/T2 − 1/(2T1). Units: ns, GHz. Static ZZ, the
hybridisation of the transitions (a leak of order J/Δ) and its dependence on a neighbour's
state follow from this Hamiltonian alone; nothing is added by hand.

Size. At most :data:`CLUSTER_MAX_QUBITS` transmons (the victim and its strongest-J
neighbours; :func:`build_cluster` says in ``Cluster.warning`` which were left out) with 3 or
4 levels each, so the dimension d ≤ 64. Levels beyond 4 in a device file are truncated to 4
here (and said so in the warning).

Method (compiled with numba, parallel over runs). A run's time axis is cut at every tone
start and end and at the ends of flat-top ramps (it starts before 0 where a path delay moves a
tone there, as in :mod:`simulated_device.dynamics`).

* Where every active tone shares one frequency and has a constant envelope (square tones,
  flat tops, idle waits), H is static in the frame of that frequency: its propagator over a
  step is the exact exponential, from one Hermitian eigendecomposition per interval.
* Elsewhere each step is the fourth-order Magnus exponential (two Gauss–Legendre points and
  one commutator; Blanes et al., Phys. Rep. 470, 151 (2009)) in the frame of the strongest
  tone, exponentiated exactly through its eigendecomposition.
* The dissipation of each transmon is applied by Strang splitting with its exact channel
  (exp of its own L²×L² generator); the channels of different transmons commute. Splitting
  error ~ T·dt²·‖[H, D]‖-type terms, O(Ω²Γ·dt²) per unit time, so steps are bounded by
  ``ClusterControl.max_step_ns`` on static intervals too when there is dissipation.

The density matrix is returned in the frame rotating at each transmon's own frequency
(``frame_ghz``, default the bare f01 of each transmon): ρ_mk·e^{i2π(Φ_m − Φ_k)t},
Φ_m = Σ_q f_q·m_q, so a Ramsey phase on transmon q is read off directly.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numba as nb
import numpy as np
from threadpoolctl import threadpool_limits

from simulated_device.dynamics import DRAG, FLATTOP, GAUSSIAN, SQUARE, ToneBatch, _envelope
from simulated_device.exchange import CLUSTER_MAX_QUBITS, exchange_neighbours
from simulated_device.transmon import TransmonLevels

__all__ = ["Cluster", "ClusterControl", "ClusterTones", "build_cluster", "evolve_cluster",
           "CLUSTER_MAX_LEVELS"]

TWO_PI = 2.0 * math.pi
#: Levels per transmon kept in a cluster at most (3 × 4 levels: d = 64).
CLUSTER_MAX_LEVELS = 4
_GL1 = 0.5 - math.sqrt(3.0) / 6.0  # Gauss–Legendre points of the Magnus step
_GL2 = 0.5 + math.sqrt(3.0) / 6.0
_MAGNUS_C = math.sqrt(3.0) / 12.0


@dataclass(frozen=True)
class ClusterControl:
    """Accuracy knobs of the cluster integrator.

    Parameters
    ----------
    max_step_ns : float
        Longest step (ns); with dissipation it also bounds the steps of static intervals
        (the Strang splitting error), without it a static interval is one exact step.
    phase_per_step : float
        Largest phase (rad) per step of the fastest frequency the drive couples in the frame
        (transition frequencies minus the frame, and the tones' offsets from it).
    envelope_fraction : float
        Steps per Gaussian σ or cosine ramp are at least ``1/envelope_fraction``.
    """

    max_step_ns: float = 0.5
    phase_per_step: float = 0.2
    envelope_fraction: float = 0.1


@dataclass(frozen=True)
class ClusterTones(ToneBatch):
    """Tones of R runs padded to M each, as :class:`simulated_device.dynamics.ToneBatch`,
    except that ``omega_ghz`` is (R, M, n): each tone's complex Rabi rate (GHz, envelope
    peak 1) at each of the n cluster transmons' 0–1 transitions."""


@dataclass(frozen=True)
class Cluster:
    """A few exchange-coupled transmons and the operators of their joint Hilbert space.

    Basis: product states |m_1 m_2 …⟩, the first transmon's level most significant
    (row-major, as ``np.kron`` orders them). ``names[0]`` is the victim the cluster was
    built for; ``warning`` says what was left out or truncated ("" if nothing).
    """

    names: tuple[str, ...]
    levels: tuple[TransmonLevels, ...]
    t1_ns: np.ndarray
    t2_ns: np.ndarray
    j_ghz: np.ndarray  # (n, n) symmetric, zero diagonal
    warning: str = ""

    @property
    def dims(self) -> tuple[int, ...]:
        return tuple(lv.n_levels for lv in self.levels)

    @property
    def dim(self) -> int:
        return int(np.prod(self.dims))

    def digits(self) -> np.ndarray:
        """(d, n) level of each transmon in each basis state."""
        return np.array(list(np.ndindex(*self.dims)), dtype=np.int64).reshape(self.dim, -1)

    def raising(self, q: int) -> np.ndarray:
        """a_q† in the cluster basis (d × d, real)."""
        mats = [np.eye(n) for n in self.dims]
        mats[q] = np.diag(np.asarray(self.levels[q].ladder, float), -1)
        out = mats[0]
        for m in mats[1:]:
            out = np.kron(out, m)
        return out

    def bare_energies(self) -> np.ndarray:
        """(d,) Σ_q ε_{q,m_q} (GHz)."""
        dig = self.digits()
        return sum(np.asarray(lv.energies_ghz)[dig[:, q]] for q, lv in enumerate(self.levels))

    def static_hamiltonian(self) -> np.ndarray:
        """H/h without drives, in the laboratory frame (GHz, d × d real)."""
        h = np.diag(self.bare_energies())
        raise_ops = [self.raising(q) for q in range(len(self.names))]
        for p in range(len(self.names)):
            for q in range(p + 1, len(self.names)):
                if self.j_ghz[p, q] != 0.0:
                    hop = raise_ops[p] @ raise_ops[q].T
                    h = h + self.j_ghz[p, q] * (hop + hop.T)
        return h

    def product_state(self, levels: Sequence[int]) -> np.ndarray:
        """The density matrix of the bare product state |levels[0] levels[1] …⟩."""
        idx = int(np.ravel_multi_index(tuple(int(v) for v in levels), self.dims))
        rho = np.zeros((self.dim, self.dim), dtype=complex)
        rho[idx, idx] = 1.0
        return rho

    def marginals(self, rho: np.ndarray, q: int) -> np.ndarray:
        """Level populations (…, L_q) of transmon ``q`` from density matrices (…, d, d)."""
        diag = np.real(np.diagonal(rho, axis1=-2, axis2=-1))
        dig = self.digits()[:, q]
        return np.stack([diag[..., dig == m].sum(axis=-1) for m in range(self.dims[q])],
                        axis=-1)

    def dressed(self) -> tuple[np.ndarray, np.ndarray]:
        """Dressed energies (d,) and states (d, d) of the static Hamiltonian, each labelled by
        the bare state it overlaps most (column i ↔ bare state i), its phase set so that
        overlap is real and positive. Levels far from any crossing: J ≪ |detunings|."""
        e, v = np.linalg.eigh(self.static_hamiltonian())
        overlap = np.abs(v) ** 2
        order = np.full(self.dim, -1)
        # Greedy: the largest remaining overlaps first, one eigenvector per bare state.
        for flat in np.argsort(-overlap, axis=None):
            bare, eig = divmod(int(flat), self.dim)
            if order[bare] < 0 and eig not in order:
                order[bare] = eig
        vec = v[:, order]
        ph = np.diagonal(vec) / np.abs(np.diagonal(vec))
        return e[order], vec / ph[None, :]

    def zz_ghz(self, p: int = 0, q: int = 1) -> float:
        """Static ZZ = E_11 − E_10 − E_01 + E_00 of transmons p, q (others in |0⟩), GHz."""
        e, _ = self.dressed()
        n = len(self.names)

        def idx(mp: int, mq: int) -> int:
            lv = [0] * n
            lv[p], lv[q] = mp, mq
            return int(np.ravel_multi_index(tuple(lv), self.dims))

        return float(e[idx(1, 1)] - e[idx(1, 0)] - e[idx(0, 1)] + e[idx(0, 0)])

    def transition_elements(self, q: int, others: Sequence[int]) -> tuple[np.ndarray, float]:
        """⟨1_q~|a_p†|0_q~⟩ for every transmon p, between the dressed states with transmon
        ``q`` in 0 and 1 and the others in ``others`` (levels, in cluster order without q),
        and that dressed transition's frequency (GHz)."""
        e, vec = self.dressed()
        lv = list(others)
        lv.insert(q, 0)
        i0 = int(np.ravel_multi_index(tuple(lv), self.dims))
        lv[q] = 1
        i1 = int(np.ravel_multi_index(tuple(lv), self.dims))
        el = np.array([vec[:, i1].conj() @ self.raising(p) @ vec[:, i0]
                       for p in range(len(self.names))])
        return el, float(e[i1] - e[i0])


def build_cluster(device, victim: str, *, shifts_ghz: dict | None = None,
                  max_qubits: int = CLUSTER_MAX_QUBITS) -> Cluster:
    """The cluster of ``victim``: itself and its exchange neighbours, strongest J first.

    Parameters
    ----------
    device : DeviceSpec
    victim : str
    shifts_ghz : mapping of qubit → f01 shift (GHz), optional
        Drift of each transmon's frequency (the level ε_m moves by m·shift).
    max_qubits : int
        Cap on the transmons (default :data:`CLUSTER_MAX_QUBITS`); the weakest-J neighbours
        beyond it are left out and named in ``warning``.
    """
    neigh = exchange_neighbours(device.exchange, victim)
    kept = [victim] + [q for q, _ in neigh[: max_qubits - 1]]
    notes = []
    if len(neigh) > max_qubits - 1:
        left = ", ".join(f"{q} (J = {j:g} MHz)" for q, j in neigh[max_qubits - 1:])
        notes.append(f"cluster of {victim} capped at {max_qubits} transmons: left out {left}")
    levels = []
    for name in kept:
        lv = device.qubit(name).levels
        shift = (shifts_ghz or {}).get(name, 0.0)
        n = min(lv.n_levels, CLUSTER_MAX_LEVELS)
        levels.append(TransmonLevels(np.asarray(lv.energies_ghz[:n]) + shift * np.arange(n),
                                     np.asarray(lv.ladder[: n - 1])))
    if device.n_levels > CLUSTER_MAX_LEVELS:
        notes.append(f"levels truncated from {device.n_levels} to {CLUSTER_MAX_LEVELS} in the "
                     "cluster")
    j = np.zeros((len(kept), len(kept)))
    for e in device.exchange:
        if e.qubit_a in kept and e.qubit_b in kept:
            a, b = kept.index(e.qubit_a), kept.index(e.qubit_b)
            j[a, b] = j[b, a] = e.j_mhz * 1e-3
    return Cluster(tuple(kept), tuple(levels),
                   np.array([device.qubit(q).t1_us * 1e3 for q in kept]),
                   np.array([device.qubit(q).t2_us * 1e3 for q in kept]), j, "; ".join(notes))


# ----------------------------------------------------------------------------- kernels


@nb.njit(cache=True)
def _channel(g1, gphi, L, tau):
    """exp(τ·G) of one transmon's dissipator G on row-major vec(ρ) (L² × L², real).

    G couples ρ[m+1, k+1] into ρ[m, k] (relaxation) and damps ρ[m, k] at
    Γ1(m+k)/2 + Γφ(m−k)²; Taylor series with scaling and squaring (‖τG‖ ≪ 1 per step).
    """
    N = L * L
    G = np.zeros((N, N))
    for m in range(L):
        for k in range(L):
            r = m * L + k
            G[r, r] = -0.5 * g1 * (m + k) - gphi * (m - k) ** 2
            if m + 1 < L and k + 1 < L:
                G[r, (m + 1) * L + k + 1] = g1 * math.sqrt((m + 1.0) * (k + 1.0))
    norm = np.max(np.sum(np.abs(G), axis=1)) * tau
    s = 0
    while norm > 0.25:
        norm *= 0.5
        s += 1
    X = G * (tau / 2.0**s)
    S = np.eye(N)
    term = np.eye(N)
    for n in range(1, 14):
        term = (term @ X) / n
        S = S + term
    for _ in range(s):
        S = S @ S
    return S


@nb.njit(cache=True)
def _dissipate(rho, work, chans, dims, strides, active):
    """Apply each transmon's channel (``chans[q]``, from :func:`_channel`) to ρ in place."""
    d = rho.shape[0]
    for q in range(dims.shape[0]):
        if not active[q]:
            continue
        L = dims[q]
        st = strides[q]
        S = chans[q]
        for i in range(d):
            m = (i // st) % L
            for j in range(d):
                k = (j // st) % L
                r = m * L + k
                acc = S[r, r] * rho[i, j]
                s = 1
                while m + s < L and k + s < L:
                    acc += S[r, r + s * (L + 1)] * rho[i + s * st, j + s * st]
                    s += 1
                work[i, j] = acc
        rho[:, :] = work


@nb.njit(cache=True)
def _propagate(Hm, dt, rho):
    """ρ ← U ρ U† for U = exp(−i2π·Hm·dt), Hm Hermitian (GHz)."""
    e, v = np.linalg.eigh(Hm)
    u = v * np.exp(-1j * TWO_PI * dt * e)[None, :]
    U = u @ v.conj().T
    rho[:, :] = U @ rho @ U.conj().T


@nb.njit(cache=True)
def _drive_into(H, t, f_frame, tones, n_act, act, raise_ops, omega, zq):
    """H += Σ_q (z_q a_q† + h.c.) with z_q = Σ_k ½Ω_{k,q}E_k(t)e^{−i2π(f_k − f)t}."""
    start, dur, freq, code, sigma, drag, ramp = tones
    nq = raise_ops.shape[0]
    zq[:] = 0.0
    for i in range(n_act):
        k = act[i]
        e = _envelope(code[k], t - start[k], dur[k], sigma[k], drag[k], ramp[k])
        ph = -TWO_PI * (freq[k] - f_frame) * t
        z = 0.5 * e * complex(math.cos(ph), math.sin(ph))
        for q in range(nq):
            zq[q] += z * omega[k, q]
    for q in range(nq):
        if zq[q] != 0.0:
            H += zq[q] * raise_ops[q] + np.conj(zq[q]) * raise_ops[q].T


@nb.njit(cache=True)
def _interval_plan(ta, tb, f_cur, tones, n_tones, omega, energies, nvec, coupled, ctrl):
    """Active tones of [ta, tb], the working frame, whether H is static and the step."""
    start, dur, freq, code, sigma, drag, ramp = tones
    tm = 0.5 * (ta + tb)
    act = np.zeros(n_tones, dtype=np.int64)
    n_act = 0
    best = -1.0
    f_new = f_cur
    for k in range(n_tones):
        if start[k] <= tm <= start[k] + dur[k]:
            act[n_act] = k
            n_act += 1
            w = np.sum(np.abs(omega[k]))
            if w > best:
                best = w
                f_new = freq[k]
    max_step, phase_per_step, env_fraction = ctrl
    static = True
    step = max_step
    spread = 0.0
    for i in range(n_act):
        k = act[i]
        spread = max(spread, abs(freq[k] - f_new))
        if freq[k] != f_new:
            static = False
        if code[k] == GAUSSIAN or code[k] == DRAG:
            static = False
            step = min(step, env_fraction * sigma[k])
        elif code[k] == FLATTOP and ramp[k] > 0.0:
            tr = tm - start[k]
            if tr < ramp[k] or tr > dur[k] - ramp[k]:
                static = False
                step = min(step, env_fraction * ramp[k])
        elif code[k] != SQUARE and code[k] != FLATTOP:
            static = False
    if not static:
        # The fastest frequency the drive couples: transition frequencies in the frame.
        d = energies.shape[0]
        for m in range(d):
            for n in range(d):
                if coupled[m, n]:
                    w = abs(energies[m] - energies[n] - f_new * (nvec[m] - nvec[n]))
                    spread = max(spread, w)
        if spread > 0.0:
            step = min(step, phase_per_step / (TWO_PI * spread))
    return act, n_act, f_new, static, step


@nb.njit(cache=True)
def _reframe(rho, nvec, df, t):
    """ρ[m, k] ← ρ[m, k]·exp(i2π·df·(N_m − N_k)·t): from the frame f to f + df."""
    d = rho.shape[0]
    for m in range(d):
        for k in range(d):
            if nvec[m] != nvec[k]:
                ph = TWO_PI * df * (nvec[m] - nvec[k]) * t
                rho[m, k] *= complex(math.cos(ph), math.sin(ph))


@nb.njit(cache=True)
def _evolve_one(rho, energies, nvec, hj, raise_ops, coupled, g1, gphi, dims, strides, tones,
                n_tones, omega, end, f0, out_phase, ctrl):
    """Evolve one run's ρ (in place) from 0 to ``end``; return it in the output frame."""
    start, dur, freq, code, sigma, drag, ramp = tones
    d = rho.shape[0]
    nq = dims.shape[0]
    cuts = [0.0, end]
    for k in range(n_tones):
        for t in (start[k], start[k] + dur[k]):
            if t < end:  # a tone moved before 0 by a path delay starts there
                cuts.append(t)
        if code[k] == FLATTOP and ramp[k] > 0.0:
            for t in (start[k] + ramp[k], start[k] + dur[k] - ramp[k]):
                if t < end:
                    cuts.append(t)
    grid = np.unique(np.array(cuts))
    active = np.zeros(nq, dtype=np.bool_)
    for q in range(nq):
        active[q] = g1[q] > 0.0 or gphi[q] > 0.0
    dissipative = np.any(active)
    work = np.zeros((d, d), dtype=np.complex128)
    zq = np.zeros(nq, dtype=np.complex128)
    Lmax = np.max(dims)
    chans = np.zeros((nq, Lmax * Lmax, Lmax * Lmax))
    f_cur = f0
    for c in range(grid.shape[0] - 1):
        ta, tb = grid[c], grid[c + 1]
        act, n_act, f_new, static, step = _interval_plan(
            ta, tb, f_cur, tones, n_tones, omega, energies, nvec, coupled, ctrl)
        if f_new != f_cur:
            _reframe(rho, nvec, f_new - f_cur, ta)
            f_cur = f_new
        span = tb - ta
        n_steps = 1 if (static and not dissipative) else max(1, int(math.ceil(span / step)))
        dt = span / n_steps
        if dissipative:
            for q in range(nq):
                L = dims[q]
                chans[q, :L * L, :L * L] = _channel(g1[q], gphi[q], L, 0.5 * dt)
        H0 = hj.copy()
        for m in range(d):
            H0[m, m] += energies[m] - f_cur * nvec[m]
        if static:
            H = H0.copy()
            _drive_into(H, 0.5 * (ta + tb), f_cur, tones, n_act, act, raise_ops, omega, zq)
        for s in range(n_steps):
            t0 = ta + s * dt
            if dissipative:
                _dissipate(rho, work, chans, dims, strides, active)
            if static:
                _propagate(H, dt, rho)
            else:
                H1 = H0.copy()
                H2 = H0.copy()
                _drive_into(H1, t0 + _GL1 * dt, f_cur, tones, n_act, act, raise_ops, omega, zq)
                _drive_into(H2, t0 + _GL2 * dt, f_cur, tones, n_act, act, raise_ops, omega, zq)
                comm = H2 @ H1 - H1 @ H2
                Hm = 0.5 * (H1 + H2) - 1j * TWO_PI * _MAGNUS_C * dt * comm
                _propagate(Hm, dt, rho)
            if dissipative:
                _dissipate(rho, work, chans, dims, strides, active)
    # To the output frame: phases Φ_m − f·N_m at the end.
    for m in range(d):
        for k in range(d):
            ph = TWO_PI * ((out_phase[m] - f_cur * nvec[m]) - (out_phase[k] - f_cur * nvec[k]))
            if ph != 0.0:
                rho[m, k] *= complex(math.cos(ph * end), math.sin(ph * end))


@nb.njit(cache=True, parallel=True)
def _evolve_batch(rho0, energies, nvec, hj, raise_ops, coupled, g1, gphi, dims, strides,
                  start, dur, freq, omega, code, sigma, drag, ramp, n_tones, end, f0,
                  out_phase, ctrl):
    R = rho0.shape[0]
    out = np.empty_like(rho0)
    for r in nb.prange(R):
        rho = rho0[r].copy()
        tones = (start[r], dur[r], freq[r], code[r], sigma[r], drag[r], ramp[r])
        _evolve_one(rho, energies[r], nvec, hj, raise_ops, coupled, g1, gphi, dims, strides,
                    tones, n_tones[r], omega[r], end[r], f0, out_phase, ctrl)
        out[r] = rho
    return out


def _initial_states(cluster: Cluster, rho0, runs: int) -> np.ndarray:
    """(R, d, d) density matrices from a state vector or density matrix, one or per run."""
    d = cluster.dim
    if rho0 is None:
        return np.broadcast_to(cluster.product_state([0] * len(cluster.names)),
                               (runs, d, d)).copy()
    a = np.asarray(rho0, dtype=complex)
    if a.shape[-1] != d:
        raise ValueError(f"initial state of dimension {a.shape[-1]}; the cluster's is {d}")
    if a.ndim == 1 or (a.ndim == 2 and a.shape != (d, d)):  # state vector(s)
        a = a[..., :, None] * a[..., None, :].conj()
    a = np.broadcast_to(a, (runs, d, d))
    return np.ascontiguousarray(a)


def evolve_cluster(cluster: Cluster, tones: ClusterTones, rho0=None, *,
                   control: ClusterControl | None = None,
                   frame_ghz: Sequence[float] | None = None,
                   shifts_ghz: np.ndarray | None = None) -> np.ndarray:
    """Final density matrices (R, d, d) of R runs of the cluster under ``tones``.

    Parameters
    ----------
    cluster : Cluster
    tones : ClusterTones
        ``omega_ghz`` has one column per cluster transmon, in ``cluster.names`` order.
    rho0 : array, optional
        Initial state: a state vector (d,) or density matrix (d, d), shared by all runs, or
        one per run ((R, d) or (R, d, d)). Default: every transmon in |0⟩.
    control : ClusterControl, optional
    frame_ghz : sequence of float, optional
        Frequency of each transmon's output frame; default its bare f01.
    shifts_ghz : array (R, n), optional
        A per-run f01 offset of each transmon (quasi-static noise): its level ε_m moves by
        m·shift in that run. The output frame stays at ``frame_ghz``.

    Returns
    -------
    (R, d, d) complex array, in the frame of ``frame_ghz`` (see the module notes).
    """
    c = control or ClusterControl()
    R = np.shape(tones.start_ns)[0]
    nq = len(cluster.names)
    g1 = np.where(np.isfinite(cluster.t1_ns), 1.0 / cluster.t1_ns, 0.0)
    gphi = np.where(np.isfinite(cluster.t2_ns), 1.0 / cluster.t2_ns, 0.0) - 0.5 * g1
    if np.any(gphi < -1e-15):
        raise ValueError("T2 > 2·T1 is unphysical")
    gphi = np.maximum(gphi, 0.0)
    dims = np.array(cluster.dims, dtype=np.int64)
    strides = np.array([int(np.prod(dims[q + 1:])) for q in range(nq)], dtype=np.int64)
    raise_ops = np.ascontiguousarray([cluster.raising(q) for q in range(nq)], dtype=complex)
    digits = cluster.digits()
    nvec = digits.sum(axis=1).astype(float)
    energies = cluster.bare_energies()
    hj = np.ascontiguousarray(cluster.static_hamiltonian() - np.diag(energies), dtype=complex)
    per_run = np.zeros((R, nq)) if shifts_ghz is None else np.broadcast_to(
        np.asarray(shifts_ghz, float), (R, nq))
    run_energies = np.ascontiguousarray(energies[None, :] + per_run @ digits.T.astype(float))
    coupled = np.abs(raise_ops).sum(axis=0) > 0
    coupled = coupled | coupled.T
    f_out = (np.array([lv.energies_ghz[1] for lv in cluster.levels]) if frame_ghz is None
             else np.asarray(frame_ghz, float))
    out_phase = (digits * f_out[None, :]).sum(axis=1)
    omega = np.ascontiguousarray(np.broadcast_to(tones.omega_ghz, np.shape(tones.start_ns)
                                                 + (nq,)), dtype=complex)

    def arr(x, dtype=float):
        return np.ascontiguousarray(x, dtype=dtype)

    # One BLAS thread inside the kernel: its matrices are small (d ≤ 64) and the runs are
    # already spread over cores; a threaded BLAS under parallel runs oversubscribes the
    # cores (measured: a 27 × 27 eigendecomposition 200× slower under load).
    with threadpool_limits(limits=1, user_api="blas"):
        return _evolve_batch(
            _initial_states(cluster, rho0, R), run_energies, nvec, hj, raise_ops, coupled, g1,
            gphi, dims, strides, arr(tones.start_ns), arr(tones.duration_ns),
            arr(tones.freq_ghz), omega, arr(tones.env_code, np.int64), arr(tones.sigma_ns),
            arr(tones.drag_ns), arr(tones.ramp_ns), arr(tones.n_tones, np.int64),
            arr(tones.end_ns), float(f_out[0]), out_phase,
            (float(c.max_step_ns), float(c.phase_per_step), float(c.envelope_fraction)))
