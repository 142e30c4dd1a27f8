"""A crosstalk-free stand-in for a lab's chip, for dry runs.

A dry run must go through the same calibration logic as a real run without sending
anything to hardware. It needs answers to its batches, so it asks this stand-in: a
simulated device with the lab chip's nominal qubits and lines, ideal readout, no
jitter, no drift and **no crosstalk at all**. Every survey then reads "no signal", so the
dry run shows every batch a calibration plans before it has data (the surveys of every
column), with the drive each would put on each line; the null searches, which depend on
what the surveys find, are not part of the plan.
"""

from __future__ import annotations

from typing import Any

from simulated_device.device import DeviceSpec, device_from_dict
from xtalkcal.hardware import Chip

__all__ = ["standin_device"]

# Coherence of a qubit the chip file gives none for: long enough not to matter in a plan.
_DEFAULT_T_US = 100.0


def standin_device(chip: Chip, repetition_ns: float) -> DeviceSpec:
    """A simulated device with ``chip``'s nominal values and no crosstalk.

    Parameters
    ----------
    chip : Chip
        The lab's chip (names, frequencies, line gains, limits).
    repetition_ns : float
        The lab rig's time between shot starts.
    """
    levels = 3
    ideal = [[1.0 if i == j else 0.0 for j in range(levels)] for i in range(levels)]
    qubits: list[dict[str, Any]] = []
    for q in chip.qubits:
        t1 = q.t1_us if q.t1_us is not None else _DEFAULT_T_US
        t2 = q.t2_us if q.t2_us is not None else min(_DEFAULT_T_US, 2 * t1)
        qubits.append({"name": q.name, "f01_ghz": q.f01_ghz,
                       "anharmonicity_ghz": q.anharmonicity_ghz, "t1_us": t1,
                       "t2_us": min(t2, 2 * t1), "readout": ideal})
    lines = []
    for ln in chip.lines:
        entry: dict[str, Any] = {"name": ln.name, "qubit": ln.qubit, "rabi_mhz": ln.rabi_mhz,
                                 "max_amplitude": ln.max_amplitude}
        if ln.full_scale_dbm is not None:
            entry["full_scale_dbm"] = ln.full_scale_dbm
        lines.append(entry)
    limits = {k: v for k, v in chip.limits.__dict__.items()
              if k != "stated" and v is not None}
    data = {
        "format": "xtalkcal-simdevice", "version": 1, "name": chip.name, "seed": 1,
        "levels": levels, "repetition_us": repetition_ns / 1000.0,
        "electronics": {"amplitude_jitter": 0.0, "phase_jitter_rad": 0.0},
        "limits": limits, "qubits": qubits, "lines": lines,
    }
    return device_from_dict(data, source=f"stand-in for {chip.source}")
