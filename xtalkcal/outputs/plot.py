"""Figures of the matrix and of a null search. Each takes ``ax=None`` and returns the Axes;
nothing calls show(). The figures of results (residuals, gates, drift) are in
:mod:`xtalkcal.outputs.plot_results`."""

from __future__ import annotations

import cmath
import math

import matplotlib.colors as mcolors
import matplotlib.pyplot as plt
import numpy as np
import xarray as xr
from matplotlib.patches import Ellipse, Patch, Rectangle

from xtalkcal.calibrate import CalibrationResult
from xtalkcal.outputs.palette import COLOURS

__all__ = ["SMALL_MATRIX", "aggressor_frequencies", "matrix_axes", "neighbourhood_order",
           "plot_matrix_db", "plot_matrix_phase", "plot_null_landscape"]


# Up to this many qubits a heat map labels every cell and gives every aggressor's frequency;
# beyond it the qubits are ordered by neighbourhood and the cells carry colour only.
SMALL_MATRIX = 16


def neighbourhood_order(result: CalibrationResult) -> list[str]:
    """The chip's qubits ordered so that strongly coupled ones sit near each other.

    Reverse Cuthill–McKee (SciPy's ``reverse_cuthill_mckee``) on the graph whose edges are
    the measured pairs above the survey threshold, taken both ways: the heat map of a large
    chip then gathers its crosstalk near the diagonal, neighbourhood by neighbourhood.
    """
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import reverse_cuthill_mckee

    chip = result.chip
    names = list(chip.qubit_names)
    index = {q: i for i, q in enumerate(names)}
    threshold = result.protocol.survey.threshold_db
    rows, cols = [], []
    for p in result.pairs:
        own = chip.line(p.aggressor).qubit
        if p.accepted and p.x is not None and p.magnitude_db >= threshold and own in index:
            rows += [index[p.victim], index[own]]
            cols += [index[own], index[p.victim]]
    graph = csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(len(names), len(names)))
    return [names[i] for i in reverse_cuthill_mckee(graph, symmetric_mode=True)]


def matrix_axes(result: CalibrationResult) -> tuple[list[str], list[str], np.ndarray]:
    """(victims, lines, X) with X[victim, line] complex, NaN where unknown.

    On a chip of more than :data:`SMALL_MATRIX` qubits the victims are in
    :func:`neighbourhood_order` and each line sits where its own qubit does.
    """
    chip = result.chip
    victims = list(chip.qubit_names)
    lines = list(chip.line_names)
    if len(victims) > SMALL_MATRIX:
        victims = neighbourhood_order(result)
        rank = {q: i for i, q in enumerate(victims)}
        lines.sort(key=lambda ln: rank.get(chip.line(ln).qubit, len(rank)))
    vi = {q: i for i, q in enumerate(victims)}
    li = {ln: j for j, ln in enumerate(lines)}
    X = np.full((len(victims), len(lines)), np.nan + 0j)
    for p in result.pairs:
        if p.accepted and p.x is not None:
            X[vi[p.victim], li[p.aggressor]] = p.x
    return victims, lines, X


def aggressor_frequencies(result: CalibrationResult, lines: list[str]) -> list[float]:
    """Per line, the tone frequency (GHz) its pairs were measured at, else its qubit's f01."""
    measured = {p.aggressor: p.freq_ghz for p in result.pairs}
    chip = result.chip
    return [measured.get(ln, chip.qubit(chip.line(ln).qubit).f01_ghz) for ln in lines]


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
    vi = {q: i for i, q in enumerate(victims)}
    li = {ln: j for j, ln in enumerate(lines)}
    for j, ln in enumerate(lines):
        own = result.chip.line(ln).qubit
        if own in vi:
            kinds[vi[own], j] = _OWN
    for p in result.pairs:
        i, j = vi[p.victim], li[p.aggressor]
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


def _grid(ax, victims, lines, data, kinds, cmap, vmin, vmax, label, fmt, *, freqs=None,
          marks=()):
    cmap = plt.get_cmap(cmap)
    norm = mcolors.Normalize(vmin, vmax)
    im = ax.imshow(data, cmap=cmap, norm=norm, origin="upper")
    if freqs is None:
        ax.set_xticks(range(len(lines)), lines)
        ax.set_xlabel("aggressor line")
    else:
        # each aggressor's tone frequency under its name: X depends on it
        ax.set_xticks(range(len(lines)), [f"{ln}\n{f:.3f}" for ln, f in
                                          zip(lines, freqs, strict=True)], fontsize=7)
        ax.set_xlabel("aggressor line, and its tone frequency (GHz)")
    ax.set_yticks(range(len(victims)), victims)
    # thin cell borders, so that empty (not measured) cells still read as cells
    ax.set_xticks(np.arange(len(lines) + 1) - 0.5, minor=True)
    ax.set_yticks(np.arange(len(victims) + 1) - 0.5, minor=True)
    ax.tick_params(which="minor", length=0)
    ax.grid(which="minor", color=_EMPTY_EDGE, lw=0.5)
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
    if marks:
        label += "\n" + "; ".join(f"line across the bar: {text}" for _, text in marks)
    bar = ax.figure.colorbar(im, ax=ax, label=label, shrink=0.85, extend=extend)
    for value, _ in marks:
        # a level worth reading off the scale (the survey threshold): a line across the bar
        bar.ax.axhline(value, color="black", lw=2.0)
        bar.ax.axhline(value, color="white", lw=0.8)
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


def _grid_large(ax, victims, lines, data, kinds, cmap, vmin, vmax, label, *, marks=()):
    """A heat map of a large chip: colour only, kinds as overlays, thinned tick labels."""
    cmap = plt.get_cmap(cmap)
    norm = mcolors.Normalize(vmin, vmax)
    im = ax.imshow(data, cmap=cmap, norm=norm, origin="upper", interpolation="nearest")
    # own-line and rejected cells as one overlay image each, not one patch per cell
    overlay = np.zeros(data.shape + (4,))
    overlay[kinds == _OWN] = mcolors.to_rgba(_OWN_FILL)
    overlay[kinds == _REJECTED] = mcolors.to_rgba(COLOURS["broken"])
    ax.imshow(overlay, origin="upper", interpolation="nearest")
    si, sj = np.nonzero(kinds == _SURVEY)
    if len(si):
        ax.scatter(sj, si, s=2, color="white", marker=".", linewidths=0)
    step = max(1, math.ceil(max(len(victims), len(lines)) / 40))
    ax.set_xticks(range(0, len(lines), step), lines[::step], rotation=90, fontsize=6)
    ax.set_yticks(range(0, len(victims), step), victims[::step], fontsize=6)
    ax.set_xlabel("aggressor line (placed with its own qubit)"
                  + (f"; one name in {step}" if step > 1 else ""))
    ax.set_ylabel("victim qubit (ordered by neighbourhood)")
    if marks:
        label += "\n" + "; ".join(f"line across the bar: {text}" for _, text in marks)
    bar = ax.figure.colorbar(im, ax=ax, label=label, shrink=0.8)
    for value, _ in marks:
        bar.ax.axhline(value, color="black", lw=2.0)
        bar.ax.axhline(value, color="white", lw=0.8)
    present = set(kinds.ravel())
    handles = [Patch(facecolor=f, label=_KEY_LABELS[k]) for k, f in
               ((_OWN, _OWN_FILL), (_REJECTED, COLOURS["broken"])) if k in present]
    if _SURVEY in present:
        handles.append(Patch(facecolor="black", edgecolor="white", hatch="..",
                             label="white dot: " + _KEY_LABELS[_SURVEY]))
    if _UNMEASURED in present:
        handles.append(Patch(facecolor="white", edgecolor=_EMPTY_EDGE,
                             label=_KEY_LABELS[_UNMEASURED]))
    if handles:
        ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.12), ncol=2,
                  fontsize=7, frameon=False)
    return ax


def _matrix_figure(result: CalibrationResult, ax):
    n = len(result.chip.qubit_names)
    if ax is not None:
        return ax
    if n <= SMALL_MATRIX:
        return plt.subplots(figsize=(6.4, 5.8))[1]
    side = min(4.0 + 0.09 * n, 20.0)  # cells stay visible; labels keep their size
    return plt.subplots(figsize=(side + 1.6, side + 1.0))[1]


def plot_matrix_db(result: CalibrationResult, ax=None):
    """Heat map of |X_ij| in dB, with a key for the cells that carry no plain value.

    Own-line cells are hatched grey, rejected pairs cross-hatched, pairs known only from
    the survey (not nulled) framed with a dotted line, unmeasured cells left white.
    """
    ax = _matrix_figure(result, ax)
    victims, lines, X = matrix_axes(result)
    with np.errstate(divide="ignore"):
        db = 20 * np.log10(np.abs(X))
    threshold = result.protocol.survey.threshold_db
    marks = [(threshold, f"survey threshold {threshold:g} dB")] if -55 < threshold < -20 else []
    kinds = _cell_kinds(result, victims, lines)
    label = "|X| (dB re the victim's own line)"
    if len(victims) > SMALL_MATRIX:
        _grid_large(ax, victims, lines, db, kinds, "magma", -55, -20, label, marks=marks)
    else:
        _grid(ax, victims, lines, db, kinds, "magma", -55, -20, label, lambda v: f"{v:.0f}",
              freqs=aggressor_frequencies(result, lines), marks=marks)
    ax.set_title(f"{result.chip.name}: crosstalk magnitude |X|", fontsize=10)
    return ax


def plot_matrix_phase(result: CalibrationResult, ax=None):
    """Heat map of arg X_ij in degrees, cells marked as in :func:`plot_matrix_db`."""
    ax = _matrix_figure(result, ax)
    victims, lines, X = matrix_axes(result)
    ph = np.degrees(np.angle(X))
    kinds = _cell_kinds(result, victims, lines)
    if len(victims) > SMALL_MATRIX:
        _grid_large(ax, victims, lines, ph, kinds, "twilight", -180, 180, "arg X (deg)")
    else:
        _grid(ax, victims, lines, ph, kinds, "twilight", -180, 180, "arg X (deg)",
              lambda v: f"{v:.0f}", freqs=aggressor_frequencies(result, lines))
    ax.set_title(f"{result.chip.name}: crosstalk phase arg X", fontsize=10)
    return ax


# What each method's error signal is, and its unit.
_SIGNAL = {"leakage": ("P(|2⟩)", "probability"), "rotation": ("P(|1⟩)", "probability"),
           "stark": ("Stark phase", "rad")}
_STARK_NOTE = ("Stark: the phase grows as |X + z|², so every point near the null reads low; "
               "the null is where the fitted bowl is lowest.")


def _last_ring(sweep: xr.Dataset, same: np.ndarray) -> np.ndarray:
    """Indices of the points of the last search round taken at the final K."""
    rounds = sweep["round"].values if "round" in sweep else np.zeros(same.shape, int)
    if not same.any():
        return np.zeros(0, int)
    last = rounds[same].max()
    return np.flatnonzero(same & (rounds == last))


def plot_null_landscape(sweep: xr.Dataset, victim: str, *, z_star: complex | None = None,
                        cov: np.ndarray | None = None, chip: str | None = None, ax=None):
    """One victim's null search: the measured points coloured by error signal, the fitted null
    with its 1σ and 3σ ellipses (drawn ×10 when too small to see), and, in a panel below,
    the last ring's signal against its angle, where the minimum shows.

    Returns the Axes of the landscape; the ring panel is drawn only when ``ax`` is None.
    """
    ring_ax = None
    if ax is None:
        fig, (ax, ring_ax) = plt.subplots(2, 1, figsize=(5.8, 7.4),
                                          gridspec_kw={"height_ratios": [3.2, 1.0]})
    s = sweep.sel(victim=victim)
    victims = [str(v) for v in sweep["victim"].values]
    methods = str(sweep.attrs.get("methods", "")).split(",")
    method = methods[victims.index(victim)] if len(methods) == len(victims) else ""
    name, unit = _SIGNAL.get(method, ("error signal", ""))
    # Sweeps state their signal's unit per victim (UDUNITS: "1" for a probability).
    stored = s["signal_units"].values if "signal_units" in s.coords else s.signal.attrs.get("units")
    unit = {"1": "probability"}.get(str(stored), str(stored)) if stored else unit
    x, y, sig = s.z_re.values, s.z_im.values, s.signal.values
    k_final = sweep.attrs.get("repeats")
    # Points taken at another amplification K (a raised-K null search) have signals on
    # another scale: drawn hollow, out of the colour scale.
    same = (sweep["repeats"].values == k_final if "repeats" in sweep
            else np.ones(x.shape, bool))
    if (~same).any():
        ax.scatter(x[~same], y[~same], s=18, facecolor="none",
                   edgecolor=COLOURS["neutral"], linewidth=0.8, label="points at a lower K",
                   zorder=2)
    # The null marks go under the points, thin and open, so that no measured point hides.
    if z_star is not None:
        ax.plot(z_star.real, z_star.imag, marker="x", color=COLOURS["null"], ms=9, mew=1.2,
                ls="none", label="fitted null", zorder=1)
        if cov is not None:
            w, v = np.linalg.eigh(cov)
            span = max(np.ptp(x), np.ptp(y))
            mag = 10.0 if 3 * math.sqrt(max(w.max(), 0.0)) < 0.02 * span else 1.0
            times = " (×10)" if mag != 1.0 else ""
            for k, ls in ((1, "-"), (3, "--")):
                ax.add_patch(Ellipse((z_star.real, z_star.imag),
                                     2 * k * mag * math.sqrt(max(w[1], 0.0)),
                                     2 * k * mag * math.sqrt(max(w[0], 0.0)),
                                     angle=math.degrees(math.atan2(v[1, 1], v[0, 1])),
                                     fill=False, color=COLOURS["null"], ls=ls, lw=1, zorder=1,
                                     label=f"{k}σ error ellipse{times}"))
    sc = ax.scatter(x[same], y[same], c=sig[same], cmap="viridis", s=22, edgecolor="black",
                    linewidth=0.3, zorder=3)
    if same.any():
        low = int(np.flatnonzero(same)[np.argmin(sig[same])])
        ax.plot(x[low], y[low], marker="o", ms=9, mfc="none", mec=COLOURS["before"], mew=1.2,
                ls="none", label="lowest measured point", zorder=4)
    ax.figure.colorbar(sc, ax=ax, label=f"{name} at K = {k_final}"
                       + (f" ({unit})" if unit else ""))
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.13), ncol=3, fontsize=7,
              frameon=False)
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel("cancellation tone Re z (fraction of full scale)")
    ax.set_ylabel("Im z (fraction of full scale)")
    where = f"{chip}: " if chip else ""
    ax.set_title(f"{where}null search {sweep.attrs.get('aggressor')} → {victim}, {method} "
                 f"(K = {k_final})", fontsize=10)
    if ring_ax is not None:
        _ring_panel(ring_ax, sweep, s, same, z_star, name, unit)
        if method == "stark":
            ring_ax.set_title(_STARK_NOTE, fontsize=6.5, loc="left", wrap=True)
    return ax


def _ring_panel(ax, sweep, s, same, z_star, name, unit) -> None:
    """The last ring's signal against the angle around the ring's centre (±1σ).

    A ring centred on the null reads flat; one off the null dips towards it.
    """
    idx = _last_ring(sweep, same)
    z = s.z_re.values[idx] + 1j * s.z_im.values[idx]
    if len(z):
        # the ring's own points: not a point repeated at its centre
        r = np.abs(z - z.mean())
        keep = r > 0.5 * r.max()
        idx, z = idx[keep], z[keep]
    if len(idx) < 3:
        ax.set_axis_off()
        return
    centre = z.mean()
    radius = float(np.abs(z - centre).mean())
    ang = np.degrees(np.angle(z - centre))
    order = np.argsort(ang)
    ax.errorbar(ang[order], s.signal.values[idx][order], yerr=s.stderr.values[idx][order],
                fmt="o-", ms=3, lw=0.8, capsize=1.5, color=COLOURS["after"],
                label=f"last ring, radius {radius:.3g} (flat when centred on the null)")
    if z_star is not None and abs(z_star - centre) > 0.1 * radius:
        ax.axvline(math.degrees(cmath.phase(z_star - centre)), color=COLOURS["null"], lw=1,
                   ls="--", label="direction of the fitted null")
    ax.set_xlim(-180, 180)
    ax.set_xticks([-180, -90, 0, 90, 180])
    ax.set_xlabel("angle around the last ring's centre (deg)")
    ax.set_ylabel(name + (f" ({unit})" if unit else ""), fontsize=8)
    ax.legend(fontsize=7, loc="best")
