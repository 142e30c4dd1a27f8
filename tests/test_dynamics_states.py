"""Initial states and final density matrices of the fast and held paths.

References: QuTiP's master-equation solver on the Hamiltonian written out in
``test_device_qutip`` (independent of ``dynamics.py``); the closed-form free decay of a
coherence under the Lindblad model, ρ_01(t) = ρ_01(0)·e^{−t/T2} in the frame of f01
(Krantz et al., Appl. Phys. Rev. 6, 021318 (2019), eq. for Ramsey decay).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import test_device_qutip as tq

from simulated_device.dynamics import (
    _evolve_batch,
    evolve_held,
    evolve_populations,
    evolve_states,
    initial_density,
)

TOL_STATE = 1e-6  # every entry of ρ against QuTiP at tight tolerance


def random_density(rng: np.random.Generator, L: int) -> np.ndarray:
    """A random full-rank density matrix (Wishart, normalised)."""
    a = rng.normal(size=(L, L)) + 1j * rng.normal(size=(L, L))
    rho = a @ a.conj().T
    return rho / np.trace(rho)


def test_default_start_is_ground_state() -> None:
    victim, run = tq.case_two_tones_below()
    batch = tq.tone_batch([run])
    args = (victim.levels_ghz, victim.ladder, np.array([victim.t1_ns]), np.array([victim.t2_ns]))
    ground = np.zeros(victim.n_levels, complex)
    ground[0] = 1.0
    p_default = evolve_populations(*args, batch)
    p_psi = evolve_populations(*args, batch, psi0=ground)
    rho = evolve_states(*args, batch)
    assert np.array_equal(p_default, p_psi)
    assert np.allclose(np.real(np.diagonal(rho[0])), p_default[0], atol=1e-14)
    assert np.allclose(rho[0], rho[0].conj().T, atol=1e-14)


@pytest.mark.parametrize("make_case", [tq.case_two_tones_below, tq.case_two_tones_above,
                                       tq.case_stark_ramsey, tq.case_two_tones_four_levels])
def test_density_matrix_against_qutip(make_case) -> None:
    """A random mixed initial state; every entry of the final ρ, phases included."""
    victim, run = make_case()
    rho0 = random_density(np.random.default_rng(7), victim.n_levels)
    ref = tq.qutip_populations(victim, run, rho0=rho0, density=True)
    got = evolve_states(victim.levels_ghz, victim.ladder, np.array([victim.t1_ns]),
                        np.array([victim.t2_ns]), tq.tone_batch([run]), rho0=rho0)[0]
    assert np.max(np.abs(got - ref)) <= TOL_STATE


def test_free_coherence_decays_at_t2() -> None:
    """(|0⟩ + e^{iφ}|1⟩)/√2, no tone: ρ_01 = ½e^{−iφ}e^{−t/T2}, ρ_11 = ½e^{−t/T1}."""
    victim = tq.duffing(t1_ns=30e3, t2_ns=20e3)
    waits = np.array([0.0, 2e3, 7e3, 15e3])
    runs = [tq.Run((), float(t)) for t in waits]
    phi = 0.7
    psi = np.zeros(victim.n_levels, complex)
    psi[:2] = np.array([1.0, np.exp(1j * phi)]) / math.sqrt(2.0)
    rho = evolve_states(victim.levels_ghz, victim.ladder, np.array([victim.t1_ns]),
                        np.array([victim.t2_ns]), tq.tone_batch(runs), psi0=psi)
    assert np.allclose(rho[:, 0, 1], 0.5 * np.exp(-1j * phi) * np.exp(-waits / victim.t2_ns),
                       atol=1e-12)
    assert np.allclose(rho[:, 1, 1], 0.5 * np.exp(-waits / victim.t1_ns), atol=1e-12)


def test_held_path_takes_and_returns_states() -> None:
    """A held π/2 pulse from a per-run pure state agrees with the tone path's ρ."""
    victim = tq.duffing(t1_ns=20e3, t2_ns=15e3)
    dt, n = 0.5, 80
    omega = np.zeros((2, 1, n), complex)
    omega[:, 0, 20:60] = 1.0 / (4 * 20.0)  # π/2 square pulse, 20 ns
    psi = np.zeros((2, victim.n_levels), complex)
    psi[0, 0] = 1.0
    psi[1, :2] = [1 / math.sqrt(2), 1j / math.sqrt(2)]
    rho_held = evolve_held(victim.levels_ghz, victim.ladder, np.array([victim.t1_ns]),
                           np.array([victim.t2_ns]), omega, np.array([[victim.f01 + 0.001]]),
                           dt, psi0=psi, density=True)
    drive = tq.Drive(10.0, 20.0, victim.f01 + 0.001, 1.0 / 80.0, tq.Envelope("square"))
    batch = tq.tone_batch([tq.Run((drive,), 40.0)] * 2)
    rho_tone = evolve_states(victim.levels_ghz, victim.ladder, np.array([victim.t1_ns]),
                             np.array([victim.t2_ns]), batch, psi0=psi)
    assert np.max(np.abs(rho_held - rho_tone)) < 1e-8  # held idle cells are stepped
    pops = evolve_held(victim.levels_ghz, victim.ladder, np.array([victim.t1_ns]),
                       np.array([victim.t2_ns]), omega, np.array([[victim.f01 + 0.001]]), dt,
                       psi0=psi)
    assert np.allclose(pops, np.real(np.diagonal(rho_held, axis1=1, axis2=2)), atol=1e-14)


def test_read_only_inputs_reuse_the_compiled_kernel() -> None:
    """A read-only or strided input must not add a numba specialisation."""
    victim, run = tq.case_two_tones_below()
    batch = tq.tone_batch([run, run])
    levels = np.array(victim.levels_ghz)
    ladder = np.array(victim.ladder)
    evolve_populations(levels, ladder, np.array([victim.t1_ns]), np.array([victim.t2_ns]), batch)
    before = len(_evolve_batch.signatures)
    for a in (levels, ladder, *(getattr(batch, f) for f in batch.__dataclass_fields__)):
        a.setflags(write=False)
    strided = np.array([victim.t1_ns, 0.0, victim.t1_ns])[::2]
    evolve_populations(levels, ladder, strided, np.array([victim.t2_ns]), batch)
    assert len(_evolve_batch.signatures) == before


def test_initial_state_errors() -> None:
    with pytest.raises(ValueError, match="psi0 has shape"):
        initial_density(2, 3, psi0=np.ones(4))
    with pytest.raises(ValueError, match="not Hermitian"):
        initial_density(1, 2, rho0=np.array([[0.5, 0.1], [0.0, 0.5]]))
    with pytest.raises(ValueError, match="trace 1"):
        initial_density(1, 2, rho0=np.eye(2))
    with pytest.raises(ValueError, match="not both"):
        initial_density(1, 2, psi0=np.ones(2), rho0=np.eye(2) / 2)
