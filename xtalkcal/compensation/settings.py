"""Compensation settings for the control stack, and their JSON and CSV files.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import uuid
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any, Literal, get_args

import numpy as np

from xtalkcal.common import (
    RIG_TIME_RANGE_S,
    __version__,
    name_problem,
    parse_json,
    read_text,
    short_repr,
)
from xtalkcal.compensation.elements import Cov2, _cov2, _db
from xtalkcal.exceptions import ConfigError
from xtalkcal.store import utc_timestamp

SETTINGS_FORMAT = "xtalkcal-settings"
SETTINGS_VERSION = 1
"""``format`` and ``version`` at the top of a settings JSON file."""
SETTINGS_SCHEMA = f"{SETTINGS_FORMAT}/{SETTINGS_VERSION}"
"""The name the first JSON files carried in ``schema`` (still read), and the CSV's column."""

Solve = Literal["pairwise", "multi-victim", "closed-loop"]
SOLVES: tuple[str, ...] = get_args(Solve)

CSV_COLUMNS: tuple[str, ...] = (
    "schema", "chip", "created_utc", "software",
    "aggressor_line", "aggressor_qubit", "victim", "victim_line", "frequency_ghz",
    "ratio_re", "ratio_im", "magnitude_db", "phase_deg",
    "cov_re_re", "cov_re_im", "cov_im_im", "stderr_db",
    "measured_at_s", "method", "solve", "source",
)

# Frequencies of one aggressor's pairs closer than this are one column (GHz).
_SAME_FREQ_GHZ = 1e-6
# Display values in a file may differ from those recomputed from re/im by this much.
_DISPLAY_TOL_DB = 1e-6
# The accepted range of every number a settings file (JSON or CSV) holds. A ratio beyond
# ±10 (+20 dB) per component would ask for a cancellation tone ten times the aggressor's;
# tones from 0.1 to 40 GHz; dB values span what those ratios and covariances can give;
# variances of a ratio above 100 mean nothing is known. Common practice, not a hard bound.
_RATIO_RANGE = (-10.0, 10.0)
_DB_RANGE = (-6500.0, 40.0)  # the smallest positive double is −6460 dB
_COV_RANGE = (-100.0, 100.0)
_NUMBER_RANGES: dict[str, tuple[float, float]] = {
    "re": _RATIO_RANGE, "im": _RATIO_RANGE, "ratio_re": _RATIO_RANGE, "ratio_im": _RATIO_RANGE,
    "magnitude_db": _DB_RANGE, "stderr_db": _DB_RANGE, "phase_deg": (-360.0, 360.0),
    "frequency_ghz": (0.1, 40.0), "measured_at_s": RIG_TIME_RANGE_S,
    "cov_re_re": _COV_RANGE, "cov_re_im": _COV_RANGE, "cov_im_im": _COV_RANGE,
}
_NAME_FIELDS = ("chip", "aggressor_line", "aggressor_qubit", "victim", "victim_line")
_TEXT_MAX = 2000  # characters of a free-text field (software, source)
_DISPLAY_TOL_DEG = 1e-6
# Conditioning beyond which the multi-victim system is refused: with |X| ≲ 0.1 the matrix
# is near identity, so a condition number this large means corrupt input.
_MAX_CONDITION = 1e6


@dataclass(frozen=True)
class PairSetting:
    """The cancellation of one (aggressor line, victim qubit) pair.

    Parameters
    ----------
    aggressor_line : str
        Line whose tones are copied.
    aggressor_qubit : str
        Qubit the aggressor line is meant to drive.
    victim : str
        Qubit whose leaked field is cancelled.
    victim_line : str
        The victim's own line, which plays the copies.
    frequency_ghz : float
        Aggressor tone frequency the ratio is for (GHz).
    ratio : complex
        r: the copy on ``victim_line`` is r times the aggressor tone (linear).
    covariance : 2×2
        Covariance of (Re r, Im r), dimensionless squared; stored exactly symmetric.
    measured_at_s : float
        Rig clock of the underlying estimate (s).
    method : str
        How the crosstalk was measured (``leakage``, ``rotation``, ``stark``, ...).
    solve : {"pairwise", "multi-victim", "closed-loop"}
        r = −X, or the solution of the multi-victim system.
    source : str
        Where the crosstalk estimate came from (``ledger:<entry id>``, ``calibration:null``).

    Raises
    ------
    ValueError
        On empty names, non-finite numbers, a non-positive frequency, an invalid
        covariance or an unknown ``solve``.
    """

    aggressor_line: str
    aggressor_qubit: str
    victim: str
    victim_line: str
    frequency_ghz: float
    ratio: complex
    covariance: Cov2
    measured_at_s: float
    method: str
    solve: Solve = "pairwise"
    source: str = ""

    def __post_init__(self) -> None:
        where = f"setting {self.aggressor_line!r} → {self.victim!r}"
        for name in ("aggressor_line", "aggressor_qubit", "victim", "victim_line", "method"):
            v = getattr(self, name)
            if not isinstance(v, str) or not v:
                raise ValueError(f"{where}: {name} must be a non-empty string, got {v!r}")
        if not isinstance(self.source, str):
            raise ValueError(f"{where}: source must be a string, got {self.source!r}")
        if self.victim == self.aggressor_qubit:
            raise ValueError(f"{where}: the victim is the aggressor line's own qubit")
        if self.solve not in SOLVES:
            raise ValueError(f"{where}: solve {self.solve!r}; accepted: {', '.join(SOLVES)}")
        r = complex(self.ratio)
        if not (math.isfinite(r.real) and math.isfinite(r.imag)):
            raise ValueError(f"{where}: ratio must be finite, got {r!r}")
        f = float(self.frequency_ghz)
        if not (math.isfinite(f) and f > 0):
            raise ValueError(f"{where}: frequency_ghz must be finite and > 0, got {f!r}")
        t = float(self.measured_at_s)
        if not math.isfinite(t):
            raise ValueError(f"{where}: measured_at_s must be finite, got {t!r}")
        object.__setattr__(self, "ratio", r)
        object.__setattr__(self, "frequency_ghz", f)
        object.__setattr__(self, "measured_at_s", t)
        object.__setattr__(self, "covariance", _cov2(self.covariance, where))

    @property
    def key(self) -> tuple[str, str]:
        """(aggressor_line, victim)."""
        return (self.aggressor_line, self.victim)

    @property
    def magnitude_db(self) -> float:
        """20·log10|r| (dB; −inf for r = 0)."""
        return _db(abs(self.ratio))

    @property
    def phase_rad(self) -> float:
        """arg r (rad) in (−π, π]."""
        return math.atan2(self.ratio.imag, self.ratio.real)

    @property
    def covariance_matrix(self) -> np.ndarray:
        """Covariance of (Re r, Im r) as a new 2×2 array."""
        return np.array(self.covariance, dtype=float)

    @property
    def stderr(self) -> float:
        """sqrt(trace covariance): the residual |X + r| one standard error leaves (linear)."""
        return math.sqrt(self.covariance[0][0] + self.covariance[1][1])

    @property
    def stderr_db(self) -> float:
        """20·log10 of :attr:`stderr` (dB; −inf when the covariance is zero)."""
        return _db(self.stderr)

    def describe(self) -> str:
        """One line: pair, ratio (dB, degrees) and frequency."""
        return (f"{self.aggressor_line} → {self.victim} (line {self.victim_line}; "
                f"r = {self.magnitude_db:.1f} dB ∠ {math.degrees(self.phase_rad):.1f}° "
                f"at {self.frequency_ghz:g} GHz)")


@dataclass(frozen=True)
class CompensationSettings:
    """A set of per-pair cancellation settings for one chip.

    Parameters
    ----------
    chip : str
        Chip name; applicators refuse a chip of another name.
    pairs : tuple of PairSetting
        At most one setting per (aggressor line, victim).
    created_utc : str
        When the settings were derived (ISO-8601 with a UTC offset); default now.
    software : str
        What derived them; default this xtalkcal.

    Raises
    ------
    ValueError
        On a duplicate pair or a malformed ``created_utc``.
    """

    chip: str
    pairs: tuple[PairSetting, ...] = ()
    created_utc: str = field(default_factory=utc_timestamp)
    software: str = f"xtalkcal {__version__}"

    def __post_init__(self) -> None:
        pairs = tuple(self.pairs)
        object.__setattr__(self, "pairs", pairs)
        if not isinstance(self.chip, str) or not self.chip:
            raise ValueError(f"settings: chip must be a non-empty string, got {self.chip!r}")
        seen: set[tuple[str, str]] = set()
        for p in pairs:
            if not isinstance(p, PairSetting):
                raise ValueError(f"settings: pairs must be PairSetting, got {type(p).__name__}")
            if p.key in seen:
                raise ValueError(f"settings: pair {p.aggressor_line} → {p.victim} appears twice")
            seen.add(p.key)
        try:
            stamp = datetime.fromisoformat(self.created_utc.replace("Z", "+00:00"))
        except (AttributeError, ValueError):
            stamp = None
        if stamp is None or stamp.tzinfo is None:
            raise ValueError(
                f"settings: created_utc must be ISO-8601 with a UTC offset, got "
                f"{self.created_utc!r}")
        if not isinstance(self.software, str):
            raise ValueError(f"settings: software must be a string, got {self.software!r}")

    def __len__(self) -> int:
        return len(self.pairs)

    def __iter__(self) -> Iterator[PairSetting]:
        return iter(self.pairs)

    def pair(self, aggressor_line: str, victim: str) -> PairSetting:
        """The setting of one pair (KeyError listing the pairs held otherwise)."""
        for p in self.pairs:
            if p.key == (aggressor_line, victim):
                return p
        held = ", ".join(f"{a}→{v}" for a, v in (p.key for p in self.pairs)) or "none"
        raise KeyError(f"no setting for {aggressor_line} → {victim}; held: {held}")

    def for_aggressor(self, line: str) -> tuple[PairSetting, ...]:
        """The settings whose aggressor is ``line``."""
        return tuple(p for p in self.pairs if p.aggressor_line == line)

    # ------------------------------------------------------------------ JSON
    def to_dict(self) -> dict[str, Any]:
        """The settings as a JSON-shaped dictionary (format ``xtalkcal-settings``, version 1)."""
        return {
            "format": SETTINGS_FORMAT,
            "version": SETTINGS_VERSION,
            "chip": self.chip,
            "created_utc": self.created_utc,
            "software": self.software,
            "pairs": [_pair_to_dict(p) for p in self.pairs],
        }

    def to_json(self) -> str:
        """Strict JSON text (undefined dB values as ``null``)."""
        return json.dumps(self.to_dict(), indent=2, allow_nan=False) + "\n"

    @classmethod
    def from_dict(cls, data: Mapping[str, Any], *, source: str = "<json>") -> CompensationSettings:
        """Validate a dictionary of format ``xtalkcal-settings`` (or the first files' schema
        ``xtalkcal-settings/1``).

        Raises
        ------
        ConfigError
            Naming the source, the field and what would be accepted.
        """
        return _settings_from_dict(data, source)

    @classmethod
    def from_json(cls, text: str, *, source: str = "<json>") -> CompensationSettings:
        """Parse settings JSON text (inverse of :meth:`to_json`)."""
        data = parse_json(text, source)  # strict: no NaN, no duplicate keys, bounded nesting
        if not isinstance(data, dict):
            raise ConfigError(source, "<document>", "expected a JSON object at the top level")
        return _settings_from_dict(data, source)

    def write_json(self, path: str | os.PathLike[str]) -> Path:
        """Write :meth:`to_json` atomically; returns the path."""
        return _atomic_write_text(Path(path), self.to_json())

    @classmethod
    def read_json(cls, path: str | os.PathLike[str]) -> CompensationSettings:
        """Read a settings JSON file."""
        text, source = read_text(path)  # a ConfigError if unreadable or not UTF-8
        return cls.from_json(text, source=source)

    # ------------------------------------------------------------------ CSV
    def to_csv(self) -> str:
        """CSV text, one row per pair, header :data:`CSV_COLUMNS` (module docstring)."""
        buf = io.StringIO(newline="")
        w = csv.writer(buf)  # RFC 4180 "\r\n" rows: a "\r" or "\n" in a cell is quoted
        w.writerow(CSV_COLUMNS)
        for p in self.pairs:
            (c00, c01), (_, c11) = p.covariance
            w.writerow([
                SETTINGS_SCHEMA, self.chip, self.created_utc, self.software,
                p.aggressor_line, p.aggressor_qubit, p.victim, p.victim_line,
                repr(p.frequency_ghz), repr(p.ratio.real), repr(p.ratio.imag),
                _fmt_opt(p.magnitude_db), repr(math.degrees(p.phase_rad)),
                repr(c00), repr(c01), repr(c11), _fmt_opt(p.stderr_db),
                repr(p.measured_at_s), p.method, p.solve, p.source,
            ])
        return buf.getvalue()

    @classmethod
    def from_csv(cls, text: str, *, chip: str | None = None,
                 source: str = "<csv>") -> CompensationSettings:
        """Parse CSV text written by :meth:`to_csv`.

        Parameters
        ----------
        text : str
        chip : str, optional
            Chip name; required when the file has no rows (a header-only file), else it
            must agree with the rows.
        source : str
            Named in error messages.

        Raises
        ------
        ConfigError
            On a wrong header, a malformed cell (named by row and column), or rows of
            different chips or creation stamps.
        """
        return _settings_from_csv(text, chip, source)

    def write_csv(self, path: str | os.PathLike[str]) -> Path:
        """Write :meth:`to_csv` atomically; returns the path."""
        return _atomic_write_text(Path(path), self.to_csv())

    @classmethod
    def read_csv(cls, path: str | os.PathLike[str], *, chip: str | None = None
                 ) -> CompensationSettings:
        """Read a settings CSV file."""
        text, source = read_text(path)  # a ConfigError if unreadable or not UTF-8
        return cls.from_csv(text, chip=chip, source=source)


def _fmt_opt(x: float) -> str:
    return repr(x) if math.isfinite(x) else ""


def _finite_or_none(x: float) -> float | None:
    return x if math.isfinite(x) else None


def _pair_to_dict(p: PairSetting) -> dict[str, Any]:
    return {
        "aggressor_line": p.aggressor_line,
        "aggressor_qubit": p.aggressor_qubit,
        "victim": p.victim,
        "victim_line": p.victim_line,
        "frequency_ghz": p.frequency_ghz,
        "ratio": {
            "re": p.ratio.real,
            "im": p.ratio.imag,
            "magnitude_db": _finite_or_none(p.magnitude_db),
            "phase_deg": math.degrees(p.phase_rad),
        },
        "covariance": [list(row) for row in p.covariance],
        "stderr_db": _finite_or_none(p.stderr_db),
        "measured_at_s": p.measured_at_s,
        "method": p.method,
        "solve": p.solve,
        "source": p.source,
    }


class _Reader:
    """Typed, located access to one JSON object (errors name source and field)."""

    def __init__(self, data: Mapping[str, Any], source: str, where: str) -> None:
        self.data, self.source, self.where = data, source, where

    def error(self, name: str, problem: str) -> ConfigError:
        return ConfigError(self.source, f"{self.where}{name}", problem)

    def _get(self, name: str) -> Any:
        if name not in self.data:
            raise self.error(name, "required field is missing")
        return self.data[name]

    def string(self, name: str, *, empty: bool = False) -> str:
        v = self._get(name)
        if not isinstance(v, str) or (not empty and not v):
            raise self.error(name, f"expected a {'' if empty else 'non-empty '}string, got "
                                   f"{short_repr(v)}")
        if len(v) > _TEXT_MAX:
            raise self.error(name, f"{len(v)} characters; accepted: at most {_TEXT_MAX}")
        if name in _NAME_FIELDS and (problem := name_problem(v)) is not None:
            raise self.error(name, problem)
        return v

    def _in_range(self, name: str, v: float, shown: object, optional: bool) -> float:
        lo, hi = _NUMBER_RANGES[name]
        accepted = f"accepted: {lo:g} ≤ x ≤ {hi:g}{' or null' if optional else ''}"
        if isinstance(v, float) and not math.isfinite(v):  # (an int may be beyond floats)
            raise self.error(name, f"expected a finite number, got {shown}; {accepted}")
        if not lo <= v <= hi:
            raise self.error(name, f"{shown} is out of range; {accepted}")
        return float(v)

    def number(self, name: str, *, optional: bool = False) -> float | None:
        """A number within its range in ``_NUMBER_RANGES`` (None if ``optional`` and null)."""
        v = self._get(name)
        if v is None and optional:
            return None
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise self.error(name, f"expected a finite number{' or null' if optional else ''}, "
                                   f"got {short_repr(v)}")
        return self._in_range(name, v, short_repr(v), optional)

    def cell_number(self, name: str, optional: bool = False) -> float | None:
        """A number written as text (a CSV cell); empty means None if ``optional``."""
        s = self._get(name)
        if s == "" and optional:
            return None
        try:
            v = float(s)
        except ValueError:
            raise self.error(name, f"expected a finite number{' or empty' if optional else ''}, "
                                   f"got {short_repr(s)}") from None
        return self._in_range(name, v, short_repr(s), optional)

    def table(self, name: str) -> _Reader:
        v = self._get(name)
        if not isinstance(v, dict):
            raise self.error(name, f"expected an object, got {type(v).__name__}")
        return _Reader(v, self.source, f"{self.where}{name}.")

    def reject_unknown(self, known: Iterable[str]) -> None:
        extra = sorted(set(self.data) - set(known))
        if extra:
            raise self.error(extra[0], f"unknown field; accepted: {', '.join(sorted(known))}")


_PAIR_FIELDS = ("aggressor_line", "aggressor_qubit", "victim", "victim_line", "frequency_ghz",
                "ratio", "covariance", "stderr_db", "measured_at_s", "method", "solve", "source")
_TOP_FIELDS = ("format", "version", "chip", "created_utc", "software", "pairs")
_TOP_FIELDS_V0 = ("schema", "chip", "created_utc", "software", "pairs")  # the first files


def _check_display(rd: _Reader, ratio: complex, mag_db: float | None, phase_deg: float | None,
                   mag_name: str = "magnitude_db", phase_name: str = "phase_deg") -> None:
    """Refuse display values that disagree with re/im (a hand edit that would be ignored)."""
    want_db = _db(abs(ratio))
    if (mag_db is None) != (not math.isfinite(want_db)) or (
            mag_db is not None and abs(mag_db - want_db) > _DISPLAY_TOL_DB):
        raise rd.error(mag_name, f"{mag_db!r} disagrees with re/im ({want_db:.9g} dB); re and "
                                 "im are authoritative: edit them, or drop the file")
    want_deg = math.degrees(math.atan2(ratio.imag, ratio.real))
    if phase_deg is None or abs((phase_deg - want_deg + 180.0) % 360.0 - 180.0) > _DISPLAY_TOL_DEG:
        raise rd.error(phase_name, f"{phase_deg!r} disagrees with re/im ({want_deg:.9g}°); re "
                                   "and im are authoritative")


def _make_pair(source: str, where: str, fields: dict[str, Any]) -> PairSetting:
    try:
        return PairSetting(**fields)
    except ValueError as exc:
        raise ConfigError(source, where, str(exc)) from None


def _settings_from_dict(data: Mapping[str, Any], source: str) -> CompensationSettings:
    top = _Reader(data, source, "")
    if "format" not in data and "schema" in data:  # a file of the first naming
        schema = top.string("schema")
        if schema != SETTINGS_SCHEMA:
            raise top.error("schema", f"expected {SETTINGS_SCHEMA!r}, got {schema!r} (a "
                                      "newer xtalkcal wrote it, or it is another kind of file)")
        top.reject_unknown(_TOP_FIELDS_V0)
    else:
        fmt = top.string("format")
        if fmt != SETTINGS_FORMAT:
            raise top.error("format", f"expected {SETTINGS_FORMAT!r}, got {fmt!r} (another "
                                      "kind of file)")
        version = data.get("version")
        if isinstance(version, bool) or version != SETTINGS_VERSION:
            raise top.error("version", f"expected {SETTINGS_VERSION}, got {version!r} (a "
                                       "newer xtalkcal wrote it, or the file was edited)")
        top.reject_unknown(_TOP_FIELDS)
    chip = top.string("chip")
    created = top.string("created_utc")
    software = top.string("software", empty=True)
    raw_pairs = top._get("pairs")
    if not isinstance(raw_pairs, list):
        raise top.error("pairs", f"expected a list of objects, got {type(raw_pairs).__name__}")
    pairs = []
    for k, raw in enumerate(raw_pairs):
        if not isinstance(raw, dict):
            raise top.error(f"pairs[{k}]", "expected an object")
        rd = _Reader(raw, source, f"pairs[{k}].")
        rd.reject_unknown(_PAIR_FIELDS)
        rt = rd.table("ratio")
        rt.reject_unknown(("re", "im", "magnitude_db", "phase_deg"))
        re_, im_ = rt.number("re"), rt.number("im")
        assert re_ is not None and im_ is not None
        ratio = complex(re_, im_)
        _check_display(rt, ratio, rt.number("magnitude_db", optional=True),
                       rt.number("phase_deg"))
        cov = rd._get("covariance")
        ok = (isinstance(cov, list) and len(cov) == 2 and all(
            isinstance(row, list) and len(row) == 2 and all(
                isinstance(v, (int, float)) and not isinstance(v, bool)
                and _COV_RANGE[0] <= v <= _COV_RANGE[1] for v in row)
            for row in cov))
        if not ok:
            raise rd.error("covariance", f"expected [[a, b], [b, c]] of numbers in "
                                         f"{_COV_RANGE[0]:g} ≤ x ≤ {_COV_RANGE[1]:g}")
        solve = rd.string("solve")
        if solve not in SOLVES:
            raise rd.error("solve", f"got {solve!r}; accepted: {', '.join(SOLVES)}")
        fields = {
            "aggressor_line": rd.string("aggressor_line"),
            "aggressor_qubit": rd.string("aggressor_qubit"),
            "victim": rd.string("victim"),
            "victim_line": rd.string("victim_line"),
            "frequency_ghz": rd.number("frequency_ghz"),
            "ratio": ratio,
            "covariance": cov,
            "measured_at_s": rd.number("measured_at_s"),
            "method": rd.string("method"),
            "solve": solve,
            "source": rd.string("source", empty=True),
        }
        p = _make_pair(source, f"pairs[{k}]", fields)
        sd = rd.number("stderr_db", optional=True)
        if (sd is None) != (not math.isfinite(p.stderr_db)) or (
                sd is not None and abs(sd - p.stderr_db) > _DISPLAY_TOL_DB):
            raise rd.error("stderr_db", f"{sd!r} disagrees with the covariance "
                                        f"({p.stderr_db:.9g} dB)")
        pairs.append(p)
    try:
        return CompensationSettings(chip, tuple(pairs), created, software)
    except ValueError as exc:
        raise top.error("created_utc" if "created_utc" in str(exc) else "pairs", str(exc)) from None


def _settings_from_csv(text: str, chip: str | None, source: str) -> CompensationSettings:
    try:
        return _settings_from_csv_rows(text, chip, source)
    except csv.Error as exc:  # e.g. a cell beyond the csv module's field size limit
        raise ConfigError(source, "<rows>", f"not valid CSV: {exc}") from None


def _settings_from_csv_rows(text: str, chip: str | None, source: str) -> CompensationSettings:
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        header = next(reader)
    except StopIteration:
        raise ConfigError(source, "<header>", "empty file; expected the header row "
                          f"{','.join(CSV_COLUMNS)}") from None
    if tuple(header) != CSV_COLUMNS:
        raise ConfigError(source, "<header>", f"expected {','.join(CSV_COLUMNS)}; got "
                          f"{','.join(header)}")
    meta: tuple[str, str, str] | None = None
    pairs = []
    for n, row in enumerate(reader, start=2):
        if not row:
            continue
        if len(row) != len(CSV_COLUMNS):
            raise ConfigError(source, f"row {n}", f"{len(row)} cells, expected "
                              f"{len(CSV_COLUMNS)}")
        cells = dict(zip(CSV_COLUMNS, row, strict=True))
        rd = _Reader(cells, source, f"row {n}: ")
        num = rd.cell_number
        for key in (*_NAME_FIELDS, "software", "source"):
            rd.string(key, empty=key in ("software", "source"))  # names under the rule

        if cells["schema"] != SETTINGS_SCHEMA:
            raise rd.error("schema", f"expected {SETTINGS_SCHEMA!r}, got {cells['schema']!r}")
        this = (cells["chip"], cells["created_utc"], cells["software"])
        if meta is None:
            meta = this
        elif this != meta:
            raise rd.error("chip", f"rows disagree on chip/created_utc/software: {this} vs {meta}")
        solve = cells["solve"]
        if solve not in SOLVES:
            raise rd.error("solve", f"got {solve!r}; accepted: {', '.join(SOLVES)}")
        re_, im_ = num("ratio_re"), num("ratio_im")
        assert re_ is not None and im_ is not None
        ratio = complex(re_, im_)
        _check_display(rd, ratio, num("magnitude_db", True), num("phase_deg"))
        c00, c01, c11 = num("cov_re_re"), num("cov_re_im"), num("cov_im_im")
        fields = {
            "aggressor_line": cells["aggressor_line"],
            "aggressor_qubit": cells["aggressor_qubit"],
            "victim": cells["victim"],
            "victim_line": cells["victim_line"],
            "frequency_ghz": num("frequency_ghz"),
            "ratio": ratio,
            "covariance": ((c00, c01), (c01, c11)),
            "measured_at_s": num("measured_at_s"),
            "method": cells["method"],
            "solve": solve,
            "source": cells["source"],
        }
        p = _make_pair(source, f"row {n}", fields)
        sd = num("stderr_db", True)
        if (sd is None) != (not math.isfinite(p.stderr_db)) or (
                sd is not None and abs(sd - p.stderr_db) > _DISPLAY_TOL_DB):
            raise rd.error("stderr_db", f"{sd!r} disagrees with the covariance "
                                        f"({p.stderr_db:.9g} dB)")
        pairs.append(p)
    if meta is None:
        if chip is None:
            raise ConfigError(source, "<rows>", "no rows: pass chip= to name the chip")
        return CompensationSettings(chip, ())
    if chip is not None and chip != meta[0]:
        raise ConfigError(source, "row 2: chip", f"file is for chip {meta[0]!r}, not {chip!r}")
    try:
        return CompensationSettings(meta[0], tuple(pairs), meta[1], meta[2])
    except ValueError as exc:
        raise ConfigError(source, "row 2: created_utc" if "created_utc" in str(exc) else "<rows>",
                          str(exc)) from None


def _atomic_write_text(path: Path, text: str) -> Path:
    """Write via a temporary file in the same folder, fsync, os.replace, fsync the folder."""
    directory = path.parent if str(path.parent) else Path(".")
    tmp = directory / f".tmp-{os.getpid()}-{uuid.uuid4().hex}-{path.name}"
    try:
        with open(tmp, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    if os.name != "nt":  # Windows cannot open folders; NTFS renames are journaled
        fd = os.open(directory, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
    return path
