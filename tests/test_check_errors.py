"""Every problem of a chip, protocol or device file at once: one line each, file and field named.

The chips, protocols and devices here are invented for the tests.
"""

from __future__ import annotations

import copy
import subprocess
import sys
from typing import Any

import pytest
import tomli_w
from hypothesis import given, settings
from hypothesis import strategies as st

from simulated_device import device_from_dict
from xtalkcal.cli import main
from xtalkcal.common import FieldErrors
from xtalkcal.exceptions import ConfigError
from xtalkcal.hardware import chip_from_dict, load_chip
from xtalkcal.measure import load_protocol, protocol_from_dict

CHIP: dict[str, Any] = {
    "format": "xtalkcal-chip",
    "version": 1,
    "name": "trio",
    "limits": {"max_amplitude": 0.9},
    "qubits": [
        {"name": "q0", "f01_ghz": 4.85, "anharmonicity_ghz": -0.21, "t1_us": 60.0,
         "t2_us": 40.0},
        {"name": "q1", "f01_ghz": 5.12, "anharmonicity_ghz": -0.2},
        {"name": "q2", "f01_ghz": 4.97, "anharmonicity_ghz": -0.22, "f12_ghz": 4.75,
         "t1_us": 45.0},
    ],
    "lines": [
        {"name": "q0-line", "qubit": "q0", "rabi_mhz": 40.0, "max_amplitude": 0.8},
        {"name": "q1-line", "qubit": "q1", "rabi_mhz": 35.0},
        {"name": "q2-line", "qubit": "q2", "rabi_mhz": 42.0, "full_scale_dbm": -20.0},
    ],
    "readout": {"groups": [["q0", "q1"], ["q2"]]},
}

PROTOCOL: dict[str, Any] = {
    "format": "xtalkcal-protocol",
    "name": "short",
    "pulse": {"duration_ns": 40.0, "sigma_ns": 10.0},
    "methods": {"only": ["leakage", "rotation"]},
    "survey": {"shots": 500},
    "null": {"points_per_ring": 8},
    "recheck": {"interval_hours": 4.0, "min_interval_hours": 1.0, "max_interval_hours": 24.0},
}

DEVICE: dict[str, Any] = {
    "format": "xtalkcal-simdevice",
    "name": "pair",
    "seed": 7,
    "levels": 3,
    "electronics": {"amplitude_jitter": 1e-4},
    "drift": {"qubit_wander_mhz": 0.01},
    "limits": {"max_amplitude": 0.9},
    "qubits": [
        {"name": "q0", "f01_ghz": 5.0, "anharmonicity_ghz": -0.22, "t1_us": 40.0,
         "t2_us": 30.0, "readout": [[0.97, 0.03], [0.05, 0.95]]},
        {"name": "q1", "ej_ghz": 16.0, "ec_ghz": 0.25, "t1_us": 60.0, "t2_us": 50.0},
    ],
    "lines": [
        {"name": "q0-line", "qubit": "q0", "rabi_mhz": 50.0},
        {"name": "q1-line", "qubit": "q1", "rabi_mhz": 45.0, "self_delay_ns": 0.5},
    ],
    "couplings": [
        {"line": "q0-line", "qubit": "q1", "crosstalk_db": -30.0, "phase_deg": 40.0},
        {"line": "q1-line", "qubit": "q0", "crosstalk_db": -35.0, "phase_deg": -20.0},
    ],
}

Path = tuple[Any, ...]


def _set(data: dict[str, Any], path: Path, value: Any) -> None:
    node: Any = data
    for step in path[:-1]:
        node = node[step]
    node[path[-1]] = value


def _fields(exc: FieldErrors) -> list[str]:
    return [e.field for e in exc.errors]


# ------------------------------------------------------------ the case from the brief


THREE_MISTAKES = [
    (("qubits", 1, "f01_ghz"), 5120.0, "qubits[1].f01_ghz"),  # MHz typed for GHz
    (("lines", 0, "max_amplitude"), 1.2, "lines[0].max_amplitude"),
    (("readout", "groups"), [["q0", "q1"], ["q2", "q3"]], "readout.groups"),
]


def _three_mistakes_file(tmp_path) -> Any:
    data = copy.deepcopy(CHIP)
    for path, value, _ in THREE_MISTAKES:
        _set(data, path, value)
    p = tmp_path / "trio_chip.toml"
    p.write_text(tomli_w.dumps(data))
    return p


def test_three_independent_mistakes_give_three_messages(tmp_path):
    p = _three_mistakes_file(tmp_path)
    with pytest.raises(ConfigError) as info:
        load_chip(p)
    exc = info.value
    assert isinstance(exc, FieldErrors)
    assert _fields(exc) == [field for _, _, field in THREE_MISTAKES]
    lines = str(exc).splitlines()
    assert len(lines) == 3
    for line, (_, _, field) in zip(lines, THREE_MISTAKES, strict=True):
        assert line.startswith(f"{p}: {field}: ")
    assert "accepted: 0.5 ≤ x ≤ 20 GHz" in lines[0]
    assert "accepted: 0 < x ≤ 1" in lines[1]
    assert "'q3' is not a qubit" in lines[2] and "known: q0, q1, q2" in lines[2]
    # the first problem still reads as a single ConfigError for older callers
    assert (exc.source, exc.field) == (str(p), "qubits[1].f01_ghz")


def test_cli_check_prints_every_problem_without_traceback(tmp_path, capsys):
    bad = _three_mistakes_file(tmp_path)
    good = tmp_path / "good_chip.toml"
    good.write_text(tomli_w.dumps(CHIP))
    assert main(["check", str(bad), str(good)]) == 2
    cap = capsys.readouterr()
    err = cap.err.splitlines()
    assert len(err) == 3 and "Traceback" not in cap.err
    for line, (_, _, field) in zip(err, THREE_MISTAKES, strict=True):
        assert line.startswith(f"xtalkcal: error: {bad}: {field}: ")
    assert f"{good}: chip 'trio': 3 qubits, 3 lines — OK" in cap.out


def test_cli_check_in_a_fresh_process_exits_non_zero(tmp_path):
    bad = _three_mistakes_file(tmp_path)
    r = subprocess.run([sys.executable, "-m", "xtalkcal.cli", "check", str(bad)],
                       capture_output=True, text=True)
    assert r.returncode != 0
    assert "Traceback" not in r.stderr
    assert [line.split(": ")[3] for line in r.stderr.splitlines()] == [
        field for _, _, field in THREE_MISTAKES
    ]


# ------------------------------------------------------------ no cascades, none lost

# Mistakes that do not depend on one another: any set of them must be reported exactly,
# each once, and nothing else (no message that only repeats another one).
INDEPENDENT = [
    (("name",), 7, "name"),
    (("limits", "max_amplitude"), 0.0, "limits.max_amplitude"),
    (("qubits", 0, "f01_ghz"), 4850.0, "qubits[0].f01_ghz"),
    (("qubits", 0, "t2_us"), 1000.0, "qubits[0].t2_us"),  # > 2·T1 = 120 µs
    (("qubits", 1, "anharmonicity_ghz"), "-0.2", "qubits[1].anharmonicity_ghz"),
    (("qubits", 2, "t1_us"), -5.0, "qubits[2].t1_us"),
    (("qubits", 2, "f12_ghz"), 9.0, "qubits[2].f12_ghz"),
    (("lines", 0, "rabi_mhz"), 0.0, "lines[0].rabi_mhz"),
    (("lines", 1, "max_amplitude"), 1.5, "lines[1].max_amplitude"),
    (("lines", 1, "gain_db"), 3.0, "lines[1].gain_db"),
    (("lines", 2, "qubit"), "q7", "lines[2].qubit"),
    (("lines", 2, "full_scale_dbm"), "loud", "lines[2].full_scale_dbm"),
    (("readout", "groups"), [["q0"], ["q1"], ["q2"], ["q3"]], "readout.groups"),
    (("survey",), {"shots": 10}, "survey"),
]


@settings(max_examples=80, deadline=None, derandomize=True)
@given(chosen=st.sets(st.integers(0, len(INDEPENDENT) - 1), min_size=1))
def test_any_set_of_independent_mistakes_is_reported_exactly(chosen):
    data = copy.deepcopy(CHIP)
    for i in chosen:
        _set(data, *INDEPENDENT[i][:2])
    with pytest.raises(FieldErrors) as info:
        chip_from_dict(data, source="gen.toml")
    assert sorted(_fields(info.value)) == sorted(INDEPENDENT[i][2] for i in chosen)
    assert all(line.startswith("gen.toml: ") for line in str(info.value).splitlines())


def test_protocol_mistakes_all_reported(tmp_path):
    data = copy.deepcopy(PROTOCOL)
    data["pulse"]["sigma_ns"] = 0.1
    data["survey"]["shots"] = 2.5
    data["methods"]["only"] = ["leakage", "ramsey"]
    data["recheck"]["interval_hours"] = 30.0  # above max_interval_hours
    p = tmp_path / "proto.toml"
    p.write_text(tomli_w.dumps(data))
    with pytest.raises(FieldErrors) as info:
        load_protocol(p)
    assert _fields(info.value) == ["pulse.sigma_ns", "methods.only", "survey.shots",
                                   "recheck.interval_hours"]
    # sigma_ns is unknown, so "duration_ns ≥ 2·sigma_ns" is not checked on a guess
    assert "duration_ns" not in str(info.value)


def test_device_mistakes_all_reported():
    data = copy.deepcopy(DEVICE)
    data["qubits"][0]["readout"] = [[0.9, 0.2], [0.05, 0.95]]  # a row sums to 1.1
    data["qubits"][1]["ec_ghz"] = 4.0  # EJ/EC = 4: a charge qubit, not a transmon
    data["couplings"][0]["qubit"] = "q0"  # q0-line's own qubit
    data["couplings"][1]["phase_deg"] = 400.0
    data["electronics"]["jitter_groups"] = 0
    with pytest.raises(FieldErrors) as info:
        device_from_dict(data, source="dev.toml")
    assert sorted(_fields(info.value)) == sorted([
        "electronics.jitter_groups", "qubits[0].readout", "qubits[1].ej_ghz",
        "couplings[0].qubit", "couplings[1].phase_deg",
    ])


def test_device_needs_one_level_model_per_qubit():
    data = copy.deepcopy(DEVICE)
    del data["qubits"][0]["anharmonicity_ghz"]
    data["qubits"][1]["f01_ghz"] = 5.2  # charge-basis qubit given a Duffing value too
    with pytest.raises(FieldErrors) as info:
        device_from_dict(data, source="dev.toml")
    assert _fields(info.value) == ["qubits[0].anharmonicity_ghz", "qubits[1].f01_ghz"]
    assert "not both" in str(info.value)


# ------------------------------------------------------------ where reading stops early


def test_syntax_error_stops_at_once(tmp_path):
    p = tmp_path / "broken.toml"
    p.write_text('name = "x"\n[[qubits]\n')
    with pytest.raises(ConfigError) as info:
        load_chip(p)
    assert str(info.value).count("\n") == 0 and "(syntax)" in str(info.value)


def test_wrong_kind_of_file_gives_only_that_message():
    data = copy.deepcopy(DEVICE)
    data["qubits"][0]["f01_ghz"] = 4850.0
    with pytest.raises(FieldErrors) as info:
        chip_from_dict(data, source="dev.toml")
    assert _fields(info.value) == ["format"]


def test_malformed_table_does_not_hide_the_rest():
    data = copy.deepcopy(CHIP)
    data["limits"] = 0.9  # a number where the [limits] table belongs
    data["qubits"][1]["f01_ghz"] = 0.1
    with pytest.raises(FieldErrors) as info:
        chip_from_dict(data, source="c.toml")
    assert _fields(info.value) == ["limits", "qubits[1].f01_ghz"]



def test_odd_keys_and_names_keep_one_line_per_problem(tmp_path):
    data = copy.deepcopy(CHIP)
    data["limits"]["max\namplitude"] = 0.5  # TOML allows any quoted key, newlines included
    data["qubits"][0]["t1 us"] = 50.0
    data["lines"][2]["qubit"] = "q\u20282"  # a line separator inside a name
    data[""] = 1
    p = tmp_path / "odd.toml"
    p.write_text(tomli_w.dumps(data))
    with pytest.raises(FieldErrors) as info:
        load_chip(p)
    assert _fields(info.value) == [
        'limits."max\\namplitude"', 'qubits[0]."t1 us"', "lines[2].qubit", '""'
    ]
    assert len(str(info.value).splitlines()) == len(info.value.errors) == 4

# ------------------------------------------------------------ any junk: only ConfigError


def _paths(node: Any, prefix: Path = ()) -> list[Path]:
    out: list[Path] = []
    items = node.items() if isinstance(node, dict) else enumerate(node)
    for k, v in items:
        out.append((*prefix, k))
        if isinstance(v, (dict, list)):
            out.extend(_paths(v, (*prefix, k)))
    return out


junk = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-10**12, 10**12),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=4),
    st.lists(st.one_of(st.integers(-3, 3), st.text(max_size=2)), max_size=3),
    st.dictionaries(st.text(max_size=3), st.integers(), max_size=2),
)

READERS = [(CHIP, chip_from_dict), (PROTOCOL, protocol_from_dict), (DEVICE, device_from_dict)]


@settings(max_examples=300, deadline=None, derandomize=True)
@given(which=st.integers(0, len(READERS) - 1), data=st.data())
def test_junk_in_any_field_gives_config_errors_only(which, data):
    good, reader = READERS[which]
    doc = copy.deepcopy(good)
    for _ in range(data.draw(st.integers(1, 3))):
        path = data.draw(st.sampled_from(_paths(doc)))
        try:
            _set(doc, path, data.draw(junk))
        except (KeyError, IndexError, TypeError):
            pass  # an earlier draw replaced a table on this path: nothing left to set
    try:
        reader(doc, source="junk.toml")
    except ConfigError as exc:  # anything else (TypeError, ...) fails the test
        lines = str(exc).splitlines()
        assert lines and all(line.startswith("junk.toml: ") for line in lines)
        if isinstance(exc, FieldErrors):
            assert len(lines) == len(exc.errors)



def test_located_errors_survive_pickling():
    # A file's error must cross a process boundary intact: file, field and problem.
    import pickle

    from xtalkcal.common import FieldErrors
    from xtalkcal.drift import ScheduleFileError
    from xtalkcal.exceptions import ConfigError

    one = ConfigError("chip.toml", "qubits[0].f01_ghz", "expected a number")
    for err in (one, ScheduleFileError("s.json", "pairs", "expected a list"),
                FieldErrors([one, ConfigError("chip.toml", "name", "missing (required)")])):
        back = pickle.loads(pickle.dumps(err))
        assert type(back) is type(err) and str(back) == str(err)
        assert (back.source, back.field, back.problem) == (err.source, err.field, err.problem)
