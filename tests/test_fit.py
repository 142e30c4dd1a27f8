"""Known-truth, coverage, verdict and property tests of xtalkcal.common."""

from __future__ import annotations

import json
import math
import pydoc

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from xtalkcal.calibrate import grid_design, ring_design
from xtalkcal.exceptions import FitInputError
from xtalkcal.fits import (
    NullEstimate,
    ParaboloidBatch,
    RejectedEstimateError,
    RejectionReason,
    RingBatch,
    Verdict,
    binomial_signal,
    fit_null,
    fit_null_gaussian,
    fit_paraboloid,
    fit_paraboloid_counts,
    fit_ring,
    null_signal,
)

Z_TRUE = 0.021 + 0.012j
GRID = grid_design(0.02 + 0.01j, 0.01, 5)

# 1-sigma coverage of a Gaussian estimator is 68.3 %; with 200-400 trials the
# binomial spread is ~2.5-3.3 %, so 0.60-0.76 is a > 2.4 sigma band.
COVER_LO, COVER_HI = 0.60, 0.76


def _paraboloid_counts(rng, z, shots, *, floor=0.02, kappa=40.0, z_star=Z_TRUE, size=None):
    p = floor + kappa * np.abs(z - z_star) ** 2
    return rng.binomial(shots, np.clip(p, 0, 1), size=size)


def _saturating_counts(rng, z, shots, *, floor=0.02, amp=0.9, kappa=2000.0, z_star=Z_TRUE, k=1):
    p = null_signal(z, z_star, floor, kappa, amplitude=amp, amplification=k)
    return rng.binomial(shots, p)


# ---------------------------------------------------------------------------
# Known truth
# ---------------------------------------------------------------------------


def test_paraboloid_counts_recovers_known_null():
    rng = np.random.default_rng(1)
    counts = _paraboloid_counts(rng, GRID, 5000)
    est = fit_paraboloid_counts(GRID, counts, 5000).estimate()
    assert est.accepted
    sx, sy = est.z_star_stderr
    assert abs(est.z_star.real - Z_TRUE.real) < 4 * sx
    assert abs(est.z_star.imag - Z_TRUE.imag) < 4 * sy
    assert abs(est.floor - 0.02) < 4 * est.floor_stderr
    assert abs(est.curvature - 40.0) < 4 * est.curvature_stderr
    assert est.total_shots == 25 * 5000
    assert est.reduced_chi2 < 3


def test_saturating_fit_recovers_known_null_and_fringe():
    rng = np.random.default_rng(2)
    # Up to ~1.5 rad up the fringe with many shots, so the data identify A as
    # well as kappa (the free-A branch must win the likelihood-ratio test).
    counts = _saturating_counts(rng, GRID, 20_000, kappa=4500.0)
    est = fit_null(GRID, counts, 20_000)
    assert est.accepted, est.message
    cov = est.covariance
    d = np.array([est.z_star.real - Z_TRUE.real, est.z_star.imag - Z_TRUE.imag])
    assert d @ np.linalg.solve(cov, d) < 16  # within 4 sigma (chi2, 2 dof)
    assert abs(est.curvature - 4500) < 4 * est.curvature_stderr
    assert abs(est.amplitude - 0.9) < 4 * est.amplitude_stderr
    assert est.method == "lmfit_saturating_binomial"


def test_quadratic_data_hold_the_ceiling_and_keep_the_curvature():
    # Data deep in the quadratic region cannot tell A from kappa; the fit holds
    # the ceiling at 1 (A = 1 - S0) rather than trading kappa against a small A.
    rng = np.random.default_rng(1)
    counts = _paraboloid_counts(rng, GRID, 2000)
    est = fit_null(GRID, counts, 2000)
    assert est.accepted, est.message
    assert est.amplitude == pytest.approx(1 - est.floor)
    assert math.isnan(est.amplitude_stderr)
    assert abs(est.curvature - 40.0) < 4 * est.curvature_stderr
    assert est.to_dict()["amplitude_stderr"] is None  # NaN is not JSON


def test_joint_fit_over_amplifications_shares_the_null():
    rng = np.random.default_rng(3)
    z = np.concatenate([GRID, ring_design(Z_TRUE, 0.004, 8)])
    k = np.concatenate([np.ones(25, int), np.full(8, 4)])
    counts = _saturating_counts(rng, z, 2000, kappa=500.0, k=k)
    est = fit_null(z, counts, 2000, amplification=k)
    assert est.accepted, est.message
    assert est.amplifications == (1, 4)
    assert abs(est.curvature - 500) < 4 * est.curvature_stderr
    assert abs(est.z_star - Z_TRUE) < 4 * est.position_stderr


def test_gaussian_lmfit_equals_linear_paraboloid():
    rng = np.random.default_rng(4)
    s = 0.1 + 300.0 * np.abs(GRID - Z_TRUE) ** 2 + rng.normal(0, 0.002, 25)
    lin = fit_paraboloid(GRID, s, 0.002).estimate()
    non = fit_null_gaussian(GRID, s, 0.002)
    assert lin.accepted and non.accepted
    assert non.z_star == pytest.approx(lin.z_star, abs=1e-9)
    np.testing.assert_allclose(non.covariance, lin.covariance, rtol=1e-4)
    assert non.curvature == pytest.approx(lin.curvature, rel=1e-6)
    assert non.floor == pytest.approx(lin.floor, abs=1e-9)


def test_binomial_paraboloid_lmfit_equals_vectorised_irls():
    rng = np.random.default_rng(5)
    counts = _paraboloid_counts(rng, GRID, 3000)
    a = fit_paraboloid_counts(GRID, counts, 3000, iterations=8).estimate()
    b = fit_null(GRID, counts, 3000, model="paraboloid")
    assert a.accepted and b.accepted
    assert b.z_star == pytest.approx(a.z_star, abs=1e-6)
    np.testing.assert_allclose(b.covariance, a.covariance, rtol=1e-3)


def test_ring_direction_of_the_null():
    phi = 2 * np.pi * np.arange(10) / 10
    c = 0.02 + 0.0j
    z = c + 0.01 * np.exp(1j * phi)
    rng = np.random.default_rng(6)
    counts = _saturating_counts(rng, z, 4000)
    est = fit_ring(phi, counts / 4000, binomial_signal(counts, 4000)[1]).estimate()
    assert est.accepted
    assert abs(np.angle(np.exp(1j * (est.direction - np.angle(Z_TRUE - c))))) < 4 * (
        est.direction_stderr
    )


# ---------------------------------------------------------------------------
# Coverage of the 1-sigma intervals
# ---------------------------------------------------------------------------


def test_linear_fit_coverage_over_many_seeds():
    rng = np.random.default_rng(10)
    n = 400
    counts = _paraboloid_counts(rng, GRID, 2000, kappa=200.0, size=(n, 25))
    batch = fit_paraboloid_counts(GRID, counts, 2000)
    assert batch.accepted.all()
    zs = batch.z_star
    sx = np.sqrt(batch.covariance[:, 0, 0])
    sy = np.sqrt(batch.covariance[:, 1, 1])
    cover_x = np.mean(np.abs(zs.real - Z_TRUE.real) <= sx)
    cover_y = np.mean(np.abs(zs.imag - Z_TRUE.imag) <= sy)
    assert COVER_LO <= cover_x <= COVER_HI, cover_x
    assert COVER_LO <= cover_y <= COVER_HI, cover_y


@pytest.mark.slow
def test_nonlinear_fit_coverage_over_many_seeds():
    rng = np.random.default_rng(11)
    inside = []
    n_rejected = 0
    for _ in range(200):
        counts = _saturating_counts(rng, GRID, 1000)
        est = fit_null(GRID, counts, 1000)
        if not est.accepted:  # model_mismatch false alarms run at ~0.1-0.5 %
            n_rejected += 1
            continue
        inside.append(abs(est.z_star.real - Z_TRUE.real) <= est.z_star_stderr[0])
    assert n_rejected <= 6
    cover = float(np.mean(inside))
    assert COVER_LO <= cover <= COVER_HI, cover


# ---------------------------------------------------------------------------
# Verdicts
# ---------------------------------------------------------------------------


def test_noise_only_is_no_signal():
    rng = np.random.default_rng(20)
    counts = rng.binomial(2000, 0.05, size=(200, 25))
    batch = fit_paraboloid_counts(GRID, counts, 2000)
    reasons = batch.reasons()
    assert np.mean(reasons == RejectionReason.NO_SIGNAL) > 0.95
    assert np.isnan(batch.z_star[reasons == RejectionReason.NO_SIGNAL]).all()
    est = fit_null(GRID, counts[0], 2000)
    assert est.reason is RejectionReason.NO_SIGNAL
    ring = fit_ring(np.linspace(0, 2 * np.pi, 8, endpoint=False), counts[0, :8] / 2000)
    assert ring.estimate().reason is RejectionReason.NO_SIGNAL


def test_null_outside_the_region():
    z = grid_design(Z_TRUE + 0.015, 0.01, 5)  # null 5e-3 beyond the box edge
    s = 0.02 + 40 * np.abs(z - Z_TRUE) ** 2
    est = fit_paraboloid(z, s, 1e-5).estimate()
    assert est.reason is RejectionReason.OUTSIDE_REGION
    rng = np.random.default_rng(21)
    counts = _paraboloid_counts(rng, z, 200_000)
    assert fit_null(z, counts, 200_000).reason is RejectionReason.OUTSIDE_REGION


def test_saturated_data_pinned_at_the_ceiling():
    rng = np.random.default_rng(22)
    counts = rng.binomial(2000, 0.985, 25)
    est = fit_null(GRID, counts, 2000)
    assert est.reason is RejectionReason.SATURATED


def test_saturated_data_that_never_come_near_the_floor():
    # Three concentric rings at 0.9, 1.1 and 1.3 rad up the fringe: the null is
    # well placed by symmetry but no point samples the floor region.
    q = 100.0
    phi = np.linspace(0, 2 * np.pi, 12, endpoint=False)
    z = np.concatenate([Z_TRUE + (u / q) * np.exp(1j * (phi + u)) for u in (0.9, 1.1, 1.3)])
    rng = np.random.default_rng(23)
    counts = _saturating_counts(rng, z, 2000, amp=0.95, kappa=0.95 * q * q)
    est = fit_null(z, counts, 2000)
    assert est.reason is RejectionReason.SATURATED
    assert "never come near the floor" in est.message


def test_paraboloid_on_saturated_landscape_is_model_mismatch():
    rng = np.random.default_rng(24)
    counts = _saturating_counts(rng, GRID, 2000, kappa=4000.0)
    est = fit_paraboloid_counts(GRID, counts, 2000).estimate()
    assert est.reason is RejectionReason.MODEL_MISMATCH


def test_too_few_points():
    s = 0.02 + 40 * np.abs(GRID[:4] - Z_TRUE) ** 2
    assert fit_paraboloid(GRID[:4], s).estimate().reason is RejectionReason.TOO_FEW_POINTS
    assert fit_null(GRID[:5], [10] * 5, 1000).reason is RejectionReason.TOO_FEW_POINTS
    assert fit_null_gaussian(GRID[:4], s, 0.01).reason is RejectionReason.TOO_FEW_POINTS
    assert fit_ring([0, 1, 2, 3], [1, 2, 3, 4]).estimate().reason is (
        RejectionReason.TOO_FEW_POINTS
    )


def test_degenerate_design_fails_cleanly():
    ring = ring_design(0.02, 0.01, 8)  # one circle: x**2 + y**2 is collinear with 1, x, y
    s = 0.02 + 40 * np.abs(ring - Z_TRUE) ** 2
    assert fit_paraboloid(ring, s).estimate().reason is RejectionReason.FIT_FAILED


# ---------------------------------------------------------------------------
# The rejected-estimate rule and records
# ---------------------------------------------------------------------------


def _rejected_estimate() -> NullEstimate:
    rng = np.random.default_rng(30)
    return fit_paraboloid_counts(GRID, rng.binomial(1000, 0.05, 25), 1000).estimate()


def test_rejected_estimate_has_no_numbers():
    est = _rejected_estimate()
    assert est.verdict is Verdict.REJECTED and not est.accepted
    for name in (
        "z_star",
        "covariance",
        "z_star_stderr",
        "position_stderr",
        "floor",
        "floor_stderr",
        "curvature",
        "curvature_stderr",
        "amplitude",
    ):
        with pytest.raises(RejectedEstimateError, match="rejected"):
            getattr(est, name)
    d = est.to_dict()
    for key in ("z_star", "covariance", "floor", "curvature", "amplitude"):
        assert key not in d
    assert d["verdict"] == "rejected" and d["reason"] == est.reason.value
    assert "z_star" not in repr(est)
    # Explicit diagnostic access still works.
    assert np.isfinite(est.unchecked().z_star)


def test_batch_arrays_are_masked_where_rejected_and_keep_their_docstrings():
    # One sweep with a clear null beside one of pure noise, which is rejected.
    rng = np.random.default_rng(32)
    clean = _paraboloid_counts(rng, GRID, 100_000, kappa=800.0)
    noise = rng.binomial(100_000, 0.05, 25)
    batch = fit_paraboloid_counts(GRID, np.stack([clean, noise]), 100_000)
    phi = np.linspace(0, 2 * np.pi, 8, endpoint=False)
    ring_s = np.stack([0.1 + 0.05 * np.cos(phi - 0.3), 0.1 + rng.normal(0, 1e-3, 8)])
    rings = fit_ring(phi, ring_s + rng.normal(0, 1e-4, (2, 8)), 1e-3)
    cases = [
        (batch, ParaboloidBatch, ("z_star", "covariance", "floor", "floor_stderr", "curvature",
                                  "curvature_stderr")),
        (rings, RingBatch, ("direction", "direction_stderr", "amplitude", "amplitude_stderr",
                            "offset")),
    ]
    for result, cls, names in cases:
        assert result.accepted.tolist() == [True, False]
        text = pydoc.render_doc(cls, renderer=pydoc.plaintext)
        for name in names:
            masked, raw = getattr(result, name), result.unchecked(name)
            assert np.isfinite(raw[1]).all()  # the rejected fit has numbers ...
            assert np.isnan(masked[1]).all()  # ... that the attribute does not hand out
            np.testing.assert_array_equal(masked[0], raw[0])
            assert not masked.flags.writeable
            attr = getattr(cls, name)
            assert isinstance(attr, property) and attr.__doc__
            assert f"{name}\n |      {attr.__doc__}" in text
    assert ParaboloidBatch.z_star.__doc__ == "Null positions (NaN where rejected)."
    assert NullEstimate.floor.__doc__ == "Signal at the null ``S0``."
    assert "Signal at the null ``S0``." in pydoc.render_doc(NullEstimate, renderer=pydoc.plaintext)
    assert batch.estimate(0).floor == batch.floor[0]


def test_to_dict_is_json_and_round_trips():
    rng = np.random.default_rng(31)
    est = fit_null(GRID, _saturating_counts(rng, GRID, 2000), 2000)
    assert est.accepted
    d = json.loads(json.dumps(est.to_dict()))
    back = NullEstimate.from_dict(d)
    assert back.z_star == est.z_star
    np.testing.assert_array_equal(back.covariance, est.covariance)
    assert back.amplitude == est.amplitude
    assert back.to_dict() == d
    assert (d["format"], d["version"]) == ("xtalkcal-null-estimate", 1)
    old = {k: v for k, v in d.items() if k not in ("format", "version")}
    old.update(schema="xtalkcal.null_estimate", schema_version=1)  # the first naming
    assert NullEstimate.from_dict(old).to_dict() == d
    with pytest.raises(FitInputError, match="xtalkcal-null-estimate"):
        NullEstimate.from_dict({**d, "format": "xtalkcal-settings"})
    rej = _rejected_estimate()
    d2 = json.loads(json.dumps(rej.to_dict()))
    back2 = NullEstimate.from_dict(d2)
    assert back2.reason is rej.reason
    with pytest.raises(RejectedEstimateError):
        _ = back2.z_star


def test_estimate_is_frozen():
    est = fit_paraboloid(GRID, 0.02 + 40 * np.abs(GRID - Z_TRUE) ** 2).estimate()
    with pytest.raises(AttributeError):
        est.method = "other"  # type: ignore[misc]
    with pytest.raises(ValueError):
        est.covariance[0, 0] = 1.0


# ---------------------------------------------------------------------------
# Bad input raises; inputs are never modified
# ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    "call",
    [
        lambda: fit_paraboloid(GRID, np.full(24, 0.1)),
        lambda: fit_paraboloid(GRID, np.r_[np.nan, np.ones(24)]),
        lambda: fit_paraboloid(GRID, np.ones(25), sigma=0.0),
        lambda: fit_paraboloid(np.r_[np.inf, GRID[1:]], np.ones(25)),
        lambda: fit_paraboloid(GRID, np.array(["a"] * 25)),
        lambda: fit_paraboloid_counts(GRID, np.full(25, 11), 10),
        lambda: fit_null(GRID, np.full(25, 5), 0),
        lambda: fit_null(GRID, np.full(25, 5), 100, model="cubic"),  # type: ignore[arg-type]
        lambda: fit_null(GRID, np.full(25, 5), 100, amplification=0),
        lambda: fit_null(GRID.reshape(5, 5), np.full((5, 5), 5), 100),
        lambda: fit_null(GRID, np.full(25, 5), 100, initial={"z_star": 0.01}),
        lambda: fit_ring(np.arange(5.0), np.ones(6)),
    ],
)
def test_bad_input_raises_fit_input_error(call):
    with pytest.raises(FitInputError):
        call()


def test_inputs_are_not_modified():
    rng = np.random.default_rng(40)
    counts = _saturating_counts(rng, GRID, 1000)
    z, k = GRID.copy(), counts.copy()
    z.setflags(write=False)
    k.setflags(write=False)
    fit_null(z, k, 1000)
    fit_paraboloid_counts(z, k, 1000)
    fit_paraboloid(z, k / 1000, np.full(25, 0.01))
    np.testing.assert_array_equal(z, GRID)
    np.testing.assert_array_equal(k, counts)


# ---------------------------------------------------------------------------
# Speed
# ---------------------------------------------------------------------------


def test_vectorised_paraboloid_fit_equals_one_fit_per_sweep():
    """The batch fit is a vectorisation, not an approximation: each sweep's result equals
    that sweep fitted alone. (Its speed is measured in benchmarks/bench_fit.py, not here:
    timing has no place in a test on a shared machine.)"""
    rng = np.random.default_rng(50)
    s = 0.02 + 40 * np.abs(GRID - Z_TRUE) ** 2 + rng.normal(0, 1e-3, (200, 25))
    batch = fit_paraboloid(GRID, s, 1e-3)
    for k in range(0, 200, 17):
        one = fit_paraboloid(GRID, s[k], 1e-3)
        assert np.allclose(batch.z_star[k], one.z_star, rtol=0, atol=1e-12)
        assert np.allclose(batch.covariance[k], one.covariance, rtol=1e-9, atol=0)


# ---------------------------------------------------------------------------
# Properties
# ---------------------------------------------------------------------------

complex_amplitudes = st.builds(
    complex,
    st.floats(-0.5, 0.5, allow_nan=False),
    st.floats(-0.5, 0.5, allow_nan=False),
)


@st.composite
def noiseless_paraboloids(draw):
    centre = draw(complex_amplitudes)
    half = draw(st.floats(1e-3, 0.1))
    n = draw(st.integers(3, 7))
    z = grid_design(centre, half, n)
    offset = complex(draw(st.floats(-0.8, 0.8)), draw(st.floats(-0.8, 0.8))) * half
    floor = draw(st.floats(0.0, 0.5))
    depth = draw(st.floats(0.01, 1.0))  # signal rise across the sweep
    kappa = depth / half**2
    return z, centre + offset, floor, kappa


@settings(max_examples=60, deadline=None)
@given(noiseless_paraboloids())
def test_noiseless_paraboloids_are_recovered_exactly(case):
    z, z_star, floor, kappa = case
    s = floor + kappa * np.abs(z - z_star) ** 2
    est = fit_paraboloid(z, s, np.full(z.size, 1e-3)).estimate()
    assert est.accepted, est.message
    scale = np.abs(z - z.mean()).max()
    assert abs(est.z_star - z_star) <= 1e-8 * scale
    assert est.floor == pytest.approx(floor, abs=1e-9)
    assert est.curvature == pytest.approx(kappa, rel=1e-8)
    assert est.reduced_chi2 < 1e-10


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(shift=complex_amplitudes, seed=st.integers(0, 2**32 - 1))
def test_translating_the_sweep_translates_the_null(shift, seed):
    rng = np.random.default_rng(seed)
    s = 0.02 + 40 * np.abs(GRID - Z_TRUE) ** 2 + rng.normal(0, 2e-3, 25)
    a = fit_paraboloid(GRID, s, 2e-3)
    b = fit_paraboloid(GRID + shift, s, 2e-3)
    assert a.reason_codes == b.reason_codes
    za = a.unchecked("z_star")
    zb = b.unchecked("z_star")
    assert abs((zb - shift) - za) <= 1e-9 * max(1.0, abs(za))
    np.testing.assert_allclose(
        b.unchecked("covariance"), a.unchecked("covariance"), rtol=1e-7, atol=1e-30
    )


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), batch=st.tuples(st.integers(1, 4), st.integers(1, 3)))
def test_batch_equals_per_item(seed, batch):
    rng = np.random.default_rng(seed)
    z = GRID + rng.normal(0, 1e-3, batch + (25,)) + 1j * rng.normal(0, 1e-3, batch + (25,))
    counts = _paraboloid_counts(rng, z, 1000)
    res = fit_paraboloid_counts(z, counts, 1000)
    assert res.shape == batch
    for idx in np.ndindex(*batch):
        one = fit_paraboloid_counts(z[idx], counts[idx], 1000).estimate()
        item = res.estimate(idx)
        assert item.reason is one.reason
        assert item.message == one.message
        u1, u2 = one.unchecked(), item.unchecked()
        assert u2.z_star == pytest.approx(u1.z_star, rel=1e-10, abs=1e-14)
        np.testing.assert_allclose(u2.covariance, u1.covariance, rtol=1e-9)
        assert u2.curvature == pytest.approx(u1.curvature, rel=1e-10)
        assert item.reduced_chi2 == pytest.approx(one.reduced_chi2, rel=1e-10)
        assert item.total_shots == one.total_shots == 25_000


@settings(max_examples=40, deadline=None)
@given(
    direction=st.floats(-math.pi, math.pi),
    offset=st.floats(0.05, 0.9),
    n=st.integers(5, 16),
    phase0=st.floats(0, 2 * math.pi),
)
def test_noiseless_ring_gives_the_direction(direction, offset, n, phase0):
    c, rho = 0.1 + 0.05j, 0.01
    z_star = c + offset * rho * np.exp(1j * direction)
    phi = phase0 + 2 * np.pi * np.arange(n) / n
    z = c + rho * np.exp(1j * phi)
    # Paraboloid: the ring signal is a pure first harmonic, exact direction.
    s = null_signal(z, z_star, 0.02, 3000.0)
    est = fit_ring(phi, s, np.full(n, 1e-4)).estimate()
    assert est.accepted
    assert abs(np.angle(np.exp(1j * (est.direction - direction)))) < 1e-9
    assert est.amplitude == pytest.approx(2 * 3000.0 * rho * offset * rho, rel=1e-9)
    # Saturating (up to ~1.1 rad up the fringe): higher harmonics alias only weakly.
    s = null_signal(z, z_star, 0.02, 3000.0, amplitude=0.9)
    est = fit_ring(phi, s, np.full(n, 1e-4)).estimate()
    assert abs(np.angle(np.exp(1j * (est.direction - direction)))) < 1e-3


@settings(max_examples=200, deadline=None)
@given(s0=st.floats(0.0, 0.2), u=st.floats(0.0, 1.4), ceiling=st.floats(0.85, 1.0))
def test_linearise_fringe_inverts_the_saturating_model(s0, u, ceiling):
    """S = S0 + A sin²(u) (the "saturating" model of fit_null) maps onto S0 + A u², and the
    propagated error is the derivative of that map (checked by a finite difference)."""
    from xtalkcal.fits import linearise_fringe

    a = ceiling - s0
    s = s0 + a * math.sin(u) ** 2
    q, dq = linearise_fringe(np.array([s]), np.array([1.0]), s0, ceiling=ceiling)
    assert q[0] == pytest.approx(s0 + a * u * u, abs=1e-9)
    if 1e-3 < u < 1.3:
        h = 1e-7
        q2, _ = linearise_fringe(np.array([s + h]), np.array([1.0]), s0, ceiling=ceiling)
        assert dq[0] == pytest.approx((q2[0] - q[0]) / h, rel=1e-4)


def test_linearised_ring_off_centre_gives_the_unbiased_null():
    """A ring off-centre by a quarter of its radius, rising to 0.35 up a sin² fringe: a
    paraboloid fitted to the raw signals puts the null 13 % of the offset towards the
    ring's centre; fitted to the linearised signals, 0.01 % (noiseless data)."""
    from xtalkcal.calibrate import ring_around
    from xtalkcal.fits import fit_paraboloid_column, linearise_fringe

    z_true, s0, r = 0.01 + 0.004j, 0.02, 0.002
    centre = z_true - 0.25 * r
    c = math.asin(math.sqrt(0.35 / (1 - s0))) / r  # u = c·|z − z*|
    pts = ring_around(np.array([centre]), np.array([r]), 13)[:, 0]
    s = s0 + (1 - s0) * np.sin(c * np.abs(pts - z_true)) ** 2
    err = np.full_like(s, 1e-3)
    raw = fit_paraboloid_column(pts[None], s[None], err[None]).estimates[0]
    pull = abs(raw.z_star - z_true) / abs(centre - z_true)
    assert 0.05 < pull < 0.3
    q, qe = linearise_fringe(s, err, raw.floor)
    fixed = fit_paraboloid_column(pts[None], q[None], qe[None]).estimates[0]
    # the floor came from the biased fit, yet one pass suffices
    assert abs(fixed.z_star - z_true) < 0.002 * abs(centre - z_true)
