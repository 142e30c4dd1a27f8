"""The netCDF-4 layout of a commit (schema version 2): files that xarray opens as they are.

A commit file is a netCDF-4 file written with h5netcdf, readable with
``xarray.open_dataset(path, group=..., engine="h5netcdf")`` or ``xarray.open_datatree(path,
engine="h5netcdf")`` and no xtalkcal import:

- ``/`` (no variables): attributes ``format`` (``"xtalkcal-ledger"``), ``version`` (the
  schema version; ``schema_version`` in files written before), ``chip``, ``seq_first``,
  ``seq_last``, ``written_utc`` (ISO-8601, UTC).
- ``/entries``: the entry table along dimension ``entry`` (one ledger entry per element,
  coordinate ``entry`` = ``"seq.position"``). The crosstalk element
  ``X = C_victim,aggressor / C_victim,victim`` is stored as ``value_re`` + 1j ``value_im``
  (netCDF has no complex type for a table a spreadsheet user might read), its covariance as
  ``cov_re_re``, ``cov_re_im``, ``cov_im_re``, ``cov_im_im``. Every variable has ``units``
  (UDUNITS spelling: ``"1"`` for dimensionless, ``"GHz"``, ``"s"``, ``"shots"``) and
  ``long_name``. ``measured_at_s`` is the rig clock in s (monotonic over the chip's life,
  not a wall clock); ``measured_at_utc`` is the wall clock as ISO-8601 UTC text.
  ``aggressor``, ``victim`` and ``amplification`` (the pulse repetitions K) are coordinates,
  so points taken at different K are told apart by ``.sel``/``.where`` on a coordinate.
- ``/matrix``: the crosstalk matrix as it stood after the commit (the latest accepted entry
  of each pair over the whole ledger, `MatrixSnapshot.to_dataset`): dimensions
  ``victim`` x ``aggressor`` (X_ij: victim i first), ``x_real``, ``x_imag``, their
  standard errors, ``magnitude_db`` and the rest with ``units`` and ``long_name``; NaN
  (or ``""``) where a pair has no accepted entry, ``present`` saying which have one. It is
  a convenience copy for readers without xtalkcal: `Ledger` recomputes the matrix from
  the entries and never reads it. Files written before it was added have none.
- ``/sweeps/<name>``: one group per stored sweep, ``<name>`` being the sweep id
  percent-encoded (``urllib.parse.quote``: ``"run/null-L1-q2"`` is
  ``"run%2Fnull-L1-q2"``). Variables, dimensions and attributes are the sweep's own, with
  xarray's conventions for what netCDF lacks: booleans as int8 with ``dtype = "bool"``,
  datetimes as int64 with CF ``units = "<unit> since 1970-01-01T00:00:00"`` and NaT as
  ``_FillValue``, timedeltas as int64 with ``units`` and ``dtype = "timedelta64[<unit>]"``,
  complex arrays as h5netcdf's complex type. Non-index coordinates are listed in the group's
  ``coordinates`` attribute.

Exact round trip. netCDF cannot tell a tuple from a list, ``None`` from absence, a Python
``int`` from ``numpy.int64`` or hold a name with ``/``. Each sweep group therefore carries
one JSON-string attribute, ``xtalkcal_layout``, that `read_sweep` uses to give back the very
Dataset that was stored (dtypes, attribute types and order, coordinates):

``{"variables": [{"name", "key", "role", "dims", "codec", "dtype", "attrs"}], "attrs": [...]}``

where ``key`` is the variable's name in the file and every attribute is
``[name, pytype, codec, dtype, shape, key]``: ``key`` is the attribute's name in the file
(``null`` for ``None``, which has no netCDF value). Names that netCDF or the conventions above
would misread (empty, containing ``/`` or white space, starting with ``_`` or ``xtalkcal_``,
or taken by an encoding attribute) are stored under ``xtalkcal_n<k>`` (variables and
dimensions) or ``xtalkcal_a<k>`` (attributes), their real names kept in the layout; so is a
variable named like a dimension it does not index (``xtalkcal_v<k>``), which netCDF would
take for that dimension's coordinate. The
ledger's own marks are ``xtalkcal_sweep_id`` and ``xtalkcal_seq`` on each sweep group and
``xtalkcal_order`` (JSON list of the group names in commit order) on ``/sweeps``.
"""

from __future__ import annotations

import json
import re
import unicodedata
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any
from urllib.parse import quote

import h5netcdf
import h5py
import numpy as np
import xarray as xr

from xtalkcal.store.codec import (
    _FLOAT_COLUMNS,
    _INT_COLUMNS,
    Columns,
    _Blob,
    _decode_raw,
    _encode_sweep,
    _member,
    _restore_attr,
)
from xtalkcal.store.entries import _TEXT_FIELDS, _attr, _Malformed
from xtalkcal.store.snapshots import _VIEW_ATTRS

_LAYOUT = "xtalkcal_layout"
_SWEEP_ID = "xtalkcal_sweep_id"
_SEQ = "xtalkcal_seq"
_ORDER = "xtalkcal_order"  # on /sweeps: JSON list of its groups in commit order
_PREFIX = "xtalkcal_"
# Names HDF5's dimension scales and netCDF-4 give a meaning of their own.
_RESERVED = frozenset({"CLASS", "NAME", "DIMENSION_LIST", "REFERENCE_LIST", "coordinates"})
_SAFE_NAME = re.compile(r"[^\W_][\w.+\-@:]*")
_INT64_MIN = np.iinfo(np.int64).min
_CF_TIME_UNITS = {
    "D": "days", "h": "hours", "m": "minutes", "s": "seconds",
    "ms": "milliseconds", "us": "microseconds", "ns": "nanoseconds",
}


def group_name(sweep_id: str) -> str:
    """The group of ``sweep_id`` below ``/sweeps`` (percent-encoded, never ``.``/``..``).

    Parameters
    ----------
    sweep_id : str
        A stored sweep's id.

    Returns
    -------
    str
        E.g. ``"run%2Fnull-L1-q2"`` for ``"run/null-L1-q2"``.
    """
    name = quote(sweep_id, safe="-_.~+@:,=()")
    return name.replace(".", "%2E") if set(name) == {"."} else name


def _plain_name(name: str) -> bool:
    """True if ``name`` can stand in a netCDF file as it is."""
    return (
        _SAFE_NAME.fullmatch(name) is not None
        and unicodedata.normalize("NFC", name) == name
        and not name.startswith(_PREFIX)
        and name not in _RESERVED
    )


# --------------------------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _NcVariable:
    key: str
    dims: tuple[str, ...]
    data: np.ndarray
    h5dtype: Any
    fillvalue: Any
    attrs: Mapping[str, Any]


@dataclass(frozen=True)
class SweepPlanV2:
    """A sweep encoded for the netCDF layout in memory (every error raised before writing)."""

    sweep_id: str
    dims: Mapping[str, int]
    variables: tuple[_NcVariable, ...]
    attrs: Mapping[str, Any]


def _native_attr(blob: _Blob) -> Any:
    """The netCDF attribute value of an encoded attribute (None: no value to write)."""
    pytype = blob.meta["pytype"]
    if pytype == "none":
        return None
    data = blob.data
    if blob.meta["codec"] == "text":
        if data.size == 0:
            return np.zeros(0, dtype=np.int8)  # HDF5 has no empty string attribute
        return str(data[()]) if data.ndim == 0 else data.ravel()
    if data.dtype.kind == "b":
        data = data.astype(np.int8)
    return data if data.ndim <= 1 else data.ravel()


def _encode_attrs_v2(
    blobs: Iterable[_Blob], taken: Iterable[str]
) -> tuple[list[list[Any]], dict[str, Any]]:
    """(layout entries, attributes to write) of a set of encoded attributes; ``taken`` are
    keys that an encoding attribute of the same object uses."""
    taken = set(taken)
    tags, native = [], {}
    for k, blob in enumerate(blobs):
        name = json.loads(blob.meta["name"])
        value = _native_attr(blob)
        key = None
        if value is not None:
            key = name if _plain_name(name) and name not in taken else f"{_PREFIX}a{k}"
            native[key] = value
        tags.append([name, blob.meta["pytype"], blob.meta["codec"], blob.meta["dtype"],
                     list(blob.data.shape), key])
    return tags, native


def _encoded_data(var: xr.Variable, blob: _Blob) -> tuple[np.ndarray, Any, Any, dict[str, Any]]:
    """(array, HDF5 dtype, fill value, encoding attributes) of a variable's data."""
    data, codec = blob.data, blob.meta["codec"]
    if codec == "text":
        return data, h5py.string_dtype("utf-8"), None, {}
    if codec == "int64-view":
        kind = np.dtype(blob.meta["dtype"]).kind
        unit, count = np.datetime_data(var.dtype)
        cf = _CF_TIME_UNITS.get(unit) if count == 1 else None
        if cf is None:
            return data, np.dtype(np.int64), None, {}
        if kind == "M":
            enc = {"units": f"{cf} since 1970-01-01T00:00:00", "calendar": "proleptic_gregorian"}
        else:
            enc = {"units": cf, "dtype": f"timedelta64[{unit}]"}
        return data, np.dtype(np.int64), np.int64(_INT64_MIN), enc
    if data.dtype.kind == "b":
        return data.astype(np.int8), np.dtype(np.int8), None, {"dtype": "bool"}
    return data, data.dtype, None, {}


def plan_sweep(sweep_id: str, ds: Any) -> SweepPlanV2:
    """Encode one sweep for the netCDF layout; raises `LedgerValidationError` naming the
    field for anything that cannot be stored exactly (the checks of the version-1 codec)."""
    checked = _encode_sweep(sweep_id, ds)  # validation, and the exact encodings of values
    names: dict[str, str] = {}

    def disk(name: str) -> str:
        if name not in names:
            names[name] = name if _plain_name(name) else f"{_PREFIX}n{len(names)}"
        return names[name]

    dims = {disk(str(d)): int(n) for d, n in ds.sizes.items()}
    layout_vars, variables, coords = [], [], []
    for plan in checked.variables:
        var = ds.variables[plan.name]
        data, h5dtype, fill, enc = _encoded_data(var, plan.data)
        tags, native = _encode_attrs_v2(plan.attrs, enc)
        if plan.name in ds.sizes and plan.dims != (plan.name,):
            # Named as a dimension it does not index: netCDF would take it for that
            # dimension's coordinate, so it stands under a name of its own.
            key = f"{_PREFIX}v{len(variables)}"
        else:
            key = disk(plan.name)
        disk_dims = tuple(disk(d) for d in plan.dims)
        if plan.role == "coord" and disk_dims != (key,):
            coords.append(key)
        variables.append(_NcVariable(key, disk_dims, data, h5dtype, fill, {**enc, **native}))
        layout_vars.append({"name": plan.name, "key": key, "role": plan.role,
                            "dims": list(plan.dims), "codec": plan.data.meta["codec"],
                            "dtype": plan.data.meta["dtype"], "attrs": tags})
    taken = {"coordinates"} if coords else set()
    tags, native = _encode_attrs_v2(checked.attrs, taken)
    layout = json.dumps({"variables": layout_vars, "attrs": tags}, ensure_ascii=True)
    attrs: dict[str, Any] = {**native, _LAYOUT: layout}
    if coords:
        attrs["coordinates"] = " ".join(coords)
    return SweepPlanV2(sweep_id, dims, tuple(variables), attrs)


def _filters(data: np.ndarray, h5dtype: Any) -> dict[str, Any]:
    """Fletcher-32 per chunk where HDF5 allows it (not on scalars, empty or text arrays;
    those rely on the commit file's SHA-256 alone)."""
    if data.ndim == 0 or data.size == 0 or h5py.check_vlen_dtype(np.dtype(h5dtype)):
        return {}
    return {"chunks": True, "fletcher32": True}


def _write_variable(group: Any, var: _NcVariable) -> None:
    # Data given at creation: writing it afterwards costs h5netcdf a resize check.
    v = group.create_variable(var.key, var.dims, var.h5dtype, fillvalue=var.fillvalue,
                              data=var.data if var.data.size else None,
                              **_filters(var.data, var.h5dtype))
    for key, value in var.attrs.items():
        v.attrs[key] = value


def _write_group(parent: Any, name: str, plan: SweepPlanV2) -> Any:
    """Write a planned dataset as the new group ``name`` of ``parent`` (h5netcdf)."""
    g = parent.create_group(name)
    g.dimensions = dict(plan.dims)
    for var in plan.variables:
        _write_variable(g, var)
    for key, value in plan.attrs.items():
        g.attrs[key] = value
    return g


def write_matrix(f: Any, matrix: xr.Dataset) -> None:
    """Write the matrix as it stands after the commit (`MatrixSnapshot.to_dataset`) as the
    group ``/matrix`` of an h5netcdf file."""
    _write_group(f, "matrix", plan_sweep("matrix", matrix))


def write_sweep(sweeps: Any, plan: SweepPlanV2, seq: int) -> None:
    """Write one planned sweep as a new group of ``sweeps`` (an h5netcdf group)."""
    g = _write_group(sweeps, group_name(plan.sweep_id), plan)
    g.attrs[_SWEEP_ID] = plan.sweep_id
    g.attrs[_SEQ] = np.int64(seq)
    order = json.loads(sweeps.attrs.get(_ORDER, "[]"))
    sweeps.attrs[_ORDER] = json.dumps([*order, g.name.rsplit("/", 1)[-1]], ensure_ascii=True)


def sweep_groups(sweeps: h5py.Group) -> list[h5py.HLObject]:
    """The members of a version-2 ``/sweeps`` group in commit order (its order attribute
    must name each member once)."""
    order = json.loads(_attr(sweeps, _ORDER, str, "/sweeps")) if len(sweeps) else []
    if not isinstance(order, list) or sorted(order) != sorted(sweeps):
        raise _Malformed(f"/sweeps: attribute {_ORDER!r} does not list its groups")
    return [sweeps[name] for name in order]


# Entry table: units and long names of every column (UDUNITS spellings).
_ENTRY_ATTRS: dict[str, dict[str, str]] = {
    "seq": {"units": "1", "long_name": "commit sequence number"},
    "position": {"units": "1", "long_name": "index of the entry inside its commit"},
    "aggressor": {"long_name": "aggressor drive line (whose tone leaks)"},
    "victim": {"long_name": "victim qubit (that receives the leaked field)"},
    "value_re": {"units": "1", "long_name": "crosstalk X = C_victim,aggressor / "
                 "C_victim,victim, real part (X = value_re + 1j*value_im)"},
    "value_im": {"units": "1", "long_name": "crosstalk X, imaginary part"},
    "cov_re_re": {"units": "1", "long_name": "covariance of (Re X, Re X)"},
    "cov_re_im": {"units": "1", "long_name": "covariance of (Re X, Im X)"},
    "cov_im_re": {"units": "1", "long_name": "covariance of (Im X, Re X)"},
    "cov_im_im": {"units": "1", "long_name": "covariance of (Im X, Im X)"},
    # The same as in the matrix view.
    **{name: _VIEW_ATTRS[name] for name in (
        "amplification", "frequency_ghz", "quality", "measured_at_s", "shots",
        "measured_at_utc", "method",
        "verdict", "reason", "rig", "software_version", "kind", "tag")},
    "sweep_id": {"long_name": "id of the stored raw sweep (group sweeps/<percent-encoded "
                 "id> of the commit that stored it), or empty"},
}
_ENTRY_COORDS = ("aggressor", "victim", "amplification", "seq", "position")


def write_entries(f: Any, cols: Columns) -> None:
    """Write the entry table as the group ``/entries`` of an h5netcdf file."""
    g = f.create_group("entries")
    n = len(cols["seq"])
    g.dimensions = {"entry": n}
    ids = np.empty(n, dtype=object)
    ids[:] = [f"{s}.{p}" for s, p in zip(cols["seq"], cols["position"], strict=True)]
    entry = _NcVariable("entry", ("entry",), ids, h5py.string_dtype("utf-8"), None,
                        {"long_name": "ledger entry id (seq.position)"})
    _write_variable(g, entry)
    for name, attrs in _ENTRY_ATTRS.items():
        data = cols[name]
        h5dtype = h5py.string_dtype("utf-8") if data.dtype.kind == "O" else data.dtype
        _write_variable(g, _NcVariable(name, ("entry",), data, h5dtype, None, attrs))
    g.attrs["coordinates"] = " ".join(_ENTRY_COORDS)


# --------------------------------------------------------------------------------------------
# Reading (with h5py: exact, and independent of xarray's decoding rules)
# --------------------------------------------------------------------------------------------

_KINDS = {**dict.fromkeys(_FLOAT_COLUMNS, "f"), **dict.fromkeys(_INT_COLUMNS, "i"),
          **dict.fromkeys(_TEXT_FIELDS, "O")}


def read_entries(f: h5py.File) -> Columns:
    """The entry table of a version-2 file, every column's type and length checked."""
    g = _member(f, "entries", h5py.Group, "/")
    cols: Columns = {}
    rows = None
    for name, kind in _KINDS.items():
        ds = _member(g, name, h5py.Dataset, "/entries/")
        where = f"/entries/{name}"
        text = h5py.check_string_dtype(ds.dtype) is not None
        if (kind == "O") != text or (not text and ds.dtype.kind != kind):
            raise _Malformed(f"{where}: dtype {ds.dtype} does not fit this column")
        if ds.ndim != 1 or (rows is not None and ds.shape[0] != rows):
            raise _Malformed(f"{where}: shape {ds.shape}, the other columns have ({rows},)")
        rows = ds.shape[0]
        if text:
            arr = np.empty(rows, dtype=object)
            if rows:
                arr[:] = ds.asstr()[()]
            cols[name] = arr
        else:
            cols[name] = np.asarray(ds[()])
    return cols


def _layout(group: h5py.Group) -> dict[str, Any]:
    """The parsed ``xtalkcal_layout`` of a sweep group, its structure checked."""
    text = _attr(group, _LAYOUT, str, group.name)
    layout = json.loads(text)
    ok = (isinstance(layout, dict) and isinstance(layout.get("variables"), list)
          and isinstance(layout.get("attrs"), list)
          and all(isinstance(v, dict) for v in layout["variables"]))
    if not ok:
        raise _Malformed(f"{group.name}: attribute {_LAYOUT!r} lacks variables and attrs")
    for v in layout["variables"]:
        key = v.get("key")
        obj = group.get(key) if isinstance(key, str) else None
        if not isinstance(obj, h5py.Dataset):
            raise _Malformed(f"{group.name}: the layout names variable {key!r}, which the "
                             "group does not hold")
        if not isinstance(v.get("dims"), list) or len(v["dims"]) != obj.ndim:
            raise _Malformed(f"{group.name}/{key}: {obj.ndim} dimensions, the layout says "
                             f"{v.get('dims')!r}")
    return layout


def check_sweep(group: h5py.Group) -> tuple[str, int]:
    """(sweep id, seq) of a version-2 sweep group whose structure holds together."""
    sid = _attr(group, _SWEEP_ID, str, group.name)
    seq = _attr(group, _SEQ, int, group.name)
    if group.name.rsplit("/", 1)[-1] != group_name(sid):
        raise _Malformed(f"{group.name}: holds sweep {sid!r}, whose group is "
                         f"{group_name(sid)!r}")
    _layout(group)
    return sid, seq


def _read_attrs(obj: h5py.HLObject, tags: list[Any]) -> dict[str, Any]:
    out = {}
    for name, pytype, codec, dtype, shape, key in tags:
        where = f"{obj.name} attribute {name!r}"
        if key is None:
            arr = np.zeros((), dtype=np.int8)
        else:
            if key not in obj.attrs:
                raise _Malformed(f"{where}: missing (stored as {key!r})")
            raw = obj.attrs[key]
            if codec == "text" and np.asarray(raw).size:
                raw = np.asarray(raw, dtype=object)
            arr = np.asarray(raw).reshape(shape)
        out[name] = _restore_attr(_decode_raw(arr, codec, np.dtype(dtype), where), pytype, where)
    return out


def read_sweep(group: h5py.Group) -> xr.Dataset:
    """A version-2 sweep group decoded into the Dataset that was stored."""
    layout = _layout(group)
    data_vars: dict[str, xr.Variable] = {}
    coords: dict[str, xr.Variable] = {}
    for v in layout["variables"]:
        ds = group[v["key"]]
        text = v["codec"] == "text"
        raw = ds.asstr()[()] if text and ds.size else ds[()]
        data = _decode_raw(raw, v["codec"], np.dtype(v["dtype"]), f"{group.name}/{v['key']}")
        var = xr.Variable(tuple(v["dims"]), data, attrs=_read_attrs(ds, v["attrs"]))
        (coords if v["role"] == "coord" else data_vars)[v["name"]] = var
    return xr.Dataset(data_vars, coords=coords, attrs=_read_attrs(group, layout["attrs"]))


def open_file(path: Any) -> h5netcdf.File:
    """A new netCDF-4 commit file opened for writing (h5netcdf)."""
    return h5netcdf.File(path, "w")
