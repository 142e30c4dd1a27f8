"""Attacks on the input files and the unattended cron path.

Each test hands the toolkit a bad file or a bad stored state and fails if it gets
through: a traceback, a value accepted outside its physical range, a name that breaks
the name rule, an unknown line found only after rig time, a pair that stops every cron
run, or a resumed run whose recorded times differ from an uninterrupted one.
The chips, protocols and schedules here are invented for the tests.
"""

from __future__ import annotations

import copy
import dataclasses
import json
import math
import re
from pathlib import Path
from typing import Any

import pytest
import tomli_w
import tomllib

from simulated_device import SimRig, demo_device_path
from simulated_device.device import device_from_dict
from xtalkcal.calibrate import calibrate_chip
from xtalkcal.cli import main
from xtalkcal.common import NAME_RULE, FieldErrors
from xtalkcal.compensation import CompensationSettings, PairSetting
from xtalkcal.drift import Schedule, ScheduleFileError
from xtalkcal.exceptions import ConfigError
from xtalkcal.hardware import chip_from_dict
from xtalkcal.measure import BatchRunner, default_protocol, load_protocol, protocol_from_dict
from xtalkcal.store import Ledger

ROOT = Path(__file__).parents[1]
CHIP_FILE = ROOT / "simulated_device" / "data" / "grid9_chip.toml"
SETTINGS = default_protocol().recheck


def _err_lines(capsys) -> list[str]:
    cap = capsys.readouterr()
    assert "Traceback" not in cap.out + cap.err
    return cap.err.splitlines()


def _schedule_doc() -> dict[str, Any]:
    sch = Schedule(SETTINGS)
    sch.calibrated(("q4-line", "q5"), 10.0)
    sch.calibrated(("q6-line", "q7"), 20.0)
    return sch.to_dict()


# ------------------------------------------------------------------ bytes and nesting


@pytest.mark.parametrize("suffix", [".json", ".toml"])
def test_non_utf8_file_is_one_line_naming_file_and_offset(tmp_path, capsys, suffix):
    good = (json.dumps(_schedule_doc()) if suffix == ".json"
            else CHIP_FILE.read_text(encoding="utf-8"))
    raw = good.encode()
    bad = raw[:57] + b"\xff\xfe" + raw[57:]
    path = tmp_path / f"latin{suffix}"
    path.write_bytes(bad)
    assert main(["check", str(path)]) == 2
    (line,) = _err_lines(capsys)
    assert line.startswith(f"xtalkcal: error: {path}: (file): not UTF-8")
    assert "offset 57" in line and "0xff" in line


def test_non_utf8_schedule_stops_due_with_one_line(tmp_path, capsys):
    led = tmp_path / "ledger"
    Ledger.create(led, chip="grid9-demo")
    sched = tmp_path / "s.json"
    raw = b'{"format": "xtalkcal-schedule", "pairs": ["\xe9"]}'  # Latin-1, not UTF-8
    sched.write_bytes(raw)
    at = raw.index(b"\xe9")
    assert main(["due", "--ledger", str(led), "--schedule", str(sched)]) == 2
    (line,) = _err_lines(capsys)
    assert f"{sched}: (file): not UTF-8" in line and f"offset {at}" in line
    with pytest.raises(ScheduleFileError, match=f"offset {at}"):
        Schedule.load(sched, SETTINGS)


@pytest.mark.parametrize("depth", [40, 3000, 100_000])
@pytest.mark.parametrize("kind", ["schedule", "settings", "chip", "protocol"])
def test_deep_nesting_is_one_line_naming_the_file(tmp_path, capsys, kind, depth):
    deep = "[" * depth + "]" * depth
    if kind == "schedule":
        path, text = tmp_path / "s.json", f'{{"format": "xtalkcal-schedule", "pairs": {deep}}}'
    elif kind == "settings":
        path, text = tmp_path / "c.json", f'{{"schema": "xtalkcal-settings/1", "x": {deep}}}'
    elif kind == "chip":
        path, text = tmp_path / "c.toml", f'name = "x"\nlimits = {deep}\n'
    else:
        path, text = tmp_path / "p.toml", f'format = "xtalkcal-protocol"\nname = {deep}\n'
    path.write_text(text)
    assert main(["check", str(path)]) == 2
    (line,) = _err_lines(capsys)
    assert line.startswith(f"xtalkcal: error: {path}: (syntax): nested too deeply")


@pytest.mark.parametrize("suffix", [".json", ".toml"])
def test_integer_too_long_to_convert_is_one_line(tmp_path, capsys, suffix):
    path = tmp_path / f"long{suffix}"
    digits = "9" * 5000  # beyond Python's int-from-text limit: a ValueError in the parser
    path.write_text(f'{{"format": "xtalkcal-schedule", "schema_version": {digits}}}'
                    if suffix == ".json" else f'name = "x"\nversion = {digits}\n')
    assert main(["check", str(path)]) == 2
    (line,) = _err_lines(capsys)
    assert line.startswith(f"xtalkcal: error: {path}: (syntax): not valid")


# ------------------------------------------------------------------ numbers


def test_interval_of_1e308_hours_is_refused_in_protocol_and_schedule(tmp_path, capsys):
    proto = tmp_path / "p.toml"
    proto.write_text('format = "xtalkcal-protocol"\nname = "forever"\n[recheck]\n'
                     'interval_hours = 1e308\nmax_interval_hours = 1e308\n')
    assert main(["check", str(proto)]) == 2
    lines = _err_lines(capsys)
    assert len(lines) == 2
    for line, key in zip(lines, ["interval_hours", "max_interval_hours"], strict=True):
        assert f"{proto}: recheck.{key}: 1e+308 is out of range; accepted: 0.001 ≤ x ≤ 10000 h" \
            in line
    with pytest.raises(FieldErrors, match=r"recheck\.interval_hours"):
        load_protocol(proto)
    doc = _schedule_doc()
    doc["pairs"][1]["interval_hours"] = 1e308
    sched = tmp_path / "s.json"
    sched.write_text(json.dumps(doc))
    assert main(["check", str(sched)]) == 2
    (line,) = _err_lines(capsys)
    assert f"{sched}: pairs[1].interval_hours: 1e+308 is out of range; accepted:" in line
    with pytest.raises(ScheduleFileError, match=r"pairs\[1\]\.interval_hours"):
        Schedule.load(sched, SETTINGS)


def _numeric_paths(node: Any, prefix: tuple = ()) -> list[tuple]:
    """Every number in a document (not booleans), as a path of keys and indices."""
    out: list[tuple] = []
    items = node.items() if isinstance(node, dict) else enumerate(node)
    for k, v in items:
        if isinstance(v, (dict, list)):
            out.extend(_numeric_paths(v, (*prefix, k)))
        elif isinstance(v, (int, float)) and not isinstance(v, bool):
            out.append((*prefix, k))
    return out


def _set(doc: Any, path: tuple, value: Any) -> None:
    for k in path[:-1]:
        doc = doc[k]
    doc[path[-1]] = value


def _field_of(path: tuple) -> str:
    """The dotted field a reader names for ``path`` (a matrix entry: the matrix)."""
    text = ""
    for k in path:
        if isinstance(k, int):
            if text.endswith("readout") or text.endswith("covariance"):
                break  # a matrix is one field
            text += f"[{k}]"
        else:
            text += f".{k}" if text else k
    return text


def _full_protocol() -> dict[str, Any]:
    doc = tomllib.loads((ROOT / "protocols" / "full.toml").read_text(encoding="utf-8"))
    return doc


def _settings_doc() -> dict[str, Any]:
    p = PairSetting("q4-line", "q4", "q5", "q5-line", 4.78, complex(-0.05, 0.02),
                    ((1e-8, 2e-9), (2e-9, 3e-8)), 42.5, "leakage")
    return CompensationSettings("grid9-demo", (p,), "2026-12-01T22:00:00+00:00").to_dict()


def _schedule_full() -> dict[str, Any]:
    doc = _schedule_doc()
    doc["pairs"][0]["last_checked_s"] = 5.0
    doc["pairs"][0]["set_aside_entry_s"] = 3.0
    doc["pairs"][0]["set_aside"] = "over the limit"
    return doc


READERS = {
    "chip": (lambda: tomllib.loads(CHIP_FILE.read_text(encoding="utf-8")),
             lambda d: chip_from_dict(d, source="f")),
    "protocol": (_full_protocol, lambda d: protocol_from_dict(d, source="f")),
    "device": (lambda: tomllib.loads(Path(demo_device_path()).read_text(encoding="utf-8")),
               lambda d: device_from_dict(d, source="f")),
    "schedule": (_schedule_full, lambda d: Schedule.from_dict(d, SETTINGS, source="f")),
    "settings": (_settings_doc, lambda d: CompensationSettings.from_dict(d, source="f")),
}


@pytest.mark.parametrize("kind", sorted(READERS))
def test_every_number_of_every_file_kind_is_bounded(kind):
    """1e308, −1e308, NaN, ±inf and an integer beyond floats in any numeric field: refused,
    naming that field and what is accepted."""
    make, read = READERS[kind]
    read(make())  # the good document passes
    paths = _numeric_paths(make())
    if kind == "device":  # 700 lines: every field kind of one qubit, line and coupling
        paths = [p for p in paths if not isinstance(p[1] if len(p) > 1 else None, int)
                 or p[1] == 0]
    assert len(paths) >= 6
    for path in paths:
        for value in (1e308, -1e308, math.nan, math.inf, -math.inf, 10**400):
            doc = copy.deepcopy(make())
            _set(doc, path, value)
            with pytest.raises(ConfigError) as info:
                read(doc)
            errors = getattr(info.value, "errors", (info.value,))
            field = _field_of(path)
            mine = [e for e in errors if e.field == field or e.field.startswith(field + ".")]
            assert mine, (path, value, str(info.value))
            assert all("accepted" in e.problem or "expected" in e.problem for e in mine), \
                [str(e) for e in mine]


# ------------------------------------------------------------------ names

BAD_NAMES = ["d/4", "..", "q 5", "q5\n", "\u051b5", "q\u200b5", "", "5q", "q" * 65, "a.b",
             "q5/../q6", "\uff51\uff15"]


@pytest.mark.parametrize("bad", BAD_NAMES)
def test_one_name_rule_in_every_file_kind(tmp_path, capsys, bad):
    """A name breaking NAME_RULE as a qubit, a line, a readout member, an override's
    line, a schedule pair's victim or a setting's victim: refused at load and in check,
    naming the field."""
    chip = tomllib.loads(CHIP_FILE.read_text(encoding="utf-8"))
    cases: list[tuple[str, str, str]] = []  # (file, text, field)
    c1 = copy.deepcopy(chip)
    c1["qubits"][2]["name"] = bad
    cases.append(("c1.toml", tomli_w.dumps(c1), "qubits[2].name"))
    c2 = copy.deepcopy(chip)
    c2["lines"][3]["name"] = bad
    cases.append(("c2.toml", tomli_w.dumps(c2), "lines[3].name"))
    c3 = copy.deepcopy(chip)
    c3["readout"] = {"groups": [[*chip_from_dict(chip).qubit_names[:-1], bad]]}
    cases.append(("c3.toml", tomli_w.dumps(c3), "readout.groups"))
    proto = {"format": "xtalkcal-protocol", "name": "p", "methods": {"overrides": [
        {"aggressor": bad, "victim": "q5", "method": "leakage"}]}}
    cases.append(("p.toml", tomli_w.dumps(proto), "methods.overrides[0].aggressor"))
    sch = _schedule_doc()
    sch["pairs"][1]["victim"] = bad
    cases.append(("s.json", json.dumps(sch), "pairs[1].victim"))
    st = _settings_doc()
    st["pairs"][0]["victim"] = bad
    cases.append(("c.json", json.dumps(st), "pairs[0].victim"))
    for name, text, field in cases:
        path = tmp_path / name
        path.write_text(text, encoding="utf-8")
        assert main(["check", str(path)]) == 2, name
        lines = _err_lines(capsys)
        assert any(ln.startswith(f"xtalkcal: error: {path}: {field}: ") and
                   ("not a valid name" in ln or "expected" in ln) for ln in lines), lines
        assert len(lines) == 1 or name.startswith("c"), lines  # chip: references fail too
    assert NAME_RULE in str(ConfigError("f", "x", NAME_RULE))


# ------------------------------------------------------------------ unknown names, no rig time


@pytest.fixture
def no_rig_time(monkeypatch):
    """Any shot played fails the test: these errors must come before rig time."""
    def refuse(self, timelines, shots):
        raise AssertionError("rig time spent before the bad name was refused")

    monkeypatch.setattr(SimRig, "run", refuse)


def test_unknown_line_in_overrides_is_refused_by_check_and_calibrate(tmp_path, capsys,
                                                                      no_rig_time):
    proto = tmp_path / "p.toml"
    proto.write_text('format = "xtalkcal-protocol"\nname = "typo"\n[methods]\noverrides = [\n'
                     '  { aggressor = "q4-line", victim = "q5", method = "leakage" },\n'
                     '  { aggressor = "d99", victim = "q5", method = "leakage" },\n'
                     '  { aggressor = "q6-line", victim = "q77", method = "rotation" },\n'
                     '  { aggressor = "q6-line", victim = "q6", method = "rotation" },\n]\n')
    assert main(["check", str(proto)]) == 0  # alone: the names obey the rule
    capsys.readouterr()
    assert main(["check", str(CHIP_FILE), str(proto)]) == 2
    lines = _err_lines(capsys)
    assert [re.match(r"xtalkcal: error: (.*?): (\S+): ", ln).groups() for ln in lines] == [
        (str(proto), "methods.overrides[1].aggressor"),
        (str(proto), "methods.overrides[2].victim"),
        (str(proto), "methods.overrides[3].victim"),
    ]
    assert "'d99' is not a drive line of chip 'grid9-demo'" in lines[0]
    assert main(["calibrate", "--protocol", str(proto), "-q",
                 "-o", str(tmp_path / "m.json")]) == 2
    assert len(_err_lines(capsys)) == 3
    assert not (tmp_path / "m.json").exists()


def test_unknown_names_in_schedule_are_refused_by_check_and_due(tmp_path, capsys,
                                                                no_rig_time):
    doc = _schedule_doc()
    doc["pairs"].append(dict(doc["pairs"][0], aggressor="d99", victim="q5"))
    doc["pairs"].append(dict(doc["pairs"][0], aggressor="q3-line", victim="q3"))
    sched = tmp_path / "s.json"
    sched.write_text(json.dumps(doc))
    assert main(["check", str(sched), str(CHIP_FILE)]) == 2
    (line,) = _err_lines(capsys)
    assert re.search(rf"{re.escape(str(sched))}: pairs\[2\]\.aggressor: 'd99' is not a drive "
                     r"line of chip 'grid9-demo'.*\(1 more pairs like it\)", line)
    led = tmp_path / "ledger"
    Ledger.create(led, chip="grid9-demo")
    assert main(["due", "--ledger", str(led), "--schedule", str(sched)]) == 2
    (line,) = _err_lines(capsys)
    assert "'d99' is not a drive line" in line
    assert json.loads(sched.read_text()) == doc  # nothing rewritten


# ------------------------------------------------------------------ the cron path

PROTO = ('name = "leak"\n[methods]\nonly = ["leakage"]\n[survey]\nshots = 500\n'
         'threshold_db = -50.0\n[null]\nmax_rounds = 3\n')


def _all_due(sched: Path) -> None:
    data = json.loads(sched.read_text())
    for p in data["pairs"]:
        p["due_s"] = 0.0
    sched.write_text(json.dumps(data))


def test_pair_over_the_line_limit_is_set_aside_once_and_the_rest_goes_on(tmp_path, capsys):
    proto = tmp_path / "p.toml"
    proto.write_text(PROTO)
    led, sched = tmp_path / "ledger", tmp_path / "schedule.json"
    args = ["--protocol", str(proto), "--ledger", str(led), "--schedule", str(sched)]
    assert main(["calibrate", "--protocol", str(proto), "--ledger", str(led), "-q",
                 "-o", str(tmp_path / "m.json")]) == 0
    assert main(["due", *args]) == 0
    ledger = Ledger(led)
    assert {("q4-line", "q5"), ("q5-line", "q3")} <= set(ledger.current().entries)
    # A stored |X| of +6 dB: its cancellation tone would be 1.6× the aggressor's, beyond
    # line q5-line's limit (0.8). Every re-check of it is refused by the safety check.
    e = ledger.current()[("q4-line", "q5")]
    ledger.append([dataclasses.replace(e, value=e.value / abs(e.value) * 2.0,
                                       measured_at_s=e.measured_at_s + 1, sweep_id="",
                                       seq=0, position=0)])
    _all_due(sched)
    capsys.readouterr()
    assert main(["due", *args]) == 1  # a person is told once
    cap = capsys.readouterr()
    assert "Traceback" not in cap.out + cap.err and cap.err == ""
    said = [ln for ln in cap.out.splitlines() if "q4-line → q5" in ln]
    assert len(said) == 1 and "set aside" in said[0] and "limit 0.8" in said[0]
    assert any(ln.startswith("q5-line → q3: within") for ln in cap.out.splitlines())
    slot = {(p["aggressor"], p["victim"]): p for p in json.loads(sched.read_text())["pairs"]}
    assert "line q5-line, above its limit 0.8" in slot[("q4-line", "q5")]["set_aside"]
    assert slot[("q5-line", "q3")]["last_decision"] == "within"
    n_rechecks = sum(e.kind == "recheck" for e in Ledger(led).entries())
    # Later runs: no failure repeated, one short mention, the rest re-checked, exit 0.
    _all_due(sched)
    assert main(["due", *args]) == 0
    cap = capsys.readouterr()
    assert cap.err == ""
    assert [ln for ln in cap.out.splitlines() if "q4-line → q5" in ln] == [
        "set aside (not re-checked): q4-line → q5; see the schedule file for why"]
    assert sum(e.kind == "recheck" for e in Ledger(led).entries()) == n_rechecks + 1
    # A new calibration of the pair takes it back into the schedule.
    Ledger(led).append([dataclasses.replace(e, measured_at_s=e.measured_at_s + 2,
                                            sweep_id="", seq=0, position=0)])
    assert main(["due", *args]) == 0
    assert "calibrated anew since it was set aside" in capsys.readouterr().out
    back = {(p["aggressor"], p["victim"]): p for p in json.loads(sched.read_text())["pairs"]}
    assert back[("q4-line", "q5")]["set_aside"] == ""


QUICK = protocol_from_dict({"name": "leak", "methods": {"only": ["leakage"]},
                            "survey": {"shots": 500}, "null": {"max_rounds": 3}})


def test_resumed_calibration_keeps_the_times_of_an_uninterrupted_run(tmp_path):
    """Interrupted after two batches and resumed on a fresh simulator (whose clock starts
    at 0 again): every estimate carries the rig time of the uninterrupted run, and with
    drift on, the batches measured after the resume see the same drifted chip (the same
    estimates)."""
    lines = ["q4-line", "q5-line"]  # two batches each
    clean_rig = SimRig(demo_device_path(), seed=3, drift=True)
    clean = calibrate_chip(clean_rig, QUICK, aggressors=lines)
    rig = SimRig(demo_device_path(), seed=3, drift=True)
    real_run, calls = rig.run, {"n": 0}

    def power_cut(tls, shots):
        calls["n"] += 1
        if calls["n"] == 3:
            raise KeyboardInterrupt
        return real_run(tls, shots)

    rig.run = power_cut
    with pytest.raises(KeyboardInterrupt):
        calibrate_chip(rig, QUICK, runner=BatchRunner(rig, tmp_path), aggressors=lines)
    rig2 = SimRig(demo_device_path(), seed=3, drift=True)
    runner2 = BatchRunner(rig2, tmp_path)
    again = calibrate_chip(rig2, QUICK, runner=runner2, aggressors=lines)
    assert runner2.batches_resumed == 2 and runner2.batches == 2
    assert len(again.pairs) == len(clean.pairs)
    for a, b in zip(clean.pairs, again.pairs, strict=True):
        assert b.measured_at_s == pytest.approx(a.measured_at_s, abs=1e-9)
        assert a.x == b.x
    assert rig2.now() == pytest.approx(clean_rig.now(), abs=1e-9)


def test_advance_clock_never_moves_back():
    rig = SimRig(demo_device_path(), seed=1, drift=False, start_s=100.0)
    rig.advance_clock_to(50.0)
    assert rig.now() == 100.0
    rig.advance_clock_to(250.0)
    assert rig.now() == 250.0
    with pytest.raises(ValueError):
        rig.advance_clock_to(math.nan)
