"""A simulated superconducting-qubit chip with drive crosstalk, behind xtalkcal's rig protocol.

This package is the ground truth every xtalkcal test rests on. Its physics is
validated against SciPy's Mathieu functions (transmon levels) and QuTiP (driven,
damped dynamics); see tests/test_device_*.py.
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
