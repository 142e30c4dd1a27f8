"""Transmon level structure: Duffing ladder or exact Cooper-pair-box diagonalisation.

Two ways to get the levels of one transmon, both returning a :class:`TransmonLevels`:

* :func:`duffing_levels` — the weakly anharmonic oscillator
  ``ε_n = n·f01 + n(n−1)/2·α`` with harmonic ladder elements ``√(n+1)``;
* :func:`charge_basis_levels` — diagonalise ``H = 4EC(n̂ − ng)² − EJ cos φ`` in the
  charge basis and take the charge-operator matrix elements between the eigenstates.

:func:`ejec_from_frequencies` inverts the exact spectrum: it finds the (EJ, EC) whose 0–1
frequency and anharmonicity are the given ones.

Energies are in GHz (energy / h) throughout. The drive couples to the charge operator, so the
ladder elements returned here are the relative strengths of the transitions under one drive
tone: the Rabi rate Ω of a line is defined on the 0–1 transition and the k→k+1 transition sees
``λ_k·Ω``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
from scipy.linalg import eigh_tridiagonal
from scipy.optimize import brentq

__all__ = [
    "TransmonLevels",
    "ChargeBasisSpectrum",
    "EjEc",
    "duffing_levels",
    "charge_basis_spectrum",
    "charge_basis_levels",
    "default_n_cut",
    "ejec_from_frequencies",
]

# Search range of EJ/EC for the inversion. Over it α/f01 rises monotonically from about −0.96
# to −4e-4 (checked numerically at ng = 0), so the root is unique; real transmons sit at 20–300.
_EJ_EC_RATIO_RANGE = (1.0, 1.0e6)


def _frozen_float_array(values: object, name: str, ndim: int) -> np.ndarray:
    arr = np.array(values, dtype=float)  # a copy, so the caller keeps a writable original
    if arr.ndim != ndim:
        raise ValueError(f"{name} must be a {ndim}-d array, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite, got {arr!r}")
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True, eq=False)
class TransmonLevels:
    """Level energies and drive matrix elements of one transmon.

    Parameters
    ----------
    energies_ghz : array_like, shape (L,)
        Level energies ε_n in GHz, measured from the ground state (``ε_0 = 0``).
    ladder : array_like, shape (L − 1,)
        Matrix elements λ_n = ⟨n+1|d|n⟩ of the drive operator d between adjacent levels,
        normalised so that ``λ_0 = 1`` (the Rabi rate of a line is the 0–1 Rabi rate; the
        n→n+1 transition sees ``λ_n`` times it). Positive.
    charge_matrix : array_like, shape (L, L), optional
        All matrix elements ⟨j|d|k⟩ with the same normalisation (real symmetric, its first
        sub-diagonal equal to ``ladder``). Omitted: the tridiagonal matrix built from
        ``ladder`` (no transitions beyond nearest neighbours), which is exact for the Duffing
        model.

    Raises
    ------
    ValueError
        Wrong shapes, non-finite values, ``ε_0 ≠ 0``, fewer than two levels, or a
        ``charge_matrix`` that is not symmetric or disagrees with ``ladder``.

    Notes
    -----
    Arrays are stored as read-only copies. Equality is identity (``eq=False``) because the
    fields are arrays.
    """

    energies_ghz: np.ndarray
    ladder: np.ndarray
    # None is replaced in __post_init__, so readers always see an array.
    charge_matrix: np.ndarray = None  # type: ignore[assignment]

    def __post_init__(self) -> None:
        energies = _frozen_float_array(self.energies_ghz, "energies_ghz", 1)
        ladder = _frozen_float_array(self.ladder, "ladder", 1)
        n_levels = energies.size
        if n_levels < 2:
            raise ValueError(f"a transmon needs at least 2 levels, got {n_levels}")
        if energies[0] != 0.0:
            raise ValueError(f"energies_ghz[0] must be 0 (energies from ground), got {energies[0]}")
        if ladder.shape != (n_levels - 1,):
            raise ValueError(
                f"ladder must have shape ({n_levels - 1},) for {n_levels} levels, "
                f"got {ladder.shape}"
            )
        if self.charge_matrix is None:
            matrix = np.diag(ladder, -1) + np.diag(ladder, 1)
            matrix.setflags(write=False)
        else:
            matrix = _frozen_float_array(self.charge_matrix, "charge_matrix", 2)
            if matrix.shape != (n_levels, n_levels):
                raise ValueError(
                    f"charge_matrix must have shape ({n_levels}, {n_levels}), got {matrix.shape}"
                )
            scale = max(1.0, float(np.max(np.abs(matrix))))
            if not np.allclose(matrix, matrix.T, rtol=0.0, atol=1e-12 * scale):
                raise ValueError("charge_matrix must be symmetric")
            if not np.allclose(np.diag(matrix, -1), ladder, rtol=1e-12, atol=0.0):
                raise ValueError(
                    "the first sub-diagonal of charge_matrix must equal ladder, "
                    f"got {np.diag(matrix, -1)} vs {ladder}"
                )
        object.__setattr__(self, "energies_ghz", energies)
        object.__setattr__(self, "ladder", ladder)
        object.__setattr__(self, "charge_matrix", matrix)

    @property
    def n_levels(self) -> int:
        """Number of levels L."""
        return int(self.energies_ghz.size)

    @property
    def transition_frequencies_ghz(self) -> np.ndarray:
        """ν_n = ε_{n+1} − ε_n in GHz, shape (L − 1,)."""
        return np.diff(self.energies_ghz)

    @property
    def f01_ghz(self) -> float:
        """0–1 transition frequency in GHz."""
        return float(self.energies_ghz[1])

    @property
    def anharmonicity_ghz(self) -> float:
        """α = ν_1 − ν_0 in GHz (negative for a transmon).

        Raises
        ------
        ValueError
            With fewer than three levels, where α is not defined.
        """
        if self.n_levels < 3:
            raise ValueError(f"anharmonicity needs at least 3 levels, have {self.n_levels}")
        return float(self.energies_ghz[2] - 2.0 * self.energies_ghz[1])


def _check_n_levels(n_levels: object, minimum: int = 2) -> int:
    if isinstance(n_levels, bool) or not isinstance(n_levels, (int, np.integer)):
        raise ValueError(f"n_levels must be an integer, got {n_levels!r}")
    if n_levels < minimum:
        raise ValueError(f"n_levels must be at least {minimum}, got {n_levels}")
    return int(n_levels)


def _check_positive(value: float, name: str) -> float:
    value = float(value)
    if not (math.isfinite(value) and value > 0.0):
        raise ValueError(f"{name} must be a finite positive number, got {value}")
    return value


def duffing_levels(f01_ghz: float, anharmonicity_ghz: float, n_levels: int = 3) -> TransmonLevels:
    """Levels of the Duffing oscillator, the leading-order transmon model.

    ``ε_n = n·f01 + n(n−1)/2·α`` and ``λ_n = √(n+1)`` (harmonic-oscillator ladder).

    Parameters
    ----------
    f01_ghz : float
        0–1 transition frequency in GHz, > 0.
    anharmonicity_ghz : float
        α = f12 − f01 in GHz (negative for a transmon, any finite value accepted).
    n_levels : int, default 3
        Number of levels L ≥ 2.

    Returns
    -------
    TransmonLevels

    Raises
    ------
    ValueError
        Non-positive ``f01_ghz``, non-finite ``anharmonicity_ghz``, ``n_levels < 2``, or an
        α so negative that some transition frequency ν_n = f01 + n·α is ≤ 0.

    Examples
    --------
    >>> levels = duffing_levels(5.0, -0.25, 4)
    >>> levels.transition_frequencies_ghz.tolist()
    [5.0, 4.75, 4.5]
    """
    f01 = _check_positive(f01_ghz, "f01_ghz")
    alpha = float(anharmonicity_ghz)
    if not math.isfinite(alpha):
        raise ValueError(f"anharmonicity_ghz must be finite, got {alpha}")
    n_levels = _check_n_levels(n_levels)
    n = np.arange(n_levels, dtype=float)
    energies = n * f01 + 0.5 * n * (n - 1.0) * alpha
    lowest = f01 + (n_levels - 2) * alpha
    if lowest <= 0.0:
        raise ValueError(
            f"f01={f01} GHz and α={alpha} GHz give a non-positive transition frequency "
            f"{lowest} GHz among {n_levels} levels; use fewer levels"
        )
    return TransmonLevels(energies_ghz=energies, ladder=np.sqrt(n[1:]))


@dataclass(frozen=True, eq=False)
class ChargeBasisSpectrum:
    """Lowest eigenstates of the Cooper-pair-box Hamiltonian in the charge basis.

    Attributes
    ----------
    energies_ghz : ndarray, shape (L,)
        Absolute eigenvalues of ``4EC(n̂ − ng)² − EJ cos φ`` in GHz, ascending.
    states : ndarray, shape (2·n_cut + 1, L)
        Eigenvectors as columns, on the charge states ``charges``. Real; signs fixed so that
        the ground state has positive components and ⟨k+1|n̂|k⟩ > 0.
    charges : ndarray, shape (2·n_cut + 1,)
        ``n − ng`` for each basis state (ng reduced to [−½, ½], which leaves the spectrum and
        the charge matrix elements unchanged).
    charge_elements : ndarray, shape (L, L)
        ⟨j|n̂ − ng|k⟩, not normalised (off-diagonal elements are those of n̂).
    n_cut : int
        Charge cut-off, basis ``|n − round(ng)| ≤ n_cut``.
    """

    energies_ghz: np.ndarray
    states: np.ndarray
    charges: np.ndarray
    charge_elements: np.ndarray
    n_cut: int


def default_n_cut(ej_ghz: float, ec_ghz: float, n_levels: int = 3) -> int:
    """Charge cut-off that converges the lowest ``n_levels`` levels to machine precision.

    The charge spread of the low states grows like (EJ/EC)^(1/4); a cut-off of about
    3.5·(EJ/EC)^(1/4) already converges transition energies to 1e-11 relative (checked for
    EJ/EC from 0.5 to 1e5), so ``max(15, n_levels + 10, ⌈6·(EJ/EC)^(1/4)⌉ + n_levels)`` leaves a
    wide margin. Much larger cut-offs only add rounding error (the diagonal grows as n_cut²).
    """
    ratio = _check_positive(ej_ghz, "ej_ghz") / _check_positive(ec_ghz, "ec_ghz")
    n_levels = _check_n_levels(n_levels, minimum=1)
    return max(15, n_levels + 10, math.ceil(6.0 * ratio**0.25) + n_levels)


def charge_basis_spectrum(
    ej_ghz: float,
    ec_ghz: float,
    *,
    n_levels: int = 3,
    ng: float = 0.0,
    n_cut: int | None = None,
) -> ChargeBasisSpectrum:
    """Diagonalise ``H = 4EC(n̂ − ng)² − EJ cos φ`` in the charge basis.

    In the charge basis ``cos φ = (|n+1⟩⟨n| + |n⟩⟨n+1|)/2``, so H is real tridiagonal and only
    the lowest ``n_levels`` eigenpairs are computed.

    Parameters
    ----------
    ej_ghz, ec_ghz : float
        Josephson and charging energies in GHz, > 0.
    n_levels : int, default 3
        Number of eigenstates L ≥ 1.
    ng : float, default 0
        Offset charge in units of 2e (any real; the spectrum has period 1).
    n_cut : int, optional
        Charge cut-off; default :func:`default_n_cut`. Must leave at least L basis states.

    Returns
    -------
    ChargeBasisSpectrum

    Raises
    ------
    ValueError
        Non-positive energies, non-finite ``ng``, bad ``n_levels`` or too small ``n_cut``.
    """
    ej = _check_positive(ej_ghz, "ej_ghz")
    ec = _check_positive(ec_ghz, "ec_ghz")
    n_levels = _check_n_levels(n_levels, minimum=1)
    ng = float(ng)
    if not math.isfinite(ng):
        raise ValueError(f"ng must be finite, got {ng}")
    if n_cut is None:
        n_cut = default_n_cut(ej, ec, n_levels)
    if isinstance(n_cut, bool) or not isinstance(n_cut, (int, np.integer)):
        raise ValueError(f"n_cut must be an integer, got {n_cut!r}")
    n_cut = int(n_cut)
    if 2 * n_cut + 1 < n_levels:
        raise ValueError(f"n_cut={n_cut} gives {2 * n_cut + 1} charge states < n_levels={n_levels}")

    # Shifting n by an integer leaves H(ng) unchanged up to relabelling, so centre the basis
    # on the nearest integer to ng: a fixed cut-off then converges equally for every ng.
    ng_reduced = ng - round(ng)
    charges = np.arange(-n_cut, n_cut + 1, dtype=float) - ng_reduced
    diagonal = 4.0 * ec * charges**2
    off_diagonal = np.full(2 * n_cut, -0.5 * ej)
    energies, states = eigh_tridiagonal(
        diagonal, off_diagonal, select="i", select_range=(0, n_levels - 1)
    )

    # Real eigenvectors are fixed up to sign. The ground state of a tridiagonal matrix with a
    # negative off-diagonal is nodeless (Perron–Frobenius): make it positive, then orient each
    # next state so that ⟨k|n̂|k−1⟩ > 0, which makes every ladder element positive.
    if states[:, 0].sum() < 0.0:
        states[:, 0] *= -1.0
    for k in range(1, n_levels):
        element = states[:, k] @ (charges * states[:, k - 1])
        if element < 0.0:
            states[:, k] *= -1.0
    charge_elements = states.T @ (charges[:, None] * states)
    charge_elements = 0.5 * (charge_elements + charge_elements.T)
    return ChargeBasisSpectrum(
        energies_ghz=energies,
        states=states,
        charges=charges,
        charge_elements=charge_elements,
        n_cut=n_cut,
    )


def charge_basis_levels(
    ej_ghz: float,
    ec_ghz: float,
    *,
    n_levels: int = 3,
    ng: float = 0.0,
    n_cut: int | None = None,
) -> TransmonLevels:
    """Transmon levels from exact charge-basis diagonalisation.

    Energies are measured from the ground state. The drive couples to the charge operator, so
    ``ladder[k] = ⟨k+1|n̂|k⟩ / ⟨1|n̂|0⟩`` (``ladder[0] = 1``: a line's Rabi rate is its 0–1
    Rabi rate) and ``charge_matrix[j, k] = ⟨j|n̂ − ng|k⟩ / ⟨1|n̂|0⟩`` also holds the
    elements beyond nearest neighbours (small in the transmon regime; at ng = 0 parity makes
    those with j − k even vanish, while 0–3 and the like remain).

    Parameters
    ----------
    ej_ghz, ec_ghz, n_levels, ng, n_cut
        As for :func:`charge_basis_spectrum`, which this function diagonalises with; here
        ``n_levels`` (L) must be at least 2.

    Returns
    -------
    TransmonLevels

    Raises
    ------
    ValueError
        Bad arguments (see :func:`charge_basis_spectrum`), or a vanishing 0–1 charge matrix
        element, which leaves the normalisation undefined.

    Examples
    --------
    >>> levels = charge_basis_levels(20.0, 0.25)
    >>> round(levels.f01_ghz, 3), round(levels.anharmonicity_ghz, 3)
    (6.063, -0.277)
    """
    if isinstance(n_levels, int | np.integer) and not isinstance(n_levels, bool) \
            and n_levels < 2:  # one level has no 0–1 element to normalise by
        raise ValueError(f"n_levels must be at least 2, got {n_levels}")
    spectrum = charge_basis_spectrum(ej_ghz, ec_ghz, n_levels=n_levels, ng=ng, n_cut=n_cut)
    elements = spectrum.charge_elements
    n01 = elements[1, 0]
    if not n01 > 1e-12 * max(1.0, float(np.max(np.abs(elements)))):
        raise ValueError(
            f"the 0–1 charge matrix element vanishes (EJ={ej_ghz}, EC={ec_ghz}, ng={ng}); "
            "the ladder normalisation is undefined"
        )
    energies = spectrum.energies_ghz - spectrum.energies_ghz[0]
    matrix = elements / n01
    return TransmonLevels(energies_ghz=energies, ladder=np.diag(matrix, -1), charge_matrix=matrix)


class EjEc(NamedTuple):
    """Josephson and charging energies in GHz."""

    ej_ghz: float
    ec_ghz: float


def _unit_ec_f01_alpha(ratio: float) -> tuple[float, float]:
    e = charge_basis_spectrum(ratio, 1.0, n_levels=3).energies_ghz
    return float(e[1] - e[0]), float(e[2] - 2.0 * e[1] + e[0])


def ejec_from_frequencies(f01_ghz: float, anharmonicity_ghz: float) -> EjEc:
    """(EJ, EC) of the transmon with the given 0–1 frequency and anharmonicity at ng = 0.

    Inverts the exact charge-basis spectrum. Energies scale together with (EJ, EC), so only
    the ratio EJ/EC sets α/f01: the ratio is found by Brent's method on log(EJ/EC) over
    [1, 1e6], where α/f01 rises monotonically (so the answer is unique), and EC then follows
    from f01. The asymptotic relations f01 ≈ √(8EJ·EC) − EC, α ≈ −EC are the first guess a
    reader can check the answer against; they are off by about 1/√(EJ/EC) relative in α.

    The match is at offset charge ng = 0, the default of :func:`charge_basis_levels`. Away
    from ng = 0 and below EJ/EC ≈ 20 the charge dispersion makes α/f01 non-monotonic in
    EJ/EC, so a unique inverse exists only at fixed ng; in the transmon regime the ng
    dependence is negligible.

    Parameters
    ----------
    f01_ghz : float
        0–1 transition frequency in GHz, > 0.
    anharmonicity_ghz : float
        α in GHz, negative; α/f01 must lie in the range that EJ/EC ∈ [1, 1e6] reaches
        (about −0.97 to −4e-4).

    Returns
    -------
    EjEc
        ``(ej_ghz, ec_ghz)``.

    Raises
    ------
    ValueError
        Non-positive ``f01_ghz``, non-negative ``anharmonicity_ghz``, or a ratio α/f01 no
        transmon with EJ/EC in [1, 1e6] has.

    Examples
    --------
    >>> ej, ec = ejec_from_frequencies(5.0, -0.25)
    >>> levels = charge_basis_levels(ej, ec)
    >>> round(levels.f01_ghz, 12), round(levels.anharmonicity_ghz, 12)
    (5.0, -0.25)
    """
    f01 = _check_positive(f01_ghz, "f01_ghz")
    alpha = float(anharmonicity_ghz)
    if not (math.isfinite(alpha) and alpha < 0.0):
        raise ValueError(f"anharmonicity_ghz must be negative for a transmon, got {alpha}")
    target = alpha / f01

    def mismatch(log_ratio: float) -> float:
        unit_f01, unit_alpha = _unit_ec_f01_alpha(math.exp(log_ratio))
        return unit_alpha / unit_f01 - target

    lo, hi = (math.log(r) for r in _EJ_EC_RATIO_RANGE)
    at_lo, at_hi = mismatch(lo), mismatch(hi)
    if at_lo * at_hi > 0.0:
        raise ValueError(
            f"no transmon with EJ/EC in {_EJ_EC_RATIO_RANGE} has α/f01 = {target:.6g} "
            f"(f01={f01} GHz, α={alpha} GHz); reachable range is "
            f"[{at_lo + target:.4g}, {at_hi + target:.4g}]"
        )
    log_ratio = brentq(mismatch, lo, hi, xtol=1e-14, rtol=4.0 * np.finfo(float).eps)
    ratio = math.exp(log_ratio)
    unit_f01, _ = _unit_ec_f01_alpha(ratio)
    ec = f01 / unit_f01
    return EjEc(ej_ghz=ratio * ec, ec_ghz=ec)
