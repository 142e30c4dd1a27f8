"""Applying settings: add the cancellation tones to a timeline or to sampled waveforms, checked
against the line limits before anything is returned.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import replace

import numpy as np

from xtalkcal.compensation.settings import CompensationSettings, PairSetting
from xtalkcal.compensation.solve import _check_pair_on_chip
from xtalkcal.exceptions import SafetyLimitError
from xtalkcal.hardware import Chip, Timeline, Tone, check_timelines, line_loads

# --------------------------------------------------------------------------------------------
# Applicators
# --------------------------------------------------------------------------------------------


def _check_settings_chip(settings: CompensationSettings, chip: Chip) -> None:
    if settings.chip != chip.name:
        raise ValueError(f"settings are for chip {settings.chip!r}, not {chip.name!r}")
    for p in settings.pairs:
        own, _ = _check_pair_on_chip(chip, p.aggressor_line, p.victim)
        if own != p.aggressor_qubit:
            raise ValueError(f"{p.describe()}: the chip's line {p.aggressor_line} drives {own}, "
                             f"not {p.aggressor_qubit}")
        if chip.line_of(p.victim).name != p.victim_line:
            raise ValueError(f"{p.describe()}: the chip's line of {p.victim} is "
                             f"{chip.line_of(p.victim).name}, not {p.victim_line}")


def _refusal(line: str, peak: float, limit: float, label: str,
             culprits: Sequence[PairSetting]) -> SafetyLimitError:
    who = "; ".join(dict.fromkeys(p.describe() for p in culprits))
    return SafetyLimitError(
        f"compensation refused: {label}: line {line} would reach peak amplitude {peak:.4g}, "
        f"above its limit {limit:.4g}, once the cancellation tones of {who} are added. "
        "Nothing was clipped or sent; lower the aggressor's amplitude or review the settings.")


def apply_to_timeline(
    timeline: Timeline,
    settings: CompensationSettings,
    chip: Chip,
    *,
    freq_tolerance_ghz: float = 1e-6,
    repetition_ns: float | None = None,
) -> Timeline:
    """The timeline with cancellation tones added.

    For every tone on an aggressor line whose frequency is within ``freq_tolerance_ghz``
    of a setting's frequency, a copy scaled by the setting's r (``Tone.scaled``) is added
    on the victim's line: same start, duration, envelope and frequency, phase arg r + φ.
    Tones at other frequencies (preparation pulses, the copies themselves) are not
    copied.

    Parameters
    ----------
    timeline : Timeline
        Not modified.
    settings : CompensationSettings
        Must be for ``chip``.
    chip : Chip
        Supplies the limits.
    freq_tolerance_ghz : float
        Largest |f_tone − f_setting| treated as the same frequency (GHz).
    repetition_ns : float, optional
        Time between shot starts (ns). Given, the full :func:`~xtalkcal.hardware.check_timelines`
        runs (peak and average power); omitted, only peak amplitudes are checked here and
        the average power is left to the rig's own check before it plays anything.

    Returns
    -------
    Timeline
        A new timeline (same readout and label), original tones first.

    Raises
    ------
    SafetyLimitError
        If a line would exceed its limit, naming the line and the pairs whose copies it
        plays. The timeline is refused, never clipped.
    ValueError
        If the settings are for another chip.
    """
    _check_settings_chip(settings, chip)
    by_line: dict[str, list[PairSetting]] = {}
    for p in settings.pairs:
        by_line.setdefault(p.aggressor_line, []).append(p)
    added: list[Tone] = []
    culprits: dict[str, list[PairSetting]] = {}
    for tone in timeline.tones:
        for p in by_line.get(tone.line, ()):
            if abs(tone.freq_ghz - p.frequency_ghz) <= freq_tolerance_ghz and p.ratio != 0:
                added.append(tone.scaled(p.ratio, p.victim_line))
                culprits.setdefault(p.victim_line, []).append(p)
    new = replace(timeline, tones=tuple(timeline.tones) + tuple(added))
    new.validate(lines=chip.line_names)
    label = timeline.label or "timeline"
    for line, load in line_loads(timeline).items():
        limit = chip.amplitude_limit(line)
        if load.peak_amplitude > limit * (1 + 1e-12):
            raise SafetyLimitError(
                f"{label}: line {line} already reaches peak amplitude {load.peak_amplitude:.4g} "
                f"without compensation, above its limit {limit:.4g}; nothing was sent.")
    loads = line_loads(new)
    for line, ps in culprits.items():
        limit = chip.amplitude_limit(line)
        if loads[line].peak_amplitude > limit * (1 + 1e-12):
            raise _refusal(line, loads[line].peak_amplitude, limit, label, ps)
    if repetition_ns is not None:
        try:
            check_timelines(chip, [timeline], repetition_ns)
        except SafetyLimitError as exc:
            raise SafetyLimitError(f"refused before any compensation: {exc}") from exc
        # The checks are per line: checking each line's tones alone names the culprit pairs.
        for line, ps in culprits.items():
            alone = Timeline(tuple(t for t in new.tones if t.line == line), new.readout,
                             new.end_ns, new.label)
            try:
                check_timelines(chip, [alone], repetition_ns)
            except SafetyLimitError as exc:
                who = "; ".join(dict.fromkeys(p.describe() for p in ps))
                raise SafetyLimitError(f"compensation refused: the cancellation tones of {who} "
                                       f"on line {line}: {exc}") from exc
        check_timelines(chip, [new], repetition_ns)  # the whole result, as a rig would check it
    return new


def _refuse_non_finite(samples: np.ndarray, what: str) -> None:
    # NaN compares false against any limit, so it must be refused by name, never played.
    bad = ~np.isfinite(samples)
    if bad.any():
        raise SafetyLimitError(f"{what}: sample {int(np.argmax(bad))} is not finite "
                               f"({samples[bad][0]}); refused, nothing was sent.")


def apply_to_waveforms(
    waveforms: Mapping[str, np.ndarray],
    carriers_ghz: Mapping[str, float],
    settings: CompensationSettings,
    *,
    dt_ns: float,
    t0_ns: float = 0.0,
    chip: Chip,
    freq_tolerance_ghz: float = 1e-6,
) -> dict[str, np.ndarray]:
    """Sampled baseband with cancellation added: b_i += r·b_j·e^{−i2π(f_j − f_i)t}.

    Parameters
    ----------
    waveforms : mapping line → complex ndarray
        Baseband samples b_ℓ(t_n), fraction of full scale, all of one length, on the
        global clock t_n = t0 + n·dt (ns). The line's RF is Re[b_ℓ(t)·e^{−i2πf_ℓt}].
        Not modified.
    carriers_ghz : mapping line → float
        Carrier f_ℓ of each line (GHz); needed for every aggressor and victim line used.
    settings : CompensationSettings
        A setting applies when its aggressor line's carrier is within
        ``freq_tolerance_ghz`` of its frequency (the whole baseband of that line is
        copied; module docstring); settings of other frequencies are skipped.
    dt_ns : float
        Sample spacing (ns).
    t0_ns : float
        Global-clock time of sample 0 (ns).
    chip : Chip
        Supplies the peak-amplitude limits.
    freq_tolerance_ghz : float
        Largest |f_carrier − f_setting| treated as the same frequency (GHz).

    Returns
    -------
    dict line → complex ndarray
        New arrays for every input line, plus victim lines that had no samples.

    Raises
    ------
    SafetyLimitError
        If a line's peak |b| would exceed its amplitude limit (naming line and pairs),
        or any input or output sample is not finite; refused, never clipped. Average
        power is left to the rig's check.
    ValueError
        On arrays of different lengths, a missing carrier, or settings of another chip.
    """
    _check_settings_chip(settings, chip)
    if not (math.isfinite(dt_ns) and dt_ns > 0):
        raise ValueError(f"dt_ns must be finite and > 0, got {dt_ns!r}")
    arrays = {k: np.array(v, dtype=complex) for k, v in waveforms.items()}
    lengths = {k: a.shape for k, a in arrays.items()}
    shapes = set(lengths.values())
    if len(shapes) > 1 or any(len(s) != 1 for s in shapes):
        raise ValueError(f"waveforms must be 1-D and of one length, got shapes {lengths}")
    for k, a in arrays.items():
        if k not in chip.line_names:
            raise ValueError(f"waveform of unknown line {k!r}; known: {', '.join(chip.line_names)}")
        _refuse_non_finite(a, f"waveform of line {k}")
    n = next(iter(shapes))[0] if shapes else 0
    t = t0_ns + dt_ns * np.arange(n)
    out = {k: a.copy() for k, a in arrays.items()}
    culprits: dict[str, list[PairSetting]] = {}
    for p in settings.pairs:
        src = arrays.get(p.aggressor_line)
        if src is None or p.ratio == 0:
            continue
        if p.aggressor_line not in carriers_ghz:
            raise ValueError(f"no carrier for line {p.aggressor_line!r} in carriers_ghz")
        fj = float(carriers_ghz[p.aggressor_line])
        if abs(fj - p.frequency_ghz) > freq_tolerance_ghz:
            continue
        if p.victim_line not in carriers_ghz:
            raise ValueError(f"{p.describe()}: no carrier for victim line {p.victim_line!r} "
                             "in carriers_ghz")
        fi = float(carriers_ghz[p.victim_line])
        dst = out.setdefault(p.victim_line, np.zeros(n, dtype=complex))
        # Module docstring: e^{−i2πf_j t} = e^{−i2π(f_j − f_i)t}·e^{−i2πf_i t}.
        dst += p.ratio * src * np.exp(-2j * np.pi * (fj - fi) * t)
        culprits.setdefault(p.victim_line, []).append(p)
    for line, ps in culprits.items():
        _refuse_non_finite(out[line], f"line {line} with the cancellation tones of "
                           + "; ".join(p.describe() for p in ps))
        peak = float(np.max(np.abs(out[line]))) if n else 0.0
        limit = chip.amplitude_limit(line)
        if peak > limit * (1 + 1e-12):
            raise _refusal(line, peak, limit, "waveforms", ps)
    return out
