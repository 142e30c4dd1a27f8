"""The hardware interface: the few verbs xtalkcal needs from a control stack.

This docstring is the plug-in contract. A lab connects its own electronics by writing one
class with the members below and naming its factory on the command line
(``--rig package.module:factory``). The bundled simulated device
(``simulated_device.SimRig``) satisfies the same contract.

Example
-------
.. code-block:: python

    class MyLabRig:
        @property
        def chip(self) -> xtalkcal.Chip: ...       # load_chip("our_chip.toml")
        @property
        def repetition_ns(self) -> float: ...      # time between shot starts
        def describe(self) -> str: ...             # recorded with every data set
        def now(self) -> float: ...                # wall clock, seconds
        def run(self, timelines, shots) -> xtalkcal.Counts:
            xtalkcal.check_timelines(self.chip, timelines, self.repetition_ns)  # FIRST
            ...  # compile tones to your AWG, play, read out, discriminate levels 0/1/2

Members
-------
``chip``
    The :class:`~xtalkcal.hardware.Chip` the rig drives (names, nominal values, limits).
``repetition_ns``
    Time between shot starts (ns), finite and > 0; sets average power and the time a run
    costs.
``describe()``
    A short free-text description recorded with every data set.
``run(timelines, shots)``
    Execute every timeline ``shots`` times and return :class:`Counts`. All timelines of
    one call read the same qubits. It must call
    :func:`xtalkcal.hardware.check_timelines` (or an equivalent, at least as strict)
    **before** anything is uploaded or played, and raise
    :class:`~xtalkcal.exceptions.RigError` for driver failures.
``now()``
    The rig's clock (s): wall time for hardware, simulated time for the simulator.
``advance_clock_to(t_s)`` (optional)
    For a rig whose clock restarts with the process (the simulator). When a resumed run
    answers a batch from its ``--record``, :class:`~xtalkcal.measure.BatchRunner` calls it
    with the batch's recorded ``finished_s``, so the batches measured after the resume
    carry the same times (and, on the simulator, see the same drift) as an uninterrupted
    run. It must never move the clock back. A rig on a wall clock omits it.

What a timeline means
---------------------
* The RF voltage of a line is ``V_fs·Re[A(t)·e^{−i2πft}]`` with ``A = a·e^{iφ}·E(t − t0)``
  (:mod:`xtalkcal.hardware.timeline` defines the envelopes ``E``).
* Tone phases are referenced to one global clock that starts at 0 each shot
  (phase-continuous carriers). If your hardware resets oscillator phase per pulse, add
  ``2π·f·t_start`` when you compile a tone.

What ``run`` must return
------------------------
A :class:`Counts` with

* ``qubits`` equal to the timelines' common ``readout``, **in the same order**;
* ``counts`` of shape ``(len(timelines), len(readout), n_levels)`` with
  ``n_levels >= MIN_LEVELS`` (levels 0, 1 and 2: the leakage probes read level 2; a
  rig that discriminates more levels may add them after level 2), in timeline order;
* whole, non-negative, finite numbers, each ``counts[t, q, :]`` summing to ``shots``
  (every shot is assigned exactly one level);
* ``shots`` equal to the shots requested;
* ``started_s`` and ``finished_s`` finite, with ``finished_s >= started_s``.

What the toolkit checks
-----------------------
:class:`~xtalkcal.measure.BatchRunner` checks every one of these points with
:func:`check_counts` before the counts are used or recorded (and again when a recorded
batch is replayed; records also carry a checksum of their data); a failure is a
:class:`~xtalkcal.exceptions.RigError` naming the batch, what was wrong and what was
expected, and nothing of that batch is kept. Any other exception a plug-in's ``run``
raises is reported as a ``RigError`` naming the batch, with the original chained;
``SafetyLimitError``, ``TimelineError`` and ``RigError`` raised by the plug-in pass
through as they are. A ``run`` that does not return within the runner's optional
timeout (``BatchRunner(timeout_s=...)``, ``--rig-timeout``) is abandoned with a
``RigError``; the call keeps running in a daemon thread, so the rig is considered
unusable and the runner sends it nothing more.

What cannot be checked: a rig that labels its qubits correctly but fills in another
qubit's data (or another timeline's), or whose counts are plausible but wrong. Those
shapes and sums are indistinguishable from good data; the plug-in must get them right.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Protocol, runtime_checkable

import numpy as np

from xtalkcal.exceptions import RigError, TimelineError
from xtalkcal.hardware.chip import Chip
from xtalkcal.hardware.timeline import Timeline

__all__ = ["MIN_LEVELS", "Counts", "Rig", "check_counts", "common_readout"]

#: Readout levels every rig must assign: 0, 1 and 2 (the leakage probes read level 2).
MIN_LEVELS = 3


@dataclass(frozen=True)
class Counts:
    """Readout outcomes of a batch.

    Attributes
    ----------
    qubits : tuple of str
        Qubits read, in the order of axis 1.
    counts : ndarray of int, shape (n_timelines, n_qubits, n_levels)
        How many shots assigned each level (0, 1, 2, …) to each qubit.
    shots : int
        Shots per timeline.
    started_s, finished_s : float
        Rig clock (s) at the start and end of the batch.
    """

    qubits: tuple[str, ...]
    counts: np.ndarray
    shots: int
    started_s: float
    finished_s: float

    def probabilities(self) -> np.ndarray:
        """Fractions of shots per level, same shape as ``counts``."""
        return self.counts / float(self.shots)

    def of(self, qubit: str) -> np.ndarray:
        """Counts of one qubit, shape (n_timelines, n_levels)."""
        return self.counts[:, self.qubits.index(qubit), :]


@runtime_checkable
class Rig(Protocol):
    """What xtalkcal needs from a control stack (see module docstring)."""

    @property
    def chip(self) -> Chip: ...

    @property
    def repetition_ns(self) -> float: ...

    def describe(self) -> str: ...

    def run(self, timelines: Sequence[Timeline], shots: int) -> Counts: ...

    def now(self) -> float: ...


def common_readout(timelines: Sequence[Timeline]) -> tuple[str, ...]:
    """The readout shared by all timelines of a batch (TimelineError if they differ)."""
    if not timelines:
        raise TimelineError("an empty batch of timelines was given")
    first = timelines[0].readout
    for tl in timelines[1:]:
        if tl.readout != first:
            raise TimelineError(
                f"all timelines of one batch must read the same qubits: {first} vs {tl.readout}"
            )
    return first


def check_counts(counts: object, *, batch: str, readout: Sequence[str], n_timelines: int,
                 shots: int, origin: str = "the rig returned") -> Counts:
    """Check a rig's answer against the request; a clean copy of it, or RigError.

    Parameters
    ----------
    counts : object
        What the rig (or a recorded batch) returned; should be a :class:`Counts`.
    batch : str
        Names the batch in the error (its key, or a recorded file).
    readout : sequence of str
        The qubits the timelines read, in their order.
    n_timelines, shots : int
        The request: how many timelines, each played how many times.
    origin : str
        Who gave the counts, for the error ("the rig returned", "the record holds").

    Returns
    -------
    Counts
        The same data with ``counts`` as a fresh read-only ``int64`` array, so that a
        rig reusing its buffers cannot change them afterwards.

    Raises
    ------
    RigError
        Naming ``batch``, what was wrong and what was expected (see the module docstring
        for the whole contract). Only shapes, labels, values and sums can be checked: a
        rig that swaps two qubits' data under the right labels is not detectable here.
    """
    readout = tuple(readout)

    def bad(problem: str) -> RigError:
        return RigError(f"batch {batch}: {origin} {problem}")

    if not isinstance(counts, Counts):
        raise bad(f"a {type(counts).__name__}, expected xtalkcal.Counts")
    qubits = counts.qubits
    if not isinstance(qubits, (tuple, list)) or tuple(qubits) != readout:
        raise bad(f"counts for qubits {_names(qubits)}, expected the requested readout "
                  f"{_names(readout)} in that order")
    shot = counts.shots
    if isinstance(shot, (bool, np.bool_)) or not isinstance(shot, (int, np.integer)) \
            or int(shot) != shots:
        raise bad(f"shots = {shot!r}, expected the {shots} shots requested")
    try:
        raw = np.asarray(counts.counts)
    except Exception as exc:  # an object numpy cannot read as an array at all
        raise bad(f"counts that are not an array ({type(exc).__name__}: {exc})") from exc
    want = f"(timelines, qubits, levels) = ({n_timelines}, {len(readout)}, >= {MIN_LEVELS})"
    if raw.ndim != 3:
        raise bad(f"counts of shape {raw.shape}, expected {want}")
    n_t, n_q, n_l = raw.shape
    if n_t != n_timelines:
        what = "missing" if n_t < n_timelines else "extra"
        raise bad(f"counts for {n_t} timelines, {what} {abs(n_timelines - n_t)}: "
                  f"expected one row per timeline requested, shape {want}")
    if n_q != len(readout):
        raise bad(f"counts for {n_q} qubits under the labels {_names(readout)}, "
                  f"expected shape {want}")
    if n_l < MIN_LEVELS:
        raise bad(f"{n_l} readout levels, expected at least {MIN_LEVELS} "
                  "(levels 0, 1 and 2; the leakage probes read level 2)")
    if raw.dtype == bool or raw.dtype.kind not in "iuf":
        raise bad(f"counts of type {raw.dtype}, expected whole numbers of shots")
    data = raw.astype(float, copy=False)
    checks = ((~np.isfinite(data), "a non-finite count {v}", "finite counts"),
              (data < 0, "a negative count {v}", "non-negative counts"),
              (data > shots, "a count {v} above the shots", f"counts of at most {shots}"),
              (data != np.round(data), "a fractional count {v}", "whole-number counts"))
    for mask, what, expected in checks:
        if mask.any():
            t, q, lvl = (int(i) for i in np.argwhere(mask)[0])
            raise bad(f"{what.format(v=data[t, q, lvl])} at timeline {t}, qubit "
                      f"{readout[q]}, level {lvl} ({int(mask.sum())} such), expected "
                      f"{expected} of shots")
    exact = np.array(raw, dtype=np.int64)
    sums = exact.sum(axis=2)
    off = sums != shots
    if off.any():
        t, q = (int(i) for i in np.argwhere(off)[0])
        raise bad(f"counts summing to {int(sums[t, q])} at timeline {t}, qubit {readout[q]} "
                  f"({int(off.sum())} such), expected every shot assigned one level: "
                  f"{shots}")
    times = []
    for name in ("started_s", "finished_s"):
        v = getattr(counts, name)
        try:
            f = float(v)
        except (TypeError, ValueError):
            f = math.nan
        if isinstance(v, (bool, np.bool_)) or not math.isfinite(f):
            raise bad(f"{name} = {v!r}, expected a finite rig-clock time (s)")
        times.append(f)
    if times[1] < times[0]:
        raise bad(f"finished_s = {times[1]!r} before started_s = {times[0]!r}, expected "
                  "finished_s >= started_s")
    exact.setflags(write=False)
    return Counts(readout, exact, int(shots), times[0], times[1])


def _names(qubits: object) -> str:
    try:
        return "(" + ", ".join(str(q) for q in qubits) + ")"  # type: ignore[union-attr]
    except TypeError:
        return repr(qubits)
