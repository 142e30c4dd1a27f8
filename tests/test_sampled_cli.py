"""The command line over a sampled-waveform plug-in: ``--rig module:factory`` with
:class:`simulated_device.SimulatedSampledRig`, a rig that is not the bundled tone simulator."""

from __future__ import annotations

import json
import math

from simulated_device import demo_device_path
from simulated_device.rig import SimulatedSampledRig
from xtalkcal.cli import main

PROTO = ('name = "leak"\n[methods]\nonly = ["leakage"]\n[survey]\nshots = 500\n'
         '[null]\nmax_rounds = 3\n')


def sampled_rig() -> SimulatedSampledRig:
    return SimulatedSampledRig(demo_device_path(), samples_per_ns=8.0, seed=1, drift=False)


def test_cli_calibrates_through_sampled_waveforms(tmp_path, capsys) -> None:
    proto = tmp_path / "p.toml"
    proto.write_text(PROTO)
    out = tmp_path / "m.json"
    code = main(["calibrate", "--rig", f"{__name__}:sampled_rig", "--protocol", str(proto),
                 "-q", "-o", str(out)])
    text = capsys.readouterr().out
    assert code == 0, text
    assert "limits in force" in text
    pairs = {(p["aggressor_line"], p["victim"]): p for p in json.loads(out.read_text())["pairs"]}
    # The leakage-risk pair of the demo chip, nulled from samples alone. Its magnitude is the
    # device's (the tone simulator's truth); its phase is not compared: through the waveform
    # path the null sees the line responses at the qubit's 1-2 frequency, 20 MHz from the
    # tone's, where the tone path evaluates them at the tone's (2π·Δf·τ, several degrees).
    x = pairs[("q4-line", "q5")]["ratio"]
    truth = sampled_rig().sim.true_ratio("q5", "q4-line", pairs[("q4-line", "q5")]["frequency_ghz"])
    assert abs(x["magnitude_db"] - 20 * math.log10(abs(truth))) < 0.3
