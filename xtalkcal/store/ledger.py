"""The ledger: an append-only store of crosstalk measurements and their history.

The `Ledger` class is the face of the store; the work behind it is done by `reading` (decoding
commit files into one view), `integrity` (judging every commit file), `writing` (commit files
under the writer lock) and `files` (names, listings, digests and the marker on disk).
"""

from __future__ import annotations

import dataclasses
import math
import numbers
import os
from collections.abc import Iterable, Mapping
from pathlib import Path
from types import MappingProxyType

import xarray as xr

from xtalkcal.exceptions import LedgerError
from xtalkcal.store.entries import LedgerEntry, LedgerValidationError
from xtalkcal.store.files import (
    _MAX_LIST_ATTEMPTS,
    _covering,
    _list_final,
    _read_marker,
    _writer_lock,
)
from xtalkcal.store.integrity import CommitCheck, LedgerReport, _judge
from xtalkcal.store.reading import (
    _build_view,
    _CommitFile,
    _read_stored_sweep,
    _time_key,
    _Vanished,
    _View,
)
from xtalkcal.store.snapshots import _VIEW_ATTRS, MatrixSnapshot, _entry_table
from xtalkcal.store.writing import (
    CommitReceipt,
    _check_batch,
    _check_links,
    _make_ledger_dir,
    _merged_sweeps,
    _new_sweeps,
    _next_seq,
    _raise_marker_version,
    _remove_redundant,
    _remove_temporaries,
    _start_digests,
    _write_commit,
)


class Ledger:
    """The crosstalk ledger of one chip, stored in a directory (see module docs).

    Open an existing ledger with ``Ledger(path)``; make one with `Ledger.create`. Any number
    of processes may read while one at a time writes; every query sees whole commits only.
    A `Ledger` object is not thread-safe: use one per thread.

    Parameters
    ----------
    path : str or os.PathLike
        The ledger directory.
    lock_timeout_s : float, optional
        How long a writer waits for the lock before raising `LedgerError`, s.

    Raises
    ------
    LedgerError
        If the directory is not a ledger, holds a file with a newer schema version, or any
        commit file is damaged or missing (the message names each one; see `verify`).
    """

    def __init__(self, path: str | os.PathLike[str], *, lock_timeout_s: float = 60.0) -> None:
        self._setup(path, lock_timeout_s)
        self._refresh()

    def _setup(self, path: str | os.PathLike[str], lock_timeout_s: float) -> None:
        self._path = Path(path)
        self._marker = _read_marker(self._path)
        self._chip = self._marker.chip
        self._lock_timeout_s = float(lock_timeout_s)
        self._files: dict[str, _CommitFile] = {}
        self._view = _View()

    @classmethod
    def create(
        cls,
        path: str | os.PathLike[str],
        *,
        chip: str,
        exist_ok: bool = False,
        lock_timeout_s: float = 60.0,
    ) -> Ledger:
        """Create a ledger directory for ``chip`` (or open it, with ``exist_ok``).

        Parameters
        ----------
        path : str or os.PathLike
            Directory to create; it may exist if it is empty.
        chip : str
            Name of the chip; stored in the marker and in every commit file.
        exist_ok : bool, optional
            Open an existing ledger of the same chip instead of raising.
        lock_timeout_s : float, optional
            Writer lock timeout, s.

        Returns
        -------
        Ledger

        Raises
        ------
        LedgerError
            If a ledger exists (without ``exist_ok``), belongs to another chip, or the
            directory holds unrelated files.
        """
        root = _make_ledger_dir(path, chip, exist_ok=exist_ok, lock_timeout_s=lock_timeout_s)
        return cls(root, lock_timeout_s=lock_timeout_s)

    # -- properties -------------------------------------------------------------------------

    @property
    def path(self) -> Path:
        """The ledger directory."""
        return self._path

    @property
    def chip(self) -> str:
        """Name of the chip this ledger belongs to."""
        return self._chip

    @property
    def last_seq(self) -> int:
        """Highest commit sequence number stored (0 for an empty ledger)."""
        self._refresh()
        return self._view.last_seq

    def __repr__(self) -> str:
        return f"Ledger({str(self._path)!r}, chip={self._chip!r})"

    # -- keeping up with the directory ------------------------------------------------------

    def _list_final(self) -> list[tuple[int, int, str]]:
        return _list_final(self._path)

    def _scan(
        self, *, rehash: bool, listing: list[tuple[int, int, str]] | None = None
    ) -> tuple[dict[str, _CommitFile], list[CommitCheck]]:
        """Load every commit file still needed (all with ``rehash``) and judge each one."""
        for _ in range(_MAX_LIST_ATTEMPTS):
            self._marker = _read_marker(self._path)  # legacy ledgers switch on first write
            keep, _redundant = _covering(self._path, listing or self._list_final())
            listing = None
            cached = {} if rehash else self._files
            try:
                return _judge(self._path, self._chip, self._marker, keep, cached)
            except _Vanished:
                continue  # a compaction replaced files between listing and opening
        raise LedgerError(f"{self._path}: directory kept changing while being read")

    def _refresh(self) -> None:
        """Bring the in-memory view up to the finalised files on disk, or raise."""
        listing = self._list_final()
        keep, _redundant = _covering(self._path, listing)
        if [n for _, _, n in keep] == list(self._files):
            return
        files, checks = self._scan(rehash=False, listing=listing)
        if any(c.failed for c in checks):
            raise LedgerReport(self._path, self._chip, tuple(checks)).error()
        self._files = files
        self._view = _build_view(self._path, files)

    def verify(self) -> LedgerReport:
        """Check every commit file again (digest and decoding) and say which are good.

        Unlike the readers, this does not raise for damaged commits: it reports each one.

        Returns
        -------
        LedgerReport
            One `CommitCheck` per commit file, quarantined file and missing range.
        """
        _files, checks = self._scan(rehash=True)
        return LedgerReport(self._path, self._chip, tuple(checks))

    # -- reading ----------------------------------------------------------------------------

    def entries(self) -> tuple[LedgerEntry, ...]:
        """Every stored entry (accepted and rejected), in commit order.

        Returns
        -------
        tuple of LedgerEntry
            Sorted by ``(seq, position)``.
        """
        self._refresh()
        return self._view.entries

    def pairs(self) -> list[tuple[str, str]]:
        """Every (aggressor, victim) pair with at least one entry, sorted."""
        self._refresh()
        return sorted(self._view.by_pair)

    def current(self) -> MatrixSnapshot:
        """The current matrix: the latest accepted entry of every pair.

        Returns
        -------
        MatrixSnapshot
            ``.entries`` maps ``(aggressor, victim)`` to entries; ``.to_dataset()`` gives the
            xarray view.
        """
        return self.as_of(math.inf)

    def as_of(self, t_s: float) -> MatrixSnapshot:
        """The matrix as it stood at rig time ``t_s``.

        Parameters
        ----------
        t_s : float
            Rig time, s. Entries with ``measured_at_s <= t_s`` count.

        Returns
        -------
        MatrixSnapshot
            Latest accepted entry per pair among those measured by ``t_s`` (pairs without
            one are absent).
        """
        if isinstance(t_s, bool) or not isinstance(t_s, numbers.Real) or math.isnan(t_s):
            raise LedgerValidationError(
                "Ledger.as_of", "t_s", f"must be a real rig time in s (not NaN), got {t_s!r}"
            )
        t = float(t_s)
        self._refresh()
        view = self._view
        chosen: dict[tuple[str, str], LedgerEntry] = {}
        for pair, history in sorted(view.by_pair.items()):
            for e in reversed(history):
                if e.accepted and e.measured_at_s <= t:
                    chosen[pair] = e
                    break
        return MatrixSnapshot(self._chip, MappingProxyType(chosen), t, view.last_seq)

    def history(self, aggressor: str, victim: str) -> tuple[LedgerEntry, ...]:
        """Every entry of one pair (accepted and rejected) in time order.

        Parameters
        ----------
        aggressor : str
            Drive line name.
        victim : str
            Qubit name.

        Returns
        -------
        tuple of LedgerEntry
            Sorted by ``(measured_at_s, seq, position)``; empty if the pair has none.
        """
        self._refresh()
        return self._view.by_pair.get((aggressor, victim), ())

    def history_dataset(self, aggressor: str, victim: str) -> xr.Dataset:
        """The history of one pair as an ``xarray.Dataset`` along dim ``entry``.

        Parameters
        ----------
        aggressor, victim : str
            The pair, as for `history`.

        Returns
        -------
        xarray.Dataset
            Same variables as `MatrixSnapshot.to_dataset` plus ``verdict``, ``reason``,
            ``rig``, ``software_version``; coords ``entry_id`` and ``measured_at_s`` (s).
            Rejected entries are included (check ``verdict``).
        """
        hist = list(self.history(aggressor, victim))
        table = _entry_table(hist)
        coords = {
            "entry_id": ("entry", table.pop("entry_id"), _VIEW_ATTRS["entry_id"]),
            "measured_at_s": ("entry", table.pop("measured_at_s"), _VIEW_ATTRS["measured_at_s"]),
        }
        data_vars = {k: ("entry", v, _VIEW_ATTRS[k]) for k, v in table.items()}
        return xr.Dataset(
            data_vars,
            coords=coords,
            attrs={"chip": self._chip, "aggressor": aggressor, "victim": victim},
        )

    def sweep_ids(self) -> tuple[str, ...]:
        """Ids of all stored sweeps, in commit order."""
        self._refresh()
        return tuple(self._view.sweeps)

    def sweep(self, sweep_id: str) -> xr.Dataset:
        """Read back a stored raw sweep.

        Parameters
        ----------
        sweep_id : str
            Id given when the sweep was appended.

        Returns
        -------
        xarray.Dataset
            Identical (dims, coords, attrs, dtypes) to the Dataset that was stored.

        Raises
        ------
        KeyError
            If no sweep has that id.
        """
        for _ in range(_MAX_LIST_ATTEMPTS):
            self._refresh()
            if sweep_id not in self._view.sweeps:
                raise KeyError(f"{self._path}: no sweep {sweep_id!r}")
            name, gpath, version = self._view.sweeps[sweep_id]
            ds = _read_stored_sweep(self._path, self._files[name], gpath, version, sweep_id)
            if ds is not None:
                return ds
        raise LedgerError(f"{self._path}: directory kept changing while being read")

    # -- writing ----------------------------------------------------------------------------

    def append(
        self,
        entries: Iterable[LedgerEntry] = (),
        *,
        sweeps: Mapping[str, xr.Dataset] | None = None,
    ) -> CommitReceipt:
        """Append one commit: a batch of entries and optional raw sweeps, all or nothing.

        Parameters
        ----------
        entries : iterable of LedgerEntry
            Estimates to store; ``seq``/``position`` are assigned here (any given are
            replaced).
        sweeps : mapping of str to xarray.Dataset, optional
            Raw sweeps to store, by id. Ids must be new to the ledger. An entry's
            ``sweep_id`` must name a sweep of this batch or one already stored.

        Returns
        -------
        CommitReceipt
            Returned only once the commit is durable and visible to readers.

        Raises
        ------
        LedgerValidationError
            If any entry or sweep is invalid (names the field; nothing is written).
        LedgerError
            If the lock cannot be taken or the file cannot be written.
        """
        batch, sweep_map, plans = _check_batch(entries, sweeps)
        with _writer_lock(self._path, self._lock_timeout_s):
            self._refresh()
            _check_links(batch, sweep_map, self._view.sweeps)
            self._prepare_write()
            seq = _next_seq(self._path, self._view.last_seq)
            stored = tuple(dataclasses.replace(e, seq=seq, position=k) for k, e in enumerate(batch))
            matrix = _matrix_after(self._chip, (*self._view.entries, *stored), seq)
            path = _write_commit(self._path, self._chip, seq, seq, stored, _new_sweeps(plans, seq),
                                 matrix)
            self._refresh()
        return CommitReceipt(seq, path, stored, tuple(sweep_map))

    def compact(self) -> int:
        """Merge all commit files into one, atomically, keeping the whole history.

        Entry ids (``seq``, ``position``) and sweeps are preserved; files from older schema
        versions are rewritten in the current one. Redundant files left by an interrupted
        earlier compaction are removed.

        Returns
        -------
        int
            Number of files merged (0 if there was nothing to merge).
        """
        with _writer_lock(self._path, self._lock_timeout_s):
            self._refresh()
            keep, redundant = _covering(self._path, self._list_final())
            merged = 0
            if len(keep) >= 2:
                files = [self._files[n] for _, _, n in keep]
                self._prepare_write()
                all_entries = [e for cf in files for e in cf.entries]
                fill = _merged_sweeps(self._path, files)
                _write_commit(self._path, self._chip, files[0].first, files[-1].last,
                              all_entries, fill,
                              _matrix_after(self._chip, all_entries, files[-1].last))
                merged = len(files)
                redundant = redundant + keep
            _remove_redundant(self._path, redundant)
            self._refresh()
        return merged

    def _prepare_write(self) -> None:
        """Under the lock, before a commit file is written: clear leftovers of killed writers
        and make sure this ledger keeps digests."""
        _remove_temporaries(self._path)
        self._marker = _raise_marker_version(self._path, _start_digests(self._path, self._marker))


def verify_ledger(path: str | os.PathLike[str]) -> LedgerReport:
    """Check every commit file of a ledger, even one that readers refuse.

    Parameters
    ----------
    path : str or os.PathLike
        The ledger directory.

    Returns
    -------
    LedgerReport
        One line per commit file: OK, unverified (legacy), damaged, missing or quarantined.

    Raises
    ------
    LedgerError
        If the directory is not a ledger (no readable marker).
    """
    led = Ledger.__new__(Ledger)
    led._setup(path, 60.0)
    return led.verify()


def _matrix_after(chip: str, entries: Iterable[LedgerEntry], last_seq: int) -> xr.Dataset:
    """The matrix view of ``entries``: the latest accepted entry of each pair (as `as_of`)."""
    by_pair: dict[tuple[str, str], list[LedgerEntry]] = {}
    for e in entries:
        if e.accepted:
            by_pair.setdefault((e.aggressor, e.victim), []).append(e)
    chosen = {p: max(v, key=_time_key) for p, v in sorted(by_pair.items())}
    return MatrixSnapshot(chip, MappingProxyType(chosen), math.inf, last_seq).to_dataset()
