"""The [[exchange]] blocks of a device file (version 3): read, validated, absent by default."""

from __future__ import annotations

import pytest
import tomllib

from simulated_device import demo_device_path
from simulated_device.device import device_from_dict
from xtalkcal.exceptions import ConfigError


def demo_data() -> dict:
    with open(demo_device_path(), "rb") as fh:
        return tomllib.load(fh)


def test_bundled_chip_has_no_exchange():
    assert device_from_dict(demo_data()).exchange == ()


def test_exchange_pair_is_read():
    data = demo_data()
    data["version"] = 3
    data["exchange"] = [{"qubit_a": "q0", "qubit_b": "q1", "j_mhz": 3.0}]
    dev = device_from_dict(data)
    assert [(e.qubit_a, e.qubit_b, e.j_mhz) for e in dev.exchange] == [("q0", "q1", 3.0)]


@pytest.mark.parametrize("block, words", [
    ({"qubit_a": "q0", "qubit_b": "q0", "j_mhz": 3.0}, "qubit_b"),
    ({"qubit_a": "q0", "qubit_b": "qx", "j_mhz": 3.0}, "qubit_b"),
    ({"qubit_a": "q0", "qubit_b": "q1", "j_mhz": 0.0}, "j_mhz"),
    ({"qubit_a": "q0", "qubit_b": "q1", "j_mhz": 60.0}, "j_mhz"),
    ({"qubit_a": "q0", "qubit_b": "q1", "j_mhz": 3.0, "jj": 1}, "jj"),
])
def test_bad_exchange_blocks_are_refused(block, words):
    data = demo_data()
    data["version"] = 3
    data["exchange"] = [block]
    with pytest.raises(ConfigError) as err:
        device_from_dict(data, source="dev.toml")
    assert "dev.toml" in str(err.value) and words in str(err.value)


def test_duplicate_pair_and_old_version_are_refused():
    data = demo_data()
    data["version"] = 3
    data["exchange"] = [{"qubit_a": "q0", "qubit_b": "q1", "j_mhz": 3.0},
                        {"qubit_a": "q1", "qubit_b": "q0", "j_mhz": 2.0}]
    with pytest.raises(ConfigError, match="twice"):
        device_from_dict(data)
    data["version"] = 2
    data["exchange"] = data["exchange"][:1]
    with pytest.raises(ConfigError, match="version = 3"):
        device_from_dict(data)
