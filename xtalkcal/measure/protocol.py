"""Protocol files: how to calibrate (methods, shots, budgets, tolerances, cadences).

Users edit these, not code. Every field is optional except ``name``; the defaults
are those of ``protocols/full.toml``. Field by field::

    format = "xtalkcal-protocol"
    version = 1
    name = "full"

    [pulse]                      # the probe pulse
    duration_ns = 32.0
    sigma_ns = 8.0
    aggressor_fraction = 0.8     # aggressor peak amplitude as a fraction of its line's limit

    [methods]                    # which error signal per pair (xtalkcal.measure.probes)
    leakage_window_mhz = 35.0    # |f_aggressor − f12_victim| within this → leakage
    rotation_window_mhz = 35.0   # |f_aggressor − f01_victim| within this → rotation
    # only = ["leakage"]         # measure only the pairs whose chosen method is listed
    #                            # ("leakage", "rotation", "stark"); the others are left
    #                            # out of the calibration (default []: every pair)
    # overrides = [{ aggressor = "q4-line", victim = "q5", method = "leakage" }]

    [survey]                     # one pass per aggressor, all victims together
    shots = 1000                 # per timeline
    threshold_db = -40.0         # pairs whose |X| may exceed this are nulled
    ring_points = 6              # cancellation-tone points on a ring around 0
    max_train_ns = 6000.0        # longest aggressor train (sets K for Stark victims)

    [null]                       # column-parallel null search
    shots_per_point = 1000
    points_per_ring = 8
    target_residual_db = -50.0   # stop when every pair's |error of X| < this (95 %)
    max_rounds = 8
    shot_budget = 2000000        # per aggressor column

    [recheck]                    # scheduled drift re-checks
    tolerance_db = -45.0         # residual |X + r| allowed before recalibrating
    interval_hours = 12.0        # starting interval
    min_interval_hours = 0.5
    max_interval_hours = 48.0
    points = 4                   # ring points per re-checked pair (plus the centre)
    shots_per_point = 2000
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from xtalkcal.common import RECHECK_INTERVAL_RANGE_H, FieldErrors, load_toml, read_header, valid
from xtalkcal.exceptions import ConfigError
from xtalkcal.hardware import Chip
from xtalkcal.measure.probes import METHODS, MethodWindows

__all__ = [
    "PulseSettings",
    "SurveySettings",
    "NullSettings",
    "RecheckSettings",
    "Protocol",
    "load_protocol",
    "default_protocol",
    "protocol_from_dict",
]

PROTOCOL_FORMAT = "xtalkcal-protocol"
PROTOCOL_VERSION = 1


@dataclass(frozen=True)
class PulseSettings:
    duration_ns: float = 32.0
    sigma_ns: float = 8.0
    aggressor_fraction: float = 0.8


@dataclass(frozen=True)
class SurveySettings:
    shots: int = 1000
    threshold_db: float = -40.0
    ring_points: int = 6
    max_train_ns: float = 6000.0


@dataclass(frozen=True)
class NullSettings:
    shots_per_point: int = 1000
    points_per_ring: int = 8
    target_residual_db: float = -50.0
    max_rounds: int = 8
    shot_budget: int = 2_000_000


@dataclass(frozen=True)
class RecheckSettings:
    tolerance_db: float = -45.0
    interval_hours: float = 12.0
    min_interval_hours: float = 0.5
    max_interval_hours: float = 48.0
    points: int = 4
    shots_per_point: int = 2000


@dataclass(frozen=True)
class Protocol:
    """A validated protocol file."""

    name: str
    pulse: PulseSettings = field(default_factory=PulseSettings)
    windows: MethodWindows = field(default_factory=MethodWindows)
    overrides: tuple[tuple[str, str, str], ...] = ()
    survey: SurveySettings = field(default_factory=SurveySettings)
    null: NullSettings = field(default_factory=NullSettings)
    recheck: RecheckSettings = field(default_factory=RecheckSettings)
    only_methods: tuple[str, ...] = ()
    source: str = "<memory>"

    def check_against(self, chip: Chip) -> None:
        """Refuse method overrides naming a line or qubit ``chip`` does not have.

        Run before any rig time is spent (``calibrate``, ``due``, ``check`` with the chip
        file given too): a protocol is written without a chip, so only here can a typo
        such as ``d99`` be caught.

        Raises
        ------
        ConfigError
            One :class:`~xtalkcal.common.FieldErrors` naming this protocol file and each
            ``methods.overrides[i]`` field.
        """
        problems = []
        of = f"chip {chip.name!r}"
        for i, (line, victim, _) in enumerate(self.overrides):
            where = f"methods.overrides[{i}]"
            if line not in chip.line_names:
                problems.append(ConfigError(self.source, f"{where}.aggressor",
                                            f"{line!r} is not a drive line of {of}; known: "
                                            f"{', '.join(chip.line_names)}"))
            if victim not in chip.qubit_names:
                problems.append(ConfigError(self.source, f"{where}.victim",
                                            f"{victim!r} is not a qubit of {of}; known: "
                                            f"{', '.join(chip.qubit_names)}"))
            elif line in chip.line_names and chip.line(line).qubit == victim:
                problems.append(ConfigError(self.source, f"{where}.victim",
                                            f"{victim!r} is the qubit line {line} drives; "
                                            "accepted: another qubit"))
        if problems:
            raise FieldErrors(problems)

    def method_override(self, aggressor: str, victim: str) -> str | None:
        for a, v, m in self.overrides:
            if a == aggressor and v == victim:
                return m
        return None


def load_protocol(path: str | Path) -> Protocol:
    """Load and validate a protocol file; every problem in it is reported at once."""
    data, source = load_toml(path)
    return protocol_from_dict(data, source=source)


def default_protocol() -> Protocol:
    """The built-in defaults, those of ``protocols/full.toml`` (which need not be installed)."""
    return protocol_from_dict({"format": PROTOCOL_FORMAT, "version": PROTOCOL_VERSION,
                               "name": "full"}, source="built-in defaults")


def protocol_from_dict(data: Mapping[str, Any], *, source: str = "<memory>") -> Protocol:
    """Validate a protocol given as a TOML-shaped dictionary (errors as :func:`load_protocol`)."""
    top, name = read_header(data, source, kind=PROTOCOL_FORMAT, version=PROTOCOL_VERSION)

    pt = top.table("pulse", None)
    pulse = PulseSettings(
        duration_ns=pt.number("duration_ns", 32.0, lo=4.0, hi=1000.0, unit="ns"),
        sigma_ns=pt.number("sigma_ns", 8.0, lo=0.5, hi=250.0, unit="ns"),
        aggressor_fraction=pt.number("aggressor_fraction", 0.8, lo=0.0, hi=1.0, lo_open=True),
    )
    if valid(pulse.duration_ns, pulse.sigma_ns) and pulse.duration_ns < 2 * pulse.sigma_ns:
        pt.report("duration_ns", f"{pulse.duration_ns:g} ns is shorter than 2·sigma_ns = "
                                 f"{2 * pulse.sigma_ns:g} ns; accepted: duration_ns ≥ 2·sigma_ns")
    pt.reject_unknown()

    mt = top.table("methods", None)
    leak_mhz = mt.number("leakage_window_mhz", 35.0, lo=0.0, hi=1000.0, unit="MHz")
    rot_mhz = mt.number("rotation_window_mhz", 35.0, lo=0.0, hi=1000.0, unit="MHz")
    windows = MethodWindows(
        leakage_window_ghz=leak_mhz * 1e-3 if valid(leak_mhz) else leak_mhz,
        rotation_window_ghz=rot_mhz * 1e-3 if valid(rot_mhz) else rot_mhz,
    )
    overrides = []
    for ot in mt.tables("overrides", None):
        pair = (ot.name("aggressor"), ot.name("victim"))
        if valid(*pair) and any(o[:2] == pair for o in overrides):
            ot.report("victim", f"pair {pair[0]} → {pair[1]} has two overrides; accepted: one")
        overrides.append((*pair, ot.string("method", choices=METHODS)))
        ot.reject_unknown()
    only = mt.string_list("only", [])
    for m in only if valid(only) else ():
        if m not in METHODS:
            mt.report("only", f"{m!r} is not one of {', '.join(map(repr, METHODS))}")
    mt.reject_unknown()

    st = top.table("survey", None)
    survey = SurveySettings(
        shots=st.integer("shots", 1000, lo=10, hi=10_000_000),
        threshold_db=st.number("threshold_db", -40.0, lo=-120.0, hi=0.0, unit="dB"),
        ring_points=st.integer("ring_points", 6, lo=3, hi=64),
        max_train_ns=st.number("max_train_ns", 6000.0, lo=50.0, hi=1e5, unit="ns"),
    )
    st.reject_unknown()

    nt = top.table("null", None)
    null = NullSettings(
        shots_per_point=nt.integer("shots_per_point", 1000, lo=10, hi=10_000_000),
        points_per_ring=nt.integer("points_per_ring", 8, lo=4, hi=64),
        target_residual_db=nt.number("target_residual_db", -50.0, lo=-120.0, hi=0.0, unit="dB"),
        max_rounds=nt.integer("max_rounds", 8, lo=1, hi=100),
        shot_budget=nt.integer("shot_budget", 2_000_000, lo=100, hi=10**10),
    )
    nt.reject_unknown()

    rt = top.table("recheck", None)
    h_lo, h_hi = RECHECK_INTERVAL_RANGE_H
    recheck = RecheckSettings(
        tolerance_db=rt.number("tolerance_db", -45.0, lo=-120.0, hi=0.0, unit="dB"),
        interval_hours=rt.number("interval_hours", 12.0, lo=h_lo, hi=h_hi, unit="h"),
        min_interval_hours=rt.number("min_interval_hours", 0.5, lo=h_lo, hi=h_hi, unit="h"),
        max_interval_hours=rt.number("max_interval_hours", 48.0, lo=h_lo, hi=h_hi, unit="h"),
        points=rt.integer("points", 4, lo=3, hi=64),
        shots_per_point=rt.integer("shots_per_point", 2000, lo=10, hi=10_000_000),
    )
    lo_h, hi_h = recheck.min_interval_hours, recheck.max_interval_hours
    if valid(lo_h, recheck.interval_hours, hi_h) and not lo_h <= recheck.interval_hours <= hi_h:
        rt.report("interval_hours", f"accepted: min_interval_hours ≤ x ≤ max_interval_hours "
                                    f"({lo_h:g} to {hi_h:g} h), got {recheck.interval_hours:g}")
    rt.reject_unknown()
    top.reject_unknown()
    top.finish()
    return Protocol(name, pulse, windows, tuple(overrides), survey, null, recheck,
                    tuple(only), source)
