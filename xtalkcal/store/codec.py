"""The entry columns and the checks and exact encodings of sweep datasets, and the reader of the
version-1 HDF5 layout (entry tables as columns, sweeps as plain arrays with their attributes).

Files are written in the netCDF-4 layout of `netcdf` since schema version 2; version-1 files
are read in place by the readers here (the schema version and upgrades are in `schema`).
"""

from __future__ import annotations

import json
import numbers
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any, Literal

import h5py
import numpy as np
import xarray as xr

from xtalkcal.exceptions import LedgerError
from xtalkcal.store.entries import (
    _TEXT_FIELDS,
    LedgerEntry,
    LedgerValidationError,
    _attr,
    _check_text,
    _check_utf8,
    _Malformed,
)

# --------------------------------------------------------------------------------------------
# Entry columns (the on-disk table)
# --------------------------------------------------------------------------------------------

_FLOAT_COLUMNS = (
    "frequency_ghz",
    "value_re",
    "value_im",
    "cov_re_re",
    "cov_re_im",
    "cov_im_re",
    "cov_im_im",
    "quality",
    "measured_at_s",
)
_INT_COLUMNS = ("seq", "position", "shots", "amplification")

Columns = dict[str, np.ndarray]
"""One 1-D array per column name; text columns are object arrays of str."""


def _entries_to_columns(entries: Iterable[LedgerEntry]) -> Columns:
    rows = list(entries)
    cols: Columns = {
        "frequency_ghz": np.array([e.frequency_ghz for e in rows], dtype=np.float64),
        "value_re": np.array([e.value.real for e in rows], dtype=np.float64),
        "value_im": np.array([e.value.imag for e in rows], dtype=np.float64),
        "cov_re_re": np.array([e.covariance[0][0] for e in rows], dtype=np.float64),
        "cov_re_im": np.array([e.covariance[0][1] for e in rows], dtype=np.float64),
        "cov_im_re": np.array([e.covariance[1][0] for e in rows], dtype=np.float64),
        "cov_im_im": np.array([e.covariance[1][1] for e in rows], dtype=np.float64),
        "quality": np.array([e.quality for e in rows], dtype=np.float64),
        "measured_at_s": np.array([e.measured_at_s for e in rows], dtype=np.float64),
    }
    for name in _INT_COLUMNS:
        cols[name] = np.array([getattr(e, name) for e in rows], dtype=np.int64)
    for name in _TEXT_FIELDS:
        arr = np.empty(len(rows), dtype=object)
        arr[:] = [getattr(e, name) for e in rows]
        cols[name] = arr
    return cols


def _columns_to_entries(cols: Columns) -> list[LedgerEntry]:
    missing = [c for c in (*_FLOAT_COLUMNS, *_INT_COLUMNS, *_TEXT_FIELDS) if c not in cols]
    if missing:
        raise LedgerError(f"entry table lacks columns {missing}")
    n = len(cols["seq"])
    f = {name: cols[name].astype(np.float64).tolist() for name in _FLOAT_COLUMNS}
    i = {name: cols[name].astype(np.int64).tolist() for name in _INT_COLUMNS}
    t = {name: [str(s) for s in cols[name]] for name in _TEXT_FIELDS}
    return [
        LedgerEntry(
            value=complex(f["value_re"][k], f["value_im"][k]),
            covariance=(
                (f["cov_re_re"][k], f["cov_re_im"][k]),
                (f["cov_im_re"][k], f["cov_im_im"][k]),
            ),
            frequency_ghz=f["frequency_ghz"][k],
            quality=f["quality"][k],
            measured_at_s=f["measured_at_s"][k],
            **{name: i[name][k] for name in _INT_COLUMNS},
            **{name: t[name][k] for name in _TEXT_FIELDS},
        )
        for k in range(n)
    ]


_TABLE_KINDS = {"float64": "f", "int64": "i", "text": "O"}


def _member(group: h5py.Group, name: str, kind: type, where: str) -> Any:
    """``group[name]``, which must be an HDF5 group or dataset (``kind``)."""
    obj = group.get(name)
    if not isinstance(obj, kind):
        what = "group" if kind is h5py.Group else "dataset"
        found = "nothing" if obj is None else type(obj).__name__
        raise _Malformed(f"{where}{name}: expected an HDF5 {what}, found {found}")
    return obj


def _read_columns(f: h5py.File) -> Columns:
    """The entry table, every structural property checked (a corrupt table is refused, never
    coerced: ``astype`` would turn wrong dtypes into numbers)."""
    cols: Columns = {}
    g = _member(f, "entries", h5py.Group, "/")
    rows = None
    for table in g:
        ds = _member(g, table, h5py.Dataset, "/entries/")
        where = f"/entries/{table}"
        if table not in _TABLE_KINDS:
            raise _Malformed(f"{where}: unknown table; known: {', '.join(_TABLE_KINDS)}")
        text = h5py.check_string_dtype(ds.dtype) is not None
        if (_TABLE_KINDS[table] == "O") != text or (
            not text and ds.dtype.kind != _TABLE_KINDS[table]
        ):
            raise _Malformed(f"{where}: dtype {ds.dtype} does not fit a {table} table")
        names = json.loads(_attr(ds, "columns", str, where))
        if ds.ndim != 2 or not isinstance(names, list) or len(names) != ds.shape[1]:
            raise _Malformed(f"{where}: shape {ds.shape} does not match its columns attribute")
        if rows is not None and ds.shape[0] != rows:
            raise _Malformed(f"{where}: {ds.shape[0]} rows, the other tables have {rows}")
        rows = ds.shape[0]
        data = ds.asstr()[()] if text else ds[()]
        data = np.asarray(data).reshape(ds.shape)
        for k, name in enumerate(names):
            if not isinstance(name, str) or name in cols:
                raise _Malformed(f"{where}: column names must be distinct strings, got {name!r}")
            cols[name] = data[:, k]
    return cols


# --------------------------------------------------------------------------------------------
# Sweep codec: the checks and exact encodings of a Dataset's values, and the version-1 reader
# --------------------------------------------------------------------------------------------

_PLAIN_KINDS = frozenset("biufcS")
_PLAIN_ITEMSIZES = {"b": {1}, "i": {1, 2, 4, 8}, "u": {1, 2, 4, 8}, "f": {2, 4, 8}, "c": {8, 16}}
_ATTR_TYPES = "str, int, float, complex, bool, None, numpy scalar, numpy array, flat list/tuple"


@dataclass(frozen=True)
class _Blob:
    """An array ready to be written, with the HDF5 attributes needed to decode it."""

    data: np.ndarray
    h5dtype: Any
    meta: Mapping[str, Any]


def _encode_array(arr: np.ndarray, where: str, field_name: str) -> _Blob:
    kind = arr.dtype.kind
    meta: dict[str, Any] = {"dtype": arr.dtype.str}
    if kind in _PLAIN_KINDS:
        if kind != "S" and arr.dtype.itemsize not in _PLAIN_ITEMSIZES[kind]:
            raise LedgerValidationError(
                where, field_name, f"dtype {arr.dtype} is not storable (extended precision)"
            )
        meta["codec"] = "plain"
        return _Blob(arr, arr.dtype, meta)
    if kind in "UO":
        flat = arr.ravel()
        if kind == "O" and not all(isinstance(x, str) for x in flat):
            bad = next(type(x).__name__ for x in flat if not isinstance(x, str))
            raise LedgerValidationError(
                where,
                field_name,
                f"object arrays must hold str only (found {bad}; multi-indexes are not "
                "storable: reset_index first)",
            )
        for x in flat:
            _check_utf8(where, field_name, str(x), subject="strings ")
        data = np.empty(arr.shape, dtype=object)
        data[...] = arr
        meta["codec"] = "text"
        return _Blob(data, h5py.string_dtype("utf-8"), meta)
    if kind in "Mm":
        # h5py has no datetime type; the int64 view is exact, NaT included.
        meta["codec"] = "int64-view"
        return _Blob(arr.view(np.int64), np.dtype(np.int64), meta)
    raise LedgerValidationError(where, field_name, f"dtype {arr.dtype} is not storable")


def _decode_raw(raw: Any, codec: str, dtype: np.dtype, where: str) -> np.ndarray:
    """An array as stored (``raw``: what h5py read) turned back into its numpy ``dtype``."""
    if codec == "plain":
        return np.asarray(raw).astype(dtype, copy=False)
    if codec == "text":
        arr = np.asarray(raw, dtype=object)
        out = np.empty(arr.shape, dtype=object)
        if out.size:
            out[...] = arr
        return out if dtype.kind == "O" else out.astype(dtype)
    if codec == "int64-view":
        return np.asarray(raw, dtype=np.int64).view(dtype)
    raise LedgerError(f"{where}: unknown array codec {codec!r}")


def _decode_array(ds: h5py.Dataset) -> np.ndarray:
    codec = ds.attrs["codec"]
    dtype = np.dtype(ds.attrs["dtype"])
    raw = ds.asstr()[()] if codec == "text" and ds.size else ds[()]
    return _decode_raw(raw, codec, dtype, f"{ds.file.filename}:{ds.name}")


def _encode_attr(value: Any, where: str, name: str) -> _Blob:
    field_name = f"attrs[{name!r}]"
    if value is None:
        pytype, arr = "none", np.zeros((), dtype=np.int8)
    elif isinstance(value, bool):
        pytype, arr = "bool", np.array(value)
    elif isinstance(value, int):
        if not -(2**63) <= value < 2**63:
            raise LedgerValidationError(where, field_name, "integers must fit in 64 bits")
        pytype, arr = "int", np.array(value, dtype=np.int64)
    elif isinstance(value, float):
        pytype, arr = "float", np.array(value, dtype=np.float64)
    elif isinstance(value, complex):
        pytype, arr = "complex", np.array(value, dtype=np.complex128)
    elif isinstance(value, str) and not isinstance(value, np.str_):
        pytype, arr = "str", np.array(value, dtype=object)
    elif isinstance(value, np.generic):
        pytype, arr = "numpy-scalar", np.asarray(value)
    elif isinstance(value, np.ndarray):
        pytype, arr = "ndarray", value
    elif isinstance(value, (list, tuple)):
        if any(isinstance(x, (list, tuple, dict, set, np.ndarray)) for x in value):
            raise LedgerValidationError(
                where, field_name, "nested sequences are not storable; use a numpy array"
            )
        strs = [isinstance(x, str) for x in value]
        nums = [isinstance(x, numbers.Number) and not isinstance(x, str) for x in value]
        if not (all(strs) or all(nums)):
            raise LedgerValidationError(
                where, field_name, "lists must hold only str or only numbers"
            )
        arr = np.array(value, dtype=object) if value and all(strs) else np.asarray(value)
        if arr.dtype.kind == "O" and not all(strs):
            raise LedgerValidationError(where, field_name, "list numbers must fit in 64 bits")
        pytype = "list" if isinstance(value, list) else "tuple"
    else:
        raise LedgerValidationError(
            where,
            field_name,
            f"type {type(value).__name__} is not storable; accepted: {_ATTR_TYPES}",
        )
    blob = _encode_array(arr, where, field_name)
    # Attribute names may be any unicode; the datasets holding them are named by position
    # and the real name is kept JSON-encoded, so even "/" or "." survive.
    return _Blob(blob.data, blob.h5dtype, {**blob.meta, "pytype": pytype, "name": json.dumps(name)})


def _restore_attr(arr: np.ndarray, pytype: str, where: str) -> Any:
    """The Python value of a decoded attribute array, by the type it was given as."""
    if pytype == "none":
        return None
    if pytype == "ndarray":
        return arr
    if pytype == "list":
        return arr.tolist()
    if pytype == "tuple":
        return tuple(arr.tolist())
    scalar = arr[()]
    convert: dict[str, Callable[[Any], Any]] = {
        "bool": bool,
        "int": int,
        "float": float,
        "complex": complex,
        "str": str,
        "numpy-scalar": lambda x: x,
    }
    if pytype not in convert:
        raise LedgerError(f"{where}: unknown attribute type {pytype!r}")
    return convert[pytype](scalar)


def _decode_attr(ds: h5py.Dataset) -> Any:
    return _restore_attr(_decode_array(ds), ds.attrs["pytype"], f"{ds.file.filename}:{ds.name}")


@dataclass(frozen=True)
class _VariablePlan:
    name: str
    role: Literal["coord", "data"]
    dims: tuple[str, ...]
    data: _Blob
    attrs: tuple[_Blob, ...]


@dataclass(frozen=True)
class _SweepPlan:
    """A Dataset fully encoded in memory, so that every error is raised before writing."""

    sweep_id: str
    variables: tuple[_VariablePlan, ...]
    attrs: tuple[_Blob, ...]


def _encode_attrs(attrs: Mapping[Any, Any], where: str) -> tuple[_Blob, ...]:
    out = []
    for key, value in attrs.items():
        if not isinstance(key, str):
            raise LedgerValidationError(where, "attrs", f"keys must be str, got {key!r}")
        out.append(_encode_attr(value, where, key))
    return tuple(out)


def _encode_sweep(sweep_id: str, ds: Any) -> _SweepPlan:
    where = f"sweep {sweep_id!r}"
    if not isinstance(sweep_id, str):
        raise LedgerValidationError("sweeps", "sweep_id", f"must be str, got {sweep_id!r}")
    _check_text(where, "sweep_id", sweep_id, required=True, exact=True)
    if not isinstance(ds, xr.Dataset):
        raise LedgerValidationError(
            where, "dataset", f"expected xarray.Dataset, got {type(ds).__name__}"
        )
    variables = []
    for name, var in ds.variables.items():
        if not isinstance(name, str):
            raise LedgerValidationError(where, "variables", f"names must be str, got {name!r}")
        for dim in var.dims:
            if not isinstance(dim, str):
                raise LedgerValidationError(where, "dims", f"names must be str, got {dim!r}")
        vwhere = f"{where} variable {name!r}"
        variables.append(
            _VariablePlan(
                name=name,
                role="coord" if name in ds.coords else "data",
                dims=tuple(str(d) for d in var.dims),
                data=_encode_array(np.asarray(var.values), vwhere, "data"),
                attrs=_encode_attrs(var.attrs, vwhere),
            )
        )
    return _SweepPlan(sweep_id, tuple(variables), _encode_attrs(ds.attrs, where))


def _positional(group: h5py.Group) -> list[Any]:
    return [group[k] for k in sorted(group, key=int)]


def _read_attr_group(group: h5py.Group) -> dict[str, Any]:
    return {json.loads(ds.attrs["name"]): _decode_attr(ds) for ds in _positional(group["attrs"])}


def _read_sweep_v1(group: h5py.Group) -> xr.Dataset:
    data_vars: dict[str, xr.Variable] = {}
    coords: dict[str, xr.Variable] = {}
    for g in _positional(group["variables"]):
        var = xr.Variable(
            tuple(json.loads(g.attrs["dims"])), _decode_array(g["data"]), attrs=_read_attr_group(g)
        )
        (coords if g.attrs["role"] == "coord" else data_vars)[json.loads(g.attrs["name"])] = var
    return xr.Dataset(data_vars, coords=coords, attrs=_read_attr_group(group))

