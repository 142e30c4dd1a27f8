"""xtalkcal: measure, cancel and track microwave drive crosstalk on superconducting-qubit chips.

The public API, grouped by the flow of data (chip → probes → rig → sweep data →
fits → ledger → compensation/drift → reports). Submodules not re-exported here
are internal.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("xtalkcal")
except PackageNotFoundError:  # running from a source tree without installation
    __version__ = "0+unknown"

from xtalkcal.exceptions import (
    ConfigError,
    FitInputError,
    LedgerError,
    RigError,
    SafetyLimitError,
    TimelineError,
    XtalkcalError,
)
from xtalkcal.hardware import (
    Chip,
    Counts,
    DriveLine,
    Envelope,
    Qubit,
    Rig,
    SafetyLimits,
    Timeline,
    Tone,
    check_timelines,
    load_chip,
)

# Measurement, storage and use (imported after the data types they build on).
from xtalkcal.measure import Protocol, load_protocol  # noqa: E402  isort: skip
from xtalkcal.calibrate import CalibrationResult, calibrate_chip  # noqa: E402  isort: skip
from xtalkcal.store import Ledger, LedgerEntry  # noqa: E402  isort: skip
from xtalkcal.compensation import (
    CompensationSettings,
    apply_to_timeline,
    apply_to_waveforms,
    multi_victim_settings,
    pairwise_settings,
)

from xtalkcal.drift import run_due  # noqa: E402  isort: skip

__all__ = [
    "__version__",
    # chip description
    "Chip",
    "Qubit",
    "DriveLine",
    "SafetyLimits",
    "load_chip",
    # what a rig executes, and the rig itself
    "Envelope",
    "Tone",
    "Timeline",
    "Rig",
    "Counts",
    "check_timelines",
    # how to calibrate, and calibrating
    "Protocol",
    "load_protocol",
    "calibrate_chip",
    "CalibrationResult",
    # the matrix store
    "Ledger",
    "LedgerEntry",
    # compensation for the control stack
    "CompensationSettings",
    "pairwise_settings",
    "multi_victim_settings",
    "apply_to_timeline",
    "apply_to_waveforms",
    # keeping it true
    "run_due",
    # errors
    "XtalkcalError",
    "ConfigError",
    "SafetyLimitError",
    "TimelineError",
    "RigError",
    "LedgerError",
    "FitInputError",
]
