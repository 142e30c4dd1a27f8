"""Drift: re-check design and analysis, trend models, the next-check policy, the schedule file
and the rig-side re-check of due pairs.

May import: :mod:`xtalkcal.compensation` and below. Nothing here imports a later stage of the flow.
"""

from xtalkcal.drift.analysis import (
    analyse_recheck,
    analyse_recheck_counts,
)
from xtalkcal.drift.design import (
    recheck_design,
    recheck_radius,
)
from xtalkcal.drift.inputs import DriftInputError
from xtalkcal.drift.outcome import (
    DEFAULT_RECHECK_RULES,
    FollowUp,
    RecheckDecision,
    RecheckOutcome,
    RecheckRules,
)
from xtalkcal.drift.policy import (
    DUE_DIFFUSION_SIGMA,
    DUE_POLICY,
    DUE_SAFETY,
    FIRST_INTERVAL_FRACTION,
    NextCheck,
    first_interval,
    next_check,
)
from xtalkcal.drift.recheck import (
    CROSS_POINTS,
    FIRST_STAGE_FRACTION,
    MAX_BIRGE,
    MAX_SECOND_STAGE,
    DueReport,
    PairCheck,
    recheck_column,
    residual_axis,
    run_due,
    schedule_after_calibration,
    second_stage_shots,
    second_stage_target,
    unplayable_reason,
)
from xtalkcal.drift.schedule import (
    SCHEDULE_FORMAT,
    SCHEDULE_SCHEMA_VERSION,
    Pair,
    PairSlot,
    Schedule,
    ScheduleFileError,
)
from xtalkcal.drift.stored_sweep import take_out_co_victim_leak
from xtalkcal.drift.trends import (
    PairTrend,
    RandomWalkRate,
    pair_trend,
)

__all__ = [
    "PairTrend",
    "RandomWalkRate",
    "pair_trend",
    "DUE_DIFFUSION_SIGMA",
    "DUE_POLICY",
    "DUE_SAFETY",
    "FIRST_INTERVAL_FRACTION",
    "NextCheck",
    "first_interval",
    "next_check",
    "Pair",
    "PairSlot",
    "SCHEDULE_FORMAT",
    "SCHEDULE_SCHEMA_VERSION",
    "Schedule",
    "ScheduleFileError",
    "DEFAULT_RECHECK_RULES",
    "DriftInputError",
    "FollowUp",
    "RecheckDecision",
    "RecheckOutcome",
    "RecheckRules",
    "analyse_recheck",
    "analyse_recheck_counts",
    "recheck_design",
    "recheck_radius",
    "DueReport",
    "CROSS_POINTS",
    "FIRST_STAGE_FRACTION",
    "MAX_BIRGE",
    "MAX_SECOND_STAGE",
    "PairCheck",
    "recheck_column",
    "residual_axis",
    "second_stage_shots",
    "second_stage_target",
    "run_due",
    "schedule_after_calibration",
    "take_out_co_victim_leak",
    "unplayable_reason",
]
