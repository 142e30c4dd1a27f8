"""Tests of the crosstalk ledger: round trips, crash safety, concurrency, schema versions.

This file doubles as the helper program of the crash tests (``python tests/test_ledger.py
--child MODE PATH RUN``, a writer that is killed with SIGKILL) and as the generator of the
version-1 fixture (``python tests/test_ledger.py --write-fixture``).
"""

from __future__ import annotations

import json
import math
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
from collections import defaultdict
from datetime import datetime, timezone
from pathlib import Path

import filelock
import h5py
import numpy as np
import pytest
import xarray as xr
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from xtalkcal.exceptions import LedgerError
from xtalkcal.store import (
    KINDS,
    METHODS,
    SCHEMA_VERSION,
    Ledger,
    LedgerEntry,
    LedgerValidationError,
    utc_timestamp,
)
from xtalkcal.store import schema as schema_mod

REPO = Path(__file__).resolve().parents[1]
FIXTURE_V1 = Path(__file__).resolve().parent / "data" / "ledger_v1"
# Written by the version-1 writer once commit digests existed (``--write-fixture-sealed``,
# while version 1 was current: now it writes the current version, so keep the fixture).
FIXTURE_V1_SEALED = Path(__file__).resolve().parent / "data" / "ledger_v1_sealed"
T0_UTC = datetime(2031, 3, 14, 9, 0, 0, tzinfo=timezone.utc)


# --------------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------------


def make_entry(**overrides: object) -> LedgerEntry:
    """A valid accepted entry; keyword arguments replace fields."""
    fields: dict[str, object] = {
        "aggressor": "L1",
        "victim": "q2",
        "frequency_ghz": 5.12,
        "value": complex(3.1e-3, -1.2e-3),
        "covariance": [[4e-9, 1e-9], [1e-9, 9e-9]],
        "method": "leakage",
        "shots": 4000,
        "amplification": 5,
        "quality": 1.04,
        "verdict": "accepted",
        "reason": "",
        "measured_at_s": 100.0,
        "measured_at_utc": utc_timestamp(T0_UTC),
        "rig": "bench rig",
        "software_version": "0.1.0",
        "kind": "null",
        "tag": "run-a",
        "sweep_id": "",
    }
    fields.update(overrides)
    return LedgerEntry(**fields)  # type: ignore[arg-type]


def _canon_number(x: float) -> object:
    return "nan" if math.isnan(x) else x


def canon(e: LedgerEntry) -> tuple:
    """Entry fields as a tuple where NaN compares equal to NaN."""
    out = []
    for name in LedgerEntry.__dataclass_fields__:
        v = getattr(e, name)
        if isinstance(v, complex):
            v = (_canon_number(v.real), _canon_number(v.imag))
        elif isinstance(v, float):
            v = _canon_number(v)
        elif name == "covariance":
            v = tuple(tuple(_canon_number(c) for c in row) for row in v)
        out.append((name, type(v).__name__, v))
    return tuple(out)


def listing(path: Path) -> dict[str, int]:
    """File names and sizes in a ledger directory (the lock file excluded)."""
    return {p.name: p.stat().st_size for p in path.iterdir() if p.name != "ledger.lock"}


def same_value(a: object, b: object) -> bool:
    if type(a) is not type(b):
        return False
    if isinstance(a, np.ndarray):
        return (
            a.dtype == b.dtype
            and a.shape == b.shape
            and bool(  # type: ignore[union-attr]
                np.array_equal(a, b, equal_nan=a.dtype.kind in "fcmM")
            )
        )
    if isinstance(a, (list, tuple)):
        return len(a) == len(b) and all(same_value(x, y) for x, y in zip(a, b, strict=True))  # type: ignore[arg-type]
    if isinstance(a, (float, complex, np.floating, np.complexfloating)):
        return bool(a == b) or bool(np.isnan(a) and np.isnan(b))
    return bool(a == b)


def assert_same_dataset(got: xr.Dataset, want: xr.Dataset) -> None:
    """Identical in xarray's sense, and also in dtypes and attribute types."""
    xr.testing.assert_identical(got, want)
    assert set(got.variables) == set(want.variables)
    assert set(got.coords) == set(want.coords)
    for name, var in want.variables.items():
        assert got[name].dtype == var.dtype, name
        assert list(got[name].attrs) == list(var.attrs)
        for k, v in var.attrs.items():
            assert same_value(got[name].attrs[k], v), (name, k)
    assert list(got.attrs) == list(want.attrs)
    for k, v in want.attrs.items():
        assert same_value(got.attrs[k], v), k


def small_sweep(seed: int) -> xr.Dataset:
    """An invented null-search sweep: P(2) over a cancellation-tone grid."""
    rng = np.random.default_rng(seed)
    amp = np.linspace(0.0, 0.02, 4)
    phase = np.linspace(-np.pi, np.pi, 5, endpoint=False)
    return xr.Dataset(
        {
            "p2": (("amplitude", "phase"), rng.random((4, 5)), {"units": "1", "long_name": "P(2)"}),
            "counts": (("amplitude", "phase", "level"), rng.integers(0, 200, (4, 5, 3))),
            "iq": ("amplitude", rng.normal(size=4) + 1j * rng.normal(size=4)),
        },
        coords={
            "amplitude": ("amplitude", amp, {"units": "1"}),
            "phase": ("phase", phase, {"units": "rad"}),
            "level": ("level", np.array(["0", "1", "2"])),
            "victim": "q2",
        },
        attrs={"aggressor": "L1", "shots_per_point": 200, "f_ghz": 5.12, "ok": True},
    )


# --------------------------------------------------------------------------------------------
# hypothesis strategies
# --------------------------------------------------------------------------------------------

_CHARS = st.characters(codec="utf-8", exclude_characters="\x00")
_TEXT = st.text(_CHARS, max_size=8)
_NAME = st.text(_CHARS, min_size=1, max_size=8).filter(lambda s: s == s.strip() and bool(s))
_FINITE = st.floats(allow_nan=False, allow_infinity=False)
_SMALL = st.floats(-0.1, 0.1, allow_nan=False)
_UTC = st.datetimes(
    min_value=datetime(2000, 1, 1), max_value=datetime(2200, 1, 1), timezones=st.just(timezone.utc)
)


@st.composite
def entries_st(draw: st.DrawFn) -> LedgerEntry:
    verdict = draw(st.sampled_from(["accepted", "rejected"]))
    rejected = verdict == "rejected"
    value = complex(draw(_FINITE), draw(_FINITE))
    a, b, c = draw(_SMALL), draw(_SMALL), draw(_SMALL)
    # L L^T is symmetric to the last bit and positive semidefinite by construction.
    cov = [[a * a, a * b], [b * a, b * b + c * c]]
    quality = draw(_FINITE)
    if rejected and draw(st.booleans()):
        value, cov, quality = complex(math.nan, math.nan), [[math.nan] * 2] * 2, math.nan
    moment = draw(_UTC)
    utc = utc_timestamp(moment)
    if draw(st.booleans()):
        utc = moment.strftime("%Y-%m-%dT%H:%M:%SZ")
    return LedgerEntry(
        aggressor=draw(st.sampled_from(["L1", "L2"]) | _NAME),
        victim=draw(st.sampled_from(["q1", "q2"]) | _NAME),
        frequency_ghz=draw(st.floats(1e-3, 50.0)),
        value=value,
        covariance=cov,
        method=draw(st.sampled_from(METHODS)),
        shots=draw(st.integers(0, 2**62)),
        amplification=draw(st.integers(1, 1000)),
        quality=quality,
        verdict=verdict,
        reason=draw(_NAME if rejected else _TEXT),
        measured_at_s=draw(st.sampled_from([0.0, 1.0, 2.0]) | _FINITE),
        measured_at_utc=utc,
        rig=draw(_NAME),
        software_version=draw(_NAME),
        kind=draw(st.sampled_from(KINDS)),
        tag=draw(_TEXT),
    )


_ATTR_VALUES = st.one_of(
    _TEXT,
    st.integers(-(2**63), 2**63 - 1),
    st.floats(),
    st.booleans(),
    st.none(),
    st.complex_numbers(allow_nan=False),
    st.lists(st.integers(-1000, 1000), max_size=4),
    st.lists(_TEXT, min_size=1, max_size=3),
    st.tuples(_FINITE, _FINITE),
    hnp.arrays(np.float64, hnp.array_shapes(min_dims=0, max_dims=2, max_side=3)),
    st.floats(width=32).map(np.float32),
    st.integers(0, 255).map(np.uint8),
)
_ATTRS = st.dictionaries(_TEXT, _ATTR_VALUES, max_size=4)
_DTYPES = [
    "float64",
    "float32",
    "float16",
    "int8",
    "int64",
    "uint16",
    "complex128",
    "complex64",
    "bool",
    "<U3",
    "datetime64[ns]",
    "timedelta64[ns]",
]


def _array_st(dtype: str, shape: tuple[int, ...]) -> st.SearchStrategy[np.ndarray]:
    if dtype.startswith("<U"):
        return hnp.arrays(dtype, shape, elements=st.text(_CHARS, max_size=3))
    return hnp.arrays(dtype, shape)


@st.composite
def datasets_st(draw: st.DrawFn) -> xr.Dataset:
    names = draw(st.lists(_TEXT, min_size=7, max_size=7, unique=True))
    n_dims = draw(st.integers(0, 3))
    dims, rest = names[:n_dims], names[n_dims:]
    sizes = {d: draw(st.integers(0, 3)) for d in dims}
    coords: dict[str, xr.Variable] = {}
    data_vars: dict[str, xr.Variable] = {}
    for d in dims:
        if draw(st.booleans()):
            dtype = draw(st.sampled_from(["float64", "int64", "<U3"]))
            coords[d] = xr.Variable((d,), draw(_array_st(dtype, (sizes[d],))), draw(_ATTRS))
    for name in rest[: draw(st.integers(1, len(rest)))]:
        vdims = tuple(draw(st.permutations(dims))[: draw(st.integers(0, n_dims))])
        dtype = draw(st.sampled_from(_DTYPES))
        var = xr.Variable(vdims, draw(_array_st(dtype, tuple(sizes[d] for d in vdims))))
        var.attrs.update(draw(_ATTRS))
        (coords if draw(st.integers(0, 3)) == 0 else data_vars)[name] = var
    return xr.Dataset(data_vars, coords=coords, attrs=draw(_ATTRS))


def _latest_accepted(entries: list[LedgerEntry], t: float) -> dict[tuple[str, str], LedgerEntry]:
    """Independent model of the 'current matrix' rule."""
    best: dict[tuple[str, str], LedgerEntry] = {}
    for e in entries:
        if e.verdict != "accepted" or e.measured_at_s > t:
            continue
        key = (e.aggressor, e.victim)
        old = best.get(key)
        if old is None or (e.measured_at_s, e.seq, e.position) > (
            old.measured_at_s,
            old.seq,
            old.position,
        ):
            best[key] = e
    return best


# --------------------------------------------------------------------------------------------
# round trips
# --------------------------------------------------------------------------------------------


@settings(
    max_examples=60, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow]
)
@given(
    batches=st.lists(st.lists(entries_st(), min_size=1, max_size=5), min_size=1, max_size=4),
    probe_t=_FINITE,
)
def test_entries_round_trip(batches: list[list[LedgerEntry]], probe_t: float) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        led = Ledger.create(Path(tmp) / "l", chip="chip-é")
        receipts = [led.append(batch) for batch in batches]
        assert [r.seq for r in receipts] == list(range(1, len(batches) + 1))
        reread = Ledger(Path(tmp) / "l")
        got = reread.entries()
        want = [e for batch in batches for e in batch]
        assert [canon(e.bare()) for e in got] == [canon(e) for e in want]
        assert [(e.seq, e.position) for e in got] == [
            (s + 1, p) for s, batch in enumerate(batches) for p in range(len(batch))
        ]
        assert [canon(e) for r in receipts for e in r.entries] == [canon(e) for e in got]
        for t in (math.inf, probe_t, 0.0, 1.0, 2.0):
            model = _latest_accepted(list(got), t)
            snap = reread.as_of(t)
            assert {k: canon(v) for k, v in snap.entries.items()} == {
                k: canon(v) for k, v in model.items()
            }
        for pair in reread.pairs():
            hist = reread.history(*pair)
            keys = [(e.measured_at_s, e.seq, e.position) for e in hist]
            assert keys == sorted(keys)
            assert len(hist) == sum((e.aggressor, e.victim) == pair for e in got)


@settings(
    max_examples=60, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow]
)
@given(ds=datasets_st(), sweep_id=_NAME)
def test_sweep_round_trip(ds: xr.Dataset, sweep_id: str) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        led = Ledger.create(Path(tmp) / "l", chip="c")
        led.append(sweeps={sweep_id: ds})
        assert_same_dataset(Ledger(Path(tmp) / "l").sweep(sweep_id), ds)


def special_sweep() -> xr.Dataset:
    """A sweep with the awkward content the codec must keep exactly."""
    return xr.Dataset(
        {
            "a/b.c": (("x",), np.array(["α", "", "long string ✓"], dtype=object)),
            "scalar": ((), np.complex64(1 - 2j), {"units/of": "1", "": "empty key"}),
            "empty": (("x", "none"), np.zeros((3, 0))),
            "when": (("x",), np.array(["2030-01-01", "NaT", "1970-01-01"], dtype="datetime64[ns]")),
            "big_endian": (("x",), np.array([1.5, -2.0, 3.25], dtype=">f8")),
            "raw": (("x",), np.array([b"ab", b"", b"xyz"])),
        },
        coords={"x": [10, 20, 30], "label": ("x", ["p", "q", "r"]), "tz": "UTC"},
        attrs={
            "nested/name": "ok",
            "strs": ["a", "é"],
            "tuple": (1, 2),
            "np_str": np.str_("s"),
            "when": np.datetime64("2031-01-01T00:00:00", "ns"),
            "big": 2**62,
            "arr_str": np.array(["x", "yy"]),
        },
    )


def test_sweep_special_content(tmp_path: Path) -> None:
    ds = special_sweep()
    led = Ledger.create(tmp_path / "l", chip="c")
    led.append(sweeps={"s/1": ds, "s.2": small_sweep(1)})
    reread = Ledger(tmp_path / "l")
    assert reread.sweep_ids() == ("s/1", "s.2")
    assert_same_dataset(reread.sweep("s/1"), ds)
    assert_same_dataset(reread.sweep("s.2"), small_sweep(1))
    with pytest.raises(KeyError):
        reread.sweep("absent")


@pytest.mark.parametrize(
    ("sweep", "field"),
    [
        (xr.Dataset({"o": ("x", np.array([{"a": 1}, 2], dtype=object))}), "data"),
        (xr.Dataset({"s": ("x", np.array(["a\x00b"]))}), "data"),
        (xr.Dataset({"v": ("x", [1.0])}, attrs={"d": {"k": 1}}), "attrs['d']"),
        (xr.Dataset({"v": ("x", [1.0])}, attrs={"n": [[1, 2], [3, 4]]}), "attrs['n']"),
        (xr.Dataset({"v": ("x", [1.0])}, attrs={"m": [1, "a"]}), "attrs['m']"),
        (xr.Dataset({"v": ("x", [1.0])}, attrs={"i": 2**64}), "attrs['i']"),
        (xr.Dataset({"v": ("x", np.zeros(2, dtype=[("re", "f8"), ("im", "f8")]))}), "data"),
        (xr.Dataset({7: ("x", [1.0])}), "variables"),
        (xr.Dataset(coords={"a": [1, 2], "b": ["x", "y"]}).stack(m=("a", "b")), "data"),
        ("not a dataset", "dataset"),
    ],
)
def test_unstorable_sweep_writes_nothing(tmp_path: Path, sweep: object, field: str) -> None:
    led = Ledger.create(tmp_path / "l", chip="c")
    led.append([make_entry()])
    before = listing(led.path)
    with pytest.raises(LedgerValidationError) as err:
        led.append([make_entry(tag="second")], sweeps={"bad": sweep})  # type: ignore[dict-item]
    assert err.value.field == field
    assert listing(led.path) == before
    assert len(Ledger(led.path).entries()) == 1


@pytest.mark.parametrize(
    ("text", "problem"),
    [
        ("a\x00b", "strings must not contain NUL characters"),
        ("a\ud800", "strings must be encodable as UTF-8 (lone surrogates found)"),
    ],
)
@pytest.mark.parametrize("dtype", [str, object])
def test_unstorable_sweep_text_is_refused(
    tmp_path: Path, text: str, problem: str, dtype: type
) -> None:
    led = Ledger.create(tmp_path / "l", chip="c")
    sweep = xr.Dataset({"s": ("x", np.array(["ok", text], dtype=dtype))})
    with pytest.raises(LedgerValidationError) as err:
        led.append(sweeps={"bad": sweep})
    assert (err.value.field, err.value.problem) == ("data", problem)
    assert led.sweep_ids() == ()


@pytest.mark.skipif(np.dtype(np.longdouble).itemsize <= 8, reason="longdouble is float64 here")
def test_extended_precision_refused(tmp_path: Path) -> None:
    led = Ledger.create(tmp_path / "l", chip="c")
    with pytest.raises(LedgerValidationError, match="extended precision"):
        led.append(sweeps={"s": xr.Dataset({"v": ("x", np.zeros(2, dtype=np.longdouble))})})
    assert listing(led.path) == {"xtalkcal-ledger.json": listing(led.path)["xtalkcal-ledger.json"]}


# --------------------------------------------------------------------------------------------
# validation
# --------------------------------------------------------------------------------------------

NAN = math.nan


@pytest.mark.parametrize(
    ("overrides", "field"),
    [
        ({"aggressor": ""}, "aggressor"),
        ({"victim": " q1"}, "victim"),
        ({"victim": "q\x001"}, "victim"),
        ({"aggressor": "L\ud800"}, "aggressor"),
        ({"value": complex(NAN, NAN)}, "value"),
        ({"value": complex(math.inf, 0)}, "value"),
        ({"value": complex(NAN, 0.0), "verdict": "rejected", "reason": "r"}, "value"),
        ({"covariance": [[1e-8, 2e-9], [0.0, 1e-8]]}, "covariance"),
        ({"covariance": [[1e-8, 2e-8], [2e-8, 1e-8]]}, "covariance"),
        ({"covariance": [[NAN, NAN], [NAN, NAN]]}, "covariance"),
        ({"covariance": [[1e-8, math.inf], [math.inf, 1e-8]]}, "covariance"),
        ({"covariance": [[-1e-8, 0.0], [0.0, 1e-8]]}, "covariance"),
        ({"method": "magic"}, "method"),
        ({"kind": "guess"}, "kind"),
        ({"verdict": "maybe"}, "verdict"),
        ({"verdict": "rejected", "reason": "  "}, "reason"),
        ({"shots": -1}, "shots"),
        ({"amplification": 0}, "amplification"),
        ({"frequency_ghz": 0.0}, "frequency_ghz"),
        ({"frequency_ghz": NAN}, "frequency_ghz"),
        ({"measured_at_s": math.inf}, "measured_at_s"),
        ({"measured_at_utc": "yesterday"}, "measured_at_utc"),
        ({"measured_at_utc": "2031-03-14T09:00:00"}, "measured_at_utc"),
        ({"measured_at_utc": "2031-03-14T09:00:00+02:00"}, "measured_at_utc"),
        ({"rig": ""}, "rig"),
        ({"software_version": "   "}, "software_version"),
        ({"quality": NAN}, "quality"),
        ({"quality": math.inf, "verdict": "rejected", "reason": "r"}, "quality"),
        ({"sweep_id": "never-stored"}, "sweep_id"),
        ({"sweep_id": " s1"}, "sweep_id"),
    ],
)
def test_invalid_entry_writes_nothing(tmp_path: Path, overrides: dict, field: str) -> None:
    led = Ledger.create(tmp_path / "l", chip="c")
    led.append([make_entry()])
    before = listing(led.path)
    bad = make_entry(**overrides)
    with pytest.raises(LedgerValidationError) as err:
        led.append([make_entry(victim="q3"), bad])
    assert err.value.field == field
    assert field in str(err.value) and "entry[1]" in str(err.value)
    assert isinstance(err.value, LedgerError) and isinstance(err.value, ValueError)
    assert listing(led.path) == before
    assert [canon(e.bare()) for e in Ledger(led.path).entries()] == [canon(make_entry())]


@pytest.mark.parametrize(
    ("overrides", "field"),
    [
        ({"covariance": np.eye(3)}, "covariance"),
        ({"covariance": [[1, 2j], [2j, 1]]}, "covariance"),
        ({"shots": 3.0}, "shots"),
        ({"amplification": True}, "amplification"),
        ({"value": "0.1"}, "value"),
        ({"frequency_ghz": "5"}, "frequency_ghz"),
        ({"victim": 2}, "victim"),
    ],
)
def test_malformed_entry_refused_at_construction(overrides: dict, field: str) -> None:
    with pytest.raises(LedgerValidationError) as err:
        make_entry(**overrides)
    assert err.value.field == field


def test_rejected_entry_may_hold_nan_and_is_kept(tmp_path: Path) -> None:
    led = Ledger.create(tmp_path / "l", chip="c")
    failed = make_entry(
        value=complex(NAN, NAN),
        covariance=[[NAN, NAN], [NAN, NAN]],
        quality=NAN,
        verdict="rejected",
        reason="fit did not converge",
    )
    led.append([failed])
    assert [canon(e.bare()) for e in led.history("L1", "q2")] == [canon(failed)]
    assert len(led.current()) == 0


def test_empty_commit_and_sweep_references(tmp_path: Path) -> None:
    led = Ledger.create(tmp_path / "l", chip="c")
    with pytest.raises(LedgerValidationError):
        led.append([])
    led.append([make_entry(sweep_id="s1")], sweeps={"s1": small_sweep(0)})
    # An entry may point at a sweep stored by an earlier commit ...
    led.append([make_entry(sweep_id="s1", measured_at_s=200.0)])
    # ... but a sweep id is never reused.
    before = listing(led.path)
    with pytest.raises(LedgerValidationError) as err:
        led.append(sweeps={"s1": small_sweep(1)})
    assert err.value.field == "sweep_id"
    assert listing(led.path) == before
    assert_same_dataset(led.sweep("s1"), small_sweep(0))


def test_validation_error_pickles() -> None:
    import pickle

    err = LedgerValidationError("entry[0]", "shots", "must be >= 0")
    back = pickle.loads(pickle.dumps(err))
    assert (back.where, back.field, back.problem, str(back)) == (
        err.where,
        err.field,
        err.problem,
        str(err),
    )


# --------------------------------------------------------------------------------------------
# queries
# --------------------------------------------------------------------------------------------


def test_as_of_and_rejected_never_current(tmp_path: Path) -> None:
    led = Ledger.create(tmp_path / "l", chip="c")
    x1, x2, x3 = 1e-2 + 0j, 2e-2 + 1e-3j, 9e-1 + 0j
    led.append(
        [make_entry(value=x1, measured_at_s=10.0), make_entry(victim="q3", measured_at_s=25.0)]
    )
    led.append([make_entry(value=x2, measured_at_s=20.0)])
    led.append([make_entry(value=x3, measured_at_s=30.0, verdict="rejected", reason="chi2 high")])
    led.append([make_entry(aggressor="L9", victim="q9", verdict="rejected", reason="no signal")])

    assert len(led.as_of(5.0)) == 0
    assert led.as_of(10.0).value("L1", "q2") == x1
    assert led.as_of(19.999).value("L1", "q2") == x1
    assert led.as_of(20.0).value("L1", "q2") == x2
    assert ("L1", "q3") not in led.as_of(24.0) and ("L1", "q3") in led.as_of(25.0)
    cur = led.current()
    assert cur.value("L1", "q2") == x2  # the later rejected x3 never becomes current
    assert ("L9", "q9") not in cur
    assert {k: canon(v) for k, v in cur.entries.items()} == {
        k: canon(v) for k, v in led.as_of(math.inf).entries.items()
    }
    view = cur.to_dataset(aggressors=["L1", "L9"], victims=["q2", "q3", "q9"])
    assert not view["present"].sel(aggressor="L9", victim="q9")
    assert np.isnan(view["x_real"].sel(aggressor="L9", victim="q9"))
    assert view["x_real"].sel(aggressor="L1", victim="q2") == x2.real
    assert view["entry_id"].sel(aggressor="L1", victim="q2") == "2.0"

    # A measurement committed late but taken earlier does not displace a newer one.
    led.append([make_entry(value=5e-3 + 0j, measured_at_s=15.0)])
    assert led.current().value("L1", "q2") == x2
    assert led.as_of(17.0).value("L1", "q2") == 5e-3
    assert [e.measured_at_s for e in led.history("L1", "q2")] == [10.0, 15.0, 20.0, 30.0]
    hist = led.history_dataset("L1", "q2")
    assert list(hist["verdict"].values) == ["accepted", "accepted", "accepted", "rejected"]
    assert list(hist["measured_at_s"].values) == [10.0, 15.0, 20.0, 30.0]
    assert hist["frequency_ghz"].attrs["units"] == "GHz"

    with pytest.raises(LedgerValidationError):
        led.as_of(math.nan)


def test_ties_resolved_by_commit_order(tmp_path: Path) -> None:
    led = Ledger.create(tmp_path / "l", chip="c")
    led.append([make_entry(value=1e-3 + 0j, measured_at_s=50.0)])
    led.append([make_entry(value=2e-3 + 0j, measured_at_s=50.0)])
    assert led.current().value("L1", "q2") == 2e-3
    led.append(
        [
            make_entry(value=3e-3 + 0j, measured_at_s=60.0),
            make_entry(value=4e-3 + 0j, measured_at_s=60.0),
        ]
    )
    assert led.current().value("L1", "q2") == 4e-3
    assert [e.entry_id for e in led.history("L1", "q2")] == ["1.0", "2.0", "3.0", "3.1"]


def test_matrix_view_units_and_error_propagation(tmp_path: Path) -> None:
    """magnitude_db and phase_rad stderr (first-order propagation) against Monte Carlo."""
    x = 0.01 * np.exp(0.7j)
    cov = np.array([[4e-8, 1e-8], [1e-8, 9e-8]])
    led = Ledger.create(tmp_path / "l", chip="c")
    led.append([make_entry(value=complex(x), covariance=cov)])
    view = led.current().to_dataset()
    cell = view.sel(aggressor="L1", victim="q2")
    assert float(cell["magnitude_db"]) == pytest.approx(20 * np.log10(abs(x)), rel=1e-12)
    assert float(cell["phase_rad"]) == pytest.approx(0.7, rel=1e-12)
    assert float(cell["x_real_stderr"]) == pytest.approx(2e-4)
    assert float(cell["x_imag_stderr"]) == pytest.approx(3e-4)
    rng = np.random.default_rng(11)
    draws = rng.multivariate_normal([x.real, x.imag], cov, size=200_000)
    z = draws[:, 0] + 1j * draws[:, 1]
    assert float(cell["magnitude_db_stderr"]) == pytest.approx(
        np.std(20 * np.log10(np.abs(z))), rel=0.02
    )
    assert float(cell["phase_rad_stderr"]) == pytest.approx(np.std(np.angle(z)), rel=0.02)
    for name, unit in [
        ("magnitude_db", "dB"),
        ("phase_rad", "rad"),
        ("frequency_ghz", "GHz"),
        ("measured_at_s", "s"),
        ("x_real", "1"),
    ]:
        assert view[name].attrs["units"] == unit
    assert view["method"].sel(aggressor="L1", victim="q2") == "leakage"


# --------------------------------------------------------------------------------------------
# directory, lock, temp files, compaction
# --------------------------------------------------------------------------------------------


def test_create_and_open_rules(tmp_path: Path) -> None:
    Ledger.create(tmp_path / "a", chip="c1")
    with pytest.raises(LedgerError, match="already exists"):
        Ledger.create(tmp_path / "a", chip="c1")
    assert Ledger.create(tmp_path / "a", chip="c1", exist_ok=True).chip == "c1"
    with pytest.raises(LedgerError, match="belongs to chip"):
        Ledger.create(tmp_path / "a", chip="c2", exist_ok=True)
    (tmp_path / "b").mkdir()
    (tmp_path / "b" / "notes.txt").write_text("x")
    with pytest.raises(LedgerError, match="not empty"):
        Ledger.create(tmp_path / "b", chip="c1")
    with pytest.raises(LedgerError, match="not a ledger"):
        Ledger(tmp_path / "b")


def test_lock_timeout_and_lock_free_readers(tmp_path: Path) -> None:
    led = Ledger.create(tmp_path / "l", chip="c", lock_timeout_s=0.2)
    led.append([make_entry()])
    before = listing(led.path)
    holder = filelock.FileLock(str(led.path / "ledger.lock"))
    with holder:
        t0 = time.monotonic()
        with pytest.raises(LedgerError, match="lock"):
            led.append([make_entry(victim="q5")])
        assert time.monotonic() - t0 >= 0.2
        assert len(Ledger(led.path).current()) == 1  # readers need no lock
    assert listing(led.path) == before
    led.append([make_entry(victim="q5")])
    assert len(led.current()) == 2


def test_temp_files_ignored_and_cleaned_corrupt_final_refused(tmp_path: Path) -> None:
    led = Ledger.create(tmp_path / "l", chip="c")
    led.append([make_entry()], sweeps={"s": small_sweep(3)})
    commit = next(led.path.glob("0*.h5"))
    data = commit.read_bytes()
    # A writer killed mid-write leaves a truncated temporary file: invisible to readers.
    (led.path / ".tmp-99999-dead.h5").write_bytes(data[: len(data) // 2])
    assert [canon(e.bare()) for e in Ledger(led.path).entries()] == [canon(make_entry())]
    led.append([make_entry(victim="q7")])
    assert not list(led.path.glob(".tmp-*"))
    # A damaged file under a final name is an error, never silently skipped.
    (led.path / "0000000003-0000000003.h5").write_bytes(data[: len(data) // 2])
    with pytest.raises(LedgerError, match="0000000003-0000000003"):
        Ledger(led.path)


def _fill(led: Ledger, n: int, *, start: int = 0) -> None:
    for i in range(start, start + n):
        sweeps = {f"s{i}": small_sweep(i)} if i % 2 == 0 else None
        led.append(
            [
                make_entry(
                    victim=f"q{i % 3}",
                    measured_at_s=float(i),
                    tag=f"i{i}",
                    sweep_id=f"s{i}" if sweeps else "",
                )
            ],
            sweeps=sweeps,
        )


def test_compaction_keeps_history(tmp_path: Path) -> None:
    led = Ledger.create(tmp_path / "l", chip="c")
    _fill(led, 6)
    before = [canon(e) for e in led.entries()]
    assert led.compact() == 6
    assert [p.name for p in led.path.glob("*.h5")] == ["0000000001-0000000006.h5"]
    reread = Ledger(led.path)
    assert [canon(e) for e in reread.entries()] == before
    for i in range(0, 6, 2):
        assert_same_dataset(reread.sweep(f"s{i}"), small_sweep(i))
    _fill(reread, 2, start=6)
    assert reread.last_seq == 8
    assert reread.compact() == 3  # 1-6, 7 and 8
    assert reread.compact() == 0
    assert [p.name for p in led.path.glob("*.h5")] == ["0000000001-0000000008.h5"]
    assert [e.tag for e in Ledger(led.path).entries()] == [f"i{i}" for i in range(8)]


def test_interrupted_compaction_leaves_consistent_ledger(tmp_path: Path) -> None:
    led = Ledger.create(tmp_path / "l", chip="c")
    _fill(led, 4)
    before = [canon(e) for e in led.entries()]
    saved = {p.name: p.read_bytes() for p in led.path.glob("*.h5")}
    led.compact()
    # Crash after the merged file was renamed in but before the old files were deleted:
    for name, data in saved.items():
        (led.path / name).write_bytes(data)
    reread = Ledger(led.path)
    assert [canon(e) for e in reread.entries()] == before
    assert reread.sweep_ids() == ("s0", "s2")
    assert reread.compact() == 0  # nothing to merge, but the leftovers go
    assert [p.name for p in led.path.glob("*.h5")] == ["0000000001-0000000004.h5"]
    # Files whose ranges overlap without nesting cannot come from xtalkcal.
    (led.path / "0000000003-0000000005.h5").write_bytes(saved["0000000003-0000000003.h5"])
    with pytest.raises(LedgerError, match="overlap"):
        Ledger(led.path)


def test_reader_relists_when_files_vanish(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    writer = Ledger.create(tmp_path / "l", chip="c")
    _fill(writer, 2)
    reader = Ledger(writer.path)
    _fill(writer, 1, start=2)
    stale = reader._list_final()  # lists commits 1, 2, 3 as separate files
    writer.compact()  # ... which are now gone, replaced by 1-3
    calls = []
    real = Ledger._list_final

    def listing_once_stale(self: Ledger) -> list:
        calls.append(1)
        return stale if len(calls) == 1 else real(self)

    monkeypatch.setattr(Ledger, "_list_final", listing_once_stale)
    assert [e.tag for e in reader.entries()] == ["i0", "i1", "i2"]
    assert len(calls) >= 2


# --------------------------------------------------------------------------------------------
# schema versions
# --------------------------------------------------------------------------------------------


def _fixture_sweep() -> xr.Dataset:
    """The raw sweep stored in the version-1 fixture (invented demo data)."""
    rng = np.random.default_rng(2031)
    return xr.Dataset(
        {
            "p2": (("amplitude", "phase"), rng.random((3, 4)), {"units": "1", "long_name": "P(2)"}),
            "counts": (("amplitude", "phase", "level"), rng.integers(0, 100, (3, 4, 3))),
            "iq": ("amplitude", rng.normal(size=3) + 1j * rng.normal(size=3), {"units": "V"}),
        },
        coords={
            "amplitude": ("amplitude", np.linspace(0.0, 0.01, 3), {"units": "1"}),
            "phase": ("phase", np.linspace(-np.pi, np.pi, 4, endpoint=False), {"units": "rad"}),
            "level": ("level", np.array(["0", "1", "2"])),
            "victim": "q2",
        },
        attrs={"aggressor": "L1", "shots_per_point": 100, "f_ghz": 5.12, "levels": [0, 1, 2]},
    )


def _fixture_batches() -> list[tuple[list[LedgerEntry], dict[str, xr.Dataset]]]:
    """The content of tests/data/ledger_v1 (invented demo data), every field spelled out.

    Never edit: the fixture is the real output of the version-1 writer for exactly these
    batches (written by ``python tests/test_ledger.py --write-fixture`` while version 1 was
    current; the same command now writes the current version, so the fixture cannot be
    made again: keep it)."""

    def entry(**kw: object) -> LedgerEntry:
        base: dict[str, object] = {
            "frequency_ghz": 5.12,
            "covariance": [[4e-9, 1e-9], [1e-9, 9e-9]],
            "method": "leakage",
            "shots": 4000,
            "amplification": 5,
            "quality": 1.04,
            "verdict": "accepted",
            "reason": "",
            "rig": "simulated 3-qubit chip",
            "software_version": "0.1.0",
            "kind": "null",
            "tag": "fixture",
            "sweep_id": "",
        }
        return LedgerEntry(**{**base, **kw})  # type: ignore[arg-type]

    first = [
        entry(
            aggressor="L1",
            victim="q2",
            value=3.1e-3 - 1.2e-3j,
            measured_at_s=120.0,
            measured_at_utc="2031-03-14T09:00:00.000000+00:00",
            sweep_id="null-L1-q2",
        ),
        entry(
            aggressor="L2",
            victim="q1",
            frequency_ghz=4.87,
            value=-8.0e-4 + 2.5e-3j,
            method="rotation",
            kind="survey",
            measured_at_s=130.5,
            amplification=9,
            measured_at_utc="2031-03-14T09:00:10.000000+00:00",
        ),
        entry(
            aggressor="L3",
            victim="q1",
            value=complex(NAN, NAN),
            covariance=[[NAN, NAN], [NAN, NAN]],
            quality=NAN,
            verdict="rejected",
            reason="null not bracketed by the ring",
            method="stark",
            measured_at_s=140.0,
            measured_at_utc="2031-03-14T09:00:20Z",
        ),
    ]
    second = [
        entry(
            aggressor="L1",
            victim="q2",
            value=3.3e-3 - 1.1e-3j,
            covariance=[[2.5e-9, 0.0], [0.0, 2.5e-9]],
            kind="recheck",
            measured_at_s=3720.0,
            shots=800,
            sweep_id="null-L1-q2",
            measured_at_utc="2031-03-14T10:00:00.000000+00:00",
        ),
    ]
    return [(first, {"null-L1-q2": _fixture_sweep()}), (second, {})]


def write_fixture(path: Path, batches: list | None = None) -> None:
    """Write a fixture ledger of ``batches`` (default `_fixture_batches`) into ``path``."""
    if path.exists():
        raise SystemExit(f"{path} exists; remove it first (only for a deliberate regeneration)")
    led = Ledger.create(path, chip="fixture-chip")
    for entries, sweeps in batches or _fixture_batches():
        led.append(entries, sweeps=sweeps)
    (path / "ledger.lock").unlink(missing_ok=True)


def sealed_fixture_batches() -> list[tuple[list[LedgerEntry], dict[str, xr.Dataset]]]:
    """The content of tests/data/ledger_v1_sealed: the version-1 batches, then one commit
    whose sweep holds the awkward content of `special_sweep` (never edit either)."""
    third = make_entry(victim="q3", measured_at_s=5000.0, tag="sealed", sweep_id="odd/1",
                       measured_at_utc="2031-03-14T11:00:00.000000+00:00")
    return [*_fixture_batches(), ([third], {"odd/1": special_sweep()})]


@pytest.fixture
def fixture_copy(tmp_path: Path) -> Path:
    dest = tmp_path / "v1"
    shutil.copytree(FIXTURE_V1, dest)
    return dest


def test_fixture_v1_still_loads(fixture_copy: Path) -> None:
    for p in fixture_copy.glob("*.h5"):
        with h5py.File(p, "r") as fh:
            assert fh.attrs["schema_version"] == 1
    assert json.loads((fixture_copy / "xtalkcal-ledger.json").read_text())["schema_version"] == 1
    led = Ledger(fixture_copy)
    assert led.chip == "fixture-chip"
    want = [e for entries, _ in _fixture_batches() for e in entries]
    assert [canon(e.bare()) for e in led.entries()] == [canon(e) for e in want]
    assert_same_dataset(led.sweep("null-L1-q2"), _fixture_sweep())
    assert led.current().value("L1", "q2") == 3.3e-3 - 1.1e-3j
    assert ("L3", "q1") not in led.current()
    # The old files are still appendable and compactable.
    led.append([make_entry(victim="q3", measured_at_s=4000.0)])
    assert led.compact() == 3
    assert len(Ledger(fixture_copy).entries()) == 5


def test_newer_schema_refused(fixture_copy: Path) -> None:
    victim_file = sorted(fixture_copy.glob("*.h5"))[-1]
    with h5py.File(victim_file, "r+") as fh:
        fh.attrs["schema_version"] = SCHEMA_VERSION + 1
    with pytest.raises(LedgerError, match=f"schema_version {SCHEMA_VERSION + 1}.*upgrade"):
        Ledger(fixture_copy)


def test_newer_current_files_refused(tmp_path: Path) -> None:
    """Files of the one naming (``version``) are refused as newer as the older ones were."""
    led = Ledger.create(tmp_path / "l", chip="c")
    receipt = led.append([make_entry()])
    with h5py.File(receipt.file, "r+") as fh:
        assert "schema_version" not in fh.attrs
        fh.attrs["version"] = np.int64(SCHEMA_VERSION + 1)
    from test_ledger_integrity import reseal

    reseal(led.path, receipt.seq)
    with pytest.raises(LedgerError, match=f"version {SCHEMA_VERSION + 1}.*upgrade"):
        Ledger(led.path)
    marker = led.path / "xtalkcal-ledger.json"
    info = json.loads(marker.read_text())
    assert info["format"] == "xtalkcal-ledger" and "schema_version" not in info
    info["version"] = SCHEMA_VERSION + 1
    marker.write_text(json.dumps(info))
    with pytest.raises(LedgerError, match="version .*upgrade xtalkcal"):
        Ledger(led.path)


def test_newer_marker_refused(fixture_copy: Path) -> None:
    marker = fixture_copy / "xtalkcal-ledger.json"
    info = json.loads(marker.read_text())
    info["schema_version"] = SCHEMA_VERSION + 1
    marker.write_text(json.dumps(info))
    with pytest.raises(LedgerError, match="upgrade xtalkcal"):
        Ledger(fixture_copy)


def test_migration_hook_runs_on_old_files(
    fixture_copy: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A pretended next version whose only change is an entry-table migration: files of
    versions 1 and 2 are upgraded on reading, and compaction rewrites them in it."""
    led = Ledger(fixture_copy)
    led.append([make_entry(victim="q3", measured_at_s=4000.0, tag="fixture")])
    nxt = SCHEMA_VERSION + 1

    def to_next(cols: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        out = dict(cols)
        out["tag"] = np.array([f"v{nxt}:" + t for t in cols["tag"]], dtype=object)
        return out

    monkeypatch.setattr(schema_mod, "SCHEMA_VERSION", nxt)  # the one place the store reads it
    with pytest.raises(LedgerError, match=f"has no migration to {nxt}"):
        Ledger(fixture_copy)
    migrations = {**schema_mod.MIGRATIONS, SCHEMA_VERSION: to_next}
    monkeypatch.setattr(schema_mod, "MIGRATIONS", migrations)
    led = Ledger(fixture_copy)
    assert {e.tag for e in led.entries()} == {f"v{nxt}:fixture"}
    assert_same_dataset(led.sweep("null-L1-q2"), _fixture_sweep())
    led.compact()  # rewrites everything as the next version
    (merged,) = fixture_copy.glob("*.h5")
    with h5py.File(merged, "r") as fh:
        assert int(np.asarray(fh.attrs["version"]).item()) == nxt
    assert_same_dataset(Ledger(fixture_copy).sweep("null-L1-q2"), _fixture_sweep())


@pytest.fixture
def sealed_copy(tmp_path: Path) -> Path:
    dest = tmp_path / "v1-sealed"
    shutil.copytree(FIXTURE_V1_SEALED, dest)
    return dest


def _file_versions(path: Path) -> dict[str, int]:
    out = {}
    for p in sorted(path.glob("*.h5")):
        with h5py.File(p, "r") as fh:
            key = "version" if "version" in fh.attrs else "schema_version"  # files before
            out[p.name] = int(np.asarray(fh.attrs[key]).item())
    return out


@pytest.mark.parametrize("fixture", ["ledger_v1", "ledger_v1_sealed"])
def test_old_ledgers_are_read_in_place_and_take_new_commits(tmp_path: Path, fixture: str) -> None:
    """Both version-1 fixtures (from before digests and with them) open unchanged; a new
    commit is written as version 2 beside them, the mixed ledger reads whole, and the marker
    then says version 2 (so an older xtalkcal refuses it as newer instead of failing on a
    file); compaction converts everything to version 2 with nothing lost."""
    path = tmp_path / fixture
    shutil.copytree(FIXTURE_V1.parent / fixture, path)
    batches = sealed_fixture_batches() if fixture.endswith("sealed") else _fixture_batches()
    assert set(_file_versions(path).values()) == {1}
    led = Ledger(path)
    want = [e for entries, _ in batches for e in entries]
    assert [canon(e.bare()) for e in led.entries()] == [canon(e) for e in want]
    for _, sweeps in batches:
        for sid, ds in sweeps.items():
            assert_same_dataset(led.sweep(sid), ds)
    new = make_entry(victim="q4", measured_at_s=9000.0, sweep_id="new/1")
    led.append([new], sweeps={"new/1": special_sweep()})
    versions = _file_versions(path)
    assert sorted(versions.values()) == [1] * len(batches) + [2]
    marker = json.loads((path / "xtalkcal-ledger.json").read_text())
    assert marker["version"] == 2 and "schema_version" not in marker
    mixed = Ledger(path)
    assert [canon(e.bare()) for e in mixed.entries()] == [canon(e) for e in [*want, new]]
    assert mixed.sweep_ids() == (*(s for _, sw in batches for s in sw), "new/1")
    assert mixed.compact() == len(batches) + 1
    assert list(_file_versions(path).values()) == [2]
    merged = Ledger(path)
    assert [canon(e.bare()) for e in merged.entries()] == [canon(e) for e in [*want, new]]
    for _, sweeps in [*batches, ([], {"new/1": special_sweep()})]:
        for sid, ds in sweeps.items():
            assert_same_dataset(merged.sweep(sid), ds)


# --------------------------------------------------------------------------------------------
# crash safety: writers killed with SIGKILL
# --------------------------------------------------------------------------------------------

KILL_CHIP = "kill-chip"
KILL_BATCH = 12
BIG_POINTS = 2**19  # 8 MiB of complex128 per sweep


def kill_entry(run: int, i: int, k: int) -> LedgerEntry:
    return make_entry(
        aggressor=f"L{k % 4}",
        victim=f"q{k // 4}",
        value=complex(1e-3 * (i + 1), -1e-4 * (k + 1)),
        measured_at_s=float(1000 * run + i),
        tag=f"r{run}-i{i}",
        shots=1000 + k,
        sweep_id=f"r{run}-i{i}" if (i % 4 == 0 and k == 0) else "",
    )


def big_sweep(run: int, i: int) -> xr.Dataset:
    rng = np.random.default_rng([run, i])
    z = rng.normal(size=BIG_POINTS) + 1j * rng.normal(size=BIG_POINTS)
    return xr.Dataset(
        {"iq": ("shot", z, {"units": "V"})},
        coords={"shot": np.arange(BIG_POINTS)},
        attrs={"run": run, "i": i},
    )


def child_main(mode: str, path: str, run: int, n: int) -> None:
    """The writer that gets killed: appends and reports each commit after append returns."""
    led = Ledger.create(path, chip=KILL_CHIP, exist_ok=True)
    print("ready", flush=True)
    i = 0
    while n < 0 or i < n:
        if mode == "big":
            receipt = led.append(
                [
                    make_entry(
                        tag=f"r{run}-i{i}",
                        sweep_id=f"big-r{run}-i{i}",
                        measured_at_s=float(1000 * run + i),
                    )
                ],
                sweeps={f"big-r{run}-i{i}": big_sweep(run, i)},
            )
        else:
            sweeps = {f"r{run}-i{i}": small_sweep(1000 * run + i)} if i % 4 == 0 else None
            receipt = led.append([kill_entry(run, i, k) for k in range(KILL_BATCH)], sweeps=sweeps)
        print(f"committed {receipt.seq} {run} {i}", flush=True)
        if mode != "big" and i % 9 == 8:
            led.compact()
            print("compacted", flush=True)
        i += 1


class Child:
    """A writer subprocess whose stdout lines are collected by a thread."""

    def __init__(self, mode: str, path: Path, run: int, n: int = -1) -> None:
        env = {
            **os.environ,
            "PYTHONPATH": os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")]),
        }
        self.proc = subprocess.Popen(
            [sys.executable, __file__, "--child", mode, str(path), str(run), str(n)],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
            env=env,
        )
        self.lines: list[str] = []
        self.ready = threading.Event()
        self._thread = threading.Thread(target=self._read, daemon=True)
        self._thread.start()

    def _read(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            self.lines.append(line.strip())
            if line.strip() == "ready":
                self.ready.set()
        self.ready.set()

    def wait_ready(self) -> None:
        assert self.ready.wait(60), "child never became ready"
        if self.proc.poll() is not None and "ready" not in self.lines:
            pytest.fail(f"child died: {self.proc.stderr.read()}")  # type: ignore[union-attr]

    def kill(self) -> None:
        os.kill(self.proc.pid, signal.SIGKILL)
        self.proc.wait(30)
        self._thread.join(30)
        if self.proc.returncode != -signal.SIGKILL:
            pytest.fail(f"child ended by itself: {self.proc.stderr.read()}")  # type: ignore[union-attr]
        self.proc.stderr.close()  # type: ignore[union-attr]

    def finish(self) -> None:
        self.proc.wait(120)
        self._thread.join(30)
        err = self.proc.stderr.read()  # type: ignore[union-attr]
        self.proc.stderr.close()  # type: ignore[union-attr]
        assert self.proc.returncode == 0, err

    def committed(self) -> list[tuple[int, int, int]]:
        return [tuple(map(int, ln.split()[1:])) for ln in self.lines if ln.startswith("committed")]


def check_batches(led: Ledger) -> dict[int, tuple[int, int]]:
    """Every commit holds a whole, correct batch; returns seq -> (run, i)."""
    by_seq: dict[int, list[LedgerEntry]] = defaultdict(list)
    for e in led.entries():
        by_seq[e.seq].append(e)
    assert sorted(by_seq) == list(range(1, max(by_seq, default=0) + 1))  # no gaps
    found = {}
    for seq, batch in by_seq.items():
        run, i = (int(x[1:]) for x in batch[0].tag.split("-"))
        assert [e.position for e in batch] == list(range(KILL_BATCH))
        assert [canon(e.bare()) for e in batch] == [
            canon(kill_entry(run, i, k)) for k in range(KILL_BATCH)
        ]
        found[seq] = (run, i)
    return found


def run_and_kill(
    mode: str, path: Path, run: int, delay: float, *, on_temp: bool, rng: np.random.Generator
) -> tuple[Child, bool]:
    """Start a writer, let it run ``delay`` s, then SIGKILL it.

    With ``on_temp`` the parent waits until the writer has a commit file under construction
    (a new ``.tmp-*`` file), freezes it with SIGSTOP (it holds the lock, mid-write), checks
    that a reader still opens the ledger, then kills it. Returns the child and whether a
    half-written temporary file was left behind.
    """
    temps_before = set(path.glob(".tmp-*"))
    child = Child(mode, path, run)
    child.wait_ready()
    time.sleep(delay)
    if on_temp:
        deadline = time.monotonic() + 5.0
        while not set(path.glob(".tmp-*.h5")) - temps_before and time.monotonic() < deadline:
            time.sleep(1e-4)
        time.sleep(rng.uniform(0.0, 1e-3))
        os.kill(child.proc.pid, signal.SIGSTOP)
        frozen = Ledger(path)  # readers take no lock: a stuck writer cannot block them
        frozen.current()
        frozen.entries()
    child.kill()
    return child, bool(set(path.glob(".tmp-*")) - temps_before)


def commit_seconds(tmp_path: Path, mode: str) -> float:
    """How long one commit of the kill tests' writer takes on this machine, s (the kills
    are timed in these units, so that each lands among a few commits however busy the
    machine is)."""
    led = Ledger.create(tmp_path / f"timing-{mode}", chip=KILL_CHIP)
    t0 = time.perf_counter()
    for i in range(3):
        if mode == "big":
            led.append([make_entry(tag=f"t{i}", sweep_id=f"t{i}")],
                       sweeps={f"t{i}": big_sweep(0, i)})
        else:
            led.append([kill_entry(0, i, k) for k in range(KILL_BATCH)],
                       sweeps={f"r0-i{i}": small_sweep(i)} if i % 4 == 0 else None)
    return (time.perf_counter() - t0) / 3


def test_kill_during_appends_and_compactions(tmp_path: Path) -> None:
    path = tmp_path / "killed"
    rng = np.random.default_rng(20310314)
    delays = rng.uniform(2.0, 24.0, size=8) * commit_seconds(tmp_path, "entries")
    reported_total, interrupted, compactions = 0, 0, 0
    all_reported: list[tuple[int, int, int]] = []
    for run, delay in enumerate(delays):
        child, left_temp = run_and_kill("entries", path, run, delay, on_temp=run % 2 == 1, rng=rng)
        interrupted += left_temp
        reported = child.committed()
        all_reported += reported
        reported_total += len(reported)
        compactions += child.lines.count("compacted")
        led = Ledger(path)
        found = check_batches(led)
        for seq, r, i in all_reported:  # every reported commit survived the kill
            assert found[seq] == (r, i)
        for r, i in found.values():
            if i % 4 == 0:
                assert_same_dataset(led.sweep(f"r{r}-i{i}"), small_sweep(1000 * r + i))
    assert reported_total > 0
    led = Ledger(path)
    led.append([kill_entry(99, 0, k) for k in range(KILL_BATCH)], sweeps={"r99-i0": small_sweep(1)})
    assert not list(path.glob(".tmp-*"))  # the next writer removed what the killed ones left
    print(
        f"\nkill test: {len(delays)} kills, {reported_total} commits reported, "
        f"{led.last_seq - 1} recovered, {interrupted} kills left a half-written temp file, "
        f"{compactions} compactions"
    )


def test_kill_during_large_sweep_writes(tmp_path: Path) -> None:
    path = tmp_path / "big"
    rng = np.random.default_rng(7)
    delays = rng.uniform(1.0, 8.0, size=4) * commit_seconds(tmp_path, "big")
    checked: set[str] = set()
    interrupted = 0
    for run, delay in enumerate(delays):
        child, left_temp = run_and_kill("big", path, run, delay, on_temp=run % 2 == 1, rng=rng)
        interrupted += left_temp
        led = Ledger(path)
        ids = set(led.sweep_ids())
        assert checked <= ids
        for _, r, i in child.committed():
            assert f"big-r{r}-i{i}" in ids
        assert len(led.entries()) == len(ids)
        for e in led.entries():
            assert e.sweep_id in ids
        for sid in sorted(ids - checked):
            r, i = (int(x[1:]) for x in sid.split("-")[1:])
            assert_same_dataset(led.sweep(sid), big_sweep(r, i))
            checked.add(sid)
    print(
        f"\nbig-sweep kill test: {len(delays)} kills, {len(checked)} sweeps intact, "
        f"{interrupted} kills left a half-written temp file"
    )


def test_reader_never_sees_partial_batches(tmp_path: Path) -> None:
    path = tmp_path / "busy"
    Ledger.create(path, chip=KILL_CHIP)
    n_commits = 45
    child = Child("entries", path, 0, n_commits)
    child.wait_ready()
    reader = Ledger(path)
    seen: set[int] = set()
    polls = 0
    while child.proc.poll() is None or polls == 0:
        led = Ledger(path) if polls % 10 == 0 else reader
        snap = led.current()
        assert snap.last_seq >= max(seen, default=0), "the ledger went back in time"
        found = check_batches(led)
        for pair, e in snap.entries.items():
            assert e.seq in found and pair == (e.aggressor, e.victim)
        # Every commit covers the same 12 pairs, each later in rig time than the one before,
        # so a whole-commit state shows exactly the 12 entries of the newest commit.
        assert len(snap) == (KILL_BATCH if snap.last_seq else 0)
        assert {e.seq for e in snap.entries.values()} <= {snap.last_seq}
        seen.add(snap.last_seq)
        polls += 1
    child.finish()
    final = Ledger(path)
    assert final.last_seq == n_commits
    assert len(check_batches(final)) == n_commits
    assert len(seen) >= 3, "reader and writer did not interleave"
    print(f"\nconcurrent test: {polls} polls saw {len(seen)} distinct states")


if __name__ == "__main__":
    if sys.argv[1:2] == ["--child"]:
        child_main(sys.argv[2], sys.argv[3], int(sys.argv[4]), int(sys.argv[5]))
    elif sys.argv[1:2] == ["--write-fixture"]:
        write_fixture(FIXTURE_V1)
    elif sys.argv[1:2] == ["--write-fixture-sealed"]:
        write_fixture(FIXTURE_V1_SEALED, sealed_fixture_batches())
    else:
        raise SystemExit(__doc__)
