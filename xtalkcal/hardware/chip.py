"""What a lab knows nominally about a chip: qubits, drive lines, readout, safety limits.

A chip file never holds the hidden truth of a device (true couplings, drifts):
only what a calibration scientist would write down before measuring.

Chip file (TOML), field by field::

    format = "xtalkcal-chip"     # marks the file kind
    version = 1                  # chip-file schema version
    name = "grid9-demo"

    [limits]                     # the lab's safety limits, applied to every line
    max_amplitude = 0.9          # peak |a| on any line, fraction of full scale (0, 1]
    max_average_power_dbm = -50  # optional, per line; needs every line's full_scale_dbm
    max_total_average_power_dbm = -45  # optional, summed over all lines (the fridge's
                                       # heat load); needs every line's full_scale_dbm

A chip file without a ``[limits]`` table (or with an empty one) drives only the bundled
simulator: a lab's own rig refuses it. The table states the limits the lab has decided;
write it out even if it only repeats ``max_amplitude = 1.0``.

    [[qubits]]
    name = "q0"
    f01_ghz = 4.85               # 0-1 transition frequency
    anharmonicity_ghz = -0.21    # f12 - f01, negative for a transmon
    f12_ghz = 4.64               # optional; defaults to f01 + anharmonicity
    t1_us = 60.0                 # optional nominal T1
    t2_us = 40.0                 # optional nominal T2 (echo-free Ramsey)

    [[lines]]
    name = "q0-line"
    qubit = "q0"                 # the qubit this line is meant to drive
    rabi_mhz = 40.0              # Rabi frequency on its own qubit at amplitude 1
    max_amplitude = 0.8          # this line's own peak-amplitude limit
    full_scale_dbm = -20.0       # optional; power at the chip at amplitude 1

    [readout]
    groups = [["q0", "q1"], ["q2"]]   # qubits read out on one feedline; default all together

    [interlock]                  # optional: a lab command that must approve every batch
    command = ["/opt/lab/bin/fridge-ok"]   # argv, no shell; exit 0 approves
    timeout_s = 30.0             # silence past this counts as a refusal

(:mod:`xtalkcal.hardware.interlock` says how the command is run.)
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from xtalkcal.common import REQUIRED, Fields, load_toml, read_header, valid
from xtalkcal.hardware.interlock import Interlock, interlock_from_table

__all__ = ["Qubit", "DriveLine", "SafetyLimits", "Chip", "load_chip", "chip_from_dict"]

CHIP_FORMAT = "xtalkcal-chip"
CHIP_VERSION = 1

# Plausible ranges for transmon parameters; values outside are almost surely unit mistakes
# (MHz typed where GHz is expected). Common practice, not a hard physical bound.
F01_RANGE_GHZ = (0.5, 20.0)
ANHARMONICITY_RANGE_GHZ = (-1.0, 0.0)
RABI_RANGE_MHZ = (1e-3, 1000.0)
# Coherence times up to 0.1 s: two orders of magnitude beyond the best transmons reported
# (about a millisecond, a value from memory); common practice, not a hard physical bound.
COHERENCE_RANGE_US = (0.0, 1e5)
POWER_RANGE_DBM = (-200.0, 40.0)  # 40 dBm is 10 W at the chip: far beyond any drive line


@dataclass(frozen=True)
class Qubit:
    """A transmon as the lab knows it nominally.

    Parameters
    ----------
    name : str
        Unique qubit name.
    f01_ghz : float
        0–1 transition frequency (GHz).
    anharmonicity_ghz : float
        α = f12 − f01 (GHz), negative.
    f12_ghz : float
        1–2 transition frequency (GHz).
    t1_us, t2_us : float or None
        Nominal relaxation and Ramsey dephasing times (µs), used to choose amplification.
    """

    name: str
    f01_ghz: float
    anharmonicity_ghz: float
    f12_ghz: float
    t1_us: float | None = None
    t2_us: float | None = None

    @property
    def f02_half_ghz(self) -> float:
        """Frequency of the two-photon 0–2 transition, (f01 + f12)/2 (GHz)."""
        return 0.5 * (self.f01_ghz + self.f12_ghz)


@dataclass(frozen=True)
class DriveLine:
    """A microwave drive line.

    Parameters
    ----------
    name : str
        Unique line name.
    qubit : str
        Name of the qubit the line is meant to drive.
    rabi_mhz : float
        Rabi frequency (MHz) the line produces on its own qubit at amplitude 1, at that
        qubit's f01.
    max_amplitude : float
        Peak |amplitude| allowed on this line (fraction of full scale).
    full_scale_dbm : float or None
        Power delivered towards the chip at amplitude 1 (dBm), if known.
    """

    name: str
    qubit: str
    rabi_mhz: float
    max_amplitude: float
    full_scale_dbm: float | None = None

    def power_dbm(self, amplitude: float) -> float | None:
        """Power (dBm) at a given amplitude, or None when full scale is unknown."""
        if self.full_scale_dbm is None:
            return None
        if amplitude <= 0:
            return -math.inf
        return self.full_scale_dbm + 20.0 * math.log10(amplitude)


@dataclass(frozen=True)
class SafetyLimits:
    """The lab's limits, applied on top of each line's own limit.

    Parameters
    ----------
    max_amplitude : float
        Peak |amplitude| allowed on any line (fraction of full scale).
    max_average_power_dbm : float or None
        Time-averaged power per line over one repetition (dBm); requires full scale.
    max_total_average_power_dbm : float or None
        Time-averaged power summed over all lines (dBm): the heat load the cryostat sees;
        requires full scale.
    stated : bool
        Whether the chip file had a ``[limits]`` table. Without one, only the bundled
        simulator may be driven.
    """

    max_amplitude: float = 1.0
    max_average_power_dbm: float | None = None
    max_total_average_power_dbm: float | None = None
    stated: bool = False


@dataclass(frozen=True)
class Chip:
    """A chip: qubits, their drive lines, readout grouping and the lab's safety limits."""

    name: str
    qubits: tuple[Qubit, ...]
    lines: tuple[DriveLine, ...]
    readout_groups: tuple[tuple[str, ...], ...]
    limits: SafetyLimits = field(default_factory=SafetyLimits)
    source: str = "<memory>"
    interlock: Interlock | None = None

    def qubit(self, name: str) -> Qubit:
        """The qubit called ``name`` (KeyError listing the known names otherwise)."""
        for q in self.qubits:
            if q.name == name:
                return q
        raise KeyError(f"no qubit {name!r}; known: {', '.join(self.qubit_names)}")

    def line(self, name: str) -> DriveLine:
        """The drive line called ``name``."""
        for ln in self.lines:
            if ln.name == name:
                return ln
        raise KeyError(f"no line {name!r}; known: {', '.join(self.line_names)}")

    def line_of(self, qubit: str) -> DriveLine:
        """The drive line meant for ``qubit``."""
        for ln in self.lines:
            if ln.qubit == qubit:
                return ln
        raise KeyError(f"qubit {qubit!r} has no drive line")

    @property
    def qubit_names(self) -> tuple[str, ...]:
        return tuple(q.name for q in self.qubits)

    @property
    def line_names(self) -> tuple[str, ...]:
        return tuple(ln.name for ln in self.lines)

    def amplitude_limit(self, line: str) -> float:
        """The binding peak-amplitude limit of a line: min(line limit, lab limit)."""
        return min(self.line(line).max_amplitude, self.limits.max_amplitude)

    def to_dict(self) -> dict[str, Any]:
        """The chip as a TOML-shaped dictionary (inverse of :func:`chip_from_dict`)."""

        def clean(d: Mapping[str, Any]) -> dict[str, Any]:
            return {k: v for k, v in d.items() if v is not None}

        limits = clean(
            {
                "max_amplitude": self.limits.max_amplitude,
                "max_average_power_dbm": self.limits.max_average_power_dbm,
                "max_total_average_power_dbm": self.limits.max_total_average_power_dbm,
            }
        )
        return {
            "format": CHIP_FORMAT,
            "version": CHIP_VERSION,
            "name": self.name,
            "limits": limits,
            "qubits": [
                clean(
                    {
                        "name": q.name,
                        "f01_ghz": q.f01_ghz,
                        "anharmonicity_ghz": q.anharmonicity_ghz,
                        "f12_ghz": q.f12_ghz,
                        "t1_us": q.t1_us,
                        "t2_us": q.t2_us,
                    }
                )
                for q in self.qubits
            ],
            "lines": [
                clean(
                    {
                        "name": ln.name,
                        "qubit": ln.qubit,
                        "rabi_mhz": ln.rabi_mhz,
                        "max_amplitude": ln.max_amplitude,
                        "full_scale_dbm": ln.full_scale_dbm,
                    }
                )
                for ln in self.lines
            ],
            "readout": {"groups": [list(g) for g in self.readout_groups]},
            **({"interlock": self.interlock.to_dict()} if self.interlock else {}),
        }


def read_limits(lim: Fields) -> SafetyLimits:
    """The lab's ``[limits]`` table (shared by chip and simulated-device files).

    The limits count as stated when the table holds at least one limit; an absent or
    empty table states none.
    """
    limits = SafetyLimits(
        max_amplitude=lim.number("max_amplitude", 1.0, lo=0.0, hi=1.0, lo_open=True),
        max_average_power_dbm=lim.number("max_average_power_dbm", None, lo=POWER_RANGE_DBM[0],
                                         hi=POWER_RANGE_DBM[1], unit="dBm"),
        max_total_average_power_dbm=lim.number(
            "max_total_average_power_dbm", None, lo=POWER_RANGE_DBM[0], hi=POWER_RANGE_DBM[1],
            unit="dBm"),
        stated=bool(lim.data),
    )
    lim.reject_unknown()
    return limits


def read_transmon_nominal(qt: Fields, *, required: bool = True) -> tuple[Any, Any]:
    """``f01_ghz`` and ``anharmonicity_ghz`` of a ``[[qubits]]`` block (chip and device files).

    Returns
    -------
    f01_ghz, anharmonicity_ghz : float, None (absent and not required) or INVALID
    """
    default = REQUIRED if required else None
    f01 = qt.number("f01_ghz", default, lo=F01_RANGE_GHZ[0], hi=F01_RANGE_GHZ[1], unit="GHz")
    alpha = qt.number(
        "anharmonicity_ghz",
        default,
        lo=ANHARMONICITY_RANGE_GHZ[0],
        hi=ANHARMONICITY_RANGE_GHZ[1],
        hi_open=True,
        unit="GHz",
    )
    return f01, alpha


def read_coherence(qt: Fields, *, required: bool) -> tuple[Any, Any]:
    """``t1_us`` and ``t2_us`` of a ``[[qubits]]`` block, T2 ≤ 2·T1 checked.

    Returns
    -------
    t1_us, t2_us : float, None (absent and not required) or INVALID
    """
    default = REQUIRED if required else None
    lo, hi = COHERENCE_RANGE_US
    t1 = qt.number("t1_us", default, lo=lo, hi=hi, lo_open=True, unit="µs")
    t2 = qt.number("t2_us", default, lo=lo, hi=hi, lo_open=True, unit="µs")
    if valid(t1, t2) and t1 is not None and t2 is not None and t2 > 2 * t1 * (1 + 1e-9):
        qt.report("t2_us", f"T2 = {t2:g} µs exceeds 2·T1 = {2 * t1:g} µs (unphysical); "
                           "accepted: t2_us ≤ 2·t1_us")
    return t1, t2


def read_drive_lines(top: Fields, qnames: Sequence[Any]) -> list[tuple[DriveLine, Fields]]:
    """The ``[[lines]]`` blocks (chip and device files): exactly one drive line per qubit.

    Parameters
    ----------
    top : Fields
        The file's top-level table.
    qnames : sequence of str
        The qubit names read so far (some may be INVALID).

    Returns
    -------
    list of (DriveLine, Fields)
        Each line (fields that were wrong are INVALID) with its block, which the caller
        may read further and must close with ``reject_unknown``.
    """
    blocks = top.named_tables("lines", "line", required=False)
    targets = top.one_each("lines", [lt for _, lt in blocks], "qubit", qnames,
                           noun="qubit", block_noun="drive line")
    return [
        (
            DriveLine(
                lname,
                target,
                lt.number("rabi_mhz", lo=RABI_RANGE_MHZ[0], hi=RABI_RANGE_MHZ[1], unit="MHz"),
                lt.number("max_amplitude", 1.0, lo=0.0, hi=1.0, lo_open=True),
                lt.number("full_scale_dbm", None, lo=POWER_RANGE_DBM[0], hi=POWER_RANGE_DBM[1],
                          unit="dBm"),
            ),
            lt,
        )
        for (lname, lt), target in zip(blocks, targets, strict=True)
    ]


def load_chip(path: str | Path) -> Chip:
    """Load and validate a chip file.

    Parameters
    ----------
    path : str or Path
        The chip file (TOML).

    Raises
    ------
    ConfigError
        A :class:`~xtalkcal.common.FieldErrors` listing every problem found, one line
        each, naming the file, the field and what would be accepted.
    """
    data, source = load_toml(path)
    return chip_from_dict(data, source=source)


def chip_from_dict(data: Mapping[str, Any], *, source: str = "<memory>") -> Chip:
    """Validate a chip given as a TOML-shaped dictionary (errors as :func:`load_chip`)."""
    top, name = read_header(data, source, kind=CHIP_FORMAT, version=CHIP_VERSION,
                            hint=" (is this a device or protocol file?)")
    lim = top.table("limits", None)
    limits = read_limits(lim)

    qubits: list[Qubit] = []
    for qname, qt in top.named_tables("qubits", "qubit"):
        f01, alpha = read_transmon_nominal(qt)
        f12 = qt.number("f12_ghz", None, lo=F01_RANGE_GHZ[0], hi=F01_RANGE_GHZ[1], unit="GHz")
        if f12 is None and valid(f01, alpha):
            f12 = f01 + alpha
        elif f12 is not None and valid(f01, alpha, f12) and abs((f12 - f01) - alpha) > 0.05:
            qt.report(
                "f12_ghz",
                f"{f12:g} GHz disagrees with f01_ghz + anharmonicity_ghz = {f01 + alpha:g} GHz "
                "by more than 50 MHz; accepted: omit it, or give a consistent value",
            )
        t1, t2 = read_coherence(qt, required=False)
        qt.reject_unknown()
        qubits.append(Qubit(qname, f01, alpha, f12, t1, t2))
    qnames = [q.name for q in qubits]

    line_blocks = read_drive_lines(top, qnames)
    for _, lt in line_blocks:
        lt.reject_unknown()
    lines = [ln for ln, _ in line_blocks]
    for key in ("max_average_power_dbm", "max_total_average_power_dbm"):
        if getattr(limits, key) is None or not valid(getattr(limits, key)):
            continue
        unknown_fs = [ln.name if valid(ln.name) else lt.path
                      for ln, lt in line_blocks if ln.full_scale_dbm is None]
        if unknown_fs:
            lim.report(
                key,
                f"needs full_scale_dbm on every line (missing on {', '.join(unknown_fs)}); "
                "accepted: give each line's full_scale_dbm",
            )

    interlock = interlock_from_table(top.table("interlock", None),
                                     isinstance(data.get("interlock"), Mapping))

    ro = top.table("readout", None)
    groups = ro.name_lists("groups", None)
    if groups is None:
        groups = [qnames]
    elif valid(groups, *qnames):
        _check_partition(ro, "groups", groups, qnames)
    ro.reject_unknown()
    top.reject_unknown()
    top.finish()
    return Chip(name, tuple(qubits), tuple(lines), tuple(tuple(g) for g in groups), limits,
                source, interlock)


def _check_partition(ro: Fields, key: str, groups: list[list[str]], qnames: list[str]) -> None:
    """Report every way in which the readout groups fail to split the qubits."""
    seen: set[str] = set()
    for g in groups:
        for qn in g:
            if qn not in qnames:
                ro.report(key, f"{qn!r} is not a qubit of this chip; known: {', '.join(qnames)}")
            elif qn in seen:
                ro.report(key, f"qubit {qn!r} appears in two groups; accepted: each qubit in "
                               "exactly one group")
            seen.add(qn)
    left = [q for q in qnames if q not in seen]
    if left:
        ro.report(key, f"qubit(s) {', '.join(left)} are in no readout group; accepted: each "
                       "qubit in exactly one group")
