"""Heat-map keys and cell-label contrast of the crosstalk matrix figures.

The pairs below are made up to place cells on chosen colours: these tests check the
drawing, not the physics. Label contrast is checked against the W3C definitions of
relative luminance and contrast ratio (WCAG 2.1, "relative luminance" and "contrast
ratio"), with 4.5:1 as the level WCAG asks of normal-size text.
"""

from __future__ import annotations

import cmath
import math

import numpy as np
import pytest
from matplotlib.colors import to_rgba
from matplotlib.patches import Rectangle

from xtalkcal.calibrate import CalibrationResult, PairResult
from xtalkcal.measure import protocol_from_dict
from xtalkcal.outputs import plot_matrix_db, plot_matrix_phase

PLOTS = (plot_matrix_db, plot_matrix_phase)


def _pair(aggressor: str, victim: str, *, db: float | None = -30.0, deg: float = 0.0,
          nulled: bool = True) -> PairResult:
    x = None if db is None else 10 ** (db / 20) * cmath.exp(1j * math.radians(deg))
    return PairResult(aggressor=aggressor, victim=victim, method="stark", freq_ghz=5.0,
                      accepted=x is not None, reason="" if x is not None else "no_signal",
                      x=x, x_cov=None if x is None else 1e-8 * np.eye(2), nulled=nulled,
                      shots=1000, repeats=1, measured_at_s=0.0,
                      stage="null" if nulled else "survey")


def _result(chip, pairs) -> CalibrationResult:
    return CalibrationResult(chip, protocol_from_dict({"name": "plot-keys"}), "made-up pairs",
                             pairs=list(pairs))


def _key_labels(ax) -> list[str]:
    legend = ax.get_legend()
    return [] if legend is None else [t.get_text() for t in legend.get_texts()]


def _cell_text(ax, i: int, j: int):
    hits = [t for t in ax.texts if tuple(t.get_position()) == (j, i)]
    assert len(hits) == 1, f"cell ({i}, {j}) has {len(hits)} labels"
    return hits[0]


def _cell_patches(ax, i: int, j: int) -> list[Rectangle]:
    return [p for p in ax.patches if isinstance(p, Rectangle)
            and np.allclose(p.get_xy(), (j - 0.5, i - 0.5)) and p.get_width() == 1]


def _luminance(color) -> float:
    # WCAG 2.1 relative luminance of an sRGB colour
    def lin(c):
        return c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4
    r, g, b, _ = to_rgba(color)
    return 0.2126 * lin(r) + 0.7152 * lin(g) + 0.0722 * lin(b)


def _contrast(a, b) -> float:
    la, lb = sorted((_luminance(a), _luminance(b)), reverse=True)
    return (la + 0.05) / (lb + 0.05)


def _line_of(chip, victim):
    return chip.line_of(victim).name


@pytest.mark.parametrize("plot", PLOTS)
def test_key_names_rejected_unmeasured_own_and_survey_cells(demo_chip, plot):
    lines = list(demo_chip.line_names)
    pairs = [_pair(lines[0], "q3", db=-25.0), _pair(lines[0], "q4", db=-40.0, nulled=False),
             _pair(lines[0], "q5", db=None)]
    ax = plot(_result(demo_chip, pairs))
    keys = " | ".join(_key_labels(ax))
    for words in ("rejected", "not measured", "own line", "not nulled", "null search"):
        assert words in keys, f"{words!r} missing from the key: {keys}"
    victims = list(demo_chip.qubit_names)
    # the rejected cell and every own-line cell are hatched, and carry no number
    rejected = _cell_patches(ax, victims.index("q5"), 0)
    assert rejected and rejected[0].get_hatch()
    for q in victims:
        i, j = victims.index(q), lines.index(_line_of(demo_chip, q))
        own = _cell_patches(ax, i, j)
        assert own and own[0].get_hatch() and own[0].get_hatch() != rejected[0].get_hatch()
        assert not [t for t in ax.texts if tuple(t.get_position()) == (j, i)]
    # the surveyed-only cell is framed (dotted), the nulled one is not
    def framed(i, j):
        return [p for p in ax.patches if isinstance(p, Rectangle) and not p.get_fill()
                and np.allclose(p.get_xy(), (j - 0.4, i - 0.4))]
    assert framed(victims.index("q4"), 0) and not framed(victims.index("q3"), 0)


@pytest.mark.parametrize("plot", PLOTS)
def test_key_lists_only_kinds_present(demo_chip, plot):
    line = demo_chip.line_names[0]
    pairs = [_pair(line, q, db=-30.0) for q in demo_chip.qubit_names
             if q != demo_chip.line(line).qubit]
    keys = " | ".join(_key_labels(plot(_result(demo_chip, pairs))))
    assert "own line" in keys and "not measured" in keys
    assert "rejected" not in keys and "not nulled" not in keys


def test_labels_contrast_on_light_and_dark_cells(demo_chip):
    lines, victims = list(demo_chip.line_names), list(demo_chip.qubit_names)
    a = lines[0]
    others = [q for q in victims if q != demo_chip.line(a).qubit]
    # twilight: −150° is a light blue-grey and +30° a dark purple; magma: −21 dB light, −54 dB
    # dark. The old rule (position on the colour scale) put white on −150° and black on +30°.
    pairs = [_pair(a, others[0], db=-54.0, deg=-150.0), _pair(a, others[1], db=-21.0, deg=30.0)]
    res = _result(demo_chip, pairs)
    light_dark = {plot_matrix_db: (others[1], others[0]), plot_matrix_phase: (others[0], others[1])}
    for plot, (light, dark) in light_dark.items():
        ax = plot(res)
        im = ax.images[0]
        data = im.get_array()
        for q, want in ((light, "black"), (dark, "white")):
            i = victims.index(q)
            cell = im.to_rgba(data[i, 0])
            assert _luminance(cell) > 0.3 if want == "black" else _luminance(cell) < 0.05
            text = _cell_text(ax, i, 0)
            assert to_rgba(text.get_color()) == to_rgba(want), (plot.__name__, q)


@pytest.mark.parametrize("plot", PLOTS)
def test_every_label_meets_wcag_contrast(demo_chip, plot):
    lines, victims = list(demo_chip.line_names), list(demo_chip.qubit_names)
    cells = [(ln, q) for ln in lines for q in victims if q != demo_chip.line(ln).qubit]
    # magnitudes spread over and beyond the colour scale, phases round the circle
    dbs = np.linspace(-62.0, -15.0, len(cells))
    degs = np.linspace(-180.0, 180.0, len(cells), endpoint=False) + 2.5
    pairs = [_pair(ln, q, db=d, deg=g) for (ln, q), d, g in zip(cells, dbs, degs, strict=True)]
    ax = plot(_result(demo_chip, pairs))
    im = ax.images[0]
    data = im.get_array()
    for ln, q in cells:
        i, j = victims.index(q), lines.index(ln)
        text = _cell_text(ax, i, j)
        ratio = _contrast(text.get_color(), im.to_rgba(data[i, j]))
        assert ratio >= 4.5, (ln, q, text.get_text(), ratio)
    # values beyond the magnitude scale are flagged on the colour bar
    assert im.colorbar.extend == ("both" if plot is plot_matrix_db else "neither")
