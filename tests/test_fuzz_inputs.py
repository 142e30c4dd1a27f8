"""Fuzzed input files: every mutant gives a clean result, never a traceback.

For every file kind the command line reads (chip, protocol and simulated-device TOML, a
protocol's method overrides, the schedule JSON, compensation settings JSON), 200 seeded
mutants of a good file (byte flips, truncation, deleted and duplicated lines, values of
another type, huge / negative / NaN / infinite numbers, deep nesting, bytes that are not
UTF-8, names that break the name rule) go through ``xtalkcal check FILE`` in process and
through the file's loader. The attack succeeds if anything but an OK line or clean
one-line errors comes out: a traceback, an exception other than the toolkit's own, an
error line that does not name the file and a field, or, for a mutant that changed one
``key = value``, an error that does not name that key.

The files are the bundled demo chip and device, the full protocol, and invented ones.
"""

from __future__ import annotations

import contextlib
import io
import random
import re
from collections.abc import Callable
from pathlib import Path

import pytest

from simulated_device import demo_device_path
from simulated_device.device import load_device
from xtalkcal.cli import main
from xtalkcal.compensation import CompensationSettings, PairSetting
from xtalkcal.drift import Schedule
from xtalkcal.exceptions import XtalkcalError
from xtalkcal.hardware import load_chip
from xtalkcal.measure import default_protocol, load_protocol

MUTANTS = 200
ROOT = Path(__file__).parents[1]
CHIP = ROOT / "simulated_device" / "data" / "grid9_chip.toml"
SETTINGS = default_protocol().recheck

OVERRIDES = """format = "xtalkcal-protocol"
version = 1
name = "with-overrides"

[methods]
only = ["leakage", "rotation", "stark"]
overrides = [
  { aggressor = "q4-line", victim = "q5", method = "leakage" },
  { aggressor = "q6-line", victim = "q7", method = "rotation" },
  { aggressor = "q1-line", victim = "q4", method = "stark" },
]
"""


def _schedule_text() -> str:
    sch = Schedule(SETTINGS)
    sch.calibrated(("q4-line", "q5"), 120.0)
    sch.calibrated(("q6-line", "q7"), 250.5, interval_h=6.0)
    sch.calibrated(("q1-line", "q4"), 300.0)
    sch.set_aside(("q1-line", "q4"), "stored |X| needs more than line q4-line's limit", 300.0)
    return sch.to_json()


def _settings_text() -> str:
    pairs = (
        PairSetting("q4-line", "q4", "q5", "q5-line", 4.78, complex(-0.05, 0.02),
                    ((1e-8, 2e-9), (2e-9, 3e-8)), 42.5, "leakage"),
        PairSetting("q6-line", "q6", "q7", "q7-line", 4.87, complex(0.01, -0.003),
                    ((4e-9, 0.0), (0.0, 4e-9)), 80.0, "rotation", solve="multi-victim"),
    )
    return CompensationSettings("grid9-demo", pairs, "2026-12-01T22:00:00+00:00").to_json()


def _settings_loader(path: Path) -> object:
    return CompensationSettings.read_json(path)


def _schedule_loader(path: Path) -> object:
    return Schedule.load(path, SETTINGS)


# kind: (good text, file suffix, loader, give the chip file to `check` too)
KINDS: dict[str, tuple[str, str, Callable[[Path], object], bool]] = {
    "chip": (CHIP.read_text(encoding="utf-8"), ".toml", load_chip, False),
    "protocol": ((ROOT / "protocols" / "full.toml").read_text(encoding="utf-8"), ".toml",
                 load_protocol, False),
    "device": (Path(demo_device_path()).read_text(encoding="utf-8"), ".toml", load_device,
               False),
    "overrides": (OVERRIDES, ".toml", load_protocol, True),
    "schedule": (_schedule_text(), ".json", _schedule_loader, True),
    "settings": (_settings_text(), ".json", _settings_loader, False),
}

BAD_NAMES = ["d/4", "..", "q 5", "q5\\n", "\u051b5", "q\u200b5", "", "5q", "q" * 70,
             "../../etc", "q5.", "q4-line\\u0000"]
BAD_NUMBERS_TOML = ["1e308", "-1e308", "nan", "inf", "-inf", "-1", "0", "1e-320",
                    "99999999999999999999999999", "-0.0", "1e20", "9" * 5000, "0x7fffffffff"]
BAD_NUMBERS_JSON = ["1e308", "-1e308", "NaN", "Infinity", "-Infinity", "1e999", "-1", "0",
                    "1e-320", "99999999999999999999999999", "1e20", "9" * 5000]
OTHER_TYPES_TOML = ['"text"', "true", "[1, 2]", "{ a = 1 }", "1979-05-27", "[]", "{}",
                    '""', "[[1], [2]]"]
OTHER_TYPES_JSON = ['"text"', "true", "null", "[1, 2]", '{"a": 1}', "[]", "{}", '""',
                    "[[1], [2]]"]
NOT_UTF8 = [b"\xff", b"\xfe\xff", b"\xc3\x28", b"\xed\xa0\x80", b"\x80", b"\xf0\x28\x8c"]

# `key = value` (TOML) or `"key": value` (JSON) where the value is one scalar on the line
_TOML_KV = re.compile(rb'^(\s*)([A-Za-z0-9_]+)(\s*=\s*)("[^"\n]*"|[^\s\[{#,][^#\n]*?)\s*$',
                      re.M)
_JSON_KV = re.compile(rb'"([A-Za-z0-9_]+)"(\s*:\s*)("[^"\n]*"|[-0-9.eE+]+|true|false|null)')
_NUMBER = re.compile(rb"(?<![\w.\"])-?\d+(\.\d+)?([eE][-+]?\d+)?(?![\w.\"])")
_STRING = re.compile(rb'"([^"\n\\]*)"')


def _mutate(data: bytes, json_kind: bool, rng: random.Random) -> tuple[bytes, str | None]:
    """One mutation; returns the mutant and the key whose value it replaced (or None)."""
    op = rng.randrange(10)
    n = len(data)
    if n == 0:
        return b"\xff", None
    if op == 0:  # byte flips
        b = bytearray(data)
        for _ in range(rng.randint(1, 4)):
            b[rng.randrange(n)] = rng.randrange(256)
        return bytes(b), None
    if op == 1:  # truncation
        return data[: rng.randrange(n)], None
    if op in (2, 3):  # delete or duplicate a line
        lines = data.splitlines(keepends=True)
        i = rng.randrange(len(lines))
        lines[i:i + 1] = [] if op == 2 else [lines[i], lines[i]]
        return b"".join(lines), None
    if op == 4:  # not UTF-8
        at = rng.randrange(n)
        return data[:at] + rng.choice(NOT_UTF8) + data[at:], None
    if op == 5:  # deep nesting in place of a value
        depth = rng.choice([33, 40, 200, 1200, 5000])
        deep = b"[" * depth + b"1" + b"]" * depth
        return _replace_value(data, json_kind, rng, lambda _: deep)
    if op == 6:  # a name breaking the rule
        strings = [m for m in _STRING.finditer(data) if re.fullmatch(rb"[dq]\d", m.group(1))]
        if strings:
            m = rng.choice(strings)
            bad = rng.choice(BAD_NAMES).encode("utf-8")
            return data[: m.start(1)] + bad + data[m.end(1):], None
    if op == 7:  # a number anywhere (also inside arrays) made huge, negative, NaN, inf
        numbers = list(_NUMBER.finditer(data))
        if numbers:
            m = rng.choice(numbers)
            bad = rng.choice(BAD_NUMBERS_JSON if json_kind else BAD_NUMBERS_TOML).encode()
            return data[: m.start()] + bad + data[m.end():], None
    if op == 8:  # the value of one key made a bad number
        pool = BAD_NUMBERS_JSON if json_kind else BAD_NUMBERS_TOML
        return _replace_value(data, json_kind, rng, lambda _: rng.choice(pool).encode())
    # the value of one key swapped for one of another type
    pool = OTHER_TYPES_JSON if json_kind else OTHER_TYPES_TOML
    return _replace_value(data, json_kind, rng, lambda _: rng.choice(pool).encode())


def _replace_value(data: bytes, json_kind: bool, rng: random.Random,
                   new: Callable[[bytes], bytes]) -> tuple[bytes, str | None]:
    matches = list((_JSON_KV if json_kind else _TOML_KV).finditer(data))
    if not matches:  # an earlier mutation left no `key = value` line: cut the file instead
        return data[: rng.randrange(len(data) + 1)], None
    m = rng.choice(matches)
    group = 3 if json_kind else 4
    key = m.group(1 if json_kind else 2).decode()
    return data[: m.start(group)] + new(m.group(group)) + data[m.end(group):], key


def _check(args: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(["check", *args])
    return code, out.getvalue(), err.getvalue()


@pytest.mark.parametrize("kind", sorted(KINDS))
def test_fuzzed_files_give_one_line_errors_naming_file_and_field(kind, tmp_path):
    good, suffix, loader, with_chip = KINDS[kind]
    path = tmp_path / f"mutant{suffix}"
    path.write_text(good, encoding="utf-8")
    before = [str(CHIP)] if with_chip else []
    assert _check([*before, str(path)])[0] == 0, "the unmutated file must pass"
    rng = random.Random(f"fuzz-{kind}")
    seen_codes = set()
    prefix = f"xtalkcal: error: {path}: "
    for i in range(MUTANTS):
        data, key = good.encode("utf-8"), None
        n_ops = rng.choice([1, 1, 1, 2, 3])
        for _ in range(n_ops):
            data, key = _mutate(data, suffix == ".json", rng)
        single_value_edit = key if n_ops == 1 else None
        path.write_bytes(data)
        code, out, err = _check([*before, str(path)])  # any exception fails the test
        seen_codes.add(code)
        assert code in (0, 2), (i, code, err)
        assert "Traceback" not in out + err
        lines = err.splitlines()
        assert (code == 2) == bool(lines), (i, out, err)
        for line in lines:
            assert line.startswith(prefix), (i, line)
            field, sep, problem = line[len(prefix):].partition(": ")
            assert sep and field.strip() and problem.strip(), (i, line)
        if code == 0:
            assert out.strip().endswith("OK"), (i, out)
        try:
            loader(path)
            loaded_ok = True
        except XtalkcalError as exc:  # the toolkit's own errors only
            loaded_ok = False
            msg = str(exc)
            assert msg.splitlines() and all(ln.startswith(f"{path}: ") for ln in
                                            msg.splitlines()), (i, msg)
        assert loaded_ok or code == 2, (i, "the loader refused what check accepted")
        # One `key = value` edited and refused, the file still parsing: the key is named,
        # as the field or, for a value that disagrees with another, in the problem.
        if code == 2 and single_value_edit and "(syntax)" not in err and "(file)" not in err:
            word = re.compile(rf"(^|[^A-Za-z0-9_]){re.escape(single_value_edit)}($|[^A-Za-z0-9_])")
            assert any(word.search(ln[len(prefix):]) for ln in lines), (i, key, err)
    assert seen_codes == {0, 2} or seen_codes == {2}
