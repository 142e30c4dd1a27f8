"""Views of the ledger: the matrix as it stood at one time, as an xarray dataset.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import xarray as xr

from xtalkcal.store.entries import LedgerEntry

# --------------------------------------------------------------------------------------------
# Snapshots and receipts
# --------------------------------------------------------------------------------------------


def _entry_table(entries: list[LedgerEntry]) -> dict[str, np.ndarray]:
    """Per-entry arrays shared by the matrix and history views (first-order error
    propagation from the (Re, Im) covariance, the delta method; common practice)."""
    re_ = np.array([e.value.real for e in entries], dtype=float)
    im_ = np.array([e.value.imag for e in entries], dtype=float)
    cov = np.array([e.covariance for e in entries], dtype=float).reshape(-1, 2, 2)
    c00, c11 = cov[:, 0, 0], cov[:, 1, 1]
    c01 = 0.5 * (cov[:, 0, 1] + cov[:, 1, 0])
    mag = np.hypot(re_, im_)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        var_mag = (re_**2 * c00 + 2 * re_ * im_ * c01 + im_**2 * c11) / mag**2
        var_phase = (im_**2 * c00 - 2 * re_ * im_ * c01 + re_**2 * c11) / mag**4
        table = {
            "x_real": re_,
            "x_imag": im_,
            "x_real_stderr": np.sqrt(c00),
            "x_imag_stderr": np.sqrt(c11),
            "x_real_imag_cov": c01,
            "magnitude_db": 20.0 * np.log10(mag),
            "magnitude_db_stderr": 20.0 / np.log(10.0) * np.sqrt(var_mag) / mag,
            "phase_rad": np.arctan2(im_, re_),
            "phase_rad_stderr": np.sqrt(var_phase),
        }
    table["frequency_ghz"] = np.array([e.frequency_ghz for e in entries], dtype=float)
    table["measured_at_s"] = np.array([e.measured_at_s for e in entries], dtype=float)
    table["shots"] = np.array([e.shots for e in entries], dtype=float)
    table["amplification"] = np.array([e.amplification for e in entries], dtype=float)
    table["quality"] = np.array([e.quality for e in entries], dtype=float)
    for name in (
        "measured_at_utc",
        "method",
        "kind",
        "verdict",
        "reason",
        "tag",
        "sweep_id",
        "rig",
        "software_version",
        "entry_id",
    ):
        table[name] = np.array([getattr(e, name) for e in entries], dtype=str)
    return table


_VIEW_ATTRS: dict[str, dict[str, str]] = {
    "x_real": {"units": "1", "long_name": "Re X (crosstalk C_va/C_vv)"},
    "x_imag": {"units": "1", "long_name": "Im X (crosstalk C_va/C_vv)"},
    "x_real_stderr": {"units": "1", "long_name": "standard error of Re X"},
    "x_imag_stderr": {"units": "1", "long_name": "standard error of Im X"},
    "x_real_imag_cov": {"units": "1", "long_name": "covariance of Re X and Im X"},
    "magnitude_db": {"units": "dB", "long_name": "crosstalk magnitude 20 log10|X|"},
    "magnitude_db_stderr": {"units": "dB", "long_name": "standard error of magnitude"},
    "phase_rad": {"units": "rad", "long_name": "crosstalk phase arg X"},
    "phase_rad_stderr": {"units": "rad", "long_name": "standard error of phase"},
    "frequency_ghz": {"units": "GHz", "long_name": "aggressor tone frequency"},
    "measured_at_s": {"units": "s", "long_name": "rig clock at the end of the measurement "
                      "(monotonic over the chip's life, not a wall clock)"},
    "shots": {"units": "shots", "long_name": "shots spent"},
    "amplification": {"units": "1", "long_name": "aggressor pulse repetitions K"},
    "quality": {"units": "1", "long_name": "fit quality figure"},
    "measured_at_utc": {"long_name": "wall clock at the end of the measurement "
                        "(ISO-8601, UTC)"},
    "method": {"long_name": "measurement method"},
    "kind": {"long_name": "measurement kind"},
    "verdict": {"long_name": "fit verdict (rejected entries are history only)"},
    "reason": {"long_name": "reason for the verdict"},
    "tag": {"long_name": "run tag"},
    "sweep_id": {"long_name": "id of the stored raw sweep"},
    "rig": {"long_name": "rig description"},
    "software_version": {"long_name": "software version"},
    "entry_id": {"long_name": "ledger entry id (seq.position)"},
}
_MATRIX_VARS = (
    "x_real",
    "x_imag",
    "x_real_stderr",
    "x_imag_stderr",
    "x_real_imag_cov",
    "magnitude_db",
    "magnitude_db_stderr",
    "phase_rad",
    "phase_rad_stderr",
    "frequency_ghz",
    "measured_at_s",
    "measured_at_utc",
    "method",
    "kind",
    "shots",
    "amplification",
    "quality",
    "tag",
    "sweep_id",
    "entry_id",
)


@dataclass(frozen=True)
class MatrixSnapshot:
    """The crosstalk matrix at one moment: the latest accepted entry per pair.

    Parameters
    ----------
    chip : str
        Chip the ledger belongs to.
    entries : Mapping[tuple[str, str], LedgerEntry]
        ``(aggressor, victim) -> entry``; only accepted entries.
    as_of_s : float
        Rig time of the snapshot, s (``inf`` for the current matrix).
    last_seq : int
        Highest commit sequence number the ledger held when the snapshot was taken.
    """

    chip: str
    entries: Mapping[tuple[str, str], LedgerEntry]
    as_of_s: float
    last_seq: int

    def __len__(self) -> int:
        return len(self.entries)

    def __contains__(self, pair: object) -> bool:
        return pair in self.entries

    def __getitem__(self, pair: tuple[str, str]) -> LedgerEntry:
        return self.entries[pair]

    def __iter__(self) -> Iterator[tuple[str, str]]:
        return iter(self.entries)

    def value(self, aggressor: str, victim: str) -> complex:
        """Return X for one pair (dimensionless complex); raises KeyError if it has none."""
        return self.entries[(aggressor, victim)].value

    def to_dataset(
        self, *, aggressors: Iterable[str] | None = None, victims: Iterable[str] | None = None
    ) -> xr.Dataset:
        """Return the matrix as an ``xarray.Dataset`` with dims ``victim`` x ``aggressor``.

        The dimensions follow ``X_ij``: the victim qubit ``i`` first (rows), the aggressor
        line ``j`` second (columns), as in the heat maps.

        Parameters
        ----------
        aggressors, victims : iterable of str, optional
            Names (and order) of the columns and rows; default: every name in the snapshot,
            sorted. Pairs without an accepted entry hold NaN (numbers) or ``""`` (text).

        Returns
        -------
        xarray.Dataset
            Variables ``x_real``, ``x_imag`` (linear), ``magnitude_db`` (dB), ``phase_rad``
            (rad), their standard errors, ``frequency_ghz`` (GHz), ``measured_at_s`` (s),
            ``measured_at_utc``, ``method``, ``kind``, ``shots``, ``amplification``,
            ``quality``, ``tag``, ``sweep_id``, ``entry_id`` and the boolean ``present``;
            each with ``units``/``long_name`` attrs.
        """
        pairs = list(self.entries)
        cols = list(aggressors) if aggressors is not None else sorted({a for a, _ in pairs})
        rows = list(victims) if victims is not None else sorted({v for _, v in pairs})
        r_index = {v: k for k, v in enumerate(rows)}
        c_index = {a: k for k, a in enumerate(cols)}
        chosen = [(p, e) for p, e in self.entries.items() if p[1] in r_index and p[0] in c_index]
        table = _entry_table([e for _, e in chosen])
        ri = np.array([r_index[p[1]] for p, _ in chosen], dtype=int)
        ci = np.array([c_index[p[0]] for p, _ in chosen], dtype=int)
        shape = (len(rows), len(cols))
        dims = ("victim", "aggressor")
        data_vars: dict[str, Any] = {}
        for name in _MATRIX_VARS:
            col = table[name]
            grid = np.full(
                shape,
                "" if col.dtype.kind == "U" else np.nan,
                dtype=col.dtype if col.dtype.kind != "U" else object,
            )
            grid[ri, ci] = col
            if col.dtype.kind == "U":
                grid = grid.astype(str)
            data_vars[name] = (dims, grid, _VIEW_ATTRS[name])
        present = np.zeros(shape, dtype=bool)
        present[ri, ci] = True
        data_vars["present"] = (dims, present, {"long_name": "pair has an accepted entry"})
        return xr.Dataset(
            data_vars,
            coords={
                "victim": ("victim", np.array(rows, dtype=str), {"long_name": "victim qubit"}),
                "aggressor": (
                    "aggressor",
                    np.array(cols, dtype=str),
                    {"long_name": "aggressor drive line"},
                ),
            },
            attrs={
                "chip": self.chip,
                "as_of_s": self.as_of_s,
                "last_seq": self.last_seq,
                "definition": "X = C_victim,aggressor / C_victim,victim at the aggressor tone",
                "db_convention": "20*log10 of the amplitude ratio",
                "axes": "X_ij: victim i first (rows), aggressor line j second (columns)",
            },
        )
