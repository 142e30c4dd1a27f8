"""Figures of results: residuals before and after, verification, gate errors, the drift watch.

Each takes ``ax=None`` (``axes=None``) and returns what it drew on; nothing calls show().
Crosstalk in dB is drawn as marks joined by a stem (before → after), never as bars, because
a bar in dB has no natural floor to hang from.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import matplotlib.pyplot as plt
import matplotlib.ticker as mticker
import numpy as np

from xtalkcal.calibrate import CalibrationResult
from xtalkcal.outputs.palette import COLOURS

__all__ = ["MANY_PAIRS", "plot_residuals", "plot_verification", "plot_gate_errors", "plot_drift"]

_DB_FLOOR = -120.0  # residuals below this are drawn at it (|X + r| = 0 has no dB value)


def _db(value: float) -> float:
    return max(20 * math.log10(max(value, 1e-300)), _DB_FLOOR)


# Beyond this many pairs a figure plots "after" against "before", one point per pair, and
# names only the worst few: a label per pair would shrink to nothing.
MANY_PAIRS = 60


def _scatter(ax, before: np.ndarray, after: np.ndarray, labels: list[str], *,
             before_label: str, after_label: str) -> np.ndarray:
    """Many pairs: "after" against "before", the five worst "after" named."""
    ax.plot(before, after, "s", ms=3, color=COLOURS["after"], alpha=0.8,
            label=f"{len(labels)} pairs")
    for i in np.argsort(-np.nan_to_num(after, nan=-np.inf))[:5]:
        ax.annotate(labels[i], (before[i], after[i]), fontsize=6, xytext=(3, 3),
                    textcoords="offset points")
    ax.set_xlabel(before_label.replace("before: ", "before compensation: ") + " (dB)")
    ax.set_ylabel(after_label.replace("after: ", "after: ") + " (dB)", fontsize=8)
    ax.grid(color="0.9", lw=0.6)
    return np.arange(len(labels))


def _stems(ax, before: np.ndarray, after: np.ndarray, labels: list[str], *,
           before_label: str, after_label: str) -> np.ndarray:
    """Per pair, a stem from its "before" mark down (or up) to its "after" mark."""
    if len(labels) > MANY_PAIRS:
        return _scatter(ax, before, after, labels, before_label=before_label,
                        after_label=after_label)
    k = np.arange(len(labels))
    ax.vlines(k, np.minimum(before, after), np.maximum(before, after),
              color=COLOURS["neutral"], lw=1.0, zorder=1)
    ax.plot(k, before, "o", ms=4, color=COLOURS["before"], label=before_label, zorder=2)
    ax.plot(k, after, "s", ms=4, color=COLOURS["after"], label=after_label, zorder=3)
    ax.set_xticks(k, labels, rotation=90, fontsize=6 if len(labels) > 30 else 7)
    ax.set_xlim(-0.7, len(labels) - 0.3)
    ax.set_ylabel("crosstalk at the victim (dB re its own line)")
    ax.set_xlabel("pair (aggressor line → victim)")
    ax.grid(axis="y", color="0.9", lw=0.6)
    return k


def _target_line(ax, value: float | None, text: str) -> None:
    if value is not None:
        ax.axhline(value, color=COLOURS["tolerance"], lw=0.9, ls=":",
                   label=f"{text} {value:g} dB")


def plot_residuals(result: CalibrationResult, truth: Mapping[tuple[str, str], complex], *,
                   after_db: Mapping[tuple[str, str], float] | None = None,
                   after_label: str = "after: |X + r| (true)", ax=None):
    """True crosstalk before (|X|) and after compensation, per nulled pair.

    Parameters
    ----------
    result : CalibrationResult
        The calibration; its protocol's ``target_residual_db`` is drawn as the target.
    truth : mapping
        (aggressor, victim) → true X (simulator only).
    after_db : mapping, optional
        (aggressor, victim) → true residual in dB with the settings actually written (for
        example every tone of the settings on). Default: |X + r| with r = −X measured.
    after_label : str
        Legend text of the "after" marks.
    """
    ax = ax or plt.subplots(figsize=(8.0, 4.4))[1]
    rows = [(p, truth[(p.aggressor, p.victim)]) for p in result.pairs
            if p.accepted and p.nulled and (p.aggressor, p.victim) in truth]
    rows.sort(key=lambda r: -abs(r[1]))
    before = np.array([_db(abs(t)) for _, t in rows])
    if after_db is None:
        after = np.array([_db(abs(t - p.x)) for p, t in rows])
    else:
        after = np.array([max(after_db.get((p.aggressor, p.victim), math.nan), _DB_FLOOR)
                          for p, _ in rows])
    _stems(ax, before, after, [f"{p.aggressor}→{p.victim}" for p, _ in rows],
           before_label="before: |X| (true)", after_label=after_label)
    _target_line(ax, result.protocol.null.target_residual_db, "target")
    ax.set_title(f"{result.chip.name}: nulled pairs, crosstalk before and residual after",
                 fontsize=10)
    ax.legend(fontsize=7, loc="upper right")
    return ax


def plot_verification(checks, calibration: CalibrationResult, *, truth=None, ax=None):
    """Measured crosstalk before (|X|) and measured residual after, all compensation on.

    ``checks`` are :class:`xtalkcal.drift.PairCheck` made right after the calibration;
    ``truth`` maps (aggressor, victim) → true residual in dB (simulator only, marks).
    """
    ax = ax or plt.subplots(figsize=(9.0, 4.4))[1]
    rows = []
    for c in checks:
        p = calibration.pair(c.aggressor, c.victim)
        if p.x is not None:
            rows.append((p, c))
    rows.sort(key=lambda r: -abs(r[0].x))
    before = np.array([_db(abs(p.x)) for p, _ in rows])
    after = np.array([max(c.outcome.residual_db, _DB_FLOOR) for _, c in rows])
    up = np.array([max(c.outcome.residual_upper_db, _DB_FLOOR) for _, c in rows])
    k = _stems(ax, before, after, [f"{p.aggressor}→{p.victim}" for p, _ in rows],
               before_label="before: |X| measured",
               after_label="after: residual measured (all tones on)")
    x = before if len(rows) > MANY_PAIRS else k
    ax.errorbar(x, after, yerr=[np.zeros_like(after), np.maximum(up - after, 0.0)], fmt="none",
                ecolor=COLOURS["bound"], lw=0.8, capsize=1.5, label="upper bound (2σ)")
    if truth and len(rows) <= MANY_PAIRS:
        tv = [truth.get((p.aggressor, p.victim)) for p, _ in rows]
        ax.plot([kk for kk, t in zip(k, tv, strict=True) if t is not None],
                [t for t in tv if t is not None], "_", ms=8, color=COLOURS["truth"],
                label="true field, all tones on")
    _target_line(ax, checks[0].outcome.tolerance_db if checks else None, "tolerance")
    ax.set_title(f"{calibration.chip.name}: verification, measured before and after "
                 f"compensation", fontsize=10)
    ax.legend(fontsize=7, loc="upper right", ncol=2)
    return ax


def plot_gate_errors(rb, *, chip: str | None = None, ax=None):
    """Error per gate per qubit: isolated, simultaneous without and with compensation.

    The axis is logarithmic in units of 10⁻⁴ with ticks at 1, 2 and 5 of every decade, so
    that small isolated errors read as well as large simultaneous ones.
    """
    ax = ax or plt.subplots(figsize=(7.0, 4.0))[1]
    ds = rb.to_dataset()
    conds = list(ds.condition.values)
    qubits = list(ds.qubit.values)
    width = 0.8 / len(conds)
    colours = {"isolated": COLOURS["isolated"], "uncompensated": COLOURS["before"],
               "compensated": COLOURS["after"]}
    markers = {"isolated": "o", "uncompensated": "^", "compensated": "s"}
    values = []
    for j, c in enumerate(conds):
        v = 1e4 * ds.error_per_gate.sel(condition=c).values
        e = 1e4 * ds.error_per_gate_stderr.sel(condition=c).values
        values.append(v[np.isfinite(v) & (v > 0)])
        # marks, not bars: a bar on a log axis hangs from an arbitrary floor
        ax.errorbar(np.arange(len(qubits)) + (j - (len(conds) - 1) / 2) * width, v,
                    yerr=np.minimum(e, 0.95 * v), fmt=markers.get(c, "o"), ms=6, capsize=2,
                    label=c if c == "isolated" else f"simultaneous, {c}",
                    color=colours.get(c, COLOURS["neutral"]))
    ax.set_xticks(range(len(qubits)), qubits)
    ax.set_xlim(-0.6, len(qubits) - 0.4)
    ax.set_ylabel("error per gate (×10⁻⁴)")
    ax.set_yscale("log")
    positive = np.concatenate(values) if values else np.zeros(0)
    if positive.size:
        ax.set_ylim(10 ** math.floor(math.log10(positive.min() * 0.8)),
                    10 ** math.ceil(math.log10(positive.max() * 1.6)))
    ax.yaxis.set_major_locator(mticker.LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    ax.yaxis.set_minor_locator(mticker.NullLocator())
    ax.yaxis.set_major_formatter(mticker.FuncFormatter(lambda v, _: f"{v:g}"))
    ax.tick_params(axis="y", labelsize=8)
    ax.grid(axis="y", color="0.9", lw=0.6)
    where = f"{chip}: " if chip else ""
    ax.set_title(f"{where}simultaneous RB, error per gate before and after compensation",
                 fontsize=10)
    ax.legend(fontsize=8)
    return ax


def plot_drift(samples, tolerance_db: float, *, pairs=None, chip: str | None = None, axes=None):
    """Residual of the compensation in use versus time, with re-checks and tolerance.

    One panel per pair (default: the six pairs whose true residual came closest to the
    tolerance, or with most re-checks when no truth is known).
    """
    by_pair: dict[tuple[str, str], list] = {}
    for s in samples:
        by_pair.setdefault((s.aggressor, s.victim), []).append(s)

    def score(p):
        ss = by_pair[p]
        tr = [s.true_residual_db for s in ss if s.true_residual_db is not None]
        return max(tr) if tr else sum(s.checked_residual_db is not None for s in ss)

    chosen = list(pairs) if pairs else sorted(by_pair, key=score, reverse=True)[:6]
    if axes is None:
        fig, axes = plt.subplots(len(chosen), 1, figsize=(8.0, 1.6 * len(chosen) + 0.8),
                                 sharex=True, squeeze=False)
        axes = axes[:, 0]
    marks = {"within": "o", "drifted": "s", "broken": "x"}
    for ax, p in zip(axes, chosen, strict=True):
        ss = by_pair[p]
        t = np.array([s.t_s for s in ss]) / 3600.0
        tr = [s.true_residual_db for s in ss]
        if any(v is not None for v in tr):
            ax.plot(t, [np.nan if v is None else v for v in tr], color=COLOURS["truth"], lw=0.8,
                    label="true residual")
        for dec, m in marks.items():
            pts = [(s.t_s / 3600.0, s.checked_residual_db) for s in ss if s.decision == dec]
            if pts:
                ax.plot(*zip(*pts, strict=True), m, color=COLOURS[dec], ms=4, ls="none",
                        label=f"re-check: {dec}")
        ax.axhspan(tolerance_db, 0, color=COLOURS["tolerance"], alpha=0.08)
        ax.axhline(tolerance_db, color=COLOURS["tolerance"], lw=0.8, ls="--",
                   label=f"tolerance {tolerance_db:g} dB")
        ax.set_ylim(-90, -25)
        ax.set_ylabel("residual (dB)", fontsize=8)
        ax.text(0.01, 0.85, f"{p[0]} → {p[1]}", transform=ax.transAxes, fontsize=8)
    # one legend for every kind of mark drawn in any panel
    handles: dict[str, Any] = {}
    for ax in axes:
        for h, lab in zip(*ax.get_legend_handles_labels(), strict=True):
            handles.setdefault(lab, h)
    axes[0].legend(list(handles.values()), list(handles), fontsize=7, loc="upper right",
                   ncol=3)
    axes[-1].set_xlabel("time since calibration (h)")
    where = f"{chip}: " if chip else ""
    axes[0].set_title(f"{where}drift watch, residual of the compensation in use "
                      f"(band above the tolerance shaded)", fontsize=10)
    return axes
