"""The schema version of the ledger's files, and the readers and upgrades of older versions.

Version 1 is the first hand-made HDF5 layout (`codec`); version 2 is netCDF-4, which xarray
opens as it is (`netcdf`). Both are read in place: a ledger may hold files of both, new
commits are written in the current version and `Ledger.compact` rewrites old ones.

Every module of the store reads these names here, at call time (``schema.SCHEMA_VERSION``),
never as a copy of its own: a new version is set in one place, and a test that pretends a newer
version exists sets it in one place too.
"""

from __future__ import annotations

from collections.abc import Callable

import h5py
import xarray as xr

from xtalkcal.exceptions import LedgerError
from xtalkcal.store.codec import Columns, _read_columns, _read_sweep_v1
from xtalkcal.store.netcdf import read_entries, read_sweep

SCHEMA_VERSION: int = 2
"""Schema version written into every file by this code."""


def _same_columns(cols: Columns) -> Columns:
    """Version 1 to 2 changed the file layout only: the entry columns are the same."""
    return cols


MIGRATIONS: dict[int, Callable[[Columns], Columns]] = {1: _same_columns}
"""Upgrade functions of the entry table: ``MIGRATIONS[v]`` turns version-``v`` columns into
version ``v + 1`` columns; add one function per bump."""

SWEEP_READERS: dict[int, Callable[[h5py.Group], xr.Dataset]] = {
    1: _read_sweep_v1, 2: read_sweep}
"""Decoder of a stored sweep group, by the schema version of the file that holds it."""

ENTRY_READERS: dict[int, Callable[[h5py.File], Columns]] = {1: _read_columns, 2: read_entries}
"""Reader of a file's entry table (as that version's columns), by its schema version."""


def _migrate(cols: Columns, version: int, source: str) -> Columns:
    """The entry table of a version-``version`` file, upgraded to `SCHEMA_VERSION`."""
    while version < SCHEMA_VERSION:
        step = MIGRATIONS.get(version)
        if step is None:
            raise LedgerError(
                f"{source}: schema_version {version} has no migration to {version + 1}; "
                f"known migrations start at {sorted(MIGRATIONS) or 'none'}"
            )
        cols = step(cols)
        version += 1
    return cols


def _reader(readers: dict[int, Callable], version: int) -> Callable:
    """The reader of a file of ``version``, or of the newest older version with one (a bump
    that only migrates the entry table keeps the layout of the version before)."""
    known = [v for v in readers if v <= version]
    if not known:
        raise LedgerError(f"schema_version {version} has no reader")
    return readers[max(known)]


def _read_entries(fh: h5py.File, version: int) -> Columns:
    """A file's entry table, upgraded to the columns of `SCHEMA_VERSION`."""
    return _migrate(_reader(ENTRY_READERS, version)(fh), version, "entries")


def _read_sweep(group: h5py.Group, version: int) -> xr.Dataset:
    """A stored sweep group, decoded by the reader of its file's schema version."""
    return _reader(SWEEP_READERS, version)(group)
