"""The whole matrix: risk map, column-parallel survey, column-parallel null search.

Cost grows like the number of aggressor columns, not of pairs: one aggressor train
disturbs all its victims at once and all qubits are read together, so each column
is surveyed — and nulled — in the same shots for every victim. Victims whose
method wants a different amplification (leakage/rotation want few pulses, Stark
wants a long train) are split into at most two passes of the column.

Survey of a pass: the aggressor train with every victim's cancellation tone on a
small ring around 0 plus the centre (paraboloid in z, so both |X| and its phase
come out), and, for Stark victims, the reference without aggressor.
Null search: rounds of rings around each victim's current estimate, at the radius
where the signal rises by a set amount above the floor (information grows with the
radius until the signal saturates), refitted on all points of the pass, until the
null's error stays below the protocol's target residual with 99 % probability, or
the rounds or the shot budget run out. A victim selected on its survey's error bar
alone (|X| + 2σ at the threshold) that a ring at a raised K shows to lie below the
threshold is no longer searched.

What keeps the column-parallel nulls as good as pair-by-pair ones:

* Every other tone that varies during a pass is in each victim's model (the column
  fit), so each null is that of the aggressor alone and the couplings between the
  victims' lines at the aggressor's frequency come out. The resonant victims' tones
  found in the first pass ring during the Stark pass ("companions") for the same
  reason, rather than being held fixed.
* Stark signals are referred to one reference per batch: each batch gets its own offset.
* A long Stark train (``max_train_ns``) serves the victims whose phase responds weakly;
  those that respond strongly (small detuning) accumulate phase only over a shorter
  Ramsey window of their own (:func:`stark_windows`), so none is carried past the
  unwrapped range.
* Resonant victims: K pulses amplify K-fold for the victims the train is coherent for
  (pulse spacing and per-pulse phase step, :attr:`ColumnProbe.phase_step_rad`: usually
  all of a column's resonant victims at once), and a pass raises K for all of them as
  their nulls sharpen (curvature ∝ K²). A victim the train cannot be made coherent for
  is nulled in a pass of its own; for it the K pulses may even cancel, so one that shows
  no signal in the column's survey is surveyed again alone.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Collection, Mapping, Sequence
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Any

import numpy as np
import xarray as xr

from xtalkcal.chip import Chip
from xtalkcal.fit import ColumnNullFit, VerdictRules, fit_paraboloid_column, linearise_fringe
from xtalkcal.probes import ColumnProbe, PulseShape, choose_method
from xtalkcal.protocol import Protocol
from xtalkcal.rig import Rig
from xtalkcal.sweep import BatchRunner

__all__ = ["PairResult", "CalibrationResult", "risk_map", "calibrate_chip", "ring_around"]

# Rise of the signal above the floor at which rings are placed. Probabilities stay in
# the near-quadratic part of sin² (< 10 % off). A Stark phase is quadratic in the field
# (second-order shift, corrections ~ (Ω/Δ)² < 1e-2 here), so its information grows with
# the radius as far as the unwrapped range [−π/2, 3π/2) of the readings allows: a rise
# of 2 rad leaves room for noise and for the other tones' leak.
RISE_PROBABILITY = 0.2
RISE_STARK_RAD = 2.0
# Survey rings of Stark victims (nothing known of the null yet): where the victim line's
# own Stark phase reaches this.
SURVEY_STARK_RAD = 1.2
# Margin of the null search's stopping rule: k with e^{−k²/2} = 1 % (a circular Gaussian
# error exceeds k·σ with probability e^{−k²/2}).
NULL_CONFIDENCE = math.sqrt(2 * math.log(100.0))
# A raised amplification keeps each unfinished victim's ring this many null errors wide.
RING_MARGIN = 4.0
# Largest Stark phase (rad) a victim's Ramsey window may reach at 1.5× the strongest
# planned null: inside the unwrapped range [−π/2, 3π/2) of the probe's readings, with room
# for the other tones' leak.
STARK_PHASE_MAX = 1.5
# Prior used before the survey: the strongest crosstalk we plan for (DESIGN.md: −20 dB).
STRONGEST_DB = -20.0
#: A victim joins a joint resonant null pass only if its null lies within this many
#: final ring radii (RING_MARGIN target errors) of zero (see _calibrate_pass).
JOINT_NULL_SPAN = 2.0
_RULES = VerdictRules(mismatch_pvalue=0.0)


@dataclass(frozen=True)
class PairResult:
    """What was learnt about one (aggressor line, victim qubit) pair."""

    aggressor: str
    victim: str
    method: str
    freq_ghz: float
    accepted: bool
    reason: str
    x: complex | None  # crosstalk element X (None if rejected)
    x_cov: np.ndarray | None  # 2×2 covariance of (Re X, Im X)
    nulled: bool  # above threshold, so a null search ran
    shots: int
    repeats: int
    measured_at_s: float
    stage: str  # "survey" or "null"
    sweep_id: str = ""  # key of the raw sweep in CalibrationResult.sweeps
    quality: float = math.nan  # reduced chi-square of the fit

    @property
    def stderr(self) -> float:
        """sqrt(trace of the covariance) of X (linear)."""
        return float(np.sqrt(np.trace(self.x_cov))) if self.x_cov is not None else math.nan

    @property
    def magnitude_db(self) -> float:
        return 20 * math.log10(abs(self.x)) if self.x else -math.inf

    @property
    def ratio(self) -> complex | None:
        """Compensation ratio r = −X."""
        return None if self.x is None else -self.x


@dataclass
class CalibrationResult:
    """Outcome of :func:`calibrate_chip`."""

    chip: Chip
    protocol: Protocol
    rig_description: str
    pairs: list[PairResult] = field(default_factory=list)
    sweeps: dict[str, xr.Dataset] = field(default_factory=dict)
    shots: int = 0
    rig_seconds: float = 0.0
    risk: list[dict[str, Any]] = field(default_factory=list)
    # Per sweep key: (victims, sources, C, stderr) with C[i, k] the field at victim i from
    # the line of qubit sources[k] at the aggressor's frequency (X_ik(f_j)), measured in
    # the column sweep (sources: the pass's victims, then its companion tones).
    couplings: dict[str, tuple[tuple[str, ...], tuple[str, ...], np.ndarray, np.ndarray]] = (
        field(default_factory=dict))

    def pair(self, aggressor: str, victim: str) -> PairResult:
        for p in self.pairs:
            if p.aggressor == aggressor and p.victim == victim:
                return p
        raise KeyError((aggressor, victim))


def measured_couplings(result: CalibrationResult):
    """The line-to-line couplings measured in the column sweeps, as a lookup function.

    Returns ``get(victim, line, freq_ghz) -> X`` (0 where not measured): the field at
    ``victim`` from ``line`` (another victim's own line) at an aggressor frequency, as
    fitted by :func:`xtalkcal.fit.fit_paraboloid_column`. This is what the multi-victim
    solve needs (:func:`xtalkcal.compensation.multi_victim_settings`, ``couplings=``):
    X between victims at the aggressor's frequency, not at the victims' own.
    """
    chip = result.chip
    table: dict[tuple[str, str, float], complex] = {}
    for key, (victims, sources, C, _err) in result.couplings.items():
        f = float(result.sweeps[key].attrs["frequency_ghz"])
        for i, v in enumerate(victims):
            for k, u in enumerate(sources):
                if u != v and np.isfinite(C[i, k]):
                    table[(v, chip.line_of(u).name, round(f, 9))] = complex(C[i, k])

    def get(victim: str, line: str, freq_ghz: float) -> complex:
        return table.get((victim, line, round(float(freq_ghz), 9)), 0j)

    return get


def ledger_entries(result: CalibrationResult, *, run_tag: str = "") -> list:
    """The result as :class:`~xtalkcal.ledger.LedgerEntry` objects (one per pair).

    Rejected pairs are stored too (as history, never current). Each entry links to its
    raw sweep by ``sweep_id`` = ``run_tag + "/" + pass key``; store the sweeps of
    :func:`ledger_sweeps` in the same commit.
    """
    from xtalkcal import __version__
    from xtalkcal.ledger import LedgerEntry, utc_timestamp

    stamp = utc_timestamp()
    out = []
    for p in result.pairs:
        nan2 = ((math.nan, math.nan), (math.nan, math.nan))
        out.append(LedgerEntry(
            aggressor=p.aggressor, victim=p.victim, frequency_ghz=p.freq_ghz,
            value=p.x if p.x is not None else complex(math.nan, math.nan),
            covariance=tuple(map(tuple, p.x_cov)) if p.x_cov is not None else nan2,
            method=p.method, shots=p.shots, amplification=p.repeats,
            quality=p.quality if p.accepted else math.nan,
            verdict="accepted" if p.accepted else "rejected",
            reason=p.reason if not p.accepted else "",
            measured_at_s=p.measured_at_s, measured_at_utc=stamp,
            rig=result.rig_description, software_version=f"xtalkcal {__version__}",
            kind="null" if p.nulled else "survey", tag=run_tag,
            sweep_id=_sweep_key(run_tag, p.sweep_id),
        ))
    return out


def _sweep_key(run_tag: str, key: str) -> str:
    return f"{run_tag}/{key}" if run_tag else key


def ledger_sweeps(result: CalibrationResult, *, run_tag: str = "") -> dict[str, xr.Dataset]:
    """The raw sweeps of a result keyed as :func:`ledger_entries` links them."""
    return {_sweep_key(run_tag, k): v for k, v in result.sweeps.items()}


def risk_map(chip: Chip, protocol: Protocol) -> list[dict[str, Any]]:
    """Hazards of the frequency plan alone, before any shot.

    Flags each (aggressor line, victim) whose aggressor frequency lies within the
    protocol's windows of the victim's 0–1 or 1–2 transition, or within 20 MHz of
    its two-photon 0–2 transition at (f01 + f12)/2 (window common practice). Sorted
    most hazardous first (smallest detuning).
    """
    out = []
    for ln in chip.lines:
        f = chip.qubit(ln.qubit).f01_ghz
        for q in chip.qubits:
            if q.name == ln.qubit:
                continue
            hazards = []
            for kind, nu, win in (
                ("0-1", q.f01_ghz, protocol.windows.rotation_window_ghz),
                ("1-2", q.f12_ghz, protocol.windows.leakage_window_ghz),
                ("0-2/2", q.f02_half_ghz, 0.02),
            ):
                if abs(f - nu) <= win:
                    hazards.append((kind, f - nu))
            method = protocol.method_override(ln.name, q.name) or choose_method(
                chip, ln.name, q.name, protocol.windows)
            d = min((abs(h[1]) for h in hazards), default=abs(f - q.f01_ghz))
            out.append({"aggressor": ln.name, "victim": q.name, "method": method,
                        "hazards": [f"{k} at {1e3 * dd:+.0f} MHz" for k, dd in hazards],
                        "detuning_ghz": d})
    out.sort(key=lambda r: (not r["hazards"], r["detuning_ghz"]))
    return out


def _is_prime(n: int) -> bool:
    return n > 1 and all(n % d for d in range(2, int(n**0.5) + 1))


def _harmonic(h: int, n: int) -> int:
    """Canonical harmonic index on a ring of n points: cos/sin of h and −h coincide."""
    h %= n
    return min(h, n - h)


def _multipliers_ok(m: list[int], n: int) -> bool:
    for i, mi in enumerate(m):
        others = [x for j, x in enumerate(m) if j != i]
        # Harmonics of victim i's column model (fit_paraboloid_column): its own tone
        # (m_i), the bilinear terms conj(z_i)·z_k (m_k − m_i) and the linear terms z_k
        # (m_k) — all distinct and non-zero, or the model is degenerate.
        model = ([_harmonic(mi, n)] + [_harmonic(x - mi, n) for x in others]
                 + [_harmonic(x, n) for x in others])
        if 0 in model or len(set(model)) != len(model):
            return False
        # The unmodelled second-order terms z_k·conj(z_l) must stay off victim i's own
        # harmonic, else they would bias its null.
        if _harmonic(mi, n) in {_harmonic(a - b, n) for a in others for b in others if a != b}:
            return False
    return True


@lru_cache(maxsize=256)
def _multipliers(n: int, count: int) -> tuple[int, ...]:
    """Angle multipliers for ``count`` victims on a ring of n points (greedy search)."""
    m: list[int] = []
    for c in range(1, n // 2 + 1):
        if _multipliers_ok(m + [c], n):
            m.append(c)
            if len(m) == count:
                break
    return tuple(m)


def ring_points_for(n_victims: int, at_least: int) -> int:
    """Points per ring: the smallest prime ≥ ``at_least`` with room for V multipliers."""
    n = max(at_least, 3)
    while not (_is_prime(n) and len(_multipliers(n, n_victims)) >= n_victims):
        n += 1
    return n


def ring_around(center: np.ndarray, radius: np.ndarray, n: int, phase0: float = 0.0
                ) -> np.ndarray:
    """Points (n+1, V): the centre, then a ring of n points per victim column.

    Victim v visits the ring's angles in the order θ_p = 2π·p·m_v/n (n prime). The
    multipliers are chosen (:func:`_multipliers`) so that, for every victim, the
    harmonics of its column model — its own tone (m_v), the leak of each other tone
    (m_k) and its product with its own (m_k − m_v) — are all distinct, and the
    unmodelled products of two other tones (m_k − m_l) avoid its own harmonic. The
    other victims' leaks are then separable from the null (see
    :func:`xtalkcal.fit.fit_paraboloid_column`) and cannot bias it.
    """
    V = center.shape[0]
    m = _multipliers(n, V)
    if len(m) < V:
        raise ValueError(f"{n} ring points cannot keep {V} victims apart; "
                         f"use ring_points_for({V}, ...)")
    p = np.arange(n)[:, None]
    th = phase0 + 2 * np.pi * ((p * np.array(m[:V])[None, :]) % n) / n
    ring = center[None, :] + radius[None, :] * np.exp(1j * th)
    return np.vstack([center[None, :], ring])


def stark_windows(chip: Chip, line: str, victims: Sequence[str], methods: Sequence[str],
                  amplitude: float, repeats: int, shape: PulseShape) -> tuple[float, ...]:
    """Ramsey window per victim of a merged Stark train (0: the whole train).

    A victim whose phase would respond more strongly than ``STARK_PHASE_MAX`` rad at 1.5×
    the strongest null we plan for (nominal chip, :meth:`ColumnProbe.stark_gain`) gets a
    window shortened in proportion, so that a long train serves the weakly responding
    victims without carrying the strongly responding ones past the unwrapped range.
    """
    victims, methods = tuple(victims), tuple(methods)
    full = ColumnProbe(chip, line, victims, amplitude=amplitude, repeats=repeats,
                       methods=methods, shape=shape, merged=True)
    g_max = STARK_PHASE_MAX / (1.5 * amplitude * 10 ** (STRONGEST_DB / 20)) ** 2
    out = []
    for v, m in zip(victims, methods, strict=True):
        g = full.stark_gain(v) if m == "stark" else 0.0
        if g <= g_max:
            out.append(0.0)
        else:
            out.append(float(max(round(full.train_ns() * g_max / g), 4 * shape.sigma_ns)))
    return tuple(out)


def calibrate_chip(
    rig: Rig,
    protocol: Protocol,
    *,
    runner: BatchRunner | None = None,
    aggressors: list[str] | None = None,
    column_parallel: bool = True,
    key_prefix: str = "",
    null_victims: Mapping[str, Collection[str]] | None = None,
    log: Callable[[str], None] | None = None,
) -> CalibrationResult:
    """Survey every column and null every pair above the protocol's threshold.

    Parameters
    ----------
    rig : Rig
    protocol : Protocol
    runner : BatchRunner, optional
        Records batches (resumable); a plain one is made if not given.
    aggressors : list of str, optional
        Aggressor lines to calibrate (default all).
    column_parallel : bool
        True: all victims of an aggressor share the shots. False: one victim per pass
        (the pair-by-pair baseline of the benchmarks).
    null_victims : mapping of aggressor line to victims, optional
        Pairs to null whatever their survey says (a recalibration of pairs already in use
        must not fall back to a survey estimate).
    key_prefix : str
        Prefix of the batch keys in the runner's record (distinct calibrations sharing a
        record folder need distinct prefixes).
    log : callable, optional
        Receives one line of progress text per pass.
    """
    chip = rig.chip
    runner = runner or BatchRunner(rig)
    say = log or (lambda s: None)
    result = CalibrationResult(chip, protocol, rig.describe(), risk=risk_map(chip, protocol))
    shape = PulseShape(protocol.pulse.duration_ns, protocol.pulse.sigma_ns)
    for line in aggressors or list(chip.line_names):
        own = chip.line(line).qubit
        victims = [q for q in chip.qubit_names if q != own]
        methods = {v: protocol.method_override(line, v)
                   or choose_method(chip, line, v, protocol.windows) for v in victims}
        if protocol.only_methods:
            victims = [v for v in victims if methods[v] in protocol.only_methods]
        groups = [[v for v in victims if methods[v] != "stark"],
                  [v for v in victims if methods[v] == "stark"]]
        for gi, group in enumerate(groups):
            passes = [group] if column_parallel else [[v] for v in group]
            for victims_of_pass in passes:
                if victims_of_pass:
                    # Column-parallel: the tones already found for this aggressor (in
                    # the other pass, whose victims cannot be read out in this one)
                    # ring around their nulls during later passes, so that the column
                    # fit measures their leak onto this pass's victims (the multi-victim
                    # solve needs it) instead of folding it into these victims' nulls.
                    companions = _nulled_tones(result, protocol, line) if column_parallel else ()
                    force = tuple((null_victims or {}).get(line, ()))
                    handoff = _calibrate_pass(rig, runner, protocol, result, line,
                                              victims_of_pass,
                                              [methods[v] for v in victims_of_pass], shape,
                                              stark=(gi == 1), say=say, companions=companions,
                                              key_prefix=key_prefix, force=force,
                                              split=column_parallel)
                    _null_one_by_one(rig, runner, protocol, result, line, handoff.nulls,
                                     methods, shape, say=say, key_prefix=key_prefix)
                    for v in handoff.resurvey:
                        # Surveyed again alone: a pulse spacing coherent for it and its
                        # own selection (as pair by pair), the column's tones ringing.
                        _calibrate_pass(rig, runner, protocol, result, line, [v],
                                        [methods[v]], shape, stark=False, say=say,
                                        companions=_nulled_tones(result, protocol, line),
                                        key_prefix=key_prefix,
                                        force=force, split=True)
    result.shots = runner.shots_executed + runner.shots_resumed
    result.rig_seconds = runner.rig_seconds
    return result


def _null_one_by_one(rig, runner, protocol, result, line, handoff, methods, shape, *, say,
                     key_prefix):
    """Null the resonant victims a split survey handed over, one pass each.

    Each pass starts at the survey's estimate, with the K its own victim allows, and the
    column's other tones ringing (those nulled already around their nulls, those still
    waiting around their survey estimates), so the couplings between them come out.
    """
    chip = rig.chip
    amp = pass_amplitude(protocol, chip, line)
    waiting = {v: z for v, z, *_ in handoff}
    for v, z0, kappa, k_survey, sigma in handoff:
        del waiting[v]
        one = ColumnProbe(chip, line, (v,), amplitude=amp, repeats=1, methods=(methods[v],),
                          shape=shape)
        theta = one.expected_rotation_per_pulse(v, STRONGEST_DB)
        k_max = int(protocol.survey.max_train_ns // one.spacing_ns)
        # The K that keeps a null up to the strongest crosstalk unambiguous, or — the
        # pass's own rule for raising K — the K whose ring (radius ∝ 1/K) stays
        # RING_MARGIN survey errors wide, at most ×4 the survey's.
        cap = survey_radii(one)[0]
        r_survey = min(math.sqrt(RISE_PROBABILITY / max(kappa, 1e-12)), cap)
        k_sharp = min(int(k_survey * r_survey / (RING_MARGIN * sigma)), 4 * k_survey)
        K = max(k_survey, min(max(int((math.pi / 4) / theta), k_sharp), k_max))
        rad = min(math.sqrt(RISE_PROBABILITY / (max(kappa, 1e-12) * (K / k_survey) ** 2)),
                  cap)
        companions = _nulled_tones(result, protocol, line) + tuple(waiting.items())
        _calibrate_pass(rig, runner, protocol, result, line, [v], [methods[v]], shape,
                        stark=False, say=say, companions=companions, key_prefix=key_prefix,
                        force=(v,), start=PassStart((z0,), (rad,), K))


def _nulled_tones(result: CalibrationResult, protocol: Protocol, line: str
                  ) -> tuple[tuple[str, complex], ...]:
    """(victim, tone at its null) of every pair of ``line`` nulled so far."""
    amp = pass_amplitude(protocol, result.chip, line)
    return tuple((p.victim, -p.x * amp) for p in result.pairs
                 if p.aggressor == line and p.accepted and p.nulled)


def measure_probe(runner: BatchRunner, probe: ColumnProbe, points: np.ndarray, shots: int,
                  key: str):
    """Run a probe at ``points`` (n, V) as one recorded batch; its :class:`ProbeSignals`.

    Stark probes get their reference timelines (no aggressor) in the same batch.
    """
    tls = probe.timelines(points, label=f"{key}:")
    ref = probe.reference_timelines(label=f"{key}:ref") if probe.has_stark else []
    counts = runner.run(key, tls + ref, shots)
    n = len(tls)
    main = _slice(counts, 0, n)
    refc = _slice(counts, n, n + len(ref)) if ref else None
    return probe.signals(main, points.shape[0], refc)


def survey_radii(probe: ColumnProbe) -> np.ndarray:
    """Ring radius per victim before anything is known of its null (fraction of full scale).

    Stark victims: where the victim line's own Stark phase reaches SURVEY_STARK_RAD
    (nominal chip values); resonant victims: 1.5× the null of the strongest crosstalk we
    plan for. Never more than 45 % of the victim line's limit.
    """
    chip = probe.chip
    out = np.empty(len(probe.victims))
    for i, (v, m) in enumerate(zip(probe.victims, probe.methods, strict=True)):
        if m == "stark":
            out[i] = math.sqrt(SURVEY_STARK_RAD / probe.stark_gain(v))
        else:
            out[i] = probe.amplitude * 10 ** (STRONGEST_DB / 20) * 1.5
        out[i] = min(out[i], 0.45 * chip.amplitude_limit(chip.line_of(v).name))
    return out


def ring_radius_caps(probe: ColumnProbe) -> np.ndarray:
    """Largest ring radius per victim once its null is known (fraction of full scale).

    The survey's radius (:func:`survey_radii`), except for Stark victims, whose rings may
    rise further than the survey's (their phase is quadratic in the field): up to 1.5× the
    rise ``RISE_STARK_RAD`` at the nominal gain, in case a fitted curvature comes out low.
    """
    chip = probe.chip
    cap = survey_radii(probe)
    for i, (v, m) in enumerate(zip(probe.victims, probe.methods, strict=True)):
        if m == "stark":
            lim = 0.45 * chip.amplitude_limit(chip.line_of(v).name)
            cap[i] = min(math.sqrt(1.5 * RISE_STARK_RAD / probe.stark_gain(v)), lim)
    return cap


def pass_amplitude(protocol: Protocol, chip: Chip, line: str) -> float:
    """Peak amplitude of the aggressor pulses of ``line`` (fraction of full scale)."""
    return protocol.pulse.aggressor_fraction * chip.amplitude_limit(line)


@dataclass(frozen=True)
class PassStart:
    """Where a pass without a survey starts (refinement from known nulls).

    ``centres`` and ``radii`` per victim (fraction of full scale), ``repeats`` the
    amplification K to use.
    """

    centres: tuple[complex, ...]
    radii: tuple[float, ...]
    repeats: int


def _calibrate_pass(rig, runner, protocol, result, line, victims, methods, shape, *, stark, say,
                    companions=(), key_prefix="", force=(), start: PassStart | None = None,
                    split=False):
    """One pass: survey (unless ``start``), then the null rounds; results into ``result``.

    With ``split`` a resonant pass that selects more than one victim, or one that its
    pulse spacing is not tuned for, stops after its survey and returns
    ``[(victim, z*, κ, K)]`` for them (their results are not recorded): the caller nulls
    each in a pass of its own, whose pulse spacing makes that victim's rotations add up
    coherently so that K can be raised for it.
    """
    chip = rig.chip
    amp = pass_amplitude(protocol, chip, line)
    base = ColumnProbe(chip, line, tuple(victims), amplitude=amp, repeats=1,
                       methods=tuple(methods), shape=shape)
    spacing = base.spacing_ns
    if stark:
        k_survey = max(1, int(protocol.survey.max_train_ns // shape.duration_ns))
    else:
        # Largest per-pulse rotation we plan for (strongest crosstalk, leakage √2):
        # keep K·θ ≤ π/4 so a null up to 2× that radius stays unambiguous.
        theta = max(base.expected_rotation_per_pulse(v, STRONGEST_DB) for v in victims)
        k_survey = max(1, min(int((math.pi / 4) / theta),
                              int(protocol.survey.max_train_ns // spacing)))
    K = int(start.repeats) if start is not None else k_survey
    comp_names = tuple(q for q, _ in companions)
    windows = stark_windows(chip, line, victims, methods, amp, K, shape) if stark else ()
    probe = ColumnProbe(chip, line, tuple(victims), amplitude=amp, repeats=K,
                        methods=tuple(methods), shape=shape, merged=stark,
                        companions=comp_names, stark_windows_ns=windows)
    k_max = max(K, int(protocol.survey.max_train_ns // spacing))
    f = probe.freq_ghz
    V = len(victims)
    radius = survey_radii(probe)
    cap = ring_radius_caps(probe)
    # Companion tones: a ring around their nulls as wide as a resonant victim's survey
    # ring (their own signal does not matter here; the ring only has to reach the
    # victims through the couplings).
    comp_centre = np.array([z for _, z in companions], dtype=complex)
    comp_radius = np.array([_companion_radius(amp, chip, q, z) for q, z in companions])
    tag = f"{line}-{'stark' if stark else 'res'}"
    if tag in result.sweeps:  # pair-by-pair passes: one record per victim
        tag = f"{tag}-{victims[0]}"
    pts_all: list[np.ndarray] = []
    comp_all: list[np.ndarray] = []
    sig_all: list[np.ndarray] = []
    err_all: list[np.ndarray] = []
    shots_all: list[np.ndarray] = []
    round_all: list[np.ndarray] = []
    k_all: list[np.ndarray] = []  # amplification K of each point

    def measure(points: np.ndarray, shots: int, key: str, rnd: int) -> None:
        s = measure_probe(runner, probe, points, shots, key_prefix + key)
        k_all.append(np.full(points.shape[0], probe.repeats))
        pts_all.append(points[:, :V])
        comp_all.append(points[:, V:])
        sig_all.append(s.signal)
        err_all.append(s.stderr)
        shots_all.append(s.shots)
        round_all.append(np.full(points.shape[0], rnd))

    def fit(k: int | None = None):
        """Column fit of the points taken at amplification ``k`` (default: the current)."""
        kk = np.concatenate(k_all)
        use = kk == (probe.repeats if k is None else k)
        Z = np.vstack(pts_all).T[:, use]  # (V, n)
        S = np.vstack(sig_all).T[:, use]
        E = np.vstack(err_all).T[:, use].copy()
        # Once a resonant victim has two rings centred near its null, the wide survey
        # ring is dropped from its fit (a weight of ~0): sin² signals are symmetric in
        # |z − z*| but not quadratic, and mixing radii far apart would bias z*. A Stark
        # phase is quadratic at any radius the survey uses, so its survey points stay.
        rnd = np.concatenate(round_all)[use]
        if rnd.max() >= 2 and (rnd == 0).any():
            E[np.ix_(searched & ~stark_rows, rnd == 0)] *= 1e6
        # The other victims' tones are in the model (fit_paraboloid_column): each null is
        # that of the aggressor's leak alone, and the couplings between the victims'
        # lines at this frequency come out too. Weak non-quadratic terms remain: the
        # covariance is scaled by the reduced chi-square (Birge ratio) instead of
        # rejecting the fit for them.
        # Stark signals are referred to one reference measurement per batch (round):
        # each round gets its own offset, which absorbs that shared error.
        groups = np.zeros(Z.shape, dtype=np.int64)
        groups[stark_rows] = rnd
        tones = np.vstack(comp_all).T[:, use] if comp_names else None
        col = fit_paraboloid_column(Z, S, E, groups=groups, tones=tones, rules=_RULES)
        # Resonant signals saturate as sin²: refit them unfolded about the floors just
        # found (linearise_fringe), else an off-centre ring pulls each null towards its
        # centre by several σ once K is raised.
        rows = [i for i in range(V) if not stark_rows[i] and col.estimates[i].accepted]
        if rows:
            S, E = S.copy(), E.copy()
            floors = np.array([col.estimates[i].floor for i in rows])[:, None]
            S[rows], E[rows] = linearise_fringe(S[rows], E[rows], floors)
            col = fit_paraboloid_column(Z, S, E, groups=groups, tones=tones, rules=_RULES)
        return _ColumnFit(col)

    searched = np.zeros(V, bool)  # victims whose null is being searched
    stark_rows = np.array([m == "stark" for m in methods])
    # Rings longer than the protocol asks for (to keep victims apart) share the same
    # shots per ring: every victim gets the information the protocol intends per round,
    # and a column's cost does not grow with its number of victims.
    # A ring alone (the survey; the first ring at a raised K) must over-determine each
    # victim's column model: 3 + an offset + 4 per other varying tone, plus 2 to spare.
    tones_n = V + len(comp_names)
    least = 4 * tones_n + 2
    n_ring = ring_points_for(tones_n, max(protocol.survey.ring_points, least))
    n_null = ring_points_for(tones_n, max(protocol.null.points_per_ring, least))
    null_shots = _shots_per_point(protocol.null.shots_per_point, protocol.null.points_per_ring,
                                  n_null)

    def rings(centre: np.ndarray, rad: np.ndarray, n: int, phase0: float = 0.0) -> np.ndarray:
        return ring_around(np.concatenate([centre, comp_centre]),
                           np.concatenate([rad, comp_radius]), n, phase0=phase0)

    # Stop once the null's 1σ semi-major axis is target/NULL_CONFIDENCE: |error| then
    # stays below the target residual with ≥ 99 % probability (Rayleigh tail e^{−k²/2}).
    target = 10 ** (protocol.null.target_residual_db / 20) * amp / NULL_CONFIDENCE
    rounds = 0
    if start is None:
        # The survey ring is centred on 0, not on the nulls: each null's error then
        # carries |z*|·δκ/κ, and κ is told apart from the offset only by the centre point
        # (every ring point of a victim has the same |z|). A long ring (many victims)
        # repeats its centre so that it keeps the share of the shots it has in a ring of
        # the protocol's length.
        copies = max(1, round(n_ring / max(protocol.survey.ring_points, 1)))
        pts0 = rings(np.zeros(V, complex), radius, n_ring)
        pts0 = np.vstack([pts0[:1]] * (copies - 1) + [pts0])
        measure(pts0, _shots_per_point(protocol.survey.shots, protocol.survey.ring_points,
                                       n_ring + copies - 1), f"{tag}-survey", 0)
        est = fit()
        survey_time = _data_time(runner, rig)
        thr = 10 ** (protocol.survey.threshold_db / 20)
        selected = np.zeros(V, bool)
        for i in range(V):
            e = est.estimate(i)
            if e.accepted:
                x = -e.z_star / amp
                sx = _sigma(e) / amp
                selected[i] = abs(x) + 2 * sx >= thr or victims[i] in force
            else:
                # "No signal" means |X| is small against the ring: bound it from the floor.
                selected[i] = False
        say(f"{line}: K={K}, survey of {V} victims, {int(selected.sum())} above "
            f"{protocol.survey.threshold_db:g} dB")
        centre = np.array([est.estimate(i).z_star if est.estimate(i).accepted else 0j
                           for i in range(V)])
    else:
        # A pass from known nulls (refinement): no survey, every victim searched, the
        # first ring at the radius its stored curvature gives.
        centre = np.asarray(start.centres, dtype=complex)
        selected = np.ones(V, bool)
        searched[:] = True
        rad0 = np.minimum(np.asarray(start.radii, dtype=float), radius)
        measure(rings(centre, rad0, n_null), null_shots, f"{tag}-null00", 1)
        survey_time = _data_time(runner, rig)
        rounds = 1
        say(f"{line}: K={K}, refining {V} victims from their current settings")
    handoff = []
    resurvey: list[str] = []
    coherent = np.array([not stark and probe.coherent(v) for v in victims])
    handed = np.zeros(V, bool)
    if split and not stark and start is None:
        # A resonant victim the train is not coherent for sees K pulses add up with
        # whatever phase its detuning gives them, possibly cancelling: a survey fit
        # without signal says nothing of its |X| then. It is surveyed again alone; one
        # selected is nulled in a pass of its own (K can be raised only for the others).
        if V > 1:
            resurvey = [victims[i] for i in range(V) if not coherent[i] and not selected[i]
                        and not est.estimate(i).accepted]
        handed = selected & ~coherent
        # Victims nulled in the same shots share one model, in which each one's tone
        # leaks onto the others (couplings c_ik). Its rings circle its own null z*_k, so
        # telling the aggressor's leak from c_ik·z*_k needs rings as wide as |z*_k|, and
        # a null ring shrinks as 1/K to a few target errors: a victim whose null lies
        # far beyond that would make the others' errors stop falling as K rises. Such
        # a victim is nulled in a pass of its own; here its tone rings wide around its
        # survey estimate, like a companion's, which keeps the others' models apart.
        # Judged on the survey's lower 2σ bound: a victim surveyed with a wide error (its
        # K set by another) is not sent away on noise alone.
        joint = selected & coherent
        sigma0 = np.array([_sigma(est.estimate(i)) if est.estimate(i).accepted else 0.0
                           for i in range(V)])
        big = joint & (np.abs(centre) - 2 * sigma0 > JOINT_NULL_SPAN * RING_MARGIN * target)
        if joint.sum() > 1 and big.any():
            keep = joint & ~big
            if not keep.any():
                keep[int(np.argmax(joint))] = True
            handed |= joint & ~keep
        handoff = [(victims[i], est.estimate(i).z_star, est.estimate(i).curvature, K,
                    _sigma(est.estimate(i)))
                   for i in range(V) if handed[i]]
        selected &= ~handed
    searched[:] = selected
    budget = protocol.null.shot_budget
    spent = sum(int(s.sum()) for s in shots_all) // max(V, 1)
    # Victims selected only because their survey was imprecise (|X| + 2σ at the
    # threshold), which the rings at a raised K have since shown to lie below it: no
    # longer searched; their measurement at that K is kept (estimate, K, time).
    cleared: dict[int, tuple[Any, int, float]] = {}
    while selected.any() and rounds < protocol.null.max_rounds and spent < budget:
        rounds += 1
        est = fit()
        if start is None and rounds >= 2:
            for i in np.flatnonzero(selected):
                e = est.estimate(i)
                if (e.accepted and victims[i] not in force
                        and (abs(e.z_star) + 2 * _sigma(e)) / amp < thr):
                    selected[i] = False
                    cleared[int(i)] = (e, probe.repeats, _data_time(runner, rig))
                    say(f"{line}: {victims[i]} below {protocol.survey.threshold_db:g} dB "
                        f"at K={probe.repeats}, not nulled")
            if not selected.any():
                break
        rad = np.zeros(V)
        done = np.ones(V, bool)
        for i in range(V):
            e = est.estimate(i)
            if selected[i] and e.accepted:
                centre[i] = e.z_star
                rise = RISE_STARK_RAD if methods[i] == "stark" else RISE_PROBABILITY
                rad[i] = min(math.sqrt(rise / max(e.curvature, 1e-12)), cap[i])
                done[i] = _sigma(e) <= target
                if methods[i] != "stark":
                    # A sin² signal is not quadratic far up its fringe, and off-centre
                    # on its ring that pulls the fitted null towards the ring's centre;
                    # the error says nothing of it. Done only once the latest ring was
                    # centred on the null to within RING_MARGIN of its radius and rose
                    # no more than twice the rule's amount (a ring planned from another
                    # K or spacing can rise much further).
                    last = pts_all[-1]
                    r_last = abs(last[1, i] - last[0, i])
                    done[i] &= (abs(e.z_star - last[0, i]) <= r_last / RING_MARGIN
                                and e.curvature * r_last**2 <= 2 * RISE_PROBABILITY)
            elif selected[i]:
                rad[i] = radius[i]
                done[i] = False
            elif handed[i]:
                rad[i] = _companion_radius(amp, chip, victims[i], centre[i])
            else:
                rad[i] = 0.0
        if done.all():
            break
        raise_k = [i for i in range(V) if selected[i]]
        if (not stark and raise_k and coherent[raise_k].all()
                and all(est.estimate(i).accepted for i in raise_k)):
            # Raise K as the nulls sharpen, from the survey's estimates on (curvature ∝
            # K², so the error of z* ∝ 1/K at equal shots): as far as keeps every ring
            # (radius ∝ 1/K) RING_MARGIN errors wide, at most ×4 per round, or — if that
            # is more — to the K that keeps a null up to the strongest crosstalk
            # unambiguous for each victim being nulled (the survey's K was set by the
            # column's most responsive victim, which may be nulled elsewhere); within
            # the longest train. Only for victims the train is coherent for (for the
            # others K pulses do not amplify K-fold).
            k_cur = probe.repeats
            k_sharp = [min(int(k_cur * rad[i] / (RING_MARGIN * _sigma(est.estimate(i)))),
                           4 * k_cur) for i in raise_k]
            k_safe = [int((math.pi / 4) / probe.expected_rotation_per_pulse(
                victims[i], STRONGEST_DB)) for i in raise_k]
            k_new = min(min(map(max, k_sharp, k_safe)), k_max)
            if k_new > k_cur:
                probe = ColumnProbe(chip, line, tuple(victims), amplitude=amp, repeats=k_new,
                                    methods=tuple(methods), shape=shape, merged=False,
                                    companions=comp_names)
                # The rise rule at the curvature the new K gives (κ ∝ K²): a ring
                # shrinks as 1/K unless it was held at the cap, when it shrinks less.
                for i in raise_k:
                    rad[i] = min(math.sqrt(RISE_PROBABILITY / max(
                        est.estimate(i).curvature * (k_new / k_cur) ** 2, 1e-12)), cap[i])
                say(f"{line}: K raised to {k_new} for "
                    f"{', '.join(victims[i] for i in raise_k)}")
        pts = rings(centre, rad, n_null, phase0=math.pi / n_null * rounds)
        measure(pts, null_shots, f"{tag}-null{rounds:02d}", rounds)
        spent = sum(int(s.sum()) for s in shots_all) // max(V, 1)
    est = fit()
    first = fit(K)  # survey-stage victims (and the couplings) from the points at the first K
    # A victim whose fit at a raised K failed falls back on the points at the first K.
    final = [est.estimate(i) if selected[i] and est.estimate(i).accepted
             else first.estimate(i) for i in range(V)]
    at_final_k = [selected[i] and est.estimate(i).accepted for i in range(V)]
    now = _data_time(runner, rig)
    result.couplings[tag] = (tuple(victims), tuple(victims) + comp_names, first.fit.couplings,
                             first.fit.couplings_stderr)
    for i, v in enumerate(victims):
        if handed[i] or v in resurvey:
            continue  # nulled, or surveyed again, in passes of their own
        e = final[i]
        reps = probe.repeats if at_final_k[i] else K
        when = now if selected[i] else survey_time
        if i in cleared:
            e, reps, when = cleared[i]
        nshots = int(np.vstack(shots_all)[:, i].sum())
        if e.accepted:
            x = -e.z_star / amp
            cov = np.asarray(e.covariance) * _birge(e) / amp**2
            result.pairs.append(PairResult(line, v, methods[i], f, True, "", complex(x), cov,
                                           bool(selected[i]), nshots, reps, when,
                                           "null" if selected[i] else "survey", tag,
                                           float(e.reduced_chi2)))
        else:
            result.pairs.append(PairResult(line, v, methods[i], f, False, e.reason.value, None,
                                           None, False, nshots, reps, survey_time,
                                           "survey", tag, float(e.reduced_chi2)))
    Z = np.vstack(pts_all)
    extra = {}
    if comp_names:
        T = np.vstack(comp_all)
        extra = {
            "tone_re": (("point", "companion"), T.real, {
                "units": "fraction of full scale",
                "long_name": "tone of a victim nulled in another pass, real part"}),
            "tone_im": (("point", "companion"), T.imag, {
                "units": "fraction of full scale", "long_name": "same, imaginary part"}),
        }
    kap = np.array([e.curvature if e.accepted else math.nan for e in final])
    kap_err = np.array([e.curvature_stderr * math.sqrt(_birge(e)) if e.accepted else math.nan
                        for e in final])
    result.sweeps[tag] = xr.Dataset(
        {
            **extra,
            "curvature": (("victim",), kap, {"long_name": "fitted curvature κ of the signal",
                                             "units": "signal per (fraction of full scale)²"}),
            "curvature_stderr": (("victim",), kap_err, {"long_name": "standard error of κ"}),
            "z_re": (("point", "victim"), Z.real, {"units": "fraction of full scale",
                                                   "long_name": "cancellation tone, real part"}),
            "z_im": (("point", "victim"), Z.imag, {"units": "fraction of full scale",
                                                   "long_name": "cancellation tone, imag part"}),
            "signal": (("point", "victim"), np.vstack(sig_all), {"long_name": "error signal"}),
            "stderr": (("point", "victim"), np.vstack(err_all), {"long_name": "standard error"}),
            "shots": (("point", "victim"), np.vstack(shots_all), {"units": "shots"}),
            "round": (("point",), np.concatenate(round_all), {"long_name": "search round"}),
            "repeats": (("point",), np.concatenate(k_all), {"long_name": "amplification K"}),
            "coupling_re": (("victim", "from_victim"), first.fit.couplings.real,
                            {"long_name": "field at victim from from_victim's line, real part",
                             "units": "relative to the victim's own line"}),
            "coupling_im": (("victim", "from_victim"), first.fit.couplings.imag,
                            {"long_name": "same, imaginary part",
                             "units": "relative to the victim's own line"}),
            "coupling_stderr": (("victim", "from_victim"), first.fit.couplings_stderr,
                                {"long_name": "standard error of the coupling (√trace)",
                                 "units": "relative to the victim's own line"}),
        },
        coords={"victim": list(victims), "from_victim": list(victims) + list(comp_names),
                **({"companion": list(comp_names)} if comp_names else {})},
        attrs={"aggressor": line, "frequency_ghz": f, "repeats": probe.repeats,
               "aggressor_amplitude": amp,
               "methods": ",".join(methods), "rig": rig.describe(),
               "spacing_ns": probe.spacing_ns, "phase_step_rad": probe.phase_step_rad},
    )
    return _Handoff(handoff, resurvey)


@dataclass(frozen=True)
class _Handoff:
    """Victims of a split resonant survey left to passes of their own.

    ``nulls``: ``(victim, z*, κ, K, σ)`` of those selected, to be nulled one by one;
    ``resurvey``: those the pass's pulse spacing could not see, to be surveyed alone.
    """

    nulls: list[tuple[str, complex, float, int, float]]
    resurvey: list[str]


def nulled_pass_groups(methods: Mapping[str, str]) -> list[list[str]]:
    """How the nulled victims of one aggressor are measured again (refinement, re-checks).

    As the calibration nulled them: each resonant victim in a pass of its own (its pulse
    spacing and K — K pulses amplify K-fold only for the victim the spacing is coherent
    for), the Stark victims together (one train). ``methods``: victim → method, in order.
    """
    groups = [[v] for v, m in methods.items() if m != "stark"]
    stark = [v for v, m in methods.items() if m == "stark"]
    return groups + ([stark] if stark else [])


def _companion_radius(amp: float, chip: Chip, victim: str, centre: complex) -> float:
    """Ring radius of a tone that varies only to reach the other victims (a companion)."""
    return min(amp * 10 ** (STRONGEST_DB / 20) * 1.5,
               0.45 * chip.amplitude_limit(chip.line_of(victim).name) - abs(centre))


def _shots_per_point(nominal: int, nominal_points: int, points: int) -> int:
    """Shots per point that keep a ring's total at ``nominal × nominal_points``."""
    return max(50, int(round(nominal * max(nominal_points, 1) / points)))


@dataclass(frozen=True)
class _ColumnFit:
    fit: ColumnNullFit

    def estimate(self, i: int):
        return self.fit.estimates[i]


def _sigma(e) -> float:
    """1σ semi-major axis of an estimate's null, made honest by its Birge ratio."""
    return e.position_stderr * math.sqrt(_birge(e))


def _birge(e) -> float:
    """max(1, reduced chi-square): the factor that makes a covariance honest."""
    chi = e.reduced_chi2
    return max(1.0, float(chi)) if math.isfinite(chi) else 1.0


def _data_time(runner: BatchRunner, rig: Rig) -> float:
    """When the latest data were taken (rig clock, s): a resumed batch keeps its own time."""
    t = runner.last_finished_s
    return float(t) if t is not None else rig.now()


def _slice(counts, a: int, b: int):
    from xtalkcal.rig import Counts

    return Counts(counts.qubits, counts.counts[a:b], counts.shots, counts.started_s,
                  counts.finished_s)
