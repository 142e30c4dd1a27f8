"""What one calibration pass measures: its batches, the points it keeps, their column fit
and the sweep record it leaves in the result.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import xarray as xr

from xtalkcal.fits import (
    ColumnNullFit,
    RejectionReason,
    VerdictRules,
    column_rejected,
    fit_paraboloid_column,
    linearise_fringe,
    ring_wraps,
)
from xtalkcal.hardware import Rig
from xtalkcal.measure import BatchRunner, ColumnProbe

_RULES = VerdictRules(mismatch_pvalue=0.0)


def measure_probe(runner: BatchRunner, probe: ColumnProbe, points: np.ndarray, shots: int,
                  key: str):
    """Run a probe at ``points`` (n, V) as one recorded batch; its :class:`ProbeSignals`.

    Stark probes get their reference timelines (no aggressor) in the same batch.
    """
    tls = probe.timelines(points, label=f"{key}:")
    ref = probe.reference_timelines(label=f"{key}:ref") if probe.has_stark else []
    counts = runner.run(key, tls + ref, shots)
    n = len(tls)
    main = _slice(counts, 0, n)
    refc = _slice(counts, n, n + len(ref)) if ref else None
    return probe.signals(main, points.shape[0], refc)


def shots_per_point(nominal: int, nominal_points: int, points: int) -> int:
    """Shots per point that keep a ring's total at ``nominal × nominal_points``."""
    return max(50, int(round(nominal * max(nominal_points, 1) / points)))


def null_sigma(e) -> float:
    """1σ semi-major axis of an estimate's null, made honest by its Birge ratio.

    Parameters
    ----------
    e : NullEstimate
        An accepted estimate.
    """
    return e.position_stderr * math.sqrt(birge_ratio(e))


def birge_ratio(e) -> float:
    """max(1, reduced chi-square): the factor that makes a covariance honest.

    Parameters
    ----------
    e : NullEstimate
        Any estimate; a non-finite reduced chi-square counts as 1.
    """
    chi = e.reduced_chi2
    return max(1.0, float(chi)) if math.isfinite(chi) else 1.0


class PassRecord:
    """The points one pass has measured, in order, and the column fit of them.

    Parameters
    ----------
    runner : BatchRunner
        Runs and records the batches.
    rig : Rig
        Its clock dates the data when the runner has none.
    key_prefix : str
        Prefix of every batch key.
    n_victims : int
        V: the first V columns of a point are the victims' tones, the rest the
        companions' (tones of victims nulled in another pass).
    has_tones : bool
        Whether the pass has companions (their tones go into the column model).
    """

    def __init__(self, runner: BatchRunner, rig: Rig, key_prefix: str, n_victims: int,
                 has_tones: bool) -> None:
        self.runner = runner
        self.rig = rig
        self.key_prefix = key_prefix
        self.n_victims = n_victims
        self.has_tones = has_tones
        self.points: list[np.ndarray] = []  # victims' tones, (n, V) per batch
        self.tones: list[np.ndarray] = []  # companions' tones, (n, C) per batch
        self.signal: list[np.ndarray] = []
        self.stderr: list[np.ndarray] = []
        self.shots: list[np.ndarray] = []
        self.rounds: list[np.ndarray] = []
        self.repeats: list[np.ndarray] = []  # amplification K of each point

    def measure(self, probe: ColumnProbe, points: np.ndarray, shots: int, key: str,
                rnd: int) -> None:
        """Measure ``points`` (n, V + C) with ``probe`` as batch ``key`` of round ``rnd``."""
        V = self.n_victims
        s = measure_probe(self.runner, probe, points, shots, self.key_prefix + key)
        self.repeats.append(np.full(points.shape[0], probe.repeats))
        self.points.append(points[:, :V])
        self.tones.append(points[:, V:])
        self.signal.append(s.signal)
        self.stderr.append(s.stderr)
        self.shots.append(s.shots)
        self.rounds.append(np.full(points.shape[0], rnd))

    def last_ring(self) -> np.ndarray:
        """The victims' tones of the latest batch, (n, V): its centre first."""
        return self.points[-1]

    def spent(self) -> int:
        """Shots spent so far per victim."""
        return sum(int(s.sum()) for s in self.shots) // max(self.n_victims, 1)

    def victim_shots(self, i: int) -> int:
        """Shots victim ``i`` was read out with over the whole pass."""
        return int(np.vstack(self.shots)[:, i].sum())

    def data_time(self) -> float:
        """When the latest data were taken (rig clock, s): a resumed batch keeps its time."""
        t = self.runner.last_finished_s
        return float(t) if t is not None else self.rig.now()

    def fit(self, k: int, searched: np.ndarray, stark_rows: np.ndarray) -> ColumnNullFit:
        """Column fit of the points taken at amplification ``k``.

        Parameters
        ----------
        k : int
            Amplification K whose points are fitted.
        searched : ndarray of bool (V,)
            Victims whose null is being searched (their survey ring leaves the fit once
            two rings are centred near the null).
        stark_rows : ndarray of bool (V,)
            Victims read out by a Stark phase (each round gets its own offset).
        """
        use = np.concatenate(self.repeats) == k
        Z = np.vstack(self.points).T[:, use]  # (V, n)
        S = np.vstack(self.signal).T[:, use]
        E = np.vstack(self.stderr).T[:, use].copy()
        # Once a resonant victim has two rings centred near its null, the wide survey
        # ring is dropped from its fit (a weight of ~0): sin² signals are symmetric in
        # |z − z*| but not quadratic, and mixing radii far apart would bias z*. A Stark
        # phase is quadratic at any radius the survey uses, so its survey points stay.
        rnd = np.concatenate(self.rounds)[use]
        if rnd.max() >= 2 and (rnd == 0).any():
            E[np.ix_(searched & ~stark_rows, rnd == 0)] *= 1e6
        # The other victims' tones are in the model (fit_paraboloid_column): each null is
        # that of the aggressor's leak alone, and the couplings between the victims'
        # lines at this frequency come out too. Weak non-quadratic terms remain: the
        # covariance is scaled by the reduced chi-square (Birge ratio) instead of
        # rejecting the fit for them.
        # Stark signals are referred to one reference measurement per batch (round):
        # each round gets its own offset, which absorbs that shared error.
        groups = np.zeros(Z.shape, dtype=np.int64)
        groups[stark_rows] = rnd
        tones = np.vstack(self.tones).T[:, use] if self.has_tones else None
        col = fit_paraboloid_column(Z, S, E, groups=groups, tones=tones, rules=_RULES)
        # Resonant signals saturate as sin²: refit them unfolded about the floors just
        # found (linearise_fringe), else an off-centre ring pulls each null towards its
        # centre by several σ once K is raised.
        rows = [i for i in range(Z.shape[0]) if not stark_rows[i] and col.estimates[i].accepted]
        if rows:
            S, E = S.copy(), E.copy()
            floors = np.array([col.estimates[i].floor for i in rows])[:, None]
            S[rows], E[rows] = linearise_fringe(S[rows], E[rows], floors)
            col = fit_paraboloid_column(Z, S, E, groups=groups, tones=tones, rules=_RULES)
        return self._wrapped_rejected(col, k, stark_rows)

    def wrapped(self, k: int, stark_rows: np.ndarray) -> np.ndarray:
        """Per victim: whether a Stark ring measured at ``k`` read phases that wrapped.

        Each batch is one ring (its centre first); see :func:`xtalkcal.fits.ring_wraps`.
        """
        out = np.zeros(self.n_victims, bool)
        for pts, sig, reps in zip(self.points, self.signal, self.repeats, strict=True):
            if reps[0] != k:
                continue
            for i in np.flatnonzero(stark_rows):
                out[i] |= ring_wraps(pts[:, i], sig[:, i])
        return out

    def _wrapped_rejected(self, col: ColumnNullFit, k: int, stark_rows: np.ndarray
                          ) -> ColumnNullFit:
        """The column fit with every Stark victim whose readings wrapped rejected.

        A wrapped ring is no evidence about the null (a strong pair's ring past the
        read-out range looks flat: "no signal"), and its fit is meaningless: such a
        victim is ``saturated``, which the caller cures with a shorter train.
        """
        wrapped = self.wrapped(k, stark_rows)
        if not wrapped.any():
            return col
        est = list(col.estimates)
        for i in np.flatnonzero(wrapped):
            e = est[i]
            est[i] = column_rejected(
                RejectionReason.SATURATED, "the Stark phase readings wrapped around the ring "
                "(the phase passed the read-out range)", e.n_points, e.dof)
        cp, ce = col.couplings.copy(), col.couplings_stderr.copy()
        cp[wrapped], ce[wrapped] = np.nan, np.nan
        return replace(col, estimates=tuple(est), couplings=cp, couplings_stderr=ce)

    def dataset(self, victims, companions, final, couplings: ColumnNullFit,
                attrs: dict) -> xr.Dataset:
        """The pass's sweep record: every point, the final curvatures and the couplings.

        Parameters
        ----------
        victims, companions : sequence of str
            Names of the victims and of the companions (the columns of the points).
        final : sequence of NullEstimate
            Per victim, the estimate the pass reports (its curvature is recorded).
        couplings : ColumnNullFit
            The fit whose couplings are recorded.
        attrs : dict
            Attributes of the dataset.
        """
        Z = np.vstack(self.points).T  # victim first (X_ij: victim i), then the point
        extra = {}
        if companions:
            T = np.vstack(self.tones).T
            extra = {
                "tone_re": (("companion", "point"), T.real, {
                    "units": "fraction of full scale",
                    "long_name": "tone of a victim nulled in another pass, real part"}),
                "tone_im": (("companion", "point"), T.imag, {
                    "units": "fraction of full scale", "long_name": "same, imaginary part"}),
            }
        kap = np.array([e.curvature if e.accepted else math.nan for e in final])
        kap_err = np.array([e.curvature_stderr * math.sqrt(birge_ratio(e)) if e.accepted
                            else math.nan for e in final])
        rel = {"units": "relative to the victim's own line"}
        units = _signal_units(str(attrs.get("methods", "")), len(victims))
        sig_units = units[0] if len(set(units)) == 1 else "per victim: signal_units"
        kap_units = "signal per (fraction of full scale)²"
        return xr.Dataset(
            {
                **extra,
                "curvature": (("victim",), kap, {
                    "long_name": "fitted curvature κ of the signal", "units": kap_units}),
                "curvature_stderr": (("victim",), kap_err, {
                    "long_name": "standard error of κ (Birge-scaled)", "units": kap_units}),
                "z_re": (("victim", "point"), Z.real, {
                    "units": "fraction of full scale",
                    "long_name": "cancellation tone, real part"}),
                "z_im": (("victim", "point"), Z.imag, {
                    "units": "fraction of full scale",
                    "long_name": "cancellation tone, imag part"}),
                "signal": (("victim", "point"), np.vstack(self.signal).T, {
                    "units": sig_units, "long_name": "error signal: P(|2>) (leakage), "
                    "P(|1>) (rotation) or Stark phase (stark)"}),
                "stderr": (("victim", "point"), np.vstack(self.stderr).T, {
                    "units": sig_units, "long_name": "standard error of the error signal"}),
                "shots": (("victim", "point"), np.vstack(self.shots).T, {
                    "units": "shots", "long_name": "shots read out for the point"}),
                "coupling_re": (("victim", "from_victim"), couplings.couplings.real, {
                    "long_name": "field at victim from from_victim's line, real part", **rel}),
                "coupling_im": (("victim", "from_victim"), couplings.couplings.imag, {
                    "long_name": "same, imaginary part", **rel}),
                "coupling_stderr": (("victim", "from_victim"), couplings.couplings_stderr, {
                    "long_name": "standard error of the coupling (√trace)", **rel}),
            },
            coords={
                "victim": list(victims), "from_victim": list(victims) + list(companions),
                **({"companion": list(companions)} if companions else {}),
                # K and the round tell the points apart: ds.where(ds.repeats == 4)
                "repeats": ("point", np.concatenate(self.repeats), {
                    "units": "1", "long_name": "amplification K (aggressor pulse "
                    "repetitions)"}),
                "round": ("point", np.concatenate(self.rounds), {
                    "units": "1", "long_name": "search round (0: the survey ring)"}),
                "signal_units": ("victim", np.array(units, dtype=str),
                                 {"long_name": "units of the victim's signal and stderr"}),
            },
            attrs={**attrs, "axes": "victim first, point second (X_ij: victim i, the "
                   "aggressor line j is the attribute aggressor)"},
        )


def _signal_units(methods: str, n: int) -> list[str]:
    """Per victim, the unit of its signal: ``"1"`` for a probability, ``"rad"`` (Stark)."""
    names = methods.split(",") if methods else []
    names = names if len(names) == n else [""] * n
    return ["rad" if m == "stark" else "1" for m in names]

def _slice(counts, a: int, b: int):
    from xtalkcal.hardware import Counts

    return Counts(counts.qubits, counts.counts[a:b], counts.shots, counts.started_s,
                  counts.finished_s)
