"""Commit files on disk: names and listings, atomic writes, fsyncs, the writer lock, markers and
SHA-256 digests.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import re
import uuid
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType
from typing import Any

import filelock

import xtalkcal.store.schema as schema
from xtalkcal.exceptions import LedgerError

_FORMAT = "xtalkcal-ledger"
_MARKER_NAME = "xtalkcal-ledger.json"
_LOCK_NAME = "ledger.lock"
_TMP_PREFIX = ".tmp-"
_FINAL_RE = re.compile(r"^(\d{10,})-(\d{10,})\.h5$")
_DIGEST_SUFFIX = ".sha256.json"
_DIGEST_RE = re.compile(r"^(\d{10,})-(\d{10,})\.sha256\.json$")
_DIGEST_FORMAT = "xtalkcal-commit-digest"
_QUARANTINE = "quarantine"
_HASH_BLOCK = 1 << 20  # bytes read at a time while hashing
# How often a reader re-lists the directory when files vanish under it (compaction).
_MAX_LIST_ATTEMPTS = 20


def _stamp(path: Path) -> tuple[int, int, int]:
    st = os.stat(path)
    return (st.st_size, st.st_mtime_ns, st.st_ino)


class _BadCommit(Exception):
    """One commit file is damaged; ``problem`` says how (without the file name)."""

    def __init__(self, problem: str) -> None:
        self.problem = problem
        super().__init__(problem)


def _final_name(first: int, last: int) -> str:
    return f"{first:010d}-{last:010d}.h5"


def _temporary(directory: Path, suffix: str) -> Path:
    """A fresh temporary file name in ``directory``, unique across processes."""
    return directory / f"{_TMP_PREFIX}{os.getpid()}-{uuid.uuid4().hex}{suffix}"


def _numbered(directory: Path, pattern: re.Pattern[str]) -> list[tuple[int, int, str]]:
    """(first, last, name) of every file in ``directory`` whose name matches ``pattern``."""
    found = []
    with os.scandir(directory) as it:
        for item in it:
            m = pattern.match(item.name)
            if m:
                found.append((int(m.group(1)), int(m.group(2)), item.name))
    return found


def _list_final(root: Path) -> list[tuple[int, int, str]]:
    """The finalised commit files of a ledger, unsorted."""
    return _numbered(root, _FINAL_RE)


def _list_digests(root: Path) -> dict[tuple[int, int], str]:
    """The digest files of a ledger, by sequence range."""
    return {(first, last): name for first, last, name in _numbered(root, _DIGEST_RE)}


def _list_quarantine(root: Path) -> list[tuple[int, int, str]]:
    """The commit files set aside in ``quarantine/``, sorted."""
    qdir = root / _QUARANTINE
    if not qdir.is_dir():
        return []
    return sorted(_numbered(qdir, _FINAL_RE))


def _covering(
    root: Path, listing: list[tuple[int, int, str]]
) -> tuple[list[tuple[int, int, str]], list[tuple[int, int, str]]]:
    """Split a listing into the files to read and the redundant ones they contain."""
    keep, redundant = [], []
    reach = 0
    for first, last, name in sorted(listing, key=lambda t: (t[0], -t[1])):
        if first > last:
            raise LedgerError(f"{root / name}: malformed sequence range")
        if first > reach:
            keep.append((first, last, name))
            reach = last
        elif last <= reach:
            redundant.append((first, last, name))
        else:
            raise LedgerError(
                f"{root}: commit files overlap without nesting ({name}); "
                "the ledger was modified by something other than xtalkcal"
            )
    return keep, redundant


def _fsync_opened(path: Path, flags: int) -> None:
    fd = os.open(path, flags)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_dir(path: Path) -> None:
    if os.name == "nt":  # Windows cannot open directories; NTFS renames are journaled
        return
    _fsync_opened(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))


def _fsync_file(path: Path) -> None:
    _fsync_opened(path, os.O_RDWR)


def _atomic_write_bytes(directory: Path, name: str, payload: bytes) -> None:
    tmp = _temporary(directory, ".json")
    try:
        with open(tmp, "wb") as fh:
            fh.write(payload)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, directory / name)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _fsync_dir(directory)


@dataclass(frozen=True)
class _Marker:
    """The ledger marker: chip, and which commit files may lack a digest."""

    chip: str
    info: Mapping[str, Any]
    legacy_files: frozenset[str] | None  # None: a ledger from before digests existed


def version_key(attrs: Any) -> str:
    """The name of the version field of a marker or commit file: ``version`` (the one naming
    of every file kind), ``schema_version`` in files written before."""
    return "schema_version" if "version" not in attrs and "schema_version" in attrs \
        else "version"


def _read_marker(path: Path) -> _Marker:
    marker = path / _MARKER_NAME
    if not marker.is_file():
        raise LedgerError(
            f"{path}: not a ledger (no {_MARKER_NAME}); create one with "
            "Ledger.create(path, chip=...)"
        )
    try:
        info = json.loads(marker.read_text(encoding="utf-8"))
    except (OSError, ValueError, RecursionError) as exc:
        raise LedgerError(f"{marker}: unreadable ledger marker ({exc})") from exc
    if not isinstance(info, dict) or info.get("format") != _FORMAT:
        raise LedgerError(f"{marker}: not an xtalkcal ledger marker (format field)")
    key = version_key(info)
    version = info.get(key)
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        raise LedgerError(f"{marker}: {key} must be a positive integer, got {version!r}")
    if version > schema.SCHEMA_VERSION:
        raise LedgerError(
            f"{marker}: ledger has {key} {version}, this xtalkcal reads up to "
            f"{schema.SCHEMA_VERSION}; upgrade xtalkcal to open it"
        )
    chip = info.get("chip")
    if not isinstance(chip, str) or not chip:
        raise LedgerError(f"{marker}: chip must be a non-empty string")
    legacy = None
    if "integrity" in info:
        integ = info["integrity"]
        names = integ.get("legacy_files") if isinstance(integ, dict) else None
        if (
            not isinstance(integ, dict)
            or integ.get("digest") != "sha256"
            or not isinstance(names, list)
            or not all(isinstance(n, str) and _FINAL_RE.match(n) for n in names)
        ):
            raise LedgerError(
                f"{marker}: integrity: expected {{\"digest\": \"sha256\", \"legacy_files\": "
                f"[commit file names]}}, got {integ!r}"
            )
        legacy = frozenset(names)
    return _Marker(chip, MappingProxyType(info), legacy)


def _write_marker(root: Path, info: Mapping[str, Any]) -> None:
    payload = json.dumps(dict(info), ensure_ascii=False, indent=1).encode()
    _atomic_write_bytes(root, _MARKER_NAME, payload)


def _digest_name(first: int, last: int) -> str:
    return f"{first:010d}-{last:010d}{_DIGEST_SUFFIX}"


def _hash_file(path: Path) -> tuple[int, str]:
    """(size in bytes, SHA-256 hex digest) of a file, read in blocks."""
    h = hashlib.sha256()
    size = 0
    with open(path, "rb") as fh:
        while block := fh.read(_HASH_BLOCK):
            h.update(block)
            size += len(block)
    return size, h.hexdigest()


def _read_digest(path: Path) -> dict[str, Any]:
    """A digest file's fields; raises `_BadCommit` if it is not one, OSError if unreadable."""
    raw = path.read_bytes()
    try:
        info = json.loads(raw.decode("utf-8"))
    except (ValueError, RecursionError) as exc:
        raise _BadCommit(f"its digest file {path.name} is not valid JSON ({exc})") from None
    ok = (
        isinstance(info, dict)
        and info.get("format") == _DIGEST_FORMAT
        and isinstance(info.get("file"), str)
        and isinstance(info.get("tmp"), str)
        and isinstance(info.get("size"), int)
        and isinstance(info.get("sha256"), str)
        and re.fullmatch(r"[0-9a-f]{64}", info["sha256"]) is not None
    )
    if not ok:
        raise _BadCommit(
            f"its digest file {path.name} lacks the fields of {_DIGEST_FORMAT!r} "
            "(format, file, tmp, size, sha256)"
        )
    return info


def _check_digest(commit: Path, info: Mapping[str, Any]) -> None:
    """Raise `_BadCommit` unless ``commit`` has the size and SHA-256 its digest file says."""
    if info["file"] != commit.name:
        raise _BadCommit(f"its digest file names another file, {info['file']!r}")
    size, sha = _hash_file(commit)
    if size != info["size"]:
        raise _BadCommit(
            f"{size} bytes, but {info['size']} were written (truncated or extended)"
        )
    if sha != info["sha256"]:
        raise _BadCommit(
            "SHA-256 mismatch: the file changed after it was written (bit rot, a bad disk "
            "or an edit)"
        )


@contextlib.contextmanager
def _writer_lock(root: Path, timeout_s: float) -> Iterator[None]:
    """Hold the ledger's exclusive writer lock (LedgerError if it stays busy)."""
    lock = filelock.FileLock(str(root / _LOCK_NAME), timeout=timeout_s)
    try:
        lock.acquire()
    except filelock.Timeout as exc:
        raise LedgerError(
            f"{root}: another writer holds the lock for more than {timeout_s} s") from exc
    try:
        yield
    finally:
        lock.release()
