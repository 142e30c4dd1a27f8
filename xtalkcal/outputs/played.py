"""Verification of written settings as the control stack plays them.

Every timeline of the verification goes through the applicator
(:func:`xtalkcal.compensation.apply_to_timeline`) with the settings under test, exactly as
the control stack adds the cancellation tones in use; on top of that, each victim's own line
plays a small probe tone at the aggressor's frequency, on rings around zero. The field at
victim i is then a·w_i + δ_i, with w_i the residual crosstalk the settings leave (every tone
of the column on, whatever the couplings between them are) and δ_i the probe: the null
search of a calibration pass (:func:`xtalkcal.calibrate.calibrate_pass`, started at zero)
finds δ = −a·w_i, so each pair's "crosstalk" in that pass *is* its residual, with its
covariance and the pass's fit verdict. Nothing is taken out by calculation, and the
stored matrix is not used beyond the methods, amplification and ring size of each pair.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

import xtalkcal.calibrate as calibrate
from xtalkcal.calibrate import CalibrationResult
from xtalkcal.compensation import CompensationSettings, apply_to_timeline
from xtalkcal.hardware import check_timelines
from xtalkcal.measure import BatchRunner, Protocol, PulseShape

__all__ = ["PLAYED_FORMAT", "PlayedResidual", "RigView", "CompensatedRig", "played_to_dict",
           "read_played", "verify_settings"]


@dataclass(frozen=True)
class PlayedResidual:
    """One pair's residual measured with the settings played.

    Attributes
    ----------
    aggressor, victim, method : str
    residual : complex or None
        w = X + r + Σ X_ik·r_k as measured (None if the fit was rejected).
    stderr : float
        √trace of its covariance (linear; NaN if rejected).
    reason : str
        Why the fit was rejected ('' when accepted).
    shots : int
    tolerance_db : float
    """

    aggressor: str
    victim: str
    method: str
    residual: complex | None
    stderr: float
    reason: str
    shots: int
    tolerance_db: float

    @property
    def residual_db(self) -> float:
        return 20 * math.log10(max(abs(self.residual), 1e-15)) if self.residual is not None \
            else math.nan

    @property
    def upper_db(self) -> float:
        """20·log10(|w| + k·σ), k the calibration's 99 % factor (``NULL_CONFIDENCE``)."""
        if self.residual is None:
            return math.nan
        bound = abs(self.residual) + calibrate.NULL_CONFIDENCE * self.stderr
        return 20 * math.log10(max(bound, 1e-15))

    @property
    def within(self) -> bool:
        """Within the tolerance beyond doubt (the 99 % bound below it)."""
        return self.residual is not None and self.upper_db <= self.tolerance_db

    def line(self) -> str:
        if self.residual is None:
            return (f"{self.aggressor:>6} → {self.victim:<6} {self.method:<9} "
                    f"not measured: {self.reason}")
        verdict = "within" if self.within else (
            "within, not beyond doubt" if self.residual_db <= self.tolerance_db else "ABOVE")
        return (f"{self.aggressor:>6} → {self.victim:<6} {self.method:<9} "
                f"{self.residual_db:7.1f} dB ± {20 * math.log10(max(self.stderr, 1e-15)):6.1f}"
                f" dB (σ), 99 % bound {self.upper_db:6.1f} dB  {verdict}")


class RigView:
    """A rig seen through another object: every member of the rig contract (and any other,
    such as ``advance_clock_to``) forwarded to it; subclasses change what they must."""

    def __init__(self, rig) -> None:
        self._rig = rig

    @property
    def chip(self):
        return self._rig.chip

    @property
    def repetition_ns(self) -> float:
        return self._rig.repetition_ns

    def describe(self) -> str:
        return self._rig.describe()

    def now(self) -> float:
        return self._rig.now()

    def run(self, timelines, shots):
        return self._rig.run(timelines, shots)

    def __getattr__(self, name: str):
        if name == "_rig":  # not set yet (copying): no recursion
            raise AttributeError(name)
        return getattr(self._rig, name)


class CompensatedRig(RigView):
    """A rig whose every timeline gets the settings' cancellation tones, as the control
    stack adds them; the result is checked against the chip's limits before it is sent."""

    def __init__(self, rig, settings: CompensationSettings) -> None:
        super().__init__(rig)
        self._settings = settings

    def run(self, timelines, shots):
        rep = self._rig.repetition_ns
        played = [apply_to_timeline(tl, self._settings, self.chip, repetition_ns=rep)
                  for tl in timelines]
        check_timelines(self.chip, played, rep)
        return self._rig.run(played, shots)


def _radius(calibration: CalibrationResult, pair, repeats: int) -> float:
    """Ring radius at which the pair's signal rises by the calibration's amount (inf:
    the pass caps it at its survey radius)."""
    ds = calibration.sweeps.get(pair.sweep_id)
    rise = calibrate.RISE_STARK_RAD if pair.method == "stark" else calibrate.RISE_PROBABILITY
    kappa = math.nan
    if ds is not None and "curvature" in ds and pair.victim in list(ds["victim"].values):
        kappa = float(ds["curvature"].sel(victim=pair.victim))
        if pair.method != "stark":  # resonant signals grow as K²
            kappa *= (repeats / pair.repeats) ** 2
    return float(np.sqrt(rise / kappa)) if math.isfinite(kappa) and kappa > 0 else math.inf


def verify_settings(rig, protocol: Protocol, calibration: CalibrationResult,
                    settings: CompensationSettings, *, record=None, progress=None,
                    timeout_s: float | None = None, key_prefix: str = "verify",
                    say: Callable[[str], None] | None = None
                    ) -> tuple[list[PlayedResidual], CalibrationResult, BatchRunner]:
    """Measure every pair of ``settings`` with the settings played by the applicator.

    Parameters
    ----------
    rig : Rig
    protocol : Protocol
        Null-search shots and stopping rule; ``recheck.tolerance_db`` judges the residuals.
    calibration : CalibrationResult
        Where each pair's method, amplification and curvature come from (a ledger's matrix
        rebuilt by :func:`xtalkcal.outputs.calibration_from_ledger` will do).
    settings : CompensationSettings
    record : path, optional
        Folder to record the batches in (resumable).
    progress, timeout_s
        As for :class:`xtalkcal.measure.BatchRunner`.

    Returns
    -------
    (list of PlayedResidual, CalibrationResult, BatchRunner)
        The residuals in the order of ``settings``, the passes as measured (X there is
        the residual), and the runner (shots, power tally).
    """
    played = CompensatedRig(rig, settings)
    inner = BatchRunner(played, record, progress=progress, timeout_s=timeout_s)
    shape = PulseShape(protocol.pulse.duration_ns, protocol.pulse.sigma_ns)
    measured = CalibrationResult(rig.chip, protocol, rig.describe())
    for line in sorted({p.aggressor_line for p in settings}):
        victims = [p.victim for p in settings.for_aggressor(line)]
        cal = {v: calibration.pair(line, v) for v in victims}
        for group in calibrate.nulled_pass_groups({v: cal[v].method for v in victims}):
            K = max(cal[v].repeats for v in group)
            start = calibrate.PassStart(
                centres=tuple(0j for _ in group),
                radii=tuple(_radius(calibration, cal[v], K) for v in group), repeats=K)
            calibrate.calibrate_pass(played, inner, protocol, measured, calibrate.PassRequest(
                line, tuple(group), tuple(cal[v].method for v in group), shape,
                stark=cal[group[0]].method == "stark", key_prefix=f"{key_prefix}-",
                force=tuple(group), start=start), say=say)
    tol = protocol.recheck.tolerance_db
    out = []
    for p in settings:
        try:
            m = measured.pair(*p.key)
        except KeyError:
            out.append(PlayedResidual(*p.key, p.method, None, math.nan, "not measured", 0, tol))
            continue
        out.append(PlayedResidual(p.aggressor_line, p.victim, m.method,
                                  m.x if m.accepted else None,
                                  m.stderr if m.accepted else math.nan,
                                  "" if m.accepted else m.reason, m.shots, tol))
    return out, measured, inner


PLAYED_FORMAT = "xtalkcal-verification"
PLAYED_VERSION = 1


def played_to_dict(played: list[PlayedResidual], *, chip: str, settings: str, rig: str
                   ) -> dict:
    """The residuals as a JSON-shaped document of format ``xtalkcal-verification``."""
    import datetime as dt

    def pair(r: PlayedResidual) -> dict:
        ok = r.residual is not None
        return {"aggressor_line": r.aggressor, "victim": r.victim, "method": r.method,
                "shots": r.shots, "residual_re": r.residual.real if ok else None,
                "residual_im": r.residual.imag if ok else None,
                "stderr": r.stderr if ok else None, "residual_db": r.residual_db if ok else None,
                "upper_db": r.upper_db if ok else None, "within": r.within,
                "reason": r.reason}

    tol = played[0].tolerance_db if played else math.nan
    return {"format": PLAYED_FORMAT, "version": PLAYED_VERSION, "chip": chip, "settings": settings,
            "rig": rig, "tolerance_db": tol,
            "created_utc": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
            "pairs": [pair(r) for r in played]}


def read_played(path, chip: str) -> list[PlayedResidual]:
    """Residuals written by ``xtalkcal verify -o FILE``, checked to be for ``chip``."""
    from xtalkcal.common import load_json
    from xtalkcal.exceptions import ConfigError

    doc, source = load_json(path)
    if not isinstance(doc, dict) or doc.get("format") != PLAYED_FORMAT:
        raise ConfigError(source, "format", f"accepted: {PLAYED_FORMAT!r} (written by "
                                            "`xtalkcal verify -o FILE`)")
    version = doc.get("version")
    if isinstance(version, bool) or version != PLAYED_VERSION:
        raise ConfigError(source, "version", f"{str(version)[:20]!r}; accepted: "
                                             f"{PLAYED_VERSION} (a newer xtalkcal wrote it?)")
    if doc.get("chip") != chip:
        raise ConfigError(source, "chip", f"{str(doc.get('chip'))[:40]!r}: the ledger is for "
                                          f"chip {chip!r}")
    out = []
    try:
        tol = float(doc["tolerance_db"])
        for i, p in enumerate(doc["pairs"]):
            where = f"pairs[{i}]"
            ok = p.get("residual_re") is not None
            try:
                w = complex(float(p["residual_re"]), float(p["residual_im"])) if ok else None
                out.append(PlayedResidual(str(p["aggressor_line"]), str(p["victim"]),
                                          str(p["method"]), w,
                                          float(p["stderr"]) if ok else math.nan,
                                          str(p.get("reason", "")), int(p["shots"]), tol))
            except (KeyError, TypeError, ValueError) as exc:
                raise ConfigError(source, where, f"{exc}; accepted: the fields `xtalkcal "
                                                 "verify -o` writes") from None
    except (KeyError, TypeError, ValueError) as exc:
        raise ConfigError(source, "pairs", f"{exc}; accepted: the fields `xtalkcal verify -o` "
                                           "writes") from None
    return out
