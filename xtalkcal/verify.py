"""Proof that compensation works: simultaneous randomized benchmarking.

Single-qubit Clifford group
---------------------------
The 24 single-qubit Cliffords are built from the primitives ``I`` (one idle slot),
``X``, ``Y`` (π rotations) and ``±X/2``, ``±Y/2`` (π/2 rotations), with the common
decomposition (listed in time order, first gate first; common practice, as used for
example by Barends et al., Nature 508, 500 (2014)):

=================  ==========================================================
class              decompositions
=================  ==========================================================
Paulis             I;  X;  Y;  Y·X
2π/3 rotations     X/2·Y/2;  X/2·−Y/2;  −X/2·Y/2;  −X/2·−Y/2;
                   Y/2·X/2;  Y/2·−X/2;  −Y/2·X/2;  −Y/2·−X/2
π/2 rotations      X/2;  −X/2;  Y/2;  −Y/2;  −X/2·Y/2·X/2;  −X/2·−Y/2·X/2
Hadamard-like      X·Y/2;  X·−Y/2;  Y·X/2;  Y·−X/2;  X/2·Y/2·X/2;  −X/2·Y/2·−X/2
=================  ==========================================================

45 primitives for 24 Cliffords (the identity counts as one idle slot), so
1.875 primitives per Clifford on average.

Primitive pulses
----------------
Each primitive is one DRAG tone on the qubit's own line at its nominal f01: in-phase
amplitude from :func:`xtalkcal.probes.pi_pulse_amplitude` (nominal gain), rotation
axis from the tone phase. With ``Ω = Ω₀·e^{iφ}·E`` and the field term
``½Ω·a† + h.c.`` of :mod:`xtalkcal.timeline`, the qubit-subspace Hamiltonian on
resonance is ``H/h = ½|Ω|(cos φ·σx + sin φ·σy)``, because a† = (σx − iσy)/2 on
{|0⟩, |1⟩}. Hence φ = 0 rotates about +x and φ = π/2 about +y, with
``U = exp(−iθ/2·n·σ)``, θ = 2π∫|Ω|dt.

DRAG coefficient (our convention)
---------------------------------
With the drive at f01, the 1–2 transition sits at detuning α = f12 − f01 (< 0) in the
qubit frame. To first order in the drive the amplitude leaked into |2⟩ from |1⟩ is
``∝ ∫ Ω(t)·e^{i2παt} dt``. For ``E = g + iβ·dg/dτ`` integration by parts gives
``G(ω)·(1 + βω)`` with ω = 2πα, so leakage vanishes for

    β_leak = −1/(2πα)      (ns; positive for a transmon, α < 0)

— the first-order condition of Motzoi et al., PRL 103, 110501 (2009), ε_y = −ε̇_x/Δ,
written for our sign convention. That pulse keeps an AC-Stark phase error of order
Ω²/α in the qubit subspace (Motzoi et al. cancel it with a time-dependent detuning,
which a tone at a fixed frequency cannot do). Without the detuning, the quadrature
coefficient that cancels the first-order phase error instead is

    β_phase = (λ²/4)·β_leak = −1/(4πα)   (λ = √2, Duffing ladder)

(the "Y-only" first-order solution; from memory after Gambetta, Motzoi, Merkel and
Wilhelm, PRA 83, 012308 (2011), and checked numerically in the tests: it leaves ~1/4
of the β = 0 leakage but removes >99 % of the β = 0 gate error, whereas β_leak removes the
leakage and none of the phase error). Randomized benchmarking is sensitive to every
error, so ``drag="phase"`` is the default of :class:`GateSet`; ``"leakage"`` and
``"off"`` are offered for comparison.

Simultaneous and isolated benchmarking
--------------------------------------
Every qubit of a set plays its own independent random Clifford sequence (plus the
recovery Clifford that returns the ideal sequence to |0⟩) in lock-step slots of one
common duration; sequences are right-aligned so that every qubit finishes at the common
readout (a qubit with fewer primitives idles in |0⟩ first, where T1 and dephasing do
nothing). Isolated benchmarking plays the same sequences with only one qubit active
and the same readout time. Survival P(0) against the number of Cliffords m is fitted
to ``A·p^m + B`` (Magesan, Gambetta and Emerson, PRL 106, 180504 (2011)); the error
per Clifford is ``r = (1 − p)/2`` (d = 2) and the error per gate ``r/1.875``. With
leakage out of the qubit subspace the decay is not the depolarising one that the
d = 2 formula assumes, so r is then an *effective* figure. The difference between
simultaneous and isolated errors is the crosstalk error of Gambetta et al., PRL 109,
240504 (2012) (here measured qubit by qubit on the marginal survivals).
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from functools import lru_cache
from types import MappingProxyType
from typing import Literal

import numpy as np
import xarray as xr
from scipy.optimize import OptimizeWarning, curve_fit

from xtalkcal.chip import Chip
from xtalkcal.exceptions import FitInputError, TimelineError
from xtalkcal.probes import PulseShape, pi_pulse_amplitude
from xtalkcal.rig import Counts, Rig
from xtalkcal.sweep import BatchRunner
from xtalkcal.timeline import Envelope, Timeline, Tone

__all__ = [
    "DriveTrim",
    "own_drive_trims",
    "PRIMITIVES",
    "CLIFFORD_DECOMPOSITIONS",
    "PRIMITIVES_PER_CLIFFORD",
    "DragCondition",
    "rotation_unitary",
    "CliffordGroup",
    "clifford_group",
    "drag_coefficient_ns",
    "GateSet",
    "RBSequences",
    "draw_sequences",
    "rb_timelines",
    "Transform",
    "run_rb",
    "RBFit",
    "fit_rb_decay",
    "fit_rb",
    "coherence_limited_error_per_gate",
    "readout_offsets",
    "QubitComparison",
    "SimultaneousRBReport",
    "simultaneous_rb",
]

DragCondition = Literal["phase", "leakage", "off"]
Transform = Callable[[Timeline], Timeline]

# name -> (rotation angle θ, tone phase φ); "I" is an idle slot.
PRIMITIVES: Mapping[str, tuple[float, float]] = MappingProxyType({
    "I": (0.0, 0.0),
    "X": (math.pi, 0.0),
    "Y": (math.pi, math.pi / 2),
    "X/2": (math.pi / 2, 0.0),
    "-X/2": (math.pi / 2, math.pi),
    "Y/2": (math.pi / 2, math.pi / 2),
    "-Y/2": (math.pi / 2, -math.pi / 2),
})

CLIFFORD_DECOMPOSITIONS: tuple[tuple[str, ...], ...] = (
    # Paulis
    ("I",), ("X",), ("Y",), ("Y", "X"),
    # 2π/3 rotations about the body diagonals
    ("X/2", "Y/2"), ("X/2", "-Y/2"), ("-X/2", "Y/2"), ("-X/2", "-Y/2"),
    ("Y/2", "X/2"), ("Y/2", "-X/2"), ("-Y/2", "X/2"), ("-Y/2", "-X/2"),
    # π/2 rotations about x, y, z
    ("X/2",), ("-X/2",), ("Y/2",), ("-Y/2",), ("-X/2", "Y/2", "X/2"), ("-X/2", "-Y/2", "X/2"),
    # Hadamard-like: π rotations about face diagonals
    ("X", "Y/2"), ("X", "-Y/2"), ("Y", "X/2"), ("Y", "-X/2"), ("X/2", "Y/2", "X/2"),
    ("-X/2", "Y/2", "-X/2"),
)

PRIMITIVES_PER_CLIFFORD: float = sum(len(d) for d in CLIFFORD_DECOMPOSITIONS) / len(
    CLIFFORD_DECOMPOSITIONS)

_SX = np.array([[0, 1], [1, 0]], dtype=complex)
_SY = np.array([[0, -1j], [1j, 0]], dtype=complex)


def rotation_unitary(angle: float, phase: float) -> np.ndarray:
    """exp(−iθ/2·(cos φ·σx + sin φ·σy)) on {|0⟩, |1⟩} (module docstring).

    Parameters
    ----------
    angle : float
        Rotation angle θ (rad).
    phase : float
        Tone phase φ (rad) that sets the axis in the equatorial plane.
    """
    n = math.cos(phase) * _SX + math.sin(phase) * _SY
    return math.cos(angle / 2) * np.eye(2) - 1j * math.sin(angle / 2) * n


def _sequence_unitary(names: Sequence[str]) -> np.ndarray:
    u = np.eye(2, dtype=complex)
    for name in names:  # time order: later gates multiply from the left
        u = rotation_unitary(*PRIMITIVES[name]) @ u
    return u


def _canonical(u: np.ndarray) -> np.ndarray:
    """The unitary with its global phase removed (largest element real positive)."""
    flat = u.ravel()
    k = int(np.argmax(np.abs(flat) > 0.5 * np.abs(flat).max()))
    return u * (abs(flat[k]) / flat[k])


@dataclass(frozen=True)
class CliffordGroup:
    """The 24 single-qubit Cliffords with their multiplication and inverse tables.

    Attributes
    ----------
    unitaries : ndarray (24, 2, 2)
        One representative per element (global phase removed).
    compose : ndarray of int (24, 24)
        ``compose[a, b]`` is the index of "a, then b" (unitary U_b·U_a).
    inverse : ndarray of int (24,)
    """

    unitaries: np.ndarray
    compose: np.ndarray
    inverse: np.ndarray

    def index(self, u: np.ndarray, *, atol: float = 1e-9) -> int:
        """Index of the element equal to ``u`` up to a global phase.

        Raises
        ------
        TimelineError
            If ``u`` is not a Clifford (a ValueError).
        """
        c = _canonical(np.asarray(u, dtype=complex))
        d = np.abs(self.unitaries - c[None]).reshape(len(self.unitaries), -1).max(axis=1)
        k = int(np.argmin(d))
        if d[k] > atol:
            raise TimelineError("the unitary is not a single-qubit Clifford")
        return k

    def product(self, indices: Sequence[int]) -> int:
        """Index of the sequence (time order) of elements."""
        acc = 0  # identity
        for k in indices:
            acc = int(self.compose[acc, k])
        return acc


@lru_cache(maxsize=1)
def clifford_group() -> CliffordGroup:
    """The group from :data:`CLIFFORD_DECOMPOSITIONS` (tables built once)."""
    us = np.array([_canonical(_sequence_unitary(d)) for d in CLIFFORD_DECOMPOSITIONS])
    n = len(us)
    proto = CliffordGroup(us, np.zeros((n, n), int), np.zeros(n, int))
    comp = np.array([[proto.index(us[b] @ us[a], atol=1e-6) for b in range(n)]
                     for a in range(n)])
    inv = np.array([int(np.flatnonzero(comp[a] == 0)[0]) for a in range(n)])
    for arr in (us, comp, inv):
        arr.setflags(write=False)
    return CliffordGroup(us, comp, inv)


def drag_coefficient_ns(anharmonicity_ghz: float, condition: DragCondition = "phase", *,
                        ladder_ratio_sq: float = 2.0) -> float:
    """DRAG coefficient β (ns) for E = g + iβ·dg/dτ in our phase convention.

    Parameters
    ----------
    anharmonicity_ghz : float
        α = f12 − f01 (GHz), negative for a transmon.
    condition : {"phase", "leakage", "off"}
        ``"leakage"``: β = −1/(2πα), the first-order leakage null (Motzoi et al., PRL
        103, 110501 (2009)); ``"phase"``: β = −(λ²/4)/(2πα), the first-order null of the
        phase error without a detuning (module docstring); ``"off"``: 0.
    ladder_ratio_sq : float
        λ² = |⟨2|a†|1⟩|²/|⟨1|a†|0⟩|², 2 for the Duffing (harmonic-ladder) transmon.

    Returns
    -------
    float
        β (ns); positive for α < 0.
    """
    if condition == "off":
        return 0.0
    if not (math.isfinite(anharmonicity_ghz) and anharmonicity_ghz != 0):
        raise TimelineError(
            f"anharmonicity must be finite and non-zero, got {anharmonicity_ghz!r} GHz")
    beta_leak = -1.0 / (2 * math.pi * anharmonicity_ghz)
    if condition == "leakage":
        return beta_leak
    if condition == "phase":
        return ladder_ratio_sq / 4.0 * beta_leak
    raise TimelineError(
        f"unknown DRAG condition {condition!r}; accepted: 'phase', 'leakage', 'off'")


@dataclass(frozen=True)
class GateSet:
    """How primitives become tones.

    Parameters
    ----------
    shape : PulseShape
        Gaussian of the primitives (default that of the probes: 32 ns long, σ = 8 ns).
    gap_ns : float
        Idle time after each pulse within a slot (ns).
    drag : {"phase", "leakage", "off"}
        Which DRAG condition sets β (:func:`drag_coefficient_ns`).
    """

    shape: PulseShape = PulseShape()
    gap_ns: float = 0.0
    drag: DragCondition = "phase"

    @property
    def slot_ns(self) -> float:
        """Duration of one primitive slot (ns)."""
        return self.shape.duration_ns + self.gap_ns

    def drag_ns(self, chip: Chip, qubit: str) -> float:
        """β (ns) for ``qubit`` from the chip's anharmonicity (f12 − f01)."""
        q = chip.qubit(qubit)
        return drag_coefficient_ns(q.f12_ghz - q.f01_ghz, self.drag)

    def tone(self, chip: Chip, qubit: str, primitive: str, start_ns: float) -> Tone | None:
        """The tone of one primitive on ``qubit``'s own line (None for the idle)."""
        angle, phase = PRIMITIVES[primitive]
        if angle == 0:
            return None
        env = Envelope("drag", sigma_ns=self.shape.sigma_ns, drag_ns=self.drag_ns(chip, qubit))
        amp = pi_pulse_amplitude(chip, qubit, self.shape, angle)
        return Tone(chip.line_of(qubit).name, start_ns, self.shape.duration_ns,
                    chip.qubit(qubit).f01_ghz, amp, phase, env)


@dataclass(frozen=True)
class RBSequences:
    """Random Clifford sequences, one independent sequence per qubit and draw.

    Attributes
    ----------
    qubits : tuple of str
    lengths : tuple of int
        Numbers of random Cliffords m (the recovery Clifford comes on top).
    cliffords : tuple
        ``cliffords[l][s][q]`` is the tuple of m + 1 Clifford indices (the last is the
        recovery) of length ``lengths[l]``, draw ``s``, qubit ``qubits[q]``.
    """

    qubits: tuple[str, ...]
    lengths: tuple[int, ...]
    cliffords: tuple[tuple[tuple[tuple[int, ...], ...], ...], ...]

    @property
    def n_sequences(self) -> int:
        return len(self.cliffords[0])

    def primitives(self, length_index: int, draw: int, qubit: str) -> tuple[str, ...]:
        """Primitive names, in time order, of one qubit's sequence."""
        q = self.qubits.index(qubit)
        return tuple(p for c in self.cliffords[length_index][draw][q]
                     for p in CLIFFORD_DECOMPOSITIONS[c])

    def n_slots(self, length_index: int, draw: int) -> int:
        """Slots of the longest qubit sequence of one draw."""
        return max(len(self.primitives(length_index, draw, q)) for q in self.qubits)

    def subset(self, qubits: Sequence[str]) -> RBSequences:
        """The same draws restricted to some of the qubits."""
        idx = [self.qubits.index(q) for q in qubits]
        cl = tuple(tuple(tuple(draw[i] for i in idx) for draw in per_len)
                   for per_len in self.cliffords)
        return RBSequences(tuple(qubits), self.lengths, cl)


def draw_sequences(qubits: Sequence[str], lengths: Sequence[int], n_sequences: int, *,
                   rng=None) -> RBSequences:
    """Independent uniformly random Clifford sequences with their recovery Clifford.

    Parameters
    ----------
    qubits : sequence of str
    lengths : sequence of int
        Numbers of random Cliffords m ≥ 0.
    n_sequences : int
        Random draws per length.
    rng : int, Generator or None
    """
    rng = np.random.default_rng(rng)
    if n_sequences < 1:
        raise TimelineError(f"n_sequences must be ≥ 1, got {n_sequences}")
    if not qubits or len(set(qubits)) != len(qubits):
        raise TimelineError(f"qubits must be a non-empty list of distinct names, got {qubits!r}")
    lengths = tuple(int(m) for m in lengths)
    if any(m < 0 for m in lengths):
        raise TimelineError(f"sequence lengths must be ≥ 0, got {lengths}")
    group = clifford_group()
    out = []
    for m in lengths:
        per_len = []
        for _ in range(n_sequences):
            draw = []
            for _q in qubits:
                seq = [int(c) for c in rng.integers(0, 24, size=m)]
                seq.append(int(group.inverse[group.product(seq)]))
                draw.append(tuple(seq))
            per_len.append(tuple(draw))
        out.append(tuple(per_len))
    return RBSequences(tuple(qubits), lengths, tuple(out))


def rb_timelines(chip: Chip, sequences: RBSequences, gates: GateSet = GateSet(), *,
                 playing: Sequence[str] | None = None, readout: Sequence[str] | None = None,
                 label: str = "rb") -> list[Timeline]:
    """Timelines of all draws, ordered length-major then draw.

    Parameters
    ----------
    chip : Chip
    sequences : RBSequences
    gates : GateSet
    playing : sequence of str, optional
        Qubits whose sequences are played (default all; one qubit for isolated RB).
        The slot grid and the readout time are those of *all* qubits of ``sequences``,
        so isolated and simultaneous runs differ only by the tones of the others.
    readout : sequence of str, optional
        Qubits read (default ``playing``).
    """
    playing = tuple(sequences.qubits if playing is None else playing)
    for q in playing:
        if q not in sequences.qubits:
            raise TimelineError(f"qubit {q!r} has no sequence; known: {sequences.qubits}")
    readout = tuple(playing if readout is None else readout)
    slot = gates.slot_ns
    cache: dict[tuple[str, str, float], Tone | None] = {}
    out = []
    for li, m in enumerate(sequences.lengths):
        for s in range(sequences.n_sequences):
            n_slots = sequences.n_slots(li, s)
            tones = []
            for q in playing:
                prims = sequences.primitives(li, s, q)
                first = n_slots - len(prims)  # right-aligned: idle in |0⟩ first
                for k, p in enumerate(prims):
                    t0 = (first + k) * slot
                    key = (q, p, t0)
                    if key not in cache:
                        cache[key] = gates.tone(chip, q, p, t0)
                    if cache[key] is not None:
                        tones.append(cache[key])
            out.append(Timeline(tuple(tones), readout, readout_ns=n_slots * slot,
                                label=f"{label}-m{m}-s{s}"))
    return out


def _survival(counts: Counts, qubit: str) -> np.ndarray:
    return counts.of(qubit)[:, 0] / float(counts.shots)


def run_rb(rig: Rig, sequences: RBSequences, *, gates: GateSet = GateSet(),
           mode: Literal["simultaneous", "isolated"] = "simultaneous",
           transform: Transform | None = None, shots: int = 2000,
           runner: BatchRunner | None = None, key: str = "rb") -> xr.Dataset:
    """Play the sequences and return survival probabilities.

    Parameters
    ----------
    rig : Rig
    sequences : RBSequences
    gates : GateSet
    mode : {"simultaneous", "isolated"}
        All qubits together, or each qubit alone (same sequences, same timing).
    transform : callable, optional
        Applied to every timeline before it runs (e.g. a compensation applicator).
    shots : int
        Shots per timeline.
    runner : BatchRunner, optional
        For a record on disk and resumption; by default a runner without a record.
    key : str
        Prefix of the batch keys in the runner's record.

    Returns
    -------
    xarray.Dataset
        ``survival`` (qubit, length, draw): fraction of shots read as 0 (dimensionless);
        attrs: ``victim_timelines`` (simulated victim-timeline count: timelines × qubits
        read), ``wall_s``, ``mode``, ``shots``, ``slot_ns``.
    """
    if mode not in ("simultaneous", "isolated"):
        raise TimelineError(f"mode must be 'simultaneous' or 'isolated', got {mode!r}")
    runner = runner or BatchRunner(rig)
    chip = rig.chip
    nq, nl, ns = len(sequences.qubits), len(sequences.lengths), sequences.n_sequences
    surv = np.zeros((nq, nl, ns))
    victims = 0
    t0 = time.perf_counter()
    groups = ([tuple(sequences.qubits)] if mode == "simultaneous"
              else [(q,) for q in sequences.qubits])
    for group in groups:
        tls = rb_timelines(chip, sequences, gates, playing=group, label=key)
        if transform is not None:
            tls = [transform(t) for t in tls]
        for li in range(nl):
            batch = tls[li * ns:(li + 1) * ns]
            bkey = f"{key}-{mode}-{'_'.join(group) if mode == 'isolated' else 'all'}-l{li}"
            counts = runner.run(bkey, batch, shots)
            victims += len(batch) * len(counts.qubits)
            for q in group:
                surv[sequences.qubits.index(q), li, :] = _survival(counts, q)
    wall = time.perf_counter() - t0
    return xr.Dataset(
        {"survival": (("qubit", "length", "draw"), surv,
                      {"units": "1", "long_name": "survival probability P(0)"})},
        coords={"qubit": list(sequences.qubits),
                "length": ("length", list(sequences.lengths),
                           {"units": "Cliffords", "long_name": "sequence length m"}),
                "draw": np.arange(ns)},
        attrs={"mode": mode, "shots": int(shots), "slot_ns": gates.slot_ns,
               "drag": gates.drag, "compensated": int(transform is not None),
               "victim_timelines": int(victims), "wall_s": float(wall),
               "rig": rig.describe()},
    )


# ----------------------------------------------------------------------------- analysis


@dataclass(frozen=True)
class RBFit:
    """Fit of A·p^m + B to survival against sequence length.

    Attributes
    ----------
    p, p_stderr : float
        Depolarising parameter and its standard error (bootstrap over draws).
    amplitude, offset : float
        A and B (dimensionless; B fixed if it was given).
    error_per_clifford, error_per_clifford_stderr : float
        r = (1 − p)/2 (d = 2; effective when there is leakage).
    error_per_gate, error_per_gate_stderr : float
        r / 1.875.
    covariance : ndarray
        Covariance of the fitted parameters (p, A[, B]) from the fit itself.
    converged : bool
    message : str
    n_draws : int
    """

    p: float
    p_stderr: float
    amplitude: float
    offset: float
    error_per_clifford: float
    error_per_clifford_stderr: float
    error_per_gate: float
    error_per_gate_stderr: float
    covariance: np.ndarray = field(repr=False)
    converged: bool
    message: str
    n_draws: int

    def to_dict(self) -> dict:
        d = asdict(self)
        d["covariance"] = self.covariance.tolist()
        return d


def _decay(m, p, a, b):
    return a * p**m + b


def _fit_once(m: np.ndarray, y: np.ndarray, w: np.ndarray | None,
              offset: float | None) -> tuple[np.ndarray, np.ndarray]:
    """(p, A, B) and the covariance of the fitted parameters.

    Unbounded Levenberg–Marquardt first (fast, and the bootstrap calls this hundreds of
    times); the bounded trust-region fit only when that leaves p outside [0, 1].
    """
    span = max(float(m.max() - m.min()), 1.0)
    b0 = offset if offset is not None else min(max(float(y.min()) - 0.05, 0.0), 1.0)
    a0 = max(float(y[np.argmin(m)]) - b0, 1e-3)
    ratio = (float(y[np.argmax(m)]) - b0) / a0
    p0 = min(max(ratio, 1e-3), 1.0 - 1e-9) ** (1.0 / span)
    if offset is None:
        f, start = _decay, (p0, a0, b0)
        lo, hi = [0.0, -1.0, -1.0], [1.0, 2.0, 2.0]
    else:
        f = lambda mm, p, a: _decay(mm, p, a, offset)  # noqa: E731
        start, lo, hi = (p0, a0), [0.0, -1.0], [1.0, 2.0]
    kw = {"sigma": w, "absolute_sigma": w is not None}
    try:
        popt, pcov = curve_fit(f, m, y, p0=start, method="lm", maxfev=5000, **kw)
        ok = 0.0 <= popt[0] <= 1.0
    except RuntimeError:
        ok = False
    if not ok:
        popt, pcov = curve_fit(f, m, y, p0=start, bounds=(lo, hi), maxfev=20000, **kw)
    if offset is None:
        return np.asarray(popt), pcov
    return np.array([popt[0], popt[1], offset]), pcov


def fit_rb_decay(lengths: Sequence[float], survival: np.ndarray, *, offset: float | None = None,
                 n_boot: int = 200, rng=None) -> RBFit:
    """Fit A·p^m + B (Magesan et al., PRL 106, 180504 (2011)) to survivals of many draws.

    Parameters
    ----------
    lengths : sequence of float
        Sequence lengths m (Cliffords), one per row of ``survival``.
    survival : ndarray (n_lengths, n_draws)
        Survival probabilities (dimensionless), one column per random draw.
    offset : float, optional
        Fix the asymptote B (dimensionless); free by default.
    n_boot : int
        Bootstrap resamples of the draws (per length) for the standard errors; 0 uses
        the fit covariance instead.
    rng : int, Generator or None
        Randomness of the bootstrap.

    Returns
    -------
    RBFit

    Raises
    ------
    FitInputError
        For mismatched shapes, non-finite values or too few lengths.
    """
    rng = np.random.default_rng(rng)
    m = np.asarray(lengths, dtype=float)
    y = np.asarray(survival, dtype=float)
    if y.ndim == 1:
        y = y[:, None]
    if y.shape[0] != m.size:
        raise FitInputError(f"survival has {y.shape[0]} rows for {m.size} lengths")
    if not (np.all(np.isfinite(y)) and np.all(np.isfinite(m))):
        raise FitInputError("survival and lengths must be finite")
    n_free = 3 if offset is None else 2
    if np.unique(m).size < n_free:
        raise FitInputError(f"need ≥ {n_free} distinct lengths to fit, got {np.unique(m).size}")
    nd = y.shape[1]

    def fit(sample: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        mean = sample.mean(axis=1)
        w = None
        if sample.shape[1] > 1:
            sem = sample.std(axis=1, ddof=1) / math.sqrt(sample.shape[1])
            floor = max(1e-4, 0.1 * float(np.median(sem)))
            w = np.maximum(sem, floor)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OptimizeWarning)
            return _fit_once(m, mean, w, offset)

    converged, message = True, "ok"
    try:
        popt, pcov = fit(y)
    except (RuntimeError, ValueError) as exc:
        nan = float("nan")
        return RBFit(nan, nan, nan, nan, nan, nan, nan, nan, np.full((n_free, n_free), nan),
                     False, f"fit failed: {exc}", nd)
    p, a, b = (float(v) for v in popt)
    p_err = float(np.sqrt(pcov[0, 0])) if np.isfinite(pcov[0, 0]) else float("nan")
    if n_boot > 0 and nd > 1:
        ps = []
        for _ in range(n_boot):
            idx = rng.integers(0, nd, size=(y.shape[0], nd))
            try:
                ps.append(fit(np.take_along_axis(y, idx, axis=1))[0][0])
            except (RuntimeError, ValueError):
                continue
        if len(ps) >= max(10, n_boot // 2):
            p_err = float(np.std(ps, ddof=1))
        else:
            converged, message = False, "bootstrap fits failed; stderr from the covariance"
    if not np.isfinite(p_err):
        converged, message = False, "p is not determined by the data (infinite covariance)"
    elif p >= 1.0 - 1e-12 or p <= 1e-12:
        converged, message = False, "p at a bound of [0, 1]"
    r = (1.0 - p) / 2.0
    return RBFit(p, p_err, a, b, r, p_err / 2.0, r / PRIMITIVES_PER_CLIFFORD,
                 p_err / 2.0 / PRIMITIVES_PER_CLIFFORD, np.asarray(pcov), converged, message, nd)


def fit_rb(data: xr.Dataset, *, offset: float | Mapping[str, float] | None = None,
           n_boot: int = 200, rng=None) -> dict[str, RBFit]:
    """:func:`fit_rb_decay` for every qubit of a :func:`run_rb` dataset.

    ``offset`` may be one B for all or a mapping qubit → B (dimensionless).
    """
    rng = np.random.default_rng(rng)
    out = {}
    for q in data["qubit"].values.tolist():
        b = offset.get(q) if isinstance(offset, Mapping) else offset
        out[q] = fit_rb_decay(data["length"].values, data["survival"].sel(qubit=q).values,
                              offset=b, n_boot=n_boot, rng=rng)
    return out


def coherence_limited_error_per_gate(gate_ns: float, t1_ns: float, t2_ns: float) -> float:
    """Average gate infidelity of an idle of ``gate_ns`` under T1 and T2 (d = 2).

    The amplitude-damping and dephasing channel of duration t has process fidelity
    F_pro = (1 + e^{−t/T1} + 2e^{−t/T2})/4, and the average gate fidelity is
    F = (d·F_pro + 1)/(d + 1) (Nielsen, Phys. Lett. A 303, 249 (2002)), so

        1 − F = (3 − e^{−t/T1} − 2e^{−t/T2})/6 ≈ t/(3T1) + t/(3Tφ),

    with 1/Tφ = 1/T2 − 1/(2T1). In RB this is the error per gate when every gate lasts
    t and nothing else goes wrong (times in ns).
    """
    t = float(gate_ns)
    return (3.0 - math.exp(-t / t1_ns) - 2.0 * math.exp(-t / t2_ns)) / 6.0


@dataclass(frozen=True)
class DriveTrim:
    """How much a timeline transform changes a qubit's own drive (amplitude).

    ``change`` is the relative change of the rotation angle of the qubit's own pulses
    with the transform on, against off (e.g. +0.006: 0.6 % over-rotation); divide the
    qubit's own-frequency tones by ``1 + change`` to undo it. ``stderr`` its standard error.
    """

    qubit: str
    change: float
    stderr: float


def own_drive_trims(rig: Rig, qubits: Sequence[str],
                    transform: Callable[[Timeline], Timeline], *, gates: GateSet = GateSet(),
                    repeats: int = 41, shots: int = 4000, runner: BatchRunner | None = None,
                    key: str = "trim") -> dict[str, DriveTrim]:
    """Measure the change of each qubit's own drive that ``transform`` causes.

    Cancellation tones played on other lines at a qubit's own frequency reach that qubit
    too and change its own drive by ``Σ_k X_jk·r_kj`` (second order in the crosstalk); a
    lab re-trims gate amplitudes with compensation on (common practice). Only the
    magnitude matters for gates: a common phase of all of a qubit's pulses is a frame
    change (a virtual Z), invisible to preparation in |0⟩ and readout in Z.

    Amplitude amplification: from |0⟩, N = ``repeats`` (4m + 1) and N + 2 pulses X/2 give
    P1 = b + (a/2)(1 ± sin(N·π/2·δ)) for an angle error δ, so their difference is
    a·sin(N·π·δ/2) (to first order in 2/N, the two lengths differ by one π pulse); the
    contrast ``a`` comes from an idle and an X timeline. Each qubit is measured alone (the
    others idle), with and without the transform; the change is δ_on − δ_off.
    """
    if repeats % 4 != 1:
        raise ValueError(f"repeats must be 4m + 1, got {repeats}")
    runner = runner or BatchRunner(rig)
    chip = rig.chip
    slot = gates.slot_ns
    out = {}
    for q in qubits:
        tls: list[Timeline] = []
        for n_pulses, prim in ((0, "X/2"), (1, "X"), (repeats, "X/2"), (repeats + 2, "X/2")):
            tones = tuple(t for k in range(n_pulses)
                          if (t := gates.tone(chip, q, prim, k * slot)) is not None)
            base = Timeline(tones, (q,), readout_ns=max(n_pulses, 1) * slot,
                            label=f"{key}-{q}-{prim}x{n_pulses}")
            tls.append(base)
            if n_pulses >= repeats:
                tls.append(transform(base))
        counts = runner.run(f"{key}-{q}", tls, shots)
        c = counts.counts[:, 0, 1:].sum(axis=-1) / float(shots)  # P(excited)
        p_idle, p_x, p_n, p_n_on, p_n2, p_n2_on = c
        a = p_x - p_idle
        se = math.sqrt(2 * 0.25 / shots)  # difference of two binomial means, worst case
        deltas = []
        for diff in (p_n - p_n2, p_n_on - p_n2_on):
            u = min(max(diff / a, -1.0), 1.0) if a > 0 else math.nan
            deltas.append(2 * math.asin(u) / (repeats * math.pi))
        err = 2 * se / (a * repeats * math.pi) * math.sqrt(2) if a > 0 else math.nan
        out[q] = DriveTrim(q, deltas[1] - deltas[0], err)
    return out


def readout_offsets(rig: Rig, qubits: Sequence[str], *, gates: GateSet = GateSet(),
                    shots: int = 20000, runner: BatchRunner | None = None) -> dict[str, float]:
    """Asymptote B of the RB decay of each qubit, from its readout.

    A fully depolarised qubit is ½(|0⟩⟨0| + |1⟩⟨1|), so B = ½[P(read 0 | 0) +
    P(read 0 | 1)]; both are measured here (|1⟩ prepared by one X pulse, whose own error
    is ~1e-4 and negligible next to the assignment errors). Fixing B makes p well
    determined from decays that stop far above the asymptote, as ours must (a full
    decay would need sequences longer than the repetition time). Leakage moves the true
    asymptote, one more reason why r is then an effective figure.

    Returns
    -------
    dict of str → float
        B per qubit (dimensionless).
    """
    runner = runner or BatchRunner(rig)
    chip = rig.chip
    qubits = tuple(qubits)
    x = [gates.tone(chip, q, "X", 0.0) for q in qubits]
    tls = [Timeline((), qubits, readout_ns=gates.slot_ns, label="rbB-ground"),
           Timeline(tuple(t for t in x if t is not None), qubits, readout_ns=gates.slot_ns,
                    label="rbB-excited")]
    counts = runner.run("rb-readout-offsets", tls, shots)
    return {q: float(0.5 * _survival(counts, q).sum()) for q in qubits}


# ----------------------------------------------------------------------------- comparison


@dataclass(frozen=True)
class QubitComparison:
    """One qubit: isolated vs simultaneous error per gate, per condition.

    Attributes
    ----------
    qubit : str
    isolated : RBFit
    simultaneous : dict of str → RBFit
        Keyed by condition (e.g. ``"uncompensated"``, ``"compensated"``).
    ratio : dict of str → (float, float)
        Simultaneous/isolated error per gate and its stderr (paired bootstrap over draws).
    """

    qubit: str
    isolated: RBFit
    simultaneous: Mapping[str, RBFit]
    ratio: Mapping[str, tuple[float, float]]


@dataclass(frozen=True)
class SimultaneousRBReport:
    """Isolated and simultaneous RB of a set of qubits, with run statistics.

    Attributes
    ----------
    qubits : tuple of str
    comparisons : tuple of QubitComparison
    data : dict of str → xarray.Dataset
        Survival data per run (``"isolated"`` and each simultaneous condition).
    wall_s : dict of str → float
        Wall time per run (s).
    victim_timelines : dict of str → int
        Simulated victim-timelines per run.
    offsets : dict of str → float or None
        The fixed asymptote B used per qubit (None: fitted).
    """

    qubits: tuple[str, ...]
    comparisons: tuple[QubitComparison, ...]
    data: Mapping[str, xr.Dataset] = field(repr=False)
    wall_s: Mapping[str, float]
    victim_timelines: Mapping[str, int]
    offsets: Mapping[str, float | None]

    def comparison(self, qubit: str) -> QubitComparison:
        return self.comparisons[self.qubits.index(qubit)]

    def to_dataset(self) -> xr.Dataset:
        """Error per gate (qubit, condition) with stderr; condition 0 is "isolated"."""
        conds = ["isolated"] + list(self.comparisons[0].simultaneous)
        epg = np.zeros((len(self.qubits), len(conds)))
        err = np.zeros_like(epg)
        for i, c in enumerate(self.comparisons):
            fits = [c.isolated] + [c.simultaneous[k] for k in conds[1:]]
            epg[i] = [f.error_per_gate for f in fits]
            err[i] = [f.error_per_gate_stderr for f in fits]
        return xr.Dataset(
            {"error_per_gate": (("qubit", "condition"), epg,
                                {"units": "1", "long_name": "error per gate"}),
             "error_per_gate_stderr": (("qubit", "condition"), err,
                                       {"units": "1", "long_name": "standard error"})},
            coords={"qubit": list(self.qubits), "condition": conds},
            attrs={"primitives_per_clifford": PRIMITIVES_PER_CLIFFORD},
        )

    def table(self) -> str:
        """A plain-text table of error per gate (×10⁻⁴) per qubit and condition."""
        conds = list(self.comparisons[0].simultaneous)
        head = f"{'qubit':6s} {'isolated':>16s}" + "".join(f" {c:>16s} {'ratio':>11s}"
                                                          for c in conds)
        lines = ["error per gate (1e-4), ± stderr; ratio = simultaneous/isolated, ± a paired "
                 "bootstrap over the shared sequences (their variance largely cancels)", head]
        for c in self.comparisons:
            iso = c.isolated
            row = (f"{c.qubit:6s} {1e4 * iso.error_per_gate:8.2f} ± "
                   f"{1e4 * iso.error_per_gate_stderr:5.2f}")
            for k in conds:
                f = c.simultaneous[k]
                rv, re = c.ratio[k]
                row += (f" {1e4 * f.error_per_gate:8.2f} ± {1e4 * f.error_per_gate_stderr:5.2f}"
                        f" {rv:5.2f}±{re:4.2f}")
            lines.append(row)
        return "\n".join(lines)


def _paired_ratio(lengths: np.ndarray, sim: np.ndarray, iso: np.ndarray, offset: float | None,
                  n_boot: int, rng: np.random.Generator) -> tuple[float, float]:
    """Ratio of error per gate simultaneous/isolated with a bootstrap that resamples the
    same draws in both (the sequences are shared, so their variance largely cancels)."""
    a = fit_rb_decay(lengths, sim, offset=offset, n_boot=0)
    b = fit_rb_decay(lengths, iso, offset=offset, n_boot=0)
    ratio = a.error_per_gate / b.error_per_gate
    nd = sim.shape[1]
    vals = []
    for _ in range(n_boot):
        idx = rng.integers(0, nd, size=(sim.shape[0], nd))
        try:
            fa = fit_rb_decay(lengths, np.take_along_axis(sim, idx, 1), offset=offset, n_boot=0)
            fb = fit_rb_decay(lengths, np.take_along_axis(iso, idx, 1), offset=offset, n_boot=0)
        except FitInputError:
            continue
        if fa.converged and fb.converged:
            vals.append(fa.error_per_gate / fb.error_per_gate)
    err = float(np.std(vals, ddof=1)) if len(vals) > 2 else float("nan")
    return float(ratio), err


def simultaneous_rb(rig: Rig, sequences: RBSequences, *, gates: GateSet = GateSet(),
                    transforms: Mapping[str, Transform | None] | None = None,
                    shots: int = 2000,
                    offset: float | Mapping[str, float] | Literal["measured"] | None = "measured",
                    runner: BatchRunner | None = None,
                    n_boot: int = 200, rng=None) -> SimultaneousRBReport:
    """Isolated RB of each qubit and simultaneous RB under each condition.

    Parameters
    ----------
    rig : Rig
    sequences : RBSequences
        Shared by all runs, so the comparison is paired draw by draw.
    gates : GateSet
    transforms : mapping of str → callable or None
        Simultaneous conditions; default ``{"uncompensated": None}``. A transform (e.g.
        ``lambda t: apply_to_timeline(t, settings, chip)``) is applied to every timeline.
    shots : int
        Shots per timeline.
    offset : float, mapping, "measured" or None
        Fixed asymptote B (dimensionless) per qubit; ``"measured"`` (default) measures it
        with :func:`readout_offsets`; None leaves it free.
    runner : BatchRunner, optional
    n_boot : int
        Bootstrap resamples for the standard errors.
    rng : int, Generator or None

    Returns
    -------
    SimultaneousRBReport
    """
    rng = np.random.default_rng(rng)
    transforms = {"uncompensated": None} if transforms is None else dict(transforms)
    if "isolated" in transforms:
        raise TimelineError("'isolated' is reserved for the isolated reference; rename the "
                            "condition")
    if isinstance(offset, str):
        if offset != "measured":
            raise FitInputError(f"offset must be a number, a mapping, 'measured' or None, "
                                f"got {offset!r}")
        offset = readout_offsets(rig, sequences.qubits, gates=gates, runner=runner)
    data = {"isolated": run_rb(rig, sequences, gates=gates, mode="isolated", shots=shots,
                               runner=runner, key="rbiso")}
    for name, tf in transforms.items():
        data[name] = run_rb(rig, sequences, gates=gates, mode="simultaneous", transform=tf,
                            shots=shots, runner=runner, key=f"rb{name}")
    comps = []
    lengths = np.asarray(sequences.lengths, dtype=float)
    for q in sequences.qubits:
        b = offset.get(q) if isinstance(offset, Mapping) else offset
        iso_y = data["isolated"]["survival"].sel(qubit=q).values
        iso = fit_rb_decay(lengths, iso_y, offset=b, n_boot=n_boot, rng=rng)
        sims, ratios = {}, {}
        for name in transforms:
            y = data[name]["survival"].sel(qubit=q).values
            sims[name] = fit_rb_decay(lengths, y, offset=b, n_boot=n_boot, rng=rng)
            ratios[name] = _paired_ratio(lengths, y, iso_y, b, n_boot, rng)
        comps.append(QubitComparison(q, iso, sims, ratios))
    return SimultaneousRBReport(
        tuple(sequences.qubits), tuple(comps), data,
        {k: float(v.attrs["wall_s"]) for k, v in data.items()},
        {k: int(v.attrs["victim_timelines"]) for k, v in data.items()},
        {q: (offset.get(q) if isinstance(offset, Mapping) else offset)
         for q in sequences.qubits},
    )
