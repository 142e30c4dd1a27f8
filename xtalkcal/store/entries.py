"""Ledger entries: one stored measurement of one matrix element, validated field by field.
"""

from __future__ import annotations

import dataclasses
import math
import numbers
import operator
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any, Literal, get_args

import h5py
import numpy as np

from xtalkcal.exceptions import LedgerError, LocatedError

Method = Literal["leakage", "rotation", "stark", "survey", "manual"]
Kind = Literal["survey", "null", "recheck", "manual"]
Verdict = Literal["accepted", "rejected"]

METHODS: tuple[str, ...] = get_args(Method)
KINDS: tuple[str, ...] = get_args(Kind)
VERDICTS: tuple[str, ...] = get_args(Verdict)


class LedgerValidationError(LocatedError, LedgerError, ValueError):
    """An entry, sweep or argument handed to the ledger is invalid; nothing was written.

    A :class:`~xtalkcal.exceptions.LocatedError`: ``where`` says which object failed, e.g.
    ``entry[3] (L1 -> q2)`` or ``sweep 'ring-7'``.
    """


class _Malformed(Exception):
    """A commit file's content does not have the structure this code writes (decoding only;
    the loader turns it into a `LedgerError` naming the file)."""


def _attr(obj: h5py.HLObject, key: str, kind: type, where: str) -> Any:
    """An HDF5 attribute that must exist and be a ``str`` or a (non-bool) integer."""
    if key not in obj.attrs:
        raise _Malformed(f"{where}: attribute {key!r} is missing")
    value = obj.attrs[key]
    if isinstance(value, np.ndarray) and value.shape == (1,):
        value = value[0]  # netCDF-4 (h5netcdf) writes a number as a one-element array
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
