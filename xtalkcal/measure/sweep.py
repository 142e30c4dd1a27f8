"""Running probes on a rig in batches, with a record on disk and resumption.

Describe, run, record are kept apart: probes *describe* timelines; the
:class:`BatchRunner` *runs* them on a rig after a dry-run safety check; every
completed batch is *recorded* at once in its own small netCDF-4 file (written to a
temporary name, fsync'd, then atomically renamed), so a crash loses at most the
batch in flight. Given the same run directory, a new runner returns a recorded
batch instead of executing it again — only if the request (timelines and shots)
is identical to the one recorded (a fingerprint is stored with it): a deterministic
calibration that is interrupted and started again resumes where it stopped, and a
later measurement that happens to reuse a key is measured anew.

A record opens with ``xarray.open_dataset(path, engine="h5netcdf")`` and no xtalkcal:
root attributes ``format = "xtalkcal-batch"``, ``version = 2``, ``shots``, ``started_s``,
``finished_s`` (rig clock, s), ``request`` (the fingerprint) and ``content`` (checksum of the
counts and the tones); ``counts`` (shots) along ``timeline`` x ``qubit`` x ``level``; per
timeline its ``label`` and ``readout_ns`` (NaN: at the end of the last tone); and every tone
played, along ``tone``: ``tone_timeline`` (its timeline), ``line``, ``start_ns``,
``duration_ns``, ``freq_ghz``, ``amplitude`` (fraction of full scale), ``phase_rad``,
``envelope`` and its ``sigma_ns``, ``drag_ns``, ``ramp_ns``. Records of the first format
(HDF5 attribute ``schema = "xtalkcal-batch/1"``, counts only) still resume, and are
rewritten in the current format, tones included, when they do.

Nothing a rig returns is trusted: every answer is checked against its request
(:func:`xtalkcal.hardware.check_counts`) before it is used or recorded, so a batch that
fails the check is never written and a rerun measures it again; a recorded batch is
checked again (and against the checksum stored with it) when it is replayed. Any
exception from a plug-in's ``run`` becomes a :class:`~xtalkcal.exceptions.RigError`
naming the batch, and a ``run`` that hangs can be abandoned after a timeout.

If the chip file names an interlock (:mod:`xtalkcal.hardware.interlock`), it must approve
every batch before it is sent; a refusal stops the run like a rig failure, and a run
with a record resumes from the refused batch.

A rig may have an optional method ``advance_clock_to(t_s)`` (never moving its clock
back); a replayed batch calls it with the batch's recorded ``finished_s``, so a resumed
run's new batches carry the same rig times as an uninterrupted run.
"""

from __future__ import annotations

import hashlib
import logging
import math
import os
import re
import tempfile
import threading
from collections.abc import Sequence
from concurrent.futures import Future
from concurrent.futures import TimeoutError as FutureTimeout
from pathlib import Path

import h5netcdf
import h5py
import numpy as np

from xtalkcal.exceptions import RigError, SafetyLimitError, TimelineError
from xtalkcal.hardware import (
    Counts,
    PowerTally,
    Rig,
    Timeline,
    check_counts,
    common_readout,
)

__all__ = ["BatchRunner"]

log = logging.getLogger(__name__)

_KEY = re.compile(r"^[A-Za-z0-9_.\-]+$")


class BatchRunner:
    """Execute batches of timelines on a rig, recording each one as it completes.

    Parameters
    ----------
    rig : Rig
    run_dir : path, optional
        Directory for the batch record; ``None`` keeps nothing on disk.
    progress : callable, optional
        Called with the number of shots of each completed batch (a progress bar).
    timeout_s : float, optional
        Seconds a rig's ``run`` may take before it is abandoned with a
        :class:`~xtalkcal.exceptions.RigError`; ``None`` (the default) waits for ever.
        The call then runs in a worker thread. A hung call cannot be killed from Python:
        it is left running in that (daemon) thread and may still drive the hardware, so
        the rig must be considered unusable, and this runner refuses every later batch.

    Attributes
    ----------
    shots_executed, shots_resumed : int
        Shots run on the rig by this runner, and shots answered from the record.
    batches, batches_resumed : int
        Batches executed, and batches answered from the record.
    rig_seconds_executed, rig_seconds_resumed : float
        Rig time (``finished_s - started_s``) of the batches executed, and of the resumed
        batches as they took when they were first recorded.
    rig_seconds : float
        Their sum: the rig time the whole set of batches cost (read only).
    tally : PowerTally
        The most drive each line (and all lines together) got from the batches sent.
    last_finished_s : float or None
        Rig clock at the end of the latest batch returned, executed or resumed: when its
        data were taken (a resumed batch keeps the time it was first measured at).
    """

    def __init__(self, rig: Rig, run_dir: str | Path | None = None, *, progress=None,
                 timeout_s: float | None = None) -> None:
        if timeout_s is not None and not (math.isfinite(timeout_s) and timeout_s > 0):
            raise ValueError(f"timeout_s must be a positive number of seconds or None, "
                             f"got {timeout_s!r}")
        self.rig = rig
        self.timeout_s = timeout_s
        self._hung: str | None = None  # key of a batch whose rig call never returned
        self.run_dir = Path(run_dir) if run_dir is not None else None
        if self.run_dir is not None:
            self.run_dir.mkdir(parents=True, exist_ok=True)
        self.progress = progress
        self.shots_executed = 0
        self.shots_resumed = 0
        self.batches = 0
        self.batches_resumed = 0
        self.rig_seconds_executed = 0.0
        self.rig_seconds_resumed = 0.0
        self.last_finished_s: float | None = None
        self.tally = PowerTally()

    @property
    def rig_seconds(self) -> float:
        """Rig time of every batch returned: executed now plus resumed from the record."""
        return self.rig_seconds_executed + self.rig_seconds_resumed

    def _path(self, key: str) -> Path | None:
        if self.run_dir is None:
            return None
        if not _KEY.match(key):
            raise ValueError(f"batch key {key!r} may only hold letters, digits, '_', '-', '.'")
        return self.run_dir / f"{key}.h5"

    def run(self, key: str, timelines: Sequence[Timeline], shots: int) -> Counts:
        """Counts of a batch: from the record if present, else executed and recorded.

        Raises
        ------
        RigError
            The rig failed, hung past ``timeout_s``, or returned counts that do not answer
            the request; or a recorded batch is unreadable or fails the same check.
        """
        timelines = list(timelines)
        readout = common_readout(timelines)
        request = {"readout": readout, "n_timelines": len(timelines), "shots": int(shots)}
        path = self._path(key)
        digest = _digest(timelines, shots)
        if path is not None and path.exists():
            counts, recorded = _read(path)
            if recorded == digest:
                try:
                    counts = check_counts(counts, batch=f"{key} ({path})",
                                          origin="the record holds", **request)
                except RigError as exc:
                    raise RigError(f"{exc}; delete {path} to measure the batch again") \
                        from None
                self.shots_resumed += len(timelines) * shots
                self.batches_resumed += 1
                # The rig time the batch took when it was recorded: a resumed calibration
                # costs what its batches cost, wherever they were measured.
                self.rig_seconds_resumed += counts.finished_s - counts.started_s
                self.last_finished_s = counts.finished_s
                # A rig whose clock restarts with the process (a simulator) is moved on to
                # the end of the replayed batch, so that the batches measured after a
                # resume carry the times (and see the drift) of an uninterrupted run.
                advance = getattr(self.rig, "advance_clock_to", None)
                if advance is not None:
                    advance(counts.finished_s)
                self._convert(path, counts, digest, timelines)
                return counts
            # Same key, different request (e.g. a later calibration reusing a run folder):
            # the record must not stand in for a measurement it is not.
            log.warning("recorded batch %s was made for other timelines; measuring anew", key)
        # Dry run: refuse before anything reaches the rig; then the lab's interlock, if
        # its chip file names one, must approve the batch.
        batch = PowerTally()
        batch.add(self.rig.chip, timelines, self.rig.repetition_ns, shots)  # check_timelines
        interlock = getattr(self.rig.chip, "interlock", None)
        if interlock is not None:
            interlock.approve(chip=self.rig.chip.name, batch=key)
        self.tally.merge(batch)
        # Checked before anything is counted or recorded: a bad answer leaves no trace,
        # and a rerun with the same record measures the batch again.
        counts = check_counts(self._call_rig(key, timelines, shots), batch=key, **request)
        if path is not None:
            _write_atomic(path, counts, digest, timelines)
        self.batches += 1
        self.shots_executed += len(timelines) * shots
        self.rig_seconds_executed += counts.finished_s - counts.started_s
        self.last_finished_s = counts.finished_s
        if self.progress is not None:
            self.progress(len(timelines) * shots)
        return counts

    @staticmethod
    def _convert(path: Path, counts: Counts, digest: str, timelines: list[Timeline]) -> None:
        """Rewrite a first-format record that answered its request in the current format,
        now that its tones are known (atomically; a read-only record stays as it is)."""
        try:
            if _is_first_format(path):
                _write_atomic(path, counts, digest, timelines)
        except OSError as exc:
            log.warning("recorded batch %s kept in its first format (%s)", path, exc)

    def _call_rig(self, key: str, timelines: list[Timeline], shots: int) -> object:
        """``rig.run``, with its failures as RigError naming the batch, and the timeout."""
        if self._hung is not None:
            raise RigError(f"batch {key}: not sent; the rig never returned from batch "
                           f"{self._hung} and is considered unusable")
        try:
            if self.timeout_s is None:
                return self.rig.run(timelines, shots)
            return self._call_with_timeout(key, timelines, shots)
        except (SafetyLimitError, TimelineError, RigError):
            raise  # the toolkit's own errors already say what is wrong
        except Exception as exc:
            what = f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__
            raise RigError(f"batch {key}: the rig failed: {what}") from exc

    def _call_with_timeout(self, key: str, timelines: list[Timeline], shots: int) -> object:
        # A daemon thread, not an executor's worker: a call that never returns must not
        # keep the process from exiting after the error has been reported.
        future: Future = Future()

        def work() -> None:
            if not future.set_running_or_notify_cancel():
                return
            try:
                future.set_result(self.rig.run(timelines, shots))
            except BaseException as exc:  # handed to the waiting thread, re-raised there
                future.set_exception(exc)

        threading.Thread(target=work, name=f"xtalkcal-rig-{key}", daemon=True).start()
        try:
            return future.result(timeout=self.timeout_s)
        except FutureTimeout:
            if not future.done():
                self._hung = key
                raise RigError(
                    f"batch {key}: the rig did not return within {self.timeout_s:g} s; the "
                    "call was abandoned but cannot be stopped, so the rig is considered "
                    "unusable (check the hardware before running again)") from None
            raise  # the rig's own TimeoutError, re-raised by result()


def _digest(timelines: Sequence[Timeline], shots: int) -> str:
    """Fingerprint of a request: a recorded batch answers only the identical request."""
    return hashlib.blake2b(repr((tuple(timelines), int(shots))).encode(),
                           digest_size=16).hexdigest()


RECORD_FORMAT = "xtalkcal-batch"
RECORD_VERSION = 2
"""Format name and version written at the root of every record file (netCDF-4)."""
_RECORD_V1 = "xtalkcal-batch/1"  # HDF5 attribute ``schema`` of the first records

# The tone table of a record (dimension ``tone``): name, units, long name.
_TONE_FIELDS = (
    ("start_ns", "ns", "tone start on the global clock"),
    ("duration_ns", "ns", "tone duration"),
    ("freq_ghz", "GHz", "carrier frequency"),
    ("amplitude", "fraction of full scale", "peak amplitude |a| of the tone"),
    ("phase_rad", "rad", "phase of the tone against the global clock"),
    ("sigma_ns", "ns", "gaussian standard deviation of the envelope (gaussian, drag)"),
    ("drag_ns", "ns", "DRAG coefficient beta of the envelope (drag)"),
    ("ramp_ns", "ns", "cosine ramp length of the envelope (flattop)"),
)
_ENVELOPE_FIELDS = frozenset({"sigma_ns", "drag_ns", "ramp_ns"})


def _content(qubits: Sequence[str], counts: np.ndarray, shots: int, started_s: float,
             finished_s: float, tones: dict[str, np.ndarray] | None = None) -> str:
    """Checksum of a recorded batch's data, stored with it: a file changed on disk is caught.

    ``tones`` (the tone table of a version-2 record) is part of the sum when given."""
    h = hashlib.blake2b(digest_size=16)
    counts = np.ascontiguousarray(counts)  # as stored: a changed dtype changes the sum
    h.update(repr((tuple(str(q) for q in qubits), counts.shape, counts.dtype.str,
                   int(shots), float(started_s).hex(), float(finished_s).hex())).encode())
    h.update(counts.tobytes())
    for name, col in (tones or {}).items():
        h.update(name.encode())
        if col.dtype.kind == "O" or col.dtype.kind == "U":
            h.update(repr([str(v) for v in col]).encode())
        else:
            h.update(np.ascontiguousarray(col).tobytes())
    return h.hexdigest()


def _tone_table(timelines: Sequence[Timeline]) -> dict[str, np.ndarray]:
    """The tones of a batch as columns along ``tone`` (``timeline`` is each tone's row)."""
    rows = [(k, t) for k, tl in enumerate(timelines) for t in tl.tones]
    table: dict[str, np.ndarray] = {
        "tone_timeline": np.array([k for k, _ in rows], dtype=np.int64),
        "line": np.array([t.line for _, t in rows], dtype=object),
        "envelope": np.array([t.envelope.kind for _, t in rows], dtype=object),
    }
    for name, _, _ in _TONE_FIELDS:
        of_envelope = name in _ENVELOPE_FIELDS
        table[name] = np.array([float(getattr(t.envelope if of_envelope else t, name))
                                for _, t in rows], dtype=np.float64)
    return table


def _str_var(group, name: str, dim: str, values: np.ndarray, attrs: dict) -> None:
    v = group.create_variable(name, (dim,), h5py.string_dtype("utf-8"),
                              data=values if len(values) else None)
    v.attrs.update(attrs)


def _write_atomic(path: Path, counts: Counts, digest: str,
                  timelines: Sequence[Timeline]) -> None:
    """Write a batch record as a netCDF-4 file that xarray opens as it is (h5netcdf):
    the counts along (timeline, qubit, level) and every tone each timeline played."""
    tones = _tone_table(timelines)
    labels = np.array([tl.label for tl in timelines], dtype=object)
    readout_ns = np.array([math.nan if tl.readout_ns is None else float(tl.readout_ns)
                           for tl in timelines], dtype=np.float64)
    n, nq, nl = counts.counts.shape
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    try:
        with h5netcdf.File(tmp, "w") as f:
            f.dimensions = {"timeline": n, "qubit": nq, "level": nl,
                            "tone": len(tones["line"])}
            _str_var(f, "qubit", "qubit", np.array(counts.qubits, dtype=object),
                     {"long_name": "qubit read out"})
            lv = f.create_variable("level", ("level",), np.int64, data=np.arange(nl))
            lv.attrs.update({"units": "1", "long_name": "transmon level assigned"})
            tv = f.create_variable("timeline", ("timeline",), np.int64, data=np.arange(n))
            tv.attrs.update({"units": "1", "long_name": "index of the timeline in the batch"})
            cv = f.create_variable("counts", ("timeline", "qubit", "level"),
                                   counts.counts.dtype, data=counts.counts)
            cv.attrs.update({"units": "shots",
                             "long_name": "shots that assigned each level to each qubit"})
            _str_var(f, "label", "timeline", labels, {"long_name": "label of the timeline"})
            rv = f.create_variable("readout_ns", ("timeline",), np.float64, data=readout_ns)
            rv.attrs.update({"units": "ns", "long_name": "readout time on the global clock "
                             "(NaN: at the end of the last tone)"})
            m = len(tones["line"])
            ttv = f.create_variable("tone_timeline", ("tone",), np.int64,
                                    data=tones["tone_timeline"] if m else None)
            ttv.attrs.update({"units": "1", "long_name": "timeline that plays the tone"})
            _str_var(f, "line", "tone", tones["line"], {"long_name": "drive line"})
            _str_var(f, "envelope", "tone", tones["envelope"], {"long_name": "envelope kind"})
            for name, units, long_name in _TONE_FIELDS:
                v = f.create_variable(name, ("tone",), np.float64,
                                      data=tones[name] if m else None)
                v.attrs.update({"units": units, "long_name": long_name})
            f.attrs["coordinates"] = "label tone_timeline line"
            f.attrs.update({
                "format": RECORD_FORMAT, "version": np.int64(RECORD_VERSION),
                "shots": np.int64(counts.shots), "started_s": float(counts.started_s),
                "finished_s": float(counts.finished_s), "time_units": "s (rig clock)",
                "request": digest,
                "content": _content(counts.qubits, counts.counts, counts.shots,
                                    counts.started_s, counts.finished_s, tones),
            })
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _one(value: object) -> object:
    """The value of a one-element attribute (netCDF writes numbers as arrays of one)."""
    arr = np.asarray(value)
    if arr.size != 1:
        raise ValueError(f"attribute holds {arr.size} values, expected one")
    return arr.reshape(-1)[0]


def _record_version(f: h5py.File) -> int:
    """1 or 2: the format of a record file (KeyError for anything else)."""
    if str(f.attrs.get("format", "")) == RECORD_FORMAT:
        version = int(_one(f.attrs["version"]))
        if version == RECORD_VERSION:
            return version
        raise KeyError(f"version {version} of {RECORD_FORMAT!r}; this xtalkcal reads "
                       f"versions 1 and {RECORD_VERSION}")
    if str(f.attrs.get("schema", "")) == _RECORD_V1:
        return 1
    raise KeyError(f"no format {RECORD_FORMAT!r} (nor schema {_RECORD_V1!r}) at its root")


def _read_tones(f: h5py.File) -> dict[str, np.ndarray]:
    out: dict[str, np.ndarray] = {"tone_timeline": np.asarray(f["tone_timeline"][()])}
    for name in ("line", "envelope"):
        ds = f[name]
        out[name] = np.array(ds.asstr()[()] if ds.size else [], dtype=object)
    for name, _, _ in _TONE_FIELDS:
        out[name] = np.asarray(f[name][()], dtype=np.float64)
    return {k: out[k] for k in _tone_order()}


def _tone_order() -> tuple[str, ...]:
    return ("tone_timeline", "line", "envelope", *(name for name, _, _ in _TONE_FIELDS))


def _read(path: Path) -> tuple[Counts, str]:
    """A recorded batch and its request fingerprint; RigError naming the file if unreadable.

    Reads both formats: version 2 (netCDF-4, with the tones) and the first HDF5 records
    (``schema = "xtalkcal-batch/1"``, counts only). The counts are not checked against a
    request here (the caller does that once it knows the record answers its request), only
    against the checksum written with them (records written before checksums were kept have
    none and are only checked by the caller).
    """
    again = "delete the file to measure the batch again"
    try:
        with h5py.File(path, "r") as f:
            version = _record_version(f)
            qubits = tuple(str(q) for q in (f.attrs["qubits"] if version == 1
                                            else f["qubit"].asstr()[()]))
            digest = str(f.attrs.get("request", ""))
            content = f.attrs.get("content")
            counts = Counts(qubits, f["counts"][()], int(_one(f.attrs["shots"])),
                            float(_one(f.attrs["started_s"])),
                            float(_one(f.attrs["finished_s"])))
            tones = _read_tones(f) if version == 2 else None
    except (OSError, KeyError, TypeError, ValueError) as exc:
        raise RigError(f"recorded batch {path}: cannot be read "
                       f"({type(exc).__name__}: {exc}); {again}") from exc
    if content is not None:
        actual = _content(counts.qubits, counts.counts, counts.shots, counts.started_s,
                          counts.finished_s, tones)
        if str(content) != actual:
            raise RigError(f"recorded batch {path}: its data do not match the checksum "
                           f"written with them (the file was changed or damaged on disk); "
                           f"{again}")
    return counts, digest


def _is_first_format(path: Path) -> bool:
    """True for a record of the first format (counts only, no tones)."""
    with h5py.File(path, "r") as f:
        return str(f.attrs.get("format", "")) != RECORD_FORMAT
