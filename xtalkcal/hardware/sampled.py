"""A rig a lab can start from: timelines compiled to sampled I/Q waveforms, one ``play`` to write.

:class:`SampledRig` implements the whole :class:`~xtalkcal.hardware.Rig` contract except
the part only the lab knows: how to load per-line sample arrays into its arbitrary
waveform generators, trigger them and read out. A lab subclasses it and writes
:meth:`SampledRig.play` (plus ``chip``, ``repetition_ns``, ``describe`` and ``now``).

What ``run`` does, in this order
--------------------------------
1. :func:`~xtalkcal.hardware.check_timelines` on the whole batch: nothing is compiled,
   let alone sent, for a batch that fails it.
2. Each timeline is compiled to a :class:`SampledWaveforms` (below). Cancellation tones
   that the applicator added are ordinary tones on the victims' lines and are compiled
   like any other.
3. Every sample is checked once more against its line's amplitude limit (it cannot
   exceed it when step 1 passed; see "Sampling"), then the batch goes to ``play``.

Carrier convention: complex baseband relative to a per-line LO
---------------------------------------------------------------
Each line has a local-oscillator frequency ``f_LO`` (GHz; by default the nominal f01 of
the qubit the line drives). The line's samples ``s[k] = I[k] + i·Q[k]`` (fraction of full
scale) are the complex envelope relative to that LO, so that the line's RF voltage is ::

    V(t) = V_fs·Re[s(t)·e^{−i2π·f_LO·t}] = V_fs·(I(t)·cos 2πf_LO·t + Q(t)·sin 2πf_LO·t),

the convention of :mod:`xtalkcal.hardware.timeline`. A tone at ``f`` therefore appears in
the samples at the intermediate frequency ``f − f_LO``: ``s = a·e^{iφ}·E·e^{−i2π(f − f_LO)t}``.
A tone above its LO turns the I/Q phasor clockwise (its phase decreases with time). If
your mixer or AWG uses the other sign for Q (``I·cos − Q·sin``), send ``conj(s)``; if it
has no LO (direct synthesis), set ``f_LO`` to 0 and play ``Re s`` at RF.

Global clock
------------
Sample ``k`` covers ``[k·dt, (k + 1)·dt)`` of the shot's global clock, which starts at 0
at sample 0 of every shot. Tone phases, and the intermediate-frequency rotation, refer to
that clock (``t = 0`` of the timeline), not to the tone's own start. The LO is assumed
phase-continuous and referenced to the same clock (all LOs locked to one reference and
the shot trigger); if yours restarts its phase elsewhere, compensate by ``2π·f_LO·t``.

Sampling (zero-order hold, midpoint of each cell)
-------------------------------------------------
A DAC holds each sample for ``dt = 1/samples_per_ns``. Each sample is the midpoint-rule
mean of the tone over its cell: ``(c/dt)·A(t_m)·e^{−i2π(f − f_LO)t_m}``, where ``c`` is the
length of the part of the cell the tone covers and ``t_m`` the centre of that part. For
a cell inside the tone that is simply the value at the sample centre; at a tone edge
that does not fall on the sample grid (start or duration not a whole number of samples),
the edge cell carries the covered fraction, so the pulse area (its rotation angle) is
right to second order in ``dt`` instead of off by up to half a sample. Because ``c/dt ≤
1`` and envelopes are evaluated, never extrapolated, no sample exceeds the peak bound
the safety check applied to the timeline.

The record holds ``ceil(readout_ns/dt)`` samples; the readout is triggered at the first
sample boundary at or after the timeline's readout time (:attr:`SampledWaveforms.readout_ns`;
at most one sample later). Tones must lie within ±(Nyquist = samples_per_ns/2) of their
line's LO; a tone outside that band cannot be played at this DAC rate and is refused.
"""

from __future__ import annotations

import math
import numbers
from abc import ABC, abstractmethod
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from xtalkcal.exceptions import RigError, SafetyLimitError, TimelineError
from xtalkcal.hardware.chip import Chip
from xtalkcal.hardware.rig import Counts, check_counts, common_readout
from xtalkcal.hardware.safety import check_timelines
from xtalkcal.hardware.timeline import Timeline, envelope_values

__all__ = ["SampledWaveforms", "SampledRig", "check_samples", "compile_timeline", "default_lo_ghz"]

# A readout within this of a sample boundary is taken to be on it (float round-off of
# t/dt), so a timeline that ends on the grid does not gain a whole sample.
_GRID_TOL = 1e-9


@dataclass(frozen=True)
class SampledWaveforms:
    """One timeline as per-line sampled complex baseband, ready for a waveform generator.

    Attributes
    ----------
    dt_ns : float
        Sample period (ns), ``1/samples_per_ns``; sample ``k`` is held over
        ``[k·dt, (k + 1)·dt)`` of the global clock.
    lo_ghz : dict of str → float
        Each line's LO frequency (GHz); the samples are baseband relative to it.
    samples : dict of str → ndarray of complex, shape (n_samples,)
        ``I + i·Q`` per line of the chip (fraction of full scale; zeros on lines with no
        tone), read-only.
    readout : tuple of str
        Qubits to read, in this order (the order of the returned counts).
    readout_ns : float
        When to trigger the readout: ``n_samples·dt``, the first sample boundary at or
        after the timeline's readout time.
    label : str
        The timeline's label.
    """

    dt_ns: float
    lo_ghz: Mapping[str, float]
    samples: Mapping[str, np.ndarray]
    readout: tuple[str, ...]
    readout_ns: float
    label: str = ""

    @property
    def samples_per_ns(self) -> float:
        """DAC rate (samples per ns, i.e. GS/s)."""
        return 1.0 / self.dt_ns

    @property
    def n_samples(self) -> int:
        """Samples per line."""
        return len(next(iter(self.samples.values()))) if self.samples else 0

    def iq(self, line: str) -> tuple[np.ndarray, np.ndarray]:
        """The I and Q arrays of one line."""
        s = self.samples[line]
        return s.real, s.imag


def default_lo_ghz(chip: Chip) -> dict[str, float]:
    """Each line's LO at the nominal f01 of the qubit it drives (GHz)."""
    return {ln.name: chip.qubit(ln.qubit).f01_ghz for ln in chip.lines}


def _is_number(value: object) -> bool:
    # A string or bool is a configuration mistake, not a rate or a frequency.
    return (isinstance(value, numbers.Real) and not isinstance(value, bool)
            and math.isfinite(value))


def _checked_rate(samples_per_ns: object) -> float:
    if _is_number(samples_per_ns) and samples_per_ns > 0:  # type: ignore[operator]
        return float(samples_per_ns)  # type: ignore[arg-type]
    raise RigError(f"samples_per_ns = {samples_per_ns!r}: the DAC rate must be a finite "
                   "number > 0 (samples per ns, i.e. GS/s)")


def _checked_lo(chip: Chip, lo_ghz: Mapping[str, float] | None) -> dict[str, float]:
    plan = default_lo_ghz(chip)
    for line, f in (lo_ghz or {}).items():
        if line not in plan:
            raise RigError(f"lo_ghz names line {line!r}, not a line of chip {chip.source}; "
                           f"known: {', '.join(chip.line_names)}")
        if not (_is_number(f) and f >= 0):
            raise RigError(f"lo_ghz[{line!r}] = {f!r}: an LO frequency must be a finite "
                           "number ≥ 0 (GHz)")
        plan[line] = float(f)
    return plan


def compile_timeline(timeline: Timeline, chip: Chip, samples_per_ns: float,
                     lo_ghz: Mapping[str, float] | None = None) -> SampledWaveforms:
    """Sample one timeline per line (see the module docstring for every convention).

    Parameters
    ----------
    timeline : Timeline
        Already checked by :func:`~xtalkcal.hardware.check_timelines`; this function
        does not check limits and must not be called on an unchecked timeline that is
        then sent (:meth:`SampledRig.run` does both, in the right order).
    chip : Chip
        Names the lines (every line gets an array) and the default LOs.
    samples_per_ns : float
        DAC rate (GS/s).
    lo_ghz : mapping of str → float, optional
        LO frequency per line (GHz); lines not named keep :func:`default_lo_ghz`.

    Returns
    -------
    SampledWaveforms

    Raises
    ------
    TimelineError
        A tone further from its line's LO than the Nyquist frequency.
    RigError
        A DAC rate or LO frequency that is not a finite positive number, or an unknown line.
    """
    rate = _checked_rate(samples_per_ns)
    dt = 1.0 / rate
    lo = _checked_lo(chip, lo_ghz)
    n = max(1, math.ceil(timeline.end_ns / dt - _GRID_TOL))
    out = {line: np.zeros(n, dtype=complex) for line in chip.line_names}
    nyquist = 0.5 * rate
    for k, tone in enumerate(timeline.tones):
        f_if = tone.freq_ghz - lo[tone.line]
        if not abs(f_if) < nyquist:
            raise TimelineError(
                f"{timeline.label or 'timeline'}: tone[{k}] on {tone.line} at "
                f"{tone.freq_ghz:g} GHz is {f_if:+g} GHz from the line's LO "
                f"({lo[tone.line]:g} GHz); at {rate:g} samples/ns only offsets within "
                f"±{nyquist:g} GHz can be played (raise samples_per_ns or move lo_ghz)")
        first = max(0, math.floor(tone.start_ns / dt))
        last = min(n, math.ceil(tone.end_ns / dt))
        cells = np.arange(first, last)
        lo_edge = np.maximum(cells * dt, tone.start_ns)
        hi_edge = np.minimum((cells + 1) * dt, tone.end_ns)
        covered = np.clip(hi_edge - lo_edge, 0.0, dt)
        mid = 0.5 * (lo_edge + hi_edge)
        env = envelope_values(tone.envelope, tone.duration_ns, mid - tone.start_ns)
        out[tone.line][first:last] += (covered / dt) * tone.complex_amplitude * env * np.exp(
            -2j * np.pi * f_if * mid)
    for arr in out.values():
        arr.setflags(write=False)
    return SampledWaveforms(dt, lo, out, tuple(timeline.readout), n * dt, timeline.label)


def check_samples(chip: Chip, waveforms: SampledWaveforms) -> None:
    """Refuse a compiled timeline any of whose samples exceeds its line's amplitude limit.

    A second line of defence after :func:`~xtalkcal.hardware.check_timelines`, on what
    is actually sent.
    """
    for line, s in waveforms.samples.items():
        peak = float(np.max(np.abs(s))) if len(s) else 0.0
        limit = chip.amplitude_limit(line)
        if not peak <= limit * (1 + 1e-12):
            raise SafetyLimitError(
                f"{waveforms.label or 'timeline'}: line {line} would reach sample amplitude "
                f"{peak:.4g}, above its limit {limit:.4g} (chip file {chip.source}: "
                "lines.max_amplitude / limits.max_amplitude). Nothing was sent.")


class SampledRig(ABC):
    """A rig that plays compiled sample arrays; a lab writes :meth:`play` and the basics.

    Parameters
    ----------
    samples_per_ns : float
        DAC rate (samples per ns = GS/s) the lab's generators run at.
    lo_ghz : mapping of str → float, optional
        LO frequency per line (GHz); default each line's qubit's nominal f01.

    Notes
    -----
    Subclasses provide ``chip``, ``repetition_ns``, ``describe()``, ``now()`` and
    ``play(waveforms, shots)``. :meth:`run` is the :class:`~xtalkcal.hardware.Rig`
    method and should not be overridden: it runs the safety check before compiling.
    """

    def __init__(self, *, samples_per_ns: float, lo_ghz: Mapping[str, float] | None = None
                 ) -> None:
        self._rate = _checked_rate(samples_per_ns)
        self._lo_request = dict(lo_ghz or {})

    @property
    @abstractmethod
    def chip(self) -> Chip:
        """The chip the rig drives."""

    @property
    @abstractmethod
    def repetition_ns(self) -> float:
        """Time between shot starts (ns)."""

    @abstractmethod
    def describe(self) -> str:
        """A short description recorded with every data set."""

    @abstractmethod
    def now(self) -> float:
        """The rig's clock (s)."""

    @abstractmethod
    def play(self, waveforms: Sequence[SampledWaveforms], shots: int) -> Counts:
        """Load, play each compiled timeline ``shots`` times, read out, return counts.

        The lab's code. Every element of ``waveforms`` shares the same ``readout``; the
        returned :class:`~xtalkcal.hardware.Counts` follows the rig contract
        (:mod:`xtalkcal.hardware.rig`). Raise :class:`~xtalkcal.exceptions.RigError` for
        driver failures.
        """

    @property
    def samples_per_ns(self) -> float:
        """DAC rate (GS/s)."""
        return self._rate

    @property
    def lo_ghz(self) -> dict[str, float]:
        """LO frequency per line (GHz)."""
        return _checked_lo(self.chip, self._lo_request)

    def compile(self, timeline: Timeline) -> SampledWaveforms:
        """One timeline as sampled waveforms at this rig's rate and LOs (no limit check)."""
        return compile_timeline(timeline, self.chip, self._rate, self._lo_request)

    def run(self, timelines: Sequence[Timeline], shots: int) -> Counts:
        """Check the limits, compile, check the samples, then :meth:`play`."""
        if isinstance(shots, bool) or not isinstance(shots, (int, np.integer)) or shots < 1:
            raise TimelineError(f"shots must be a positive integer, got {shots!r}")
        timelines = list(timelines)
        readout = common_readout(timelines)
        for tl in timelines:
            if isinstance(tl, Timeline):  # anything else is refused by check_timelines
                tl.validate(lines=self.chip.line_names, qubits=self.chip.qubit_names)
        check_timelines(self.chip, timelines, self.repetition_ns)  # before anything is compiled
        waveforms = [self.compile(tl) for tl in timelines]
        for wf in waveforms:
            check_samples(self.chip, wf)
        counts = self.play(waveforms, int(shots))
        return check_counts(counts, batch=f"of {len(timelines)} sampled timelines",
                            readout=readout, n_timelines=len(timelines), shots=int(shots))
