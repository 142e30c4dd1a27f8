"""A simulated superconducting-qubit chip with drive crosstalk, behind xtalkcal's rig protocol.

This package is the ground truth every xtalkcal test rests on. Its physics is
validated against SciPy's Mathieu functions (transmon levels) and QuTiP (driven,
damped dynamics); see tests/test_device_*.py.

What it owns:

* device files (:mod:`simulated_device.device`): the hidden truth of a chip (true
  couplings with phases and delays, relaxation, readout errors, drift, electronics
  jitter), and the chip file a lab would write, derived from it;
* transmon levels (:mod:`simulated_device.transmon`) and the driven, damped dynamics
  (:mod:`simulated_device.dynamics`); exchange-coupled clusters of a few transmons
  (:mod:`simulated_device.cluster`) and how the rig uses them (:mod:`simulated_device.coupled`);
* seeded drift versus simulated time (:mod:`simulated_device.drift`,
  :mod:`simulated_device.drift_state`);
* :class:`SimRig` (:mod:`simulated_device.rig`), which runs timelines into counts.

May import: :mod:`xtalkcal.hardware`, :mod:`xtalkcal.common` and :mod:`xtalkcal.exceptions`
only. It stands where a lab's rig stands: it knows the chip, timelines, the rig protocol and
the safety check, and nothing the calibration builds on top of them, so no result can lean
on the simulator's insides. In xtalkcal only the command line imports it, as its default
rig (both rules are checked by tests/test_layers.py).
"""

from importlib import resources

from simulated_device.device import DeviceSpec, device_from_dict, load_device
from simulated_device.dynamics import StepControl, ToneBatch, evolve_populations, evolve_reference
from simulated_device.rig import SimRig
from simulated_device.transmon import TransmonLevels, charge_basis_levels, duffing_levels

__all__ = [
    # device files
    "DeviceSpec",
    "load_device",
    "device_from_dict",
    "demo_device_path",
    "minimal_device_path",
    "hard_device_path",
    # the rig
    "SimRig",
    # physics
    "TransmonLevels",
    "duffing_levels",
    "charge_basis_levels",
    "ToneBatch",
    "StepControl",
    "evolve_populations",
    "evolve_reference",
]


def demo_device_path() -> str:
    """Path of the bundled invented 9-qubit demo device file."""
    return str(resources.files("simulated_device") / "data" / "grid9_device.toml")


def minimal_device_path() -> str:
    """Path of the bundled minimal device file: two qubits, every hardware-like effect off,
    each field explained in the file."""
    return str(resources.files("simulated_device") / "data" / "minimal_device.toml")


def hard_device_path() -> str:
    """Path of the bundled invented hard 4-qubit device: every hardware-like effect on, several
    strongly (the scenario is written at the top of the file)."""
    return str(resources.files("simulated_device") / "data" / "square4_hard_device.toml")
