"""The whole job, in order: survey → nulls → settings → verification → drift watch.

:func:`run_campaign` is what ``xtalkcal demo`` runs on the bundled simulated chip; it
takes any rig. Steps:

1. calibrate every column (column-parallel survey and null search), record it in the
   chip's ledger;
2. compensation settings: the multi-victim solve with the line-to-line couplings
   measured at each aggressor's frequency, then closed-loop refinement; a column keeps
   the pairwise settings where the other solve is expected worse
   (:func:`xtalkcal.outputs.choose_settings`); exported as JSON and CSV;
3. verification: every compensated pair re-measured with all of its aggressor's
   cancellation tones on — by the re-check's analysis, and with the written settings
   played by the applicator as the control stack plays them
   (:func:`xtalkcal.outputs.verify_settings`) — and simultaneous randomized
   benchmarking of chosen qubits before and after compensation, against their isolated
   errors;
4. a drift watch (only where the rig can let time pass, e.g. the simulator's
   ``wait``): the schedule's re-checks for a number of days, re-centring and
   recalibrating as they decide.

Everything lands in a :class:`CampaignResult`, which the report module turns into
figures and pages.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from xtalkcal.calibrate import CalibrationResult, calibrate_chip, measured_couplings
from xtalkcal.compensation import (
    CompensationSettings,
    Refinement,
    apply_to_timeline,
    multi_victim_settings,
    pairwise_settings,
    refine_settings,
)
from xtalkcal.drift import PairCheck, Schedule, recheck_column, run_due, schedule_after_calibration
from xtalkcal.hardware import Rig
from xtalkcal.measure import BatchRunner, Protocol
from xtalkcal.outputs import (
    PlayedResidual,
    SettingsChoice,
    choose_settings,
    closed_loop_choice,
    verify_settings,
)
from xtalkcal.store import Ledger, ledger_entries, ledger_sweeps
from xtalkcal.verification import (
    DriveTrim,
    SimultaneousRBReport,
    draw_sequences,
    own_drive_trims,
    simultaneous_rb,
)

__all__ = ["CampaignResult", "DriftSample", "run_campaign"]

log = logging.getLogger(__name__)

Truth = Callable[[str, str, float, float], complex]  # (victim, line, freq, t_s) -> X

# Shots of the verification re-checks relative to a routine re-check.
VERIFY_SHOTS_FACTOR = 4


@dataclass(frozen=True)
class DriftSample:
    """One moment of the drift watch for one pair."""

    t_s: float
    aggressor: str
    victim: str
    true_residual_db: float | None  # true field with all tones in use (simulator only)
    checked_residual_db: float | None  # measured by a re-check at this moment
    decision: str | None


@dataclass
class CampaignResult:
    """Everything :func:`run_campaign` produced."""

    calibration: CalibrationResult
    settings: CompensationSettings
    verification: list[PairCheck] = field(default_factory=list)
    rb: SimultaneousRBReport | None = None
    # Change of each benchmarked qubit's own drive with compensation on, measured and
    # divided out before benchmarking (:func:`xtalkcal.verification.own_drive_trims`).
    trims: dict[str, DriveTrim] = field(default_factory=dict)
    drift: list[DriftSample] = field(default_factory=list)
    drift_actions: dict[str, int] = field(default_factory=dict)
    shots: dict[str, int] = field(default_factory=dict)
    tolerance_db: float = -45.0
    refinement: Refinement | None = None
    # Simulator only: worst true field (dB) at a victim with all of its aggressor's tones
    # on, for the pairwise, multi-victim and closed-loop settings.
    all_on_db: dict[str, float] = field(default_factory=dict)
    # Simulator only: per pair, the true field (dB) with every tone of ``settings`` on.
    all_on_pair_db: dict[tuple[str, str], float] = field(default_factory=dict)
    # The written settings played by the applicator: each pair's residual as measured.
    played: list[PlayedResidual] = field(default_factory=list)
    # Columns that kept the pairwise settings, and why.
    settings_notes: list[str] = field(default_factory=list)


def _db(x: complex) -> float:
    return float(20 * np.log10(max(abs(x), 1e-15)))


def _field_with(truth: Truth, settings: CompensationSettings, pair: tuple[str, str],
                t_s: float) -> complex:
    """True field at the victim of ``pair`` with every tone of ``settings`` for its aggressor.

    In units of the victim's own line: X_ij(f_j) + r_ij + Σ_k X_ik(f_j)·r_kj.
    """
    p = settings.pair(*pair)
    w = truth(p.victim, p.aggressor_line, p.frequency_ghz, t_s) + p.ratio
    for q in settings.for_aggressor(p.aggressor_line):
        if q.victim != p.victim:
            w += truth(p.victim, q.victim_line, p.frequency_ghz, t_s) * q.ratio
    return w


def settings_in_use(snapshot, chip, couplings) -> CompensationSettings:
    """The settings a lab would push after a ledger change: the multi-victim solve of the
    current matrix (every pair in use, not the survey-only ones) with the measured
    couplings at the aggressors' frequencies."""
    pairs = [k for k, e in snapshot.entries.items() if e.kind != "survey"]
    return multi_victim_settings(snapshot, chip, pairs=pairs, couplings=couplings)


def _couplings_of(results: Sequence[CalibrationResult]):
    """Coupling lookup from several results, the first that measured a coupling wins."""
    fns = [measured_couplings(r) for r in results]

    def get(victim: str, line: str, freq_ghz: float) -> complex:
        for fn in fns:
            x = fn(victim, line, freq_ghz)
            if x != 0:
                return x
        return 0j

    return get


def settings_all_on_db(truth: Truth, chip, settings: CompensationSettings, t_s: float
                       ) -> float:
    """Worst true all-on field (dB) over the pairs of ``settings`` (simulator truth).

    Field at victim i from aggressor j, in units of i's own line, with every tone of
    ``settings`` for j playing: X_ij(f_j) + r_ij + Σ_k X_ik(f_j)·r_kj.
    """
    return max((_db(_field_with(truth, settings, p.key, t_s)) for p in settings),
               default=-np.inf)


@dataclass
class _Job:
    """What the steps of :func:`run_campaign` share: the rig, the protocol, the output folder,
    one batch runner and the shots each step spent."""

    rig: Rig
    protocol: Protocol
    out: Path
    runner: BatchRunner
    say: Callable[[str], None]
    shots: dict[str, int] = field(default_factory=dict)


def _calibrate(job: _Job, aggressors: Sequence[str] | None
               ) -> tuple[CalibrationResult, Ledger]:
    """Step 1: calibrate the columns and record them in a new ledger under ``job.out``."""
    rig, runner, chip = job.rig, job.runner, job.rig.chip
    job.say(f"1/4 calibrating {len(aggressors or chip.line_names)} aggressor columns")
    cal = calibrate_chip(rig, job.protocol, runner=runner,
                         aggressors=list(aggressors or []) or None)
    job.shots["calibration"] = runner.shots_executed + runner.shots_resumed
    led = Ledger.create(job.out / "ledger", chip=chip.name, exist_ok=True)
    led.append(ledger_entries(cal, run_tag="cal0"), sweeps=ledger_sweeps(cal, run_tag="cal0"))
    return cal, led


def _compensation(job: _Job, cal: CalibrationResult, led: Ledger, refine_rounds: int
                  ) -> tuple[CompensationSettings, Refinement, SettingsChoice]:
    """Step 2: the multi-victim solve, then closed-loop refinement, recorded in the ledger;
    the settings written as JSON and CSV. Returns (first solve, refinement, choice)."""
    rig, runner = job.rig, job.runner
    job.say("2/4 compensation settings: multi-victim solve, then closed-loop refinement")
    first_choice = choose_settings(cal, "multi-victim")
    first = first_choice.settings
    before = runner.shots_executed
    ref = refine_settings(rig, job.protocol, cal, first, runner=runner, rounds=refine_rounds)
    job.shots["refinement"] = runner.shots_executed - before
    for k, r in enumerate(ref.results, start=1):
        # measured near the operating point, every other tone ringing: the current matrix
        led.append(ledger_entries(r, run_tag=f"refine{k}"),
                   sweeps=ledger_sweeps(r, run_tag=f"refine{k}"))
    choice = closed_loop_choice(first_choice, ref, cal)
    settings = choice.settings
    job.say(f"    {len(ref.results)} refinement round(s), largest moves "
            + ", ".join(f"{m:.1f}σ" for m in ref.moves)
            + (" (converged)" if ref.converged else ""))
    for note in choice.notes:
        job.say(f"    {note}")
    settings.write_json(job.out / "settings.json")
    settings.write_csv(job.out / "settings.csv")
    return first, ref, choice


def _all_on_truth(result: CampaignResult, truth: Truth, rig: Rig, cal: CalibrationResult,
                  first: CompensationSettings) -> None:
    """Simulator only: the true all-on fields of the pairwise, multi-victim and closed-loop
    settings, and per pair with the settings in use."""
    chip, settings = rig.chip, result.settings
    t = rig.now()
    result.all_on_db = {
        "pairwise": settings_all_on_db(truth, chip, pairwise_settings(cal, chip), t),
        "multi-victim": settings_all_on_db(truth, chip, first, t),
        "closed-loop": settings_all_on_db(truth, chip, settings, t)}
    result.all_on_pair_db = {p.key: _db(_field_with(truth, settings, p.key, t))
                             for p in settings}


def _verify(job: _Job, led: Ledger, result: CampaignResult) -> None:
    """Step 3a: every nulled pair re-measured with all of its aggressor's tones on."""
    runner, protocol = job.runner, job.protocol
    job.say("3/4 verification: residuals re-measured with all compensation on")
    snap = led.current()
    before = runner.shots_executed
    # A one-off statement for the report, not a routine check: VERIFY_SHOTS_FACTOR times
    # the re-check's shots, so that it resolves each residual well below the tolerance.
    rc = protocol.recheck
    verify_protocol = replace(protocol, recheck=replace(
        rc, shots_per_point=VERIFY_SHOTS_FACTOR * rc.shots_per_point))
    for a in sorted({a for (a, _v), e in snap.entries.items() if e.kind == "null"}):
        victims = [v for (aa, v), e in snap.entries.items() if aa == a and e.kind == "null"]
        result.verification += recheck_column(job.rig, verify_protocol, snap, a, victims,
                                              runner=runner, ledger=led, key=f"verify-{a}")
    job.shots["verification"] = runner.shots_executed - before


def _verify_played(job: _Job, cal: CalibrationResult, result: CampaignResult) -> None:
    """Step 3a, continued: the written settings played by the applicator, each pair
    re-nulled around zero (its residual measured, nothing taken out by calculation)."""
    job.say("    verification of the written settings as the control stack plays them")
    played, _measured, runner = verify_settings(
        job.rig, job.protocol, cal, result.settings, record=job.out / "record",
        progress=job.runner.progress, timeout_s=job.runner.timeout_s, key_prefix="played")
    result.played = played
    job.shots["played verification"] = runner.shots_executed


def _benchmark(job: _Job, result: CampaignResult, rb_qubits: Sequence[str],
               rb_lengths: Sequence[int], rb_draws: int, rb_shots: int) -> None:
    """Step 3b: simultaneous RB of ``rb_qubits`` without and with compensation (own drives
    re-trimmed with compensation on)."""
    rig, runner, chip, settings = job.rig, job.runner, job.rig.chip, result.settings
    job.say(f"    simultaneous randomized benchmarking of {', '.join(rb_qubits)}")
    seqs = draw_sequences(list(rb_qubits), list(rb_lengths), rb_draws, rng=7)

    def compensate(tl):
        return apply_to_timeline(tl, settings, chip, repetition_ns=rig.repetition_ns)

    before = runner.shots_executed
    # The cancellation tones that protect the others at a qubit's own frequency
    # reach that qubit too: its gate amplitudes are re-trimmed with compensation on
    # (common practice), measured here rather than taken from the matrix (which
    # holds the fields at the victims, not back at the aggressor's own qubit).
    result.trims = own_drive_trims(rig, list(rb_qubits), compensate, runner=runner,
                                   key="trim")
    job.shots["gate re-trim"] = runner.shots_executed - before
    before = runner.shots_executed
    retrim = {chip.line_of(q).name: (chip.qubit(q).f01_ghz, 1.0 / (1.0 + t.change))
              for q, t in result.trims.items()}

    def compensate_trimmed(tl):
        tones = tuple(
            t.scaled(retrim[t.line][1], t.line)
            if t.line in retrim and abs(t.freq_ghz - retrim[t.line][0]) < 1e-6 else t
            for t in tl.tones)
        return compensate(replace(tl, tones=tones))

    result.rb = simultaneous_rb(rig, seqs, transforms={"uncompensated": None,
                                                       "compensated": compensate_trimmed},
                                shots=rb_shots, runner=runner, rng=7)
    job.shots["benchmarking"] = runner.shots_executed - before


def _drift_samples(rig: Rig, led: Ledger, pairs: list[tuple[str, str]],
                   checks: list[PairCheck], truth: Truth | None, coupling_lookup
                   ) -> list[DriftSample]:
    """One moment of the drift watch: per followed pair still in use, the true residual
    (simulator only) and what a re-check at this moment measured."""
    checked = {(c.aggressor, c.victim): c for c in checks}
    cur = led.current()
    in_use = (settings_in_use(cur, rig.chip, coupling_lookup) if truth is not None
              else None)
    keys = {p.key for p in in_use} if in_use is not None else set(pairs)
    samples = []
    for pair in pairs:
        if pair not in cur or pair not in keys:
            continue
        tr = None if in_use is None else _db(_field_with(truth, in_use, pair, rig.now()))
        c = checked.get(pair)
        samples.append(DriftSample(
            rig.now(), pair[0], pair[1], tr,
            None if c is None else float(c.outcome.residual_db),
            None if c is None else c.outcome.decision.value))
    return samples


def _drift_watch(job: _Job, result: CampaignResult, led: Ledger, ref: Refinement, *,
                 days: float, advance: Callable[[float], None], truth: Truth | None,
                 step_h: float, watch: Sequence[str] | None) -> None:
    """Step 4: ``days`` of scheduled re-checks, the rig's time let pass ``step_h`` at a
    time; the schedule saved under ``job.out``."""
    rig, protocol, runner, cal = job.rig, job.protocol, job.runner, result.calibration
    job.say(f"4/4 drift watch: {days:g} days of scheduled re-checks")
    schedule = Schedule(protocol.recheck)
    schedule_after_calibration(schedule, cal, rig.now())
    if watch is not None:
        for pair in schedule.pairs():
            if pair[0] not in watch:
                schedule.remove(pair)
    t_end = rig.now() + days * 86400.0
    before = runner.shots_executed
    actions = {"rechecks": 0, "recentred": 0, "recalibrated columns": 0}
    pairs = list(schedule.pairs())
    # the truth compares the field with the settings a lab would derive from the
    # ledger after each step (multi-victim solve, couplings measured in the
    # refinement's passes, which see every direction, else in the calibration's)
    coupling_lookup = _couplings_of(list(reversed(ref.results)) + [cal])
    while rig.now() < t_end:
        advance(step_h * 3600.0)
        rep = run_due(rig, protocol, led, schedule, runner=runner)
        actions["rechecks"] += len(rep.checked)
        actions["recentred"] += len(rep.recentred)
        actions["recalibrated columns"] += len(rep.recalibrated)
        result.drift += _drift_samples(rig, led, pairs, rep.checked, truth, coupling_lookup)
    schedule.save(job.out / "schedule.json")
    job.shots["drift watch"] = runner.shots_executed - before
    result.drift_actions = actions


def run_campaign(
    rig: Rig,
    protocol: Protocol,
    out: str | Path,
    *,
    aggressors: Sequence[str] | None = None,
    rb_qubits: Sequence[str] = (),
    rb_lengths: Sequence[int] = (1, 50, 100, 200),
    rb_draws: int = 6,
    rb_shots: int = 20000,
    days: float = 0.0,
    advance: Callable[[float], None] | None = None,
    truth: Truth | None = None,
    step_h: float = 0.5,
    watch: Sequence[str] | None = None,
    refine_rounds: int = 2,
    verify_played: bool = True,
    progress: Callable[[int], None] | None = None,
    say: Callable[[str], None] = print,
) -> CampaignResult:
    """Run the whole job and keep its records under ``out`` (ledger, schedule, batches).

    Parameters
    ----------
    rig : Rig
    protocol : Protocol
    out : path
        Folder for ``ledger/``, ``record/``, ``schedule.json`` and the settings files.
    aggressors : sequence of str, optional
        Columns to calibrate (default all).
    rb_qubits : sequence of str
        Qubits for simultaneous RB (none: skipped).
    days : float
        Length of the drift watch; needs ``advance``.
    advance : callable(seconds), optional
        Lets rig time pass (``SimRig.wait``).
    truth : callable(victim, line, freq_ghz, t_s) -> X, optional
        Ground truth, for a simulated device only: adds the true residuals.
    step_h : float
        Time step of the drift watch (h): the schedule is asked what is due each step.
    watch : sequence of str, optional
        Aggressor lines whose pairs the drift watch follows (default all calibrated).
    refine_rounds : int
        Largest number of closed-loop refinement rounds
        (:func:`xtalkcal.compensation.refine_settings`).
    verify_played : bool
        Also verify the written settings as the control stack plays them
        (:func:`xtalkcal.outputs.verify_settings`).
    """
    out = Path(out)
    job = _Job(rig, protocol, out, BatchRunner(rig, out / "record", progress=progress), say)
    cal, led = _calibrate(job, aggressors)
    first, ref, choice = _compensation(job, cal, led, refine_rounds)
    result = CampaignResult(cal, choice.settings, tolerance_db=protocol.recheck.tolerance_db,
                            refinement=ref, settings_notes=list(choice.notes))
    if truth is not None:
        _all_on_truth(result, truth, rig, cal, first)

    _verify(job, led, result)
    if verify_played:
        _verify_played(job, cal, result)
    if rb_qubits:
        _benchmark(job, result, rb_qubits, rb_lengths, rb_draws, rb_shots)

    if days > 0 and advance is not None:
        _drift_watch(job, result, led, ref, days=days, advance=advance, truth=truth,
                     step_h=step_h, watch=watch)
    result.shots = job.shots
    return result
