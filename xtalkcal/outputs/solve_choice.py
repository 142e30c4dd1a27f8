"""Which solve's settings a lab pushes: the multi-victim or closed-loop settings where they
are predicted (or measured) better, the pairwise ones where they are not.

The multi-victim solve cancels the leak of the cancellation tones onto each other, but its
settings carry the errors of the couplings it uses; the pairwise settings leave that leak
and carry only each pair's own error. Per aggressor column, each candidate's expected
residual at a victim is taken as √(|w|² + σ²): w the field its settings leave with every
tone of the column on (under the couplings measured by the column fits), σ the standard
error of the setting. The column keeps the pairwise settings if the other solve's worst
victim comes out worse, and a line says why.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

from xtalkcal.calibrate import CalibrationResult, measured_couplings
from xtalkcal.compensation import (
    CompensationSettings,
    multi_victim_settings,
    pairwise_settings,
    residuals,
)

__all__ = ["SettingsChoice", "choose_settings", "closed_loop_choice", "expected_residual_db",
           "prefer", "settings_pairs"]


@dataclass
class SettingsChoice:
    """Settings to push, and what was weighed to choose them.

    Attributes
    ----------
    settings : CompensationSettings
    notes : list of str
        One line per column where the pairwise settings were kept, with the reason.
    worst_db : dict of str to float
        Per candidate solve, its worst expected residual (dB) over all pairs.
    """

    settings: CompensationSettings
    notes: list[str] = field(default_factory=list)
    worst_db: dict[str, float] = field(default_factory=dict)


def settings_pairs(calibration: CalibrationResult) -> list[tuple[str, str]]:
    """The pairs that get a setting: accepted and nulled (survey estimates are not pushed)."""
    return [(p.aggressor, p.victim) for p in calibration.pairs if p.accepted and p.nulled]


def _model(calibration: CalibrationResult):
    """X(victim, line, f): the matrix element where (line, victim) was measured at f, else
    the coupling the column fits measured (0 where none)."""
    couple = measured_couplings(calibration)
    elements = {(p.aggressor, p.victim): p for p in calibration.pairs
                if p.accepted and p.x is not None}

    def x(victim: str, line: str, f: float) -> complex:
        p = elements.get((line, victim))
        if p is not None and abs(p.freq_ghz - f) < 1e-6:
            return complex(p.x)
        return couple(victim, line, f)

    return x


def expected_residual_db(settings: CompensationSettings, calibration: CalibrationResult
                         ) -> dict[tuple[str, str], float]:
    """Per pair, 20·log10 √(|w|² + σ²): the all-on field w the settings leave under the
    measured model, and their own standard error σ."""
    out = {}
    for p, res in zip(settings, residuals(settings, _model(calibration)), strict=True):
        out[p.key] = 10 * math.log10(max(abs(res.all_on) ** 2 + p.stderr ** 2, 1e-300))
    return out


def _per_column(settings: CompensationSettings, expected: dict) -> dict[str, float]:
    cols: dict[str, float] = {}
    for p in settings:
        cols[p.aggressor_line] = max(cols.get(p.aggressor_line, -math.inf), expected[p.key])
    return cols


def prefer(candidate: CompensationSettings, pairwise: CompensationSettings,
           model: CalibrationResult, label: str) -> SettingsChoice:
    """Per column, ``candidate`` unless ``pairwise`` is expected better under ``model``."""
    exp_c = expected_residual_db(candidate, model)
    exp_p = expected_residual_db(pairwise, model)
    col_c, col_p = _per_column(candidate, exp_c), _per_column(pairwise, exp_p)
    keep = {a for a in col_c if col_c[a] > col_p.get(a, math.inf)}
    notes = [f"{a}: kept the pairwise settings: the {label} settings are expected to leave "
             f"{col_c[a]:.1f} dB at the worst victim, the pairwise {col_p[a]:.1f} dB (the "
             "errors of the couplings it uses outweigh the leak it cancels)"
             for a in sorted(keep)]
    pw = {p.key: p for p in pairwise}
    chosen = tuple(pw[p.key] if p.aggressor_line in keep else p for p in candidate)
    worst = {label: max(exp_c.values(), default=-math.inf),
             "pairwise": max(exp_p.values(), default=-math.inf)}
    return SettingsChoice(CompensationSettings(candidate.chip, chosen), notes, worst)


def choose_settings(calibration: CalibrationResult, solve: str, *,
                    pairs=None) -> SettingsChoice:
    """Settings of the ``pairwise`` or ``multi-victim`` solve from a calibration (or a
    ledger's matrix), the multi-victim one never expected worse than the pairwise.

    The couplings are those the column fits measured (stored with the sweeps).
    """
    chip = calibration.chip
    keys = list(pairs) if pairs is not None else settings_pairs(calibration)
    pw = pairwise_settings(calibration, chip, pairs=keys)
    if solve == "pairwise":
        exp = expected_residual_db(pw, calibration)
        return SettingsChoice(pw, [], {"pairwise": max(exp.values(), default=-math.inf)})
    mv = multi_victim_settings(calibration, chip, pairs=keys,
                               couplings=measured_couplings(calibration))
    return prefer(mv, pw, calibration, "multi-victim")


def closed_loop_choice(first: SettingsChoice, refinement, calibration: CalibrationResult
                       ) -> SettingsChoice:
    """After :func:`xtalkcal.compensation.refine_settings`: the closed-loop settings where
    the refinement's own measurement (nulls and couplings near the operating point, both
    directions) expects them better than the pairwise ones, else the pairwise ones."""
    if not refinement.results:
        notes = first.notes + ["closed-loop refinement made no round (a null was not found "
                               "again): the multi-victim choice stands"]
        return SettingsChoice(first.settings, notes, first.worst_db)
    model = refinement.results[-1]
    pw = pairwise_settings(calibration, calibration.chip,
                           pairs=[p.key for p in refinement.settings])
    # the pairwise settings judged where they will play: under the refinement's model
    choice = prefer(refinement.settings, pw, model, "closed-loop")
    choice.notes = first.notes + choice.notes
    kept = {p.key for p in choice.settings if p.solve == "pairwise"}
    choice.settings = CompensationSettings(choice.settings.chip, tuple(
        p if p.key in kept else replace(p, solve="closed-loop") for p in choice.settings))
    return choice
