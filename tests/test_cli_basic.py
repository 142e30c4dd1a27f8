"""The CLI: help, version, one-line errors without traceback, atomic file output."""

from __future__ import annotations

import subprocess
import sys

from simulated_device import demo_device_path
from xtalkcal.cli import main


def test_help_and_version(capsys):
    assert main([]) == 2
    out = capsys.readouterr().out
    assert "check" in out and "export-chip" in out


def test_version_via_subprocess():
    r = subprocess.run([sys.executable, "-m", "xtalkcal.cli", "--version"],
                       capture_output=True, text=True)
    assert r.returncode == 0 and r.stdout.startswith("xtalkcal ")


def test_bad_file_gives_one_line_per_problem_and_exit_2(tmp_path, capsys):
    # two problems: the frequency, and a qubit without a drive line
    p = tmp_path / "chip.toml"
    p.write_text('name = "x"\n[[qubits]]\nname = "a"\nf01_ghz = 5000\nanharmonicity_ghz = -0.2\n')
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 2 and "Traceback" not in err
    assert err.count("xtalkcal: error:") == 2
    assert "chip.toml" in err and "qubits[0].f01_ghz" in err and "accepted" in err


def test_check_reports_every_file(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text('name = "x"\n[[qubits]]\nname = "a"\nf01_ghz = 5000\n'
                   'anharmonicity_ghz = -0.2\n')
    assert main(["check", str(bad), "protocols/full.toml", str(bad)]) == 2
    cap = capsys.readouterr()
    assert cap.err.count("\n") == 4 and cap.err.count("bad.toml") == 4
    assert "protocols/full.toml: protocol 'full' — OK" in cap.out


def test_bad_device_file_one_line(tmp_path, capsys):
    text = open(demo_device_path()).read().replace("crosstalk_db = -", "crosstalk_db = ", 1)
    p = tmp_path / "dev.toml"
    p.write_text(text)
    assert main(["check", str(p)]) == 2
    err = capsys.readouterr().err
    assert "couplings[0].crosstalk_db" in err and err.count("\n") == 1


def test_export_chip_matches_device(tmp_path, capsys, demo_device):
    out = tmp_path / "sub" / "chip.toml"
    assert main(["export-chip", demo_device_path(), "-o", str(out)]) == 0
    assert main(["check", str(out)]) == 0
    from xtalkcal.hardware import load_chip

    chip = load_chip(out)
    assert chip.qubits == demo_device.chip().qubits
    assert [p.name for p in out.parent.iterdir()] == ["chip.toml"]  # no temp file left


def test_built_in_protocol_defaults_are_those_of_full_toml():
    """The CLI falls back on the built-in defaults when no protocol file is given (an
    installed package need not carry protocols/): they must be full.toml's."""
    import dataclasses

    from xtalkcal.measure import default_protocol, load_protocol

    a, b = default_protocol(), load_protocol("protocols/full.toml")
    assert dataclasses.replace(a, source=b.source) == b
