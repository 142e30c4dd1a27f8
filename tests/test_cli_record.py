"""`xtalkcal calibrate --record DIR --ledger L` run again with the same record: the ledger
keeps one copy of each estimate, and the rig time of resumed batches is counted."""

from __future__ import annotations

import dataclasses
import json
import re

import pytest

from xtalkcal.cli import build_parser, main
from xtalkcal.store import Ledger

PROTO = ('name = "leak"\n[methods]\nonly = ["leakage"]\n[survey]\nshots = 500\n'
         '[null]\nmax_rounds = 3\n')


def _calibrate(tmp_path, capsys, *, ledger=True):
    proto = tmp_path / "p.toml"
    proto.write_text(PROTO)
    args = ["calibrate", "--protocol", str(proto), "--seed", "1", "--no-drift", "-q",
            "--record", str(tmp_path / "rec"), "-o", str(tmp_path / "m.json")]
    if ledger:
        args += ["--ledger", str(tmp_path / "ledger")]
    assert main(args) == 0
    out = capsys.readouterr().out
    summary = [ln for ln in out.splitlines() if "s of rig time" in ln]
    assert len(summary) == 1, out
    secs = float(re.search(r"shots, ([0-9.]+) s of rig time", summary[0]).group(1))
    said = [ln for ln in out.splitlines() if ln.startswith("ledger ")]
    return secs, summary[0], said, json.loads((tmp_path / "m.json").read_text())


def _stored(tmp_path):
    led = Ledger(tmp_path / "ledger")
    return led, [e.bare() for e in led.entries()], led.sweep_ids()


def _lose_a_batch(tmp_path):
    """As if the last null batch had never been recorded (the run was cut short)."""
    sorted((tmp_path / "rec").glob("*-null*.h5"))[-1].unlink()


def test_rerun_with_the_same_record_stores_each_estimate_once(tmp_path, capsys):
    *_, said1, _ = _calibrate(tmp_path, capsys)
    _, entries1, sweeps1 = _stored(tmp_path)
    assert entries1 and sweeps1

    # The same command again: every batch comes from the record.
    *_, said2, _ = _calibrate(tmp_path, capsys)
    _, entries2, sweeps2 = _stored(tmp_path)
    assert entries2 == entries1 and sweeps2 == sweeps1  # no second copy

    # Cut short before its last batch, run again (the seeded simulator measures the lost
    # batch to the same numbers): still no second copy.
    _lose_a_batch(tmp_path)
    *_, said3, _ = _calibrate(tmp_path, capsys)
    assert _stored(tmp_path)[1] == entries1

    # One line each time says what happened to the ledger.
    assert len(said1) == 1 and "appended" in said1[0]
    for said in (said2, said3):
        assert len(said) == 1 and "already holds" in said[0] and "nothing appended" in said[0]


def test_resumed_run_counts_the_rig_time_of_its_recorded_batches(tmp_path, capsys):
    secs1, summary1, _, m1 = _calibrate(tmp_path, capsys, ledger=False)
    assert secs1 > 0 and "resumed from" not in summary1
    secs2, summary2, _, m2 = _calibrate(tmp_path, capsys, ledger=False)
    # Every batch resumed: they cost the rig time they took when they were recorded.
    assert secs2 > 0 and secs2 == pytest.approx(secs1, abs=0.051)
    assert m2["rig_seconds"] > 0 and m2["rig_seconds"] == pytest.approx(m1["rig_seconds"])
    assert "resumed from" in summary2 and "0 shots, 0.0 s newly executed" in summary2
    # Part resumed, part measured now: reported apart, adding up to the whole.
    _lose_a_batch(tmp_path)
    secs3, summary3, _, _ = _calibrate(tmp_path, capsys, ledger=False)
    old = re.search(r"\((\d+) shots, ([0-9.]+) s resumed from", summary3)
    new = re.search(r"; (\d+) shots, ([0-9.]+) s newly executed", summary3)
    assert old and new, summary3
    assert int(old.group(1)) > 0 and float(old.group(2)) > 0
    assert int(new.group(1)) > 0 and float(new.group(2)) > 0
    assert secs3 == pytest.approx(secs1, abs=0.051)
    assert float(old.group(2)) + float(new.group(2)) == pytest.approx(secs3, abs=0.11)


def test_resumed_run_appends_only_what_is_new(tmp_path, capsys):
    """An estimate that differs from the stored ones is appended (with the sweep it came
    from linked to the stored copy); the ones the ledger holds are not."""
    from simulated_device import SimRig, demo_device_path
    from xtalkcal.calibrate import calibrate_chip
    from xtalkcal.cli import _record_in_ledger
    from xtalkcal.measure import BatchRunner, load_protocol

    _calibrate(tmp_path, capsys)
    led, before, sweeps = _stored(tmp_path)
    rig = SimRig(demo_device_path(), seed=1, drift=False)
    runner = BatchRunner(rig, tmp_path / "rec")
    result = calibrate_chip(rig, load_protocol(tmp_path / "p.toml"), runner=runner)
    assert runner.shots_executed == 0 and runner.rig_seconds_resumed > 0
    changed = result.pairs[0]
    result.pairs[0] = dataclasses.replace(changed, x=changed.x * 1.01)
    said = _record_in_ledger(str(tmp_path / "ledger"), rig.chip.name, result,
                             resumed_from=str(tmp_path / "rec"))
    assert f"{len(result.pairs) - 1} estimates resumed" in said and "appended 1 estimates" in said
    after = led.entries()
    assert len(after) == len(before) + 1 and led.sweep_ids() == sweeps  # sweep not copied
    (fresh,) = after[len(before):]
    assert fresh.value == changed.x * 1.01 and fresh.sweep_id in sweeps


def test_without_record_nothing_is_deduplicated(tmp_path):
    """Only a run that resumed from a record is compared with the ledger."""
    from xtalkcal.cli import _measurement_key

    e = dict(aggressor="q1-line", victim="q2", frequency_ghz=5.0, value=complex("nan+nanj"),
             covariance=((1.0, 0.0), (0.0, 1.0)), method="leakage", shots=1, amplification=1,
             quality=float("nan"), verdict="rejected", reason="no fit", measured_at_s=1.0,
             measured_at_utc="2031-01-01T00:00:00+00:00", rig="r", software_version="v",
             kind="survey", tag="cal-a", sweep_id="cal-a/q1-line-res")
    from xtalkcal.store import LedgerEntry

    a = LedgerEntry(**e)
    b = LedgerEntry(**{**e, "tag": "cal-b", "sweep_id": "cal-b/q1-line-res", "measured_at_s": 9.0})
    assert _measurement_key(a) == _measurement_key(b)  # NaN equal to itself, tag ignored
    c = LedgerEntry(**{**e, "sweep_id": "cal-a/q1-line-other"})
    assert _measurement_key(a) != _measurement_key(c)


@pytest.mark.parametrize("command", ["calibrate", "demo", "due", "check", "export-chip"])
def test_help_shows_defaults_but_not_none(command, capsys):
    with pytest.raises(SystemExit) as exc:
        main([command, "--help"])
    assert exc.value.code == 0
    out = " ".join(capsys.readouterr().out.split())
    assert "(default: None)" not in out and "(default: False)" not in out
    expected = {"calibrate": ["(default: xtalk-matrix.json)", "(default: sim)"],
                "demo": ["(default: 7.0)", "(default: xtalkcal-demo)", "(default: all)"],
                "due": ["(default: sim)"]}
    for text in expected.get(command, []):
        assert text in out


def test_every_option_with_a_default_shows_it():
    parser = build_parser()
    subs = next(a for a in parser._actions if a.dest == "command").choices
    for name, sub in subs.items():
        text = " ".join(sub.format_help().split())
        for action in sub._actions:
            if action.option_strings and action.default not in (None, False, "==SUPPRESS=="):
                # either the value itself, or help text that names the default in words
                assert (f"(default: {action.default})" in text
                        or "(default: " in " ".join((action.help or "").split())), (
                    name, action.dest)
