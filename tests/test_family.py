"""The generated family of simulated devices (simulated_device.family).

Everything is checked from the written files, not from the generator's bookkeeping:
frequencies and anharmonicities are read back from the TOML text, distances recomputed
here from the layout's definition (square grid of ⌈√N⌉ columns filled row by row, or a
line), and the hazards recomputed with the windows of the issue's definitions: leakage
10–40 MHz from a neighbour's 1–2 transition f12 = f01 + α, near resonance 5–30 MHz in
f01, two-photon 0–2 within 3 MHz of (f01 + f12)/2 = f01 + α/2 (the two-photon 0–2
resonance of a transmon driven at half its 0–2 frequency: standard multi-level result).
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest
import tomli_w
import tomllib
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from simulated_device import SimRig, load_device
from simulated_device.family import (
    FamilyParams,
    generate_device,
    layout_positions,
    write_device,
)
from xtalkcal.cli import main

WINDOWS_MHZ = {"leakage": (10.0, 40.0), "near_resonant": (5.0, 30.0), "two_photon": (0.0, 3.0)}
MARGINS_MHZ = {"leakage": 60.0, "near_resonant": 50.0, "two_photon": 25.0}


def _positions(n: int, layout: str) -> list[tuple[float, float]]:
    if layout == "heavy-hex":  # the generator's sites; their graph is checked on its own below
        return [tuple(p) for p in layout_positions(n, layout)]
    if layout == "line":
        return [(float(i), 0.0) for i in range(n)]
    cols = math.ceil(math.sqrt(n))
    return [(float(i % cols), float(i // cols)) for i in range(n)]


def _written(tmp_path: Path, params: FamilyParams, seed: int) -> tuple[Path, dict]:
    path = write_device(generate_device(params, seed), tmp_path / f"dev{seed}.toml", params)
    return path, tomllib.loads(path.read_text(encoding="utf-8"))


def _detunings(doc: dict, a: int, v: int) -> dict[str, float]:
    """|detuning| (MHz) of q{a}'s f01 from q{v}'s three transitions, from the file."""
    qa, qv = doc["qubits"][a], doc["qubits"][v]
    fa, fv, alpha = qa["f01_ghz"], qv["f01_ghz"], qv["anharmonicity_ghz"]
    return {"leakage": abs(fa - (fv + alpha)) * 1e3,
            "near_resonant": abs(fa - fv) * 1e3,
            "two_photon": abs(fa - (fv + alpha / 2)) * 1e3}


def _hazards_found(doc: dict, layout: str, radius: float) -> tuple[dict, list]:
    """Hazards on nearest-neighbour pairs by kind, and pairs within ``radius`` neither
    hazardous nor clear by the margins (must be none)."""
    n = len(doc["qubits"])
    pos = _positions(n, layout)
    found: dict[str, set] = {k: set() for k in WINDOWS_MHZ}
    unclear = []
    for a in range(n):
        for v in range(n):
            d = math.dist(pos[a], pos[v])
            if a == v or d > radius + 1e-9:
                continue
            det = _detunings(doc, a, v)
            for kind, (lo, hi) in WINDOWS_MHZ.items():
                if lo - 1e-6 <= det[kind] <= hi + 1e-6:
                    pair = tuple(sorted((a, v))) if kind == "near_resonant" else (a, v)
                    found[kind].add((pair, round(d, 6)))
                elif det[kind] < MARGINS_MHZ[kind] - 1e-6:
                    unclear.append((a, v, kind, det[kind]))
    return found, unclear


@pytest.mark.parametrize(("n", "layout", "counts"), [
    (9, "grid", (1, 1, 1)), (16, "grid", (3, 2, 2)), (12, "line", (2, 1, 2)),
    (6, "grid", (0, 0, 0)), (24, "heavy-hex", (2, 1, 1)),
])
def test_hazards_are_those_asked_for(tmp_path, n, layout, counts):
    params = FamilyParams(n_qubits=n, layout=layout, leakage_hazards=counts[0],
                          near_resonant_hazards=counts[1], two_photon_hazards=counts[2])
    for seed in (1, 2, 3):
        _, doc = _written(tmp_path, params, seed)
        found, unclear = _hazards_found(doc, layout, params.clear_radius)
        assert [len(found[k]) for k in WINDOWS_MHZ] == list(counts), found
        assert all(d == 1.0 for k in found for _, d in found[k]), found  # nearest neighbours
        assert unclear == []


def test_leakage_hazards_fall_on_both_sides_of_the_transition(tmp_path):
    params = FamilyParams(n_qubits=16, leakage_hazards=4, near_resonant_hazards=0,
                          two_photon_hazards=0)
    signs = set()
    for seed in range(8):
        _, doc = _written(tmp_path, params, seed)
        for a in range(16):
            for v in range(16):
                qa, qv = doc["qubits"][a], doc["qubits"][v]
                det = (qa["f01_ghz"] - qv["f01_ghz"] - qv["anharmonicity_ghz"]) * 1e3
                if a != v and 10 - 1e-6 <= abs(det) <= 40 + 1e-6:
                    signs.add(det > 0)
    assert signs == {True, False}


def test_magnitudes_in_range_and_falling_with_distance(tmp_path):
    params = FamilyParams(n_qubits=16)
    by_distance: dict[float, list[float]] = {}
    for seed in range(4):
        _, doc = _written(tmp_path, params, seed)
        pos = _positions(16, "grid")
        for c in doc["couplings"]:
            assert -60.0 <= c["crosstalk_db"] <= -15.0
            assert 0.0 <= c["delay_ns"] <= 8.0 and -180.0 <= c["phase_deg"] <= 180.0
            d = math.dist(pos[int(c["line"][1:].split("-")[0])], pos[int(c["qubit"][1:])])
            by_distance.setdefault(round(d, 6), []).append(c["crosstalk_db"])
    means = [np.mean(by_distance[d]) for d in sorted(by_distance)]
    assert len(means) >= 5 and all(np.diff(means) < 0), means
    phases = [c["phase_deg"] for c in doc["couplings"]]
    assert np.std(phases) > 80  # uniform on 360°: std 104°


def test_weak_pairs_are_omitted(tmp_path):
    params = FamilyParams(n_qubits=16, layout="line", nearest_db=-30.0, falloff_db=12.0)
    _, doc = _written(tmp_path, params, 5)
    assert len(doc["couplings"]) < 16 * 15 / 2
    assert min(c["crosstalk_db"] for c in doc["couplings"]) >= -60.0


def test_same_seed_same_file_other_seed_other_file(tmp_path):
    params = FamilyParams(n_qubits=7, phase_walk_rad_per_sqrt_h=0.02, step_hours=(5.0,))
    a = write_device(generate_device(params, 11), tmp_path / "a.toml", params).read_bytes()
    b = write_device(generate_device(params, 11), tmp_path / "b.toml", params).read_bytes()
    c = write_device(generate_device(params, 12), tmp_path / "c.toml", params).read_bytes()
    assert a == b and a != c


def test_coherence_readout_and_limits(tmp_path):
    params = FamilyParams(n_qubits=12)
    path, doc = _written(tmp_path, params, 3)
    dev = load_device(path)
    t1 = [q.t1_us for q in dev.qubits]
    assert all(q.t2_us <= 2 * q.t1_us for q in dev.qubits)
    assert np.std(t1) > 5 and np.std([q.readout[1, 0] for q in dev.qubits]) > 0
    assert all(ln.full_scale_dbm is not None and ln.max_amplitude <= 0.9 for ln in dev.lines)
    assert dev.limits.stated and dev.limits.max_average_power_dbm is not None


def test_drift_per_pair_linear_fraction_and_steps(tmp_path):
    params = FamilyParams(n_qubits=9, phase_walk_rad_per_sqrt_h=0.02,
                          magnitude_walk_per_sqrt_h=0.005, linear_fraction=0.25,
                          step_hours=(10.0, 30.0), step_db=3.0)
    path, doc = _written(tmp_path, params, 8)
    dev = load_device(path)
    d_phase = [c.phase_diffusion_rad2_per_hour for c in dev.couplings]
    assert all(d is not None and d > 0 for d in d_phase)
    assert np.median(d_phase) == pytest.approx(0.02**2, rel=0.5)  # log-normal around σ²
    linear = sum(c.phase_rate_rad_per_hour is not None for c in dev.couplings)
    assert 0.1 < linear / len(dev.couplings) < 0.4
    assert [s.at_hours for s in dev.steps] == [10.0, 30.0]
    assert len({(s.line, s.qubit) for s in dev.steps}) == 2
    for s in dev.steps:
        assert dev.coupling(s.line, s.qubit).crosstalk_db >= -40.0
    s = dev.steps[0]
    rig = SimRig(dev, seed=1)
    f = dev.qubit(s.qubit).f01_ghz
    before = rig.true_crosstalk(s.qubit, s.line, f, 10 * 3600.0 - 1.0)
    after = rig.true_crosstalk(s.qubit, s.line, f, 10 * 3600.0)
    assert 20 * math.log10(abs(after / before)) == pytest.approx(3.0, abs=0.01)


def test_impossible_requests_are_refused():
    with pytest.raises(ValueError, match="nearest-neighbour pairs"):
        generate_device(FamilyParams(n_qubits=3, layout="line", leakage_hazards=3), 1)
    with pytest.raises(ValueError, match="n_qubits"):
        FamilyParams(n_qubits=1)
    with pytest.raises(ValueError, match="t2_over_t1"):
        FamilyParams(t2_over_t1=(0.5, 2.5))


def _nearest_pairs(n: int, layout: str) -> int:
    pos = _positions(n, layout)
    return sum(math.dist(pos[i], pos[j]) == 1.0 for i in range(n) for j in range(i + 1, n))


@settings(max_examples=12, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(n=st.integers(2, 16), layout=st.sampled_from(["grid", "line"]),
       hazards=st.tuples(st.integers(0, 2), st.integers(0, 2), st.integers(0, 2)),
       nearest=st.floats(-30.0, -18.0), delay=st.floats(0.0, 8.0),
       seed=st.integers(0, 2**32), walk=st.sampled_from([0.0, 0.005, 0.02]),
       steps=st.sampled_from([(), (2.0,), (1.0, 50.0)]))
def test_every_generated_file_loads_and_checks(tmp_path, n, layout, hazards, nearest, delay,
                                               seed, walk, steps):
    if sum(hazards) > _nearest_pairs(n, layout):
        hazards = (0, 0, 0)
    params = FamilyParams(n_qubits=n, layout=layout, leakage_hazards=hazards[0],
                          near_resonant_hazards=hazards[1], two_photon_hazards=hazards[2],
                          nearest_db=nearest, delay_ns=(0.0, delay),
                          phase_walk_rad_per_sqrt_h=walk, magnitude_walk_per_sqrt_h=walk / 4,
                          linear_fraction=0.2 if walk else 0.0, step_hours=steps)
    path, doc = _written(tmp_path, params, seed)
    dev = load_device(path)
    assert len(dev.qubits) == n
    chip = tmp_path / f"chip{seed}.toml"
    chip.write_text(tomli_w.dumps(dev.chip().to_dict()), encoding="utf-8")
    assert main(["check", str(path), str(chip)]) == 0
    found, unclear = _hazards_found(doc, layout, params.clear_radius)
    assert [len(found[k]) for k in WINDOWS_MHZ] == list(hazards) and unclear == []


def test_params_are_frozen():
    with pytest.raises(dataclasses.FrozenInstanceError):
        FamilyParams().n_qubits = 4  # type: ignore[misc]


def _girth(adj: list[set[int]]) -> int:
    """Length of the shortest cycle of a graph (BFS from every node)."""
    best = math.inf
    for root in range(len(adj)):
        depth, parent, queue = {root: 0}, {root: -1}, [root]
        for u in queue:
            for w in adj[u]:
                if w not in depth:
                    depth[w], parent[w] = depth[u] + 1, u
                    queue.append(w)
                elif parent[u] != w:
                    best = min(best, depth[u] + depth[w] + 1)
    return int(best) if best < math.inf else 0


@pytest.mark.parametrize("n", [12, 40, 127, 300])
def test_heavy_hex_is_the_hexagonal_lattice_with_a_qubit_on_every_edge(n):
    """The defining properties of a heavy-hex lattice: bipartite between vertex qubits (at
    most 3 neighbours) and edge qubits (at most 2), shortest cycle the 12-qubit hexagon
    (6 vertices + 6 edges), connected, and nearest neighbours one site apart."""
    pos = layout_positions(n, "heavy-hex")
    assert pos.shape == (n, 2) and len({tuple(p) for p in pos}) == n
    d = np.linalg.norm(pos[:, None] - pos[None], axis=2)
    assert d[~np.eye(n, dtype=bool)].min() == pytest.approx(1.0)
    adj = [set(np.flatnonzero(np.abs(row - 1.0) < 1e-9).tolist()) for row in d]
    deg = np.array([len(a) for a in adj])
    assert deg.max() <= 3 and deg.min() >= 1
    side = {0: 0}
    queue = [0]
    for u in queue:  # 2-colour the graph; connected means every qubit gets a colour
        for w in adj[u]:
            if w not in side:
                side[w] = 1 - side[u]
                queue.append(w)
            assert side[w] != side[u]  # bipartite
    assert len(side) == n
    if n >= 40:
        assert _girth(adj) == 12
        # one side is the edge qubits (≤ 2 neighbours), the other the vertices (≤ 3)
        maxdeg = [deg[[q for q in side if side[q] == k]].max() for k in (0, 1)]
        assert sorted(maxdeg) == [2, 3]


@pytest.mark.slow
def test_a_thousand_qubit_chip_is_drawn_and_loads(tmp_path):
    params = FamilyParams(n_qubits=1000, layout="heavy-hex", leakage_hazards=5,
                          near_resonant_hazards=5, two_photon_hazards=5)
    path, doc = _written(tmp_path, params, 3)
    dev = load_device(path)
    assert len(dev.qubits) == 1000 and len(doc["couplings"]) > 10_000
    assert path.stat().st_size < 20e6
    with pytest.raises(ValueError, match="accepted: 2 … 1000"):
        FamilyParams(n_qubits=1001)

def test_exchange_on_nearest_neighbours_when_asked():
    from simulated_device.coupled import ClusterWarning
    from simulated_device.device import device_from_dict

    plain = generate_device(FamilyParams(n_qubits=4), 3)
    coupled = generate_device(FamilyParams(n_qubits=4, exchange_mhz=(1.0, 4.0)), 3)
    assert "exchange" not in plain and plain["version"] == 2
    assert coupled["version"] == 3 and coupled["paths"] == {"envelope_delay": False}
    # The rest of the chip is the one drawn without exchange.
    assert {k: v for k, v in coupled.items() if k not in ("exchange", "version", "paths")} == \
        {k: v for k, v in plain.items() if k != "version"}
    pairs = {(e["qubit_a"], e["qubit_b"]) for e in coupled["exchange"]}
    assert pairs == {("q0", "q1"), ("q2", "q3"), ("q0", "q2"), ("q1", "q3")}  # 2 × 2 grid
    assert all(1.0 <= e["j_mhz"] <= 4.0 for e in coupled["exchange"])
    dev = device_from_dict(coupled)
    assert len(dev.exchange) == 4
    nine = device_from_dict(generate_device(FamilyParams(exchange_mhz=(1.0, 4.0)), 3))
    with pytest.warns(ClusterWarning) as caught:  # centre: 4 neighbours, edges: 3 (cap: 2)
        SimRig(nine, drift=False)
    assert any("cluster of q4 capped at 3" in str(w.message) for w in caught)
    with pytest.raises(ValueError, match="exchange_mhz"):
        FamilyParams(exchange_mhz=(3.0, 1.0))
