"""Calibration: plan the passes, design and run the adaptive null searches on the rig, and
collect each pair's result.

May import: :mod:`xtalkcal.fits`, :mod:`xtalkcal.measure` and below. Nothing here imports a
later stage of the flow.
"""

from xtalkcal.calibrate.chip_run import (
    calibrate_chip,
)
from xtalkcal.calibrate.design import (
    DesignModel,
    cramer_rao_bound,
    grid_design,
    null_fisher_information,
    optimal_ring_radius,
    ring_design,
)
from xtalkcal.calibrate.pass_data import (
    measure_probe,
    shots_per_point,
)
from xtalkcal.calibrate.pass_plan import (
    PassRequest,
    PassStart,
)
from xtalkcal.calibrate.passes import (
    Handoff,
    calibrate_pass,
)
from xtalkcal.calibrate.plan import (
    JOINT_NULL_SPAN,
    NULL_CONFIDENCE,
    RING_MARGIN,
    RISE_PROBABILITY,
    RISE_STARK_RAD,
    STARK_PHASE_MAX,
    STRONGEST_DB,
    SURVEY_STARK_RAD,
    nulled_pass_groups,
    pass_amplitude,
    ring_around,
    ring_points_for,
    ring_radius_caps,
    risk_map,
    stark_windows,
    survey_radii,
)
from xtalkcal.calibrate.result import (
    CalibrationResult,
    PairResult,
    measured_couplings,
)
from xtalkcal.calibrate.search import (
    AdaptiveNullSearch,
    SearchStateError,
    SearchStep,
)

__all__ = [
    "calibrate_pass",
    "shots_per_point",
    "AdaptiveNullSearch",
    "SearchStateError",
    "SearchStep",
    "DesignModel",
    "cramer_rao_bound",
    "grid_design",
    "null_fisher_information",
    "optimal_ring_radius",
    "ring_design",
    "CalibrationResult",
    "PairResult",
    "measured_couplings",
    "JOINT_NULL_SPAN",
    "NULL_CONFIDENCE",
    "RING_MARGIN",
    "RISE_PROBABILITY",
    "RISE_STARK_RAD",
    "STARK_PHASE_MAX",
    "STRONGEST_DB",
    "SURVEY_STARK_RAD",
    "nulled_pass_groups",
    "pass_amplitude",
    "ring_around",
    "ring_points_for",
    "ring_radius_caps",
    "risk_map",
    "stark_windows",
    "survey_radii",
    "calibrate_chip",
    "PassStart",
    "PassRequest",
    "Handoff",
    "measure_probe",
]
