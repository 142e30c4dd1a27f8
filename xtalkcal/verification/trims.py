"""Own-drive trims and readout offsets measured before a benchmark.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from xtalkcal.hardware import Rig, Timeline
from xtalkcal.measure import BatchRunner
from xtalkcal.verification.rb import GateSet, _survival


@dataclass(frozen=True)
class DriveTrim:
    """How much a timeline transform changes a qubit's own drive (amplitude).

    ``change`` is the relative change of the rotation angle of the qubit's own pulses
    with the transform on, against off (e.g. +0.006: 0.6 % over-rotation); divide the
    qubit's own-frequency tones by ``1 + change`` to undo it. ``stderr`` its standard error.
    """

    qubit: str
    change: float
    stderr: float


def own_drive_trims(rig: Rig, qubits: Sequence[str],
                    transform: Callable[[Timeline], Timeline], *, gates: GateSet = GateSet(),
                    repeats: int = 41, shots: int = 4000, runner: BatchRunner | None = None,
                    key: str = "trim") -> dict[str, DriveTrim]:
    """Measure the change of each qubit's own drive that ``transform`` causes.

    Cancellation tones played on other lines at a qubit's own frequency reach that qubit
    too and change its own drive by ``Σ_k X_jk·r_kj`` (second order in the crosstalk); a
    lab re-trims gate amplitudes with compensation on (common practice). Only the
    magnitude matters for gates: a common phase of all of a qubit's pulses is a frame
    change (a virtual Z), invisible to preparation in |0⟩ and readout in Z.

    Amplitude amplification: from |0⟩, N = ``repeats`` (4m + 1) and N + 2 pulses X/2 give
    P1 = b + (a/2)(1 ± sin(N·π/2·δ)) for an angle error δ, so their difference is
    a·sin(N·π·δ/2) (to first order in 2/N, the two lengths differ by one π pulse); the
    contrast ``a`` comes from an idle and an X timeline. Each qubit is measured alone (the
    others idle), with and without the transform; the change is δ_on − δ_off.
    """
    if repeats % 4 != 1:
        raise ValueError(f"repeats must be 4m + 1, got {repeats}")
    runner = runner or BatchRunner(rig)
    chip = rig.chip
    slot = gates.slot_ns
    out = {}
    for q in qubits:
        tls: list[Timeline] = []
        for n_pulses, prim in ((0, "X/2"), (1, "X"), (repeats, "X/2"), (repeats + 2, "X/2")):
            tones = tuple(t for k in range(n_pulses)
                          if (t := gates.tone(chip, q, prim, k * slot)) is not None)
            base = Timeline(tones, (q,), readout_ns=max(n_pulses, 1) * slot,
                            label=f"{key}-{q}-{prim}x{n_pulses}")
            tls.append(base)
            if n_pulses >= repeats:
                tls.append(transform(base))
        counts = runner.run(f"{key}-{q}", tls, shots)
        c = counts.counts[:, 0, 1:].sum(axis=-1) / float(shots)  # P(excited)
        p_idle, p_x, p_n, p_n_on, p_n2, p_n2_on = c
        a = p_x - p_idle
        se = math.sqrt(2 * 0.25 / shots)  # difference of two binomial means, worst case
        deltas = []
        for diff in (p_n - p_n2, p_n_on - p_n2_on):
            u = min(max(diff / a, -1.0), 1.0) if a > 0 else math.nan
            deltas.append(2 * math.asin(u) / (repeats * math.pi))
        err = 2 * se / (a * repeats * math.pi) * math.sqrt(2) if a > 0 else math.nan
        out[q] = DriveTrim(q, deltas[1] - deltas[0], err)
    return out


def readout_offsets(rig: Rig, qubits: Sequence[str], *, gates: GateSet = GateSet(),
                    shots: int = 20000, runner: BatchRunner | None = None) -> dict[str, float]:
    """Asymptote B of the RB decay of each qubit, from its readout.

    A fully depolarised qubit is ½(|0⟩⟨0| + |1⟩⟨1|), so B = ½[P(read 0 | 0) +
    P(read 0 | 1)]; both are measured here (|1⟩ prepared by one X pulse, whose own error
    is ~1e-4 and negligible next to the assignment errors). Fixing B makes p well
    determined from decays that stop far above the asymptote, as ours must (a full
    decay would need sequences longer than the repetition time). Leakage moves the true
    asymptote, one more reason why r is then an effective figure.

    Returns
    -------
    dict of str → float
        B per qubit (dimensionless).
    """
    runner = runner or BatchRunner(rig)
    chip = rig.chip
    qubits = tuple(qubits)
    x = [gates.tone(chip, q, "X", 0.0) for q in qubits]
    tls = [Timeline((), qubits, readout_ns=gates.slot_ns, label="rbB-ground"),
           Timeline(tuple(t for t in x if t is not None), qubits, readout_ns=gates.slot_ns,
                    label="rbB-excited")]
    counts = runner.run("rb-readout-offsets", tls, shots)
    return {q: float(0.5 * _survival(counts, q).sum()) for q in qubits}
