"""From the crosstalk matrix to cancellation settings, their files, and their application.

Conventions (DESIGN.md §3): ``X_ij(f) = C_ij(f)/C_ii(f)`` is the field at qubit i from line
j relative to the field from qubit i's own line, same amplitude and frequency. The
compensation ratio of a pair is ``r_ij``: for every tone s(t) at f_j on the aggressor line
j, the victim's line i adds ``r_ij·s(t)`` at f_j. Pairwise, ``r_ij = −X_ij(f_j)`` and the
residual crosstalk is ``|X_ij + r_ij|``.

Pairwise and multi-victim settings
----------------------------------
:func:`pairwise_settings` takes ``r = −X`` pair by pair. But the cancellation tones leak
too: with aggressor j at complex amplitude A and every victim k of a victim set V playing
``z_k``, the field at victim i ∈ V, in units of i's own-line field per unit amplitude, is

    X_ij·A + z_i + Σ_{k∈V, k≠i} X_ik·z_k .

Setting it to zero for every i ∈ V gives ``(I + X_VV^offdiag)·r = −X_Vj`` with r = z/A
(DESIGN.md §5: ``C_VV·r = −C_Vj``, divided row by row by ``C_ii``).
:func:`multi_victim_settings` solves it per aggressor. Pairwise settings leave a
second-order all-on residual ``Σ_k X_ik·r_kj`` at victim i; the solve removes it.

Approximations of the solve, all second order in the crosstalk and absorbed by the
closed-loop refinement (re-nulling with all compensations on, :mod:`xtalkcal.refine`):

* ``X_ik`` should be taken at the aggressor's frequency f_j; the matrix holds it at line
  k's own frequency f_k, and that value is used unless ``couplings`` is a callable
  evaluated at f_j. The electrical delay τ_ik of a coupling turns its phase by
  2π·(f_j − f_k)·τ_ik, which with τ of a few ns and detunings of a few hundred MHz is
  of order a radian or more: then X_ik(f_k) is a poor stand-in. Measured on the bundled
  demo chip (true matrix, delays 0.5–2.9 ns): the worst all-on residual over all pairs is
  −44 dB with pairwise settings, −40 dB with the solve on X_ik(f_k), and below −300 dB
  (round-off) with the solve on X_ik(f_j). Use the matrix-only solve where couplings are
  short (small τ·Δf), else supply X_ik(f_j) or rely on the closed loop.
* Couplings between victims that the matrix does not hold (below the survey threshold,
  never measured) are taken as zero; pass ``couplings=`` to supply more of them (e.g. the
  survey-only estimates of a calibration).
* The cancellation tones also reach the aggressor's own qubit j (a relative change
  ``Σ_k X_jk·r_kj`` of its own drive) and qubits outside V; neither is part of the solve.

The covariance of r is propagated to first order, ``dr = M⁻¹(−dX_Vj − dM·r)`` with
``M = I + X_VV^offdiag``, treating the matrix elements as independent. Only each pair's
own 2×2 block is kept; the cross-covariances between the pairs of one column are dropped.

Settings file ``xtalkcal-settings/1`` (JSON)
--------------------------------------------
Angles in degrees and magnitudes in dB (20·log10|·|) for display; ``re``/``im`` are
authoritative, and a reader refuses a file whose display values disagree with them (a
hand edit of ``magnitude_db`` alone would otherwise be silently ignored)::

    {
      "schema": "xtalkcal-settings/1",      # this format and its version
      "chip": "grid9-demo",                  # chip name (applicators refuse another chip)
      "created_utc": "2031-...+00:00",       # when the settings were derived (ISO-8601)
      "software": "xtalkcal 0.1.0",          # what derived them
      "pairs": [                             # one object per (aggressor line, victim)
        {
          "aggressor_line": "d4",            # line whose tones are copied
          "aggressor_qubit": "q4",           # the qubit that line is meant to drive
          "victim": "q5",                    # qubit whose leaked field is cancelled
          "victim_line": "d5",               # line that plays the cancellation copy
          "frequency_ghz": 4.78,             # aggressor tone frequency the ratio is for
          "ratio": {"re": ..., "im": ...,    # r (copy = r × aggressor tone), linear
                    "magnitude_db": ...,     # 20·log10|r|, null for r = 0
                    "phase_deg": ...},       # arg r in degrees, (−180, 180]
          "covariance": [[..., ...],         # 2×2 covariance of (Re r, Im r)
                         [..., ...]],
          "stderr_db": ...,                  # 20·log10 sqrt(trace covariance): the residual
                                             # one standard error leaves; null if 0
          "measured_at_s": 12.3,             # rig clock (s) of the underlying estimate
          "method": "leakage",               # how X was measured (leakage/rotation/stark/…)
          "solve": "pairwise",               # "pairwise" (r = −X), "multi-victim", "closed-loop"
          "source": "ledger:3.1"             # where X came from (ledger entry, calibration)
        }, ...
      ]
    }

Settings CSV (one row per pair, comma separated, header row first)::

    schema,chip,created_utc,software,aggressor_line,aggressor_qubit,victim,victim_line,
    frequency_ghz,ratio_re,ratio_im,magnitude_db,phase_deg,cov_re_re,cov_re_im,cov_im_im,
    stderr_db,measured_at_s,method,solve,source

(one line in the file). The columns mean what the JSON fields of the same names mean;
``cov_*`` are the three independent elements of the symmetric covariance; the set-level
fields are repeated on every row so each row stands alone (rows of several chips or
cooldowns can be concatenated); an undefined dB value is an empty cell. Floats are written
with ``repr`` and read back exactly.

Both files are written atomically (temporary file in the same folder, ``fsync``,
``os.replace``, folder ``fsync``): a reader sees the old file or the complete new one.

Applying settings
-----------------
:func:`apply_to_timeline` adds, for each tone on an aggressor line at a setting's
frequency, a copy scaled by r on the victim's line (same start, duration, envelope and
frequency). Carriers are phase-continuous on one global clock (``xtalkcal.timeline``), so
the copy's complex envelope is simply ``r·A(t)``: its phase is ``arg r + φ``.

:func:`apply_to_waveforms` does the same on sampled complex baseband. Line ℓ's samples
``b_ℓ(t_n)`` are at carrier ``f_ℓ``: the RF is ``Re[b_ℓ(t)·e^{−i2πf_ℓt}]`` on the global
clock ``t_n = t0 + n·dt``. A copy of aggressor j (carrier f_j) onto line i must produce the
RF ``Re[r·b_j(t)·e^{−i2πf_jt}]``; writing ``e^{−i2πf_jt} = e^{−i2π(f_j−f_i)t}·e^{−i2πf_it}``
shows that line i's baseband gains

    Δb_i(t) = r·b_j(t)·e^{−i2π(f_j − f_i)t} ,

a shift *down* by f_j − f_i in the e^{−i2πft} convention. The test suite builds the same
tones as a timeline and as samples and compares ``Timeline.waveform`` with
``b·e^{−i2πf_ℓt}``. A sampled line cannot be split by frequency: the whole baseband of the
aggressor line is copied, so the aggressor's carrier must be the setting's frequency and
its samples should hold only tones at (or near) it; a timeline, in contrast, copies only
the tones at the setting's frequency.

Both applicators refuse (:class:`~xtalkcal.exceptions.SafetyLimitError`, naming the
pairs and the line) a result that would exceed a line's peak-amplitude limit; they never
clip, and never mutate their inputs.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import uuid
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import datetime
from pathlib import Path
from typing import Any, Literal, NamedTuple, Union, get_args

import numpy as np

from xtalkcal import __version__
from xtalkcal.calibration import CalibrationResult
from xtalkcal.chip import Chip
from xtalkcal.exceptions import ConfigError, SafetyLimitError
from xtalkcal.ledger import LedgerEntry, MatrixSnapshot, utc_timestamp
from xtalkcal.safety import check_timelines, line_loads
from xtalkcal.timeline import Timeline, Tone
from xtalkcal.tomlfields import (
    RIG_TIME_RANGE_S,
    name_problem,
    parse_json,
    read_text,
    short_repr,
)

__all__ = [
    "SETTINGS_SCHEMA",
    "CSV_COLUMNS",
    "Solve",
    "CrosstalkElement",
    "PairSetting",
    "CompensationSettings",
    "PairResidual",
    "elements_from_snapshot",
    "elements_from_calibration",
    "as_elements",
    "pairwise_settings",
    "multi_victim_settings",
    "residuals",
    "apply_to_timeline",
    "apply_to_waveforms",
]

SETTINGS_SCHEMA = "xtalkcal-settings/1"

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

Cov2 = tuple[tuple[float, float], tuple[float, float]]


# --------------------------------------------------------------------------------------------
# Inputs: matrix elements
# --------------------------------------------------------------------------------------------


class CrosstalkElement(NamedTuple):
    """One matrix element as the settings constructors read it.

    Attributes
    ----------
    value : complex
        X = C_victim,aggressor / C_victim,victim (linear).
    covariance : 2×2 array-like
        Covariance of (Re X, Im X), dimensionless squared.
    frequency_ghz : float
        Aggressor tone frequency at which X was measured (GHz).
    measured_at_s : float
        Rig clock of the estimate (s).
    method : str
        How X was measured.
    source : str
        Where the estimate came from (free text; ``""`` if unknown).
    """

    value: complex
    covariance: Any
    frequency_ghz: float
    measured_at_s: float
    method: str
    source: str = ""


MatrixLike = Union[  # noqa: UP007 (a runtime alias; `|` of a generic needs 3.10+ objects)
    Mapping[tuple[str, str], "CrosstalkElement | Sequence[Any]"],
    MatrixSnapshot,
    CalibrationResult,
]
"""``{(aggressor_line, victim): (X, cov, freq_ghz, measured_at_s, method[, source])}``,
a ledger :class:`~xtalkcal.ledger.MatrixSnapshot`, or a
:class:`~xtalkcal.calibration.CalibrationResult`."""

Truth = Callable[[str, str, float], complex]
"""``truth(victim, line, freq_ghz) -> X``, e.g. ``SimRig.true_crosstalk``."""


def _element_of_entry(e: LedgerEntry) -> CrosstalkElement:
    src = f"ledger:{e.entry_id}" if e.entry_id else "ledger"
    return CrosstalkElement(e.value, e.covariance, e.frequency_ghz, e.measured_at_s, e.method,
                            src)


def elements_from_snapshot(snapshot: MatrixSnapshot) -> dict[tuple[str, str], CrosstalkElement]:
    """The accepted entries of a ledger snapshot as matrix elements."""
    return {(e.aggressor, e.victim): _element_of_entry(e)
            for e in snapshot.entries.values() if e.accepted}


def elements_from_calibration(
    result: CalibrationResult, *, nulled_only: bool = True
) -> dict[tuple[str, str], CrosstalkElement]:
    """The accepted pairs of a calibration as matrix elements.

    Parameters
    ----------
    result : CalibrationResult
    nulled_only : bool
        Keep only pairs whose null was searched (above the survey threshold). Settings
        are made from those; ``nulled_only=False`` adds the survey-only estimates, useful
        as ``couplings`` of :func:`multi_victim_settings`.
    """
    out = {}
    for p in result.pairs:
        if not p.accepted or p.x is None or p.x_cov is None:
            continue
        if nulled_only and not p.nulled:
            continue
        out[(p.aggressor, p.victim)] = CrosstalkElement(
            complex(p.x), _cov2(p.x_cov, f"{p.aggressor} → {p.victim}"), p.freq_ghz,
            p.measured_at_s, p.method,
            f"calibration:{p.stage}")
    return out


def as_elements(matrix: MatrixLike) -> dict[tuple[str, str], CrosstalkElement]:
    """Normalise any accepted matrix form to ``{(aggressor_line, victim): CrosstalkElement}``.

    Mapping values may be ``CrosstalkElement``, plain tuples, or accepted ledger entries.

    Raises
    ------
    ValueError
        If a mapping value is not ``(X, cov, freq_ghz, measured_at_s, method[, source])``.
    """
    if isinstance(matrix, MatrixSnapshot):
        return elements_from_snapshot(matrix)
    if isinstance(matrix, CalibrationResult):
        return elements_from_calibration(matrix)
    out = {}
    for key, val in matrix.items():
        if not (isinstance(key, tuple) and len(key) == 2):
            raise ValueError(f"matrix keys must be (aggressor_line, victim) tuples, got {key!r}")
        if isinstance(val, CrosstalkElement):
            out[key] = val
            continue
        if isinstance(val, LedgerEntry):
            if not val.accepted:
                raise ValueError(f"matrix[{key!r}]: a rejected ledger entry ({val.reason})")
            out[key] = _element_of_entry(val)
            continue
        if not isinstance(val, Sequence) or len(val) not in (5, 6):
            raise ValueError(
                f"matrix[{key!r}]: expected (X, covariance, frequency_ghz, measured_at_s, "
                f"method[, source]), got {val!r}")
        out[key] = CrosstalkElement(*val)
    return out


def _matrix_chip_name(matrix: MatrixLike) -> str | None:
    if isinstance(matrix, MatrixSnapshot):
        return matrix.chip
    if isinstance(matrix, CalibrationResult):
        return matrix.chip.name
    return None


# --------------------------------------------------------------------------------------------
# Settings
# --------------------------------------------------------------------------------------------


def _cov2(value: Any, where: str) -> Cov2:
    """A validated, exactly symmetric 2×2 covariance as nested tuples."""
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{where}: covariance must be a 2×2 array of numbers ({exc})") from None
    if arr.shape != (2, 2):
        raise ValueError(f"{where}: covariance must be 2×2, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{where}: covariance must be finite, got {arr.tolist()}")
    a, b, c, d = float(arr[0, 0]), float(arr[0, 1]), float(arr[1, 0]), float(arr[1, 1])
    scale = max(abs(a), abs(d), 1e-300)
    if abs(b - c) > 1e-9 * scale:
        raise ValueError(f"{where}: covariance must be symmetric, got {arr.tolist()}")
    off = b if b == c else 0.5 * (b + c)
    if a < 0 or d < 0 or off * off > a * d * (1 + 1e-9) + 1e-300:
        raise ValueError(f"{where}: covariance must be positive semidefinite, got {arr.tolist()}")
    return ((a, off), (off, d))


def _db(x: float) -> float:
    return 20.0 * math.log10(x) if x > 0 else -math.inf


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
        """The settings as a JSON-shaped dictionary of schema ``xtalkcal-settings/1``."""
        return {
            "schema": SETTINGS_SCHEMA,
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
        """Validate a dictionary of schema ``xtalkcal-settings/1``.

        Raises
        ------
        ConfigError
            Naming the source, the field and what would be accepted.
        """
        return _settings_from_dict(data, source)

    @classmethod
    def from_json(cls, text: str, *, source: str = "<json>") -> CompensationSettings:
        """Parse JSON text of schema ``xtalkcal-settings/1`` (inverse of :meth:`to_json`)."""
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
_TOP_FIELDS = ("schema", "chip", "created_utc", "software", "pairs")


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
    schema = top.string("schema")
    if schema != SETTINGS_SCHEMA:
        raise top.error("schema", f"expected {SETTINGS_SCHEMA!r}, got {schema!r} (a newer "
                                  "xtalkcal wrote it, or it is another kind of file)")
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


# --------------------------------------------------------------------------------------------
# Constructors
# --------------------------------------------------------------------------------------------


def _check_pair_on_chip(chip: Chip, line: str, victim: str) -> tuple[str, str]:
    """(aggressor qubit, victim line) of a pair, or ValueError naming the choices."""
    if line not in chip.line_names:
        raise ValueError(f"pair {line} → {victim}: no line {line!r} on chip {chip.name!r}; "
                         f"known: {', '.join(chip.line_names)}")
    if victim not in chip.qubit_names:
        raise ValueError(f"pair {line} → {victim}: no qubit {victim!r} on chip {chip.name!r}; "
                         f"known: {', '.join(chip.qubit_names)}")
    own = chip.line(line).qubit
    if victim == own:
        raise ValueError(f"pair {line} → {victim}: {victim} is the line's own qubit")
    return own, chip.line_of(victim).name


def _select(elements: Mapping[tuple[str, str], CrosstalkElement],
            pairs: Iterable[tuple[str, str]] | None) -> list[tuple[str, str]]:
    if pairs is None:
        return list(elements)
    keys = [tuple(p) for p in pairs]
    missing = [k for k in keys if k not in elements]
    if missing:
        held = ", ".join(f"{a}→{v}" for a, v in elements) or "none"
        raise ValueError(f"the matrix holds no element for "
                         f"{', '.join(f'{a}→{v}' for a, v in missing)}; held: {held}")
    return keys  # type: ignore[return-value]


def _check_matrix_chip(matrix: MatrixLike, chip: Chip) -> None:
    name = _matrix_chip_name(matrix)
    if name is not None and name != chip.name:
        raise ValueError(f"the matrix is for chip {name!r}, not {chip.name!r}")


def pairwise_settings(
    matrix: MatrixLike,
    chip: Chip,
    *,
    pairs: Iterable[tuple[str, str]] | None = None,
) -> CompensationSettings:
    """First-order settings: r = −X for every pair, covariance of r = covariance of X.

    Parameters
    ----------
    matrix : mapping, MatrixSnapshot or CalibrationResult
        ``{(aggressor_line, victim): (X, cov, freq_ghz, measured_at_s, method[, source])}``;
        a ledger snapshot (its accepted entries); or a calibration (its accepted, nulled
        pairs).
    chip : Chip
        Names the aggressor qubits and victim lines; must be the matrix's chip.
    pairs : iterable of (aggressor_line, victim), optional
        Restrict to these pairs (default all the matrix holds).

    Returns
    -------
    CompensationSettings

    Raises
    ------
    ValueError
        If a requested pair is missing, a name is not on the chip, or the matrix belongs
        to another chip.

    Examples
    --------
    >>> s = pairwise_settings({("d4", "q5"): (0.03 + 0.04j, [[1e-6, 0], [0, 1e-6]],
    ...                        4.78, 10.0, "leakage")}, chip)  # doctest: +SKIP
    >>> s.pair("d4", "q5").ratio  # doctest: +SKIP
    (-0.03-0.04j)
    """
    _check_matrix_chip(matrix, chip)
    elements = as_elements(matrix)
    out = []
    for line, victim in _select(elements, pairs):
        own, vline = _check_pair_on_chip(chip, line, victim)
        e = elements[(line, victim)]
        out.append(PairSetting(line, own, victim, vline, e.frequency_ghz, -complex(e.value),
                               _cov2(e.covariance, f"matrix[{line!r}, {victim!r}]"),
                               e.measured_at_s, e.method, "pairwise", e.source))
    return CompensationSettings(chip.name, tuple(out))


def _columns(items: Iterable[tuple[str, float, Any]]) -> list[tuple[str, float, list[Any]]]:
    """Group (aggressor, frequency, item) into columns of one aggressor and one frequency."""
    cols: list[tuple[str, float, list[Any]]] = []
    for line, f, item in items:
        for cl, cf, members in cols:
            if cl == line and abs(cf - f) <= _SAME_FREQ_GHZ:
                members.append(item)
                break
        else:
            cols.append((line, f, [item]))
    return cols


def _rblock(c: complex) -> np.ndarray:
    """The real 2×2 matrix of multiplication by c acting on (Re, Im)."""
    return np.array([[c.real, -c.imag], [c.imag, c.real]])


def _coupling_source(
    couplings: MatrixLike | Truth, chip: Chip
) -> Callable[[str, str, float], tuple[complex, Cov2 | None]]:
    """``get(victim, line, f_j) -> (X, covariance or None)`` for the victim–victim terms."""
    if callable(couplings):
        truth = couplings

        def from_truth(victim: str, line: str, f: float) -> tuple[complex, Cov2 | None]:
            return complex(truth(victim, line, f)), None

        return from_truth
    _check_matrix_chip(couplings, chip)
    table = as_elements(couplings)

    def from_matrix(victim: str, line: str, f: float) -> tuple[complex, Cov2 | None]:
        e = table.get((line, victim))
        if e is None:
            return 0j, None
        return complex(e.value), _cov2(e.covariance, f"couplings[{line!r}, {victim!r}]")

    return from_matrix


def multi_victim_settings(
    matrix: MatrixLike,
    chip: Chip,
    *,
    pairs: Iterable[tuple[str, str]] | None = None,
    couplings: MatrixLike | Truth | None = None,
) -> CompensationSettings:
    """Settings that also cancel the leak of the cancellation tones onto each other.

    For each aggressor line j with victim set V (the selected pairs of j), solves
    ``(I + X_VV^offdiag)·r = −X_Vj`` (module docstring), where ``X_ik`` (i, k ∈ V) is the
    matrix element (victim i, line of k), taken at line k's own frequency and zero when
    missing.

    Parameters
    ----------
    matrix : mapping, MatrixSnapshot or CalibrationResult
        As for :func:`pairwise_settings`; supplies X_Vj.
    chip : Chip
    pairs : iterable of (aggressor_line, victim), optional
        The pairs to set (default all the matrix holds); the victims of one aggressor
        among them form its V.
    couplings : matrix-like or callable, optional
        Where the victim–victim elements X_ik come from (default ``matrix``): another
        matrix (e.g. ``elements_from_calibration(result, nulled_only=False)``), or
        ``couplings(victim, line, freq_ghz) -> X``, called at the aggressor's frequency
        f_j — the exact form, for a coupling model or a measurement at f_j; its values
        are taken as exact (no covariance).

    Returns
    -------
    CompensationSettings
        ``solve = "multi-victim"``; covariance of r propagated to first order (each pair's
        own 2×2 block; cross-covariances between pairs dropped), treating the matrix
        elements as independent. A victim set of one gives the pairwise setting.

    Raises
    ------
    ValueError
        As :func:`pairwise_settings`, or if the system of a column is singular or
        ill-conditioned (condition number above 1e6: corrupt input).
    """
    _check_matrix_chip(matrix, chip)
    elements = as_elements(matrix)
    coupling = _coupling_source(elements if couplings is None else couplings, chip)
    keys = _select(elements, pairs)
    for line, victim in keys:
        _check_pair_on_chip(chip, line, victim)
    out: dict[tuple[str, str], PairSetting] = {}
    for line, f, members in _columns((k[0], elements[k].frequency_ghz, k) for k in keys):
        victims = [v for _, v in members]
        n = len(victims)
        vlines = [chip.line_of(v).name for v in victims]
        x = np.array([complex(elements[(line, v)].value) for v in victims])
        M = np.eye(n, dtype=complex)
        mcov: dict[tuple[int, int], Cov2] = {}
        for a, vi in enumerate(victims):
            for b in range(n):
                if a != b:
                    val, cov_ab = coupling(vi, vlines[b], f)
                    M[a, b] = val
                    if cov_ab is not None:
                        mcov[(a, b)] = cov_ab
        cond = np.linalg.cond(M)
        if not math.isfinite(cond) or cond > _MAX_CONDITION:
            raise ValueError(
                f"multi-victim system of aggressor {line} at {f:g} GHz over {', '.join(victims)} "
                f"is singular or ill-conditioned (condition number {cond:.3g}); check the matrix")
        Minv = np.linalg.inv(M)
        r = -Minv @ x
        # First-order propagation: dr = M⁻¹(−dx − dM·r); one term per independent element.
        cov = np.zeros((n, 2, 2))
        sources: list[tuple[np.ndarray, Cov2]] = []
        for b, v in enumerate(victims):
            sources.append((-Minv[:, b],
                            _cov2(elements[(line, v)].covariance, f"matrix[{line!r}, {v!r}]")))
        for (a2, b2), cov_ab in mcov.items():
            sources.append((-Minv[:, a2] * r[b2], cov_ab))
        for g, s_cov in sources:
            S = np.array(s_cov)
            for a in range(n):
                J = _rblock(complex(g[a]))
                cov[a] += J @ S @ J.T
        own = chip.line(line).qubit
        for a, v in enumerate(victims):
            e = elements[(line, v)]
            c = 0.5 * (cov[a] + cov[a].T)
            out[(line, v)] = PairSetting(line, own, v, vlines[a], e.frequency_ghz,
                                         complex(r[a]), c, e.measured_at_s, e.method,
                                         "multi-victim", e.source)
    return CompensationSettings(chip.name, tuple(out[k] for k in keys))


# --------------------------------------------------------------------------------------------
# Residuals
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class PairResidual:
    """What is left of one pair's crosstalk with the settings applied.

    Attributes
    ----------
    aggressor_line, victim : str
    frequency_ghz : float
    crosstalk : complex
        X_ij used (from the truth at the setting's frequency, or from the matrix).
    pairwise : complex
        X_ij + r_ij: the pair's own cancellation tone alone (X units).
    all_on : complex
        Field at the victim from the aggressor plus every cancellation tone of that
        aggressor's column, X_ij + r_ij + Σ_{k≠i} X_ik·r_kj (X units).
    """

    aggressor_line: str
    victim: str
    frequency_ghz: float
    crosstalk: complex
    pairwise: complex
    all_on: complex

    @property
    def crosstalk_db(self) -> float:
        """20·log10|X| (dB)."""
        return _db(abs(self.crosstalk))

    @property
    def pairwise_db(self) -> float:
        """20·log10|X + r| (dB; −inf for an exact cancellation)."""
        return _db(abs(self.pairwise))

    @property
    def all_on_db(self) -> float:
        """20·log10 of the all-on residual field (dB)."""
        return _db(abs(self.all_on))


def residuals(settings: CompensationSettings,
              truth_or_matrix: Truth | MatrixLike) -> tuple[PairResidual, ...]:
    """Residual crosstalk per pair, alone and with all compensations on.

    Parameters
    ----------
    settings : CompensationSettings
    truth_or_matrix : callable or matrix-like
        ``truth(victim, line, freq_ghz) -> X`` (e.g. ``SimRig.true_crosstalk``), evaluated
        at each setting's frequency, cross terms included; or a matrix as for
        :func:`pairwise_settings`, whose cross terms X_ik are taken at line k's own
        frequency and as zero when missing (the approximation of
        :func:`multi_victim_settings`, under which its settings leave no all-on residual).

    Returns
    -------
    tuple of PairResidual
        In the order of ``settings.pairs``.

    Raises
    ------
    ValueError
        If a matrix holds no element for a pair of the settings.
    """
    if callable(truth_or_matrix):
        truth = truth_or_matrix

        def xval(victim: str, line: str, f: float, cross: bool) -> complex:
            return complex(truth(victim, line, f))
    else:
        elements = as_elements(truth_or_matrix)

        def xval(victim: str, line: str, f: float, cross: bool) -> complex:
            e = elements.get((line, victim))
            if e is None:
                if cross:
                    return 0j
                raise ValueError(f"the matrix holds no element for {line} → {victim}")
            return complex(e.value)

    res: dict[tuple[str, str], PairResidual] = {}
    for line, _f, members in _columns((p.aggressor_line, p.frequency_ghz, p)
                                      for p in settings.pairs):
        for p in members:
            x = xval(p.victim, line, p.frequency_ghz, False)
            leak = sum((xval(p.victim, q.victim_line, p.frequency_ghz, True) * q.ratio
                        for q in members if q is not p), 0j)
            res[p.key] = PairResidual(line, p.victim, p.frequency_ghz, x, x + p.ratio,
                                      x + p.ratio + leak)
    return tuple(res[p.key] for p in settings.pairs)


# --------------------------------------------------------------------------------------------
# Applicators
# --------------------------------------------------------------------------------------------


def _check_settings_chip(settings: CompensationSettings, chip: Chip) -> None:
    if settings.chip != chip.name:
        raise ValueError(f"settings are for chip {settings.chip!r}, not {chip.name!r}")
    for p in settings.pairs:
        own, _ = _check_pair_on_chip(chip, p.aggressor_line, p.victim)
        if own != p.aggressor_qubit:
            raise ValueError(f"{p.describe()}: the chip's line {p.aggressor_line} drives {own}, "
                             f"not {p.aggressor_qubit}")
        if chip.line_of(p.victim).name != p.victim_line:
            raise ValueError(f"{p.describe()}: the chip's line of {p.victim} is "
                             f"{chip.line_of(p.victim).name}, not {p.victim_line}")


def _refusal(line: str, peak: float, limit: float, label: str,
             culprits: Sequence[PairSetting]) -> SafetyLimitError:
    who = "; ".join(dict.fromkeys(p.describe() for p in culprits))
    return SafetyLimitError(
        f"compensation refused: {label}: line {line} would reach peak amplitude {peak:.4g}, "
        f"above its limit {limit:.4g}, once the cancellation tones of {who} are added. "
        "Nothing was clipped or sent; lower the aggressor's amplitude or review the settings.")


def apply_to_timeline(
    timeline: Timeline,
    settings: CompensationSettings,
    chip: Chip,
    *,
    freq_tolerance_ghz: float = 1e-6,
    repetition_ns: float | None = None,
) -> Timeline:
    """The timeline with cancellation tones added.

    For every tone on an aggressor line whose frequency is within ``freq_tolerance_ghz``
    of a setting's frequency, a copy scaled by the setting's r (``Tone.scaled``) is added
    on the victim's line: same start, duration, envelope and frequency, phase arg r + φ.
    Tones at other frequencies (preparation pulses, the copies themselves) are not
    copied.

    Parameters
    ----------
    timeline : Timeline
        Not modified.
    settings : CompensationSettings
        Must be for ``chip``.
    chip : Chip
        Supplies the limits.
    freq_tolerance_ghz : float
        Largest |f_tone − f_setting| treated as the same frequency (GHz).
    repetition_ns : float, optional
        Time between shot starts (ns). Given, the full :func:`~xtalkcal.safety.check_timelines`
        runs (peak and average power); omitted, only peak amplitudes are checked here and
        the average power is left to the rig's own check before it plays anything.

    Returns
    -------
    Timeline
        A new timeline (same readout and label), original tones first.

    Raises
    ------
    SafetyLimitError
        If a line would exceed its limit, naming the line and the pairs whose copies it
        plays. The timeline is refused, never clipped.
    ValueError
        If the settings are for another chip.
    """
    _check_settings_chip(settings, chip)
    by_line: dict[str, list[PairSetting]] = {}
    for p in settings.pairs:
        by_line.setdefault(p.aggressor_line, []).append(p)
    added: list[Tone] = []
    culprits: dict[str, list[PairSetting]] = {}
    for tone in timeline.tones:
        for p in by_line.get(tone.line, ()):
            if abs(tone.freq_ghz - p.frequency_ghz) <= freq_tolerance_ghz and p.ratio != 0:
                added.append(tone.scaled(p.ratio, p.victim_line))
                culprits.setdefault(p.victim_line, []).append(p)
    new = replace(timeline, tones=tuple(timeline.tones) + tuple(added))
    new.validate(lines=chip.line_names)
    label = timeline.label or "timeline"
    for line, load in line_loads(timeline).items():
        limit = chip.amplitude_limit(line)
        if load.peak_amplitude > limit * (1 + 1e-12):
            raise SafetyLimitError(
                f"{label}: line {line} already reaches peak amplitude {load.peak_amplitude:.4g} "
                f"without compensation, above its limit {limit:.4g}; nothing was sent.")
    loads = line_loads(new)
    for line, ps in culprits.items():
        limit = chip.amplitude_limit(line)
        if loads[line].peak_amplitude > limit * (1 + 1e-12):
            raise _refusal(line, loads[line].peak_amplitude, limit, label, ps)
    if repetition_ns is not None:
        try:
            check_timelines(chip, [timeline], repetition_ns)
        except SafetyLimitError as exc:
            raise SafetyLimitError(f"refused before any compensation: {exc}") from exc
        # The checks are per line: checking each line's tones alone names the culprit pairs.
        for line, ps in culprits.items():
            alone = Timeline(tuple(t for t in new.tones if t.line == line), new.readout,
                             new.end_ns, new.label)
            try:
                check_timelines(chip, [alone], repetition_ns)
            except SafetyLimitError as exc:
                who = "; ".join(dict.fromkeys(p.describe() for p in ps))
                raise SafetyLimitError(f"compensation refused: the cancellation tones of {who} "
                                       f"on line {line}: {exc}") from exc
        check_timelines(chip, [new], repetition_ns)  # the whole result, as a rig would check it
    return new


def _refuse_non_finite(samples: np.ndarray, what: str) -> None:
    # NaN compares false against any limit, so it must be refused by name, never played.
    bad = ~np.isfinite(samples)
    if bad.any():
        raise SafetyLimitError(f"{what}: sample {int(np.argmax(bad))} is not finite "
                               f"({samples[bad][0]}); refused, nothing was sent.")


def apply_to_waveforms(
    waveforms: Mapping[str, np.ndarray],
    carriers_ghz: Mapping[str, float],
    settings: CompensationSettings,
    *,
    dt_ns: float,
    t0_ns: float = 0.0,
    chip: Chip,
    freq_tolerance_ghz: float = 1e-6,
) -> dict[str, np.ndarray]:
    """Sampled baseband with cancellation added: b_i += r·b_j·e^{−i2π(f_j − f_i)t}.

    Parameters
    ----------
    waveforms : mapping line → complex ndarray
        Baseband samples b_ℓ(t_n), fraction of full scale, all of one length, on the
        global clock t_n = t0 + n·dt (ns). The line's RF is Re[b_ℓ(t)·e^{−i2πf_ℓt}].
        Not modified.
    carriers_ghz : mapping line → float
        Carrier f_ℓ of each line (GHz); needed for every aggressor and victim line used.
    settings : CompensationSettings
        A setting applies when its aggressor line's carrier is within
        ``freq_tolerance_ghz`` of its frequency (the whole baseband of that line is
        copied; module docstring); settings of other frequencies are skipped.
    dt_ns : float
        Sample spacing (ns).
    t0_ns : float
        Global-clock time of sample 0 (ns).
    chip : Chip
        Supplies the peak-amplitude limits.
    freq_tolerance_ghz : float
        Largest |f_carrier − f_setting| treated as the same frequency (GHz).

    Returns
    -------
    dict line → complex ndarray
        New arrays for every input line, plus victim lines that had no samples.

    Raises
    ------
    SafetyLimitError
        If a line's peak |b| would exceed its amplitude limit (naming line and pairs),
        or any input or output sample is not finite; refused, never clipped. Average
        power is left to the rig's check.
    ValueError
        On arrays of different lengths, a missing carrier, or settings of another chip.
    """
    _check_settings_chip(settings, chip)
    if not (math.isfinite(dt_ns) and dt_ns > 0):
        raise ValueError(f"dt_ns must be finite and > 0, got {dt_ns!r}")
    arrays = {k: np.array(v, dtype=complex) for k, v in waveforms.items()}
    lengths = {k: a.shape for k, a in arrays.items()}
    shapes = set(lengths.values())
    if len(shapes) > 1 or any(len(s) != 1 for s in shapes):
        raise ValueError(f"waveforms must be 1-D and of one length, got shapes {lengths}")
    for k, a in arrays.items():
        if k not in chip.line_names:
            raise ValueError(f"waveform of unknown line {k!r}; known: {', '.join(chip.line_names)}")
        _refuse_non_finite(a, f"waveform of line {k}")
    n = next(iter(shapes))[0] if shapes else 0
    t = t0_ns + dt_ns * np.arange(n)
    out = {k: a.copy() for k, a in arrays.items()}
    culprits: dict[str, list[PairSetting]] = {}
    for p in settings.pairs:
        src = arrays.get(p.aggressor_line)
        if src is None or p.ratio == 0:
            continue
        if p.aggressor_line not in carriers_ghz:
            raise ValueError(f"no carrier for line {p.aggressor_line!r} in carriers_ghz")
        fj = float(carriers_ghz[p.aggressor_line])
        if abs(fj - p.frequency_ghz) > freq_tolerance_ghz:
            continue
        if p.victim_line not in carriers_ghz:
            raise ValueError(f"{p.describe()}: no carrier for victim line {p.victim_line!r} "
                             "in carriers_ghz")
        fi = float(carriers_ghz[p.victim_line])
        dst = out.setdefault(p.victim_line, np.zeros(n, dtype=complex))
        # Module docstring: e^{−i2πf_j t} = e^{−i2π(f_j − f_i)t}·e^{−i2πf_i t}.
        dst += p.ratio * src * np.exp(-2j * np.pi * (fj - fi) * t)
        culprits.setdefault(p.victim_line, []).append(p)
    for line, ps in culprits.items():
        _refuse_non_finite(out[line], f"line {line} with the cancellation tones of "
                           + "; ".join(p.describe() for p in ps))
        peak = float(np.max(np.abs(out[line]))) if n else 0.0
        limit = chip.amplitude_limit(line)
        if peak > limit * (1 + 1e-12):
            raise _refusal(line, peak, limit, "waveforms", ps)
    return out
