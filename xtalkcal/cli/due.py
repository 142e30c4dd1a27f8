"""``due``: re-check whatever is due now (for cron), write the settings that changed; with
``--list``, say what is due and when the next check is, and send nothing."""

from __future__ import annotations

import argparse
import cmath
import datetime as dt
import math
import sys
from pathlib import Path

from xtalkcal.cli.calibrating import existing_ledger
from xtalkcal.cli.compensating import write_settings
from xtalkcal.cli.rigs import add_rig, make_rig, rig_start_s
from xtalkcal.cli.shared import (
    EXIT_FAILED,
    EXIT_OK,
    add_protocol,
    load_protocol,
    usage_error,
    utc_text,
)
from xtalkcal.hardware import limits_summary

__all__ = ["add_commands", "cover_every_column", "settings_changes"]


def cover_every_column(schedule, snapshot) -> list[tuple[str, str]]:
    """Put every compensated pair of the matrix (a null or a re-check, not a survey) that
    the schedule lacks on it, as calibrated when its entry was measured; the pairs added.

    A pair without history is first checked at the drift policy's first interval (a
    fraction of the protocol's), as after a calibration, so its drift rate is known early.
    """
    from xtalkcal.drift import first_interval

    added = []
    first_h = first_interval(schedule.settings)
    for (a, v), e in sorted(snapshot.entries.items()):
        if e.kind != "survey" and (a, v) not in schedule:
            schedule.calibrated((a, v), e.measured_at_s, interval_h=first_h)
            added.append((a, v))
    return added


def _clock_warning(rig, led) -> None:
    entries = led.entries()
    if not entries:
        return
    last = max(entries, key=lambda e: e.measured_at_s)
    if rig.now() < last.measured_at_s:
        print(f"warning: the rig's clock ({rig.now() / 3600:.2f} h) is behind the ledger's "
              f"latest entry ({last.measured_at_s / 3600:.2f} h of rig time, stored "
              f"{last.measured_at_utc}): the schedule counts in rig time, so checks will not "
              "fall due until the clock passes it; check the rig's clock (was it reset?)",
              file=sys.stderr)


def _at_utc(rig, t_s: float) -> str:
    """A rig time as a UTC moment (rig clock taken to run with the wall clock)."""
    now = dt.datetime.now(dt.timezone.utc)
    try:
        return utc_text(now + dt.timedelta(seconds=t_s - rig.now()))
    except OverflowError:
        return "never"


def _list(rig, schedule) -> int:
    now = rig.now()
    due = schedule.due(now)
    aside = schedule.set_aside_pairs()
    print(f"{len(schedule)} pairs on the schedule ({len(aside)} set aside); now "
          f"{utc_text(dt.datetime.now(dt.timezone.utc))}")
    for pair in schedule.pairs():
        slot = schedule.slot(pair)
        if pair in aside:
            state = f"set aside: {aside[pair]}"
        elif pair in due:
            state = f"due now (since {_at_utc(rig, slot.due_s)})"
        else:
            state = f"next check {_at_utc(rig, slot.due_s)}"
        print(f"{pair[0]:>6} → {pair[1]:<6} every {slot.interval_h:g} h: {state}")
    later = [schedule.slot(p).due_s for p in schedule.pairs()
             if p not in aside and p not in due]
    print(f"{len(due)} due now" + (f"; the next check after those: {_at_utc(rig, min(later))}"
                                   if later else "") + "; nothing was sent")
    return EXIT_OK


def settings_changes(before, after) -> list[str]:
    """One line per setting that changed between two settings (added, removed, moved)."""
    old = {p.key: p for p in before} if before is not None else {}
    new = {p.key: p for p in after}

    def show(p) -> str:
        return (f"{p.magnitude_db:.1f} dB ∠{math.degrees(cmath.phase(p.ratio)):.1f}° "
                f"({p.solve})")

    lines = []
    for key in sorted(set(old) | set(new)):
        a, b = old.get(key), new.get(key)
        if a is None:
            lines.append(f"{key[0]} → {key[1]}: new setting {show(b)}")
        elif b is None:
            lines.append(f"{key[0]} → {key[1]}: setting removed (was {show(a)})")
        elif a.ratio != b.ratio or a.solve != b.solve:
            move = abs(b.ratio - a.ratio) / max(b.stderr, 1e-15)
            lines.append(f"{key[0]} → {key[1]}: {show(a)} → {show(b)}, moved {move:.1f} σ")
    return lines


def _settings_now(led, chip, protocol, solve):
    from xtalkcal.outputs import calibration_from_ledger, choose_settings, settings_pairs

    cal = calibration_from_ledger(led, chip, protocol)
    if not settings_pairs(cal):
        return None
    return choose_settings(cal, solve).settings


def cmd_due(args: argparse.Namespace) -> int:
    """Do whatever is due now (cron-friendly), then exit."""
    from xtalkcal.drift import Schedule, run_due
    from xtalkcal.measure import BatchRunner

    protocol = load_protocol(args.protocol)
    led = existing_ledger(args.ledger)
    if args.settings_out and Path(args.settings_out).suffix.lower() not in (".json", ".csv"):
        raise usage_error("--settings-out", f"{args.settings_out}: accepted: a .json or .csv "
                                            "file name")
    rig = make_rig(args.rig, seed=args.seed, drift=True, start_s=rig_start_s(args.rig, led),
                   chip_file=args.chip, config=args.rig_config)
    if led.chip != rig.chip.name:
        raise usage_error("--ledger", f"{args.ledger} belongs to chip {led.chip!r}, the rig "
                                      f"drives {rig.chip.name!r}")
    protocol.check_against(rig.chip)  # before any rig time: names in overrides and
    schedule = Schedule.load_or_new(args.schedule, protocol.recheck)
    schedule.check_against(rig.chip)  # in the schedule's pairs
    print(limits_summary(rig.chip), flush=True)
    _clock_warning(rig, led)
    added = cover_every_column(schedule, led.current())
    if added and len(added) < len(schedule):
        print(f"scheduled {len(added)} compensated pairs the schedule lacked: "
              + ", ".join(f"{a} → {v}" for a, v in added))
    if args.list or args.dry_run:
        return _list(rig, schedule)
    before = _settings_now(led, rig.chip, protocol, args.solve) if args.settings_out else None
    rep = run_due(rig, protocol, led, schedule, log=print,
                  runner=BatchRunner(rig, timeout_s=args.rig_timeout))
    schedule.save(args.schedule)
    if not rep.checked:
        print(f"nothing due at rig time {rep.now_s / 3600:.2f} h "
              f"({utc_text(dt.datetime.now(dt.timezone.utc))})")
    else:
        print(f"{len(rep.checked)} pairs re-checked, {len(rep.recentred)} re-centred, "
              f"{len(rep.recalibrated)} columns recalibrated; {rep.shots:,} shots")
    if args.settings_out:
        after = _settings_now(led, rig.chip, protocol, args.solve)
        changes = settings_changes(before, after) if after is not None else []
        if after is not None:
            write_settings(after, Path(args.settings_out))
        for line in changes:
            print(f"setting changed: {line}")
        print(f"wrote {args.settings_out}: " + (f"{len(changes)} settings changed"
                                                 if changes else "no setting changed"))
    broken = [c for c in rep.checked if c.outcome.decision.value == "broken"
              and c.aggressor not in rep.recalibrated]
    # A pair newly set aside needs a person once; later runs only mention it (exit 0).
    return EXIT_FAILED if broken or rep.set_aside else EXIT_OK


def add_commands(add) -> None:
    from xtalkcal.compensation import SOLVES

    u = add("due", cmd_due, "re-check whatever is due now and exit (for cron)")
    u.add_argument("--ledger", required=True, help="the chip's ledger directory")
    u.add_argument("--schedule", required=True, help="schedule file (JSON; created if new)")
    u.add_argument("--list", action="store_true",
                   help="say what is due and when each next check is (UTC); send nothing")
    u.add_argument("--settings-out", default=None, metavar="FILE",
                   help="after the re-checks, write the settings in use (.json or .csv) and "
                        "print each setting that changed")
    u.add_argument("--solve", choices=[s for s in SOLVES if s != "closed-loop"],
                   default="multi-victim", help="solve of the settings written")
    add_protocol(u)
    add_rig(u)
