"""Randomized benchmarking: sequences, timelines, runs on the rig and decay fits.
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Literal

import numpy as np
import xarray as xr
from scipy.optimize import OptimizeWarning, curve_fit

from xtalkcal.exceptions import FitInputError, TimelineError
from xtalkcal.hardware import Chip, Counts, Envelope, Rig, Timeline, Tone
from xtalkcal.measure import BatchRunner, PulseShape, pi_pulse_amplitude
from xtalkcal.verification.clifford import (
    CLIFFORD_DECOMPOSITIONS,
    PRIMITIVES,
    PRIMITIVES_PER_CLIFFORD,
    DragCondition,
    Transform,
    clifford_group,
)


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
