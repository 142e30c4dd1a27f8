"""A pair the calibration could not settle is never passed over in silence.

Rejected for any reason but "no signal", its crosstalk is unknown and may be strong, so
``calibrate`` names it on one line and exits non-zero; nulled with an error bound above
the protocol's target, it is marked in the table and warned about.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from xtalkcal.calibrate import NULL_CONFIDENCE, CalibrationResult, PairResult
from xtalkcal.cli import main
from xtalkcal.measure import default_protocol
from xtalkcal.outputs import format_table, unsettled_pairs


def _pair(victim, *, accepted=True, reason="", nulled=True, sigma=1e-4):
    cov = None if not accepted else np.eye(2) * sigma**2 / 2  # trace = σ²
    x = None if not accepted else complex(0.03, 0.01)
    return PairResult("q4-line", victim, "leakage", 4.78, accepted, reason, x, cov, nulled, 1000, 1,
                      0.0, "null" if nulled else "survey")


@pytest.fixture
def result(demo_chip):
    res = CalibrationResult(demo_chip, default_protocol(), "test rig")
    target = 10 ** (res.protocol.null.target_residual_db / 20)  # −50 dB: 3.16e-3
    res.pairs += [
        _pair("q5", accepted=False, reason="outside_region", nulled=False),
        _pair("q3", accepted=False, reason="no_signal", nulled=False),
        _pair("q1", sigma=2 * target / NULL_CONFIDENCE),    # 99 % bound 6 dB over target
        _pair("q7", sigma=0.5 * target / NULL_CONFIDENCE),  # 6 dB under: settled
    ]
    return res


def test_rejected_pairs_fail_and_loose_nulls_warn(result):
    failures, warnings = unsettled_pairs(result)
    assert failures == ["q4-line → q5 (leakage): rejected at the survey stage, outside_region: the "
                        "fitted null lies outside the swept region (a strong leak); not "
                        "compensated"]
    assert len(warnings) == 1 and warnings[0].startswith("q4-line → q1 (leakage): nulled, but")
    assert f"{-50 + 20 * math.log10(2):.1f} dB (99 %)" in warnings[0]
    table = format_table(result)
    assert [ln for ln in table.splitlines() if "nulled*" in ln] == [
        ln for ln in table.splitlines() if "→ q1" in ln]


def test_the_cli_exits_nonzero_naming_each_unsettled_pair(monkeypatch, result, tmp_path, capsys):
    import xtalkcal.calibrate

    monkeypatch.setattr(xtalkcal.calibrate, "calibrate_chip", lambda *a, **k: result)
    out = tmp_path / "m.json"
    assert main(["calibrate", "--no-drift", "-q", "-o", str(out)]) == 1
    text = capsys.readouterr().out
    assert "unsettled: q4-line → q5 (leakage): rejected at the survey stage, outside_region" in text
    assert "warning: q4-line → q1 (leakage): nulled, but its error of X may reach" in text
    assert "q3" not in text.split("unsettled:")[-1]
    assert out.exists()  # what was measured is still written


def test_a_stark_pair_still_saturated_fails_the_run(monkeypatch, demo_chip, tmp_path, capsys):
    # A Stark pair whose rings wrapped even at the widest survey stays "saturated": its
    # crosstalk is strong and unknown, so the run names it and exits non-zero.
    import xtalkcal.calibrate

    res = CalibrationResult(demo_chip, default_protocol(), "test rig")
    res.pairs += [
        PairResult("q4-line", "q0", "stark", 4.78, False, "saturated", None, None, False, 1000,
                   46, 0.0, "survey"),
        _pair("q7", sigma=0.5 * 10 ** (-50 / 20) / NULL_CONFIDENCE),
    ]
    failures, _ = unsettled_pairs(res)
    assert len(failures) == 1 and failures[0].startswith("q4-line → q0 (stark): rejected")
    assert "saturated" in failures[0]
    monkeypatch.setattr(xtalkcal.calibrate, "calibrate_chip", lambda *a, **k: res)
    assert main(["calibrate", "--no-drift", "-q", "-o", str(tmp_path / "m.json")]) == 1
    text = capsys.readouterr().out
    assert "unsettled: q4-line → q0 (stark): rejected at the survey stage, saturated" in text
    assert "Traceback" not in text
