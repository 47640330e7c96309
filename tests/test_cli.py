"""The command line: version, help, the demo run and bad files."""

import subprocess
import sys

from quietlayer.app.cli import CAUTION, main


def test_version_and_help():
    out = subprocess.run([sys.executable, "-m", "quietlayer.app.cli", "--version"],
                         capture_output=True, text=True, check=True).stdout
    assert out.startswith("quietlayer ")
    help_text = subprocess.run([sys.executable, "-m", "quietlayer.app.cli", "--help"],
                               capture_output=True, text=True, check=True).stdout
    assert "demo" in help_text and "certifies" in help_text


def test_demo_runs_and_prints_caution(capsys):
    assert main(["demo"]) == 0
    out = capsys.readouterr().out
    assert "worst peak error" in out and "corner" in out and "late-time check" in out
    assert CAUTION in out


def test_bad_scenario_file_exits_2_with_named_field(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text('dx = "1 mm"\ndy = "1 mm"\nnx = 10\nny = 10\ncourant = 3\n'
                   '[source]\nx = 5\ny = 5\nf_max = "10 GHz"\n')
    assert main(["demo", "--scenario", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "courant = 3" in err and "<= 1" in err and "Traceback" not in err
    assert main(["demo", "--scenario", str(tmp_path / "missing.toml")]) == 2
