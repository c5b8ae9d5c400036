"""Command-line contract: exit codes and messages (DESIGN.md: 0 all ok, 1 some failed, 2 invalid)."""

import subprocess
import sys

from msdkit.cli import main


def test_config_error_exits_2_and_names_the_key(tmp_path, capsys):
    cfg = tmp_path / "bad.yaml"
    cfg.write_text("inputs: [a.tif]\nsample:\n  temperatur_c: 25\n")
    assert main(["run", str(cfg)]) == 2
    err = capsys.readouterr().err
    assert "sample.temperatur_c: unknown key" in err
    assert "did you mean 'temperature_c'" in err


def test_missing_config_file_exits_2(tmp_path, capsys):
    assert main(["run", str(tmp_path / "none.yaml")]) == 2
    assert "config file not found" in capsys.readouterr().err


def test_unknown_command_line_option_exits_2(capsys):
    assert main(["run", "x.yaml", "--no-such-option"]) == 2


def test_check_lists_inputs_without_running(tmp_path, capsys):
    (tmp_path / "a.csv").write_text("track,frame,x_um,y_um\n")
    cfg = tmp_path / "ok.yaml"
    cfg.write_text("inputs: ['*.csv']\n")
    assert main(["check", str(cfg)]) == 0
    out = capsys.readouterr().out
    assert "valid" in out and "a.csv" in out
    assert not (tmp_path / "results").exists()


def test_python_dash_m_entry_point_reports_version():
    out = subprocess.run([sys.executable, "-m", "msdkit", "--version"], capture_output=True, text=True, check=True)
    assert out.stdout.startswith("msdkit ")
