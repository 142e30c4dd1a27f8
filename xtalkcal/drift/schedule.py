"""The schedule file: when each pair is next due, kept across runs of ``xtalkcal due``.
"""

from __future__ import annotations

import contextlib
import dataclasses
import enum
import json
import os
import uuid
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from xtalkcal.common import (
    RECHECK_INTERVAL_RANGE_H,
    RIG_TIME_RANGE_S,
    load_json,
    name_problem,
    parse_json,
    short_repr,
)
from xtalkcal.exceptions import ConfigError

if TYPE_CHECKING:
    from xtalkcal.hardware import Chip
    from xtalkcal.measure import RecheckSettings
from xtalkcal.drift.inputs import _SECONDS_PER_HOUR, DriftInputError, _finite_real
from xtalkcal.drift.outcome import FollowUp, RecheckDecision, RecheckOutcome
from xtalkcal.drift.policy import NextCheck, _interval_limits, next_check
from xtalkcal.drift.trends import PairTrend


class ScheduleFileError(ConfigError):
    """A schedule file or record is malformed: names the file, the field and what is accepted.

    A :class:`~xtalkcal.exceptions.ConfigError` (``source``, ``field``, ``problem``).
    """


# --------------------------------------------------------------------------------------------
# Schedule
# --------------------------------------------------------------------------------------------

SCHEDULE_FORMAT = "xtalkcal-schedule"
SCHEDULE_SCHEMA_VERSION = 2  # 2: set_aside added (version 1 files are read)
_NOTE_MAX = 2000  # characters of a note or a set-aside reason

Pair = tuple[str, str]


@dataclass(frozen=True)
class PairSlot:
    """Schedule state of one (aggressor, victim) pair.

    Attributes
    ----------
    aggressor, victim : str
    interval_h : float
        Current re-check interval, h.
    due_s : float
        Rig time at which the next re-check is due, s.
    last_checked_s : float or None
        Rig time of the last recorded re-check, s.
    last_decision : RecheckDecision or None
    follow_up : FollowUp
        Work pending before the next re-check.
    note : str
        Why the interval was chosen.
    set_aside : str
        Why the pair is no longer re-checked ("" while it is): its stored compensation
        cannot be played within the victim line's limits, so re-checking it would fail the
        same way on every run. A fresh calibration of the pair (:meth:`Schedule.calibrated`)
        takes it back.
    set_aside_entry_s : float or None
        ``measured_at_s`` of the stored entry that was set aside: once the pair's current
        ledger entry is another one (a new calibration), it is scheduled again.
    """

    aggressor: str
    victim: str
    interval_h: float
    due_s: float
    last_checked_s: float | None = None
    last_decision: RecheckDecision | None = None
    follow_up: FollowUp = FollowUp.NONE
    note: str = ""
    set_aside: str = ""
    set_aside_entry_s: float | None = None

    @property
    def pair(self) -> Pair:
        return (self.aggressor, self.victim)

    def to_dict(self) -> dict[str, Any]:
        return {
            "aggressor": self.aggressor,
            "victim": self.victim,
            "interval_hours": self.interval_h,
            "due_s": self.due_s,
            "last_checked_s": self.last_checked_s,
            "last_decision": None if self.last_decision is None else self.last_decision.value,
            "follow_up": self.follow_up.value,
            "note": self.note,
            "set_aside": self.set_aside,
            "set_aside_entry_s": self.set_aside_entry_s,
        }


def _slot_from_dict(d: object, source: str, where: str) -> PairSlot:
    """One entry of ``pairs``; every value checked against its physical range."""
    if not isinstance(d, Mapping):
        raise ScheduleFileError(source, where, f"expected an object, got {type(d).__name__}")
    known = {
        "aggressor", "victim", "interval_hours", "due_s", "last_checked_s", "last_decision",
        "follow_up", "note", "set_aside", "set_aside_entry_s",
    }
    extra = sorted(set(d) - known)
    if extra:
        raise ScheduleFileError(source, where, f"unknown field(s) {_names(extra)}; "
                                               f"accepted: {', '.join(sorted(known))}")

    def bad(key: str, problem: str) -> ScheduleFileError:
        return ScheduleFileError(source, f"{where}.{key}", problem)

    def name(key: str) -> str:
        v = d.get(key)
        problem = name_problem(v)
        if problem is not None:
            raise bad(key, problem)
        return v  # type: ignore[return-value]

    def text(key: str) -> str:
        v = d.get(key, "")
        if not isinstance(v, str) or len(v) > _NOTE_MAX:
            raise bad(key, f"expected a string of at most {_NOTE_MAX} characters, got "
                           f"{type(v).__name__}" + (f" of {len(v)}" if isinstance(v, str) else ""))
        return v

    def number(key: str, lo: float, hi: float, unit: str, *, optional: bool = False
               ) -> float | None:
        v = d.get(key)
        if v is None and optional:
            return None
        accepted = f"accepted: {lo:g} ≤ x ≤ {hi:g} {unit}"
        if isinstance(v, bool) or not isinstance(v, int | float):
            raise bad(key, f"expected a number, got {type(v).__name__}; {accepted}")
        if not lo <= v <= hi:  # NaN and ±inf fail too; int-float comparisons are exact
            shown = f"{v:g}" if isinstance(v, float) else short_repr(v)
            raise bad(key, f"{shown} is out of range; {accepted}")
        return float(v)

    def choice(key: str, enum_type: type[enum.Enum], *, optional: bool) -> Any:
        v = d.get(key)
        if v is None and optional:
            return None
        try:
            return enum_type(v)
        except (ValueError, TypeError):
            raise bad(key, f"{short_repr(v)} is not one of "
                           f"{', '.join(repr(m.value) for m in enum_type)}") from None

    t_lo, t_hi = RIG_TIME_RANGE_S
    interval = number("interval_hours", *RECHECK_INTERVAL_RANGE_H, "h")
    due = number("due_s", t_lo, t_hi, "s")
    assert interval is not None and due is not None  # not optional
    return PairSlot(
        aggressor=name("aggressor"),
        victim=name("victim"),
        interval_h=interval,
        due_s=due,
        last_checked_s=number("last_checked_s", t_lo, t_hi, "s", optional=True),
        last_decision=choice("last_decision", RecheckDecision, optional=True),
        follow_up=choice("follow_up", FollowUp, optional=False),
        note=text("note"),
        set_aside=text("set_aside"),
        set_aside_entry_s=number("set_aside_entry_s", t_lo, t_hi, "s", optional=True),
    )


def _names(keys: Iterable[object]) -> str:
    return ", ".join(short_repr(k) for k in keys)


def _check_pair(pair: object) -> Pair:
    if (
        not isinstance(pair, tuple)
        or len(pair) != 2
        or not all(isinstance(p, str) and p for p in pair)
    ):
        raise DriftInputError(f"a pair is (aggressor, victim), two non-empty strings; got {pair!r}")
    return (pair[0], pair[1])


class Schedule:
    """Per-pair re-check intervals and due times (rig clock), kept on disk between runs.

    A cron-friendly command loads the schedule, runs the re-checks of :meth:`due` pairs (and
    the follow-ups of :meth:`pending` ones), :meth:`record`\\ s each outcome and saves. Policy
    (tolerance, interval limits) comes from the protocol's ``RecheckSettings``, passed in; the
    file holds only state.

    Parameters
    ----------
    settings : RecheckSettings
        Interval limits and the starting interval.
    slots : iterable of PairSlot, optional
        Initial state.

    Notes
    -----
    File format (JSON, UTF-8)::

        {"format": "xtalkcal-schedule", "version": 2,
         "pairs": [{"aggressor": "q1-line", "victim": "q2", "interval_hours": 6.0,
                    "due_s": 21600.0, "last_checked_s": null, "last_decision": null,
                    "follow_up": "none", "note": ""}, ...]}

    :meth:`save` writes a temporary file in the same directory, ``fsync``\\ s it and renames it
    over the target with ``os.replace`` (atomic on POSIX), then ``fsync``\\ s the directory: a
    crash leaves either the old or the new file, never a torn one. Concurrent writers are
    not serialised here; a command that may overlap with itself should hold a lock file.
    """

    def __init__(self, settings: RecheckSettings, slots: Iterable[PairSlot] = ()) -> None:
        _interval_limits(settings)
        self._settings = settings
        self.source = "<memory>"  # the file it was loaded from, for messages
        self._slots: dict[Pair, PairSlot] = {}
        for s in slots:
            if s.pair in self._slots:
                raise DriftInputError(f"pair {s.pair} given twice")
            self._slots[s.pair] = s

    # -- views -----------------------------------------------------------------------------

    @property
    def settings(self) -> RecheckSettings:
        return self._settings

    def __len__(self) -> int:
        return len(self._slots)

    def __contains__(self, pair: object) -> bool:
        return pair in self._slots

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Schedule):
            return NotImplemented
        return self._slots == other._slots

    __hash__ = None  # type: ignore[assignment]  # mutable container

    def __repr__(self) -> str:
        return f"Schedule({len(self)} pairs)"

    def pairs(self) -> list[Pair]:
        """All scheduled pairs, sorted."""
        return sorted(self._slots)

    def slot(self, pair: Pair) -> PairSlot:
        """The state of one pair (KeyError if it is not scheduled)."""
        return self._slots[_check_pair(pair)]

    def due(self, now_s: float) -> list[Pair]:
        """Pairs whose re-check is due at rig time ``now_s`` (``due_s <= now_s``).

        Most overdue first, ties by pair name. Pairs set aside are never due.
        """
        now = _finite_real("now_s", now_s)
        ready = [s for s in self._slots.values() if s.due_s <= now and not s.set_aside]
        return [s.pair for s in sorted(ready, key=lambda s: (s.due_s, s.pair))]

    def set_aside_pairs(self) -> dict[Pair, str]:
        """Pairs set aside (see :meth:`set_aside`) with their reasons, sorted by pair."""
        return {p: s.set_aside for p, s in sorted(self._slots.items()) if s.set_aside}

    def set_aside(self, pair: Pair, reason: str, entry_s: float) -> PairSlot:
        """Stop re-checking ``pair`` until it is calibrated afresh, and say why.

        For a pair whose stored compensation cannot be played within its line's limits:
        every re-check would fail the same way, and one bad pair must not stop the rest of
        the schedule on every run. The reason is kept in the file and reported by later runs;
        ``entry_s`` is the ``measured_at_s`` of the stored entry that cannot be played.
        """
        p = _check_pair(pair)
        now = _finite_real("entry_s", entry_s)
        if not isinstance(reason, str) or not reason.strip():
            raise DriftInputError("a set-aside pair needs a reason (a non-empty string)")
        slot = dataclasses.replace(self._slots[p], set_aside=reason[:_NOTE_MAX],
                                   set_aside_entry_s=now, follow_up=FollowUp.NONE)
        self._slots[p] = slot
        return slot

    def pending(self) -> dict[Pair, FollowUp]:
        """Pairs with a follow-up (re-centre or recalibrate) waiting, sorted by pair."""
        return {
            p: s.follow_up
            for p, s in sorted(self._slots.items())
            if s.follow_up is not FollowUp.NONE
        }

    # -- changes ---------------------------------------------------------------------------

    def calibrated(self, pair: Pair, now_s: float, *, interval_h: float | None = None) -> PairSlot:
        """Register a fresh calibration (or re-centre) of ``pair`` at rig time ``now_s``.

        Adds the pair if needed (with ``settings.interval_hours``), clears its follow-up and
        makes its next re-check due one interval from now. ``interval_h`` overrides the
        interval (clamped to the settings' limits).
        """
        p = _check_pair(pair)
        now = _finite_real("now_s", now_s)
        lo, hi, start = _interval_limits(self._settings)
        old = self._slots.get(p)
        if interval_h is not None:
            iv = _finite_real("interval_h", interval_h)
        else:
            iv = start if old is None else old.interval_h
        iv = min(max(iv, lo), hi)
        slot = PairSlot(
            aggressor=p[0],
            victim=p[1],
            interval_h=iv,
            due_s=now + iv * _SECONDS_PER_HOUR,
            last_checked_s=None if old is None else old.last_checked_s,
            last_decision=None if old is None else old.last_decision,
            follow_up=FollowUp.NONE,
            note="calibrated",
        )
        self._slots[p] = slot
        return slot

    def remove(self, pair: Pair) -> None:
        """Stop scheduling ``pair`` (KeyError if absent)."""
        del self._slots[_check_pair(pair)]

    def record(
        self,
        pair: Pair,
        outcome: RecheckOutcome,
        now_s: float,
        *,
        trend: PairTrend | None = None,
        **policy: float,
    ) -> NextCheck:
        """Record a re-check of ``pair`` at rig time ``now_s`` and reschedule it.

        The interval comes from :func:`next_check` (``outcome``, optional ``trend``, the
        pair's current interval; ``policy`` passes ``safety``/``lengthen``/... through). A
        pair not yet scheduled is added with ``settings.interval_hours`` as its previous
        interval.
        """
        p = _check_pair(pair)
        now = _finite_real("now_s", now_s)
        if not isinstance(outcome, RecheckOutcome):
            raise DriftInputError(f"outcome must be a RecheckOutcome, got {type(outcome).__name__}")
        if trend is not None and trend.pair != p:
            raise DriftInputError(f"trend is for pair {trend.pair}, not {p}")
        old = self._slots.get(p)
        evidence: list[RecheckOutcome | PairTrend] = [outcome]
        if trend is not None:
            evidence.append(trend)
        nxt = next_check(
            evidence, None if old is None else old.interval_h, self._settings, **policy
        )
        self._slots[p] = PairSlot(
            aggressor=p[0],
            victim=p[1],
            interval_h=nxt.interval_h,
            due_s=now + nxt.interval_h * _SECONDS_PER_HOUR,
            last_checked_s=now,
            last_decision=outcome.decision,
            follow_up=nxt.follow_up,
            note=nxt.reason,
        )
        return nxt

    # -- persistence -----------------------------------------------------------------------

    def to_dict(self) -> dict[str, Any]:
        """The JSON document (see the class notes)."""
        return {
            "format": SCHEDULE_FORMAT,
            "version": SCHEDULE_SCHEMA_VERSION,
            "pairs": [self._slots[p].to_dict() for p in self.pairs()],
        }

    def to_json(self) -> str:
        """The document as JSON text (stable key order, ends with a newline)."""
        return json.dumps(self.to_dict(), indent=1, ensure_ascii=False, allow_nan=False) + "\n"

    @classmethod
    def from_dict(
        cls, doc: object, settings: RecheckSettings, *, source: str = "<memory>"
    ) -> Schedule:
        """Rebuild a schedule from :meth:`to_dict` output (ScheduleFileError names the field).

        Version 1 documents (without ``set_aside``) are read too.
        """
        if not isinstance(doc, Mapping):
            raise ScheduleFileError(source, "(top level)",
                                    f"expected a JSON object, got {type(doc).__name__}")
        if doc.get("format") != SCHEDULE_FORMAT:
            raise ScheduleFileError(source, "format", f"expected {SCHEDULE_FORMAT!r}, got "
                                                      f"{short_repr(doc.get('format'))}")
        # "version" (the one naming of every file kind); "schema_version" in older files.
        field = "version" if "version" in doc or "schema_version" not in doc else "schema_version"
        version = doc.get(field)
        if isinstance(version, bool) or not isinstance(version, int) or version < 1:
            raise ScheduleFileError(source, field,
                                    f"expected an integer from 1 to {SCHEDULE_SCHEMA_VERSION}, "
                                    f"got {short_repr(version)}")
        if version > SCHEDULE_SCHEMA_VERSION:
            raise ScheduleFileError(source, field,
                                    f"{short_repr(version)} is newer than this code "
                                    f"reads; accepted: 1 to {SCHEDULE_SCHEMA_VERSION} (or "
                                    "upgrade xtalkcal)")
        extra = sorted(set(doc) - {"format", field, "pairs"})
        if extra:
            raise ScheduleFileError(source, "(top level)",
                                    f"unknown top-level field(s) {_names(extra)}; accepted: "
                                    f"format, {field}, pairs")
        raw = doc.get("pairs")
        if not isinstance(raw, list):
            raise ScheduleFileError(source, "pairs", "expected a list of objects, got "
                                                     f"{type(raw).__name__}")
        slots = []
        for i, d in enumerate(raw):
            for key in ("set_aside", "set_aside_entry_s"):
                if version < 2 and isinstance(d, Mapping) and key in d:
                    raise ScheduleFileError(source, f"pairs[{i}].{key}",
                                            "unknown field in a version 1 schedule")
            slots.append(_slot_from_dict(d, source, f"pairs[{i}]"))
        seen: set[Pair] = set()
        for i, sl in enumerate(slots):
            if sl.pair in seen:
                raise ScheduleFileError(source, f"pairs[{i}]",
                                        f"pair {sl.aggressor} → {sl.victim} appears twice")
            seen.add(sl.pair)
        schedule = cls(settings, slots)
        schedule.source = source
        return schedule

    @classmethod
    def from_json(
        cls, text: str, settings: RecheckSettings, *, source: str = "<memory>"
    ) -> Schedule:
        """Parse :meth:`to_json` output (strict JSON: no NaN, no duplicate keys)."""
        try:
            doc = parse_json(text, source)
        except ConfigError as exc:
            raise ScheduleFileError(exc.source, exc.field, exc.problem) from None
        return cls.from_dict(doc, settings, source=source)

    def check_against(self, chip: Chip) -> None:
        """Refuse pairs naming a line or qubit ``chip`` does not have (before any rig time).

        Raises
        ------
        ScheduleFileError
            Naming the schedule file and the first bad ``pairs[i]`` field (and how many
            more there are).
        """
        lines, qubits = chip.line_names, chip.qubit_names
        problems = []
        for i, p in enumerate(self._slots):  # in file order, so pairs[i] is the file's
            if p[0] not in lines:
                problems.append((f"pairs[{i}].aggressor", f"{p[0]!r} is not a drive line of "
                                 f"chip {chip.name!r}; known: {', '.join(lines)}"))
            elif p[1] not in qubits:
                problems.append((f"pairs[{i}].victim", f"{p[1]!r} is not a qubit of chip "
                                 f"{chip.name!r}; known: {', '.join(qubits)}"))
            elif chip.line(p[0]).qubit == p[1]:
                problems.append((f"pairs[{i}].victim", f"{p[1]!r} is the qubit line {p[0]} "
                                 "drives; accepted: another qubit"))
        if problems:
            field, problem = problems[0]
            more = f" ({len(problems) - 1} more pairs like it)" if len(problems) > 1 else ""
            raise ScheduleFileError(self.source, field, problem + more)

    def save(self, path: str | os.PathLike[str]) -> Path:
        """Write the schedule to ``path`` atomically (temporary file, fsync, rename)."""
        target = Path(path)
        text = self.to_json()
        tmp = target.with_name(f".{target.name}.tmp-{os.getpid()}-{uuid.uuid4().hex}")
        try:
            with open(tmp, "w", encoding="utf-8") as fh:
                fh.write(text)
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, target)
        except BaseException:
            with contextlib.suppress(FileNotFoundError):
                tmp.unlink()
            raise
        # Make the rename itself durable; directories cannot be opened on every platform.
        with contextlib.suppress(OSError):
            fd = os.open(target.parent, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        return target

    @classmethod
    def load(cls, path: str | os.PathLike[str], settings: RecheckSettings) -> Schedule:
        """Read a schedule written by :meth:`save`."""
        try:
            doc, source = load_json(path)
        except ConfigError as exc:  # not readable, not UTF-8, not JSON, nested too deeply
            raise ScheduleFileError(exc.source, exc.field, exc.problem) from None
        return cls.from_dict(doc, settings, source=source)

    @classmethod
    def load_or_new(cls, path: str | os.PathLike[str], settings: RecheckSettings) -> Schedule:
        """:meth:`load` if ``path`` exists, else an empty schedule."""
        return cls.load(path, settings) if Path(path).exists() else cls(settings)
