"""Write the fixtures ``ledger_v2`` (a ledger of schema version 2) and ``record_v1`` (batch
records of format ``xtalkcal-batch/1``) with the code of the checkout it runs in.

Run from the repository root: ``python tests/data/make_fixtures.py tests/data``. The fixtures
committed were written before the record files and sweeps changed format, so that the tests
prove files of that version still open and resume.
"""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

from simulated_device import SimRig, demo_device_path
from xtalkcal.calibrate import calibrate_chip
from xtalkcal.hardware import Envelope, Timeline, Tone
from xtalkcal.measure import BatchRunner, protocol_from_dict
from xtalkcal.store import Ledger, ledger_entries, ledger_sweeps


def fixed_timelines(chip) -> list[Timeline]:
    """A batch that depends on nothing but the chip: two tones on the first line, read out
    on its qubit and the next (the tests rebuild it to resume the recorded batch)."""
    line = chip.lines[0]
    q = chip.qubit_names
    f = chip.qubit(line.qubit).f01_ghz
    return [Timeline((Tone(line.name, 0.0, 40.0, f, a, p, Envelope("gaussian", 10.0)),),
                     (q[0], q[1]), label=f"fixed:{k}")
            for k, (a, p) in enumerate([(0.1, 0.0), (0.2, 0.5), (0.3, -1.0)])]


def main(out: Path) -> None:
    proto = protocol_from_dict({"name": "small", "methods": {"only": ["leakage"]},
                                "survey": {"shots": 200}, "null": {"max_rounds": 1}})
    rig = SimRig(demo_device_path(), seed=5, drift=False)
    for d in ("ledger_v2", "record_v1"):
        shutil.rmtree(out / d, ignore_errors=True)
    runner = BatchRunner(rig, out / "record_v1")
    runner.run("fixed", fixed_timelines(rig.chip), 100)
    res = calibrate_chip(rig, proto, runner=runner, aggressors=[rig.chip.lines[4].name])
    led = Ledger.create(out / "ledger_v2", chip=rig.chip.name)
    led.append(ledger_entries(res, run_tag="cal"), sweeps=ledger_sweeps(res, run_tag="cal"))
    (out / "ledger_v2" / "ledger.lock").unlink(missing_ok=True)


if __name__ == "__main__":
    main(Path(sys.argv[1]))
