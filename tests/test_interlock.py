"""Attacks on the lab's interlock: a batch the interlock does not approve is never sent.

The interlock is a command named in the chip file; exit status 0 approves a batch, and
anything else (another status, silence past the timeout, a command that cannot start)
refuses it. A refused run resumes from its ``--record`` once the interlock approves.
"""

from __future__ import annotations

import copy
import dataclasses
import sys
import textwrap
from pathlib import Path

import pytest
from plugin_rigs import SimPlugin

from xtalkcal.cli import main
from xtalkcal.exceptions import ConfigError, InterlockRefused, RigError
from xtalkcal.hardware import Interlock, Timeline, Tone, chip_from_dict
from xtalkcal.measure import BatchRunner
from xtalkcal.store import Ledger

PY = sys.executable
PROTO = ('name = "leak"\n[methods]\nonly = ["leakage"]\n[survey]\nshots = 500\n'
         '[null]\nmax_rounds = 3\n')


def _script(tmp_path: Path, body: str) -> tuple[str, ...]:
    path = tmp_path / "interlock.py"
    path.write_text(textwrap.dedent(body))
    return (PY, str(path))


class GuardedRig(SimPlugin):
    """The simulator behind a plug-in whose chip names an interlock; counts its runs."""

    runs = 0
    interlock: Interlock | None = None

    @property
    def chip(self):
        return dataclasses.replace(self.sim.chip, interlock=GuardedRig.interlock)

    def run(self, timelines, shots):
        GuardedRig.runs += 1
        return self.sim.run(timelines, shots)


@pytest.fixture
def guarded():
    GuardedRig.runs = 0
    GuardedRig.interlock = None
    yield GuardedRig
    GuardedRig.interlock = None


def _batch(rig) -> list[Timeline]:
    q = rig.chip.qubits[0]
    tone = Tone(rig.chip.line_of(q.name).name, 0.0, 32.0, q.f01_ghz, 0.1)
    return [Timeline((tone,), (q.name,))]


# --- the command's answer --------------------------------------------------------------

def test_an_approving_interlock_lets_the_batch_through_and_sees_its_name(tmp_path, guarded):
    seen = tmp_path / "seen.txt"
    guarded.interlock = Interlock(_script(tmp_path, f"""
        import os
        open({str(seen)!r}, "a").write(os.environ["XTALKCAL_CHIP"] + " " +
                                       os.environ["XTALKCAL_BATCH"] + "\\n")
    """))
    rig = guarded()
    BatchRunner(rig).run("first-batch", _batch(rig), 100)
    assert guarded.runs == 1
    assert seen.read_text() == f"{rig.chip.name} first-batch\n"


@pytest.mark.parametrize(("body", "timeout", "words"), [
    ("import sys; print('MXC at 41 mK, above 30 mK'); sys.exit(3)", 30.0,
     "refused (exit status 3): MXC at 41 mK, above 30 mK"),
    ("import sys; sys.stderr.write('controller offline'); sys.exit(1)", 30.0,
     "refused (exit status 1): controller offline"),
    ("import time; time.sleep(30)", 0.5, "gave no answer within 0.5 s"),
])
def test_a_refusing_or_silent_interlock_stops_the_batch_before_the_rig(
        tmp_path, guarded, body, timeout, words):
    guarded.interlock = Interlock(_script(tmp_path, body), timeout_s=timeout,
                                  source="lab-chip.toml")
    rig = guarded()
    with pytest.raises(InterlockRefused) as info:
        BatchRunner(rig).run("b7", _batch(rig), 100)
    assert isinstance(info.value, RigError)  # the CLI's one line and exit status
    assert str(info.value).startswith("batch b7: not sent: the interlock of lab-chip.toml")
    assert words in str(info.value)
    assert guarded.runs == 0


def test_an_interlock_that_cannot_start_is_a_refusal(tmp_path, guarded):
    guarded.interlock = Interlock((str(tmp_path / "no-such-program"),))
    rig = guarded()
    with pytest.raises(InterlockRefused, match="could not be started"):
        BatchRunner(rig).run("b", _batch(rig), 100)
    assert guarded.runs == 0


def test_a_recorded_batch_is_replayed_without_asking(tmp_path, guarded):
    rig = guarded()
    BatchRunner(rig, tmp_path / "rec").run("b", _batch(rig), 100)
    guarded.interlock = Interlock((PY, "-c", "import sys; sys.exit(2)"))
    runner = BatchRunner(guarded(), tmp_path / "rec")
    runner.run("b", _batch(rig), 100)  # nothing is sent, so nothing needs approval
    assert runner.batches_resumed == 1 and guarded.runs == 1


# --- the chip file ---------------------------------------------------------------------

def _chip_dict(demo_chip, interlock):
    d = copy.deepcopy(demo_chip.to_dict())
    d["interlock"] = interlock
    return d


def test_the_interlock_table_round_trips(demo_chip):
    chip = chip_from_dict(_chip_dict(demo_chip, {"command": ["/opt/ok", "-v"], "timeout_s": 5}),
                          source="lab.toml")
    assert chip.interlock == Interlock(("/opt/ok", "-v"), 5.0, "lab.toml")
    assert chip_from_dict(chip.to_dict()).interlock.command == ("/opt/ok", "-v")
    assert demo_chip.interlock is None and "interlock" not in demo_chip.to_dict()


@pytest.mark.parametrize(("table", "words"), [
    ({"command": "/opt/ok --strict"}, "interlock.command: expected the program and its "
                                      "arguments as a list of strings"),
    ({"command": []}, "interlock.command: expected the program"),
    ({"command": ["/opt/ok", 3]}, "interlock.command: every argument must be a non-empty"),
    ({"command": ["/opt/ok", "a\0b"]}, "without NUL"),
    ({"command": ["/opt/ok"], "timeout_s": 0}, "interlock.timeout_s"),
    ({"command": ["/opt/ok"], "timeout_s": 1e9}, "interlock.timeout_s"),
    ({"command": ["/opt/ok"], "shell": True}, "interlock.shell"),
    ("fridge-ok", "interlock: expected a table"),
])
def test_a_bad_interlock_table_is_refused_naming_the_field(demo_chip, table, words):
    with pytest.raises(ConfigError) as info:
        chip_from_dict(_chip_dict(demo_chip, table), source="lab.toml")
    assert "lab.toml" in str(info.value) and words in str(info.value)


# --- end to end: refused mid-run, resumed once approved ---------------------------------

def guarded_rig():
    return GuardedRig()


def test_cli_a_refusal_mid_run_stops_cleanly_and_the_run_resumes(tmp_path, guarded, capsys):
    count = tmp_path / "asked"
    count.write_text("0")
    # Approves the first three batches, then refuses: the fridge warmed up mid-run.
    guarded.interlock = Interlock(_script(tmp_path, f"""
        import sys
        n = int(open({str(count)!r}).read()) + 1
        open({str(count)!r}, "w").write(str(n))
        if n > 3:
            print("MXC above 30 mK"); sys.exit(4)
    """))
    proto = tmp_path / "p.toml"
    proto.write_text(PROTO)
    args = ["calibrate", "--rig", f"{__name__}:guarded_rig", "--protocol", str(proto), "-q",
            "--record", str(tmp_path / "rec"), "--ledger", str(tmp_path / "ledger"),
            "-o", str(tmp_path / "m.json")]
    assert main(args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "not sent: the interlock" in err[0] and "MXC above 30 mK" in err[0]
    assert guarded.runs == 3
    assert not (tmp_path / "m.json").exists()
    assert len(list((tmp_path / "rec").glob("*.h5"))) == 3
    # Cooled down: the interlock approves again and the same command resumes.
    guarded.interlock = Interlock((PY, "-c", "pass"))
    assert main(args) == 0
    out = capsys.readouterr().out
    assert "resumed from" in out
    assert "limits in force, derived from" in out and "interlock: " + PY in out
    assert (tmp_path / "m.json").exists()
    assert any(e.accepted for e in Ledger(tmp_path / "ledger").entries())
