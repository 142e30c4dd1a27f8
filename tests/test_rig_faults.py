"""Attacks on the rig boundary: plug-in rigs that lie, fail or hang.

Each fake rig wraps the bundled simulator and corrupts its answers. A test fails if the
bad answer is used, recorded, or becomes an accepted estimate, or if the failure shows
up as anything but one clear ``RigError`` (one line from the CLI, exit non-zero).

What no check can catch, and so is not attacked here: a rig that labels its qubits in
the requested order but fills one qubit's row with another's data. Shapes, labels,
values and sums are all right; only the physics is wrong.
"""

from __future__ import annotations

import dataclasses
import threading

import h5py
import numpy as np
import pytest
from plugin_rigs import SimPlugin

from xtalkcal.cli import main
from xtalkcal.exceptions import ConfigError, RigError, SafetyLimitError, TimelineError
from xtalkcal.hardware import MIN_LEVELS, Counts, SafetyLimits, Timeline, check_counts
from xtalkcal.measure import BatchRunner
from xtalkcal.measure.sweep import _read
from xtalkcal.store import Ledger

PROTO = ('name = "leak"\n[methods]\nonly = ["leakage"]\n[survey]\nshots = 500\n'
         '[null]\nmax_rounds = 3\n')
KEY = "attack-batch"


# ----------------------------------------------------------------------------- fake rigs
class FaultyRig(SimPlugin):
    """The simulator behind a plug-in that corrupts its answers.

    ``corrupt(counts, call)`` gets the simulator's honest :class:`Counts` and the number
    of the call (1, 2, ...) and returns what the plug-in hands back instead.
    """

    def __init__(self, corrupt=None, *, fail=None, seed: int = 1) -> None:
        super().__init__(seed=seed)
        self.corrupt = corrupt or (lambda c, n: c)
        self.fail = fail
        self.calls = 0

    def describe(self) -> str:
        return "attack rig over " + self.sim.describe()

    def run(self, timelines, shots):
        self.calls += 1
        if self.fail is not None:
            raise self.fail
        return self.corrupt(self.sim.run(timelines, shots), self.calls)


def _with(c: Counts, array=None, **kw) -> Counts:
    return dataclasses.replace(c, counts=c.counts.copy() if array is None else array, **kw)


def swapped_qubits(c: Counts, n=0) -> Counts:
    """Two qubits' labels swapped, the data left in the requested order."""
    assert len(c.qubits) >= 2, "the attack needs a batch that reads two qubits"
    q = list(c.qubits)
    q[0], q[1] = q[1], q[0]
    return _with(c, qubits=tuple(q))


def negative_count(c: Counts, n=0) -> Counts:
    """A count of −1 at level 0, the sum kept right (only the sign is wrong)."""
    a = c.counts.copy()
    a[0, 0, 1] += a[0, 0, 0] + 1
    a[0, 0, 0] = -1
    return _with(c, a)


def off_sum(c: Counts, n=0) -> Counts:
    """One more shot than was played."""
    a = c.counts.copy()
    a[-1, -1, 0] += 1
    return _with(c, a)


def two_levels(c: Counts, n=0) -> Counts:
    """Only levels 0 and 1 (level 2 folded into 1, so every sum still holds)."""
    a = c.counts[:, :, :2].copy()
    a[:, :, 1] += c.counts[:, :, 2:].sum(axis=2)
    return _with(c, a)


def nan_level0(c: Counts, n=0) -> Counts:
    a = c.counts.astype(float)
    a[0, 0, 0] = np.nan
    return _with(c, a)


def fractional(c: Counts, n=0) -> Counts:
    a = c.counts.astype(float)
    a[0, 0, 0] += 0.5
    a[0, 0, 1] -= 0.5
    return _with(c, a)


def missing_timeline(c: Counts, n=0) -> Counts:
    return _with(c, c.counts[:-1].copy())


def unknown_qubit(c: Counts, n=0) -> Counts:
    return _with(c, qubits=("qX",) + c.qubits[1:])


def flat_counts(c: Counts, n=0) -> Counts:
    return _with(c, c.counts.reshape(c.counts.shape[0], -1).copy())


def wrong_shots(c: Counts, n=0) -> Counts:
    return _with(c, shots=c.shots * 2)


def nan_start(c: Counts, n=0) -> Counts:
    return _with(c, started_s=float("nan"))


def backwards_clock(c: Counts, n=0) -> Counts:
    return _with(c, started_s=c.finished_s + 1.0)


def not_counts(c: Counts, n=0):
    return {"qubits": c.qubits, "counts": c.counts}


def huge_count(c: Counts, n=0) -> Counts:
    """Two counts of 2^63 more: in 64-bit integers the sum wraps round to the shots."""
    a = c.counts.astype(np.uint64)
    a[0, 0, 0] += np.uint64(2**63)
    a[0, 0, 1] += np.uint64(2**63)
    assert a.sum(axis=2)[0, 0] == c.shots  # the sum alone would be fooled
    return _with(c, a)


# (corruption, words the error must contain: what was wrong / what was expected)
ATTACKS = [
    (swapped_qubits, "in that order"),
    (negative_count, "negative count"),
    (off_sum, "summing to"),
    (two_levels, f"at least {MIN_LEVELS}"),
    (nan_level0, "non-finite count nan"),
    (fractional, "fractional count"),
    (missing_timeline, "missing 1"),
    (unknown_qubit, "qX"),
    (flat_counts, "shape"),
    (wrong_shots, "shots requested"),
    (nan_start, "started_s"),
    (backwards_clock, "finished_s >= started_s"),
    (not_counts, "expected xtalkcal.Counts"),
    (huge_count, "above the shots"),
]


def _timelines(chip, n: int = 3) -> list[Timeline]:
    """A small batch that reads three qubits (nothing played: safe on any chip)."""
    qubits = chip.qubit_names[:3]
    return [Timeline((), qubits, readout_ns=100.0, label=f"t{k}") for k in range(n)]


# ----------------------------------------------------------------------------- validation
@pytest.mark.parametrize(("corrupt", "words"), ATTACKS, ids=[a[0].__name__ for a in ATTACKS])
def test_corrupt_counts_are_refused_and_never_recorded(tmp_path, corrupt, words):
    rig = FaultyRig(corrupt)
    runner = BatchRunner(rig, tmp_path)
    with pytest.raises(RigError) as err:
        runner.run(KEY, _timelines(rig.chip), 200)
    msg = str(err.value)
    assert KEY in msg and words in msg and "expected" in msg, msg
    assert rig.calls == 1
    # Nothing of the batch is kept or counted: a rerun measures it again.
    assert not list(tmp_path.iterdir())
    assert runner.batches == 0 and runner.shots_executed == 0
    assert runner.last_finished_s is None


def test_honest_counts_pass_and_cannot_be_changed_afterwards():
    """The check does not refuse what the simulator returns; the rig's buffer is copied."""
    rig = FaultyRig()
    tls = _timelines(rig.chip)
    raw = rig.sim.run(tls, 200)
    got = check_counts(raw, batch=KEY, readout=tls[0].readout, n_timelines=3, shots=200)
    np.testing.assert_array_equal(got.counts, raw.counts)
    raw.counts[0, 0, 0] = -5  # a plug-in reusing its buffer for the next batch
    assert got.counts[0, 0, 0] >= 0
    with pytest.raises(ValueError):
        got.counts[0, 0, 0] = 7


# ----------------------------------------------------------------------------- exceptions
@pytest.mark.parametrize("exc", [OSError(5, "AWG not responding"), RuntimeError("FPGA fault"),
                                 ValueError("bad waveform"), KeyError("q3"),
                                 ZeroDivisionError("division by zero"),
                                 ConfigError("driver.ini", "ip", "unreachable")],
                         ids=lambda e: type(e).__name__)
def test_any_plugin_exception_becomes_a_rig_error_naming_the_batch(tmp_path, exc):
    rig = FaultyRig(fail=exc)
    runner = BatchRunner(rig, tmp_path)
    with pytest.raises(RigError) as err:
        runner.run(KEY, _timelines(rig.chip), 100)
    assert KEY in str(err.value) and type(exc).__name__ in str(err.value)
    assert err.value.__cause__ is exc
    assert not list(tmp_path.iterdir())


@pytest.mark.parametrize("exc", [SafetyLimitError("q1-line over its limit"),
                                 TimelineError("tone beyond the readout"),
                                 RigError("interlock open")],
                         ids=lambda e: type(e).__name__)
def test_the_toolkits_own_errors_pass_through_unchanged(exc):
    rig = FaultyRig(fail=exc)
    with pytest.raises(type(exc)) as err:
        BatchRunner(rig).run(KEY, _timelines(rig.chip), 100)
    assert err.value is exc


# ----------------------------------------------------------------------------- timeout
class HangingRig(FaultyRig):
    """A driver call that never comes back (until the test releases it)."""

    def __init__(self, release: threading.Event) -> None:
        super().__init__()
        self.release = release

    def run(self, timelines, shots):
        self.calls += 1
        self.release.wait(60.0)
        return self.sim.run(timelines, shots)


@pytest.fixture()
def release():
    ev = threading.Event()
    yield ev
    ev.set()  # let the abandoned call end so that it holds nothing after the test


def test_a_hanging_rig_call_is_abandoned_and_the_rig_refused_afterwards(tmp_path, release):
    rig = HangingRig(release)
    runner = BatchRunner(rig, tmp_path, timeout_s=0.2)
    with pytest.raises(RigError, match=rf"{KEY}.*did not return within 0.2 s.*unusable"):
        runner.run(KEY, _timelines(rig.chip), 100)
    # The hung call may still be driving the hardware: nothing more is sent.
    with pytest.raises(RigError, match=rf"not sent.*{KEY}"):
        runner.run(KEY + "-next", _timelines(rig.chip), 100)
    assert rig.calls == 1 and not list(tmp_path.iterdir())


def test_timeout_still_checks_and_wraps_what_the_rig_returns(tmp_path):
    """Through the worker thread: good data arrive, bad data and exceptions do not."""
    good = BatchRunner(FaultyRig(), tmp_path / "a", timeout_s=30.0)
    assert good.run(KEY, _timelines(good.rig.chip), 100).counts.sum() == 3 * 3 * 100
    with pytest.raises(RigError, match="negative count"):
        BatchRunner(FaultyRig(negative_count), timeout_s=30.0).run(
            KEY, _timelines(good.rig.chip), 100)
    boom = OSError("link down")
    with pytest.raises(RigError, match="OSError: link down") as err:
        BatchRunner(FaultyRig(fail=boom), timeout_s=30.0).run(KEY, _timelines(good.rig.chip),
                                                               100)
    assert err.value.__cause__ is boom


@pytest.mark.parametrize("bad", [0.0, -1.0, float("nan"), float("inf")])
def test_timeout_must_be_a_positive_time(bad):
    with pytest.raises(ValueError, match="timeout_s"):
        BatchRunner(FaultyRig(), timeout_s=bad)


# ----------------------------------------------------------------------------- the record
def _recorded(tmp_path):
    rig = FaultyRig()
    tls = _timelines(rig.chip)
    BatchRunner(rig, tmp_path).run(KEY, tls, 200)
    return rig, tls, tmp_path / f"{KEY}.h5"


def test_a_record_damaged_on_disk_is_refused_naming_the_file(tmp_path):
    rig, tls, path = _recorded(tmp_path)
    with h5py.File(path, "r+") as f:  # sums kept, one count moved: only the checksum sees it
        c = f["counts"][()]
        c[0, 0, 0] -= 1
        c[0, 0, 1] += 1
        f["counts"][...] = c
    fresh = FaultyRig()
    with pytest.raises(RigError, match="checksum") as err:
        BatchRunner(fresh, tmp_path).run(KEY, tls, 200)
    assert str(path) in str(err.value) and "delete" in str(err.value)
    assert fresh.calls == 0


def test_a_record_that_is_not_hdf5_is_refused_naming_the_file(tmp_path):
    rig, tls, path = _recorded(tmp_path)
    path.write_bytes(path.read_bytes()[:200])  # cut short
    with pytest.raises(RigError, match="cannot be read") as err:
        BatchRunner(FaultyRig(), tmp_path).run(KEY, tls, 200)
    assert str(path) in str(err.value)


def test_a_replayed_record_is_checked_against_the_request(tmp_path):
    """A record without a checksum (or with one forged to match) is checked like the rig."""
    rig, tls, path = _recorded(tmp_path)
    with h5py.File(path, "r+") as f:
        del f.attrs["content"]
        c = f["counts"][()]
        del f["counts"]
        f.create_dataset("counts", data=c[:, :, :2])  # 2 levels
    with pytest.raises(RigError, match=rf"{KEY}.*record holds 2 readout levels") as err:
        BatchRunner(FaultyRig(), tmp_path).run(KEY, tls, 200)
    assert str(path) in str(err.value)


# ----------------------------------------------------------------------------- the CLI
def _factory(corrupt):
    return lambda: FaultyRig(corrupt)


swapped_rig = _factory(swapped_qubits)
negative_rig = _factory(negative_count)
off_sum_rig = _factory(off_sum)
two_level_rig = _factory(two_levels)
nan_rig = _factory(nan_level0)
missing_rig = _factory(missing_timeline)


def oserror_rig():
    return FaultyRig(fail=OSError(5, "Input/output error"))


def runtime_rig():
    return FaultyRig(fail=RuntimeError("digitiser overflow"))


def broken_factory():
    raise OSError(113, "No route to host")


_HANG = threading.Event()


def hanging_rig():
    return HangingRig(_HANG)


_FLAKY = {"calls": 0}


def flaky_rig():
    """Honest, except its second batch of the whole process, which has a negative count."""

    def corrupt(c, n):
        _FLAKY["calls"] += 1
        return negative_count(c) if _FLAKY["calls"] == 2 else c

    return FaultyRig(corrupt)


def _calibrate(tmp_path, rig: str, *extra: str) -> int:
    proto = tmp_path / "p.toml"
    proto.write_text(PROTO)
    return main(["calibrate", "--rig", f"{__name__}:{rig}", "--protocol", str(proto), "-q",
                 "--record", str(tmp_path / "rec"), "--ledger", str(tmp_path / "ledger"),
                 "-o", str(tmp_path / "m.json"), *extra])


def _one_line_error(capsys) -> str:
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("xtalkcal: error:"), err
    assert "Traceback" not in err
    return lines[0]


def _accepted(tmp_path) -> list:
    if not (tmp_path / "ledger").exists():
        return []
    return [e for e in Ledger(tmp_path / "ledger").entries() if e.accepted]


@pytest.mark.parametrize(("rig", "words"), [
    ("swapped_rig", "in that order"), ("negative_rig", "negative count"),
    ("off_sum_rig", "summing to"), ("two_level_rig", "2 readout levels"),
    ("nan_rig", "non-finite count nan"), ("missing_rig", "missing 1"),
])
def test_cli_a_lying_rig_stores_nothing_and_exits_nonzero(tmp_path, capsys, rig, words):
    assert _calibrate(tmp_path, rig) != 0
    line = _one_line_error(capsys)
    assert "batch " in line and words in line, line
    assert _accepted(tmp_path) == []
    assert not (tmp_path / "m.json").exists()
    assert not list((tmp_path / "rec").glob("*.h5"))  # the bad batch was the first


@pytest.mark.parametrize(("rig", "words"), [
    ("oserror_rig", "OSError: [Errno 5] Input/output error"),
    ("runtime_rig", "RuntimeError: digitiser overflow"),
    ("broken_factory", "factory failed: OSError"),
])
def test_cli_a_failing_plugin_gives_one_line_no_traceback(tmp_path, capsys, rig, words):
    assert _calibrate(tmp_path, rig) != 0
    line = _one_line_error(capsys)
    assert words in line, line
    assert _accepted(tmp_path) == []


def test_cli_rig_timeout_abandons_a_hanging_rig(tmp_path, capsys):
    try:
        assert _calibrate(tmp_path, "hanging_rig", "--rig-timeout", "0.2") != 0
    finally:
        _HANG.set()
    line = _one_line_error(capsys)
    assert "did not return within 0.2 s" in line, line
    assert _accepted(tmp_path) == []


def test_cli_a_bad_batch_is_measured_again_on_rerun(tmp_path, capsys):
    _FLAKY["calls"] = 0
    assert _calibrate(tmp_path, "flaky_rig") != 0
    assert "negative count" in _one_line_error(capsys)
    first = sorted((tmp_path / "rec").glob("*.h5"))
    assert len(first) == 1  # the good first batch only; the bad second one was not kept
    assert _accepted(tmp_path) == []

    # The same command again: the first batch is replayed, the second measured anew.
    assert _calibrate(tmp_path, "flaky_rig") == 0
    assert "resumed from" in capsys.readouterr().out
    assert _accepted(tmp_path)
    files = sorted((tmp_path / "rec").glob("*.h5"))
    assert len(files) > 2
    for path in files:  # every recorded batch is one an honest rig could have returned
        counts, _ = _read(path)
        ok = check_counts(counts, batch=path.name, readout=counts.qubits,
                          n_timelines=counts.counts.shape[0], shots=counts.shots)
        assert (ok.counts >= 0).all() and (ok.counts.sum(axis=2) == ok.shots).all()


class _UnstatedRig(FaultyRig):
    """An honest plug-in whose chip states no limits (a chip file without [limits])."""

    runs = 0

    @property
    def chip(self):
        return dataclasses.replace(self.sim.chip, limits=SafetyLimits(), source="lab-chip.toml")

    def run(self, timelines, shots):
        _UnstatedRig.runs += 1
        return super().run(timelines, shots)


def unstated_rig():
    return _UnstatedRig()


def test_cli_a_plugin_without_stated_limits_is_refused_before_any_shot(tmp_path, capsys):
    # Power into a cryostat: a lab's own rig is driven only under limits its chip file
    # states. The bundled simulator runs without them; a plug-in does not.
    _UnstatedRig.runs = 0
    assert _calibrate(tmp_path, "unstated_rig") == 2
    line = _one_line_error(capsys)
    assert "lab-chip.toml: limits: no [limits] table" in line, line
    assert _UnstatedRig.runs == 0 and _accepted(tmp_path) == []
    assert not (tmp_path / "m.json").exists()


def test_check_warns_about_a_chip_file_without_limits(tmp_path, capsys, demo_chip):
    import tomli_w

    bare = demo_chip.to_dict()
    del bare["limits"]
    path = tmp_path / "chip.toml"
    path.write_text(tomli_w.dumps(bare))
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert f"warning: {path}: no [limits] table" in out
    stated = tmp_path / "stated.toml"
    stated.write_text(tomli_w.dumps(demo_chip.to_dict()))
    assert main(["check", str(stated)]) == 0
    assert "warning" not in capsys.readouterr().out
