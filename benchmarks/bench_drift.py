"""A week of drift on the simulated demo chip: scheduled re-checks versus fixed recalibration.

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
Printed: the fraction of (pair, sample) points within the protocol's re-check tolerance,
the worst pair's fraction, the shots of the week (initial calibration included) and
their ratio, wall times, what policy A did, and a per-pair table. Targets: A keeps every
pair within tolerance at least 99 % of the time, spending at most 20 % of B's shots.

The two policies run in two processes at once (``--jobs 1`` runs them one after the other).

Usage::

    python benchmarks/bench_drift.py [--columns d4 d6] [--days 7] [--seed 7]
                                     [--figure drift.png] [--jobs 2]
"""

from __future__ import annotations

import argparse
import math
import os
import tempfile
import time
from collections import Counter
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from simulated_device import SimRig, demo_device_path
from xtalkcal.calibrate import calibrate_chip
from xtalkcal.drift import Schedule, run_due, schedule_after_calibration
from xtalkcal.measure import BatchRunner, load_protocol
from xtalkcal.store import Ledger, ledger_entries, ledger_sweeps

PROTOCOL = "protocols/full.toml"
SAMPLE_S = 600.0  # truth sampled every 10 simulated minutes
BASELINE_EVERY_H = 6.0
TARGET_FRACTION = 0.99
TARGET_SHOT_RATIO = 0.20

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
    # next interval h, follow-up, reason).
    checks: list[tuple] = field(default_factory=list)
    recentred: list[tuple[float, Pair]] = field(default_factory=list)
    recalibrated: list[tuple[float, str]] = field(default_factory=list)
    due_calls: int = 0
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


def run_policy(name: str, columns: list[str], days: float, seed: int, workdir: str) -> PolicyRun:
    """Run policy ``"A"`` or ``"B"`` for ``days`` of rig time; the ledger stays in ``workdir``.

    Parameters
    ----------
    name : {"A", "B"}
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
    rig = SimRig(demo_device_path(), seed=seed, drift=True)
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
            for c in rep.checked:
                pair = (c.aggressor, c.victim)
                slot = schedule.slot(pair) if pair in schedule else None
                run.checks.append((
                    c.entry.measured_at_s, pair, c.outcome.decision.value,
                    float(c.outcome.residual_db), c.entry.verdict == "accepted",
                    slot.interval_h if slot else math.nan, c.outcome.reason,
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


def _figure(path: str, t_h, resA, resB, tol, runA: PolicyRun) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    pairs = list(resA)
    ncol = 2
    nrow = math.ceil(len(pairs) / ncol)
    fig, axes = plt.subplots(nrow, ncol, figsize=(12, 2.1 * nrow), sharex=True, squeeze=False)
    checks = {}
    for t_s, pair, decision, *_ in runA.checks:
        checks.setdefault(pair, []).append((t_s / 3600.0, decision))
    colours = {"within": "tab:green", "drifted": "tab:orange", "broken": "tab:red"}
    for ax, pair in zip(axes.flat[:len(pairs)], pairs, strict=True):
        ax.axhspan(-120, tol, color="0.92", zorder=0)
        ax.axhline(tol, color="k", lw=0.8, ls="--")
        ax.plot(t_h, resB[pair], color="tab:blue", lw=0.7, label=f"B: every {BASELINE_EVERY_H:g} h")
        ax.plot(t_h, resA[pair], color="tab:red", lw=0.9, label="A: scheduled re-checks")
        for th, d in checks.get(pair, []):
            ax.axvline(th, color=colours.get(d, "0.5"), lw=0.5, alpha=0.6)
        lo = min(np.nanmin(resA[pair]), np.nanmin(resB[pair]))
        ax.set_ylim(max(lo - 3, -100), max(tol + 5, np.nanmax(resA[pair]) + 2))
        ax.set_title(f"{pair[0]} → {pair[1]}", fontsize=9)
        ax.set_ylabel("residual (dB)", fontsize=8)
        ax.tick_params(labelsize=7)
    for ax in axes.flat[len(pairs):]:
        ax.set_visible(False)
    for ax in axes[-1]:
        ax.set_xlabel("simulated time (h)", fontsize=8)
    axes.flat[0].legend(fontsize=7, loc="upper left")
    fig.suptitle("True residual |X_true − X_current| vs time; dashed: re-check tolerance; "
                 "vertical lines: A's re-checks (green within, orange drifted, red broken)",
                 fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--columns", nargs="+", default=["d4", "d6"],
                    help="aggressor lines to calibrate (default: d4 d6)")
    ap.add_argument("--days", type=float, default=7.0, help="simulated days (default 7)")
    ap.add_argument("--seed", type=int, default=7, help="simulator seed (default 7)")
    ap.add_argument("--figure", default=None, help="save residual-vs-time figure here (PNG)")
    ap.add_argument("--jobs", type=int, default=2, choices=(1, 2),
                    help="run the two policies in parallel processes (2) or in turn (1)")
    args = ap.parse_args(argv)

    proto = load_protocol(PROTOCOL)
    tol = proto.recheck.tolerance_db
    with tempfile.TemporaryDirectory(prefix="bench-drift-") as work:
        t0 = time.perf_counter()
        jobs = [("A", args.columns, args.days, args.seed, work),
                ("B", args.columns, args.days, args.seed, work)]
        if args.jobs == 2:
            with ProcessPoolExecutor(max_workers=2) as ex:
                futs = [ex.submit(run_policy, *j) for j in jobs]
                runA, runB = (f.result() for f in futs)
        else:
            runA, runB = (run_policy(*j) for j in jobs)
        total_wall = time.perf_counter() - t0
        ledA, ledB = Ledger(runA.ledger_path), Ledger(runB.ledger_path)

        # Same seed, same shots before the first entry: the initial calibrations coincide.
        pairs = runA.nulled
        if runB.nulled != pairs:
            print(f"note: initial calibrations differ: A nulled {pairs}, B nulled {runB.nulled}")
        truth = SimRig(demo_device_path(), seed=args.seed, drift=True)
        start = math.ceil(max(runA.initial_end_s, runB.initial_end_s) / SAMPLE_S) * SAMPLE_S
        times = np.arange(start, args.days * 86400.0 + 0.5, SAMPLE_S)
        t_h = times / 3600.0
        resA = residual_db(truth, ledA, pairs, times)
        resB = residual_db(truth, ledB, pairs, times)
        after = residual_db(truth, ledA, pairs, np.array([runA.initial_end_s]))
        floorB = fresh_residuals(truth, ledB, pairs)

    print(f"chip: simulated demo device, seed {args.seed}, drift on; protocol {PROTOCOL}; "
          f"columns {' '.join(args.columns)}; {args.days:g} simulated days; truth sampled "
          f"every {SAMPLE_S / 60:g} min ({len(times)} samples from {start / 60:.0f} min); "
          f"tolerance {tol:g} dB")
    dd = truth.device.drift
    rates = [abs(c.phase_rate_rad_per_hour) for c in truth.device.couplings
             if c.phase_rate_rad_per_hour]
    print(f"drift model of the device file: phase walk "
          f"{dd.phase_diffusion_rad2_per_hour:g} rad²/h, "
          f"log-magnitude walk {dd.log_magnitude_diffusion_per_hour:g}/h, qubit wander "
          f"{1e3 * dd.qubit_wander_mhz:g} kHz, {len(rates)} couplings with linear phase rates "
          + (f"{min(rates):.3g}–{max(rates):.3g} rad/h" if rates else "(none)")
          + f"; re-check: {proto.recheck.points} points × {proto.recheck.shots_per_point} shots")
    print(f"pairs nulled by the initial calibration: {len(pairs)}")
    print("true residual right after the initial calibration (t = "
          f"{runA.initial_end_s:.0f} s): "
          + ", ".join(f"{a}→{v} {after[(a, v)][0]:.1f}" for a, v in pairs) + " dB")
    print()

    def summary(name: str, run: PolicyRun, res: dict[Pair, np.ndarray]) -> tuple[float, float]:
        allr = np.concatenate([res[p] for p in pairs])
        frac = float(np.mean(allr <= tol))
        per = {p: float(np.mean(res[p] <= tol)) for p in pairs}
        worst_pair = min(per, key=per.get)
        print(f"[policy {name}] within tolerance: {100 * frac:.2f} % of (pair, sample) points; "
              f"worst pair {worst_pair[0]}→{worst_pair[1]} {100 * per[worst_pair]:.2f} %; "
              f"worst residual {np.max(allr):.1f} dB; shots {run.shots:,} "
              f"(initial calibration {run.initial_shots:,}); wall {run.wall_s:.0f} s")
        return frac, per[worst_pair]

    fracA, worstA = summary("A: scheduled re-checks", runA, resA)
    fracB, worstB = summary(f"B: full recalibration every {BASELINE_EVERY_H:g} h", runB, resB)
    ratio = runA.shots / runB.shots
    print(f"shots(A)/shots(B) = {ratio:.3f}; policy B ran {runB.calibrations} calibrations of "
          f"{len(args.columns)} column(s); total wall {total_wall:.0f} s "
          f"({'in parallel' if args.jobs == 2 else 'in turn'})")
    ok_frac = worstA >= TARGET_FRACTION
    ok_shots = ratio <= TARGET_SHOT_RATIO
    print(f"targets: every pair within tolerance ≥ {100 * TARGET_FRACTION:g} % of the time under "
          f"A: {'MET' if ok_frac else 'MISSED'} (worst pair {100 * worstA:.2f} %); "
          f"shots(A) ≤ {100 * TARGET_SHOT_RATIO:g} % of B: {'MET' if ok_shots else 'MISSED'} "
          f"({100 * ratio:.1f} %)")
    print()

    decisions = Counter(c[2] for c in runA.checks)
    rejected = sum(not c[4] for c in runA.checks)
    print(f"policy A did: {len(runA.checks)} pair re-checks in {runA.due_calls} run_due calls "
          f"({', '.join(f'{k} {n}' for k, n in sorted(decisions.items()))}; {rejected} re-check "
          f"entries rejected as too imprecise or broken), {len(runA.recentred)} re-centrings, "
          f"{len(runA.recalibrated)} column recalibrations"
          + (" (" + ", ".join(f"{a} at {t / 3600:.1f} h" for t, a in runA.recalibrated) + ")"
             if runA.recalibrated else ""))
    if runA.triggers:
        print("  recalibrations were triggered by: " + ", ".join(
            f"{k} ×{n}" for k, n in Counter(runA.triggers).most_common()))
    per_checks = Counter(c[1] for c in runA.checks)
    intervals: dict[Pair, list[float]] = {}
    for c in runA.checks:
        intervals.setdefault(c[1], []).append(c[5])
    print(f"{'pair':<10}{'A within':>10}{'A worst':>10}{'checks':>8}{'last interval':>15}"
          f"{'B within':>10}{'B worst':>10}{'B fresh med/worst':>19}")
    for p in pairs:
        iv = intervals.get(p, [math.nan])[-1]
        print(f"{p[0] + '→' + p[1]:<10}{100 * np.mean(resA[p] <= tol):>9.2f}%"
              f"{np.max(resA[p]):>9.1f} {per_checks[p]:>7d}{iv:>13.1f} h"
              f"{100 * np.mean(resB[p] <= tol):>9.2f}%{np.max(resB[p]):>9.1f} "
              f"{np.median(floorB[p]):>10.1f}/{np.max(floorB[p]):.1f}")

    # Diagnostics: where A left tolerance, and what its re-checks of that pair decided.
    bad = [p for p in pairs if np.any(resA[p] > tol)]
    if bad:
        print()
        print("policy A excursions beyond tolerance (start–end h, peak dB) and the pair's "
              "re-checks around them (time h: decision, estimated residual dB, next interval h):")
        for p in bad:
            ex = _excursions(t_h, resA[p], tol)
            print(f"  {p[0]}→{p[1]}: {len(ex)} excursion(s), "
                  f"{100 * np.mean(resA[p] > tol):.2f} % of samples")
            mine = [c for c in runA.checks if c[1] == p]
            for s, e, peak in ex[:8]:
                near = [c for c in mine if s - 12 <= c[0] / 3600 <= e + 1]
                text = "; ".join(f"{c[0] / 3600:.1f}: {c[2]}{'' if c[4] else ' (rejected)'} "
                                 f"{c[3]:.1f}, next {c[5]:.1f}" for c in near) or "no re-check"
                print(f"    {s:.1f}–{e:.1f} h, peak {peak:.1f}: {text}")
            if len(ex) > 8:
                print(f"    ... {len(ex) - 8} more")
    if args.figure:
        _figure(args.figure, t_h, resA, resB, tol, runA)
        print(f"\nfigure: {args.figure}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
