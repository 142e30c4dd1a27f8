"""The single-qubit Clifford group built from X/Y rotations, for randomized benchmarking.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from functools import lru_cache
from types import MappingProxyType
from typing import Literal

import numpy as np

from xtalkcal.exceptions import TimelineError
from xtalkcal.hardware import Timeline

DragCondition = Literal["phase", "leakage", "off"]
Transform = Callable[[Timeline], Timeline]

# name -> (rotation angle θ, tone phase φ); "I" is an idle slot.
PRIMITIVES: Mapping[str, tuple[float, float]] = MappingProxyType({
    "I": (0.0, 0.0),
    "X": (math.pi, 0.0),
    "Y": (math.pi, math.pi / 2),
    "X/2": (math.pi / 2, 0.0),
    "-X/2": (math.pi / 2, math.pi),
    "Y/2": (math.pi / 2, math.pi / 2),
    "-Y/2": (math.pi / 2, -math.pi / 2),
})

CLIFFORD_DECOMPOSITIONS: tuple[tuple[str, ...], ...] = (
    # Paulis
    ("I",), ("X",), ("Y",), ("Y", "X"),
    # 2π/3 rotations about the body diagonals
    ("X/2", "Y/2"), ("X/2", "-Y/2"), ("-X/2", "Y/2"), ("-X/2", "-Y/2"),
    ("Y/2", "X/2"), ("Y/2", "-X/2"), ("-Y/2", "X/2"), ("-Y/2", "-X/2"),
    # π/2 rotations about x, y, z
    ("X/2",), ("-X/2",), ("Y/2",), ("-Y/2",), ("-X/2", "Y/2", "X/2"), ("-X/2", "-Y/2", "X/2"),
    # Hadamard-like: π rotations about face diagonals
    ("X", "Y/2"), ("X", "-Y/2"), ("Y", "X/2"), ("Y", "-X/2"), ("X/2", "Y/2", "X/2"),
    ("-X/2", "Y/2", "-X/2"),
)

PRIMITIVES_PER_CLIFFORD: float = sum(len(d) for d in CLIFFORD_DECOMPOSITIONS) / len(
    CLIFFORD_DECOMPOSITIONS)


# Pauli matrices of the rotation axes.
_SX = np.array([[0, 1], [1, 0]], dtype=complex)
_SY = np.array([[0, -1j], [1j, 0]], dtype=complex)


def rotation_unitary(angle: float, phase: float) -> np.ndarray:
    """exp(−iθ/2·(cos φ·σx + sin φ·σy)) on {|0⟩, |1⟩} (module docstring).

    Parameters
    ----------
    angle : float
        Rotation angle θ (rad).
    phase : float
        Tone phase φ (rad) that sets the axis in the equatorial plane.
    """
    n = math.cos(phase) * _SX + math.sin(phase) * _SY
    return math.cos(angle / 2) * np.eye(2) - 1j * math.sin(angle / 2) * n


def _sequence_unitary(names: Sequence[str]) -> np.ndarray:
    u = np.eye(2, dtype=complex)
    for name in names:  # time order: later gates multiply from the left
        u = rotation_unitary(*PRIMITIVES[name]) @ u
    return u


def _canonical(u: np.ndarray) -> np.ndarray:
    """The unitary with its global phase removed (largest element real positive)."""
    flat = u.ravel()
    k = int(np.argmax(np.abs(flat) > 0.5 * np.abs(flat).max()))
    return u * (abs(flat[k]) / flat[k])


@dataclass(frozen=True)
class CliffordGroup:
    """The 24 single-qubit Cliffords with their multiplication and inverse tables.

    Attributes
    ----------
    unitaries : ndarray (24, 2, 2)
        One representative per element (global phase removed).
    compose : ndarray of int (24, 24)
        ``compose[a, b]`` is the index of "a, then b" (unitary U_b·U_a).
    inverse : ndarray of int (24,)
    """

    unitaries: np.ndarray
    compose: np.ndarray
    inverse: np.ndarray

    def index(self, u: np.ndarray, *, atol: float = 1e-9) -> int:
        """Index of the element equal to ``u`` up to a global phase.

        Raises
        ------
        TimelineError
            If ``u`` is not a Clifford (a ValueError).
        """
        c = _canonical(np.asarray(u, dtype=complex))
        d = np.abs(self.unitaries - c[None]).reshape(len(self.unitaries), -1).max(axis=1)
        k = int(np.argmin(d))
        if d[k] > atol:
            raise TimelineError("the unitary is not a single-qubit Clifford")
        return k

    def product(self, indices: Sequence[int]) -> int:
        """Index of the sequence (time order) of elements."""
        acc = 0  # identity
        for k in indices:
            acc = int(self.compose[acc, k])
        return acc


@lru_cache(maxsize=1)
def clifford_group() -> CliffordGroup:
    """The group from :data:`CLIFFORD_DECOMPOSITIONS` (tables built once)."""
    us = np.array([_canonical(_sequence_unitary(d)) for d in CLIFFORD_DECOMPOSITIONS])
    n = len(us)
    proto = CliffordGroup(us, np.zeros((n, n), int), np.zeros(n, int))
    comp = np.array([[proto.index(us[b] @ us[a], atol=1e-6) for b in range(n)]
                     for a in range(n)])
    inv = np.array([int(np.flatnonzero(comp[a] == 0)[0]) for a in range(n)])
    for arr in (us, comp, inv):
        arr.setflags(write=False)
    return CliffordGroup(us, comp, inv)
