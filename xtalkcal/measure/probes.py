"""Measurement methods: timelines for one aggressor and its victims, and their error signals.

One *column probe* plays a train of K identical aggressor pulses on line j at its
frequency f_j; every victim i of the column gets, in the same shots, a cancellation
tone on its own line: the same envelope at f_j with complex amplitude z_i = a·e^{iφ}
(fraction of full scale). The field at victim i is then w_i = u_i + v_i·z_i, and each
method turns it into an isolated error signal that depends on |w_i| only:

``leakage``
    victim prepared in |1⟩ by a π pulse; signal P(2). Used when f_j lies within
    ``leakage_window_ghz`` of the victim's 1–2 transition.
``rotation``
    victim left in |0⟩; signal P(1). Used when f_j lies within ``rotation_window_ghz``
    of the victim's 0–1 transition.
``stark``
    quadrature Ramsey on the victim (π/2 – train – π/2 at phases 0 and π/2); signal the
    Ramsey phase minus that of the same sequence without the aggressor (reference
    timelines in every batch), signed so that it grows with |w|² (AC Stark shift
    δ = Ω²α/(2Δ(Δ − α)), Δ = f_j − f01, Krantz et al., Appl. Phys. Rev. 6, 021318 (2019)).

Detuning windows: 35 MHz by default for both (adjustable in the protocol file). Inside
the window the pulse drives a detuned victim by its spectral weight
(:func:`spectral_weight`: 0.73 at 20 MHz, 0.35 at 35 MHz for the 32 ns, 8 ns-σ pulses),
and K is chosen with it. Further out a resonant probe hardly sees the victim (0.07 at
50 MHz), and in a column survey, whose K the most responsive victim sets, it saw
nothing at all: with a 60 MHz window four victims 50–60 MHz away read "no signal",
while the Stark probe measures them in the column's Stark pass with σ ≈ −59 dB (seed
11; the phase follows the Stark formula to 3–16 % there, and is isotropic in the
field to 4 %). The window must also keep resonant the victims near the first line of
the merged Stark train's comb (1/(32 ns) = 31.25 MHz), where the train would drive
them coherently: 35 MHz does.

Amplification: the train repeats the pulse K times, each pulse's tones advanced in phase
so that the leaked drive adds in phase at the transition a reference victim watches, and
with a spacing at which every other resonant victim's detuning from it slips by whole
cycles (:attr:`ColumnProbe.phase_step_rad`): the rotation of each grows like K·|w| and
its signal near the null like K²|w|², all in the same shots.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property, lru_cache
from typing import Literal

import numpy as np

from xtalkcal.hardware import Chip, Counts, Envelope, Timeline, Tone, envelope_values, pulse_area_ns

__all__ = [
    "Method",
    "MethodWindows",
    "choose_method",
    "PulseShape",
    "ColumnProbe",
    "ProbeSignals",
    "pi_pulse_amplitude",
    "spectral_weight",
    "TWO_PHOTON_WINDOW_GHZ",
    "two_photon_detuning_ghz",
    "near_two_photon",
]

Method = Literal["leakage", "rotation", "stark"]
METHODS: tuple[str, ...] = ("leakage", "rotation", "stark")


@dataclass(frozen=True)
class MethodWindows:
    """Detuning windows (GHz) that pick a method from the frequency plan."""

    leakage_window_ghz: float = 0.035
    rotation_window_ghz: float = 0.035


def choose_method(chip: Chip, aggressor_line: str, victim: str,
                  windows: MethodWindows = MethodWindows()) -> Method:
    """The method for a pair, from the chip's frequency plan alone (module docstring)."""
    f = chip.qubit(chip.line(aggressor_line).qubit).f01_ghz
    q = chip.qubit(victim)
    d12, d01 = abs(f - q.f12_ghz), abs(f - q.f01_ghz)
    eps = 1e-9  # a detuning on the window's edge counts as inside (round-off of f)
    if d12 <= windows.leakage_window_ghz + eps and d12 <= d01:
        return "leakage"
    if d01 <= windows.rotation_window_ghz + eps:
        return "rotation"
    return "stark"


#: Window (GHz) on |f_j − (f01 + f12)/2| within which an aggressor tone counts as near
#: the victim's two-photon 0–2 resonance (20 MHz: common practice, a design choice).
TWO_PHOTON_WINDOW_GHZ = 0.02


def two_photon_detuning_ghz(chip: Chip, aggressor_line: str, victim: str) -> float:
    """f_j − (f01 + f12)/2: the aggressor's offset from the victim's 0–2 two-photon line.

    Two photons at f_j drive |0⟩ → |2⟩ through |1⟩ (detuned by about α/2) when 2·f_j =
    f02; the effective Rabi rate is Ω01·Ω12/(2Δ) = √2·Ω²/|α| (adiabatic elimination of
    |1⟩; e.g. Brion, Pedersen and Mølmer, J. Phys. A 40, 1033 (2007)), so the |2⟩
    population it pumps grows as |w|⁴ with the field w, and its phase turns twice as
    fast as the drive's.
    """
    f = chip.qubit(chip.line(aggressor_line).qubit).f01_ghz
    return f - chip.qubit(victim).f02_half_ghz


def near_two_photon(chip: Chip, aggressor_line: str, victim: str,
                    window_ghz: float = TWO_PHOTON_WINDOW_GHZ) -> bool:
    """Whether the pair sits within ``window_ghz`` of the victim's two-photon 0–2 line."""
    return abs(two_photon_detuning_ghz(chip, aggressor_line, victim)) <= window_ghz + 1e-9


@dataclass(frozen=True)
class PulseShape:
    """The pulse of the probes: Gaussian of ``sigma_ns``, ``duration_ns`` long."""

    duration_ns: float = 32.0
    sigma_ns: float = 8.0

    @property
    def envelope(self) -> Envelope:
        return Envelope("gaussian", sigma_ns=self.sigma_ns)

    @property
    def area_ns(self) -> float:
        return pulse_area_ns(self.envelope, self.duration_ns)


def pi_pulse_amplitude(chip: Chip, qubit: str, shape: PulseShape, angle: float = math.pi) -> float:
    """Amplitude of a rotation by ``angle`` on ``qubit`` from the nominal line gain."""
    rabi_ghz = chip.line_of(qubit).rabi_mhz * 1e-3
    return angle / (2 * math.pi * rabi_ghz * shape.area_ns)


#: Largest phase slip per pulse (rad) at which a resonant victim counts as amplified
#: coherently: 0.2 % of a cycle keeps 100 pulses within 6 % of K-fold (|Σ e^{ikε}|/K).
COHERENT_SLIP_RAD = 2 * math.pi * 0.002
#: Longest pulse spacing tried for making several resonant victims coherent at once, in
#: multiples of the shortest (longer spacings lengthen the train for the same K).
LONGEST_SPACING_FACTOR = 4.0


def _slip_rad(spacing_ns: float, detuning_ghz: float) -> float:
    """Phase slip per pulse (rad, in [0, π]) of a drive ``detuning_ghz`` off at ``spacing_ns``."""
    cycles = spacing_ns * detuning_ghz
    return abs(2 * math.pi * (cycles - round(cycles)))


def _common_spacing(base_ns: float, detunings_ghz: list[float]) -> float:
    """Shortest spacing ≥ ``base_ns`` at which every detuning slips ≤ COHERENT_SLIP_RAD.

    Candidates are the whole-cycle spacings n/|δ| of each detuning up to
    LONGEST_SPACING_FACTOR × ``base_ns``; if none suits them all, the one with the
    smallest worst slip (the victims that still slip are then amplified less, and the
    calibration nulls them in passes of their own).
    """
    top = LONGEST_SPACING_FACTOR * base_ns
    cands = {base_ns}
    for d in detunings_ghz:
        if abs(d) * top >= 1:
            n0 = max(1, math.ceil(base_ns * abs(d) - 1e-9))
            cands.update(n / abs(d) for n in range(n0, int(top * abs(d)) + 1))
    worst = {t: max((_slip_rad(t, d) for d in detunings_ghz), default=0.0) for t in cands}
    good = [t for t in cands if worst[t] <= COHERENT_SLIP_RAD]
    return min(good) if good else min(cands, key=lambda t: (worst[t], t))


#: Smallest spectral weight a probe's choice of K assumes (see
#: :meth:`ColumnProbe.expected_rotation_per_pulse`).
WEIGHT_FLOOR = 0.05


@lru_cache(maxsize=1024)
def spectral_weight(shape: PulseShape, detuning_ghz: float) -> float:
    """|∫E(t)e^{i2πΔt}dt| / |∫E(t)dt|: the pulse's drive of a transition Δ away.

    First-order (weak-drive) response of a two-level transition detuned by Δ from the
    pulse's carrier, relative to a resonant one (Fourier transform of the envelope,
    e.g. Vitanov et al., Annu. Rev. Phys. Chem. 52, 763 (2001)). For an untruncated
    Gaussian it is exp(−(2πΔσ)²/2); the 32 ns pulses of 8 ns σ used here (cut at ±2σ)
    give 0.73 at 20 MHz, 0.24 at 40 MHz and 0.07 at 50 MHz.
    """
    t = np.linspace(0.0, shape.duration_ns, 2001)
    e = envelope_values(shape.envelope, shape.duration_ns, t)
    drive = np.trapezoid(e * np.exp(2j * np.pi * detuning_ghz * t), t)
    return float(abs(drive) / abs(np.trapezoid(e, t)))


@dataclass(frozen=True)
class ProbeSignals:
    """Error signals of a batch of probe points.

    Attributes
    ----------
    signal, stderr : ndarray (n_points, n_victims)
        The isolated error signal per victim (probability, or Stark phase in rad) and its
        standard error.
    shots : ndarray (n_points, n_victims)
        Shots behind each value.
    successes : ndarray (n_points, n_victims)
        For probability signals: shots counted as the error event (else −1).
    common_stderr : ndarray (n_victims,)
        Error shared by every point of the batch (Stark: the reference phase each
        point is referred to; 0 for probability signals). It is not in ``stderr``: a fit
        absorbs it with one offset per batch, and adding it to every point as if it were
        independent would let it bias a fit that spans several batches.
    """

    signal: np.ndarray
    stderr: np.ndarray
    shots: np.ndarray
    successes: np.ndarray
    common_stderr: np.ndarray | None = None


@dataclass(frozen=True)
class ColumnProbe:
    """Timelines and signals for aggressor line ``aggressor`` and its victims.

    Parameters
    ----------
    chip : Chip
    aggressor : str
        Aggressor line name.
    victims : sequence of str
        Victim qubits, probed in the same shots.
    methods : sequence of Method, optional
        Per victim; default from :func:`choose_method`.
    amplitude : float
        Peak amplitude of the aggressor pulses (fraction of full scale).
    repeats : int
        K, number of aggressor pulses.
    shape : PulseShape
    gap_ns : float
        Minimum idle time between pulses (ns).
    fixed : tuple of (line, complex amplitude)
        Cancellation tones already found for other victims of this aggressor, played
        with every aggressor pulse at a fixed setting (their leak onto this pass's
        victims is then part of the nulls found, as it will be in use).
    phase_cycle : tuple of float
        Phases (rad) added to the victims' preparation (and Ramsey analysis) pulses,
        one timeline each, counts summed. An imperfect preparation leaves a little
        coherence, and a drive acting on it gives a signal linear in the field w —
        it depends on arg w, not only on |w|, and shifts the apparent null. Cycling the
        preparation phase through 0 and π flips the sign of that term and cancels it
        (measured on the demo chip: a −52 dB bias of the leakage null without it).
    companions : tuple of str
        Qubits (not victims of this probe, not read out for a signal) whose own lines
        play a cancellation tone that varies from point to point: columns
        ``len(victims):`` of the ``z`` given to :meth:`timelines`. A column fit then
        measures how those lines reach the victims (victims nulled in another pass,
        whose tones will play in use, are measured this way instead of being held
        fixed, which would fold their leak into the victims' nulls).
    merged : bool
        Play the K pulses as one flat-top pulse K·duration long with cosine ramps of
        2σ (the amplification of a Stark probe is its drive time; one long pulse
        gives the same accumulated phase with far fewer edges).
    stark_windows_ns : tuple of float
        Per victim (merged trains, Stark victims): length of the victim's Ramsey
        window, centred on the flat top; 0 (or missing) means the whole train. The
        victims of one aggressor differ by two orders of magnitude in how strongly
        their phase responds to a field (the Stark coefficient goes as 1/(Δ(Δ−α))): one
        train long enough for the weakest would carry the strongest far past ±π, so
        each victim's phase is accumulated only over its own window.
    """

    chip: Chip
    aggressor: str
    victims: tuple[str, ...]
    amplitude: float
    repeats: int = 1
    methods: tuple[str, ...] = ()
    shape: PulseShape = field(default_factory=PulseShape)
    gap_ns: float = 4.0
    windows: MethodWindows = field(default_factory=MethodWindows)
    merged: bool = False
    phase_cycle: tuple[float, ...] = (0.0, math.pi)
    fixed: tuple[tuple[str, complex], ...] = ()
    companions: tuple[str, ...] = ()
    stark_windows_ns: tuple[float, ...] = ()

    def __post_init__(self) -> None:
        object.__setattr__(self, "victims", tuple(self.victims))
        object.__setattr__(self, "companions", tuple(self.companions))
        if set(self.companions) & set(self.victims):
            raise ValueError("a companion cannot also be a victim of the probe")
        win = tuple(float(w) for w in self.stark_windows_ns)
        object.__setattr__(self, "stark_windows_ns", win)
        if win and (len(win) != len(self.victims) or not all(w >= 0 for w in win)):
            raise ValueError("stark_windows_ns needs one length ≥ 0 (ns) per victim")
        if any(win) and not self.merged:
            raise ValueError("Stark windows need a merged train")
        if not self.methods:
            object.__setattr__(
                self, "methods",
                tuple(choose_method(self.chip, self.aggressor, v, self.windows)
                      for v in self.victims),
            )
        if len(self.methods) != len(self.victims):
            raise ValueError("one method per victim is needed")
        for m in self.methods:
            if m not in METHODS:
                raise ValueError(f"unknown method {m!r}; accepted: {METHODS}")
        if self.repeats < 1:
            raise ValueError("repeats must be ≥ 1")
        own = self.chip.line(self.aggressor).qubit
        if own in self.victims:
            raise ValueError(f"the aggressor's own qubit {own} cannot be its victim")

    # ---------------------------------------------------------------- geometry
    @property
    def freq_ghz(self) -> float:
        """The aggressor frequency f_j: its own qubit's f01."""
        return self.chip.qubit(self.chip.line(self.aggressor).qubit).f01_ghz

    @cached_property
    def _train_plan(self) -> tuple[float, float, dict[str, float]]:
        """(spacing ns, phase step rad per pulse, phase slip rad per pulse per victim)."""
        f = self.freq_ghz
        detunings = {}
        for v, m in zip(self.victims, self.methods, strict=True):
            q = self.chip.qubit(v)
            if m == "leakage":
                detunings[v] = f - q.f12_ghz
            elif m == "rotation":
                detunings[v] = f - q.f01_ghz
        base = self.shape.duration_ns + self.gap_ns
        if not detunings:
            return base, 0.0, {}
        # The reference: a leakage victim if any (the most sensitive signal), else the
        # first rotation victim. Its phase is advanced exactly; the spacing only has to
        # make the others' detunings from it whole cycles.
        leak = [v for v, m in zip(self.victims, self.methods, strict=True) if m == "leakage"]
        ref = detunings[leak[0] if leak else next(iter(detunings))]
        spacing = _common_spacing(base, [d - ref for d in detunings.values()])
        slips = {v: _slip_rad(spacing, d - ref) for v, d in detunings.items()}
        step = 2 * math.pi * ref * spacing
        return spacing, math.remainder(step, 2 * math.pi), slips

    @property
    def spacing_ns(self) -> float:
        """Pulse spacing (ns): see :attr:`phase_step_rad`."""
        return self._train_plan[0]

    @property
    def phase_step_rad(self) -> float:
        """Phase (rad) added to every tone of pulse k+1 over pulse k.

        In the frame of a resonant victim, pulse k's leaked drive carries the phase
        φ_k − 2π·δ·t_k (δ = f_j − ν, ν the transition it watches; the convention of
        :mod:`xtalkcal.hardware.timeline`). Advancing the phase of all of pulse k's tones
        (aggressor and cancellation alike, so the field at every qubit only gains a
        common phase and every null stays where it is) by 2π·δ_ref·t_k makes one
        reference victim's pulses add up in phase at any spacing; the spacing is then
        chosen so that the other resonant victims' detunings from the reference are
        whole cycles per pulse (``_common_spacing``), and all of them amplify K-fold in
        the same shots.
        """
        return self._train_plan[1]

    def slip_rad(self, victim: str) -> float:
        """Phase slip per pulse (rad) of a resonant victim's leaked drive, in [0, π]."""
        return self._train_plan[2].get(victim, 0.0)

    def coherent(self, victim: str) -> bool:
        """Whether a resonant victim's K pulses add up in phase (its slip ≤ the tolerance)."""
        return victim in self._train_plan[2] and self.slip_rad(victim) <= COHERENT_SLIP_RAD

    @property
    def has_stark(self) -> bool:
        return "stark" in self.methods

    @property
    def quadratures(self) -> tuple[float, ...]:
        return (0.0, math.pi / 2) if self.has_stark else (0.0,)

    def train_start_ns(self) -> float:
        return self.shape.duration_ns + self.gap_ns

    def train_ns(self) -> float:
        """Length of the aggressor train (ns)."""
        if self.merged:
            return self.repeats * self.shape.duration_ns
        return (self.repeats - 1) * self.spacing_ns + self.shape.duration_ns

    def _train_slots(self) -> list[tuple[float, float, Envelope, float]]:
        """(start ns, length ns, envelope, phase rad) of each aggressor pulse."""
        t0 = self.train_start_ns()
        if self.merged:
            ramp = min(2 * self.shape.sigma_ns, 0.5 * self.train_ns())
            return [(t0, self.train_ns(), Envelope("flattop", ramp_ns=ramp), 0.0)]
        env = self.shape.envelope
        step = self.phase_step_rad
        return [(t0 + k * self.spacing_ns, self.shape.duration_ns, env,
                 math.remainder(k * step, 2 * math.pi)) for k in range(self.repeats)]

    def duration_ns(self) -> float:
        """End of the last pulse (readout time)."""
        t = self.train_start_ns() + self.train_ns()
        return t + self.gap_ns + self.shape.duration_ns

    # ---------------------------------------------------------------- timelines
    @property
    def per_point(self) -> int:
        """Timelines per probe point: quadratures × preparation phases."""
        return len(self.quadratures) * len(self.phase_cycle)

    def stark_window(self, victim: str) -> tuple[float, float]:
        """(start, end) in ns of the victim's Ramsey window: between its π/2 pulses."""
        i = self.victims.index(victim)
        w = self.stark_windows_ns[i] if self.stark_windows_ns else 0.0
        t0, length = self.train_start_ns(), self.train_ns()
        if w <= 0 or w >= length:
            return t0 - self.gap_ns, self.duration_ns() - self.shape.duration_ns
        mid = t0 + 0.5 * length
        return mid - 0.5 * w, mid + 0.5 * w

    def stark_gain(self, victim: str) -> float:
        """Stark phase (rad) per |w|² of field at the victim (its own line's units), nominal.

        ``δ = Ω²·α/(2Δ(Δ−α))`` (Krantz et al., Appl. Phys. Rev. 6, 021318, 2019)
        integrated over the train's envelope within the victim's Ramsey window.
        """
        chip = self.chip
        q = chip.qubit(victim)
        g = chip.line_of(victim).rabi_mhz * 1e-3
        d, a = self.freq_ghz - q.f01_ghz, q.anharmonicity_ghz
        coef = a / (2 * d * (d - a))  # δ = Ω²·coef
        lo, hi = self.stark_window(victim)
        e2 = 0.0
        for start, length, env, _ in self._train_slots():
            t = np.linspace(0, length, 4001)
            inside = (t + start >= lo) & (t + start <= hi)
            e2 += float(np.trapezoid(np.abs(envelope_values(env, length, t)) ** 2 * inside, t))
        return abs(2 * np.pi * g * g * coef * e2)

    def _prep_and_analysis(self, theta: float, psi: float = 0.0
                           ) -> tuple[list[Tone], list[Tone]]:
        chip, shape = self.chip, self.shape
        env = shape.envelope
        prep: list[Tone] = []
        post: list[Tone] = []
        for v, m in zip(self.victims, self.methods, strict=True):
            line = chip.line_of(v).name
            f01 = chip.qubit(v).f01_ghz
            if m == "leakage":
                a = pi_pulse_amplitude(chip, v, shape)
                prep.append(Tone(line, 0.0, shape.duration_ns, f01, a, psi, env))
            elif m == "stark":
                a = pi_pulse_amplitude(chip, v, shape, math.pi / 2)
                lo, hi = self.stark_window(v)
                prep.append(Tone(line, lo - shape.duration_ns, shape.duration_ns, f01, a, psi,
                                 env))
                post.append(Tone(line, hi, shape.duration_ns, f01, a, theta + psi, env))
        return prep, post

    def timelines(self, z: np.ndarray, *, aggressor_on: bool = True,
                  label: str = "") -> list[Timeline]:
        """Timelines for cancellation settings ``z`` (n_points, n_victims + n_companions).

        Each point yields one timeline per Ramsey quadrature (one or two), ordered
        point-major. With ``aggressor_on=False`` the aggressor pulses are left out
        (cancellation tones still play).
        """
        z = np.atleast_2d(np.asarray(z, dtype=complex))
        width = len(self.victims) + len(self.companions)
        if z.shape[1] != width:
            raise ValueError(f"z must have {width} columns, got {z.shape}")
        chip = self.chip
        f = self.freq_ghz
        slots = self._train_slots()
        lines = [chip.line_of(v).name for v in self.victims + self.companions]
        readout = tuple(self.victims) + (chip.line(self.aggressor).qubit,)
        out: list[Timeline] = []
        for p in range(z.shape[0]):
            for theta, psi in [(t, c) for t in self.quadratures for c in self.phase_cycle]:
                prep, post = self._prep_and_analysis(theta, psi)
                train: list[Tone] = []
                for start, length, env, ph in slots:
                    if aggressor_on and self.amplitude > 0:
                        train.append(Tone(self.aggressor, start, length, f,
                                          self.amplitude, ph, env))
                    for line, zz in list(zip(lines, z[p], strict=True)) + list(self.fixed):
                        if zz != 0:
                            train.append(Tone(line, start, length, f, abs(zz),
                                              math.atan2(zz.imag, zz.real) + ph, env))
                out.append(Timeline(tuple(prep + train + post), readout,
                                    readout_ns=self.duration_ns(),
                                    label=f"{label}p{p}q{theta:.3f}c{psi:.3f}"))
        return out

    def reference_timelines(self, label: str = "ref") -> list[Timeline]:
        """The same sequence with no aggressor and no cancellation (Stark reference)."""
        width = len(self.victims) + len(self.companions)
        return self.timelines(np.zeros((1, width)), aggressor_on=False, label=label)

    # ---------------------------------------------------------------- signals
    def signals(self, counts: Counts, n_points: int,
                reference: Counts | None = None) -> ProbeSignals:
        """Error signal per point and victim from the counts of :meth:`timelines`.

        ``reference`` holds the counts of :meth:`reference_timelines` (needed for Stark).
        """
        nq = len(self.quadratures)
        ncyc = len(self.phase_cycle)
        if counts.counts.shape[0] != n_points * nq * ncyc:
            raise ValueError("counts do not match the number of points")
        shots = counts.shots
        nv = len(self.victims)
        sig = np.zeros((n_points, nv))
        err = np.zeros((n_points, nv))
        nshots = np.zeros((n_points, nv), dtype=np.int64)
        succ = np.full((n_points, nv), -1, dtype=np.int64)
        common = np.zeros(nv)
        for iv, (v, m) in enumerate(zip(self.victims, self.methods, strict=True)):
            c = counts.of(v).reshape(n_points, nq, ncyc, -1).sum(axis=2)
            if m in ("leakage", "rotation"):
                level = 2 if m == "leakage" else 1
                k = c[:, :, level].sum(axis=1)
                n = shots * nq * ncyc
                p = k / n
                sig[:, iv] = p
                # standard error with a pseudo-count so that p = 0 still has a width
                pp = (k + 0.5) / (n + 1.0)
                err[:, iv] = np.sqrt(pp * (1 - pp) / n)
                nshots[:, iv] = n
                succ[:, iv] = k
            else:
                if reference is None:
                    raise ValueError("the Stark method needs the reference counts")
                phi, dphi = _ramsey_phase(c, shots * ncyc)
                r = reference.of(v).reshape(1, nq, ncyc, -1).sum(axis=2)
                phi0, dphi0 = _ramsey_phase(r, reference.shots * ncyc)
                sign = self._stark_sign(v)
                d = sign * np.angle(np.exp(1j * (phi - phi0)))
                # With the sign of δ = Ω²α/(2Δ(Δ−α)) taken out, the Stark phase is ≥ 0
                # for any field (it vanishes only at the null): a reading below −π/2 is
                # a phase that went past π, so readings are unwrapped onto [−π/2, 3π/2).
                # That doubles the range a ring can span around a strong, sensitive null
                # (or with the other victims' rings leaking in) before readings alias.
                sig[:, iv] = np.where(d < -np.pi / 2, d + 2 * np.pi, d)
                err[:, iv] = dphi
                common[iv] = float(dphi0[0])
                nshots[:, iv] = shots * nq * ncyc
        return ProbeSignals(sig, err, nshots, succ, common)

    def _stark_sign(self, victim: str) -> float:
        """Sign of the Stark shift δ = Ω²α/(2Δ(Δ−α)) times the train's phase convention."""
        q = self.chip.qubit(victim)
        delta = self.freq_ghz - q.f01_ghz
        alpha = q.anharmonicity_ghz
        s = math.copysign(1.0, alpha / (delta * (delta - alpha)))
        # A positive frequency shift makes the Ramsey phase measured by _ramsey_phase
        # decrease (the victim's frame is fixed at its nominal f01), hence the minus.
        return -s

    def expected_rotation_per_pulse(self, victim: str, crosstalk_db: float) -> float:
        """Rough rotation (rad) of one aggressor pulse at ``victim`` for a given |X|.

        The resonant rotation 2π·λ·Ω·|X|·a·(pulse area) (λ = √2 on the 1–2 transition),
        times the pulse's spectral weight at the victim's detuning from it
        (:func:`spectral_weight`): a victim 50 MHz away turns by 0.07 of that with the
        demo protocol's pulses, and a probe that took it for resonant would pick a K
        far too low. Never below ``WEIGHT_FLOOR``: near the spectrum's zeros the
        first-order weight is no guide (measured on the simulator at 60 MHz: 0.003–0.03
        against 0.006), and a K chosen from it could wrap the signal.
        """
        rabi = self.chip.line_of(victim).rabi_mhz * 1e-3
        method = dict(zip(self.victims, self.methods, strict=True))[victim]
        q = self.chip.qubit(victim)
        lam, nu = (math.sqrt(2.0), q.f12_ghz) if method == "leakage" else (1.0, q.f01_ghz)
        return 2 * math.pi * lam * rabi * self.amplitude * 10 ** (crosstalk_db / 20) * (
            self.shape.area_ns) * max(spectral_weight(self.shape, self.freq_ghz - nu),
                                      WEIGHT_FLOOR)


def _ramsey_phase(c: np.ndarray, shots: int) -> tuple[np.ndarray, np.ndarray]:
    """Ramsey phase (rad) and its standard error from quadrature counts (n, 2, levels).

    P1(θ) = ½(1 − cos(Φ − θ)) for the π/2–wait–π/2(θ) sequence, so with
    x = 1 − 2·P1(0) = cos Φ and y = 1 − 2·P1(π/2) = sin Φ, Φ = atan2(y, x).
    """
    n = float(shots)
    p0 = c[:, 0, 1:].sum(axis=-1) / n  # anything but |0⟩ counts as "excited"
    p1 = c[:, 1, 1:].sum(axis=-1) / n
    x = 1 - 2 * p0
    y = 1 - 2 * p1
    phi = np.arctan2(y, x)
    r2 = np.maximum(x * x + y * y, 1e-6)
    # Var(x) = 4 p(1-p)/n; propagate through atan2.
    vx = 4 * np.clip(p0 * (1 - p0), 1e-6, None) / n
    vy = 4 * np.clip(p1 * (1 - p1), 1e-6, None) / n
    dphi = np.sqrt((y * y * vx + x * x * vy) / (r2 * r2))
    return phi, dphi
