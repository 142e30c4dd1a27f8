"""What a rig executes: tones on drive lines and a readout. Pure data, no physics.

Phase convention (shared by every rig, the simulator and the waveform applicator)
-------------------------------------------------------------------------------
A tone on a line is the complex envelope ``A(t) = a·e^{iφ}·E(t − t0)`` at carrier
frequency ``f``; the line's RF voltage is ``V(t) = V_fs·Re[A(t)·e^{−i2πft}]``, where
``t`` is **one global clock** that starts at 0 at the beginning of every shot and is
shared by all lines. Carriers are phase-continuous: a tone's phase is referenced to
that clock, not restarted at the pulse start. This is what phase-coherent control
hardware does, and it is required for cancellation: a tone on another line at the
same frequency only cancels the leaked field if both share the reference.

In the frame of a qubit rotating at its 0–1 frequency this field contributes the
rotating-wave term ``½·Ω(t)·e^{−i2π(f − f01)t}·a† + h.c.`` with ``Ω ∝ A``.

Every field of a tone is checked when it is made (finite; amplitude ≥ 0, duration > 0,
start ≥ 0, frequency > 0) and again by :func:`xtalkcal.hardware.check_timelines` before
anything is played. A negative amplitude is refused rather than read as a sign: the
same field is a phase of π, and a stray sign must never be able to slip past a limit
written for |a|.

Envelopes (``E``, peak 1 before DRAG):

``gaussian``
    exp(−(τ − T/2)²/2σ²), lifted so it starts and ends at exactly 0 (common practice).
``drag``
    the gaussian ``g`` plus a quadrature ``i·β·dg/dτ`` (β in ns; Motzoi et al.,
    PRL 103, 110501, 2009).
``flattop``
    cosine ramps of ``ramp_ns`` up and down around a flat top.
``square``
    1 throughout.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Iterable
from dataclasses import dataclass, field, replace
from typing import Literal

import numpy as np

from xtalkcal.exceptions import TimelineError

__all__ = [
    "EnvelopeKind",
    "Envelope",
    "Tone",
    "Timeline",
    "envelope_values",
    "tone_values",
    "pulse_area_ns",
]

EnvelopeKind = Literal["gaussian", "drag", "flattop", "square"]
ENVELOPE_KINDS: tuple[str, ...] = ("gaussian", "drag", "flattop", "square")
MIN_SHAPE_NS = 1e-3  # shortest σ or ramp accepted (ns)


@dataclass(frozen=True)
class Envelope:
    """Shape of a tone.

    Parameters
    ----------
    kind : {"gaussian", "drag", "flattop", "square"}
    sigma_ns : float
        Gaussian standard deviation (ns); gaussian and drag only.
    drag_ns : float
        DRAG coefficient β (ns); drag only.
    ramp_ns : float
        Length of each cosine ramp (ns); flattop only.
    """

    kind: EnvelopeKind = "gaussian"
    sigma_ns: float = 0.0
    drag_ns: float = 0.0
    ramp_ns: float = 0.0

    def validate(self, duration_ns: float, where: str = "envelope") -> None:
        """Raise :class:`TimelineError` if the shape does not fit the duration."""
        if self.kind not in ENVELOPE_KINDS:
            raise TimelineError(f"{where}: kind {self.kind!r} not one of {ENVELOPE_KINDS}")
        for name in ("sigma_ns", "drag_ns", "ramp_ns"):
            _require_finite(getattr(self, name), f"{where}: {name}")
        # Below a picosecond no DAC can play the shape, and σ² or T/ramp leave floats.
        if self.kind in ("gaussian", "drag") and not self.sigma_ns >= MIN_SHAPE_NS:
            raise TimelineError(f"{where}: sigma_ns = {self.sigma_ns:g} must be ≥ "
                                f"{MIN_SHAPE_NS:g} ns for a {self.kind} envelope")
        if self.kind == "flattop" and 0 < self.ramp_ns < MIN_SHAPE_NS:
            raise TimelineError(f"{where}: ramp_ns = {self.ramp_ns:g} must be 0 or ≥ "
                                f"{MIN_SHAPE_NS:g} ns")
        if self.kind == "flattop" and not (0 <= 2 * self.ramp_ns <= duration_ns):
            raise TimelineError(
                f"{where}: ramp_ns = {self.ramp_ns:g} must satisfy 0 ≤ 2·ramp_ns ≤ duration "
                f"({duration_ns:g} ns)"
            )

    @property
    def code(self) -> int:
        """Small integer used by compiled back ends (index into ``ENVELOPE_KINDS``)."""
        return ENVELOPE_KINDS.index(self.kind)


def _require_finite(value: object, what: str) -> None:
    # bool is an int, but a True amplitude is a mistake, not full scale.
    if (isinstance(value, bool) or not isinstance(value, numbers.Real)
            or not math.isfinite(value)):
        raise TimelineError(f"{what} must be a finite number, got {value!r}")


def envelope_values(env: Envelope, duration_ns: float, tau_ns: np.ndarray) -> np.ndarray:
    """Complex envelope E(τ) at times τ since the tone start (0 outside [0, T]).

    Parameters
    ----------
    env : Envelope
    duration_ns : float
        Tone duration T (ns).
    tau_ns : ndarray
        Times since the tone start (ns).

    Returns
    -------
    ndarray of complex
    """
    tau = np.asarray(tau_ns, dtype=float)
    inside = (tau >= 0) & (tau <= duration_ns)
    out = np.zeros(tau.shape, dtype=complex)
    T = duration_ns
    if env.kind in ("gaussian", "drag"):
        s = env.sigma_ns
        edge = math.exp(-((T / 2) ** 2) / (2 * s * s))
        x = tau - T / 2
        gauss = np.exp(-(x * x) / (2 * s * s))
        g = (gauss - edge) / (1 - edge)
        val = g.astype(complex)
        if env.kind == "drag":
            dg = -x / (s * s) * gauss / (1 - edge)
            val = g + 1j * env.drag_ns * dg
    elif env.kind == "flattop":
        r = env.ramp_ns
        val = np.ones(tau.shape, dtype=complex)
        if r > 0:
            up = tau < r
            down = tau > T - r
            val[up] = 0.5 * (1 - np.cos(np.pi * tau[up] / r))
            val[down] = 0.5 * (1 - np.cos(np.pi * (T - tau[down]) / r))
    else:
        val = np.ones(tau.shape, dtype=complex)
    out[inside] = val[inside]
    return out


def pulse_area_ns(env: Envelope, duration_ns: float) -> float:
    """∫ Re E(τ) dτ over the pulse (ns): the in-phase area that sets a rotation angle."""
    if env.kind in ("gaussian", "drag"):
        s, T = env.sigma_ns, duration_ns
        edge = math.exp(-((T / 2) ** 2) / (2 * s * s))
        full = s * math.sqrt(2 * math.pi) * math.erf(T / (2 * math.sqrt(2) * s))
        return (full - edge * T) / (1 - edge)
    if env.kind == "flattop":
        return duration_ns - env.ramp_ns
    return duration_ns


@dataclass(frozen=True)
class Tone:
    """One tone on one drive line.

    Parameters
    ----------
    line : str
        Drive-line name.
    start_ns, duration_ns : float
        Start on the global clock and length (ns).
    freq_ghz : float
        Carrier frequency (GHz).
    amplitude : float
        Peak amplitude a ≥ 0, fraction of the line's full scale.
    phase_rad : float
        Phase φ (rad) against the global clock.
    envelope : Envelope
    """

    line: str
    start_ns: float
    duration_ns: float
    freq_ghz: float
    amplitude: float
    phase_rad: float = 0.0
    envelope: Envelope = field(default_factory=lambda: Envelope("square"))

    @property
    def end_ns(self) -> float:
        return self.start_ns + self.duration_ns

    @property
    def complex_amplitude(self) -> complex:
        """a·e^{iφ}."""
        return self.amplitude * complex(math.cos(self.phase_rad), math.sin(self.phase_rad))

    def scaled(self, ratio: complex, line: str) -> Tone:
        """A copy on ``line`` whose complex amplitude is ``ratio`` times this one."""
        z = ratio * self.complex_amplitude
        return replace(self, line=line, amplitude=abs(z), phase_rad=math.atan2(z.imag, z.real))

    def __post_init__(self) -> None:
        self.validate()

    def validate(self, where: str = "tone") -> None:
        """Raise :class:`TimelineError` on non-finite or out-of-range values.

        Runs when a tone is made and again in :func:`xtalkcal.hardware.check_timelines`,
        which cannot know how a plug-in built the tones it is handed.
        """
        for name in ("start_ns", "duration_ns", "freq_ghz", "amplitude", "phase_rad"):
            _require_finite(getattr(self, name), f"{where}: {name}")
        if not isinstance(self.line, str) or not self.line:
            raise TimelineError(f"{where}: line must be a non-empty name, got {self.line!r}")
        if not isinstance(self.envelope, Envelope):
            raise TimelineError(f"{where}: envelope must be an Envelope, got {self.envelope!r}")
        if self.start_ns < 0:
            raise TimelineError(f"{where}: start_ns = {self.start_ns:g} is negative")
        if self.duration_ns <= 0:
            raise TimelineError(f"{where}: duration_ns = {self.duration_ns:g} must be > 0")
        if self.freq_ghz <= 0:
            raise TimelineError(f"{where}: freq_ghz = {self.freq_ghz:g} must be > 0")
        if self.amplitude < 0:
            raise TimelineError(f"{where}: amplitude = {self.amplitude:g} must be ≥ 0 "
                                "(a sign is a phase of π)")
        self.envelope.validate(self.duration_ns, f"{where}.envelope")


def tone_values(tone: Tone, t_ns: np.ndarray) -> np.ndarray:
    """Complex envelope A(t) = a·e^{iφ}·E(t − t0) of a tone on the global clock."""
    return tone.complex_amplitude * envelope_values(
        tone.envelope, tone.duration_ns, np.asarray(t_ns, dtype=float) - tone.start_ns
    )


@dataclass(frozen=True)
class Timeline:
    """One shot's programme: tones (overlaps allowed), then a readout of some qubits.

    Parameters
    ----------
    tones : tuple of Tone
    readout : tuple of str
        Qubits read out together at ``readout_ns``.
    readout_ns : float or None
        Readout time on the global clock (ns); default the end of the last tone.
    label : str
        Free text carried into data files (e.g. the sweep point).
    """

    tones: tuple[Tone, ...]
    readout: tuple[str, ...]
    readout_ns: float | None = None
    label: str = ""

    def __post_init__(self) -> None:
        object.__setattr__(self, "tones", tuple(self.tones))
        object.__setattr__(self, "readout", tuple(self.readout))

    @property
    def end_ns(self) -> float:
        """Time of the readout (ns)."""
        last = max((t.end_ns for t in self.tones), default=0.0)
        return last if self.readout_ns is None else self.readout_ns

    def validate(
        self, *, lines: Iterable[str] | None = None, qubits: Iterable[str] | None = None
    ) -> None:
        """Check every tone, the readout, and (optionally) the names against a chip."""
        line_set = set(lines) if lines is not None else None
        qubit_set = set(qubits) if qubits is not None else None
        name = self.label or "timeline"
        for k, tone in enumerate(self.tones):
            where = f"{name}: tone[{k}]"
            if not isinstance(tone, Tone):
                raise TimelineError(f"{where}: not a Tone, got {type(tone).__name__}")
            tone.validate(where)
            if line_set is not None and tone.line not in line_set:
                raise TimelineError(
                    f"{where}: unknown line {tone.line!r}; known: {sorted(line_set)}")
        if not self.readout:
            raise TimelineError(f"{name}: readout names no qubit")
        if len(set(self.readout)) != len(self.readout):
            raise TimelineError(f"{name}: readout lists a qubit twice")
        if qubit_set is not None:
            for q in self.readout:
                if q not in qubit_set:
                    raise TimelineError(f"{name}: readout of unknown qubit {q!r}")
        if self.readout_ns is not None:
            _require_finite(self.readout_ns, f"{name}: readout_ns")
            if self.readout_ns < 0:
                raise TimelineError(f"{name}: readout_ns must be finite and ≥ 0")
            late = [t for t in self.tones if t.end_ns > self.readout_ns + 1e-9]
            if late:
                raise TimelineError(
                    f"{name}: a tone on {late[0].line} ends at {late[0].end_ns:g} ns, after the "
                    f"readout at {self.readout_ns:g} ns"
                )

    def waveform(self, line: str, t_ns: np.ndarray) -> np.ndarray:
        """Sampled complex RF representation y(t) = Σ A(t)·e^{−i2πft} of one line.

        The line's RF voltage is ``V_fs·Re y(t)``.
        """
        t = np.asarray(t_ns, dtype=float)
        y = np.zeros(t.shape, dtype=complex)
        for tone in self.tones:
            if tone.line == line:
                y += tone_values(tone, t) * np.exp(-2j * np.pi * tone.freq_ghz * t)
        return y
