"""The K stages of a calibration pass: ring after ring around the nulls, K raised as they
sharpen, until the stop rule, the round limit or the shot budget ends the search.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from xtalkcal.calibrate.pass_data import PassRecord, null_sigma
from xtalkcal.calibrate.pass_plan import PassPlan, Say
from xtalkcal.calibrate.plan import (
    RING_MARGIN,
    RISE_PROBABILITY,
    RISE_STARK_RAD,
    SELECT_SIGMAS,
    STRONGEST_DB,
    companion_radius,
    stark_phase_scale,
    stark_windows,
)
from xtalkcal.measure import ColumnProbe


@dataclass(frozen=True)
class StageState:
    """What one K stage hands to the next.

    Attributes
    ----------
    probe : ColumnProbe
        The probe at the current K.
    centre : ndarray of complex (V,)
        Current estimate of each null.
    selected : ndarray of bool (V,)
        Victims still being nulled.
    searched : ndarray of bool (V,)
        Victims whose null was searched from the first stage on (fit weights).
    handed : ndarray of bool (V,)
        Victims nulled in passes of their own.
    rounds : int
        Rounds measured (or begun) so far.
    cleared : mapping of int to (NullEstimate, int, float)
        Victims found below the threshold at a raised K: the estimate, its K and time.
    """

    probe: ColumnProbe
    centre: np.ndarray
    selected: np.ndarray
    searched: np.ndarray
    handed: np.ndarray
    rounds: int
    cleared: Mapping[int, tuple[Any, int, float]] = field(default_factory=dict)


def null_stages(plan: PassPlan, record: PassRecord, state: StageState, say: Say
                ) -> StageState:
    """The K stages: one :func:`k_stage` after another until the search ends.

    It ends when no victim is left to null, every victim's null is found
    (:func:`null_found`), the protocol's round limit is reached or its shot budget
    (per victim) is spent.
    """
    null = plan.protocol.null
    while (state.selected.any() and state.rounds < null.max_rounds
           and record.spent() < null.shot_budget):
        state, measured = k_stage(plan, record, state, say)
        if not measured:
            break
    return state


def k_stage(plan: PassPlan, record: PassRecord, state: StageState, say: Say
            ) -> tuple[StageState, bool]:
    """One stage: fit, drop victims shown below the threshold, stop or measure a ring.

    Returns the next state and whether a ring was measured (False: the search ends).
    """
    req = plan.request
    rounds = state.rounds + 1
    probe = state.probe
    col = record.fit(probe.repeats, state.searched, plan.stark_rows)
    est = col.estimates
    selected, cleared = state.selected.copy(), dict(state.cleared)
    if req.start is None and rounds >= 2:
        # Victims selected only because their survey was imprecise (|X| + kσ at the
        # threshold), which the rings at a raised K have since shown to lie below it:
        # no longer searched; their measurement at that K is kept (estimate, K, time).
        for i in np.flatnonzero(selected):
            e = est[i]
            if (e.accepted and req.victims[i] not in req.force
                    and (abs(e.z_star) + SELECT_SIGMAS * null_sigma(e)) / plan.amp
                    < plan.thr):
                selected[i] = False
                cleared[int(i)] = (e, probe.repeats, record.data_time())
                say(f"{req.line}: {req.victims[i]} below "
                    f"{plan.protocol.survey.threshold_db:g} dB at K={probe.repeats}, "
                    "not nulled")
    ended = StageState(probe, state.centre, selected, state.searched, state.handed, rounds,
                       cleared)
    if req.start is None and rounds >= 2 and not selected.any():
        return ended, False
    centre = state.centre.copy()
    rad = np.zeros(plan.n_victims)
    done = np.ones(plan.n_victims, bool)
    last = record.last_ring()
    seen = seen_nulls(col, np.concatenate([state.centre, plan.comp_centre]))
    for i in range(plan.n_victims):
        e = est[i]
        if selected[i] and e.accepted:
            centre[i] = seen[i]
            rise = (RISE_STARK_RAD * stark_phase_scale(plan.chip, req.line, req.victims[i],
                                                     plan.amp)
                    if req.methods[i] == "stark" else RISE_PROBABILITY)
            rad[i] = min(math.sqrt(rise / max(e.curvature, 1e-12)), plan.cap[i])
            done[i] = null_found(e, req.methods[i], plan.target, last[:, i], seen[i])
        elif selected[i]:
            # No accepted fit at this K: a ring as high up the signal as the survey's
            # (its radius shrunk as 1/K); the survey's own radius at a raised K would
            # rise far up the fringe and lose the null altogether.
            shrink = min(1.0, plan.probe.repeats / probe.repeats)
            # (a Stark ring's rise ∝ K·r², a resonant one's ∝ (K·r)²)
            rad[i] = plan.radius[i] * (math.sqrt(shrink) if req.methods[i] == "stark"
                                       else shrink)
            done[i] = False
        elif state.handed[i]:
            rad[i] = companion_radius(plan.amp, plan.chip, req.victims[i], centre[i])
    if done.all():
        return ended, False
    probe, rad = raise_k(plan, probe, est, selected, rad, say)
    rad, comp = tone_radii(plan, col, rad, selected, state.handed, probe.repeats)
    pts = plan.rings(centre, rad, plan.n_null, phase0=math.pi / plan.n_null * rounds,
                     comp_radius=comp)
    record.measure(probe, pts, plan.null_shots, f"{plan.tag}-null{rounds:02d}", rounds)
    return StageState(probe, centre, selected, state.searched, state.handed, rounds,
                      cleared), True


#: At a raised K a tone that only rings to reach the victims (a companion, a handed
#: victim) leaks onto each victim being nulled at most this fraction of that victim's own
#: ring radius (its coupling times its ring's radius).
TONE_LEAK_SHARE = 0.7


def tone_radii(plan: PassPlan, col, rad: np.ndarray, selected: np.ndarray,
               handed: np.ndarray, repeats: int) -> tuple[np.ndarray, np.ndarray]:
    """Ring radii of the ringing tones at K = ``repeats``: (victims' ``rad``, companions').

    A tone ringing with radius r_k around its null leaks c_ik·r_k onto victim i, whose
    own ring shrinks as 1/K. Held at the first K's radius, a −14 dB coupling made that
    leak ten times a leakage victim's ring at K = 64, far up the fringe, and the fit lost
    the null. Shrunk as 1/K, the tone's ring no longer told the coupling's bilinear term
    from the victim's own first harmonic (they differ only by r_i·r_k) and the null's
    error grew 30-fold. So each ringing tone keeps the widest ring whose leak onto every
    victim being nulled, at its measured coupling, is ``TONE_LEAK_SHARE`` of that victim's
    ring radius, within the first K's radius (at any K: a Stark victim's ring may be far
    narrower than a companion's first ring); a tone whose couplings are unmeasured
    shrinks as 1/K. Beyond that share the column fit is biased: noise-free, a leak 1.3×
    the victim's ring left its null 24σ off, at 0.7× it is unbiased
    (``tests/test_wrapped_rings.py``).

    Parameters
    ----------
    plan : PassPlan
    col : ColumnNullFit
        The fit at the current K (its couplings; NaN where not determined).
    rad : ndarray (V,)
        The victims' ring radii at the new K (handed victims: their first radius).
    selected, handed : ndarray of bool (V,)
        Victims being nulled; victims nulled elsewhere that ring here.
    repeats : int
        The new K.
    """
    rad = np.asarray(rad, float).copy()
    shrink = min(1.0, plan.probe.repeats / max(repeats, 1))
    V = plan.n_victims
    first = np.concatenate([rad[:V], plan.comp_radius])
    ringing = np.concatenate([handed, np.ones(plan.comp_radius.size, bool)])
    out = first.copy()
    nulled = np.flatnonzero(selected)
    for k in np.flatnonzero(ringing):
        c = np.abs(np.asarray(col.couplings)[nulled, k]) if nulled.size else np.array([])
        ok = np.isfinite(c) & (c > 0)
        if nulled.size and ok.all():
            out[k] = min(first[k], float(np.min(TONE_LEAK_SHARE * rad[nulled] / c)))
        else:
            out[k] = first[k] * shrink
    rad[handed] = out[:V][handed]
    return rad, out[V:]


def seen_nulls(col, tone_centres: np.ndarray) -> np.ndarray:
    """Per victim, where its signal is lowest with the other tones at their ring centres.

    The column fit's null ``a_i`` is that of the aggressor's leak alone; with the other
    tones k at ``z_k`` the victim's field vanishes at ``a_i − Σ_k c_ik·z_k``
    (:func:`xtalkcal.fits.fit_paraboloid_column`). Rings are centred there: a companion
    far from zero behind a strong coupling (−14 dB, a null at 0.03 of full scale) moves
    the lowest point by twice a raised K's ring radius, and a ring centred on ``a_i``
    then sat high up the fringe. NaN for a victim without an accepted fit.

    Parameters
    ----------
    col : ColumnNullFit
        The column fit (its couplings at this K, NaN where not determined).
    tone_centres : ndarray of complex (V + C,)
        The centres of every tone's ring: the victims', then the companions'.
    """
    out = np.full(len(col.estimates), np.nan + 0j)
    for i, e in enumerate(col.estimates):
        if e.accepted:
            c = np.nan_to_num(np.asarray(col.couplings[i], dtype=complex))
            c[i] = 0
            out[i] = e.z_star - c @ tone_centres[: c.size]
    return out


def null_found(e, method: str, target: float, last_ring: np.ndarray,
               seen: complex | None = None) -> bool:
    """The stop rule: whether a victim's null is known well enough to end its search.

    Its 1σ error (Birge-scaled) must be at most ``target``. A sin² signal is not
    quadratic far up its fringe, and off-centre on its ring that pulls the fitted null
    towards the ring's centre; the error says nothing of it. A resonant victim is done
    only once the latest ring was centred on the null to within RING_MARGIN of its
    radius and rose no more than twice the rule's amount (a ring planned from another K
    or spacing can rise much further).

    Parameters
    ----------
    e : NullEstimate
        The victim's accepted estimate.
    method : str
        Its read-out (``"stark"``: the error alone decides).
    target : float
        1σ target (fraction of full scale).
    last_ring : ndarray of complex (n,)
        The victim's tones in the latest batch: its centre first, then the ring (as
        :func:`ring_around` lays them out, a survey ring with its centre repeated); the
        radius is the largest distance of a point from the centre, since a repeated
        centre would make the second point's distance 0.
    seen : complex, optional
        Where the victim's signal is lowest with the other tones at their ring centres
        (:func:`seen_nulls`; default the estimate's null): the point the ring must be
        centred on.
    """
    done = null_sigma(e) <= target
    if method != "stark":
        r_last = ring_radius(last_ring)
        low = e.z_star if seen is None else seen
        done &= (abs(low - last_ring[0]) <= r_last / RING_MARGIN
                 and e.curvature * r_last**2 <= 2 * RISE_PROBABILITY)
    return bool(done)


def ring_radius(ring: np.ndarray) -> float:
    """Radius of one victim's ring (its centre first): the farthest point from the centre."""
    ring = np.asarray(ring, dtype=complex)
    return float(np.max(np.abs(ring - ring[0]))) if ring.size else 0.0


def raise_k(plan: PassPlan, probe: ColumnProbe, est: Sequence[Any], selected: np.ndarray,
            rad: np.ndarray, say: Say) -> tuple[ColumnProbe, np.ndarray]:
    """Raise K as the nulls sharpen; the probe and ring radii for the next ring.

    Only in a resonant pass, once every victim being nulled has an accepted fit and the
    train is coherent for each (for the others K pulses do not amplify K-fold). A raised
    K shrinks each ring by the rise rule at the curvature the new K gives (κ ∝ K²),
    less if it was held at the cap.
    """
    req = plan.request
    nulling = [i for i in range(plan.n_victims) if selected[i]]
    if req.stark and nulling and all(est[i].accepted for i in nulling):
        return lengthen_stark_train(plan, probe, est, nulling, rad, say)
    if (req.stark or not nulling or not plan.coherent[nulling].all()
            or not all(est[i].accepted for i in nulling)):
        return probe, rad
    k_cur = probe.repeats
    k_new = raised_repeats(
        k_cur, plan.k_max, [rad[i] for i in nulling], [null_sigma(est[i]) for i in nulling],
        [int((math.pi / 4) / probe.expected_rotation_per_pulse(req.victims[i], STRONGEST_DB))
         for i in nulling])
    if k_new <= k_cur:
        return probe, rad
    probe = ColumnProbe(plan.chip, req.line, req.victims, amplitude=plan.amp, repeats=k_new,
                        methods=req.methods, shape=req.shape, merged=False,
                        companions=plan.companion_names)
    rad = rad.copy()
    for i in nulling:
        rad[i] = min(math.sqrt(RISE_PROBABILITY / max(
            est[i].curvature * (k_new / k_cur) ** 2, 1e-12)), plan.cap[i])
    say(f"{req.line}: K raised to {k_new} for {', '.join(req.victims[i] for i in nulling)}")
    return probe, rad


def lengthen_stark_train(plan: PassPlan, probe: ColumnProbe, est: Sequence[Any],
                         nulling: Sequence[int], rad: np.ndarray, say: Say
                         ) -> tuple[ColumnProbe, np.ndarray]:
    """Return a shortened Stark train (a wider survey's) to full length once nulls are known.

    A strong pair's survey needs a short train (its phase at the survey ring would wrap),
    but once the rings are centred on the null their rise is set by the rise rule
    whatever the train: a longer train only sharpens the null (the phase per |w|², the
    gain g, grows with the train; the null's error falls as 1/√g). So the null rounds go
    to the protocol's full train (``plan.k_stark``; its Ramsey windows as planned), or
    the longest of K/2, K/4, … that keeps every ring ``RING_MARGIN`` null errors wide
    (radius ∝ 1/√g). The new K's points are fitted on their own.
    """
    req = plan.request
    k_cur = probe.repeats
    k_new = plan.k_stark
    while k_new > k_cur:
        windows = stark_windows(plan.chip, req.line, req.victims, req.methods, plan.amp,
                                k_new, req.shape)
        longer = ColumnProbe(plan.chip, req.line, req.victims, amplitude=plan.amp,
                             repeats=k_new, methods=req.methods, shape=req.shape, merged=True,
                             companions=plan.companion_names, stark_windows_ns=windows)
        gain = {i: longer.stark_gain(req.victims[i]) / probe.stark_gain(req.victims[i])
                for i in nulling}
        new_rad = rad.copy()
        for i in nulling:
            rise = RISE_STARK_RAD * stark_phase_scale(plan.chip, req.line, req.victims[i],
                                                      plan.amp)
            new_rad[i] = math.sqrt(rise / max(est[i].curvature * gain[i], 1e-12))
        if all(new_rad[i] >= RING_MARGIN * null_sigma(est[i]) for i in nulling):
            say(f"{req.line}: Stark train back to K={k_new} for "
                f"{', '.join(req.victims[i] for i in nulling)}")
            return longer, new_rad
        k_new //= 2  # the loop ends once it is no longer above the current K
    return probe, rad


def raised_repeats(k_cur: int, k_max: int, radii: Sequence[float], sigmas: Sequence[float],
                   k_safe: Sequence[int]) -> int:
    """The K the nulls' sharpness allows for the next ring (used only if above ``k_cur``).

    Curvature ∝ K², so the error of z* ∝ 1/K at equal shots: K is raised as far as keeps
    every ring (radius ∝ 1/K) RING_MARGIN errors wide, at most ×4 per round, or — if
    that is more — to the K that keeps a null up to the strongest crosstalk unambiguous
    for each victim (``k_safe``: the survey's K was set by the column's most responsive
    victim, which may be nulled elsewhere); within the longest train ``k_max``.

    Parameters
    ----------
    k_cur, k_max : int
        Current K; largest K.
    radii, sigmas : sequence of float
        Per victim being nulled: its planned ring radius and its null's 1σ error.
    k_safe : sequence of int
        Per victim: the largest unambiguous K.
    """
    k_sharp = [min(int(k_cur * r / (RING_MARGIN * s)), 4 * k_cur)
               for r, s in zip(radii, sigmas, strict=True)]
    return min(min(map(max, k_sharp, k_safe)), k_max)
