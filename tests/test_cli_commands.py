"""The new commands and options one by one: settings (solves, errors), calibrate --pairs and
--aggressors, stale records, --chip, --rig-config, history dates, and `run` on a plug-in."""

from __future__ import annotations

import json
import os
import re
import time

import pytest
from plugin_rigs import SimPlugin

from simulated_device import demo_device_path
from xtalkcal.cli import main
from xtalkcal.compensation import CompensationSettings
from xtalkcal.store import Ledger

PROTO = ('name = "leak"\n[methods]\nonly = ["leakage"]\n[survey]\nshots = 500\n'
         '[null]\nmax_rounds = 3\n')

SEEN_CONFIG: list[dict] = []


def configured_rig(config):
    """A plug-in factory that takes the --rig-config file's contents."""
    SEEN_CONFIG.append(config)
    return SimPlugin(seed=int(config["rig"]["seed"]))


def plain_rig():
    return SimPlugin(seed=2)


def _run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture(scope="module")
def calibrated(tmp_path_factory):
    """A leakage-only calibration of column q4-line into a ledger (no drift)."""
    tmp = tmp_path_factory.mktemp("cal")
    proto = tmp / "p.toml"
    proto.write_text(PROTO)
    led = tmp / "ledger"
    assert main(["calibrate", "--protocol", str(proto), "--aggressors", "q4-line", "--no-drift",
                 "--seed", "2", "--ledger", str(led), "-q", "-o", str(tmp / "m.json")]) == 0
    return proto, led


def test_pairwise_settings_are_minus_x_of_the_ledger(calibrated, tmp_path, capsys):
    proto, led = calibrated
    out = tmp_path / "s.csv"
    code, text, err = _run(capsys, "settings", "--ledger", str(led), "--solve", "pairwise",
                           "-o", str(out))
    assert code == 0, err
    s = CompensationSettings.read_csv(out)
    cur = Ledger(led).current()
    assert len(s) and all(p.ratio == -cur[p.key].value and p.solve == "pairwise" for p in s)
    assert f"wrote {out}" in text


@pytest.mark.parametrize("argv, option", [
    (["--solve", "closed-loop"], "--rig"),
    (["--solve", "pairwise", "--rig", "sim"], "--rig"),
    (["-o", "settings.txt"], "-o"),
    (["--pairs", "q4-line:q9"], "--pairs"),
    (["--as-of", "yesterday"], "--as-of"),
    (["--as-of", "2001-01-01"], "--as-of"),
])
def test_settings_mistakes_name_the_option(calibrated, tmp_path, capsys, argv, option):
    _proto, led = calibrated
    args = ["settings", "--ledger", str(led), "-o", str(tmp_path / "s.json")]
    code, _out, err = _run(capsys, *args, *argv)
    assert code == 2 and option in err and "Traceback" not in err
    assert not (tmp_path / "s.json").exists()


def test_closed_loop_settings_refine_on_the_rig_and_are_recorded(calibrated, tmp_path, capsys):
    proto, led = calibrated
    n0 = len(Ledger(led).entries())
    out = tmp_path / "s.json"
    code, text, err = _run(capsys, "settings", "--ledger", str(led), "--solve", "closed-loop",
                           "--rig", "sim", "--seed", "2", "--rounds", "1", "--protocol",
                           str(proto), "-q", "-o", str(out))
    assert code == 0, err
    s = CompensationSettings.read_json(out)
    assert {p.solve for p in s} <= {"closed-loop", "pairwise"}
    assert "closed-loop refinement: 1 round" in text
    assert len(Ledger(led).entries()) > n0  # the refinement's nulls are in the ledger


def test_calibrate_only_the_named_pairs(tmp_path, capsys):
    proto = tmp_path / "p.toml"
    proto.write_text(PROTO)
    code, text, err = _run(capsys, "calibrate", "--protocol", str(proto), "--pairs", "q4-line:q5",
                           "--no-drift", "-q", "-o", str(tmp_path / "m.json"))
    assert code == 0, err
    doc = json.loads((tmp_path / "m.json").read_text())
    assert [(p["aggressor_line"], p["victim"], p["nulled"]) for p in doc["pairs"]] == [
        ("q4-line", "q5", True)]


def test_calibrate_pairs_keeps_the_column_survey_as_estimates(tmp_path, capsys):
    """--pairs nulls the named pair only; the rest of its column's survey is kept, not
    dropped: even a victim above the threshold (which a column run would null) stays a
    survey estimate."""
    proto = tmp_path / "p.toml"
    proto.write_text('name = "q"\n[survey]\nshots = 500\nthreshold_db = -30.0\n'
                     '[null]\nmax_rounds = 1\n')
    code, text, err = _run(capsys, "calibrate", "--protocol", str(proto), "--pairs", "q4-line:q5",
                           "--no-drift", "-q", "-o", str(tmp_path / "m.json"))
    assert code == 0, err
    pairs = json.loads((tmp_path / "m.json").read_text())["pairs"]
    assert {p["aggressor_line"] for p in pairs} == {"q4-line"}
    assert {p["victim"] for p in pairs if p["nulled"]} == {"q5"}
    others = [p for p in pairs if p["victim"] != "q5"]
    assert len(others) == 7  # every other qubit of the 9-qubit chip, surveyed
    # above the threshold, not nulled
    assert any(p["crosstalk"]["magnitude_db"] > -30.0 for p in others)


@pytest.mark.parametrize("argv, words", [
    (["--pairs", "q4-line"], ["LINE:QUBIT"]),
    (["--pairs", "q4-line:q4"], ["own qubit"]),
    (["--pairs", "d99:q5"], ["d99", "accepted"]),
    (["--aggressors", "q4-line,dx"], ["--aggressors", "accepted"]),
    (["--aggressors", "q6-line", "--pairs", "q4-line:q5"], ["--pairs"]),
])
def test_calibrate_scope_mistakes(tmp_path, capsys, argv, words):
    code, _out, err = _run(capsys, "calibrate", *argv, "-q", "-o", str(tmp_path / "m.json"))
    assert code == 2 and all(w in err for w in words) and "Traceback" not in err


def test_a_record_from_an_earlier_day_is_refused_unless_resumed(tmp_path, capsys):
    proto = tmp_path / "p.toml"
    proto.write_text(PROTO)
    args = ["calibrate", "--protocol", str(proto), "--aggressors", "q4-line", "--no-drift",
            "--seed", "1", "-q", "--record", str(tmp_path / "rec"), "-o", str(tmp_path / "m.json")]
    assert main(args) == 0
    capsys.readouterr()
    two_days_ago = time.time() - 2 * 86400
    for f in (tmp_path / "rec").rglob("*"):
        os.utime(f, (two_days_ago, two_days_ago))
    code, _out, err = _run(capsys, *args)
    assert code == 2 and "--record" in err and "earlier day" in err and "created" in err
    assert "UTC" in err and "--resume" in err
    code, out, err = _run(capsys, *args, "--resume")
    assert code == 0, err
    assert "resuming the record" in out and "created" in out


@pytest.mark.parametrize("limit", [0.6, 0.5])
def test_a_lab_chip_file_sets_the_limits_the_simulator_runs_under(tmp_path, capsys, limit):
    """The lab's own limits bind a rehearsal on the simulator: a plan within them runs,
    one beyond them is refused, naming the lab's file, before anything is sent."""
    chip = tmp_path / "lab.toml"
    assert main(["export-chip", demo_device_path(), "-o", str(chip)]) == 0
    chip.write_text(chip.read_text().replace("max_amplitude = 0.9",
                                             f"max_amplitude = {limit}"))
    proto = tmp_path / "p.toml"
    proto.write_text(PROTO)
    capsys.readouterr()
    code, out, err = _run(capsys, "calibrate", "--dry-run", "--chip", str(chip), "--protocol",
                          str(proto), "-q", "-o", str(tmp_path / "m.json"))
    first = out.splitlines()[0]
    assert str(chip) in first and f"≤ {limit:g} of full scale" in first
    if limit == 0.6:
        assert code == 0, err
        rows = [ln.split() for ln in out.splitlines() if re.match(r"q\d+-line ", ln)]
        assert rows and all(float(r[1]) <= limit for r in rows)
    else:  # the survey ring would need more than 0.5 on a victim line
        assert code == 2 and str(chip) in err and "limits.max_amplitude" in err
        assert "Nothing was sent" in err and "Traceback" not in err


def test_a_chip_file_for_another_chip_is_refused(tmp_path, capsys):
    chip = tmp_path / "other.toml"
    assert main(["export-chip", demo_device_path(), "-o", str(chip)]) == 0
    chip.write_text(chip.read_text().replace('"q8"', '"q9"'))
    capsys.readouterr()
    code, _out, err = _run(capsys, "calibrate", "--dry-run", "--chip", str(chip), "-q")
    assert code == 2 and str(chip) in err and "Traceback" not in err


def test_rig_config_is_handed_to_the_factory(tmp_path, capsys):
    cfg = tmp_path / "rig.toml"
    cfg.write_text('[rig]\nseed = 5\naddress = "192.0.2.1"\n')
    SEEN_CONFIG.clear()
    code, out, err = _run(capsys, "calibrate", "--dry-run", "--rig",
                          f"{__name__}:configured_rig", "--rig-config", str(cfg), "-q")
    assert code == 0, err
    assert SEEN_CONFIG == [{"rig": {"seed": 5, "address": "192.0.2.1"}}]


@pytest.mark.parametrize("rig, words", [
    ("plain_rig", ["--rig-config", "takes no configuration"]),
    ("sim", ["--rig-config", "simulator"]),
])
def test_rig_config_mistakes(tmp_path, capsys, rig, words):
    cfg = tmp_path / "rig.toml"
    cfg.write_text("[rig]\nseed = 5\n")
    spec = rig if rig == "sim" else f"{__name__}:{rig}"
    code, _out, err = _run(capsys, "calibrate", "--dry-run", "--rig", spec, "--rig-config",
                           str(cfg), "-q")
    assert code == 2 and all(w in err for w in words) and "Traceback" not in err


def test_history_dates_and_mistakes(calibrated, capsys):
    _proto, led = calibrated
    code, out, err = _run(capsys, "history", "--ledger", str(led))
    assert code == 0 and "UTC" in out and "q4-line → q5" in out
    code, out, _ = _run(capsys, "history", "--ledger", str(led), "--as-of", "2001-01-01")
    assert code == 0 and "0 entries" in out
    code, _out, err = _run(capsys, "history", "--ledger", str(led), "--pair", "q4-line:q2")
    assert code == 2 and "--pair" in err and "q4-line:q5" in err
    code, _out, err = _run(capsys, "history", "--ledger", str(led), "--as-of", "13/01/2026")
    assert code == 2 and "--as-of" in err and "ISO" in err


def test_report_refuses_a_non_empty_folder_and_a_foreign_file(calibrated, tmp_path, capsys):
    _proto, led = calibrated
    (tmp_path / "r").mkdir()
    (tmp_path / "r" / "x").write_text("x")
    code, _out, err = _run(capsys, "report", "--ledger", str(led), "--out", str(tmp_path / "r"))
    assert code == 2 and "--out" in err
    bad = tmp_path / "v.json"
    bad.write_text('{"format": "something-else"}')
    code, _out, err = _run(capsys, "report", "--ledger", str(led), "--out",
                           str(tmp_path / "r2"), "--verification", str(bad))
    assert code == 2 and str(bad) in err and "format" in err
    assert not (tmp_path / "r2").exists()


def test_run_on_a_plug_in_rig_does_the_whole_job_without_truth(tmp_path, capsys):
    proto = tmp_path / "p.toml"
    proto.write_text(PROTO)
    chip = tmp_path / "lab.toml"
    assert main(["export-chip", demo_device_path(), "-o", str(chip)]) == 0
    out = tmp_path / "job"
    code, text, err = _run(capsys, "run", "--rig", f"{__name__}:plain_rig", "--chip",
                           str(chip), "--protocol", str(proto), "--aggressors", "q4-line",
                           "--refine-rounds", "1", "--out", str(out), "-q")
    assert code in (0, 1), err
    for name in ("settings.json", "settings.csv", "report.md", "report.html", "matrix.json"):
        assert (out / name).exists(), name
    md = (out / "report.md").read_text()
    assert "Verification of the written settings" in md and "true" not in md.lower()
    assert not (out / "residuals.png").exists()  # the simulator's truth is not there
    assert "played as the control stack plays" in text
    code, _t, err = _run(capsys, "run", "--rig", f"{__name__}:plain_rig", "--chip",
                         str(chip), "--out", str(out), "-q")
    assert code == 2 and "--out" in err


class UntouchableRig(SimPlugin):
    """A plug-in that must never be asked to play anything."""

    def run(self, timelines, shots):
        raise AssertionError("a dry run sent a batch to the rig")


def untouchable_rig():
    return UntouchableRig()


def test_dry_runs_of_verify_closed_loop_and_due_send_nothing(calibrated, tmp_path, capsys):
    proto, led = calibrated
    chip = tmp_path / "lab.toml"
    assert main(["export-chip", demo_device_path(), "-o", str(chip)]) == 0
    s = tmp_path / "s.json"
    assert main(["settings", "--ledger", str(led), "-o", str(s)]) == 0
    n0 = len(Ledger(led).entries())
    rig = ["--rig", f"{__name__}:untouchable_rig", "--chip", str(chip)]
    capsys.readouterr()
    for argv in (["verify", "--settings", str(s), "--ledger", str(led)],
                 ["settings", "--solve", "closed-loop", "--ledger", str(led),
                  "-o", str(tmp_path / "s2.json")],
                 ["due", "--ledger", str(led), "--schedule", str(tmp_path / "sch.json")]):
        code, out, err = _run(capsys, *argv, *rig, "--protocol", str(proto), "--dry-run")
        assert code == 0, (argv[0], err)
        assert str(chip) in out.splitlines()[0]  # the limits in force and their file
        assert "nothing was sent" in out
    assert len(Ledger(led).entries()) == n0
    assert not (tmp_path / "s2.json").exists() and not (tmp_path / "sch.json").exists()


@pytest.mark.parametrize("command, shown", [
    ("settings", ["(default: multi-victim)", "(default: settings.json)"]),
    ("verify", ["(default: sim)"]),
    ("report", ["(default: xtalkcal-report)"]),
    ("run", ["(default: xtalkcal-run)", "(default: sim)"]),
    ("due", ["(default: multi-victim)"]),
])
def test_help_of_the_new_commands_shows_defaults(capsys, command, shown):
    with pytest.raises(SystemExit) as exc:
        main([command, "--help"])
    assert exc.value.code == 0
    out = " ".join(capsys.readouterr().out.split())
    assert "(default: None)" not in out and all(s in out for s in shown)


def test_history_warns_of_a_rig_clock_that_went_back(calibrated, tmp_path, capsys):
    import dataclasses
    import shutil

    from xtalkcal.store import utc_timestamp

    _proto, led = calibrated
    copy = tmp_path / "ledger"
    shutil.copytree(led, copy)
    ledger = Ledger(copy)
    code, _out, err = _run(capsys, "history", "--ledger", str(copy))
    assert code == 0 and "warning" not in err
    e = next(x for x in ledger.entries() if x.kind == "null")
    ledger.append([dataclasses.replace(e.bare(), measured_at_s=0.0,
                                       measured_at_utc=utc_timestamp(), tag="reset")])
    code, _out, err = _run(capsys, "history", "--ledger", str(copy))
    assert code == 0 and "warning: the rig clock went back" in err
