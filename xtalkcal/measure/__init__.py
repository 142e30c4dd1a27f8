"""Measurement: the probes that turn a tone into an error signal, the calibration protocol file,
and the sweep runner that sends checked batches to the rig.

May import: :mod:`xtalkcal.hardware` and below. Nothing here imports a later stage of the flow.
"""

from xtalkcal.measure.probes import (
    COHERENT_SLIP_RAD,
    LONGEST_SPACING_FACTOR,
    METHODS,
    WEIGHT_FLOOR,
    ColumnProbe,
    Method,
    MethodWindows,
    ProbeSignals,
    PulseShape,
    choose_method,
    pi_pulse_amplitude,
    spectral_weight,
)
from xtalkcal.measure.protocol import (
    PROTOCOL_FORMAT,
    PROTOCOL_VERSION,
    NullSettings,
    Protocol,
    PulseSettings,
    RecheckSettings,
    SurveySettings,
    default_protocol,
    load_protocol,
    protocol_from_dict,
)
from xtalkcal.measure.sweep import (
    BatchRunner,
    log,
)

__all__ = [
    "COHERENT_SLIP_RAD",
    "ColumnProbe",
    "LONGEST_SPACING_FACTOR",
    "METHODS",
    "Method",
    "MethodWindows",
    "ProbeSignals",
    "PulseShape",
    "WEIGHT_FLOOR",
    "choose_method",
    "pi_pulse_amplitude",
    "spectral_weight",
    "NullSettings",
    "PROTOCOL_FORMAT",
    "PROTOCOL_VERSION",
    "Protocol",
    "PulseSettings",
    "RecheckSettings",
    "SurveySettings",
    "default_protocol",
    "load_protocol",
    "protocol_from_dict",
    "BatchRunner",
    "log",
]
