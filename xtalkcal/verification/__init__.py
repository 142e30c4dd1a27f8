"""Verification: randomized benchmarking of each qubit alone and all together, with and without
compensation.

May import: :mod:`xtalkcal.drift` and below. Nothing here imports a later stage of the flow.
"""

from xtalkcal.verification.clifford import (
    CLIFFORD_DECOMPOSITIONS,
    PRIMITIVES,
    PRIMITIVES_PER_CLIFFORD,
    CliffordGroup,
    DragCondition,
    Transform,
    clifford_group,
    rotation_unitary,
)
from xtalkcal.verification.rb import (
    GateSet,
    RBFit,
    RBSequences,
    coherence_limited_error_per_gate,
    drag_coefficient_ns,
    draw_sequences,
    fit_rb,
    fit_rb_decay,
    rb_timelines,
    run_rb,
)
from xtalkcal.verification.simultaneous import (
    QubitComparison,
    SimultaneousRBReport,
    simultaneous_rb,
)
from xtalkcal.verification.trims import (
    DriveTrim,
    own_drive_trims,
    readout_offsets,
)

__all__ = [
    "CLIFFORD_DECOMPOSITIONS",
    "CliffordGroup",
    "DragCondition",
    "PRIMITIVES",
    "PRIMITIVES_PER_CLIFFORD",
    "Transform",
    "clifford_group",
    "rotation_unitary",
    "DriveTrim",
    "own_drive_trims",
    "readout_offsets",
    "QubitComparison",
    "SimultaneousRBReport",
    "simultaneous_rb",
    "GateSet",
    "RBFit",
    "RBSequences",
    "coherence_limited_error_per_gate",
    "drag_coefficient_ns",
    "draw_sequences",
    "fit_rb",
    "fit_rb_decay",
    "rb_timelines",
    "run_rb",
]
