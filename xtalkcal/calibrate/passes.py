"""One calibration pass: a column of victims under one aggressor, from survey to stated nulls.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import xarray as xr

from xtalkcal.calibrate.plan import (
    JOINT_NULL_SPAN,
    NULL_CONFIDENCE,
    RING_MARGIN,
    RISE_PROBABILITY,
    RISE_STARK_RAD,
    STRONGEST_DB,
    _companion_radius,
    pass_amplitude,
    ring_around,
    ring_points_for,
    ring_radius_caps,
    stark_windows,
    survey_radii,
)
from xtalkcal.calibrate.result import PairResult
from xtalkcal.fits import ColumnNullFit, VerdictRules, fit_paraboloid_column, linearise_fringe
from xtalkcal.hardware import Rig
from xtalkcal.measure import BatchRunner, ColumnProbe

_RULES = VerdictRules(mismatch_pvalue=0.0)


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


@dataclass(frozen=True)
class PassStart:
    """Where a pass without a survey starts (refinement from known nulls).

    ``centres`` and ``radii`` per victim (fraction of full scale), ``repeats`` the
    amplification K to use.
    """

    centres: tuple[complex, ...]
    radii: tuple[float, ...]
    repeats: int


def calibrate_pass(rig, runner, protocol, result, line, victims, methods, shape, *, stark, say,
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
    null_shots = shots_per_point(protocol.null.shots_per_point, protocol.null.points_per_ring,
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
        measure(pts0, shots_per_point(protocol.survey.shots, protocol.survey.ring_points,
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


def shots_per_point(nominal: int, nominal_points: int, points: int) -> int:
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
    from xtalkcal.hardware import Counts

    return Counts(counts.qubits, counts.counts[a:b], counts.shots, counts.started_s,
                  counts.finished_s)
