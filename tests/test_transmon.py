"""Validation of simulated_device.transmon against published transmon physics.

Reference: J. Koch et al., "Charge-insensitive qubit design derived from the Cooper pair box",
Phys. Rev. A 76, 042319 (2007) — cited below as "Koch 2007".
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.special import mathieu_a, mathieu_b

from simulated_device.transmon import (
    TransmonLevels,
    charge_basis_levels,
    charge_basis_spectrum,
    default_n_cut,
    duffing_levels,
    ejec_from_frequencies,
)

EC = 0.25  # GHz, a typical charging energy; every check below is in units that scale with it
RATIOS_MATHIEU = [0.5, 1.0, 5.0, 20.0, 50.0, 100.0, 300.0, 1000.0]


def mathieu_levels(ej: float, ec: float, ng: float, n_levels: int) -> np.ndarray:
    """Absolute energies E_m = EC·(characteristic value) at q = −EJ/(2EC), Koch 2007 eq. (2.6).

    Substituting φ = 2x turns 4EC(−i∂_φ − ng)²ψ − EJ cos φ ψ = Eψ into Mathieu's equation
    y'' + (a − 2q cos 2x) y = 0 with a = E/EC, q = −EJ/(2EC), for y = e^{−i ng φ} ψ, which obeys
    y(x + π) = e^{−2πi ng} y(x). Koch's eq. (2.6)–(2.8) write the result with characteristic
    values a_ν of real order ν = 2(ng + k(m, ng)); SciPy only has integer orders (a fractional
    order returns nan), so only the two offsets where ν is an integer can be checked:

    * ng = 0: y is π-periodic, the solutions are ce_{2k} (a_{2k}) and se_{2k} (b_{2k}); the
      ordering a_0 < b_2 < a_2 < b_4 < a_4 < … gives E_0↔a_0, E_1↔b_2, E_2↔a_2, E_3↔b_4, …
    * ng = ½: y is π-antiperiodic, the solutions have odd order; for q < 0 the ordering is
      a_1 < b_1 < a_3 < b_3 < …, so E_0↔a_1, E_1↔b_1, E_2↔a_3, E_3↔b_3, …

    The mapping is written out explicitly, not obtained by sorting, so a wrong assignment
    fails; the strict ordering is asserted too.
    """
    q = -ej / (2.0 * ec)
    if ng == 0.0:
        orders = [(mathieu_a, 0)] + [
            (f, 2 * k) for k in range(1, n_levels) for f in (mathieu_b, mathieu_a)
        ]
    elif ng == 0.5:
        orders = [(f, 2 * k + 1) for k in range(n_levels) for f in (mathieu_a, mathieu_b)]
    else:  # pragma: no cover - guarded by the parametrisation
        raise AssertionError("SciPy has integer-order characteristic values only")
    values = np.array([f(order, q) for f, order in orders[:n_levels]])
    assert np.all(np.diff(values) > 0), "mapping of levels to characteristic values is off"
    return ec * values


# --- Exact spectrum: Koch 2007 eq. (2.6)-(2.8), Mathieu characteristic values --------------------


@pytest.mark.parametrize("ng", [0.0, 0.5])
@pytest.mark.parametrize("ratio", RATIOS_MATHIEU)
def test_charge_basis_energies_match_mathieu_characteristic_values(ratio: float, ng: float) -> None:
    # Koch 2007 eq. (2.6); SciPy's characteristic values lose accuracy for q ≳ 5e3
    # (EJ/EC ≳ 1e4), so the comparison stops at EJ/EC = 1000.
    ej, n_levels = ratio * EC, 6
    spectrum = charge_basis_spectrum(ej, EC, n_levels=n_levels, ng=ng)
    expected = mathieu_levels(ej, EC, ng, n_levels)
    np.testing.assert_allclose(spectrum.energies_ghz, expected, rtol=1e-8, atol=0.0)
    # The returned levels are the same spectrum measured from the ground state.
    levels = charge_basis_levels(ej, EC, n_levels=n_levels, ng=ng)
    np.testing.assert_allclose(
        levels.energies_ghz, expected - expected[0], rtol=1e-8, atol=1e-10 * ej
    )


def test_mathieu_check_detects_a_wrong_charging_term() -> None:
    # Koch 2007 eq. (2.1): H = 4EC(n − ng)² − EJ cos φ. Halving the charging term (2EC instead
    # of 4EC) is the same as halving EC in H, and must miss the Mathieu values by far.
    ej = 50.0 * EC
    wrong = charge_basis_spectrum(ej, EC / 2.0, n_levels=4).energies_ghz
    expected = mathieu_levels(ej, EC, 0.0, 4)
    assert np.max(np.abs(wrong / expected - 1.0)) > 1e-2


@pytest.mark.parametrize("ratio", [0.5, 10.0, 100.0, 1000.0, 1e4, 1e5])
@pytest.mark.parametrize("n_levels", [3, 6])
def test_default_cutoff_is_converged(ratio: float, n_levels: int) -> None:
    # Numerical convergence (no external source): doubling the cut-off leaves the default's
    # transition frequencies and charge matrix elements unchanged.
    ej = ratio * EC
    n_cut = default_n_cut(ej, EC, n_levels)
    assert n_cut >= 15
    for ng in (0.0, 0.37):
        base = charge_basis_levels(ej, EC, n_levels=n_levels, ng=ng)
        fine = charge_basis_levels(ej, EC, n_levels=n_levels, ng=ng, n_cut=2 * n_cut)
        scale = fine.f01_ghz
        np.testing.assert_allclose(
            base.transition_frequencies_ghz,
            fine.transition_frequencies_ghz,
            rtol=0.0,
            atol=1e-11 * scale,
        )
        if ratio >= 10.0:
            # Deep in the charge regime, levels ±n come in nearly degenerate pairs whose
            # eigenvectors any rounding mixes; matrix elements are well defined only for
            # transmons.
            np.testing.assert_allclose(base.charge_matrix, fine.charge_matrix, rtol=0.0, atol=1e-9)


def test_too_small_cutoff_is_visibly_wrong() -> None:
    # The convergence check above can fail: a cut-off of 5 at EJ/EC = 1000 misses badly.
    ej = 1000.0 * EC
    good = charge_basis_levels(ej, EC)
    bad = charge_basis_levels(ej, EC, n_cut=5)
    assert abs(bad.f01_ghz / good.f01_ghz - 1.0) > 1e-2


@pytest.mark.parametrize("ng", [0.13, 0.25, 0.41])
def test_offset_charge_symmetries(ng: float) -> None:
    # Koch 2007 Sec. II: H(ng) is periodic in ng with period 1 and symmetric under ng → −ng
    # (charge conjugation), so E_m(ng) = E_m(ng + 1) = E_m(−ng) = E_m(1 − ng).
    ej = 5.0 * EC
    ref = charge_basis_spectrum(ej, EC, n_levels=5, ng=ng).energies_ghz
    for other in (ng + 1.0, -ng, 1.0 - ng, ng - 3.0):
        np.testing.assert_allclose(
            charge_basis_spectrum(ej, EC, n_levels=5, ng=other).energies_ghz,
            ref,
            rtol=1e-12,
            atol=1e-12,
        )


# --- Transmon asymptotics: Koch 2007 eq. (2.11) --------------------------------------------------


@pytest.mark.parametrize("ratio", [50.0, 100.0, 300.0, 1000.0])
def test_asymptotic_frequency_and_anharmonicity(ratio: float) -> None:
    # Koch 2007 eq. (2.11): E_m ≈ −EJ + √(8EJEC)(m + ½) − EC/12·(6m² + 6m + 3), hence
    # E01 ≈ √(8EJEC) − EC and α ≈ −EC. The neglected terms are of relative order
    # √(EC/EJ) in α (of order EC·√(EC/EJ) in E01).
    ej = ratio * EC
    levels = charge_basis_levels(ej, EC)
    e01_asymptotic = math.sqrt(8.0 * ej * EC) - EC
    assert abs(levels.f01_ghz / e01_asymptotic - 1.0) < 0.2 / ratio
    alpha_dev = levels.anharmonicity_ghz / (-EC) - 1.0
    assert 0.5 / math.sqrt(ratio) < alpha_dev < 1.1 / math.sqrt(ratio)


def test_asymptotic_deviation_shrinks_with_ratio() -> None:
    # Koch 2007 eq. (2.11) becomes exact as EJ/EC → ∞: the relative deviations fall steadily.
    ratios = [20.0, 50.0, 100.0, 300.0, 1000.0, 3000.0]
    alpha_dev, f01_dev = [], []
    for ratio in ratios:
        levels = charge_basis_levels(ratio * EC, EC)
        alpha_dev.append(abs(levels.anharmonicity_ghz / (-EC) - 1.0))
        f01_dev.append(abs(levels.f01_ghz / (math.sqrt(8.0 * ratio) * EC - EC) - 1.0))
    assert np.all(np.diff(alpha_dev) < 0)
    assert np.all(np.diff(f01_dev) < 0)
    assert alpha_dev[ratios.index(50.0)] < 0.15  # |α/(−EC) − 1| at EJ/EC = 50


# --- Charge dispersion: Koch 2007 eq. (2.17) -----------------------------------------------------


def koch_dispersion(m: int, ratio: float, ec: float) -> float:
    """ε_m ≈ (−1)^m EC 2^(4m+5)/m! √(2/π) (EJ/2EC)^(m/2+3/4) e^(−√(8EJ/EC)), Koch 2007 (2.17)."""
    return (
        (-1) ** m
        * ec
        * 2.0 ** (4 * m + 5)
        / math.factorial(m)
        * math.sqrt(2.0 / math.pi)
        * (ratio / 2.0) ** (m / 2.0 + 0.75)
        * math.exp(-math.sqrt(8.0 * ratio))
    )


def dispersion(m: int, ratio: float) -> float:
    """Peak-to-peak band width ε_m = E_m(ng = ½) − E_m(ng = 0)."""
    ej = ratio * EC
    e_half = charge_basis_spectrum(ej, EC, n_levels=m + 1, ng=0.5).energies_ghz[m]
    e_zero = charge_basis_spectrum(ej, EC, n_levels=m + 1, ng=0.0).energies_ghz[m]
    return e_half - e_zero


@pytest.mark.parametrize(
    ("m", "ratio", "rtol"),
    [(0, 30.0, 0.10), (0, 50.0, 0.10), (0, 80.0, 0.10), (1, 50.0, 0.20), (1, 80.0, 0.20)],
)
def test_charge_dispersion_matches_asymptotic_formula(m: int, ratio: float, rtol: float) -> None:
    # Koch 2007 eq. (2.17), sign included (the ground band is lowest at integer ng, the first
    # excited band highest). The formula is the leading term of an expansion in √(EC/EJ),
    # hence the tolerance, wider for m = 1 whose correction is larger (exact/formula is 0.96
    # for m = 0 and 0.83 for m = 1 at EJ/EC = 50); above EJ/EC ≈ 100 the ground-band width
    # (< 1e-10 EC) is below double precision of the absolute energies, so the check stops at 80.
    exact = dispersion(m, ratio)
    assert exact / koch_dispersion(m, ratio, EC) == pytest.approx(1.0, abs=rtol)


def test_charge_dispersion_falls_exponentially() -> None:
    # Koch 2007 eq. (2.17): ln|ε_0| falls like −√(8EJ/EC); the exact ratio to the formula tends
    # to 1 as EJ/EC grows, and the exact log-slope against √(8EJ/EC) is close to −1.
    ratios = np.array([10.0, 20.0, 40.0, 60.0, 80.0])
    exact = np.array([dispersion(0, r) for r in ratios])
    formula = np.array([koch_dispersion(0, r, EC) for r in ratios])
    assert np.all(exact > 0)
    assert np.all(np.diff(np.abs(exact / formula - 1.0)) < 0)
    x = np.sqrt(8.0 * ratios)
    power_law = np.log((ratios / 2.0) ** 0.75)  # remove the algebraic prefactor of (2.17)
    slope = np.polyfit(x, np.log(exact) - power_law, 1)[0]
    assert slope == pytest.approx(-1.0, abs=0.05)


def test_band_is_cosine_in_offset_charge() -> None:
    # Koch 2007 Sec. II: in the transmon regime E_m(ng) ≈ E_m(¼) − (ε_m/2) cos(2π ng),
    # higher harmonics being smaller by a further factor of order the dispersion itself.
    ratio = 10.0
    ej = ratio * EC
    eps0 = dispersion(0, ratio)
    e_quarter = charge_basis_spectrum(ej, EC, n_levels=1, ng=0.25).energies_ghz[0]
    for ng in (0.0, 0.1, 0.3, 0.5):
        e = charge_basis_spectrum(ej, EC, n_levels=1, ng=ng).energies_ghz[0]
        assert abs(e - (e_quarter - 0.5 * eps0 * math.cos(2 * math.pi * ng))) < 0.01 * abs(eps0)


# --- Charge matrix elements: Koch 2007 eq. (3.4) and the harmonic limit --------------------------


@pytest.mark.parametrize("ratio", [50.0, 300.0, 3000.0])
def test_raw_charge_elements_follow_harmonic_estimate(ratio: float) -> None:
    # Koch 2007 eq. (3.4): |⟨j+1|n̂|j⟩| ≈ √((j+1)/2)·(EJ/8EC)^(1/4) for EJ/EC ≫ 1, corrections
    # of relative order j·√(EC/EJ).
    spectrum = charge_basis_spectrum(ratio * EC, EC, n_levels=4)
    raw = np.diag(spectrum.charge_elements, -1)
    j = np.arange(3)
    estimate = np.sqrt((j + 1) / 2.0) * (ratio / 8.0) ** 0.25
    assert np.all(raw > 0)
    assert np.all(np.abs(raw / estimate - 1.0) < 0.35 * (j + 1) / math.sqrt(ratio))


def test_ladder_approaches_harmonic_sqrt_n() -> None:
    # Harmonic-oscillator limit (Koch 2007 Sec. III): λ_n → √(n+1) as EJ/EC → ∞, the deviation
    # shrinking like n·√(EC/EJ).
    n = np.arange(4)
    deviations = []
    for ratio in [50.0, 200.0, 1000.0, 5000.0]:
        levels = charge_basis_levels(ratio * EC, EC, n_levels=5)
        assert levels.ladder[0] == 1.0
        assert np.all(levels.ladder > 0)
        dev = np.abs(levels.ladder / np.sqrt(n + 1.0) - 1.0)
        assert np.all(dev <= 0.3 * n / math.sqrt(ratio) + 1e-12)
        deviations.append(dev[1:])
    assert np.all(np.diff(np.array(deviations), axis=0) < 0)


def test_parity_selection_rule_at_zero_offset() -> None:
    # At ng = 0 the eigenstates have alternating parity under φ → −φ, so ⟨j|n̂|k⟩ = 0 for j − k
    # even (Koch 2007 Sec. III). Away from ng = 0 the rule is broken.
    levels = charge_basis_levels(20.0 * EC, EC, n_levels=5)
    j, k = np.indices(levels.charge_matrix.shape)
    assert np.all(np.abs(levels.charge_matrix[(j - k) % 2 == 0]) < 1e-10)
    tilted = charge_basis_levels(5.0 * EC, EC, n_levels=5, ng=0.3)
    assert abs(tilted.charge_matrix[2, 0]) > 1e-6


def test_charge_matrix_is_consistent_with_ladder_and_states() -> None:
    spectrum = charge_basis_spectrum(30.0 * EC, EC, n_levels=4, ng=0.2)
    states = spectrum.states
    np.testing.assert_allclose(states.T @ states, np.eye(4), atol=1e-12)
    assert np.all(states[:, 0] >= -1e-15)  # nodeless ground state with positive sign
    levels = charge_basis_levels(30.0 * EC, EC, n_levels=4, ng=0.2)
    np.testing.assert_allclose(levels.charge_matrix, levels.charge_matrix.T)
    np.testing.assert_allclose(np.diag(levels.charge_matrix, -1), levels.ladder)
    np.testing.assert_allclose(
        levels.charge_matrix, spectrum.charge_elements / spectrum.charge_elements[1, 0]
    )


# --- Duffing model -------------------------------------------------------------------------------


def test_duffing_levels_formula() -> None:
    # DESIGN §4: ε_n = n·f01 + n(n−1)/2·α, λ_n = √(n+1).
    levels = duffing_levels(5.1, -0.23, 5)
    n = np.arange(5)
    np.testing.assert_allclose(levels.energies_ghz, n * 5.1 + n * (n - 1) / 2 * -0.23)
    np.testing.assert_allclose(levels.ladder, np.sqrt(n[1:]))
    assert levels.f01_ghz == pytest.approx(5.1)
    assert levels.anharmonicity_ghz == pytest.approx(-0.23)
    np.testing.assert_allclose(levels.transition_frequencies_ghz, 5.1 - 0.23 * n[:-1])
    tridiagonal = np.diag(levels.ladder, 1) + np.diag(levels.ladder, -1)
    np.testing.assert_allclose(levels.charge_matrix, tridiagonal)


def test_duffing_agrees_with_exact_levels_to_leading_order() -> None:
    # Koch 2007 eq. (2.11): the Duffing ladder with the exact f01 and α reproduces the exact
    # 2–3 transition within a fraction of |α| at EJ/EC = 50.
    exact = charge_basis_levels(50.0 * EC, EC, n_levels=4)
    duffing = duffing_levels(exact.f01_ghz, exact.anharmonicity_ghz, 4)
    np.testing.assert_allclose(duffing.energies_ghz[:3], exact.energies_ghz[:3], rtol=1e-12)
    nu23_gap = abs(duffing.transition_frequencies_ghz[2] - exact.transition_frequencies_ghz[2])
    assert nu23_gap < 0.2 * abs(exact.anharmonicity_ghz)


def test_duffing_rejects_bad_arguments() -> None:
    with pytest.raises(ValueError, match="f01_ghz"):
        duffing_levels(0.0, -0.2)
    with pytest.raises(ValueError, match="n_levels"):
        duffing_levels(5.0, -0.2, 1)
    with pytest.raises(ValueError, match="n_levels"):
        duffing_levels(5.0, -0.2, 2.5)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="non-positive transition"):
        duffing_levels(1.0, -0.4, 5)
    with pytest.raises(ValueError, match="anharmonicity"):
        duffing_levels(5.0, -0.2, 2).anharmonicity_ghz  # noqa: B018


# --- TransmonLevels container --------------------------------------------------------------------


def test_levels_are_read_only_copies() -> None:
    energies = np.array([0.0, 5.0, 9.8])
    levels = TransmonLevels(energies_ghz=energies, ladder=np.array([1.0, 1.4]))
    energies[1] = 0.0
    assert levels.f01_ghz == 5.0
    with pytest.raises(ValueError):
        levels.energies_ghz[1] = 1.0
    with pytest.raises(AttributeError):
        levels.ladder = np.ones(2)  # type: ignore[misc]


def test_levels_validate_their_fields() -> None:
    two = np.array([0.0, 5.0])
    one = np.array([1.0])
    with pytest.raises(ValueError, match="ground"):
        TransmonLevels(energies_ghz=np.array([0.1, 5.0]), ladder=one)
    with pytest.raises(ValueError, match="ladder must have shape"):
        TransmonLevels(energies_ghz=np.array([0.0, 5.0, 9.8]), ladder=one)
    with pytest.raises(ValueError, match="symmetric"):
        TransmonLevels(energies_ghz=two, ladder=one, charge_matrix=np.array([[0, 2.0], [1.0, 0]]))
    with pytest.raises(ValueError, match="sub-diagonal"):
        TransmonLevels(energies_ghz=two, ladder=one, charge_matrix=np.array([[0, 2.0], [2.0, 0]]))
    with pytest.raises(ValueError, match="finite"):
        TransmonLevels(energies_ghz=np.array([0.0, np.nan]), ladder=one)


def test_charge_basis_rejects_bad_arguments() -> None:
    with pytest.raises(ValueError, match="ej_ghz"):
        charge_basis_levels(-1.0, EC)
    with pytest.raises(ValueError, match="ec_ghz"):
        charge_basis_levels(10.0, 0.0)
    with pytest.raises(ValueError, match="ng"):
        charge_basis_levels(10.0, EC, ng=float("nan"))
    with pytest.raises(ValueError, match="n_cut"):
        charge_basis_levels(10.0, EC, n_levels=6, n_cut=2)


# --- Inversion f01, α → EJ, EC -------------------------------------------------------------------


@pytest.mark.parametrize(
    ("ej", "ec"), [(15.0, 0.2), (20.0, 0.33), (40.0, 0.15), (2.0, 0.5), (300.0, 0.05)]
)
def test_ejec_round_trip(ej: float, ec: float) -> None:
    levels = charge_basis_levels(ej, ec)
    found = ejec_from_frequencies(levels.f01_ghz, levels.anharmonicity_ghz)
    assert found.ej_ghz == pytest.approx(ej, rel=1e-9)
    assert found.ec_ghz == pytest.approx(ec, rel=1e-9)


@pytest.mark.parametrize(("f01", "alpha"), [(5.0, -0.25), (4.2, -0.18), (6.5, -0.34)])
def test_ejec_reproduces_frequencies_and_asymptotic_guess(f01: float, alpha: float) -> None:
    ej, ec = ejec_from_frequencies(f01, alpha)
    levels = charge_basis_levels(ej, ec)
    assert levels.f01_ghz == pytest.approx(f01, rel=1e-11)
    assert levels.anharmonicity_ghz == pytest.approx(alpha, rel=1e-9)
    # Koch 2007 eq. (2.11) as a sanity check: EC ≈ −α within the O(√(EC/EJ)) correction.
    assert ec == pytest.approx(-alpha, rel=1.1 / math.sqrt(ej / ec))
    assert ec < -alpha


def test_ejec_rejects_unreachable_frequencies() -> None:
    with pytest.raises(ValueError, match="negative"):
        ejec_from_frequencies(5.0, 0.1)
    with pytest.raises(ValueError, match="no transmon"):
        ejec_from_frequencies(5.0, -4.9)
    with pytest.raises(ValueError, match="f01_ghz"):
        ejec_from_frequencies(-5.0, -0.2)


def test_one_level_is_refused_with_a_value_error():
    # The ladder is normalised by the 0–1 charge element, which one level does not have.
    from simulated_device.transmon import charge_basis_levels

    with pytest.raises(ValueError, match="n_levels must be at least 2"):
        charge_basis_levels(15.0, 0.22, n_levels=1)
