"""Benchmarks of the fitting and design layer (synthetic data, no hardware).

Run: ``python benchmarks/bench_fit.py`` (about a minute on two cores).

Prints
------
1. Vectorised paraboloid fits per second (20,000 sweeps of 25 points) against
   a loop of single lmfit fits, and their ratio.
2. Shots the adaptive null search needs against a 21 x 21 grid at a fixed
   amplification to reach the same RMS error of z*, and the adaptive design's
   RMS error relative to its own Cramér–Rao bound.

The synthetic victim is ``S(z) = S0 + A sin^2(K b |z - z*|)`` with binomial
shot noise. The grid is centred on the prior and spans the prior radius; its
shots are scaled from a Monte Carlo run (RMS error goes as 1/sqrt(shots)) and
then checked by a second Monte Carlo run at the scaled shot count.
"""

from __future__ import annotations

import math
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from xtalkcal.calibrate import AdaptiveNullSearch, cramer_rao_bound, grid_design
from xtalkcal.fits import fit_null, fit_null_gaussian, fit_paraboloid  # noqa: E402

Z_TRUE = 0.04 * np.exp(0.9j)
FLOOR, AMP, B = 0.03, 0.94, 4.0
KAPPA = AMP * B * B
PRIOR_OFFSET, PRIOR_RADIUS, TARGET = 0.006, 0.015, 1e-4


def counts_at(rng: np.random.Generator, z: np.ndarray, k: int, shots: int) -> np.ndarray:
    p = FLOOR + AMP * np.sin(k * B * np.abs(z - Z_TRUE)) ** 2
    return rng.binomial(shots, p)


def prior_for(seed: int) -> complex:
    return complex(Z_TRUE + PRIOR_OFFSET * np.exp(1j * (2.0 + seed)))


def bench_vectorised() -> None:
    rng = np.random.default_rng(0)
    z = grid_design(0.02 + 0.01j, 0.01, 5)
    zs = 0.021 + 0.012j
    n_fits = 20_000
    s = 0.02 + 300.0 * np.abs(z - zs) ** 2 + rng.normal(0, 2e-3, (n_fits, z.size))
    best = math.inf
    for _ in range(3):
        t0 = time.perf_counter()
        res = fit_paraboloid(z, s, 2e-3)
        best = min(best, time.perf_counter() - t0)
    rate_vec = n_fits / best
    n_loop = 200
    t0 = time.perf_counter()
    for i in range(n_loop):
        fit_null_gaussian(z, s[i], 2e-3)
    rate_loop = n_loop / (time.perf_counter() - t0)
    print("1. Paraboloid fits (25-point sweeps)")
    print(
        f"   vectorised fit_paraboloid : {rate_vec:12,.0f} fits/s  "
        f"({n_fits} sweeps, {res.accepted.mean():.1%} accepted)"
    )
    print(f"   loop of lmfit fits        : {rate_loop:12,.0f} fits/s  ({n_loop} fits)")
    print(f"   ratio                     : {rate_vec / rate_loop:12,.0f} x")


def run_adaptive(seed: int, k0: int):
    rng = np.random.default_rng(1000 + seed)
    search = AdaptiveNullSearch(
        prior_for(seed),
        PRIOR_RADIUS,
        target_stderr=TARGET,
        shot_budget=500_000,
        shots_per_point=1000,
        initial_amplification=k0,
    )
    while not search.done:
        z, k = search.ask()
        n = search.shots_per_point
        search.tell(z, counts_at(rng, z, k, n), n)
    return search


def grid_rms(k: int, spp: int, n_runs: int, seed0: int) -> tuple[float, int]:
    sq = []
    rejected = 0
    for i in range(n_runs):
        rng = np.random.default_rng(seed0 + i)
        z = grid_design(prior_for(i), PRIOR_RADIUS, 21)
        est = fit_null(z, counts_at(rng, z, k, spp), spp, amplification=k)
        if not est.accepted:
            rejected += 1
            continue
        sq.append(abs(est.z_star - Z_TRUE) ** 2)
    return math.sqrt(float(np.mean(sq))), rejected


def adaptive_stats(k0: int, n_seeds: int = 30) -> dict[str, float]:
    t0 = time.perf_counter()
    sq, crb, shots, kshots, kmax = [], [], [], [], []
    for seed in range(n_seeds):
        s = run_adaptive(seed, k0)
        est = s.estimate
        if not est.accepted:
            print(f"   (adaptive seed {seed} ended rejected: {est.message})")
            continue
        z, n, k = s.design()
        c = cramer_rao_bound(
            z, n, Z_TRUE, FLOOR, KAPPA, model="saturating", amplitude=AMP, amplification=k
        )
        sq.append(abs(est.z_star - Z_TRUE) ** 2)
        crb.append(np.trace(c))
        shots.append(s.shots_used)
        kshots.append(int(np.sum(n * k)))
        kmax.append(int(k.max()))
    out = {
        "rms": math.sqrt(np.mean(sq)),
        "shots": float(np.mean(shots)),
        "kshots": float(np.mean(kshots)),
        "kmax": max(kmax),
        "crb_ratio": math.sqrt(np.mean(sq) / np.mean(crb)),
        "runs": len(sq),
        "seconds": time.perf_counter() - t0,
    }
    print(
        f"   adaptive, first K = {k0}: {out['runs']}/{n_seeds} runs, RMS |z - z*| = "
        f"{out['rms']:.3g}, mean shots = {out['shots']:,.0f}, max K used = {out['kmax']}, "
        f"RMS / sqrt(trace CRB of its own design) = {out['crb_ratio']:.2f}  "
        f"({out['seconds']:.1f} s)"
    )
    return out


def bench_designs() -> None:
    print("\n2. Adaptive null search vs a 21 x 21 grid (synthetic binomial victim)")
    print(
        f"   truth: z* = {Z_TRUE:.4f}, S0 = {FLOOR}, A = {AMP}, b = {B}; prior "
        f"{PRIOR_OFFSET} off, radius {PRIOR_RADIUS}; target stderr {TARGET}"
    )
    ad = adaptive_stats(1)
    ad4 = adaptive_stats(4)
    rms_ad, shots_ad, kshots_ad = ad["rms"], ad["shots"], ad["kshots"]
    print("   (grids below are matched to the first-K = 1 search, which knows nothing of b)")

    # Largest fixed K an oracle could use for the grid and stay unambiguous.
    reach = PRIOR_RADIUS * math.sqrt(2) + PRIOR_OFFSET
    k_best = max(1, int((math.pi / 2) / (B * reach)))
    for k in sorted({1, k_best}):
        t1 = time.perf_counter()
        spp0 = 1000
        rms0, rej0 = grid_rms(k, spp0, 40, 5000)
        spp = int(math.ceil(spp0 * (rms0 / rms_ad) ** 2))
        rms1, rej1 = grid_rms(k, spp, 40, 9000)
        total = spp * 441
        label = "no amplification" if k == 1 else "oracle's best fixed K"
        print(f"   grid at K = {k:2d} ({label}):")
        print(
            f"     {spp0} shots/point -> RMS {rms0:.3g}; scaled to {spp:,} shots/point "
            f"-> RMS {rms1:.3g} (check; {rej0 + rej1} of 80 fits rejected)"
        )
        print(
            f"     shots to match the adaptive RMS: {total:,.0f}  ->  "
            f"grid / adaptive = {total / shots_ad:,.1f} x"
        )
        print(
            f"     counting each shot as K aggressor pulses: grid / adaptive = "
            f"{total * k / kshots_ad:,.1f} x   ({time.perf_counter() - t1:.1f} s)"
        )
        print(
            f"     vs the first-K = 4 search (scaled to its RMS): grid / adaptive = "
            f"{total * (rms_ad / ad4['rms']) ** 2 / ad4['shots']:,.1f} x"
        )


def main() -> None:
    t0 = time.perf_counter()
    bench_vectorised()
    bench_designs()
    print(f"\ntotal {time.perf_counter() - t0:.1f} s")


if __name__ == "__main__":
    main()
