"""Planning of a calibration: the risk map of dangerous pairs, ring sizes and amplification
multipliers, survey radii and pass amplitudes.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from functools import lru_cache
from typing import Any

import numpy as np

from xtalkcal.hardware import Chip
from xtalkcal.measure import (
    TWO_PHOTON_WINDOW_GHZ,
    ColumnProbe,
    Protocol,
    PulseShape,
    choose_method,
    near_two_photon,
    two_photon_detuning_ghz,
)

# Rise of the signal above the floor at which rings are placed. Probabilities stay in
# the near-quadratic part of sin² (< 10 % off). A Stark phase is quadratic in the field
# (second-order shift, corrections ~ (Ω/Δ)² < 1e-2 here), so its information grows with
# the radius as far as the unwrapped range [−π/2, 3π/2) of the readings allows: a rise
# of 2 rad leaves room for noise and for the other tones' leak.
RISE_PROBABILITY = 0.2
RISE_STARK_RAD = 2.0
# Survey rings of Stark victims (nothing known of the null yet): where the victim line's
# own Stark phase reaches this.
SURVEY_STARK_RAD = 1.2
# Margin of the null search's stopping rule: k with e^{−k²/2} = 1 % (a circular Gaussian
# error exceeds k·σ with probability e^{−k²/2}).
NULL_CONFIDENCE = math.sqrt(2 * math.log(100.0))
# The stop rule holds the whole chip to its target: the chance that any of its pairs ends
# beyond the target residual is at most this (a union bound over the chip's ordered pairs),
# and never less strict than NULL_CONFIDENCE per pair. Per pair alone, one chip in four
# had a nulled pair past the target (about 30 pairs at 1 % each).
CHIP_MISS = 0.05


def chip_null_confidence(n_pairs: int) -> float:
    """k of the stop rule for a chip of ``n_pairs`` ordered pairs: e^{−k²/2} = CHIP_MISS/n.

    With k·σ ≤ target per pair, |error| > target has probability e^{−k²/2} per pair (a
    circular Gaussian error), so at most CHIP_MISS over the chip; at least NULL_CONFIDENCE.
    A 9-qubit chip (72 pairs) gets 3.81, a 16-qubit one (240 pairs) 4.12.
    """
    return max(NULL_CONFIDENCE, math.sqrt(2 * math.log(max(n_pairs, 1) / CHIP_MISS)))
# A victim is nulled unless its upper bound |X| + k·σ (this k) lies below the threshold.
# With 2σ a pair truly at the threshold was left at its survey about one time in 40 (one
# generated chip: truly −39.9 dB, read −42.5 dB at 2.1σ); 3σ leaves about one in 700.
SELECT_SIGMAS = 3.0
# A raised amplification keeps each unfinished victim's ring this many null errors wide.
RING_MARGIN = 4.0
# Largest Stark phase (rad) a victim's Ramsey window may reach at 1.5× the strongest
# planned null: inside the unwrapped range [−π/2, 3π/2) of the probe's readings, with room
# for the other tones' leak.
STARK_PHASE_MAX = 1.5
# Prior used before the survey: the strongest crosstalk we plan for (−20 dB; a design choice).
STRONGEST_DB = -20.0
#: Stark phases of a victim near its two-photon 0–2 line (``two_photon_hazard``) are held to
#: this fraction of the rises above (survey, rings, window). Two photons of the aggressor's
#: tone pump |0⟩ → |2⟩ at √2·Ω²/|α| while the Stark phase turns at 2Ω²/|α| (Δ = α/2 in
#: δ = Ω²α/(2Δ(Δ−α))), so the |2⟩ population of the Ramsey's |0⟩ half is about φ²/16 at a
#: Stark phase φ: ≈ 0.25 at the full survey's 2 rad, which scrambled the survey ring (a
#: −29 dB pair read "no signal"), and ≤ 2 % at a third of it. That population depends on
#: |w| alone, so on a ring centred on the null it is an offset and does not move the null.
TWO_PHOTON_STARK_SCALE = 1.0 / 3.0
#: A victim joins a joint resonant null pass only if its null lies within this many
#: final ring radii (RING_MARGIN target errors) of zero (see passes.hand_over).
JOINT_NULL_SPAN = 2.0


def risk_map(chip: Chip, protocol: Protocol) -> list[dict[str, Any]]:
    """Hazards of the frequency plan alone, before any shot.

    Flags each (aggressor line, victim) whose aggressor frequency lies within the
    protocol's windows of the victim's 0–1 or 1–2 transition, or within 20 MHz of
    its two-photon 0–2 transition at (f01 + f12)/2 (window common practice). Sorted
    most hazardous first (smallest detuning).
    """
    out = []
    for ln in chip.lines:
        f = chip.qubit(ln.qubit).f01_ghz
        for q in chip.qubits:
            if q.name == ln.qubit:
                continue
            hazards = []
            for kind, nu, win in (
                ("0-1", q.f01_ghz, protocol.windows.rotation_window_ghz),
                ("1-2", q.f12_ghz, protocol.windows.leakage_window_ghz),
                ("0-2/2", q.f02_half_ghz, TWO_PHOTON_WINDOW_GHZ),
            ):
                if abs(f - nu) <= win:
                    hazards.append((kind, f - nu))
            method = protocol.method_override(ln.name, q.name) or choose_method(
                chip, ln.name, q.name, protocol.windows)
            d = min((abs(h[1]) for h in hazards), default=abs(f - q.f01_ghz))
            out.append({"aggressor": ln.name, "victim": q.name, "method": method,
                        "hazards": [f"{k} at {1e3 * dd:+.0f} MHz" for k, dd in hazards],
                        "detuning_ghz": d})
    out.sort(key=lambda r: (not r["hazards"], r["detuning_ghz"]))
    return out


#: Largest |2⟩ population (from |0⟩) the two-photon 0–2 process may reach in a Stark train
#: before the victim is treated as a two-photon victim (:func:`two_photon_hazard`).
TWO_PHOTON_PUMP_MAX = 0.01


def two_photon_hazard(chip: Chip, line: str, victim: str, amplitude: float) -> bool:
    """Whether a long train of ``line`` at ``amplitude`` may pump ``victim`` |0⟩ → |2⟩.

    Two photons of the tone drive |0⟩ ↔ |2⟩ at Ω2 = √2·Ω²/|α| (adiabatic elimination of
    |1⟩, e.g. Brion, Pedersen and Mølmer, J. Phys. A 40, 1033 (2007)), detuned by δ2 =
    2·f_j − f02; a two-level drive reaches at most Ω2²/(Ω2² + δ2²) (Rabi's formula). Ω is
    taken at 2.5× the strongest null planned for (the null plus a survey ring, the
    victim's nominal line gain), and the pair is a hazard if that bound passes
    ``TWO_PHOTON_PUMP_MAX``. Only pairs within ``TWO_PHOTON_WINDOW_GHZ`` are considered;
    most of those are far enough off (on the demo chip 8–20 MHz: bound ≤ 1e-3) that a
    long train does not pump them.
    """
    if not near_two_photon(chip, line, victim):
        return False
    q = chip.qubit(victim)
    omega = chip.line_of(victim).rabi_mhz * 1e-3 * 2.5 * amplitude * 10 ** (STRONGEST_DB / 20)
    omega2 = math.sqrt(2.0) * omega**2 / abs(q.anharmonicity_ghz)
    delta2 = 2.0 * two_photon_detuning_ghz(chip, line, victim)
    return omega2**2 / (omega2**2 + delta2**2) > TWO_PHOTON_PUMP_MAX


def stark_phase_scale(chip: Chip, line: str, victim: str, amplitude: float) -> float:
    """Fraction of the Stark phase rises a victim's rings and window may use (1, or
    ``TWO_PHOTON_STARK_SCALE`` for a :func:`two_photon_hazard`)."""
    return (TWO_PHOTON_STARK_SCALE if two_photon_hazard(chip, line, victim, amplitude)
            else 1.0)


def _is_prime(n: int) -> bool:
    return n > 1 and all(n % d for d in range(2, int(n**0.5) + 1))


def _harmonic(h: int, n: int) -> int:
    """Canonical harmonic index on a ring of n points: cos/sin of h and −h coincide."""
    h %= n
    return min(h, n - h)


def _multipliers_ok(m: list[int], n: int) -> bool:
    for i, mi in enumerate(m):
        others = [x for j, x in enumerate(m) if j != i]
        # Harmonics of victim i's column model (fit_paraboloid_column): its own tone
        # (m_i), the bilinear terms conj(z_i)·z_k (m_k − m_i) and the linear terms z_k
        # (m_k) — all distinct and non-zero, or the model is degenerate.
        model = ([_harmonic(mi, n)] + [_harmonic(x - mi, n) for x in others]
                 + [_harmonic(x, n) for x in others])
        if 0 in model or len(set(model)) != len(model):
            return False
        # The unmodelled second-order terms z_k·conj(z_l) must stay off victim i's own
        # harmonic, else they would bias its null.
        if _harmonic(mi, n) in {_harmonic(a - b, n) for a in others for b in others if a != b}:
            return False
    return True


@lru_cache(maxsize=256)
def _multipliers(n: int, count: int) -> tuple[int, ...]:
    """Angle multipliers for ``count`` victims on a ring of n points (greedy search)."""
    m: list[int] = []
    for c in range(1, n // 2 + 1):
        if _multipliers_ok(m + [c], n):
            m.append(c)
            if len(m) == count:
                break
    return tuple(m)


def ring_points_for(n_victims: int, at_least: int) -> int:
    """Points per ring: the smallest prime ≥ ``at_least`` with room for V multipliers."""
    n = max(at_least, 3)
    while not (_is_prime(n) and len(_multipliers(n, n_victims)) >= n_victims):
        n += 1
    return n


def ring_around(center: np.ndarray, radius: np.ndarray, n: int, phase0: float = 0.0
                ) -> np.ndarray:
    """Points (n+1, V): the centre, then a ring of n points per victim column.

    Victim v visits the ring's angles in the order θ_p = 2π·p·m_v/n (n prime). The
    multipliers are chosen (:func:`_multipliers`) so that, for every victim, the
    harmonics of its column model — its own tone (m_v), the leak of each other tone
    (m_k) and its product with its own (m_k − m_v) — are all distinct, and the
    unmodelled products of two other tones (m_k − m_l) avoid its own harmonic. The
    other victims' leaks are then separable from the null (see
    :func:`xtalkcal.fits.fit_paraboloid_column`) and cannot bias it.
    """
    V = center.shape[0]
    m = _multipliers(n, V)
    if len(m) < V:
        raise ValueError(f"{n} ring points cannot keep {V} victims apart; "
                         f"use ring_points_for({V}, ...)")
    p = np.arange(n)[:, None]
    th = phase0 + 2 * np.pi * ((p * np.array(m[:V])[None, :]) % n) / n
    ring = center[None, :] + radius[None, :] * np.exp(1j * th)
    return np.vstack([center[None, :], ring])


def stark_windows(chip: Chip, line: str, victims: Sequence[str], methods: Sequence[str],
                  amplitude: float, repeats: int, shape: PulseShape) -> tuple[float, ...]:
    """Ramsey window per victim of a merged Stark train (0: the whole train).

    A victim whose phase would respond more strongly than ``STARK_PHASE_MAX`` rad at 1.5×
    the strongest null we plan for (nominal chip, :meth:`ColumnProbe.stark_gain`) gets a
    window shortened in proportion, so that a long train serves the weakly responding
    victims without carrying the strongly responding ones past the unwrapped range. A
    victim near its two-photon line is held to ``TWO_PHOTON_STARK_SCALE`` of that phase.
    """
    victims, methods = tuple(victims), tuple(methods)
    full = ColumnProbe(chip, line, victims, amplitude=amplitude, repeats=repeats,
                       methods=methods, shape=shape, merged=True)
    out = []
    for v, m in zip(victims, methods, strict=True):
        g_max = stark_phase_scale(chip, line, v, amplitude) * STARK_PHASE_MAX / (
            1.5 * amplitude * 10 ** (STRONGEST_DB / 20)) ** 2
        g = full.stark_gain(v) if m == "stark" else 0.0
        if g <= g_max:
            out.append(0.0)
        else:
            out.append(float(max(round(full.train_ns() * g_max / g), 4 * shape.sigma_ns)))
    return tuple(out)


def two_photon_stark_repeats(chip: Chip, line: str, victim: str, amplitude: float,
                             k_max: int, shape: PulseShape) -> int:
    """K of a merged Stark train for a victim near its two-photon 0–2 line (its own pass).

    A Ramsey window protects the phase, not the populations: the victim sits in |0⟩
    during the whole train, and two photons pump it towards |2⟩ before its window opens
    (on a generated chip a 6 µs train moved a full cycle at the survey ring). So the
    train itself is shortened until the victim's Stark phase over all of it, at 1.5× the
    strongest null planned for, is ``TWO_PHOTON_STARK_SCALE`` × ``STARK_PHASE_MAX``; the
    |2⟩ population it pumps is then a few per cent at most (``TWO_PHOTON_STARK_SCALE``).
    """
    g_max = stark_phase_scale(chip, line, victim, amplitude) * STARK_PHASE_MAX / (
        1.5 * amplitude * 10 ** (STRONGEST_DB / 20)) ** 2
    k = int(k_max)
    while k > 1:
        probe = ColumnProbe(chip, line, (victim,), amplitude=amplitude, repeats=k,
                            methods=("stark",), shape=shape, merged=True)
        g = probe.stark_gain(victim)
        if g <= g_max:
            break
        k = max(1, min(k - 1, int(k * g_max / g)))
    return k


def survey_radii(probe: ColumnProbe) -> np.ndarray:
    """Ring radius per victim before anything is known of its null (fraction of full scale).

    Stark victims: where the victim line's own Stark phase reaches SURVEY_STARK_RAD
    (nominal chip values; times :func:`stark_phase_scale`); resonant victims: 1.5× the
    null of the strongest crosstalk we plan for. Never more than 45 % of the victim
    line's limit.
    """
    chip = probe.chip
    out = np.empty(len(probe.victims))
    for i, (v, m) in enumerate(zip(probe.victims, probe.methods, strict=True)):
        if m == "stark":
            rise = SURVEY_STARK_RAD * stark_phase_scale(chip, probe.aggressor, v, probe.amplitude)
            out[i] = math.sqrt(rise / probe.stark_gain(v))
        else:
            out[i] = probe.amplitude * 10 ** (STRONGEST_DB / 20) * 1.5
        out[i] = min(out[i], 0.45 * chip.amplitude_limit(chip.line_of(v).name))
    return out


def ring_radius_caps(probe: ColumnProbe) -> np.ndarray:
    """Largest ring radius per victim once its null is known (fraction of full scale).

    The survey's radius (:func:`survey_radii`), except for Stark victims, whose rings may
    rise further than the survey's (their phase is quadratic in the field): up to 1.5× the
    rise ``RISE_STARK_RAD`` at the nominal gain, in case a fitted curvature comes out low.
    """
    chip = probe.chip
    cap = survey_radii(probe)
    for i, (v, m) in enumerate(zip(probe.victims, probe.methods, strict=True)):
        if m == "stark":
            lim = 0.45 * chip.amplitude_limit(chip.line_of(v).name)
            rise = 1.5 * RISE_STARK_RAD * stark_phase_scale(chip, probe.aggressor, v,
                                                            probe.amplitude)
            cap[i] = min(math.sqrt(rise / probe.stark_gain(v)), lim)
    return cap


def pass_amplitude(protocol: Protocol, chip: Chip, line: str) -> float:
    """Peak amplitude of the aggressor pulses of ``line`` (fraction of full scale)."""
    return protocol.pulse.aggressor_fraction * chip.amplitude_limit(line)


def nulled_pass_groups(methods: Mapping[str, str]) -> list[list[str]]:
    """How the nulled victims of one aggressor are measured again (refinement, re-checks).

    As the calibration nulled them: each resonant victim in a pass of its own (its pulse
    spacing and K — K pulses amplify K-fold only for the victim the spacing is coherent
    for), the Stark victims together (one train). ``methods``: victim → method, in order.
    """
    groups = [[v] for v, m in methods.items() if m != "stark"]
    stark = [v for v, m in methods.items() if m == "stark"]
    return groups + ([stark] if stark else [])


def companion_radius(amp: float, chip: Chip, victim: str, centre: complex) -> float:
    """Ring radius of a tone that varies only to reach the other victims (a companion)."""
    return min(amp * 10 ** (STRONGEST_DB / 20) * 1.5,
               0.45 * chip.amplitude_limit(chip.line_of(victim).name) - abs(centre))
