"""Typed, located reading of TOML tables.

Every value read through :class:`Fields` knows the file and the dotted field
path it came from, so a bad value produces one :class:`ConfigError` line that
names the file, the field and what would be accepted.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

from xtalkcal.exceptions import ConfigError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on 3.10 only
    import tomli as tomllib

__all__ = ["Fields", "load_toml"]

_MISSING = object()


def load_toml(path: str | Path) -> tuple[dict[str, Any], str]:
    """Read a TOML file.

    Returns
    -------
    data, source : dict, str
        The parsed document and the path string used in error messages.

    Raises
    ------
    ConfigError
        If the file is missing, unreadable or not valid TOML.
    """
    source = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(source, "(file)", "no such file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(source, "(file)", f"cannot be read as UTF-8 text ({exc})") from None
    try:
        return tomllib.loads(text), source
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(source, "(syntax)", f"not valid TOML: {exc}") from None


class Fields:
    """A view of one TOML table that reads checked values and remembers where it is.

    Parameters
    ----------
    data : Mapping
        The table.
    source : str
        File name used in error messages.
    path : str
        Dotted path of this table inside the file ("" for the top level).
    """

    def __init__(self, data: Mapping[str, Any], source: str, path: str = "") -> None:
        if not isinstance(data, Mapping):
            raise ConfigError(source, path or "(top level)", "expected a table")
        self.data = data
        self.source = source
        self.path = path
        self._read: set[str] = set()

    def where(self, key: str) -> str:
        """Dotted path of ``key`` inside the file."""
        return f"{self.path}.{key}" if self.path else key

    def error(self, key: str, problem: str) -> ConfigError:
        """Build the error for ``key`` (the caller raises it)."""
        return ConfigError(self.source, self.where(key), problem)

    def _get(self, key: str, default: Any) -> Any:
        self._read.add(key)
        if key in self.data:
            return self.data[key]
        if default is _MISSING:
            raise self.error(key, "missing (required)")
        return default

    def number(
        self,
        key: str,
        default: Any = _MISSING,
        *,
        lo: float | None = None,
        hi: float | None = None,
        lo_open: bool = False,
        hi_open: bool = False,
        unit: str = "",
    ) -> Any:
        """A finite real number within optional bounds (``None`` default allowed)."""
        value = self._get(key, default)
        if value is None and default is None:
            return None
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.error(key, f"expected a number{_unit(unit)}, got {value!r}")
        value = float(value)
        if not math.isfinite(value):
            raise self.error(key, f"expected a finite number{_unit(unit)}, got {value!r}")
        accepted = _range_text(lo, hi, lo_open, hi_open, unit)
        if lo is not None and (value < lo or (lo_open and value == lo)):
            raise self.error(key, f"{value:g} is out of range; accepted: {accepted}")
        if hi is not None and (value > hi or (hi_open and value == hi)):
            raise self.error(key, f"{value:g} is out of range; accepted: {accepted}")
        return value

    def integer(
        self, key: str, default: Any = _MISSING, *, lo: int | None = None, hi: int | None = None
    ) -> Any:
        """An integer within optional bounds."""
        value = self._get(key, default)
        if value is None and default is None:
            return None
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.error(key, f"expected an integer, got {value!r}")
        if (lo is not None and value < lo) or (hi is not None and value > hi):
            raise self.error(key, f"{value} is out of range; accepted: {_range_text(lo, hi)}")
        return value

    def string(
        self, key: str, default: Any = _MISSING, *, choices: Iterable[str] | None = None
    ) -> Any:
        """A non-empty string, optionally one of ``choices``."""
        value = self._get(key, default)
        if value is None and default is None:
            return None
        if not isinstance(value, str) or not value.strip():
            raise self.error(key, f"expected a non-empty string, got {value!r}")
        if choices is not None:
            options = list(choices)
            if value not in options:
                raise self.error(key, f"{value!r} is not one of {', '.join(map(repr, options))}")
        return value

    def boolean(self, key: str, default: Any = _MISSING) -> Any:
        """A true/false value."""
        value = self._get(key, default)
        if not isinstance(value, bool):
            raise self.error(key, f"expected true or false, got {value!r}")
        return value

    def string_list(self, key: str, default: Any = _MISSING) -> Any:
        """A list of non-empty strings."""
        value = self._get(key, default)
        if value is None and default is None:
            return None
        if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value):
            raise self.error(key, f"expected a list of names, got {value!r}")
        return list(value)

    def matrix(self, key: str, default: Any = _MISSING) -> Any:
        """A rectangular list of lists of finite numbers."""
        value = self._get(key, default)
        if value is None and default is None:
            return None
        ok = isinstance(value, list) and value and all(isinstance(r, list) for r in value)
        if ok:
            widths = {len(r) for r in value}
            ok = len(widths) == 1 and all(
                isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)
                for r in value
                for x in r
            )
        if not ok:
            raise self.error(key, "expected a rectangular array of finite numbers")
        return [[float(x) for x in r] for r in value]

    def table(self, key: str, default: Any = _MISSING) -> Fields:
        """A sub-table as :class:`Fields` (an empty one if absent and a default is given)."""
        value = self._get(key, default)
        if value is default and default is not _MISSING:
            value = {} if value is None else value
        if not isinstance(value, Mapping):
            raise self.error(key, f"expected a table, got {type(value).__name__}")
        return Fields(value, self.source, self.where(key))

    def tables(self, key: str, default: Any = _MISSING) -> list[Fields]:
        """An array of tables (``[[key]]`` in TOML)."""
        value = self._get(key, default)
        if value is default and default is not _MISSING:
            value = [] if value is None else value
        if not isinstance(value, list) or not all(isinstance(v, Mapping) for v in value):
            raise self.error(key, "expected an array of tables ([[" + key + "]] blocks)")
        return [Fields(v, self.source, f"{self.where(key)}[{i}]") for i, v in enumerate(value)]

    def reject_unknown(self) -> None:
        """Raise on keys that were never read (catches typos such as ``f01_gz``)."""
        unknown = sorted(set(self.data) - self._read)
        if unknown:
            known = ", ".join(sorted(self._read)) or "(none)"
            raise self.error(unknown[0], f"unknown field; accepted here: {known}")


def _unit(unit: str) -> str:
    return f" in {unit}" if unit else ""


def _range_text(
    lo: float | None,
    hi: float | None,
    lo_open: bool = False,
    hi_open: bool = False,
    unit: str = "",
) -> str:
    left = "any" if lo is None else f"{lo:g}"
    right = "any" if hi is None else f"{hi:g}"
    op_l = "<" if lo_open else "≤"
    op_r = "<" if hi_open else "≤"
    if lo is None:
        text = f"x {op_r} {right}"
    elif hi is None:
        text = f"x {'>' if lo_open else '≥'} {left}"
    else:
        text = f"{left} {op_l} x {op_r} {right}"
    return text + (f" {unit}" if unit else "")
