"""Validation of simulated_device.drift: the laws of the drift processes and their seeding.

Statistical checks use many independent channels of one seeded track, so each test is
deterministic; the tolerances are nevertheless the sampling distributions' own (chi-square for
variances, Fisher's z for correlations, normal for means) at a two-sided level of 1e-6, so a
factor error (2D instead of D, e^(−Δt/2τ) instead of e^(−Δt/τ)) fails by a wide margin.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import chi2, norm

from simulated_device.drift import DriftSpec, DriftTrack

K = 20_000  # channels per statistical check
P_TAIL = 1e-6
Z = float(norm.isf(P_TAIL / 2))  # two-sided normal quantile, ≈ 4.9


def assert_variance(samples: np.ndarray, expected: float, *, known_mean: float | None) -> None:
    """Chi-square test of the sample variance of the last axis against ``expected``."""
    n = samples.shape[-1]
    if known_mean is None:
        dof, ss = n - 1, np.sum((samples - samples.mean()) ** 2)
    else:
        dof, ss = n, np.sum((samples - known_mean) ** 2)
    lo, hi = chi2.ppf([P_TAIL / 2, 1 - P_TAIL / 2], dof)
    statistic = ss / expected
    assert lo < statistic < hi, f"variance {ss / dof:.6g} vs expected {expected:.6g}"


def assert_correlation(a: np.ndarray, b: np.ndarray, expected: float) -> None:
    """Fisher z test of the sample correlation of ``a`` and ``b`` against ``expected``."""
    r = np.corrcoef(a, b)[0, 1]
    z = (math.atanh(r) - math.atanh(expected)) * math.sqrt(a.size - 3)
    assert abs(z) < Z, f"correlation {r:.5f} vs expected {expected:.5f}"


# --- Wiener walk: Var x(t) = D·t, E x(t) = μ·t (Einstein / Wiener process definition) --------


def test_random_walk_variance_grows_linearly_in_time() -> None:
    # Times inside the first grid cell, on the grid, across fine blocks and across coarse
    # chunks (block of 16 steps, chunks of 64 blocks) all exercise different code paths.
    diffusion = 0.3
    track = DriftTrack.wiener(K, diffusion=diffusion, rng=11, grid_step_s=1.0, block_steps=16)
    times = np.array([0.37, 2.0, 7.5, 40.25, 1500.7, 5000.0])
    values = track.value(times)
    for t, x in zip(times, values, strict=True):
        assert_variance(x, diffusion * t, known_mean=0.0)
    increments = np.diff(np.vstack([np.zeros(K), values]), axis=0)
    for dt, dx in zip(np.diff(times, prepend=0.0), increments, strict=True):
        assert_variance(dx, diffusion * dt, known_mean=0.0)
    # Independent increments: successive increments are uncorrelated.
    for a, b in zip(increments[:-1], increments[1:], strict=True):
        assert_correlation(a, b, 0.0)


def test_linear_rate_sets_the_mean() -> None:
    diffusion, rate = 0.2, 0.05
    track = DriftTrack.wiener(K, diffusion=diffusion, rate=rate, rng=3, block_steps=8)
    for t in (0.6, 9.0, 123.4):
        x = track.value(t)
        assert abs(x.mean() - rate * t) < Z * math.sqrt(diffusion * t / K)
        assert_variance(x, diffusion * t, known_mean=rate * t)
    np.testing.assert_allclose(track.mean(123.4), rate * 123.4)
    np.testing.assert_allclose(track.variance(123.4), diffusion * 123.4)


def test_rate_alone_is_exact_and_draws_nothing() -> None:
    track = DriftTrack.wiener(4, diffusion=0.0, rate=[0.0, 1.0, -2.0, 0.5], initial=1.0, rng=0)
    np.testing.assert_allclose(track.value(7.25), 1.0 + np.array([0.0, 1.0, -2.0, 0.5]) * 7.25)


def test_bridge_inside_one_grid_cell_has_brownian_covariance() -> None:
    # Several queries inside one (long) grid cell are drawn from the Brownian bridge, each
    # conditioned on the previous answer: jointly they must be a Wiener process,
    # Cov(x(s), x(t)) = D·min(s, t).
    diffusion = 1.0
    track = DriftTrack.wiener(K, diffusion=diffusion, rng=5, grid_step_s=10.0, block_steps=4)
    times = np.array([2.0, 5.0, 7.0, 10.0, 13.5])
    values = track.value(times)
    for i, s in enumerate(times):
        assert_variance(values[i], diffusion * s, known_mean=0.0)
        for j in range(i + 1, times.size):
            t = times[j]
            assert_correlation(values[i], values[j], math.sqrt(s / t))


def test_grid_values_inside_a_block_have_brownian_covariance() -> None:
    # Fine grid values are the block's bridge between coarse values (Matheron's rule); check
    # the law at grid times inside a block, at its end and in the next one.
    diffusion = 0.5
    track = DriftTrack.wiener(K, diffusion=diffusion, rng=8, grid_step_s=1.0, block_steps=64)
    times = np.array([1.0, 17.0, 63.0, 64.0, 65.0, 200.0])
    values = track.value(times)
    for i, s in enumerate(times):
        assert_variance(values[i], diffusion * s, known_mean=0.0)
    for i in range(times.size - 1):
        assert_correlation(values[i], values[i + 1], math.sqrt(times[i] / times[i + 1]))


# --- Ornstein–Uhlenbeck: stationary variance σ², autocorrelation e^(−Δt/τ) -------------------
# (Uhlenbeck & Ornstein, Phys. Rev. 36, 823 (1930); exact discretisation
#  x(t+dt) = x·e^(−dt/τ) + σ·√(1 − e^(−2dt/τ))·N(0, 1).)


def test_ou_stationary_variance_and_autocorrelation() -> None:
    std, tau = 0.5, 10.0
    track = DriftTrack.ornstein_uhlenbeck(
        K, std=std, correlation_time_s=tau, initial="stationary", rng=21, block_steps=16
    )
    assert_variance(track.initial, std**2, known_mean=0.0)
    start = track.value(3.3)
    assert_variance(start, std**2, known_mean=0.0)
    previous, t_prev = start, 3.3
    for t in (8.3, 13.3, 37.0, 400.5):  # Δt = τ/2, τ, 2.37τ, then uncorrelated
        x = track.value(t)
        assert_variance(x, std**2, known_mean=0.0)
        assert_correlation(start, x, math.exp(-(t - 3.3) / tau))
        assert_correlation(previous, x, math.exp(-(t - t_prev) / tau))
        previous, t_prev = x, t


def test_ou_from_zero_relaxes_to_stationary_variance() -> None:
    # Var x(t) = σ²(1 − e^(−2t/τ)) for x(0) = 0.
    std, tau = 2.0, 5.0
    track = DriftTrack.ornstein_uhlenbeck(K, std=std, correlation_time_s=tau, rng=4, block_steps=8)
    for t in (0.4, 2.5, 7.0, 31.2):
        expected = std**2 * (1.0 - math.exp(-2.0 * t / tau))
        assert_variance(track.value(t), expected, known_mean=0.0)
        np.testing.assert_allclose(track.variance(t), expected, rtol=1e-12)


def test_ou_bridge_inside_a_cell_has_ou_covariance() -> None:
    # Off-grid queries in a long cell: Cov(x(s), x(t)) = e^(−(t−s)/τ) · Var x(s), from x(0)=0.
    std, tau = 1.0, 4.0
    track = DriftTrack.ornstein_uhlenbeck(
        K, std=std, correlation_time_s=tau, rng=9, grid_step_s=20.0, block_steps=2
    )
    times = np.array([1.0, 3.5, 9.0, 19.0])
    values = track.value(times)
    var = std**2 * (1.0 - np.exp(-2.0 * times / tau))
    for i, s in enumerate(times):
        assert_variance(values[i], var[i], known_mean=0.0)
        for j in range(i + 1, times.size):
            rho = math.exp(-(times[j] - s) / tau) * math.sqrt(var[i] / var[j])
            assert_correlation(values[i], values[j], rho)


def test_mean_reversion_of_a_deterministic_channel() -> None:
    # dx = (μ − x/τ) dt without noise: x(t) = x0 e^(−t/τ) + μτ(1 − e^(−t/τ)).
    track = DriftTrack(2, rate=[0.0, 0.3], correlation_time_s=[2.0, 5.0], initial=[1.0, -1.0])
    t = 3.7
    expected = np.array(
        [math.exp(-t / 2.0), -math.exp(-t / 5.0) + 0.3 * 5.0 * (1.0 - math.exp(-t / 5.0))]
    )
    np.testing.assert_allclose(track.value(t), expected, rtol=1e-13)


# --- Seeding, batching and query patterns --------------------------------------------------------

QUERY_TIMES = [0.0, 0.25, 0.25, 0.9, 1.0, 3.3, 3.31, 17.0, 300.2, 1024.0, 1024.5, 4100.0]


def make_track(rng: object = 1234) -> DriftTrack:
    return DriftTrack(
        5,
        diffusion=[0.1, 0.2, 0.0, 1e-3, 0.05],
        rate=[0.0, 0.01, 0.02, 0.0, 0.0],
        correlation_time_s=[math.inf, math.inf, math.inf, 60.0, 7.0],
        rng=rng,  # type: ignore[arg-type]
        block_steps=32,
    )


def test_same_seed_and_queries_give_same_values() -> None:
    a, b = make_track(), make_track()
    np.testing.assert_array_equal(a.value(QUERY_TIMES), b.value(QUERY_TIMES))
    other = make_track(4321).value(QUERY_TIMES)
    assert not np.allclose(other[3:], a.value(QUERY_TIMES[-1])[None, :])
    assert not np.array_equal(make_track(4321).value(QUERY_TIMES), make_track().value(QUERY_TIMES))


def test_seed_forms_are_reproducible() -> None:
    times = [0.5, 10.0, 99.9]
    from_int = make_track(77).value(times)
    from_seq = make_track(np.random.SeedSequence(77)).value(times)
    np.testing.assert_array_equal(from_int, from_seq)
    gen_a = make_track(np.random.default_rng(5)).value(times)
    gen_b = make_track(np.random.default_rng(5)).value(times)
    np.testing.assert_array_equal(gen_a, gen_b)
    with pytest.raises(ValueError, match="rng"):
        make_track("seed")


def test_values_do_not_depend_on_batching() -> None:
    batched = make_track().value(QUERY_TIMES)
    one_by_one = make_track()
    singles = np.array([one_by_one.value(t) for t in QUERY_TIMES])
    np.testing.assert_array_equal(batched, singles)
    chunked = make_track()
    parts = [chunked.value(QUERY_TIMES[:3]), chunked.value(QUERY_TIMES[3:8])]
    parts.append(chunked.value(np.array(QUERY_TIMES[8:]).reshape(2, 2)).reshape(4, -1))
    np.testing.assert_array_equal(np.concatenate(parts), batched)


def test_grid_values_do_not_depend_on_what_was_asked_before() -> None:
    # Values at grid times are fixed by the seed alone (documented property).
    dense = make_track()
    dense.value(np.linspace(0.0, 1000.0, 777))
    sparse = make_track()
    grid_times = [1024.0, 2048.0, 4096.0]
    np.testing.assert_array_equal(dense.value(grid_times), sparse.value(grid_times))
    # Off the grid the two differ only by the bridge spread within one cell.
    step = 1.0
    t = 4096.5
    gap = np.abs(dense.value(t) - sparse.value(t))
    spread = np.sqrt(np.array([0.1, 0.2, 0.0, 1e-3, 0.05]) * step) / 2.0
    assert np.all(gap <= 6.0 * spread + 1e-15)


def test_repeated_time_returns_the_same_value() -> None:
    track = make_track()
    first = track.value(2.5)
    np.testing.assert_array_equal(track.value(2.5), first)
    np.testing.assert_array_equal(track.value([2.5, 2.5]), np.vstack([first, first]))
    assert track.last_time_s == 2.5


def test_earlier_time_raises_and_leaves_state_alone() -> None:
    track = make_track()
    track.value(10.0)
    with pytest.raises(ValueError, match="must not decrease"):
        track.value(9.0)
    with pytest.raises(ValueError, match="must not decrease"):
        track.value([11.0, 10.5])
    assert track.last_time_s == 10.0
    reference = make_track()
    reference.value(10.0)
    np.testing.assert_array_equal(track.value(12.0), reference.value(12.0))


@pytest.mark.parametrize("bad", [-1.0, math.nan, math.inf])
def test_bad_times_raise(bad: float) -> None:
    with pytest.raises(ValueError, match="simulated times"):
        make_track().value(bad)


def test_bad_parameters_raise() -> None:
    with pytest.raises(ValueError, match="diffusion"):
        DriftTrack(2, diffusion=-1.0)
    with pytest.raises(ValueError, match="shape"):
        DriftTrack(2, diffusion=[1.0, 2.0, 3.0])
    with pytest.raises(ValueError, match="correlation_time_s"):
        DriftTrack(2, correlation_time_s=0.0)
    with pytest.raises(ValueError, match="correlation_time_s"):
        DriftTrack.ornstein_uhlenbeck(2, std=1.0, correlation_time_s=math.inf)
    with pytest.raises(ValueError, match="initial"):
        DriftTrack(2, initial="random")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="grid_step_s"):
        DriftTrack(2, grid_step_s=0.0)
    with pytest.raises(ValueError, match="block_steps"):
        DriftTrack(2, block_steps=0)
    with pytest.raises(ValueError, match="n_channels"):
        DriftTrack(-1)


def test_zero_channels_are_allowed() -> None:
    assert DriftTrack(0, diffusion=1.0, rng=1).value([1.0, 2.5]).shape == (2, 0)


# --- DriftSpec --------------------------------------------------------------------------------


def test_off_spec_gives_exactly_zero_drift() -> None:
    spec = DriftSpec.off()
    assert spec.is_off
    track = spec.track(6, 3, rng=1)
    assert track.n_channels == 15
    np.testing.assert_array_equal(track.value([0.0, 1.5, 1e6]), np.zeros((3, 15)))


def test_spec_track_layout_and_laws() -> None:
    spec = DriftSpec(
        phase_diffusion_rad2_per_s=1e-4,
        phase_rate_rad_per_s=2e-5,
        log_magnitude_diffusion_per_s=4e-5,
        frequency_wander_std_ghz=1e-4,
        frequency_correlation_time_s=600.0,
    )
    assert not spec.is_off
    n_c, n_q = K, K
    track = spec.track(n_c, n_q, rng=2, stationary_start=True, block_steps=16)
    t = 900.0
    np.testing.assert_allclose(track.mean(t)[:n_c], 2e-5 * t)
    np.testing.assert_allclose(track.variance(t)[:n_c], 1e-4 * t)
    np.testing.assert_allclose(track.variance(t)[n_c : 2 * n_c], 4e-5 * t)
    np.testing.assert_array_equal(track.initial[: 2 * n_c], 0.0)  # nominal couplings at t = 0
    x = track.value(t)
    assert_variance(x[:n_c], 1e-4 * t, known_mean=2e-5 * t)
    assert_variance(x[n_c : 2 * n_c], 4e-5 * t, known_mean=0.0)
    assert_variance(x[2 * n_c :], 1e-4**2, known_mean=0.0)
    assert_correlation(track.initial[2 * n_c :], x[2 * n_c :], math.exp(-t / 600.0))


def test_spec_per_coupling_phase_rates_override() -> None:
    spec = DriftSpec(phase_rate_rad_per_s=1.0)
    track = spec.track(3, 1, phase_rates_rad_per_s=[0.0, -1e-3, 2e-3], rng=0)
    np.testing.assert_allclose(track.value(100.0), [0.0, -0.1, 0.2, 0, 0, 0, 0])
    with pytest.raises(ValueError, match="phase_rates"):
        spec.track(3, 1, phase_rates_rad_per_s=[1.0, 2.0])


def test_spec_validation() -> None:
    with pytest.raises(ValueError, match="phase_diffusion"):
        DriftSpec(phase_diffusion_rad2_per_s=-1.0)
    with pytest.raises(ValueError, match="frequency_correlation_time_s"):
        DriftSpec(frequency_correlation_time_s=0.0)
    with pytest.raises(ValueError, match="finite"):
        DriftSpec(phase_rate_rad_per_s=math.nan)
    assert DriftSpec(phase_rate_rad_per_s=1).phase_rate_rad_per_s == 1.0
