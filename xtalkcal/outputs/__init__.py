"""Outputs: figures, the HTML/Markdown report and machine-readable exports.

May import: :mod:`xtalkcal.verification` and below. Nothing here imports a later stage of the flow.
"""

from xtalkcal.outputs.export import (
    MATRIX_FORMAT,
    MATRIX_SCHEMA,
    dumps,
    format_table,
    result_to_json,
    unsettled_pairs,
)
from xtalkcal.outputs.from_ledger import (
    calibration_from_ledger,
    entry_moment,
    rig_time_at,
)
from xtalkcal.outputs.history import (
    HISTORY_COLUMNS,
    history_csv,
    history_rows,
    history_table,
    plot_ledger_drift,
)
from xtalkcal.outputs.palette import COLOURS
from xtalkcal.outputs.played import (
    PLAYED_FORMAT,
    CompensatedRig,
    PlayedResidual,
    RigView,
    played_to_dict,
    read_played,
    verify_settings,
)
from xtalkcal.outputs.plot import (
    aggressor_frequencies,
    matrix_axes,
    neighbourhood_order,
    plot_matrix_db,
    plot_matrix_phase,
    plot_null_landscape,
)
from xtalkcal.outputs.plot_results import (
    plot_drift,
    plot_gate_errors,
    plot_residuals,
    plot_verification,
)
from xtalkcal.outputs.report import (
    write_report,
)
from xtalkcal.outputs.solve_choice import (
    SettingsChoice,
    choose_settings,
    closed_loop_choice,
    expected_residual_db,
    settings_pairs,
)

__all__ = [
    "calibration_from_ledger",
    "entry_moment",
    "rig_time_at",
    "HISTORY_COLUMNS",
    "history_csv",
    "history_rows",
    "history_table",
    "plot_ledger_drift",
    "PLAYED_FORMAT",
    "CompensatedRig",
    "PlayedResidual",
    "RigView",
    "played_to_dict",
    "read_played",
    "verify_settings",
    "SettingsChoice",
    "choose_settings",
    "closed_loop_choice",
    "expected_residual_db",
    "settings_pairs",
    "COLOURS",
    "aggressor_frequencies",
    "matrix_axes",
    "neighbourhood_order",
    "plot_drift",
    "plot_gate_errors",
    "plot_matrix_db",
    "plot_matrix_phase",
    "plot_null_landscape",
    "plot_residuals",
    "plot_verification",
    "write_report",
    "MATRIX_FORMAT",
    "MATRIX_SCHEMA",
    "dumps",
    "format_table",
    "result_to_json",
    "unsettled_pairs",
]
