"""``report`` (a report folder from the ledger alone) and ``history`` (entries of a pair or
of the whole ledger, as a table or CSV)."""

from __future__ import annotations

import argparse
import sys
from dataclasses import replace
from pathlib import Path

from xtalkcal.cli.calibrating import existing_ledger
from xtalkcal.cli.rigs import chip_for_ledger
from xtalkcal.cli.shared import (
    EXIT_OK,
    add_protocol,
    load_protocol,
    parse_moment,
    parse_pairs,
    usage_error,
    utc_text,
)

__all__ = ["add_commands"]


def _empty_out(path: str, force: bool) -> Path:
    out = Path(path)
    if out.exists() and (not out.is_dir() or any(out.iterdir())) and not force:
        raise usage_error("--out", f"{out} exists and is not an empty folder; choose another "
                                   "folder or pass --force")
    return out


def cmd_report(args: argparse.Namespace) -> int:
    from xtalkcal.outputs import (
        calibration_from_ledger,
        format_table,
        plot_ledger_drift,
        read_played,
        rig_time_at,
        write_report,
    )

    led = existing_ledger(args.ledger)
    chip = chip_for_ledger(led.chip, args.chip)
    protocol = load_protocol(args.protocol)
    moment = parse_moment(args.as_of) if args.as_of else None
    t = rig_time_at(led, moment)
    if not args.protocol:  # the ledger does not record the protocol of its entries
        protocol = replace(protocol, name="not recorded in the ledger")
    cal = calibration_from_ledger(led, chip, protocol, as_of_s=t)
    if not cal.pairs:
        raise usage_error("--ledger", f"{args.ledger} holds no entry to report")
    out = _empty_out(args.out, args.force)
    when = f"as of {utc_text(moment)}" if moment else "as it stands now"
    about = [f"from the ledger `{args.ledger}` alone ({when}; {led.last_seq} commits): "
             "measured values and their standard errors only"]
    played = None
    if args.verification:
        played = read_played(args.verification, led.chip)
        about.append(f"verification: `{args.verification}` (written by `xtalkcal verify`)")
    drift = plot_ledger_drift(led, until=moment, tolerance_db=protocol.recheck.tolerance_db)
    md = write_report(cal, out, about=about, played=played,
                      figures=[("Moves of the stored nulls", "ledger_drift.png", drift)])
    print(format_table(cal))
    print(f"\nreport: {md} and {out / 'report.html'}")
    return EXIT_OK


def cmd_history(args: argparse.Namespace) -> int:
    from xtalkcal.outputs import history_csv, history_rows, history_table

    led = existing_ledger(args.ledger)
    pair = None
    if args.pair:
        chip = chip_for_ledger(led.chip, args.chip) if args.chip else None
        if chip is not None:
            (pair,) = parse_pairs(args.pair, chip, "--pair")
        else:
            line, sep, victim = args.pair.partition(":")
            if not sep or not line or not victim or "," in args.pair:
                raise usage_error(
                    "--pair", f"{args.pair!r}: expected one LINE:QUBIT, e.g. q4-line:q5"
                )
            pair = (line, victim)
        if pair not in led.pairs():
            held = ", ".join(f"{a}:{v}" for a, v in led.pairs()[:12])
            raise usage_error("--pair", f"{args.pair}: the ledger {args.ledger} holds no entry "
                                        f"for it; accepted: a pair it holds ({held}"
                                        + (", ..." if len(led.pairs()) > 12 else "") + ")")
    moment = parse_moment(args.as_of) if args.as_of else None
    _clock_went_back(led)
    rows = history_rows(led, pair=pair, until=moment)
    if args.csv:
        print(history_csv(rows), end="")
        return EXIT_OK
    print(history_table(rows))
    print(f"{len(rows)} entries" + (f" of {pair[0]} → {pair[1]}" if pair else "")
          + (f" stored by {utc_text(moment)}" if moment else "")
          + "; times are when each entry was stored (UTC)")
    return EXIT_OK


def _clock_went_back(led) -> None:
    """Warn where a commit's entries all carry rig times behind an earlier commit's latest:
    the rig's clock was reset, and the schedule (which counts in rig time) would wait."""
    commits: dict[int, list] = {}
    for e in led.entries():
        commits.setdefault(e.seq, []).append(e)
    latest = None
    for seq in sorted(commits):
        last = max(commits[seq], key=lambda e: e.measured_at_s)
        if latest is not None and last.measured_at_s < latest.measured_at_s:
            print(f"warning: the rig clock went back: commit {seq} (stored "
                  f"{last.measured_at_utc}) ends at rig time {last.measured_at_s / 3600:.2f} h, "
                  f"behind the {latest.measured_at_s / 3600:.2f} h of commit {latest.seq} "
                  f"(stored {latest.measured_at_utc}); check the rig's clock", file=sys.stderr)
            return
        if latest is None or last.measured_at_s >= latest.measured_at_s:
            latest = last


def add_commands(add) -> None:
    r = add("report", cmd_report, "a report folder (figures, Markdown, HTML) from a ledger alone")
    r.add_argument("--ledger", required=True, help="the chip's ledger directory")
    r.add_argument("--out", default="xtalkcal-report", help="report folder to create")
    r.add_argument("--as-of", default=None, metavar="DATE",
                   help="the matrix as the ledger held it then (ISO date or time; local "
                        "unless it ends in Z or an offset; default: now)")
    r.add_argument("--chip", default=None, metavar="FILE",
                   help="the chip file (default: the bundled simulated chip, if the ledger "
                        "is for it)")
    r.add_argument("--verification", default=None, metavar="FILE",
                   help="add the residuals `xtalkcal verify -o FILE` wrote")
    r.add_argument("--force", action="store_true", help="write into a non-empty folder")
    add_protocol(r)

    h = add("history", cmd_history, "the entries of a pair (or of the ledger), with dates")
    h.add_argument("--ledger", required=True, help="the chip's ledger directory")
    h.add_argument("--pair", default=None, metavar="LINE:QUBIT",
                   help="one pair (default: every pair)")
    h.add_argument("--as-of", default=None, metavar="DATE",
                   help="only entries stored by then (ISO date or time; local unless it "
                        "ends in Z or an offset)")
    h.add_argument("--csv", action="store_true", help="CSV instead of a table")
    h.add_argument("--chip", default=None, metavar="FILE",
                   help="chip file to check the pair's names against")
