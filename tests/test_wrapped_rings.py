"""Stark rings whose phase readings wrap, and rings centred where the landscape is lowest.

A Stark phase is read modulo 2π (on [−π/2, 3π/2) by the probe). A strong pair (−15 dB,
beyond the −20 dB the survey is planned for) puts the survey ring's phase past that range:
its readings jump by 2π between neighbouring angles, the fit sees a flat or noisy ring and
said "no signal" for a pair that must be nulled. A wrapped ring is ``saturated`` instead,
which the calibration cures with a shorter train (the wider survey).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from simulated_device import SimRig, device_from_dict
from simulated_device.family import FamilyParams, generate_device
from xtalkcal.calibrate import ring_around
from xtalkcal.calibrate.stages import TONE_LEAK_SHARE, seen_nulls, tone_radii
from xtalkcal.exceptions import FitInputError
from xtalkcal.fits import fit_paraboloid_column, ring_wraps
from xtalkcal.measure import default_protocol

STRONG = FamilyParams(n_qubits=4, layout="line", leakage_hazards=2, near_resonant_hazards=0,
                      two_photon_hazards=0, nearest_db=-14.0, falloff_db=12.0, spread_db=1.0,
                      delay_ns=(0.0, 8.0))


def _read(phase: np.ndarray) -> np.ndarray:
    """The probe's reading of a true phase: modulo 2π onto [−π/2, 3π/2)."""
    d = np.angle(np.exp(1j * phase))
    return np.where(d < -np.pi / 2, d + 2 * np.pi, d)


def _stark_ring(null: complex, radius: float, gain: float, n: int = 13):
    z = ring_around(np.array([0j]), np.array([radius]), n)[:, 0]
    return z, gain * np.abs(z - null) ** 2


def test_a_ring_inside_the_range_does_not_wrap():
    z, phase = _stark_ring(0.05 + 0.02j, 0.06, 200.0)
    assert phase.max() < 3 * np.pi / 2
    assert not ring_wraps(z, _read(phase))


def test_a_strong_null_outside_the_ring_wraps():
    # The null 1.8× the ring's radius out, its phase up to 7 rad on the far side.
    z, phase = _stark_ring(0.11 + 0.03j, 0.06, 200.0)
    assert phase.max() > 3 * np.pi / 2
    assert ring_wraps(z, _read(phase))
    assert not ring_wraps(z, phase)  # the true phase is smooth


def test_a_ring_wholly_one_turn_up_reads_smooth():
    # Every reading one turn down: no jump (the paraboloid's offset absorbs the turn).
    z, phase = _stark_ring(0.2j, 0.02, 160.0)
    assert phase.min() > 3 * np.pi / 2 and phase.max() < 2 * np.pi + 3 * np.pi / 2
    assert not ring_wraps(z, _read(phase))


@settings(max_examples=80, deadline=None, derandomize=True)
@given(re=st.floats(-0.2, 0.2), im=st.floats(-0.2, 0.2), radius=st.floats(0.01, 0.1),
       rise=st.floats(0.1, 3.0), noise=st.floats(0.0, 0.05), seed=st.integers(0, 2**16))
def test_wrap_is_found_exactly_when_the_true_phase_crosses_the_edge(re, im, radius, rise,
                                                                     noise, seed):
    null = complex(re, im)
    gain = rise / radius**2
    z, phase = _stark_ring(null, radius, gain)
    phase = phase + np.random.default_rng(seed).normal(0, noise, phase.shape)
    ring = phase[1:]
    # Smooth between neighbours (13 points: at most 2·A·sin(π/13) ≈ 0.48·A apart for a
    # first harmonic of amplitude A); it crosses an edge iff its readings' turns differ,
    # and a crossing then jumps by 2π less a neighbour's step, more than π.
    turns = np.floor((ring + np.pi / 2) / (2 * np.pi))
    if np.ptp(ring) < 2.5:  # neighbours at most ≈ 1.2 rad apart: decisive either way
        assert ring_wraps(z, _read(phase)) == (np.ptp(turns) > 0)


def test_ring_wraps_rejects_mismatched_inputs():
    with pytest.raises(FitInputError):
        ring_wraps(np.zeros(5, complex), np.zeros(4))
    assert not ring_wraps(np.zeros(2, complex), np.zeros(2))  # too few points: no claim


@pytest.mark.parametrize("share, unbiased", [(0.3, True), (0.7, True), (1.3, False)])
def test_seen_null_is_moved_by_the_other_tones_leak(share, unbiased):
    # Victim 0 sees the aggressor's leak (null a) and tone 1's leak c·z_1; the fit gives
    # a and c, and the landscape's lowest point is a − c·z_1 at tone 1's ring centre.
    # Tone 1's ring leaks ``share`` of victim 0's ring radius onto it: up to
    # TONE_LEAK_SHARE the fit is unbiased (noise-free), well beyond it not.
    a, c, z1c, kappa = 0.03 - 0.01j, 0.2 + 0.1j, 0.04 + 0.02j, 500.0
    r0 = 0.005
    r1 = share * r0 / abs(c)
    assert (share <= TONE_LEAK_SHARE) == unbiased
    pts = ring_around(np.array([a - c * z1c, z1c]), np.array([r0, r1]), 17)
    Z = pts.T
    w = Z[0] - a + c * Z[1]
    S = np.vstack([0.01 + kappa * np.abs(w) ** 2, 0.01 + kappa * np.abs(Z[1]) ** 2])
    # Noise level as at a null ring: 5 % of the ring's rise.
    col = fit_paraboloid_column(Z, S, np.full(S.shape, 0.05 * kappa * r0**2))
    e = col.estimates[0]
    assert e.accepted
    pull = abs(e.z_star - a) / e.position_stderr
    assert (pull < 0.05) == unbiased, pull
    if unbiased:
        seen = seen_nulls(col, np.array([a - c * z1c, z1c]))
        assert abs(seen[0] - (a - c * z1c)) < 0.05 * e.position_stderr


def test_strong_stark_pair_whose_survey_wraps_is_nulled():
    # Seed 7, aggressor q2-line: q3 (Stark) truly −15 dB; its survey ring wrapped and read
    # "no signal" before. Now it is saturated, surveyed again with a shorter train, and
    # nulled within its error and the target; the −15 dB leakage pair beside it too.
    doc = generate_device(STRONG, 7)
    rig = SimRig(device_from_dict(doc, source=doc["name"]), drift=False)
    lines: list[str] = []
    res = calibrate_chip_q2(rig, lines)
    assert any("q3 saturated at its survey" in t for t in lines)
    assert any("Stark train back to K=" in t for t in lines)  # full train for the nulls
    f = rig.chip.qubit("q2").f01_ghz
    for p in res.pairs:
        truth = rig.true_crosstalk(p.victim, "q2-line", f)
        assert p.accepted and p.nulled, p
        err = abs(p.x - truth)
        assert 20 * math.log10(err) <= -50 and err <= 4 * p.stderr, p


def calibrate_chip_q2(rig, lines):
    from xtalkcal.calibrate import calibrate_chip

    return calibrate_chip(rig, default_protocol(), aggressors=["q2-line"], log=lines.append)


def test_ringing_tones_keep_their_leak_to_a_share_of_each_victims_ring():
    from types import SimpleNamespace

    plan = SimpleNamespace(probe=SimpleNamespace(repeats=4), n_victims=2,
                           comp_radius=np.array([0.1, 0.1]))
    # Victim 0 nulled (ring 0.004), victim 1 handed (rings like a companion, first 0.1);
    # companion 0 couples at 0.2, companion 1's coupling is unmeasured.
    col = SimpleNamespace(couplings=np.array([[np.nan, 0.05, 0.2, np.nan],
                                              [0.1, np.nan, 0.1, 0.1]], dtype=complex))
    rad = np.array([0.004, 0.1])
    sel, handed = np.array([True, False]), np.array([False, True])
    new_rad, comp = tone_radii(plan, col, rad, sel, handed, repeats=16)
    assert new_rad[0] == 0.004  # the victim's own ring is not touched
    assert new_rad[1] == pytest.approx(TONE_LEAK_SHARE * 0.004 / 0.05)
    assert comp[0] == pytest.approx(TONE_LEAK_SHARE * 0.004 / 0.2)
    assert comp[1] == pytest.approx(0.1 * 4 / 16)  # unmeasured: shrinks as 1/K
    # a weak coupling never widens a tone beyond its first ring
    col.couplings[0, 2] = 1e-6
    _, comp = tone_radii(plan, col, rad, sel, handed, repeats=16)
    assert comp[0] == 0.1
