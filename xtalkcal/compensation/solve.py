"""Solving for cancellation tones: pair by pair, or all victims of a line at once, and the
residuals either leaves.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from xtalkcal.compensation.elements import (
    Cov2,
    CrosstalkElement,
    MatrixLike,
    Truth,
    _cov2,
    _db,
    _matrix_chip_name,
    as_elements,
)
from xtalkcal.compensation.settings import (
    _MAX_CONDITION,
    _SAME_FREQ_GHZ,
    CompensationSettings,
    PairSetting,
)
from xtalkcal.hardware import Chip

# --------------------------------------------------------------------------------------------
# Constructors
# --------------------------------------------------------------------------------------------


def _check_pair_on_chip(chip: Chip, line: str, victim: str) -> tuple[str, str]:
    """(aggressor qubit, victim line) of a pair, or ValueError naming the choices."""
    if line not in chip.line_names:
        raise ValueError(f"pair {line} → {victim}: no line {line!r} on chip {chip.name!r}; "
                         f"known: {', '.join(chip.line_names)}")
    if victim not in chip.qubit_names:
        raise ValueError(f"pair {line} → {victim}: no qubit {victim!r} on chip {chip.name!r}; "
                         f"known: {', '.join(chip.qubit_names)}")
    own = chip.line(line).qubit
    if victim == own:
        raise ValueError(f"pair {line} → {victim}: {victim} is the line's own qubit")
    return own, chip.line_of(victim).name


def _select(elements: Mapping[tuple[str, str], CrosstalkElement],
            pairs: Iterable[tuple[str, str]] | None) -> list[tuple[str, str]]:
    if pairs is None:
        return list(elements)
    keys = [tuple(p) for p in pairs]
    missing = [k for k in keys if k not in elements]
    if missing:
        held = ", ".join(f"{a}→{v}" for a, v in elements) or "none"
        raise ValueError(f"the matrix holds no element for "
                         f"{', '.join(f'{a}→{v}' for a, v in missing)}; held: {held}")
    return keys  # type: ignore[return-value]


def _check_matrix_chip(matrix: MatrixLike, chip: Chip) -> None:
    name = _matrix_chip_name(matrix)
    if name is not None and name != chip.name:
        raise ValueError(f"the matrix is for chip {name!r}, not {chip.name!r}")


def pairwise_settings(
    matrix: MatrixLike,
    chip: Chip,
    *,
    pairs: Iterable[tuple[str, str]] | None = None,
) -> CompensationSettings:
    """First-order settings: r = −X for every pair, covariance of r = covariance of X.

    Parameters
    ----------
    matrix : mapping, MatrixSnapshot or CalibrationResult
        ``{(aggressor_line, victim): (X, cov, freq_ghz, measured_at_s, method[, source])}``;
        a ledger snapshot (its accepted entries); or a calibration (its accepted, nulled
        pairs).
    chip : Chip
        Names the aggressor qubits and victim lines; must be the matrix's chip.
    pairs : iterable of (aggressor_line, victim), optional
        Restrict to these pairs (default all the matrix holds).

    Returns
    -------
    CompensationSettings

    Raises
    ------
    ValueError
        If a requested pair is missing, a name is not on the chip, or the matrix belongs
        to another chip.

    Examples
    --------
    >>> s = pairwise_settings({("q4-line", "q5"): (0.03 + 0.04j, [[1e-6, 0], [0, 1e-6]],
    ...                        4.78, 10.0, "leakage")}, chip)  # doctest: +SKIP
    >>> s.pair("q4-line", "q5").ratio  # doctest: +SKIP
    (-0.03-0.04j)
    """
    _check_matrix_chip(matrix, chip)
    elements = as_elements(matrix)
    out = []
    for line, victim in _select(elements, pairs):
        own, vline = _check_pair_on_chip(chip, line, victim)
        e = elements[(line, victim)]
        out.append(PairSetting(line, own, victim, vline, e.frequency_ghz, -complex(e.value),
                               _cov2(e.covariance, f"matrix[{line!r}, {victim!r}]"),
                               e.measured_at_s, e.method, "pairwise", e.source))
    return CompensationSettings(chip.name, tuple(out))


def _columns(items: Iterable[tuple[str, float, Any]]) -> list[tuple[str, float, list[Any]]]:
    """Group (aggressor, frequency, item) into columns of one aggressor and one frequency."""
    cols: list[tuple[str, float, list[Any]]] = []
    for line, f, item in items:
        for cl, cf, members in cols:
            if cl == line and abs(cf - f) <= _SAME_FREQ_GHZ:
                members.append(item)
                break
        else:
            cols.append((line, f, [item]))
    return cols


def _rblock(c: complex) -> np.ndarray:
    """The real 2×2 matrix of multiplication by c acting on (Re, Im)."""
    return np.array([[c.real, -c.imag], [c.imag, c.real]])


def _coupling_source(
    couplings: MatrixLike | Truth, chip: Chip
) -> Callable[[str, str, float], tuple[complex, Cov2 | None]]:
    """``get(victim, line, f_j) -> (X, covariance or None)`` for the victim–victim terms."""
    if callable(couplings):
        truth = couplings

        def from_truth(victim: str, line: str, f: float) -> tuple[complex, Cov2 | None]:
            return complex(truth(victim, line, f)), None

        return from_truth
    _check_matrix_chip(couplings, chip)
    table = as_elements(couplings)

    def from_matrix(victim: str, line: str, f: float) -> tuple[complex, Cov2 | None]:
        e = table.get((line, victim))
        if e is None:
            return 0j, None
        return complex(e.value), _cov2(e.covariance, f"couplings[{line!r}, {victim!r}]")

    return from_matrix


def multi_victim_settings(
    matrix: MatrixLike,
    chip: Chip,
    *,
    pairs: Iterable[tuple[str, str]] | None = None,
    couplings: MatrixLike | Truth | None = None,
) -> CompensationSettings:
    """Settings that also cancel the leak of the cancellation tones onto each other.

    For each aggressor line j with victim set V (the selected pairs of j), solves
    ``(I + X_VV^offdiag)·r = −X_Vj`` (module docstring), where ``X_ik`` (i, k ∈ V) is the
    matrix element (victim i, line of k), taken at line k's own frequency and zero when
    missing.

    Parameters
    ----------
    matrix : mapping, MatrixSnapshot or CalibrationResult
        As for :func:`pairwise_settings`; supplies X_Vj.
    chip : Chip
    pairs : iterable of (aggressor_line, victim), optional
        The pairs to set (default all the matrix holds); the victims of one aggressor
        among them form its V.
    couplings : matrix-like or callable, optional
        Where the victim–victim elements X_ik come from (default ``matrix``): another
        matrix (e.g. ``elements_from_calibration(result, nulled_only=False)``), or
        ``couplings(victim, line, freq_ghz) -> X``, called at the aggressor's frequency
        f_j — the exact form, for a coupling model or a measurement at f_j; its values
        are taken as exact (no covariance).

    Returns
    -------
    CompensationSettings
        ``solve = "multi-victim"``; covariance of r propagated to first order (each pair's
        own 2×2 block; cross-covariances between pairs dropped), treating the matrix
        elements as independent. A victim set of one gives the pairwise setting.

    Raises
    ------
    ValueError
        As :func:`pairwise_settings`, or if the system of a column is singular or
        ill-conditioned (condition number above 1e6: corrupt input).
    """
    _check_matrix_chip(matrix, chip)
    elements = as_elements(matrix)
    coupling = _coupling_source(elements if couplings is None else couplings, chip)
    keys = _select(elements, pairs)
    for line, victim in keys:
        _check_pair_on_chip(chip, line, victim)
    out: dict[tuple[str, str], PairSetting] = {}
    for line, f, members in _columns((k[0], elements[k].frequency_ghz, k) for k in keys):
        victims = [v for _, v in members]
        n = len(victims)
        vlines = [chip.line_of(v).name for v in victims]
        x = np.array([complex(elements[(line, v)].value) for v in victims])
        M = np.eye(n, dtype=complex)
        mcov: dict[tuple[int, int], Cov2] = {}
        for a, vi in enumerate(victims):
            for b in range(n):
                if a != b:
                    val, cov_ab = coupling(vi, vlines[b], f)
                    M[a, b] = val
                    if cov_ab is not None:
                        mcov[(a, b)] = cov_ab
        cond = np.linalg.cond(M)
        if not math.isfinite(cond) or cond > _MAX_CONDITION:
            raise ValueError(
                f"multi-victim system of aggressor {line} at {f:g} GHz over {', '.join(victims)} "
                f"is singular or ill-conditioned (condition number {cond:.3g}); check the matrix")
        Minv = np.linalg.inv(M)
        r = -Minv @ x
        # First-order propagation: dr = M⁻¹(−dx − dM·r); one term per independent element.
        cov = np.zeros((n, 2, 2))
        sources: list[tuple[np.ndarray, Cov2]] = []
        for b, v in enumerate(victims):
            sources.append((-Minv[:, b],
                            _cov2(elements[(line, v)].covariance, f"matrix[{line!r}, {v!r}]")))
        for (a2, b2), cov_ab in mcov.items():
            sources.append((-Minv[:, a2] * r[b2], cov_ab))
        for g, s_cov in sources:
            S = np.array(s_cov)
            for a in range(n):
                J = _rblock(complex(g[a]))
                cov[a] += J @ S @ J.T
        own = chip.line(line).qubit
        for a, v in enumerate(victims):
            e = elements[(line, v)]
            c = 0.5 * (cov[a] + cov[a].T)
            out[(line, v)] = PairSetting(line, own, v, vlines[a], e.frequency_ghz,
                                         complex(r[a]), c, e.measured_at_s, e.method,
                                         "multi-victim", e.source)
    return CompensationSettings(chip.name, tuple(out[k] for k in keys))


# --------------------------------------------------------------------------------------------
# Residuals
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class PairResidual:
    """What is left of one pair's crosstalk with the settings applied.

    Attributes
    ----------
    aggressor_line, victim : str
    frequency_ghz : float
    crosstalk : complex
        X_ij used (from the truth at the setting's frequency, or from the matrix).
    pairwise : complex
        X_ij + r_ij: the pair's own cancellation tone alone (X units).
    all_on : complex
        Field at the victim from the aggressor plus every cancellation tone of that
        aggressor's column, X_ij + r_ij + Σ_{k≠i} X_ik·r_kj (X units).
    """

    aggressor_line: str
    victim: str
    frequency_ghz: float
    crosstalk: complex
    pairwise: complex
    all_on: complex

    @property
    def crosstalk_db(self) -> float:
        """20·log10|X| (dB)."""
        return _db(abs(self.crosstalk))

    @property
    def pairwise_db(self) -> float:
        """20·log10|X + r| (dB; −inf for an exact cancellation)."""
        return _db(abs(self.pairwise))

    @property
    def all_on_db(self) -> float:
        """20·log10 of the all-on residual field (dB)."""
        return _db(abs(self.all_on))


def residuals(settings: CompensationSettings,
              truth_or_matrix: Truth | MatrixLike) -> tuple[PairResidual, ...]:
    """Residual crosstalk per pair, alone and with all compensations on.

    Parameters
    ----------
    settings : CompensationSettings
    truth_or_matrix : callable or matrix-like
        ``truth(victim, line, freq_ghz) -> X`` (e.g. ``SimRig.true_crosstalk``), evaluated
        at each setting's frequency, cross terms included; or a matrix as for
        :func:`pairwise_settings`, whose cross terms X_ik are taken at line k's own
        frequency and as zero when missing (the approximation of
        :func:`multi_victim_settings`, under which its settings leave no all-on residual).

    Returns
    -------
    tuple of PairResidual
        In the order of ``settings.pairs``.

    Raises
    ------
    ValueError
        If a matrix holds no element for a pair of the settings.
    """
    if callable(truth_or_matrix):
        truth = truth_or_matrix

        def xval(victim: str, line: str, f: float, cross: bool) -> complex:
            return complex(truth(victim, line, f))
    else:
        elements = as_elements(truth_or_matrix)

        def xval(victim: str, line: str, f: float, cross: bool) -> complex:
            e = elements.get((line, victim))
            if e is None:
                if cross:
                    return 0j
                raise ValueError(f"the matrix holds no element for {line} → {victim}")
            return complex(e.value)

    res: dict[tuple[str, str], PairResidual] = {}
    for line, _f, members in _columns((p.aggressor_line, p.frequency_ghz, p)
                                      for p in settings.pairs):
        for p in members:
            x = xval(p.victim, line, p.frequency_ghz, False)
            leak = sum((xval(p.victim, q.victim_line, p.frequency_ghz, True) * q.ratio
                        for q in members if q is not p), 0j)
            res[p.key] = PairResidual(line, p.victim, p.frequency_ghz, x, x + p.ratio,
                                      x + p.ratio + leak)
    return tuple(res[p.key] for p in settings.pairs)
