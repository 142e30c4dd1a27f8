"""``check`` (validate files and ledgers) and ``export-chip`` (a simulated device's chip file)."""

from __future__ import annotations

import argparse
from pathlib import Path

from xtalkcal.cli.shared import EXIT_OK, EXIT_USAGE, atomic_write, print_errors, usage_error
from xtalkcal.exceptions import ConfigError, XtalkcalError

__all__ = ["add_commands"]


# Names files carried before every kind used ``format`` + ``version``.
_OLD_KINDS = {"xtalkcal.recheck_outcome": "xtalkcal-recheck-outcome",
              "xtalkcal.pair_trend": "xtalkcal-pair-trend",
              "xtalkcal.null_estimate": "xtalkcal-null-estimate",
              "xtalkcal.ring_estimate": "xtalkcal-ring-estimate"}


def file_kind(doc: object) -> tuple[str | None, int | None]:
    """``(format, version)`` of a JSON or TOML document of the toolkit, of any naming.

    The one naming is ``{"format": "xtalkcal-<kind>", "version": N}``; older files are read
    too: ``"schema": "xtalkcal-<kind>/N"``, ``"schema": "xtalkcal.<kind>"`` with
    ``"schema_version"``, and ``format`` with ``schema_version``.

    Parameters
    ----------
    doc : object
        The parsed document.

    Returns
    -------
    tuple
        The kind (None if the document names none) and its version (None if not stated).
    """
    if not isinstance(doc, dict):
        return None, None
    version = doc.get("version", doc.get("schema_version"))
    version = version if isinstance(version, int) and not isinstance(version, bool) else None
    if "format" in doc:
        return str(doc["format"]), version
    name = doc.get("schema")
    if not isinstance(name, str):
        return None, version
    head, _, tail = name.partition("/")
    if tail.isdigit():
        return head, int(tail)
    return _OLD_KINDS.get(name, name), version


def _detect_format(path: str) -> str:
    from xtalkcal.common import load_toml

    data, _ = load_toml(path)
    return str(file_kind(data)[0] or "")


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
    from xtalkcal.compensation import SETTINGS_FORMAT, CompensationSettings
    from xtalkcal.drift import SCHEDULE_FORMAT, Schedule
    from xtalkcal.measure import default_protocol

    doc, source = load_json(path)
    kind, _ = file_kind(doc)
    if kind == SCHEDULE_FORMAT:
        sch = Schedule.from_dict(doc, default_protocol().recheck, source=source)
        n_aside = len(sch.set_aside_pairs())
        return sch, None, f"{path}: schedule: {len(sch)} pairs ({n_aside} set aside) — OK"
    if kind == SETTINGS_FORMAT:
        settings = CompensationSettings.from_dict(doc, source=source)
        return settings, None, (f"{path}: settings for chip {settings.chip!r}: "
                                f"{len(settings)} pairs — OK")
    raise ConfigError(source, "format", f"{str(kind)[:40]!r} is not a file kind "
                      f"`check` reads; accepted: format {SCHEDULE_FORMAT!r} (a "
                      f"schedule) or {SETTINGS_FORMAT!r} (settings)")


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


def cmd_sim_chip(args: argparse.Namespace) -> int:
    """Write an invented simulated device (and its chip file) from the family generator."""
    from dataclasses import asdict, replace

    import tomli_w

    from simulated_device.device import device_from_dict
    from simulated_device.family import FamilyParams, generate_device

    if args.seed < 0:
        raise usage_error("--seed", f"{args.seed}: accepted: an integer ≥ 0")
    for opt, value in (("--phase-walk", args.phase_walk),
                       ("--magnitude-walk", args.magnitude_walk)):
        if not 0.0 <= value <= 1.0:
            raise usage_error(opt, f"{value:g}: accepted: 0 … 1 per √h")
    out = Path(args.output)
    targets = [out] + ([Path(args.chip_out)] if args.chip_out else [])
    taken = [str(t) for t in targets if t.exists() and not args.force]
    if taken:
        raise usage_error("--output", f"{', '.join(taken)} exists; accepted: a new file, "
                                      "or --force to replace it")
    try:
        params = replace(FamilyParams(), n_qubits=args.qubits, layout=args.layout,
                         phase_walk_rad_per_sqrt_h=args.phase_walk,
                         magnitude_walk_per_sqrt_h=args.magnitude_walk)
    except ValueError as exc:  # the generator's own bounds, named with what it accepts
        raise usage_error("--qubits", str(exc).removeprefix("FamilyParams: ")) from None
    try:
        doc = generate_device(params, args.seed)
    except ValueError as exc:
        raise usage_error("--qubits", f"no chip of this kind could be drawn: {exc}") from None
    dev = device_from_dict(doc, source=str(out))  # what we write must load
    head = ("# Invented simulated device (no real chip), generated by `xtalkcal sim-chip`.\n"
            + "".join(f"# {k} = {v!r}\n" for k, v in asdict(params).items()))
    atomic_write(out, head + tomli_w.dumps(doc))
    print(f"wrote {out}: {dev.name}, {args.qubits} qubits on a {args.layout}, "
          f"{len(doc['couplings'])} couplings, seed {args.seed}")
    if args.chip_out:
        chip_text = tomli_w.dumps(dev.chip().to_dict())
        atomic_write(Path(args.chip_out), f"# Chip file derived from the simulated device "
                                          f"{out}: nominal values only.\n" + chip_text)
        print(f"wrote {args.chip_out}")
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
    g = add("sim-chip", cmd_sim_chip, "write an invented simulated device of a chosen size "
                                      "(a chip to try the toolkit on: pass it as --rig FILE)")
    g.add_argument("--layout", choices=("grid", "line", "heavy-hex"), default="grid",
                   help="square grid (filled row by row), a line, or heavy-hex (qubits on the "
                        "vertices and edges of a hexagonal lattice: 2 or 3 neighbours each)")
    g.add_argument("--qubits", type=int, default=16, help="number of qubits (2 … 1000)")
    g.add_argument("--seed", type=int, default=1, help="seed of the invented values")
    g.add_argument("--phase-walk", type=float, default=0.0,
                   help="random walk of every coupling's phase (rad/√h; 0: no drift)")
    g.add_argument("--magnitude-walk", type=float, default=0.0,
                   help="random walk of every coupling's log-magnitude (per √h)")
    g.add_argument("-o", "--output", required=True, help="device file to write (TOML)")
    g.add_argument("--chip-out", help="also write the chip file a lab would know")
    g.add_argument("--force", action="store_true", help="replace files that exist")
