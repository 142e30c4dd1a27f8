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
stderr of X reaches the protocol's target or the shot budget is spent.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Collection, Mapping
from dataclasses import dataclass, field
from functools import lru_cache
from typing import Any

import numpy as np
import xarray as xr

from xtalkcal.chip import Chip
from xtalkcal.fit import ColumnNullFit, VerdictRules, fit_paraboloid_column
from xtalkcal.probes import ColumnProbe, PulseShape, choose_method
from xtalkcal.protocol import Protocol
from xtalkcal.rig import Rig
from xtalkcal.sweep import BatchRunner
from xtalkcal.timeline import envelope_values

__all__ = ["PairResult", "CalibrationResult", "risk_map", "calibrate_chip", "ring_around"]

# Rise of the signal above the floor at which rings are placed: probabilities stay in
# the near-quadratic part of sin² (< 10 % off), Stark phases well inside ±π/2.
RISE_PROBABILITY = 0.2
RISE_STARK_RAD = 0.6
# Prior used before the survey: the strongest crosstalk we plan for (DESIGN.md: −20 dB).
STRONGEST_DB = -20.0
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
    # Per sweep key: (victims, C, stderr) with C[i, k] the field at victim i from victim
    # k's line at the aggressor's frequency (X_ik(f_j)), measured in the column sweep.
    couplings: dict[str, tuple[tuple[str, ...], np.ndarray, np.ndarray]] = field(
        default_factory=dict)

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
    for key, (victims, C, _err) in result.couplings.items():
        f = float(result.sweeps[key].attrs["frequency_ghz"])
        for i, v in enumerate(victims):
            for k, u in enumerate(victims):
                if i != k and np.isfinite(C[i, k]):
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


def _stark_gain(probe: ColumnProbe, victim: str) -> float:
    """Stark phase (rad) per |z|² of the victim's own line playing the train (nominal chip)."""
    chip = probe.chip
    q = chip.qubit(victim)
    g = chip.line_of(victim).rabi_mhz * 1e-3
    d, a = probe.freq_ghz - q.f01_ghz, q.anharmonicity_ghz
    coef = a / (2 * d * (d - a))  # δ = Ω²·coef (Krantz et al. 2019)
    e2 = 0.0
    for _, length, env in probe._train_slots():
        t = np.linspace(0, length, 2001)
        e2 += float(np.trapezoid(np.abs(envelope_values(env, length, t)) ** 2, t))
    return abs(2 * np.pi * g * g * coef * e2)


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
                    # Column-parallel: the tones already found for this aggressor play
                    # during later passes, so their leaks are nulled too.
                    fixed = tuple(
                        (chip.line_of(p.victim).name, -p.x * pass_amplitude(protocol, chip, line))
                        for p in result.pairs
                        if column_parallel and p.aggressor == line and p.accepted and p.nulled
                    )
                    _calibrate_pass(rig, runner, protocol, result, line, victims_of_pass,
                                    [methods[v] for v in victims_of_pass], shape,
                                    stark=(gi == 1), say=say, fixed=fixed,
                                    key_prefix=key_prefix,
                                    force=tuple((null_victims or {}).get(line, ())))
    result.shots = runner.shots_executed + runner.shots_resumed
    result.rig_seconds = runner.rig_seconds
    return result


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

    Stark victims: where the victim line's own Stark phase reaches ~2×RISE_STARK_RAD
    (nominal chip values); resonant victims: 1.5× the null of the strongest crosstalk we
    plan for. Never more than 45 % of the victim line's limit.
    """
    chip = probe.chip
    out = np.empty(len(probe.victims))
    for i, (v, m) in enumerate(zip(probe.victims, probe.methods, strict=True)):
        if m == "stark":
            out[i] = math.sqrt(RISE_STARK_RAD * 2 / _stark_gain(probe, v))
        else:
            out[i] = probe.amplitude * 10 ** (STRONGEST_DB / 20) * 1.5
        out[i] = min(out[i], 0.45 * chip.amplitude_limit(chip.line_of(v).name))
    return out


def pass_amplitude(protocol: Protocol, chip: Chip, line: str) -> float:
    """Peak amplitude of the aggressor pulses of ``line`` (fraction of full scale)."""
    return protocol.pulse.aggressor_fraction * chip.amplitude_limit(line)


def _calibrate_pass(rig, runner, protocol, result, line, victims, methods, shape, *, stark, say,
                    fixed=(), key_prefix="", force=()):
    chip = rig.chip
    amp = pass_amplitude(protocol, chip, line)
    base = ColumnProbe(chip, line, tuple(victims), amplitude=amp, repeats=1,
                       methods=tuple(methods), shape=shape)
    spacing = base.spacing_ns
    if stark:
        K = max(1, int(protocol.survey.max_train_ns // shape.duration_ns))
    else:
        # Largest per-pulse rotation we plan for (strongest crosstalk, leakage √2):
        # keep K·θ ≤ π/4 so a null up to 2× that radius stays unambiguous.
        theta = max(base.expected_rotation_per_pulse(v, STRONGEST_DB) for v in victims)
        K = max(1, min(int((math.pi / 4) / theta), int(protocol.survey.max_train_ns // spacing)))
    probe = ColumnProbe(chip, line, tuple(victims), amplitude=amp, repeats=K,
                        methods=tuple(methods), shape=shape, merged=stark, fixed=fixed)
    f = probe.freq_ghz
    V = len(victims)
    radius = survey_radii(probe)
    tag = f"{line}-{'stark' if stark else 'res'}"
    if tag in result.sweeps:  # pair-by-pair passes: one record per victim
        tag = f"{tag}-{victims[0]}"
    pts_all: list[np.ndarray] = []
    sig_all: list[np.ndarray] = []
    err_all: list[np.ndarray] = []
    shots_all: list[np.ndarray] = []
    round_all: list[np.ndarray] = []

    def measure(points: np.ndarray, shots: int, key: str, rnd: int) -> None:
        s = measure_probe(runner, probe, points, shots, key_prefix + key)
        pts_all.append(points)
        sig_all.append(s.signal)
        err_all.append(s.stderr)
        shots_all.append(s.shots)
        round_all.append(np.full(points.shape[0], rnd))

    def fit():
        Z = np.vstack(pts_all).T  # (V, n)
        S = np.vstack(sig_all).T
        E = np.vstack(err_all).T.copy()
        # Once a victim has two rings centred near its null, the wide survey ring is
        # dropped from its fit (a weight of ~0): signals are symmetric in |z − z*| but
        # not exactly quadratic, and mixing radii far apart would bias z*.
        rnd = np.concatenate(round_all)
        if rnd.max() >= 2:
            E[np.ix_(searched, rnd == 0)] *= 1e6
        # The other victims' tones are in the model (fit_paraboloid_column): each null is
        # that of the aggressor's leak alone, and the couplings between the victims'
        # lines at this frequency come out too. Weak non-quadratic terms remain: the
        # covariance is scaled by the reduced chi-square (Birge ratio) instead of
        # rejecting the fit for them.
        # Stark signals are referred to one reference measurement per batch (round):
        # each round gets its own offset, which absorbs that shared error.
        groups = np.zeros(Z.shape, dtype=np.int64)
        groups[stark_rows] = rnd
        return _ColumnFit(fit_paraboloid_column(Z, S, E, groups=groups, rules=_RULES))

    searched = np.zeros(V, bool)  # victims whose null is being searched
    stark_rows = np.array([m == "stark" for m in methods])
    n_ring = ring_points_for(V, protocol.survey.ring_points)
    n_null = ring_points_for(V, protocol.null.points_per_ring)
    # Rings longer than the protocol asks for (to keep victims apart) share the same
    # shots per ring: every victim gets the information the protocol intends per round,
    # and a column's cost does not grow with its number of victims.
    survey_shots = _shots_per_point(protocol.survey.shots, protocol.survey.ring_points, n_ring)
    null_shots = _shots_per_point(protocol.null.shots_per_point, protocol.null.points_per_ring,
                                  n_null)
    measure(ring_around(np.zeros(V, complex), radius, n_ring), survey_shots,
            f"{tag}-survey", 0)
    est = fit()
    survey_time = rig.now()
    thr = 10 ** (protocol.survey.threshold_db / 20)
    selected = np.zeros(V, bool)
    for i in range(V):
        e = est.estimate(i)
        if e.accepted:
            x = -e.z_star / amp
            sx = e.position_stderr * math.sqrt(_birge(e)) / amp
            selected[i] = abs(x) + 2 * sx >= thr or victims[i] in force
        else:
            # "No signal" means |X| is small against the ring: bound it from the floor.
            selected[i] = False
    say(f"{line}: K={K}, survey of {V} victims, {int(selected.sum())} above "
        f"{protocol.survey.threshold_db:g} dB")
    target = 10 ** (protocol.null.target_residual_db / 20) * amp / 2
    centre = np.array([est.estimate(i).z_star if est.estimate(i).accepted else 0j
                       for i in range(V)])
    searched[:] = selected
    budget = protocol.null.shot_budget
    spent = sum(int(s.sum()) for s in shots_all) // max(V, 1)
    rounds = 0
    while selected.any() and rounds < protocol.null.max_rounds and spent < budget:
        rounds += 1
        est = fit()
        rad = np.zeros(V)
        done = np.ones(V, bool)
        for i in range(V):
            e = est.estimate(i)
            if selected[i] and e.accepted:
                centre[i] = e.z_star
                rise = RISE_STARK_RAD if methods[i] == "stark" else RISE_PROBABILITY
                rad[i] = min(math.sqrt(rise / max(e.curvature, 1e-12)), radius[i])
                done[i] = e.position_stderr * math.sqrt(_birge(e)) <= target
            elif selected[i]:
                rad[i] = radius[i]
                done[i] = False
            else:
                rad[i] = 0.0
        if done.all():
            break
        pts = ring_around(centre, rad, n_null, phase0=math.pi / n_null * rounds)
        measure(pts, null_shots, f"{tag}-null{rounds:02d}", rounds)
        spent = sum(int(s.sum()) for s in shots_all) // max(V, 1)
    est = fit()
    now = rig.now()
    result.couplings[tag] = (tuple(victims), est.fit.couplings, est.fit.couplings_stderr)
    for i, v in enumerate(victims):
        e = est.estimate(i)
        nshots = int(np.vstack(shots_all)[:, i].sum())
        if e.accepted:
            x = -e.z_star / amp
            cov = np.asarray(e.covariance) * _birge(e) / amp**2
            result.pairs.append(PairResult(line, v, methods[i], f, True, "", complex(x), cov,
                                           bool(selected[i]), nshots, K,
                                           now if selected[i] else survey_time,
                                           "null" if selected[i] else "survey", tag,
                                           float(e.reduced_chi2)))
        else:
            result.pairs.append(PairResult(line, v, methods[i], f, False, e.reason.value, None,
                                           None, False, nshots, K, survey_time, "survey", tag,
                                           float(e.reduced_chi2)))
    Z = np.vstack(pts_all)
    result.sweeps[tag] = xr.Dataset(
        {
            "z_re": (("point", "victim"), Z.real, {"units": "fraction of full scale",
                                                   "long_name": "cancellation tone, real part"}),
            "z_im": (("point", "victim"), Z.imag, {"units": "fraction of full scale",
                                                   "long_name": "cancellation tone, imag part"}),
            "signal": (("point", "victim"), np.vstack(sig_all), {"long_name": "error signal"}),
            "stderr": (("point", "victim"), np.vstack(err_all), {"long_name": "standard error"}),
            "shots": (("point", "victim"), np.vstack(shots_all), {"units": "shots"}),
            "round": (("point",), np.concatenate(round_all), {"long_name": "search round"}),
            "coupling_re": (("victim", "from_victim"), est.fit.couplings.real,
                            {"long_name": "field at victim from from_victim's line, real part",
                             "units": "relative to the victim's own line"}),
            "coupling_im": (("victim", "from_victim"), est.fit.couplings.imag,
                            {"long_name": "same, imaginary part",
                             "units": "relative to the victim's own line"}),
        },
        coords={"victim": list(victims), "from_victim": list(victims)},
        attrs={"aggressor": line, "frequency_ghz": f, "repeats": K, "aggressor_amplitude": amp,
               "methods": ",".join(methods), "rig": rig.describe(),
               "spacing_ns": probe.spacing_ns},
    )


def _shots_per_point(nominal: int, nominal_points: int, points: int) -> int:
    """Shots per point that keep a ring's total at ``nominal × nominal_points``."""
    return max(50, int(round(nominal * max(nominal_points, 1) / points)))


@dataclass(frozen=True)
class _ColumnFit:
    fit: ColumnNullFit

    def estimate(self, i: int):
        return self.fit.estimates[i]


def _birge(e) -> float:
    """max(1, reduced chi-square): the factor that makes a covariance honest."""
    chi = e.reduced_chi2
    return max(1.0, float(chi)) if math.isfinite(chi) else 1.0


def _slice(counts, a: int, b: int):
    from xtalkcal.rig import Counts

    return Counts(counts.qubits, counts.counts[a:b], counts.shots, counts.started_s,
                  counts.finished_s)
