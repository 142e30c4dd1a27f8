"""The ledger: an append-only store of crosstalk measurements and their history.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import math
import numbers
import os
import uuid
from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType
from typing import Literal

import filelock
import h5py
import xarray as xr

from xtalkcal.exceptions import LedgerError
from xtalkcal.store.codec import (
    _LIBVER,
    SWEEP_READERS,
    _columns_to_entries,
    _encode_sweep,
    _entries_to_columns,
    _member,
    _migrate,
    _positional,
    _read_columns,
    _write_columns,
    _write_sweep,
)
from xtalkcal.store.entries import (
    SCHEMA_VERSION,
    LedgerEntry,
    LedgerValidationError,
    _attr,
    _check_entry,
    _check_text,
    _Malformed,
    utc_timestamp,
)
from xtalkcal.store.files import (
    _DIGEST_FORMAT,
    _DIGEST_RE,
    _DIGEST_SUFFIX,
    _FINAL_RE,
    _FORMAT,
    _LOCK_NAME,
    _MARKER_NAME,
    _MAX_LIST_ATTEMPTS,
    _QUARANTINE,
    _TMP_PREFIX,
    _atomic_write_bytes,
    _BadCommit,
    _check_digest,
    _CommitFile,
    _digest_name,
    _final_name,
    _fsync_dir,
    _fsync_file,
    _hash_file,
    _read_digest,
    _read_marker,
    _stamp,
    _time_key,
    _Vanished,
    _View,
    _write_marker,
    _writer_lock,
)
from xtalkcal.store.snapshots import _VIEW_ATTRS, MatrixSnapshot, _entry_table


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


CommitStatus = Literal["ok", "unverified", "bad", "missing", "quarantined"]


@dataclass(frozen=True)
class CommitCheck:
    """The state of one commit file (or of a range of commits no file holds).

    Parameters
    ----------
    file : str
        Name of the commit file inside the ledger directory (for ``"missing"``: the name a
        file holding the range would have).
    first, last : int
        Range of commit sequence numbers.
    status : {"ok", "unverified", "bad", "missing", "quarantined"}
        ``ok``: digest matches and the content decodes. ``unverified``: decodes, but was
        written before digests existed. ``bad``: damaged (see ``problem``). ``missing``: no
        file holds these commits. ``quarantined``: set aside in ``quarantine/``.
    problem : str
        What is wrong (``""`` unless bad or missing).
    """

    file: str
    first: int
    last: int
    status: CommitStatus
    problem: str = ""

    @property
    def failed(self) -> bool:
        """True for a damaged or missing commit (readers refuse the ledger)."""
        return self.status in ("bad", "missing")

    def line(self, root: Path) -> str:
        """One line for people, naming the file."""
        seqs = f"commit {self.first}" if self.first == self.last else (
            f"commits {self.first}..{self.last}")
        text = {"ok": "OK (SHA-256 verified)",
                "unverified": "OK, unverified (written before commit digests existed)",
                "quarantined": "set aside in quarantine (not part of the history)"}
        return f"{root / self.file}: {seqs}: {text.get(self.status) or self.problem}"


@dataclass(frozen=True)
class LedgerReport:
    """What `Ledger.verify` found: one `CommitCheck` per commit file, in sequence order.

    Parameters
    ----------
    path : pathlib.Path
        The ledger directory.
    chip : str
        Chip the ledger belongs to.
    commits : tuple of CommitCheck
        Every commit file read, every quarantined file and every missing range.
    """

    path: Path
    chip: str
    commits: tuple[CommitCheck, ...]

    @property
    def failed(self) -> tuple[CommitCheck, ...]:
        """The damaged and missing commits."""
        return tuple(c for c in self.commits if c.failed)

    @property
    def ok(self) -> bool:
        """True when every commit can be read (unverified legacy files included)."""
        return not self.failed

    def lines(self) -> list[str]:
        """One line per commit file, then a summary line."""
        out = [c.line(self.path) for c in self.commits]
        n_ok = sum(c.status in ("ok", "unverified") for c in self.commits)
        out.append(f"{self.path}: ledger of chip {self.chip!r}: {n_ok} commit files readable, "
                   f"{len(self.failed)} damaged or missing")
        return out

    def error(self) -> LedgerError:
        """The one-line error every reader raises for this state (call only if not ok)."""
        bad = self.failed
        listed = "; ".join(f"{c.file}: {c.problem}" for c in bad)
        files = "s" if len(bad) > 1 else ""
        return LedgerError(
            f"{self.path}: {len(bad)} damaged or missing commit{files}, nothing was read: "
            f"{listed}. The other {len(self.commits) - len(bad)} commit files are intact; "
            f"to read them, move each damaged file with its {_DIGEST_SUFFIX} file into "
            f"{self.path / _QUARANTINE}/ (xtalkcal.store.quarantine_commit), which removes "
            f"its entries from the history; `xtalkcal check {self.path}` lists every commit"
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
        self._lock = filelock.FileLock(str(self._path / _LOCK_NAME), timeout=lock_timeout_s)
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
            else:
                foreign = sorted(
                    n for n in os.listdir(root) if n != _LOCK_NAME and not n.startswith(_TMP_PREFIX)
                )
                if foreign:
                    raise LedgerError(
                        f"{root}: directory is not empty and not a ledger ({foreign[:3]}...)"
                    )
                info = {
                    "format": _FORMAT,
                    "schema_version": SCHEMA_VERSION,
                    "chip": chip,
                    "created_utc": utc_timestamp(),
                    "integrity": {"digest": "sha256", "legacy_files": []},
                }
                _write_marker(root, info)
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

    # -- reading ----------------------------------------------------------------------------

    def _list_final(self) -> list[tuple[int, int, str]]:
        found = []
        with os.scandir(self._path) as it:
            for item in it:
                m = _FINAL_RE.match(item.name)
                if m:
                    found.append((int(m.group(1)), int(m.group(2)), item.name))
        return found

    def _covering(self, listing: list[tuple[int, int, str]]) -> tuple[list, list]:
        """Split a listing into the files to read and the redundant ones they contain."""
        keep, redundant = [], []
        reach = 0
        for first, last, name in sorted(listing, key=lambda t: (t[0], -t[1])):
            if first > last:
                raise LedgerError(f"{self._path / name}: malformed sequence range")
            if first > reach:
                keep.append((first, last, name))
                reach = last
            elif last <= reach:
                redundant.append((first, last, name))
            else:
                raise LedgerError(
                    f"{self._path}: commit files overlap without nesting ({name}); "
                    "the ledger was modified by something other than xtalkcal"
                )
        return keep, redundant

    def _list_digests(self) -> dict[tuple[int, int], str]:
        found = {}
        with os.scandir(self._path) as it:
            for item in it:
                m = _DIGEST_RE.match(item.name)
                if m:
                    found[(int(m.group(1)), int(m.group(2)))] = item.name
        return found

    def _list_quarantine(self) -> list[tuple[int, int, str]]:
        qdir = self._path / _QUARANTINE
        if not qdir.is_dir():
            return []
        return sorted(
            (int(m.group(1)), int(m.group(2)), m.group(0))
            for m in map(_FINAL_RE.match, os.listdir(qdir))
            if m
        )

    def _load(self, first: int, last: int, name: str) -> _CommitFile:
        """Check one commit file's digest and decode it.

        Raises `_Vanished` if it was removed meanwhile (compaction) and `_BadCommit` for
        anything else that is wrong with it, so that each file is judged on its own.
        """
        path = self._path / name
        digest_path = self._path / _digest_name(first, last)
        try:
            stamp = _stamp(path)
            try:
                digest = _read_digest(digest_path)
            except FileNotFoundError:
                digest = None
            if digest is None:
                if not path.exists():
                    raise _Vanished(name)  # compaction deletes the commit file first
                legacy = self._marker.legacy_files
                if legacy is not None and name not in legacy:
                    raise _BadCommit(
                        f"its digest file {digest_path.name} is missing (every commit "
                        "written since digests exist has one)"
                    )
            else:
                _check_digest(path, digest)
            with h5py.File(path, "r", locking=False) as fh:
                version, entries, sweeps = self._decode(fh, first, last)
        except FileNotFoundError as exc:
            raise _Vanished(name) from exc
        except (_BadCommit, _Vanished):
            raise
        except LedgerError as exc:
            raise _BadCommit(str(exc).replace(f"{path}: ", "")) from exc
        except _Malformed as exc:
            raise _BadCommit(f"not a well-formed commit: {exc}") from exc
        except (OSError, KeyError, ValueError, TypeError, IndexError, AttributeError,
                RecursionError) as exc:
            # h5py reports damaged files, missing members and wrong types this way.
            raise _BadCommit(
                f"cannot be decoded as a ledger commit ({type(exc).__name__}: {exc})"
            ) from exc
        return _CommitFile(
            name, first, last, version, tuple(entries), tuple(sweeps), digest is not None, stamp
        )

    def _decode(
        self, fh: h5py.File, first: int, last: int
    ) -> tuple[int, list[LedgerEntry], list[tuple[str, str]]]:
        """(schema version, entries, sweeps) of an open commit file; `_Malformed` if its
        structure is not the one written here."""
        if fh.attrs.get("format") != _FORMAT:
            raise _Malformed("not an xtalkcal ledger commit file (format attribute)")
        version = _attr(fh, "schema_version", int, "/")
        if version > SCHEMA_VERSION:
            raise _Malformed(
                f"schema_version {version} is newer than this xtalkcal reads "
                f"({SCHEMA_VERSION}); upgrade xtalkcal"
            )
        if version < 1:
            raise _Malformed(f"schema_version must be >= 1, got {version}")
        chip = _attr(fh, "chip", str, "/")
        if chip != self._chip:
            raise _Malformed(
                f"belongs to chip {chip!r}, but the ledger marker {_MARKER_NAME} says "
                f"{self._chip!r}"
            )
        if (_attr(fh, "seq_first", int, "/"), _attr(fh, "seq_last", int, "/")) != (first, last):
            raise _Malformed("the sequence range in the file disagrees with its name")
        entries = _columns_to_entries(_migrate(_read_columns(fh), version, "entries"))
        for e in entries:
            if not first <= e.seq <= last:
                raise _Malformed(f"entry seq {e.seq} outside {first}..{last}")
        if len({(e.seq, e.position) for e in entries}) != len(entries):
            raise _Malformed("two entries share a (seq, position)")
        entries.sort(key=lambda e: (e.seq, e.position))
        sweeps = []
        for g in _positional(_member(fh, "sweeps", h5py.Group, "/")):
            if not isinstance(g, h5py.Group):
                raise _Malformed(f"{g.name}: a sweep must be an HDF5 group")
            sid = _attr(g, "sweep_id", str, g.name)
            if not first <= _attr(g, "seq", int, g.name) <= last:
                raise _Malformed(f"{g.name}: sweep seq outside {first}..{last}")
            for member in ("variables", "attrs"):
                _member(g, member, h5py.Group, g.name + "/")
            sweeps.append((sid, g.name))
        if len({sid for sid, _ in sweeps}) != len(sweeps):
            raise _Malformed("a sweep id is stored twice")
        return version, entries, sweeps

    def _orphan_digest(self, first: int, last: int, name: str) -> str | None:
        """Judge a digest file above every commit: a write in progress or killed before its
        rename (None), or the record of a commit file that has gone (the problem)."""
        digest_path = self._path / name
        try:
            info = _read_digest(digest_path)
        except FileNotFoundError:
            return None  # a writer cleaned it up
        except _BadCommit as exc:
            return exc.problem
        if (self._path / info["tmp"]).exists():
            return None  # still being written, or left by a killed writer
        if (self._path / info["file"]).exists():
            raise _Vanished(name)  # renamed in since the listing: list again
        try:
            again = _read_digest(digest_path)
        except FileNotFoundError:
            return None
        if again != info:
            raise _Vanished(name)  # a new writer took the number: list again
        return (
            f"its digest file {name} is there, but the commit file {info['file']} is not "
            "(deleted or moved)"
        )

    def _scan(
        self, *, rehash: bool, listing: list[tuple[int, int, str]] | None = None
    ) -> tuple[dict[str, _CommitFile], list[CommitCheck]]:
        """Load every commit file still needed (all with ``rehash``) and judge each one."""
        for _ in range(_MAX_LIST_ATTEMPTS):
            self._marker = _read_marker(self._path)  # legacy ledgers switch on first write
            keep, _redundant = self._covering(listing or self._list_final())
            listing = None
            files: dict[str, _CommitFile] = {}
            checks: list[CommitCheck] = []
            try:
                for first, last, name in keep:
                    cf = None if rehash else self._files.get(name)
                    try:
                        cf = cf or self._load(first, last, name)
                    except _BadCommit as bad:
                        checks.append(CommitCheck(name, first, last, "bad", bad.problem))
                        continue
                    files[name] = cf
                    status: CommitStatus = "ok" if cf.verified else "unverified"
                    checks.append(CommitCheck(name, first, last, status))
                top = max((la for _, la, _ in keep), default=0)
                for (first, last), name in sorted(self._list_digests().items()):
                    if first > top:
                        problem = self._orphan_digest(first, last, name)
                        if problem:
                            checks.append(CommitCheck(
                                _final_name(first, last), first, last, "missing", problem))
            except _Vanished:
                continue  # a compaction replaced files between listing and opening
            checks += self._gaps(keep)
            checks.sort(key=lambda c: (c.first, c.last))
            return files, checks
        raise LedgerError(f"{self._path}: directory kept changing while being read")

    def _gaps(self, keep: list[tuple[int, int, str]]) -> list[CommitCheck]:
        """Quarantined files, and ranges of sequence numbers no file holds."""
        out = []
        quarantined = self._list_quarantine()
        for first, last, name in quarantined:
            out.append(CommitCheck(f"{_QUARANTINE}/{name}", first, last, "quarantined"))
        held = sorted([(f, la) for f, la, _ in keep] + [(f, la) for f, la, _ in quarantined])
        digests = self._list_digests()
        expected = 1
        for first, last in held:
            if first > expected:
                a, b = expected, first - 1
                name = _final_name(a, b)
                seqs = f"commit {a}" if a == b else f"commits {a}..{b}"
                problem = f"{seqs} missing: no file holds them (deleted or moved)"
                if (a, b) in digests:
                    problem += f"; its digest file {digests[(a, b)]} is still there"
                out.append(CommitCheck(name, a, b, "missing", problem))
            expected = max(expected, last + 1)
        return out

    def _refresh(self) -> None:
        """Bring the in-memory view up to the finalised files on disk, or raise."""
        listing = self._list_final()
        keep, _redundant = self._covering(listing)
        if [n for _, _, n in keep] == list(self._files):
            return
        files, checks = self._scan(rehash=False, listing=listing)
        if any(c.failed for c in checks):
            raise LedgerReport(self._path, self._chip, tuple(checks)).error()
        self._files = files
        self._view = self._build_view(files)

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

    def _build_view(self, files: Mapping[str, _CommitFile]) -> _View:
        entries: list[LedgerEntry] = []
        sweeps: dict[str, tuple[str, str, int]] = {}
        for cf in files.values():
            entries.extend(cf.entries)
            for sid, gpath in cf.sweeps:
                if sid in sweeps:
                    raise LedgerError(f"{self._path}: sweep id {sid!r} stored twice")
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
        aggressor : str
            Drive line name.
        victim : str
            Qubit name.

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
            path = self._path / name
            try:
                self._recheck(self._files[name])
                fh = h5py.File(path, "r", locking=False)
            except LedgerError:
                raise
            except OSError as exc:
                if not path.exists():
                    continue  # compacted away after the listing; list again
                raise LedgerError(f"{path}: cannot be read ({exc})") from exc
            try:
                with fh:
                    return SWEEP_READERS[version](fh[gpath])
            except (OSError, KeyError, ValueError, TypeError, IndexError, AttributeError,
                    RecursionError) as exc:
                # HDF5 reports a Fletcher-32 mismatch as a failed filter (the only filter
                # this code writes).
                why = ("a data checksum (Fletcher-32) failed: the file changed after it was "
                       "written" if "filter returned failure" in str(exc)
                       else f"{type(exc).__name__}: {exc}")
                raise LedgerError(
                    f"{path}: sweep {sweep_id!r} cannot be decoded ({why}); "
                    f"`xtalkcal check {self._path}` checks every commit"
                ) from exc
        raise LedgerError(f"{self._path}: directory kept changing while being read")

    def _recheck(self, cf: _CommitFile) -> None:
        """Check a commit file's digest again if the file changed since it was checked.

        Sweeps are read from disk long after the ledger was opened; a rewritten or replaced
        file is seen by its size, time or inode (rot in place leaves those, and is caught by
        the Fletcher-32 checksums of the data).
        """
        path = self._path / cf.name
        if _stamp(path) == cf.stamp:
            return
        first, last = cf.first, cf.last
        try:
            _check_digest(path, _read_digest(self._path / _digest_name(first, last)))
        except FileNotFoundError:
            if not path.exists():
                raise
            raise LedgerError(
                f"{path}: changed since it was read, and its digest file is missing"
            ) from None
        except _BadCommit as exc:
            raise LedgerError(f"{path}: {exc.problem}") from None

    # -- writing ----------------------------------------------------------------------------

    @contextlib.contextmanager
    def _locked(self) -> Iterator[None]:
        try:
            self._lock.acquire()
        except filelock.Timeout as exc:
            raise LedgerError(
                f"{self._path}: another writer holds the lock for more than "
                f"{self._lock_timeout_s} s"
            ) from exc
        try:
            yield
        finally:
            self._lock.release()

    def _remove_temporaries(self) -> None:
        # Called under the lock, after a refresh that found every commit: no live writer
        # owns a temporary file now, and a digest file without its commit file is the
        # leftover of a killed writer (above every commit) or of a compaction (inside a
        # kept range). Digests go first, so that a crash here never leaves a digest file
        # whose temporary file has gone (which would read as a deleted commit).
        kept = [(f, la) for f, la, _ in self._covering(self._list_final())[0]]
        top = max((la for _, la in kept), default=0)
        for (first, last), name in self._list_digests().items():
            if (self._path / _final_name(first, last)).exists():
                continue
            if first > top:
                try:
                    orphan = _read_digest(self._path / name)
                except _BadCommit as exc:
                    raise LedgerError(f"{self._path / name}: {exc.problem}") from None
                if not (self._path / orphan["tmp"]).exists():
                    # Not a killed writer's: the commit file it describes has gone.
                    raise LedgerError(
                        f"{self._path / orphan['file']}: missing, but its digest file {name} "
                        "is there (deleted or moved); nothing was written"
                    )
            elif not any(f <= first and last <= la for f, la in kept):
                raise LedgerError(f"{self._path / _final_name(first, last)}: missing, but its "
                                  f"digest file {name} is there; nothing was written")
            with contextlib.suppress(FileNotFoundError):
                os.unlink(self._path / name)
        with os.scandir(self._path) as it:
            stale = [item.path for item in it if item.name.startswith(_TMP_PREFIX)]
        for p in stale:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(p)

    def _start_digests(self) -> None:
        """On a ledger from before digests (under the lock): record its files as legacy, so
        that from now on a commit file without a digest is an error."""
        if self._marker.legacy_files is not None:
            return
        keep, _ = self._covering(self._list_final())
        info = {
            **self._marker.info,
            "integrity": {"digest": "sha256", "legacy_files": [n for _, _, n in keep]},
        }
        _write_marker(self._path, info)
        self._marker = _read_marker(self._path)

    def _write_commit(
        self,
        first: int,
        last: int,
        entries: Iterable[LedgerEntry],
        fill_sweeps: Callable[[h5py.Group], None],
    ) -> Path:
        """Write one immutable commit file: temp name, fsync, atomic rename, fsync dir."""
        final = self._path / _final_name(first, last)
        if final.exists():
            raise LedgerError(f"{final}: already exists; refusing to overwrite a commit")
        tmp = self._path / f"{_TMP_PREFIX}{os.getpid()}-{uuid.uuid4().hex}.h5"
        digest = self._path / _digest_name(first, last)
        renamed = False
        try:
            with h5py.File(tmp, "w", libver=_LIBVER) as fh:
                fh.attrs["format"] = _FORMAT
                fh.attrs["schema_version"] = SCHEMA_VERSION
                fh.attrs["chip"] = self._chip
                fh.attrs["seq_first"] = first
                fh.attrs["seq_last"] = last
                fh.attrs["written_utc"] = utc_timestamp()
                _write_columns(fh, _entries_to_columns(entries))
                fill_sweeps(fh.create_group("sweeps"))
            _fsync_file(tmp)
            size, sha = _hash_file(tmp)
            record = {"format": _DIGEST_FORMAT, "file": final.name, "tmp": tmp.name,
                      "size": size, "sha256": sha}
            # Durable before the rename: a visible commit always has its digest.
            _atomic_write_bytes(self._path, digest.name, json.dumps(record, indent=1).encode())
            os.replace(tmp, final)
            renamed = True
        finally:
            if not renamed:
                for leftover in (digest, tmp):
                    with contextlib.suppress(FileNotFoundError):
                        leftover.unlink()
        _fsync_dir(self._path)
        return final

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
        batch = list(entries)
        sweep_map = dict(sweeps or {})
        if not batch and not sweep_map:
            raise LedgerValidationError(
                "Ledger.append", "entries", "nothing to commit (no entries, no sweeps)"
            )
        for k, e in enumerate(batch):
            _check_entry(e, f"entry[{k}]")
        plans = [_encode_sweep(sid, ds) for sid, ds in sweep_map.items()]
        with self._locked():
            self._refresh()
            known = self._view.sweeps
            for sid in sweep_map:
                if sid in known:
                    raise LedgerValidationError(
                        f"sweep {sid!r}", "sweep_id", "already stored; sweep ids are unique"
                    )
            for k, e in enumerate(batch):
                if e.sweep_id and e.sweep_id not in known and e.sweep_id not in sweep_map:
                    raise LedgerValidationError(
                        f"entry[{k}] ({e.aggressor!r} -> {e.victim!r})",
                        "sweep_id",
                        f"{e.sweep_id!r} is neither in this batch nor stored",
                    )
            self._remove_temporaries()
            self._start_digests()
            # Numbers of quarantined commits are never given again (they may come back).
            seq = max([self._view.last_seq, *(la for _, la, _ in self._list_quarantine())]) + 1
            stored = tuple(dataclasses.replace(e, seq=seq, position=k) for k, e in enumerate(batch))

            def fill(group: h5py.Group) -> None:
                for k, plan in enumerate(plans):
                    _write_sweep(group.create_group(str(k)), plan, seq)

            path = self._write_commit(seq, seq, stored, fill)
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
        with self._locked():
            self._refresh()
            keep, redundant = self._covering(self._list_final())
            merged = 0
            if len(keep) >= 2:
                files = [self._files[n] for _, _, n in keep]

                def fill(group: h5py.Group) -> None:
                    k = 0
                    for cf in files:
                        with h5py.File(self._path / cf.name, "r", locking=False) as src:
                            for sid, gpath in cf.sweeps:
                                if cf.schema_version == SCHEMA_VERSION:
                                    src.copy(src[gpath], group, name=str(k))
                                else:
                                    seq = int(src[gpath].attrs["seq"])
                                    ds = SWEEP_READERS[cf.schema_version](src[gpath])
                                    _write_sweep(
                                        group.create_group(str(k)), _encode_sweep(sid, ds), seq
                                    )
                                k += 1

                self._remove_temporaries()
                self._start_digests()
                all_entries = [e for cf in files for e in cf.entries]
                self._write_commit(files[0].first, files[-1].last, all_entries, fill)
                merged = len(files)
                redundant = redundant + keep
            for first, last, name in redundant:
                # The commit file before its digest (readers rely on that order).
                for gone in (name, _digest_name(first, last)):
                    with contextlib.suppress(FileNotFoundError):
                        os.unlink(self._path / gone)
            if redundant:
                _fsync_dir(self._path)
            self._refresh()
        return merged


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
