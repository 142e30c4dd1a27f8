"""Input checks and unit conversions shared by the drift logic (re-check analysis, trends,
policy, schedule).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from xtalkcal.exceptions import XtalkcalError

_DB_PER_NEPER = 20.0 / math.log(10.0)  # dB of amplitude per unit of ln|X|
_SECONDS_PER_HOUR = 3600.0


class DriftInputError(XtalkcalError, ValueError):
    """Data handed to the drift logic has the wrong shape, non-finite values or mixed pairs."""


def _db(x: float) -> float:
    return 20.0 * math.log10(x) if x > 0 else -math.inf


def _lin(db: float) -> float:
    return 10.0 ** (db / 20.0)


def _finite_real(name: str, v: object) -> float:
    if isinstance(v, bool):
        raise DriftInputError(f"{name} must be a real number, got bool")
    try:
        f = float(v)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise DriftInputError(f"{name} must be a real number, got {type(v).__name__}") from None
    if not math.isfinite(f):
        raise DriftInputError(f"{name} must be finite, got {f!r}")
    return f


def _check_tolerance(tolerance_db: float) -> float:
    tol = _finite_real("tolerance_db", tolerance_db)
    if tol >= 0:
        raise DriftInputError(f"tolerance_db must be negative (a residual below 1), got {tol!r}")
    return tol


def _as_1d(name: str, a: ArrayLike, *, complex_ok: bool) -> NDArray[Any]:
    arr = np.asarray(a)
    kinds = "biufc" if complex_ok else "biuf"
    if arr.dtype.kind not in kinds:
        raise DriftInputError(f"{name} must be numeric, got dtype {arr.dtype}")
    if arr.ndim != 1:
        raise DriftInputError(f"{name} must be 1-D (one re-check), got shape {arr.shape}")
    arr = arr.astype(np.complex128 if complex_ok else float)
    if not np.all(np.isfinite(arr)):
        raise DriftInputError(f"{name} contains non-finite values")
    return arr


def _parse_prior(prior: float | tuple[float, float] | None) -> tuple[float, float] | None:
    if prior is None:
        return None
    if isinstance(prior, tuple | list):
        if len(prior) != 2:
            raise DriftInputError(
                f"curvature_prior must be kappa or (kappa, stderr), got {len(prior)} values"
            )
        k, s = _finite_real("curvature_prior[0]", prior[0]), _finite_real(
            "curvature_prior[1]", prior[1]
        )
    else:
        k, s = _finite_real("curvature_prior", prior), 0.0
    if k <= 0 or s < 0:
        raise DriftInputError(
            f"curvature_prior needs kappa > 0 and stderr >= 0, got kappa={k!r}, stderr={s!r}"
        )
    return k, s
