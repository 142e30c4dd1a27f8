"""Turn a calibration result into ledger entries and the sweep data kept beside them.
"""

from __future__ import annotations

import math

import xarray as xr

from xtalkcal.calibrate import CalibrationResult


def ledger_entries(result: CalibrationResult, *, run_tag: str = "") -> list:
    """The result as :class:`~xtalkcal.store.LedgerEntry` objects (one per pair).

    Rejected pairs are stored too (as history, never current). Each entry links to its
    raw sweep by ``sweep_id`` = ``run_tag + "/" + pass key``; store the sweeps of
    :func:`ledger_sweeps` in the same commit.
    """
    from xtalkcal.common import __version__
    from xtalkcal.store.entries import LedgerEntry, utc_timestamp

    stamp = utc_timestamp()
    out = []
    for p in result.pairs:
        nan2 = ((math.nan, math.nan), (math.nan, math.nan))
        out.append(LedgerEntry(
            aggressor=p.aggressor, victim=p.victim, frequency_ghz=p.freq_ghz,
            value=p.x if p.x is not None else complex(math.nan, math.nan),
            covariance=tuple(map(tuple, p.x_cov)) if p.x_cov is not None else nan2,
            method=p.method, shots=p.shots, amplification=p.repeats,
            quality=p.quality if p.accepted else math.nan,
            verdict="accepted" if p.accepted else "rejected",
            reason=p.reason if not p.accepted else "",
            measured_at_s=p.measured_at_s, measured_at_utc=stamp,
            rig=result.rig_description, software_version=f"xtalkcal {__version__}",
            kind="null" if p.nulled else "survey", tag=run_tag,
            sweep_id=_sweep_key(run_tag, p.sweep_id),
        ))
    return out


def _sweep_key(run_tag: str, key: str) -> str:
    return f"{run_tag}/{key}" if run_tag else key


def ledger_sweeps(result: CalibrationResult, *, run_tag: str = "") -> dict[str, xr.Dataset]:
    """The raw sweeps of a result keyed as :func:`ledger_entries` links them."""
    return {_sweep_key(run_tag, k): v for k, v in result.sweeps.items()}
