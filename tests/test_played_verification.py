"""Verification that plays the written settings: each pair's measured residual is the field
the settings leave with every tone of the column on, as the simulator's truth has it; and
the settings chosen are never expected worse than the pairwise ones."""

from __future__ import annotations

import math

import numpy as np
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

from simulated_device import SimRig, demo_device_path
from xtalkcal.calibrate import CalibrationResult, PairResult, calibrate_chip
from xtalkcal.compensation import pairwise_settings, residuals
from xtalkcal.measure import default_protocol, load_protocol
from xtalkcal.outputs import (
    choose_settings,
    expected_residual_db,
    settings_pairs,
    verify_settings,
)
from xtalkcal.outputs.solve_choice import prefer

QUICK = "protocols/quick-survey.toml"


@pytest.fixture(scope="module")
def column_d4():
    rig = SimRig(demo_device_path(), seed=11, drift=False)
    proto = load_protocol(QUICK)
    cal = calibrate_chip(rig, proto, aggressors=["q4-line"])
    return rig, proto, cal


def test_the_played_residual_is_the_true_all_on_field(column_d4):
    """The pairwise settings leave the tones' leak onto each other (X_ik·r_k): what the
    verification measures must be that whole field, X + r + Σ X_ik·r_k, taken from the
    simulator's truth (tests/test_device_qutip.py validates its dynamics against QuTiP)."""
    import dataclasses

    rig, proto, cal = column_d4
    s = pairwise_settings(cal, rig.chip, pairs=settings_pairs(cal))
    assert len(s) >= 2  # a column with cross terms
    # settings off by a known few per cent, so that each residual stands well above noise
    s = type(s)(s.chip, tuple(dataclasses.replace(p, ratio=p.ratio * (0.88 + 0.06j))
                              for p in s))
    played, _measured, runner = verify_settings(rig, proto, cal, s)
    truth = {r.victim: r.all_on for r in residuals(
        s, lambda v, line, f: rig.true_crosstalk(v, line, f))}
    assert runner.shots_executed > 0
    for r in played:
        assert r.residual is not None, r.reason
        err = abs(r.residual - truth[r.victim])
        assert err <= 4 * r.stderr, (r.victim, err, r.stderr)
    # the residuals are resolved: a verification that measured nothing would fail here
    assert max(abs(truth[r.victim]) / r.stderr for r in played) > 5


def test_played_tones_are_refused_beyond_the_limits(column_d4):
    """Settings whose tones would exceed a line's limit are refused before anything plays."""
    import dataclasses

    from xtalkcal.exceptions import SafetyLimitError

    rig, proto, cal = column_d4
    s = pairwise_settings(cal, rig.chip, pairs=settings_pairs(cal))
    huge = type(s)(s.chip, tuple(dataclasses.replace(p, ratio=p.ratio / abs(p.ratio) * 5)
                                 for p in s))
    with pytest.raises((SafetyLimitError, ValueError)):
        verify_settings(rig, proto, cal, huge)


def _synthetic(xs, covs, couplings, chip):
    """A calibration of line q4-line with the given victims' X, covariances and the couplings the
    column fit measured between their lines at q4-line's frequency."""
    victims = ["q1", "q3", "q5"][: len(xs)]
    f = chip.qubit("q4").f01_ghz
    res = CalibrationResult(chip, default_protocol(), "synthetic")
    for v, x, c in zip(victims, xs, covs, strict=True):
        res.pairs.append(PairResult("q4-line", v, "stark", f, True, "", x, np.eye(2) * c, True,
                                    1000, 1, 0.0, "null", sweep_id="s"))
    res.sweeps["s"] = xr.Dataset(attrs={"frequency_ghz": f})
    C = np.array(couplings[: len(victims) ** 2]).reshape(len(victims), len(victims))
    res.couplings["s"] = (tuple(victims), tuple(victims), C, np.zeros(C.shape))
    return res


_cplx = st.builds(complex, st.floats(-0.08, 0.08), st.floats(-0.08, 0.08))


@settings(max_examples=60, deadline=None, derandomize=True)
@given(xs=st.lists(_cplx, min_size=2, max_size=3),
       covs=st.lists(st.floats(1e-10, 1e-3), min_size=3, max_size=3),
       couplings=st.lists(_cplx, min_size=9, max_size=9))
def test_multi_victim_never_expected_worse_than_pairwise(demo_chip, xs, covs, couplings):
    cal = _synthetic(xs, covs[: len(xs)], couplings, demo_chip)
    choice = choose_settings(cal, "multi-victim")
    pw = pairwise_settings(cal, demo_chip, pairs=settings_pairs(cal))
    mine = max(expected_residual_db(choice.settings, cal).values())
    theirs = max(expected_residual_db(pw, cal).values())
    assert mine <= theirs + 1e-9
    if any(p.solve == "pairwise" for p in choice.settings):
        assert choice.notes and "kept the pairwise settings" in choice.notes[0]


def test_without_couplings_the_solves_agree(demo_chip):
    cal = _synthetic([0.03j, -0.02], [1e-6, 1e-6], [0j] * 9, demo_chip)
    choice = prefer(choose_settings(cal, "multi-victim").settings,
                    pairwise_settings(cal, demo_chip, pairs=settings_pairs(cal)), cal, "x")
    assert all(math.isclose(abs(p.ratio + cal.pair(*p.key).x), 0, abs_tol=1e-15)
               for p in choice.settings)
