"""The measured matrix and cancellation ratios as a versioned JSON file of our own schema.

Format ``xtalkcal-matrix``, version 1 (all angles in degrees, magnitudes in dB =
20·log10|·|)::

    {
      "format": "xtalkcal-matrix", "version": 1,
      "chip": "grid9-demo",
      "created_utc": "2026-12-01T22:00:00+00:00",
      "software": "xtalkcal 0.1.0",
      "rig": "simulated_device.SimRig(...)",
      "protocol": "full",
      "threshold_db": -40.0,
      "pairs": [
        {
          "aggressor_line": "q4-line", "aggressor_qubit": "q4", "victim": "q5",
          "victim_line": "q5-line", "frequency_ghz": 4.78,
          "method": "leakage", "stage": "null", "nulled": true,
          "verdict": "accepted", "reason": "",
          "crosstalk": {"re": ..., "im": ..., "magnitude_db": ..., "phase_deg": ...,
                        "stderr_db": ..., "covariance": [[..,..],[..,..]]},
          "ratio":     {"re": ..., "im": ..., "magnitude_db": ..., "phase_deg": ...},
          "shots": 12000, "repeats": 2, "measured_at_s": 12.3
        }, ...
      ]
    }

``crosstalk`` is X_ij(f) = C_ij(f)/C_ii(f) at ``frequency_ghz`` (the aggressor's tone);
``ratio`` is r_ij = −X_ij: for each tone s(t) at f_j on the aggressor line, the victim
line adds r_ij·s(t) at f_j. ``stderr_db`` is 20·log10 of sqrt(trace covariance) —
the residual crosstalk level one standard error of the estimate leaves. A rejected
pair carries ``verdict = "rejected"``, a ``reason``, and no numbers. Files written before
the format names were made one carry ``"schema": "xtalkcal-matrix/1"`` instead of
``format`` and ``version`` (`matrix_format` reads both).
"""

from __future__ import annotations

import datetime as _dt
import json
import math
from typing import Any

from xtalkcal.calibrate import NULL_CONFIDENCE, CalibrationResult
from xtalkcal.common import __version__

__all__ = ["MATRIX_FORMAT", "MATRIX_SCHEMA", "MATRIX_VERSION", "matrix_format",
           "result_to_json", "format_table"]

MATRIX_FORMAT = "xtalkcal-matrix"
MATRIX_VERSION = 1
MATRIX_SCHEMA = f"{MATRIX_FORMAT}/{MATRIX_VERSION}"
"""The name the first matrix files carried in ``schema`` (still read by `matrix_format`)."""


def matrix_format(doc: Any) -> tuple[str, int] | None:
    """``(format, version)`` of a matrix JSON document of either naming, else None.

    Parameters
    ----------
    doc : object
        A parsed JSON document.
    """
    if not isinstance(doc, dict):
        return None
    if "format" in doc:
        version = doc.get("version")
        ok = isinstance(version, int) and not isinstance(version, bool)
        return (str(doc["format"]), version) if ok else None
    name, _, version = str(doc.get("schema", "")).partition("/")
    return (name, int(version)) if version.isdigit() else None


def _c(z: complex) -> dict[str, float]:
    return {"re": z.real, "im": z.imag,
            "magnitude_db": 20 * math.log10(abs(z)) if z else -math.inf,
            "phase_deg": math.degrees(math.atan2(z.imag, z.real))}


def result_to_json(result: CalibrationResult) -> dict[str, Any]:
    """The result as a JSON-able dictionary (format ``xtalkcal-matrix``, version 1)."""
    chip = result.chip
    pairs = []
    for p in result.pairs:
        d: dict[str, Any] = {
            "aggressor_line": p.aggressor,
            "aggressor_qubit": chip.line(p.aggressor).qubit,
            "victim": p.victim,
            "victim_line": chip.line_of(p.victim).name,
            "frequency_ghz": p.freq_ghz,
            "method": p.method,
            "stage": p.stage,
            "nulled": p.nulled,
            "verdict": "accepted" if p.accepted else "rejected",
            "reason": p.reason,
            "shots": p.shots,
            "repeats": p.repeats,
            "measured_at_s": p.measured_at_s,
        }
        if p.accepted and p.x is not None and p.x_cov is not None:
            d["crosstalk"] = _c(p.x) | {
                "stderr_db": 20 * math.log10(p.stderr) if p.stderr > 0 else -math.inf,
                "covariance": [[float(v) for v in row] for row in p.x_cov],
            }
            d["ratio"] = _c(-p.x)
        pairs.append(d)
    return {
        "format": MATRIX_FORMAT,
        "version": MATRIX_VERSION,
        "chip": chip.name,
        "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "software": f"xtalkcal {__version__}",
        "rig": result.rig_description,
        "protocol": result.protocol.name,
        "threshold_db": result.protocol.survey.threshold_db,
        "total_shots": result.shots,
        "rig_seconds": result.rig_seconds,
        "pairs": pairs,
    }


def dumps(result: CalibrationResult) -> str:
    """JSON text (infinite dB values written as null)."""
    def clean(o):
        if isinstance(o, float) and not math.isfinite(o):
            return None
        if isinstance(o, dict):
            return {k: clean(v) for k, v in o.items()}
        if isinstance(o, list):
            return [clean(v) for v in o]
        return o

    return json.dumps(clean(result_to_json(result)), indent=2)


# What each rejection means for the pair, said to the person reading the run's end.
_WHY = {
    "too_few_points": "too few usable points to fit",
    "fit_failed": "the fit did not converge",
    "saturated": "the signal saturated over the sweep",
    "outside_region": "the fitted null lies outside the swept region (a strong leak)",
    "model_mismatch": "the data do not follow the null model",
}


def _nulled_above_target(result: CalibrationResult, p) -> float | None:
    """The 99 % error bound of X (dB) of a nulled pair, if it exceeds the protocol's target."""
    if not (p.accepted and p.nulled) or not math.isfinite(p.stderr):
        return None
    bound_db = 20 * math.log10(max(p.stderr * NULL_CONFIDENCE, 1e-300))
    return bound_db if bound_db > result.protocol.null.target_residual_db else None


def unsettled_pairs(result: CalibrationResult) -> tuple[list[str], list[str]]:
    """Pairs a calibration could not settle, one line each: (failures, warnings).

    A failure is a pair rejected for any reason but "no signal" (its crosstalk is
    unknown and possibly strong, and it is not compensated); the command exits non-zero
    for them. A warning is a pair nulled with a 99 % error bound above the protocol's
    target residual.
    """
    failures, warnings = [], []
    for p in result.pairs:
        if not p.accepted and p.reason != "no_signal":
            why = _WHY.get(p.reason, p.reason)
            failures.append(f"{p.aggressor} → {p.victim} ({p.method}): rejected at the "
                            f"{p.stage} stage, {p.reason}: {why}; not compensated")
        elif (bound := _nulled_above_target(result, p)) is not None:
            warnings.append(f"{p.aggressor} → {p.victim} ({p.method}): nulled, but its error "
                            f"of X may reach {bound:.1f} dB (99 %), above the target "
                            f"{result.protocol.null.target_residual_db:g} dB")
    return failures, warnings


def format_table(result: CalibrationResult, *, limit: int | None = None,
                 rest: str = "matrix.txt") -> str:
    """A compact text table: one line per pair, strongest first.

    A nulled pair whose error bound exceeds the target is marked ``nulled*``. With
    ``limit``, only the ``limit`` strongest rows are given, and a last line says how many
    more there are and where they are (``rest``).
    """
    wl = max([4] + [len(p.aggressor) for p in result.pairs])
    wv = max([6] + [len(p.victim) for p in result.pairs])
    rows = []
    for p in result.pairs:
        if p.accepted:
            phase = math.degrees(math.atan2(p.x.imag, p.x.real))
            stage = "nulled" if p.nulled else "survey"
            if _nulled_above_target(result, p) is not None:
                stage = "nulled* (error above target)"
            rows.append((p.magnitude_db, f"{p.aggressor:>{wl}} → {p.victim:<{wv}} "
                         f"{p.method:<9} {p.magnitude_db:7.1f} dB {phase:7.1f}° "
                         f"{20 * math.log10(p.stderr):7.1f} dB  {stage}"))
        else:
            rows.append((-999, f"{p.aggressor:>{wl}} → {p.victim:<{wv}} {p.method:<9} "
                         f"{'rejected: ' + p.reason:>28}"))
    rows.sort(key=lambda r: -r[0])
    head = (f"{'line':>{wl}}   {'victim':<{wv}} {'method':<9} {'|X|':>10} {'arg X':>8} "
            f"{'σ of X':>10}  stage")
    body = [r[1] for r in rows]
    if limit is not None and len(body) > limit:
        body = body[:limit] + [f"… and {len(rows) - limit} more pairs in {rest}"]
    return "\n".join([head] + body)
