"""Attacks on the ledger's integrity: rotted bits, damaged and missing commit files, broken
markers. Each test fails if damage is read back silently as data, hides the intact commits,
or reaches the user as a traceback instead of one line naming the file."""

from __future__ import annotations

import json
import os
import shutil
import sys
import types
from collections.abc import Callable
from pathlib import Path

import h5py
import numpy as np
import pytest
from test_ledger import FIXTURE_V1, assert_same_dataset, canon, make_entry, small_sweep

from xtalkcal.cli import main
from xtalkcal.exceptions import LedgerError, RigError
from xtalkcal.store import Ledger, quarantine_commit, verify_ledger

MARKER = "xtalkcal-ledger.json"
CHIP = "grid9-demo"  # the bundled demo chip, so that the calibrate tests can share ledgers


def _name(seq: int) -> str:
    return f"{seq:010d}-{seq:010d}.h5"


def _digest(seq: int) -> str:
    return f"{seq:010d}-{seq:010d}.sha256.json"


def build(path: Path) -> Ledger:
    """Three commits: entries with sweeps, a rejected (NaN) entry, another sweep."""
    led = Ledger.create(path, chip=CHIP)
    led.append([make_entry(sweep_id="s1"), make_entry(victim="q3", value=2e-3 + 1e-3j)],
               sweeps={"s1": small_sweep(1)})
    led.append([make_entry(aggressor="L2", verdict="rejected", reason="no null in the ring",
                           value=complex("nan+nanj"), quality=float("nan"),
                           covariance=[[float("nan")] * 2] * 2, measured_at_s=200.0)])
    led.append([make_entry(measured_at_s=300.0, value=3.3e-3 - 1.1e-3j, sweep_id="s3")],
               sweeps={"s3": small_sweep(3)})
    return led


def read_all(path: Path) -> tuple[list, dict]:
    """Everything a reader can get out of a ledger: entries, the current matrix, sweeps."""
    led = Ledger(path)
    entries = [canon(e) for e in led.entries()]
    current = [canon(e) for e in led.current().entries.values()]
    return entries + current, {sid: led.sweep(sid) for sid in led.sweep_ids()}


def same_content(got: tuple[list, dict], want: tuple[list, dict]) -> bool:
    if got[0] != want[0] or list(got[1]) != list(want[1]):
        return False
    try:
        for sid, ds in want[1].items():
            assert_same_dataset(got[1][sid], ds)
    except AssertionError:
        return False
    return True


def reseal(path: Path, seq: int) -> None:
    """Give a tampered commit file a matching digest, as a buggy or foreign writer would:
    what remains to catch it is the decoder's own checks."""
    import hashlib

    dpath = path / _digest(seq)
    info = json.loads(dpath.read_text())
    data = (path / _name(seq)).read_bytes()
    info.update(size=len(data), sha256=hashlib.sha256(data).hexdigest())
    dpath.write_text(json.dumps(info))


# --------------------------------------------------------------------------------------------
# bit rot
# --------------------------------------------------------------------------------------------


def test_random_bit_flips_are_detected_or_change_nothing(tmp_path: Path) -> None:
    """200 single-bit flips in commit files, 60 in their digest files and 40 in the marker:
    each is refused with a LedgerError naming the flipped file, or reads back identically."""
    path = tmp_path / "l"
    build(path)
    want = read_all(path)
    rng = np.random.default_rng(20310314)
    targets = ([(sorted(path.glob("*.h5")), 200),
                (sorted(path.glob("*.sha256.json")), 60),
                ([path / MARKER], 40)])
    detected = silent_changes = 0
    for files, n in targets:
        blobs = {f: f.read_bytes() for f in files}
        sizes = np.array([len(b) for b in blobs.values()])
        for _ in range(n):
            k = int(rng.choice(len(files), p=sizes / sizes.sum()))
            target = files[k]
            original = blobs[target]
            pos, bit = int(rng.integers(len(original))), int(rng.integers(8))
            flipped = bytearray(original)
            flipped[pos] ^= 1 << bit
            target.write_bytes(bytes(flipped))
            try:
                got = read_all(path)
            except LedgerError as exc:
                stem = target.name.split(".")[0]
                assert stem in str(exc), (target.name, pos, bit, str(exc))
                detected += 1
            else:
                if not same_content(got, want):
                    silent_changes += 1
            finally:
                target.write_bytes(original)
    assert silent_changes == 0
    assert detected >= 200  # every flip of a commit file changes its SHA-256
    assert same_content(read_all(path), want)


def test_fletcher32_catches_rot_in_sweep_data_read_after_open(tmp_path: Path) -> None:
    """A sweep's data rots after the ledger was opened (or its digest was rewritten to
    match): its chunk checksum refuses it when it is read, naming the file."""
    path = tmp_path / "l"
    build(path)
    led = Ledger(path)  # digests checked now
    target = path / _name(1)
    with h5py.File(target, "r") as fh:
        data = fh["sweeps/s1/p2"]
        assert data.dtype == np.float64 and data.ndim == 2 and data.fletcher32
        offset = data.id.get_chunk_info(0).byte_offset
    before = target.stat()
    data = bytearray(target.read_bytes())
    data[offset + 3] ^= 0x10
    with open(target, "r+b") as fh:  # rot in place: same inode, size and times
        fh.write(bytes(data))
    os.utime(target, ns=(before.st_atime_ns, before.st_mtime_ns))
    with pytest.raises(LedgerError, match=f"{_name(1)}: sweep 's1'.*(?i:checksum)"):
        led.sweep("s1")
    reseal(path, 1)  # its digest rewritten to match: opening succeeds, reading does not
    with pytest.raises(LedgerError, match=_name(1)):
        Ledger(path).sweep("s1")


def test_a_commit_file_replaced_after_open_is_checked_again(tmp_path: Path) -> None:
    path = tmp_path / "l"
    build(path)
    led = Ledger(path)
    other = tmp_path / "other"
    build(other)
    data = (path / _name(1)).read_bytes()
    (path / _name(1)).write_bytes(data[:-1] + bytes([data[-1] ^ 1]))
    with pytest.raises(LedgerError, match=f"{_name(1)}: SHA-256 mismatch"):
        led.sweep("s1")


# --------------------------------------------------------------------------------------------
# one bad commit among good ones
# --------------------------------------------------------------------------------------------


def test_bad_commits_are_each_named_and_do_not_hide_the_good_ones(tmp_path: Path,
                                                                  capsys) -> None:
    path = tmp_path / "l"
    led = build(path)
    led.append([make_entry(victim="q4", measured_at_s=400.0)])
    for seq in (2, 4):
        data = bytearray((path / _name(seq)).read_bytes())
        data[len(data) // 2] ^= 0x01
        (path / _name(seq)).write_bytes(bytes(data))
    for reader in (lambda: Ledger(path), lambda: Ledger(path).current()):
        with pytest.raises(LedgerError) as info:
            reader()
        msg = str(info.value)
        assert _name(2) in msg and _name(4) in msg and "quarantine" in msg
        assert _name(1) not in msg and _name(3) not in msg
    report = verify_ledger(path)
    assert [(c.file, c.status) for c in report.commits] == [
        (_name(1), "ok"), (_name(2), "bad"), (_name(3), "ok"), (_name(4), "bad")]
    assert "SHA-256" in report.commits[1].problem
    # The command line says the same, one line per commit, and fails.
    assert main(["check", str(path)]) == 2
    captured = capsys.readouterr()
    assert f"{_name(1)}: commit 1: OK" in captured.out and f"{_name(2)}: commit 2: " in captured.out
    assert captured.err.count("\n") == 1 and "Traceback" not in captured.err
    # Quarantined, the bad ones leave the history and the rest reads again.
    for seq in (2, 4):
        quarantine_commit(path, _name(seq))
    left = Ledger(path)
    assert {e.seq for e in left.entries()} == {1, 3}
    assert [c.status for c in left.verify().commits] == ["ok", "quarantined", "ok",
                                                         "quarantined"]
    assert left.append([make_entry(victim="q5", measured_at_s=500.0)]).seq == 5
    assert main(["check", str(path)]) == 0


# --------------------------------------------------------------------------------------------
# damaged files: every reader, and `due`, fail with one line naming the file
# --------------------------------------------------------------------------------------------


def _edit(seq: int, fn: Callable[[h5py.File], None], *, sealed: bool = True):
    def attack(path: Path) -> str:
        with h5py.File(path / _name(seq), "r+") as fh:
            fn(fh)
        if sealed:
            reseal(path, seq)
        return _name(seq)

    return attack


def _set_attr(key: str, value: object):
    def fn(fh: h5py.File) -> None:
        fh.attrs[key] = value

    return fn


def _delete(member: str):
    def fn(fh: h5py.File) -> None:
        del fh[member]

    return fn


def _replace_column(name: str, convert: Callable[[np.ndarray], np.ndarray]):
    def fn(fh: h5py.File) -> None:
        old = fh["entries"][name]
        data = old.asstr()[()] if h5py.check_string_dtype(old.dtype) else old[()]
        del fh["entries"][name]
        fh["entries"].create_dataset(name, data=convert(data))

    return fn


def _del_attr(member: str, key: str):
    def fn(fh: h5py.File) -> None:
        del fh[member].attrs[key]

    return fn


def _edit_layout(change: Callable[[dict], object]):
    def fn(fh: h5py.File) -> None:
        g = fh["sweeps/s1"]
        layout = json.loads(g.attrs["xtalkcal_layout"])
        change(layout)
        g.attrs["xtalkcal_layout"] = json.dumps(layout)

    return fn


def _write(seq: int, make: Callable[[bytes], bytes], *, sealed: bool = False):
    def attack(path: Path) -> str:
        target = path / _name(seq)
        target.write_bytes(make(target.read_bytes()))
        if sealed:
            reseal(path, seq)
        return _name(seq)

    return attack


def _remove(*names: str, blame: str):
    def attack(path: Path) -> str:
        for n in names:
            (path / n).unlink()
        return blame

    return attack


def _garbage(name: str, blame: str):
    def attack(path: Path) -> str:
        (path / name).write_bytes(b'{"format": "xtalkcal-commit-digest", "sha256": ')
        return blame

    return attack


def _marker_field(key: str, value: object):
    def attack(path: Path) -> str:
        info = json.loads((path / MARKER).read_text())
        (path / MARKER).write_text(json.dumps({**info, key: value}))
        return MARKER

    return attack


ATTACKS: dict[str, Callable[[Path], str]] = {
    "version as text": _edit(2, _set_attr("version", "one")),
    "version as text, digest not updated": _edit(
        2, _set_attr("version", "one"), sealed=False),
    "version as float": _edit(2, _set_attr("version", 1.0)),
    "seq range attribute as text": _edit(3, _set_attr("seq_last", "3")),
    "chip attribute of another chip": _edit(2, _set_attr("chip", "other-chip")),
    "entries group missing": _edit(2, _delete("entries")),
    "sweeps group missing": _edit(1, _delete("sweeps")),
    "a sweep lost a variable": _edit(1, _delete("sweeps/s1/p2")),
    "float column stored as text": _edit(
        2, _replace_column("value_re", lambda a: a.astype(str).astype(object))),
    "int column stored as float": _edit(2, _replace_column("seq", lambda a: a + 0.5)),
    "text column stored as numbers": _edit(
        2, _replace_column("aggressor", lambda a: np.zeros(a.shape))),
    "a column shorter than the others": _edit(2, _replace_column("shots", lambda a: a[:0])),
    "entries group renamed": _edit(2, lambda fh: fh.move("entries", "entries_old")),
    "a sweep group renamed": _edit(1, lambda fh: fh.move("sweeps/s1", "sweeps/s9")),
    "sweeps group replaced by a dataset": _edit(
        2, lambda fh: (fh.__delitem__("sweeps"), fh.create_dataset("sweeps", data=[1]))),
    "sweep layout attribute missing": _edit(1, _del_attr("sweeps/s1", "xtalkcal_layout")),
    "sweep layout not JSON": _edit(1, lambda fh: fh["sweeps/s1"].attrs.__setitem__(
        "xtalkcal_layout", '{"variables": [')),
    "sweep layout names a missing variable": _edit(1, _edit_layout(
        lambda lay: lay["variables"][0].__setitem__("key", "gone"))),
    "sweep layout with wrong dimensions": _edit(1, _edit_layout(
        lambda lay: lay["variables"][0].__setitem__("dims", []))),
    "sweep id attribute missing": _edit(1, _del_attr("sweeps/s1", "xtalkcal_sweep_id")),
    "sweep order attribute missing": _edit(1, _del_attr("sweeps", "xtalkcal_order")),
    "root chip attribute missing": _edit(3, _del_attr("/", "chip")),
    "truncated file": _write(2, lambda b: b[: len(b) // 2]),
    "truncated file, digest updated": _write(2, lambda b: b[: len(b) // 2], sealed=True),
    "zero-length file": _write(2, lambda b: b""),
    "zero-length file, digest updated": _write(2, lambda b: b"", sealed=True),
    "digest points to a missing commit file": _remove(_name(2), blame=_name(2)),
    "digest points to a missing newest commit file": _remove(_name(3), blame=_name(3)),
    "commit and digest deleted": _remove(_name(2), _digest(2), blame=_name(2)),
    "digest file missing": _remove(_digest(2), blame=_name(2)),
    "digest file garbage JSON": _garbage(_digest(2), blame=_name(2)),
    "ledger marker garbage JSON": _garbage(MARKER, blame=MARKER),
    "ledger marker integrity field wrong": _marker_field("integrity", "none"),
    "ledger marker chip changed": _marker_field("chip", "grid9-demo-b"),
}


@pytest.mark.parametrize("attack", list(ATTACKS))
def test_damaged_ledger_is_refused_by_every_reader(tmp_path: Path, attack: str) -> None:
    path = tmp_path / "l"
    build(path)
    blame = ATTACKS[attack](path)
    with pytest.raises(LedgerError, match=blame.replace(".", r"\.")):
        read_all(path)
    if blame != MARKER:
        report = verify_ledger(path)
        assert [c.file for c in report.failed] == [blame], report.lines()
        assert all(c.status == "ok" for c in report.commits if c.file != blame)


@pytest.mark.parametrize("attack", list(ATTACKS))
def test_due_on_a_damaged_ledger_fails_in_one_line(tmp_path: Path, capsys,
                                                   attack: str) -> None:
    path = tmp_path / "l"
    build(path)
    blame = ATTACKS[attack](path)
    capsys.readouterr()
    code = main(["due", "--ledger", str(path), "--schedule", str(tmp_path / "s.json")])
    err = capsys.readouterr().err
    assert code != 0
    assert err.startswith("xtalkcal: error: ") and err.count("\n") == 1, err
    assert blame in err and "Traceback" not in err
    assert not (tmp_path / "s.json").exists()


def test_killed_writer_is_not_a_missing_commit_but_a_deleted_file_is(tmp_path: Path) -> None:
    """A writer killed between writing the digest and renaming the commit file leaves a
    digest naming its temporary file: ignored, and cleaned by the next writer. The same
    digest without the temporary file means a commit file has gone."""
    path = tmp_path / "l"
    build(path)
    info = json.loads((path / _digest(3)).read_text())
    (path / _name(3)).rename(path / info["tmp"])  # as it was just before the rename
    led = Ledger(path)
    assert led.last_seq == 2 and verify_ledger(path).ok
    assert led.append([make_entry(victim="q6", measured_at_s=310.0)]).seq == 3
    assert not (path / info["tmp"]).exists()
    assert [e.victim for e in Ledger(path).entries() if e.seq == 3] == ["q6"]
    (path / _name(3)).unlink()
    with pytest.raises(LedgerError, match=f"{_digest(3)} is there"):
        Ledger(path)


def test_legacy_ledger_opens_unverified_and_is_guarded_from_its_first_new_write(
    tmp_path: Path,
) -> None:
    path = tmp_path / "v1"
    shutil.copytree(FIXTURE_V1, path)
    assert [c.status for c in verify_ledger(path).commits] == ["unverified", "unverified"]
    led = Ledger(path)
    assert len(led.entries()) == 4
    led.append([make_entry(victim="q3", measured_at_s=4000.0)])
    assert [c.status for c in led.verify().commits] == ["unverified", "unverified", "ok"]
    assert json.loads((path / MARKER).read_text())["integrity"]["legacy_files"] == [
        _name(1), _name(2)]
    (path / _digest(3)).unlink()  # now a file without a digest is no longer legacy
    with pytest.raises(LedgerError, match=f"{_name(3)}: its digest file .* is missing"):
        Ledger(path)


# --------------------------------------------------------------------------------------------
# calibrate --ledger
# --------------------------------------------------------------------------------------------


class CountingRig:
    """A plug-in rig that counts its calls and must never be reached in these tests."""

    calls = 0

    def __init__(self, chip) -> None:
        self._chip = chip

    @property
    def chip(self):
        return self._chip

    @property
    def repetition_ns(self) -> float:
        return 200_000.0

    def describe(self) -> str:
        return "counting rig"

    def now(self) -> float:
        return 0.0

    def run(self, timelines, shots):
        CountingRig.calls += 1
        raise RigError("the counting rig was asked to run")


@pytest.fixture
def counting_rig(monkeypatch: pytest.MonkeyPatch, demo_chip):
    from xtalkcal.hardware import chip_from_dict

    CountingRig.calls = 0
    one = demo_chip.to_dict()
    one.update(lines=one["lines"][:1], qubits=one["qubits"][:1], name="one-qubit",
               readout={"groups": [[one["qubits"][0]["name"]]]})
    mod = types.ModuleType("xtalkcal_test_rigs")
    mod.demo = lambda: CountingRig(demo_chip)
    mod.lonely = lambda: CountingRig(chip_from_dict(one))
    monkeypatch.setitem(sys.modules, mod.__name__, mod)
    return mod.__name__


@pytest.mark.parametrize("attack", ["version as text", "truncated file",
                                    "digest points to a missing commit file",
                                    "ledger marker garbage JSON"])
def test_calibrate_refuses_a_broken_ledger_before_any_rig_time(
    tmp_path: Path, capsys, counting_rig: str, attack: str
) -> None:
    path = tmp_path / "l"
    build(path)
    blame = ATTACKS[attack](path)
    out = tmp_path / "m.json"
    code = main(["calibrate", "--rig", f"{counting_rig}:demo", "--ledger", str(path), "-q",
                 "-o", str(out)])
    err = capsys.readouterr().err
    assert CountingRig.calls == 0
    assert code != 0 and blame in err and "Traceback" not in err and err.count("\n") == 1
    assert not out.exists()


def test_calibrate_into_another_chips_ledger_spends_no_rig_time(
    tmp_path: Path, capsys, counting_rig: str
) -> None:
    path = tmp_path / "l"
    Ledger.create(path, chip="other-chip").append([make_entry()])
    assert main(["calibrate", "--rig", f"{counting_rig}:demo", "--ledger", str(path), "-q",
                 "-o", str(tmp_path / "m.json")]) == 2
    assert CountingRig.calls == 0 and "other-chip" in capsys.readouterr().err


def test_calibration_with_nothing_to_store_is_a_valid_empty_result(
    tmp_path: Path, capsys, counting_rig: str
) -> None:
    """A chip with no victim to measure: exit 0, say that nothing was stored and why, and
    leave the ledger as it was (none is created for nothing)."""
    path = tmp_path / "l"
    out = tmp_path / "m.json"
    assert main(["calibrate", "--rig", f"{counting_rig}:lonely", "--ledger", str(path),
                 "-q", "-o", str(out)]) == 0
    said = capsys.readouterr()
    assert "nothing stored" in said.out and "measured no pair" in said.out
    assert "nothing to commit" not in said.out + said.err and said.err == ""
    assert not path.exists() and out.exists() and CountingRig.calls == 0
    Ledger.create(path, chip="one-qubit")
    assert main(["calibrate", "--rig", f"{counting_rig}:lonely", "--ledger", str(path),
                 "-q", "-o", str(out)]) == 0
    assert Ledger(path).last_seq == 0


def test_a_writer_never_reuses_the_number_of_a_commit_it_never_saw(tmp_path: Path) -> None:
    """A ledger object opened before commit 3 existed; commit 3's file is then deleted (its
    digest file stays). Appending through the old object must not take number 3 and
    bury the evidence."""
    path = tmp_path / "l"
    build(path)
    (path / _name(3)).unlink()
    (path / _digest(3)).rename(tmp_path / "q3-line")
    stale = Ledger(path)  # sees commits 1 and 2 only
    (tmp_path / "q3-line").rename(path / _digest(3))
    with pytest.raises(LedgerError, match=f"{_name(3)}: missing, but its digest file"):
        stale.append([make_entry(victim="q7", measured_at_s=900.0)])
    assert (path / _digest(3)).exists() and not (path / _name(3)).exists()
