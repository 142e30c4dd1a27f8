"""The hidden truth of a simulated chip, loaded from a device file (TOML).

A device file is what only the simulator knows: true couplings with their phases
and delays, relaxation, readout errors, drift and electronics jitter. The chip file
a lab would write (nominal frequencies, line gains, limits) is derived from it by
:meth:`DeviceSpec.chip`.

Device file, field by field::

    format = "xtalkcal-simdevice"
    version = 3                # 1, 2 or 3; fields marked "version N" need version ≥ N
    name = "grid9-demo"
    seed = 20261201            # seeds readout sampling, jitter and drift
    levels = 3                 # transmon levels kept per qubit (≥ 2)
    repetition_us = 100.0      # time between shot starts

    [electronics]              # per-line, shot-to-shot imperfections of every tone
    amplitude_jitter = 5e-4    # relative amplitude, standard deviation
    phase_jitter_rad = 1e-3    # phase, standard deviation
    jitter_groups = 1          # independent jitter draws per timeline (shots split evenly)

    [drift]                    # all optional; omit the table for a drift-free device
    phase_diffusion_rad2_per_hour = 1e-4   # random walk of every coupling phase
    phase_rate_rad_per_hour = 0.0          # default linear phase drift of every coupling
    log_magnitude_diffusion_per_hour = 1e-5
    qubit_wander_mhz = 0.02                # stationary std of each f01 (Ornstein-Uhlenbeck)
    qubit_wander_hours = 2.0               # its correlation time

    [limits]                   # the lab's limits, copied into the derived chip file
    max_amplitude = 0.9

    [[qubits]]
    name = "q0"
    f01_ghz = 4.85             # either f01_ghz + anharmonicity_ghz (Duffing levels)
    anharmonicity_ghz = -0.21
    # ej_ghz = 15.0            # or ej_ghz + ec_ghz (charge-basis diagonalisation)
    # ec_ghz = 0.22
    t1_us = 60.0
    t2_us = 45.0
    readout = [[0.98, 0.02, 0.0], [0.04, 0.95, 0.01], [0.02, 0.06, 0.92]]  # P(assigned|level)
    # qubit noise, all optional and off when absent (see simulated_device.qubit_noise):
    thermal_population = 0.02  # P(|1⟩) at preparation, Gibbs state of the levels (0 … 0.1)
    f01_noise_mhz = 0.01       # std of an f01 offset constant over a batch, new each batch
    f01_shot_noise_mhz = 0.02  # std of an f01 offset per (timeline, jitter group)
    tls_shift_mhz = 0.05       # f01 shift while a two-level defect is up (−100 … 100)
    tls_rate_per_hour = 2.0    # its switching rate each way (random telegraph, 0 … 1e6)
    t1_fluctuation = 0.1       # T1 of a batch is T1·exp(s·z), z ~ N(0, 1); s in 0 … 1

    [[lines]]
    name = "q0-line"
    qubit = "q0"
    rabi_mhz = 40.0            # true Rabi frequency on its own qubit at amplitude 1
    max_amplitude = 0.8
    full_scale_dbm = -20.0     # optional
    self_delay_ns = 0.0        # gentle frequency response of the line at its own qubit
    self_slope_db_per_ghz = 0.0

    [[couplings]]              # leak of a line onto another qubit
    line = "q1-line"
    qubit = "q0"
    crosstalk_db = -28.0       # |X| at the victim's f01, relative to the victim's own line
    phase_deg = 35.0           # arg X at the victim's f01
    delay_ns = 1.5             # extra delay of the leak path: arg X(f) = phase − 2π(f − f01)·delay
    phase_rate_rad_per_hour = 0.0   # optional, overrides the drift default for this pair
    phase_diffusion_rad2_per_hour = 1e-4      # optional, version 2 (0 … 100 rad²/h): own walk
    log_magnitude_diffusion_per_hour = 1e-5   # optional, version 2 (0 … 100 1/h): own walk

    [[steps]]                  # version 2: a sudden change of one listed coupling
    at_hours = 30.0            # simulated time it happens (0 … 1e6 h); it holds from then on
    line = "q1-line"
    qubit = "q0"
    crosstalk_db_change = 3.0  # dB added to |X| (−40 … 40)
    phase_deg_change = 20.0    # optional (default 0), added to arg X (−360 … 360)

    [[exchange]]               # version 3: exchange coupling of two transmons (optional)
    qubit_a = "q0"             # H_J/h = J·(a†b + ab†), rotating-wave (see
    qubit_b = "q1"             # simulated_device.exchange); a victim with such neighbours
    j_mhz = 3.0                # is simulated with them as one cluster; 0 < J ≤ 50 MHz
                               # (simulated_device.coupled); the derived chip file lists
                               # its dressed frequencies

Leak paths and electronics (version 3; every field optional, each effect off without it;
the values below are an invented example)::

    [paths]                    # version 3
    envelope_delay = true      # default true in version 3 (false: carrier-only delay, the
                               # model of version 1–2 files); see simulated_device.paths

    [[lines]]                  # in addition to the fields above
    lo_ghz = 4.95              # the line's LO as a lab knows it (0.1 … 50 GHz); needed by
                               # image_dbc and lo_leak_dbc
    image_dbc = -35.0          # IQ image at 2·lo_ghz − f of every tone f (−150 … 0 dBc)
    image_phase_deg = 0.0      # its phase (−360 … 360), relative to conj(tone)
    lo_leak_dbc = -45.0        # carrier at lo_ghz through every shot, dB below full scale
    lo_leak_phase_deg = 0.0    # its phase (−360 … 360)
    compression_amplitude = 1.2    # Rapp saturation amplitude A_sat (0.01 … 100)
    compression_smoothness = 2.0   # Rapp p (0.5 … 50); see simulated_device.electronics

    [[couplings]]              # in addition to the fields above
    resonances = [[5.12, 30.0, 0.5]]   # [f_ghz (0.1 … 50), width_mhz (0.001 … 1000),
                                       #  strength (0 … 100)] per package/box mode

Spurious tones (image, LO leakage) reach every qubit through the same leak paths as the
line's tones (``[[couplings]]`` plus resonances), and the line's own qubit through its line.

Unlisted (line, qubit) pairs do not couple. The drift of a coupling is its phase random
walk (``phase_diffusion_rad2_per_hour``, its own or the ``[drift]`` default), its linear
phase rate, its log-magnitude random walk, and the sum of the steps at or before the time.
Steps are drift: a rig made with drift off (``SimRig(..., drift=False)``) has none.
Drift runs only if at least one ``[drift]`` rate, a coupling's own diffusion or a step is
non-zero (a version 1 file with only per-coupling phase rates has no drift, as before).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from simulated_device.electronics import LineElectronics, read_line_electronics
from simulated_device.exchange import ExchangeTruth, read_exchange
from simulated_device.paths import Resonance, read_resonances
from simulated_device.qubit_noise import QubitNoise
from simulated_device.transmon import TransmonLevels, charge_basis_levels, duffing_levels
from xtalkcal.common import INVALID, Fields, load_toml, read_header, valid
from xtalkcal.hardware import (
    Chip,
    DriveLine,
    Qubit,
    SafetyLimits,
    read_coherence,
    read_drive_lines,
    read_limits,
    read_transmon_nominal,
)

__all__ = [
    "QubitTruth",
    "LineTruth",
    "CouplingTruth",
    "DriftParams",
    "StepChange",
    "DeviceSpec",
    "load_device",
    "device_from_dict",
]

DEVICE_FORMAT = "xtalkcal-simdevice"
DEVICE_VERSION = 3
# [[couplings]] fields a version 1 file may not hold.
_VERSION_2_FIELDS = ("phase_diffusion_rad2_per_hour", "log_magnitude_diffusion_per_hour")
HOUR_S = 3600.0
# Drift beyond these would scramble a coupling within seconds: no chip worth simulating.
DIFFUSION_MAX_PER_HOUR = 100.0  # rad²/h for phases, 1/h for log-magnitudes
RATE_MAX = 100.0  # rad/h
STEP_MAX_DB = 40.0  # a larger jump of one coupling is a broken chip, not drift
STEP_LATEST_HOURS = 1e6  # about a century of simulated time


@dataclass(frozen=True)
class QubitTruth:
    """True parameters of one transmon."""

    name: str
    levels: TransmonLevels
    t1_us: float
    t2_us: float
    readout: np.ndarray  # (L_assign, L_assign) P(assigned | level), rows sum to 1
    ej_ghz: float | None = None
    ec_ghz: float | None = None
    noise: QubitNoise = field(default_factory=QubitNoise)

    @property
    def f01_ghz(self) -> float:
        return float(self.levels.energies_ghz[1])

    @property
    def f12_ghz(self) -> float:
        e = self.levels.energies_ghz
        return float(e[2] - e[1])


@dataclass(frozen=True)
class LineTruth:
    """True gain and own-qubit frequency response of a line."""

    name: str
    qubit: str
    rabi_mhz: float
    max_amplitude: float
    full_scale_dbm: float | None
    self_delay_ns: float = 0.0
    self_slope_db_per_ghz: float = 0.0
    electronics: LineElectronics | None = None  # version 3: image, LO leak, compression


@dataclass(frozen=True)
class CouplingTruth:
    """Leak of ``line`` onto ``qubit``, as the crosstalk element X at the victim's f01."""

    line: str
    qubit: str
    crosstalk_db: float
    phase_rad: float
    delay_ns: float
    phase_rate_rad_per_hour: float | None = None
    phase_diffusion_rad2_per_hour: float | None = None  # None: the [drift] default
    log_magnitude_diffusion_per_hour: float | None = None
    resonances: tuple[Resonance, ...] = ()  # version 3: package/box modes on this path


@dataclass(frozen=True)
class StepChange:
    """A sudden change of the coupling ``line`` → ``qubit`` from ``at_hours`` on."""

    at_hours: float
    line: str
    qubit: str
    crosstalk_db_change: float  # dB added to |X|
    phase_rad_change: float = 0.0  # added to arg X

    @property
    def at_s(self) -> float:
        return self.at_hours * HOUR_S


@dataclass(frozen=True)
class DriftParams:
    """Drift of the hidden parameters (all zero: a drift-free device)."""

    phase_diffusion_rad2_per_hour: float = 0.0
    phase_rate_rad_per_hour: float = 0.0
    log_magnitude_diffusion_per_hour: float = 0.0
    qubit_wander_mhz: float = 0.0
    qubit_wander_hours: float = 1.0

    @property
    def enabled(self) -> bool:
        return any(
            v != 0.0
            for v in (
                self.phase_diffusion_rad2_per_hour,
                self.phase_rate_rad_per_hour,
                self.log_magnitude_diffusion_per_hour,
                self.qubit_wander_mhz,
            )
        )


@dataclass(frozen=True)
class DeviceSpec:
    """Everything the simulator knows about a chip."""

    name: str
    seed: int
    n_levels: int
    repetition_us: float
    qubits: tuple[QubitTruth, ...]
    lines: tuple[LineTruth, ...]
    couplings: tuple[CouplingTruth, ...]
    limits: SafetyLimits
    amplitude_jitter: float = 5e-4
    phase_jitter_rad: float = 1e-3
    jitter_groups: int = 1
    drift: DriftParams = field(default_factory=DriftParams)
    source: str = "<memory>"
    steps: tuple[StepChange, ...] = ()
    envelope_delay: bool = False  # version 3 default True: leaks delay envelopes too
    exchange: tuple[ExchangeTruth, ...] = ()  # [[exchange]] blocks (none: no coupling)

    @property
    def drifts(self) -> bool:
        """Whether anything drifts: a ``[drift]`` rate, a coupling's own diffusion or a step."""
        own = (
            v
            for c in self.couplings
            for v in (c.phase_diffusion_rad2_per_hour, c.log_magnitude_diffusion_per_hour)
        )
        return self.drift.enabled or any(v for v in own) or bool(self.steps)

    # ------------------------------------------------------------------ lookups
    def qubit(self, name: str) -> QubitTruth:
        """The qubit called ``name`` (KeyError(name) otherwise)."""
        return _first(self.qubits, "name", name)

    def line(self, name: str) -> LineTruth:
        """The line called ``name`` (KeyError(name) otherwise)."""
        return _first(self.lines, "name", name)

    def line_of(self, qubit: str) -> LineTruth:
        """The line meant for ``qubit`` (KeyError(qubit) otherwise)."""
        return _first(self.lines, "qubit", qubit)

    def coupling(self, line: str, qubit: str) -> CouplingTruth | None:
        """The leak of ``line`` onto ``qubit``, or None where they do not couple."""
        return next((c for c in self.couplings if c.line == line and c.qubit == qubit), None)

    def chip(self) -> Chip:
        """The chip file a lab would have: nominal values only, no hidden truth.

        A qubit with exchange neighbours is listed at its dressed frequencies (neighbours in
        |0⟩), as a lab measures them.
        """
        from simulated_device.coupled import dressed_frequencies

        freqs = {q.name: dressed_frequencies(self, q.name) for q in self.qubits}
        return Chip(
            name=self.name,
            qubits=tuple(
                Qubit(
                    q.name,
                    round(freqs[q.name][0], 6),
                    round(freqs[q.name][1] - freqs[q.name][0], 6),
                    round(freqs[q.name][1], 6),
                    q.t1_us,
                    q.t2_us,
                )
                for q in self.qubits
            ),
            lines=tuple(
                DriveLine(ln.name, ln.qubit, ln.rabi_mhz, ln.max_amplitude, ln.full_scale_dbm)
                for ln in self.lines
            ),
            readout_groups=(tuple(q.name for q in self.qubits),),
            limits=self.limits,
            source=f"derived from {self.source}",
        )


def _first(items: tuple[Any, ...], attribute: str, value: str) -> Any:
    """The first of ``items`` whose ``attribute`` equals ``value``; KeyError(value) if none."""
    for item in items:
        if getattr(item, attribute) == value:
            return item
    raise KeyError(value)


def load_device(path: str | Path) -> DeviceSpec:
    """Load a simulated-device file: all its problems in one ConfigError, a line each."""
    data, source = load_toml(path)
    return device_from_dict(data, source=source)


def device_from_dict(data: Mapping[str, Any], *, source: str = "<memory>") -> DeviceSpec:
    """Validate a device given as a TOML-shaped dictionary (errors as :func:`load_device`)."""
    top, name = read_header(data, source, kind=DEVICE_FORMAT, version=DEVICE_VERSION,
                            hint=" (is this a chip file?)")
    seed = top.integer("seed", 0, lo=0, hi=2**63 - 1)
    n_levels = top.integer("levels", 3, lo=2, hi=8)
    rep = top.number("repetition_us", 100.0, lo=0.1, hi=1e5, unit="µs")

    el = top.table("electronics", None)
    amp_j = el.number("amplitude_jitter", 5e-4, lo=0.0, hi=0.1)
    ph_j = el.number("phase_jitter_rad", 1e-3, lo=0.0, hi=0.5, unit="rad")
    groups = el.integer("jitter_groups", 1, lo=1, hi=1000)
    el.reject_unknown()

    dr = top.table("drift", None)
    drift = DriftParams(
        phase_diffusion_rad2_per_hour=dr.number("phase_diffusion_rad2_per_hour", 0.0, lo=0.0,
                                                hi=DIFFUSION_MAX_PER_HOUR, unit="rad²/h"),
        phase_rate_rad_per_hour=dr.number("phase_rate_rad_per_hour", 0.0, lo=-RATE_MAX,
                                          hi=RATE_MAX, unit="rad/h"),
        log_magnitude_diffusion_per_hour=dr.number("log_magnitude_diffusion_per_hour", 0.0,
                                                   lo=0.0, hi=DIFFUSION_MAX_PER_HOUR, unit="1/h"),
        qubit_wander_mhz=dr.number("qubit_wander_mhz", 0.0, lo=0.0, hi=100.0, unit="MHz"),
        qubit_wander_hours=dr.number("qubit_wander_hours", 1.0, lo=0.0, hi=1e4, lo_open=True,
                                     unit="h"),
    )
    dr.reject_unknown()

    limits = read_limits(top.table("limits", None))

    qubits = [_read_qubit(qname, qt, n_levels) for qname, qt in top.named_tables("qubits", "qubit")]
    qnames = [q.name for q in qubits]

    version_3 = data.get("version", DEVICE_VERSION) == 3
    envelope_delay = _read_paths(top, version_3)
    lines: list[LineTruth] = []
    for ln, lt in read_drive_lines(top, qnames):
        lines.append(LineTruth(
            ln.name,
            ln.qubit,
            ln.rabi_mhz,
            ln.max_amplitude,
            ln.full_scale_dbm,
            lt.number("self_delay_ns", 0.0, lo=-100.0, hi=100.0, unit="ns"),
            lt.number("self_slope_db_per_ghz", 0.0, lo=-60.0, hi=60.0, unit="dB/GHz"),
            read_line_electronics(lt, version_3),
        ))
        lt.reject_unknown()
    own_qubit = {ln.name: ln.qubit for ln in lines}

    version_1 = data.get("version", DEVICE_VERSION) == 1
    couplings = _read_couplings(top, own_qubit, qnames, version_1, version_3)
    steps = _read_steps(top, couplings, list(own_qubit), qnames, version_1)
    exchange = read_exchange(top, qnames, data.get("version", DEVICE_VERSION))
    top.reject_unknown()
    top.finish()
    return DeviceSpec(
        name=name,
        seed=seed,
        n_levels=n_levels,
        repetition_us=rep,
        qubits=tuple(qubits),
        lines=tuple(lines),
        couplings=tuple(couplings),
        limits=limits,
        amplitude_jitter=amp_j,
        phase_jitter_rad=ph_j,
        jitter_groups=groups,
        drift=drift,
        source=source,
        steps=tuple(steps),
        envelope_delay=envelope_delay,
        exchange=tuple(exchange),
    )


def _read_paths(top: Fields, version_3: bool) -> bool:
    """The ``[paths]`` table: whether leaks delay envelopes (version 3 default: yes)."""
    if "paths" in top.data and not version_3:
        top.report("paths", "needs version = 3 (a version 1–2 file delays only the carrier)")
        top.table("paths", None)
        return False
    pt = top.table("paths", None)
    on = pt.boolean("envelope_delay", version_3)
    pt.reject_unknown()
    return bool(on) if valid(on) else False


def _read_couplings(top: Fields, own_qubit: Mapping[Any, Any], qnames: list[Any],
                    version_1: bool, version_3: bool = False) -> list[CouplingTruth]:
    """The ``[[couplings]]`` blocks (the version 2 fields refused in a version 1 file)."""
    couplings: list[CouplingTruth] = []
    seen: set[tuple[Any, Any]] = set()
    known_qubits = dict.fromkeys(qnames)  # ordered names with O(1) look-up: large chips
    for ct in top.tables("couplings", None):
        line = ct.reference("line", own_qubit, "line")
        qubit = ct.reference("qubit", known_qubits, "qubit")
        if valid(line, qubit, own_qubit.get(line)) and own_qubit.get(line) == qubit:
            qubit = ct.reject("qubit", "a line's coupling to its own qubit is set by its "
                                       "rabi_mhz; accepted: another qubit")
        elif valid(line, qubit) and (line, qubit) in seen:
            qubit = ct.reject("qubit", f"coupling {line} → {qubit} is listed twice; "
                                       "accepted: one [[couplings]] block per pair")
        if valid(line, qubit):
            seen.add((line, qubit))
        phase_deg = ct.number("phase_deg", lo=-360.0, hi=360.0, unit="deg")
        if version_1:
            for key in (k for k in _VERSION_2_FIELDS if k in ct.data):
                ct.report(key, "needs version = 2 (a version 1 file has one diffusion for "
                               "every coupling, in [drift])")
        couplings.append(
            CouplingTruth(
                line,
                qubit,
                ct.number("crosstalk_db", lo=-150.0, hi=0.0, unit="dB"),
                math.radians(phase_deg) if valid(phase_deg) else phase_deg,
                ct.number("delay_ns", 0.0, lo=-100.0, hi=100.0, unit="ns"),
                ct.number("phase_rate_rad_per_hour", None, lo=-RATE_MAX, hi=RATE_MAX,
                          unit="rad/h"),
                ct.number("phase_diffusion_rad2_per_hour", None, lo=0.0,
                          hi=DIFFUSION_MAX_PER_HOUR, unit="rad²/h"),
                ct.number("log_magnitude_diffusion_per_hour", None, lo=0.0,
                          hi=DIFFUSION_MAX_PER_HOUR, unit="1/h"),
                read_resonances(ct, version_3),
            )
        )
        ct.reject_unknown()
    return couplings


def _read_steps(top: Fields, couplings: list[CouplingTruth], lnames: list[Any],
                qnames: list[Any], version_1: bool) -> list[StepChange]:
    """The ``[[steps]]`` blocks: each changes a coupling listed in ``[[couplings]]``."""
    if version_1 and "steps" in top.data:
        top.report("steps", "needs version = 2 (a version 1 file has no step changes)")
        top.tables("steps", None)  # marked as read: one message, not two
        return []
    listed = {(c.line, c.qubit) for c in couplings}
    steps: list[StepChange] = []
    for st in top.tables("steps", None):
        at = st.number("at_hours", lo=0.0, hi=STEP_LATEST_HOURS, unit="h")
        line = st.reference("line", lnames, "line")
        qubit = st.reference("qubit", qnames, "qubit")
        # A coupling with a wrong name was reported already: no second message for it.
        if valid(line, qubit, *(v for pair in listed for v in pair)) and (
                (line, qubit) not in listed):
            qubit = st.reject("qubit", f"{line} → {qubit} is not a listed coupling; "
                                       "accepted: the qubit of a [[couplings]] block of "
                                       f"line {line}")
        phase_deg = st.number("phase_deg_change", 0.0, lo=-360.0, hi=360.0, unit="deg")
        steps.append(StepChange(
            at, line, qubit,
            st.number("crosstalk_db_change", lo=-STEP_MAX_DB, hi=STEP_MAX_DB, unit="dB"),
            math.radians(phase_deg) if valid(phase_deg) else phase_deg,
        ))
        st.reject_unknown()
    return steps


def _read_qubit(qname: Any, qt: Fields, n_levels: Any) -> QubitTruth:
    """One ``[[qubits]]`` block; its levels are computed only from valid values."""
    f01, alpha = read_transmon_nominal(qt, required=False)
    ej = qt.number("ej_ghz", None, lo=0.1, hi=500.0, unit="GHz")
    ec = qt.number("ec_ghz", None, lo=0.01, hi=5.0, unit="GHz")
    duffing, charge = {"f01_ghz": f01, "anharmonicity_ghz": alpha}, {"ej_ghz": ej, "ec_ghz": ec}
    is_duffing = any(v is not None for v in duffing.values())
    if is_duffing == any(v is not None for v in charge.values()):
        qt.report(
            "f01_ghz",
            "give either f01_ghz + anharmonicity_ghz (Duffing) or ej_ghz + ec_ghz "
            "(charge basis), not both and not neither",
        )
        chosen: dict[str, Any] = {}
    else:
        chosen = duffing if is_duffing else charge
        for key in [k for k, v in chosen.items() if v is None]:
            chosen[key] = qt.reject(key, f"missing (required with {' and '.join(chosen)})")
    levels: Any = INVALID
    if chosen and valid(n_levels, *chosen.values()):
        if is_duffing:
            levels = duffing_levels(f01, alpha, n_levels)
        elif ej / ec < 10:
            qt.report("ej_ghz", f"EJ/EC = {ej / ec:.3g} < 10 is not a transmon; "
                                "accepted: ej_ghz ≥ 10·ec_ghz")
        else:
            levels = charge_basis_levels(ej, ec, n_levels=n_levels)
    t1, t2 = read_coherence(qt, required=True)
    ro = qt.matrix("readout", None, lo=0.0, hi=1.0)
    if ro is None:
        ro_arr: Any = np.eye(min(n_levels, 3)) if valid(n_levels) else INVALID
    elif valid(ro):
        ro_arr = _check_readout(qt, np.asarray(ro, float), n_levels)
    else:
        ro_arr = INVALID
    noise = _read_qubit_noise(qt)
    qt.reject_unknown()
    return QubitTruth(qname, levels, t1, t2, ro_arr, ej, ec, noise)


def _read_qubit_noise(qt: Fields) -> QubitNoise:
    """The optional qubit-noise fields of one ``[[qubits]]`` block (absent: off)."""
    return QubitNoise(
        thermal_population=qt.number("thermal_population", 0.0, lo=0.0, hi=0.1),
        f01_noise_mhz=qt.number("f01_noise_mhz", 0.0, lo=0.0, hi=10.0, unit="MHz"),
        f01_shot_noise_mhz=qt.number("f01_shot_noise_mhz", 0.0, lo=0.0, hi=10.0, unit="MHz"),
        tls_shift_mhz=qt.number("tls_shift_mhz", 0.0, lo=-100.0, hi=100.0, unit="MHz"),
        tls_rate_per_hour=qt.number("tls_rate_per_hour", 0.0, lo=0.0, hi=1e6, unit="1/h"),
        t1_fluctuation=qt.number("t1_fluctuation", 0.0, lo=0.0, hi=1.0),
    )


def _check_readout(qt: Fields, ro: np.ndarray, n_levels: Any) -> Any:
    """The assignment matrix P(assigned | level), or INVALID after reporting why not."""
    if ro.shape[0] != ro.shape[1] or ro.shape[0] < 2:
        return qt.reject("readout", f"expected a square matrix of at least 2×2, got shape "
                                    f"{ro.shape}")
    if np.any(ro < 0) or np.any(np.abs(ro.sum(axis=1) - 1) > 1e-6):
        return qt.reject(
            "readout", "rows are P(assigned | level): entries ≥ 0 and each row summing to 1"
        )
    if valid(n_levels) and ro.shape[0] > n_levels:
        return qt.reject(
            "readout", f"{ro.shape[0]} rows but only levels = {n_levels} are simulated"
        )
    return ro
