"""The hardware description and interface: the chip file, timelines of tones, the rig protocol a
lab implements, and the drive-power safety check every timeline passes before it is sent.

May import: :mod:`xtalkcal.common` and :mod:`xtalkcal.exceptions`. Nothing here imports a later
stage of the flow.
"""

from xtalkcal.hardware.chip import (
    ANHARMONICITY_RANGE_GHZ,
    CHIP_FORMAT,
    CHIP_VERSION,
    COHERENCE_RANGE_US,
    F01_RANGE_GHZ,
    POWER_RANGE_DBM,
    RABI_RANGE_MHZ,
    Chip,
    DriveLine,
    Qubit,
    SafetyLimits,
    chip_from_dict,
    load_chip,
    read_coherence,
    read_drive_lines,
    read_limits,
    read_transmon_nominal,
)
from xtalkcal.hardware.interlock import (
    Interlock,
)
from xtalkcal.hardware.rig import (
    MIN_LEVELS,
    Counts,
    Rig,
    check_counts,
    common_readout,
)
from xtalkcal.hardware.safety import (
    LineLoad,
    PowerTally,
    check_timelines,
    envelope_energy_ns,
    envelope_peak,
    limits_summary,
    line_loads,
)
from xtalkcal.hardware.sampled import (
    SampledRig,
    SampledWaveforms,
    check_samples,
    compile_timeline,
    default_lo_ghz,
)
from xtalkcal.hardware.timeline import (
    ENVELOPE_KINDS,
    MIN_SHAPE_NS,
    Envelope,
    EnvelopeKind,
    Timeline,
    Tone,
    envelope_values,
    pulse_area_ns,
    tone_values,
)

__all__ = [
    "Interlock",
    "ANHARMONICITY_RANGE_GHZ",
    "CHIP_FORMAT",
    "CHIP_VERSION",
    "COHERENCE_RANGE_US",
    "Chip",
    "DriveLine",
    "F01_RANGE_GHZ",
    "POWER_RANGE_DBM",
    "Qubit",
    "RABI_RANGE_MHZ",
    "SafetyLimits",
    "chip_from_dict",
    "load_chip",
    "read_coherence",
    "read_drive_lines",
    "read_limits",
    "read_transmon_nominal",
    "ENVELOPE_KINDS",
    "Envelope",
    "EnvelopeKind",
    "MIN_SHAPE_NS",
    "Timeline",
    "Tone",
    "envelope_values",
    "pulse_area_ns",
    "tone_values",
    "Counts",
    "MIN_LEVELS",
    "Rig",
    "check_counts",
    "common_readout",
    "LineLoad",
    "PowerTally",
    "check_timelines",
    "envelope_energy_ns",
    "envelope_peak",
    "limits_summary",
    "line_loads",
    "SampledRig",
    "SampledWaveforms",
    "check_samples",
    "compile_timeline",
    "default_lo_ghz",
]
