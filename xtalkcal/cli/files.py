"""``check`` (validate files and ledgers) and ``export-chip`` (a simulated device's chip file)."""

from __future__ import annotations

import argparse
from pathlib import Path

from xtalkcal.cli.shared import EXIT_OK, EXIT_USAGE, atomic_write, print_errors
from xtalkcal.exceptions import ConfigError, XtalkcalError

__all__ = ["add_commands"]


def _detect_format(path: str) -> str:
    from xtalkcal.common import load_toml

    data, _ = load_toml(path)
    return str(data.get("format", ""))


def cmd_check(args: argparse.Namespace) -> int:
    bad = 0
    loaded: list[tuple[object, object, str]] = []
    for path in args.files:
        try:
            loaded.append(_check_one(path))
        except XtalkcalError as exc:  # report it and go on with the next file
            if args.debug:
                raise
            print_errors(exc)
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
            print_errors(exc)
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
    raise ConfigError(source, "format", f"{str(kind)[:40]!r} is not a file kind "
                      f"`check` reads; accepted: format {SCHEDULE_FORMAT!r} (a "
                      f"schedule) or schema {SETTINGS_SCHEMA!r} (settings)")


def cmd_export_chip(args: argparse.Namespace) -> int:
    import tomli_w

    from simulated_device.device import load_device

    dev = load_device(args.device)
    text = tomli_w.dumps(dev.chip().to_dict())
    header = (f"# Chip file derived from the simulated device {args.device}:\n"
              "# nominal values only, as a lab would know them.\n")
    atomic_write(Path(args.output), header + text)
    print(f"wrote {args.output}")
    return EXIT_OK


def add_commands(add) -> None:
    c = add("check", cmd_check, "validate chip, device, protocol, schedule or settings files, "
                                "or ledger directories")
    c.add_argument("files", nargs="+",
                   help="files to validate (TOML or JSON), or ledger directories (every "
                        "commit file verified); names in protocols and schedules are checked "
                        "against any chip or device file given with them")
    e = add("export-chip", cmd_export_chip, "write the nominal chip file of a simulated device")
    e.add_argument("device", help="simulated device file (TOML)")
    e.add_argument("-o", "--output", required=True, help="chip file to write")
