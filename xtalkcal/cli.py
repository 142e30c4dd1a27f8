"""The ``xtalkcal`` command line: a thin shell over the library.

User mistakes (bad files, limits exceeded, unknown names) print one line per problem
naming the file and field and exit with status 2; a calibration whose fits are rejected
exits with status 1; success is 0. No traceback is shown unless ``--debug``.
"""

from __future__ import annotations

import argparse
import logging
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from xtalkcal.common import __version__
from xtalkcal.exceptions import ConfigError as XtalkcalConfigError
from xtalkcal.exceptions import RigError, XtalkcalError
from xtalkcal.hardware import limits_summary

__all__ = ["main"]

log = logging.getLogger(__name__)

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2

_COMMANDS: dict[str, Callable[[argparse.Namespace], int]] = {}


def _command(name: str):
    def deco(fn):
        _COMMANDS[name] = fn
        return fn

    return deco


def _detect_format(path: str) -> str:
    from xtalkcal.common import load_toml

    data, _ = load_toml(path)
    return str(data.get("format", ""))


def _print_errors(exc: XtalkcalError) -> None:
    """One line per problem (a file's readers collect all of its problems)."""
    from xtalkcal.common import FieldErrors

    for problem in exc.errors if isinstance(exc, FieldErrors) else (exc,):
        print(f"xtalkcal: error: {problem}", file=sys.stderr)


@_command("check")
def _cmd_check(args: argparse.Namespace) -> int:
    bad = 0
    loaded: list[tuple[object, object, str]] = []
    for path in args.files:
        try:
            loaded.append(_check_one(path))
        except XtalkcalError as exc:  # report it and go on with the next file
            if args.debug:
                raise
            _print_errors(exc)
            bad += 1
    # Names in protocols (overrides) and schedules are checked against every chip given
    # with them: without one, only the name rule can be checked.
    chips = [chip for _, chip, _ in loaded if chip is not None]
    for obj, _, ok in loaded:
        try:
            for chip in chips if hasattr(obj, "check_against") else ():
                obj.check_against(chip)
        except XtalkcalError as exc:
            if args.debug:
                raise
            _print_errors(exc)
            bad += 1
            continue
        print(ok)
    return EXIT_USAGE if bad else EXIT_OK


def _check_one(path: str) -> tuple[object, object, str]:
    """Load one chip, protocol, simulated-device, schedule or settings file, or verify a
    ledger directory (every commit file).

    Returns what was loaded, the chip it describes (None for other kinds), its OK line.
    """
    from xtalkcal.common import read_text
    from xtalkcal.hardware import load_chip

    if Path(path).is_dir():
        from xtalkcal.store import verify_ledger

        report = verify_ledger(path)
        if not report.ok:
            print("\n".join(report.lines()))
            raise report.error()
        return report, None, "\n".join(report.lines())
    text, _ = read_text(path)
    if path.endswith(".json") or text.lstrip("\ufeff \t\r\n").startswith("{"):
        return _check_json(path)
    fmt = _detect_format(path)
    if fmt == "xtalkcal-simdevice":
        from simulated_device.device import load_device

        dev = load_device(path)
        return dev, dev.chip(), (f"{path}: simulated device {dev.name!r}: "
                                 f"{len(dev.qubits)} qubits, {len(dev.couplings)} couplings — OK")
    if fmt == "xtalkcal-protocol":
        from xtalkcal.measure import load_protocol

        proto = load_protocol(path)
        return proto, None, f"{path}: protocol {proto.name!r} — OK"
    chip = load_chip(path)
    ok = (f"{path}: chip {chip.name!r}: {len(chip.qubits)} qubits, "
          f"{len(chip.lines)} lines — OK")
    if not chip.limits.stated:
        ok += ("\nwarning: " + path + ": no [limits] table: only the bundled simulator will "
               "drive this chip; a lab's own rig refuses it until the lab states its limits")
    return chip, chip, ok


def _check_json(path: str) -> tuple[object, None, str]:
    """A schedule or settings file (JSON), told apart by its ``format`` / ``schema``."""
    from xtalkcal.common import load_json
    from xtalkcal.compensation import SETTINGS_SCHEMA, CompensationSettings
    from xtalkcal.drift import SCHEDULE_FORMAT, Schedule
    from xtalkcal.measure import default_protocol

    doc, source = load_json(path)
    kind = doc.get("format", doc.get("schema")) if isinstance(doc, dict) else None
    if kind == SCHEDULE_FORMAT:
        sch = Schedule.from_dict(doc, default_protocol().recheck, source=source)
        n_aside = len(sch.set_aside_pairs())
        return sch, None, f"{path}: schedule: {len(sch)} pairs ({n_aside} set aside) — OK"
    if kind == SETTINGS_SCHEMA:
        settings = CompensationSettings.from_dict(doc, source=source)
        return settings, None, (f"{path}: settings for chip {settings.chip!r}: "
                                f"{len(settings)} pairs — OK")
    raise XtalkcalConfigError(source, "format", f"{str(kind)[:40]!r} is not a file kind "
                              f"`check` reads; accepted: format {SCHEDULE_FORMAT!r} (a "
                              f"schedule) or schema {SETTINGS_SCHEMA!r} (settings)")


@_command("export-chip")
def _cmd_export_chip(args: argparse.Namespace) -> int:
    import tomli_w

    from simulated_device.device import load_device

    dev = load_device(args.device)
    text = tomli_w.dumps(dev.chip().to_dict())
    header = (f"# Chip file derived from the simulated device {args.device}:\n"
              "# nominal values only, as a lab would know them.\n")
    _atomic_write(Path(args.output), header + text)
    print(f"wrote {args.output}")
    return EXIT_OK


def _make_rig(spec: str, *, seed: int | None, drift: bool, start_s: float = 0.0):
    """The rig named on the command line: 'sim' (bundled demo device), a device file, or
    'package.module:factory' for a lab's own rig plug-in (called with no arguments)."""
    import importlib

    if spec == "sim" or spec.endswith(".toml"):
        from simulated_device import SimRig, demo_device_path

        return SimRig(demo_device_path() if spec == "sim" else spec, seed=seed, drift=drift,
                      start_s=start_s)
    if ":" not in spec:
        raise XtalkcalConfigError("command line", "--rig",
                                  f"{spec!r}: expected 'sim', a device .toml file, "
                                  "or 'module:factory'")
    mod, _, attr = spec.partition(":")
    try:
        factory = getattr(importlib.import_module(mod), attr)
    except (ImportError, AttributeError) as exc:
        raise XtalkcalConfigError("command line", "--rig",
                                  f"cannot load {spec!r}: {exc}") from None
    from xtalkcal.hardware import Rig

    try:
        rig = factory()
    except XtalkcalError:
        raise
    except Exception as exc:  # the lab's driver failed to connect, etc.: one line, no traceback
        raise RigError(f"--rig {spec}: the factory failed: {type(exc).__name__}: {exc}") from exc
    if not isinstance(rig, Rig):
        raise XtalkcalConfigError("command line", "--rig",
                                  f"{spec!r} did not return an object with the rig "
                                  "members (chip, repetition_ns, describe, run, now)")
    limits = getattr(rig.chip, "limits", None)
    if not getattr(limits, "stated", False):
        # Power into a cryostat: a lab's own rig runs only under limits the lab wrote down.
        raise XtalkcalConfigError(
            getattr(rig.chip, "source", "the rig's chip"), "limits",
            "no [limits] table (or an empty one): a lab's own rig is driven only under "
            "limits stated in its chip file; accepted: a [limits] table with max_amplitude "
            "(and, with full_scale_dbm on every line, max_average_power_dbm and "
            "max_total_average_power_dbm)")
    return rig


@_command("calibrate")
def _cmd_calibrate(args: argparse.Namespace) -> int:
    from xtalkcal.calibrate import calibrate_chip
    from xtalkcal.measure import BatchRunner
    from xtalkcal.outputs import dumps, format_table, unsettled_pairs

    protocol = _load_protocol(args.protocol)
    rig = _make_rig(args.rig, seed=args.seed, drift=not args.no_drift)
    protocol.check_against(rig.chip)  # names in overrides, before any rig time
    print(limits_summary(rig.chip), flush=True)
    if args.dry_run:
        return _dry_run_calibrate(rig, protocol)
    # A broken ledger is found before any rig time is spent, not after the calibration.
    led = _open_ledger(args.ledger, rig.chip.name) if args.ledger else None
    out = Path(args.output)
    runner = BatchRunner(rig, args.record, progress=_progress_bar(args),
                         timeout_s=args.rig_timeout)
    result = calibrate_chip(rig, protocol, runner=runner, log=lambda s: log.info(s))
    if runner.progress is not None:
        runner.progress.close()
    _atomic_write(out, dumps(result) + "\n")
    said = None
    if args.ledger:
        said = _record_in_ledger(args.ledger, rig.chip.name, result, ledger=led,
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


class _DryRig:
    """Stands where the rig stands in a dry run: the lab chip's limits, the rig's
    repetition time, and answers from a crosstalk-free stand-in; nothing reaches the rig."""

    def __init__(self, rig) -> None:
        import dataclasses

        from simulated_device import SimRig
        from simulated_device.standin import standin_device

        self._chip = dataclasses.replace(rig.chip, interlock=None)  # nothing to approve
        self._rep = rig.repetition_ns
        self._desc = rig.describe()
        self._sim = SimRig(standin_device(rig.chip, rig.repetition_ns), seed=1, drift=False)

    @property
    def chip(self):
        return self._chip

    @property
    def repetition_ns(self) -> float:
        return self._rep

    def describe(self) -> str:
        return f"dry run of {self._desc}"

    def now(self) -> float:
        return self._sim.now()

    def run(self, timelines, shots):
        return self._sim.run(timelines, shots)


def _dry_run_calibrate(rig, protocol) -> int:
    """Plan a calibration, check every planned batch against the limits, send nothing."""
    from xtalkcal.calibrate import calibrate_chip
    from xtalkcal.measure import BatchRunner

    dry = _DryRig(rig)
    runner = BatchRunner(dry)
    calibrate_chip(dry, protocol, runner=runner, log=lambda s: log.info(s))
    t = runner.tally
    print(f"dry run: nothing was sent to {rig.describe()}")
    print(f"planned before any data: {t.batches} batches, {t.shots:,} shots, about "
          f"{t.shots * rig.repetition_ns * 1e-9:.1f} s of rig time (the surveys of every "
          "column), each within the limits above; largest drive per line:")
    print("\n".join(t.lines(rig.chip)))
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


def _open_ledger(path: str, chip: str):
    """The chip's ledger at ``path``, opened (every commit verified), or None if there is
    none yet (it is created when something is stored, so a failed run leaves no folder)."""
    from xtalkcal.store import Ledger

    if not Path(path).exists():
        return None
    led = Ledger.create(path, chip=chip, exist_ok=True)
    if led.chip != chip:
        raise XtalkcalConfigError("command line", "--ledger",
                                  f"{path} belongs to chip {led.chip!r}, not {chip!r}")
    return led


def _record_in_ledger(path: str, chip: str, result, *, resumed_from: str | None = None,
                      ledger=None) -> str:
    """Append a calibration (entries and raw sweeps) to the chip's ledger, one commit.

    A calibration resumed from a ``--record`` folder may repeat one whose estimates the
    ledger holds already (the first run finished, or the same run is started again): an
    estimate counts as held if the ledger has an entry with the same pair, frequency,
    value, covariance, shots, verdict and pass (the same numbers from the same data,
    whatever run tag it was stored under; see `_measurement_key`). Those are not appended
    again; only what was measured anew is, with its sweeps (a sweep identical to one stored
    is linked, not copied). A calibration that measured no pair stores nothing (a valid,
    empty result). ``ledger`` is the ledger opened before the calibration, if it existed.
    Returns one line saying what was done.
    """
    import dataclasses
    import datetime as dt

    from xtalkcal.store import Ledger, ledger_entries, ledger_sweeps

    if not result.pairs and not result.sweeps:
        only = result.protocol.only_methods
        why = (f"the protocol's methods.only = {list(only)} selects no victim on any line"
               if only else "the chip has no qubit besides each line's own to measure")
        return f"ledger {path}: nothing stored: the calibration measured no pair ({why})"
    led = ledger or _open_ledger(path, chip) or Ledger.create(path, chip=chip)
    tag = _fresh_tag(led, "cal-" + dt.datetime.now(dt.timezone.utc).strftime("%Y%m%dT%H%M%S"))
    entries = ledger_entries(result, run_tag=tag)
    sweeps = ledger_sweeps(result, run_tag=tag)
    held: dict[tuple, object] = {}
    if resumed_from is not None:
        for e in led.entries():
            held.setdefault(_measurement_key(e), e)
    old = [held[k] for k in map(_measurement_key, entries) if k in held]
    if old:
        entries = [e for e in entries if _measurement_key(e) not in held]
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


def _fresh_tag(led, base: str) -> str:
    """A run tag no entry or sweep of the ledger uses yet (two runs in the same second)."""
    used = {e.tag for e in led.entries()} | {s.split("/", 1)[0] for s in led.sweep_ids()}
    tag, n = base, 1
    while tag in used:
        n += 1
        tag = f"{base}-{n}"
    return tag


def _measurement_key(e) -> tuple:
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


@_command("demo")
def _cmd_demo(args: argparse.Namespace) -> int:
    from simulated_device import SimRig, demo_device_path
    from xtalkcal.campaign import run_campaign
    from xtalkcal.outputs import format_table, write_report

    protocol = _load_protocol(args.protocol)
    rig = SimRig(demo_device_path(), seed=args.seed, drift=True)
    out = Path(args.out)
    if out.exists() and any(out.iterdir()) and not args.force:
        raise XtalkcalConfigError("command line", "--out",
                                  f"{out} exists and is not empty; choose another "
                                  "folder or pass --force")
    print(f"xtalkcal demo on the bundled simulated chip {rig.chip.name!r} "
          f"({len(rig.chip.qubits)} qubits); report in {out}/")
    print(limits_summary(rig.chip), flush=True)
    bar = _progress_bar(args)
    lines = args.aggressors.split(",") if args.aggressors else None
    rb = [q for q in args.rb_qubits.split(",") if q] if args.rb_qubits else []

    def truth(victim, line, f, t):
        return rig.true_crosstalk(victim, line, f, t)

    watch = None if args.watch == "all" else [w for w in args.watch.split(",") if w]
    camp = run_campaign(rig, protocol, out, aggressors=lines, rb_qubits=rb, days=args.days,
                        advance=rig.wait, truth=truth, progress=bar, watch=watch,
                        rb_draws=args.rb_draws, say=lambda s: print(s, flush=True))
    if bar is not None:
        bar.close()
    result = camp.calibration
    at_cal = {(p.aggressor, p.victim): rig.true_crosstalk(p.victim, p.aggressor, p.freq_ghz,
                                                          p.measured_at_s)
              for p in result.pairs}
    md = write_report(result, out, truth=at_cal, campaign=camp)
    print(format_table(result))
    if camp.rb is not None:
        print("\n" + camp.rb.table())
    print(f"\nreport: {md} and {out / 'report.html'}")
    return EXIT_OK


@_command("due")
def _cmd_due(args: argparse.Namespace) -> int:
    """Do whatever is due now (cron-friendly), then exit."""
    import datetime as dt

    from xtalkcal.drift import Schedule, run_due
    from xtalkcal.store import Ledger

    protocol = _load_protocol(args.protocol)
    if not Path(args.ledger).exists():
        raise XtalkcalConfigError("command line", "--ledger",
                                  f"{args.ledger} does not exist; run `xtalkcal calibrate "
                                  "--ledger DIR` first")
    led = Ledger(args.ledger)
    current = led.current()
    start = 0.0
    if args.rig == "sim" or args.rig.endswith(".toml"):
        # The simulator's clock restarts with every process: continue it from the last
        # entry, plus the wall time since, so drift goes on between cron runs.
        if current.entries:
            last = max(current.entries.values(), key=lambda e: e.measured_at_s)
            then = dt.datetime.fromisoformat(last.measured_at_utc)
            start = last.measured_at_s + max(
                0.0, (dt.datetime.now(dt.timezone.utc) - then).total_seconds())
    rig = _make_rig(args.rig, seed=args.seed, drift=True, start_s=start)
    if led.chip != rig.chip.name:
        raise XtalkcalConfigError("command line", "--ledger",
                                  f"{args.ledger} belongs to chip {led.chip!r}, the rig drives "
                                  f"{rig.chip.name!r}")
    protocol.check_against(rig.chip)  # before any rig time: names in overrides and
    schedule = Schedule.load_or_new(args.schedule, protocol.recheck)
    schedule.check_against(rig.chip)  # in the schedule's pairs
    print(limits_summary(rig.chip), flush=True)
    if not len(schedule):
        for (a, v), e in current.entries.items():
            if e.kind != "survey":
                schedule.calibrated((a, v), e.measured_at_s)
    from xtalkcal.measure import BatchRunner

    rep = run_due(rig, protocol, led, schedule, log=print,
                  runner=BatchRunner(rig, timeout_s=args.rig_timeout))
    schedule.save(args.schedule)
    if not rep.checked:
        print(f"nothing due at rig time {rep.now_s / 3600:.2f} h")
    else:
        print(f"{len(rep.checked)} pairs re-checked, {len(rep.recentred)} re-centred, "
              f"{len(rep.recalibrated)} columns recalibrated; {rep.shots:,} shots")
    broken = [c for c in rep.checked if c.outcome.decision.value == "broken"
              and c.aggressor not in rep.recalibrated]
    # A pair newly set aside needs a person once; later runs only mention it (exit 0).
    return EXIT_FAILED if broken or rep.set_aside else EXIT_OK


class _Bar:
    def __init__(self, total=None):
        from tqdm import tqdm

        self._bar = tqdm(total=total, unit="shot", unit_scale=True, desc="shots",
                         disable=None, leave=False)

    def __call__(self, n: int) -> None:
        self._bar.update(n)

    def close(self) -> None:
        self._bar.close()


def _progress_bar(args):
    return None if getattr(args, "quiet", False) else _Bar()


def _atomic_write(path: Path, text: str) -> None:
    """Write a text file so that a crash never leaves a half-written one."""
    import os
    import tempfile

    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _load_protocol(path: str | None):
    """The protocol file given, or the built-in defaults (those of protocols/full.toml)."""
    from xtalkcal.measure import default_protocol, load_protocol

    return load_protocol(path) if path else default_protocol()


class _DefaultsFormatter(argparse.HelpFormatter):
    """Help that shows each option's default, except where there is nothing to show
    (None, a switch that is off, required options) or the help already says it."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        text = action.help or ""
        default = action.default
        if (default is None or default is False or default is argparse.SUPPRESS
                or action.required or not action.option_strings
                or "(default" in text or "%(default)" in text):
            return action.help
        return f"{text} (default: %(default)s)" if text else "(default: %(default)s)"


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for documentation and tests)."""
    p = argparse.ArgumentParser(
        prog="xtalkcal",
        description="Measure, cancel and track microwave drive crosstalk on transmon chips.",
        formatter_class=_DefaultsFormatter,
    )
    p.add_argument("--version", action="version", version=f"xtalkcal {__version__}")
    p.add_argument("--debug", action="store_true", help="show tracebacks and debug logging")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    def add(name: str, help: str) -> argparse.ArgumentParser:
        return sub.add_parser(name, help=help, formatter_class=_DefaultsFormatter)

    c = add("check", help="validate chip, device, protocol, schedule or settings files, "
                           "or ledger directories")
    c.add_argument("files", nargs="+",
                   help="files to validate (TOML or JSON), or ledger directories (every "
                        "commit file verified); names in protocols and schedules are checked "
                        "against any chip or device file given with them")

    k = add("calibrate", help="survey the matrix and null every significant pair")
    _add_protocol(k)
    _add_rig(k)
    k.add_argument("--no-drift", action="store_true", help="freeze the simulator's drift")
    k.add_argument("--record", default=None,
                   help="directory to record each batch in; rerun with it to resume")
    k.add_argument("-o", "--output", default="xtalk-matrix.json", help="JSON file to write")
    k.add_argument("--ledger", default=None,
                   help="the chip's ledger directory to append the estimates to (created if new)")
    k.add_argument("-q", "--quiet", action="store_true", help="no progress bar")
    k.add_argument("--dry-run", action="store_true",
                   help="send nothing: plan the batches that need no data (the surveys), "
                        "check them against the limits and print the drive per line")

    d = add("demo", help="the whole job on the bundled simulated chip, with a report")
    d.add_argument("--out", default="xtalkcal-demo", help="report folder to create")
    _add_protocol(d)
    d.add_argument("--seed", type=int, default=None, help="simulator seed")
    d.add_argument("--aggressors", default=None,
                   help="comma-separated aggressor lines (default: all)")
    d.add_argument("--force", action="store_true", help="write into a non-empty folder")
    d.add_argument("--days", type=float, default=7.0, help="simulated days of drift watch")
    d.add_argument("--watch", default="d4,d6,d7",
                   help="aggressor lines the drift watch follows: the columns with the chip's "
                        "frequency-plan hazards by default, 'all' for every column (slower)")
    d.add_argument("--rb-qubits", default="q1,q4,q5,q6,q7",
                   help="qubits for simultaneous randomized benchmarking ('' to skip)")
    d.add_argument("--rb-draws", type=int, default=6, help="random sequences per length")
    d.add_argument("-q", "--quiet", action="store_true", help="no progress bar")

    u = add("due", help="re-check whatever is due now and exit (for cron)")
    u.add_argument("--ledger", required=True, help="the chip's ledger directory")
    u.add_argument("--schedule", required=True, help="schedule file (JSON; created if new)")
    _add_protocol(u)
    _add_rig(u)

    e = add("export-chip", help="write the nominal chip file of a simulated device")
    e.add_argument("device", help="simulated device file (TOML)")
    e.add_argument("-o", "--output", required=True, help="chip file to write")
    return p


def _add_protocol(cmd: argparse.ArgumentParser) -> None:
    cmd.add_argument("--protocol", default=None,
                     help="protocol file (TOML) (default: the built-in defaults, those of "
                          "protocols/full.toml)")


def _add_rig(cmd: argparse.ArgumentParser) -> None:
    """The rig options shared by the commands that measure: which rig, its seed, a timeout."""
    cmd.add_argument("--rig", default="sim",
                     help="'sim' (bundled demo device), a device .toml, or module:factory")
    cmd.add_argument("--seed", type=int, default=None, help="simulator seed")
    _add_rig_timeout(cmd)


def _add_rig_timeout(cmd: argparse.ArgumentParser) -> None:
    def seconds(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            value = float("nan")
        if not (0 < value < float("inf")):
            raise argparse.ArgumentTypeError(f"{text!r}: expected a positive number of seconds")
        return value

    cmd.add_argument("--rig-timeout", type=seconds, default=None, metavar="SECONDS",
                     help="give up on a rig call that takes longer (the rig is then "
                          "considered unusable; default: wait for ever)")


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``xtalkcal`` command."""
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.DEBUG if args.debug else logging.WARNING,
                        format="%(levelname)s %(name)s: %(message)s")
    if not args.command:
        parser.print_help()
        return EXIT_USAGE
    try:
        return _COMMANDS[args.command](args)
    except XtalkcalError as exc:
        if args.debug:
            raise
        _print_errors(exc)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("xtalkcal: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
