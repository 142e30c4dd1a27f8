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

from xtalkcal.chip import Chip, DriveLine, Qubit, SafetyLimits, load_chip
from xtalkcal.exceptions import (
    ConfigError,
    FitInputError,
    LedgerError,
    RigError,
    SafetyLimitError,
    TimelineError,
    XtalkcalError,
)
from xtalkcal.rig import Counts, Rig
from xtalkcal.safety import check_timelines
from xtalkcal.timeline import Envelope, Timeline, Tone

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
    # errors
    "XtalkcalError",
    "ConfigError",
    "SafetyLimitError",
    "TimelineError",
    "RigError",
    "LedgerError",
    "FitInputError",
]
