"""Measurement: the probes that turn a tone into an error signal, the calibration protocol file,
and the sweep runner that sends checked batches to the rig.

May import: :mod:`xtalkcal.hardware` and below. Nothing here imports a later stage of the flow.
"""

from xtalkcal.measure.probes import (
    COHERENT_SLIP_RAD,
    LONGEST_SPACING_FACTOR,
    METHODS,
    TWO_PHOTON_WINDOW_GHZ,
    WEIGHT_FLOOR,
    ColumnProbe,
    Method,
    MethodWindows,
    ProbeSignals,
    PulseShape,
    choose_method,
    near_two_photon,
    pi_pulse_amplitude,
    spectral_weight,
    two_photon_detuning_ghz,
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
    "TWO_PHOTON_WINDOW_GHZ",
    "WEIGHT_FLOOR",
    "choose_method",
    "near_two_photon",
    "pi_pulse_amplitude",
    "spectral_weight",
    "two_photon_detuning_ghz",
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
