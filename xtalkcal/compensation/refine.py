"""Closed-loop refinement: re-null every victim with all of its aggressor's tones on.

A calibration (:func:`xtalkcal.calibrate.calibrate_chip`) nulls the resonant victims of
an aggressor (leakage, rotation) in one pass and its Stark victims in a second, and the
multi-victim solve (:func:`xtalkcal.compensation.multi_victim_settings`) then needs how
every victim's line reaches every other victim at the aggressor's frequency. The second
pass measures how the first pass's lines reach its victims (their tones ring during it),
but not the reverse, and every coupling comes from sweeps centred at the nulls found
before the other tones were known.

:func:`refine_settings` closes that loop around the settings in use. For each aggressor,
each group of victims is measured again with

* its own tones on rings around their current settings (no survey: the rings start at
  the radius each victim's calibrated curvature gives, at the calibration's K; each
  resonant victim in a pass of its own, the Stark victims together), and
* every other tone of the column ringing around *its* current setting (companions),

so that the column fit (:func:`xtalkcal.fits.fit_paraboloid_column`) returns, near the
operating point, each victim's null of the aggressor alone and the couplings from every
other tone of the column — both directions. The multi-victim solve on those gives new
settings; the loop repeats from them until the settings' moves are what noise alone
explains (:func:`converged_sigma`), or ``rounds`` is reached. Every pass is
an ordinary calibration pass (same batches, same records, same fit verdicts), so its
result goes to the ledger like a calibration's.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from xtalkcal.calibrate import (
    RISE_PROBABILITY,
    RISE_STARK_RAD,
    CalibrationResult,
    PassRequest,
    PassStart,
    calibrate_pass,
    measured_couplings,
    nulled_pass_groups,
    pass_amplitude,
)
from xtalkcal.compensation.settings import CompensationSettings
from xtalkcal.compensation.solve import multi_victim_settings
from xtalkcal.hardware import Rig
from xtalkcal.measure import BatchRunner, Protocol, PulseShape

__all__ = ["Refinement", "refine_settings", "converged_sigma"]

# A refinement round has converged when its moves look like noise: the difference of two
# estimates of a setting has a circular error of about √2·σ, and the largest of N such
# moves exceeds k·√2·σ with probability ≈ N·e^{−k²/2}; k is taken for CONVERGED_RISK.
CONVERGED_RISK = 0.05


def converged_sigma(n_pairs: int) -> float:
    """Largest move (in σ of the new setting) that N pairs' noise alone explains."""
    return math.sqrt(2.0) * math.sqrt(2.0 * math.log(max(n_pairs, 1) / CONVERGED_RISK))


@dataclass
class Refinement:
    """Outcome of :func:`refine_settings`.

    Attributes
    ----------
    settings : CompensationSettings
        The refined settings (``solve = "closed-loop"``).
    results : list of CalibrationResult
        One per round: the passes measured around the settings of that round (pure
        nulls and couplings), ready for :func:`xtalkcal.store.ledger_entries`.
    moves : list of float
        Per round, the largest change of a setting in units of its standard error.
    converged : bool
    shots : int
        Shots the refinement spent.
    """

    settings: CompensationSettings
    results: list[CalibrationResult] = field(default_factory=list)
    moves: list[float] = field(default_factory=list)
    converged: bool = False
    shots: int = 0


def refine_settings(
    rig: Rig,
    protocol: Protocol,
    calibration: CalibrationResult,
    settings: CompensationSettings,
    *,
    runner: BatchRunner | None = None,
    aggressors: Sequence[str] | None = None,
    rounds: int = 2,
    key_prefix: str = "refine",
    log: Callable[[str], None] | None = None,
) -> Refinement:
    """Re-null each aggressor's victims around ``settings`` with all its tones on.

    Parameters
    ----------
    rig : Rig
    protocol : Protocol
        The calibration's protocol (pulse, null-search shots and stopping rule).
    calibration : CalibrationResult
        The calibration the settings came from: methods, amplification K and the
        curvature of each pair (the first ring's radius).
    settings : CompensationSettings
        The settings in use; every pair of an aggressor in it is refined together.
    runner : BatchRunner, optional
        Records the batches (resumable); a plain one is made if not given.
    aggressors : sequence of str, optional
        Lines to refine (default every line with settings).
    rounds : int
        Largest number of measure-and-solve rounds (≥ 1).
    key_prefix : str
        Prefix of the batch keys in the runner's record.
    log : callable, optional
        One line of progress per pass.
    """
    if rounds < 1:
        raise ValueError(f"rounds must be ≥ 1, got {rounds}")
    runner = runner or BatchRunner(rig)
    say = log or (lambda s: None)
    chip = rig.chip
    shape = PulseShape(protocol.pulse.duration_ns, protocol.pulse.sigma_ns)
    lines = list(aggressors) if aggressors is not None else sorted(
        {p.aggressor_line for p in settings})
    before = runner.shots_executed
    out = Refinement(settings)
    current = settings
    for rnd in range(1, rounds + 1):
        res = CalibrationResult(chip, protocol, rig.describe())
        for line in lines:
            pairs = {p.victim: p for p in current.for_aggressor(line)}
            if not pairs:
                continue
            amp = pass_amplitude(protocol, chip, line)
            cal = {v: calibration.pair(line, v) for v in pairs}
            # as the calibration nulled them; every other tone of the column rings
            for group in nulled_pass_groups({v: cal[v].method for v in pairs}):
                stark = cal[group[0]].method == "stark"
                other = [v for v in pairs if v not in group]
                K = max(cal[v].repeats for v in group)
                start = PassStart(
                    centres=tuple(pairs[v].ratio * amp for v in group),
                    radii=tuple(_first_radius(calibration, cal[v], K) for v in group),
                    repeats=K)
                calibrate_pass(rig, runner, protocol, res, PassRequest(
                    line, group, [cal[v].method for v in group], shape, stark=stark,
                    companions=tuple((v, pairs[v].ratio * amp) for v in other),
                    key_prefix=f"{key_prefix}{rnd}-", start=start), say=say)
        missing = [(p.aggressor, p.victim) for p in res.pairs if not p.accepted]
        if missing:
            # A pass that cannot locate a null it located before is not refined further:
            # the settings of the last good round stand.
            say("refinement stopped: no null for " + ", ".join(f"{a}→{v}" for a, v in missing))
            break
        new = multi_victim_settings(res, chip, couplings=measured_couplings(res))
        new = CompensationSettings(new.chip, tuple(replace(p, solve="closed-loop")
                                                   for p in new.pairs))
        move = max((abs(p.ratio - current.pair(*p.key).ratio) / max(p.stderr, 1e-12)
                    for p in new.pairs), default=0.0)
        out.results.append(res)
        out.moves.append(float(move))
        current = new
        say(f"refinement round {rnd}: largest move {move:.1f} σ")
        if move <= converged_sigma(len(new.pairs)):
            out.converged = True
            break
    out.settings = current
    out.shots = runner.shots_executed - before
    return out


def _first_radius(calibration: CalibrationResult, pair, repeats: int) -> float:
    """Ring radius at which the pair's signal rises by the calibration's amount."""
    ds = calibration.sweeps.get(pair.sweep_id)
    rise = RISE_STARK_RAD if pair.method == "stark" else RISE_PROBABILITY
    kappa = math.nan
    if ds is not None and "curvature" in ds:
        kappa = float(ds["curvature"].sel(victim=pair.victim))
        # resonant signals grow as K²: a curvature at the pair's K scaled to this K
        kappa *= (repeats / pair.repeats) ** 2 if pair.method != "stark" else 1.0
    if not (math.isfinite(kappa) and kappa > 0):
        return math.inf  # the pass caps it at the survey radius
    return float(np.sqrt(rise / kappa))
