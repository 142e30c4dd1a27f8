"""Simultaneous against isolated benchmarks: does compensation bring each qubit's error back to
its isolated value?
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import xarray as xr

from xtalkcal.exceptions import FitInputError, TimelineError
from xtalkcal.hardware import Rig
from xtalkcal.measure import BatchRunner
from xtalkcal.verification.clifford import PRIMITIVES_PER_CLIFFORD, Transform
from xtalkcal.verification.rb import GateSet, RBFit, RBSequences, fit_rb_decay, run_rb
from xtalkcal.verification.trims import readout_offsets

# ----------------------------------------------------------------------------- comparison


@dataclass(frozen=True)
class QubitComparison:
    """One qubit: isolated vs simultaneous error per gate, per condition.

    Attributes
    ----------
    qubit : str
    isolated : RBFit
    simultaneous : dict of str → RBFit
        Keyed by condition (e.g. ``"uncompensated"``, ``"compensated"``).
    ratio : dict of str → (float, float)
        Simultaneous/isolated error per gate and its stderr (paired bootstrap over draws).
    """

    qubit: str
    isolated: RBFit
    simultaneous: Mapping[str, RBFit]
    ratio: Mapping[str, tuple[float, float]]


@dataclass(frozen=True)
class SimultaneousRBReport:
    """Isolated and simultaneous RB of a set of qubits, with run statistics.

    Attributes
    ----------
    qubits : tuple of str
    comparisons : tuple of QubitComparison
    data : dict of str → xarray.Dataset
        Survival data per run (``"isolated"`` and each simultaneous condition).
    wall_s : dict of str → float
        Wall time per run (s).
    victim_timelines : dict of str → int
        Simulated victim-timelines per run.
    offsets : dict of str → float or None
        The fixed asymptote B used per qubit (None: fitted).
    """

    qubits: tuple[str, ...]
    comparisons: tuple[QubitComparison, ...]
    data: Mapping[str, xr.Dataset] = field(repr=False)
    wall_s: Mapping[str, float]
    victim_timelines: Mapping[str, int]
    offsets: Mapping[str, float | None]

    def comparison(self, qubit: str) -> QubitComparison:
        return self.comparisons[self.qubits.index(qubit)]

    def to_dataset(self) -> xr.Dataset:
        """Error per gate (qubit, condition) with stderr; condition 0 is "isolated"."""
        conds = ["isolated"] + list(self.comparisons[0].simultaneous)
        epg = np.zeros((len(self.qubits), len(conds)))
        err = np.zeros_like(epg)
        for i, c in enumerate(self.comparisons):
            fits = [c.isolated] + [c.simultaneous[k] for k in conds[1:]]
            epg[i] = [f.error_per_gate for f in fits]
            err[i] = [f.error_per_gate_stderr for f in fits]
        return xr.Dataset(
            {"error_per_gate": (("qubit", "condition"), epg,
                                {"units": "1", "long_name": "error per gate"}),
             "error_per_gate_stderr": (("qubit", "condition"), err,
                                       {"units": "1", "long_name": "standard error"})},
            coords={"qubit": list(self.qubits), "condition": conds},
            attrs={"primitives_per_clifford": PRIMITIVES_PER_CLIFFORD},
        )

    def table(self) -> str:
        """A plain-text table of error per gate (×10⁻⁴) per qubit and condition."""
        conds = list(self.comparisons[0].simultaneous)
        head = f"{'qubit':6s} {'isolated':>16s}" + "".join(f" {c:>16s} {'ratio':>11s}"
                                                          for c in conds)
        lines = ["error per gate (×10⁻⁴), ± stderr; ratio = simultaneous/isolated, ± a paired "
                 "bootstrap over the shared sequences (their variance largely cancels)", head]
        for c in self.comparisons:
            iso = c.isolated
            row = (f"{c.qubit:6s} {1e4 * iso.error_per_gate:8.2f} ± "
                   f"{1e4 * iso.error_per_gate_stderr:5.2f}")
            for k in conds:
                f = c.simultaneous[k]
                rv, re = c.ratio[k]
                row += (f" {1e4 * f.error_per_gate:8.2f} ± {1e4 * f.error_per_gate_stderr:5.2f}"
                        f" {rv:5.2f}±{re:4.2f}")
            lines.append(row)
        return "\n".join(lines)


def _paired_ratio(lengths: np.ndarray, sim: np.ndarray, iso: np.ndarray, offset: float | None,
                  n_boot: int, rng: np.random.Generator) -> tuple[float, float]:
    """Ratio of error per gate simultaneous/isolated with a bootstrap that resamples the
    same draws in both (the sequences are shared, so their variance largely cancels)."""
    a = fit_rb_decay(lengths, sim, offset=offset, n_boot=0)
    b = fit_rb_decay(lengths, iso, offset=offset, n_boot=0)
    ratio = a.error_per_gate / b.error_per_gate
    nd = sim.shape[1]
    vals = []
    for _ in range(n_boot):
        idx = rng.integers(0, nd, size=(sim.shape[0], nd))
        try:
            fa = fit_rb_decay(lengths, np.take_along_axis(sim, idx, 1), offset=offset, n_boot=0)
            fb = fit_rb_decay(lengths, np.take_along_axis(iso, idx, 1), offset=offset, n_boot=0)
        except FitInputError:
            continue
        if fa.converged and fb.converged:
            vals.append(fa.error_per_gate / fb.error_per_gate)
    err = float(np.std(vals, ddof=1)) if len(vals) > 2 else float("nan")
    return float(ratio), err


def simultaneous_rb(rig: Rig, sequences: RBSequences, *, gates: GateSet = GateSet(),
                    transforms: Mapping[str, Transform | None] | None = None,
                    shots: int = 2000,
                    offset: float | Mapping[str, float] | Literal["measured"] | None = "measured",
                    runner: BatchRunner | None = None,
                    n_boot: int = 200, rng=None) -> SimultaneousRBReport:
    """Isolated RB of each qubit and simultaneous RB under each condition.

    Parameters
    ----------
    rig : Rig
    sequences : RBSequences
        Shared by all runs, so the comparison is paired draw by draw.
    gates : GateSet
    transforms : mapping of str → callable or None
        Simultaneous conditions; default ``{"uncompensated": None}``. A transform (e.g.
        ``lambda t: apply_to_timeline(t, settings, chip)``) is applied to every timeline.
    shots : int
        Shots per timeline.
    offset : float, mapping, "measured" or None
        Fixed asymptote B (dimensionless) per qubit; ``"measured"`` (default) measures it
        with :func:`readout_offsets`; None leaves it free.
    runner : BatchRunner, optional
    n_boot : int
        Bootstrap resamples for the standard errors.
    rng : int, Generator or None

    Returns
    -------
    SimultaneousRBReport
    """
    rng = np.random.default_rng(rng)
    transforms = {"uncompensated": None} if transforms is None else dict(transforms)
    if "isolated" in transforms:
        raise TimelineError("'isolated' is reserved for the isolated reference; rename the "
                            "condition")
    if isinstance(offset, str):
        if offset != "measured":
            raise FitInputError(f"offset must be a number, a mapping, 'measured' or None, "
                                f"got {offset!r}")
        offset = readout_offsets(rig, sequences.qubits, gates=gates, runner=runner)
    data = {"isolated": run_rb(rig, sequences, gates=gates, mode="isolated", shots=shots,
                               runner=runner, key="rbiso")}
    for name, tf in transforms.items():
        data[name] = run_rb(rig, sequences, gates=gates, mode="simultaneous", transform=tf,
                            shots=shots, runner=runner, key=f"rb{name}")
    comps = []
    lengths = np.asarray(sequences.lengths, dtype=float)
    for q in sequences.qubits:
        b = offset.get(q) if isinstance(offset, Mapping) else offset
        iso_y = data["isolated"]["survival"].sel(qubit=q).values
        iso = fit_rb_decay(lengths, iso_y, offset=b, n_boot=n_boot, rng=rng)
        sims, ratios = {}, {}
        for name in transforms:
            y = data[name]["survival"].sel(qubit=q).values
            sims[name] = fit_rb_decay(lengths, y, offset=b, n_boot=n_boot, rng=rng)
            ratios[name] = _paired_ratio(lengths, y, iso_y, b, n_boot, rng)
        comps.append(QubitComparison(q, iso, sims, ratios))
    return SimultaneousRBReport(
        tuple(sequences.qubits), tuple(comps), data,
        {k: float(v.attrs["wall_s"]) for k, v in data.items()},
        {k: int(v.attrs["victim_timelines"]) for k, v in data.items()},
        {q: (offset.get(q) if isinstance(offset, Mapping) else offset)
         for q in sequences.qubits},
    )
