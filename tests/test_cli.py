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


def test_run_as_a_program_ends_with_the_batch_exit_code_and_every_output_written(tmp_path):
    # the process ends right after the results are written (cli.end_process): the exit code still follows
    # the contract (DESIGN.md: 1 when some input failed), and the printed table, the log and every file of the
    # good input are complete
    import numpy as np

    from msdkit.simulate import brownian_positions, positions_to_tracks

    pos = brownian_positions(40, 30, D_um2_s=1.0, frame_interval_s=0.05, rng=np.random.default_rng(2))
    positions_to_tracks(pos, frame_interval_s=0.05)[["track", "frame", "x_um", "y_um"]].to_csv(
        tmp_path / "good.csv", index=False)
    (tmp_path / "bad.csv").write_text("track,frame,x_um\n0,0,1.0\n")
    cfg = tmp_path / "run.yaml"
    cfg.write_text("inputs: [good.csv, bad.csv]\noutput_dir: out\n"
                   "acquisition: {frame_interval_s: 0.05}\nexecutor: {kind: serial}\n")
    done = subprocess.run([sys.executable, "-m", "msdkit", "run", str(cfg), "--quiet"], capture_output=True,
                          text=True, timeout=600)
    assert done.returncode == 1, done.stderr
    assert "1 of 2 inputs ok" in done.stdout
    out = tmp_path / "out"
    assert (out / "msdkit.log").read_text().rstrip().splitlines()[-1].endswith(
        "batch finished: 1 ok, 1 failed, 0 taken from an earlier run")
    for name in ("tracks.parquet", "track_fits.csv", "msd_ensemble.csv", "summary.json", "overview.png",
                 ".done.json"):
        assert (out / "good" / name).is_file(), name
    assert (out / "bad" / "error.log").is_file()
    assert (out / "report.html").read_text().rstrip().endswith("</html>")


def test_process_is_not_ended_while_a_thread_it_would_wait_for_runs():
    # Contract (msdkit.cli.end_process): the interpreter waits for non-daemon threads at exit, so the
    # process is ended early only when none is running (Python docs, threading: daemon threads).
    import threading

    from msdkit.cli import end_process

    release = threading.Event()
    worker = threading.Thread(target=release.wait, daemon=False)
    worker.start()
    try:
        end_process(0)  # returns: the worker is not a daemon and still running
    finally:
        release.set()
        worker.join()
