"""Field-by-field validation of parsed input files.

:class:`Fields` reads typed, bounded values out of a parsed table and collects every problem
with its file and field, so one run reports all mistakes at once. The name rule for qubits,
lines and pairs lives here too.
"""

from __future__ import annotations

import json
import math
import re
import sys
from collections.abc import Collection, Iterable, Mapping, Sequence
from typing import Any, Final, NoReturn

from xtalkcal.exceptions import ConfigError

if sys.version_info >= (3, 11):
    pass
else:  # pragma: no cover - exercised on 3.10 only
    pass


# Keys TOML allows unquoted; any other key (a typo with a space, a newline) is shown quoted
# so that every message stays on one line and names the key exactly.
_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")

NAME_RULE: Final = r"[A-Za-z][A-Za-z0-9_-]{0,63}"
"""The one rule for every name in every file (qubits, lines, chips, protocols, pairs).

A name is an ASCII letter followed by at most 63 ASCII letters, digits, ``_`` or ``-``
(the whole name must match ``^[A-Za-z][A-Za-z0-9_-]{0,63}$``). Names become ledger keys,
batch-record file names and report labels, so ``/``, ``.``, spaces, control characters and
look-alike Unicode letters are refused where a name is read, not where it is first used.
"""
_NAME = re.compile(NAME_RULE, re.ASCII)
_NAME_RULE_TEXT = (f"a letter, then up to 63 ASCII letters, digits, '_' or '-' "
                   f"(^{NAME_RULE}$)")

# Physical ranges shared by several file kinds (the protocol, the schedule).
RIG_TIME_RANGE_S: Final = (-1e12, 1e12)
"""Rig clock readings accepted in files (s): ±31 700 years, enough for an epoch clock,
small enough that adding any accepted interval stays finite."""
RECHECK_INTERVAL_RANGE_H: Final = (1e-3, 1e4)
"""Re-check intervals accepted (h): 3.6 s to about 14 months."""


REQUIRED: Final = object()
"""Default of a reader's ``default`` parameter: the field must be given."""


class _Invalid:
    """Type of :data:`INVALID`."""

    __slots__ = ()

    def __repr__(self) -> str:
        return "INVALID"


INVALID: Final = _Invalid()
"""Stands for a value whose problem has been reported (or that depends on one)."""


def valid(*values: Any) -> bool:
    """True when none of ``values`` is :data:`INVALID`."""
    return all(v is not INVALID for v in values)


def name_problem(value: Any) -> str | None:
    """Why ``value`` is not a valid name under :data:`NAME_RULE` (None if it is one)."""
    if not isinstance(value, str):
        return f"expected a name (a string), got {short_repr(value)}"
    if not _NAME.fullmatch(value):
        return f"{short_repr(value)} is not a valid name; accepted: {_NAME_RULE_TEXT}"
    return None


def short_repr(value: Any, limit: int = 60) -> str:
    """``repr(value)``, cut to ``limit`` characters (a message must stay readable)."""
    try:
        text = repr(value)
    except RecursionError:  # pragma: no cover - nesting is refused before this
        text = f"<deeply nested {type(value).__name__}>"
    return text if len(text) <= limit else text[: limit - 1] + "…"


class FieldErrors(ConfigError):
    """Every problem found in one file, one ``file: field: problem`` line each.

    The ``source``, ``field`` and ``problem`` attributes are those of the first
    problem, so callers written for a single :class:`ConfigError` keep working.

    Parameters
    ----------
    errors : sequence of ConfigError
        The problems, in the order they were found (at least one).
    """

    def __init__(self, errors: Sequence[ConfigError]) -> None:
        if not errors:
            raise ValueError("FieldErrors needs at least one error")
        first = errors[0]
        super().__init__(first.source, first.field, first.problem)
        self.errors: tuple[ConfigError, ...] = tuple(errors)
        self.args = ("\n".join(str(e) for e in self.errors),)

    def __reduce__(self) -> tuple[object, ...]:
        return (type(self), (self.errors,))


def read_header(
    data: Mapping[str, Any], source: str, *, kind: str, version: int, hint: str = ""
) -> tuple[Fields, Any]:
    """Start reading a file of our own: check ``format`` and ``version``, read ``name``.

    Parameters
    ----------
    data : Mapping
        The parsed document.
    source : str
        File name used in error messages.
    kind : str
        The expected ``format`` value (absent means this kind).
    version : int
        The newest schema version understood.
    hint : str
        Appended to the message for a wrong ``format``, e.g. ``" (is this a chip file?)"``.

    Returns
    -------
    top, name : Fields, str or INVALID
        The top-level table and the file's ``name``.

    Raises
    ------
    FieldErrors
        At once if the document is not a table or is another kind of file: checking its
        fields against this schema would only produce misleading messages.
    """
    top = Fields(data, source)
    fmt = top.string("format", kind)
    if not valid(fmt):
        top.finish()
    if fmt != kind:
        top.stop("format", f"expected {kind!r}{hint}")
    top.integer("version", version, lo=1, hi=version)
    return top, top.name("name")


class Fields:
    """A view of one TOML table that reads checked values and remembers where it is.

    All tables of one file share one list of problems; a reader that finds a
    problem reports it there and returns :data:`INVALID`.

    Parameters
    ----------
    data : Mapping
        The table.
    source : str
        File name used in error messages.
    path : str
        Dotted path of this table inside the file ("" for the top level).

    Raises
    ------
    FieldErrors
        If ``data`` is not a table (nothing in it can be read).
    """

    def __init__(self, data: Mapping[str, Any], source: str, path: str = "") -> None:
        self.source = source
        self.path = path
        self.problems: list[ConfigError] = []
        self._read: set[str] = set()
        self._bad: set[str] = set()
        # A stand-in for a table that is missing or not a table: its problem is reported
        # once, and every read from it gives INVALID without a further message.
        self._broken = False
        if not isinstance(data, Mapping):  # nothing in it can be read: stop here
            raise FieldErrors([ConfigError(source, path or "(top level)", "expected a table")])
        self.data = data

    def _child(self, data: Mapping[str, Any], path: str, *, broken: bool = False) -> Fields:
        child = Fields(data, self.source, path)
        child.problems = self.problems
        child._broken = broken
        return child

    # ------------------------------------------------------------------ problems
    def where(self, key: str) -> str:
        """Dotted path of ``key`` inside the file (quoted as in TOML unless a bare key)."""
        text = key if _BARE_KEY.fullmatch(key) else json.dumps(key)
        return f"{self.path}.{text}" if self.path else text

    def error(self, key: str, problem: str) -> ConfigError:
        """Build the error for ``key`` (without reporting it)."""
        return ConfigError(_one_line(self.source), self.where(key), _one_line(problem))

    def report(self, key: str, problem: str) -> None:
        """Report a problem with ``key`` and go on reading."""
        self._bad.add(key)
        self.problems.append(self.error(key, problem))

    def reported(self, key: str) -> bool:
        """Whether ``key`` was reported as wrong (or this table is a stand-in)."""
        return self._broken or key in self._bad

    def stop(self, key: str, problem: str) -> NoReturn:
        """Report a problem after which nothing more can be checked, and raise."""
        self.report(key, problem)
        raise FieldErrors(self.problems)

    def finish(self) -> None:
        """Raise one :class:`FieldErrors` listing every problem reported in this file."""
        if self.problems:
            raise FieldErrors(self.problems)

    # ------------------------------------------------------------------ readers
    def _get(self, key: str, default: Any) -> Any:
        self._read.add(key)
        if self._broken:
            return INVALID
        if key in self.data:
            return self.data[key]
        if default is REQUIRED:
            self.report(key, "missing (required)")
            return INVALID
        return default

    def number(
        self,
        key: str,
        default: Any = REQUIRED,
        *,
        lo: float,
        hi: float,
        lo_open: bool = False,
        hi_open: bool = False,
        unit: str = "",
    ) -> Any:
        """A finite real number in ``[lo, hi]`` (``None`` default allowed).

        Both bounds are required: every number a file holds has a physical range, and a
        value beyond it (``1e308`` hours) would only fail later, far from the file.
        """
        value = self._get(key, default)
        if value is INVALID or (value is None and default is None):
            return value
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            return self.reject(key, f"expected a number{_unit(unit)}, got {short_repr(value)}; "
                                    f"accepted: {_range_text(lo, hi, lo_open, hi_open, unit)}")
        if isinstance(value, int) and not lo <= value <= hi:  # may be beyond float range
            return self.reject(key, f"{short_repr(value)} is out of range; "
                                    f"accepted: {_range_text(lo, hi, lo_open, hi_open, unit)}")
        value = float(value)
        if not math.isfinite(value):
            return self.reject(key, f"expected a finite number{_unit(unit)}, got {value!r}; "
                                    f"accepted: {_range_text(lo, hi, lo_open, hi_open, unit)}")
        below = value < lo or (lo_open and value == lo)
        above = value > hi or (hi_open and value == hi)
        if below or above:
            accepted = _range_text(lo, hi, lo_open, hi_open, unit)
            return self.reject(key, f"{value:g} is out of range; accepted: {accepted}")
        return value

    def integer(self, key: str, default: Any = REQUIRED, *, lo: int, hi: int) -> Any:
        """An integer in ``[lo, hi]`` (both bounds required, as for :meth:`number`)."""
        value = self._get(key, default)
        if value is INVALID or (value is None and default is None):
            return value
        if isinstance(value, bool) or not isinstance(value, int):
            return self.reject(key, f"expected an integer, got {short_repr(value)}; "
                                    f"accepted: {_range_text(lo, hi)}")
        if value < lo or value > hi:
            return self.reject(key, f"{short_repr(value)} is out of range; "
                                    f"accepted: {_range_text(lo, hi)}")
        return value

    def string(
        self, key: str, default: Any = REQUIRED, *, choices: Iterable[str] | None = None
    ) -> Any:
        """A non-empty string, optionally one of ``choices``."""
        value = self._get(key, default)
        if value is INVALID or (value is None and default is None):
            return value
        if not isinstance(value, str) or not value.strip():
            return self.reject(key, f"expected a non-empty string, got {short_repr(value)}")
        if choices is not None:
            options = list(choices)
            if value not in options:
                return self.reject(
                    key, f"{short_repr(value)} is not one of {', '.join(map(repr, options))}"
                )
        return value

    def name(self, key: str, default: Any = REQUIRED) -> Any:
        """A name under :data:`NAME_RULE`."""
        value = self._get(key, default)
        if value is INVALID or (value is None and default is None):
            return value
        problem = name_problem(value)
        return value if problem is None else self.reject(key, problem)

    def text(self, key: str, default: Any = REQUIRED, *, max_len: int = 10_000) -> Any:
        """Free text (may be empty), at most ``max_len`` characters."""
        value = self._get(key, default)
        if value is INVALID or (value is None and default is None):
            return value
        if not isinstance(value, str):
            return self.reject(key, f"expected a string, got {short_repr(value)}")
        if len(value) > max_len:
            return self.reject(key, f"{len(value)} characters; accepted: at most {max_len}")
        return value

    def boolean(self, key: str, default: Any = REQUIRED) -> Any:
        """A true/false value."""
        value = self._get(key, default)
        if value is INVALID:
            return value
        if not isinstance(value, bool):
            return self.reject(key, f"expected true or false, got {short_repr(value)}")
        return value

    def string_list(self, key: str, default: Any = REQUIRED) -> Any:
        """A list of non-empty strings."""
        value = self._get(key, default)
        if value is INVALID or (value is None and default is None):
            return value
        if not isinstance(value, list):
            return self.reject(key, f"expected a list of names, got {short_repr(value)}")
        for v in value:
            if (problem := name_problem(v)) is not None:
                return self.reject(key, problem)
        return list(value)

    def argv(self, key: str, default: Any = REQUIRED, *, max_len: int = 4096) -> Any:
        """A command and its arguments: a non-empty list of non-empty strings (no NUL)."""
        value = self._get(key, default)
        if value is INVALID or (value is None and default is None):
            return value
        if not isinstance(value, list) or not value:
            return self.reject(key, "expected the program and its arguments as a list of "
                                    'strings, e.g. ["/opt/lab/bin/check", "--strict"] (no shell)')
        for arg in value:
            if not isinstance(arg, str) or not arg or "\0" in arg or len(arg) > max_len:
                return self.reject(key, "every argument must be a non-empty string of at "
                                        f"most {max_len} characters without NUL; got "
                                        f"{short_repr(arg)}")
        return list(value)

    def name_lists(self, key: str, default: Any = REQUIRED) -> Any:
        """A list of lists of non-empty strings (groups of names)."""
        value = self._get(key, default)
        if value is INVALID or (value is None and default is None):
            return value
        if not isinstance(value, list) or not all(isinstance(g, list) for g in value):
            return self.reject(key, f"expected a list of lists of names, got {short_repr(value)}")
        for v in (v for g in value for v in g):
            if (problem := name_problem(v)) is not None:
                return self.reject(key, problem)
        return [list(g) for g in value]

    def matrix(self, key: str, default: Any = REQUIRED, *, lo: float, hi: float) -> Any:
        """A rectangular list of lists of finite numbers in ``[lo, hi]``."""
        value = self._get(key, default)
        if value is INVALID or (value is None and default is None):
            return value
        ok = isinstance(value, list) and value and all(isinstance(r, list) for r in value)
        if ok:
            widths = {len(r) for r in value}
            ok = len(widths) == 1 and all(
                isinstance(x, (int, float)) and not isinstance(x, bool) and lo <= x <= hi
                for r in value
                for x in r
            )
        if not ok:
            return self.reject(key, "expected a rectangular array of finite numbers in "
                                    f"{_range_text(lo, hi)}")
        return [[float(x) for x in r] for r in value]

    def table(self, key: str, default: Any = REQUIRED) -> Fields:
        """A sub-table as :class:`Fields` (an empty one if absent and a default is given).

        A missing or malformed table is reported and read as a stand-in whose every
        value is :data:`INVALID`, so the rest of the file is still checked.
        """
        value = self._get(key, default)
        if value is default and default is not REQUIRED:
            value = {} if value is None else value
        if value is INVALID:
            return self._child({}, self.where(key), broken=True)
        if not isinstance(value, Mapping):
            self.report(key, f"expected a table, got {_type_name(value)}")
            return self._child({}, self.where(key), broken=True)
        return self._child(value, self.where(key))

    def tables(self, key: str, default: Any = REQUIRED) -> list[Fields]:
        """An array of tables (``[[key]]`` in TOML); empty if it is missing or malformed."""
        value = self._get(key, default)
        if value is default and default is not REQUIRED:
            value = [] if value is None else value
        if value is INVALID:
            return []
        if not isinstance(value, list) or not all(isinstance(v, Mapping) for v in value):
            self.report(key, "expected an array of tables ([[" + key + "]] blocks)")
            return []
        return [self._child(v, f"{self.where(key)}[{i}]") for i, v in enumerate(value)]

    def named_tables(
        self, key: str, noun: str, *, required: bool = True
    ) -> list[tuple[Any, Fields]]:
        """``[[key]]`` blocks, each with a ``name`` unique among them.

        Parameters
        ----------
        key : str
            The array of tables.
        noun : str
            What a block is, for messages ("qubit").
        required : bool
            Whether at least one block must be given.

        Returns
        -------
        list of (name, Fields)
            Every block; a duplicate name is reported and comes back as :data:`INVALID`.
        """
        blocks = self.tables(key, [])
        if required and not blocks and not self.reported(key):
            self.report(key, f"at least one [[{key}]] block is required")
        seen: set[str] = set()
        named: list[tuple[Any, Fields]] = []
        for block in blocks:
            name = block.name("name")
            if valid(name) and name in seen:
                name = block.reject(
                    "name", f"duplicate {noun} name {name!r}; names must be unique"
                )
            elif valid(name):
                seen.add(name)
            named.append((name, block))
        return named

    def reference(
        self, key: str, known: Collection[Any], noun: str, *, of: str = "this file"
    ) -> Any:
        """A name that must be one of ``known`` (names defined earlier in the file, or in
        the file ``of`` names, e.g. ``"chip 'grid9-demo'"``; a dict keyed by the names looks
        them up in constant time, for large chips).

        If ``known`` holds an :data:`INVALID` name, an unknown name may be that one: it
        comes back as :data:`INVALID` without a message of its own.
        """
        value = self.name(key)
        if not valid(value) or value in known:
            return value
        if not valid(*known):
            return INVALID
        names = ", ".join(known) or "(none)"
        return self.reject(key, f"{value!r} is not a {noun} of {of}; known: {names}")

    def one_each(
        self,
        key: str,
        blocks: Sequence[Fields],
        field: str,
        known: Sequence[Any],
        *,
        noun: str,
        block_noun: str,
    ) -> list[Any]:
        """Read ``field`` of the ``[[key]]`` blocks so that each of ``known`` is named once.

        Parameters
        ----------
        key : str
            The array of tables the blocks come from (missing names are reported there).
        blocks : sequence of Fields
            The blocks.
        field : str
            The field of each block that names one of ``known``.
        known : sequence of str
            The names that must each be taken by exactly one block.
        noun, block_noun : str
            What the names and the blocks are, for messages ("qubit", "drive line").

        Returns
        -------
        list
            The name read from each block (:data:`INVALID` where it was wrong).
        """
        targets: list[Any] = []
        for block in blocks:
            target = block.reference(field, known, noun)
            if valid(target) and target in targets:
                target = block.reject(
                    field, f"{noun} {target!r} already has a {block_noun}; "
                    f"one {block_noun} per {noun}"
                )
            targets.append(target)
        # With a name unread on either side, "no drive line" might only repeat that problem.
        if not self.reported(key) and valid(*known, *targets):
            missing = [k for k in known if k not in targets]
            if missing:
                self.report(key, f"{noun}(s) {', '.join(missing)} have no {block_noun}; "
                                 f"add [[{key}]] blocks")
        return targets

    def reject_unknown(self) -> None:
        """Report every key that was never read (catches typos such as ``f01_gz``)."""
        known = ", ".join(sorted(self._read)) or "(none)"
        for key in sorted(set(self.data) - self._read):
            self.report(key, f"unknown field; accepted here: {known}")

    def reject(self, key: str, problem: str) -> Any:
        """Report a problem with ``key`` and return :data:`INVALID` in place of its value."""
        self.report(key, problem)
        return INVALID


_LINE_BREAKS = "\n\r\x0b\x0c\x1c\x1d\x1e\x85\u2028\u2029"  # what str.splitlines splits on


def _one_line(text: str) -> str:
    """``text`` with line breaks escaped: a message must stay one line (names may hold them)."""
    for ch in _LINE_BREAKS:
        text = text.replace(ch, ch.encode("unicode_escape").decode("ascii"))
    return text


def _type_name(value: Any) -> str:
    return {dict: "a table", list: "an array", str: "a string", bool: "a boolean",
            int: "an integer", float: "a number"}.get(type(value), type(value).__name__)


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
