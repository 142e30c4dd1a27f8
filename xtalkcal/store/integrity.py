"""Judging the commit files of a ledger: which are good, damaged, missing or set aside, and the
report that says so.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from xtalkcal.exceptions import LedgerError
from xtalkcal.store.files import (
    _DIGEST_SUFFIX,
    _QUARANTINE,
    _BadCommit,
    _final_name,
    _list_digests,
    _list_quarantine,
    _Marker,
    _read_digest,
)
from xtalkcal.store.reading import _CommitFile, _load, _Vanished

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


def _judge(
    root: Path,
    chip: str,
    marker: _Marker,
    keep: list[tuple[int, int, str]],
    cached: dict[str, _CommitFile],
) -> tuple[dict[str, _CommitFile], list[CommitCheck]]:
    """Load the commit files ``keep`` lists (those in ``cached`` are taken as read) and judge
    every one, every digest without its file and every gap in the sequence.

    Raises `_Vanished` if a listed file went away meanwhile (the caller lists again).
    """
    files: dict[str, _CommitFile] = {}
    checks: list[CommitCheck] = []
    for first, last, name in keep:
        cf = cached.get(name)
        try:
            cf = cf or _load(root, chip, marker, first, last, name)
        except _BadCommit as bad:
            checks.append(CommitCheck(name, first, last, "bad", bad.problem))
            continue
        files[name] = cf
        status: CommitStatus = "ok" if cf.verified else "unverified"
        checks.append(CommitCheck(name, first, last, status))
    top = max((la for _, la, _ in keep), default=0)
    for (first, last), name in sorted(_list_digests(root).items()):
        if first > top:
            problem = _orphan_digest(root, name)
            if problem:
                checks.append(CommitCheck(
                    _final_name(first, last), first, last, "missing", problem))
    checks += _gaps(root, keep)
    checks.sort(key=lambda c: (c.first, c.last))
    return files, checks


def _orphan_digest(root: Path, name: str) -> str | None:
    """Judge a digest file above every commit: a write in progress or killed before its
    rename (None), or the record of a commit file that has gone (the problem)."""
    digest_path = root / name
    try:
        info = _read_digest(digest_path)
    except FileNotFoundError:
        return None  # a writer cleaned it up
    except _BadCommit as exc:
        return exc.problem
    if (root / info["tmp"]).exists():
        return None  # still being written, or left by a killed writer
    if (root / info["file"]).exists():
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


def _gaps(root: Path, keep: list[tuple[int, int, str]]) -> list[CommitCheck]:
    """Quarantined files, and ranges of sequence numbers no file holds."""
    out = []
    quarantined = _list_quarantine(root)
    for first, last, name in quarantined:
        out.append(CommitCheck(f"{_QUARANTINE}/{name}", first, last, "quarantined"))
    held = sorted([(f, la) for f, la, _ in keep] + [(f, la) for f, la, _ in quarantined])
    digests = _list_digests(root)
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
