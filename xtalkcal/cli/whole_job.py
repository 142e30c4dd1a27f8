"""``run`` (the whole job on any rig: survey, nulls, settings, verification, optional
simultaneous RB, report) and ``demo`` (that run on the bundled simulated chip, plus a
simulated week of drift)."""

from __future__ import annotations

import argparse
from pathlib import Path

from xtalkcal.cli.calibrating import calibration_scope, check_record, dry_run_calibrate
from xtalkcal.cli.rigs import add_rig, is_simulator, make_rig
from xtalkcal.cli.shared import (
    EXIT_FAILED,
    EXIT_OK,
    add_protocol,
    load_protocol,
    progress_bar,
    usage_error,
)
from xtalkcal.hardware import limits_summary

__all__ = ["add_commands"]


def _out_folder(args) -> Path:
    out = Path(args.out)
    if out.exists() and any(out.iterdir()) and not args.force:
        raise usage_error("--out", f"{out} exists and is not empty; choose another folder "
                                   "or pass --force")
    return out


def _whole_job(args, rig, *, days: float = 0.0, advance=None, watch=None,
               strict: bool = True) -> int:
    """The campaign, its report and its summary; with ``strict``, exit 1 when a played
    residual is above the tolerance (or was not measured)."""
    from xtalkcal.campaign import run_campaign
    from xtalkcal.outputs import format_table, write_report

    protocol = load_protocol(args.protocol)
    protocol.check_against(rig.chip)
    lines, forced, protocol = calibration_scope(args, rig.chip, protocol)
    if forced is not None:
        raise usage_error("--pairs", "the whole job calibrates whole columns; accepted: "
                                     "--aggressors (or `calibrate --pairs`)")
    print(limits_summary(rig.chip), flush=True)
    if args.dry_run:
        return dry_run_calibrate(rig, protocol, lines)
    out = _out_folder(args)
    said = check_record(str(out / "record"), args.resume)
    if said:
        print(said)
    rb = [q for q in args.rb_qubits.split(",") if q.strip()] if args.rb_qubits else []
    bad = [q for q in rb if q not in rig.chip.qubit_names]
    if bad:
        raise usage_error("--rb-qubits", f"{', '.join(bad)}: accepted: qubits of chip "
                                         f"{rig.chip.name!r}: {', '.join(rig.chip.qubit_names)}")
    # The simulator's truth, only for the simulator: a lab's rig has none, and the report
    # then shows measured values only.
    true = getattr(rig, "true_crosstalk", None) if is_simulator(args.rig) else None
    truth = None if true is None else (lambda victim, line, f, t: true(victim, line, f, t))
    bar = progress_bar(args)
    camp = run_campaign(rig, protocol, out, aggressors=lines, rb_qubits=rb, days=days,
                        advance=advance, truth=truth, progress=bar, watch=watch,
                        rb_draws=args.rb_draws, refine_rounds=args.refine_rounds,
                        say=lambda s: print(s, flush=True))
    if bar is not None:
        bar.close()
    result = camp.calibration
    at_cal = None
    if true is not None:
        at_cal = {(p.aggressor, p.victim): true(p.victim, p.aggressor, p.freq_ghz,
                                                p.measured_at_s) for p in result.pairs}
    md = write_report(result, out, truth=at_cal, campaign=camp)
    print(format_table(result))
    if camp.played:
        print("\nverification of the written settings, played as the control stack plays "
              "them:")
        print("\n".join(r.line() for r in camp.played))
    if camp.rb is not None:
        print("\n" + camp.rb.table())
    print(f"\nsettings: {out / 'settings.json'} and {out / 'settings.csv'}; ledger "
          f"{out / 'ledger'}; schedule and record in {out}/")
    print(f"report: {md} and {out / 'report.html'}")
    above = [r for r in camp.played if r.residual is None or r.residual_db > r.tolerance_db]
    if above:
        print(f"{len(above)} pairs above the tolerance with the written settings played: "
              + ", ".join(f"{r.aggressor} → {r.victim}" for r in above))
    return EXIT_FAILED if above and strict else EXIT_OK


def cmd_run(args: argparse.Namespace) -> int:
    rig = make_rig(args.rig, seed=args.seed, drift=not args.no_drift, chip_file=args.chip,
                   config=args.rig_config)
    print(f"xtalkcal run on {rig.describe()} (chip {rig.chip.name!r}, "
          f"{len(rig.chip.qubits)} qubits); everything in {args.out}/")
    return _whole_job(args, rig)


def cmd_demo(args: argparse.Namespace) -> int:
    from simulated_device import SimRig, demo_device_path

    rig = SimRig(demo_device_path(), seed=args.seed, drift=True)
    print(f"xtalkcal demo on the bundled simulated chip {rig.chip.name!r} "
          f"({len(rig.chip.qubits)} qubits); report in {args.out}/")
    args.rig = "sim"
    watch = None if args.watch == "all" else [w for w in args.watch.split(",") if w]
    # a demonstration: what it finds is in its report, not in its exit status
    return _whole_job(args, rig, days=args.days, advance=rig.wait, watch=watch, strict=False)


def _add_job(cmd: argparse.ArgumentParser, *, out: str, rb: str) -> None:
    cmd.add_argument("--out", default=out, help="folder to create (report, settings, ledger)")
    add_protocol(cmd)
    cmd.add_argument("--aggressors", default=None, metavar="LINE,...",
                     help="comma-separated aggressor lines (default: all)")
    cmd.add_argument("--force", action="store_true", help="write into a non-empty folder")
    cmd.add_argument("--resume", action="store_true",
                     help="allow the folder's record from an earlier day to be replayed")
    cmd.add_argument("--rb-qubits", default=rb,
                     help="qubits for simultaneous randomized benchmarking ('' to skip)")
    cmd.add_argument("--rb-draws", type=int, default=6, help="random sequences per length")
    cmd.add_argument("--refine-rounds", type=int, default=2,
                     help="largest number of closed-loop refinement rounds")
    cmd.add_argument("-q", "--quiet", action="store_true", help="no progress bar")


def add_commands(add) -> None:
    r = add("run", cmd_run, "the whole job on any rig: survey, nulls, settings, verification, "
                            "optional simultaneous RB, report")
    _add_job(r, out="xtalkcal-run", rb="")
    add_rig(r)
    r.add_argument("--no-drift", action="store_true", help="freeze the simulator's drift")

    d = add("demo", cmd_demo, "the whole job on the bundled simulated chip, plus a simulated "
                              "week of drift, with a report")
    _add_job(d, out="xtalkcal-demo", rb="q1,q4,q5,q6,q7")
    d.add_argument("--seed", type=int, default=None, help="simulator seed")
    d.add_argument("--days", type=float, default=7.0, help="simulated days of drift watch")
    d.add_argument("--watch", default="q4-line,q6-line,q7-line",
                   help="aggressor lines the drift watch follows: the columns with the chip's "
                        "frequency-plan hazards by default, 'all' for every column (slower)")
    d.add_argument("--dry-run", action="store_true",
                   help="send nothing: plan the surveys, check them against the limits and "
                        "print the drive per line")
