"""Designs, Cramér–Rao bounds and the adaptive null search of xtalkcal.calibrate."""

from __future__ import annotations

import ast
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import optimize

from xtalkcal.calibrate import (
    AdaptiveNullSearch,
    SearchStateError,
    cramer_rao_bound,
    grid_design,
    null_fisher_information,
    optimal_ring_radius,
    ring_design,
)
from xtalkcal.exceptions import FitInputError
from xtalkcal.fits import fit_null, fit_paraboloid_counts, null_signal
from xtalkcal.fits.null_model import null_signal_jacobian

ROOT = Path(__file__).resolve().parents[1]

# Synthetic victim (written out here, independent of the library's model code):
# S(z) = S0 + A sin^2(K b |z - z*|); curvature at K = 1 is kappa = A b^2.
Z_TRUE = 0.04 * np.exp(0.9j)
FLOOR, AMP, B = 0.03, 0.94, 4.0
KAPPA = AMP * B * B


def synthetic_counts(rng, z, k, shots):
    p = FLOOR + AMP * np.sin(k * B * np.abs(np.asarray(z) - Z_TRUE)) ** 2
    return rng.binomial(shots, p)


def run_search(seed, *, budget=300_000, target=1e-4, **kw):
    rng = np.random.default_rng(seed)
    prior = Z_TRUE + 0.006 * np.exp(1j * (2.0 + seed))
    search = AdaptiveNullSearch(
        prior, 0.015, target_stderr=target, shot_budget=budget, shots_per_point=1000, **kw
    )
    while not search.done:
        z, k = search.ask()
        n = search.shots_per_point
        search.tell(z, synthetic_counts(rng, z, k, n), n)
    return search


# ---------------------------------------------------------------------------
# Designs
# ---------------------------------------------------------------------------


def test_grid_and_ring_designs():
    g = grid_design(0.1 + 0.2j, 0.05, 3)
    assert g.shape == (9,)
    np.testing.assert_allclose(g.reshape(3, 3)[0], 0.05 + 0.15j + np.array([0, 0.05, 0.1]))
    assert g.mean() == pytest.approx(0.1 + 0.2j)
    r = ring_design(0.1, 0.02, 6, phase0=0.3)
    np.testing.assert_allclose(np.abs(r - 0.1), 0.02)
    assert np.angle(r[0] - 0.1) == pytest.approx(0.3)
    assert abs(np.sum(r - 0.1)) < 1e-15
    for bad in (
        lambda: grid_design(0, 0, 3),
        lambda: grid_design(0, 1, 1),
        lambda: ring_design(0, -1, 5),
        lambda: ring_design(0, 1, 2),
    ):
        with pytest.raises(FitInputError):
            bad()


# ---------------------------------------------------------------------------
# Fisher information
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("model", ["paraboloid", "saturating"])
def test_model_jacobian_matches_finite_differences(model):
    rng = np.random.default_rng(0)
    z = Z_TRUE + 0.05 * (rng.normal(size=30) + 1j * rng.normal(size=30))
    z[0] = Z_TRUE  # exactly at the null: the sinc form must stay exact
    k = rng.integers(1, 5, 30).astype(float)
    theta = np.array([Z_TRUE.real, Z_TRUE.imag, FLOOR, KAPPA, AMP])
    n_par = 5 if model == "saturating" else 4
    amp = AMP if model == "saturating" else math.nan

    def mean(t):
        a = t[4] if model == "saturating" else math.nan
        return null_signal_jacobian(z, k, t[0], t[1], t[2], t[3], a, model)[0]

    _, jac = null_signal_jacobian(z, k, *theta[:4], amp, model)
    for i in range(n_par):
        h = 1e-6 * max(abs(theta[i]), 1e-2)
        tp, tm = theta.copy(), theta.copy()
        tp[i] += h
        tm[i] -= h
        np.testing.assert_allclose(jac[:, i], (mean(tp) - mean(tm)) / (2 * h), rtol=1e-5, atol=1e-7)


def test_fisher_is_symmetric_positive_and_scales_with_shots():
    z = grid_design(Z_TRUE, 0.01, 5)
    i1 = null_fisher_information(z, 1000, Z_TRUE, FLOOR, KAPPA, model="saturating", amplitude=AMP)
    i2 = null_fisher_information(z, 2000, Z_TRUE, FLOOR, KAPPA, model="saturating", amplitude=AMP)
    assert i1.shape == (5, 5)
    np.testing.assert_allclose(i1, i1.T)
    assert np.linalg.eigvalsh(i1)[0] > 0
    np.testing.assert_allclose(i2, 2 * i1)
    with pytest.raises(FitInputError):
        null_fisher_information(z, 1000, Z_TRUE, FLOOR, KAPPA, model="saturating")
    with pytest.raises(FitInputError):
        null_fisher_information(z, 1000, Z_TRUE, FLOOR, KAPPA, amplitude=AMP)


def test_crb_matches_monte_carlo_of_the_paraboloid_estimator():
    z_star, floor, kappa, shots = 0.021 + 0.012j, 0.02, 200.0, 2000
    z = grid_design(0.02 + 0.01j, 0.01, 5)
    crb = cramer_rao_bound(z, shots, z_star, floor, kappa)
    rng = np.random.default_rng(1)
    p = floor + kappa * np.abs(z - z_star) ** 2
    counts = rng.binomial(shots, p, size=(1000, z.size))
    res = fit_paraboloid_counts(z, counts, shots)
    assert res.accepted.all()
    err = res.z_star - z_star
    rms_x = np.sqrt(np.mean(err.real**2))
    rms_y = np.sqrt(np.mean(err.imag**2))
    assert rms_x / math.sqrt(crb[0, 0]) == pytest.approx(1.0, abs=0.2)
    assert rms_y / math.sqrt(crb[1, 1]) == pytest.approx(1.0, abs=0.2)
    # The estimator's own covariance agrees with the bound at the truth.
    np.testing.assert_allclose(np.median(res.covariance, axis=0), crb, rtol=0.1, atol=1e-14)


@pytest.mark.slow
def test_crb_matches_monte_carlo_of_the_saturating_estimator():
    z = grid_design(0.02 + 0.01j, 0.01, 5)
    z_star, floor, amp, kappa, shots = 0.021 + 0.012j, 0.02, 0.9, 4500.0, 2000
    crb = cramer_rao_bound(z, shots, z_star, floor, kappa, model="saturating", amplitude=amp)
    rng = np.random.default_rng(2)
    p = null_signal(z, z_star, floor, kappa, amplitude=amp)
    errs = []
    for _ in range(150):
        est = fit_null(z, rng.binomial(shots, p), shots)
        if est.accepted:
            errs.append(est.z_star - z_star)
    errs = np.array(errs)
    assert errs.size >= 145
    ratio = math.sqrt(np.mean(np.abs(errs) ** 2) / np.trace(crb))
    assert ratio == pytest.approx(1.0, abs=0.2)


# ---------------------------------------------------------------------------
# Optimal ring radius
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("k", [1, 4])
def test_optimal_radius_symmetric_floor_and_ceiling_is_mid_fringe(k):
    # Floor and ceiling gap equal (a = b): the optimum is u* = pi/4.
    floor, amp = 0.03, 0.94
    r = optimal_ring_radius(floor, KAPPA, amplitude=amp, amplification=k)
    q = k * math.sqrt(KAPPA / amp)
    assert r * q == pytest.approx(math.pi / 4, rel=0.01)


@pytest.mark.parametrize("floor,amp", [(0.05, 0.94), (0.01, 0.9), (0.002, 0.99)])
def test_optimal_radius_solves_the_stationarity_condition(floor, amp):
    # Derivation (docstring of optimal_ring_radius): maximise
    # s(1-s) / ((a+s)(b+1-s)), s = sin^2 u  =>  a/(s(a+s)) = b/((1-s)(b+1-s)).
    a, b = floor / amp, (1 - floor - amp) / amp
    s = optimize.brentq(lambda s: a / (s * (a + s)) - b / ((1 - s) * (b + 1 - s)), 1e-9, 1 - 1e-9)
    u_star = math.asin(math.sqrt(s))
    r = optimal_ring_radius(floor, KAPPA, amplitude=amp)
    assert r * math.sqrt(KAPPA / amp) == pytest.approx(u_star, rel=0.01)

    # A finite optimum: the bound is worse on both sides.
    def trace_crb(rad):
        z = np.concatenate([ring_design(0, rad, 8), [0]])
        return np.trace(
            cramer_rao_bound(z, 1000, 0, floor, KAPPA, model="saturating", amplitude=amp)
        )

    assert trace_crb(r) < trace_crb(0.7 * r) and trace_crb(r) < trace_crb(1.3 * r)


def test_paraboloid_bound_has_the_floor_knee_and_no_interior_optimum():
    floor, kappa, n_ring, shots = 1e-3, KAPPA, 8, 1000

    def crb_xx(rad):
        z = np.concatenate([ring_design(0, rad, n_ring), [0]])
        return cramer_rao_bound(z, shots, 0, floor, kappa)[0, 0]

    # Exact for a centred ring: CRB_xx = p (1 - p) / (2 N n kappa^2 r^2).
    for rad in (0.001, 0.01, 0.05):
        p = floor + kappa * rad**2
        assert crb_xx(rad) == pytest.approx(
            p * (1 - p) / (2 * shots * n_ring * kappa**2 * rad**2), rel=1e-6
        )
    radii = np.geomspace(1e-4, 0.15, 30)
    vals = np.array([crb_xx(r) for r in radii])
    assert np.all(np.diff(vals) < 0)  # monotone: no interior optimum
    # Floor knee r_k = sqrt(S0/kappa): half the plateau information (p << 1).
    r_k = math.sqrt(floor / kappa)
    plateau = 1 / (2 * shots * n_ring * kappa)  # small-p limit of CRB_xx for r >> r_k
    assert crb_xx(r_k) / plateau == pytest.approx(2.0, rel=0.01)
    assert crb_xx(r_k / 10) / plateau > 50  # inside the knee the floor noise wins
    r_max = math.sqrt((0.5 - floor) / kappa)
    assert optimal_ring_radius(floor, kappa) == pytest.approx(r_max)
    assert optimal_ring_radius(floor, kappa, max_radius=0.01) == pytest.approx(0.01)


# ---------------------------------------------------------------------------
# Adaptive search
# ---------------------------------------------------------------------------


def test_adaptive_search_converges_to_the_truth():
    search = run_search(0)
    assert search.stop_reason == "target_reached"
    est = search.estimate
    assert est.accepted
    assert est.position_stderr <= 1e-4
    d = np.array([est.z_star.real - Z_TRUE.real, est.z_star.imag - Z_TRUE.imag])
    assert d @ np.linalg.solve(est.covariance, d) < 16  # within 4 sigma
    assert search.shots_used <= 300_000
    ks = [s.amplification for s in search.history]
    assert ks[-1] > ks[0]  # the amplification ladder was climbed
    assert search.history[-1].estimate is est
    z, n, k = search.design()
    assert z.size == n.size == k.size == sum(s.z.size for s in search.history)
    assert n.sum() == search.shots_used


@pytest.mark.slow
def test_adaptive_search_rms_error_reaches_the_crb_of_its_design():
    sq_err, crb_trace = [], []
    for seed in range(30):
        search = run_search(100 + seed)
        est = search.estimate
        assert est.accepted, (seed, est.message)
        z, n, k = search.design()
        crb = cramer_rao_bound(
            z, n, Z_TRUE, FLOOR, KAPPA, model="saturating", amplitude=AMP, amplification=k
        )
        sq_err.append(abs(est.z_star - Z_TRUE) ** 2)
        crb_trace.append(np.trace(crb))
        # Every refine ring stayed inside the unambiguous range of the true fringe.
        for step in search.history:
            if step.purpose == "refine":
                reach = step.radius + abs(step.centre - Z_TRUE)
                assert step.amplification * B * reach < math.pi / 2 * 1.1
    ratio = math.sqrt(np.mean(sq_err) / np.mean(crb_trace))
    assert 0.6 < ratio < 1.5, ratio


def test_adaptive_search_phase_ring_start():
    rng = np.random.default_rng(7)
    prior = abs(Z_TRUE) * 1.05 * np.exp(1j * (np.angle(Z_TRUE) + 2.0))  # phase unknown
    search = AdaptiveNullSearch(
        prior,
        0.01,
        target_stderr=2e-4,
        shot_budget=300_000,
        phase_ring=True,
        initial_amplification=4,
    )
    first = True
    while not search.done:
        z, k = search.ask()
        if first:
            np.testing.assert_allclose(np.abs(z[:8]), abs(prior))
            first = False
        n = search.shots_per_point
        search.tell(z, synthetic_counts(rng, z, k, n), n)
    assert search.history[0].purpose == "phase_ring"
    est = search.estimate
    assert est.accepted and search.stop_reason == "target_reached"
    assert abs(est.z_star - Z_TRUE) < 5 * est.position_stderr


def test_adaptive_search_stops_on_the_budget():
    search = run_search(3, budget=30_000, target=1e-7)
    assert search.stop_reason == "budget_exhausted"
    assert search.shots_used <= 30_000
    with pytest.raises(SearchStateError):
        search.ask()


def test_adaptive_search_state_machine_errors():
    search = AdaptiveNullSearch(Z_TRUE, 0.01, target_stderr=1e-4, shot_budget=100_000)
    with pytest.raises(SearchStateError):
        search.tell([0.0], [0], 100)
    z1, k1 = search.ask()
    z2, k2 = search.ask()  # idempotent until told
    np.testing.assert_array_equal(z1, z2)
    assert k1 == k2
    with pytest.raises(FitInputError):
        search.tell(z1 + 1e-3, np.zeros(z1.size, int), 1000)
    with pytest.raises(FitInputError):
        search.tell(z1, np.full(z1.size, 2000), 1000)  # counts above shots
    search.tell(z1, np.full(z1.size, 30), 1000)
    assert len(search.history) == 1
    for bad in (
        dict(target_stderr=0, shot_budget=1),
        dict(target_stderr=1, shot_budget=0),
        dict(target_stderr=1, shot_budget=1, points_per_ring=3),
    ):
        with pytest.raises(FitInputError):
            AdaptiveNullSearch(Z_TRUE, 0.01, **bad)


# ---------------------------------------------------------------------------
# Layer contract: the math layer imports no hardware, rig or simulator code
# ---------------------------------------------------------------------------


MATH_MODULES = sorted(str(p.relative_to(ROOT)) for p in (ROOT / "xtalkcal" / "fits").glob("*.py"))


@pytest.mark.parametrize("module", [*MATH_MODULES, "xtalkcal/calibrate/design.py",
                                    "xtalkcal/calibrate/search.py"])
def test_math_layer_imports_nothing_downstream_or_hardware(module):
    tree = ast.parse((ROOT / module).read_text())
    imported = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            imported |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module:
            imported.add(node.module)
    allowed = {
        "__future__",
        "enum",
        "math",
        "collections.abc",
        "dataclasses",
        "typing",
        "lmfit",
        "numpy",
        "numpy.typing",
        "scipy",
        "xtalkcal.exceptions",
        "xtalkcal.common",
    }
    # The fits and the designs built on them are pure numerics: no rig, files or later stages.
    own = {m for m in imported if m.startswith(("xtalkcal.fits", "xtalkcal.calibrate.design"))}
    assert imported - own <= allowed, imported - own - allowed
