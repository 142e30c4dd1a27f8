"""The rig a command drives: the bundled simulator, a device file, or a lab's plug-in
(``package.module:factory``, optionally handed a ``--rig-config`` TOML file); a lab's chip
file (``--chip``) over any of them; and the stand-in a dry run drives instead.

Only this package imports :mod:`simulated_device` (as the default rig and the dry run's
stand-in).
"""

from __future__ import annotations

import argparse
import dataclasses
import importlib

from xtalkcal.cli.shared import usage_error
from xtalkcal.exceptions import ConfigError, RigError, XtalkcalError
from xtalkcal.outputs import RigView

__all__ = ["add_rig", "make_rig", "is_simulator", "DryRig", "LabChipRig", "chip_for_ledger",
           "rig_start_s", "dry_run_report"]

_NO_LIMITS = ("no [limits] table (or an empty one): a lab's own rig is driven only under "
              "limits stated in its chip file; accepted: a [limits] table with max_amplitude "
              "(and, with full_scale_dbm on every line, max_average_power_dbm and "
              "max_total_average_power_dbm)")


def is_simulator(spec: str) -> bool:
    """Whether ``--rig`` names the bundled simulator or a simulated-device file."""
    return spec == "sim" or spec.endswith(".toml")


def add_rig(cmd: argparse.ArgumentParser, *, dry_run: bool = True, default: str | None = "sim",
            why: str = "") -> None:
    """The options of every command that drives a rig."""
    cmd.add_argument("--rig", default=default,
                     help="'sim' (bundled demo device), a simulated-device .toml, or "
                          "package.module:factory (a lab's plug-in)" + why)
    cmd.add_argument("--rig-config", default=None, metavar="TOML",
                     help="file handed to a plug-in's factory as factory(config), config "
                          "the file's tables as a dict (instrument addresses and the like)")
    cmd.add_argument("--chip", default=None, metavar="FILE",
                     help="the lab's chip file: nominal values and limits; with the "
                          "simulator its limits apply on top of the device's own (default: "
                          "the rig's own chip)")
    cmd.add_argument("--seed", type=int, default=None, help="simulator seed")
    _add_rig_timeout(cmd)
    if dry_run:
        cmd.add_argument("--dry-run", action="store_true",
                         help="send nothing: plan, check against the limits, print the "
                              "drive per line")


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


class LabChipRig(RigView):
    """A rig seen through the lab's chip file: the chip (names, nominal values, limits,
    interlock) is the lab's, everything else the rig's own.

    The rig still applies its own checks too (the simulator its device's limits), so the
    stricter of the two limits binds: a lab chip file can only add limits.
    """

    def __init__(self, rig, chip) -> None:
        theirs = rig.chip
        for what, ours, other in (("qubits", chip.qubit_names, theirs.qubit_names),
                                  ("lines", chip.line_names, theirs.line_names)):
            if tuple(sorted(ours)) != tuple(sorted(other)):
                raise ConfigError(chip.source, what,
                                  f"{', '.join(ours)}: the rig drives {', '.join(other)}; "
                                  "accepted: a chip file with the rig's qubits and lines")
        for ln in chip.lines:
            if theirs.line(ln.name).qubit != ln.qubit:
                raise ConfigError(chip.source, f"lines.{ln.name}.qubit",
                                  f"{ln.qubit!r}: on the rig line {ln.name} drives "
                                  f"{theirs.line(ln.name).qubit!r}")
        super().__init__(rig)
        self._chip = chip

    @property
    def chip(self):
        return self._chip

    def run(self, timelines, shots):
        from xtalkcal.hardware import check_timelines

        # the lab's limits, before the rig's own check
        check_timelines(self._chip, list(timelines), self._rig.repetition_ns)
        return self._rig.run(timelines, shots)


def _factory(spec: str):
    if ":" not in spec:
        raise usage_error("--rig", f"{spec!r}: expected 'sim', a device .toml file, "
                                   "or 'package.module:factory'")
    mod, _, attr = spec.partition(":")
    try:
        return getattr(importlib.import_module(mod), attr)
    except (ImportError, AttributeError) as exc:
        raise usage_error("--rig", f"cannot load {spec!r}: {exc}") from None


def _plugin(spec: str, config_path: str | None):
    from xtalkcal.common import load_toml
    from xtalkcal.hardware import Rig

    factory = _factory(spec)
    config = dict(load_toml(config_path)[0]) if config_path else None
    try:
        rig = factory() if config is None else factory(config)
    except XtalkcalError:
        raise
    except TypeError as exc:
        if config is not None and "argument" in str(exc):
            raise usage_error("--rig-config", f"{config_path}: the factory {spec} takes no "
                                              f"configuration ({exc}); accepted: a factory "
                                              "def factory(config: dict)") from None
        raise RigError(f"--rig {spec}: the factory failed: TypeError: {exc}") from exc
    except Exception as exc:  # the lab's driver failed to connect, etc.: one line, no traceback
        raise RigError(f"--rig {spec}: the factory failed: {type(exc).__name__}: {exc}") from exc
    if not isinstance(rig, Rig):
        raise usage_error("--rig", f"{spec!r} did not return an object with the rig "
                                   "members (chip, repetition_ns, describe, run, now)")
    return rig


def make_rig(spec: str, *, seed: int | None, drift: bool, start_s: float = 0.0,
             chip_file: str | None = None, config: str | None = None):
    """The rig named on the command line, seen through ``chip_file`` if one is given.

    A plug-in's factory is called with no argument, or with the ``--rig-config`` file's
    contents (a dict). Any rig but the simulator runs only under stated limits.
    """
    from xtalkcal.hardware import load_chip

    if is_simulator(spec):
        if config is not None:
            raise usage_error("--rig-config", f"{config}: the simulator takes no "
                                              "configuration; accepted with a plug-in rig "
                                              "(--rig package.module:factory)")
        from simulated_device import SimRig, demo_device_path

        rig = SimRig(demo_device_path() if spec == "sim" else spec, seed=seed, drift=drift,
                     start_s=start_s)
    else:
        rig = _plugin(spec, config)
    if chip_file is not None:
        rig = LabChipRig(rig, load_chip(chip_file))
    if not is_simulator(spec) or chip_file is not None:
        limits = getattr(rig.chip, "limits", None)
        if not getattr(limits, "stated", False):
            # Power into a cryostat: a lab's own rig runs only under limits the lab wrote
            # down; a lab chip file given to the simulator is held to the same rule, so a
            # rehearsal refuses what the lab's rig would.
            raise ConfigError(getattr(rig.chip, "source", "the rig's chip"), "limits",
                              _NO_LIMITS)
    return rig


def chip_for_ledger(ledger_chip: str, chip_file: str | None):
    """The chip a ledger-only command works with: the ``--chip`` file, or the bundled
    simulated chip when the ledger is for it."""
    from xtalkcal.hardware import load_chip

    if chip_file is not None:
        chip = load_chip(chip_file)
        if chip.name != ledger_chip:
            raise ConfigError(chip_file, "name", f"{chip.name!r}: the ledger is for chip "
                                                 f"{ledger_chip!r}; accepted: that chip's file")
        return chip
    from simulated_device import SimRig, demo_device_path

    chip = SimRig(demo_device_path(), drift=False).chip
    if chip.name != ledger_chip:
        raise usage_error("--chip", f"the ledger is for chip {ledger_chip!r}; give its chip "
                                    "file with --chip FILE")
    return chip


def rig_start_s(spec: str, ledger) -> float:
    """Where the simulator's clock starts: it restarts with every process, so it goes on
    from the ledger's last entry plus the wall time since (drift goes on between runs).
    A lab's rig keeps its own clock (0 here)."""
    import datetime as dt

    if not is_simulator(spec) or ledger is None:
        return 0.0
    entries = ledger.entries()
    if not entries:
        return 0.0
    last = max(entries, key=lambda e: e.measured_at_s)
    then = dt.datetime.fromisoformat(last.measured_at_utc.replace("Z", "+00:00"))
    return last.measured_at_s + max(
        0.0, (dt.datetime.now(dt.timezone.utc) - then).total_seconds())


class DryRig:
    """Stands where the rig stands in a dry run: the lab chip's limits, the rig's
    repetition time, and answers from a crosstalk-free stand-in; nothing reaches the rig."""

    def __init__(self, rig) -> None:
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


def dry_run_report(rig, tally, planned: str) -> None:
    """Print what a dry run planned: batches, shots, rig time, the largest drive per line."""
    print(f"dry run: nothing was sent to {rig.describe()}")
    print(f"planned {planned}: {tally.batches} batches, {tally.shots:,} shots, about "
          f"{tally.shots * rig.repetition_ns * 1e-9:.1f} s of rig time, each within the "
          "limits above; largest drive per line:")
    print("\n".join(tally.lines(rig.chip)))
