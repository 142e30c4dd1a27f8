"""Outputs of a large chip stay readable: a 100-qubit matrix, its report and figures.

The chip and its pairs are made up (a 10 × 10 grid, nearest neighbours at −30 dB, next
nearest at −45 dB, in a shuffled qubit order): these tests check the drawing and the
report's layout, not the physics.
"""

from __future__ import annotations

import cmath
import math

import matplotlib
import numpy as np
import pytest

matplotlib.use("Agg")

from xtalkcal.calibrate import CalibrationResult, PairResult  # noqa: E402
from xtalkcal.hardware import chip_from_dict  # noqa: E402
from xtalkcal.measure import protocol_from_dict  # noqa: E402
from xtalkcal.outputs import (  # noqa: E402
    format_table,
    matrix_axes,
    neighbourhood_order,
    plot_matrix_db,
    plot_residuals,
    write_report,
)

SIDE = 10


def _chip_and_pairs(seed: int = 3):
    rng = np.random.default_rng(seed)
    labels = [f"Q{k}" for k in rng.permutation(SIDE * SIDE)]  # names say nothing of place
    pos = {labels[r * SIDE + c]: (r, c) for r in range(SIDE) for c in range(SIDE)}
    listed = list(rng.permutation(labels))  # the chip file lists them in no useful order
    qubits = [{"name": q, "f01_ghz": round(4.6 + 0.5 * rng.random(), 3),
               "anharmonicity_ghz": -0.2, "t1_us": 50.0, "t2_us": 40.0} for q in listed]
    lines = [{"name": f"L-{q}", "qubit": q, "rabi_mhz": 50.0, "max_amplitude": 0.8}
             for q in listed]
    chip = chip_from_dict({"format": "xtalkcal-chip", "version": 1, "name": "made-up-100",
                           "lines": lines, "qubits": qubits,
                           "limits": {"max_amplitude": 0.9}})
    pairs, truth = [], {}
    for a in labels:
        for v in labels:
            d = math.dist(pos[a], pos[v])
            if a == v or d > 1.5:
                continue
            db = -30.0 if d == 1 else -45.0
            x = 10 ** (db / 20) * cmath.exp(1j * rng.uniform(-math.pi, math.pi))
            nulled = db > -40
            pairs.append(PairResult(aggressor=f"L-{a}", victim=v, method="stark", freq_ghz=5.0,
                                    accepted=True, reason="", x=x, x_cov=1e-9 * np.eye(2),
                                    nulled=nulled, shots=1000, repeats=1, measured_at_s=0.0,
                                    stage="null" if nulled else "survey"))
            truth[(f"L-{a}", v)] = x * (1 + 1e-3)
    result = CalibrationResult(chip, protocol_from_dict({"name": "large"}), "made-up pairs",
                               pairs=pairs)
    return result, pos, truth


def _bandwidth(order, pos) -> float:
    """Mean |i − j| in the given order over grid neighbours (small: neighbours sit close)."""
    idx = {q: i for i, q in enumerate(order)}
    gaps = [abs(idx[a] - idx[b]) for a in pos for b in pos
            if a < b and math.dist(pos[a], pos[b]) == 1]
    return float(np.mean(gaps))


def test_neighbourhood_order_gathers_neighbours():
    result, pos, _ = _chip_and_pairs()
    ordered = neighbourhood_order(result)
    assert sorted(ordered) == sorted(result.chip.qubit_names)
    # the chip's own (shuffled) order scatters neighbours over the whole matrix
    assert _bandwidth(ordered, pos) < 0.4 * _bandwidth(list(result.chip.qubit_names), pos)
    victims, lines, X = matrix_axes(result)
    assert victims == ordered
    assert [result.chip.line(ln).qubit for ln in lines] == ordered


def test_large_heat_map_keeps_labels_readable():
    result, _, _ = _chip_and_pairs()
    ax = plot_matrix_db(result)
    assert not ax.texts  # no cell labels: they would be unreadable
    w, h = ax.figure.get_size_inches()
    assert w >= 12 and h >= 11  # the figure grows with the chip
    ticks = ax.get_xticklabels()
    assert 20 <= len(ticks) <= 50 and all(t.get_fontsize() >= 6 for t in ticks)
    # a cell is still at least a couple of points wide at the saved size
    assert 72 * w / len(result.chip.line_names) > 5


def test_large_report_lists_the_strongest_pairs_and_keeps_the_rest_in_a_file(tmp_path):
    result, _, truth = _chip_and_pairs()
    md = write_report(result, tmp_path / "r", truth=truth).read_text()
    table = md.split("### Matrix")[1].split("```text")[1].split("```")[0].strip().splitlines()
    assert "strongest pairs" in md.split("### Matrix")[1].splitlines()[0]
    assert len(table) == 1 + 60 + 1 and table[-1].startswith("… and")
    full = (tmp_path / "r" / "matrix.txt").read_text().strip().splitlines()
    assert len(full) == 1 + len(result.pairs)
    # the full table and the JSON stay small enough to open at once
    assert (tmp_path / "r" / "matrix.json").stat().st_size < 2_000_000
    # the long line names keep the table's columns aligned
    assert len({ln.index("→") for ln in full[1:]}) == 1


def test_many_residuals_are_a_scatter_with_the_worst_named():
    result, _, truth = _chip_and_pairs()
    ax = plot_residuals(result, truth)
    assert len(ax.get_xticklabels()) < 30 and len(ax.texts) == 5
    assert "before compensation" in ax.get_xlabel()


@pytest.mark.parametrize("limit", [1, 5])
def test_table_limit_says_where_the_rest_is(limit):
    result, _, _ = _chip_and_pairs()
    text = format_table(result, limit=limit, rest="matrix.txt").splitlines()
    assert len(text) == 1 + limit + 1 and text[-1].endswith("more pairs in matrix.txt")
