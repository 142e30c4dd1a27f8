"""The matrix store: a crash-safe, append-only ledger of crosstalk estimates for one chip.

A ledger keeps every crosstalk estimate ever made on a chip (accepted or rejected), the raw
sweep datasets the estimates came from, and derives from that history the *current matrix*:
for each (aggressor line, victim qubit) pair, the latest accepted entry.

Element convention (shared with the rest of xtalkcal): ``X_ij(f) = C_ij(f) / C_ii(f)``, complex,
linear inside the code; magnitudes in dB (``20*log10|X|``) only in the display views built here.

On-disk design
--------------
A ledger is a **directory** (one per chip)::

    chip_a.ledger/
        xtalkcal-ledger.json          marker: format, schema_version, chip name
        ledger.lock                   advisory lock file used by writers (filelock)
        0000000001-0000000001.h5      commit 1 (immutable)
        0000000002-0000000002.h5      commit 2 (immutable)
        0000000003-0000000040.h5      commits 3..40, merged by `Ledger.compact` (immutable)
        .tmp-<pid>-<random>.h5        a commit being written (never read)

Every commit (a batch of entries plus optional raw sweeps) is one HDF5 file, written once and
never modified. Its name gives the range of commit sequence numbers it holds.

Why this is crash safe (the argument the tests exercise):

1. HDF5 gives no guarantee that a file whose writer died mid-write is readable, so no reader
   ever opens a file that might still be written: a commit is built under a temporary name
   (``.tmp-...``) that does not match the final-name pattern, closed, ``fsync``'d, and only then
   renamed to its final name with ``os.replace``. POSIX rename is atomic: any observer sees
   either no final file or the complete one. The directory is ``fsync``'d afterwards so the
   rename itself survives power loss.
2. Readers list the directory and open final names only; temporary files are ignored and are
   deleted by the next writer (while it holds the lock, so they cannot belong to a live writer).
3. `Ledger.append` returns only after the rename and the directory ``fsync``: a commit that was
   reported as done is visible and durable; a writer killed before the rename leaves nothing
   but an ignored temporary file. One commit is one file, so a batch is all-or-nothing.
4. Writers hold an exclusive `filelock.FileLock` on ``ledger.lock`` while choosing the next
   sequence number (one more than the highest finalised one) and writing. On POSIX this is a
   kernel ``flock``, released by the kernel when the holder dies, so a killed writer never
   leaves a stale lock. Readers take no lock.
5. Compaction writes the merged file (covering sequence numbers a..b) by the same
   write-fsync-rename path *before* deleting the files it replaces. A reader that sees both
   keeps the covering file and ignores files whose range lies inside it (their content is
   identical), so every interleaving shows the same history. A file that vanishes between
   listing and opening makes the reader list again. A crash between the rename and the
   deletions leaves redundant files that readers ignore and the next compaction deletes.
6. Validation of a whole batch (entries and sweeps, including encoding the sweeps into the
   arrays that will be stored) happens before any file is created, so a rejected batch writes
   nothing.

Integrity (why rot is seen, not read back as different data):

7. Beside every commit file lies its digest file ``<first>-<last>.sha256.json`` holding the
   SHA-256 and size of the whole commit file (a digest of the bytes, so it holds whatever
   the codec). It is written (and ``fsync``'d) *before* the commit file is renamed into
   place, so a visible commit always has one; a writer killed in between leaves a digest
   file naming its temporary file, which readers ignore and the next writer deletes.
   Readers check the digest of each file once per process (`Ledger.verify` checks all
   again). Numeric datasets also carry HDF5's Fletcher-32 checksum per chunk, checked on
   every read of a sweep, and the HDF5 1.10 metadata has checksums of its own.
8. Sequence numbers run without gaps from 1 (appends take the next number, compactions keep
   ranges), so a commit file deleted with its digest file is missed too, except the newest.
9. Any damaged or missing commit makes every reader raise `LedgerError` naming *each* bad
   file (the others are still checked); nothing is written into a damaged ledger. A file
   moved into ``quarantine/`` (`quarantine_commit`) is set aside: its entries leave the
   history and its sequence numbers no longer count as missing.
10. Ledgers written before digests existed have none. The marker then lacks ``integrity``
    and their files read as *unverified*, not as errors; the first write of this code
    records the names of those legacy files in the marker, and from then on any other file
    without a digest is an error.

Limits (common practice for lock files and rename-based commits): the guarantees need a local
POSIX file system that honours ``fsync`` and ``flock`` (ext4, xfs, APFS...). Network file
systems may implement neither faithfully; keep ledgers on local disks or serialise writers
yourself.

Schema versions
---------------
Every commit file and the marker carry an integer ``schema_version`` (this code writes
`SCHEMA_VERSION`). A file with a newer version is refused with a clear error. Older files are
upgraded in memory on read, one step at a time, by ``MIGRATIONS[v]`` (entry columns of version
``v`` -> ``v + 1``); sweeps are decoded by the reader registered for their version in
``SWEEP_READERS``. Compaction rewrites everything in the current version.

Ordering
--------
Entries carry the commit sequence number ``seq`` and their ``position`` inside the commit, both
assigned by the ledger. "Latest" means the largest ``(measured_at_s, seq, position)``: the rig
clock decides, ties are broken by commit order. The rig clock must therefore be monotonic over
the life of a chip (a persistent counter or epoch seconds, not a per-session clock).
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import math
import numbers
import operator
import os
import re
import uuid
from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from types import MappingProxyType
from typing import Any, Literal, get_args

import filelock
import h5py
import numpy as np
import xarray as xr

from xtalkcal.exceptions import LedgerError

__all__ = [
    "SCHEMA_VERSION",
    "METHODS",
    "KINDS",
    "VERDICTS",
    "MIGRATIONS",
    "SWEEP_READERS",
    "Method",
    "Kind",
    "Verdict",
    "LedgerValidationError",
    "LedgerEntry",
    "MatrixSnapshot",
    "CommitReceipt",
    "CommitCheck",
    "LedgerReport",
    "Ledger",
    "verify_ledger",
    "quarantine_commit",
    "utc_timestamp",
]

SCHEMA_VERSION: int = 1
"""Schema version written into every file by this code."""

Method = Literal["leakage", "rotation", "stark", "survey", "manual"]
Kind = Literal["survey", "null", "recheck", "manual"]
Verdict = Literal["accepted", "rejected"]

METHODS: tuple[str, ...] = get_args(Method)
KINDS: tuple[str, ...] = get_args(Kind)
VERDICTS: tuple[str, ...] = get_args(Verdict)

_FORMAT = "xtalkcal-ledger"
_MARKER_NAME = "xtalkcal-ledger.json"
_LOCK_NAME = "ledger.lock"
_TMP_PREFIX = ".tmp-"
_FINAL_RE = re.compile(r"^(\d{10,})-(\d{10,})\.h5$")
_DIGEST_SUFFIX = ".sha256.json"
_DIGEST_RE = re.compile(r"^(\d{10,})-(\d{10,})\.sha256\.json$")
_DIGEST_FORMAT = "xtalkcal-commit-digest"
_QUARANTINE = "quarantine"
_HASH_BLOCK = 1 << 20  # bytes read at a time while hashing
# HDF5 1.10 object headers keep small groups compact (about a third of the default size) and
# every h5py >= 3 ships a library that reads them.
_LIBVER = ("v110", "v110")
# How often a reader re-lists the directory when files vanish under it (compaction).
_MAX_LIST_ATTEMPTS = 20


class LedgerValidationError(LedgerError, ValueError):
    """An entry, sweep or argument handed to the ledger is invalid; nothing was written.

    Parameters
    ----------
    where : str
        Which object failed, e.g. ``entry[3] (L1 -> q2)`` or ``sweep 'ring-7'``.
    field : str
        Name of the offending field.
    problem : str
        What is wrong and what would be accepted.
    """

    def __init__(self, where: str, field: str, problem: str) -> None:
        self.where = where
        self.field = field
        self.problem = problem
        super().__init__(f"{where}: {field}: {problem}")

    def __reduce__(self) -> tuple[Any, ...]:
        # OSError's own pickling would pass the formatted message as errno; keep our fields.
        return (type(self), (self.where, self.field, self.problem))


class _Malformed(Exception):
    """A commit file's content does not have the structure this code writes (decoding only;
    the loader turns it into a `LedgerError` naming the file)."""


def _attr(obj: h5py.HLObject, key: str, kind: type, where: str) -> Any:
    """An HDF5 attribute that must exist and be a ``str`` or a (non-bool) integer."""
    if key not in obj.attrs:
        raise _Malformed(f"{where}: attribute {key!r} is missing")
    value = obj.attrs[key]
    if kind is int:
        if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
            raise _Malformed(f"{where}: attribute {key!r} must be an integer, got {value!r}")
        return int(value)
    if not isinstance(value, str):
        raise _Malformed(f"{where}: attribute {key!r} must be a string, got {value!r}")
    return str(value)


# --------------------------------------------------------------------------------------------
# Entries
# --------------------------------------------------------------------------------------------


def utc_timestamp(moment: datetime | None = None) -> str:
    """Return a wall-clock time as an ISO-8601 UTC string (microsecond resolution).

    Parameters
    ----------
    moment : datetime, optional
        Time-zone aware time to format; default now.

    Returns
    -------
    str
        E.g. ``2031-05-04T10:20:30.123456+00:00``.
    """
    moment = datetime.now(timezone.utc) if moment is None else moment
    if moment.tzinfo is None:
        raise LedgerValidationError("utc_timestamp", "moment", "needs a time zone (naive given)")
    return moment.astimezone(timezone.utc).isoformat(timespec="microseconds")


def _coerce_error(name: str, problem: str) -> LedgerValidationError:
    return LedgerValidationError("LedgerEntry", name, problem)


def _as_float(name: str, value: object) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise _coerce_error(name, f"expected a real number, got {type(value).__name__}")
    return float(value)


def _as_int(name: str, value: object) -> int:
    if isinstance(value, bool):
        raise _coerce_error(name, "expected an integer, got bool")
    try:
        return operator.index(value)  # accepts numpy integers, refuses 3.0
    except TypeError:
        raise _coerce_error(name, f"expected an integer, got {type(value).__name__}") from None


def _as_complex(name: str, value: object) -> complex:
    if isinstance(value, bool) or not isinstance(value, numbers.Complex):
        raise _coerce_error(name, f"expected a complex number, got {type(value).__name__}")
    return complex(value)


def _as_str(name: str, value: object) -> str:
    if not isinstance(value, str):
        raise _coerce_error(name, f"expected a str, got {type(value).__name__}")
    return str(value)  # np.str_ -> str, so equality and types survive a round trip


def _as_covariance(value: object) -> tuple[tuple[float, float], tuple[float, float]]:
    try:
        arr = np.asarray(value)
    except Exception as exc:  # ragged nested sequences and the like
        raise _coerce_error("covariance", f"not array-like ({exc})") from None
    if arr.shape != (2, 2) or arr.dtype.kind not in "iuf":
        raise _coerce_error(
            "covariance",
            f"expected a real 2x2 matrix over (Re X, Im X), got shape {arr.shape} "
            f"dtype {arr.dtype}",
        )
    arr = arr.astype(float)
    return ((float(arr[0, 0]), float(arr[0, 1])), (float(arr[1, 0]), float(arr[1, 1])))


@dataclass(frozen=True, kw_only=True)
class LedgerEntry:
    """One crosstalk estimate, as stored in the ledger.

    Parameters
    ----------
    aggressor : str
        Name of the drive line whose tone leaks.
    victim : str
        Name of the qubit that receives the leaked field.
    frequency_ghz : float
        Frequency of the aggressor tone at which X was measured, GHz.
    value : complex
        Crosstalk element ``X = C_victim,aggressor / C_victim,victim`` (linear, dimensionless).
    covariance : 2x2 array-like of float
        Covariance of ``(Re X, Im X)``, dimensionless squared. Symmetric positive semidefinite.
    method : {"leakage", "rotation", "stark", "survey", "manual"}
        How X was measured.
    shots : int
        Total number of shots spent on this estimate (>= 0).
    amplification : int
        Number of aggressor pulse repetitions K used for error amplification (>= 1).
    quality : float
        Fit-quality figure reported by the fit (e.g. reduced chi-square), dimensionless.
    verdict : {"accepted", "rejected"}
        Whether the fit was accepted. Rejected entries are kept as history only.
    reason : str
        Why the verdict was given; required (non-empty) for rejected entries.
    measured_at_s : float
        Rig clock at the end of the measurement, s. Must be monotonic over the chip's life.
    measured_at_utc : str
        Wall clock at the end of the measurement, ISO-8601 with a zero UTC offset
        (see `utc_timestamp`).
    rig : str
        Description of the rig (hardware or simulator) that took the data.
    software_version : str
        Version of the software that produced the estimate.
    kind : {"survey", "null", "recheck", "manual"}
        What sort of measurement this was.
    tag : str, optional
        Free-form run identifier.
    sweep_id : str, optional
        Id of the raw sweep stored in this ledger that the estimate came from, or ``""``.
    seq : int, optional
        Commit sequence number, assigned by the ledger (0 = not stored yet).
    position : int, optional
        Index of the entry inside its commit, assigned by the ledger.

    Notes
    -----
    For rejected entries ``value``, ``covariance`` and ``quality`` may be NaN (a failed fit may
    have no number); accepted entries must be finite everywhere.
    """

    aggressor: str
    victim: str
    frequency_ghz: float
    value: complex
    covariance: tuple[tuple[float, float], tuple[float, float]]
    method: Method
    shots: int
    amplification: int
    quality: float
    verdict: Verdict
    reason: str = ""
    measured_at_s: float
    measured_at_utc: str
    rig: str
    software_version: str
    kind: Kind
    tag: str = ""
    sweep_id: str = ""
    seq: int = 0
    position: int = 0

    def __post_init__(self) -> None:
        # Normalise types only; semantic checks run in Ledger.append so that old files with
        # data a later rule would refuse can still be read.
        conv: dict[str, Any] = {
            "value": _as_complex("value", self.value),
            "covariance": _as_covariance(self.covariance),
        }
        for name in ("frequency_ghz", "quality", "measured_at_s"):
            conv[name] = _as_float(name, getattr(self, name))
        for name in ("shots", "amplification", "seq", "position"):
            conv[name] = _as_int(name, getattr(self, name))
        for name in _TEXT_FIELDS:
            conv[name] = _as_str(name, getattr(self, name))
        for name, val in conv.items():
            object.__setattr__(self, name, val)

    # -- derived views -------------------------------------------------------------------

    @property
    def accepted(self) -> bool:
        """True if the verdict is ``"accepted"``."""
        return self.verdict == "accepted"

    @property
    def stored(self) -> bool:
        """True if the entry came out of a ledger (has a commit sequence number)."""
        return self.seq > 0

    @property
    def entry_id(self) -> str:
        """Stable identifier ``"<seq>.<position>"``; ``""`` for an entry not stored yet."""
        return f"{self.seq}.{self.position}" if self.stored else ""

    @property
    def covariance_matrix(self) -> np.ndarray:
        """Covariance of (Re X, Im X) as a new 2x2 float array (dimensionless squared)."""
        return np.array(self.covariance, dtype=float)

    @property
    def stderr(self) -> tuple[float, float]:
        """Standard errors of (Re X, Im X), dimensionless."""
        (c00, _), (_, c11) = self.covariance
        return (math.sqrt(c00) if c00 >= 0 else math.nan, math.sqrt(c11) if c11 >= 0 else math.nan)

    @property
    def magnitude_db(self) -> float:
        """``20*log10|X|``, dB (``-inf`` for X = 0)."""
        mag = abs(self.value)
        return 20.0 * math.log10(mag) if mag > 0 else -math.inf

    @property
    def phase_rad(self) -> float:
        """``arg X``, rad, in (-pi, pi]."""
        return math.atan2(self.value.imag, self.value.real)

    def bare(self) -> LedgerEntry:
        """Return a copy without the ledger-assigned ``seq`` and ``position``."""
        return dataclasses.replace(self, seq=0, position=0)


_TEXT_FIELDS = (
    "aggressor",
    "victim",
    "method",
    "verdict",
    "reason",
    "measured_at_utc",
    "rig",
    "software_version",
    "kind",
    "tag",
    "sweep_id",
)


def _check_utf8(where: str, name: str, value: str, *, subject: str = "") -> None:
    """Raise unless ``value`` can be stored as an HDF5 UTF-8 string.

    ``subject`` opens the message (``"strings "`` for the elements of an array).
    """
    if "\x00" in value:
        raise LedgerValidationError(where, name, f"{subject}must not contain NUL characters")
    try:
        value.encode("utf-8")
    except UnicodeEncodeError:
        raise LedgerValidationError(
            where, name, f"{subject}must be encodable as UTF-8 (lone surrogates found)"
        ) from None


def _check_text(where: str, name: str, value: str, *, required: bool, exact: bool) -> None:
    """Raise unless ``value`` can be stored as an HDF5 UTF-8 string (and is a usable name)."""
    _check_utf8(where, name, value)
    if required and not value.strip():
        raise LedgerValidationError(where, name, "must be a non-empty string")
    if exact and value != value.strip():
        raise LedgerValidationError(
            where, name, f"must not start or end with white space, got {value!r}"
        )


def _parse_utc(text: str) -> datetime | None:
    # datetime.fromisoformat only learned the "Z" suffix in Python 3.11.
    candidate = text[:-1] + "+00:00" if text.endswith(("Z", "z")) else text
    try:
        moment = datetime.fromisoformat(candidate)
    except ValueError:
        return None
    if moment.tzinfo is None or moment.utcoffset() != timedelta(0):
        return None
    return moment


def _is_nan(x: float) -> bool:
    return isinstance(x, float) and math.isnan(x)


def _check_entry(entry: LedgerEntry, where: str) -> None:
    """Semantic checks of one entry; raises `LedgerValidationError` naming the field."""
    if not isinstance(entry, LedgerEntry):
        raise LedgerValidationError(where, "entry", f"expected LedgerEntry, got {type(entry)}")
    where = f"{where} ({entry.aggressor!r} -> {entry.victim!r})"
    for name in ("aggressor", "victim"):
        _check_text(where, name, getattr(entry, name), required=True, exact=True)
    for name in ("rig", "software_version"):
        _check_text(where, name, getattr(entry, name), required=True, exact=False)
    for name in ("reason", "tag"):
        _check_text(where, name, getattr(entry, name), required=False, exact=False)
    _check_text(where, "sweep_id", entry.sweep_id, required=False, exact=True)
    for name, choices in (("method", METHODS), ("kind", KINDS), ("verdict", VERDICTS)):
        if getattr(entry, name) not in choices:
            raise LedgerValidationError(
                where, name, f"got {getattr(entry, name)!r}; accepted: {', '.join(choices)}"
            )
    rejected = entry.verdict == "rejected"
    if rejected and not entry.reason.strip():
        raise LedgerValidationError(where, "reason", "a rejected entry needs a non-empty reason")

    if not (math.isfinite(entry.frequency_ghz) and entry.frequency_ghz > 0):
        raise LedgerValidationError(
            where, "frequency_ghz", f"must be finite and > 0 GHz, got {entry.frequency_ghz!r}"
        )
    if not math.isfinite(entry.measured_at_s):
        raise LedgerValidationError(
            where, "measured_at_s", f"must be a finite rig time in s, got {entry.measured_at_s!r}"
        )
    if _parse_utc(entry.measured_at_utc) is None:
        raise LedgerValidationError(
            where,
            "measured_at_utc",
            f"must be ISO-8601 with a zero UTC offset (e.g. '2031-05-04T10:20:30+00:00' or "
            f"'...Z'), got {entry.measured_at_utc!r}",
        )
    if entry.shots < 0:
        raise LedgerValidationError(where, "shots", f"must be >= 0, got {entry.shots}")
    if entry.amplification < 1:
        raise LedgerValidationError(
            where, "amplification", f"must be an integer >= 1, got {entry.amplification}"
        )
    if entry.seq < 0 or entry.position < 0:
        raise LedgerValidationError(where, "seq", "seq and position are assigned by the ledger")

    nan_ok = "NaN allowed only for rejected entries" if not rejected else "NaN allowed"
    parts = (entry.value.real, entry.value.imag)
    if all(_is_nan(p) for p in parts):
        if not rejected:
            raise LedgerValidationError(where, "value", f"must be finite ({nan_ok})")
    elif not all(math.isfinite(p) for p in parts):
        raise LedgerValidationError(
            where, "value", f"real and imaginary parts must be finite ({nan_ok}), got {parts}"
        )
    q = entry.quality
    if not math.isfinite(q) and not (rejected and _is_nan(q)):
        raise LedgerValidationError(where, "quality", f"must be finite ({nan_ok}), got {q!r}")

    cov = np.array(entry.covariance, dtype=float)
    if np.isnan(cov).all():
        if not rejected:
            raise LedgerValidationError(where, "covariance", f"must be finite ({nan_ok})")
        return
    if not np.isfinite(cov).all():
        raise LedgerValidationError(
            where, "covariance", f"all four elements must be finite ({nan_ok}), got {cov.tolist()}"
        )
    scale = float(np.max(np.abs(cov)))
    # Fits produce covariances symmetric only to rounding; 1e-9 relative is far above that
    # and far below any real asymmetry (common practice).
    if abs(cov[0, 1] - cov[1, 0]) > 1e-9 * scale:
        raise LedgerValidationError(
            where,
            "covariance",
            f"must be symmetric, got off-diagonal {cov[0, 1]!r} vs {cov[1, 0]!r}",
        )
    eig = np.linalg.eigvalsh(0.5 * (cov + cov.T))
    if eig[0] < -1e-9 * max(scale, float(np.max(np.abs(eig)))):
        raise LedgerValidationError(
            where,
            "covariance",
            f"must be positive semidefinite, got eigenvalues {eig.tolist()}",
        )


# --------------------------------------------------------------------------------------------
# Entry columns (the on-disk table)
# --------------------------------------------------------------------------------------------

_FLOAT_COLUMNS = (
    "frequency_ghz",
    "value_re",
    "value_im",
    "cov_re_re",
    "cov_re_im",
    "cov_im_re",
    "cov_im_im",
    "quality",
    "measured_at_s",
)
_INT_COLUMNS = ("seq", "position", "shots", "amplification")
_TABLES = (("float64", _FLOAT_COLUMNS), ("int64", _INT_COLUMNS), ("text", _TEXT_FIELDS))

Columns = dict[str, np.ndarray]
"""One 1-D array per column name; text columns are object arrays of str."""

MIGRATIONS: dict[int, Callable[[Columns], Columns]] = {}
"""Upgrade functions of the entry table: ``MIGRATIONS[v]`` turns version-``v`` columns into
version ``v + 1`` columns. Empty while only version 1 exists; add one function per bump."""


def _entries_to_columns(entries: Iterable[LedgerEntry]) -> Columns:
    rows = list(entries)
    cols: Columns = {
        "frequency_ghz": np.array([e.frequency_ghz for e in rows], dtype=np.float64),
        "value_re": np.array([e.value.real for e in rows], dtype=np.float64),
        "value_im": np.array([e.value.imag for e in rows], dtype=np.float64),
        "cov_re_re": np.array([e.covariance[0][0] for e in rows], dtype=np.float64),
        "cov_re_im": np.array([e.covariance[0][1] for e in rows], dtype=np.float64),
        "cov_im_re": np.array([e.covariance[1][0] for e in rows], dtype=np.float64),
        "cov_im_im": np.array([e.covariance[1][1] for e in rows], dtype=np.float64),
        "quality": np.array([e.quality for e in rows], dtype=np.float64),
        "measured_at_s": np.array([e.measured_at_s for e in rows], dtype=np.float64),
    }
    for name in _INT_COLUMNS:
        cols[name] = np.array([getattr(e, name) for e in rows], dtype=np.int64)
    for name in _TEXT_FIELDS:
        arr = np.empty(len(rows), dtype=object)
        arr[:] = [getattr(e, name) for e in rows]
        cols[name] = arr
    return cols


def _columns_to_entries(cols: Columns) -> list[LedgerEntry]:
    missing = [c for c in (*_FLOAT_COLUMNS, *_INT_COLUMNS, *_TEXT_FIELDS) if c not in cols]
    if missing:
        raise LedgerError(f"entry table lacks columns {missing}")
    n = len(cols["seq"])
    f = {name: cols[name].astype(np.float64).tolist() for name in _FLOAT_COLUMNS}
    i = {name: cols[name].astype(np.int64).tolist() for name in _INT_COLUMNS}
    t = {name: [str(s) for s in cols[name]] for name in _TEXT_FIELDS}
    return [
        LedgerEntry(
            value=complex(f["value_re"][k], f["value_im"][k]),
            covariance=(
                (f["cov_re_re"][k], f["cov_re_im"][k]),
                (f["cov_im_re"][k], f["cov_im_im"][k]),
            ),
            frequency_ghz=f["frequency_ghz"][k],
            quality=f["quality"][k],
            measured_at_s=f["measured_at_s"][k],
            **{name: i[name][k] for name in _INT_COLUMNS},
            **{name: t[name][k] for name in _TEXT_FIELDS},
        )
        for k in range(n)
    ]


def _checksum_args(data: np.ndarray, h5dtype: Any) -> dict[str, Any]:
    """Dataset options adding HDF5's Fletcher-32 checksum per chunk where HDF5 allows it.

    Filters need chunked storage, which scalar and empty datasets cannot have, and HDF5
    refuses them on variable-length strings; those (and attributes) rely on the commit
    file's SHA-256 alone.
    """
    if data.ndim == 0 or data.size == 0 or h5py.check_vlen_dtype(np.dtype(h5dtype)):
        return {}
    return {"chunks": True, "fletcher32": True}


def _write_columns(f: h5py.File, cols: Columns) -> None:
    g = f.create_group("entries")
    n = len(cols["seq"])
    for table, names in _TABLES:
        if table == "text":
            dtype: Any = h5py.string_dtype("utf-8")
            data = np.empty((n, len(names)), dtype=object)
        else:
            dtype = np.dtype(table)
            data = np.empty((n, len(names)), dtype=dtype)
        for k, name in enumerate(names):
            data[:, k] = cols[name]
        ds = g.create_dataset(table, shape=data.shape, dtype=dtype, **_checksum_args(data, dtype))
        if n:
            ds[...] = data
        ds.attrs["columns"] = json.dumps(list(names))


_TABLE_KINDS = {"float64": "f", "int64": "i", "text": "O"}


def _member(group: h5py.Group, name: str, kind: type, where: str) -> Any:
    """``group[name]``, which must be an HDF5 group or dataset (``kind``)."""
    obj = group.get(name)
    if not isinstance(obj, kind):
        what = "group" if kind is h5py.Group else "dataset"
        found = "nothing" if obj is None else type(obj).__name__
        raise _Malformed(f"{where}{name}: expected an HDF5 {what}, found {found}")
    return obj


def _read_columns(f: h5py.File) -> Columns:
    """The entry table, every structural property checked (a corrupt table is refused, never
    coerced: ``astype`` would turn wrong dtypes into numbers)."""
    cols: Columns = {}
    g = _member(f, "entries", h5py.Group, "/")
    rows = None
    for table in g:
        ds = _member(g, table, h5py.Dataset, "/entries/")
        where = f"/entries/{table}"
        if table not in _TABLE_KINDS:
            raise _Malformed(f"{where}: unknown table; known: {', '.join(_TABLE_KINDS)}")
        text = h5py.check_string_dtype(ds.dtype) is not None
        if (_TABLE_KINDS[table] == "O") != text or (
            not text and ds.dtype.kind != _TABLE_KINDS[table]
        ):
            raise _Malformed(f"{where}: dtype {ds.dtype} does not fit a {table} table")
        names = json.loads(_attr(ds, "columns", str, where))
        if ds.ndim != 2 or not isinstance(names, list) or len(names) != ds.shape[1]:
            raise _Malformed(f"{where}: shape {ds.shape} does not match its columns attribute")
        if rows is not None and ds.shape[0] != rows:
            raise _Malformed(f"{where}: {ds.shape[0]} rows, the other tables have {rows}")
        rows = ds.shape[0]
        data = ds.asstr()[()] if text else ds[()]
        data = np.asarray(data).reshape(ds.shape)
        for k, name in enumerate(names):
            if not isinstance(name, str) or name in cols:
                raise _Malformed(f"{where}: column names must be distinct strings, got {name!r}")
            cols[name] = data[:, k]
    return cols


def _migrate(cols: Columns, version: int, source: str) -> Columns:
    while version < SCHEMA_VERSION:
        step = MIGRATIONS.get(version)
        if step is None:
            raise LedgerError(
                f"{source}: schema_version {version} has no migration to {version + 1}; "
                f"known migrations start at {sorted(MIGRATIONS) or 'none'}"
            )
        cols = step(cols)
        version += 1
    return cols


# --------------------------------------------------------------------------------------------
# Sweep codec: xarray.Dataset <-> HDF5 group, with h5py only
# --------------------------------------------------------------------------------------------

_PLAIN_KINDS = frozenset("biufcS")
_PLAIN_ITEMSIZES = {"b": {1}, "i": {1, 2, 4, 8}, "u": {1, 2, 4, 8}, "f": {2, 4, 8}, "c": {8, 16}}
_ATTR_TYPES = "str, int, float, complex, bool, None, numpy scalar, numpy array, flat list/tuple"


@dataclass(frozen=True)
class _Blob:
    """An array ready to be written, with the HDF5 attributes needed to decode it."""

    data: np.ndarray
    h5dtype: Any
    meta: Mapping[str, Any]


def _encode_array(arr: np.ndarray, where: str, field_name: str) -> _Blob:
    kind = arr.dtype.kind
    meta: dict[str, Any] = {"dtype": arr.dtype.str}
    if kind in _PLAIN_KINDS:
        if kind != "S" and arr.dtype.itemsize not in _PLAIN_ITEMSIZES[kind]:
            raise LedgerValidationError(
                where, field_name, f"dtype {arr.dtype} is not storable (extended precision)"
            )
        meta["codec"] = "plain"
        return _Blob(arr, arr.dtype, meta)
    if kind in "UO":
        flat = arr.ravel()
        if kind == "O" and not all(isinstance(x, str) for x in flat):
            bad = next(type(x).__name__ for x in flat if not isinstance(x, str))
            raise LedgerValidationError(
                where,
                field_name,
                f"object arrays must hold str only (found {bad}; multi-indexes are not "
                "storable: reset_index first)",
            )
        for x in flat:
            _check_utf8(where, field_name, str(x), subject="strings ")
        data = np.empty(arr.shape, dtype=object)
        data[...] = arr
        meta["codec"] = "text"
        return _Blob(data, h5py.string_dtype("utf-8"), meta)
    if kind in "Mm":
        # h5py has no datetime type; the int64 view is exact, NaT included.
        meta["codec"] = "int64-view"
        return _Blob(arr.view(np.int64), np.dtype(np.int64), meta)
    raise LedgerValidationError(where, field_name, f"dtype {arr.dtype} is not storable")


def _decode_array(ds: h5py.Dataset) -> np.ndarray:
    codec = ds.attrs["codec"]
    dtype = np.dtype(ds.attrs["dtype"])
    if codec == "plain":
        return np.asarray(ds[()]).astype(dtype, copy=False)
    if codec == "text":
        raw = np.empty(ds.shape, dtype=object)
        if raw.size:
            raw[...] = ds.asstr()[()]
        return raw if dtype.kind == "O" else raw.astype(dtype)
    if codec == "int64-view":
        return np.asarray(ds[()], dtype=np.int64).view(dtype)
    raise LedgerError(f"{ds.file.filename}:{ds.name}: unknown array codec {codec!r}")


def _encode_attr(value: Any, where: str, name: str) -> _Blob:
    field_name = f"attrs[{name!r}]"
    if value is None:
        pytype, arr = "none", np.zeros((), dtype=np.int8)
    elif isinstance(value, bool):
        pytype, arr = "bool", np.array(value)
    elif isinstance(value, int):
        if not -(2**63) <= value < 2**63:
            raise LedgerValidationError(where, field_name, "integers must fit in 64 bits")
        pytype, arr = "int", np.array(value, dtype=np.int64)
    elif isinstance(value, float):
        pytype, arr = "float", np.array(value, dtype=np.float64)
    elif isinstance(value, complex):
        pytype, arr = "complex", np.array(value, dtype=np.complex128)
    elif isinstance(value, str) and not isinstance(value, np.str_):
        pytype, arr = "str", np.array(value, dtype=object)
    elif isinstance(value, np.generic):
        pytype, arr = "numpy-scalar", np.asarray(value)
    elif isinstance(value, np.ndarray):
        pytype, arr = "ndarray", value
    elif isinstance(value, (list, tuple)):
        if any(isinstance(x, (list, tuple, dict, set, np.ndarray)) for x in value):
            raise LedgerValidationError(
                where, field_name, "nested sequences are not storable; use a numpy array"
            )
        strs = [isinstance(x, str) for x in value]
        nums = [isinstance(x, numbers.Number) and not isinstance(x, str) for x in value]
        if not (all(strs) or all(nums)):
            raise LedgerValidationError(
                where, field_name, "lists must hold only str or only numbers"
            )
        arr = np.array(value, dtype=object) if value and all(strs) else np.asarray(value)
        if arr.dtype.kind == "O" and not all(strs):
            raise LedgerValidationError(where, field_name, "list numbers must fit in 64 bits")
        pytype = "list" if isinstance(value, list) else "tuple"
    else:
        raise LedgerValidationError(
            where,
            field_name,
            f"type {type(value).__name__} is not storable; accepted: {_ATTR_TYPES}",
        )
    blob = _encode_array(arr, where, field_name)
    # Attribute names may be any unicode; the datasets holding them are named by position
    # and the real name is kept JSON-encoded, so even "/" or "." survive.
    return _Blob(blob.data, blob.h5dtype, {**blob.meta, "pytype": pytype, "name": json.dumps(name)})


def _decode_attr(ds: h5py.Dataset) -> Any:
    arr = _decode_array(ds)
    pytype = ds.attrs["pytype"]
    if pytype == "none":
        return None
    if pytype == "ndarray":
        return arr
    if pytype == "list":
        return arr.tolist()
    if pytype == "tuple":
        return tuple(arr.tolist())
    scalar = arr[()]
    convert: dict[str, Callable[[Any], Any]] = {
        "bool": bool,
        "int": int,
        "float": float,
        "complex": complex,
        "str": str,
        "numpy-scalar": lambda x: x,
    }
    if pytype not in convert:
        raise LedgerError(f"{ds.file.filename}:{ds.name}: unknown attribute type {pytype!r}")
    return convert[pytype](scalar)


@dataclass(frozen=True)
class _VariablePlan:
    name: str
    role: Literal["coord", "data"]
    dims: tuple[str, ...]
    data: _Blob
    attrs: tuple[_Blob, ...]


@dataclass(frozen=True)
class _SweepPlan:
    """A Dataset fully encoded in memory, so that every error is raised before writing."""

    sweep_id: str
    variables: tuple[_VariablePlan, ...]
    attrs: tuple[_Blob, ...]


def _encode_attrs(attrs: Mapping[Any, Any], where: str) -> tuple[_Blob, ...]:
    out = []
    for key, value in attrs.items():
        if not isinstance(key, str):
            raise LedgerValidationError(where, "attrs", f"keys must be str, got {key!r}")
        out.append(_encode_attr(value, where, key))
    return tuple(out)


def _encode_sweep(sweep_id: str, ds: Any) -> _SweepPlan:
    where = f"sweep {sweep_id!r}"
    if not isinstance(sweep_id, str):
        raise LedgerValidationError("sweeps", "sweep_id", f"must be str, got {sweep_id!r}")
    _check_text(where, "sweep_id", sweep_id, required=True, exact=True)
    if not isinstance(ds, xr.Dataset):
        raise LedgerValidationError(
            where, "dataset", f"expected xarray.Dataset, got {type(ds).__name__}"
        )
    variables = []
    for name, var in ds.variables.items():
        if not isinstance(name, str):
            raise LedgerValidationError(where, "variables", f"names must be str, got {name!r}")
        for dim in var.dims:
            if not isinstance(dim, str):
                raise LedgerValidationError(where, "dims", f"names must be str, got {dim!r}")
        vwhere = f"{where} variable {name!r}"
        variables.append(
            _VariablePlan(
                name=name,
                role="coord" if name in ds.coords else "data",
                dims=tuple(str(d) for d in var.dims),
                data=_encode_array(np.asarray(var.values), vwhere, "data"),
                attrs=_encode_attrs(var.attrs, vwhere),
            )
        )
    return _SweepPlan(sweep_id, tuple(variables), _encode_attrs(ds.attrs, where))


def _write_blob(group: h5py.Group, name: str, blob: _Blob) -> None:
    ds = group.create_dataset(
        name, shape=blob.data.shape, dtype=blob.h5dtype, **_checksum_args(blob.data, blob.h5dtype)
    )
    if blob.data.size:
        ds[...] = blob.data
    for key, val in blob.meta.items():
        ds.attrs[key] = val


def _write_attr_blobs(group: h5py.Group, blobs: Iterable[_Blob]) -> None:
    g = group.create_group("attrs")
    for k, blob in enumerate(blobs):
        _write_blob(g, str(k), blob)


def _write_sweep(group: h5py.Group, plan: _SweepPlan, seq: int) -> None:
    group.attrs["sweep_id"] = plan.sweep_id
    group.attrs["seq"] = seq
    _write_attr_blobs(group, plan.attrs)
    vg = group.create_group("variables")
    for k, var in enumerate(plan.variables):
        g = vg.create_group(str(k))
        g.attrs["name"] = json.dumps(var.name)
        g.attrs["role"] = var.role
        g.attrs["dims"] = json.dumps(list(var.dims))
        _write_blob(g, "data", var.data)
        _write_attr_blobs(g, var.attrs)


def _positional(group: h5py.Group) -> list[Any]:
    return [group[k] for k in sorted(group, key=int)]


def _read_attr_group(group: h5py.Group) -> dict[str, Any]:
    return {json.loads(ds.attrs["name"]): _decode_attr(ds) for ds in _positional(group["attrs"])}


def _read_sweep_v1(group: h5py.Group) -> xr.Dataset:
    data_vars: dict[str, xr.Variable] = {}
    coords: dict[str, xr.Variable] = {}
    for g in _positional(group["variables"]):
        var = xr.Variable(
            tuple(json.loads(g.attrs["dims"])), _decode_array(g["data"]), attrs=_read_attr_group(g)
        )
        (coords if g.attrs["role"] == "coord" else data_vars)[json.loads(g.attrs["name"])] = var
    return xr.Dataset(data_vars, coords=coords, attrs=_read_attr_group(group))


SWEEP_READERS: dict[int, Callable[[h5py.Group], xr.Dataset]] = {1: _read_sweep_v1}
"""Decoder of a stored sweep group, by the schema version of the file that holds it."""


# --------------------------------------------------------------------------------------------
# Snapshots and receipts
# --------------------------------------------------------------------------------------------


def _entry_table(entries: list[LedgerEntry]) -> dict[str, np.ndarray]:
    """Per-entry arrays shared by the matrix and history views (first-order error
    propagation from the (Re, Im) covariance, the delta method; common practice)."""
    re_ = np.array([e.value.real for e in entries], dtype=float)
    im_ = np.array([e.value.imag for e in entries], dtype=float)
    cov = np.array([e.covariance for e in entries], dtype=float).reshape(-1, 2, 2)
    c00, c11 = cov[:, 0, 0], cov[:, 1, 1]
    c01 = 0.5 * (cov[:, 0, 1] + cov[:, 1, 0])
    mag = np.hypot(re_, im_)
    with np.errstate(divide="ignore", invalid="ignore"):
        var_mag = (re_**2 * c00 + 2 * re_ * im_ * c01 + im_**2 * c11) / mag**2
        var_phase = (im_**2 * c00 - 2 * re_ * im_ * c01 + re_**2 * c11) / mag**4
        table = {
            "x_real": re_,
            "x_imag": im_,
            "x_real_stderr": np.sqrt(c00),
            "x_imag_stderr": np.sqrt(c11),
            "x_real_imag_cov": c01,
            "magnitude_db": 20.0 * np.log10(mag),
            "magnitude_db_stderr": 20.0 / np.log(10.0) * np.sqrt(var_mag) / mag,
            "phase_rad": np.arctan2(im_, re_),
            "phase_rad_stderr": np.sqrt(var_phase),
        }
    table["frequency_ghz"] = np.array([e.frequency_ghz for e in entries], dtype=float)
    table["measured_at_s"] = np.array([e.measured_at_s for e in entries], dtype=float)
    table["shots"] = np.array([e.shots for e in entries], dtype=float)
    table["amplification"] = np.array([e.amplification for e in entries], dtype=float)
    table["quality"] = np.array([e.quality for e in entries], dtype=float)
    for name in (
        "measured_at_utc",
        "method",
        "kind",
        "verdict",
        "reason",
        "tag",
        "sweep_id",
        "rig",
        "software_version",
        "entry_id",
    ):
        table[name] = np.array([getattr(e, name) for e in entries], dtype=str)
    return table


_VIEW_ATTRS: dict[str, dict[str, str]] = {
    "x_real": {"units": "1", "long_name": "Re X (crosstalk C_va/C_vv)"},
    "x_imag": {"units": "1", "long_name": "Im X (crosstalk C_va/C_vv)"},
    "x_real_stderr": {"units": "1", "long_name": "standard error of Re X"},
    "x_imag_stderr": {"units": "1", "long_name": "standard error of Im X"},
    "x_real_imag_cov": {"units": "1", "long_name": "covariance of Re X and Im X"},
    "magnitude_db": {"units": "dB", "long_name": "crosstalk magnitude 20 log10|X|"},
    "magnitude_db_stderr": {"units": "dB", "long_name": "standard error of magnitude"},
    "phase_rad": {"units": "rad", "long_name": "crosstalk phase arg X"},
    "phase_rad_stderr": {"units": "rad", "long_name": "standard error of phase"},
    "frequency_ghz": {"units": "GHz", "long_name": "aggressor tone frequency"},
    "measured_at_s": {"units": "s", "long_name": "rig time of measurement"},
    "shots": {"units": "1", "long_name": "shots spent"},
    "amplification": {"units": "1", "long_name": "aggressor pulse repetitions K"},
    "quality": {"units": "1", "long_name": "fit quality figure"},
    "measured_at_utc": {"long_name": "wall-clock time of measurement (ISO-8601 UTC)"},
    "method": {"long_name": "measurement method"},
    "kind": {"long_name": "measurement kind"},
    "verdict": {"long_name": "fit verdict"},
    "reason": {"long_name": "reason for the verdict"},
    "tag": {"long_name": "run tag"},
    "sweep_id": {"long_name": "id of the stored raw sweep"},
    "rig": {"long_name": "rig description"},
    "software_version": {"long_name": "software version"},
    "entry_id": {"long_name": "ledger entry id (seq.position)"},
}
_MATRIX_VARS = (
    "x_real",
    "x_imag",
    "x_real_stderr",
    "x_imag_stderr",
    "x_real_imag_cov",
    "magnitude_db",
    "magnitude_db_stderr",
    "phase_rad",
    "phase_rad_stderr",
    "frequency_ghz",
    "measured_at_s",
    "measured_at_utc",
    "method",
    "kind",
    "shots",
    "amplification",
    "quality",
    "tag",
    "sweep_id",
    "entry_id",
)


@dataclass(frozen=True)
class MatrixSnapshot:
    """The crosstalk matrix at one moment: the latest accepted entry per pair.

    Parameters
    ----------
    chip : str
        Chip the ledger belongs to.
    entries : Mapping[tuple[str, str], LedgerEntry]
        ``(aggressor, victim) -> entry``; only accepted entries.
    as_of_s : float
        Rig time of the snapshot, s (``inf`` for the current matrix).
    last_seq : int
        Highest commit sequence number the ledger held when the snapshot was taken.
    """

    chip: str
    entries: Mapping[tuple[str, str], LedgerEntry]
    as_of_s: float
    last_seq: int

    def __len__(self) -> int:
        return len(self.entries)

    def __contains__(self, pair: object) -> bool:
        return pair in self.entries

    def __getitem__(self, pair: tuple[str, str]) -> LedgerEntry:
        return self.entries[pair]

    def __iter__(self) -> Iterator[tuple[str, str]]:
        return iter(self.entries)

    def value(self, aggressor: str, victim: str) -> complex:
        """Return X for one pair (dimensionless complex); raises KeyError if it has none."""
        return self.entries[(aggressor, victim)].value

    def to_dataset(
        self, *, aggressors: Iterable[str] | None = None, victims: Iterable[str] | None = None
    ) -> xr.Dataset:
        """Return the matrix as an ``xarray.Dataset`` with dims ``aggressor`` x ``victim``.

        Parameters
        ----------
        aggressors, victims : iterable of str, optional
            Names (and order) of the rows and columns; default: every name in the snapshot,
            sorted. Pairs without an accepted entry hold NaN (numbers) or ``""`` (text).

        Returns
        -------
        xarray.Dataset
            Variables ``x_real``, ``x_imag`` (linear), ``magnitude_db`` (dB), ``phase_rad``
            (rad), their standard errors, ``frequency_ghz`` (GHz), ``measured_at_s`` (s),
            ``measured_at_utc``, ``method``, ``kind``, ``shots``, ``amplification``,
            ``quality``, ``tag``, ``sweep_id``, ``entry_id`` and the boolean ``present``;
            each with ``units``/``long_name`` attrs.
        """
        pairs = list(self.entries)
        rows = list(aggressors) if aggressors is not None else sorted({a for a, _ in pairs})
        cols = list(victims) if victims is not None else sorted({v for _, v in pairs})
        r_index = {a: k for k, a in enumerate(rows)}
        c_index = {v: k for k, v in enumerate(cols)}
        chosen = [(p, e) for p, e in self.entries.items() if p[0] in r_index and p[1] in c_index]
        table = _entry_table([e for _, e in chosen])
        ri = np.array([r_index[p[0]] for p, _ in chosen], dtype=int)
        ci = np.array([c_index[p[1]] for p, _ in chosen], dtype=int)
        shape = (len(rows), len(cols))
        data_vars: dict[str, Any] = {}
        for name in _MATRIX_VARS:
            col = table[name]
            grid = np.full(
                shape,
                "" if col.dtype.kind == "U" else np.nan,
                dtype=col.dtype if col.dtype.kind != "U" else object,
            )
            grid[ri, ci] = col
            if col.dtype.kind == "U":
                grid = grid.astype(str)
            data_vars[name] = (("aggressor", "victim"), grid, _VIEW_ATTRS[name])
        present = np.zeros(shape, dtype=bool)
        present[ri, ci] = True
        data_vars["present"] = (
            ("aggressor", "victim"),
            present,
            {"long_name": "pair has an accepted entry"},
        )
        return xr.Dataset(
            data_vars,
            coords={
                "aggressor": (
                    "aggressor",
                    np.array(rows, dtype=str),
                    {"long_name": "aggressor drive line"},
                ),
                "victim": ("victim", np.array(cols, dtype=str), {"long_name": "victim qubit"}),
            },
            attrs={
                "chip": self.chip,
                "as_of_s": self.as_of_s,
                "last_seq": self.last_seq,
                "definition": "X = C_victim,aggressor / C_victim,victim at the aggressor tone",
                "db_convention": "20*log10 of the amplitude ratio",
            },
        )


@dataclass(frozen=True)
class CommitReceipt:
    """What `Ledger.append` wrote.

    Parameters
    ----------
    seq : int
        Commit sequence number.
    file : pathlib.Path
        The immutable file holding the commit.
    entries : tuple of LedgerEntry
        The stored entries (with ``seq`` and ``position`` filled in).
    sweep_ids : tuple of str
        Ids of the sweeps stored with the commit.
    """

    seq: int
    file: Path
    entries: tuple[LedgerEntry, ...]
    sweep_ids: tuple[str, ...]


CommitStatus = Literal["ok", "unverified", "bad", "missing", "quarantined"]


@dataclass(frozen=True)
class CommitCheck:
    """The state of one commit file (or of a range of commits no file holds).

    Parameters
    ----------
    file : str
        Name of the commit file inside the ledger directory (for ``"missing"``: the name a
        file holding the range would have).
    first, last : int
        Range of commit sequence numbers.
    status : {"ok", "unverified", "bad", "missing", "quarantined"}
        ``ok``: digest matches and the content decodes. ``unverified``: decodes, but was
        written before digests existed. ``bad``: damaged (see ``problem``). ``missing``: no
        file holds these commits. ``quarantined``: set aside in ``quarantine/``.
    problem : str
        What is wrong (``""`` unless bad or missing).
    """

    file: str
    first: int
    last: int
    status: CommitStatus
    problem: str = ""

    @property
    def failed(self) -> bool:
        """True for a damaged or missing commit (readers refuse the ledger)."""
        return self.status in ("bad", "missing")

    def line(self, root: Path) -> str:
        """One line for people, naming the file."""
        seqs = f"commit {self.first}" if self.first == self.last else (
            f"commits {self.first}..{self.last}")
        text = {"ok": "OK (SHA-256 verified)",
                "unverified": "OK, unverified (written before commit digests existed)",
                "quarantined": "set aside in quarantine (not part of the history)"}
        return f"{root / self.file}: {seqs}: {text.get(self.status) or self.problem}"


@dataclass(frozen=True)
class LedgerReport:
    """What `Ledger.verify` found: one `CommitCheck` per commit file, in sequence order.

    Parameters
    ----------
    path : pathlib.Path
        The ledger directory.
    chip : str
        Chip the ledger belongs to.
    commits : tuple of CommitCheck
        Every commit file read, every quarantined file and every missing range.
    """

    path: Path
    chip: str
    commits: tuple[CommitCheck, ...]

    @property
    def failed(self) -> tuple[CommitCheck, ...]:
        """The damaged and missing commits."""
        return tuple(c for c in self.commits if c.failed)

    @property
    def ok(self) -> bool:
        """True when every commit can be read (unverified legacy files included)."""
        return not self.failed

    def lines(self) -> list[str]:
        """One line per commit file, then a summary line."""
        out = [c.line(self.path) for c in self.commits]
        n_ok = sum(c.status in ("ok", "unverified") for c in self.commits)
        out.append(f"{self.path}: ledger of chip {self.chip!r}: {n_ok} commit files readable, "
                   f"{len(self.failed)} damaged or missing")
        return out

    def error(self) -> LedgerError:
        """The one-line error every reader raises for this state (call only if not ok)."""
        bad = self.failed
        listed = "; ".join(f"{c.file}: {c.problem}" for c in bad)
        files = "s" if len(bad) > 1 else ""
        return LedgerError(
            f"{self.path}: {len(bad)} damaged or missing commit{files}, nothing was read: "
            f"{listed}. The other {len(self.commits) - len(bad)} commit files are intact; "
            f"to read them, move each damaged file with its {_DIGEST_SUFFIX} file into "
            f"{self.path / _QUARANTINE}/ (xtalkcal.ledger.quarantine_commit), which removes "
            f"its entries from the history; `xtalkcal check {self.path}` lists every commit"
        )


# --------------------------------------------------------------------------------------------
# The ledger
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _CommitFile:
    name: str
    first: int
    last: int
    schema_version: int
    entries: tuple[LedgerEntry, ...]
    sweeps: tuple[tuple[str, str], ...]  # (sweep_id, group path), commit order
    verified: bool  # its digest matched (False: a legacy file without one)
    stamp: tuple[int, int, int]  # (size, mtime_ns, inode) when it was checked


def _stamp(path: Path) -> tuple[int, int, int]:
    st = os.stat(path)
    return (st.st_size, st.st_mtime_ns, st.st_ino)


@dataclass(frozen=True)
class _View:
    entries: tuple[LedgerEntry, ...] = ()
    by_pair: Mapping[tuple[str, str], tuple[LedgerEntry, ...]] = field(default_factory=dict)
    sweeps: Mapping[str, tuple[str, str, int]] = field(default_factory=dict)
    last_seq: int = 0


class _Vanished(Exception):
    """A listed file disappeared before it could be opened (a compaction removed it)."""


class _BadCommit(Exception):
    """One commit file is damaged; ``problem`` says how (without the file name)."""

    def __init__(self, problem: str) -> None:
        self.problem = problem
        super().__init__(problem)


def _time_key(e: LedgerEntry) -> tuple[float, int, int]:
    return (e.measured_at_s, e.seq, e.position)


def _final_name(first: int, last: int) -> str:
    return f"{first:010d}-{last:010d}.h5"


def _fsync_dir(path: Path) -> None:
    if os.name == "nt":  # Windows cannot open directories; NTFS renames are journaled
        return
    fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDWR)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _atomic_write_bytes(directory: Path, name: str, payload: bytes) -> None:
    tmp = directory / f"{_TMP_PREFIX}{os.getpid()}-{uuid.uuid4().hex}.json"
    try:
        with open(tmp, "wb") as fh:
            fh.write(payload)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, directory / name)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _fsync_dir(directory)


@dataclass(frozen=True)
class _Marker:
    """The ledger marker: chip, and which commit files may lack a digest."""

    chip: str
    info: Mapping[str, Any]
    legacy_files: frozenset[str] | None  # None: a ledger from before digests existed


def _read_marker(path: Path) -> _Marker:
    marker = path / _MARKER_NAME
    if not marker.is_file():
        raise LedgerError(
            f"{path}: not a ledger (no {_MARKER_NAME}); create one with "
            "Ledger.create(path, chip=...)"
        )
    try:
        info = json.loads(marker.read_text(encoding="utf-8"))
    except (OSError, ValueError, RecursionError) as exc:
        raise LedgerError(f"{marker}: unreadable ledger marker ({exc})") from exc
    if not isinstance(info, dict) or info.get("format") != _FORMAT:
        raise LedgerError(f"{marker}: not an xtalkcal ledger marker (format field)")
    version = info.get("schema_version")
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        raise LedgerError(f"{marker}: schema_version must be a positive integer, got {version!r}")
    if version > SCHEMA_VERSION:
        raise LedgerError(
            f"{marker}: ledger has schema_version {version}, this xtalkcal reads up to "
            f"{SCHEMA_VERSION}; upgrade xtalkcal to open it"
        )
    chip = info.get("chip")
    if not isinstance(chip, str) or not chip:
        raise LedgerError(f"{marker}: chip must be a non-empty string")
    legacy = None
    if "integrity" in info:
        integ = info["integrity"]
        names = integ.get("legacy_files") if isinstance(integ, dict) else None
        if (
            not isinstance(integ, dict)
            or integ.get("digest") != "sha256"
            or not isinstance(names, list)
            or not all(isinstance(n, str) and _FINAL_RE.match(n) for n in names)
        ):
            raise LedgerError(
                f"{marker}: integrity: expected {{\"digest\": \"sha256\", \"legacy_files\": "
                f"[commit file names]}}, got {integ!r}"
            )
        legacy = frozenset(names)
    return _Marker(chip, MappingProxyType(info), legacy)


def _write_marker(root: Path, info: Mapping[str, Any]) -> None:
    payload = json.dumps(dict(info), ensure_ascii=False, indent=1).encode()
    _atomic_write_bytes(root, _MARKER_NAME, payload)


def _digest_name(first: int, last: int) -> str:
    return f"{first:010d}-{last:010d}{_DIGEST_SUFFIX}"


def _hash_file(path: Path) -> tuple[int, str]:
    """(size in bytes, SHA-256 hex digest) of a file, read in blocks."""
    h = hashlib.sha256()
    size = 0
    with open(path, "rb") as fh:
        while block := fh.read(_HASH_BLOCK):
            h.update(block)
            size += len(block)
    return size, h.hexdigest()


def _read_digest(path: Path) -> dict[str, Any]:
    """A digest file's fields; raises `_BadCommit` if it is not one, OSError if unreadable."""
    raw = path.read_bytes()
    try:
        info = json.loads(raw.decode("utf-8"))
    except (ValueError, RecursionError) as exc:
        raise _BadCommit(f"its digest file {path.name} is not valid JSON ({exc})") from None
    ok = (
        isinstance(info, dict)
        and info.get("format") == _DIGEST_FORMAT
        and isinstance(info.get("file"), str)
        and isinstance(info.get("tmp"), str)
        and isinstance(info.get("size"), int)
        and isinstance(info.get("sha256"), str)
        and re.fullmatch(r"[0-9a-f]{64}", info["sha256"]) is not None
    )
    if not ok:
        raise _BadCommit(
            f"its digest file {path.name} lacks the fields of {_DIGEST_FORMAT!r} "
            "(format, file, tmp, size, sha256)"
        )
    return info


def _check_digest(commit: Path, info: Mapping[str, Any]) -> None:
    """Raise `_BadCommit` unless ``commit`` has the size and SHA-256 its digest file says."""
    if info["file"] != commit.name:
        raise _BadCommit(f"its digest file names another file, {info['file']!r}")
    size, sha = _hash_file(commit)
    if size != info["size"]:
        raise _BadCommit(
            f"{size} bytes, but {info['size']} were written (truncated or extended)"
        )
    if sha != info["sha256"]:
        raise _BadCommit(
            "SHA-256 mismatch: the file changed after it was written (bit rot, a bad disk "
            "or an edit)"
        )


@contextlib.contextmanager
def _writer_lock(root: Path, timeout_s: float) -> Iterator[None]:
    """Hold the ledger's exclusive writer lock (LedgerError if it stays busy)."""
    lock = filelock.FileLock(str(root / _LOCK_NAME), timeout=timeout_s)
    try:
        lock.acquire()
    except filelock.Timeout as exc:
        raise LedgerError(
            f"{root}: another writer holds the lock for more than {timeout_s} s") from exc
    try:
        yield
    finally:
        lock.release()


class Ledger:
    """The crosstalk ledger of one chip, stored in a directory (see module docs).

    Open an existing ledger with ``Ledger(path)``; make one with `Ledger.create`. Any number
    of processes may read while one at a time writes; every query sees whole commits only.
    A `Ledger` object is not thread-safe: use one per thread.

    Parameters
    ----------
    path : str or os.PathLike
        The ledger directory.
    lock_timeout_s : float, optional
        How long a writer waits for the lock before raising `LedgerError`, s.

    Raises
    ------
    LedgerError
        If the directory is not a ledger, holds a file with a newer schema version, or any
        commit file is damaged or missing (the message names each one; see `verify`).
    """

    def __init__(self, path: str | os.PathLike[str], *, lock_timeout_s: float = 60.0) -> None:
        self._setup(path, lock_timeout_s)
        self._refresh()

    def _setup(self, path: str | os.PathLike[str], lock_timeout_s: float) -> None:
        self._path = Path(path)
        self._marker = _read_marker(self._path)
        self._chip = self._marker.chip
        self._lock_timeout_s = float(lock_timeout_s)
        self._lock = filelock.FileLock(str(self._path / _LOCK_NAME), timeout=lock_timeout_s)
        self._files: dict[str, _CommitFile] = {}
        self._view = _View()

    @classmethod
    def create(
        cls,
        path: str | os.PathLike[str],
        *,
        chip: str,
        exist_ok: bool = False,
        lock_timeout_s: float = 60.0,
    ) -> Ledger:
        """Create a ledger directory for ``chip`` (or open it, with ``exist_ok``).

        Parameters
        ----------
        path : str or os.PathLike
            Directory to create; it may exist if it is empty.
        chip : str
            Name of the chip; stored in the marker and in every commit file.
        exist_ok : bool, optional
            Open an existing ledger of the same chip instead of raising.
        lock_timeout_s : float, optional
            Writer lock timeout, s.

        Returns
        -------
        Ledger

        Raises
        ------
        LedgerError
            If a ledger exists (without ``exist_ok``), belongs to another chip, or the
            directory holds unrelated files.
        """
        if not isinstance(chip, str):
            raise LedgerValidationError("Ledger.create", "chip", f"must be str, got {chip!r}")
        _check_text("Ledger.create", "chip", chip, required=True, exact=True)
        root = Path(path)
        root.mkdir(parents=True, exist_ok=True)
        with _writer_lock(root, lock_timeout_s):
            if (root / _MARKER_NAME).exists():
                existing = _read_marker(root).chip
                if not exist_ok:
                    raise LedgerError(f"{root}: a ledger already exists (chip {existing!r})")
                if existing != chip:
                    raise LedgerError(f"{root}: ledger belongs to chip {existing!r}, not {chip!r}")
            else:
                foreign = sorted(
                    n for n in os.listdir(root) if n != _LOCK_NAME and not n.startswith(_TMP_PREFIX)
                )
                if foreign:
                    raise LedgerError(
                        f"{root}: directory is not empty and not a ledger ({foreign[:3]}...)"
                    )
                info = {
                    "format": _FORMAT,
                    "schema_version": SCHEMA_VERSION,
                    "chip": chip,
                    "created_utc": utc_timestamp(),
                    "integrity": {"digest": "sha256", "legacy_files": []},
                }
                _write_marker(root, info)
        return cls(root, lock_timeout_s=lock_timeout_s)

    # -- properties -------------------------------------------------------------------------

    @property
    def path(self) -> Path:
        """The ledger directory."""
        return self._path

    @property
    def chip(self) -> str:
        """Name of the chip this ledger belongs to."""
        return self._chip

    @property
    def last_seq(self) -> int:
        """Highest commit sequence number stored (0 for an empty ledger)."""
        self._refresh()
        return self._view.last_seq

    def __repr__(self) -> str:
        return f"Ledger({str(self._path)!r}, chip={self._chip!r})"

    # -- reading ----------------------------------------------------------------------------

    def _list_final(self) -> list[tuple[int, int, str]]:
        found = []
        with os.scandir(self._path) as it:
            for item in it:
                m = _FINAL_RE.match(item.name)
                if m:
                    found.append((int(m.group(1)), int(m.group(2)), item.name))
        return found

    def _covering(self, listing: list[tuple[int, int, str]]) -> tuple[list, list]:
        """Split a listing into the files to read and the redundant ones they contain."""
        keep, redundant = [], []
        reach = 0
        for first, last, name in sorted(listing, key=lambda t: (t[0], -t[1])):
            if first > last:
                raise LedgerError(f"{self._path / name}: malformed sequence range")
            if first > reach:
                keep.append((first, last, name))
                reach = last
            elif last <= reach:
                redundant.append((first, last, name))
            else:
                raise LedgerError(
                    f"{self._path}: commit files overlap without nesting ({name}); "
                    "the ledger was modified by something other than xtalkcal"
                )
        return keep, redundant

    def _list_digests(self) -> dict[tuple[int, int], str]:
        found = {}
        with os.scandir(self._path) as it:
            for item in it:
                m = _DIGEST_RE.match(item.name)
                if m:
                    found[(int(m.group(1)), int(m.group(2)))] = item.name
        return found

    def _list_quarantine(self) -> list[tuple[int, int, str]]:
        qdir = self._path / _QUARANTINE
        if not qdir.is_dir():
            return []
        return sorted(
            (int(m.group(1)), int(m.group(2)), m.group(0))
            for m in map(_FINAL_RE.match, os.listdir(qdir))
            if m
        )

    def _load(self, first: int, last: int, name: str) -> _CommitFile:
        """Check one commit file's digest and decode it.

        Raises `_Vanished` if it was removed meanwhile (compaction) and `_BadCommit` for
        anything else that is wrong with it, so that each file is judged on its own.
        """
        path = self._path / name
        digest_path = self._path / _digest_name(first, last)
        try:
            stamp = _stamp(path)
            try:
                digest = _read_digest(digest_path)
            except FileNotFoundError:
                digest = None
            if digest is None:
                if not path.exists():
                    raise _Vanished(name)  # compaction deletes the commit file first
                legacy = self._marker.legacy_files
                if legacy is not None and name not in legacy:
                    raise _BadCommit(
                        f"its digest file {digest_path.name} is missing (every commit "
                        "written since digests exist has one)"
                    )
            else:
                _check_digest(path, digest)
            with h5py.File(path, "r", locking=False) as fh:
                version, entries, sweeps = self._decode(fh, first, last)
        except FileNotFoundError as exc:
            raise _Vanished(name) from exc
        except (_BadCommit, _Vanished):
            raise
        except LedgerError as exc:
            raise _BadCommit(str(exc).replace(f"{path}: ", "")) from exc
        except _Malformed as exc:
            raise _BadCommit(f"not a well-formed commit: {exc}") from exc
        except (OSError, KeyError, ValueError, TypeError, IndexError, AttributeError,
                RecursionError) as exc:
            # h5py reports damaged files, missing members and wrong types this way.
            raise _BadCommit(
                f"cannot be decoded as a ledger commit ({type(exc).__name__}: {exc})"
            ) from exc
        return _CommitFile(
            name, first, last, version, tuple(entries), tuple(sweeps), digest is not None, stamp
        )

    def _decode(
        self, fh: h5py.File, first: int, last: int
    ) -> tuple[int, list[LedgerEntry], list[tuple[str, str]]]:
        """(schema version, entries, sweeps) of an open commit file; `_Malformed` if its
        structure is not the one written here."""
        if fh.attrs.get("format") != _FORMAT:
            raise _Malformed("not an xtalkcal ledger commit file (format attribute)")
        version = _attr(fh, "schema_version", int, "/")
        if version > SCHEMA_VERSION:
            raise _Malformed(
                f"schema_version {version} is newer than this xtalkcal reads "
                f"({SCHEMA_VERSION}); upgrade xtalkcal"
            )
        if version < 1:
            raise _Malformed(f"schema_version must be >= 1, got {version}")
        chip = _attr(fh, "chip", str, "/")
        if chip != self._chip:
            raise _Malformed(
                f"belongs to chip {chip!r}, but the ledger marker {_MARKER_NAME} says "
                f"{self._chip!r}"
            )
        if (_attr(fh, "seq_first", int, "/"), _attr(fh, "seq_last", int, "/")) != (first, last):
            raise _Malformed("the sequence range in the file disagrees with its name")
        entries = _columns_to_entries(_migrate(_read_columns(fh), version, "entries"))
        for e in entries:
            if not first <= e.seq <= last:
                raise _Malformed(f"entry seq {e.seq} outside {first}..{last}")
        if len({(e.seq, e.position) for e in entries}) != len(entries):
            raise _Malformed("two entries share a (seq, position)")
        entries.sort(key=lambda e: (e.seq, e.position))
        sweeps = []
        for g in _positional(_member(fh, "sweeps", h5py.Group, "/")):
            if not isinstance(g, h5py.Group):
                raise _Malformed(f"{g.name}: a sweep must be an HDF5 group")
            sid = _attr(g, "sweep_id", str, g.name)
            if not first <= _attr(g, "seq", int, g.name) <= last:
                raise _Malformed(f"{g.name}: sweep seq outside {first}..{last}")
            for member in ("variables", "attrs"):
                _member(g, member, h5py.Group, g.name + "/")
            sweeps.append((sid, g.name))
        if len({sid for sid, _ in sweeps}) != len(sweeps):
            raise _Malformed("a sweep id is stored twice")
        return version, entries, sweeps

    def _orphan_digest(self, first: int, last: int, name: str) -> str | None:
        """Judge a digest file above every commit: a write in progress or killed before its
        rename (None), or the record of a commit file that has gone (the problem)."""
        digest_path = self._path / name
        try:
            info = _read_digest(digest_path)
        except FileNotFoundError:
            return None  # a writer cleaned it up
        except _BadCommit as exc:
            return exc.problem
        if (self._path / info["tmp"]).exists():
            return None  # still being written, or left by a killed writer
        if (self._path / info["file"]).exists():
            raise _Vanished(name)  # renamed in since the listing: list again
        try:
            again = _read_digest(digest_path)
        except FileNotFoundError:
            return None
        if again != info:
            raise _Vanished(name)  # a new writer took the number: list again
        return (
            f"its digest file {name} is there, but the commit file {info['file']} is not "
            "(deleted or moved)"
        )

    def _scan(
        self, *, rehash: bool, listing: list[tuple[int, int, str]] | None = None
    ) -> tuple[dict[str, _CommitFile], list[CommitCheck]]:
        """Load every commit file still needed (all with ``rehash``) and judge each one."""
        for _ in range(_MAX_LIST_ATTEMPTS):
            self._marker = _read_marker(self._path)  # legacy ledgers switch on first write
            keep, _redundant = self._covering(listing or self._list_final())
            listing = None
            files: dict[str, _CommitFile] = {}
            checks: list[CommitCheck] = []
            try:
                for first, last, name in keep:
                    cf = None if rehash else self._files.get(name)
                    try:
                        cf = cf or self._load(first, last, name)
                    except _BadCommit as bad:
                        checks.append(CommitCheck(name, first, last, "bad", bad.problem))
                        continue
                    files[name] = cf
                    status: CommitStatus = "ok" if cf.verified else "unverified"
                    checks.append(CommitCheck(name, first, last, status))
                top = max((la for _, la, _ in keep), default=0)
                for (first, last), name in sorted(self._list_digests().items()):
                    if first > top:
                        problem = self._orphan_digest(first, last, name)
                        if problem:
                            checks.append(CommitCheck(
                                _final_name(first, last), first, last, "missing", problem))
            except _Vanished:
                continue  # a compaction replaced files between listing and opening
            checks += self._gaps(keep)
            checks.sort(key=lambda c: (c.first, c.last))
            return files, checks
        raise LedgerError(f"{self._path}: directory kept changing while being read")

    def _gaps(self, keep: list[tuple[int, int, str]]) -> list[CommitCheck]:
        """Quarantined files, and ranges of sequence numbers no file holds."""
        out = []
        quarantined = self._list_quarantine()
        for first, last, name in quarantined:
            out.append(CommitCheck(f"{_QUARANTINE}/{name}", first, last, "quarantined"))
        held = sorted([(f, la) for f, la, _ in keep] + [(f, la) for f, la, _ in quarantined])
        digests = self._list_digests()
        expected = 1
        for first, last in held:
            if first > expected:
                a, b = expected, first - 1
                name = _final_name(a, b)
                seqs = f"commit {a}" if a == b else f"commits {a}..{b}"
                problem = f"{seqs} missing: no file holds them (deleted or moved)"
                if (a, b) in digests:
                    problem += f"; its digest file {digests[(a, b)]} is still there"
                out.append(CommitCheck(name, a, b, "missing", problem))
            expected = max(expected, last + 1)
        return out

    def _refresh(self) -> None:
        """Bring the in-memory view up to the finalised files on disk, or raise."""
        listing = self._list_final()
        keep, _redundant = self._covering(listing)
        if [n for _, _, n in keep] == list(self._files):
            return
        files, checks = self._scan(rehash=False, listing=listing)
        if any(c.failed for c in checks):
            raise LedgerReport(self._path, self._chip, tuple(checks)).error()
        self._files = files
        self._view = self._build_view(files)

    def verify(self) -> LedgerReport:
        """Check every commit file again (digest and decoding) and say which are good.

        Unlike the readers, this does not raise for damaged commits: it reports each one.

        Returns
        -------
        LedgerReport
            One `CommitCheck` per commit file, quarantined file and missing range.
        """
        _files, checks = self._scan(rehash=True)
        return LedgerReport(self._path, self._chip, tuple(checks))

    def _build_view(self, files: Mapping[str, _CommitFile]) -> _View:
        entries: list[LedgerEntry] = []
        sweeps: dict[str, tuple[str, str, int]] = {}
        for cf in files.values():
            entries.extend(cf.entries)
            for sid, gpath in cf.sweeps:
                if sid in sweeps:
                    raise LedgerError(f"{self._path}: sweep id {sid!r} stored twice")
                sweeps[sid] = (cf.name, gpath, cf.schema_version)
        by_pair: dict[tuple[str, str], list[LedgerEntry]] = {}
        for e in entries:
            by_pair.setdefault((e.aggressor, e.victim), []).append(e)
        return _View(
            entries=tuple(entries),
            by_pair=MappingProxyType(
                {p: tuple(sorted(v, key=_time_key)) for p, v in by_pair.items()}
            ),
            sweeps=MappingProxyType(sweeps),
            last_seq=max((cf.last for cf in files.values()), default=0),
        )

    def entries(self) -> tuple[LedgerEntry, ...]:
        """Every stored entry (accepted and rejected), in commit order.

        Returns
        -------
        tuple of LedgerEntry
            Sorted by ``(seq, position)``.
        """
        self._refresh()
        return self._view.entries

    def pairs(self) -> list[tuple[str, str]]:
        """Every (aggressor, victim) pair with at least one entry, sorted."""
        self._refresh()
        return sorted(self._view.by_pair)

    def current(self) -> MatrixSnapshot:
        """The current matrix: the latest accepted entry of every pair.

        Returns
        -------
        MatrixSnapshot
            ``.entries`` maps ``(aggressor, victim)`` to entries; ``.to_dataset()`` gives the
            xarray view.
        """
        return self.as_of(math.inf)

    def as_of(self, t_s: float) -> MatrixSnapshot:
        """The matrix as it stood at rig time ``t_s``.

        Parameters
        ----------
        t_s : float
            Rig time, s. Entries with ``measured_at_s <= t_s`` count.

        Returns
        -------
        MatrixSnapshot
            Latest accepted entry per pair among those measured by ``t_s`` (pairs without
            one are absent).
        """
        if isinstance(t_s, bool) or not isinstance(t_s, numbers.Real) or math.isnan(t_s):
            raise LedgerValidationError(
                "Ledger.as_of", "t_s", f"must be a real rig time in s (not NaN), got {t_s!r}"
            )
        t = float(t_s)
        self._refresh()
        view = self._view
        chosen: dict[tuple[str, str], LedgerEntry] = {}
        for pair, history in sorted(view.by_pair.items()):
            for e in reversed(history):
                if e.accepted and e.measured_at_s <= t:
                    chosen[pair] = e
                    break
        return MatrixSnapshot(self._chip, MappingProxyType(chosen), t, view.last_seq)

    def history(self, aggressor: str, victim: str) -> tuple[LedgerEntry, ...]:
        """Every entry of one pair (accepted and rejected) in time order.

        Parameters
        ----------
        aggressor : str
            Drive line name.
        victim : str
            Qubit name.

        Returns
        -------
        tuple of LedgerEntry
            Sorted by ``(measured_at_s, seq, position)``; empty if the pair has none.
        """
        self._refresh()
        return self._view.by_pair.get((aggressor, victim), ())

    def history_dataset(self, aggressor: str, victim: str) -> xr.Dataset:
        """The history of one pair as an ``xarray.Dataset`` along dim ``entry``.

        Parameters
        ----------
        aggressor : str
            Drive line name.
        victim : str
            Qubit name.

        Returns
        -------
        xarray.Dataset
            Same variables as `MatrixSnapshot.to_dataset` plus ``verdict``, ``reason``,
            ``rig``, ``software_version``; coords ``entry_id`` and ``measured_at_s`` (s).
            Rejected entries are included (check ``verdict``).
        """
        hist = list(self.history(aggressor, victim))
        table = _entry_table(hist)
        coords = {
            "entry_id": ("entry", table.pop("entry_id"), _VIEW_ATTRS["entry_id"]),
            "measured_at_s": ("entry", table.pop("measured_at_s"), _VIEW_ATTRS["measured_at_s"]),
        }
        data_vars = {k: ("entry", v, _VIEW_ATTRS[k]) for k, v in table.items()}
        return xr.Dataset(
            data_vars,
            coords=coords,
            attrs={"chip": self._chip, "aggressor": aggressor, "victim": victim},
        )

    def sweep_ids(self) -> tuple[str, ...]:
        """Ids of all stored sweeps, in commit order."""
        self._refresh()
        return tuple(self._view.sweeps)

    def sweep(self, sweep_id: str) -> xr.Dataset:
        """Read back a stored raw sweep.

        Parameters
        ----------
        sweep_id : str
            Id given when the sweep was appended.

        Returns
        -------
        xarray.Dataset
            Identical (dims, coords, attrs, dtypes) to the Dataset that was stored.

        Raises
        ------
        KeyError
            If no sweep has that id.
        """
        for _ in range(_MAX_LIST_ATTEMPTS):
            self._refresh()
            if sweep_id not in self._view.sweeps:
                raise KeyError(f"{self._path}: no sweep {sweep_id!r}")
            name, gpath, version = self._view.sweeps[sweep_id]
            path = self._path / name
            try:
                self._recheck(self._files[name])
                fh = h5py.File(path, "r", locking=False)
            except LedgerError:
                raise
            except OSError as exc:
                if not path.exists():
                    continue  # compacted away after the listing; list again
                raise LedgerError(f"{path}: cannot be read ({exc})") from exc
            try:
                with fh:
                    return SWEEP_READERS[version](fh[gpath])
            except (OSError, KeyError, ValueError, TypeError, IndexError, AttributeError,
                    RecursionError) as exc:
                # HDF5 reports a Fletcher-32 mismatch as a failed filter (the only filter
                # this code writes).
                why = ("a data checksum (Fletcher-32) failed: the file changed after it was "
                       "written" if "filter returned failure" in str(exc)
                       else f"{type(exc).__name__}: {exc}")
                raise LedgerError(
                    f"{path}: sweep {sweep_id!r} cannot be decoded ({why}); "
                    f"`xtalkcal check {self._path}` checks every commit"
                ) from exc
        raise LedgerError(f"{self._path}: directory kept changing while being read")

    def _recheck(self, cf: _CommitFile) -> None:
        """Check a commit file's digest again if the file changed since it was checked.

        Sweeps are read from disk long after the ledger was opened; a rewritten or replaced
        file is seen by its size, time or inode (rot in place leaves those, and is caught by
        the Fletcher-32 checksums of the data).
        """
        path = self._path / cf.name
        if _stamp(path) == cf.stamp:
            return
        first, last = cf.first, cf.last
        try:
            _check_digest(path, _read_digest(self._path / _digest_name(first, last)))
        except FileNotFoundError:
            if not path.exists():
                raise
            raise LedgerError(
                f"{path}: changed since it was read, and its digest file is missing"
            ) from None
        except _BadCommit as exc:
            raise LedgerError(f"{path}: {exc.problem}") from None

    # -- writing ----------------------------------------------------------------------------

    @contextlib.contextmanager
    def _locked(self) -> Iterator[None]:
        try:
            self._lock.acquire()
        except filelock.Timeout as exc:
            raise LedgerError(
                f"{self._path}: another writer holds the lock for more than "
                f"{self._lock_timeout_s} s"
            ) from exc
        try:
            yield
        finally:
            self._lock.release()

    def _remove_temporaries(self) -> None:
        # Called under the lock, after a refresh that found every commit: no live writer
        # owns a temporary file now, and a digest file without its commit file is the
        # leftover of a killed writer (above every commit) or of a compaction (inside a
        # kept range). Digests go first, so that a crash here never leaves a digest file
        # whose temporary file has gone (which would read as a deleted commit).
        kept = [(f, la) for f, la, _ in self._covering(self._list_final())[0]]
        top = max((la for _, la in kept), default=0)
        for (first, last), name in self._list_digests().items():
            if (self._path / _final_name(first, last)).exists():
                continue
            if first > top:
                try:
                    orphan = _read_digest(self._path / name)
                except _BadCommit as exc:
                    raise LedgerError(f"{self._path / name}: {exc.problem}") from None
                if not (self._path / orphan["tmp"]).exists():
                    # Not a killed writer's: the commit file it describes has gone.
                    raise LedgerError(
                        f"{self._path / orphan['file']}: missing, but its digest file {name} "
                        "is there (deleted or moved); nothing was written"
                    )
            elif not any(f <= first and last <= la for f, la in kept):
                raise LedgerError(f"{self._path / _final_name(first, last)}: missing, but its "
                                  f"digest file {name} is there; nothing was written")
            with contextlib.suppress(FileNotFoundError):
                os.unlink(self._path / name)
        with os.scandir(self._path) as it:
            stale = [item.path for item in it if item.name.startswith(_TMP_PREFIX)]
        for p in stale:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(p)

    def _start_digests(self) -> None:
        """On a ledger from before digests (under the lock): record its files as legacy, so
        that from now on a commit file without a digest is an error."""
        if self._marker.legacy_files is not None:
            return
        keep, _ = self._covering(self._list_final())
        info = {
            **self._marker.info,
            "integrity": {"digest": "sha256", "legacy_files": [n for _, _, n in keep]},
        }
        _write_marker(self._path, info)
        self._marker = _read_marker(self._path)

    def _write_commit(
        self,
        first: int,
        last: int,
        entries: Iterable[LedgerEntry],
        fill_sweeps: Callable[[h5py.Group], None],
    ) -> Path:
        """Write one immutable commit file: temp name, fsync, atomic rename, fsync dir."""
        final = self._path / _final_name(first, last)
        if final.exists():
            raise LedgerError(f"{final}: already exists; refusing to overwrite a commit")
        tmp = self._path / f"{_TMP_PREFIX}{os.getpid()}-{uuid.uuid4().hex}.h5"
        digest = self._path / _digest_name(first, last)
        renamed = False
        try:
            with h5py.File(tmp, "w", libver=_LIBVER) as fh:
                fh.attrs["format"] = _FORMAT
                fh.attrs["schema_version"] = SCHEMA_VERSION
                fh.attrs["chip"] = self._chip
                fh.attrs["seq_first"] = first
                fh.attrs["seq_last"] = last
                fh.attrs["written_utc"] = utc_timestamp()
                _write_columns(fh, _entries_to_columns(entries))
                fill_sweeps(fh.create_group("sweeps"))
            _fsync_file(tmp)
            size, sha = _hash_file(tmp)
            record = {"format": _DIGEST_FORMAT, "file": final.name, "tmp": tmp.name,
                      "size": size, "sha256": sha}
            # Durable before the rename: a visible commit always has its digest.
            _atomic_write_bytes(self._path, digest.name, json.dumps(record, indent=1).encode())
            os.replace(tmp, final)
            renamed = True
        finally:
            if not renamed:
                for leftover in (digest, tmp):
                    with contextlib.suppress(FileNotFoundError):
                        leftover.unlink()
        _fsync_dir(self._path)
        return final

    def append(
        self,
        entries: Iterable[LedgerEntry] = (),
        *,
        sweeps: Mapping[str, xr.Dataset] | None = None,
    ) -> CommitReceipt:
        """Append one commit: a batch of entries and optional raw sweeps, all or nothing.

        Parameters
        ----------
        entries : iterable of LedgerEntry
            Estimates to store; ``seq``/``position`` are assigned here (any given are
            replaced).
        sweeps : mapping of str to xarray.Dataset, optional
            Raw sweeps to store, by id. Ids must be new to the ledger. An entry's
            ``sweep_id`` must name a sweep of this batch or one already stored.

        Returns
        -------
        CommitReceipt
            Returned only once the commit is durable and visible to readers.

        Raises
        ------
        LedgerValidationError
            If any entry or sweep is invalid (names the field; nothing is written).
        LedgerError
            If the lock cannot be taken or the file cannot be written.
        """
        batch = list(entries)
        sweep_map = dict(sweeps or {})
        if not batch and not sweep_map:
            raise LedgerValidationError(
                "Ledger.append", "entries", "nothing to commit (no entries, no sweeps)"
            )
        for k, e in enumerate(batch):
            _check_entry(e, f"entry[{k}]")
        plans = [_encode_sweep(sid, ds) for sid, ds in sweep_map.items()]
        with self._locked():
            self._refresh()
            known = self._view.sweeps
            for sid in sweep_map:
                if sid in known:
                    raise LedgerValidationError(
                        f"sweep {sid!r}", "sweep_id", "already stored; sweep ids are unique"
                    )
            for k, e in enumerate(batch):
                if e.sweep_id and e.sweep_id not in known and e.sweep_id not in sweep_map:
                    raise LedgerValidationError(
                        f"entry[{k}] ({e.aggressor!r} -> {e.victim!r})",
                        "sweep_id",
                        f"{e.sweep_id!r} is neither in this batch nor stored",
                    )
            self._remove_temporaries()
            self._start_digests()
            # Numbers of quarantined commits are never given again (they may come back).
            seq = max([self._view.last_seq, *(la for _, la, _ in self._list_quarantine())]) + 1
            stored = tuple(dataclasses.replace(e, seq=seq, position=k) for k, e in enumerate(batch))

            def fill(group: h5py.Group) -> None:
                for k, plan in enumerate(plans):
                    _write_sweep(group.create_group(str(k)), plan, seq)

            path = self._write_commit(seq, seq, stored, fill)
            self._refresh()
        return CommitReceipt(seq, path, stored, tuple(sweep_map))

    def compact(self) -> int:
        """Merge all commit files into one, atomically, keeping the whole history.

        Entry ids (``seq``, ``position``) and sweeps are preserved; files from older schema
        versions are rewritten in the current one. Redundant files left by an interrupted
        earlier compaction are removed.

        Returns
        -------
        int
            Number of files merged (0 if there was nothing to merge).
        """
        with self._locked():
            self._refresh()
            keep, redundant = self._covering(self._list_final())
            merged = 0
            if len(keep) >= 2:
                files = [self._files[n] for _, _, n in keep]

                def fill(group: h5py.Group) -> None:
                    k = 0
                    for cf in files:
                        with h5py.File(self._path / cf.name, "r", locking=False) as src:
                            for sid, gpath in cf.sweeps:
                                if cf.schema_version == SCHEMA_VERSION:
                                    src.copy(src[gpath], group, name=str(k))
                                else:
                                    seq = int(src[gpath].attrs["seq"])
                                    ds = SWEEP_READERS[cf.schema_version](src[gpath])
                                    _write_sweep(
                                        group.create_group(str(k)), _encode_sweep(sid, ds), seq
                                    )
                                k += 1

                self._remove_temporaries()
                self._start_digests()
                all_entries = [e for cf in files for e in cf.entries]
                self._write_commit(files[0].first, files[-1].last, all_entries, fill)
                merged = len(files)
                redundant = redundant + keep
            for first, last, name in redundant:
                # The commit file before its digest (readers rely on that order).
                for gone in (name, _digest_name(first, last)):
                    with contextlib.suppress(FileNotFoundError):
                        os.unlink(self._path / gone)
            if redundant:
                _fsync_dir(self._path)
            self._refresh()
        return merged


def verify_ledger(path: str | os.PathLike[str]) -> LedgerReport:
    """Check every commit file of a ledger, even one that readers refuse.

    Parameters
    ----------
    path : str or os.PathLike
        The ledger directory.

    Returns
    -------
    LedgerReport
        One line per commit file: OK, unverified (legacy), damaged, missing or quarantined.

    Raises
    ------
    LedgerError
        If the directory is not a ledger (no readable marker).
    """
    led = Ledger.__new__(Ledger)
    led._setup(path, 60.0)
    return led.verify()


def quarantine_commit(
    path: str | os.PathLike[str], name: str, *, lock_timeout_s: float = 60.0
) -> Path:
    """Set a damaged commit file aside so that the rest of the ledger can be read.

    The file and its digest file move into ``<ledger>/quarantine/``; its entries and sweeps
    leave the history and its sequence numbers no longer count as missing. Moving the two
    files back undoes it.

    Parameters
    ----------
    path : str or os.PathLike
        The ledger directory.
    name : str
        Name of the commit file, e.g. ``"0000000003-0000000003.h5"``.
    lock_timeout_s : float, optional
        How long to wait for the writer lock, s.

    Returns
    -------
    pathlib.Path
        Where the commit file is now.
    """
    root = Path(path)
    _read_marker(root)
    m = _FINAL_RE.match(str(name))
    if m is None or not (root / name).is_file():
        raise LedgerError(f"{root}: {name!r} is not a commit file of this ledger")
    first, last = int(m.group(1)), int(m.group(2))
    qdir = root / _QUARANTINE
    with _writer_lock(root, lock_timeout_s):
        qdir.mkdir(exist_ok=True)
        if (qdir / name).exists():
            raise LedgerError(f"{qdir / name}: already in quarantine; move it elsewhere first")
        os.replace(root / name, qdir / name)
        digest = _digest_name(first, last)
        with contextlib.suppress(FileNotFoundError):
            os.replace(root / digest, qdir / digest)
        _fsync_dir(qdir)
        _fsync_dir(root)
    return qdir / name
