"""Chip files: validation errors name the file and field; round trips; safety limits."""

from __future__ import annotations

import copy
import math

import pytest
import tomli_w
from hypothesis import given, settings
from hypothesis import strategies as st

from xtalkcal.common import FieldErrors
from xtalkcal.exceptions import ConfigError, SafetyLimitError, TimelineError
from xtalkcal.hardware import (
    Envelope,
    Timeline,
    Tone,
    check_timelines,
    chip_from_dict,
    envelope_values,
    load_chip,
    pulse_area_ns,
)

GOOD = {
    "format": "xtalkcal-chip",
    "version": 1,
    "name": "two",
    "limits": {"max_amplitude": 0.9},
    "qubits": [
        {"name": "a", "f01_ghz": 5.0, "anharmonicity_ghz": -0.2, "t1_us": 50.0, "t2_us": 40.0},
        {"name": "b", "f01_ghz": 5.3, "anharmonicity_ghz": -0.21},
    ],
    "lines": [
        {"name": "da", "qubit": "a", "rabi_mhz": 40.0, "max_amplitude": 0.5},
        {"name": "db", "qubit": "b", "rabi_mhz": 45.0},
    ],
    "readout": {"groups": [["a", "b"]]},
}


def _bad(mutate):
    d = copy.deepcopy(GOOD)
    mutate(d)
    return d


@pytest.mark.parametrize(
    "mutate, field, words",
    [
        (lambda d: d["qubits"][0].pop("f01_ghz"), "qubits[0].f01_ghz", "missing"),
        (lambda d: d["qubits"][1].update(f01_ghz=5300.0), "qubits[1].f01_ghz", "out of range"),
        (lambda d: d["qubits"][1].update(f01_ghz=math.nan), "qubits[1].f01_ghz", "finite"),
        (lambda d: d["qubits"][1].update(name="a"), "qubits[1].name", "duplicate"),
        (lambda d: d["qubits"][0].update(anharmonicity_ghz=0.2), "anharmonicity_ghz", "range"),
        (lambda d: d["qubits"][0].update(t1_us=-3.0), "qubits[0].t1_us", "out of range"),
        (lambda d: d["qubits"][0].update(t2_us=500.0), "qubits[0].t2_us", "2·T1"),
        (lambda d: d["lines"][0].update(qubit="zz"), "lines[0].qubit", "not a qubit"),
        (lambda d: d["lines"][1].update(max_amplitude=1.5), "lines[1].max_amplitude", "range"),
        (lambda d: d["lines"][1].update(qubit="a"), "lines[1].qubit", "already"),
        (lambda d: d["lines"].pop(), "lines", "no drive line"),
        (lambda d: d["qubits"][0].update(f01_gz=5.0), "qubits[0].f01_gz", "unknown field"),
        (lambda d: d["readout"].update(groups=[["a"]]), "readout.groups", "no readout group"),
        (lambda d: d["limits"].update(max_average_power_dbm=-40.0), "max_average_power_dbm",
         "full_scale_dbm"),
        (lambda d: d.update(format="xtalkcal-simdevice"), "format", "expected"),
    ],
)
def test_bad_chip_names_file_and_field(mutate, field, words):
    with pytest.raises(ConfigError) as info:
        chip_from_dict(_bad(mutate), source="my_chip.toml")
    msg = str(info.value)
    # one mistake, one message: no follow-on complaint that only repeats it
    assert isinstance(info.value, FieldErrors) and len(info.value.errors) == 1
    assert msg.startswith("my_chip.toml: ")
    assert field in msg
    assert words in msg


def test_good_chip_round_trips_through_toml(tmp_path):
    chip = chip_from_dict(GOOD)
    assert chip.qubit("a").f12_ghz == pytest.approx(4.8)
    assert chip.amplitude_limit("da") == 0.5
    assert chip.amplitude_limit("db") == 0.9
    path = tmp_path / "chip.toml"
    path.write_text(tomli_w.dumps(chip.to_dict()))
    again = load_chip(path)
    assert again.qubits == chip.qubits and again.lines == chip.lines
    assert again.readout_groups == chip.readout_groups and again.limits == chip.limits


def test_toml_syntax_error_names_file(tmp_path):
    p = tmp_path / "broken.toml"
    p.write_text("name = 'x\n")
    with pytest.raises(ConfigError, match="broken.toml"):
        load_chip(p)


# Any name the documented rule accepts (xtalkcal.common.NAME_RULE), up to 8 characters.
names = st.from_regex(r"\A[A-Za-z][A-Za-z0-9_-]{0,7}\Z")


@settings(max_examples=60, deadline=None)
@given(
    qs=st.lists(
        st.tuples(names, st.floats(3.0, 8.0), st.floats(-0.4, -0.05)),
        min_size=1, max_size=5, unique_by=lambda t: t[0],
    ),
    rabi=st.floats(1.0, 200.0),
    amax=st.floats(0.01, 1.0),
)
def test_generated_chips_parse_and_round_trip(qs, rabi, amax):
    d = {
        "name": "gen",
        "qubits": [{"name": n, "f01_ghz": f, "anharmonicity_ghz": a} for n, f, a in qs],
        "lines": [{"name": f"L{n}", "qubit": n, "rabi_mhz": rabi, "max_amplitude": amax}
                  for n, _, _ in qs],
    }
    chip = chip_from_dict(d)
    assert chip.qubit_names == tuple(n for n, _, _ in qs)
    assert chip_from_dict(chip.to_dict()).qubits == chip.qubits


# ---------------------------------------------------------------- timelines and safety


def test_envelopes_have_the_documented_shape():
    g = Envelope("gaussian", sigma_ns=8.0)
    v = envelope_values(g, 32.0, [0.0, 16.0, 32.0, 40.0])
    assert v[0] == pytest.approx(0) and v[1] == pytest.approx(1) and v[2] == pytest.approx(0)
    assert v[3] == 0
    # numerical area equals the closed form
    import numpy as np

    t = np.linspace(0, 32.0, 20001)
    assert np.trapezoid(envelope_values(g, 32.0, t).real, t) == pytest.approx(
        pulse_area_ns(g, 32.0), rel=1e-6
    )
    ft = Envelope("flattop", ramp_ns=10.0)
    assert np.trapezoid(envelope_values(ft, 100.0, t * 100 / 32).real, t * 100 / 32) == (
        pytest.approx(pulse_area_ns(ft, 100.0), rel=1e-6)
    )
    d = Envelope("drag", sigma_ns=8.0, drag_ns=0.5)
    vd = envelope_values(d, 32.0, [8.0, 24.0])
    assert vd[0].imag > 0 and vd[1].imag < 0  # i·β·dg/dτ: rising edge positive


@pytest.mark.parametrize(
    "args",
    [
        ("da", 0.0, -4.0, 5.0, 0.1),
        ("da", -1.0, 4.0, 5.0, 0.1),
        ("da", 0.0, 4.0, 5.0, -0.1),
        ("da", 0.0, 4.0, math.nan, 0.1),
        ("da", 0.0, 10.0, 5.0, 0.1, 0.0, Envelope("flattop", ramp_ns=6.0)),
        ("da", 0.0, 10.0, 5.0, 0.1, 0.0, Envelope("gaussian")),
    ],
)
def test_bad_tones_are_refused(args):
    with pytest.raises(TimelineError):
        Tone(*args)


def test_safety_refuses_peak_and_power_before_anything():
    chip = chip_from_dict(GOOD)
    ok = Timeline((Tone("da", 0, 20, 5.0, 0.5),), ("a",))
    check_timelines(chip, [ok], 1e5)
    # two overlapping tones on one line add up beyond the line's limit of 0.5
    over = Timeline((Tone("da", 0, 20, 5.0, 0.3), Tone("da", 10, 20, 5.1, 0.3)), ("a",))
    with pytest.raises(SafetyLimitError, match="line da"):
        check_timelines(chip, [ok, over], 1e5)
    # the same tones back to back are fine
    seq = Timeline((Tone("da", 0, 20, 5.0, 0.3), Tone("da", 20, 20, 5.1, 0.3)), ("a",))
    check_timelines(chip, [seq], 1e5)
    d = copy.deepcopy(GOOD)
    d["limits"]["max_average_power_dbm"] = -40.0
    for ln in d["lines"]:
        ln["full_scale_dbm"] = -20.0
    pchip = chip_from_dict(d)
    # mean |a|^2 allowed = 10^(-20/10) = 0.01 of full scale over the repetition
    long = Timeline((Tone("db", 0, 5000, 5.3, 0.9),), ("b",))  # 0.81*5000/1e5 = 0.0405
    with pytest.raises(SafetyLimitError, match="dBm"):
        check_timelines(pchip, [long], 1e5)
    short = Timeline((Tone("db", 0, 1000, 5.3, 0.9),), ("b",))  # 0.0081 < 0.01
    check_timelines(pchip, [short], 1e5)
