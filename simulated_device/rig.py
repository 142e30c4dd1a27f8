"""The simulated device behind the :class:`xtalkcal.hardware.Rig` protocol.

Each read-out qubit is simulated separately under the fields of all lines (product
states: exact for classical drive crosstalk, cost linear in the number of qubits). A qubit
with ``[[exchange]]`` neighbours is simulated together with them as one small cluster
(:mod:`simulated_device.coupled`; at most 3 transmons, the victim and its strongest-J
neighbours, a warning at load naming anyone left out), and read from the cluster's reduced
state; qubits without exchange neighbours keep the single-transmon path.
The device's clock advances by the repetition time per shot, and drift evolves with
that clock, so calibration time and drift are consequences of the shots spent.

Electronics jitter: every line's output in a shot is multiplied by
``(1 + ε)·e^{iη}`` with ε ~ N(0, amplitude_jitter), η ~ N(0, phase_jitter_rad). With
``jitter_groups = G`` the shots of each timeline are split into G groups, each with
its own draw; G = 1 (the default) shares one draw across the shots of one timeline:
the mean over timelines is that of shot-to-shot jitter, and the extra spread of a
single timeline's counts is of order (∂p/∂ξ·σ)², far below shot noise for σ ~ 1e-3.
"""

from __future__ import annotations

import hashlib
import math
import warnings
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from simulated_device.cluster import ClusterControl, build_cluster
from simulated_device.coupled import (
    ClusterWarning,
    CoupledCrosstalk,
    cluster_members,
    cluster_states,
    coupled_crosstalk,
    victim_populations,
)
from simulated_device.device import DeviceSpec, load_device
from simulated_device.drift_state import DeviceDrift
from simulated_device.dynamics import StepControl, ToneBatch, evolve_held, evolve_populations
from simulated_device.electronics import apply_to_samples
from simulated_device.paths import resonance_factor
from simulated_device.qubit_noise import BatchQubitNoise, TelegraphDefect, draw_batch_noise
from xtalkcal.exceptions import TimelineError
from xtalkcal.hardware import (
    Chip,
    Counts,
    Envelope,
    SampledRig,
    SampledWaveforms,
    Timeline,
    check_timelines,
    common_readout,
)

__all__ = ["SimRig", "SimulatedSampledRig", "sampled_demo_rig"]

#: Half-width (GHz) around a line's LO within which the waveform path applies the device's
#: line responses; beyond it a response is held at its band-edge value (the device model
#: is linear in frequency, in dB and phase, only over a few GHz; signals there are ~0).
RESPONSE_BAND_GHZ = 2.0


class SimRig:
    """A simulated transmon chip that speaks the rig protocol.

    Parameters
    ----------
    device : DeviceSpec or path
        The hidden truth (or a device file to load).
    seed : int, optional
        Overrides the device file's seed.
    drift : bool
        Set False to freeze all drift (for accuracy benchmarks).
    control : StepControl, optional
        Integrator accuracy knobs.
    start_s : float
        Simulated time (s) the clock starts from; the drift paths are those of the
        seed at that time (a session resumed on a later day sees the drifted chip).
    cluster_control : ClusterControl, optional
        Integrator accuracy knobs of the coupled-cluster path.
    """

    def __init__(
        self,
        device: DeviceSpec | str | Path,
        *,
        seed: int | None = None,
        drift: bool = True,
        control: StepControl | None = None,
        start_s: float = 0.0,
        cluster_control: ClusterControl | None = None,
    ) -> None:
        self.device = device if isinstance(device, DeviceSpec) else load_device(device)
        self._seed = self.device.seed if seed is None else int(seed)
        ss = np.random.SeedSequence(self._seed)
        _, drift_seq = ss.spawn(2)
        self._repeat_count: dict[int, int] = {}
        self._drift = DeviceDrift(self.device, enabled=drift, rng=np.random.default_rng(drift_seq))
        self._chip = self.device.chip()
        if not (math.isfinite(start_s) and start_s >= 0):
            raise ValueError("start_s must be a finite, non-negative time")
        self._t_s = float(start_s)
        self._shots_total = 0
        self._control = control or StepControl()
        self._cluster_control = cluster_control or ClusterControl()
        # Victims simulated with their exchange neighbours (fixed per victim; warns at load).
        self.clusters = cluster_members(self.device)
        # Two-level defects of the qubits that have one, each seeded by the seed and its index.
        self._defects = {q.name: TelegraphDefect(q.noise.tls_rate_per_hour, (self._seed, 15, k))
                         for k, q in enumerate(self.device.qubits) if q.noise.tls_shift_mhz}

    def qubit_noise(self, victim: str, runs: int, rng: np.random.Generator | None,
                    t_s: float) -> BatchQubitNoise | None:
        """One batch's qubit-noise draws for ``victim`` (None if the qubit has none)."""
        q = self.device.qubit(victim)
        if not q.noise.enabled:
            return None
        tls = self._defects[victim].state(t_s) if victim in self._defects else 0
        return draw_batch_noise(q.noise, q.levels.energies_ghz, q.t1_us, q.t2_us, runs, rng, tls)

    # ------------------------------------------------------------------ protocol
    @property
    def chip(self) -> Chip:
        return self._chip

    @property
    def repetition_ns(self) -> float:
        return self.device.repetition_us * 1e3

    def describe(self) -> str:
        return (
            f"simulated_device.SimRig(device={self.device.name!r}, seed={self._seed}, "
            f"levels={self.device.n_levels}, drift={'on' if self._drift.enabled else 'off'})"
        )

    def now(self) -> float:
        return self._t_s

    @property
    def shots_spent(self) -> int:
        """Total shots executed since construction."""
        return self._shots_total

    def wait(self, seconds: float) -> None:
        """Let simulated time pass with nothing played (drift goes on)."""
        if seconds < 0 or not math.isfinite(seconds):
            raise ValueError("wait() needs a finite, non-negative time")
        self._t_s += seconds

    def advance_clock_to(self, t_s: float) -> None:
        """Move the clock on to ``t_s`` if it is behind (never back; drift goes on).

        Called by :class:`xtalkcal.measure.BatchRunner` for each batch answered from a
        record, with the time the batch finished when it was measured: a resumed run then
        keeps the clock of the run it resumes.
        """
        if not math.isfinite(t_s):
            raise ValueError("advance_clock_to() needs a finite time")
        self._t_s = max(self._t_s, float(t_s))

    def run(self, timelines: Sequence[Timeline], shots: int) -> Counts:
        """Execute each timeline ``shots`` times; safety checked before anything runs."""
        if not isinstance(shots, (int, np.integer)) or shots < 1:
            raise TimelineError(f"shots must be a positive integer, got {shots!r}")
        timelines = list(timelines)
        readout = common_readout(timelines)
        for tl in timelines:
            tl.validate(lines=self._chip.line_names, qubits=self._chip.qubit_names)
            if tl.end_ns > self.repetition_ns:
                raise TimelineError(
                    f"{tl.label or 'timeline'}: readout at {tl.end_ns:g} ns is later than the "
                    f"repetition time {self.repetition_ns:g} ns"
                )
        check_timelines(self._chip, timelines, self.repetition_ns)

        started = self._t_s
        state = self._drift.at(started)
        rng = self._batch_rng(timelines, shots)
        counts = self._simulate(timelines, int(shots), readout, state, rng)
        self._t_s += len(timelines) * int(shots) * self.repetition_ns * 1e-9
        self._shots_total += len(timelines) * int(shots)
        return Counts(readout, counts, int(shots), started, self._t_s)

    # ------------------------------------------------------------------ physics
    def field_factor(self, victim: str, line: str, freq_ghz: np.ndarray, state) -> np.ndarray:
        """Complex Rabi rate (GHz) at ``victim``'s 0–1 transition per unit amplitude of ``line``."""
        dev = self.device
        own = dev.line_of(victim)
        q = dev.qubit(victim)
        f = np.asarray(freq_ghz, dtype=float)
        f01 = q.f01_ghz + state.qubit_shift_ghz[victim]
        df = f - f01
        selfresp = 10 ** (own.self_slope_db_per_ghz * df / 20.0) * np.exp(
            -2j * np.pi * df * own.self_delay_ns
        )
        base = own.rabi_mhz * 1e-3 * selfresp
        if line == own.name:
            return base
        return base * self._path_crosstalk(victim, line, f, state)

    def _path_crosstalk(self, victim: str, line: str, f: np.ndarray, state) -> np.ndarray:
        """X of the path ``line`` → ``victim`` at ``f``, its resonances (if any) included."""
        x = self._drift.crosstalk(victim, line, f, state)
        c = self.device.coupling(line, victim)
        if c is None or not c.resonances:
            return x
        f01 = self.device.qubit(victim).f01_ghz + state.qubit_shift_ghz[victim]
        return x * resonance_factor(f, f01, c.resonances)

    def _path_shift_ns(self, victim: str, line: str) -> float:
        """How far the tone path moves ``line``'s envelopes at ``victim`` (0 without the
        envelope delay; sign and meaning in :mod:`simulated_device.paths`)."""
        if not self.device.envelope_delay:
            return 0.0
        own = self.device.line_of(victim)
        c = None if line == own.name else self.device.coupling(line, victim)
        return -(own.self_delay_ns + (c.delay_ns if c is not None else 0.0))

    def _hardware_tones(self, victim, cols, ntones, end):
        """Tone columns (R, M) after the lines' electronics and the paths' envelope delays.

        Compression scales each tone's peak; every tone of a line with an image gets its
        mirror (conjugate amplitude, so DRAG changes sign); a leaking LO plays through the
        whole shot. Returns the columns unchanged (same arrays) when nothing is on.
        """
        dev = self.device
        names = self._chip.line_names
        els = [dev.line(n).electronics for n in names]
        shifts = np.array([self._path_shift_ns(victim, n) for n in names])
        if not any(el is not None and el.any for el in els) and not np.any(shifts):
            return cols, ntones
        start, dur, freq, amp, code, sigma, drag, ramp, lidx = (c.copy() for c in cols)
        R = start.shape[0]
        rows = [[tuple(c[r, k] for c in (start, dur, freq, amp, code, sigma, drag, ramp, lidx))
                 for k in range(ntones[r])] for r in range(R)]
        square = Envelope("square").code
        for k, el in enumerate(els):
            if el is None or not el.any:
                continue
            for r in range(R):
                for i, t in enumerate(rows[r][: len(rows[r])]):  # not the images added
                    if t[8] != k:
                        continue
                    a = complex(el.compress(np.asarray(t[3])))
                    rows[r][i] = t[:3] + (a,) + t[4:]
                    if el.image is not None:
                        rows[r].append(t[:2] + (2 * el.lo_ghz - t[2], el.image * np.conj(a),
                                                t[4], t[5], -t[6], t[7], k))
                if el.lo_leak is not None:
                    rows[r].append((0.0, end[r], el.lo_ghz, complex(el.compress(
                        np.asarray(el.lo_leak))), square, 1.0, 0.0, 0.0, k))
        ntones = np.array([len(rw) for rw in rows], dtype=np.int64)
        M = max(int(ntones.max(initial=0)), 1)
        out = [np.zeros((R, M), dtype=c.dtype) for c in cols]
        out[1][:] = 1.0
        out[2][:] = 1.0
        out[4][:] = 3
        out[5][:] = 1.0
        for r, rw in enumerate(rows):
            for i, t in enumerate(rw):
                for c, v in zip(out, t, strict=True):
                    c[r, i] = v
        out[0] = out[0] + np.where(np.arange(M)[None, :] < ntones[:, None],
                                   shifts[out[8]], 0.0)
        return tuple(out), ntones

    def _batch_rng(self, timelines: Sequence[Timeline], shots: int) -> np.random.Generator:
        """Randomness of one batch, from the seed and the batch's content.

        A batch's outcomes then do not depend on what ran before it, so a sweep that is
        interrupted and resumed (skipping the batches already on disk) reproduces the
        uninterrupted run exactly. Repeats of an identical batch get fresh draws.
        """
        h = hashlib.blake2b(repr((tuple(timelines), int(shots))).encode(), digest_size=8)
        key = int.from_bytes(h.digest(), "little")
        n = self._repeat_count.get(key, 0)
        self._repeat_count[key] = n + 1
        return np.random.default_rng(np.random.SeedSequence([self._seed, key, n]))

    def _simulate(self, timelines, shots, readout, state, rng) -> np.ndarray:
        dev = self.device
        R = len(timelines)
        # Jitter per (timeline, group, line).
        jit = _jitter(dev, rng, R, len(self._chip.line_names))
        n_assign = max(q.readout.shape[0] for q in dev.qubits)
        out = np.zeros((R, len(readout), n_assign), dtype=np.int64)
        group_shots = _group_shots(shots, dev.jitter_groups)
        # A child generator, so the jitter and shot draws stay where they were.
        qrng = rng.spawn(1)[0]
        noises = self._batch_noises(readout, R * dev.jitter_groups, qrng, self._t_s)
        for iq, victim in enumerate(readout):
            q = dev.qubit(victim)
            pops = self._tone_populations(timelines, victim, state, jit, noises)
            out[:, iq, : q.readout.shape[0]] = _assigned_counts(pops, q.readout, group_shots, rng)
        return out

    def _batch_noises(self, readout, runs, qrng, t_s) -> dict:
        """Qubit noise of one batch for the read-out qubits (drawn first, in readout order,
        so a chip without exchange draws what it always drew) and then for their cluster
        neighbours: a qubit has one draw per batch, whoever's cluster it is in."""
        noises = {v: self.qubit_noise(v, runs, qrng, t_s) for v in readout}
        for v in readout:
            for m in self.clusters.get(v, ())[1:]:
                if m not in noises:
                    noises[m] = self.qubit_noise(m, runs, qrng, t_s)
        return noises

    def populations(self, timelines: Sequence[Timeline], victim: str) -> np.ndarray:
        """Level populations of ``victim`` after each timeline, shape (R, L): no jitter, no
        shots, drift state at the rig's clock; nothing is checked or counted (for tests). A
        victim with exchange neighbours is read in the dressed basis, as :meth:`run` reads it."""
        jit = np.ones((len(timelines), 1, len(self._chip.line_names)), dtype=complex)
        return self._tone_populations(list(timelines), victim, self._drift.at(self._t_s), jit)

    def cluster_density(self, timelines: Sequence[Timeline], victim: str):
        """The cluster of ``victim`` and its final density matrices (R, d, d) after each
        timeline (no jitter, no noise, drift state at the rig's clock; for tests), in the
        frame of each member's bare f01 (:mod:`simulated_device.cluster`)."""
        if victim not in self.clusters:
            raise KeyError(f"{victim} has no exchange neighbours (simulated alone)")
        jit = np.ones((len(timelines), 1, len(self._chip.line_names)), dtype=complex)
        cols, ntones, end = self._tone_columns(list(timelines))
        return cluster_states(self, victim, cols, ntones, end, self._drift.at(self._t_s), jit,
                              None, self._cluster_control)

    def _tone_columns(self, timelines):
        """Tone columns (R, M) of a batch as played (before the electronics), tone counts
        and readout times."""
        R = len(timelines)
        line_index = {n: k for k, n in enumerate(self._chip.line_names)}
        M = max((len(tl.tones) for tl in timelines), default=0)
        M = max(M, 1)
        start = np.zeros((R, M))
        dur = np.ones((R, M))
        freq = np.ones((R, M))
        amp = np.zeros((R, M), dtype=complex)
        code = np.full((R, M), 3, dtype=np.int64)
        sigma = np.ones((R, M))
        drag = np.zeros((R, M))
        ramp = np.zeros((R, M))
        lidx = np.zeros((R, M), dtype=np.int64)
        ntones = np.zeros(R, dtype=np.int64)
        end = np.array([tl.end_ns for tl in timelines], dtype=float)
        for r, tl in enumerate(timelines):
            ntones[r] = len(tl.tones)
            for k, t in enumerate(tl.tones):
                start[r, k] = t.start_ns
                dur[r, k] = t.duration_ns
                freq[r, k] = t.freq_ghz
                amp[r, k] = t.complex_amplitude
                code[r, k] = t.envelope.code
                sigma[r, k] = t.envelope.sigma_ns if t.envelope.sigma_ns > 0 else 1.0
                drag[r, k] = t.envelope.drag_ns
                ramp[r, k] = t.envelope.ramp_ns
                lidx[r, k] = line_index[t.line]
        return (start, dur, freq, amp, code, sigma, drag, ramp, lidx), ntones, end

    def _tone_populations(self, timelines, victim, state, jit, noises=None) -> np.ndarray:
        """Populations (R·G, L) of ``victim`` under the tones, jitter ``jit`` (R, G, lines),
        qubit noise ``noises`` (qubit → :class:`BatchQubitNoise` or None; or None)."""
        dev = self.device
        R, G = jit.shape[:2]
        line_names = self._chip.line_names
        line_index = {n: k for k, n in enumerate(line_names)}
        cols, ntones, end = self._tone_columns(timelines)
        noise = (noises or {}).get(victim)
        if victim in self.clusters:
            cluster, rho = cluster_states(self, victim, cols, ntones, end, state, jit, noises,
                                          self._cluster_control, dressed_frame=True)
            return victim_populations(cluster, rho, dev.qubit(victim).levels.n_levels)
        cols, ntones = self._hardware_tones(victim, cols, ntones, end)
        start, dur, freq, amp, code, sigma, drag, ramp, lidx = cols
        M = start.shape[1]
        valid = np.arange(M)[None, :] < ntones[:, None]
        q = dev.qubit(victim)
        # Field factor of every tone at this victim.
        fac = np.zeros((R, M), dtype=complex)
        for ln in line_names:
            mask = valid & (lidx == line_index[ln])
            if np.any(mask):
                fac[mask] = self.field_factor(victim, ln, freq[mask], state)
        omega = (amp * fac)[:, None, :] * np.take_along_axis(
            jit, np.broadcast_to(lidx[:, None, :], (R, G, M)), axis=2
        )
        omega = omega.reshape(R * G, M)
        rep = lambda a: np.repeat(a, G, axis=0)  # noqa: E731
        batch = ToneBatch(
            rep(start), rep(dur), rep(freq), omega, rep(code), rep(sigma), rep(drag),
            rep(ramp), rep(ntones), rep(end),
        )
        levels, t1, t2, rho0 = _noisy_qubit(q, state.qubit_shift_ghz[victim], noise)
        return evolve_populations(levels, q.levels.ladder, t1, t2, batch, control=self._control,
                                  rho0=rho0)

    # ------------------------------------------------------------------ ground truth
    def true_crosstalk(self, victim: str, line: str, freq_ghz: float, t_s: float | None = None
                       ) -> complex:
        """True X_{victim,line}(f) = C_{victim,line}(f)/C_{victim,victim}(f) at time t."""
        state = self._drift.at(self._t_s if t_s is None else t_s)
        own = self.device.line_of(victim).name
        if line == own:
            return 1.0 + 0.0j
        return complex(self._path_crosstalk(victim, line, np.asarray(freq_ghz, float), state))

    def true_ratio(self, victim: str, line: str, freq_ghz: float, t_s: float | None = None
                   ) -> complex:
        """True compensation ratio r = −X (README: the crosstalk element and the ratio)."""
        return -self.true_crosstalk(victim, line, freq_ghz, t_s)

    def true_coupled_crosstalk(self, victim: str, line: str, freq_ghz: float | None = None,
                               t_s: float | None = None) -> CoupledCrosstalk:
        """Effective X of ``line`` on ``victim`` with the victim's exchange neighbours in each of
        |0⟩ and |1⟩, from the cluster Hamiltonian (:func:`simulated_device.coupled.
        coupled_crosstalk`): its state average and conditional part per neighbour. A victim
        without neighbours has the classical X as its one state and no conditional part.

        ``freq_ghz`` defaults to the (dressed) f01 of the line's own qubit, where an
        aggressor plays.
        """
        state = self._drift.at(self._t_s if t_s is None else t_s)
        f = self._chip.qubit(self.device.line(line).qubit).f01_ghz if freq_ghz is None \
            else float(freq_ghz)
        if victim in self.clusters:
            return coupled_crosstalk(self, victim, line, f, state)
        x = self.true_crosstalk(victim, line, f, t_s)
        return CoupledCrosstalk((), {(): x}, x, {})

    def true_coupled_matrix(self, t_s: float | None = None) -> tuple[np.ndarray, np.ndarray]:
        """State-averaged effective X and the largest conditional part per (qubit, line), at
        each aggressor's own (dressed) f01, shape (n_qubits, n_lines) each, chip order; for an
        uncoupled chip the first is :meth:`true_matrix` and the second is zero."""
        qubits, lines = self._chip.qubit_names, self._chip.lines
        avg = np.zeros((len(qubits), len(lines)), dtype=complex)
        cond = np.zeros((len(qubits), len(lines)), dtype=complex)
        for i, v in enumerate(qubits):
            for j, ln in enumerate(lines):
                x = self.true_coupled_crosstalk(v, ln.name, None, t_s)
                avg[i, j] = x.average
                if x.conditional:
                    cond[i, j] = max(x.conditional.values(), key=abs)
        return avg, cond

    def true_zz_ghz(self, qubit_a: str, qubit_b: str, t_s: float | None = None) -> float:
        """Static ZZ (GHz) of two qubits, E_11 − E_10 − E_01 + E_00 of the dressed levels of
        ``qubit_a``'s cluster (its other members in |0⟩); 0 where ``qubit_b`` is not in it."""
        if qubit_a not in self.clusters or qubit_b not in self.clusters[qubit_a]:
            return 0.0
        state = self._drift.at(self._t_s if t_s is None else t_s)
        c = build_cluster(self.device, qubit_a, shifts_ghz=dict(state.qubit_shift_ghz))
        return c.zz_ghz(0, c.names.index(qubit_b))

    def true_envelope_delay(self, victim: str, line: str) -> float:
        """How late (ns) the leak of ``line`` reaches ``victim`` against the victim's own line,
        in envelope (0 where the envelope is not delayed, or the pair does not couple).

        In the simulator's sign convention the path's ``delay_ns`` moves the leak's envelope
        *earlier* by ``delay_ns`` (see :mod:`simulated_device.paths`); the value returned is
        that shift as a delay, ``−delay_ns``. A copy aligned to the aggressor leaves the
        Stark-effect floor :func:`simulated_device.paths.envelope_floor_db` at it.
        """
        own = self.device.line_of(victim)
        if line == own.name:
            return 0.0
        return self._path_shift_ns(victim, line) - self._path_shift_ns(victim, own.name)

    def true_crosstalk_at_amplitude(self, victim: str, line: str, freq_ghz: float,
                                    amplitudes, t_s: float | None = None) -> np.ndarray:
        """X of the pair as a weak cancellation tone sees it when ``line`` plays at each of
        ``amplitudes`` (peak): the aggressor line's compression makes X fall near full scale
        (X·g(a)/a with g the line's Rapp curve; the weak tone on the victim's line is linear)."""
        a = np.asarray(amplitudes, dtype=float)
        x = self.true_crosstalk(victim, line, freq_ghz, t_s)
        el = self.device.line(line).electronics
        if el is None or el.saturation is None:
            return np.full(a.shape, x, dtype=complex)
        return x * np.abs(el.compress(a.astype(complex))) / a

    def spurious_collisions(self, window_mhz: float = 20.0) -> list[dict]:
        """Image and LO-leakage tones within ``window_mhz`` of a qubit's transition.

        A line's tones are taken to be its own qubit's f01 and, for cancellation, the f01 of
        each qubit whose line leaks onto its qubit. Transitions: f01, f12 and the two-photon
        f02/2 of every qubit. Each entry gives the line, the kind (``"image"`` of which tone,
        or ``"lo_leak"``), the spurious frequency, the victim, the transition, the offset
        (MHz) and the level at the victim (dB relative to a full-scale tone of the victim's
        own line), computed from the device's truth.
        """
        dev = self.device
        state = self._drift.at(self._t_s)
        out = []
        for ln in dev.lines:
            el = ln.electronics
            if el is None or el.lo_ghz is None:
                continue
            played = {dev.qubit(ln.qubit).f01_ghz} | {
                dev.qubit(dev.line(c.line).qubit).f01_ghz for c in dev.couplings
                if c.qubit == ln.qubit}
            spurs = [("image", 2 * el.lo_ghz - f, f, abs(el.image)) for f in sorted(played)
                     if el.image is not None]
            if el.lo_leak is not None:
                spurs.append(("lo_leak", el.lo_ghz, None, abs(el.lo_leak)))
            for kind, fs, tone, level in spurs:
                for q in dev.qubits:
                    e = q.levels.energies_ghz
                    trans = {"f01": e[1], "f12": e[2] - e[1], "f02/2": e[2] / 2}
                    for name, ft in trans.items():
                        off = (fs - ft) * 1e3
                        if abs(off) > window_mhz:
                            continue
                        h = abs(self.field_factor(q.name, ln.name, np.array([fs]), state)[0])
                        own = dev.line_of(q.name).rabi_mhz * 1e-3
                        seen = level * h / own
                        out.append(dict(line=ln.name, kind=kind, tone_ghz=tone,
                                        spur_ghz=float(fs), victim=q.name, transition=name,
                                        offset_mhz=float(off),
                                        level_db=float(20 * np.log10(seen)) if seen else
                                        -math.inf))
        return out

    def true_matrix(self, t_s: float | None = None) -> np.ndarray:
        """X_ij at each aggressor's own f01, shape (n_qubits, n_lines) in chip order."""
        qubits = self._chip.qubit_names
        lines = self._chip.lines
        out = np.zeros((len(qubits), len(lines)), dtype=complex)
        for i, v in enumerate(qubits):
            for j, ln in enumerate(lines):
                f = self._chip.qubit(ln.qubit).f01_ghz
                out[i, j] = self.true_crosstalk(v, ln.name, f, t_s)
        return out


class SimulatedSampledRig(SampledRig):
    """The simulated device behind :class:`~xtalkcal.hardware.SampledRig`: sampled waveforms in.

    ``run`` is the base class's (limits checked, then compiled to per-line I/Q samples);
    :meth:`play` feeds those samples, and nothing else, to the simulator's waveform-level
    path (:func:`simulated_device.dynamics.evolve_held`). Same device, drift, clock,
    jitter model and readout as :class:`SimRig`.

    How a line's samples reach a qubit: the line's held samples ``s[k]`` (baseband
    relative to its LO, ``f_LO``) are passed through the device's response from that line
    to the qubit, ``H(f)`` (what :meth:`SimRig.field_factor` gives a tone at ``f``: gain,
    crosstalk magnitude, phase, delays and slopes), as a discrete-time filter with
    response ``H(f_LO + ν)`` at each frequency ν of the sample sequence (ν within
    ±``RESPONSE_BAND_GHZ``, held beyond), then held again like the DAC output and mixed
    with the continuous LO. Where ``H`` is flat across a line's content this is exactly
    the tone path's per-tone factor ``H(f_tone)``; where it is not (a delay, a slope) the
    filter also moves and reshapes envelopes, which the tone path neglects, so the two
    agree only to O(τ·bandwidth) there; and a qubit driven off its transition by Δf then
    sees a line's response at its transition, not at the tone (a null differs by about
    2π·Δf·τ in phase from the tone path's).

    Parameters
    ----------
    device : DeviceSpec or path
    samples_per_ns : float
        DAC rate (GS/s); default 8.
    lo_ghz : mapping of str → float, optional
        LO per line (GHz); default each line's qubit's nominal f01.
    seed, drift, control, start_s
        As for :class:`SimRig`.
    """

    def __init__(
        self,
        device: DeviceSpec | str | Path,
        *,
        samples_per_ns: float = 8.0,
        lo_ghz: dict[str, float] | None = None,
        seed: int | None = None,
        drift: bool = True,
        control: StepControl | None = None,
        start_s: float = 0.0,
    ) -> None:
        super().__init__(samples_per_ns=samples_per_ns, lo_ghz=lo_ghz)
        self.sim = SimRig(device, seed=seed, drift=drift, control=control, start_s=start_s)
        if self.sim.device.exchange:
            warnings.warn(f"{self.sim.device.source}: the waveform-level path simulates every "
                          "qubit alone; its [[exchange]] couplings are left out (use SimRig)",
                          ClusterWarning, stacklevel=2)
        self._lo_plan = self.lo_ghz  # refuses an LO plan naming unknown lines now

    @property
    def chip(self) -> Chip:
        return self.sim.chip

    @property
    def repetition_ns(self) -> float:
        return self.sim.repetition_ns

    def describe(self) -> str:
        return (f"simulated_device.SimulatedSampledRig({self.samples_per_ns:g} samples/ns, "
                f"over {self.sim.describe()})")

    def now(self) -> float:
        return self.sim.now()

    def advance_clock_to(self, t_s: float) -> None:
        """As :meth:`SimRig.advance_clock_to`."""
        self.sim.advance_clock_to(t_s)

    def play(self, waveforms, shots: int) -> Counts:
        """Simulate each compiled timeline ``shots`` times from its samples alone."""
        waveforms = list(waveforms)
        for wf in waveforms:
            if wf.readout_ns > self.repetition_ns:
                raise TimelineError(
                    f"{wf.label or 'timeline'}: readout at {wf.readout_ns:g} ns is later than "
                    f"the repetition time {self.repetition_ns:g} ns")
        readout = waveforms[0].readout
        sim = self.sim
        started = sim.now()
        state = sim._drift.at(started)
        rng = self._batch_rng(waveforms, shots)
        dev = sim.device
        R, G = len(waveforms), dev.jitter_groups
        lines = self.chip.line_names
        jit = _jitter(dev, rng, R, len(lines))
        n_assign = max(q.readout.shape[0] for q in dev.qubits)
        out = np.zeros((R, len(readout), n_assign), dtype=np.int64)
        group_shots = _group_shots(int(shots), G)
        qrng = rng.spawn(1)[0]
        for iq, victim in enumerate(readout):
            noise = sim.qubit_noise(victim, R * G, qrng, started)
            pops = self.populations(waveforms, victim, state, jit, noise)
            q = dev.qubit(victim)
            out[:, iq, : q.readout.shape[0]] = _assigned_counts(pops, q.readout, group_shots, rng)
        sim._t_s += R * int(shots) * self.repetition_ns * 1e-9
        sim._shots_total += R * int(shots)
        return Counts(readout, out, int(shots), started, sim.now())

    def populations(self, waveforms: list[SampledWaveforms], victim: str, state=None,
                    jit: np.ndarray | None = None, noise=None) -> np.ndarray:
        """Level populations of ``victim`` after each compiled timeline, shape (R·G, L).

        ``state`` is the drift state (default: at the rig's clock), ``jit`` the jitter
        factors per (timeline, group, line) (default: none, one group) and ``noise`` the
        batch's qubit noise (default: none).
        """
        sim = self.sim
        dev = sim.device
        state = sim._drift.at(sim.now()) if state is None else state
        lines = self.chip.line_names
        if jit is None:
            jit = np.ones((len(waveforms), 1, len(lines)), dtype=complex)
        R, G = jit.shape[:2]
        dt = waveforms[0].dt_ns
        n = max(wf.n_samples for wf in waveforms)
        carriers = sorted({wf.lo_ghz[ln] for wf in waveforms for ln in lines})
        omega = np.zeros((R, G, len(carriers), n), dtype=complex)
        for r, wf in enumerate(waveforms):
            if wf.dt_ns != dt:
                raise TimelineError("all waveforms of one batch must share one sample rate")
            for il, ln in enumerate(lines):
                s = wf.samples[ln]
                el = dev.line(ln).electronics
                if not np.any(s) and (el is None or el.lo_leak is None):
                    continue
                seen = self._line_response(victim, ln, wf.lo_ghz[ln], s, dt, state)
                p = carriers.index(wf.lo_ghz[ln])
                omega[r, :, p, : len(s)] += jit[r, :, il, None] * seen[None, :]
        q = dev.qubit(victim)
        levels, t1, t2, rho0 = _noisy_qubit(q, state.qubit_shift_ghz[victim], noise)
        return evolve_held(levels, q.levels.ladder, t1, t2, omega.reshape(R * G, len(carriers), n),
                           np.broadcast_to(np.array(carriers), (R * G, len(carriers))), dt,
                           n_cells=np.repeat([wf.n_samples for wf in waveforms], G),
                           control=sim._control, rho0=rho0)

    def _line_response(self, victim: str, line: str, lo: float, s: np.ndarray, dt: float,
                       state) -> np.ndarray:
        """Held Rabi-rate samples (GHz) at ``victim`` from one line's samples ``s``
        (after the line's electronics, :func:`simulated_device.electronics.apply_to_samples`)."""
        el = self.sim.device.line(line).electronics
        if el is not None and el.any:
            s = apply_to_samples(el, s)
        n = len(s)
        pad = n  # zeros on both sides: a delay must not wrap the record round
        # A component e^{−i2πνt} of the samples (our sign, as for the carriers) sits at
        # numpy's frequency −ν, so the bin at numpy frequency ν holds the RF frequency f_LO − ν.
        nu = -np.fft.fftfreq(3 * n, dt)
        f = lo + np.clip(nu, -RESPONSE_BAND_GHZ, RESPONSE_BAND_GHZ)
        h = self.sim.field_factor(victim, line, f, state)
        if np.all(h == h[0]):
            return h[0] * s  # a flat response is a plain factor: no filtering round-off
        spec = np.fft.fft(np.concatenate([np.zeros(pad), s, np.zeros(pad)]))
        return np.fft.ifft(spec * h)[pad: pad + n]

    def _batch_rng(self, waveforms: list[SampledWaveforms], shots: int) -> np.random.Generator:
        """As :meth:`SimRig._batch_rng`, keyed by the samples themselves."""
        h = hashlib.blake2b(repr((int(shots), waveforms[0].dt_ns)).encode(), digest_size=8)
        for wf in waveforms:
            h.update(repr((wf.readout, wf.readout_ns, sorted(wf.lo_ghz.items()))).encode())
            for ln in sorted(wf.samples):
                h.update(ln.encode())
                h.update(np.ascontiguousarray(wf.samples[ln]).tobytes())
        key = int.from_bytes(h.digest(), "little")
        n = self.sim._repeat_count.get(key, 0)
        self.sim._repeat_count[key] = n + 1
        return np.random.default_rng(np.random.SeedSequence([self.sim._seed, key, n]))


def sampled_demo_rig() -> SimulatedSampledRig:
    """The bundled demo device over the waveform-level path (``--rig`` factory)."""
    from simulated_device import demo_device_path

    return SimulatedSampledRig(demo_device_path(), seed=1234)


def _noisy_qubit(q, drift_shift_ghz: float, noise):
    """Levels (1 or R·G rows), T1, T2 (ns) and initial ρ of qubit ``q`` under a batch's noise."""
    n = np.arange(q.levels.n_levels)
    levels = q.levels.energies_ghz + drift_shift_ghz * n
    if noise is None:
        return levels, np.array([q.t1_us * 1e3]), np.array([q.t2_us * 1e3]), None
    levels = levels[None, :] + noise.shift_ghz[:, None] * n[None, :]
    return levels, np.array([noise.t1_ns]), np.array([noise.t2_ns]), noise.rho0


def _jitter(dev: DeviceSpec, rng: np.random.Generator, runs: int, n_lines: int) -> np.ndarray:
    """Electronics jitter factors (1 + ε)·e^{iη} per (run, group, line)."""
    G = dev.jitter_groups
    eps = rng.normal(0.0, dev.amplitude_jitter, size=(runs, G, n_lines))
    eta = rng.normal(0.0, dev.phase_jitter_rad, size=(runs, G, n_lines))
    return (1.0 + eps) * np.exp(1j * eta)


def _group_shots(shots: int, groups: int) -> np.ndarray:
    """Shots of each jitter group (as equal as whole numbers allow)."""
    group_shots = np.full(groups, shots // groups)
    group_shots[: shots % groups] += 1
    return group_shots


def _assigned_counts(pops: np.ndarray, assign: np.ndarray, group_shots: np.ndarray,
                     rng: np.random.Generator) -> np.ndarray:
    """Counts (R, n_assigned) from level populations (R·G, L) through the readout matrix."""
    G = len(group_shots)
    R = pops.shape[0] // G
    # Levels above the assignment matrix are read like its last row.
    na = assign.shape[0]
    p_levels = np.concatenate(
        [pops[:, : na - 1], pops[:, na - 1 :].sum(axis=1, keepdims=True)], axis=1
    )
    p_assigned = np.clip(p_levels @ assign, 0.0, None)
    p_assigned /= p_assigned.sum(axis=1, keepdims=True)
    p_assigned = p_assigned.reshape(R, G, na)
    c = np.zeros((R, na), dtype=np.int64)
    for g in range(G):
        if group_shots[g]:
            c += rng.multinomial(group_shots[g], p_assigned[:, g, :])
    return c
