"""Steps of one calibration pass, each tested alone: the survey's selection, the hand-over
of victims to passes of their own, the stop rule, the raise of K and the pass's plan.

Expectations are written from the rules as stated (numbers worked by hand), not from the
code's output. Estimates are stand-ins with the fields the steps read.
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from xtalkcal.calibrate import (
    JOINT_NULL_SPAN,
    RING_MARGIN,
    RISE_PROBABILITY,
    STRONGEST_DB,
    CalibrationResult,
)
from xtalkcal.calibrate.pass_plan import PassRequest, plan_pass
from xtalkcal.calibrate.passes import hand_over, held_down, survey_selection
from xtalkcal.calibrate.stages import null_found, raised_repeats, ring_radius
from xtalkcal.measure import PulseShape, choose_method, load_protocol


def est(z=0j, sigma=1e-4, chi2=1.0, kappa=1e4, accepted=True):
    """A null estimate stand-in: null z*, 1σ semi-major axis, reduced χ², curvature κ."""
    return SimpleNamespace(accepted=accepted, z_star=complex(z), position_stderr=sigma,
                           reduced_chi2=chi2, curvature=kappa)


def ring(centre: complex, radius: float, n: int = 7) -> np.ndarray:
    """One victim's tones in a batch: the centre, then n ring points."""
    return np.concatenate([[centre], centre + radius * np.exp(2j * np.pi * np.arange(n) / n)])


# --- the stop rule -------------------------------------------------------------------


def test_stop_rule_stark_needs_only_the_error():
    far_off = ring(0.3, 1e-6)  # a Stark victim's ring placement does not matter
    assert null_found(est(0.01, sigma=1e-4), "stark", 1e-4, far_off)
    assert not null_found(est(0.01, sigma=1.01e-4), "stark", 1e-4, far_off)


def test_stop_rule_error_is_scaled_by_the_birge_ratio():
    # σ·√max(1, χ²): χ² = 4 doubles the error, χ² < 1 never shrinks it
    assert not null_found(est(sigma=0.6e-4, chi2=4.0), "stark", 1e-4, ring(0, 1e-3))
    assert null_found(est(sigma=0.5e-4, chi2=4.0), "stark", 1e-4, ring(0, 1e-3))
    assert not null_found(est(sigma=1.2e-4, chi2=0.25), "stark", 1e-4, ring(0, 1e-3))
    assert null_found(est(sigma=1e-4, chi2=math.nan), "stark", 1e-4, ring(0, 1e-3))


@pytest.mark.parametrize("method", ["leakage", "rotation"])
def test_stop_rule_resonant_ring_must_be_centred_on_the_null(method):
    c, r = 0.01 + 0.002j, 1e-3
    kappa = RISE_PROBABILITY / r**2  # the ring rose by the rule's amount
    near = c + 0.9 * r / RING_MARGIN * np.exp(0.7j)
    off = c + 1.1 * r / RING_MARGIN * np.exp(0.7j)
    assert null_found(est(near, kappa=kappa), method, 1e-4, ring(c, r))
    assert not null_found(est(off, kappa=kappa), method, 1e-4, ring(c, r))
    # precise enough is not enough: the error says nothing of an off-centre ring's bias
    assert not null_found(est(off, sigma=1e-9, kappa=kappa), method, 1e-4, ring(c, r))


def test_stop_rule_resonant_ring_must_not_rise_too_far():
    c, r = 0.02, 2e-3
    # rise κ·r² at most twice RISE_PROBABILITY
    ok = 1.9 * RISE_PROBABILITY / r**2
    steep = 2.1 * RISE_PROBABILITY / r**2
    assert null_found(est(c, kappa=ok), "leakage", 1e-4, ring(c, r))
    assert not null_found(est(c, kappa=steep), "leakage", 1e-4, ring(c, r))
    # and the error rule still applies
    assert not null_found(est(c, sigma=2e-4, kappa=ok), "leakage", 1e-4, ring(c, r))


def test_stop_rule_measures_a_survey_ring_with_a_repeated_centre():
    # A survey ring repeats its centre: the radius is not the second point's distance (0)
    c, r = 0.01, 1e-3
    kappa = RISE_PROBABILITY / r**2
    survey = np.concatenate([[c, c, c], ring(c, r)[1:]])
    assert null_found(est(c, kappa=kappa), "leakage", 1e-4, survey)
    assert ring_radius(survey) == pytest.approx(r)


def test_chip_confidence_is_a_union_bound_never_looser_than_per_pair():
    from xtalkcal.calibrate.plan import NULL_CONFIDENCE, chip_null_confidence

    for n in (1, 5, 30, 72, 240):
        k = chip_null_confidence(n)
        # n pairs, each beyond the target with e^{−k²/2}: at most 5 % over the chip
        assert n * math.exp(-k * k / 2) <= 0.05 * (1 + 1e-12) or k == NULL_CONFIDENCE
        assert k >= NULL_CONFIDENCE
    assert chip_null_confidence(1) == NULL_CONFIDENCE  # 99 % per pair at least
    assert chip_null_confidence(240) == pytest.approx(4.12, abs=0.01)


# --- the survey's selection ----------------------------------------------------------


def test_survey_selects_on_the_upper_three_sigma_bound():
    amp, thr = 0.1, 10 ** (-40 / 20)  # |X| threshold 0.01 → |z*| threshold 1e-3
    victims = ["a", "b", "c", "d", "e"]
    estimates = [
        est(-2e-3, sigma=1e-5),  # |X| = 0.02: above
        est(5e-4, sigma=3e-4),  # |X| + 3σ = 0.005 + 0.009 ≥ 0.01: may be above
        est(5e-4, sigma=1e-4),  # 0.005 + 0.003 < 0.01: below
        est(1e-5, sigma=1e-6),  # far below, but forced
        est(accepted=False),  # no signal: |X| small against the ring, even if forced
    ]
    sel = survey_selection(estimates, amp, thr, victims, force=("d", "e"))
    assert sel.tolist() == [True, True, False, True, False]
    # at 2σ it would be left out, at 3σ it may be above: selected
    at_edge = [est(-7.5e-4, sigma=1e-4)]  # |X| = 0.0075; + 2σ 0.0095, + 3σ 0.0105
    assert survey_selection(at_edge, amp, thr, ["a"], force=()).tolist() == [True]



def test_survey_selects_only_nullable_victims():
    amp, thr = 0.1, 10 ** (-40 / 20)
    strong = [est(-2e-3, sigma=1e-5)] * 3  # all far above the threshold
    sel = survey_selection(strong, amp, thr, ["a", "b", "c"], force=("c",), nullable=("b",))
    assert sel.tolist() == [False, True, False]  # a and c keep their survey estimates
    assert survey_selection(strong, amp, thr, ["a", "b", "c"], force=(),
                            nullable=()).tolist() == [False, False, False]


@settings(max_examples=50, deadline=None)
@given(st.lists(st.tuples(st.floats(0, 5e-3), st.booleans(), st.booleans()),
                min_size=1, max_size=8))
def test_nullable_filters_the_selection_and_nothing_else(rows):
    amp, thr = 0.1, 1e-2
    victims = [f"q{i}" for i in range(len(rows))]
    estimates = [est(z, sigma=1e-4) for z, _, _ in rows]
    force = tuple(v for v, (_, f, _) in zip(victims, rows, strict=True) if f)
    nullable = tuple(v for v, (_, _, n) in zip(victims, rows, strict=True) if n)
    whole = survey_selection(estimates, amp, thr, victims, force)
    only = survey_selection(estimates, amp, thr, victims, force, nullable=nullable)
    assert only.tolist() == [w and v in nullable for w, v in zip(whole, victims, strict=True)]


# --- the hand-over -------------------------------------------------------------------


def _hand_over(estimates, selected, coherent, target=1e-4, repeats=12):
    victims = [f"q{i}" for i in range(len(estimates))]
    centre = np.array([e.z_star if e.accepted else 0j for e in estimates])
    return hand_over(victims, estimates, np.array(selected), np.array(coherent), centre,
                     target, repeats)


def test_hand_over_sends_incoherent_and_far_nulls_away():
    target = 1e-4
    span = JOINT_NULL_SPAN * RING_MARGIN * target  # 8e-4 with the package's constants
    estimates = [est(0.1 * span, sigma=1e-5, kappa=3e3),
                 est(10 * span, sigma=1e-5, kappa=4e3),
                 est(0.5 * span, sigma=2e-5, kappa=5e3)]
    h = _hand_over(estimates, [True, True, True], [True, True, False], target, repeats=12)
    assert h.handed.tolist() == [False, True, True]
    assert [n[0] for n in h.nulls] == ["q1", "q2"]
    name, z, kappa, k, sigma = h.nulls[0]
    assert (z, kappa, k) == (estimates[1].z_star, 4e3, 12)
    assert sigma == pytest.approx(1e-5)
    assert h.resurvey == []


def test_hand_over_judges_the_null_on_its_lower_two_sigma_bound():
    target = 1e-4
    span = JOINT_NULL_SPAN * RING_MARGIN * target
    # |z*| = 1.25 span but |z*| − 2σ = 0.75 span: not sent away on noise alone
    wide = est(1.25 * span, sigma=0.25 * span)
    h = _hand_over([est(0.0), wide], [True, True], [True, True], target)
    assert not h.handed.any() and h.nulls == []


def test_hand_over_keeps_one_joint_victim_when_every_null_is_far():
    span = JOINT_NULL_SPAN * RING_MARGIN * 1e-4
    estimates = [est(5 * span, sigma=1e-6), est(6 * span, sigma=1e-6),
                 est(7 * span, sigma=1e-6)]
    h = _hand_over(estimates, [False, True, True], [True, True, True])
    assert h.handed.tolist() == [False, False, True]  # the first joint victim stays
    # a lone joint victim is never sent away, however far its null
    h = _hand_over(estimates[:2], [True, False], [True, True])
    assert not h.handed.any()


def test_hand_over_resurveys_unseen_victims_of_a_column():
    estimates = [est(1e-5), est(accepted=False), est(accepted=False)]
    # q1: the spacing is not coherent for it and its fit saw nothing → surveyed alone;
    # q2: coherent, so its survey is meaningful and no signal means small
    h = _hand_over(estimates, [True, False, False], [True, False, True])
    assert h.resurvey == ["q1"] and not h.handed.any()
    # a victim alone in its pass has nowhere better to be surveyed
    h = _hand_over(estimates[1:2], [False], [False])
    assert h.resurvey == []


def test_hand_over_resurveys_a_victim_whose_survey_k_was_held_down():
    # q2 is coherent, but the column's survey K was set by a far more responsive victim
    # (held down): its "no signal" says little, so it is surveyed alone at its own K.
    estimates = [est(1e-5), est(accepted=False), est(accepted=False)]
    victims = ["q0", "q1", "q2"]
    centre = np.array([1e-5, 0j, 0j])
    h = hand_over(victims, estimates, np.array([True, False, False]),
                  np.array([True, True, True]), centre, 1e-4, 12,
                  held=np.array([False, False, True]))
    assert h.resurvey == ["q2"] and not h.handed.any()
    # selected or accepted victims are never surveyed again, held down or not
    h = hand_over(victims, [est(1e-5), est(2e-5), est(3e-5)], np.array([True, False, True]),
                  np.ones(3, bool), np.array([1e-5, 2e-5, 3e-5]), 1e-4, 12,
                  held=np.ones(3, bool))
    assert h.resurvey == []


def test_held_down_marks_victims_far_less_responsive_than_the_survey_k(demo_chip):
    proto = load_protocol("protocols/full.toml")
    shape = PulseShape(proto.pulse.duration_ns, proto.pulse.sigma_ns)
    line = "q4-line"
    victims = [q for q in demo_chip.qubit_names if q != "q4"
               and choose_method(demo_chip, line, q, proto.windows) != "stark"]
    methods = [choose_method(demo_chip, line, q, proto.windows) for q in victims]
    plan = plan_pass(demo_chip, proto, CalibrationResult(demo_chip, proto, "t"),
                     PassRequest(line, victims, methods, shape, stark=False))
    held = held_down(plan)
    own = [(math.pi / 4) / plan.probe.expected_rotation_per_pulse(v, STRONGEST_DB)
           for v in victims]
    for h, k in zip(held, own, strict=True):
        assert h == (min(k, plan.k_max) >= 2 * plan.probe.repeats)
    # the victim that sets the survey's K is never held down
    assert not held[int(np.argmin(own))]


# --- raising K -----------------------------------------------------------------------


def test_raised_k_keeps_rings_wide_at_most_four_fold():
    # a ring 250·RING_MARGIN errors wide at K=10 would allow K=2500; ×4 at most
    assert raised_repeats(10, 1000, [0.01], [0.01 / (RING_MARGIN * 250)], [5]) == 40
    # a ring only 1.55·RING_MARGIN errors wide allows 1.55×, rounded down
    assert raised_repeats(10, 1000, [6e-4], [6e-4 / (RING_MARGIN * 1.55)], [5]) == 15
    # the unambiguous K wins when it is more
    assert raised_repeats(10, 1000, [0.01], [0.01 / (RING_MARGIN * 250)], [100]) == 100
    # within the longest train
    assert raised_repeats(10, 30, [0.01], [0.01 / (RING_MARGIN * 250)], [100]) == 30


def test_raised_k_is_set_by_the_least_ready_victim():
    radii, sigmas = [0.01, 6e-4], [1e-6, 6e-4 / (RING_MARGIN * 1.55)]
    assert raised_repeats(10, 1000, radii, sigmas, [5, 5]) == 15
    assert raised_repeats(10, 1000, radii, sigmas, [5, 25]) == 25


# --- the plan ------------------------------------------------------------------------


def test_request_holds_tuples():
    req = PassRequest("q4-line", ["q5"], ["leakage"], PulseShape(20.0, 5.0), stark=False,
                      companions=[("q3", 0.01j)], force=["q5"])
    assert req.victims == ("q5",) and req.methods == ("leakage",)
    assert req.companions == (("q3", 0.01j),) and req.force == ("q5",)


def test_plan_rings_over_determine_the_column_model(demo_chip):
    proto = load_protocol("protocols/full.toml")
    victims = ("q0", "q2", "q4")
    req = PassRequest("q1-line", victims, ("stark",) * 3,
                      PulseShape(proto.pulse.duration_ns, proto.pulse.sigma_ns), stark=True,
                      companions=(("q5", 0.002 + 0j),))
    plan = plan_pass(demo_chip, proto, CalibrationResult(demo_chip, proto, "test"), req)
    tones = len(victims) + 1  # victims and one companion
    # 3 + an offset + 4 per other varying tone, plus 2 to spare
    assert plan.n_ring >= 4 * tones + 2 and plan.n_null >= 4 * tones + 2
    assert plan.n_null >= proto.null.points_per_ring
    # stop at target/k with e^{−k²/2} = 5 % over the chip's 72 ordered pairs (9 qubits)
    amp = plan.amp
    assert plan.target == pytest.approx(
        10 ** (proto.null.target_residual_db / 20) * amp / math.sqrt(2 * math.log(72 / 0.05)))
    assert plan.thr == pytest.approx(10 ** (proto.survey.threshold_db / 20))
    assert plan.tag == "q1-line-stark" and plan.stark_rows.all() and not plan.coherent.any()
    # the ring's shots per point keep the protocol's shots per ring
    assert plan.null_shots == max(50, round(proto.null.shots_per_point
                                            * proto.null.points_per_ring / plan.n_null))
    # a second pass of the same kind gets its own record
    res = CalibrationResult(demo_chip, proto, "test")
    res.sweeps["q1-line-stark"] = None
    assert plan_pass(demo_chip, proto, res, req).tag == "q1-line-stark-q0"


# --- properties ----------------------------------------------------------------------


@settings(max_examples=60, deadline=None, derandomize=True)
@given(re=st.floats(-0.5, 0.5), im=st.floats(-0.5, 0.5), r=st.floats(1e-6, 0.3),
       copies=st.integers(0, 4), n=st.sampled_from([7, 11, 13, 17]))
def test_ring_radius_of_any_ring_with_repeated_centres(re, im, r, copies, n):
    from xtalkcal.calibrate.plan import ring_around

    pts = ring_around(np.array([complex(re, im)]), np.array([r]), n)[:, 0]
    pts = np.concatenate([[pts[0]] * copies, pts])
    assert ring_radius(pts) == pytest.approx(r, rel=1e-9)


@settings(max_examples=60, deadline=None, derandomize=True)
@given(n=st.integers(1, 5000))
def test_chip_confidence_grows_with_the_pairs(n):
    from xtalkcal.calibrate.plan import NULL_CONFIDENCE, chip_null_confidence

    k, k2 = chip_null_confidence(n), chip_null_confidence(n + 1)
    assert NULL_CONFIDENCE <= k <= k2
    assert n * math.exp(-k2 * k2 / 2) <= 0.05 + 1e-12
