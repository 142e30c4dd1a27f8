"""What a calibration pass is asked to do (:class:`PassRequest`) and the fixed numbers it
sets itself before its first shot (:class:`PassPlan`).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from xtalkcal.calibrate.pass_data import shots_per_point
from xtalkcal.calibrate.plan import (
    STRONGEST_DB,
    chip_null_confidence,
    companion_radius,
    pass_amplitude,
    ring_around,
    ring_points_for,
    ring_radius_caps,
    stark_windows,
    survey_radii,
    two_photon_hazard,
    two_photon_stark_repeats,
)
from xtalkcal.calibrate.result import CalibrationResult
from xtalkcal.hardware import Chip
from xtalkcal.measure import ColumnProbe, Protocol, PulseShape

#: Receives one line of progress text.
Say = Callable[[str], None]


@dataclass(frozen=True)
class PassStart:
    """Where a pass without a survey starts (refinement from known nulls).

    ``centres`` and ``radii`` per victim (fraction of full scale), ``repeats`` the
    amplification K to use.
    """

    centres: tuple[complex, ...]
    radii: tuple[float, ...]
    repeats: int


@dataclass(frozen=True)
class PassRequest:
    """What one pass is asked to do.

    Attributes
    ----------
    line : str
        The aggressor line.
    victims : tuple of str
        The victims measured together.
    methods : tuple of str
        Per victim, how its error is read out (``"stark"`` or a resonant method).
    shape : PulseShape
        The aggressor pulse.
    stark : bool
        A Stark pass (one merged train) rather than a resonant one.
    companions : tuple of (str, complex)
        Tones of victims nulled in another pass, ringing around these settings.
    key_prefix : str
        Prefix of the batch keys.
    force : tuple of str
        Victims nulled whatever their survey says.
    nullable : tuple of str, optional
        If given, the only victims the pass may null; the others are surveyed and keep
        their survey estimates (a calibration of named pairs).
    start : PassStart, optional
        Start from known nulls instead of a survey.
    split : bool
        A resonant survey hands over the victims it cannot null jointly
        (:func:`hand_over`).
    survey_scale : float
        ≥ 1: the survey reaches this many times the strongest crosstalk planned for
        (``STRONGEST_DB``): a resonant survey ring this much wider at K this much lower,
        a Stark train this factor squared shorter (its ring widens by the factor at the
        same phase). For a victim whose first survey put its null outside the ring.
    """

    line: str
    victims: tuple[str, ...]
    methods: tuple[str, ...]
    shape: PulseShape
    stark: bool
    companions: tuple[tuple[str, complex], ...] = ()
    key_prefix: str = ""
    force: tuple[str, ...] = ()
    nullable: tuple[str, ...] | None = None
    start: PassStart | None = None
    split: bool = False
    survey_scale: float = 1.0

    def __post_init__(self) -> None:
        if not self.survey_scale >= 1.0:
            raise ValueError("survey_scale must be ≥ 1")
        for name in ("victims", "methods", "companions", "force"):
            object.__setattr__(self, name, tuple(getattr(self, name)))
        if self.nullable is not None:
            object.__setattr__(self, "nullable", tuple(self.nullable))


@dataclass(frozen=True)
class PassPlan:
    """The fixed numbers of a pass, set before its first shot (:func:`plan_pass`).

    Attributes
    ----------
    request : PassRequest
    protocol : Protocol
    chip : Chip
    amp : float
        Aggressor amplitude (fraction of full scale).
    probe : ColumnProbe
        The probe at the first K (survey, or the start's K).
    k_max : int
        Largest K the longest train allows.
    radius, cap : ndarray (V,)
        Survey ring radius and largest ring radius per victim.
    comp_centre, comp_radius : ndarray (C,)
        Centre and radius of each companion's ring.
    tag : str
        Key of the pass in the result's sweeps and couplings.
    n_ring, n_null : int
        Points of the survey ring and of a null ring.
    null_shots : int
        Shots per point of a null ring.
    target : float
        1σ null error at which the stop rule ends a victim's search.
    thr : float
        Survey threshold (linear |X|).
    coherent : ndarray of bool (V,)
        Resonant victims whose K pulses add up in phase.
    stark_rows : ndarray of bool (V,)
        Victims read out by a Stark phase.
    k_stark : int
        Stark pass: the K of its train at the protocol's full length (within the
        two-photon limit), to which the null rounds of a shortened survey return
        (0 for a resonant pass).
    """

    request: PassRequest
    protocol: Protocol
    chip: Chip
    amp: float
    probe: ColumnProbe
    k_max: int
    radius: np.ndarray
    cap: np.ndarray
    comp_centre: np.ndarray
    comp_radius: np.ndarray
    tag: str
    n_ring: int
    n_null: int
    null_shots: int
    target: float
    thr: float
    coherent: np.ndarray
    stark_rows: np.ndarray
    k_stark: int = 0

    @property
    def n_victims(self) -> int:
        return len(self.request.victims)

    @property
    def companion_names(self) -> tuple[str, ...]:
        return tuple(q for q, _ in self.request.companions)

    def rings(self, centre: np.ndarray, rad: np.ndarray, n: int, phase0: float = 0.0,
              comp_radius: np.ndarray | None = None) -> np.ndarray:
        """Ring points (n+1, V + C): the victims' rings, then the companions'.

        ``comp_radius``: the companions' ring radii (default: the first K's,
        ``self.comp_radius``; a raised K shrinks them, see
        :func:`xtalkcal.calibrate.stages.tone_radii`).
        """
        cr = self.comp_radius if comp_radius is None else np.asarray(comp_radius, float)
        return ring_around(np.concatenate([centre, self.comp_centre]),
                           np.concatenate([rad, cr]), n, phase0=phase0)


def plan_pass(chip: Chip, protocol: Protocol, result: CalibrationResult,
              request: PassRequest) -> PassPlan:
    """The fixed numbers of a pass: its first K and probe, ring sizes, radii and target.

    Parameters
    ----------
    chip : Chip
    protocol : Protocol
    result : CalibrationResult
        Names the pass apart from earlier ones of the same aggressor (``tag``).
    request : PassRequest
    """
    line, victims, methods, stark = request.line, request.victims, request.methods, request.stark
    amp = pass_amplitude(protocol, chip, line)
    base = ColumnProbe(chip, line, victims, amplitude=amp, repeats=1, methods=methods,
                       shape=request.shape)
    spacing = base.spacing_ns
    scale = float(request.survey_scale)
    k_stark = 0
    if stark:
        k_survey = max(1, int(protocol.survey.max_train_ns // request.shape.duration_ns
                              / scale**2))
        k_stark = max(1, int(protocol.survey.max_train_ns // request.shape.duration_ns))
        for v in victims:  # victims near their two-photon line: a short train
            if two_photon_hazard(chip, line, v, amp):
                k_survey = min(k_survey, two_photon_stark_repeats(
                    chip, line, v, amp, k_survey, request.shape))
                k_stark = min(k_stark, two_photon_stark_repeats(
                    chip, line, v, amp, k_stark, request.shape))
    else:
        # Largest per-pulse rotation we plan for (strongest crosstalk, leakage √2):
        # keep K·θ ≤ π/4 so a null up to 2× that radius stays unambiguous.
        theta = max(base.expected_rotation_per_pulse(v, STRONGEST_DB) for v in victims)
        k_survey = max(1, min(int((math.pi / 4) / (theta * scale)),
                              int(protocol.survey.max_train_ns // spacing)))
    K = int(request.start.repeats) if request.start is not None else k_survey
    comp_names = tuple(q for q, _ in request.companions)
    windows = (stark_windows(chip, line, victims, methods, amp, K, request.shape)
               if stark else ())
    probe = ColumnProbe(chip, line, victims, amplitude=amp, repeats=K, methods=methods,
                        shape=request.shape, merged=stark, companions=comp_names,
                        stark_windows_ns=windows)
    tag = f"{line}-{'stark' if stark else 'res'}"
    if tag in result.sweeps:  # pair-by-pair passes: one record per victim
        tag = f"{tag}-{victims[0]}"
    if scale > 1:  # a wider survey of a victim already measured
        tag = f"{tag}-wide{scale:g}"
    # Resonant rings widen with the survey; a Stark ring widens through its shorter train.
    widen = 1.0 if stark else scale
    lim = np.array([0.45 * chip.amplitude_limit(chip.line_of(v).name) for v in victims])
    # Rings longer than the protocol asks for (to keep victims apart) share the same
    # shots per ring: every victim gets the information the protocol intends per round,
    # and a column's cost does not grow with its number of victims.
    # A ring alone (the survey; the first ring at a raised K) must over-determine each
    # victim's column model: 3 + an offset + 4 per other varying tone, plus 2 to spare.
    tones_n = len(victims) + len(comp_names)
    least = 4 * tones_n + 2
    n_null = ring_points_for(tones_n, max(protocol.null.points_per_ring, least))
    return PassPlan(
        request=request, protocol=protocol, chip=chip, amp=amp, probe=probe,
        k_max=max(K, int(protocol.survey.max_train_ns // spacing)),
        radius=np.minimum(survey_radii(probe) * widen, lim),
        cap=np.minimum(ring_radius_caps(probe) * widen, lim),
        # Companion tones: a ring around their nulls as wide as a resonant victim's
        # survey ring (their own signal does not matter here; the ring only has to
        # reach the victims through the couplings).
        comp_centre=np.array([z for _, z in request.companions], dtype=complex),
        comp_radius=np.array([companion_radius(amp, chip, q, z)
                              for q, z in request.companions]),
        tag=tag,
        n_ring=ring_points_for(tones_n, max(protocol.survey.ring_points, least)),
        n_null=n_null,
        null_shots=shots_per_point(protocol.null.shots_per_point,
                                   protocol.null.points_per_ring, n_null),
        # Stop once the null's 1σ semi-major axis is target/k: |error| then stays below
        # the target residual with probability 1 − e^{−k²/2} per pair, k set so that
        # every pair of the chip does with ≥ 95 % (chip_null_confidence; ≥ 99 % each).
        target=10 ** (protocol.null.target_residual_db / 20) * amp / chip_null_confidence(
            len(chip.lines) * (len(chip.qubits) - 1)),
        thr=10 ** (protocol.survey.threshold_db / 20),
        coherent=np.array([not stark and probe.coherent(v) for v in victims]),
        stark_rows=np.array([m == "stark" for m in methods]),
        k_stark=max(k_stark, K) if stark else 0,
    )
