"""Matrix elements as the compensation sees them: value, covariance and where they came from.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from typing import Any, NamedTuple, Union

import numpy as np

from xtalkcal.calibrate import CalibrationResult
from xtalkcal.store import LedgerEntry, MatrixSnapshot

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
a ledger :class:`~xtalkcal.store.MatrixSnapshot`, or a
:class:`~xtalkcal.calibrate.CalibrationResult`."""

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
