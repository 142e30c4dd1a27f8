"""The ledger's commit files as netCDF-4: every group opens with plain xarray (h5netcdf), the
entry table carries units and its values exactly, and the matrix view follows X_ij."""

from __future__ import annotations

import json
import math
import subprocess
import sys
import tempfile
from pathlib import Path
from urllib.parse import quote

import numpy as np
import pytest
import xarray as xr
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_ledger import entries_st, make_entry, small_sweep, special_sweep

from xtalkcal.store import Ledger, ledger_entries, ledger_sweeps

# What a notebook user runs: xarray alone, no xtalkcal import (checked in the child).
_OPEN_ALL = r"""
import json
import xarray as xr
path = sys.argv[1]
tree = xr.open_datatree(path, engine="h5netcdf")
out = {}
for node in tree.subtree:
    if node.path == "/" or node.path == "/sweeps":
        continue
    ds = xr.open_dataset(path, group=node.path, engine="h5netcdf")
    out[node.path] = {"dims": {k: int(v) for k, v in ds.sizes.items()},
                      "coords": sorted(ds.coords), "vars": sorted(ds.data_vars)}
    ds.close()
assert not any(m.split(".")[0] == "xtalkcal" for m in sys.modules), "xtalkcal was imported"
print(json.dumps({"root": dict(tree.attrs) | {"version": int(tree.attrs["version"])},
                  "groups": out}, default=str))
"""


def _group(sweep_id: str) -> str:
    """The documented group of a sweep: its id percent-encoded below /sweeps."""
    return "sweeps/" + quote(sweep_id, safe="-_.~+@:,=()")


def small_calibration_ledger(path: Path, max_rounds: int = 1) -> Path:
    """A ledger at ``path`` holding one small calibration of the bundled demo chip (one
    column, leakage only, ``max_rounds`` search rounds) with its sweeps."""
    from simulated_device import SimRig, demo_device_path
    from xtalkcal.calibrate import calibrate_chip
    from xtalkcal.measure import protocol_from_dict

    proto = protocol_from_dict({"name": "small", "methods": {"only": ["leakage"]},
                                "survey": {"shots": 200}, "null": {"max_rounds": max_rounds}})
    rig = SimRig(demo_device_path(), seed=5, drift=False)
    res = calibrate_chip(rig, proto, aggressors=[rig.chip.lines[4].name])
    led = Ledger.create(path, chip=rig.chip.name)
    led.append(ledger_entries(res, run_tag="cal"), sweeps=ledger_sweeps(res, run_tag="cal"))
    return path


@pytest.fixture(scope="module")
def calibration_ledger(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A ledger holding one small calibration (one search round)."""
    return small_calibration_ledger(tmp_path_factory.mktemp("cal") / "ledger")


def test_every_group_of_a_calibration_ledger_opens_with_plain_xarray(
    calibration_ledger: Path,
) -> None:
    led = Ledger(calibration_ledger)
    (commit,) = calibration_ledger.glob("*.h5")
    from test_record_files import NO_XTALKCAL

    done = subprocess.run([sys.executable, "-I", "-c", NO_XTALKCAL + _OPEN_ALL, str(commit)],
                          capture_output=True, text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stderr
    seen = json.loads(done.stdout)
    assert seen["root"]["format"] == "xtalkcal-ledger"
    assert seen["root"]["version"] == 2 and "schema_version" not in seen["root"]
    assert seen["root"]["chip"] == led.chip
    want = {"/entries", "/matrix"} | {"/" + _group(sid) for sid in led.sweep_ids()}
    assert set(seen["groups"]) == want
    assert seen["groups"]["/entries"]["dims"] == {"entry": len(led.entries())}
    # Each sweep as xarray sees it has the values the ledger gives back.
    for sid in led.sweep_ids():
        stored = led.sweep(sid)
        with xr.open_dataset(commit, group=_group(sid), engine="h5netcdf") as opened:
            assert set(opened.variables) == set(stored.variables)
            assert set(opened.coords) == set(stored.coords)
            for name, var in stored.variables.items():
                assert opened[name].dims == var.dims
                np.testing.assert_array_equal(opened[name].values, var.values)
                assert {k: v for k, v in opened[name].attrs.items() if k != "dtype"} == var.attrs


def test_entry_table_has_units_and_the_ledgers_values(calibration_ledger: Path) -> None:
    led = Ledger(calibration_ledger)
    (commit,) = calibration_ledger.glob("*.h5")
    with xr.open_dataset(commit, group="entries", engine="h5netcdf") as ds:
        for name, var in ds.variables.items():
            assert var.attrs.get("long_name"), name
            if var.dtype.kind in "fi":
                assert var.attrs.get("units"), name
        assert ds["frequency_ghz"].attrs["units"] == "GHz"
        assert ds["measured_at_s"].attrs["units"] == "s"
        assert ds["shots"].attrs["units"] == "shots"
        assert ds["value_re"].attrs["units"] == "1"
        assert "value_re + 1j*value_im" in ds["value_re"].attrs["long_name"]
        # The pulse repetitions K, the pair and the entry id are coordinates.
        assert {"amplification", "aggressor", "victim", "entry"} <= set(ds.coords)
        for e in led.entries():
            row = ds.sel(entry=e.entry_id)
            assert complex(float(row.value_re), float(row.value_im)) == pytest.approx(
                e.value, nan_ok=True)
            assert (str(row.aggressor.item()), str(row.victim.item())) == (e.aggressor, e.victim)
            assert int(row.amplification) == e.amplification and int(row.shots) == e.shots


@settings(max_examples=30, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(batch=st.lists(entries_st(), min_size=1, max_size=6))
def test_entry_table_read_by_xarray_is_exact(batch: list) -> None:
    """Every field of random entries (text, NaN, extreme numbers) as plain xarray reads it."""
    with tempfile.TemporaryDirectory() as tmp:
        led = Ledger.create(Path(tmp) / "l", chip="c")
        receipt = led.append(batch)
        with xr.open_dataset(receipt.file, group="entries", engine="h5netcdf") as ds:
            assert list(ds["entry"].values) == [e.entry_id for e in receipt.entries]
            for k, e in enumerate(receipt.entries):
                for name in ("aggressor", "victim", "method", "verdict", "reason", "rig",
                             "software_version", "kind", "tag", "sweep_id", "measured_at_utc"):
                    assert str(ds[name].values[k]) == getattr(e, name), name
                for name in ("seq", "position", "shots", "amplification"):
                    assert int(ds[name].values[k]) == getattr(e, name), name
                got = {
                    "value": (ds["value_re"].values[k], ds["value_im"].values[k]),
                    "cov": tuple(ds[f"cov_{a}_{b}"].values[k]
                                 for a in ("re", "im") for b in ("re", "im")),
                    "rest": tuple(ds[n].values[k] for n in
                                  ("frequency_ghz", "quality", "measured_at_s")),
                }
                want = {
                    "value": (e.value.real, e.value.imag),
                    "cov": tuple(c for row in e.covariance for c in row),
                    "rest": (e.frequency_ghz, e.quality, e.measured_at_s),
                }
                for key, values in want.items():
                    for g, w in zip(got[key], values, strict=True):
                        assert (math.isnan(g) and math.isnan(w)) or float(g) == w, key


def test_sweeps_as_xarray_decodes_them(tmp_path: Path) -> None:
    """What netCDF lacks comes back through xarray's own conventions: datetimes with NaT,
    booleans, complex numbers, text, and non-index coordinates as coordinates."""
    odd = special_sweep().assign(flag=("x", np.array([True, False, True])))
    led = Ledger.create(tmp_path / "l", chip="c")
    receipt = led.append(sweeps={"run/odd": odd, "s.2": small_sweep(1)})
    with xr.open_dataset(receipt.file, group=_group("run/odd"), engine="h5netcdf") as ds:
        assert ds["when"].dtype == np.dtype("datetime64[ns]")
        np.testing.assert_array_equal(ds["when"].values, odd["when"].values)
        assert ds["flag"].dtype == bool
        np.testing.assert_array_equal(ds["flag"].values, odd["flag"].values)
        assert complex(ds["scalar"].values) == complex(odd["scalar"].values)
        assert list(ds["raw"].values) == list(odd["raw"].values)
        assert {"x", "label", "tz"} <= set(ds.coords)
        assert list(ds["label"].values) == ["p", "q", "r"]
        assert ds.attrs["strs"] == ["a", "é"]
        # A name netCDF cannot hold stands under another, its real name in the layout.
        layout = json.loads(ds.attrs["xtalkcal_layout"])
        (odd_var,) = [v for v in layout["variables"] if v["name"] == "a/b.c"]
        assert list(ds[odd_var["key"]].values) == ["α", "", "long string ✓"]
    with xr.open_dataset(receipt.file, group=_group("s.2"), engine="h5netcdf") as ds:
        want = small_sweep(1)
        xr.testing.assert_identical(
            ds.drop_attrs(deep=False), want.drop_attrs(deep=False))
        assert ds.attrs["aggressor"] == "L1" and ds.attrs["shots_per_point"] == 200


def test_matrix_view_follows_x_ij_victim_first(tmp_path: Path) -> None:
    led = Ledger.create(tmp_path / "l", chip="c")
    led.append([make_entry(aggressor="L1", victim="q2", value=1e-3 + 0j),
                make_entry(aggressor="L3", victim="q2", value=2e-3 + 0j),
                make_entry(aggressor="L1", victim="q4", value=3e-3 + 0j)])
    view = led.current().to_dataset()
    assert view["x_real"].dims == ("victim", "aggressor")
    assert list(view["victim"].values) == ["q2", "q4"]
    assert list(view["aggressor"].values) == ["L1", "L3"]
    np.testing.assert_array_equal(view["x_real"].values, [[1e-3, 2e-3], [3e-3, np.nan]])
    assert view["shots"].attrs["units"] == "shots"
    assert "victim i first" in view.attrs["axes"]


def test_readme_example_runs_on_a_ledger(calibration_ledger: Path) -> None:
    """The notebook example of the README's "Reading the data", run as written (with the
    demo's folder replaced by this ledger's) in `python -I`, every xtalkcal import refused."""
    from test_record_files import NO_XTALKCAL

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    section = readme.split("## Reading the data", 1)[1]
    code = section.split("```python\n", 1)[1].split("```", 1)[0]
    assert len(code.strip().splitlines()) <= 8
    code = code.replace("DIR/ledger", str(calibration_ledger))
    check = ("\nassert not any(m.split('.')[0] == 'xtalkcal' for m in sys.modules)"
             "\nprint(sweep.sizes['point'], at_k.sizes['point'], int(x.notnull().sum()),"
             " matrix.x_real.dims, sweep.signal.dims, sep='|')\n")
    done = subprocess.run([sys.executable, "-I", "-c", NO_XTALKCAL + code + check],
                          capture_output=True, text=True, timeout=300, check=False)
    assert done.returncode == 0, done.stderr
    points, at_k, n, mdims, sdims = done.stdout.strip().split("|")
    led = Ledger(calibration_ledger)
    assert 0 < int(at_k) <= int(points)
    assert int(n) == len(led.current())
    assert "('victim', 'aggressor')" in mdims and "('victim', 'point')" in sdims


def test_the_matrix_group_is_the_ledgers_matrix(calibration_ledger: Path,
                                                tmp_path: Path) -> None:
    """``/matrix`` of each commit is `Ledger.current()` as it stood after that commit, and
    of a compacted file the whole ledger's."""
    import shutil

    from test_ledger import make_entry

    path = tmp_path / "l"
    shutil.copytree(calibration_ledger, path)
    led = Ledger(path)
    (e0,) = [e for e in led.entries() if e.accepted][:1]
    newer = make_entry(aggressor=e0.aggressor, victim=e0.victim, value=5e-3 + 1e-3j,
                       measured_at_s=e0.measured_at_s + 10.0)
    receipt = led.append([newer, make_entry(aggressor="other", victim="q0", value=1e-4 + 0j,
                                            verdict="rejected", reason="test")])
    for file in (receipt.file, None):
        if file is None:
            led.compact()
            (file,) = path.glob("*.h5")
        want = Ledger(path).current().to_dataset()
        with xr.open_dataset(file, group="matrix", engine="h5netcdf") as got:
            assert got["x_real"].dims == ("victim", "aggressor")
            for name in ("x_real", "x_imag", "magnitude_db", "present"):
                np.testing.assert_array_equal(got[name].values, want[name].values)
            assert list(got["aggressor"].values) == list(want["aggressor"].values)
            assert got["x_real"].attrs["units"] == "1"
        assert complex(float(got.x_real.sel(victim=e0.victim, aggressor=e0.aggressor)),
                       float(got.x_imag.sel(victim=e0.victim, aggressor=e0.aggressor))) \
            == 5e-3 + 1e-3j


@pytest.mark.parametrize("ds", [
    xr.Dataset({"x": ("y", [1, 2]), "v": ("x", [1.0, 2.0, 3.0])}),
    xr.Dataset(coords={"x": ("y", [1, 2]), "z": ("x", [1.0, 2.0, 3.0])}),
    xr.Dataset({"x": (("y", "w"), np.zeros((2, 1))), "v": ("x", [1.0, 2.0])}),
])
def test_a_variable_named_like_a_dimension_it_does_not_index(tmp_path: Path,
                                                             ds: xr.Dataset) -> None:
    """netCDF takes a variable named like a dimension for its coordinate; such a variable is
    stored under another name and comes back exactly."""
    from test_ledger import assert_same_dataset

    led = Ledger.create(tmp_path / "l", chip="c")
    receipt = led.append(sweeps={"a": ds})
    assert_same_dataset(Ledger(led.path).sweep("a"), ds)
    with xr.open_dataset(receipt.file, group="sweeps/a", engine="h5netcdf") as opened:
        assert opened.sizes == ds.sizes
