"""What the commands share: exit codes, error lines, atomic files, option groups, parsers
of the command line's own values (pairs, dates) and the help formatter."""

from __future__ import annotations

import argparse
import datetime as dt
import sys

from xtalkcal.common import atomic_write
from xtalkcal.exceptions import ConfigError, XtalkcalError

__all__ = ["EXIT_OK", "EXIT_FAILED", "EXIT_USAGE", "DefaultsFormatter", "atomic_write",
           "print_errors", "load_protocol", "progress_bar", "add_protocol", "parse_pairs",
           "parse_moment", "utc_text", "local_text", "usage_error"]

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2


def usage_error(option: str, problem: str) -> ConfigError:
    """A mistake on the command line, named by its option."""
    return ConfigError("command line", option, problem)


def print_errors(exc: XtalkcalError) -> None:
    """One line per problem (a file's readers collect all of its problems)."""
    from xtalkcal.common import FieldErrors

    for problem in exc.errors if isinstance(exc, FieldErrors) else (exc,):
        print(f"xtalkcal: error: {problem}", file=sys.stderr)


def load_protocol(path: str | None):
    """The protocol file given, or the built-in defaults (those of protocols/full.toml)."""
    from xtalkcal.measure import default_protocol
    from xtalkcal.measure import load_protocol as load

    return load(path) if path else default_protocol()


class _Bar:
    def __init__(self, total=None):
        from tqdm import tqdm

        self._bar = tqdm(total=total, unit="shot", unit_scale=True, desc="shots",
                         disable=None, leave=False)

    def __call__(self, n: int) -> None:
        self._bar.update(n)

    def close(self) -> None:
        self._bar.close()


def progress_bar(args):
    """A shot counter on the terminal, or None with ``--quiet``."""
    return None if getattr(args, "quiet", False) else _Bar()


class DefaultsFormatter(argparse.HelpFormatter):
    """Help that shows each option's default, except where there is nothing to show
    (None, a switch that is off, required options) or the help already says it."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        text = action.help or ""
        default = action.default
        if (default is None or default is False or default is argparse.SUPPRESS
                or action.required or not action.option_strings
                or "(default" in text or "%(default)" in text):
            return action.help
        return f"{text} (default: %(default)s)" if text else "(default: %(default)s)"


def add_protocol(cmd: argparse.ArgumentParser) -> None:
    cmd.add_argument("--protocol", default=None,
                     help="protocol file (TOML) (default: the built-in defaults, those of "
                          "protocols/full.toml)")


def parse_pairs(text: str, chip, option: str = "--pairs") -> list[tuple[str, str]]:
    """``LINE:QUBIT,LINE:QUBIT`` → [(line, qubit)], every name checked against the chip."""
    pairs: list[tuple[str, str]] = []
    for item in (t.strip() for t in text.split(",")):
        if not item:
            continue
        line, sep, qubit = item.partition(":")
        if not sep or not line or not qubit:
            raise usage_error(option, f"{item!r}: expected LINE:QUBIT (e.g. q4-line:q5), "
                                      "comma-separated")
        if line not in chip.line_names:
            raise usage_error(option, f"{item!r}: no line {line!r} on chip {chip.name!r}; "
                                      f"accepted: {', '.join(chip.line_names)}")
        if qubit not in chip.qubit_names:
            raise usage_error(option, f"{item!r}: no qubit {qubit!r} on chip {chip.name!r}; "
                                      f"accepted: {', '.join(chip.qubit_names)}")
        if chip.line(line).qubit == qubit:
            raise usage_error(option, f"{item!r}: {qubit} is the line's own qubit; accepted: "
                                      "a victim driven by another line")
        pairs.append((line, qubit))
    if not pairs:
        raise usage_error(option, f"{text!r}: no pair given; expected LINE:QUBIT,...")
    return pairs


def parse_moment(text: str, option: str = "--as-of") -> dt.datetime:
    """An ISO date or date-time; without an offset it is the local time of this computer.

    A bare date means the end of that day (everything measured on it counts).
    """
    try:
        if len(text) == 10:
            moment = dt.datetime.fromisoformat(text) + dt.timedelta(days=1, microseconds=-1)
        else:
            moment = dt.datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise usage_error(option, f"{text!r}: expected an ISO date or time, e.g. 2026-12-01 "
                                  "or 2026-12-01T14:00 (local) or 2026-12-01T13:00Z (UTC)"
                          ) from None
    if moment.tzinfo is None:
        moment = moment.astimezone()  # local time of this computer
    return moment.astimezone(dt.timezone.utc)


def utc_text(moment: dt.datetime) -> str:
    """``2026-12-01 13:00:00 UTC``."""
    return moment.astimezone(dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")


def local_text(moment: dt.datetime) -> str:
    """The same moment in this computer's local time, ISO with its offset."""
    return moment.astimezone().isoformat(timespec="seconds")
