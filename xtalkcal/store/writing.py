"""Writing a ledger directory: making it, checking a batch, writing and merging commit files
under the writer lock, and setting damaged ones aside.
"""

from __future__ import annotations

import contextlib
import json
import os
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import xarray as xr

import xtalkcal.store.schema as schema
from xtalkcal.exceptions import LedgerError
from xtalkcal.store.codec import _entries_to_columns
from xtalkcal.store.entries import (
    LedgerEntry,
    LedgerValidationError,
    _attr,
    _check_entry,
    _check_text,
    utc_timestamp,
)
from xtalkcal.store.files import (
    _DIGEST_FORMAT,
    _FINAL_RE,
    _FORMAT,
    _LOCK_NAME,
    _MARKER_NAME,
    _QUARANTINE,
    _TMP_PREFIX,
    _atomic_write_bytes,
    _BadCommit,
    _covering,
    _digest_name,
    _final_name,
    _fsync_dir,
    _fsync_file,
    _hash_file,
    _list_digests,
    _list_final,
    _list_quarantine,
    _Marker,
    _read_digest,
    _read_marker,
    _temporary,
    _write_marker,
    _writer_lock,
    version_key,
)
from xtalkcal.store.netcdf import (
    _SEQ,
    SweepPlanV2,
    open_file,
    plan_sweep,
    write_entries,
    write_matrix,
    write_sweep,
)
from xtalkcal.store.reading import _CommitFile

# A function that fills the ``sweeps`` group (h5netcdf) of a commit file being written.
_SweepFiller = Callable[[Any], None]


@dataclass(frozen=True)
class CommitReceipt:
    """What `Ledger.append` wrote.

    Parameters
    ----------
    seq : int
        Commit sequence number.
    file : pathlib.Path
        The immutable file holding the commit.
    entries : tuple of LedgerEntry
        The stored entries (with ``seq`` and ``position`` filled in).
    sweep_ids : tuple of str
        Ids of the sweeps stored with the commit.
    """

    seq: int
    file: Path
    entries: tuple[LedgerEntry, ...]
    sweep_ids: tuple[str, ...]


# -- making a ledger -------------------------------------------------------------------------


def _make_ledger_dir(
    path: str | os.PathLike[str], chip: str, *, exist_ok: bool, lock_timeout_s: float
) -> Path:
    """Write the marker of a new ledger of ``chip`` into ``path`` (or accept the one there,
    with ``exist_ok``); returns the directory."""
    if not isinstance(chip, str):
        raise LedgerValidationError("Ledger.create", "chip", f"must be str, got {chip!r}")
    _check_text("Ledger.create", "chip", chip, required=True, exact=True)
    root = Path(path)
    root.mkdir(parents=True, exist_ok=True)
    with _writer_lock(root, lock_timeout_s):
        if (root / _MARKER_NAME).exists():
            existing = _read_marker(root).chip
            if not exist_ok:
                raise LedgerError(f"{root}: a ledger already exists (chip {existing!r})")
            if existing != chip:
                raise LedgerError(f"{root}: ledger belongs to chip {existing!r}, not {chip!r}")
            return root
        foreign = sorted(
            n for n in os.listdir(root) if n != _LOCK_NAME and not n.startswith(_TMP_PREFIX)
        )
        if foreign:
            raise LedgerError(f"{root}: directory is not empty and not a ledger ({foreign[:3]}...)")
        info = {
            "format": _FORMAT,
            "version": schema.SCHEMA_VERSION,
            "chip": chip,
            "created_utc": utc_timestamp(),
            "integrity": {"digest": "sha256", "legacy_files": []},
        }
        _write_marker(root, info)
    return root


# -- checking a batch ------------------------------------------------------------------------


def _check_batch(
    entries: Iterable[LedgerEntry], sweeps: Mapping[str, xr.Dataset] | None
) -> tuple[list[LedgerEntry], dict[str, xr.Dataset], list[SweepPlanV2]]:
    """Validate a batch before the lock is taken: (entries, sweeps by id, encoded sweeps)."""
    batch = list(entries)
    sweep_map = dict(sweeps or {})
    if not batch and not sweep_map:
        raise LedgerValidationError(
            "Ledger.append", "entries", "nothing to commit (no entries, no sweeps)"
        )
    for k, e in enumerate(batch):
        _check_entry(e, f"entry[{k}]")
    plans = [plan_sweep(sid, ds) for sid, ds in sweep_map.items()]
    return batch, sweep_map, plans


def _check_links(
    batch: Sequence[LedgerEntry], new: Mapping[str, Any], known: Mapping[str, Any]
) -> None:
    """Refuse sweep ids already stored, and entries naming a sweep neither new nor stored."""
    for sid in new:
        if sid in known:
            raise LedgerValidationError(
                f"sweep {sid!r}", "sweep_id", "already stored; sweep ids are unique"
            )
    for k, e in enumerate(batch):
        if e.sweep_id and e.sweep_id not in known and e.sweep_id not in new:
            raise LedgerValidationError(
                f"entry[{k}] ({e.aggressor!r} -> {e.victim!r})",
                "sweep_id",
                f"{e.sweep_id!r} is neither in this batch nor stored",
            )


def _next_seq(root: Path, last_seq: int) -> int:
    """The number of the next commit (quarantined ones are never given again: they may come
    back)."""
    return max([last_seq, *(la for _, la, _ in _list_quarantine(root))]) + 1


# -- writing commit files (under the lock) ---------------------------------------------------


def _remove_temporaries(root: Path) -> None:
    """Remove what killed writers and interrupted compactions left (under the lock)."""
    # Called after a refresh that found every commit: no live writer owns a temporary file
    # now, and a digest file without its commit file is the leftover of a killed writer
    # (above every commit) or of a compaction (inside a kept range). Digests go first, so
    # that a crash here never leaves a digest file whose temporary file has gone (which
    # would read as a deleted commit).
    kept = [(f, la) for f, la, _ in _covering(root, _list_final(root))[0]]
    top = max((la for _, la in kept), default=0)
    for (first, last), name in _list_digests(root).items():
        if (root / _final_name(first, last)).exists():
            continue
        if first > top:
            try:
                orphan = _read_digest(root / name)
            except _BadCommit as exc:
                raise LedgerError(f"{root / name}: {exc.problem}") from None
            if not (root / orphan["tmp"]).exists():
                # Not a killed writer's: the commit file it describes has gone.
                raise LedgerError(
                    f"{root / orphan['file']}: missing, but its digest file {name} "
                    "is there (deleted or moved); nothing was written"
                )
        elif not any(f <= first and last <= la for f, la in kept):
            raise LedgerError(f"{root / _final_name(first, last)}: missing, but its "
                              f"digest file {name} is there; nothing was written")
        with contextlib.suppress(FileNotFoundError):
            os.unlink(root / name)
    with os.scandir(root) as it:
        stale = [item.path for item in it if item.name.startswith(_TMP_PREFIX)]
    for p in stale:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(p)


def _raise_marker_version(root: Path, marker: _Marker) -> _Marker:
    """Before the first commit of the current schema version into an older ledger (under the
    lock): say so in the marker, so that an older xtalkcal refuses the ledger as newer than
    it reads instead of meeting a file it cannot decode. Returns the marker in force."""
    if marker.info.get(version_key(marker.info)) == schema.SCHEMA_VERSION:
        return marker
    info = {k: v for k, v in marker.info.items() if k != "schema_version"}
    _write_marker(root, {**info, "version": schema.SCHEMA_VERSION})
    return _read_marker(root)


def _start_digests(root: Path, marker: _Marker) -> _Marker:
    """On a ledger from before digests (under the lock): record its files as legacy, so that
    from now on a commit file without a digest is an error. Returns the marker in force."""
    if marker.legacy_files is not None:
        return marker
    keep, _ = _covering(root, _list_final(root))
    info = {
        **marker.info,
        "integrity": {"digest": "sha256", "legacy_files": [n for _, _, n in keep]},
    }
    _write_marker(root, info)
    return _read_marker(root)


def _write_commit(
    root: Path,
    chip: str,
    first: int,
    last: int,
    entries: Iterable[LedgerEntry],
    fill_sweeps: _SweepFiller,
    matrix: xr.Dataset | None = None,
) -> Path:
    """Write one immutable commit file: temp name, fsync, atomic rename, fsync dir."""
    final = root / _final_name(first, last)
    if final.exists():
        raise LedgerError(f"{final}: already exists; refusing to overwrite a commit")
    tmp = _temporary(root, ".h5")
    digest = root / _digest_name(first, last)
    renamed = False
    try:
        with open_file(tmp) as fh:
            fh.attrs["format"] = _FORMAT
            fh.attrs["version"] = np.int64(schema.SCHEMA_VERSION)
            fh.attrs["chip"] = chip
            fh.attrs["seq_first"] = np.int64(first)
            fh.attrs["seq_last"] = np.int64(last)
            fh.attrs["written_utc"] = utc_timestamp()
            write_entries(fh, _entries_to_columns(entries))
            fill_sweeps(fh.create_group("sweeps"))
            if matrix is not None:
                write_matrix(fh, matrix)
        _fsync_file(tmp)
        size, sha = _hash_file(tmp)
        record = {"format": _DIGEST_FORMAT, "version": 1, "file": final.name, "tmp": tmp.name,
                  "size": size, "sha256": sha}
        # Durable before the rename: a visible commit always has its digest.
        _atomic_write_bytes(root, digest.name, json.dumps(record, indent=1).encode())
        os.replace(tmp, final)
        renamed = True
    finally:
        if not renamed:
            for leftover in (digest, tmp):
                with contextlib.suppress(FileNotFoundError):
                    leftover.unlink()
    _fsync_dir(root)
    return final


def _new_sweeps(plans: Sequence[SweepPlanV2], seq: int) -> _SweepFiller:
    """Fill a commit's sweeps group with the encoded sweeps of a new commit ``seq``."""

    def fill(group: Any) -> None:
        for plan in plans:
            write_sweep(group, plan, seq)

    return fill


def _merged_sweeps(root: Path, files: Sequence[_CommitFile]) -> _SweepFiller:
    """Fill a merged commit's sweeps group with the sweeps of ``files``, in commit order,
    each decoded and written again in the current version (one at a time, so that memory
    holds one sweep)."""

    def fill(group: Any) -> None:
        for cf in files:
            with h5py.File(root / cf.name, "r", locking=False) as src:
                for sid, gpath in cf.sweeps:
                    g = src[gpath]
                    key = "seq" if cf.schema_version == 1 else _SEQ
                    seq = _attr(g, key, int, gpath)
                    ds = schema._read_sweep(g, cf.schema_version)
                    write_sweep(group, plan_sweep(sid, ds), seq)

    return fill


def _remove_redundant(root: Path, redundant: Sequence[tuple[int, int, str]]) -> None:
    """Delete commit files a merged file holds, each before its digest (readers rely on that
    order)."""
    for first, last, name in redundant:
        for gone in (name, _digest_name(first, last)):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(root / gone)
    if redundant:
        _fsync_dir(root)


# -- setting a commit aside ------------------------------------------------------------------


def quarantine_commit(
    path: str | os.PathLike[str], name: str, *, lock_timeout_s: float = 60.0
) -> Path:
    """Set a damaged commit file aside so that the rest of the ledger can be read.

    The file and its digest file move into ``<ledger>/quarantine/``; its entries and sweeps
    leave the history and its sequence numbers no longer count as missing. Moving the two
    files back undoes it.

    Parameters
    ----------
    path : str or os.PathLike
        The ledger directory.
    name : str
        Name of the commit file, e.g. ``"0000000003-0000000003.h5"``.
    lock_timeout_s : float, optional
        How long to wait for the writer lock, s.

    Returns
    -------
    pathlib.Path
        Where the commit file is now.
    """
    root = Path(path)
    _read_marker(root)
    m = _FINAL_RE.match(str(name))
    if m is None or not (root / name).is_file():
        raise LedgerError(f"{root}: {name!r} is not a commit file of this ledger")
    first, last = int(m.group(1)), int(m.group(2))
    qdir = root / _QUARANTINE
    with _writer_lock(root, lock_timeout_s):
        qdir.mkdir(exist_ok=True)
        if (qdir / name).exists():
            raise LedgerError(f"{qdir / name}: already in quarantine; move it elsewhere first")
        os.replace(root / name, qdir / name)
        digest = _digest_name(first, last)
        with contextlib.suppress(FileNotFoundError):
            os.replace(root / digest, qdir / digest)
        _fsync_dir(qdir)
        _fsync_dir(root)
    return qdir / name
