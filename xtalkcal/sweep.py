"""Running probes on a rig in batches, with a record on disk and resumption.

Describe, run, record are kept apart: probes *describe* timelines; the
:class:`BatchRunner` *runs* them on a rig after a dry-run safety check; every
completed batch is *recorded* at once in its own small HDF5 file (written to a
temporary name, fsync'd, then atomically renamed), so a crash loses at most the
batch in flight. Given the same run directory, a new runner returns a recorded
batch instead of executing it again — only if the request (timelines and shots)
is identical to the one recorded (a fingerprint is stored with it): a deterministic
calibration that is interrupted and started again resumes where it stopped, and a
later measurement that happens to reuse a key is measured anew.

A rig may have an optional method ``advance_clock_to(t_s)`` (never moving its clock
back); a replayed batch calls it with the batch's recorded ``finished_s``, so a resumed
run's new batches carry the same rig times as an uninterrupted run.
"""

from __future__ import annotations

import hashlib
import logging
import os
import re
import tempfile
from collections.abc import Sequence
from pathlib import Path

import h5py
import numpy as np

from xtalkcal.rig import Counts, Rig, common_readout
from xtalkcal.safety import check_timelines
from xtalkcal.timeline import Timeline

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
    last_finished_s : float or None
        Rig clock at the end of the latest batch returned, executed or resumed: when its
        data were taken (a resumed batch keeps the time it was first measured at).
    """

    def __init__(self, rig: Rig, run_dir: str | Path | None = None, *, progress=None) -> None:
        self.rig = rig
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
        """Counts of a batch: from the record if present, else executed and recorded."""
        timelines = list(timelines)
        common_readout(timelines)
        path = self._path(key)
        digest = _digest(timelines, shots)
        if path is not None and path.exists():
            counts, recorded = _read(path)
            if recorded == digest:
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
                return counts
            # Same key, different request (e.g. a later calibration reusing a run folder):
            # the record must not stand in for a measurement it is not.
            log.warning("recorded batch %s was made for other timelines; measuring anew", key)
        # Dry run: refuse before anything reaches the rig.
        check_timelines(self.rig.chip, timelines, self.rig.repetition_ns)
        counts = self.rig.run(timelines, shots)
        self.batches += 1
        self.shots_executed += len(timelines) * shots
        self.rig_seconds_executed += counts.finished_s - counts.started_s
        self.last_finished_s = counts.finished_s
        if path is not None:
            _write_atomic(path, counts, digest)
        if self.progress is not None:
            self.progress(len(timelines) * shots)
        return counts


def _digest(timelines: Sequence[Timeline], shots: int) -> str:
    """Fingerprint of a request: a recorded batch answers only the identical request."""
    return hashlib.blake2b(repr((tuple(timelines), int(shots))).encode(),
                           digest_size=16).hexdigest()


def _write_atomic(path: Path, counts: Counts, digest: str) -> None:
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    try:
        with h5py.File(tmp, "w") as f:
            f.attrs["schema"] = "xtalkcal-batch/1"
            f.attrs["qubits"] = np.array(counts.qubits, dtype=h5py.string_dtype())
            f.attrs["shots"] = counts.shots
            f.attrs["started_s"] = counts.started_s
            f.attrs["finished_s"] = counts.finished_s
            f.attrs["request"] = digest
            f.create_dataset("counts", data=counts.counts)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _read(path: Path) -> tuple[Counts, str]:
    with h5py.File(path, "r") as f:
        qubits = tuple(str(q) for q in f.attrs["qubits"])
        digest = str(f.attrs.get("request", ""))
        return Counts(qubits, f["counts"][()], int(f.attrs["shots"]),
                      float(f.attrs["started_s"]), float(f.attrs["finished_s"])), digest
