"""Drive limits, checked before anything is sent to hardware.

Microwave power into a dilution refrigerator heats it; too much can disturb or
damage the experiment. Every rig (and every dry run of a sweep) calls
:func:`check_timelines` first and executes nothing if it raises. The check trusts
nothing it is handed: a plug-in may build tones by any route, so every field is
validated again here, not only when a :class:`~xtalkcal.hardware.Tone` is made.

What is checked, per timeline and per line, against the chip file:

* **every field**: amplitudes, times, frequencies and phases finite; amplitude ≥ 0
  (a sign is a phase of π), duration > 0, start ≥ 0, frequency > 0; envelope
  parameters finite and consistent with the duration; the rig's repetition time
  finite and > 0;
* **peak amplitude**: Σ a_k·max|E_k| over tones that overlap in time on the same line
  (tones at different frequencies can beat up to the sum), against
  min(line ``max_amplitude``, lab ``limits.max_amplitude``). max|E| is computed in
  closed form (:func:`envelope_peak`), never by sampling, so a narrow DRAG pulse
  cannot hide its peak between samples;
* **average power** (only if the lab sets ``limits.max_average_power_dbm``): the
  energy ∫|y(t)|² dt of the line's summed waveform over one repetition period, times
  the line's full-scale power. Energies of single envelopes are closed-form
  (:func:`envelope_energy_ns`). Two tones on one line add in amplitude, so their cross
  term counts: exactly where they are copies of one envelope at one frequency (a pulse
  and its cancellation tone), otherwise by the Cauchy–Schwarz bound
  2·min(√(E_k E_l), p_k p_l·overlap), which no phase or frequency can exceed.
* **total average power** (only if the lab sets ``limits.max_total_average_power_dbm``):
  the sum over lines of those average powers, in mW. Different lines are different
  cables into the cryostat, so their heat adds whatever the phases.

A tone occupies [start, start + duration); tones that only touch do not overlap.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Sequence
from dataclasses import dataclass, field
from functools import lru_cache

from xtalkcal.exceptions import SafetyLimitError, TimelineError
from xtalkcal.hardware.chip import Chip
from xtalkcal.hardware.timeline import Envelope, Timeline, Tone

__all__ = ["LineLoad", "line_loads", "check_timelines", "envelope_peak", "envelope_energy_ns",
           "limits_summary", "PowerTally"]


def _lifted_edge(env: Envelope, duration_ns: float) -> float:
    return math.exp(-((duration_ns / 2) ** 2) / (2 * env.sigma_ns**2))


@lru_cache(maxsize=4096)
def envelope_peak(env: Envelope, duration_ns: float) -> float:
    """An upper bound on max|E(τ)| over the pulse (exact but for DRAG).

    The lifted gaussian peaks at 1; for DRAG, |E|² = g² + β²g'² with g and g' real,
    so |E| ≤ √(1 + β²·max|g'|²). |g'| = (|x|/σ²)·e^{−x²/2σ²}/(1 − edge) rises up to
    |x| = σ, so its largest value in the window |x| ≤ T/2 is at x = min(σ, T/2).
    Flattop and square peak at 1.
    """
    if env.kind == "drag":
        s = env.sigma_ns
        x = min(s, duration_ns / 2)
        slope = x / s**2 * math.exp(-(x * x) / (2 * s * s)) / (1 - _lifted_edge(env, duration_ns))
        return math.sqrt(1.0 + (env.drag_ns * slope) ** 2)
    return 1.0


@lru_cache(maxsize=4096)
def envelope_energy_ns(env: Envelope, duration_ns: float) -> float:
    """∫|E(τ)|² dτ over the pulse (ns), in closed form.

    With a = T/2 and the lifted gaussian g = (G − e)/(1 − e), G = exp(−x²/2σ²):
    ∫G² = σ√π·erf(a/σ), ∫G = σ√(2π)·erf(a/(σ√2)), and for DRAG
    ∫g'² = [√π/2·erf(a/σ) − (a/σ)e^{−a²/σ²}]/(σ(1 − e)²). A flattop with cosine ramps r
    gives T − 1.25·r (each ramp ∫sin⁴ = 3r/8).
    """
    T = duration_ns
    if env.kind in ("gaussian", "drag"):
        s, a = env.sigma_ns, T / 2
        e = _lifted_edge(env, T)
        g2 = s * math.sqrt(math.pi) * math.erf(a / s)
        g1 = s * math.sqrt(2 * math.pi) * math.erf(a / (s * math.sqrt(2)))
        energy = (g2 - 2 * e * g1 + e * e * T) / (1 - e) ** 2
        if env.kind == "drag":
            u = a / s
            dg2 = (0.5 * math.sqrt(math.pi) * math.erf(u) - u * math.exp(-u * u)) / (
                s * (1 - e) ** 2)
            energy += env.drag_ns**2 * dg2
        return energy
    if env.kind == "flattop":
        return T - 1.25 * env.ramp_ns
    return T


@dataclass(frozen=True)
class LineLoad:
    """Worst-case drive of one line in one timeline.

    Attributes
    ----------
    line : str
    peak_amplitude : float
        Upper bound on the peak |amplitude| (fraction of full scale).
    energy_ns : float
        Upper bound on ∫|y|² dt of the line's summed waveform (ns, full scale = 1).
    """

    line: str
    peak_amplitude: float
    energy_ns: float


def _same_shape(a: Tone, b: Tone) -> bool:
    return (a.start_ns == b.start_ns and a.duration_ns == b.duration_ns
            and a.freq_ghz == b.freq_ghz and a.envelope == b.envelope)


def _cross_energy(a: Tone, b: Tone, pa: float, pb: float, ea: float, eb: float) -> float:
    """An upper bound on 2·Re∫A_a·conj(A_b)·e^{−i2π(f_a − f_b)t} dt."""
    overlap = min(a.end_ns, b.end_ns) - max(a.start_ns, b.start_ns)
    if overlap <= 0:
        return 0.0
    if _same_shape(a, b):
        # One envelope, one carrier: the cross term is exact, and may be negative.
        unit = envelope_energy_ns(a.envelope, float(a.duration_ns))
        return 2 * a.amplitude * b.amplitude * math.cos(a.phase_rad - b.phase_rad) * unit
    return 2 * min(math.sqrt(ea * eb), pa * pb * overlap)


def line_loads(timeline: Timeline) -> dict[str, LineLoad]:
    """Peak-amplitude and energy bounds per line of one timeline (fields not checked)."""
    by_line: dict[str, list[tuple[Tone, float, float]]] = {}
    for tone in timeline.tones:
        T = float(tone.duration_ns)
        by_line.setdefault(tone.line, []).append((
            tone,
            tone.amplitude * envelope_peak(tone.envelope, T),
            tone.amplitude**2 * envelope_energy_ns(tone.envelope, T),
        ))
    loads = {}
    for line, items in by_line.items():
        # Sweep over start/end events; the bound is the largest sum of overlapping peaks.
        events = sorted([(t.start_ns, 1, p) for t, p, _ in items]
                        + [(t.end_ns, 0, p) for t, p, _ in items])
        current = worst = 0.0
        for _, kind, p in events:  # ends (kind 0) sort before starts at the same instant
            current = current + p if kind == 1 else current - p
            worst = max(worst, current)
        energy = sum(e for *_, e in items)
        order = sorted(items, key=lambda it: it[0].start_ns)
        for i, (a, pa, ea) in enumerate(order):
            for b, pb, eb in order[i + 1:]:
                if b.start_ns >= a.end_ns:
                    break
                energy += _cross_energy(a, b, pa, pb, ea, eb)
        loads[line] = LineLoad(line, worst, max(energy, 0.0))
    return loads


def _finite_positive(value: object, what: str) -> float:
    # A string or bool is a plug-in's mistake, not a repetition time.
    ok = isinstance(value, numbers.Real) and not isinstance(value, bool)
    v = float(value) if ok else math.nan  # type: ignore[arg-type]
    if not (math.isfinite(v) and v > 0):
        raise SafetyLimitError(f"{what} = {value!r}: must be a finite number > 0 (ns). "
                               "Nothing was sent.")
    return v


def _average_dbm(chip: Chip, label: str, line: str, load: LineLoad, rep: float,
                 end_ns: float) -> float | None:
    """Average power of a line over one repetition (dBm); None if it carries nothing."""
    fs = chip.line(line).full_scale_dbm
    if fs is None:  # a chip file cannot lack it (validation); a chip built in code can
        raise SafetyLimitError(
            f"{label}: line {line} has no full_scale_dbm, so its average power "
            f"cannot be checked against the limits of {chip.source}. Nothing was sent.")
    mean = load.energy_ns / max(rep, end_ns)
    return fs + 10 * math.log10(mean) if mean > 0 else None


def _checked_loads(chip: Chip, k: int, tl: object, rep: float
                   ) -> tuple[dict[str, LineLoad], dict[str, float]]:
    """One timeline's loads and per-line average powers (dBm), every limit checked."""
    label = getattr(tl, "label", "") or f"timeline[{k}]"
    if not isinstance(tl, Timeline):
        raise SafetyLimitError(f"{label}: not a Timeline; nothing was sent.")
    try:
        tl.validate(lines=chip.line_names)
    except TimelineError as exc:
        raise SafetyLimitError(f"{exc}. Nothing was sent.") from exc
    pmax = chip.limits.max_average_power_dbm
    ptotal = chip.limits.max_total_average_power_dbm
    loads = line_loads(tl)
    powers: dict[str, float] = {}
    for line, load in loads.items():
        limit = chip.amplitude_limit(line)
        if not load.peak_amplitude <= limit * (1 + 1e-12):
            raise SafetyLimitError(
                f"{label}: line {line} would reach peak amplitude {load.peak_amplitude:.4g}, "
                f"above its limit {limit:.4g} (chip file {chip.source}: lines.max_amplitude / "
                "limits.max_amplitude). Nothing was sent."
            )
        if pmax is None and ptotal is None and chip.line(line).full_scale_dbm is None:
            continue  # no power limit, and no full scale to state a power in
        dbm = _average_dbm(chip, label, line, load, rep, tl.end_ns)
        if dbm is None:
            continue
        powers[line] = dbm
        if pmax is not None and not dbm <= pmax + 1e-9:
            raise SafetyLimitError(
                f"{label}: line {line} would average {dbm:.2f} dBm over a "
                f"{rep:g} ns repetition, above limits.max_average_power_dbm "
                f"= {pmax:g} dBm (chip file {chip.source}). Nothing was sent."
            )
    if ptotal is not None and powers:
        total_dbm = _sum_dbm(powers.values())
        if not total_dbm <= ptotal + 1e-9:
            raise SafetyLimitError(
                f"{label}: all lines together would average {total_dbm:.2f} dBm over a "
                f"{rep:g} ns repetition, above limits.max_total_average_power_dbm "
                f"= {ptotal:g} dBm (chip file {chip.source}). Nothing was sent."
            )
    return loads, powers


def _sum_dbm(values) -> float:
    """Powers in dBm added as powers (different lines heat the fridge independently)."""
    return 10 * math.log10(sum(10 ** (v / 10) for v in values))


def check_timelines(chip: Chip, timelines: Sequence[Timeline], repetition_ns: float) -> None:
    """Refuse timelines that would exceed a line's limits, or are not well formed.

    Parameters
    ----------
    chip : Chip
        Supplies per-line and lab limits.
    timelines : sequence of Timeline
    repetition_ns : float
        Time between shot starts (ns), for the average power; finite and > 0.

    Raises
    ------
    SafetyLimitError
        Naming the timeline, the line, the value and the limit. Nothing is executed.
    TimelineError
        A tone field that is not finite or not in range (re-checked here, whatever
        built the tone).
    """
    rep = _finite_positive(repetition_ns, "the rig's repetition_ns")
    for k, tl in enumerate(timelines):
        _checked_loads(chip, k, tl, rep)


@dataclass
class PowerTally:
    """The most drive each line, and all lines together, received over many batches.

    :class:`~xtalkcal.measure.BatchRunner` keeps one for every batch it sends (and a dry
    run for every batch it would send), so that a run can say afterwards what it did to
    the fridge, in the terms of the limits.

    Attributes
    ----------
    peak : dict of str → float
        Largest peak amplitude per line (fraction of full scale).
    average_dbm : dict of str → float
        Largest average power per line over one repetition (dBm; lines with a full scale).
    total_dbm : float or None
        Largest average power of all lines together in one timeline (dBm).
    batches, timelines, shots : int
        What was counted.
    """

    peak: dict[str, float] = field(default_factory=dict)
    average_dbm: dict[str, float] = field(default_factory=dict)
    total_dbm: float | None = None
    batches: int = 0
    timelines: int = 0
    shots: int = 0

    def add(self, chip: Chip, timelines: Sequence[Timeline], repetition_ns: float,
            shots: int) -> None:
        """Check a batch (as :func:`check_timelines`) and count it."""
        rep = _finite_positive(repetition_ns, "the rig's repetition_ns")
        for k, tl in enumerate(timelines):
            loads, powers = _checked_loads(chip, k, tl, rep)
            for line, load in loads.items():
                self.peak[line] = max(self.peak.get(line, 0.0), load.peak_amplitude)
            for line, dbm in powers.items():
                self.average_dbm[line] = max(self.average_dbm.get(line, -math.inf), dbm)
            if powers:
                total = _sum_dbm(powers.values())
                self.total_dbm = total if self.total_dbm is None else max(self.total_dbm, total)
        self.batches += 1
        self.timelines += len(timelines)
        self.shots += len(timelines) * int(shots)

    def lines(self, chip: Chip) -> list[str]:
        """A table, one row per line driven, and a row for all lines together."""
        rows = [f"{'line':<8} {'peak':>7} {'limit':>7} {'avg dBm':>9} {'limit':>7}"]
        pmax = chip.limits.max_average_power_dbm
        for line in chip.line_names:
            if line not in self.peak:
                continue
            avg = self.average_dbm.get(line)
            rows.append(f"{line:<8} {self.peak[line]:>7.3f} {chip.amplitude_limit(line):>7.3f} "
                        f"{'-' if avg is None else f'{avg:.1f}':>9} "
                        f"{'-' if pmax is None else f'{pmax:g}':>7}")
        ptot = chip.limits.max_total_average_power_dbm
        tot = "-" if self.total_dbm is None else f"{self.total_dbm:.1f}"
        lim = "-" if ptot is None else f"{ptot:g}"
        rows.append(f"{'all':<8} {'':>7} {'':>7} {tot:>9} {lim:>7}")
        return rows

    def summary(self) -> str:
        """One line: the largest peak and average power of any line, and of all together."""
        if not self.peak:
            return "drive sent: none"
        line = max(self.peak, key=self.peak.get)
        text = f"largest drive sent: peak {self.peak[line]:.3g} of full scale ({line})"
        if self.average_dbm:
            hot = max(self.average_dbm, key=self.average_dbm.get)
            text += f", average {self.average_dbm[hot]:.1f} dBm ({hot})"
        if self.total_dbm is not None:
            text += f", all lines together {self.total_dbm:.1f} dBm"
        return text + f"; {self.batches} batches, {self.shots:,} shots"

    def merge(self, other: PowerTally) -> None:
        """Count another tally's batches in this one."""
        for line, v in other.peak.items():
            self.peak[line] = max(self.peak.get(line, 0.0), v)
        for line, v in other.average_dbm.items():
            self.average_dbm[line] = max(self.average_dbm.get(line, -math.inf), v)
        if other.total_dbm is not None:
            self.total_dbm = (other.total_dbm if self.total_dbm is None
                              else max(self.total_dbm, other.total_dbm))
        self.batches += other.batches
        self.timelines += other.timelines
        self.shots += other.shots

def limits_summary(chip: Chip) -> str:
    """One line naming the limits in force and the chip file they come from.

    Every command that drives a rig prints it, and the report repeats it, so that nobody
    runs under limits they did not mean.
    """
    lim = chip.limits
    own = sorted({chip.amplitude_limit(ln.name) for ln in chip.lines})
    peak = (f"peak amplitude ≤ {own[0]:g} of full scale on every line" if len(own) == 1 else
            f"peak amplitude ≤ {own[0]:g}–{own[-1]:g} of full scale (per line)")
    avg = ("average power per line: no limit" if lim.max_average_power_dbm is None
           else f"average power ≤ {lim.max_average_power_dbm:g} dBm per line")
    total = ("all lines together: no limit" if lim.max_total_average_power_dbm is None
             else f"≤ {lim.max_total_average_power_dbm:g} dBm all lines together")
    lock = ("interlock: none" if getattr(chip, "interlock", None) is None
            else f"interlock: {chip.interlock.command[0]}")
    stated = "" if lim.stated else " (no [limits] table: defaults)"
    # A derived chip's source already says where it came from ("derived from …").
    where = chip.source if chip.source.startswith("derived from") else f"from {chip.source}"
    return f"limits in force, {where}{stated}: {peak}; {avg}; {total}; {lock}"
