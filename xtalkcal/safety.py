"""Drive limits, checked before anything is sent to hardware.

Microwave power into a dilution refrigerator heats it; too much can disturb or
damage the experiment. Every rig (and every dry run of a sweep) calls
:func:`check_timelines` first and executes nothing if it raises.

Two checks per line, from the chip file:

* peak amplitude: a conservative bound Σ a_k·max|E_k| over tones that overlap in
  time on the same line (tones at different frequencies can beat up to the sum),
  against min(line ``max_amplitude``, lab ``limits.max_amplitude``);
* average power (only if the lab sets ``limits.max_average_power_dbm``): the
  energy ∫|y(t)|² dt of the line's sampled RF representation over one repetition
  period, times the line's full-scale power.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from xtalkcal.chip import Chip
from xtalkcal.exceptions import SafetyLimitError
from xtalkcal.timeline import Envelope, Timeline, envelope_values

__all__ = ["LineLoad", "line_loads", "check_timelines"]

_SAMPLE_NS = 0.05


@lru_cache(maxsize=4096)
def _envelope_peak_and_energy(env: Envelope, duration_ns: float) -> tuple[float, float]:
    n = max(int(math.ceil(duration_ns / _SAMPLE_NS)), 16)
    tau = np.linspace(0.0, duration_ns, n + 1)
    e = envelope_values(env, duration_ns, tau)
    mag2 = np.abs(e) ** 2
    return float(np.sqrt(mag2.max())), float(np.trapezoid(mag2, tau))


@dataclass(frozen=True)
class LineLoad:
    """Worst-case drive of one line in one timeline.

    Attributes
    ----------
    line : str
    peak_amplitude : float
        Conservative peak |amplitude| (fraction of full scale).
    energy_ns : float
        ∫|y|² dt (ns, full scale = 1), incoherent sum over tones.
    """

    line: str
    peak_amplitude: float
    energy_ns: float


def line_loads(timeline: Timeline) -> dict[str, LineLoad]:
    """Peak amplitude and energy per line of one timeline."""
    by_line: dict[str, list] = {}
    for tone in timeline.tones:
        peak, energy = _envelope_peak_and_energy(tone.envelope, float(tone.duration_ns))
        by_line.setdefault(tone.line, []).append(
            (tone.start_ns, tone.end_ns, tone.amplitude * peak, tone.amplitude**2 * energy)
        )
    loads = {}
    for line, items in by_line.items():
        # Sweep over start/end events; the bound is the largest sum of overlapping peaks.
        events = sorted([(s, 1, p) for s, _, p, _ in items] + [(e, 0, p) for _, e, p, _ in items])
        current = worst = 0.0
        for _, kind, p in events:  # ends (kind 0) sort before starts at the same instant
            current = current + p if kind == 1 else current - p
            worst = max(worst, current)
        # Coherent overlap of same-frequency tones can add energy: bound by (Σ√E)².
        energy = sum(e for *_, e in items)
        loads[line] = LineLoad(line, worst, energy)
    return loads


def check_timelines(chip: Chip, timelines: Sequence[Timeline], repetition_ns: float) -> None:
    """Refuse timelines that would exceed a line's limits.

    Parameters
    ----------
    chip : Chip
        Supplies per-line and lab limits.
    timelines : sequence of Timeline
    repetition_ns : float
        Time between shot starts (ns), for the average power.

    Raises
    ------
    SafetyLimitError
        Naming the timeline, the line, the value and the limit. Nothing is executed.
    """
    names = set(chip.line_names)
    pmax = chip.limits.max_average_power_dbm
    for k, tl in enumerate(timelines):
        label = tl.label or f"timeline[{k}]"
        for line, load in line_loads(tl).items():
            if line not in names:
                raise SafetyLimitError(f"{label}: unknown line {line!r}")
            limit = chip.amplitude_limit(line)
            if load.peak_amplitude > limit * (1 + 1e-12):
                raise SafetyLimitError(
                    f"{label}: line {line} would reach peak amplitude {load.peak_amplitude:.4g}, "
                    f"above its limit {limit:.4g} (chip file {chip.source}: lines.max_amplitude / "
                    "limits.max_amplitude). Nothing was sent."
                )
            if pmax is not None:
                fs = chip.line(line).full_scale_dbm
                assert fs is not None  # guaranteed by chip validation
                mean = load.energy_ns / max(repetition_ns, tl.end_ns)
                if mean > 0:
                    dbm = fs + 10 * math.log10(mean)
                    if dbm > pmax + 1e-9:
                        raise SafetyLimitError(
                            f"{label}: line {line} would average {dbm:.2f} dBm over a "
                            f"{repetition_ns:g} ns repetition, above limits.max_average_power_dbm "
                            f"= {pmax:g} dBm (chip file {chip.source}). Nothing was sent."
                        )
