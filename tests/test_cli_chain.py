"""A lab's chain on the command line, one command after another:
calibrate → settings → verify → report → history → due --list → due,
on the bundled simulator and on a plug-in rig (the simulator behind the rig contract,
no truth), with the lab's chip file."""

from __future__ import annotations

import csv
import datetime as dt
import json
from pathlib import Path

import pytest
from plugin_rigs import SimPlugin
from test_cli_commands import _run

from simulated_device import demo_device_path
from xtalkcal.cli import main
from xtalkcal.compensation import CompensationSettings
from xtalkcal.store import Ledger

ROOT = Path(__file__).resolve().parents[1]
QUICK = str(ROOT / "protocols" / "quick-survey.toml")


def lab_rig():
    """A lab-style plug-in: the simulator behind the rig contract, no truth exposed."""
    return SimPlugin(seed=4)


@pytest.fixture(scope="module")
def lab_chip(tmp_path_factory):
    path = tmp_path_factory.mktemp("chip") / "lab-chip.toml"
    assert main(["export-chip", demo_device_path(), "-o", str(path)]) == 0
    return path


def _chain(tmp_path, capsys, rig_args: list[str]):
    """The chain; returns what each step printed, by step."""
    led, sched = str(tmp_path / "ledger"), str(tmp_path / "schedule.json")
    said = {}
    code, said["calibrate"], err = _run(
        capsys, "calibrate", *rig_args, "--protocol", QUICK, "--aggressors", "q4-line",
        "--ledger", led, "-q", "-o", str(tmp_path / "m.json"))
    assert code == 0, err
    code, said["settings"], err = _run(
        capsys, "settings", "--ledger", led, "--solve", "multi-victim",
        "-o", str(tmp_path / "settings.json"))
    assert code == 0, err
    code, said["verify"], err = _run(
        capsys, "verify", *rig_args, "--settings", str(tmp_path / "settings.json"),
        "--ledger", led, "--protocol", QUICK, "-q", "-o", str(tmp_path / "v.json"))
    assert code in (0, 1), err  # 1: a pair above the tolerance, named in the output
    code, said["report"], err = _run(
        capsys, "report", "--ledger", led, "--out", str(tmp_path / "report"),
        "--verification", str(tmp_path / "v.json"))
    assert code == 0, err
    code, said["history"], err = _run(capsys, "history", "--ledger", led, "--pair", "q4-line:q5",
                                      "--csv")
    assert code == 0, err
    n_entries = len(Ledger(led).entries())
    code, said["list"], err = _run(capsys, "due", "--list", *rig_args, "--ledger", led,
                                   "--schedule", sched, "--protocol", QUICK)
    assert code == 0, err
    assert not Path(sched).exists() and len(Ledger(led).entries()) == n_entries
    code, said["due"], said["due_err"] = _run(
        capsys, "due", *rig_args, "--ledger", led, "--schedule", sched, "--protocol", QUICK,
        "--settings-out", str(tmp_path / "settings-now.json"))
    assert code == 0, said["due_err"]
    data = json.loads(Path(sched).read_text())
    for p in data["pairs"]:  # as if the checks had fallen due
        p["due_s"] = 0.0
    Path(sched).write_text(json.dumps(data))
    code, said["due2"], err = _run(capsys, "due", *rig_args, "--ledger", led, "--schedule",
                                   sched, "--protocol", QUICK,
                                   "--settings-out", str(tmp_path / "settings-now.json"))
    assert code == 0, err
    return said


def _check_chain(tmp_path, said):
    led = Ledger(tmp_path / "ledger")
    nulled = {k for k, e in led.as_of(0.0 + 1e12).entries.items() if e.kind != "survey"}
    settings = CompensationSettings.read_json(tmp_path / "settings.json")
    assert {p.key for p in settings} == nulled and nulled
    # verification: one line per setting, each with its residual and uncertainty
    v = json.loads((tmp_path / "v.json").read_text())
    assert {(p["aggressor_line"], p["victim"]) for p in v["pairs"]} == nulled
    assert all(p["residual_db"] is not None and p["stderr"] > 0 for p in v["pairs"])
    md = (tmp_path / "report" / "report.md").read_text()
    assert "Verification of the written settings" in md and "true" not in md.lower()
    assert (tmp_path / "report" / "matrix_db.png").exists()
    rows = list(csv.DictReader(said["history"].splitlines()))
    assert rows and all(r["aggressor_line"] == "q4-line" and r["victim"] == "q5" for r in rows)
    for r in rows:  # dates, not rig seconds
        assert dt.datetime.fromisoformat(r["stored_utc"]).utcoffset() == dt.timedelta(0)
    assert "UTC" in said["list"] and "nothing was sent" in said["list"]
    assert all(f"{a} → {v}" in said["list"] for a, v in nulled)
    assert "nothing due" in said["due"] and "no setting changed" in said["due"]
    assert "re-checked" in said["due2"]
    changed = [ln for ln in said["due2"].splitlines() if ln.startswith("setting changed:")]
    now = CompensationSettings.read_json(tmp_path / "settings-now.json")
    moved = [p for p in now if p.ratio != settings.pair(*p.key).ratio]
    assert len(changed) == len(moved)  # one line per setting that changed


def test_the_chain_on_the_bundled_simulator(tmp_path, capsys):
    said = _chain(tmp_path, capsys, ["--seed", "3"])
    _check_chain(tmp_path, said)


def test_the_chain_on_a_plug_in_rig_with_the_labs_chip_file(tmp_path, capsys, lab_chip):
    said = _chain(tmp_path, capsys, ["--rig", f"{__name__}:lab_rig", "--chip", str(lab_chip)])
    _check_chain(tmp_path, said)
    assert str(lab_chip) in said["calibrate"]  # the limits in force name their file
    assert "plug-in over" in (tmp_path / "report" / "report.md").read_text()
    # the plug-in's clock starts again at 0 in every process: said, not a silent "nothing due"
    assert "warning: the rig's clock" in said["due_err"] and "behind" in said["due_err"]
