"""Batch records (``--record``): netCDF-4 files that plain xarray opens, holding the tones of
every timeline they answer; records of the first format still resume, and are converted."""

from __future__ import annotations

import importlib.util
import json
import math
import shutil
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
import xarray as xr
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from xtalkcal.exceptions import RigError
from xtalkcal.hardware import Envelope, Timeline, Tone
from xtalkcal.measure import BatchRunner

DATA = Path(__file__).resolve().parent / "data"

# Run in `python -I` with every xtalkcal import refused: what a notebook without the toolkit
# sees. Prints the variables, their dims and attrs, and the tone table.
NO_XTALKCAL = r"""
import sys
class _Refuse:
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in ("xtalkcal", "simulated_device"):
            raise ImportError("xtalkcal must not be needed to read the data")
        return None
sys.meta_path.insert(0, _Refuse())
"""
_OPEN_RECORD = NO_XTALKCAL + r"""
import json
import xarray as xr
with xr.open_dataset(sys.argv[1], engine="h5netcdf") as ds:
    out = {"attrs": {k: (v.item() if hasattr(v, "item") else v) for k, v in ds.attrs.items()},
           "dims": dict(ds.sizes), "coords": sorted(ds.coords),
           "units": {k: v.attrs.get("units") for k, v in ds.variables.items()},
           "counts": ds["counts"].values.tolist(),
           "qubit": [str(q) for q in ds["qubit"].values],
           "tones": {k: [str(x) if ds[k].dtype.kind in "OU" else float(x) for x in ds[k].values]
                     for k in ("line", "envelope", "amplitude", "phase_rad", "freq_ghz",
                               "start_ns", "duration_ns", "sigma_ns", "drag_ns", "ramp_ns")},
           "tone_timeline": [int(x) for x in ds["tone_timeline"].values]}
assert not any(m.split(".")[0] == "xtalkcal" for m in sys.modules)
print(json.dumps(out, default=str))
"""


def open_plainly(path: Path) -> dict:
    """What xarray alone reads in a record (in a child process without xtalkcal)."""
    done = subprocess.run([sys.executable, "-I", "-c", _OPEN_RECORD, str(path)],
                          capture_output=True, text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


def _fixtures():
    spec = importlib.util.spec_from_file_location("make_fixtures", DATA / "make_fixtures.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def _rig():
    from simulated_device import SimRig, demo_device_path

    return SimRig(demo_device_path(), seed=5, drift=False)


def _mixed_timelines(chip) -> list[Timeline]:
    """Tones of every envelope kind, a timeline with two tones and one with a set readout."""
    a, b = chip.lines[0], chip.lines[1]
    f = chip.qubit(a.qubit).f01_ghz
    q = (chip.qubit_names[0], chip.qubit_names[1])
    return [
        Timeline((Tone(a.name, 0.0, 40.0, f, 0.1, 0.3, Envelope("gaussian", 10.0)),), q),
        Timeline((Tone(a.name, 0.0, 40.0, f, 0.2, -1.0, Envelope("drag", 8.0, 0.5)),
                  Tone(b.name, 5.0, 30.0, f + 0.1, 0.05, 2.0, Envelope("flattop", 0.0, 0.0,
                                                                      5.0))),
                 q, readout_ns=60.0, label="two tones"),
        Timeline((Tone(b.name, 0.0, 20.0, f, 0.0, 0.0, Envelope("square")),), q),
    ]


def test_a_record_opens_with_xarray_alone_and_holds_its_tones(tmp_path: Path) -> None:
    rig = _rig()
    tls = _mixed_timelines(rig.chip)
    counts = BatchRunner(rig, tmp_path).run("mixed", tls, 50)
    seen = open_plainly(tmp_path / "mixed.h5")
    assert seen["attrs"]["format"] == "xtalkcal-batch" and seen["attrs"]["version"] == 2
    assert seen["dims"] == {"timeline": 3, "qubit": 2, "level": counts.counts.shape[2],
                            "tone": 4}
    assert seen["counts"] == counts.counts.tolist() and seen["qubit"] == list(counts.qubits)
    assert seen["units"]["counts"] == "shots" and seen["units"]["freq_ghz"] == "GHz"
    assert seen["units"]["amplitude"] == "fraction of full scale"
    assert seen["units"]["phase_rad"] == "rad"
    assert {"line", "tone_timeline", "label"} <= set(seen["coords"])
    played = [(k, t) for k, tl in enumerate(tls) for t in tl.tones]
    assert seen["tone_timeline"] == [k for k, _ in played]
    for name in ("amplitude", "phase_rad", "freq_ghz", "start_ns", "duration_ns"):
        assert seen["tones"][name] == [getattr(t, name) for _, t in played], name
    for name in ("sigma_ns", "drag_ns", "ramp_ns"):
        assert seen["tones"][name] == [getattr(t.envelope, name) for _, t in played], name
    assert seen["tones"]["line"] == [t.line for _, t in played]
    assert seen["tones"]["envelope"] == [t.envelope.kind for _, t in played]


def test_a_record_of_the_first_format_resumes_and_is_converted(tmp_path: Path) -> None:
    """``tests/data/record_v1`` was written by the version before the tones were kept."""
    rec = tmp_path / "rec"
    shutil.copytree(DATA / "record_v1", rec)
    with h5py.File(rec / "fixed.h5", "r") as f:
        assert f.attrs["schema"] == "xtalkcal-batch/1"
        old = f["counts"][()]
    rig = _rig()
    tls = _fixtures().fixed_timelines(rig.chip)
    runner = BatchRunner(rig, rec)
    counts = runner.run("fixed", tls, 100)
    assert (runner.batches, runner.batches_resumed) == (0, 1)
    np.testing.assert_array_equal(counts.counts, old)
    seen = open_plainly(rec / "fixed.h5")  # converted, the tones now known
    assert seen["attrs"]["version"] == 2 and seen["counts"] == old.tolist()
    assert seen["tones"]["amplitude"] == [t.tones[0].amplitude for t in tls]
    again = BatchRunner(_rig(), rec)
    np.testing.assert_array_equal(again.run("fixed", tls, 100).counts, old)
    assert (again.batches, again.batches_resumed) == (0, 1)


def test_a_read_only_first_format_record_still_resumes(tmp_path: Path,
                                                       monkeypatch: pytest.MonkeyPatch) -> None:
    import xtalkcal.measure.sweep as sweep

    rec = tmp_path / "rec"
    shutil.copytree(DATA / "record_v1", rec)

    def refuse(*_a, **_k):
        raise PermissionError("read-only folder")

    monkeypatch.setattr(sweep, "_write_atomic", refuse)
    rig = _rig()
    runner = BatchRunner(rig, rec)
    runner.run("fixed", _fixtures().fixed_timelines(rig.chip), 100)
    assert runner.batches_resumed == 1
    with h5py.File(rec / "fixed.h5", "r") as f:
        assert f.attrs["schema"] == "xtalkcal-batch/1"


@pytest.mark.parametrize("attrs, words", [
    ({"format": "xtalkcal-batch", "version": 9}, "version 9"),
    ({"format": "other"}, "no format 'xtalkcal-batch'"),
])
def test_a_record_of_an_unknown_format_is_refused_naming_the_file(
        tmp_path: Path, attrs: dict, words: str) -> None:
    rig = _rig()
    tls = _mixed_timelines(rig.chip)
    BatchRunner(rig, tmp_path).run("k", tls, 20)
    with h5py.File(tmp_path / "k.h5", "r+") as f:
        for key, value in attrs.items():
            f.attrs[key] = value
    with pytest.raises(RigError, match="cannot be read") as err:
        BatchRunner(_rig(), tmp_path).run("k", tls, 20)
    assert str(tmp_path / "k.h5") in str(err.value) and words in str(err.value)


def test_a_changed_tone_on_disk_is_caught_by_the_checksum(tmp_path: Path) -> None:
    rig = _rig()
    tls = _mixed_timelines(rig.chip)
    BatchRunner(rig, tmp_path).run("k", tls, 20)
    with h5py.File(tmp_path / "k.h5", "r+") as f:
        f["amplitude"][0] = 0.5
    with pytest.raises(RigError, match="checksum"):
        BatchRunner(_rig(), tmp_path).run("k", tls, 20)


_finite = st.floats(0.0, 1.0, allow_nan=False)


@settings(max_examples=25, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(tones=st.lists(st.tuples(_finite, st.floats(-math.pi, math.pi), st.integers(0, 3)),
                      min_size=0, max_size=4), n_empty=st.integers(0, 2))
def test_the_tone_table_is_exact_through_plain_xarray(tmp_path_factory, tones, n_empty) -> None:
    """Any amplitudes and phases (and timelines without tones) read back bit for bit."""
    import xtalkcal.measure.sweep as sweep
    from xtalkcal.hardware import Counts

    line = "q0-line"
    tls = [Timeline((Tone(line, float(k), 10.0, 5.0, a, p, Envelope("gaussian", 2.0)),)
                    * (reps + 1), ("q0",)) for k, (a, p, reps) in enumerate(tones)]
    tls += [Timeline((), ("q0",))] * n_empty
    if not tls:
        return
    counts = Counts(("q0",), np.full((len(tls), 1, 3), 1, dtype=np.int64), 3, 0.0, 1.0)
    path = tmp_path_factory.mktemp("t") / "b.h5"
    sweep._write_atomic(path, counts, "digest", tls)
    with xr.open_dataset(path, engine="h5netcdf") as ds:
        played = [t for tl in tls for t in tl.tones]
        assert ds.sizes["tone"] == len(played)
        assert ds["amplitude"].values.tolist() == [t.amplitude for t in played]
        assert ds["phase_rad"].values.tolist() == [t.phase_rad for t in played]
    got, digest = sweep._read(path)
    assert digest == "digest"
    np.testing.assert_array_equal(got.counts, counts.counts)


def test_every_record_of_a_small_calibration_opens_with_xarray_alone(tmp_path: Path) -> None:
    from xtalkcal.calibrate import calibrate_chip
    from xtalkcal.measure import protocol_from_dict

    proto = protocol_from_dict({"name": "small", "methods": {"only": ["leakage"]},
                                "survey": {"shots": 200}, "null": {"max_rounds": 1}})
    rig = _rig()
    runner = BatchRunner(rig, tmp_path)
    calibrate_chip(rig, proto, runner=runner, aggressors=[rig.chip.lines[4].name])
    files = sorted(tmp_path.glob("*.h5"))
    assert len(files) == runner.batches > 0
    for path in files:
        seen = open_plainly(path)
        assert seen["dims"]["tone"] > 0 and set(seen["tones"]["line"]) <= set(
            rig.chip.line_names)
