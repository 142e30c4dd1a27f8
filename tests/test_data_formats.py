"""One naming of every file kind (``format`` + ``version``), the older names still read; the
sweep datasets' axes, units and K coordinate; the ledgers of earlier versions still open."""

from __future__ import annotations

import json
import math
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from test_record_files import NO_XTALKCAL

from xtalkcal.cli import main
from xtalkcal.cli.files import file_kind
from xtalkcal.compensation import SETTINGS_FORMAT, CompensationSettings
from xtalkcal.drift import SCHEDULE_FORMAT, Schedule
from xtalkcal.measure import RecheckSettings, default_protocol
from xtalkcal.outputs.export import MATRIX_FORMAT, matrix_format
from xtalkcal.store import Ledger

DATA = Path(__file__).resolve().parent / "data"


# ------------------------------------------------------------------ the one naming
@pytest.mark.parametrize("doc, kind", [
    ({"format": "xtalkcal-settings", "version": 1}, ("xtalkcal-settings", 1)),
    ({"schema": "xtalkcal-settings/1"}, ("xtalkcal-settings", 1)),
    ({"schema": "xtalkcal-matrix/1"}, ("xtalkcal-matrix", 1)),
    ({"format": "xtalkcal-schedule", "schema_version": 2}, ("xtalkcal-schedule", 2)),
    ({"schema": "xtalkcal.recheck_outcome", "schema_version": 1},
     ("xtalkcal-recheck-outcome", 1)),
    ({"schema": "xtalkcal.pair_trend", "schema_version": 1}, ("xtalkcal-pair-trend", 1)),
    ({"schema": "xtalkcal.ring_estimate", "schema_version": 1}, ("xtalkcal-ring-estimate", 1)),
    ({"format": "xtalkcal-chip", "version": True}, ("xtalkcal-chip", None)),
    ({"pairs": []}, (None, None)),
    ([1, 2], (None, None)),
])
def test_file_kind_reads_every_naming(doc, kind) -> None:
    assert file_kind(doc) == kind


def _settings() -> CompensationSettings:
    doc = {"format": "xtalkcal-settings", "version": 1, "chip": "c",
           "created_utc": "2026-12-01T00:00:00+00:00", "software": "x", "pairs": []}
    return CompensationSettings.from_dict(doc)


def test_settings_write_the_one_naming_and_read_the_first() -> None:
    doc = json.loads(_settings().to_json())
    assert (doc["format"], doc["version"]) == (SETTINGS_FORMAT, 1) and "schema" not in doc
    old = {k: v for k, v in doc.items() if k not in ("format", "version")}
    old["schema"] = "xtalkcal-settings/1"
    assert CompensationSettings.from_dict(old) == CompensationSettings.from_dict(doc)


@pytest.mark.parametrize("change, field", [
    ({"version": 2}, "version"), ({"version": True}, "version"),
    ({"format": "xtalkcal-matrix"}, "format"), ({"schema": "xtalkcal-settings/1"}, "schema"),
])
def test_settings_of_another_kind_or_version_name_the_field(change, field) -> None:
    from xtalkcal.exceptions import ConfigError

    doc = json.loads(_settings().to_json()) | change
    with pytest.raises(ConfigError, match=field):
        CompensationSettings.from_dict(doc, source="s.json")


def test_schedule_writes_version_and_reads_schema_version() -> None:
    rules = RecheckSettings()
    sch = Schedule(rules)
    sch.calibrated(("q1-line", "q2"), 0.0)
    doc = sch.to_dict()
    assert (doc["format"], doc["version"]) == (SCHEDULE_FORMAT, 2)
    assert "schema_version" not in doc
    old = {k: v for k, v in doc.items() if k != "version"} | {"schema_version": 2}
    assert Schedule.from_dict(old, rules) == sch


def test_matrix_format_reads_both_namings() -> None:
    assert matrix_format({"format": MATRIX_FORMAT, "version": 1}) == ("xtalkcal-matrix", 1)
    assert matrix_format({"schema": "xtalkcal-matrix/1"}) == ("xtalkcal-matrix", 1)
    assert matrix_format({"schema": "xtalkcal-matrix"}) is None
    assert matrix_format({"format": MATRIX_FORMAT, "version": "1"}) is None
    assert matrix_format([]) is None


@pytest.mark.parametrize("first_naming", [False, True])
def test_check_knows_settings_and_schedules_of_either_naming(tmp_path, capsys,
                                                           first_naming) -> None:
    doc = json.loads(_settings().to_json())
    sch = Schedule(default_protocol().recheck)
    sch.calibrated(("q1-line", "q2"), 0.0)
    sdoc = sch.to_dict()
    if first_naming:
        doc = {k: v for k, v in doc.items() if k not in ("format", "version")}
        doc["schema"] = "xtalkcal-settings/1"
        sdoc = {k: v for k, v in sdoc.items() if k != "version"} | {"schema_version": 2}
    (tmp_path / "s.json").write_text(json.dumps(doc))
    (tmp_path / "sch.json").write_text(json.dumps(sdoc))
    assert main(["check", str(tmp_path / "s.json"), str(tmp_path / "sch.json")]) == 0
    out = capsys.readouterr().out
    assert "settings for chip 'c'" in out and "schedule: 1 pairs" in out


def test_check_names_the_accepted_kinds(tmp_path, capsys) -> None:
    (tmp_path / "x.json").write_text(json.dumps({"format": "xtalkcal-nothing", "version": 1}))
    assert main(["check", str(tmp_path / "x.json")]) == 2
    err = capsys.readouterr().err
    assert "x.json" in err and "'xtalkcal-schedule'" in err and "'xtalkcal-settings'" in err
    assert "Traceback" not in err


# ------------------------------------------------------------------ ledgers of before
def test_a_ledger_of_the_previous_format_still_opens(tmp_path: Path) -> None:
    """``tests/data/ledger_v2``: written (schema_version 2, sweeps point × victim) before the
    one naming and the victim-first sweeps."""
    path = tmp_path / "l"
    shutil.copytree(DATA / "ledger_v2", path)
    led = Ledger(path)
    (e,) = led.entries()
    assert (e.aggressor, e.victim, e.shots) == ("q4-line", "q5", 20184)
    assert e.value == -0.05965644133623289 - 2.9594134614362304e-06j
    (sid,) = led.sweep_ids()
    ds = led.sweep(sid)
    assert ds["signal"].dims == ("point", "victim")
    # The readers of sweeps take either axis order.
    from xtalkcal.drift.stored_sweep import _pass_couplings, _sweep_curvature

    kappa, err = _sweep_curvature(led, e)
    assert kappa > 0 and err > 0
    assert _pass_couplings(led, e)[0] == ("q5",)
    # A new commit beside it, then the whole ledger rewritten in the current naming.
    led.append([dataclass_copy(e, measured_at_s=e.measured_at_s + 1.0)])
    assert led.compact() == 2
    (merged,) = path.glob("*.h5")
    with xr.open_dataset(merged, engine="h5netcdf") as root:
        assert int(root.attrs["version"]) == 2 and "schema_version" not in root.attrs
    assert len(Ledger(path).entries()) == 2


def dataclass_copy(entry, **change):
    import dataclasses

    return dataclasses.replace(entry.bare(), **change)


def test_the_first_ledger_format_still_opens() -> None:
    led = Ledger(DATA / "ledger_v1")
    assert led.current().value("L1", "q2") == 3.3e-3 - 1.1e-3j


# ------------------------------------------------------------------ sweeps
@pytest.fixture(scope="module")
def raised_k_ledger(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small calibration whose null search raises K (points at two K in one sweep)."""
    from test_ledger_netcdf import small_calibration_ledger

    return small_calibration_ledger(tmp_path_factory.mktemp("cal") / "ledger", max_rounds=3)


_OPEN_SWEEPS = NO_XTALKCAL + r"""
import json
import xarray as xr
tree = xr.open_datatree(sys.argv[1], engine="h5netcdf")
out = {}
for name in tree["sweeps"].children:
    with xr.open_dataset(sys.argv[1], group=f"sweeps/{name}", engine="h5netcdf") as ds:
        ks = sorted({int(k) for k in ds["repeats"].values})
        out[name] = {
            "dims": {k: list(v.dims) for k, v in ds.data_vars.items()},
            "coords": sorted(ds.coords),
            "attrs": {k: dict(v.attrs) for k, v in ds.variables.items()},
            "per_k": {k: int(ds.where(ds.repeats == k, drop=True).sizes["point"]) for k in ks},
            "points": int(ds.sizes["point"]), "axes": ds.attrs.get("axes", "")}
assert not any(m.split(".")[0] == "xtalkcal" for m in sys.modules)
print(json.dumps(out, default=str))
"""


def test_sweeps_are_victim_first_with_units_and_k_as_a_coordinate(
        raised_k_ledger: Path) -> None:
    (commit,) = raised_k_ledger.glob("*.h5")
    done = subprocess.run([sys.executable, "-I", "-c", _OPEN_SWEEPS, str(commit)],
                          capture_output=True, text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stderr
    seen = json.loads(done.stdout)
    assert seen
    for sweep in seen.values():
        for name in ("signal", "stderr", "z_re", "z_im", "shots"):
            assert sweep["dims"][name] == ["victim", "point"], name
        for name in ("signal", "stderr", "curvature", "curvature_stderr", "shots", "z_re"):
            attrs = sweep["attrs"][name]
            assert attrs.get("units") and attrs.get("long_name"), name
        assert sweep["attrs"]["signal"]["units"] == "1"  # leakage: a probability
        assert sweep["attrs"]["shots"]["units"] == "shots"
        assert sweep["attrs"]["curvature_stderr"]["units"] == sweep["attrs"]["curvature"][
            "units"]
        assert {"repeats", "round", "victim", "signal_units"} <= set(sweep["coords"])
        assert sum(sweep["per_k"].values()) == sweep["points"]
        assert "victim first" in sweep["axes"]
    # The K raised in the null search: its points told apart by the coordinate alone.
    assert any(len(s["per_k"]) > 1 for s in seen.values()), seen


def test_the_shots_unit_is_one_name_everywhere(raised_k_ledger: Path) -> None:
    (commit,) = raised_k_ledger.glob("*.h5")
    units = set()
    led = Ledger(raised_k_ledger)
    for sid in led.sweep_ids():
        units.add(led.sweep(sid)["shots"].attrs["units"])
    with xr.open_dataset(commit, group="entries", engine="h5netcdf") as ds:
        units.add(ds["shots"].attrs["units"])
    units.add(led.current().to_dataset()["shots"].attrs["units"])
    assert units == {"shots"}


def test_stored_sweep_readers_work_on_new_sweeps(raised_k_ledger: Path) -> None:
    from xtalkcal.drift.stored_sweep import _sweep_curvature

    led = Ledger(raised_k_ledger)
    done = [_sweep_curvature(led, e) for e in led.entries() if e.sweep_id]
    assert done and all(k is not None and math.isfinite(k[0]) and k[0] > 0 for k in done)


def test_signal_units_per_method() -> None:
    from xtalkcal.calibrate.pass_data import _signal_units

    assert _signal_units("leakage,stark,rotation", 3) == ["1", "rad", "1"]
    assert _signal_units("", 2) == ["1", "1"]
    assert np.array_equal(_signal_units("stark", 1), ["rad"])


@pytest.mark.parametrize("version, ok", [(1, True), (2, False), (None, False), (True, False)])
def test_verification_files_carry_format_and_version(tmp_path: Path, version, ok) -> None:
    from xtalkcal.exceptions import ConfigError
    from xtalkcal.outputs.played import played_to_dict, read_played

    doc = played_to_dict([], chip="c", settings="s.json", rig="r")
    assert (doc["format"], doc["version"]) == ("xtalkcal-verification", 1)
    doc = {**doc, "tolerance_db": -40.0, "version": version}
    path = tmp_path / "v.json"
    path.write_text(json.dumps(doc))
    if ok:
        assert read_played(path, "c") == []
    else:
        with pytest.raises(ConfigError, match="version"):
            read_played(path, "c")
