"""How many transmon levels the demo chip needs: four against five at its own frequencies.

Several demo lines sit 10–20 MHz from a victim's 2–3 transition (f23 = f01 + 2α for Duffing
levels, Koch et al., Phys. Rev. A 76, 042319 (2007)). Three levels cannot show a drive of that
transition; four must agree with five (the reference: one level more, the truncation
converged) to < 1 % in every population. Each coupled (victim, line) pair is driven by the
line's tone at its own qubit's f01 at the line's maximum amplitude for 200 ns, starting from
|0⟩, |1⟩ and |2⟩ (level 3 and above summed).
"""

from __future__ import annotations

import numpy as np
import pytest

from simulated_device import SimRig, demo_device_path, device_from_dict
from simulated_device.dynamics import ToneBatch, evolve_populations
from xtalkcal.common import load_toml

FLATTOP = 2


def _col(R: int, v: float) -> np.ndarray:
    return np.full((R, 1), v)


def _demo_populations(n_levels: int) -> np.ndarray:
    data, _ = load_toml(demo_device_path())
    data = dict(data, levels=n_levels)
    dev = device_from_dict(data)
    rig = SimRig(dev, seed=1, drift=False)
    state = rig._drift.at(0.0)
    out = []
    for q in dev.qubits:
        pairs = [ln for ln in dev.lines if ln.qubit != q.name and dev.coupling(ln.name, q.name)]
        freq = np.array([dev.qubit(ln.qubit).f01_ghz for ln in pairs])
        om = np.array([complex(rig.field_factor(q.name, ln.name, np.array([f]), state)[0])
                       * ln.max_amplitude for ln, f in zip(pairs, freq, strict=True)])
        R = len(pairs)
        batch = ToneBatch(_col(R, 0.0), _col(R, 200.0), freq[:, None], om[:, None],
                          np.full((R, 1), FLATTOP, dtype=np.int64), _col(R, 1.0),
                          _col(R, 0.0), _col(R, 20.0), np.ones(R, dtype=np.int64),
                          np.full(R, 200.0))
        for start in (0, 1, 2):
            psi = np.zeros(n_levels)
            psi[start] = 1.0
            p = evolve_populations(q.levels.energies_ghz, q.levels.ladder,
                                   np.array([q.t1_us * 1e3]), np.array([q.t2_us * 1e3]), batch,
                                   psi0=psi)
            top = p[:, 3:].sum(axis=1, keepdims=True)
            out.append(np.concatenate([p[:, :3], top], axis=1))
    return np.concatenate(out)


@pytest.fixture(scope="module")
def demo_by_levels() -> dict[int, np.ndarray]:
    return {n: _demo_populations(n) for n in (3, 4, 5)}


def test_four_levels_agree_with_five(demo_by_levels) -> None:
    # measured: 4.6e-4 (the largest 2→3 transfer itself is 2.2e-2)
    assert np.max(np.abs(demo_by_levels[4] - demo_by_levels[5])) < 1e-2


def test_three_levels_miss_the_two_three_transition(demo_by_levels) -> None:
    # measured: 2.2e-2 — the 2–3 transfer that three levels cannot have
    assert np.max(np.abs(demo_by_levels[3] - demo_by_levels[5])) > 1e-2
