"""Shared fixtures: seeded simulator, the demo chip, figure clean-up."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import pytest  # noqa: E402

from simulated_device import SimRig, demo_device_path, load_device  # noqa: E402


@pytest.fixture(autouse=True)
def _close_figures():
    yield
    plt.close("all")


@pytest.fixture(scope="session")
def demo_device():
    return load_device(demo_device_path())


@pytest.fixture()
def demo_rig(demo_device):
    """The demo chip with drift off, seeded."""
    return SimRig(demo_device, seed=1234, drift=False)


@pytest.fixture(scope="session")
def demo_chip(demo_device):
    return demo_device.chip()
