"""Batch runner: failure isolation, resume after a crash, executors giving identical tables, progress, logs.

The exit codes, file names and summary columns checked here are the output contract in DESIGN.md.
Most tests use stand-in per-input functions (tests/batch_fakes.py) that read the movies for real but skip
tracking, so the batch machinery is tested in seconds; the real pipeline is run through the batch at the end.
"""

from __future__ import annotations

import importlib
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import batch_fakes
import numpy as np
import pandas as pd
import pytest
import tifffile

from msdkit.batch import DONE_FILE, ERROR_FILE, SUMMARY_FILE, run_batch, stack_name, unique_stack_names
from msdkit.config import config_from_dict
from msdkit.errors import ConfigError
from msdkit.io.atomic import TEMP_MARKER
from msdkit.schema import BATCH_SUMMARY_COLUMNS

TESTS_DIR = Path(__file__).resolve().parent
REPO = TESTS_DIR.parent
BROKEN = ("empty", "nan_filled", "not_a_tiff", "single_frame", "truncated")


def _movie(rng, n_frames=24, shape=(32, 32)):
    return rng.integers(100, 1000, (n_frames, *shape), dtype=np.uint16)


def make_inputs(folder: Path, seed: int = 0, n_good: int = 1) -> Path:
    """One or more good movies among the kinds of broken files a real batch meets."""
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    for i in range(n_good):
        tifffile.imwrite(folder / f"good{i}.tif", _movie(rng))
    (folder / "empty.tif").write_bytes(b"")
    tifffile.imwrite(folder / "nan_filled.tif", np.full((10, 16, 16), np.nan, np.float32))
    (folder / "not_a_tiff.tif").write_text("frame,x,y\n0,1,2\n")
    tifffile.imwrite(folder / "single_frame.tif", _movie(rng, n_frames=1))
    tifffile.imwrite(folder / "truncated.tif", _movie(rng, n_frames=40, shape=(64, 64)))
    data = (folder / "truncated.tif").read_bytes()
    (folder / "truncated.tif").write_bytes(data[: len(data) // 2])
    return folder


def make_cfg(base: Path, kind="serial", n_workers=None, seed=0, address=None, inputs=("in/*.tif",)):
    ex = {"kind": kind}
    if n_workers:
        ex["n_workers"] = n_workers
    if address:
        ex["address"] = address
    return config_from_dict({"inputs": list(inputs), "output_dir": "out", "executor": ex,
                             "acquisition": {"pixel_size_um": 0.1, "frame_interval_s": 0.05},
                             "analysis": {"seed": seed}}, base_dir=base)


def _comparable(df: pd.DataFrame) -> pd.DataFrame:
    return df.drop(columns=["run_s", "input", "resumed"]).reset_index(drop=True)


def test_stack_names_are_file_stems_made_unique(tmp_path):
    (tmp_path / "folder").mkdir()
    paths = [Path("a/cells.ome.tif"), Path("b/cells.tif"), Path("c/Cells.tiff"), Path("cells_2.csv"),
             tmp_path / "folder", Path("tracks.csv.gz")]
    assert stack_name(paths[0]) == "cells"
    assert unique_stack_names(paths) == ["cells", "cells_2", "Cells_3", "cells_2_2", "folder", "tracks"]


def test_one_good_movie_among_broken_files_completes_with_exit_code_1(tmp_path):
    make_inputs(tmp_path / "in")
    result = run_batch(make_cfg(tmp_path), process=batch_fakes.fake_process, progress=False)
    assert result.exit_code == 1  # DESIGN.md: 1 = some inputs failed, the others complete
    table = pd.read_csv(tmp_path / "out" / SUMMARY_FILE, keep_default_na=False)
    assert list(table.columns[: len(BATCH_SUMMARY_COLUMNS)]) == list(BATCH_SUMMARY_COLUMNS)
    assert table["stack"].tolist() == sorted([*BROKEN, "good0"])
    status = dict(zip(table["stack"], table["status"], strict=True))
    assert status.pop("good0") == "ok" and set(status.values()) == {"failed"}
    good = tmp_path / "out" / "good0"
    for name in ("summary.json", "tracks.parquet", "track_fits.csv", DONE_FILE):
        assert (good / name).is_file(), name
    assert not (good / ERROR_FILE).exists()
    errors = dict(zip(table["stack"], table["error"], strict=True))
    assert errors["good0"] == ""
    expect = {"empty": "empty", "nan_filled": "NaN", "not_a_tiff": "not a readable TIFF",
              "single_frame": "at least 2 frames", "truncated": "truncated.tif"}
    for stack in BROKEN:
        assert expect[stack] in errors[stack] and "\n" not in errors[stack]
        log = (tmp_path / "out" / stack / ERROR_FILE).read_text()
        assert "Traceback (most recent call last)" in log and errors[stack] in log
        assert not (tmp_path / "out" / stack / DONE_FILE).exists()
    assert "good0: ok" in (tmp_path / "out" / "msdkit.log").read_text()


def test_local_processes_give_the_same_table_as_serial(tmp_path):
    make_inputs(tmp_path / "in", n_good=3)
    serial = run_batch(make_cfg(tmp_path), output_dir=tmp_path / "serial", process=batch_fakes.fake_process,
                       progress=False)
    local = run_batch(make_cfg(tmp_path, kind="local", n_workers=2), output_dir=tmp_path / "local",
                      process=batch_fakes.fake_process, progress=False)
    assert serial.exit_code == local.exit_code == 1
    pd.testing.assert_frame_equal(_comparable(serial.table()), _comparable(local.table()), check_exact=True)
    assert local.n_ok == 3


def test_worker_process_that_dies_fails_only_its_own_input(tmp_path):
    rng = np.random.default_rng(1)
    (tmp_path / "in").mkdir()
    for name in ("a", "crash", "b", "c"):
        tifffile.imwrite(tmp_path / "in" / f"{name}.tif", _movie(rng))
    cfg = make_cfg(tmp_path, kind="local", n_workers=2)
    result = run_batch(cfg, process=batch_fakes.crashing_fake_process, progress=False)
    status = {r.stack: r.status for r in result.rows}
    assert status == {"a": "ok", "b": "ok", "c": "ok", "crash": "failed"}
    crash = next(r for r in result.rows if r.stack == "crash")
    assert "worker process ended abruptly" in crash.error
    assert result.exit_code == 1


def test_rerun_skips_complete_inputs_and_retries_failed_ones(tmp_path, monkeypatch):
    make_inputs(tmp_path / "in", n_good=2)
    calls = tmp_path / "calls.txt"
    monkeypatch.setenv("MSDKIT_TEST_CALL_LOG", str(calls))
    cfg = make_cfg(tmp_path)
    first = run_batch(cfg, process=batch_fakes.fake_process, progress=False)
    assert calls.read_text().split() == ["good0", "good1"]

    calls.write_text("")
    second = run_batch(cfg, process=batch_fakes.fake_process, progress=False)
    assert calls.read_text() == ""  # nothing recomputed
    assert {r.stack for r in second.rows if r.resumed} == {"good0", "good1"}
    assert second.n_failed == len(BROKEN)  # failed inputs were tried again (and fail again)
    pd.testing.assert_frame_equal(_comparable(first.table()), _comparable(second.table()))

    # A repaired input is picked up on the next run.
    tifffile.imwrite(tmp_path / "in" / "empty.tif", _movie(np.random.default_rng(5)))
    third = run_batch(cfg, process=batch_fakes.fake_process, progress=False)
    assert calls.read_text().split() == ["empty"]
    assert third.n_ok == 3


def test_rerun_recomputes_when_settings_input_or_outputs_change_or_forced(tmp_path, monkeypatch):
    rng = np.random.default_rng(2)
    (tmp_path / "in").mkdir()
    for name in ("good0", "good1"):
        tifffile.imwrite(tmp_path / "in" / f"{name}.tif", _movie(rng))
    calls = tmp_path / "calls.txt"
    monkeypatch.setenv("MSDKIT_TEST_CALL_LOG", str(calls))

    def run(**kw):
        calls.write_text("")
        run_batch(kw.pop("cfg", make_cfg(tmp_path)), process=batch_fakes.fake_process, progress=False, **kw)
        return sorted(calls.read_text().split())

    assert run() == ["good0", "good1"]
    # Where and how the batch runs does not change results: no recomputation.
    assert run(cfg=make_cfg(tmp_path, kind="local", n_workers=1)) == []
    # A setting that changes results recomputes everything.
    assert run(cfg=make_cfg(tmp_path, seed=7)) == ["good0", "good1"]
    # A changed input file recomputes that input only.
    tifffile.imwrite(tmp_path / "in" / "good1.tif", _movie(np.random.default_rng(9)))
    assert run(cfg=make_cfg(tmp_path, seed=7)) == ["good1"]
    # A missing or altered output file recomputes that input.
    (tmp_path / "out" / "good0" / "track_fits.csv").unlink()
    assert run(cfg=make_cfg(tmp_path, seed=7)) == ["good0"]
    with open(tmp_path / "out" / "good1" / "summary.json", "a") as fh:
        fh.write(" ")
    assert run(cfg=make_cfg(tmp_path, seed=7)) == ["good1"]
    # force recomputes everything.
    assert run(cfg=make_cfg(tmp_path, seed=7), force=True) == ["good0", "good1"]


_BATCH_SCRIPT = textwrap.dedent(
    """
    import sys
    from msdkit.batch import run_batch
    from msdkit.config import config_from_dict
    import batch_fakes

    base, kind = sys.argv[1], sys.argv[2]
    cfg = config_from_dict({"inputs": ["in/*.tif"], "output_dir": "out",
                            "executor": {"kind": kind, "n_workers": 2},
                            "acquisition": {"pixel_size_um": 0.1, "frame_interval_s": 0.05},
                            "analysis": {"seed": 0}}, base_dir=base)
    run_batch(cfg, process=batch_fakes.slow_fake_process, progress="log")
    """
)


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().split(")")[-1].split()[0]
    except OSError:
        return False
    return state not in ("Z", "X")  # a zombie has ended and only waits to be reaped


@pytest.mark.parametrize("kind", ["serial", pytest.param("local", marks=pytest.mark.slow)])
def test_batch_killed_with_sigkill_and_rerun_ends_complete(tmp_path, monkeypatch, kind):
    rng = np.random.default_rng(3)
    (tmp_path / "in").mkdir()
    names = [f"m{i:02d}" for i in range(8)]
    for name in names:
        tifffile.imwrite(tmp_path / "in" / f"{name}.tif", _movie(rng))
    pid_dir = tmp_path / "pids"
    pid_dir.mkdir()
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(REPO), str(TESTS_DIR)]),
           "MSDKIT_TEST_DELAY_S": "0.4", "MSDKIT_TEST_PID_DIR": str(pid_dir)}
    summary = tmp_path / "out" / SUMMARY_FILE
    proc = subprocess.Popen([sys.executable, "-c", _BATCH_SCRIPT, str(tmp_path), kind], env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 60
        n_done = 0
        while time.monotonic() < deadline and proc.poll() is None:
            if summary.exists():
                n_done = len(pd.read_csv(summary))
                if n_done >= 3:
                    break
            time.sleep(0.05)
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    assert 3 <= n_done < len(names), "the batch should be killed mid-way"
    if kind == "local":  # the worker processes die with the batch instead of writing on as orphans
        workers = [int(p.name) for p in pid_dir.iterdir()]
        assert workers and proc.pid not in workers
        deadline = time.monotonic() + 10
        while any(_alive(pid) for pid in workers) and time.monotonic() < deadline:
            time.sleep(0.05)
        assert not any(_alive(pid) for pid in workers)
    killed = pd.read_csv(summary)  # complete CSV, never half-written
    done_before = set(killed["stack"])

    calls = tmp_path / "calls.txt"
    monkeypatch.setenv("MSDKIT_TEST_CALL_LOG", str(calls))
    result = run_batch(make_cfg(tmp_path), process=batch_fakes.fake_process, progress=False)
    assert result.exit_code == 0
    assert {r.stack for r in result.rows if r.resumed} == done_before
    assert set(calls.read_text().split()) == set(names) - done_before
    final = pd.read_csv(summary)
    assert final["stack"].tolist() == names and (final["status"] == "ok").all()
    for name in names:
        folder = tmp_path / "out" / name
        assert json.loads((folder / "summary.json").read_text())["stack"] == name
        assert len(pd.read_parquet(folder / "tracks.parquet")) == 24
        assert (folder / DONE_FILE).is_file()
    leftovers = [p for p in (tmp_path / "out").rglob("*") if TEMP_MARKER in p.name]
    assert leftovers == []


def test_report_failure_is_logged_and_does_not_fail_the_batch(tmp_path, monkeypatch):
    report = importlib.import_module("msdkit.report")

    def broken_report(output_dir, rows=None):
        raise RuntimeError("figure backend exploded")

    monkeypatch.setattr(report, "write_report", broken_report, raising=False)
    rng = np.random.default_rng(4)
    (tmp_path / "in").mkdir()
    tifffile.imwrite(tmp_path / "in" / "only.tif", _movie(rng))
    result = run_batch(make_cfg(tmp_path), process=batch_fakes.fake_process, progress=False)
    assert result.exit_code == 0
    assert "report.html not written: RuntimeError: figure backend exploded" in (
        tmp_path / "out" / "msdkit.log").read_text()


def test_inputs_matching_nothing_is_a_config_error_and_nothing_runs(tmp_path):
    with pytest.raises(ConfigError, match=r"inputs: no file matched 'in/\*.tif'"):
        run_batch(make_cfg(tmp_path), process=batch_fakes.fake_process, progress=False)
    assert not (tmp_path / "out").exists()


def test_missing_listed_file_fails_that_input_only(tmp_path):
    make_inputs(tmp_path / "in")
    cfg = make_cfg(tmp_path, inputs=("in/good0.tif", "in/gone.tif"))
    result = run_batch(cfg, process=batch_fakes.fake_process, progress=False)
    assert [r.status for r in result.rows] == ["ok", "failed"]
    assert result.exit_code == 1


def test_plain_log_lines_when_not_a_terminal_and_bars_on_request(tmp_path, capfd):
    make_inputs(tmp_path / "in")
    run_batch(make_cfg(tmp_path), process=batch_fakes.fake_process, progress="log")
    err = capfd.readouterr().err
    assert "[2/6] good0: ok" in err
    assert "truncated: failed: truncated.tif" in err
    run_batch(make_cfg(tmp_path), process=batch_fakes.fake_process, progress="bars", force=True)
    err = capfd.readouterr().err
    assert "stacks: 100%" in err and "6/6" in err


# ------------------------------------------------------------------------------ the real pipeline in a batch
D_TRUE_UM2_S = 0.5
DT_S = 0.05


def make_track_tables(folder: Path, seeds=(0,), *, broken=True) -> Path:
    """Simulated Brownian track tables (known D) and, optionally, broken tables of every kind."""
    from msdkit.simulate import brownian_positions, positions_to_tracks

    folder.mkdir(parents=True, exist_ok=True)
    for i, seed in enumerate(seeds):
        pos = brownian_positions(30, 60, D_um2_s=D_TRUE_UM2_S, frame_interval_s=DT_S, localization_sd_um=0.02,
                                 rng=seed)
        tracks = positions_to_tracks(pos, frame_interval_s=DT_S)[["track", "frame", "x_um", "y_um"]]
        tracks.to_csv(folder / f"good{i}.csv", index=False)
    if broken:
        (folder / "empty.csv").write_bytes(b"")
        nan = tracks.copy()
        nan.loc[5, "x_um"] = np.nan
        nan.to_csv(folder / "nan_filled.csv", index=False)
        (folder / "not_a_table.csv").write_bytes(bytes(range(256)) * 4)
        tracks.to_parquet(folder / "truncated.parquet")
        data = (folder / "truncated.parquet").read_bytes()
        (folder / "truncated.parquet").write_bytes(data[: len(data) // 2])
        tracks.iloc[:1].to_csv(folder / "single_position.csv", index=False)
    return folder


def table_cfg(base: Path, kind="serial", n_workers=None, address=None):
    ex = {"kind": kind, "n_workers": n_workers, "address": address}
    ex = {k: v for k, v in ex.items() if v is not None}
    return config_from_dict({"inputs": ["in/*"], "output_dir": "out", "executor": ex,
                             "acquisition": {"frame_interval_s": DT_S, "exposure_s": 0.0}}, base_dir=base)


def test_real_pipeline_one_good_table_among_broken_ones_is_complete_and_exit_code_is_1(tmp_path):
    from msdkit.io.atomic import file_sha256

    make_track_tables(tmp_path / "in")
    result = run_batch(table_cfg(tmp_path), progress=False)
    assert result.exit_code == 1
    rows = {r.stack: r for r in result.rows}
    assert {s for s, r in rows.items() if r.status == "ok"} == {"good0"}
    expect = {"empty": "empty", "nan_filled": "NaN", "not_a_table": "not a text table",
              "truncated": "not a readable Parquet file", "single_position": "single_position.csv"}
    for stack, words in expect.items():
        assert words in rows[stack].error, rows[stack].error
    good = rows["good0"]
    assert good.n_warnings == 0
    # The covariance-based estimator's relative SD is about sqrt(6 / (d N)) for N = 1770 steps in d = 2
    # dimensions with small localisation error (Vestergaard et al. 2014, Phys. Rev. E 89:022726; from
    # memory): 4 %. Five SDs: 20 %.
    assert abs(good.D_um2_s / D_TRUE_UM2_S - 1) < 0.20

    folder = tmp_path / "out" / "good0"
    summary = json.loads((folder / "summary.json").read_text())
    for key in ("D_um2_s", "D_ci95_um2_s", "alpha", "alpha_ci95", "radius_nm", "n_tracks", "flags",
                "viscosity_mpa_s", "temperature_c", "drift_um_s", "provenance"):
        assert key in summary, key
    assert summary["provenance"]["input_sha256"] == file_sha256(tmp_path / "in" / "good0.csv")
    assert summary["D_um2_s"] == pytest.approx(good.D_um2_s, rel=1e-12)
    assert summary["radius_nm"] == pytest.approx(good.radius_nm, rel=1e-12)
    assert summary["n_tracks"] == good.n_tracks == 30
    columns = {"tracks.parquet": ["track", "frame", "time_s", "x_um", "y_um"],
               "track_fits.csv": ["track", "n_points", "D_um2_s", "alpha", "radius_nm", "motion_class"],
               "msd_ensemble.csv": ["lag_s", "msd_um2", "sem_um2", "n_tracks"]}
    for name, expected in columns.items():
        read = pd.read_parquet if name.endswith(".parquet") else pd.read_csv
        assert list(read(folder / name).columns[: len(expected)]) == expected, name
    table = pd.read_csv(tmp_path / "out" / SUMMARY_FILE)
    assert table.loc[table["stack"] == "good0", "D_um2_s"].item() == pytest.approx(good.D_um2_s, rel=1e-12)


@pytest.mark.slow
def test_real_pipeline_gives_the_same_numbers_in_local_processes_as_serially(tmp_path):
    make_track_tables(tmp_path / "in", seeds=(1, 2), broken=False)
    serial = run_batch(table_cfg(tmp_path), output_dir=tmp_path / "serial", progress=False)
    local = run_batch(table_cfg(tmp_path, kind="local", n_workers=2), output_dir=tmp_path / "local",
                      progress=False)
    assert serial.exit_code == local.exit_code == 0
    pd.testing.assert_frame_equal(_comparable(serial.table()), _comparable(local.table()), check_exact=False,
                                  rtol=1e-12)


def test_real_pipeline_one_good_movie_among_broken_movies_is_complete_and_exit_code_is_1(tmp_path):
    from msdkit.simulate.recipe import recipe_from_dict
    from msdkit.simulate.scene import write_scene

    folder = tmp_path / "in"
    make_inputs(folder, n_good=0)
    recipe = recipe_from_dict({"name": "beads", "width_px": 96, "height_px": 96, "n_frames": 60, "seed": 3,
                               "pixel_size_um": 0.1, "frame_interval_s": 0.05, "exposure_s": 0.01,
                               "optics": {"n_dims": 2},
                               "populations": [{"count_in_view": 12, "diameter_nm": 200, "photons": 2000}]})
    movie = write_scene(recipe, tmp_path / "rendered")[0]
    (folder / "beads.ome.tif").write_bytes(movie.read_bytes())
    result = run_batch(make_cfg(tmp_path), progress=False)
    assert result.exit_code == 1
    rows = {r.stack: r for r in result.rows}
    assert {s for s, r in rows.items() if r.status == "ok"} == {"beads"}
    assert rows["beads"].n_tracks > 0 and np.isfinite(rows["beads"].D_um2_s)
    for stack in BROKEN:
        error = rows[stack].error
        # Each message names the file and says what was expected and what was found.
        assert error.startswith(f"{stack}.tif") and "\n" not in error, error
        assert (tmp_path / "out" / stack / ERROR_FILE).is_file()
    out = tmp_path / "out" / "beads"
    for name in ("summary.json", "tracks.parquet", "track_fits.csv", "msd_ensemble.csv", DONE_FILE):
        assert (out / name).is_file(), name
    summary = json.loads((out / "summary.json").read_text())
    assert summary["D_um2_s"] == pytest.approx(rows["beads"].D_um2_s, rel=1e-12)


def test_local_worker_processes_run_one_math_thread_each_and_the_parent_is_restored(monkeypatch):
    # Several worker processes each running multithreaded matrix products oversubscribe the cores (common
    # practice: one BLAS/OpenMP thread per process when processes fill the cores).
    from msdkit.executors import ProcessExecutor

    monkeypatch.delenv("OPENBLAS_NUM_THREADS", raising=False)
    monkeypatch.setenv("MKL_NUM_THREADS", "3")  # a user's own setting is kept
    with ProcessExecutor(n_workers=2) as ex:
        out = [r for _, r in ex.run(batch_fakes.worker_thread_env, [0, 1], crash_result=lambda t, e: None)]
    assert all(r["OPENBLAS_NUM_THREADS"] == "1" and r["OMP_NUM_THREADS"] in ("1", os.environ.get("OMP_NUM_THREADS"))
               for r in out)
    assert all(r["MKL_NUM_THREADS"] == "3" for r in out)
    assert "OPENBLAS_NUM_THREADS" not in os.environ
