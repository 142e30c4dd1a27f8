"""Figures. Every function takes ``ax=None`` and returns the Axes; nothing calls show()."""

from __future__ import annotations

import math
from typing import Any

import matplotlib.colors as mcolors
import matplotlib.pyplot as plt
import matplotlib.ticker as mticker
import numpy as np
import xarray as xr
from matplotlib.patches import Ellipse, Patch, Rectangle

from xtalkcal.calibrate import CalibrationResult

__all__ = ["matrix_axes", "plot_matrix_db", "plot_matrix_phase", "plot_null_landscape",
           "plot_residuals"]


def matrix_axes(result: CalibrationResult) -> tuple[list[str], list[str], np.ndarray]:
    """(victims, lines, X) with X[victim, line] complex, NaN where unknown."""
    chip = result.chip
    victims = list(chip.qubit_names)
    lines = list(chip.line_names)
    X = np.full((len(victims), len(lines)), np.nan + 0j)
    for p in result.pairs:
        if p.accepted and p.x is not None:
            X[victims.index(p.victim), lines.index(p.aggressor)] = p.x
    return victims, lines, X


# Kinds of heat-map cell besides a plain coloured value (a nulled pair), each drawn so
# that it reads without colour too (hatch or frame), and named in the figure's key.
_OWN, _REJECTED, _UNMEASURED, _SURVEY = "own", "rejected", "unmeasured", "survey"
_KEY_LABELS = {
    "value": "nulled: value from the null search",
    _OWN: "own line (drives this qubit)",
    _REJECTED: "rejected: no accepted value (reason in the matrix table)",
    _UNMEASURED: "not measured",
    _SURVEY: "survey estimate only: not nulled",
}
_OWN_FILL, _OWN_HATCH = "0.7", "////"
_REJ_FILL, _REJ_HATCH = "white", "xxxx"
_EMPTY_EDGE = "0.8"


def _cell_kinds(result: CalibrationResult, victims: list[str], lines: list[str]) -> np.ndarray:
    """Per (victim, line) cell: "value" (nulled), _SURVEY, _REJECTED, _OWN or _UNMEASURED."""
    kinds = np.full((len(victims), len(lines)), _UNMEASURED, dtype=object)
    for j, ln in enumerate(lines):
        own = result.chip.line(ln).qubit
        if own in victims:
            kinds[victims.index(own), j] = _OWN
    for p in result.pairs:
        i, j = victims.index(p.victim), lines.index(p.aggressor)
        if p.accepted and p.x is not None:
            kinds[i, j] = "value" if p.nulled else _SURVEY
        else:
            kinds[i, j] = _REJECTED
    return kinds


def _relative_luminance(rgba) -> float:
    """Relative luminance of an sRGB colour as defined in WCAG 2.1 (W3C)."""
    c = np.asarray(rgba[:3], dtype=float)
    lin = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    return float(lin @ np.array([0.2126, 0.7152, 0.0722]))


def _label_color(rgba) -> str:
    """Black or white, whichever has the higher WCAG contrast ratio with the cell colour."""
    lum = _relative_luminance(rgba)
    return "black" if (lum + 0.05) / 0.05 >= 1.05 / (lum + 0.05) else "white"


def _grid(ax, victims, lines, data, kinds, cmap, vmin, vmax, label, fmt):
    cmap = plt.get_cmap(cmap)
    norm = mcolors.Normalize(vmin, vmax)
    im = ax.imshow(data, cmap=cmap, norm=norm, origin="upper")
    ax.set_xticks(range(len(lines)), lines)
    ax.set_yticks(range(len(victims)), victims)
    # thin cell borders, so that empty (not measured) cells still read as cells
    ax.set_xticks(np.arange(len(lines) + 1) - 0.5, minor=True)
    ax.set_yticks(np.arange(len(victims) + 1) - 0.5, minor=True)
    ax.tick_params(which="minor", length=0)
    ax.grid(which="minor", color=_EMPTY_EDGE, lw=0.5)
    ax.set_xlabel("aggressor line")
    ax.set_ylabel("victim qubit")
    for i in range(len(victims)):
        for j in range(len(lines)):
            kind, v = kinds[i, j], data[i, j]
            if kind == _OWN:
                ax.add_patch(Rectangle((j - 0.5, i - 0.5), 1, 1, facecolor=_OWN_FILL,
                                       edgecolor="white", hatch=_OWN_HATCH, lw=0))
            elif kind == _REJECTED:
                ax.add_patch(Rectangle((j - 0.5, i - 0.5), 1, 1, facecolor=_REJ_FILL,
                                       edgecolor="0.35", hatch=_REJ_HATCH, lw=0))
            elif kind in ("value", _SURVEY):
                ink = _label_color(cmap(norm(v)))
                ax.text(j, i, fmt(v), ha="center", va="center", fontsize=7, color=ink)
                if kind == _SURVEY:
                    ax.add_patch(Rectangle((j - 0.4, i - 0.4), 0.8, 0.8, fill=False,
                                           edgecolor=ink, ls=(0, (1, 1.5)), lw=0.9))
    finite = data[np.isfinite(data)]
    low, high = bool((finite < vmin).any()), bool((finite > vmax).any())
    extend = {(True, True): "both", (True, False): "min", (False, True): "max"}.get(
        (low, high), "neither")
    ax.figure.colorbar(im, ax=ax, label=label, shrink=0.85, extend=extend)
    present = set(kinds.ravel())
    handles = []
    if _SURVEY in present:
        # shown on the lightest colour of the map, where the dotted frame is black
        swatch = max(cmap(np.linspace(0, 1, 65)), key=_relative_luminance)
        if "value" in present:
            handles.append(Patch(facecolor=swatch, lw=0, label=_KEY_LABELS["value"]))
        handles.append(Patch(facecolor=swatch, edgecolor=_label_color(swatch),
                             ls=(0, (1, 1.5)), lw=0.9, label=_KEY_LABELS[_SURVEY]))
    if _REJECTED in present:
        handles.append(Patch(facecolor=_REJ_FILL, edgecolor="0.35", hatch=_REJ_HATCH, lw=0,
                             label=_KEY_LABELS[_REJECTED]))
    if _OWN in present:
        handles.append(Patch(facecolor=_OWN_FILL, edgecolor="white", hatch=_OWN_HATCH, lw=0,
                             label=_KEY_LABELS[_OWN]))
    if _UNMEASURED in present:
        handles.append(Patch(facecolor="white", edgecolor=_EMPTY_EDGE, lw=0.8,
                             label=_KEY_LABELS[_UNMEASURED]))
    if handles:
        ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.1), ncol=2,
                  fontsize=7, frameon=False, handlelength=1.6, handleheight=1.3,
                  columnspacing=1.2)
    return ax


def plot_matrix_db(result: CalibrationResult, ax=None):
    """Heat map of |X_ij| in dB, with a key for the cells that carry no plain value.

    Own-line cells are hatched grey, rejected pairs cross-hatched, pairs known only from
    the survey (not nulled) framed with a dotted line, unmeasured cells left white.
    """
    ax = ax or plt.subplots(figsize=(6.4, 5.8))[1]
    victims, lines, X = matrix_axes(result)
    with np.errstate(divide="ignore"):
        db = 20 * np.log10(np.abs(X))
    _grid(ax, victims, lines, db, _cell_kinds(result, victims, lines), "magma", -55, -20,
          "|X| (dB)", lambda v: f"{v:.0f}")
    ax.set_title(f"{result.chip.name}: crosstalk magnitude at each aggressor's frequency")
    return ax


def plot_matrix_phase(result: CalibrationResult, ax=None):
    """Heat map of arg X_ij in degrees, cells marked as in :func:`plot_matrix_db`."""
    ax = ax or plt.subplots(figsize=(6.4, 5.8))[1]
    victims, lines, X = matrix_axes(result)
    ph = np.degrees(np.angle(X))
    _grid(ax, victims, lines, ph, _cell_kinds(result, victims, lines), "twilight", -180, 180,
          "arg X (deg)", lambda v: f"{v:.0f}")
    ax.set_title("crosstalk phase")
    return ax


def plot_null_landscape(sweep: xr.Dataset, victim: str, *, z_star: complex | None = None,
                        cov: np.ndarray | None = None, ax=None):
    """Measured points of one victim's null search, coloured by signal, with the fitted null
    and its 1σ and 3σ error ellipses (ellipses drawn ×10 larger when too small to see)."""
    ax = ax or plt.subplots(figsize=(5.6, 5.0))[1]
    s = sweep.sel(victim=victim)
    x, y, sig = s.z_re.values, s.z_im.values, s.signal.values
    k_final = sweep.attrs.get("repeats")
    # Points taken at another amplification K (a raised-K null search) have signals on
    # another scale: drawn hollow, out of the colour scale.
    same = (sweep["repeats"].values == k_final if "repeats" in sweep
            else np.ones(x.shape, bool))
    if (~same).any():
        ax.scatter(x[~same], y[~same], s=18, facecolor="none", edgecolor="0.5", linewidth=0.6,
                   label="points at a lower K")
    sc = ax.scatter(x[same], y[same], c=sig[same], cmap="viridis", s=22, edgecolor="k",
                    linewidth=0.3)
    ax.figure.colorbar(sc, ax=ax, label=s.signal.attrs.get("long_name", "signal")
                       + f" at K = {k_final}")
    if z_star is not None:
        ax.plot(z_star.real, z_star.imag, marker="+", color="red", ms=14, mew=2,
                label="fitted null")
        if cov is not None:
            w, v = np.linalg.eigh(cov)
            span = max(np.ptp(x), np.ptp(y))
            mag = 10.0 if 3 * math.sqrt(w.max()) < 0.02 * span else 1.0
            for k, ls in ((1, "-"), (3, "--")):
                ax.add_patch(Ellipse((z_star.real, z_star.imag),
                                     2 * k * mag * math.sqrt(w[1]), 2 * k * mag * math.sqrt(w[0]),
                                     angle=math.degrees(math.atan2(v[1, 1], v[0, 1])),
                                     fill=False, color="red", ls=ls, lw=1))
            if mag != 1.0:
                ax.text(0.02, 0.02, "ellipses ×10", transform=ax.transAxes, fontsize=8)
        ax.legend(loc="upper right", fontsize=8)
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel("cancellation tone Re z (full scale)")
    ax.set_ylabel("Im z (full scale)")
    ax.set_title(f"null search: {sweep.attrs.get('aggressor')} → {victim} "
                 f"(K = {k_final} aggressor pulses)")
    return ax


def plot_residuals(result: CalibrationResult, truth: dict[tuple[str, str], complex], ax=None):
    """Crosstalk before (|X|) and after compensation (|X + r|, against the truth) per pair."""
    ax = ax or plt.subplots(figsize=(8.0, 4.2))[1]
    rows = [(p, truth[(p.aggressor, p.victim)]) for p in result.pairs
            if p.accepted and p.nulled and (p.aggressor, p.victim) in truth]
    rows.sort(key=lambda r: -abs(r[1]))
    before = [20 * math.log10(abs(t)) for _, t in rows]
    after = [20 * math.log10(max(abs(t - p.x), 1e-12)) for p, t in rows]
    k = np.arange(len(rows))
    floor = -80.0  # bars grow up from this level so that dB values read as heights
    ax.bar(k - 0.2, np.array(before) - floor, 0.4, bottom=floor, label="before: |X|",
           color="#c44e52")
    ax.bar(k + 0.2, np.array(after) - floor, 0.4, bottom=floor, label="after: |X + r| (true)",
           color="#4c72b0")
    ax.set_xticks(k, [f"{p.aggressor}→{p.victim}" for p, _ in rows], rotation=90, fontsize=7)
    ax.set_ylim(-80, -15)
    ax.axhline(-50, color="k", lw=0.8, ls=":", label="−50 dB")
    ax.set_ylabel("crosstalk (dB)")
    ax.set_title("nulled pairs: crosstalk before and residual after compensation")
    ax.legend(fontsize=8, loc="upper right")
    return ax


def plot_verification(checks, calibration: CalibrationResult, *, truth=None, ax=None):
    """Measured crosstalk before (|X|) and measured residual after, all compensation on.

    ``checks`` are :class:`xtalkcal.drift.PairCheck` made right after the calibration;
    ``truth`` maps (aggressor, victim) → true residual in dB (simulator only, markers).
    """
    ax = ax or plt.subplots(figsize=(9.0, 4.2))[1]
    rows = []
    for c in checks:
        p = calibration.pair(c.aggressor, c.victim)
        if p.x is None:
            continue
        rows.append((p, c))
    rows.sort(key=lambda r: -abs(r[0].x))
    k = np.arange(len(rows))
    floor = -80.0
    before = np.array([20 * math.log10(abs(p.x)) for p, _ in rows])
    after = np.array([max(c.outcome.residual_db, floor) for _, c in rows])
    up = np.array([max(c.outcome.residual_upper_db, floor) for _, c in rows])
    ax.bar(k - 0.2, before - floor, 0.4, bottom=floor, color="#c44e52",
           label="before: |X| measured")
    ax.bar(k + 0.2, after - floor, 0.4, bottom=floor, color="#4c72b0",
           label="after: residual measured (all tones on)")
    ax.errorbar(k + 0.2, after, yerr=[np.zeros_like(after), up - after], fmt="none",
                ecolor="#223355", lw=0.8, capsize=1.5, label="2σ upper bound")
    if truth:
        tv = [truth.get((p.aggressor, p.victim)) for p, _ in rows]
        ax.plot([kk + 0.2 for kk, t in zip(k, tv, strict=True) if t is not None],
                [t for t in tv if t is not None], "k_", ms=7, label="true field, all tones on")
    tol = checks[0].outcome.tolerance_db if checks else None
    if tol is not None:
        ax.axhline(tol, color="k", lw=0.8, ls=":", label=f"tolerance {tol:g} dB")
    ax.set_xticks(k, [f"{p.aggressor}→{p.victim}" for p, _ in rows], rotation=90, fontsize=6)
    ax.set_ylim(floor, -15)
    ax.set_ylabel("crosstalk (dB)")
    ax.set_title("verification: measured before and after compensation")
    ax.legend(fontsize=7, loc="upper right", ncol=2)
    return ax


def plot_gate_errors(rb, ax=None):
    """Error per gate per qubit: isolated, simultaneous without and with compensation."""
    ax = ax or plt.subplots(figsize=(7.0, 4.0))[1]
    ds = rb.to_dataset()
    conds = list(ds.condition.values)
    qubits = list(ds.qubit.values)
    width = 0.8 / len(conds)
    colors = {"isolated": "#55a868", "uncompensated": "#c44e52", "compensated": "#4c72b0"}
    for j, c in enumerate(conds):
        v = 1e4 * ds.error_per_gate.sel(condition=c).values
        e = 1e4 * ds.error_per_gate_stderr.sel(condition=c).values
        ax.bar(np.arange(len(qubits)) + (j - (len(conds) - 1) / 2) * width, v, width, yerr=e,
               capsize=2, label=c if c == "isolated" else f"simultaneous, {c}",
               color=colors.get(c))
    ax.set_xticks(range(len(qubits)), qubits)
    ax.set_ylabel("error per gate (10⁻⁴)")
    ax.set_yscale("log")
    ax.yaxis.set_minor_locator(mticker.LogLocator(subs=(2.0, 5.0)))
    ax.yaxis.set_major_formatter(mticker.FormatStrFormatter("%g"))
    ax.yaxis.set_minor_formatter(mticker.FormatStrFormatter("%g"))
    ax.tick_params(axis="y", which="both", labelsize=8)
    ax.set_title("simultaneous RB: error per gate, before and after compensation", fontsize=10)
    ax.legend(fontsize=8)
    return ax


def plot_drift(samples, tolerance_db: float, *, pairs=None, axes=None):
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
        fig, axes = plt.subplots(len(chosen), 1, figsize=(8.0, 1.6 * len(chosen) + 0.6),
                                 sharex=True, squeeze=False)
        axes = axes[:, 0]
    marks = {"within": ("o", "#55a868"), "drifted": ("s", "#dd8452"), "broken": ("x", "#c44e52")}
    for ax, p in zip(axes, chosen, strict=True):
        ss = by_pair[p]
        t = np.array([s.t_s for s in ss]) / 3600.0
        tr = [s.true_residual_db for s in ss]
        if any(v is not None for v in tr):
            ax.plot(t, [np.nan if v is None else v for v in tr], color="0.3", lw=1,
                    label="true residual")
        for dec, (m, col) in marks.items():
            pts = [(s.t_s / 3600.0, s.checked_residual_db) for s in ss if s.decision == dec]
            if pts:
                ax.plot(*zip(*pts, strict=True), m, color=col, ms=4, ls="none",
                        label=f"re-check: {dec}")
        ax.axhspan(tolerance_db, 0, color="#c44e52", alpha=0.08)
        ax.axhline(tolerance_db, color="#c44e52", lw=0.8, ls="--")
        ax.set_ylim(-90, -25)
        ax.set_ylabel("dB", fontsize=8)
        ax.text(0.01, 0.85, f"{p[0]} → {p[1]}", transform=ax.transAxes, fontsize=8)
    # one legend for every kind of mark drawn in any panel
    handles: dict[str, Any] = {}
    for ax in axes:
        for h, lab in zip(*ax.get_legend_handles_labels(), strict=True):
            handles.setdefault(lab, h)
    axes[0].legend(list(handles.values()), list(handles), fontsize=7, loc="upper right",
                   ncol=4)
    axes[-1].set_xlabel("time since calibration (h)")
    axes[0].set_title(f"drift watch: residual of the compensation in use "
                      f"(tolerance {tolerance_db:g} dB shaded above)")
    return axes
