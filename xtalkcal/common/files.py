"""Safe readers for the files a lab hands the toolkit: UTF-8 text of bounded size, strict JSON and
TOML with a nesting limit. Every failure is a :class:`~xtalkcal.exceptions.ConfigError` naming the
file.
"""

from __future__ import annotations

import json
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import Any, Final

from xtalkcal.exceptions import ConfigError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on 3.10 only
    import tomli as tomllib
from xtalkcal.common.fields import _one_line, short_repr

MAX_NESTING: Final = 32
"""Deepest nesting of tables/arrays/objects accepted in any file (ours need fewer than 8)."""

MAX_FILE_BYTES: Final = 16 * 2**20
"""Largest input file read (16 MiB; a 100-qubit chip file is ~100 kB)."""


def read_text(path: str | Path) -> tuple[str, str]:
    """Read a user's text file as UTF-8.

    Returns
    -------
    text, source : str, str
        The text and the path string used in error messages.

    Raises
    ------
    ConfigError
        Field ``(file)``: missing, unreadable, larger than :data:`MAX_FILE_BYTES`, or not
        UTF-8 (the offset of the first bad byte is given).
    """
    source = _one_line(str(path))
    try:
        with open(path, "rb") as fh:
            raw = fh.read(MAX_FILE_BYTES + 1)
    except FileNotFoundError:
        raise ConfigError(source, "(file)", "no such file") from None
    except OSError as exc:
        raise ConfigError(source, "(file)", f"cannot be read ({exc.strerror or exc})") from None
    if len(raw) > MAX_FILE_BYTES:
        raise ConfigError(source, "(file)", f"larger than {MAX_FILE_BYTES // 2**20} MiB; "
                                            "accepted: a text file up to that size")
    try:
        return raw.decode("utf-8"), source
    except UnicodeDecodeError as exc:
        raise ConfigError(source, "(file)",
                          f"not UTF-8 text: byte 0x{raw[exc.start]:02x} at offset {exc.start} "
                          f"({exc.reason}); accepted: a UTF-8 text file") from None


def load_toml(path: str | Path) -> tuple[dict[str, Any], str]:
    """Read a TOML file.

    An unreadable file or a syntax error raises at once: nothing after it can be checked.

    Returns
    -------
    data, source : dict, str
        The parsed document and the path string used in error messages.

    Raises
    ------
    ConfigError
        If the file is missing, unreadable, not UTF-8, not valid TOML or nested deeper
        than :data:`MAX_NESTING`.
    """
    text, source = read_text(path)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(source, "(syntax)", f"not valid TOML: {exc}") from None
    except ValueError as exc:  # an integer of more digits than Python converts
        raise ConfigError(source, "(syntax)", _one_line(f"not valid TOML: {exc}")) from None
    except RecursionError:
        raise ConfigError(source, "(syntax)", _too_deep()) from None
    _check_depth(data, source)
    return data, source


def load_json(path: str | Path) -> tuple[Any, str]:
    """Read a JSON file strictly: no NaN/Infinity, no duplicate keys, bounded nesting.

    Returns
    -------
    data, source : object, str
        The parsed document and the path string used in error messages.

    Raises
    ------
    ConfigError
        Field ``(file)`` or ``(syntax)``, as :func:`load_toml`.
    """
    text, source = read_text(path)
    return parse_json(text, source), source


def parse_json(text: str, source: str) -> Any:
    """Parse JSON text as :func:`load_json` does (``source`` names it in messages)."""

    def constant(word: str) -> Any:
        raise ValueError(f"{word} is not a number JSON allows; accepted: finite numbers")

    def no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
        out: dict[str, Any] = {}
        for k, v in pairs:
            if k in out:
                raise ValueError(f"key {short_repr(k)} appears twice in one object")
            out[k] = v
        return out

    try:
        data = json.loads(text, parse_constant=constant, object_pairs_hook=no_duplicates)
    except json.JSONDecodeError as exc:
        raise ConfigError(source, "(syntax)",
                          f"not valid JSON: {exc.msg} (line {exc.lineno}, column {exc.colno})"
                          ) from None
    except RecursionError:
        raise ConfigError(source, "(syntax)", _too_deep()) from None
    except ValueError as exc:  # from the hooks above, or a number too long to convert
        raise ConfigError(source, "(syntax)", _one_line(f"not valid JSON: {exc}")) from None
    _check_depth(data, source)
    return data


def _too_deep() -> str:
    return f"nested too deeply; accepted: at most {MAX_NESTING} levels of tables/arrays"


def _check_depth(data: Any, source: str) -> None:
    """Refuse a document nested deeper than MAX_NESTING (iteratively: no recursion)."""
    stack: list[tuple[Any, int]] = [(data, 1)]
    while stack:
        node, depth = stack.pop()
        if depth > MAX_NESTING:
            raise ConfigError(source, "(syntax)", _too_deep())
        if isinstance(node, Mapping):
            stack.extend((v, depth + 1) for v in node.values())
        elif isinstance(node, list):
            stack.extend((v, depth + 1) for v in node)


def atomic_write(path: Path, text: str) -> None:
    """Write a text file so that a crash never leaves a half-written one."""
    import os
    import tempfile

    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
