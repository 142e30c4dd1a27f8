"""``calibrate --dry-run``: the planned batches are checked and tallied, nothing is sent.

The plan is answered by a crosstalk-free stand-in of the lab's chip, so the rig itself is
never asked; a planned batch over a limit stops the dry run as it would stop the run.
"""

from __future__ import annotations

import dataclasses

import pytest
from plugin_rigs import SimPlugin

from simulated_device.standin import standin_device
from xtalkcal.cli import main
from xtalkcal.hardware import SafetyLimits

PROTO = ('name = "leak"\n[methods]\nonly = ["leakage"]\n[survey]\nshots = 500\n'
         '[null]\nmax_rounds = 3\n')


class UntouchableRig(SimPlugin):
    """A plug-in that must never be asked to play anything."""

    limits = SafetyLimits(max_amplitude=0.9, max_average_power_dbm=-40.0, stated=True)

    @property
    def chip(self):
        return dataclasses.replace(self.sim.chip, limits=UntouchableRig.limits,
                                   source="lab-chip.toml")

    def describe(self) -> str:
        return "untouchable lab rig"

    def run(self, timelines, shots):
        raise AssertionError("a dry run sent a batch to the rig")


def untouchable_rig():
    return UntouchableRig()


@pytest.fixture
def proto(tmp_path):
    path = tmp_path / "p.toml"
    path.write_text(PROTO)
    return path


def test_the_stand_in_has_the_chips_names_and_limits_and_no_crosstalk(demo_chip):
    dev = standin_device(demo_chip, 1e5)
    assert dev.couplings == () or len(dev.couplings) == 0
    chip = dev.chip()
    assert chip.qubit_names == demo_chip.qubit_names
    assert chip.line_names == demo_chip.line_names
    assert chip.limits == demo_chip.limits


def test_a_dry_run_sends_nothing_and_prints_the_drive_per_line(tmp_path, proto, capsys):
    out = tmp_path / "m.json"
    code = main(["calibrate", "--dry-run", "--rig", f"{__name__}:untouchable_rig",
                 "--protocol", str(proto), "-q", "-o", str(out)])
    text = capsys.readouterr().out
    assert code == 0, text
    assert "dry run: nothing was sent to untouchable lab rig" in text
    rows = [
        ln.split() for ln in text.splitlines() if ln.split() and ln.split()[0].endswith("-line")
    ]
    assert rows and all(float(r[1]) <= float(r[2]) for r in rows)  # peak within its limit
    assert all(float(r[3]) <= -40.0 for r in rows)                 # average within −40 dBm
    assert not out.exists()


def test_a_dry_run_stops_at_a_planned_batch_over_the_total_limit(proto, capsys):
    # Each line's survey stays far under −40 dBm (−59 dBm at most for these leakage
    # surveys), and so does their sum (−58 dBm); a −60 dBm total refuses the plan.
    UntouchableRig.limits = SafetyLimits(max_amplitude=0.9, max_average_power_dbm=-40.0,
                                         max_total_average_power_dbm=-60.0, stated=True)
    try:
        code = main(["calibrate", "--dry-run", "--rig", f"{__name__}:untouchable_rig",
                     "--protocol", str(proto), "-q"])
    finally:
        UntouchableRig.limits = SafetyLimits(max_amplitude=0.9, max_average_power_dbm=-40.0,
                                             stated=True)
    err = capsys.readouterr().err
    assert code == 2 and "max_total_average_power_dbm = -60 dBm" in err
    assert "lab-chip.toml" in err and "Traceback" not in err
