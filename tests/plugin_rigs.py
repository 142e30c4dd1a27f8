"""The bundled simulator behind a lab-style plug-in, for tests of the ``--rig`` path.

Tests subclass :class:`SimPlugin` to make a plug-in that lies, fails, hangs, states no
limits or names an interlock, and hand its factory to the CLI as ``module:factory``.
"""

from __future__ import annotations

from simulated_device import SimRig, demo_device_path


class SimPlugin:
    """A plug-in rig that forwards every member to a drift-free simulator."""

    def __init__(self, *, seed: int = 1) -> None:
        self.sim = SimRig(demo_device_path(), seed=seed, drift=False)

    @property
    def chip(self):
        return self.sim.chip

    @property
    def repetition_ns(self) -> float:
        return self.sim.repetition_ns

    def describe(self) -> str:
        return "plug-in over " + self.sim.describe()

    def now(self) -> float:
        return self.sim.now()

    def advance_clock_to(self, t_s: float) -> None:
        self.sim.advance_clock_to(t_s)

    def run(self, timelines, shots):
        return self.sim.run(timelines, shots)
