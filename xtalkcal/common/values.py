"""Small value helpers shared by every stage: read-only array views, JSON-safe floats and UTC
timestamps.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike, NDArray

# ---------------------------------------------------------------------------
# Result types
# ---------------------------------------------------------------------------


def readonly(a: ArrayLike) -> NDArray[np.float64]:
    arr = np.array(a, dtype=float)
    arr.setflags(write=False)
    return arr


def json_float(v: float | None) -> float | None:
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None
