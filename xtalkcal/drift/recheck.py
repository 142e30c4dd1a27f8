"""Scheduled re-checks on a rig: measure a few points around stored nulls, decide, act.

A re-check of a compensated pair replays the calibration's probe (same aggressor
amplitude, same amplification K, same method) with the pair's own cancellation tone on
and its column's other tones off (:func:`run_due`; :func:`recheck_column` can also ring
a column's victims together with every tone on, as the verification does). A pair
re-checked alone gets a cross of four points and the centre around its stored null, in
two stages: a quarter of the protocol's shots, then as many more as bring the error of
its residual to a quarter of its margin to the tolerance (:func:`second_stage_target`,
at most ``MAX_SECOND_STAGE`` times the first). The analysis and the
decision are :func:`xtalkcal.drift.analyse_recheck`; the ring radius follows the
calibration's rule (the signal rises by a set amount), the curvature prior comes
from refitting the pair's calibration sweep stored in the ledger.

:func:`run_due` is what a cron job runs: re-check whatever the schedule says is due,
record the outcomes in the ledger (kind ``"recheck"``; a precise one becomes the
current null, which re-centres the pair), recalibrate the columns of pairs that broke
(in a repeat too: one broken re-check is repeated at once, each victim on a ring of its
own, free of its co-victims' drifting leak, and only the repeat counts) or drifted beyond
doubt without a precise new null, and reschedule (a re-centred or
recalibrated pair gets its interval from its measured drift, which the new null does not
reset; a pair new to the schedule is first checked early; a step, a residual confidently
beyond twice the tolerance, starts the pair's trend and interval again). A drift that the
re-check cannot establish beyond its own noise only shortens the interval.

A pair whose stored compensation cannot be played within its victim line's amplitude
limit (or whose re-check the safety check refuses) is *set aside*: reported once,
recorded so in the schedule with the reason, its tone left out of its column's other
re-checks, and the rest of the schedule goes on. Later runs mention it in one line; a
new ledger entry for the pair (a calibration) takes it back.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field

import numpy as np

from xtalkcal.calibrate import (
    RISE_PROBABILITY,
    RISE_STARK_RAD,
    calibrate_chip,
    measure_probe,
    nulled_pass_groups,
    pass_amplitude,
    ring_around,
    ring_points_for,
    ring_radius_caps,
    shots_per_point,
    stark_windows,
    survey_radii,
)
from xtalkcal.common import __version__
from xtalkcal.drift.analysis import analyse_recheck
from xtalkcal.drift.inputs import DriftInputError
from xtalkcal.drift.outcome import DEFAULT_RECHECK_RULES, FollowUp, RecheckDecision, RecheckOutcome
from xtalkcal.drift.policy import DUE_DIFFUSION_SIGMA, DUE_POLICY, first_interval, next_check
from xtalkcal.drift.schedule import Pair, Schedule
from xtalkcal.drift.stored_sweep import (
    _Couplings,
    _pass_couplings,
    _sweep_curvature,
    take_out_co_victim_leak,
)
from xtalkcal.drift.trends import pair_trend
from xtalkcal.exceptions import FitInputError, SafetyLimitError
from xtalkcal.fits import RejectionReason, VerdictRules, fit_paraboloid_column
from xtalkcal.hardware import Chip, Rig
from xtalkcal.measure import BatchRunner, ColumnProbe, Protocol, PulseShape
from xtalkcal.store import (
    Ledger,
    LedgerEntry,
    MatrixSnapshot,
    ledger_entries,
    ledger_sweeps,
    utc_timestamp,
)

__all__ = ["PairCheck", "DueReport", "recheck_column", "run_due", "schedule_after_calibration"]


# Largest reduced chi-square of a re-check fit that is absorbed as extra scatter.
MAX_BIRGE = 4.0


@dataclass(frozen=True)
class PairCheck:
    """One pair's re-check: its outcome and the ledger entry made of it."""

    aggressor: str
    victim: str
    outcome: RecheckOutcome
    entry: LedgerEntry


@dataclass
class DueReport:
    """What one :func:`run_due` call did."""

    now_s: float
    checked: list[PairCheck] = field(default_factory=list)
    recentred: list[Pair] = field(default_factory=list)
    recalibrated: list[str] = field(default_factory=list)  # aggressor lines
    set_aside: list[tuple[Pair, str]] = field(default_factory=list)  # newly, with reasons
    still_aside: list[Pair] = field(default_factory=list)  # set aside by an earlier run
    reinstated: list[Pair] = field(default_factory=list)  # calibrated anew since set aside
    shots: int = 0
    recheck_shots: int = 0  # of ``shots``: re-checks, their repeats included
    recalibration_shots: int = 0  # of ``shots``: column recalibrations


def _column_in_use(snapshot: MatrixSnapshot, aggressor: str, wanted: list[str],
                   silent: Iterable[str]) -> dict[str, LedgerEntry]:
    """Stored entries of the tones of ``aggressor`` in use, by victim; KeyError for a wanted
    victim without one."""
    # The tones in use: pairs that were nulled (or re-checked since), not survey-only ones.
    off = set(silent)
    column = {v: e for (a, v), e in snapshot.entries.items()
              if a == aggressor and e.kind != "survey" and v not in off}
    missing = [v for v in wanted if v not in column]
    if missing:
        raise KeyError(f"no stored null for {aggressor} → {', '.join(missing)}")
    return column


@dataclass(frozen=True)
class _GroupProbe:
    """One re-check batch of a column: its victims' stored entries, the probe that replays the
    calibration's pass, the stored nulls as tones and the curvature priors."""

    group: list[str]
    entries: list[LedgerEntry]
    stark: bool
    amplification: int  # K, the largest of the group's
    probe: ColumnProbe
    z_stored: np.ndarray  # (V,) complex
    priors: list[tuple[float, float] | None]


def _group_probe(chip: Chip, aggressor: str, group: list[str], column: dict[str, LedgerEntry],
                 amp: float, shape: PulseShape, ledger: Ledger | None) -> _GroupProbe:
    """The probe of one batch, every other tone of the column fixed at its stored null."""
    stark = column[group[0]].method == "stark"
    entries = [column[v] for v in group]
    K = max(e.amplification for e in entries)
    others = tuple((chip.line_of(v).name, -e.value * amp) for v, e in column.items()
                   if v not in group)
    methods = tuple(e.method for e in entries)
    # the calibration's windows (a pure function of the nominal chip and the train)
    windows = (stark_windows(chip, aggressor, group, methods, amp, K, shape) if stark
               else ())
    probe = ColumnProbe(chip, aggressor, tuple(group), amplitude=amp, repeats=K,
                        methods=methods, shape=shape, merged=stark, fixed=others,
                        stark_windows_ns=windows)
    z_stored = np.array([-e.value * amp for e in entries])
    priors = [_sweep_curvature(ledger, e) for e in entries]
    return _GroupProbe(group, entries, stark, K, probe, z_stored, priors)


# Rise of a Stark victim's cross in a re-check of its own (rad). A Stark phase is quadratic
# in the field and read without wrapping up to 3π/2 (ColumnProbe.signals), and the null's
# position error goes as 1/√(κ·rise): the calibration's null-ring cap (1.5 × RISE_STARK_RAD,
# calibrate.ring_radius_caps) costs a third fewer shots than its 2 rad for the same error.
RECHECK_RISE_STARK_RAD = 1.5 * RISE_STARK_RAD


def _ring_radii(gp: _GroupProbe, *, solo: bool = False) -> np.ndarray:
    """Ring radius per victim of the batch (fraction of full scale); ``solo``: the rise of a
    pair re-checked alone (``RECHECK_RISE_STARK_RAD`` for Stark victims)."""
    # The calibration's rule: where the signal rises by a set amount; without a
    # stored sweep, the survey's radius from the nominal chip.
    radius = ring_radius_caps(gp.probe) if solo else survey_radii(gp.probe)
    stark_rise = RECHECK_RISE_STARK_RAD if solo else RISE_STARK_RAD
    for i, (e, pr) in enumerate(zip(gp.entries, gp.priors, strict=True)):
        rise = stark_rise if e.method == "stark" else RISE_PROBABILITY
        if pr is not None and pr[0] > 0:
            radius[i] = min(math.sqrt(rise / pr[0]), radius[i])
    return radius


def _co_victim_tones(pts: np.ndarray, group: list[str], column: dict[str, LedgerEntry],
                     amp: float) -> dict[str, np.ndarray]:
    """Amplitude of every co-victim tone of the calibration pass in each timeline: rings for
    the victims re-checked now, stored nulls for the others."""
    tone_of = {v: pts[:, i] for i, v in enumerate(group)}
    for v, e in column.items():
        if v not in tone_of:
            tone_of[v] = np.full(pts.shape[0], -e.value * amp)
    return tone_of


def _leak_taken_out(i: int, gp: _GroupProbe, pts: np.ndarray, signal: np.ndarray,
                    stderr: np.ndarray, couplings: _Couplings | None,
                    tone_of: dict[str, np.ndarray]
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Victim ``i``'s signal without the co-victims' known leak, and the error of what is left.

    Unchanged (``stderr`` itself as the error) without the pass's couplings or a prior."""
    v, pr = gp.group[i], gp.priors[i]
    if couplings is None or pr is None or v not in couplings[0]:
        return signal, stderr
    # The calibration's column fit measured how the other victims' lines
    # reach this victim at this frequency; take their (known) leak out of
    # the signal so that what is left is this pair's own paraboloid.
    names, sources, C, C_err = couplings
    iv = names.index(v)
    known = [(k, u) for k, u in enumerate(sources)
             if u != v and u in tone_of and np.isfinite(C[iv, k])]
    return take_out_co_victim_leak(
        signal, stderr, pts[:, i] - gp.z_stored[i], pr[0],
        np.array([tone_of[u] for _, u in known], complex).reshape(len(known), len(pts)),
        np.array([C[iv, k] for k, _ in known]),
        np.array([C_err[iv, k] for k, _ in known]),
        np.array([u in gp.group for _, u in known]))


def _analyse_pair(z: np.ndarray, signal: np.ndarray, stderr: np.ndarray,
                  remainder_err: np.ndarray, z0: complex, amp: float, tolerance_db: float,
                  prior: tuple[float, float] | None) -> RecheckOutcome:
    """One pair's re-check analysed, its errors widened only as far as the fit needs."""
    def analyse(err):
        o = analyse_recheck(z, signal, err, z0, amp, tolerance_db=tolerance_db,
                            curvature_prior=prior)
        return o, (o.decision is RecheckDecision.BROKEN
                   and o.cause is RejectionReason.MODEL_MISMATCH)

    # Shot noise alone first: what the couplings' errors leave of the ringing
    # co-victims' leak lies on other harmonics than the null's and does not move
    # it. Only if the points do not fit is that remainder counted in their errors
    # (it can exceed the shot noise on wide rings), and a misfit still left is
    # treated as extra scatter up to MAX_BIRGE (signals are not exactly
    # quadratic): errors scaled by the Birge ratio. Beyond, the landscape is
    # judged broken.
    out, mismatch = analyse(stderr)
    if mismatch and remainder_err is not stderr:
        out, mismatch = analyse(remainder_err)
    chi = out.reduced_chi2
    if mismatch and math.isfinite(chi) and chi < MAX_BIRGE:
        out, _ = analyse(remainder_err * math.sqrt(chi))
    return out


# A re-check whose residual is confidently above STEP_FACTOR times the tolerance found a step:
# intervals are set so that a drifting pair is checked where its predicted residual (2σ)
# reaches the tolerance, so twice the tolerance is a change the drift model did not
# foresee. Its entry is tagged STEP_TAG and the pair's trend starts again from it.
STEP_FACTOR = 2.0
STEP_TAG = "step"


def is_step(out: RecheckOutcome, factor: float = STEP_FACTOR,
            k: float = DEFAULT_RECHECK_RULES.confidence_sigma) -> bool:
    """True for a drifted re-check with ``|dX| − kσ > factor · tol`` (``k`` the rules'
    ``confidence_sigma``, as in ``confident``; the re-checks are analysed with the default
    rules)."""
    if out.decision is not RecheckDecision.DRIFTED or not out.confident:
        return False
    tol = 10 ** (out.tolerance_db / 20)
    return bool(out.residual - k * out.residual_stderr > factor * tol)


def since_step(history: Iterable[LedgerEntry]) -> list[LedgerEntry]:
    """A pair's history from its latest step (an entry tagged ``STEP_TAG``) on; all of it
    without one. The drift before a step says nothing of the drift after it, and a step
    taken as a random-walk increment would hold the pair at the shortest interval."""
    entries = list(history)
    at = max((i for i, e in enumerate(entries) if e.kind == "recheck" and e.tag == STEP_TAG),
             default=0)
    return entries[at:]


def _recheck_entry(rig: Rig, aggressor: str, victim: str, stored: LedgerEntry,
                   out: RecheckOutcome, amp: float, amplification: int, shots: int,
                   now: float, tolerance_db: float) -> LedgerEntry:
    """The ledger entry of one pair's re-check: accepted (a new current null) only when not
    broken and precise enough to replace the stored null."""
    x_new = -out.z_null / amp
    cov = np.asarray(out.null_covariance) / amp**2
    precise = math.sqrt(np.trace(cov)) <= 0.5 * 10 ** (tolerance_db / 20)
    ok = (out.decision is not RecheckDecision.BROKEN and precise
          and math.isfinite(out.reduced_chi2))
    reason = "" if ok else (out.reason if out.decision is RecheckDecision.BROKEN else
                            "re-check too imprecise to replace the stored null")
    return LedgerEntry(
        aggressor=aggressor, victim=victim, frequency_ghz=stored.frequency_ghz,
        value=complex(x_new) if ok else complex(math.nan, math.nan),
        covariance=tuple(map(tuple, cov)) if ok else ((math.nan,) * 2,) * 2,
        method=stored.method, shots=shots, amplification=amplification,
        quality=float(out.reduced_chi2) if ok else math.nan,
        verdict="accepted" if ok else "rejected", reason=reason,
        measured_at_s=now, measured_at_utc=utc_timestamp(), rig=rig.describe(),
        software_version=f"xtalkcal {__version__}", kind="recheck",
        tag=STEP_TAG if is_step(out) else out.decision.value,
        # the calibration sweep this analysis rests on (curvature, couplings)
        sweep_id=stored.sweep_id)


# A Stark victim due within this fraction of its interval joins a due one's shared train:
# its re-check comes early, but it costs the train nothing but its own readout.
SHARE_AHEAD = 0.5

# A pair re-checked alone: a cross of CROSS_POINTS points about its stored null, then the
# centre. The first stage spends FIRST_STAGE_FRACTION of the protocol's re-check shots;
# the second is sized from the first's own error (see second_stage_target).
CROSS_POINTS = 4
FIRST_STAGE_FRACTION = 0.25
MAX_SECOND_STAGE = 8  # the second stage spends at most this many times the first's shots


def residual_axis(out: RecheckOutcome) -> float:
    """Largest standard-error axis of a re-check's ``dX`` (inf when it has none).

    The error of the null the re-check would adopt, in every direction, not only along the
    residual: what re-centring the pair leaves behind.
    """
    c = np.asarray(out.shift_covariance, dtype=float)
    if not np.all(np.isfinite(c)):
        return math.inf
    return float(math.sqrt(max(float(np.linalg.eigvalsh(c)[-1]), 0.0)))


def second_stage_target(residual: float, tolerance_db: float) -> float:
    """Error of the residual a re-check aims at: a quarter of its margin to the tolerance.

    The margin ``tol − |dX|`` of the first stage's estimate, taken within
    ``[tol/2, tol]``: an estimate at or above the tolerance will be re-centred on the
    re-check's own null, whose error is then the pair's residual, so it gets a quarter of a
    fresh null's margin (the whole tolerance); the floor of half the tolerance keeps an
    estimate close to it from asking for unbounded shots. With this error, a pair whose
    residual is a third of the tolerance fails "confidently within" (``|dX| + 2σ < tol``)
    by chance with probability ``ncx2.sf(16, 2, 4)`` ≈ 3.4 % (the estimate's
    ``|dX|²/σ²`` is non-central χ² with 2 degrees of freedom).
    """
    tol = 10 ** (float(tolerance_db) / 20)
    if not (math.isfinite(residual) and residual < tol):
        return 0.25 * tol
    return 0.25 * min(max(tol - residual, 0.5 * tol), tol)


def second_stage_shots(first_shots: int, first_error: float, target: float) -> int:
    """Shots per point of the second stage: the pooled error ``first_error·√(n1/(n1+n2))``
    reaches ``target`` (0 when the first stage already does; an undetermined first error
    gets the rest of the protocol's shots), at most ``MAX_SECOND_STAGE`` times the first's.
    """
    if not math.isfinite(first_error):
        need = first_shots * (1.0 / FIRST_STAGE_FRACTION - 1.0)
    elif first_error <= target:
        return 0
    else:
        need = first_shots * ((first_error / target) ** 2 - 1.0)
    return int(min(math.ceil(need), MAX_SECOND_STAGE * first_shots))


def _pooled(stages: list[tuple[np.ndarray, np.ndarray, np.ndarray]]
            ) -> tuple[np.ndarray, np.ndarray, int]:
    """Signal and error per point of stages measured at the same points, and the shots.

    Each stage is weighted by its shots (the same weight at every point): for counts this
    is the pooled fraction, and a Stark batch's common reference offset stays one constant
    offset, which the paraboloid's ``c0`` absorbs.
    """
    n = np.array([float(sh.mean()) for _, _, sh in stages])
    w = n / n.sum()
    signal = sum(wi * s for wi, (s, _, _) in zip(w, stages, strict=True))
    err = np.sqrt(sum((wi * e) ** 2 for wi, (_, e, _) in zip(w, stages, strict=True)))
    return signal, err, int(sum(sh.sum() for _, _, sh in stages))


def _solo_check(rig: Rig, runner: BatchRunner, gp: _GroupProbe, amp: float,
                settings, key: str) -> PairCheck:
    """One pair re-checked alone in two stages on a cross about its stored null."""
    v, e = gp.group[0], gp.entries[0]
    radius = _ring_radii(gp, solo=True)
    pts = ring_around(gp.z_stored, radius, CROSS_POINTS)
    total = settings.shots_per_point * settings.points  # the protocol's shots per ring
    first = max(50, int(round(FIRST_STAGE_FRACTION * total / pts.shape[0])))
    tag = f"{key}-{gp.probe.aggressor}-{'stark' if gp.stark else 'res-' + v}"
    stages = []

    def analyse(shots: int, label: str) -> RecheckOutcome:
        sig = measure_probe(runner, gp.probe, pts, shots, label)
        stages.append((sig.signal[:, 0], sig.stderr[:, 0], sig.shots[:, 0]))
        signal, err, _ = _pooled(stages)
        return _analyse_pair(pts[:, 0], signal, err, err, gp.z_stored[0], amp,
                             settings.tolerance_db, gp.priors[0])

    out = analyse(first, tag)
    more = second_stage_shots(first, residual_axis(out),
                              second_stage_target(out.residual, settings.tolerance_db))
    if more:
        out = analyse(more, f"{tag}-more")
    _, _, shots = _pooled(stages)
    entry = _recheck_entry(rig, gp.probe.aggressor, v, e, out, amp, gp.amplification, shots,
                           rig.now(), settings.tolerance_db)
    return PairCheck(gp.probe.aggressor, v, out, entry)


def recheck_column(
    rig: Rig,
    protocol: Protocol,
    snapshot: MatrixSnapshot,
    aggressor: str,
    victims: Iterable[str],
    *,
    runner: BatchRunner,
    ledger: Ledger | None = None,
    key: str = "recheck",
    silent: Iterable[str] = (),
    solo: bool = False,
    shared: bool = False,
) -> list[PairCheck]:
    """Re-check the given victims of one aggressor, all cancellation tones on.

    Parameters
    ----------
    rig : Rig
    protocol : Protocol
        ``recheck`` settings (tolerance, points, shots) and the probe pulse.
    snapshot : MatrixSnapshot
        The current matrix; it holds the stored nulls and the tones to play.
    aggressor : str
    victims : iterable of str
        Victims of ``aggressor`` to re-check; each must have an entry in ``snapshot``.
    runner : BatchRunner
    ledger : Ledger, optional
        Source of the calibration sweeps (curvature prior).
    key : str
        Prefix of the batch keys in the runner's record.
    silent : iterable of str
        Victims whose stored tones are not played (pairs set aside, see :func:`run_due`).
    solo : bool
        Re-check each victim on its own (the column's other tones held at their stored
        nulls): a cross of ``CROSS_POINTS`` points about its stored null and the centre, in
        two stages (:func:`second_stage_shots`), instead of ringing the calibration pass's
        co-victims together.
    shared : bool
        Stark victims rung together in one train have their co-victims' leak taken out with
        the couplings fitted from these same shots (:func:`fits.fit_paraboloid_column`, a
        ring of enough points for it), not with those stored at calibration: the couplings
        drift too, and what the stored ones missed moved the nulls.
    """
    chip = rig.chip
    amp = pass_amplitude(protocol, chip, aggressor)
    shape = PulseShape(protocol.pulse.duration_ns, protocol.pulse.sigma_ns)
    settings = protocol.recheck
    wanted = list(victims)
    column = _column_in_use(snapshot, aggressor, wanted, silent)
    checks: list[PairCheck] = []
    groups = ([[v] for v in wanted] if solo
              else nulled_pass_groups({v: column[v].method for v in wanted}))
    for group in groups:
        gp = _group_probe(chip, aggressor, group, column, amp, shape, ledger)
        if solo:
            checks.append(_solo_check(rig, runner, gp, amp, settings, key))
            continue
        radius = _ring_radii(gp)
        fresh = shared and gp.stark and len(group) > 1
        n = ring_points_for(len(group), _shared_points(len(group)) if fresh else settings.points)
        shots = shots_per_point(settings.shots_per_point, settings.points, n)
        pts = ring_around(gp.z_stored, radius, n)
        sig = measure_probe(runner, gp.probe, pts, shots,
                            f"{key}-{aggressor}-{'stark' if gp.stark else 'res-' + group[0]}")
        now = rig.now()
        couplings = (_fitted_couplings(group, pts, sig) if fresh
                     else _pass_couplings(ledger, gp.entries[0]))
        tone_of = _co_victim_tones(pts, group, column, amp)
        for i, (v, e) in enumerate(zip(group, gp.entries, strict=True)):
            stderr = sig.stderr[:, i]
            signal, remainder_err = _leak_taken_out(i, gp, pts, sig.signal[:, i], stderr,
                                                    couplings, tone_of)
            out = _analyse_pair(pts[:, i], signal, stderr, remainder_err, gp.z_stored[i], amp,
                                settings.tolerance_db, gp.priors[i])
            entry = _recheck_entry(rig, aggressor, v, e, out, amp, gp.amplification,
                                   int(sig.shots[:, i].sum()), now, settings.tolerance_db)
            checks.append(PairCheck(aggressor, v, out, entry))
    return checks


def _shared_points(n_victims: int) -> int:
    """Ring points of a shared Stark re-check: twice the column model's parameters per
    victim (offset, shift, curvature and two complex terms per other tone)."""
    return 2 * (4 + 4 * (n_victims - 1))


def _fitted_couplings(group: list[str], pts: np.ndarray, sig) -> _Couplings | None:
    """(victims, sources, C, σ_C) fitted from a shared re-check's own shots, or None."""
    try:
        fit = fit_paraboloid_column(pts.T, sig.signal.T, sig.stderr.T,
                                    rules=VerdictRules(mismatch_pvalue=0.0))
    except FitInputError:
        return None
    V = len(group)
    C, err = fit.couplings[:, :V], fit.couplings_stderr[:, :V]
    return tuple(group), tuple(group), C, np.where(np.isfinite(err), err, 0.0)


def unplayable_reason(chip: Chip, protocol: Protocol, entry: LedgerEntry) -> str | None:
    """Why the stored compensation of ``entry``'s pair cannot be played, or None.

    The re-check (and the compensation itself) plays ``−X·a`` on the victim's own line for
    an aggressor pulse of amplitude ``a`` (the protocol's probe amplitude): above that
    line's binding amplitude limit, the safety check refuses it on every run.
    """
    line = chip.line_of(entry.victim).name
    limit = chip.amplitude_limit(line)
    need = abs(entry.value) * pass_amplitude(protocol, chip, entry.aggressor)
    if need <= limit:
        return None
    x_db = 20 * math.log10(abs(entry.value)) if math.isfinite(need) else math.nan
    return (f"stored |X| = {x_db:.1f} dB needs a cancellation tone of amplitude {need:.3g} "
            f"on line {line}, above its limit {limit:g}; recalibrate the pair (or review the "
            "chip file's limits) to bring it back")


def schedule_after_calibration(schedule: Schedule, result, now_s: float) -> None:
    """Register every nulled pair of a calibration result as freshly calibrated.

    A pair new to the schedule has no measured drift yet: its first re-check comes at
    :func:`first_interval`, so that its rate is known within the protocol's interval. A pair
    already scheduled keeps its interval.
    """
    for p in result.pairs:
        if p.accepted and p.nulled:
            pair = (p.aggressor, p.victim)
            iv = (schedule.slot(pair).interval_h if pair in schedule
                  else first_interval(schedule.settings))
            schedule.calibrated(pair, now_s, interval_h=iv)


@dataclass
class _DueRun:
    """One :func:`run_due` call: what it works with, the report it fills and the columns it
    will recalibrate."""

    rig: Rig
    protocol: Protocol
    ledger: Ledger
    schedule: Schedule
    runner: BatchRunner
    say: Callable[[str], None]
    report: DueReport
    snapshot: MatrixSnapshot  # the ledger's current matrix when the run began
    recalibrate: set[str] = field(default_factory=set)
    share_stark: bool = False  # see run_due

    def in_use(self, pair: Pair) -> bool:
        """Compensated now: its current entry is a null or a re-check, not a survey."""
        return pair in self.snapshot and self.snapshot[pair].kind != "survey"

    def aside(self, a: str) -> list[str]:
        """Victims of ``a`` set aside in the schedule."""
        return [v for aa, v in self.schedule.set_aside_pairs() if aa == a]

    def put_aside(self, pair: Pair, reason: str) -> None:
        """Set ``pair`` aside in the schedule and report it."""
        self.schedule.set_aside(pair, reason, self.snapshot[pair].measured_at_s)
        self.report.set_aside.append((pair, reason))
        self.say(f"{pair[0]} → {pair[1]}: set aside: {reason}")

    def take_stock(self) -> None:
        """Drop pairs no longer compensated; schedule again the set-aside pairs calibrated anew
        since, and name those still set aside."""
        schedule, report = self.schedule, self.report
        for pair in schedule.pairs():
            if not self.in_use(pair):
                # A later calibration judged it below threshold: no tone, nothing to check.
                schedule.remove(pair)
        for pair in schedule.set_aside_pairs():
            if self.snapshot[pair].measured_at_s != schedule.slot(pair).set_aside_entry_s:
                schedule.calibrated(pair, self.snapshot[pair].measured_at_s)
                report.reinstated.append(pair)
                self.say(f"{pair[0]} → {pair[1]}: calibrated anew since it was set aside; "
                         "scheduled again")
            else:
                report.still_aside.append(pair)
        if report.still_aside:
            self.say("set aside (not re-checked): "
                     f"{', '.join(f'{a} → {v}' for a, v in report.still_aside)}"
                     "; see the schedule file for why")

    def set_aside_unplayable(self, now: float) -> None:
        """Set aside the due pairs whose stored compensation cannot be played."""
        for pair in self.schedule.due(now):
            why = unplayable_reason(self.rig.chip, self.protocol, self.snapshot[pair])
            if why is not None:  # every re-check of it would be refused: not this run, not later
                self.put_aside(pair, why)

    def due_columns(self, due: list[Pair]) -> dict[str, list[str]]:
        """Victims to re-check now, by aggressor: the due pairs in use, and only those."""
        # Each pair is re-checked on its own (see :meth:`check`), so a pair that is due does
        # not bring its co-victims along: every pair keeps the interval its own drift sets.
        by_agg: dict[str, list[str]] = {}
        for a, v in due:
            if self.in_use((a, v)):
                by_agg.setdefault(a, []).append(v)
        return {a: sorted(vs) for a, vs in sorted(by_agg.items())}

    def co_victims(self, a: str, v: str) -> list[str]:
        """The other compensated victims of ``a``: their tones stay off in ``v``'s re-check."""
        return [u for (aa, u), e in self.snapshot.entries.items()
                if aa == a and u != v and e.kind != "survey"]

    def shared_group(self, a: str, due: list[str]) -> list[str]:
        """Stark victims of ``a`` re-checked in one train: the due ones and those due within
        ``SHARE_AHEAD`` of their interval, when there are two or more (else none)."""
        now = self.rig.now()
        aside = set(self.aside(a))

        def soon(v: str) -> bool:
            slot = self.schedule.slot((a, v))
            return slot.due_s - now <= SHARE_AHEAD * slot.interval_h * 3600.0

        group = [v for aa, v in self.schedule.pairs()
                 if aa == a and v not in aside and self.in_use((a, v))
                 and self.snapshot[(a, v)].method == "stark" and (v in due or soon(v))]
        return group if len(group) > 1 and any(v in due for v in group) else []

    def check(self, a: str, victims: list[str], key: str, confirming: bool) -> list[str]:
        """Re-check ``victims`` of ``a``, each alone, and act on each outcome; the broken ones.

        Each victim's ring is played with the column's other cancellation tones off. With
        them on, their leak onto the victim through the victim lines' mutual couplings
        (about the coupling times the other tone, often near the tolerance) has to be
        taken out with the couplings measured at calibration, and those drift like
        everything else: what is left moves the measured null, so that a pair whose own
        element had not moved read as drifted by about that leak, was re-checked at the
        shortest interval and was never settled. Off, the victim sees only the aggressor's
        leak and its own tone, ``A·(X − X_stored) + ring offset``: the change of the pair's
        own element, which is what the stored null and the tolerance refer to. (The
        all-tones-on field is what the verification measures.)
        """
        checks: list[PairCheck] = []
        before = self.runner.shots_executed
        shared = [] if confirming or not self.share_stark else self.shared_group(a, victims)
        short: set[str] = set()
        if shared:
            try:
                checks += recheck_column(self.rig, self.protocol, self.snapshot, a, shared,
                                         runner=self.runner, ledger=self.ledger,
                                         key=f"{key}-shared",
                                         silent=self.aside(a) + [u for u in self.co_victims(a, "")
                                                                 if u not in shared],
                                         shared=True)
            except SafetyLimitError:  # each alone below, where a refusal sets one pair aside
                shared = []
            # A due victim the shared train did not measure to its second-stage target (a
            # weak responder next to strong ones) is re-checked alone, in two stages.
            tol_db = self.protocol.recheck.tolerance_db
            short = {c.victim for c in checks
                     if residual_axis(c.outcome) > second_stage_target(c.outcome.residual,
                                                                       tol_db)}
            checks = [c for c in checks if c.victim not in short]
            shared = [v for v in shared if v not in short]
        for v in (v for v in victims if v not in shared):  # a not-due one short: left for later
            try:
                checks += recheck_column(self.rig, self.protocol, self.snapshot, a, [v],
                                         runner=self.runner, ledger=self.ledger,
                                         key=f"{key}-{v}",
                                         silent=self.aside(a) + self.co_victims(a, v),
                                         solo=True)
            except SafetyLimitError as exc:  # refused before anything was played
                self.put_aside((a, v), f"its re-check was refused by the safety check ({exc})")
        self.report.recheck_shots += self.runner.shots_executed - before
        self.ledger.append([c.entry for c in checks])
        broken = []
        for c in checks:
            if c.outcome.decision is RecheckDecision.BROKEN and not confirming:
                # Not yet held against the pair's schedule: the repeat decides.
                self.report.checked.append(c)
                self.say(f"{a} → {c.victim}: broken ({c.outcome.reason}); repeating")
                broken.append(c.victim)
                continue
            self.act_on(c)
        return broken

    def act_on(self, c: PairCheck) -> None:
        """Record a re-check in the schedule; re-centre the pair or mark its column for
        recalibration as the outcome says."""
        rig, schedule = self.rig, self.schedule
        pair = (c.aggressor, c.victim)
        previous_h = schedule.slot(pair).interval_h if pair in schedule else None
        if c.entry.tag == STEP_TAG:
            previous_h = None  # a step: the pair starts again as if new
        try:
            trend = pair_trend(since_step(self.ledger.history(*pair)),
                               tolerance_db=self.protocol.recheck.tolerance_db,
                               now_s=rig.now(), diffusion_sigma=DUE_DIFFUSION_SIGMA)
        except DriftInputError:  # a step whose own entry was rejected: no history yet
            trend = None
        nxt = schedule.record(pair, c.outcome, rig.now(), trend=trend, **DUE_POLICY)
        self.report.checked.append(c)
        self.say(f"{c.aggressor} → {c.victim}: {c.outcome.decision.value} ({c.outcome.reason}), "
                 f"residual {c.outcome.residual_db:.1f} dB; next in {nxt.interval_h:.1f} h")
        decision = c.outcome.decision
        if decision is RecheckDecision.BROKEN:
            self.recalibrate.add(c.aggressor)
        elif decision is RecheckDecision.DRIFTED or nxt.follow_up is not FollowUp.NONE:
            if c.entry.verdict == "accepted":
                # The re-check located the moved null precisely: its entry is now the
                # current one (re-centred) at a fraction of a recalibration's cost. The
                # trend now describes the new null, so it sets the next interval.
                schedule.calibrated(pair, rig.now(),
                                    interval_h=self.fresh_interval(pair, previous_h))
                self.report.recentred.append(pair)
            elif c.outcome.confident:
                self.recalibrate.add(c.aggressor)
            # Otherwise the drift is not established beyond the re-check's noise: the
            # schedule has shortened the interval, and the next re-check decides.

    def recalibrate_column(self, a: str) -> None:
        """Calibrate the column of ``a`` anew (pairs set aside left out), record it and
        reschedule its fresh nulls."""
        rig, protocol, schedule, ledger = self.rig, self.protocol, self.schedule, self.ledger
        self.say(f"{a}: recalibrating the column")
        tag = f"recal-{a}-{int(rig.now())}"
        aside = self.aside(a)
        in_use = [v for aa, v in schedule.pairs() if aa == a and v not in aside]
        before = self.runner.shots_executed
        res = calibrate_chip(rig, protocol, runner=self.runner, aggressors=[a], key_prefix=tag,
                             null_victims={a: in_use})
        self.report.recalibration_shots += self.runner.shots_executed - before
        entries, sweeps = ledger_entries(res, run_tag=tag), ledger_sweeps(res, run_tag=tag)
        if entries or sweeps:  # a column with nothing left to measure stores nothing
            ledger.append(entries, sweeps=sweeps)
        for p in res.pairs:
            if p.accepted and p.nulled:
                # A fresh null does not reset the interval: the pair's measured drift rate
                # survives the recalibration, so a fast pair stays on a short interval.
                pair = (p.aggressor, p.victim)
                old = schedule.slot(pair).interval_h if pair in schedule else None
                schedule.calibrated(pair, rig.now(), interval_h=self.fresh_interval(pair, old))
        self.report.recalibrated.append(a)

    def fresh_interval(self, pair: Pair, previous_h: float | None) -> float:
        """Interval of a pair whose compensation was just set anew (re-centred or
        recalibrated): from its trend, the new null as the reference (:func:`next_check`
        with the trend alone); :func:`first_interval` for a pair without history."""
        settings = self.protocol.recheck
        try:
            trend = pair_trend(since_step(self.ledger.history(*pair)),
                               tolerance_db=settings.tolerance_db,
                               now_s=self.rig.now(), diffusion_sigma=DUE_DIFFUSION_SIGMA)
        except DriftInputError:  # no usable entry (cannot happen after an accepted one)
            return first_interval(settings)
        if previous_h is None and trend.hours_left is None:
            return first_interval(settings)
        return next_check(trend, previous_h, settings, **DUE_POLICY).interval_h


def run_due(
    rig: Rig,
    protocol: Protocol,
    ledger: Ledger,
    schedule: Schedule,
    *,
    runner: BatchRunner | None = None,
    log: Callable[[str], None] | None = None,
    share_stark: bool = False,
) -> DueReport:
    """Do whatever is due now: re-checks, re-centring, recalibrations; then reschedule.

    Returns a :class:`DueReport`. Ledger commits are made as work completes, so an
    interrupted run loses at most the column in flight.

    With ``share_stark`` the Stark victims of one aggressor that are due together (or due
    within ``SHARE_AHEAD`` of their interval) are re-checked in one train
    (:meth:`_DueRun.shared_group`, ``recheck_column(..., shared=True)``). Off by default:
    on the drift bench's generated chips the early checks it brings cost more than the
    shared train saved (see DEVELOPERS.md).
    """
    say = log or (lambda s: None)
    runner = runner or BatchRunner(rig)
    start_shots = runner.shots_executed
    now = rig.now()
    run = _DueRun(rig, protocol, ledger, schedule, runner, say, DueReport(now),
                  ledger.current(), share_stark=share_stark)
    run.take_stock()
    run.set_aside_unplayable(now)
    due = schedule.due(now)
    if due:
        for a, victims in run.due_columns(due).items():
            tag = f"recheck-{int(rig.now())}"
            broken = run.check(a, victims, f"{tag}-{a}", confirming=False)
            if broken:
                # A re-check judged broken (its landscape is not this pair's paraboloid) is
                # repeated once before the whole column is recalibrated, and only the repeat
                # counts for the schedule: a chance misfit, or a transient during the batch,
                # costs one more re-check, not a calibration and a reset interval.
                run.check(a, broken, f"{tag}-{a}-repeat", confirming=True)
        for a in sorted(run.recalibrate):
            run.recalibrate_column(a)
    run.report.shots = runner.shots_executed - start_shots
    return run.report
