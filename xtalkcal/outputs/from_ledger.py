"""The ledger seen as a calibration: what the commands that start from a ledger (settings,
verification, reports) work with.

:func:`calibration_from_ledger` rebuilds a :class:`~xtalkcal.calibrate.CalibrationResult`
from the matrix a ledger held at some moment: one pair per (line, victim) from its latest
entry (accepted entries make the matrix; a pair whose only entries are rejected shows as
rejected), the raw sweeps those entries link to, and the line-to-line couplings that the
column fits stored in those sweeps. Nothing in it comes from a simulator's truth.
"""

from __future__ import annotations

import datetime as dt
import math

import numpy as np

from xtalkcal.calibrate import CalibrationResult, PairResult
from xtalkcal.exceptions import ConfigError

__all__ = ["calibration_from_ledger", "rig_time_at", "entry_moment"]


def entry_moment(entry) -> dt.datetime:
    """When an entry was stored, as an aware UTC date-time."""
    return dt.datetime.fromisoformat(entry.measured_at_utc.replace("Z", "+00:00"))


def rig_time_at(ledger, moment: dt.datetime | None) -> float:
    """The rig time (s) of the ledger's last entry stored by ``moment`` (inf for None).

    Raises
    ------
    ConfigError
        If the ledger holds nothing stored by then.
    """
    if moment is None:
        return math.inf
    before = [e for e in ledger.entries() if entry_moment(e) <= moment]
    if not before:
        first = min((entry_moment(e) for e in ledger.entries()), default=None)
        raise ConfigError("command line", "--as-of",
                          f"{moment.isoformat()}: the ledger {ledger.path} holds nothing "
                          "stored by then" + (f"; its first entry is of {first.isoformat()}"
                                               if first else ""))
    return max(e.measured_at_s for e in before)


def _pair(e) -> PairResult:
    ok = e.accepted
    return PairResult(
        aggressor=e.aggressor, victim=e.victim, method=e.method, freq_ghz=e.frequency_ghz,
        accepted=ok, reason=e.reason, x=complex(e.value) if ok else None,
        x_cov=np.array(e.covariance, dtype=float) if ok else None,
        nulled=e.kind != "survey", shots=e.shots, repeats=e.amplification,
        measured_at_s=e.measured_at_s, stage="survey" if e.kind == "survey" else "null",
        sweep_id=e.sweep_id, quality=e.quality)


def calibration_from_ledger(ledger, chip, protocol, *, as_of_s: float = math.inf,
                            pairs=None) -> CalibrationResult:
    """The matrix the ledger held at rig time ``as_of_s``, as a calibration result.

    Parameters
    ----------
    ledger : Ledger
    chip : Chip
        The ledger's chip (names, lines, limits).
    protocol : Protocol
        Carried along (null target, re-check settings) for what is done with the result.
    as_of_s : float
        Rig time (s); entries measured later do not count.
    pairs : iterable of (line, victim), optional
        Limit to these pairs.

    Returns
    -------
    CalibrationResult
        ``shots`` adds up the shots behind the entries used (once per stored sweep: the
        pairs of a column pass share its shots); ``rig_seconds`` is NaN (the ledger does
        not keep it).
    """
    if ledger.chip != chip.name:
        raise ConfigError(chip.source, "name", f"{chip.name!r}: the ledger {ledger.path} is "
                                               f"for chip {ledger.chip!r}")
    snap = ledger.as_of(as_of_s)
    wanted = None if pairs is None else set(pairs)
    chosen = dict(snap.entries)
    for key in ledger.pairs():
        if key not in chosen:
            seen = [e for e in ledger.history(*key) if e.measured_at_s <= as_of_s]
            if seen:
                chosen[key] = seen[-1]
    keys = sorted(k for k in chosen if wanted is None or k in wanted)
    latest = max((chosen[k] for k in keys), key=lambda e: e.measured_at_s, default=None)
    result = CalibrationResult(chip, protocol, latest.rig if latest else "",
                               rig_seconds=math.nan)
    per_sweep: dict[str, int] = {}
    for k in keys:
        e = chosen[k]
        result.pairs.append(_pair(e))
        # the pairs of one column pass share its shots: counted once per sweep
        sid = e.sweep_id or f"{e.entry_id}"
        per_sweep[sid] = max(per_sweep.get(sid, 0), e.shots)
        if e.sweep_id and e.sweep_id not in result.sweeps:
            try:
                ds = ledger.sweep(e.sweep_id)
            except KeyError:
                continue
            result.sweeps[e.sweep_id] = ds
            if "coupling_re" in ds and "from_victim" in ds.coords:
                err = (ds["coupling_stderr"].values if "coupling_stderr" in ds
                       else np.zeros(ds["coupling_re"].shape))
                result.couplings[e.sweep_id] = (
                    tuple(str(v) for v in ds["victim"].values),
                    tuple(str(v) for v in ds["from_victim"].values),
                    ds["coupling_re"].values + 1j * ds["coupling_im"].values,
                    np.where(np.isfinite(err), err, 0.0))
    result.shots = sum(per_sweep.values())
    return result
