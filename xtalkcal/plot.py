"""Figures. Every function takes ``ax=None`` and returns the Axes; nothing calls show()."""

from __future__ import annotations

import math

import matplotlib.pyplot as plt
import numpy as np
import xarray as xr
from matplotlib.patches import Ellipse

from xtalkcal.calibration import CalibrationResult

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


def _grid(ax, victims, lines, data, cmap, vmin, vmax, label, fmt):
    im = ax.imshow(data, cmap=cmap, vmin=vmin, vmax=vmax, origin="upper")
    ax.set_xticks(range(len(lines)), lines)
    ax.set_yticks(range(len(victims)), victims)
    ax.set_xlabel("aggressor line")
    ax.set_ylabel("victim qubit")
    for i in range(len(victims)):
        for j in range(len(lines)):
            v = data[i, j]
            if np.isfinite(v):
                ax.text(j, i, fmt(v), ha="center", va="center", fontsize=7,
                        color="white" if (v - vmin) / (vmax - vmin) < 0.55 else "black")
    ax.figure.colorbar(im, ax=ax, label=label, shrink=0.85)
    return ax


def plot_matrix_db(result: CalibrationResult, ax=None):
    """Heat map of |X_ij| in dB (diagonal = own line, blank)."""
    ax = ax or plt.subplots(figsize=(6.4, 5.2))[1]
    victims, lines, X = matrix_axes(result)
    db = 20 * np.log10(np.abs(X))
    _grid(ax, victims, lines, db, "magma", -55, -20, "|X| (dB)", lambda v: f"{v:.0f}")
    ax.set_title(f"{result.chip.name}: crosstalk magnitude at each aggressor's frequency")
    return ax


def plot_matrix_phase(result: CalibrationResult, ax=None):
    """Heat map of arg X_ij in degrees."""
    ax = ax or plt.subplots(figsize=(6.4, 5.2))[1]
    victims, lines, X = matrix_axes(result)
    ph = np.degrees(np.angle(X))
    _grid(ax, victims, lines, ph, "twilight", -180, 180, "arg X (deg)", lambda v: f"{v:.0f}")
    ax.set_title("crosstalk phase")
    return ax


def plot_null_landscape(sweep: xr.Dataset, victim: str, *, z_star: complex | None = None,
                        cov: np.ndarray | None = None, ax=None):
    """Measured points of one victim's null search, coloured by signal, with the fitted null
    and its 1σ and 3σ error ellipses (ellipses drawn ×10 larger when too small to see)."""
    ax = ax or plt.subplots(figsize=(5.6, 5.0))[1]
    s = sweep.sel(victim=victim)
    x, y, sig = s.z_re.values, s.z_im.values, s.signal.values
    sc = ax.scatter(x, y, c=sig, cmap="viridis", s=22, edgecolor="k", linewidth=0.3)
    ax.figure.colorbar(sc, ax=ax, label=s.signal.attrs.get("long_name", "signal"))
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
                 f"(K = {sweep.attrs.get('repeats')})")
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
