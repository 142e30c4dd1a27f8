"""A seeded generator of invented simulated-device files: a family of chips to test on.

:func:`generate_device` turns a :class:`FamilyParams` and a seed into a device document
(a TOML-shaped dict, version 2 of :mod:`simulated_device.device`); :func:`write_device`
writes it. Same parameters and seed, same document; every document loads with
:func:`simulated_device.device.load_device`. All values are invented, spanning ranges that
are common practice for fixed-frequency transmon chips (values from memory, not measured).

How a chip is drawn
-------------------
* **Layout.** N qubits on a square grid (⌈√N⌉ columns, filled row by row), a line, or a
  heavy-hex lattice (the hexagonal lattice with a qubit on every vertex and on every edge,
  so that vertex qubits have three neighbours and edge qubits two; drawn as rows of qubits
  joined by one bridge qubit every fourth column, the bridges of successive row gaps offset
  by two columns, each hexagon of 12 qubits), one site per unit of distance; the distance of
  two qubits is Euclidean, in sites, and nearest neighbours are one site apart in every
  layout.
* **Frequency plan.** Every f01 lies in ``band_ghz`` on a 1 MHz raster, anharmonicities
  in ``anharmonicity_ghz``. For an aggressor a and a victim v (f12 = f01 + α, the
  two-photon 0–2 frequency f02/2 = f01 + α/2), three hazards:

  - *leakage*: ``10 MHz ≤ |f01(a) − f12(v)| ≤ 40 MHz``, either side;
  - *near resonance*: ``5 MHz ≤ |f01(a) − f01(v)| ≤ 30 MHz``;
  - *two-photon*: ``|f01(a) − f02(v)/2| ≤ 3 MHz``.

  The requested number of each is placed on distinct nearest-neighbour pairs (distance
  1); every other ordered pair within ``clear_radius`` is kept clear of all three:
  ``|f01(a) − f12(v)| ≥ 60 MHz``, ``|f01(a) − f01(v)| ≥ 50 MHz``,
  ``|f01(a) − f02(v)/2| ≥ 25 MHz`` (a hazard pair is also clear of the two other kinds,
  both ways). Pairs farther apart than ``clear_radius`` are not constrained (their
  crosstalk is weak), so an accidental hazard may fall there.
* **Crosstalk.** Every ordered pair gets |X| in dB of ``nearest_db − falloff_db·(d − 1)``
  plus a Gaussian spread, at most ``strongest_db``; pairs below ``omit_below_db`` are left
  out. Phases uniform on (−180°, 180°], delays uniform on ``delay_ns``.
* **Drift.** Every listed coupling gets its own phase and log-magnitude random walk
  (diffusion ``σ²`` with σ the given walk per √h, times a log-normal factor of spread
  ``walk_spread``), a linear phase rate on a fraction ``linear_fraction`` of pairs, and one
  step of ``step_db`` (and ``step_phase_deg``) at each of ``step_hours``, each on a
  different pair of |X| ≥ −40 dB, chosen at random.
* **Readout and coherence.** T1 uniform in ``t1_us``; T2 = T1·u, u uniform in
  ``t2_over_t1`` (at most 2, so T2 ≤ 2·T1); readout errors drawn per qubit.
* **Limits.** ``[limits]`` with a per-line amplitude limit and an average-power limit; every
  line has ``full_scale_dbm``.
* **Exchange** (off by default). With ``exchange_mhz = (lo, hi)``, hi > 0, every
  nearest-neighbour pair (distance 1) gets an ``[[exchange]]`` J uniform in that range, drawn
  from a stream of its own (the rest of the chip is the one drawn without it); the document
  is then version 3 with ``[paths] envelope_delay = false`` (the leak model of version 2).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Literal

import numpy as np
import tomli_w

__all__ = [
    "FamilyParams",
    "HAZARD_KINDS",
    "generate_device",
    "write_device",
    "layout_positions",
    "pair_hazards",
    "DEFAULT_HAZARD_WINDOWS_MHZ",
    "CLEAR_MARGINS_MHZ",
]

HAZARD_KINDS = ("leakage", "near_resonant", "two_photon")
LAYOUTS = ("grid", "line", "heavy-hex")
#: Largest chip the generator draws (a 1000-qubit file holds ~10⁵ couplings, ~10 MB).
MAX_QUBITS = 1000
#: Hazard windows (MHz) on |detuning|: (smallest, largest).
DEFAULT_HAZARD_WINDOWS_MHZ = {"leakage": (10.0, 40.0), "near_resonant": (5.0, 30.0),
                              "two_photon": (0.0, 3.0)}
#: A pair is clear of a hazard kind when its |detuning| is at least this (MHz).
CLEAR_MARGINS_MHZ = {"leakage": 60.0, "near_resonant": 50.0, "two_photon": 25.0}
_RASTER_MHZ = 1.0
_ATTEMPTS = 1000  # frequency plans tried before giving up
_STEP_PAIR_DB = -40.0  # steps go on pairs at least this strong


@dataclass(frozen=True)
class FamilyParams:
    """What a generated chip looks like (module docstring); the seed picks one chip.

    Parameters
    ----------
    n_qubits : int
        Number of qubits (2 … :data:`MAX_QUBITS`).
    layout : {"grid", "line", "heavy-hex"}
        Placement of the qubits; distances are counted in sites.
    leakage_hazards, near_resonant_hazards, two_photon_hazards : int
        How many nearest-neighbour pairs carry each hazard.
    clear_radius : float
        Ordered pairs up to this distance are kept clear of unrequested hazards.
    band_ghz, anharmonicity_ghz : (float, float)
        Ranges of f01 and of the anharmonicity α (< 0).
    nearest_db, falloff_db, spread_db, strongest_db, omit_below_db : float
        Crosstalk magnitude: median at distance 1, fall per site, Gaussian spread (dB),
        the largest allowed and the level below which a pair is omitted.
    delay_ns : (float, float)
        Range of the extra delay of a leak path.
    phase_walk_rad_per_sqrt_h, magnitude_walk_per_sqrt_h : float
        Random walk of each coupling's phase (rad/√h) and log-magnitude (1/√h); 0 for none.
    walk_spread : float
        Log-normal spread of each pair's walk around those values (0: all equal).
    linear_fraction : float
        Fraction of couplings with a linear phase drift, of rate uniform in
        ±``linear_rate_rad_per_hour``.
    step_hours : tuple of float
        Times (h) of step changes, one pair each.
    step_db, step_phase_deg : float
        Each step's change of |X| (dB) and arg X (deg).
    qubit_wander_mhz, qubit_wander_hours : float
        Ornstein–Uhlenbeck wander of every f01 (0: none).
    t1_us, t2_over_t1 : (float, float)
        Ranges of T1 and of T2/T1 (≤ 2).
    rabi_mhz : (float, float)
        Range of each line's Rabi frequency at amplitude 1.
    line_max_amplitude, max_amplitude, max_average_power_dbm, full_scale_dbm : float
        The limits: per line, for the chip, average power, and each line's full scale.
    """

    n_qubits: int = 9
    layout: Literal["grid", "line", "heavy-hex"] = "grid"
    leakage_hazards: int = 1
    near_resonant_hazards: int = 1
    two_photon_hazards: int = 1
    clear_radius: float = 1.5
    band_ghz: tuple[float, float] = (4.5, 5.5)
    anharmonicity_ghz: tuple[float, float] = (-0.23, -0.19)
    nearest_db: float = -25.0
    falloff_db: float = 10.0
    spread_db: float = 3.0
    strongest_db: float = -15.0
    omit_below_db: float = -60.0
    delay_ns: tuple[float, float] = (0.0, 8.0)
    phase_walk_rad_per_sqrt_h: float = 0.0
    magnitude_walk_per_sqrt_h: float = 0.0
    walk_spread: float = 0.5
    linear_fraction: float = 0.0
    linear_rate_rad_per_hour: float = 3e-3
    step_hours: tuple[float, ...] = ()
    step_db: float = 3.0
    step_phase_deg: float = 0.0
    qubit_wander_mhz: float = 0.0
    qubit_wander_hours: float = 2.0
    t1_us: tuple[float, float] = (40.0, 110.0)
    t2_over_t1: tuple[float, float] = (0.5, 1.5)
    rabi_mhz: tuple[float, float] = (40.0, 55.0)
    line_max_amplitude: float = 0.8
    max_amplitude: float = 0.9
    max_average_power_dbm: float = -40.0
    full_scale_dbm: float = -25.0
    exchange_mhz: tuple[float, float] = (0.0, 0.0)

    def __post_init__(self) -> None:
        problems = []
        if not 2 <= self.n_qubits <= MAX_QUBITS:
            problems.append(f"n_qubits = {self.n_qubits}; accepted: 2 … {MAX_QUBITS}")
        if self.layout not in LAYOUTS:
            problems.append(f"layout = {self.layout!r}; accepted: "
                            + ", ".join(repr(k) for k in LAYOUTS))
        if min(self.hazard_counts().values()) < 0:
            problems.append("hazard counts must be ≥ 0")
        if not -60.0 <= self.omit_below_db < self.strongest_db <= 0.0:
            problems.append("need −60 ≤ omit_below_db < strongest_db ≤ 0 (dB)")
        if not 0.0 <= self.delay_ns[0] <= self.delay_ns[1] <= 100.0:
            problems.append("delay_ns must be an ordered range within 0 … 100 ns")
        if not 0.0 < self.t2_over_t1[0] <= self.t2_over_t1[1] <= 2.0:
            problems.append("t2_over_t1 must be an ordered range within (0, 2]")
        if not 0.0 <= self.linear_fraction <= 1.0:
            problems.append("linear_fraction must be within 0 … 1")
        if abs(self.step_db) > 40.0 or any(not 0.0 <= t <= 1e6 for t in self.step_hours):
            problems.append("step_db within ±40 dB and step_hours within 0 … 1e6 h")
        if not 0.0 < self.line_max_amplitude <= 1.0 or not 0.0 < self.max_amplitude <= 1.0:
            problems.append("amplitude limits must be within (0, 1]")
        if not 0.0 <= self.exchange_mhz[0] <= self.exchange_mhz[1] <= 50.0:
            problems.append("exchange_mhz must be an ordered range within 0 … 50 MHz")
        if problems:
            raise ValueError("FamilyParams: " + "; ".join(problems))

    def hazard_counts(self) -> dict[str, int]:
        """Requested hazards per kind."""
        return {"leakage": self.leakage_hazards, "near_resonant": self.near_resonant_hazards,
                "two_photon": self.two_photon_hazards}


def layout_positions(n: int, layout: str) -> np.ndarray:
    """Site coordinates (n, 2) of the qubits: a square grid filled row by row, a line, or a
    heavy-hex lattice (module docstring) filled row by row, each row's bridges after it."""
    if layout == "line":
        return np.column_stack([np.arange(n, dtype=float), np.zeros(n)])
    if layout == "heavy-hex":
        return _heavy_hex_positions(n)
    cols = math.ceil(math.sqrt(n))
    k = np.arange(n)
    return np.column_stack([(k % cols).astype(float), (k // cols).astype(float)])


def _heavy_hex_positions(n: int) -> np.ndarray:
    """Heavy-hex sites: rows of ``width`` qubits two sites apart in y, and between rows r and
    r+1 a bridge qubit at every column ≡ 2·(r mod 2) (mod 4). Rows are about twice as long
    as there are rows (a roughly square patch: N ≈ 2.5·rows²)."""
    rows = max(1, round(math.sqrt(n / 2.5)))
    width = max(5, math.ceil(n / (1.25 * rows)))
    width += (1 - width % 4) % 4  # width ≡ 1 (mod 4): every row ends on a bridge column
    sites: list[tuple[float, float]] = []
    r = 0
    while len(sites) < n:
        sites += [(float(c), 2.0 * r) for c in range(width)]
        sites += [(float(c), 2.0 * r + 1.0) for c in range(2 * (r % 2), width, 4)]
        r += 1
    return np.asarray(sites[:n], dtype=float)


def pair_hazards(f_a: float, f_v: float, alpha_v: float,
                 windows: dict[str, tuple[float, float]] | None = None) -> list[str]:
    """Hazard kinds of aggressor frequency ``f_a`` on a victim (f01 ``f_v``, α ``alpha_v``).

    All in GHz; the windows (MHz) default to :data:`DEFAULT_HAZARD_WINDOWS_MHZ`.
    """
    w = windows or DEFAULT_HAZARD_WINDOWS_MHZ
    d = _detunings_mhz(np.asarray(f_a, float), f_v, alpha_v)
    return [k for k in HAZARD_KINDS if w[k][0] - 1e-6 <= abs(float(d[k])) <= w[k][1] + 1e-6]


def _detunings_mhz(f_a: np.ndarray, f_v: float, alpha_v: float) -> dict[str, np.ndarray]:
    """Signed detunings (MHz) of aggressor frequencies from a victim's three transitions."""
    return {"leakage": 1e3 * (f_a - (f_v + alpha_v)),
            "near_resonant": 1e3 * (f_a - f_v),
            "two_photon": 1e3 * (f_a - (f_v + alpha_v / 2))}


def _allowed(cand: np.ndarray, alpha: float, f_other: float, alpha_other: float,
             wanted: str | None, wanted_as_aggressor: bool) -> np.ndarray:
    """Mask of candidate f01 (GHz) keeping one pair's relations, both ways.

    ``wanted`` is the hazard the pair must carry (None: clear of all), with the candidate
    as its aggressor or its victim.
    """
    ok = np.ones(cand.shape, bool)
    as_agg = _detunings_mhz(cand, f_other, alpha_other)  # candidate drives the other
    # The other drives the candidate: detunings of f_other from the candidate's levels.
    as_victim = {"leakage": 1e3 * (f_other - (cand + alpha)),
                 "near_resonant": 1e3 * (f_other - cand),
                 "two_photon": 1e3 * (f_other - (cand + alpha / 2))}
    for direction, det in ((True, as_agg), (False, as_victim)):
        for kind in HAZARD_KINDS:
            mag = np.abs(det[kind])
            if kind == wanted and direction == wanted_as_aggressor:
                lo, hi = DEFAULT_HAZARD_WINDOWS_MHZ[kind]
                ok &= (mag >= lo) & (mag <= hi)
            elif not (kind == wanted == "near_resonant"):  # symmetric: one window, not two
                ok &= mag >= CLEAR_MARGINS_MHZ[kind]
    return ok


def _choose_hazard_pairs(rng: np.random.Generator, dist: np.ndarray, p: FamilyParams
                         ) -> dict[tuple[int, int], str]:
    """Distinct nearest-neighbour pairs (aggressor, victim) for each requested hazard;
    ``dist`` is the (n, n) matrix of site distances."""
    nearest = [(int(i), int(j)) for i, j in zip(*np.nonzero(np.abs(dist - 1.0) < 1e-9),
                                                strict=True) if i < j]
    wanted = [k for k, c in p.hazard_counts().items() for _ in range(c)]
    if len(wanted) > len(nearest):
        raise ValueError(f"{len(wanted)} hazards asked for but the layout has only "
                         f"{len(nearest)} nearest-neighbour pairs")
    order = rng.permutation(len(nearest))[: len(wanted)]
    out = {}
    for kind, k in zip(wanted, order, strict=True):
        i, j = nearest[k]
        out[(i, j) if rng.random() < 0.5 else (j, i)] = kind
    return out


def _frequency_plan(rng: np.random.Generator, pos: np.ndarray, alphas: np.ndarray,
                    p: FamilyParams) -> tuple[np.ndarray, dict[tuple[int, int], str]]:
    """f01 of every qubit (GHz) and the hazard pairs, keeping the hazards asked for and
    every other close pair clear; each attempt places the hazards afresh, then the qubits
    one by one in layout order, each uniformly among the frequencies left to it."""
    n = len(pos)
    lo, hi = p.band_ghz
    cand = np.round(np.arange(lo, hi + 1e-9, _RASTER_MHZ * 1e-3), 6)
    dist = np.linalg.norm(pos[:, None, :] - pos[None, :, :], axis=2)
    for _ in range(_ATTEMPTS):
        hazards = _choose_hazard_pairs(rng, dist, p)
        f = np.full(n, np.nan)
        for q in range(n):  # row by row: each qubit meets a few placed neighbours
            ok = np.ones(cand.shape, bool)
            for o in np.flatnonzero(~np.isnan(f) & (dist[q] <= max(p.clear_radius, 1.0) + 1e-9)):
                kind = hazards.get((q, o)) or hazards.get((o, q))
                if kind is None and dist[q, o] > p.clear_radius + 1e-9:
                    continue
                ok &= _allowed(cand, alphas[q], f[o], alphas[o], kind, (q, o) in hazards)
            if not ok.any():
                break
            f[q] = rng.choice(cand[ok])
        else:
            return f, hazards
    raise ValueError(f"no frequency plan found in {_ATTEMPTS} attempts for {p}: widen "
                     "band_ghz, lower clear_radius or ask for fewer hazards")


def _readout(rng: np.random.Generator) -> list[list[float]]:
    """P(assigned | level) for levels 0, 1, 2 (rows sum to 1, 4 decimals)."""
    e10, e01, e21 = rng.uniform(0.01, 0.04), rng.uniform(0.03, 0.07), rng.uniform(0.003, 0.01)
    e02, e12 = rng.uniform(0.005, 0.02), rng.uniform(0.05, 0.1)
    rows = [[1 - e10 - 0.001, e10, 0.001], [e01, 1 - e01 - e21, e21], [e02, e12, 1 - e02 - e12]]
    out = []
    for r in rows:
        b, c = round(r[1], 4), round(r[2], 4)
        out.append([round(1.0 - b - c, 4), b, c])
    return out


def _qubits(rng: np.random.Generator, f01: np.ndarray, alphas: np.ndarray, p: FamilyParams
            ) -> list[dict[str, Any]]:
    out = []
    for i, (f, a) in enumerate(zip(f01, alphas, strict=True)):
        t1 = rng.uniform(*p.t1_us)
        t2 = min(t1 * rng.uniform(*p.t2_over_t1), 2.0 * t1)
        out.append({"name": f"q{i}", "f01_ghz": float(f), "anharmonicity_ghz": float(a),
                    "t1_us": round(t1, 1), "t2_us": round(min(t2, 2 * round(t1, 1)), 1),
                    "readout": _readout(rng)})
    return out


def _lines(rng: np.random.Generator, n: int, p: FamilyParams) -> list[dict[str, Any]]:
    return [{"name": f"q{i}-line", "qubit": f"q{i}", "rabi_mhz": round(rng.uniform(*p.rabi_mhz), 2),
             "max_amplitude": p.line_max_amplitude, "full_scale_dbm": p.full_scale_dbm,
             "self_delay_ns": round(rng.uniform(-0.3, 0.3), 3),
             "self_slope_db_per_ghz": round(rng.uniform(-1.5, 1.5), 2)} for i in range(n)]


def _couplings(rng: np.random.Generator, pos: np.ndarray, p: FamilyParams
               ) -> list[dict[str, Any]]:
    """Every ordered pair above ``omit_below_db``, in (line, qubit) order."""
    n = len(pos)
    out = []
    for j in range(n):  # aggressor line q{j}-line
        dist = np.linalg.norm(pos - pos[j], axis=1)
        for i in range(n):  # victim q{i}; scalar draws, in the order every seed was made with
            if i == j:
                continue
            db = p.nearest_db - p.falloff_db * (dist[i] - 1.0) + rng.normal(0.0, p.spread_db)
            db = min(float(db), p.strongest_db)
            phase = rng.uniform(-180.0, 180.0)
            delay = rng.uniform(*p.delay_ns)
            if db < p.omit_below_db:
                continue
            out.append({"line": f"q{j}-line", "qubit": f"q{i}", "crosstalk_db": round(db, 2),
                        "phase_deg": round(phase, 1), "delay_ns": round(delay, 2)})
    return out


def _add_drift(rng: np.random.Generator, doc: dict[str, Any], p: FamilyParams) -> None:
    """Per-pair walks and linear rates, the steps and the qubit wander (module docstring)."""
    couplings = doc["couplings"]
    for c in couplings:
        spread = math.exp(rng.normal(0.0, p.walk_spread)) if p.walk_spread else 1.0
        if p.phase_walk_rad_per_sqrt_h:
            c["phase_diffusion_rad2_per_hour"] = float(
                f"{(p.phase_walk_rad_per_sqrt_h * spread) ** 2:.4g}")
        spread = math.exp(rng.normal(0.0, p.walk_spread)) if p.walk_spread else 1.0
        if p.magnitude_walk_per_sqrt_h:
            c["log_magnitude_diffusion_per_hour"] = float(
                f"{(p.magnitude_walk_per_sqrt_h * spread) ** 2:.4g}")
        if rng.random() < p.linear_fraction:
            c["phase_rate_rad_per_hour"] = float(
                f"{rng.uniform(-1, 1) * p.linear_rate_rad_per_hour:.4g}")
    strong = [c for c in couplings if c["crosstalk_db"] >= _STEP_PAIR_DB] or couplings
    if p.step_hours:
        if len(p.step_hours) > len(strong):
            raise ValueError(f"{len(p.step_hours)} steps but only {len(strong)} pairs to step")
        chosen = rng.permutation(len(strong))[: len(p.step_hours)]
        doc["steps"] = [{"at_hours": float(t), "line": strong[k]["line"],
                         "qubit": strong[k]["qubit"], "crosstalk_db_change": p.step_db,
                         "phase_deg_change": p.step_phase_deg}
                        for t, k in zip(p.step_hours, chosen, strict=True)]
    if p.qubit_wander_mhz:
        doc["drift"] = {"qubit_wander_mhz": p.qubit_wander_mhz,
                        "qubit_wander_hours": p.qubit_wander_hours}


def generate_device(params: FamilyParams, seed: int) -> dict[str, Any]:
    """An invented device document (TOML-shaped dict) from ``params`` and ``seed``.

    Raises
    ------
    ValueError
        If the layout cannot hold the hazards asked for, or no frequency plan is found.
    """
    if not isinstance(seed, (int, np.integer)) or not 0 <= seed < 2**63:
        raise ValueError(f"seed must be an integer in [0, 2**63), got {seed!r}")
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), params.n_qubits]))
    pos = layout_positions(params.n_qubits, params.layout)
    alphas = np.round(rng.uniform(*params.anharmonicity_ghz, size=params.n_qubits), 3)
    f01, _ = _frequency_plan(rng, pos, alphas, params)
    doc: dict[str, Any] = {
        "format": "xtalkcal-simdevice",
        "version": 2,
        "name": f"family-{params.layout}{params.n_qubits}-{int(seed)}",
        "seed": int(seed),
        "levels": 3,
        "repetition_us": 100.0,
        "electronics": {"amplitude_jitter": 5e-4, "phase_jitter_rad": 1e-3, "jitter_groups": 1},
        "limits": {"max_amplitude": params.max_amplitude,
                   "max_average_power_dbm": params.max_average_power_dbm},
        "qubits": _qubits(rng, f01, alphas, params),
        "lines": _lines(rng, params.n_qubits, params),
        "couplings": _couplings(rng, pos, params),
    }
    _add_drift(rng, doc, params)
    if params.exchange_mhz[1] > 0.0:
        erng = np.random.default_rng(np.random.SeedSequence([int(seed), params.n_qubits, 3]))
        doc["version"] = 3
        doc["paths"] = {"envelope_delay": False}
        doc["exchange"] = [
            {"qubit_a": f"q{a}", "qubit_b": f"q{b}",
             "j_mhz": round(float(erng.uniform(*params.exchange_mhz)), 3) or 0.001}
            for a in range(params.n_qubits) for b in range(a + 1, params.n_qubits)
            if abs(np.linalg.norm(pos[a] - pos[b]) - 1.0) < 1e-9]
    return doc


def write_device(doc: dict[str, Any], path: str | Path, params: FamilyParams | None = None
                 ) -> Path:
    """Write a generated document as a device file (TOML); the parameters as a comment."""
    path = Path(path)
    head = "# Invented simulated device, generated by simulated_device.family.\n"
    if params is not None:
        head += "".join(f"# {k} = {v!r}\n" for k, v in asdict(params).items())
    path.write_text(head + tomli_w.dumps(doc), encoding="utf-8")
    return path
