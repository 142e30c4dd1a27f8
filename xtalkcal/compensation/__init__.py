"""Compensation: settings for the control stack and their files, the pairwise and multi-victim
solves, the applicators, and the closed-loop refinement.

May import: :mod:`xtalkcal.store` and below. Nothing here imports a later stage of the flow.
"""

from xtalkcal.compensation.apply import (
    apply_to_timeline,
    apply_to_waveforms,
)
from xtalkcal.compensation.elements import (
    Cov2,
    CrosstalkElement,
    MatrixLike,
    Truth,
    as_elements,
    elements_from_calibration,
    elements_from_snapshot,
)
from xtalkcal.compensation.refine import (
    CONVERGED_RISK,
    Refinement,
    converged_sigma,
    refine_settings,
)
from xtalkcal.compensation.settings import (
    CSV_COLUMNS,
    SETTINGS_FORMAT,
    SETTINGS_SCHEMA,
    SOLVES,
    CompensationSettings,
    PairSetting,
    Solve,
)
from xtalkcal.compensation.solve import (
    PairResidual,
    multi_victim_settings,
    pairwise_settings,
    residuals,
)

__all__ = [
    "Cov2",
    "CrosstalkElement",
    "MatrixLike",
    "Truth",
    "as_elements",
    "elements_from_calibration",
    "elements_from_snapshot",
    "PairResidual",
    "multi_victim_settings",
    "pairwise_settings",
    "residuals",
    "apply_to_timeline",
    "apply_to_waveforms",
    "CSV_COLUMNS",
    "CompensationSettings",
    "PairSetting",
    "SETTINGS_FORMAT",
    "SETTINGS_SCHEMA",
    "SOLVES",
    "Solve",
    "CONVERGED_RISK",
    "Refinement",
    "converged_sigma",
    "refine_settings",
]
