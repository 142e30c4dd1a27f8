"""Every error xtalkcal raises on purpose derives from :class:`XtalkcalError`.

Each family also subclasses the builtin it resembles, so callers that already
catch ``ValueError`` or ``OSError`` keep working.
"""

from __future__ import annotations

__all__ = [
    "XtalkcalError",
    "LocatedError",
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


class LocatedError(XtalkcalError):
    """An error about one field of one thing, said as ``where: field: problem``.

    Parameters
    ----------
    where : str
        The file, object or other origin that failed.
    field : str
        Dotted path of the offending field, e.g. ``qubit[2].f01_ghz``.
    problem : str
        What is wrong and what would be accepted.
    """

    def __init__(self, where: str, field: str, problem: str) -> None:
        self.where = where
        self.field = field
        self.problem = problem
        super().__init__(f"{where}: {field}: {problem}")

    def __reduce__(self) -> tuple[object, ...]:
        # Exception (and OSError) pickle the formatted message as the only argument; keep
        # the fields, so that an error crosses a process boundary intact.
        return (type(self), (self.where, self.field, self.problem))


class ConfigError(LocatedError, ValueError):
    """A chip, device, protocol, schedule or settings file is malformed.

    A :class:`LocatedError` whose ``where`` is the file (also readable as ``source``).
    """

    @property
    def source(self) -> str:
        """The file (or other origin) the value came from."""
        return self.where


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
