"""Coupled-transmon cluster of the simulated device against outside references.

* Static ZZ against exact diagonalisation in QuTiP of the two-transmon Hamiltonian and against
  the second-order formula ZZ = 2J²(α_A+α_B)/((Δ+α_A)(Δ−α_B)) (Pettersson Fors,
  Fernández-Pendás, Frisk Kockum, arXiv:2408.15402 (2024)).
* The dressed-state leak of A's drive onto B's transition against first-order perturbation
  theory, |J/Δ| (textbook Rayleigh–Schrödinger perturbation theory).
* Driven, damped two-transmon dynamics against QuTiP's mesolve (density-matrix elements).
"""

from __future__ import annotations

import math

import numpy as np
import qutip as qt

from simulated_device.cluster import Cluster, ClusterTones, evolve_cluster
from simulated_device.transmon import duffing_levels

FA, FB, ALPHA, J = 4.8, 5.0, -0.3, 0.003  # GHz; Δ = f_A − f_B = −200 MHz, J = 3 MHz


def pair(t1=40e3, t2=30e3) -> Cluster:
    return Cluster(("b", "a"), (duffing_levels(FB, ALPHA, 3), duffing_levels(FA, ALPHA, 3)),
                   np.array([t1, t1]), np.array([t2, t2]), np.array([[0.0, J], [J, 0.0]]))


def test_zz_against_qutip_and_second_order_formula():
    b, a = qt.destroy(3), qt.destroy(3)
    i3 = qt.qeye(3)
    B, A = qt.tensor(b, i3), qt.tensor(i3, a)
    h = (FB * B.dag() * B + ALPHA / 2 * B.dag() * B.dag() * B * B + FA * A.dag() * A
         + ALPHA / 2 * A.dag() * A.dag() * A * A + J * (A.dag() * B + A * B.dag()))
    e = np.sort(h.eigenenergies())
    # Far from crossings the order is 00, A(10), B(01), then the two-excitation manifold;
    # 11 is the two-excitation level nearest FA + FB.
    e11 = min(e[3:], key=lambda x: abs(x - (FA + FB)))
    zz_qutip = e11 - e[1] - e[2] + e[0]
    zz = pair().zz_ghz()
    delta = FA - FB
    formula = 2 * J**2 * (2 * ALPHA) / ((delta + ALPHA) * (delta - ALPHA))
    assert abs(zz - zz_qutip) < 1e-12
    assert abs(zz / formula - 1) < 0.004


def test_dressed_leak_is_j_over_delta():
    el, _ = pair().transition_elements(0, [0])
    leak_db = 20 * math.log10(abs(el[1] / el[0]))
    assert abs(leak_db - 20 * math.log10(J / abs(FA - FB))) < 0.05


def test_driven_pair_against_mesolve():
    c = pair()
    om_b, om_a = 0.0125, 0.006 + 0.002j
    tones = ClusterTones(np.array([[0.0, 5.0]]), np.array([[40.0, 40.0]]),
                         np.array([[FB, FA]]), np.array([[[om_b, 0.0], [0.0, om_a]]]),
                         np.array([[0, 2]]), np.array([[10.0, 1.0]]), np.array([[0.0, 0.0]]),
                         np.array([[0.0, 8.0]]), np.array([2]), np.array([50.0]))
    rho = evolve_cluster(c, tones)[0]
    tp = 2 * math.pi
    b, a, i3 = qt.destroy(3), qt.destroy(3), qt.qeye(3)
    B, A = qt.tensor(b, i3), qt.tensor(i3, a)
    nb_, na_ = B.dag() * B, A.dag() * A
    # Frame rotating at each transmon's own f01: drives keep their carrier offsets there.
    h0 = tp * (ALPHA / 2 * B.dag() * B.dag() * B * B + ALPHA / 2 * A.dag() * A.dag() * A * A)
    hj = [tp * J * A.dag() * B, lambda t: complex(math.cos(tp * (FA - FB) * t),
                                                   math.sin(tp * (FA - FB) * t))]
    hjc = [tp * J * A * B.dag(), lambda t: complex(math.cos(tp * (FA - FB) * t),
                                                    -math.sin(tp * (FA - FB) * t))]

    def gauss(t):
        if not 0 <= t <= 40:
            return 0.0
        edge = math.exp(-(20.0**2) / 200.0)
        return (math.exp(-((t - 20) ** 2) / 200.0) - edge) / (1 - edge)

    def flat(t):
        tr = t - 5.0
        if not 0 <= tr <= 40:
            return 0.0
        if tr < 8:
            return 0.5 * (1 - math.cos(math.pi * tr / 8))
        if tr > 32:
            return 0.5 * (1 - math.cos(math.pi * (40 - tr) / 8))
        return 1.0

    terms = [h0, hj, hjc,
             [tp * 0.5 * om_b * B.dag(), gauss], [tp * 0.5 * np.conj(om_b) * B, gauss],
             [tp * 0.5 * om_a * A.dag(), flat], [tp * 0.5 * np.conj(om_a) * A, flat]]
    g1, g2 = 1 / 40e3, 1 / 30e3
    gphi = g2 - g1 / 2
    c_ops = [math.sqrt(g1) * B, math.sqrt(g1) * A, math.sqrt(2 * gphi) * nb_,
             math.sqrt(2 * gphi) * na_]
    opts = {"atol": 1e-12, "rtol": 1e-10, "max_step": 0.05, "nsteps": 10**8,
            "method": "dop853", "progress_bar": False}
    res = qt.mesolve(qt.QobjEvo(terms), qt.ket2dm(qt.tensor(qt.basis(3, 0), qt.basis(3, 0))),
                     [0.0, 50.0], c_ops=c_ops, options=opts)
    ref = res.states[-1].full()
    assert np.max(np.abs(rho - ref)) < 1e-6


def test_conditional_leak_against_first_order_perturbation():
    # First order in J (Rayleigh–Schrödinger): A's drive on B's dressed 0–1 transition is
    # −J/Δ with A in |0⟩ and J/Δ − 2J/(Δ + α_A) with A in |1⟩ (Δ = f_A − f_B); the
    # difference 2Jα_A/(Δ(Δ + α_A)) is the part no single tone can cancel.
    c = pair()
    delta = FA - FB
    x0 = (lambda el: el[1] / el[0])(c.transition_elements(0, [0])[0])
    x1 = (lambda el: el[1] / el[0])(c.transition_elements(0, [1])[0])
    assert abs(x0 / (-J / delta) - 1) < 0.02
    assert abs((x1 - x0) / (2 * J * ALPHA / (delta * (delta + ALPHA))) - 1) < 0.05
