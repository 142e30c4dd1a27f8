"""The schema version of the ledger's files, and the readers and upgrades of older versions.

Every module of the store reads these names here, at call time (``schema.SCHEMA_VERSION``),
never as a copy of its own: a new version is set in one place, and a test that pretends a newer
version exists sets it in one place too.
"""

from __future__ import annotations

from collections.abc import Callable

import h5py
import xarray as xr

from xtalkcal.exceptions import LedgerError
from xtalkcal.store.codec import Columns, _read_sweep_v1

SCHEMA_VERSION: int = 1
"""Schema version written into every file by this code."""

MIGRATIONS: dict[int, Callable[[Columns], Columns]] = {}
"""Upgrade functions of the entry table: ``MIGRATIONS[v]`` turns version-``v`` columns into
version ``v + 1`` columns. Empty while only version 1 exists; add one function per bump."""

SWEEP_READERS: dict[int, Callable[[h5py.Group], xr.Dataset]] = {1: _read_sweep_v1}
"""Decoder of a stored sweep group, by the schema version of the file that holds it."""


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


def _read_sweep(group: h5py.Group, version: int) -> xr.Dataset:
    """A stored sweep group, decoded by the reader of its file's schema version."""
    return SWEEP_READERS[version](group)
