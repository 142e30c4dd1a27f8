"""Reading commit files: each checked against its digest and decoded, the entries and sweeps of
all of them gathered into one view, and sweeps read back later.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType

import h5py
import xarray as xr

import xtalkcal.store.schema as schema
from xtalkcal.exceptions import LedgerError
from xtalkcal.store.codec import _columns_to_entries, _member, _positional
from xtalkcal.store.entries import LedgerEntry, _attr, _Malformed
from xtalkcal.store.files import (
    _FORMAT,
    _MARKER_NAME,
    _BadCommit,
    _check_digest,
    _digest_name,
    _Marker,
    _read_digest,
    _stamp,
    version_key,
)
from xtalkcal.store.netcdf import check_sweep, sweep_groups


@dataclass(frozen=True)
class _CommitFile:
    """One commit file as read and checked: its range, entries and where its sweeps are."""

    name: str
    first: int
    last: int
    schema_version: int
    entries: tuple[LedgerEntry, ...]
    sweeps: tuple[tuple[str, str], ...]  # (sweep_id, group path), commit order
    verified: bool  # its digest matched (False: a legacy file without one)
    stamp: tuple[int, int, int]  # (size, mtime_ns, inode) when it was checked


@dataclass(frozen=True)
class _View:
    """Every entry and sweep of a ledger, as the queries use them."""

    entries: tuple[LedgerEntry, ...] = ()
    by_pair: Mapping[tuple[str, str], tuple[LedgerEntry, ...]] = field(default_factory=dict)
    sweeps: Mapping[str, tuple[str, str, int]] = field(default_factory=dict)
    last_seq: int = 0


class _Vanished(Exception):
    """A listed file disappeared before it could be opened (a compaction removed it)."""


def _time_key(e: LedgerEntry) -> tuple[float, int, int]:
    return (e.measured_at_s, e.seq, e.position)


# What h5py raises for damaged files, missing members and wrong types.
_DECODE_ERRORS = (OSError, KeyError, ValueError, TypeError, IndexError, AttributeError,
                  RecursionError)


def _load(root: Path, chip: str, marker: _Marker, first: int, last: int, name: str) -> _CommitFile:
    """Check one commit file's digest and decode it.

    Raises `_Vanished` if it was removed meanwhile (compaction) and `_BadCommit` for
    anything else that is wrong with it, so that each file is judged on its own.
    """
    path = root / name
    digest_path = root / _digest_name(first, last)
    try:
        stamp = _stamp(path)
        try:
            digest = _read_digest(digest_path)
        except FileNotFoundError:
            digest = None
        if digest is None:
            if not path.exists():
                raise _Vanished(name)  # compaction deletes the commit file first
            legacy = marker.legacy_files
            if legacy is not None and name not in legacy:
                raise _BadCommit(
                    f"its digest file {digest_path.name} is missing (every commit "
                    "written since digests exist has one)"
                )
        else:
            _check_digest(path, digest)
        with h5py.File(path, "r", locking=False) as fh:
            version, entries, sweeps = _decode(fh, chip, first, last)
    except FileNotFoundError as exc:
        raise _Vanished(name) from exc
    except (_BadCommit, _Vanished):
        raise
    except LedgerError as exc:
        raise _BadCommit(str(exc).replace(f"{path}: ", "")) from exc
    except _Malformed as exc:
        raise _BadCommit(f"not a well-formed commit: {exc}") from exc
    except _DECODE_ERRORS as exc:
        raise _BadCommit(
            f"cannot be decoded as a ledger commit ({type(exc).__name__}: {exc})"
        ) from exc
    return _CommitFile(
        name, first, last, version, tuple(entries), tuple(sweeps), digest is not None, stamp
    )


def _decode(
    fh: h5py.File, chip: str, first: int, last: int
) -> tuple[int, list[LedgerEntry], list[tuple[str, str]]]:
    """(schema version, entries, sweeps) of an open commit file of ``chip``; `_Malformed` if
    its structure is not the one written here."""
    if fh.attrs.get("format") != _FORMAT:
        raise _Malformed("not an xtalkcal ledger commit file (format attribute)")
    key = version_key(fh.attrs)
    version = _attr(fh, key, int, "/")
    if version > schema.SCHEMA_VERSION:
        raise _Malformed(
            f"{key} {version} is newer than this xtalkcal reads "
            f"({schema.SCHEMA_VERSION}); upgrade xtalkcal"
        )
    if version < 1:
        raise _Malformed(f"{key} must be >= 1, got {version}")
    file_chip = _attr(fh, "chip", str, "/")
    if file_chip != chip:
        raise _Malformed(
            f"belongs to chip {file_chip!r}, but the ledger marker {_MARKER_NAME} says "
            f"{chip!r}"
        )
    if (_attr(fh, "seq_first", int, "/"), _attr(fh, "seq_last", int, "/")) != (first, last):
        raise _Malformed("the sequence range in the file disagrees with its name")
    entries = _columns_to_entries(schema._read_entries(fh, version))
    for e in entries:
        if not first <= e.seq <= last:
            raise _Malformed(f"entry seq {e.seq} outside {first}..{last}")
    if len({(e.seq, e.position) for e in entries}) != len(entries):
        raise _Malformed("two entries share a (seq, position)")
    entries.sort(key=lambda e: (e.seq, e.position))
    sweeps = []
    container = _member(fh, "sweeps", h5py.Group, "/")
    for g in (_positional(container) if version == 1 else sweep_groups(container)):
        if not isinstance(g, h5py.Group):
            raise _Malformed(f"{g.name}: a sweep must be an HDF5 group")
        if version == 1:
            sid, seq = _attr(g, "sweep_id", str, g.name), _attr(g, "seq", int, g.name)
            for member in ("variables", "attrs"):
                _member(g, member, h5py.Group, g.name + "/")
        else:
            sid, seq = check_sweep(g)
        if not first <= seq <= last:
            raise _Malformed(f"{g.name}: sweep seq outside {first}..{last}")
        sweeps.append((sid, g.name))
    if len({sid for sid, _ in sweeps}) != len(sweeps):
        raise _Malformed("a sweep id is stored twice")
    return version, entries, sweeps


def _build_view(root: Path, files: Mapping[str, _CommitFile]) -> _View:
    """Every entry and sweep of the commit files, indexed for the queries."""
    entries: list[LedgerEntry] = []
    sweeps: dict[str, tuple[str, str, int]] = {}
    for cf in files.values():
        entries.extend(cf.entries)
        for sid, gpath in cf.sweeps:
            if sid in sweeps:
                raise LedgerError(f"{root}: sweep id {sid!r} stored twice")
            sweeps[sid] = (cf.name, gpath, cf.schema_version)
    by_pair: dict[tuple[str, str], list[LedgerEntry]] = {}
    for e in entries:
        by_pair.setdefault((e.aggressor, e.victim), []).append(e)
    return _View(
        entries=tuple(entries),
        by_pair=MappingProxyType(
            {p: tuple(sorted(v, key=_time_key)) for p, v in by_pair.items()}
        ),
        sweeps=MappingProxyType(sweeps),
        last_seq=max((cf.last for cf in files.values()), default=0),
    )


def _read_stored_sweep(
    root: Path, cf: _CommitFile, gpath: str, version: int, sweep_id: str
) -> xr.Dataset | None:
    """A sweep read back from its commit file, or None if the file has gone (compacted away
    after the listing: the caller lists again)."""
    path = root / cf.name
    try:
        _recheck(root, cf)
        fh = h5py.File(path, "r", locking=False)
    except LedgerError:
        raise
    except OSError as exc:
        if not path.exists():
            return None
        raise LedgerError(f"{path}: cannot be read ({exc})") from exc
    try:
        with fh:
            return schema._read_sweep(fh[gpath], version)
    except (*_DECODE_ERRORS, _Malformed) as exc:
        # HDF5 reports a Fletcher-32 mismatch as a failed filter (the only filter this code
        # writes).
        why = ("a data checksum (Fletcher-32) failed: the file changed after it was "
               "written" if "filter returned failure" in str(exc)
               else f"{type(exc).__name__}: {exc}")
        raise LedgerError(
            f"{path}: sweep {sweep_id!r} cannot be decoded ({why}); "
            f"`xtalkcal check {root}` checks every commit"
        ) from exc


def _recheck(root: Path, cf: _CommitFile) -> None:
    """Check a commit file's digest again if the file changed since it was checked.

    Sweeps are read from disk long after the ledger was opened; a rewritten or replaced
    file is seen by its size, time or inode (rot in place leaves those, and is caught by
    the Fletcher-32 checksums of the data).
    """
    path = root / cf.name
    if _stamp(path) == cf.stamp:
        return
    first, last = cf.first, cf.last
    try:
        _check_digest(path, _read_digest(root / _digest_name(first, last)))
    except FileNotFoundError:
        if not path.exists():
            raise
        raise LedgerError(
            f"{path}: changed since it was read, and its digest file is missing"
        ) from None
    except _BadCommit as exc:
        raise LedgerError(f"{path}: {exc.problem}") from None
