"""Calibrate a whole chip: plan its passes, run them on the rig and collect the result.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Collection, Mapping

from xtalkcal.calibrate.pass_plan import PassRequest, PassStart
from xtalkcal.calibrate.passes import calibrate_pass
from xtalkcal.calibrate.plan import (
    RING_MARGIN,
    RISE_PROBABILITY,
    STRONGEST_DB,
    pass_amplitude,
    risk_map,
    survey_radii,
    two_photon_hazard,
)
from xtalkcal.calibrate.result import CalibrationResult
from xtalkcal.hardware import Rig
from xtalkcal.measure import (
    BatchRunner,
    ColumnProbe,
    Protocol,
    PulseShape,
    choose_method,
)


def calibrate_chip(
    rig: Rig,
    protocol: Protocol,
    *,
    runner: BatchRunner | None = None,
    aggressors: list[str] | None = None,
    column_parallel: bool = True,
    key_prefix: str = "",
    null_victims: Mapping[str, Collection[str]] | None = None,
    null_only: Mapping[str, Collection[str]] | None = None,
    log: Callable[[str], None] | None = None,
) -> CalibrationResult:
    """Survey every column and null every pair above the protocol's threshold.

    Parameters
    ----------
    rig : Rig
    protocol : Protocol
    runner : BatchRunner, optional
        Records batches (resumable); a plain one is made if not given.
    aggressors : list of str, optional
        Aggressor lines to calibrate (default all).
    column_parallel : bool
        True: all victims of an aggressor share the shots. False: one victim per pass
        (the pair-by-pair baseline of the benchmarks).
    null_victims : mapping of aggressor line to victims, optional
        Pairs to null whatever their survey says (a recalibration of pairs already in use
        must not fall back to a survey estimate).
    null_only : mapping of aggressor line to victims, optional
        If given, the only pairs that may be nulled (a calibration of named pairs). Each
        column is still surveyed whole, and its other victims keep their survey estimates
        (accepted ones; a survey rejected for a pair not named is dropped, not widened:
        it was not asked for).
    key_prefix : str
        Prefix of the batch keys in the runner's record (distinct calibrations sharing a
        record folder need distinct prefixes).
    log : callable, optional
        Receives one line of progress text per pass.
    """
    chip = rig.chip
    runner = runner or BatchRunner(rig)
    say = log or (lambda s: None)
    result = CalibrationResult(chip, protocol, rig.describe(), risk=risk_map(chip, protocol))
    shape = PulseShape(protocol.pulse.duration_ns, protocol.pulse.sigma_ns)
    for line in aggressors or list(chip.line_names):
        nullable = None if null_only is None else tuple(null_only.get(line, ()))
        own = chip.line(line).qubit
        victims = [q for q in chip.qubit_names if q != own]
        methods = {v: protocol.method_override(line, v)
                   or choose_method(chip, line, v, protocol.windows) for v in victims}
        if protocol.only_methods:
            victims = [v for v in victims if methods[v] in protocol.only_methods]
        # Stark victims near their two-photon 0–2 line need a short train
        # (plan.two_photon_stark_repeats): each gets a Stark pass of its own.
        amp = pass_amplitude(protocol, chip, line)
        two = [v for v in victims
               if methods[v] == "stark" and two_photon_hazard(chip, line, v, amp)]
        groups = [[v for v in victims if methods[v] != "stark"],
                  [v for v in victims if methods[v] == "stark" and v not in two]]
        for gi, group in enumerate(groups + [[v] for v in two]):
            passes = [group] if column_parallel else [[v] for v in group]
            for victims_of_pass in passes:
                if victims_of_pass:
                    # Column-parallel: the tones already found for this aggressor (in
                    # the other pass, whose victims cannot be read out in this one)
                    # ring around their nulls during later passes, so that the column
                    # fit measures their leak onto this pass's victims (the multi-victim
                    # solve needs it) instead of folding it into these victims' nulls.
                    companions = _nulled_tones(result, protocol, line) if column_parallel else ()
                    force = tuple((null_victims or {}).get(line, ()))
                    handoff = calibrate_pass(rig, runner, protocol, result, PassRequest(
                        line, victims_of_pass, [methods[v] for v in victims_of_pass], shape,
                        stark=(gi >= 1), companions=companions, key_prefix=key_prefix,
                        force=force, nullable=nullable, split=column_parallel), say=say)
                    _null_one_by_one(rig, runner, protocol, result, line, handoff.nulls,
                                     methods, shape, say=say, key_prefix=key_prefix)
                    for v in handoff.resurvey:
                        # Surveyed again alone: a pulse spacing coherent for it and its
                        # own selection (as pair by pair), the column's tones ringing.
                        calibrate_pass(rig, runner, protocol, result, PassRequest(
                            line, [v], [methods[v]], shape, stark=False,
                            companions=_nulled_tones(result, protocol, line),
                            key_prefix=key_prefix, force=force, nullable=nullable,
                            split=True), say=say)
                    _widen_rejected(rig, runner, protocol, result, line,
                                    [v for v in victims_of_pass
                                     if nullable is None or v in nullable],
                                    methods, shape, say=say, key_prefix=key_prefix)
    if null_only is not None:
        result.pairs = [p for p in result.pairs if p.accepted
                        or p.victim in null_only.get(p.aggressor, ())]
    result.shots = runner.shots_executed + runner.shots_resumed
    result.rig_seconds = runner.rig_seconds
    return result


#: Survey scales tried, in order, for a victim whose null fell outside its survey ring.
WIDER_SURVEYS = (2.0, 4.0)
#: Verdicts a wider survey can cure: the null lay beyond the ring, or the ring rose past
#: the fringe's top (a strong pair at a K set for weaker ones).
_WIDEN_REASONS = ("outside_region", "saturated")


def _widen_rejected(rig, runner, protocol, result, line, victims, methods, shape, *, say,
                    key_prefix):
    """Survey again, wider, each victim of a pass whose fit put its null out of reach.

    A pair stronger than the crosstalk the survey was planned for (``STRONGEST_DB``) has
    its null outside the survey ring, and is rejected (``outside_region``) or rises past
    the fringe (``saturated``) — a strong pair left uncompensated. It is surveyed again
    alone, its ring ``WIDER_SURVEYS`` times wider at a K as many times lower (a Stark train
    that factor squared shorter), and nulled whatever that survey says, until a fit is
    accepted; a pair still rejected after the widest stays rejected (and is reported).
    """
    for v in victims:
        for scale in WIDER_SURVEYS:
            old = [p for p in result.pairs if p.aggressor == line and p.victim == v]
            if not old or old[-1].accepted or old[-1].reason not in _WIDEN_REASONS:
                break
            say(f"{line}: {v} {old[-1].reason} at its survey; surveyed again {scale:g}× wider")
            result.pairs = [p for p in result.pairs if not any(p is o for o in old)]
            calibrate_pass(rig, runner, protocol, result, PassRequest(
                line, [v], [methods[v]], shape, stark=methods[v] == "stark",
                companions=_nulled_tones(result, protocol, line), key_prefix=key_prefix,
                force=(v,), split=True, survey_scale=scale), say=say)


def _null_one_by_one(rig, runner, protocol, result, line, handoff, methods, shape, *, say,
                     key_prefix):
    """Null the resonant victims a split survey handed over, one pass each.

    Each pass starts at the survey's estimate, with the K its own victim allows, and the
    column's other tones ringing (those nulled already around their nulls, those still
    waiting around their survey estimates), so the couplings between them come out.
    """
    chip = rig.chip
    amp = pass_amplitude(protocol, chip, line)
    waiting = {v: z for v, z, *_ in handoff}
    for v, z0, kappa, k_survey, sigma in handoff:
        del waiting[v]
        one = ColumnProbe(chip, line, (v,), amplitude=amp, repeats=1, methods=(methods[v],),
                          shape=shape)
        theta = one.expected_rotation_per_pulse(v, STRONGEST_DB)
        k_max = int(protocol.survey.max_train_ns // one.spacing_ns)
        # The K that keeps a null up to the strongest crosstalk unambiguous, or — the
        # pass's own rule for raising K — the K whose ring (radius ∝ 1/K) stays
        # RING_MARGIN survey errors wide, at most ×4 the survey's.
        cap = survey_radii(one)[0]
        r_survey = min(math.sqrt(RISE_PROBABILITY / max(kappa, 1e-12)), cap)
        k_sharp = min(int(k_survey * r_survey / (RING_MARGIN * sigma)), 4 * k_survey)
        K = max(k_survey, min(max(int((math.pi / 4) / theta), k_sharp), k_max))
        rad = min(math.sqrt(RISE_PROBABILITY / (max(kappa, 1e-12) * (K / k_survey) ** 2)),
                  cap)
        companions = _nulled_tones(result, protocol, line) + tuple(waiting.items())
        calibrate_pass(rig, runner, protocol, result, PassRequest(
            line, [v], [methods[v]], shape, stark=False, companions=companions,
            key_prefix=key_prefix, force=(v,), start=PassStart((z0,), (rad,), K)), say=say)


def _nulled_tones(result: CalibrationResult, protocol: Protocol, line: str
                  ) -> tuple[tuple[str, complex], ...]:
    """(victim, tone at its null) of every pair of ``line`` nulled so far."""
    amp = pass_amplitude(protocol, result.chip, line)
    return tuple((p.victim, -p.x * amp) for p in result.pairs
                 if p.aggressor == line and p.accepted and p.nulled)
