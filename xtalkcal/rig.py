"""The hardware interface: the few verbs xtalkcal needs from a control stack.

A lab connects its own electronics by writing one class with these members; see
DEVELOPERS.md ("Writing a rig for your hardware"). The bundled simulated device
(``simulated_device.SimRig``) satisfies the same protocol.

Contract
--------
``chip``
    The :class:`~xtalkcal.chip.Chip` the rig drives (names, nominal values, limits).
``repetition_ns``
    Time between shot starts (ns); sets average power and the time a run costs.
``describe()``
    A short free-text description recorded with every data set.
``run(timelines, shots)``
    Execute every timeline ``shots`` times and return :class:`Counts`. All timelines of
    one call read the same qubits. It must call
    :func:`xtalkcal.safety.check_timelines` (or an equivalent, at least as strict)
    **before** anything is executed, and raise :class:`~xtalkcal.exceptions.RigError`
    for driver failures.
``now()``
    The rig's clock (s): wall time for hardware, simulated time for the simulator.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Protocol, runtime_checkable

import numpy as np

from xtalkcal.chip import Chip
from xtalkcal.exceptions import TimelineError
from xtalkcal.timeline import Timeline

__all__ = ["Counts", "Rig", "common_readout"]


@dataclass(frozen=True)
class Counts:
    """Readout outcomes of a batch.

    Attributes
    ----------
    qubits : tuple of str
        Qubits read, in the order of axis 1.
    counts : ndarray of int, shape (n_timelines, n_qubits, n_levels)
        How many shots assigned each level (0, 1, 2, …) to each qubit.
    shots : int
        Shots per timeline.
    started_s, finished_s : float
        Rig clock (s) at the start and end of the batch.
    """

    qubits: tuple[str, ...]
    counts: np.ndarray
    shots: int
    started_s: float
    finished_s: float

    def probabilities(self) -> np.ndarray:
        """Fractions of shots per level, same shape as ``counts``."""
        return self.counts / float(self.shots)

    def of(self, qubit: str) -> np.ndarray:
        """Counts of one qubit, shape (n_timelines, n_levels)."""
        return self.counts[:, self.qubits.index(qubit), :]


@runtime_checkable
class Rig(Protocol):
    """What xtalkcal needs from a control stack (see module docstring)."""

    @property
    def chip(self) -> Chip: ...

    @property
    def repetition_ns(self) -> float: ...

    def describe(self) -> str: ...

    def run(self, timelines: Sequence[Timeline], shots: int) -> Counts: ...

    def now(self) -> float: ...


def common_readout(timelines: Sequence[Timeline]) -> tuple[str, ...]:
    """The readout shared by all timelines of a batch (TimelineError if they differ)."""
    if not timelines:
        raise TimelineError("an empty batch of timelines was given")
    first = timelines[0].readout
    for tl in timelines[1:]:
        if tl.readout != first:
            raise TimelineError(
                f"all timelines of one batch must read the same qubits: {first} vs {tl.readout}"
            )
    return first
