"""One calibration pass: a column of victims under one aggressor, from survey to stated nulls.

:func:`calibrate_pass` runs these steps in order, each a function of its own:

1. :func:`~xtalkcal.calibrate.pass_plan.plan_pass` — the fixed numbers of the pass (K,
   radii, ring sizes, target);
2. :func:`survey` — one ring centred on 0, whose fit selects the victims to null, or
   :func:`start_from_nulls` — a first ring around known nulls (refinement);
3. :func:`hand_over` — which victims a split resonant survey leaves to passes of their
   own (one-by-one nulls, or a survey alone);
4. :func:`~xtalkcal.calibrate.stages.null_stages` — the K stages: ring after ring around
   the nulls, K raised as they sharpen, until the stop rule, the round limit or the shot
   budget ends them;
5. :func:`write_pass` — the pairs, couplings and sweep record into the result.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from xtalkcal.calibrate.pass_data import PassRecord, birge_ratio, null_sigma, shots_per_point
from xtalkcal.calibrate.pass_plan import PassPlan, PassRequest, Say, plan_pass
from xtalkcal.calibrate.plan import JOINT_NULL_SPAN, RING_MARGIN, SELECT_SIGMAS, STRONGEST_DB
from xtalkcal.calibrate.result import CalibrationResult, PairResult
from xtalkcal.calibrate.stages import StageState, null_stages
from xtalkcal.hardware import Rig
from xtalkcal.measure import BatchRunner, Protocol


@dataclass(frozen=True)
class PassOpening:
    """Where the K stages start: what the survey (or the start) left.

    Attributes
    ----------
    centre : ndarray of complex (V,)
        Current estimate of each null (0 where the survey found none).
    selected : ndarray of bool (V,)
        Victims to null.
    estimates : tuple of NullEstimate, or None
        The survey's fit (None for a pass from known nulls).
    survey_time : float
        When the opening's data were taken (rig clock, s).
    rounds : int
        Rounds measured so far.
    """

    centre: np.ndarray
    selected: np.ndarray
    estimates: tuple[Any, ...] | None
    survey_time: float
    rounds: int


@dataclass(frozen=True)
class Handoff:
    """Victims of a split resonant survey left to passes of their own.

    ``nulls``: ``(victim, z*, κ, K, σ)`` of those selected, to be nulled one by one;
    ``resurvey``: those the pass's pulse spacing could not see, to be surveyed alone;
    ``handed``: per victim, whether it is nulled elsewhere (its tone rings here like a
    companion's).
    """

    nulls: list[tuple[str, complex, float, int, float]]
    resurvey: list[str]
    handed: np.ndarray = field(default_factory=lambda: np.zeros(0, bool))


def calibrate_pass(rig: Rig, runner: BatchRunner, protocol: Protocol,
                   result: CalibrationResult, request: PassRequest, *,
                   say: Say | None = None) -> Handoff:
    """One pass: survey (unless ``request.start``), then the null rounds; into ``result``.

    With ``request.split`` a resonant pass that selects more than one victim, or one
    that its pulse spacing is not tuned for, hands them over after its survey (their
    results are not recorded): the caller nulls each in a pass of its own, whose pulse
    spacing makes that victim's rotations add up coherently so that K can be raised
    for it.

    Parameters
    ----------
    rig : Rig
    runner : BatchRunner
        Runs and records the batches.
    protocol : Protocol
    result : CalibrationResult
        Receives the pairs, couplings and sweep record of the pass.
    request : PassRequest
        What the pass is asked to do.
    say : callable, optional
        Receives lines of progress text.

    Returns
    -------
    Handoff
        The victims left to passes of their own (empty unless ``request.split``).
    """
    say = say or (lambda s: None)
    plan = plan_pass(rig.chip, protocol, result, request)
    record = PassRecord(runner, rig, request.key_prefix, plan.n_victims,
                        bool(request.companions))
    if request.start is None:
        opening = survey(plan, record, say)
    else:
        opening = start_from_nulls(plan, record, say)
    V = plan.n_victims
    handoff = Handoff([], [], np.zeros(V, bool))
    if request.split and not request.stark and request.start is None:
        handoff = hand_over(request.victims, opening.estimates, opening.selected,
                            plan.coherent, opening.centre, plan.target, plan.probe.repeats,
                            held=held_down(plan))
    selected = opening.selected & ~handoff.handed
    state = StageState(plan.probe, opening.centre, selected, selected.copy(), handoff.handed,
                       opening.rounds)
    state = null_stages(plan, record, state, say)
    write_pass(result, plan, record, opening, handoff, state)
    return handoff


def survey(plan: PassPlan, record: PassRecord, say: Say) -> PassOpening:
    """Measure the survey ring and select the victims above the threshold.

    The survey ring is centred on 0, not on the nulls: each null's error then carries
    |z*|·δκ/κ, and κ is told apart from the offset only by the centre point (every ring
    point of a victim has the same |z|). A long ring (many victims) repeats its centre so
    that it keeps the share of the shots it has in a ring of the protocol's length.
    """
    proto, V = plan.protocol, plan.n_victims
    copies = max(1, round(plan.n_ring / max(proto.survey.ring_points, 1)))
    pts0 = plan.rings(np.zeros(V, complex), plan.radius, plan.n_ring)
    pts0 = np.vstack([pts0[:1]] * (copies - 1) + [pts0])
    record.measure(plan.probe, pts0,
                   shots_per_point(proto.survey.shots, proto.survey.ring_points,
                                   plan.n_ring + copies - 1), f"{plan.tag}-survey", 0)
    est = record.fit(plan.probe.repeats, np.zeros(V, bool), plan.stark_rows).estimates
    survey_time = record.data_time()
    selected = survey_selection(est, plan.amp, plan.thr, plan.request.victims,
                                plan.request.force, nullable=plan.request.nullable)
    say(f"{plan.request.line}: K={plan.probe.repeats}, survey of {V} victims, "
        f"{int(selected.sum())} above {proto.survey.threshold_db:g} dB")
    centre = np.array([e.z_star if e.accepted else 0j for e in est])
    return PassOpening(centre, selected, tuple(est), survey_time, 0)


def survey_selection(estimates: Sequence[Any], amp: float, thr: float,
                     victims: Sequence[str], force: Sequence[str], *,
                     nullable: Sequence[str] | None = None) -> np.ndarray:
    """Which victims a survey selects for nulling.

    A victim is selected if its fit is accepted and its upper bound |X| + kσ (k =
    ``SELECT_SIGMAS``) reaches the threshold, or
    if it is forced; a fit without signal means |X| is small against the ring. With
    ``nullable`` given, a victim outside it is never selected (it keeps its survey
    estimate), whatever its survey says.

    Parameters
    ----------
    estimates : sequence of NullEstimate
        The survey's estimates, one per victim.
    amp : float
        Aggressor amplitude (X = −z*/amp).
    thr : float
        Threshold on |X| (linear).
    victims, force : sequence of str
        Names of the victims; those to null whatever the survey says.
    nullable : sequence of str, optional
        The only victims that may be selected (default: all).

    Returns
    -------
    ndarray of bool (V,)
    """
    selected = np.zeros(len(victims), bool)
    for i, e in enumerate(estimates):
        if e.accepted:
            x = -e.z_star / amp
            sx = null_sigma(e) / amp
            selected[i] = abs(x) + SELECT_SIGMAS * sx >= thr or victims[i] in force
    if nullable is not None:
        selected &= np.array([v in nullable for v in victims], bool)
    return selected


def start_from_nulls(plan: PassPlan, record: PassRecord, say: Say) -> PassOpening:
    """Measure a first ring around known nulls (refinement): no survey.

    Every victim is searched, its first ring at the radius its stored curvature gives
    (at most the survey's).
    """
    start = plan.request.start
    V = plan.n_victims
    centre = np.asarray(start.centres, dtype=complex)
    rad0 = np.minimum(np.asarray(start.radii, dtype=float), plan.radius)
    record.measure(plan.probe, plan.rings(centre, rad0, plan.n_null), plan.null_shots,
                   f"{plan.tag}-null00", 1)
    survey_time = record.data_time()
    say(f"{plan.request.line}: K={plan.probe.repeats}, refining {V} victims from their "
        "current settings")
    return PassOpening(centre, np.ones(V, bool), None, survey_time, 1)


#: A victim whose own unambiguous K is at least this many times the survey's (set by a
#: more responsive victim of the column) is "held down" (:func:`held_down`).
HELD_DOWN_FACTOR = 2.0


def held_down(plan: PassPlan) -> np.ndarray:
    """Per victim: whether the survey's K is well below the one its own response allows.

    The survey's K keeps the most responsive victim's null unambiguous; a victim driven
    far more weakly (detuned further, a smaller spectral weight) then sees a ring whose
    signal barely rises, and may read "no signal" even for a strong pair. Alone, its K
    would be ``HELD_DOWN_FACTOR`` or more times higher.
    """
    probe, req = plan.probe, plan.request
    out = np.zeros(plan.n_victims, bool)
    if req.stark:
        return out
    for i, v in enumerate(req.victims):
        own = (math.pi / 4) / (probe.expected_rotation_per_pulse(v, STRONGEST_DB)
                               * req.survey_scale)
        out[i] = min(own, plan.k_max) >= HELD_DOWN_FACTOR * probe.repeats
    return out


def hand_over(victims: Sequence[str], estimates: Sequence[Any], selected: np.ndarray,
              coherent: np.ndarray, centre: np.ndarray, target: float,
              repeats: int, held: np.ndarray | None = None) -> Handoff:
    """Which victims of a resonant survey are left to passes of their own.

    A resonant victim the train is not coherent for sees K pulses add up with whatever
    phase its detuning gives them, possibly cancelling: a survey fit without signal says
    nothing of its |X| then. It is surveyed again alone; one selected is nulled in a pass
    of its own (K can be raised only for the others).

    Victims nulled in the same shots share one model, in which each one's tone leaks
    onto the others (couplings c_ik). Its rings circle its own null z*_k, so telling the
    aggressor's leak from c_ik·z*_k needs rings as wide as |z*_k|, and a null ring
    shrinks as 1/K to a few target errors: a victim whose null lies far beyond that
    would make the others' errors stop falling as K rises. Such a victim is nulled in a
    pass of its own; here its tone rings wide around its survey estimate, like a
    companion's, which keeps the others' models apart. Judged on the survey's lower 2σ
    bound: a victim surveyed with a wide error (its K set by another) is not sent away
    on noise alone. At least one joint victim stays.

    Parameters
    ----------
    victims : sequence of str
    estimates : sequence of NullEstimate
        The survey's estimates.
    selected, coherent : ndarray of bool (V,)
        Victims the survey selected; victims the train is coherent for.
    centre : ndarray of complex (V,)
        The survey's nulls (0 where it found none).
    target : float
        The stop rule's 1σ target (fraction of full scale).
    repeats : int
        The survey's K.
    held : ndarray of bool (V,), optional
        Victims whose survey K another victim held down (:func:`held_down`): one that
        shows no signal is surveyed again alone too, at its own K: its signal rises with
        (K·θ)², so at a K several times too low a strong pair's ring may rise less than
        the noise.
    """
    V = len(victims)
    held = np.zeros(V, bool) if held is None else np.asarray(held, bool)
    resurvey = []
    if V > 1:
        resurvey = [victims[i] for i in range(V)
                    if (not coherent[i] or held[i]) and not selected[i]
                    and not estimates[i].accepted]
    handed = selected & ~coherent
    joint = selected & coherent
    sigma0 = np.array([null_sigma(e) if e.accepted else 0.0 for e in estimates])
    big = joint & (np.abs(centre) - 2 * sigma0 > JOINT_NULL_SPAN * RING_MARGIN * target)
    if joint.sum() > 1 and big.any():
        keep = joint & ~big
        if not keep.any():
            keep[int(np.argmax(joint))] = True
        handed |= joint & ~keep
    nulls = [(victims[i], estimates[i].z_star, estimates[i].curvature, repeats,
              null_sigma(estimates[i])) for i in range(V) if handed[i]]
    return Handoff(nulls, resurvey, handed)


def write_pass(result: CalibrationResult, plan: PassPlan, record: PassRecord,
               opening: PassOpening, handoff: Handoff, state: StageState) -> None:
    """Record the pass: a pair per victim kept here, the couplings and the sweep.

    The victims still selected get their fit at the final K (falling back on the points
    at the first K if it failed); the others, and the couplings, come from the points at
    the first K. Victims handed over or surveyed again are left to their own passes.
    """
    req, probe = plan.request, state.probe
    k_first = plan.probe.repeats
    selected = state.selected
    est = record.fit(probe.repeats, state.searched, plan.stark_rows).estimates
    first = record.fit(k_first, state.searched, plan.stark_rows)
    at_final_k = [bool(selected[i] and est[i].accepted) for i in range(plan.n_victims)]
    final = [est[i] if at_final_k[i] else first.estimates[i] for i in range(plan.n_victims)]
    now = record.data_time()
    comp_names = plan.companion_names
    result.couplings[plan.tag] = (req.victims, req.victims + comp_names, first.couplings,
                                  first.couplings_stderr)
    for i, v in enumerate(req.victims):
        if handoff.handed[i] or v in handoff.resurvey:
            continue  # nulled, or surveyed again, in passes of their own
        e = final[i]
        reps = probe.repeats if at_final_k[i] else k_first
        when = now if selected[i] else opening.survey_time
        if i in state.cleared:
            e, reps, when = state.cleared[i]
        result.pairs.append(_pair_result(plan, i, e, bool(selected[i]),
                                         record.victim_shots(i), reps, when,
                                         opening.survey_time))
    result.sweeps[plan.tag] = record.dataset(
        req.victims, comp_names, final, first,
        attrs={"aggressor": req.line, "frequency_ghz": plan.probe.freq_ghz,
               "repeats": probe.repeats, "aggressor_amplitude": plan.amp,
               "methods": ",".join(req.methods), "rig": record.rig.describe(),
               "spacing_ns": probe.spacing_ns, "phase_step_rad": probe.phase_step_rad})


def _pair_result(plan: PassPlan, i: int, e, nulled: bool, shots: int, repeats: int,
                 when: float, survey_time: float) -> PairResult:
    """Victim ``i``'s pair from its estimate ``e`` (a rejected fit: the survey's verdict)."""
    req, amp = plan.request, plan.amp
    v, method, f = req.victims[i], req.methods[i], plan.probe.freq_ghz
    if e.accepted:
        x = -e.z_star / amp
        cov = np.asarray(e.covariance) * birge_ratio(e) / amp**2
        return PairResult(req.line, v, method, f, True, "", complex(x), cov, nulled, shots,
                          repeats, when, "null" if nulled else "survey", plan.tag,
                          float(e.reduced_chi2))
    return PairResult(req.line, v, method, f, False, e.reason.value, None, None, False,
                      shots, repeats, survey_time, "survey", plan.tag, float(e.reduced_chi2))

