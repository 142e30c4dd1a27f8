"""``calibrate``: survey and null (all of a chip, some columns, or named pairs), record the
result in the chip's ledger; and the ledger and record helpers other commands share."""

from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import logging
from pathlib import Path

from xtalkcal.cli.rigs import DryRig, add_rig, dry_run_report, make_rig
from xtalkcal.cli.shared import (
    EXIT_FAILED,
    EXIT_OK,
    add_protocol,
    atomic_write,
    load_protocol,
    local_text,
    parse_pairs,
    progress_bar,
    usage_error,
    utc_text,
)
from xtalkcal.hardware import limits_summary

__all__ = ["add_commands", "open_ledger", "record_in_ledger", "measurement_key",
           "check_record", "existing_ledger", "calibration_scope"]

log = logging.getLogger(__name__)

def check_record(path: str | None, resume: bool) -> str | None:
    """Refuse a ``--record`` folder from an earlier day unless ``resume``; one line saying
    what record is used, or None for none / a new one.

    The record's creation time is that of its oldest batch file.
    """
    if path is None or not Path(path).is_dir():
        return None
    times = [p.stat().st_mtime for p in Path(path).rglob("*") if p.is_file()]
    if not times:
        return None
    made = dt.datetime.fromtimestamp(min(times), dt.timezone.utc)
    today = dt.datetime.now(dt.timezone.utc).date()
    when = f"{utc_text(made)} ({local_text(made)} local)"
    if made.date() < today and not resume:
        raise usage_error("--record", f"{path} was created {when}, on an earlier day: "
                                      "its batches would be replayed as if measured now; "
                                      "accepted: a new folder, or --resume to resume it")
    return f"resuming the record {path}, created {when}"


def existing_ledger(path: str):
    """The ledger at ``path``, which must exist (commands that read a ledger)."""
    from xtalkcal.store import Ledger

    if not Path(path).exists():
        raise usage_error("--ledger", f"{path} does not exist; run `xtalkcal calibrate "
                                      "--ledger DIR` first")
    return Ledger(path)


def open_ledger(path: str, chip: str):
    """The chip's ledger at ``path``, opened (every commit verified), or None if there is
    none yet (it is created when something is stored, so a failed run leaves no folder)."""
    from xtalkcal.store import Ledger

    if not Path(path).exists():
        return None
    led = Ledger.create(path, chip=chip, exist_ok=True)
    if led.chip != chip:
        raise usage_error("--ledger", f"{path} belongs to chip {led.chip!r}, not {chip!r}")
    return led


def calibration_scope(args, chip, protocol):
    """(aggressors, forced pairs, protocol) from ``--aggressors`` and ``--pairs``."""
    aggressors = None
    if getattr(args, "aggressors", None):
        aggressors = [a.strip() for a in args.aggressors.split(",") if a.strip()]
        bad = [a for a in aggressors if a not in chip.line_names]
        if bad or not aggressors:
            raise usage_error("--aggressors", f"{args.aggressors!r}: accepted: lines of chip "
                                              f"{chip.name!r}: {', '.join(chip.line_names)}")
    pairs = parse_pairs(args.pairs, chip) if getattr(args, "pairs", None) else None
    if pairs is None:
        return aggressors, None, protocol
    lines = list(dict.fromkeys(a for a, _ in pairs))
    if aggressors is not None and set(lines) - set(aggressors):
        raise usage_error("--pairs", "names lines outside --aggressors; accepted: pairs of "
                                     "the lines given (or --pairs alone)")
    # The named pairs are nulled whatever their survey says, and only they
    # (calibrate_chip's null_only): their columns' surveys share the shots, so the other
    # victims' survey estimates cost nothing more and are kept.
    forced = {a: [v for aa, v in pairs if aa == a] for a in lines}
    return lines, forced, protocol


def cmd_calibrate(args: argparse.Namespace) -> int:
    import xtalkcal.calibrate as calibrate
    from xtalkcal.measure import BatchRunner
    from xtalkcal.outputs import dumps, format_table, unsettled_pairs

    protocol = load_protocol(args.protocol)
    rig = make_rig(args.rig, seed=args.seed, drift=not args.no_drift, chip_file=args.chip,
                   config=args.rig_config)
    protocol.check_against(rig.chip)  # names in overrides, before any rig time
    aggressors, forced, protocol = calibration_scope(args, rig.chip, protocol)
    print(limits_summary(rig.chip), flush=True)
    if args.dry_run:
        return dry_run_calibrate(rig, protocol, aggressors, forced)
    resumed = check_record(args.record, args.resume)
    if resumed:
        print(resumed)
    # A broken ledger is found before any rig time is spent, not after the calibration.
    led = open_ledger(args.ledger, rig.chip.name) if args.ledger else None
    out = Path(args.output)
    runner = BatchRunner(rig, args.record, progress=progress_bar(args),
                         timeout_s=args.rig_timeout)
    result = calibrate.calibrate_chip(rig, protocol, runner=runner, aggressors=aggressors,
                                      null_victims=forced, null_only=forced,
                                      log=lambda s: log.info(s))
    if runner.progress is not None:
        runner.progress.close()
    atomic_write(out, dumps(result) + "\n")
    said = None
    if args.ledger:
        said = record_in_ledger(args.ledger, rig.chip.name, result, ledger=led,
                                resumed_from=args.record if runner.shots_resumed else None)
    print(format_table(result))
    failures, warnings = unsettled_pairs(result)
    print(f"\n{len(result.pairs)} pairs, {result.shots} shots, "
          f"{result.rig_seconds:.1f} s of rig time{_resumed_note(runner, args.record)}; "
          f"wrote {out}")
    if said:
        print(said)
    print(runner.tally.summary())
    for text in warnings:
        print(f"warning: {text}")
    for text in failures:
        print(f"unsettled: {text}")
    return EXIT_FAILED if failures else EXIT_OK


def dry_run_calibrate(rig, protocol, aggressors=None, forced=None) -> int:
    """Plan a calibration, check every planned batch against the limits, send nothing."""
    from xtalkcal.calibrate import calibrate_chip
    from xtalkcal.measure import BatchRunner

    dry = DryRig(rig)
    runner = BatchRunner(dry)
    calibrate_chip(dry, protocol, runner=runner, aggressors=aggressors, null_victims=forced,
                   null_only=forced, log=lambda s: log.info(s))
    dry_run_report(rig, runner.tally, "before any data (the surveys of every column)")
    print("The null searches depend on what the surveys find: each of their batches is "
          "checked against the same limits before it is sent.")
    return EXIT_OK


def _resumed_note(runner, record) -> str:
    """What came from the record and what was measured now ('' if nothing was resumed)."""
    if not runner.shots_resumed:
        return ""
    return (f" ({runner.shots_resumed} shots, {runner.rig_seconds_resumed:.1f} s resumed "
            f"from {record}; {runner.shots_executed} shots, "
            f"{runner.rig_seconds_executed:.1f} s newly executed)")


def record_in_ledger(path: str, chip: str, result, *, resumed_from: str | None = None,
                     ledger=None) -> str:
    """Append a calibration (entries and raw sweeps) to the chip's ledger, one commit.

    A calibration resumed from a ``--record`` folder may repeat one whose estimates the
    ledger holds already (the first run finished, or the same run is started again): an
    estimate counts as held if the ledger has an entry with the same pair, frequency,
    value, covariance, shots, verdict and pass (the same numbers from the same data,
    whatever run tag it was stored under; see `measurement_key`). Those are not appended
    again; only what was measured anew is, with its sweeps (a sweep identical to one stored
    is linked, not copied). A calibration that measured no pair stores nothing (a valid,
    empty result). ``ledger`` is the ledger opened before the calibration, if it existed.
    Returns one line saying what was done.
    """
    from xtalkcal.store import Ledger, ledger_entries, ledger_sweeps

    if not result.pairs and not result.sweeps:
        only = result.protocol.only_methods
        why = (f"the protocol's methods.only = {list(only)} selects no victim on any line"
               if only else "the chip has no qubit besides each line's own to measure")
        return f"ledger {path}: nothing stored: the calibration measured no pair ({why})"
    led = ledger or open_ledger(path, chip) or Ledger.create(path, chip=chip)
    tag = fresh_tag(led, "cal-" + dt.datetime.now(dt.timezone.utc).strftime("%Y%m%dT%H%M%S"))
    entries = ledger_entries(result, run_tag=tag)
    sweeps = ledger_sweeps(result, run_tag=tag)
    held: dict[tuple, object] = {}
    if resumed_from is not None:
        for e in led.entries():
            held.setdefault(measurement_key(e), e)
    old = [held[k] for k in map(measurement_key, entries) if k in held]
    if old:
        entries = [e for e in entries if measurement_key(e) not in held]
        # Sweeps of this run already stored under an earlier tag of the same record.
        stored = set(led.sweep_ids())
        relink: dict[str, str] = {}
        for sid, ds in list(sweeps.items()):
            key = sid[len(tag) + 1:]
            for old_tag in sorted({e.tag for e in old}):
                twin = f"{old_tag}/{key}" if old_tag else key
                if twin in stored and led.sweep(twin).identical(ds):
                    relink[sid] = twin
                    del sweeps[sid]
                    break
        entries = [dataclasses.replace(e, sweep_id=relink.get(e.sweep_id, e.sweep_id))
                   for e in entries]
    old_tags = ", ".join(sorted({e.tag for e in old if e.tag})) or "untagged"
    if old and not entries and not sweeps:
        seqs = sorted({e.seq for e in old})
        where = f"commit {seqs[0]}" if len(seqs) == 1 else f"commits {', '.join(map(str, seqs))}"
        return (f"ledger {path}: already holds all {len(old)} estimates of this run "
                f"(resumed from {resumed_from}; {where}, tag {old_tags}); nothing appended")
    receipt = led.append(entries, sweeps=sweeps)
    log.info("ledger %s: commit %s", path, receipt)
    line = (f"ledger {path}: appended {len(entries)} estimates and {len(sweeps)} sweeps "
            f"(commit {receipt.seq}, tag {tag})")
    if old:
        line += (f"; {len(old)} estimates resumed from {resumed_from} were already there "
                 f"(tag {old_tags}) and were not appended again")
    return line


def fresh_tag(led, base: str) -> str:
    """A run tag no entry or sweep of the ledger uses yet (two runs in the same second)."""
    used = {e.tag for e in led.entries()} | {s.split("/", 1)[0] for s in led.sweep_ids()}
    tag, n = base, 1
    while tag in used:
        n += 1
        tag = f"{base}-{n}"
    return tag


def measurement_key(e) -> tuple:
    """What makes two ledger entries the same estimate from the same raw data.

    Not when, under which tag or by which rig description they were stored: a rerun that
    resumes from the record reads the rig clock and the rig's description anew (neither is
    in the record), while the numbers come out bit for bit the same. ``repr`` keeps NaN
    (rejected fits) equal to itself.
    """
    sweep = e.sweep_id
    if e.tag and sweep.startswith(e.tag + "/"):
        sweep = sweep[len(e.tag) + 1:]
    return (e.aggressor, e.victim, e.method, e.kind, e.verdict, e.reason, e.shots,
            e.amplification, sweep, repr(e.frequency_ghz), repr(e.value), repr(e.covariance),
            repr(e.quality))


def add_scope(cmd: argparse.ArgumentParser) -> None:
    """--aggressors and --pairs: which part of the chip to calibrate."""
    cmd.add_argument("--aggressors", default=None, metavar="LINE,...",
                     help="comma-separated aggressor lines to calibrate (default: all)")
    cmd.add_argument("--pairs", default=None, metavar="LINE:QUBIT,...",
                     help="calibrate only these pairs: their columns are surveyed and just "
                          "these nulled, the other victims keeping their survey estimates "
                          "(default: every pair above the threshold)")


def add_record(cmd: argparse.ArgumentParser) -> None:
    cmd.add_argument("--record", default=None,
                     help="directory to record each batch in; rerun with it to resume")
    cmd.add_argument("--resume", action="store_true",
                     help="allow a --record folder made on an earlier day to be replayed")


def add_commands(add) -> None:
    k = add("calibrate", cmd_calibrate, "survey the matrix and null every significant pair")
    add_protocol(k)
    add_rig(k)
    add_scope(k)
    k.add_argument("--no-drift", action="store_true", help="freeze the simulator's drift")
    add_record(k)
    k.add_argument("-o", "--output", default="xtalk-matrix.json", help="JSON file to write")
    k.add_argument("--ledger", default=None,
                   help="the chip's ledger directory to append the estimates to (created if new)")
    k.add_argument("-q", "--quiet", action="store_true", help="no progress bar")
