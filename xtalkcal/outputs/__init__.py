"""Outputs: figures, the HTML/Markdown report and machine-readable exports.

May import: :mod:`xtalkcal.verification` and below. Nothing here imports a later stage of the flow.
"""

from xtalkcal.outputs.export import (
    MATRIX_SCHEMA,
    dumps,
    format_table,
    result_to_json,
    unsettled_pairs,
)
from xtalkcal.outputs.plot import (
    matrix_axes,
    plot_drift,
    plot_gate_errors,
    plot_matrix_db,
    plot_matrix_phase,
    plot_null_landscape,
    plot_residuals,
    plot_verification,
)
from xtalkcal.outputs.report import (
    write_report,
)

__all__ = [
    "matrix_axes",
    "plot_drift",
    "plot_gate_errors",
    "plot_matrix_db",
    "plot_matrix_phase",
    "plot_null_landscape",
    "plot_residuals",
    "plot_verification",
    "write_report",
    "MATRIX_SCHEMA",
    "dumps",
    "format_table",
    "result_to_json",
    "unsettled_pairs",
]
