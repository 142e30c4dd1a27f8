"""Driven, damped transmon dynamics of the simulated device against outside references.

The compiled integrator :func:`simulated_device.dynamics.evolve_populations` is compared with

* QuTiP's ``mesolve`` machinery (``qutip.MESolver``, QuTiP 5) on a Hamiltonian and collapse
  operators built here from the model equations alone — no code of ``dynamics.py`` is used to
  build them, so an error in the kernel's Hamiltonian, frame or phase convention shows up;
* SciPy's DOP853 through :func:`simulated_device.dynamics.evolve_reference` (same Hamiltonian
  code as the kernel, so this checks the stepping only);
* analytic results: T1 decay and the 2 → 1 → 0 cascade (rate equations of the Lindblad model),
  Ramsey decay e^{−t/T2}, and the perturbative AC Stark shift of a transmon
  (Krantz et al., Appl. Phys. Rev. 6, 021318 (2019)).

Model of simulated_device/dynamics.py, in the frame rotating at the victim's 0–1 frequency f::

    H/h = Σ_n (ε_n − n f)|n⟩⟨n| + Σ_k ½[Ω_k(t)·e^{−i2π(f_k − f)t}·Σ_n λ_n|n+1⟩⟨n| + h.c.]

with Ω_k(t) = omega_ghz·E(t − start) (GHz, ns), jump operators √Γ1·Σ√n|n−1⟩⟨n| and
√(2Γφ)·n̂, Γ1 = 1/T1, Γφ = 1/T2 − 1/(2T1), initial state |0⟩.

The measured largest deviation of every QuTiP comparison (default ``StepControl``) is written
into its parametrize id; the assertion is always ≤ 1e-6 (it was 1e-4 before the default
phase step went from 0.3 to 0.125 rad; the error falls as its fourth power).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pytest
import qutip as qt  # a hard import: the reference must not be skipped silently

from simulated_device.dynamics import StepControl, ToneBatch, evolve_populations, evolve_reference
from simulated_device.transmon import charge_basis_levels, duffing_levels
from xtalkcal.hardware import ENVELOPE_KINDS, Envelope, envelope_values, pulse_area_ns

TOL_QUTIP = 1e-6  # agreement asked of the fast path against QuTiP, in every population
TWO_PI = 2.0 * math.pi

# QuTiP settings: tight tolerances, and a step cap well below the shortest period in the
# frame of f01 (fastest frequency below: 0.9 GHz, level 3 of the 4-level case against a tone
# 300 MHz off; period 1.1 ns). test_qutip_reference_is_converged checks the choice.
QUTIP_OPTIONS = {
    "method": "dop853",
    "atol": 1e-12,
    "rtol": 1e-10,
    "nsteps": 10**8,
    "max_step": 0.1,
    "progress_bar": False,
}


# ----------------------------------------------------------------------------- model inputs


@dataclass(frozen=True)
class Victim:
    """One transmon: energies ε_n (GHz, ε_0 = 0), ladder λ_n, T1 and T2 (ns; inf = off)."""

    levels_ghz: np.ndarray
    ladder: np.ndarray
    t1_ns: float = math.inf
    t2_ns: float = math.inf

    @property
    def f01(self) -> float:
        return float(self.levels_ghz[1] - self.levels_ghz[0])

    @property
    def n_levels(self) -> int:
        return int(len(self.levels_ghz))


@dataclass(frozen=True)
class Drive:
    """One tone as seen by the victim: complex Rabi rate ``omega_ghz`` times envelope E."""

    start_ns: float
    duration_ns: float
    freq_ghz: float
    omega_ghz: complex
    envelope: Envelope = field(default_factory=lambda: Envelope("square"))

    @property
    def end_ns(self) -> float:
        return self.start_ns + self.duration_ns


@dataclass(frozen=True)
class Run:
    """Tones of one shot and its readout time (ns)."""

    drives: tuple[Drive, ...]
    end_ns: float


def duffing(f01: float = 5.0, alpha: float = -0.2, n_levels: int = 3,
            t1_ns: float = math.inf, t2_ns: float = math.inf) -> Victim:
    """A Duffing transmon (ε_n = n·f01 + n(n−1)α/2, λ_n = √(n+1))."""
    lv = duffing_levels(f01, alpha, n_levels)
    return Victim(np.array(lv.energies_ghz), np.array(lv.ladder), t1_ns, t2_ns)


def rotation(start: float, freq: float, angle: float, *, phase: float = 0.0, sigma: float = 5.0,
             duration: float | None = None, element: float = 1.0, drag: float = 0.0) -> Drive:
    """A Gaussian (or DRAG) pulse of rotation angle ``angle`` on a transition of element λ.

    The rotation angle of a resonant two-level drive is 2π·λ·|Ω|·∫Re E dτ (Ω in cycles/ns).
    """
    dur = 4.0 * sigma if duration is None else duration
    env = Envelope("drag", sigma_ns=sigma, drag_ns=drag) if drag else Envelope(
        "gaussian", sigma_ns=sigma)
    omega = angle / (TWO_PI * element * pulse_area_ns(env, dur))
    return Drive(start, dur, freq, omega * complex(math.cos(phase), math.sin(phase)), env)


def tone_batch(runs: list[Run]) -> ToneBatch:
    """Pack runs into the padded arrays of :class:`ToneBatch` (as SimRig does)."""
    R = len(runs)
    M = max(1, max(len(r.drives) for r in runs))
    start = np.zeros((R, M))
    dur = np.ones((R, M))
    freq = np.ones((R, M))
    omega = np.zeros((R, M), dtype=complex)
    code = np.full((R, M), ENVELOPE_KINDS.index("square"), dtype=np.int64)
    sigma = np.ones((R, M))
    drag = np.zeros((R, M))
    ramp = np.zeros((R, M))
    n_tones = np.zeros(R, dtype=np.int64)
    end = np.zeros(R)
    for r, run in enumerate(runs):
        n_tones[r] = len(run.drives)
        end[r] = run.end_ns
        for k, d in enumerate(run.drives):
            start[r, k] = d.start_ns
            dur[r, k] = d.duration_ns
            freq[r, k] = d.freq_ghz
            omega[r, k] = d.omega_ghz
            code[r, k] = d.envelope.code
            sigma[r, k] = d.envelope.sigma_ns if d.envelope.sigma_ns > 0 else 1.0
            drag[r, k] = d.envelope.drag_ns
            ramp[r, k] = d.envelope.ramp_ns
    return ToneBatch(start, dur, freq, omega, code, sigma, drag, ramp, n_tones, end)


def fast(victim: Victim, runs: Run | list[Run], control: StepControl | None = None) -> np.ndarray:
    """Populations from the compiled integrator, shape (R, L) (or (L,) for one run)."""
    many = isinstance(runs, list)
    batch = tone_batch(runs if many else [runs])
    pops = evolve_populations(victim.levels_ghz, victim.ladder, np.array([victim.t1_ns]),
                              np.array([victim.t2_ns]), batch, control=control)
    return pops if many else pops[0]


# ----------------------------------------------------------------------------- QuTiP model


def envelope_scalar(env: Envelope, duration: float, tau: float) -> complex:
    """E(τ) written out from the envelope definitions in xtalkcal.hardware.timeline (scalar, fast).

    Kept separate from the kernel's compiled envelope on purpose; it is itself checked
    against :func:`xtalkcal.hardware.envelope_values` in ``test_envelope_scalar_matches_spec``.
    """
    if tau < 0.0 or tau > duration:
        return 0j
    if env.kind in ("gaussian", "drag"):
        s2 = env.sigma_ns**2
        edge = math.exp(-(0.5 * duration) ** 2 / (2.0 * s2))
        x = tau - 0.5 * duration
        gauss = math.exp(-x * x / (2.0 * s2))
        g = (gauss - edge) / (1.0 - edge)
        dg = -x / s2 * gauss / (1.0 - edge)
        return complex(g, env.drag_ns * dg if env.kind == "drag" else 0.0)
    if env.kind == "flattop" and env.ramp_ns > 0.0:
        r = env.ramp_ns
        if tau < r:
            return complex(0.5 * (1.0 - math.cos(math.pi * tau / r)))
        if tau > duration - r:
            return complex(0.5 * (1.0 - math.cos(math.pi * (duration - tau) / r)))
    return 1 + 0j


def qutip_populations(victim: Victim, run: Run, *, flip_anharmonicity: bool = False,
                      detuning_sign: float = 1.0, options: dict | None = None,
                      segmented: bool = True, rho0: np.ndarray | None = None,
                      density: bool = False) -> np.ndarray:
    """Final populations of ``run`` from QuTiP's master-equation solver.

    QuTiP uses ħ = 1, so the Hamiltonian is 2π·H/h in rad/ns. By default the integration is
    split at every tone edge and flat-top ramp end (the integrator is restarted there) so that
    no step straddles a kink of the drive.

    Parameters
    ----------
    options : dict, optional
        QuTiP solver options; default :data:`QUTIP_OPTIONS`.
    segmented : bool
        False: one plain ``qutip.mesolve`` call over [0, end] (what the benchmark times).
    flip_anharmonicity : bool
        Mirror the levels about the harmonic ladder (α → −α); for the sensitivity test only.
    detuning_sign : float
        −1 writes the rotating factor as e^{+i2π(f_k − f)t}; for the sensitivity test only.
    rho0 : (L, L) array, optional
        Initial density matrix (default |0⟩⟨0|), in the frame of f01 (= lab frame at t = 0).
    density : bool
        Return the final density matrix (frame of f01) instead of the populations.
    """
    L = victim.n_levels
    f = victim.f01
    n = np.arange(L, dtype=float)
    levels = np.asarray(victim.levels_ghz, float)
    if flip_anharmonicity:
        levels = 2.0 * n * f - levels
    h0 = qt.Qobj(np.diag(TWO_PI * (levels - n * f)).astype(complex))
    raise_op = qt.Qobj(np.diag(np.asarray(victim.ladder, float), -1).astype(complex))
    consts = [(d.start_ns, d.duration_ns, d.envelope, math.pi * d.omega_ghz,
               -detuning_sign * TWO_PI * (d.freq_ghz - f)) for d in run.drives]

    def coeff(t: float) -> complex:
        # ½·2π·Ω_k·E_k(t − start)·e^{−i2π(f_k − f)t}, summed over tones
        z = 0j
        for start, dur, env, half_omega, w in consts:
            e = envelope_scalar(env, dur, t - start)
            if e != 0:
                z += half_omega * e * complex(math.cos(w * t), math.sin(w * t))
        return z

    def coeff_conj(t: float) -> complex:
        return coeff(t).conjugate()

    hamiltonian = qt.QobjEvo([h0, [raise_op, coeff], [raise_op.dag(), coeff_conj]])
    c_ops = []
    g1 = 0.0 if math.isinf(victim.t1_ns) else 1.0 / victim.t1_ns
    g2 = 0.0 if math.isinf(victim.t2_ns) else 1.0 / victim.t2_ns
    gphi = g2 - 0.5 * g1
    if g1 > 0:
        c_ops.append(math.sqrt(g1) * qt.Qobj(np.diag(np.sqrt(n[1:]), 1).astype(complex)))
    if gphi > 0:
        c_ops.append(math.sqrt(2.0 * gphi) * qt.Qobj(np.diag(n).astype(complex)))
    options = options or QUTIP_OPTIONS
    rho = qt.fock_dm(L, 0) if rho0 is None else qt.Qobj(np.asarray(rho0, complex))
    if not segmented:
        result = qt.mesolve(hamiltonian, rho, [0.0, run.end_ns], c_ops=c_ops, options=options)
        final = result.states[-1].full()
        return final if density else np.real(np.diag(final))
    solver = qt.MESolver(hamiltonian, c_ops=c_ops, options=options)
    cuts = {0.0, run.end_ns}
    for d in run.drives:
        edges = [d.start_ns, d.end_ns]
        if d.envelope.kind == "flattop" and d.envelope.ramp_ns > 0:
            edges += [d.start_ns + d.envelope.ramp_ns, d.end_ns - d.envelope.ramp_ns]
        cuts.update(t for t in edges if 0.0 < t < run.end_ns)
    grid = sorted(cuts)
    for a, b in zip(grid[:-1], grid[1:], strict=True):
        solver.start(rho, a)
        rho = solver.step(b)
    return rho.full() if density else np.real(np.diag(rho.full()))


# ----------------------------------------------------------------------------- cases

F01, ALPHA = 5.0, -0.2
F12 = F01 + ALPHA


def case_pi_gaussian() -> tuple[Victim, Run]:
    """(a) Resonant Gaussian π pulse, 3 levels: transfer to |1⟩, leakage ~7e-5 to |2⟩."""
    return duffing(), Run((rotation(0.0, F01, math.pi, sigma=5.0),), 20.0)


def case_pi_gaussian_damped() -> tuple[Victim, Run]:
    """(a') The same π pulse, slower (σ = 8 ns), with T1 = 12 µs, T2 = 9 µs."""
    return duffing(t1_ns=12e3, t2_ns=9e3), Run((rotation(0.0, F01, math.pi, sigma=8.0),), 40.0)


def stark_ramsey_run(detuning: float, omega: float, flat_ns: float, phase: float,
                     ramp_ns: float = 30.0) -> Run:
    """π/2 – flat-top tone at f01 + Δ – π/2 (phase φ), readout at the end."""
    half = rotation(0.0, F01, math.pi / 2, sigma=5.0)
    dur = flat_ns + 2 * ramp_ns
    tone = Drive(half.end_ns, dur, F01 + detuning, omega, Envelope("flattop", ramp_ns=ramp_ns))
    second = rotation(tone.end_ns, F01, math.pi / 2, sigma=5.0, phase=phase)
    return Run((half, tone, second), second.end_ns)


def case_stark_ramsey() -> tuple[Victim, Run]:
    """(b) Ramsey around a 400 ns off-resonant tone (Δ = −70 MHz, between α and 0), damped."""
    return (duffing(t1_ns=40e3, t2_ns=30e3),
            stark_ramsey_run(-0.07, 0.01 * complex(math.cos(0.4), math.sin(0.4)), 400.0, 0.9))


def case_two_photon() -> tuple[Victim, Run]:
    """(b'') The same at Δ = α/2 = −100 MHz: the 0–2 two-photon resonance moves ~30 % to |2⟩."""
    return (duffing(t1_ns=40e3, t2_ns=30e3),
            stark_ramsey_run(ALPHA / 2, 0.01 * complex(math.cos(0.4), math.sin(0.4)), 400.0, 0.9))


def case_stark_ramsey_above() -> tuple[Victim, Run]:
    """(b') The same with the tone 120 MHz above f01 and 300 ns of flat top."""
    return duffing(), stark_ramsey_run(0.12, 0.012, 300.0, math.pi / 2)


def case_leakage() -> tuple[Victim, Run]:
    """(c) π pulse into |1⟩, then a flat-top tone 4 MHz above f12 drives 1↔2 (P2 ≈ 0.8)."""
    pi = rotation(0.0, F01, math.pi, sigma=6.0)
    tone = Drive(pi.end_ns, 70.0, F12 + 0.004, 0.006, Envelope("flattop", ramp_ns=15.0))
    return duffing(t1_ns=30e3, t2_ns=25e3), Run((pi, tone), tone.end_ns)


def case_leakage_gauss() -> tuple[Victim, Run]:
    """(c') π pulse, then a Gaussian near f12 (−3 MHz) of about a π rotation on 1–2."""
    pi = rotation(0.0, F01, math.pi, sigma=6.0)
    leak = rotation(pi.end_ns, F12 - 0.003, math.pi, sigma=10.0, element=math.sqrt(2.0))
    return duffing(), Run((pi, leak), leak.end_ns)


def partial_pair(split: bool) -> tuple[Victim, Run]:
    """π/2 – detuned DRAG pair (Ω_a + Ω_b) or its single-tone sum – π/2 with T1, T2."""
    half = rotation(0.0, F01, math.pi / 2, sigma=5.0)
    om_a = 0.02 * complex(math.cos(0.7), math.sin(0.7))
    om_b = -0.6 * om_a * complex(math.cos(0.3), math.sin(0.3))
    env = Envelope("drag", sigma_ns=10.0, drag_ns=0.8)
    f = F01 + 0.03
    if split:
        mid = (Drive(20.0, 40.0, f, om_a, env), Drive(20.0, 40.0, f, om_b, env))
    else:
        mid = (Drive(20.0, 40.0, f, om_a + om_b, env),)
    second = rotation(60.0, F01, math.pi / 2, sigma=5.0, phase=1.0)
    return duffing(t1_ns=20e3, t2_ns=15e3), Run((half, *mid, second), 80.0)


def case_partial_pair() -> tuple[Victim, Run]:
    """(d) Two same-frequency tones that partly cancel, inside a Ramsey sequence."""
    return partial_pair(split=True)


def case_t1_cascade() -> tuple[Victim, Run]:
    """(e) Prepare |2⟩ (π on 0–1, π on 1–2), then wait 6 µs with T1 = 10 µs, T2 = 8 µs."""
    p01 = rotation(0.0, F01, math.pi, sigma=8.0)
    p12 = rotation(p01.end_ns, F12, math.pi, sigma=8.0, element=math.sqrt(2.0))
    return duffing(t1_ns=10e3, t2_ns=8e3), Run((p01, p12), p12.end_ns + 6000.0)


def case_t2_ramsey() -> tuple[Victim, Run]:
    """(e') π/2 – 5 µs wait – π/2 (phase 0.6) with T1 = 15 µs, T2 = 10 µs."""
    half = rotation(0.0, F01, math.pi / 2, sigma=5.0)
    second = rotation(half.end_ns + 5000.0, F01, math.pi / 2, sigma=5.0, phase=0.6)
    return duffing(t1_ns=15e3, t2_ns=10e3), Run((half, second), second.end_ns)


def two_tone_run(off_detuning: float, off_omega: complex, near_omega: float = 0.0,
                 near_detuning: float = 0.002) -> Run:
    """Near-resonant DRAG pulse (40 ns) inside a 100 ns off-resonant flat-top tone.

    With ``near_omega = 0`` the DRAG pulse is scaled to a π/2 rotation.
    """
    env = Envelope("drag", sigma_ns=10.0, drag_ns=0.5)
    if near_omega == 0.0:
        near_omega = (math.pi / 2) / (TWO_PI * pulse_area_ns(env, 40.0))
    near = Drive(30.0, 40.0, F01 + near_detuning, near_omega, env)
    off = Drive(0.0, 100.0, F01 + off_detuning, off_omega, Envelope("flattop", ramp_ns=10.0))
    return Run((near, off), 100.0)


def case_two_tones_below() -> tuple[Victim, Run]:
    """(f) DRAG at f01 + 2 MHz with a flat-top 150 MHz below f01 (crosstalk), T1/T2."""
    om = 0.03 * complex(math.cos(-1.1), math.sin(-1.1))
    return duffing(t1_ns=20e3, t2_ns=15e3), two_tone_run(-0.15, om)


def case_two_tones_above() -> tuple[Victim, Run]:
    """(f') DRAG at f01 + 2 MHz with a strong flat-top 250 MHz above f01, T1/T2."""
    om = 0.05 * complex(math.cos(2.0), math.sin(2.0))
    return duffing(t1_ns=20e3, t2_ns=15e3), two_tone_run(0.25, om)


def case_two_tones_four_levels() -> tuple[Victim, Run]:
    """(f'') Four levels, a tone 300 MHz below f01 (1 GHz-wide level spread), T1/T2."""
    om = 0.04 * complex(math.cos(0.3), math.sin(0.3))
    return duffing(n_levels=4, t1_ns=20e3, t2_ns=15e3), two_tone_run(-0.3, om)


def charge_victim(n_levels: int = 4, t1_ns: float = 25e3, t2_ns: float = 20e3) -> Victim:
    """Charge-basis transmon, EJ = 20 GHz, EC = 0.25 GHz (λ_n ≠ √(n+1))."""
    lv = charge_basis_levels(20.0, 0.25, n_levels=n_levels)
    return Victim(np.array(lv.energies_ghz), np.array(lv.ladder), t1_ns, t2_ns)


def case_charge_basis() -> tuple[Victim, Run]:
    """(g) Charge-basis levels: π pulse, then a tone near its own f12 and one 200 MHz off."""
    v = charge_victim()
    f01 = v.f01
    f12 = float(v.levels_ghz[2] - v.levels_ghz[1])
    pi = rotation(0.0, f01, math.pi, sigma=6.0)
    leak = Drive(pi.end_ns, 80.0, f12 + 0.002, 0.008, Envelope("flattop", ramp_ns=10.0))
    off = Drive(pi.end_ns, 80.0, f01 + 0.2, 0.03j, Envelope("flattop", ramp_ns=10.0))
    return v, Run((pi, leak, off), pi.end_ns + 80.0)


# Measured max |ΔP| against QuTiP with the default StepControl, written into the ids.
QUTIP_CASES = [
    pytest.param(case_pi_gaussian, id="a-pi-gaussian-dev2.1e-10"),
    pytest.param(case_pi_gaussian_damped, id="a-pi-gaussian-T1T2-dev3.6e-11"),
    pytest.param(case_stark_ramsey, id="b-stark-ramsey-T1T2-dev3.3e-09"),
    pytest.param(case_stark_ramsey_above, id="b-stark-ramsey-above-dev7.2e-10"),
    pytest.param(case_two_photon, id="b-two-photon-0-2-dev1.4e-08"),
    pytest.param(case_leakage, id="c-leakage-flattop-dev5.0e-10"),
    pytest.param(case_leakage_gauss, id="c-leakage-gaussian-dev5.0e-10"),
    pytest.param(case_partial_pair, id="d-partial-pair-dev7.2e-10"),
    # The two long waits cost QuTiP a few seconds each (the kernel: one exponential).
    pytest.param(case_t1_cascade, id="e-T1-cascade-dev3.7e-11", marks=pytest.mark.slow),
    pytest.param(case_t2_ramsey, id="e-T2-ramsey-dev3.7e-10", marks=pytest.mark.slow),
    pytest.param(case_two_tones_below, id="f-two-tones-150MHz-below-dev4.0e-07"),
    pytest.param(case_two_tones_above, id="f-two-tones-250MHz-above-dev6.3e-09"),
    pytest.param(case_two_tones_four_levels, id="f-two-tones-4-levels-dev1.0e-07"),
    pytest.param(case_charge_basis, id="g-charge-basis-dev1.3e-08"),
]


def max_deviation(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.max(np.abs(np.asarray(a) - np.asarray(b))))


# ----------------------------------------------------------------------------- tests


def test_envelope_scalar_matches_spec() -> None:
    """The QuTiP model's envelopes are the ones xtalkcal.hardware.timeline defines."""
    tau = np.linspace(-1.0, 41.0, 401)
    for env in (Envelope("gaussian", sigma_ns=7.0), Envelope("drag", sigma_ns=6.0, drag_ns=1.3),
                Envelope("flattop", ramp_ns=9.0), Envelope("flattop", ramp_ns=0.0),
                Envelope("square")):
        spec = envelope_values(env, 40.0, tau)
        mine = np.array([envelope_scalar(env, 40.0, float(t)) for t in tau])
        assert max_deviation(spec, mine) < 1e-14, env


@pytest.mark.parametrize("make_case", QUTIP_CASES)
def test_against_qutip(make_case) -> None:
    """Every population of the fast path within 1e-6 of QuTiP (measured values in the ids)."""
    victim, run = make_case()
    ours = fast(victim, run)
    ref = qutip_populations(victim, run)
    assert abs(ref.sum() - 1.0) < 1e-9  # QuTiP's trace is kept: a sanity check of the model
    assert max_deviation(ours, ref) <= TOL_QUTIP


def test_qutip_reference_is_converged() -> None:
    """The QuTiP settings used as the reference are far tighter than the 1e-6 asked for."""
    victim, run = case_two_tones_below()
    tighter = dict(QUTIP_OPTIONS, rtol=1e-12, atol=1e-14, max_step=0.05)
    assert max_deviation(qutip_populations(victim, run),
                         qutip_populations(victim, run, options=tighter)) < 1e-8


def test_pi_pulse_transfers_and_leaks() -> None:
    """(a) The resonant π pulse: |1⟩ reached to ~1 %, leakage to |2⟩ resolved by both paths.

    The leakage is ~7e-5; the two paths agree on it to better than 1 % of its value, so the
    agreement is not just that of two numbers that are both ≈ 0.
    """
    victim, run = case_pi_gaussian()
    ours, ref = fast(victim, run), qutip_populations(victim, run)
    assert ours[1] > 0.98
    assert 1e-5 < ref[2] < 1e-3
    assert abs(ours[2] - ref[2]) < 0.01 * ref[2]


# --- (b) AC Stark shift ------------------------------------------------------------------------

STARK_OMEGA = 0.005  # GHz (5 MHz Rabi rate): Ω/|Δ|, Ω/|Δ − α| ≤ 0.1 at every Δ below
STARK_DETUNINGS = [0.1, 0.05, -0.05, -0.15, -0.3]  # GHz; avoid Δ = α/2, the 0–2 two-photon line


def stark_formula(omega: float, detuning: float, alpha: float) -> float:
    """δ = Ω²α / (2Δ(Δ − α)), Δ = f_drive − f01, α < 0.

    Second-order perturbation theory in the frame of the drive (levels 0, −Δ, −2Δ + α;
    couplings Ω/2 and λ_1·Ω/2 = Ω/√2): δ = −Ω²/(2Δ) + Ω²/(2(Δ − α)). The same result,
    in another sign convention for Δ, is given in Krantz et al., Appl. Phys. Rev. 6, 021318
    (2019) (transmon AC Stark shift). Two-level limit (|α| → ∞): −Ω²/(2Δ).
    """
    return omega**2 * alpha / (2.0 * detuning * (detuning - alpha))


def stark_exact(omega: float, detuning: float, victim: Victim) -> float:
    """Shift of the dressed 0–1 splitting from diagonalising the static RWA Hamiltonian."""
    n = np.arange(victim.n_levels)
    h = np.diag(victim.levels_ghz - n * (victim.f01 + detuning))
    h = h + np.diag(0.5 * omega * victim.ladder, -1) + np.diag(0.5 * omega * victim.ladder, 1)
    w, u = np.linalg.eigh(h)
    i0, i1 = int(np.argmax(np.abs(u[0]))), int(np.argmax(np.abs(u[1])))
    return detuning + w[i1] - w[i0]


def ramsey_phase(p1_phase0: float, p1_phase90: float) -> float:
    """Phase χ of the coherence from the two quadratures of a Ramsey experiment.

    Ideal pulses, |1⟩ acquiring e^{−iχ} relative to |0⟩ between them: P1(φ) = (1 + cos(φ + χ))/2,
    so cos χ = 2P1(0) − 1 and sin χ = 1 − 2P1(π/2).
    """
    return math.atan2(1.0 - 2.0 * p1_phase90, 2.0 * p1_phase0 - 1.0)


def measured_stark_shift(victim: Victim, detuning: float, omega: float,
                         extra_flat_ns: float) -> float:
    """Stark shift (GHz) from the Ramsey phase difference of two flat-top lengths.

    Taking the difference removes the phase picked up in the ramps and the π/2 pulses.
    """
    runs = [stark_ramsey_run(detuning, omega, flat, phase)
            for flat in (100.0, 100.0 + extra_flat_ns) for phase in (0.0, math.pi / 2)]
    p1 = fast(victim, runs)[:, 1]
    chi_short = ramsey_phase(p1[0], p1[1])
    chi_long = ramsey_phase(p1[2], p1[3])
    dchi = (chi_long - chi_short + math.pi) % TWO_PI - math.pi
    return dchi / (TWO_PI * extra_flat_ns)


@pytest.mark.parametrize("detuning", STARK_DETUNINGS)
def test_stark_shift_matches_perturbative_formula(detuning: float) -> None:
    """(b) Ramsey-measured AC Stark shift against Krantz et al. (2019) and exact diagonalisation.

    Measured (default StepControl, Ω = 5 MHz, α = −200 MHz): relative error against the formula
    −3e-4 (Δ=+100), −2.0e-3 (+50), −3.8e-3 (−50), −4.6e-3 (−150), −1.6e-3 (−300 MHz), i.e.
    the fourth order in Ω/Δ; against exact diagonalisation ≤ 1e-4. The two-level formula is
    25–150 % off at these points, so the check does see the second transition.
    """
    victim = duffing()
    predicted = stark_formula(STARK_OMEGA, detuning, ALPHA)
    # Flat-top length chosen for a ~2 rad phase difference: no 2π ambiguity, good resolution.
    extra = 2.0 / (TWO_PI * abs(predicted))
    shift = measured_stark_shift(victim, detuning, STARK_OMEGA, extra)
    assert math.copysign(1.0, shift) == math.copysign(1.0, predicted)
    assert abs(shift / predicted - 1.0) < 0.03  # next order: (Ω/Δ)² ≲ 1 % here
    assert abs(shift / stark_exact(STARK_OMEGA, detuning, victim) - 1.0) < 1e-3
    two_level = -(STARK_OMEGA**2) / (2.0 * detuning)
    assert abs(two_level / predicted - 1.0) > 0.2  # the 3-level formula is what is tested


# --- (d) cancellation ---------------------------------------------------------------------------


def cancelling_ramsey(with_pair: bool) -> Run:
    """π/2 – [two DRAG tones at f01 + 30 MHz with Ω_b = −Ω_a] – π/2, with T1/T2 victim."""
    half = rotation(0.0, F01, math.pi / 2, sigma=5.0)
    second = rotation(60.0, F01, math.pi / 2, sigma=5.0, phase=1.0)
    om = 0.02 * complex(math.cos(0.7), math.sin(0.7))
    env = Envelope("drag", sigma_ns=10.0, drag_ns=0.8)
    pair = (Drive(20.0, 40.0, F01 + 0.03, om, env), Drive(20.0, 40.0, F01 + 0.03, -om, env))
    return Run((half, *pair, second) if with_pair else (half, second), 80.0)


def test_cancelling_pair_is_no_tone() -> None:
    """(d) Ω_a + Ω_b = 0 with one envelope and frequency: populations as with no tones.

    Measured: 2e-16 (pair alone from |0⟩) and ~1e-13 (inside a Ramsey sequence).
    """
    victim = duffing(t1_ns=20e3, t2_ns=15e3)
    with_pair, without = fast(victim, [cancelling_ramsey(True), cancelling_ramsey(False)])
    assert max_deviation(with_pair, without) < 1e-10
    alone = Run(cancelling_ramsey(True).drives[1:3], 80.0)
    assert max_deviation(fast(victim, alone), [1.0, 0.0, 0.0]) < 1e-10
    # ... and the pair is not a no-op by accident: one of its tones alone does change things.
    one = Run(cancelling_ramsey(True).drives[:2] + cancelling_ramsey(True).drives[3:], 80.0)
    assert max_deviation(fast(victim, one), without) > 1e-2


def test_partial_pair_equals_single_sum_tone() -> None:
    """(d) A partly cancelling pair is the single tone of the summed amplitude.

    Measured: ~1e-14 between the two; the pair against QuTiP is in ``test_against_qutip``.
    """
    victim, split = partial_pair(split=True)
    _, single = partial_pair(split=False)
    assert max_deviation(fast(victim, split), fast(victim, single)) < 1e-10


# --- (e) relaxation and dephasing -----------------------------------------------------------------


def cascade_populations(p0: np.ndarray, t: float, t1: float) -> np.ndarray:
    """Rate equations of the Lindblad model for three levels (level n decays at n/T1).

    dP2/dt = −2Γ P2, dP1/dt = 2Γ P2 − Γ P1  ⇒  P2 = P2(0)e^{−2Γt},
    P1 = e^{−Γt}[P1(0) + 2P2(0)(1 − e^{−Γt})], P0 = 1 − P1 − P2.
    """
    x = math.exp(-t / t1)
    p2 = p0[2] * x * x
    p1 = x * (p0[1] + 2.0 * p0[2] * (1.0 - x))
    return np.array([1.0 - p1 - p2, p1, p2])


@pytest.mark.parametrize("prepare", ["one", "two"])
def test_t1_decay_matches_rate_equations(prepare: str) -> None:
    """(e) Free decay after preparing |1⟩ (P1 = P1(0)e^{−t/T1}) or |2⟩ (2 → 1 → 0 cascade).

    The populations right after the preparation pulses come from the integrator; the decay
    that follows is compared with the closed form. Measured: ≤ 1e-12.
    """
    t1 = 10e3
    victim = duffing(t1_ns=t1, t2_ns=8e3)
    pulses = [rotation(0.0, F01, math.pi, sigma=8.0)]
    if prepare == "two":
        pulses.append(rotation(32.0, F12, math.pi, sigma=8.0, element=math.sqrt(2.0)))
    t0 = pulses[-1].end_ns
    waits = [0.0, 500.0, 2000.0, 6000.0, 15000.0]
    pops = fast(victim, [Run(tuple(pulses), t0 + w) for w in waits])
    assert pops[0, 1 if prepare == "one" else 2] > 0.98
    for w, p in zip(waits[1:], pops[1:], strict=True):
        assert max_deviation(p, cascade_populations(pops[0], w, t1)) < 1e-9
    if prepare == "one":  # the textbook form, up to the 1e-5 leaked into |2⟩
        assert abs(pops[3, 1] / pops[0, 1] - math.exp(-6000.0 / t1)) < 1e-4


def test_t2_ramsey_decay() -> None:
    """(e) Ramsey coherence on resonance decays as e^{−t/T2} (T1 = 15 µs, T2 = 10 µs).

    The coherence is the length of the Bloch vector's xy part, read from four phases of the
    second π/2 pulse: C ∝ hypot(P1(0) − P1(π), P1(3π/2) − P1(π/2)). Taking the differences of
    opposite phases cancels what the pulse maps from the z part (T1 regrows it during the wait,
    and the 3-level pulse's rotation axis is slightly tilted out of the xy plane). Measured
    deviation of C(t)/C(0) from e^{−t/T2}: 9e-7 (a two-level victim gives 2e-14).
    """
    t1, t2 = 15e3, 10e3
    victim = duffing(t1_ns=t1, t2_ns=t2)
    waits = [0.0, 2000.0, 5000.0, 10000.0, 20000.0]
    phases = [0.0, math.pi / 2, math.pi, 1.5 * math.pi]
    runs = []
    for w in waits:
        for phase in phases:
            half = rotation(0.0, F01, math.pi / 2, sigma=10.0)
            second = rotation(half.end_ns + w, F01, math.pi / 2, sigma=10.0, phase=phase)
            runs.append(Run((half, second), second.end_ns))
    p1 = fast(victim, runs)[:, 1].reshape(len(waits), len(phases))
    coherence = np.hypot(p1[:, 0] - p1[:, 2], p1[:, 3] - p1[:, 1])
    expected = np.exp(-np.array(waits) / t2)
    assert np.max(np.abs(coherence / coherence[0] - expected)) < 1e-5
    # T1 alone would give e^{−t/(2T1)}: the pure-dephasing part is really there.
    assert abs(coherence[3] / coherence[0] - math.exp(-10000.0 / (2 * t1))) > 0.1


# --- the comparison can fail ----------------------------------------------------------------------


@pytest.mark.parametrize(
    ("make_case", "flip"),
    [
        pytest.param(case_leakage, "anharmonicity", id="leakage-flip-alpha-dev0.80"),
        pytest.param(case_two_tones_below, "anharmonicity", id="two-tones-flip-alpha-dev0.16"),
        pytest.param(case_two_tones_below, "detuning", id="two-tones-flip-detuning-dev0.17"),
        pytest.param(case_stark_ramsey_above, "detuning", id="stark-flip-detuning-dev0.33"),
    ],
)
def test_wrong_model_is_detected(make_case, flip: str) -> None:
    """A QuTiP model with α → −α or e^{+i2π(f_k − f)t} disagrees by ≫ 1e-4.

    Measured deviations are in the ids (0.16–0.80): thousands of times the tolerance.
    """
    victim, run = make_case()
    wrong = qutip_populations(victim, run, flip_anharmonicity=flip == "anharmonicity",
                              detuning_sign=-1.0 if flip == "detuning" else 1.0)
    assert max_deviation(fast(victim, run), wrong) > 100 * TOL_QUTIP


# --- stepping against SciPy -------------------------------------------------------------------


def random_runs(rng: np.random.Generator, n_runs: int) -> list[tuple[Victim, Run]]:
    """Random victims and tones: 1–3 tones of every envelope, ±300 MHz, up to 40 MHz Rabi."""
    out = []
    for _ in range(n_runs):
        n_levels = int(rng.integers(3, 5))
        t1 = float(rng.uniform(5e3, 50e3))
        victim = duffing(float(rng.uniform(4.5, 6.0)), float(rng.uniform(-0.3, -0.15)),
                         n_levels, t1, float(rng.uniform(0.3, 2.0) * t1))
        drives = []
        for _ in range(int(rng.integers(1, 4))):
            kind = str(rng.choice(["gaussian", "drag", "flattop", "square"]))
            dur = float(rng.uniform(16.0, 60.0))
            env = {
                "gaussian": Envelope("gaussian", sigma_ns=dur / rng.uniform(3.0, 5.0)),
                "drag": Envelope("drag", sigma_ns=dur / 4.0, drag_ns=float(rng.uniform(-1, 1))),
                "flattop": Envelope("flattop", ramp_ns=float(rng.uniform(2.0, dur / 2))),
                "square": Envelope("square"),
            }[kind]
            near = rng.random() < 0.5
            freq = victim.f01 + float(rng.uniform(-0.005, 0.005) if near
                                      else rng.uniform(-0.3, 0.3))
            omega = float(rng.uniform(0.002, 0.04)) * np.exp(1j * rng.uniform(0, TWO_PI))
            drives.append(Drive(float(rng.uniform(0.0, 40.0)), dur, freq, complex(omega), env))
        end = max(d.end_ns for d in drives) + float(rng.uniform(0.0, 20.0))
        out.append((victim, Run(tuple(drives), end)))
    return out


@pytest.mark.slow
def test_against_scipy_reference() -> None:
    """Fast path against evolve_reference (SciPy DOP853, rtol 1e-10) on seeded random runs.

    The residual is the Magnus stepper's, so it is checked at two step sizes: with the default
    StepControl (measured worst 2.7e-6, asserted ≤ 1e-5) and with ``phase_per_step`` halved
    (measured 1.7e-7, asserted ≤ 1e-6). Halving the step must shrink the worst error by about
    2⁴ (fourth order; measured 16×), which would not happen if the two paths disagreed on
    the model rather than on the discretisation.
    """
    rng = np.random.default_rng(20240611)
    fine = StepControl(phase_per_step=0.5 * StepControl().phase_per_step)
    worst_default = worst_fine = 0.0
    for victim, run in random_runs(rng, 10):
        ref = evolve_reference(victim.levels_ghz, victim.ladder, victim.t1_ns, victim.t2_ns,
                               tone_batch([run]))
        worst_default = max(worst_default, max_deviation(fast(victim, run), ref))
        worst_fine = max(worst_fine, max_deviation(fast(victim, run, fine), ref))
    assert worst_default <= 1e-5
    assert worst_fine <= 1e-6
    assert worst_default / worst_fine > 8.0


# --- known defect ---------------------------------------------------------------------------------


def test_zero_ramp_flattop_overlapping_other_tone() -> None:
    """A flat-top tone with ramp_ns = 0 (a valid Envelope) overlapping a Gaussian elsewhere.

    Envelope.validate allows 0 ≤ 2·ramp_ns ≤ duration, and such a tone is a square tone.
    The kernel (dynamics.py, ``_evolve_one``: ``step = min(step, env_fraction * ramp[k])``)
    then divides by a zero step; ``int(math.ceil(inf))`` is undefined in compiled code and the
    raw populations come out as garbage (seen: 5e-37, 7e247, 5e228), which
    ``evolve_populations`` clips and renormalises silently (seen: [1/3, 1/3, 1/3]).
    Remove the marker once fixed.
    """
    victim = duffing()
    gauss = Drive(0.0, 40.0, F01, 0.0125, Envelope("gaussian", sigma_ns=8.0))
    flat = Drive(0.0, 40.0, F01 + 0.1, 0.02, Envelope("flattop", ramp_ns=0.0))
    run = Run((gauss, flat), 40.0)
    assert max_deviation(fast(victim, run), qutip_populations(victim, run)) <= TOL_QUTIP
