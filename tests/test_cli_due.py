"""The cron-friendly `xtalkcal due` command, end to end on the simulated chip."""

from __future__ import annotations

import json

from xtalkcal.cli import main
from xtalkcal.store import Ledger

PROTO = ('name = "leak"\n[methods]\nonly = ["leakage"]\n[survey]\nshots = 500\n'
         '[null]\nmax_rounds = 3\n')


def _calibrated(tmp_path):
    """A leakage-only calibration of the bundled chip into a new ledger."""
    proto = tmp_path / "p.toml"
    proto.write_text(PROTO)
    led, sched = tmp_path / "ledger", tmp_path / "schedule.json"
    assert main(["calibrate", "--protocol", str(proto), "--ledger", str(led), "-q",
                 "-o", str(tmp_path / "m.json")]) == 0
    return proto, led, sched


def test_due_rechecks_what_is_due_and_records_it(tmp_path, capsys):
    proto, led, sched = _calibrated(tmp_path)
    n0 = len(Ledger(led).entries())
    assert main(["due", "--protocol", str(proto), "--ledger", str(led),
                 "--schedule", str(sched)]) == 0
    assert "nothing due" in capsys.readouterr().out
    assert len(Ledger(led).entries()) == n0  # nothing measured
    data = json.loads(sched.read_text())
    assert {(p["aggressor"], p["victim"]) for p in data["pairs"]} >= {("q4-line", "q5")}
    for p in data["pairs"]:  # make everything due now
        p["due_s"] = 0.0
    sched.write_text(json.dumps(data))
    assert main(["due", "--protocol", str(proto), "--ledger", str(led),
                 "--schedule", str(sched)]) == 0
    out = capsys.readouterr().out
    assert "re-checked" in out and "q4-line → q5" in out
    rechecks = [e for e in Ledger(led).entries() if e.kind == "recheck"]
    assert {(e.aggressor, e.victim) for e in rechecks} >= {("q4-line", "q5")}
    later = json.loads(sched.read_text())
    assert all(p["due_s"] > 0 for p in later["pairs"])  # rescheduled


def test_due_without_ledger_is_a_clear_error(tmp_path, capsys):
    assert main(["due", "--ledger", str(tmp_path / "none"), "--schedule",
                 str(tmp_path / "s.json")]) == 2
    err = capsys.readouterr().err
    assert "--ledger" in err and "calibrate" in err and "Traceback" not in err


def test_pair_no_longer_compensated_leaves_the_schedule(tmp_path, capsys):
    """A later survey-only estimate means no tone is in use: nothing to re-check."""
    import dataclasses

    proto, led, sched = _calibrated(tmp_path)
    assert main(["due", "--protocol", str(proto), "--ledger", str(led),
                 "--schedule", str(sched)]) == 0
    ledger = Ledger(led)
    e = ledger.current()[("q4-line", "q5")]
    ledger.append([dataclasses.replace(e, kind="survey", measured_at_s=e.measured_at_s + 1,
                                       sweep_id="", seq=0, position=0)])
    data = json.loads(sched.read_text())
    for p in data["pairs"]:
        p["due_s"] = 0.0
    sched.write_text(json.dumps(data))
    capsys.readouterr()
    assert main(["due", "--protocol", str(proto), "--ledger", str(led),
                 "--schedule", str(sched)]) == 0
    left = {(p["aggressor"], p["victim"]) for p in json.loads(sched.read_text())["pairs"]}
    assert ("q4-line", "q5") not in left


def test_a_broken_recheck_recalibrates_the_column(tmp_path):
    """A stored null moved far off (as after a wrong edit or a jump of the chip): the
    re-check finds the landscape broken, repeats itself once to confirm, and recalibrates
    the column, whose fresh null is close to the simulator's truth again; the pair keeps
    its short interval."""
    import dataclasses
    import math

    from simulated_device import SimRig, demo_device_path
    from xtalkcal.calibrate import calibrate_chip
    from xtalkcal.drift import RecheckDecision, Schedule, run_due, schedule_after_calibration
    from xtalkcal.measure import protocol_from_dict
    from xtalkcal.store import ledger_entries, ledger_sweeps

    proto = protocol_from_dict({"name": "leak", "methods": {"only": ["leakage"]},
                                "survey": {"shots": 500}, "null": {"max_rounds": 3}})
    rig = SimRig(demo_device_path(), seed=5, drift=False)
    res = calibrate_chip(rig, proto, aggressors=["q4-line"])
    led = Ledger.create(tmp_path / "ledger", chip=rig.chip.name)
    entries = ledger_entries(res, run_tag="cal")
    # the stored null of q4-line → q5 moved by 3× its own magnitude
    entries = [dataclasses.replace(e, value=e.value * 4) if e.victim == "q5" else e
               for e in entries]
    led.append(entries, sweeps=ledger_sweeps(res, run_tag="cal"))
    schedule = Schedule(proto.recheck)
    schedule_after_calibration(schedule, res, rig.now())
    rig.wait(proto.recheck.interval_hours * 3600.0 + 1.0)
    first = run_due(rig, proto, led, schedule)
    c, repeat = [c for c in first.checked if c.victim == "q5"]
    assert c.outcome.decision is RecheckDecision.BROKEN
    assert repeat.outcome.decision is RecheckDecision.BROKEN
    assert first.recalibrated == ["q4-line"]
    fresh = led.current()[("q4-line", "q5")]
    truth = rig.true_crosstalk("q5", "q4-line", fresh.frequency_ghz)
    assert 20 * math.log10(abs(fresh.value - truth)) < -45
    # The broken pair stays on the short interval its re-check gave it: a recalibration does
    # not reset it to the protocol's long one (its drift is not known to be slow).
    assert schedule.slot(("q4-line", "q5")).interval_h == proto.recheck.min_interval_hours


def test_a_broken_recheck_that_does_not_repeat_costs_no_recalibration(tmp_path, monkeypatch):
    """One re-check judged broken by chance (here: forced), its repeat within: the column
    is not recalibrated, and both re-checks are in the ledger."""
    import xtalkcal.drift.recheck as rc
    from simulated_device import SimRig, demo_device_path
    from xtalkcal.calibrate import calibrate_chip
    from xtalkcal.drift import RecheckDecision, Schedule
    from xtalkcal.measure import protocol_from_dict
    from xtalkcal.store import ledger_entries, ledger_sweeps

    proto = protocol_from_dict({"name": "leak", "methods": {"only": ["leakage"]},
                                "survey": {"shots": 500}, "null": {"max_rounds": 3}})
    rig = SimRig(demo_device_path(), seed=5, drift=False)
    res = calibrate_chip(rig, proto, aggressors=["q4-line"])
    led = Ledger.create(tmp_path / "ledger", chip=rig.chip.name)
    led.append(ledger_entries(res, run_tag="cal"), sweeps=ledger_sweeps(res, run_tag="cal"))
    schedule = Schedule(proto.recheck)
    rc.schedule_after_calibration(schedule, res, rig.now())
    rig.wait(proto.recheck.interval_hours * 3600.0 + 1.0)
    real = rc.analyse_recheck
    calls = []

    def first_one_broken(*a, **k):
        out = real(*a, **k)
        calls.append(out)
        if len(calls) == 1:
            import dataclasses
            return dataclasses.replace(out, decision=RecheckDecision.BROKEN)
        return out

    monkeypatch.setattr(rc, "analyse_recheck", first_one_broken)
    rep = rc.run_due(rig, proto, led, schedule)
    decisions = [c.outcome.decision for c in rep.checked if c.victim == "q5"]
    assert decisions[0] is RecheckDecision.BROKEN and decisions[1] is RecheckDecision.WITHIN
    assert rep.recalibrated == []
    assert [e.kind for e in led.history("q4-line", "q5")].count("recheck") == 2


def test_pairs_the_schedule_lacked_start_at_the_first_interval():
    """A compensated pair new to the schedule is first checked early (a fraction of the
    protocol's interval, clamped), not one full interval later: its drift rate is unknown."""
    from types import SimpleNamespace

    from xtalkcal.cli.due import cover_every_column
    from xtalkcal.drift import Schedule, first_interval
    from xtalkcal.measure import RecheckSettings

    settings = RecheckSettings(interval_hours=12.0, min_interval_hours=0.5, max_interval_hours=48.0)
    schedule = Schedule(settings)
    snap = SimpleNamespace(entries={
        ("q0-line", "q1"): SimpleNamespace(kind="null", measured_at_s=3600.0),
        ("q0-line", "q2"): SimpleNamespace(kind="survey", measured_at_s=3600.0),
        ("q1-line", "q0"): SimpleNamespace(kind="recheck", measured_at_s=7200.0),
    })
    added = cover_every_column(schedule, snap)
    assert added == [("q0-line", "q1"), ("q1-line", "q0")]
    first_h = first_interval(settings)
    assert 0.5 <= first_h < 12.0
    slot = schedule.slot(("q0-line", "q1"))
    assert slot.interval_h == first_h
    assert slot.due_s == 3600.0 + first_h * 3600.0
    assert schedule.slot(("q1-line", "q0")).due_s == 7200.0 + first_h * 3600.0
    assert cover_every_column(schedule, snap) == []  # already there: left alone
