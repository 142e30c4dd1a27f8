"""Exchange couplings between transmons of a simulated device: reading and cluster choice.

Device file block (version 3)::

    [[exchange]]               # capacitive (exchange) coupling of two transmons
    qubit_a = "q0"
    qubit_b = "q1"
    j_mhz = 3.0                # 0 < J ≤ 50 MHz

Convention: in the rotating-wave approximation the pair adds ::

    H_J/h = J·(a†b + a b†)     (H_J = 2πJ·(a†b + ab†) with ħ = 1, J in cycles per time)

where a and b are the ladder operators of the two transmons as the simulator builds them
(⟨n+1|a†|n⟩ = λ_n of :class:`simulated_device.transmon.TransmonLevels`: √(n+1) for Duffing
levels). No block: the transmons do not couple, and every qubit is simulated alone.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from xtalkcal.common import Fields, valid

__all__ = ["ExchangeTruth", "read_exchange", "exchange_neighbours", "J_MAX_MHZ",
           "CLUSTER_MAX_QUBITS"]

#: Largest accepted J (MHz); beyond it the rotating-wave exchange model is not a transmon pair.
J_MAX_MHZ = 50.0
#: Transmons simulated together at most: the victim and its strongest-J neighbours.
CLUSTER_MAX_QUBITS = 3


@dataclass(frozen=True)
class ExchangeTruth:
    """Exchange coupling ``j_mhz`` between ``qubit_a`` and ``qubit_b``."""

    qubit_a: str
    qubit_b: str
    j_mhz: float


def read_exchange(top: Fields, qnames: Sequence[Any], version: Any) -> list[ExchangeTruth]:
    """The ``[[exchange]]`` blocks of a device file (they need ``version = 3``).

    Parameters
    ----------
    top : Fields
        The device file's top-level table.
    qnames : sequence of str
        The qubit names defined in the file.
    version : int
        The file's ``version``.

    Returns
    -------
    list of ExchangeTruth
        One per block; problems are reported on ``top``, naming the block and the field.
    """
    if "exchange" not in top.data:
        return []
    if valid(version) and version < 3:
        top.report("exchange", "needs version = 3 (older device files have no exchange "
                               "couplings)")
        top.tables("exchange", None)  # marked as read: one message, not two
        return []
    out: list[ExchangeTruth] = []
    seen: set[frozenset] = set()
    for et in top.tables("exchange", None):
        a = et.reference("qubit_a", list(qnames), "qubit")
        b = et.reference("qubit_b", list(qnames), "qubit")
        if valid(a, b) and a == b:
            b = et.reject("qubit_b", f"{a!r} is qubit_a too; accepted: another qubit "
                                     "(a transmon does not couple to itself)")
        elif valid(a, b) and frozenset((a, b)) in seen:
            b = et.reject("qubit_b", f"the pair {a} – {b} is listed twice; accepted: one "
                                     "[[exchange]] block per pair")
        j = et.number("j_mhz", lo=0.0, hi=J_MAX_MHZ, lo_open=True, unit="MHz")
        et.reject_unknown()
        if valid(a, b):
            seen.add(frozenset((a, b)))
        out.append(ExchangeTruth(a, b, j))
    return out


def exchange_neighbours(exchange: Sequence[ExchangeTruth], victim: str
                        ) -> list[tuple[str, float]]:
    """The qubits exchange-coupled to ``victim`` with their J (MHz), strongest first."""
    found = []
    for e in exchange:
        if e.qubit_a == victim:
            found.append((e.qubit_b, e.j_mhz))
        elif e.qubit_b == victim:
            found.append((e.qubit_a, e.j_mhz))
    # Ties in J keep the file's order (sorted is stable).
    return sorted(found, key=lambda p: -abs(p[1]))
