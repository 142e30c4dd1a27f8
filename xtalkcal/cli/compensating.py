"""``settings`` (compensation settings from a ledger, by the solve asked for) and ``verify``
(the written settings played on a rig, each pair's residual measured)."""

from __future__ import annotations

import argparse
import datetime as dt
import json
from pathlib import Path

from xtalkcal.cli.calibrating import add_record, check_record, existing_ledger, fresh_tag
from xtalkcal.cli.rigs import (
    DryRig,
    add_rig,
    chip_for_ledger,
    dry_run_report,
    make_rig,
    rig_start_s,
)
from xtalkcal.cli.shared import (
    EXIT_FAILED,
    EXIT_OK,
    add_protocol,
    atomic_write,
    load_protocol,
    parse_moment,
    parse_pairs,
    progress_bar,
    usage_error,
)
from xtalkcal.hardware import limits_summary

__all__ = ["add_commands", "write_settings", "read_settings"]


def write_settings(settings, path: Path) -> None:
    """JSON or CSV by the file's extension."""
    if path.suffix.lower() == ".csv":
        settings.write_csv(path)
    else:
        settings.write_json(path)


def _check_settings_path(path: str, option: str = "-o") -> Path:
    p = Path(path)
    if p.suffix.lower() not in (".json", ".csv"):
        raise usage_error(option, f"{path}: accepted: a .json or .csv file name")
    return p


def read_settings(path: str, chip):
    """Settings from a JSON or CSV file, checked to be for ``chip``."""
    from xtalkcal.compensation import CompensationSettings

    p = _check_settings_path(path, "--settings")
    if not p.exists():
        raise usage_error("--settings", f"{path} does not exist; write it with `xtalkcal "
                                        "settings --ledger L -o FILE`")
    s = (CompensationSettings.read_csv(p, chip=chip.name) if p.suffix.lower() == ".csv"
         else CompensationSettings.read_json(p))
    if s.chip != chip.name:
        from xtalkcal.exceptions import ConfigError

        raise ConfigError(path, "chip", f"{s.chip!r}: the rig drives chip {chip.name!r}; "
                                        "accepted: settings for that chip")
    return s


def _ledger_calibration(args, led, chip, protocol):
    from xtalkcal.outputs import calibration_from_ledger, rig_time_at

    moment = parse_moment(args.as_of) if getattr(args, "as_of", None) else None
    cal = calibration_from_ledger(led, chip, protocol, as_of_s=rig_time_at(led, moment))
    if not any(p.accepted and p.nulled for p in cal.pairs):
        raise usage_error("--ledger", f"{led.path} holds no nulled pair"
                          + (f" by {args.as_of}" if moment else "")
                          + "; run `xtalkcal calibrate --ledger DIR` first")
    return cal


def cmd_settings(args: argparse.Namespace) -> int:
    from xtalkcal.outputs import choose_settings, settings_pairs

    out = _check_settings_path(args.output)
    protocol = load_protocol(args.protocol)
    led = existing_ledger(args.ledger)
    rig = None
    if args.solve == "closed-loop":
        if args.rig is None:
            raise usage_error("--rig", "the closed-loop solve measures around the settings: "
                                       "accepted: --rig sim, a device .toml or "
                                       "package.module:factory")
        rig = make_rig(args.rig, seed=args.seed, drift=True, chip_file=args.chip,
                       config=args.rig_config, start_s=rig_start_s(args.rig, led))
        chip = rig.chip
        print(limits_summary(chip), flush=True)
    elif args.rig is not None:
        raise usage_error("--rig", f"the {args.solve} solve uses the ledger alone; accepted "
                                   "with --solve closed-loop")
    else:
        chip = chip_for_ledger(led.chip, args.chip)
    cal = _ledger_calibration(args, led, chip, protocol)
    pairs = parse_pairs(args.pairs, chip) if args.pairs else settings_pairs(cal)
    missing = [f"{a}:{v}" for a, v in pairs if (a, v) not in settings_pairs(cal)]
    if missing:
        raise usage_error("--pairs", f"{', '.join(missing)}: no nulled entry in {args.ledger}; "
                                     "accepted: pairs the ledger holds nulled")
    first = choose_settings(cal, "pairwise" if args.solve == "pairwise" else "multi-victim",
                            pairs=pairs)
    choice = first
    if rig is not None:
        if args.dry_run:
            return _dry_run_refine(rig, protocol, cal, first.settings, args.rounds)
        choice = _closed_loop(args, rig, protocol, led, cal, first)
    write_settings(choice.settings, out)
    solves = {}
    for p in choice.settings:
        solves[p.solve] = solves.get(p.solve, 0) + 1
    print(f"wrote {out}: {len(choice.settings)} pairs ("
          + ", ".join(f"{n} {k}" for k, n in sorted(solves.items())) + ")")
    for k, v in choice.worst_db.items():
        print(f"expected worst residual, {k} settings: {v:.1f} dB (all tones on, measured "
              "couplings, with the settings' own error)")
    for note in choice.notes:
        print(note)
    return EXIT_OK


def _closed_loop(args, rig, protocol, led, cal, first):
    from xtalkcal.compensation import refine_settings
    from xtalkcal.measure import BatchRunner
    from xtalkcal.outputs import closed_loop_choice
    from xtalkcal.store import ledger_entries, ledger_sweeps

    said = check_record(args.record, args.resume)
    if said:
        print(said)
    runner = BatchRunner(rig, args.record, progress=progress_bar(args),
                         timeout_s=args.rig_timeout)
    ref = refine_settings(rig, protocol, cal, first.settings, runner=runner,
                          rounds=args.rounds, log=print)
    if runner.progress is not None:
        runner.progress.close()
    base = fresh_tag(led, "refine-" + dt.datetime.now(dt.timezone.utc).strftime("%Y%m%dT%H%M%S"))
    for k, r in enumerate(ref.results, start=1):
        # measured near the operating point with every other tone ringing: the matrix now
        led.append(ledger_entries(r, run_tag=f"{base}-{k}"),
                   sweeps=ledger_sweeps(r, run_tag=f"{base}-{k}"))
    print(f"closed-loop refinement: {len(ref.results)} round(s), largest moves "
          + ", ".join(f"{m:.1f} σ" for m in ref.moves)
          + ("; converged" if ref.converged else "") + f"; {runner.shots_executed:,} shots; "
          f"recorded in {args.ledger}")
    return closed_loop_choice(first, ref, cal)


def _dry_run_refine(rig, protocol, cal, settings, rounds) -> int:
    from xtalkcal.compensation import refine_settings
    from xtalkcal.measure import BatchRunner

    dry = DryRig(rig)
    runner = BatchRunner(dry)
    refine_settings(dry, protocol, cal, settings, runner=runner, rounds=1)
    dry_run_report(rig, runner.tally, f"for one refinement round of {len(settings)} pairs "
                                      f"(at most {rounds})")
    return EXIT_OK


def cmd_verify(args: argparse.Namespace) -> int:
    from xtalkcal.outputs import calibration_from_ledger, played_to_dict, verify_settings

    protocol = load_protocol(args.protocol)
    led = existing_ledger(args.ledger)
    rig = make_rig(args.rig, seed=args.seed, drift=True, chip_file=args.chip,
                   config=args.rig_config, start_s=rig_start_s(args.rig, led))
    settings = read_settings(args.settings, rig.chip)
    cal = calibration_from_ledger(led, rig.chip, protocol)
    held = {(p.aggressor, p.victim) for p in cal.pairs if p.accepted}
    missing = [f"{p.aggressor_line}:{p.victim}" for p in settings if p.key not in held]
    if missing:
        raise usage_error("--ledger", f"{args.ledger} holds no accepted entry for "
                                      f"{', '.join(missing)} of {args.settings}; accepted: "
                                      "the ledger the settings were made from")
    print(limits_summary(rig.chip), flush=True)
    if args.dry_run:
        dry = DryRig(rig)
        _res, _m, runner = verify_settings(dry, protocol, cal, settings)
        dry_run_report(rig, runner.tally, f"for the verification of {len(settings)} pairs")
        return EXIT_OK
    said = check_record(args.record, args.resume)
    if said:
        print(said)
    res, _measured, runner = verify_settings(
        rig, protocol, cal, settings, record=args.record, progress=progress_bar(args),
        timeout_s=args.rig_timeout)
    print(f"verification of {args.settings} played as the control stack plays it "
          f"(tolerance {protocol.recheck.tolerance_db:g} dB):")
    for r in res:
        print(r.line())
    n_in = sum(r.within for r in res)
    above = [r for r in res if r.residual is None or r.residual_db > r.tolerance_db]
    print(f"{n_in} of {len(res)} pairs within {protocol.recheck.tolerance_db:g} dB beyond "
          f"doubt, {len(above)} above or not measured; {runner.shots_executed:,} shots")
    if args.output:
        doc = played_to_dict(res, chip=rig.chip.name, settings=str(args.settings),
                             rig=rig.describe())
        atomic_write(Path(args.output), json.dumps(doc, indent=2) + "\n")
        print(f"wrote {args.output}")
    return EXIT_FAILED if above else EXIT_OK


def add_commands(add) -> None:
    from xtalkcal.compensation import SOLVES

    s = add("settings", cmd_settings, "compensation settings for the control stack from a ledger")
    s.add_argument("--ledger", required=True, help="the chip's ledger directory")
    s.add_argument("--solve", choices=SOLVES, default="multi-victim",
                   help="pairwise (r = −X), multi-victim (the tones' leak onto each other "
                        "cancelled too) or closed-loop (re-nulled on the rig with every tone "
                        "on; needs --rig); a column keeps the pairwise settings where the "
                        "other solve is expected worse")
    s.add_argument("-o", "--output", default="settings.json",
                   help="settings file to write: .json or .csv")
    s.add_argument("--as-of", default=None, metavar="DATE",
                   help="the matrix as the ledger held it then (ISO date or time; local "
                        "unless it ends in Z or an offset; default: now)")
    s.add_argument("--pairs", default=None, metavar="LINE:QUBIT,...",
                   help="only these pairs (default: every nulled pair)")
    s.add_argument("--rounds", type=int, default=2,
                   help="largest number of closed-loop refinement rounds")
    add_protocol(s)
    add_rig(s, default=None, why=" (closed-loop only)")
    add_record(s)
    s.add_argument("-q", "--quiet", action="store_true", help="no progress bar")

    v = add("verify", cmd_verify, "play written settings on the rig and measure each pair's "
                                  "residual")
    v.add_argument("--settings", required=True, help="settings file (.json or .csv)")
    v.add_argument("--ledger", required=True,
                   help="the ledger the settings came from (each pair's method, "
                        "amplification and ring size)")
    v.add_argument("-o", "--output", default=None,
                   help="also write the residuals to this JSON file")
    add_protocol(v)
    add_rig(v)
    add_record(v)
    v.add_argument("-q", "--quiet", action="store_true", help="no progress bar")
