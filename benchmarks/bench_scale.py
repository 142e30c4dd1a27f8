"""How the calibration of a whole chip grows with its size (square grids, drift off).

For each size N a chip is drawn as ``xtalkcal sim-chip --layout grid --qubits N`` draws it
(:mod:`simulated_device.family`, its default field: nearest neighbour around −24 dB, falling
with distance, pairs below the generator's floor uncoupled) and calibrated end to end as a
user would: the default protocol, :func:`xtalkcal.calibrate.calibrate_chip` on a ``SimRig``
with drift off.

One line per size: CPU seconds of this process, wall seconds, shots, timelines sent, rig
seconds, pairs nulled, the simulator's share of the CPU, peak resident memory (of the
process so far, so it is the peak up to that size). Then, per column (aggressor line), shots and
CPU against V, the number of victims the column read, to show where the growth comes from;
and the exponents b of ``y ∝ N^b`` fitted by least squares in log–log over the sizes run.
Shots and timelines are counted, so they do not depend on the machine; CPU and wall time
do (shared machine: compare the exponents, not the seconds).

Usage: ``python benchmarks/bench_scale.py [--sizes 9 16 25 36] [--seed S]``.
"""

from __future__ import annotations

import argparse
import math
import resource
import time
from dataclasses import replace

import numpy as np

from simulated_device import SimRig, device_from_dict
from simulated_device.family import FamilyParams, generate_device
from xtalkcal.calibrate import calibrate_chip
from xtalkcal.measure import default_protocol


class CountingRig:
    """A rig wrapper that books shots, timelines and CPU to the column being calibrated."""

    def __init__(self, rig: SimRig) -> None:
        self._rig = rig
        self.column = "(start)"
        self.book: dict[str, dict[str, float]] = {}

    def __getattr__(self, name: str):
        return getattr(self._rig, name)

    def run(self, timelines, shots):
        timelines = list(timelines)
        t0 = time.process_time()
        out = self._rig.run(timelines, shots)
        b = self.book.setdefault(self.column, {"shots": 0, "timelines": 0, "cpu_s": 0.0,
                                               "victims": set()})
        b["shots"] += len(timelines) * int(shots)
        b["timelines"] += len(timelines)
        b["cpu_s"] += time.process_time() - t0
        for tl in timelines:
            b["victims"].update(tl.readout)
        return out

    def log(self, text: str) -> None:
        head = text.split(":", 1)[0]
        if head in self._rig.chip.line_names:
            self.column = head


def exponent(n: list[int], y: list[float]) -> float:
    """Least-squares slope of log y against log n (nan without two distinct sizes)."""
    if len(set(n)) < 2 or min(y) <= 0:
        return math.nan
    return float(np.polyfit(np.log(n), np.log(y), 1)[0])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[9, 16, 25, 36])
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args()

    rows = []
    print(f"{'N':>4} {'CPU s':>8} {'wall s':>8} {'shots':>11} {'timelines':>10} {'rig s':>8} "
          f"{'nulled':>7} {'sim %':>6} {'peak MB':>8}")
    for n in args.sizes:
        params = replace(FamilyParams(), n_qubits=n, layout="grid")
        doc = generate_device(params, args.seed)
        rig = CountingRig(SimRig(device_from_dict(doc, source=doc["name"]), drift=False,
                                 seed=args.seed))
        c0, w0 = time.process_time(), time.perf_counter()
        res = calibrate_chip(rig, default_protocol(), log=rig.log)
        cpu, wall = time.process_time() - c0, time.perf_counter() - w0
        shots = sum(b["shots"] for b in rig.book.values())
        tls = sum(b["timelines"] for b in rig.book.values())
        nulled = sum(1 for p in res.pairs if p.accepted and p.nulled)
        sim_share = 100.0 * sum(b["cpu_s"] for b in rig.book.values()) / max(cpu, 1e-9)
        peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
        rows.append((n, cpu, wall, shots, tls, res.rig_seconds))
        print(f"{n:>4} {cpu:>8.1f} {wall:>8.1f} {shots:>11,} {tls:>10,} {res.rig_seconds:>8.1f} "
              f"{nulled:>7} {sim_share:>6.1f} {peak_mb:>8.0f}", flush=True)
        cols = sorted((len(b["victims"]), b["shots"], b["cpu_s"], c)
                      for c, b in rig.book.items() if c in rig.chip.line_names)
        if cols:
            v = [c[0] for c in cols]
            print(f"     per column: V {min(v)}–{max(v)}; shots per column "
                  f"{min(c[1] for c in cols):,}–{max(c[1] for c in cols):,}; "
                  f"shots ∝ V^{exponent(v, [c[1] for c in cols]):.2f}, "
                  f"simulator CPU ∝ V^{exponent(v, [c[2] for c in cols]):.2f}", flush=True)
    if len(rows) >= 2:
        ns = [r[0] for r in rows]
        print("fitted exponents b of y ∝ N^b over N = " + ", ".join(map(str, ns)) + ":")
        for k, name in ((1, "CPU"), (2, "wall"), (3, "shots"), (4, "timelines"),
                        (5, "rig seconds")):
            target = "   (target ≤ 1.2)" if name == "shots" else ""
            print(f"  {name:<12} {exponent(ns, [r[k] for r in rows]):5.2f}{target}")
        big = rows[-1]
        print(f"wall at N = {big[0]}: {big[2]:.0f} s (target at N = 100: ≤ 600 s, calibration "
              "plus settings)")


if __name__ == "__main__":
    main()
