"""End to end: simulated movie / track table → `msdkit run` → D and radius against the simulator's truth.

Ground truth: Stokes–Einstein (Einstein 1905) with water viscosity from the IAPWS 2008 formulation (via the
Pátek et al. 2009 correlation), as used by the simulator; tolerances come from the number of steps measured.
"""

import json
import math

import numpy as np
import pandas as pd
import pytest

from msdkit.cli import main
from msdkit.hydro import stokes_einstein_D_um2_s, water_viscosity_mpa_s
from msdkit.simulate import brownian_positions, positions_to_tracks
from msdkit.simulate.recipe import recipe_from_dict
from msdkit.simulate.scene import write_scene


def _pooled_tolerance(n_steps: int, x_reduced: float = 0.5) -> float:
    """4 SD of the pooled covariance-based estimate (Vestergaard et al. 2014, Var formula, d = 2), plus 2 %
    for what a movie adds (detection and linking)."""
    eps = x_reduced - 1 / 3
    rel_sd = math.sqrt((6 + 4 * eps + 2 * eps**2) / n_steps / 2)
    return 4 * rel_sd + 0.02


def _movie(tmp_path, **over):
    recipe = {
        "name": "beads", "seed": 7, "width_px": 160, "height_px": 160, "pixel_size_um": 0.166, "n_frames": 120,
        "frame_interval_s": 1 / 30, "exposure_s": 0.015, "temperature_c": 25.0, "medium": "water",
        "optics": {"n_dims": 3, "wavelength_nm": 520, "numerical_aperture": 0.8, "focal_depth_um": 1.0,
                   "slab_um": 4.0},
        "camera": {"background_photons": 20, "read_noise_electrons": 1.5, "offset_adu": 100},
        "populations": [{"label": "b", "count_in_view": 25, "diameter_nm": 100, "photons": 3000,
                         "motion": "brownian"}],
    }
    recipe.update(over)
    return write_scene(recipe_from_dict(recipe), tmp_path / "movies")


def test_movie_of_100nm_beads_gives_D_and_radius_of_the_truth(tmp_path):
    _movie(tmp_path)
    cfg = tmp_path / "run.yaml"
    cfg.write_text(
        "inputs: [movies/*.ome.tif]\n"
        "acquisition: {pixel_size_um: 0.166, frame_interval_s: 0.0333333, exposure_s: 0.015}\n"
        "sample: {temperature_c: 25.0, medium: water}\n"
        "executor: {kind: serial}\n"
    )
    assert main(["run", str(cfg), "--quiet"]) == 0
    out = tmp_path / "results"
    summary = json.loads((out / "beads" / "summary.json").read_text())
    true_D = stokes_einstein_D_um2_s(50.0, temperature_c=25.0, viscosity_mpa_s=water_viscosity_mpa_s(25.0))
    tracks = pd.read_parquet(out / "beads" / "tracks.parquet")
    n_steps = int((tracks.groupby("track")["frame"].diff() == 1).sum())
    tol = _pooled_tolerance(n_steps)
    assert summary["D_um2_s"] == pytest.approx(true_D, rel=tol)
    assert summary["radius_nm"] == pytest.approx(50.0, rel=tol * 1.05)
    lo, hi = summary["D_ci95_um2_s"]
    assert lo < summary["D_um2_s"] < hi
    for name in ("tracks.parquet", "track_fits.csv", "msd_ensemble.csv", "resolved_config.yaml"):
        assert (out / "beads" / name).is_file()
    batch = pd.read_csv(out / "batch_summary.csv")
    assert list(batch.columns[:8]) == ["stack", "status", "error", "n_tracks", "D_um2_s", "alpha", "radius_nm",
                                       "flags"]
    assert batch.loc[0, "status"] == "ok"
    assert (out / "report.html").read_text().startswith("<!DOCTYPE html>")


def test_track_table_runs_through_the_same_command(tmp_path):
    rng = np.random.default_rng(3)
    dt, te, D, sigma = 0.05, 0.02, 1.2, 0.03
    lengths = rng.integers(20, 80, size=150)
    pos = brownian_positions(150, 80, D_um2_s=D, frame_interval_s=dt, exposure_s=te,
                             localization_sd_um=sigma, rng=rng)
    table = positions_to_tracks(pos, frame_interval_s=dt, lengths=lengths)
    table[["track", "frame", "x_um", "y_um"]].to_csv(tmp_path / "cells.csv", index=False)
    cfg = tmp_path / "run.yaml"
    cfg.write_text(
        "inputs: [cells.csv]\noutput_dir: out\n"
        f"acquisition: {{frame_interval_s: {dt}, exposure_s: {te}}}\n"
        "sample: {temperature_c: 20.0, medium: {viscosity_mpa_s: 3.0}}\nexecutor: {kind: serial}\n"
    )
    assert main(["run", str(cfg), "--quiet"]) == 0
    s = json.loads((tmp_path / "out" / "cells" / "summary.json").read_text())
    n_steps = int(lengths.sum() - len(lengths))
    assert s["D_um2_s"] == pytest.approx(D, rel=_pooled_tolerance(n_steps, sigma**2 / (D * dt)))
    expected_r = 1e9 * 1.380649e-23 * 293.15 / (6 * math.pi * 3e-3 * D * 1e-12)  # Stokes–Einstein by hand
    assert s["radius_nm"] == pytest.approx(expected_r, rel=_pooled_tolerance(n_steps, 0.015) * 1.05)
    assert s["viscosity_mpa_s"] == 3.0
    assert "subdiffusive" not in s["flags"]
    fits = pd.read_csv(tmp_path / "out" / "cells" / "track_fits.csv")
    assert list(fits.columns[:6]) == ["track", "n_points", "D_um2_s", "alpha", "radius_nm", "motion_class"]
    assert len(fits) == 150


def _small_table_config(tmp_path, name="cells"):
    rng = np.random.default_rng(5)
    pos = brownian_positions(60, 50, D_um2_s=1.0, frame_interval_s=0.05, exposure_s=0.02,
                             localization_sd_um=0.03, rng=rng)
    table = positions_to_tracks(pos, frame_interval_s=0.05, lengths=rng.integers(20, 51, size=60))
    table[["track", "frame", "x_um", "y_um"]].to_parquet(tmp_path / f"{name}.parquet")
    cfg = tmp_path / "run.yaml"
    cfg.write_text(f"inputs: [{name}.parquet]\noutput_dir: out\n"
                   "acquisition: {frame_interval_s: 0.05, exposure_s: 0.02}\nexecutor: {kind: serial}\n")
    return cfg


def test_outputs_are_the_same_bytes_written_beside_the_figures_or_one_after_another(tmp_path, monkeypatch):
    import msdkit._threads

    cfg = _small_table_config(tmp_path)
    folders = {}
    for threads in (1, 2):  # one thread: tables, then figures; two: tables on a second thread
        monkeypatch.setattr(msdkit._threads, "analysis_threads", lambda n=threads: n)
        out = tmp_path / f"out{threads}"
        assert main(["run", str(cfg), "--quiet", "--output", str(out)]) == 0
        folders[threads] = out / "cells"
    names = sorted(p.name for p in folders[1].iterdir())
    assert names == sorted(p.name for p in folders[2].iterdir())
    for name in ("tracks.parquet", "track_fits.csv", "msd_ensemble.csv", "size_distribution.csv",
                 "overview.png", "resolved_config.yaml"):
        assert (folders[1] / name).read_bytes() == (folders[2] / name).read_bytes(), name


def test_a_failing_figure_costs_no_table_and_the_summary_is_written(tmp_path, monkeypatch):
    import msdkit.report.figures

    def broken(*args, **kwargs):
        raise RuntimeError("figure failed (simulated)")

    monkeypatch.setattr(msdkit.report.figures, "write_stack_figures", broken)
    cfg = _small_table_config(tmp_path)
    assert main(["run", str(cfg), "--quiet"]) == 0
    folder = tmp_path / "out" / "cells"
    assert not (folder / "overview.png").exists()
    for name in ("tracks.parquet", "track_fits.csv", "msd_ensemble.csv", "summary.json"):
        assert (folder / name).is_file(), name


def test_analysis_and_figure_modules_are_imported_ahead_on_a_background_thread():
    import os
    import subprocess
    import sys
    import textwrap

    code = textwrap.dedent("""
        import sys
        import msdkit.pipeline as p
        assert not any(m in sys.modules for m in ("msdkit.classify", "matplotlib.figure"))
        t = p.import_ahead()
        assert t is not None and p.import_ahead() is t  # once per process
        t.join()
        print(sorted(set(p.AHEAD_MODULES) - set(sys.modules)))
    """)
    from msdkit._threads import analysis_threads

    env = {k: v for k, v in os.environ.items() if k not in ("OMP_NUM_THREADS", "NUMBA_NUM_THREADS")}
    env["NUMBA_NUM_THREADS"] = "2"
    env["MSDKIT_THREADS"] = "2"  # two threads whatever the machine's load while the suite runs
    if analysis_threads() < 2 and len(os.sched_getaffinity(0)) < 2:
        pytest.skip("one CPU: nothing is imported ahead")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"
    one = subprocess.run([sys.executable, "-c", "import msdkit.pipeline as p; print(p.import_ahead())"],
                         capture_output=True, text=True, env={**env, "OMP_NUM_THREADS": "1"}, timeout=300)
    assert one.stdout.strip() == "None"  # one thread allowed (a batch's worker process): nothing started


def test_stages_start_once_their_modules_are_loaded_and_figure_modules_follow():
    # Contract (msdkit.pipeline.import_ahead): the stages wait only for their own modules, the figure modules
    # load after them on the same thread.
    import os
    import subprocess
    import sys
    import textwrap

    code = textwrap.dedent("""
        import sys
        import msdkit.pipeline as p
        t = p.import_ahead()
        p.wait_for_analysis_modules(t)  # the stages' modules are loaded; the figures' may still be loading
        stages = [m for m in p.AHEAD_MODULES if not m.startswith(p.FIGURE_MODULE_PREFIXES)]
        assert len(stages) < len(p.AHEAD_MODULES)
        print(sorted(set(stages) - set(sys.modules)))
        t.join()
        print(sorted(set(p.AHEAD_MODULES) - set(sys.modules)))
    """)
    if len(os.sched_getaffinity(0)) < 2:
        pytest.skip("one CPU: nothing is imported ahead")
    env = {k: v for k, v in os.environ.items() if k not in ("OMP_NUM_THREADS", "NUMBA_NUM_THREADS")}
    env["MSDKIT_THREADS"] = "2"  # two threads whatever the machine's load while the suite runs
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.split() == ["[]", "[]"]
