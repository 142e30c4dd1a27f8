"""Every error xtalkcal raises on purpose derives from :class:`XtalkcalError`.

Each family also subclasses the builtin it resembles, so callers that already
catch ``ValueError`` or ``OSError`` keep working.
"""

from __future__ import annotations

__all__ = [
    "XtalkcalError",
    "ConfigError",
    "SafetyLimitError",
    "TimelineError",
    "RigError",
    "InterlockRefused",
    "LedgerError",
    "FitInputError",
]


class XtalkcalError(Exception):
    """Base class of all errors raised deliberately by xtalkcal."""


class ConfigError(XtalkcalError, ValueError):
    """A chip, device or protocol file is malformed.

    Parameters
    ----------
    source : str
        The file (or other origin) the value came from.
    field : str
        Dotted path of the offending field, e.g. ``qubit[2].f01_ghz``.
    problem : str
        What is wrong and what would be accepted.
    """

    def __init__(self, source: str, field: str, problem: str) -> None:
        self.source = source
        self.field = field
        self.problem = problem
        super().__init__(f"{source}: {field}: {problem}")

    def __reduce__(self) -> tuple[object, ...]:
        # Exception pickles its formatted message as the only argument; keep the fields,
        # so that an error crosses a process boundary (a worker, a killed writer's report).
        return (type(self), (self.source, self.field, self.problem))


class SafetyLimitError(XtalkcalError, ValueError):
    """A requested drive would exceed a line's amplitude or power limit.

    Raised before anything is sent to hardware.
    """


class TimelineError(XtalkcalError, ValueError):
    """A timeline is malformed (negative duration, unknown line, ...)."""


class RigError(XtalkcalError, RuntimeError):
    """The hardware back end failed; driver errors are mapped to this at the rig boundary."""


class InterlockRefused(RigError):
    """The lab's interlock did not approve a batch; nothing of it was sent."""


class LedgerError(XtalkcalError, OSError):
    """The matrix store could not be read or written."""


class FitInputError(XtalkcalError, ValueError):
    """Data handed to a fit has the wrong shape or non-finite values."""
