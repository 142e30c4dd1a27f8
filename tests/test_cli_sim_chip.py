"""`xtalkcal sim-chip`: invented devices of a chosen size, written whole or not at all."""

from __future__ import annotations

import pytest

from simulated_device.device import load_device
from xtalkcal.cli import main
from xtalkcal.hardware import load_chip


def test_writes_a_device_and_its_chip_that_load_and_agree(tmp_path, capsys):
    dev, chip = tmp_path / "dev.toml", tmp_path / "chip.toml"
    assert main(["sim-chip", "--qubits", "12", "--layout", "line", "--seed", "4",
                 "-o", str(dev), "--chip-out", str(chip)]) == 0
    out = capsys.readouterr().out
    d, c = load_device(dev), load_chip(chip)
    assert len(d.qubits) == 12 and c.qubit_names == tuple(q.name for q in d.qubits)
    assert f"wrote {dev}" in out and "12 qubits on a line" in out
    assert dev.read_text().startswith("# Invented simulated device")
    # same seed, same chip: a lab can regenerate what a colleague tried
    again = tmp_path / "again.toml"
    assert main(["sim-chip", "--qubits", "12", "--layout", "line", "--seed", "4",
                 "-o", str(again)]) == 0
    assert again.read_text() == dev.read_text()
    # and it passes the same check as any device file
    assert main(["check", str(dev), str(chip)]) == 0


def test_a_heavy_hex_chip_of_a_hundred_qubits(tmp_path, capsys):
    dev = tmp_path / "hh.toml"
    assert main(["sim-chip", "--layout", "heavy-hex", "--qubits", "100", "-o", str(dev)]) == 0
    assert "100 qubits on a heavy-hex" in capsys.readouterr().out
    assert len(load_device(dev).qubits) == 100


@pytest.mark.parametrize("argv, words", [
    (["--qubits", "5000"], ["--qubits", "accepted"]),
    (["--qubits", "1"], ["--qubits", "accepted"]),
    (["--seed", "-3"], ["--seed", "accepted"]),
    (["--phase-walk", "7"], ["--phase-walk", "accepted"]),
])
def test_bad_options_are_named_and_nothing_is_written(tmp_path, capsys, argv, words):
    out = tmp_path / "dev.toml"
    assert main(["sim-chip", *argv, "-o", str(out)]) == 2
    err = capsys.readouterr().err
    assert all(w in err for w in words) and "Traceback" not in err
    assert not out.exists() and not list(tmp_path.iterdir())


def test_an_existing_file_is_kept_unless_forced(tmp_path, capsys):
    out = tmp_path / "dev.toml"
    out.write_text("keep me")
    assert main(["sim-chip", "--qubits", "4", "-o", str(out)]) == 2
    assert "--force" in capsys.readouterr().err and out.read_text() == "keep me"
    assert main(["sim-chip", "--qubits", "4", "-o", str(out), "--force"]) == 0
    assert load_device(out).name.startswith("family-grid4")
