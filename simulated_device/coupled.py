"""Victims with exchange neighbours: the rig's cluster path and the truth of coupled pairs.

A read-out qubit with ``[[exchange]]`` neighbours is simulated together with them as one
cluster (:mod:`simulated_device.cluster`): the victim and its strongest-J neighbours, at most
:data:`simulated_device.exchange.CLUSTER_MAX_QUBITS` transmons of at most
:data:`simulated_device.cluster.CLUSTER_MAX_LEVELS` levels each. The members are fixed per
victim when the rig is made (a cluster that changed with the batch would move the victim's
dressed frequency between batches); who is left out is said once, as a warning, at load.
Every tone of every line drives every member with that member's own field factor
(:meth:`simulated_device.rig.SimRig.field_factor`: its own line's gain, or the leak path's
X), each member's tones moved by its own path delays, and the victim's level populations are
the marginal of the cluster's final density matrix. Qubit noise acts on every member as on a
lone qubit: its thermal start (the dressed states, populated by the product of the
members' Gibbs populations of their labels), its per-run f01 offsets and its batch T1. The
readout reports the victim's level of the dressed state (:func:`victim_populations`).
Victims without exchange neighbours keep the single-transmon path.

Truth of a coupled pair (:func:`coupled_crosstalk`), from the Hamiltonian alone: a tone at f
on line ℓ drives the victim's dressed 0–1 transition (neighbours in the product state s) by
``Σ_p Ω_{ℓ,p}(f)·⟨1_v s~|a_p†|0_v s~⟩`` (first order in the drive), the sum over cluster
members p; the effective X_s is that over the same sum for the victim's own line, i.e. the
ratio a cancellation tone on the victim's line at f must meet to null the transition's drive
with the neighbours in s. The classical leak, the hybridisation leak (order J/Δ) and its
dependence on the neighbours' states all come out of this one expression.
"""

from __future__ import annotations

import itertools
import warnings
from dataclasses import dataclass

import numpy as np

from simulated_device.cluster import (
    Cluster,
    ClusterControl,
    ClusterTones,
    build_cluster,
    evolve_cluster,
)
from simulated_device.exchange import exchange_neighbours

__all__ = ["ClusterWarning", "cluster_members", "cluster_states", "coupled_crosstalk",
           "CoupledCrosstalk", "dressed_frequencies"]


class ClusterWarning(UserWarning):
    """A victim's cluster leaves out an exchange neighbour, or truncates its levels."""


def cluster_members(device) -> dict[str, tuple[str, ...]]:
    """Cluster members (victim first) of each qubit that has exchange neighbours.

    Warns (:class:`ClusterWarning`) once per capped or truncated cluster, naming who is left
    out, so that a simulated result is never silently missing a coupling.
    """
    out = {}
    for q in device.qubits:
        if not exchange_neighbours(device.exchange, q.name):
            continue
        c = build_cluster(device, q.name)
        if c.warning:
            warnings.warn(f"{device.source}: {c.warning}", ClusterWarning, stacklevel=3)
        out[q.name] = c.names
    return out


def _member_cluster(device, victim, state, noises) -> Cluster:
    """The victim's cluster at the drift state, with each member's batch T1/T2 if noisy."""
    shifts = {n: state.qubit_shift_ghz[n] for n in state.qubit_shift_ghz}
    c = build_cluster(device, victim, shifts_ghz=shifts)
    t1 = c.t1_ns.copy()
    t2 = c.t2_ns.copy()
    for i, n in enumerate(c.names):
        nz = (noises or {}).get(n)
        if nz is not None:
            t1[i], t2[i] = nz.t1_ns, nz.t2_ns
    return Cluster(c.names, c.levels, t1, t2, c.j_ghz, c.warning)


def _initial_rho(cluster: Cluster, noises, runs: int) -> np.ndarray | None:
    """Thermal start of the cluster (None: every member in |0⟩).

    Each member's Gibbs populations (its own ``thermal_population``) are multiplied into the
    population of every dressed state by its label, and the state is diagonal in the dressed
    basis, as a thermal state of the coupled Hamiltonian is (to the labels' accuracy).
    """
    pops = []
    for n, L in zip(cluster.names, cluster.dims, strict=True):
        nz = (noises or {}).get(n)
        p = np.zeros(L)
        if nz is None or nz.rho0 is None:
            p[0] = 1.0
        else:  # levels above the cluster's are dropped (their weight is ~e^{-βε_4})
            p = np.real(np.diag(nz.rho0))[:L].copy()
            p /= p.sum()
        pops.append(p)
    if all(p[0] == 1.0 for p in pops):
        return None
    weight = pops[0]
    for p in pops[1:]:
        weight = np.kron(weight, p)
    _, vec = cluster.dressed()
    return (vec * weight[None, :]) @ vec.conj().T


def cluster_states(rig, victim, cols, ntones, end, state, jit, noises=None,
                   control: ClusterControl | None = None, dressed_frame: bool = False
                   ) -> tuple[Cluster, np.ndarray]:
    """The victim's cluster and its final density matrices (R·G, d, d) after the tones.

    Parameters
    ----------
    rig : SimRig
    victim : str
    cols, ntones, end
        The batch's tone columns before the electronics (as ``SimRig`` builds them).
    state : DriftState
    jit : (R, G, lines) complex
        Jitter factors.
    noises : mapping qubit → BatchQubitNoise or None, optional
    control : ClusterControl, optional
    dressed_frame : bool
        Return ρ in one frame for every member (what :func:`victim_populations` needs)
        instead of each member's bare f01 frame.
    """
    dev = rig.device
    cluster = _member_cluster(dev, victim, state, noises)
    names = cluster.names
    R, G = jit.shape[:2]
    per = [rig._hardware_tones(m, cols, ntones, end) for m in names]
    hcols, nt = per[0]
    start, dur, freq, amp, code, sigma, drag, ramp, lidx = hcols
    M = start.shape[1]
    valid = np.arange(M)[None, :] < nt[:, None]
    line_names = rig.chip.line_names
    jit_t = np.take_along_axis(jit, np.broadcast_to(lidx[:, None, :], (R, G, M)), axis=2)
    omegas = []
    for m in names:
        fac = np.zeros((R, M), dtype=complex)
        for k, ln in enumerate(line_names):
            mask = valid & (lidx == k)
            if np.any(mask):
                fac[mask] = rig.field_factor(m, ln, freq[mask], state)
        omegas.append((amp * fac)[:, None, :] * jit_t)  # (R, G, M)
    starts = [p[0][0] for p in per]
    n = len(names)
    rep = lambda a: np.repeat(a, G, axis=0)  # noqa: E731
    if all(np.array_equal(s, start) for s in starts[1:]):
        omega = np.stack(omegas, axis=-1).reshape(R * G, M, n)
        tcols = (start, dur, freq, code, sigma, drag, ramp)
        n_out = nt
    else:
        # Members see a tone at different times (their own path delays): each member gets
        # its own copy of every tone, driving only itself.
        Mn = n * M
        rr = np.broadcast_to(np.arange(R)[:, None], (R, M))[valid]
        srcs = (start, dur, freq, code, sigma, drag, ramp)
        tcols = [np.full((R, Mn), pad, dtype=c.dtype)
                 for c, pad in zip(srcs, (0.0, 1.0, 1.0, 3, 1.0, 0.0, 0.0), strict=True)]
        omega = np.zeros((R, G, Mn, n), dtype=complex)
        for i in range(n):
            ss = (i * nt[:, None] + np.arange(M)[None, :])[valid]
            for out, c in zip(tcols, (starts[i],) + srcs[1:], strict=True):
                out[rr, ss] = c[valid]
            omega[rr, :, ss, i] = omegas[i].transpose(0, 2, 1)[valid]
        omega = omega.reshape(R * G, Mn, n)
        n_out = n * nt
    tones = ClusterTones(*(rep(c) for c in tcols[:3]), omega, *(rep(c) for c in tcols[3:]),
                         rep(n_out), rep(end))
    shifts = np.zeros((R * G, n))
    for i, m in enumerate(names):
        nz = (noises or {}).get(m)
        if nz is not None:
            shifts[:, i] = nz.shift_ghz
    rho0 = _initial_rho(cluster, noises, R * G)
    # One output frame for every member when read out in the dressed basis (it commutes
    # with the exchange, which conserves the excitation number); the bare f01s otherwise.
    frame = [cluster.levels[0].energies_ghz[1]] * n if dressed_frame else None
    rho = evolve_cluster(cluster, tones, rho0, control=control, shifts_ghz=shifts,
                         frame_ghz=frame)
    return cluster, rho


def victim_populations(cluster: Cluster, rho: np.ndarray, n_levels: int) -> np.ndarray:
    """The victim's level populations (R, n_levels) as a readout sees them: of the dressed
    states (each labelled by the bare state it overlaps most), summed over the neighbours'
    labels. ``rho`` is in a frame common to every member (``cluster_states`` with
    ``dressed_frame=True``). A readout maps dressed states to their labels; the bare
    marginal would instead show a neighbour's excitation as a victim population of order
    (J/Δ)², which no readout reports."""
    _, vec = cluster.dressed()
    pd = np.real(np.einsum("ji,rjk,ki->ri", vec.conj(), rho, vec))
    dig = cluster.digits()[:, 0]
    p = np.stack([pd[:, dig == m].sum(axis=1) for m in range(cluster.dims[0])], axis=1)
    out = np.zeros((p.shape[0], max(n_levels, p.shape[1])))
    out[:, : p.shape[1]] = p
    return out[:, :n_levels]


@dataclass(frozen=True)
class CoupledCrosstalk:
    """Effective X of one pair with the victim's exchange neighbours in each product state.

    ``by_state`` maps the neighbours' levels (in ``neighbours`` order, each 0 or 1) to X;
    ``average`` is the mean over those states (neighbours equally likely in |0⟩ and |1⟩, as
    in random gates); ``conditional[p]`` is X with neighbour p in |1⟩ minus X with it in |0⟩,
    averaged over the other neighbours' states: the part no single tone can cancel.
    """

    neighbours: tuple[str, ...]
    by_state: dict[tuple[int, ...], complex]
    average: complex
    conditional: dict[str, complex]


def coupled_crosstalk(rig, victim: str, line: str, freq_ghz: float, state) -> CoupledCrosstalk:
    """Effective X of ``line`` on ``victim`` at ``freq_ghz`` from the cluster Hamiltonian."""
    dev = rig.device
    cluster = _member_cluster(dev, victim, state, None)
    names = cluster.names
    f = np.array([float(freq_ghz)])
    own = dev.line_of(victim).name
    om_line = np.array([rig.field_factor(m, line, f, state)[0] for m in names])
    om_own = np.array([rig.field_factor(m, own, f, state)[0] for m in names])
    by_state = {}
    for s in itertools.product((0, 1), repeat=len(names) - 1):
        el, _ = cluster.transition_elements(0, list(s))
        by_state[s] = complex((om_line @ el) / (om_own @ el))
    avg = complex(np.mean(list(by_state.values())))
    cond = {}
    for i, p in enumerate(names[1:]):
        diffs = [by_state[s] - by_state[s[:i] + (0,) + s[i + 1:]] for s in by_state if s[i] == 1]
        cond[p] = complex(np.mean(diffs))
    return CoupledCrosstalk(names[1:], by_state, avg, cond)


def dressed_frequencies(device, qubit: str) -> tuple[float, float]:
    """Dressed f01 and f12 (GHz) of ``qubit`` with its exchange neighbours in |0⟩, what a lab
    measures and writes in its chip file (the bare values where it has none)."""
    q = device.qubit(qubit)
    if not exchange_neighbours(device.exchange, qubit):
        return q.f01_ghz, q.f12_ghz
    c = build_cluster(device, qubit)
    e, _ = c.dressed()
    n = len(c.names)
    idx = [int(np.ravel_multi_index((m,) + (0,) * (n - 1), c.dims))
           for m in range(min(3, c.dims[0]))]
    f01 = float(e[idx[1]] - e[idx[0]])
    return (f01, float(e[idx[2]] - e[idx[1]])) if len(idx) == 3 else (f01, q.f12_ghz)
