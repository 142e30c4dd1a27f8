"""Drift over simulated days: scheduled re-checks versus fixed recalibration, on many chips.

Two policies run on the same simulated chip with the same seed (so the same drift paths):

A (scheduled re-checks)
    Calibrate the chosen aggressor columns once, then repeatedly advance the rig clock to
    the earliest due time of the schedule and call :func:`xtalkcal.drift.run_due`, which
    re-checks what is due, re-centres pairs whose re-check located the moved null, and
    recalibrates the columns of pairs that drifted too far or broke.
B (baseline)
    Recalibrate the same columns in full every 6 simulated hours.

Every 10 simulated minutes the truth is compared with the compensation in use (the
ledger's current value X_current of the pair, as it stood at that instant): the true
residual |X_true(t) − X_current| in dB, for every pair nulled by the initial calibration.

Chips: generated ones (:mod:`simulated_device.family`, small so that a week runs in
reasonable time) at two drift levels, and optionally the bundled demo chip:

``demo``
    the bundled demo chip's drift: every phase walks 0.02 rad/√h, magnitudes 0.32 %/√h,
    28 % of the couplings drift linearly at up to 60 mrad/h, qubits wander by 20 kHz;
``fast``
    phase walk 0.02 rad/√h, magnitude walk 0.5 %/√h on every coupling and linear drift of
    up to 12 mrad/h on a quarter of them (four times a well-thermalised setup's).

One chip (``--step-chip``) also gets a 3 dB step of one coupling in a calibrated column at
``--step-hours``. Printed per case: % of (pair, sample) points within the protocol's
re-check tolerance, shots and their ratio, re-checks (broken, rejected entries),
recalibrations, and for the step: how many hours after it policy A's re-check caught it,
whether that was the first re-check of the pair after it, and when the pair was back in
tolerance. Targets: at the demo drift A keeps ≥ 99 % of the samples within tolerance at
≤ 0.2× B's shots; at the fast drift A is within tolerance at least as often as B at
≤ 0.5× its shots; the step is caught at the first re-check after it.

The two policies of a case run in two processes at once (``--jobs 1`` runs them in turn).

Usage::

    python benchmarks/bench_drift.py [--chips 3] [--qubits 6] [--days 7] [--drift demo fast]
                                     [--columns-per-chip 1] [--step-chip 0] [--step-hours 60]
                                     [--demo-chip --columns q4-line q6-line] [--seed 7] [--jobs 2]
"""

from __future__ import annotations

import argparse
import math
import os
import re
import tempfile
import time
from collections import Counter
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from simulated_device import SimRig, demo_device_path, device_from_dict, load_device
from simulated_device.family import FamilyParams, generate_device
from xtalkcal.calibrate import calibrate_chip
from xtalkcal.drift import Schedule, run_due, schedule_after_calibration
from xtalkcal.measure import BatchRunner, load_protocol
from xtalkcal.store import Ledger, ledger_entries, ledger_sweeps

PROTOCOL = "protocols/full.toml"
SAMPLE_S = 600.0  # truth sampled every 10 simulated minutes
BASELINE_EVERY_H = 6.0
TARGET_FRACTION = 0.99  # demo drift: fraction of samples within tolerance under A
TARGET_SHOT_RATIO = 0.20  # demo drift: shots(A)/shots(B)
TARGET_FAST_SHOT_RATIO = 0.50  # fast drift: shots(A)/shots(B), A at least B's fraction

# Drift levels of the generated chips (FamilyParams fields); see the module docstring.
DRIFT_LEVELS = {
    "demo": dict(phase_walk_rad_per_sqrt_h=0.02, magnitude_walk_per_sqrt_h=0.00316,
                 linear_fraction=0.28, linear_rate_rad_per_hour=0.06, qubit_wander_mhz=0.02),
    "fast": dict(phase_walk_rad_per_sqrt_h=0.02, magnitude_walk_per_sqrt_h=0.005,
                 linear_fraction=0.25, linear_rate_rad_per_hour=0.012),
}

Pair = tuple[str, str]


@dataclass
class PolicyRun:
    """What one policy did; plain data so that it crosses a process boundary."""

    name: str
    ledger_path: str
    shots: int = 0
    initial_shots: int = 0
    initial_end_s: float = 0.0
    wall_s: float = 0.0
    nulled: list[Pair] = field(default_factory=list)
    calibrations: int = 0  # full column-set calibrations (policy B), initial included
    # Policy A: one row per re-checked pair: (t_s, pair, decision, residual_db, accepted,
    # next interval h, the outcome's reason, the entry's reason, reduced chi-square, null
    # shift in ring radii, the signal shots behind the re-check).
    checks: list[tuple] = field(default_factory=list)
    recentred: list[tuple[float, Pair]] = field(default_factory=list)
    recalibrated: list[tuple[float, str]] = field(default_factory=list)
    due_calls: int = 0
    recheck_shots: int = 0  # policy A: re-checks (repeats included)
    recal_shots: int = 0  # policy A: column recalibrations
    triggers: list[str] = field(default_factory=list)  # pairs behind A's recalibrations


def _initial(rig, proto, runner, columns, ledger, run: PolicyRun):
    res = calibrate_chip(rig, proto, runner=runner, aggressors=columns)
    ledger.append(ledger_entries(res, run_tag="initial"),
                  sweeps=ledger_sweeps(res, run_tag="initial"))
    run.initial_shots = runner.shots_executed
    run.initial_end_s = rig.now()
    run.nulled = sorted((p.aggressor, p.victim) for p in res.pairs if p.accepted and p.nulled)
    run.calibrations = 1
    return res


def _device(device: str | dict):
    return device_from_dict(device) if isinstance(device, dict) else load_device(device)


def run_policy(name: str, device: str | dict, columns: list[str], days: float, seed: int,
               workdir: str) -> PolicyRun:
    """Run policy ``"A"`` or ``"B"`` for ``days`` of rig time; the ledger stays in ``workdir``.

    Parameters
    ----------
    name : {"A", "B"}
    device : str or dict
        Device file path, or a generated device document.
    columns : list of str
        Aggressor lines calibrated.
    days : float
        Length of the run in simulated days (rig clock from 0).
    seed : int
        Simulator seed (the same for both policies, hence the same drift).
    workdir : str
        Directory in which the policy's ledger is created.
    """
    t0 = time.perf_counter()
    proto = load_protocol(PROTOCOL)
    rig = SimRig(_device(device), seed=seed, drift=True)
    runner = BatchRunner(rig)
    path = os.path.join(workdir, f"ledger-{name}")
    ledger = Ledger.create(path, chip=rig.chip.name)
    run = PolicyRun(name, path)
    res = _initial(rig, proto, runner, columns, ledger, run)
    end_s = days * 86400.0
    if name == "A":
        schedule = Schedule(proto.recheck)
        schedule_after_calibration(schedule, res, rig.now())
        while len(schedule):
            due_s = min(schedule.slot(p).due_s for p in schedule.pairs())
            if due_s >= end_s:
                break
            rig.wait(max(0.0, due_s - rig.now()))
            rep = run_due(rig, proto, ledger, schedule, runner=runner)
            run.due_calls += 1
            run.recheck_shots += rep.recheck_shots
            run.recal_shots += rep.recalibration_shots
            for c in rep.checked:
                pair = (c.aggressor, c.victim)
                slot = schedule.slot(pair) if pair in schedule else None
                run.checks.append((
                    c.entry.measured_at_s, pair, c.outcome.decision.value,
                    float(c.outcome.residual_db), c.entry.verdict == "accepted",
                    slot.interval_h if slot else math.nan, c.outcome.reason, c.entry.reason,
                    float(c.outcome.reduced_chi2),
                    float(abs(c.outcome.null_shift) / c.outcome.probe_radius),
                    int(c.entry.shots),
                ))
            run.recentred += [(rep.now_s, p) for p in rep.recentred]
            run.recalibrated += [(rep.now_s, a) for a in rep.recalibrated]
            for a in rep.recalibrated:
                # run_due recalibrates a column for a broken or drifted pair whose re-check
                # cannot replace the stored null: name those pairs and how sure the re-check was.
                run.triggers += [
                    f"{a}→{c.victim} {c.outcome.decision.value}"
                    + (" (confident)" if c.outcome.confident else " (point estimate only)"
                       if c.outcome.decision.value == "drifted" else "")
                    for c in rep.checked
                    if c.aggressor == a and c.outcome.decision.value != "within"]
    elif name == "B":
        k = 1
        while k * BASELINE_EVERY_H * 3600.0 < end_s:
            rig.wait(max(0.0, k * BASELINE_EVERY_H * 3600.0 - rig.now()))
            res = calibrate_chip(rig, proto, runner=runner, aggressors=columns)
            tag = f"recal{k:03d}"
            ledger.append(ledger_entries(res, run_tag=tag), sweeps=ledger_sweeps(res, run_tag=tag))
            run.calibrations += 1
            k += 1
    else:
        raise ValueError(f"unknown policy {name!r}")
    run.shots = runner.shots_executed
    run.wall_s = time.perf_counter() - t0
    return run


def compensation_in_use(ledger: Ledger, pair: Pair, times: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray]:
    """X_current of ``pair`` at each time (NaN before its first accepted entry) and its frequency.

    Same rule as :meth:`Ledger.as_of`: the latest accepted entry measured by then, in the
    ledger's own history order.
    """
    hist = [e for e in ledger.history(*pair) if e.accepted]
    at = np.array([e.measured_at_s for e in hist])
    vals = np.array([e.value for e in hist], dtype=complex)
    freqs = np.array([e.frequency_ghz for e in hist])
    idx = np.searchsorted(at, times, side="right") - 1
    x = np.where(idx >= 0, vals[np.clip(idx, 0, None)], complex(math.nan, math.nan))
    f = np.where(idx >= 0, freqs[np.clip(idx, 0, None)], math.nan)
    return x, f


def residual_db(truth: SimRig, ledger: Ledger, pairs: list[Pair], times: np.ndarray
                ) -> dict[Pair, np.ndarray]:
    """True residual |X_true(t) − X_current(t)| in dB per pair at ``times``."""
    out = {}
    for pair in pairs:
        a, v = pair
        x, f = compensation_in_use(ledger, pair, times)
        r = np.full(times.shape, math.inf)
        for i, (t, xi, fi) in enumerate(zip(times, x, f, strict=True)):
            if np.isfinite(fi):
                r[i] = 20 * math.log10(max(abs(truth.true_crosstalk(v, a, fi, t_s=t) - xi),
                                           1e-12))
        out[pair] = r
    return out


def fresh_residuals(truth: SimRig, ledger: Ledger, pairs: list[Pair]) -> dict[Pair, np.ndarray]:
    """True residual (dB) of every accepted calibration entry at the moment it was measured.

    This is the floor a calibration itself reaches, before any drift acts on it.
    """
    out = {}
    for a, v in pairs:
        out[(a, v)] = np.array([
            20 * math.log10(max(abs(truth.true_crosstalk(v, a, e.frequency_ghz,
                                                         t_s=e.measured_at_s) - e.value), 1e-12))
            for e in ledger.history(a, v) if e.accepted and e.kind in ("null", "survey")])
    return out


def _excursions(t_h: np.ndarray, r: np.ndarray, tol: float) -> list[tuple[float, float, float]]:
    """(start h, end h, peak dB) of each run of consecutive samples above tolerance."""
    out = []
    bad = r > tol
    i = 0
    while i < len(r):
        if bad[i]:
            j = i
            while j + 1 < len(r) and bad[j + 1]:
                j += 1
            out.append((float(t_h[i]), float(t_h[j]), float(r[i:j + 1].max())))
            i = j + 1
        else:
            i += 1
    return out


@dataclass
class Case:
    """One chip at one drift level: what both policies did, and the figures."""

    label: str
    drift: str
    columns: list[str]
    pairs: list[Pair]
    tol: float
    runA: PolicyRun
    runB: PolicyRun
    resA: dict[Pair, np.ndarray]
    resB: dict[Pair, np.ndarray]
    t_h: np.ndarray
    floorB: dict[Pair, np.ndarray]
    step: tuple[float, Pair] | None  # (at h, pair) of a step in a calibrated column

    def fraction(self, res: dict[Pair, np.ndarray]) -> float:
        if not self.pairs:
            return math.nan
        return float(np.mean(np.concatenate([res[p] for p in self.pairs]) <= self.tol))

    @property
    def ratio(self) -> float:
        return self.runA.shots / self.runB.shots

    def broken(self) -> int:
        return sum(c[2] == "broken" for c in self.runA.checks)

    def rejected(self) -> int:
        return sum(not c[4] for c in self.runA.checks)

    def step_figures(self) -> dict[str, object] | None:
        """Policy A's first re-check of the step pair after the step, and when both policies
        were back in tolerance."""
        if self.step is None or self.step[1] not in self.pairs:
            return None
        at_h, pair = self.step
        after = [c for c in self.runA.checks if c[1] == pair and c[0] / 3600 >= at_h]
        caught = next((c for c in after if c[2] != "within"), None)
        back = {}
        for name, res in (("A", self.resA), ("B", self.resB)):
            r = res[pair]
            out = np.nonzero((self.t_h >= at_h) & (r > self.tol))[0]
            if not out.size:
                back[name] = 0.0
                continue
            ok = np.nonzero((self.t_h > self.t_h[out[0]]) & (r <= self.tol))[0]
            back[name] = float(self.t_h[ok[0]] - at_h) if ok.size else math.inf
        return {
            "pair": pair, "at_h": at_h,
            "caught_after_h": math.inf if caught is None else caught[0] / 3600 - at_h,
            "first_check": bool(after) and caught is after[0],
            "back_A_h": back["A"], "back_B_h": back["B"],
        }


def _line_number(line: str) -> int:
    """The qubit number in a line's name (``q12-line`` → 12), for a stable order."""
    m = re.search(r"\d+", line)
    return int(m.group()) if m else -1


def choose_columns(doc: dict, n: int) -> list[str]:
    """The stepped line first, then the lines with the most couplings of |X| ≥ −40 dB."""
    strong = Counter(c["line"] for c in doc["couplings"] if c["crosstalk_db"] >= -40.0)
    order = sorted(strong, key=lambda line: (-strong[line], _line_number(line)))
    first = [s["line"] for s in doc.get("steps", [])]
    return list(dict.fromkeys(first + order))[:n]


def run_case(label: str, drift: str, device: str | dict, columns: list[str], days: float,
             seed: int, jobs: int) -> Case:
    """Both policies on one chip; the true residuals of both at every sample time."""
    proto = load_protocol(PROTOCOL)
    tol = proto.recheck.tolerance_db
    with tempfile.TemporaryDirectory(prefix="bench-drift-") as work:
        job_args = [(n, device, columns, days, seed, work) for n in ("A", "B")]
        if jobs == 2:
            with ProcessPoolExecutor(max_workers=2) as ex:
                runA, runB = (f.result() for f in [ex.submit(run_policy, *j) for j in job_args])
        else:
            runA, runB = (run_policy(*j) for j in job_args)
        ledA, ledB = Ledger(runA.ledger_path), Ledger(runB.ledger_path)
        # Same seed, same shots before the first entry: the initial calibrations coincide.
        pairs = runA.nulled
        if runB.nulled != pairs:
            print(f"note: initial calibrations differ: A nulled {pairs}, B nulled {runB.nulled}")
        truth = SimRig(_device(device), seed=seed, drift=True)
        start = math.ceil(max(runA.initial_end_s, runB.initial_end_s) / SAMPLE_S) * SAMPLE_S
        times = np.arange(start, days * 86400.0 + 0.5, SAMPLE_S)
        resA = residual_db(truth, ledA, pairs, times)
        resB = residual_db(truth, ledB, pairs, times)
        floorB = fresh_residuals(truth, ledB, pairs)
    steps = [(s.at_hours, (s.line, s.qubit)) for s in truth.device.steps
             if s.line in columns and s.at_hours < days * 24]
    return Case(label, drift, columns, pairs, tol, runA, runB, resA, resB, times / 3600.0,
                floorB, steps[0] if steps else None)


def print_case(case: Case, detail: bool) -> None:
    """One case: the two policies' figures, what A did, and (with ``detail``) per pair."""
    tol, pairs, runA, runB = case.tol, case.pairs, case.runA, case.runB
    print(f"== {case.label}, drift {case.drift}: columns {' '.join(case.columns)}; "
          f"{len(pairs)} pairs nulled")
    for name, run, res in (("A", runA, case.resA), ("B", runB, case.resB)):
        per = {p: float(np.mean(res[p] <= tol)) for p in pairs}
        worst = min(per, key=per.get) if per else None
        print(f"  [{name}] within {100 * case.fraction(res):.2f} %"
              + (f"; worst pair {worst[0]}→{worst[1]} {100 * per[worst]:.2f} %" if worst else "")
              + f"; shots {run.shots:,} (initial {run.initial_shots:,}); wall {run.wall_s:.0f} s")
    decisions = Counter(c[2] for c in runA.checks)
    print(f"  A did {len(runA.checks)} re-checks in {runA.due_calls} run_due calls ("
          + ", ".join(f"{k} {n}" for k, n in sorted(decisions.items()))
          + f"; {case.rejected()} entries rejected), {len(runA.recentred)} re-centrings, "
          f"{len(runA.recalibrated)} column recalibrations; shots(A)/shots(B) = {case.ratio:.3f}")
    n_checks = max(len(runA.checks), 1)
    print(f"  A's shots: initial {runA.initial_shots:,}, re-checks {runA.recheck_shots:,} "
          f"({runA.recheck_shots / n_checks:,.0f} per re-check), recalibrations "
          f"{runA.recal_shots:,}; B's: {runB.calibrations} calibrations of "
          f"{runB.shots / max(runB.calibrations, 1):,.0f} on average")
    if runA.triggers:
        print("  recalibrations triggered by: " + ", ".join(
            f"{k} ×{n}" for k, n in Counter(runA.triggers).most_common()))
    reasons = Counter((c[6] if c[2] == "broken" else c[7]).split("(")[0].strip()[:60]
                      for c in runA.checks if c[2] == "broken" or not c[4])
    if reasons:
        print("  broken or rejected because: " + "; ".join(
            f"{k} ×{n}" for k, n in reasons.most_common(5)))
    sf = case.step_figures()
    if sf is not None:
        a, v = sf["pair"]
        print(f"  step at {sf['at_h']:g} h on {a}→{v}: caught by A {sf['caught_after_h']:.1f} h "
              f"after it ({'the first' if sf['first_check'] else 'not the first'} re-check "
              f"after it); back in tolerance after A {sf['back_A_h']:.1f} h, "
              f"B {sf['back_B_h']:.1f} h")
    if not detail:
        return
    intervals: dict[Pair, list[float]] = {}
    for c in runA.checks:
        intervals.setdefault(c[1], []).append(c[5])
    per_checks = Counter(c[1] for c in runA.checks)
    per_shots = Counter()
    for c in runA.checks:
        per_shots[c[1]] += c[10]
    print(f"  {'pair':<10}{'A within':>10}{'A worst':>10}{'checks':>8}{'shots/check':>12}"
          f"{'last interval':>15}"
          f"{'B within':>10}{'B worst':>10}{'B fresh med/worst':>19}")
    for p in pairs:
        iv = intervals.get(p, [math.nan])[-1]
        fl = case.floorB[p]
        print(f"  {p[0] + '→' + p[1]:<10}{100 * np.mean(case.resA[p] <= tol):>9.2f}%"
              f"{np.max(case.resA[p]):>9.1f} {per_checks[p]:>7d}"
              f"{per_shots[p] / max(per_checks[p], 1):>12,.0f}{iv:>13.1f} h"
              f"{100 * np.mean(case.resB[p] <= tol):>9.2f}%{np.max(case.resB[p]):>9.1f} "
              f"{np.median(fl):>10.1f}/{np.max(fl):.1f}")
    for p in pairs:
        bad = [c for c in runA.checks if c[1] == p and c[2] == "broken"]
        if bad:
            print(f"  {p[0]}→{p[1]} broken re-checks (time h, χ²/dof, shift/ring radius): "
                  + ", ".join(f"{c[0] / 3600:.1f} {c[8]:.1f} {c[9]:.2f}" for c in bad[:12]))
    for p in pairs:
        ex = _excursions(case.t_h, case.resA[p], tol)
        if not ex:
            continue
        mine = [c for c in runA.checks if c[1] == p]
        print(f"  A beyond tolerance, {p[0]}→{p[1]}: {len(ex)} excursion(s)")
        for s, e, peak in ex[:6]:
            near = [c for c in mine if s - 12 <= c[0] / 3600 <= e + 1]
            text = "; ".join(f"{c[0] / 3600:.1f}: {c[2]}{'' if c[4] else ' (rejected)'} "
                             f"{c[3]:.1f}, next {c[5]:.1f}" for c in near) or "no re-check"
            print(f"    {s:.1f}–{e:.1f} h, peak {peak:.1f}: {text}")


def print_summary(cases: list[Case]) -> bool:
    """The cases side by side with the targets; True when every target is met."""
    print()
    print(f"{'chip':<26}{'drift':<6}{'pairs':>6}{'A within':>10}{'B within':>10}"
          f"{'shots A/B':>10}{'re-checks':>10}{'broken':>8}{'rejected':>9}{'recal':>6}"
          f"{'step caught':>13}  target")
    ok_all = True
    for c in cases:
        fa, fb = c.fraction(c.resA), c.fraction(c.resB)
        if c.drift == "demo":
            ok = fa >= TARGET_FRACTION and c.ratio <= TARGET_SHOT_RATIO
            target = f"≥{100 * TARGET_FRACTION:g} % at ≤{TARGET_SHOT_RATIO:g}×"
        else:
            ok = fa >= fb and c.ratio <= TARGET_FAST_SHOT_RATIO
            target = f"≥B at ≤{TARGET_FAST_SHOT_RATIO:g}×"
        sf = c.step_figures()
        step = "—" if sf is None else (
            f"{sf['caught_after_h']:.1f} h" + (" 1st" if sf["first_check"] else " late"))
        if sf is not None and not sf["first_check"]:
            ok = False
        ok_all &= ok
        print(f"{c.label:<26}{c.drift:<6}{len(c.pairs):>6}{100 * fa:>9.2f}%{100 * fb:>9.2f}%"
              f"{c.ratio:>10.3f}{len(c.runA.checks):>10d}{c.broken():>8d}{c.rejected():>9d}"
              f"{len(c.runA.recalibrated):>6d}{step:>13}  {target} {'MET' if ok else 'MISSED'}")
    return ok_all


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--chips", type=int, default=3, help="generated chips (default 3)")
    ap.add_argument("--qubits", type=int, default=6, help="qubits per generated chip (6)")
    ap.add_argument("--family-seed", type=int, default=101,
                    help="seed of the first generated chip; the others follow (101)")
    ap.add_argument("--drift", nargs="+", choices=sorted(DRIFT_LEVELS),
                    default=["demo", "fast"], help="drift levels of the generated chips")
    ap.add_argument("--columns-per-chip", type=int, default=1,
                    help="aggressor columns calibrated per generated chip (1)")
    ap.add_argument("--step-chip", type=int, default=0,
                    help="index of the generated chip with a 3 dB step (-1: none)")
    ap.add_argument("--step-hours", type=float, default=60.0, help="time of the step (60 h)")
    ap.add_argument("--demo-chip", action="store_true", help="also run the bundled demo chip")
    ap.add_argument("--columns", nargs="+", default=["q4-line", "q6-line"],
                    help="aggressor lines calibrated on the demo chip (default: q4-line q6-line)")
    ap.add_argument("--days", type=float, default=7.0, help="simulated days (default 7)")
    ap.add_argument("--seed", type=int, default=7, help="simulator seed (default 7)")
    ap.add_argument("--detail", action="store_true", help="per-pair tables and excursions")
    ap.add_argument("--jobs", type=int, default=2, choices=(1, 2),
                    help="run the two policies in parallel processes (2) or in turn (1)")
    args = ap.parse_args(argv)

    proto = load_protocol(PROTOCOL)
    print(f"protocol {PROTOCOL}; {args.days:g} simulated days; truth sampled every "
          f"{SAMPLE_S / 60:g} min; tolerance {proto.recheck.tolerance_db:g} dB; baseline B: "
          f"full recalibration every {BASELINE_EVERY_H:g} h; re-check {proto.recheck.points} "
          f"points × {proto.recheck.shots_per_point} shots; simulator seed {args.seed}")
    for name, level in DRIFT_LEVELS.items():
        print(f"drift {name}: " + ", ".join(f"{k} {v:g}" for k, v in level.items()))
    t0 = time.perf_counter()
    cases = []
    if args.demo_chip:
        cases.append(run_case("demo chip (bundled)", "demo", demo_device_path(), args.columns,
                              args.days, args.seed, args.jobs))
        print_case(cases[-1], args.detail)
    for k in range(args.chips):
        chip_seed = args.family_seed + k
        for drift in args.drift:
            steps = (args.step_hours,) if k == args.step_chip else ()
            params = FamilyParams(n_qubits=args.qubits, step_hours=steps, **DRIFT_LEVELS[drift])
            doc = generate_device(params, chip_seed)
            columns = choose_columns(doc, args.columns_per_chip)
            label = f"family {args.qubits}q seed {chip_seed}" + (" +step" if steps else "")
            cases.append(run_case(label, drift, doc, columns, args.days, args.seed, args.jobs))
            print_case(cases[-1], args.detail)
    ok = print_summary(cases)
    print(f"total wall {time.perf_counter() - t0:.0f} s; targets "
          f"{'all MET' if ok else 'not all met'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
