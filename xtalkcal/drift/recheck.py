"""Scheduled re-checks on a rig: measure a few points around stored nulls, decide, act.

A re-check of an aggressor's compensated pairs replays the calibration's probe (same
aggressor amplitude, same amplification K, same method) with **every** cancellation
tone of that aggressor on, and puts a small ring of points (plus the centre) around
each re-checked victim's stored null, the rings of different victims kept apart as
in the calibration (:func:`xtalkcal.calibrate.ring_around`). The analysis and the
decision are :func:`xtalkcal.drift.analyse_recheck`; the ring radius follows the
calibration's rule (the signal rises by a set amount), the curvature prior comes
from refitting the pair's calibration sweep stored in the ledger.

:func:`run_due` is what a cron job runs: re-check whatever the schedule says is due,
record the outcomes in the ledger (kind ``"recheck"``; a precise one becomes the
current null, which re-centres the pair), recalibrate the columns of pairs that broke
(in a repeat too: one broken re-check is repeated at once, and only the repeat counts)
or drifted beyond doubt without a precise new null, and reschedule (a recalibrated pair
restarts at the protocol's first interval at least). A drift that the
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
    shots_per_point,
    stark_windows,
    survey_radii,
)
from xtalkcal.common import __version__
from xtalkcal.drift.analysis import analyse_recheck
from xtalkcal.drift.outcome import FollowUp, RecheckDecision, RecheckOutcome
from xtalkcal.drift.schedule import Pair, Schedule
from xtalkcal.drift.trends import pair_trend
from xtalkcal.exceptions import SafetyLimitError
from xtalkcal.fits import RejectionReason, VerdictRules, fit_paraboloid
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

__all__ = ["PairCheck", "DueReport", "recheck_column", "run_due", "schedule_after_calibration",
           "take_out_co_victim_leak"]


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


def _pass_couplings(ledger: Ledger | None, entry: LedgerEntry
                    ) -> tuple[tuple[str, ...], tuple[str, ...], np.ndarray, np.ndarray] | None:
    """(victims, sources, C, σ_C) of the calibration pass behind ``entry``, from its sweep.

    σ_C is 0 for sweeps stored before it was recorded."""
    if ledger is None or not entry.sweep_id:
        return None
    try:
        ds = ledger.sweep(entry.sweep_id)
    except KeyError:  # not stored: no correction (a damaged one raises LedgerError)
        return None
    if "coupling_re" not in ds:
        return None
    names = tuple(str(v) for v in ds["victim"].values)
    sources = tuple(str(v) for v in ds["from_victim"].values)
    C = ds["coupling_re"].values + 1j * ds["coupling_im"].values
    err = ds["coupling_stderr"].values if "coupling_stderr" in ds else np.zeros(C.shape)
    return names, sources, C, np.where(np.isfinite(err), err, 0.0)


def _sweep_curvature(ledger: Ledger | None, entry: LedgerEntry) -> tuple[float, float] | None:
    """(κ, σκ) of the pair from its stored calibration sweep, or None."""
    if ledger is None or not entry.sweep_id:
        return None
    try:
        ds = ledger.sweep(entry.sweep_id)
    except KeyError:  # not stored: no prior (a damaged one raises LedgerError)
        return None
    if entry.victim not in list(ds["victim"].values):
        return None
    s = ds.sel(victim=entry.victim)
    if "curvature" in ds and math.isfinite(float(s.curvature)):
        # The column fit's own κ (other tones and per-batch offsets modelled).
        k = float(s.curvature)
        return k, max(float(s.curvature_stderr), 0.25 * k)
    z = s.z_re.values + 1j * s.z_im.values
    rnd = ds["round"].values
    keep = rnd >= 1 if rnd.max() >= 2 else np.ones(rnd.shape, bool)
    e = fit_paraboloid(z[keep], s.signal.values[keep], s.stderr.values[keep],
                       rules=VerdictRules(mismatch_pvalue=0.0)).estimate()
    if not e.accepted:
        return None
    chi = e.reduced_chi2 if math.isfinite(e.reduced_chi2) else 1.0
    # Saturating signals are not exactly quadratic, so the curvature seen depends on the
    # ring radius: the prior is trusted to ±25 % at most.
    sk = max(e.curvature_stderr * math.sqrt(max(1.0, chi)), 0.25 * e.curvature)
    return float(e.curvature), float(sk)


def take_out_co_victim_leak(signal: np.ndarray, stderr: np.ndarray, d: np.ndarray,
                            kappa: float, tones: np.ndarray, c: np.ndarray,
                            c_err: np.ndarray, ringing: np.ndarray
                            ) -> tuple[np.ndarray, np.ndarray]:
    """A re-check's signal with the other tones' known leak onto its victim taken out.

    The victim's signal is ``S0 + κ|d + e + ℓ|²`` with ``d`` its own ring offset from the
    stored null, ``e`` the residual sought and ``ℓ = Σ_k c_k·t_k`` the leak of the other
    tones ``t_k`` through the couplings ``c_k`` the calibration's column fit measured.
    Returned: the signal less ``κ(2 Re(d̄ℓ) + |ℓ|²)``, and its error with what the
    couplings' own errors leave behind added — ``√2·κ|d|·(Σ σ_k²|t_k − t_k,centre|²)^½``
    over the tones that ring (``ringing``). A tone's constant part leaves the same error
    as in the stored value, which was found with the same couplings, so the residual is
    free of it. The ringing part's remainder is bilinear in two rings, on other harmonics
    than the victim's own, so it scatters the points rather than moving the null; on wide
    rings it can exceed the shot noise (a verification on the demo chip was judged broken,
    χ²/dof 4.1, before it was counted).

    Parameters
    ----------
    signal, stderr, d : arrays (n,)
        Signals, their errors, the victim's tone minus its stored null (point 0 the
        ring's centre).
    kappa : float
        The pair's curvature.
    tones : complex array (K, n)
        The other tones per point; ``c``, ``c_err`` (K,) their couplings and the
        couplings' √trace errors; ``ringing`` (K,) bool.
    """
    lead = (c[:, None] * tones).sum(axis=0)  # (0, n) when there are none: zeros
    moving = np.abs(tones - tones[:, :1]) * ringing[:, None]
    lead_var = ((c_err[:, None] * moving) ** 2).sum(axis=0)
    out = signal - kappa * (2 * np.real(np.conj(d) * lead) + np.abs(lead) ** 2)
    return out, np.hypot(stderr, math.sqrt(2) * kappa * np.abs(d) * np.sqrt(lead_var))


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
    """
    chip = rig.chip
    amp = pass_amplitude(protocol, chip, aggressor)
    shape = PulseShape(protocol.pulse.duration_ns, protocol.pulse.sigma_ns)
    settings = protocol.recheck
    wanted = list(victims)
    # The tones in use: pairs that were nulled (or re-checked since), not survey-only ones.
    off = set(silent)
    column = {v: e for (a, v), e in snapshot.entries.items()
              if a == aggressor and e.kind != "survey" and v not in off}
    missing = [v for v in wanted if v not in column]
    if missing:
        raise KeyError(f"no stored null for {aggressor} → {', '.join(missing)}")
    checks: list[PairCheck] = []
    for group in nulled_pass_groups({v: column[v].method for v in wanted}):
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
        # The calibration's rule: where the signal rises by a set amount; without a
        # stored sweep, the survey's radius from the nominal chip.
        radius = survey_radii(probe)
        for i, (e, pr) in enumerate(zip(entries, priors, strict=True)):
            rise = RISE_STARK_RAD if e.method == "stark" else RISE_PROBABILITY
            if pr is not None and pr[0] > 0:
                radius[i] = min(math.sqrt(rise / pr[0]), radius[i])
        n = ring_points_for(len(group), settings.points)
        shots = shots_per_point(settings.shots_per_point, settings.points, n)
        pts = ring_around(z_stored, radius, n)
        sig = measure_probe(runner, probe, pts, shots,
                            f"{key}-{aggressor}-{'stark' if stark else 'res-' + group[0]}")
        now = rig.now()
        C_info = _pass_couplings(ledger, entries[0])
        # Amplitude of every co-victim tone of the calibration pass in each timeline:
        # rings for the victims re-checked now, stored nulls for the others.
        tone_of = {v: pts[:, i] for i, v in enumerate(group)}
        for v, e in column.items():
            if v not in tone_of:
                tone_of[v] = np.full(pts.shape[0], -e.value * amp)
        for i, (v, e, pr) in enumerate(zip(group, entries, priors, strict=True)):
            signal, stderr = sig.signal[:, i], sig.stderr[:, i]
            remainder_err = stderr
            if C_info is not None and pr is not None and v in C_info[0]:
                # The calibration's column fit measured how the other victims' lines
                # reach this victim at this frequency; take their (known) leak out of
                # the signal so that what is left is this pair's own paraboloid.
                names, sources, C, C_err = C_info
                iv = names.index(v)
                known = [(k, u) for k, u in enumerate(sources)
                         if u != v and u in tone_of and np.isfinite(C[iv, k])]
                signal, remainder_err = take_out_co_victim_leak(
                    signal, stderr, pts[:, i] - z_stored[i], pr[0],
                    np.array([tone_of[u] for _, u in known], complex).reshape(len(known), len(pts)),
                    np.array([C[iv, k] for k, _ in known]),
                    np.array([C_err[iv, k] for k, _ in known]),
                    np.array([u in group for _, u in known]))
            def analyse(err, z=pts[:, i], s=signal, z0=z_stored[i], pr=pr):
                o = analyse_recheck(z, s, err, z0, amp, tolerance_db=settings.tolerance_db,
                                    curvature_prior=pr)
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
            x_new = -out.z_null / amp
            cov = np.asarray(out.null_covariance) / amp**2
            precise = math.sqrt(np.trace(cov)) <= 0.5 * 10 ** (settings.tolerance_db / 20)
            ok = (out.decision is not RecheckDecision.BROKEN and precise
                  and math.isfinite(out.reduced_chi2))
            reason = "" if ok else (out.reason if out.decision is RecheckDecision.BROKEN else
                                    "re-check too imprecise to replace the stored null")
            entry = LedgerEntry(
                aggressor=aggressor, victim=v, frequency_ghz=e.frequency_ghz,
                value=complex(x_new) if ok else complex(math.nan, math.nan),
                covariance=tuple(map(tuple, cov)) if ok else ((math.nan,) * 2,) * 2,
                method=e.method, shots=int(sig.shots[:, i].sum()), amplification=K,
                quality=float(out.reduced_chi2) if ok else math.nan,
                verdict="accepted" if ok else "rejected", reason=reason,
                measured_at_s=now, measured_at_utc=utc_timestamp(), rig=rig.describe(),
                software_version=f"xtalkcal {__version__}", kind="recheck",
                tag=f"{out.decision.value}",
                # the calibration sweep this analysis rests on (curvature, couplings)
                sweep_id=e.sweep_id)
            checks.append(PairCheck(aggressor, v, out, entry))
    return checks


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
    """Register every nulled pair of a calibration result as freshly calibrated."""
    for p in result.pairs:
        if p.accepted and p.nulled:
            schedule.calibrated((p.aggressor, p.victim), now_s)


def run_due(
    rig: Rig,
    protocol: Protocol,
    ledger: Ledger,
    schedule: Schedule,
    *,
    runner: BatchRunner | None = None,
    log: Callable[[str], None] | None = None,
) -> DueReport:
    """Do whatever is due now: re-checks, re-centring, recalibrations; then reschedule.

    Returns a :class:`DueReport`. Ledger commits are made as work completes, so an
    interrupted run loses at most the column in flight.
    """
    say = log or (lambda s: None)
    runner = runner or BatchRunner(rig)
    start_shots = runner.shots_executed
    now = rig.now()
    report = DueReport(now)
    snapshot = ledger.current()
    by_agg: dict[str, list[str]] = {}

    def in_use(pair: Pair) -> bool:
        # Compensated now: its current entry is a null or a re-check, not a survey.
        return pair in snapshot and snapshot[pair].kind != "survey"

    for pair in schedule.pairs():
        if not in_use(pair):
            # A later calibration judged it below threshold: no tone, nothing to check.
            schedule.remove(pair)
    for pair in schedule.set_aside_pairs():
        if snapshot[pair].measured_at_s != schedule.slot(pair).set_aside_entry_s:
            schedule.calibrated(pair, snapshot[pair].measured_at_s)
            report.reinstated.append(pair)
            say(f"{pair[0]} → {pair[1]}: calibrated anew since it was set aside; scheduled again")
        else:
            report.still_aside.append(pair)
    if report.still_aside:
        say(f"set aside (not re-checked): {', '.join(f'{a} → {v}' for a, v in report.still_aside)}"
            "; see the schedule file for why")

    def put_aside(pair: Pair, reason: str) -> None:
        schedule.set_aside(pair, reason, snapshot[pair].measured_at_s)
        report.set_aside.append((pair, reason))
        say(f"{pair[0]} → {pair[1]}: set aside: {reason}")

    for pair in schedule.due(now):
        why = unplayable_reason(rig.chip, protocol, snapshot[pair])
        if why is not None:  # every re-check of it would be refused: not this run, not later
            put_aside(pair, why)
    due = schedule.due(now)
    if not due:
        report.shots = runner.shots_executed - start_shots
        return report
    # A re-check batch costs the same whatever the number of victims on its rings (shots
    # per ring are fixed), so when one pair of an aggressor is due, every scheduled pair
    # of the same batch (the aggressor's Stark victims; a resonant victim has a batch of
    # its own) is re-checked with it; the other batches wait for their own due times.
    def batch(pair: Pair) -> str:
        return "stark" if snapshot[pair].method == "stark" else pair[1]

    due_batches = {(a, batch((a, v))) for a, v in due if in_use((a, v))}
    for a in sorted({a for a, _ in due_batches}):
        victims = [v for aa, v in schedule.pairs()
                   if aa == a and (a, batch((a, v))) in due_batches]
        if victims:
            by_agg[a] = victims
    recalibrate: set[str] = set()

    def aside(a: str) -> list[str]:
        return [v for aa, v in schedule.set_aside_pairs() if aa == a]

    def check(a: str, victims: list[str], key: str, confirming: bool) -> list[str]:
        """Re-check ``victims`` of ``a`` and act on each outcome; the broken ones."""
        try:
            checks = recheck_column(rig, protocol, snapshot, a, victims, runner=runner,
                                    ledger=ledger, key=key, silent=aside(a))
        except SafetyLimitError as exc:  # refused before anything was played
            for v in victims:
                put_aside((a, v), f"its re-check was refused by the safety check ({exc})")
            return []
        ledger.append([c.entry for c in checks])
        broken = []
        for c in checks:
            pair = (c.aggressor, c.victim)
            if c.outcome.decision is RecheckDecision.BROKEN and not confirming:
                # Not yet held against the pair's schedule: the repeat decides.
                report.checked.append(c)
                say(f"{a} → {c.victim}: broken ({c.outcome.reason}); repeating")
                broken.append(c.victim)
                continue
            trend = pair_trend(ledger.history(*pair), tolerance_db=protocol.recheck.tolerance_db,
                               now_s=rig.now())
            nxt = schedule.record(pair, c.outcome, rig.now(), trend=trend)
            report.checked.append(c)
            say(f"{a} → {c.victim}: {c.outcome.decision.value} ({c.outcome.reason}), residual "
                f"{c.outcome.residual_db:.1f} dB; next in {nxt.interval_h:.1f} h")
            decision = c.outcome.decision
            if decision is RecheckDecision.BROKEN:
                recalibrate.add(a)
            elif decision is RecheckDecision.DRIFTED or nxt.follow_up is not FollowUp.NONE:
                if c.entry.verdict == "accepted":
                    # The re-check located the moved null precisely: its entry is now the
                    # current one (re-centred) at a fraction of a recalibration's cost.
                    schedule.calibrated(pair, rig.now(), interval_h=nxt.interval_h)
                    report.recentred.append(pair)
                elif c.outcome.confident:
                    recalibrate.add(a)
                # Otherwise the drift is not established beyond the re-check's noise: the
                # schedule has shortened the interval, and the next re-check decides.
        return broken

    for a, victims in by_agg.items():
        tag = f"recheck-{int(rig.now())}"
        broken = check(a, victims, f"{tag}-{a}", confirming=False)
        if broken:
            # A re-check judged broken (its landscape is not this pair's paraboloid) is
            # repeated once before the whole column is recalibrated, and only the repeat
            # counts for the schedule: a chance misfit, or a transient during the batch,
            # costs one more re-check, not a calibration and a reset interval.
            check(a, broken, f"{tag}-{a}-repeat", confirming=True)
    for a in sorted(recalibrate):
        say(f"{a}: recalibrating the column")
        tag = f"recal-{a}-{int(rig.now())}"
        in_use = [v for aa, v in schedule.pairs() if aa == a and v not in aside(a)]
        res = calibrate_chip(rig, protocol, runner=runner, aggressors=[a], key_prefix=tag,
                             null_victims={a: in_use})
        entries, sweeps = ledger_entries(res, run_tag=tag), ledger_sweeps(res, run_tag=tag)
        if entries or sweeps:  # a column with nothing left to measure stores nothing
            ledger.append(entries, sweeps=sweeps)
        for p in res.pairs:
            if p.accepted and p.nulled:
                # A fresh null restarts at the protocol's first interval at least (as after
                # the first calibration); pairs already on longer intervals keep theirs.
                pair = (p.aggressor, p.victim)
                old = schedule.slot(pair).interval_h if pair in schedule else 0.0
                schedule.calibrated(pair, rig.now(),
                                    interval_h=max(old, protocol.recheck.interval_hours))
        report.recalibrated.append(a)
    report.shots = runner.shots_executed - start_shots
    return report
