"""Stand-in per-input functions for testing the batch machinery (executors, isolation, resume).

They read the movie for real (tifffile, in chunks), fail the way a real analysis fails on broken files,
and write per-stack files atomically, but compute only simple image statistics instead of tracking. Tests
of the real pipeline through the batch live beside them and use :func:`msdkit.pipeline.process_input`.
They must be importable by name so that spawned worker processes and Dask workers can load them.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

import numpy as np
import pandas as pd

from msdkit.errors import InputError
from msdkit.io.atomic import write_csv_atomic, write_json_atomic, write_parquet_atomic
from msdkit.pipeline import InputOutcome


def _read_movie(path: Path, progress=None) -> np.ndarray:
    import tifffile

    if path.stat().st_size == 0:
        raise InputError(f"{path.name}: the file is empty (0 bytes); expected a TIFF stack.")
    try:
        with tifffile.TiffFile(path) as tif:
            n = len(tif.pages)
            frames = []
            for start in range(0, n, 8):
                chunk = np.stack([tif.pages[i].asarray() for i in range(start, min(n, start + 8))])
                frames.append(chunk)
                if progress is not None:
                    progress(min(n, start + 8), n)
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"{path.name}: not a readable TIFF stack ({type(exc).__name__}: {exc}).") from None
    movie = np.concatenate(frames).astype(np.float64)
    if movie.shape[0] < 2:
        raise InputError(f"{path.name}: a movie needs at least 2 frames; got {movie.shape[0]}.")
    if not np.isfinite(movie).any():
        raise InputError(f"{path.name}: every pixel is NaN or infinite; expected image data.")
    return movie


def fake_process(input_path, cfg, stack_dir, *, stack_name, progress=None):
    """Image statistics in place of an analysis; uses the config's seed like a bootstrap would."""
    path = Path(input_path)
    movie = _read_movie(path, progress)
    rng = np.random.default_rng(cfg.analysis.seed)
    means = np.nanmean(movie, axis=(1, 2))
    boot = rng.choice(means, size=(200, means.size)).mean(axis=1)
    D = float(means.mean() * 1e-3)
    n = len(means)
    tracks = pd.DataFrame({"track": np.zeros(n, np.int64), "frame": np.arange(n),
                           "time_s": np.arange(n) * 0.1, "x_um": means * 1e-3, "y_um": means * 1e-3})
    stack_dir = Path(stack_dir)
    write_parquet_atomic(tracks, stack_dir / "tracks.parquet")
    write_csv_atomic(pd.DataFrame({"track": [0], "n_points": [len(means)], "D_um2_s": [D], "alpha": [1.0],
                                   "radius_nm": [np.nan], "motion_class": ["normal"]}),
                     stack_dir / "track_fits.csv")
    summary = {"D_um2_s": D, "D_ci95_um2_s": np.percentile(boot * 1e-3, [2.5, 97.5]), "alpha": 1.0,
               "n_tracks": 1, "flags": ["few_tracks"], "stack": stack_name}
    write_json_atomic(summary, stack_dir / "summary.json")
    calls = os.environ.get("MSDKIT_TEST_CALL_LOG")
    if calls:
        with open(calls, "a") as fh:
            fh.write(stack_name + "\n")
    extra = {"D_ci95_lo_um2_s": float(np.percentile(boot, 2.5) * 1e-3), "n_frames": int(n)}
    return InputOutcome(stack=stack_name, status="ok", n_tracks=1, D_um2_s=D, alpha=1.0,
                        radius_nm=float("nan"), flags=["few_tracks"], extra=extra)


def slow_fake_process(input_path, cfg, stack_dir, *, stack_name, progress=None):
    """Like :func:`fake_process` but takes MSDKIT_TEST_DELAY_S seconds longer (for crash tests)."""
    pid_dir = os.environ.get("MSDKIT_TEST_PID_DIR")
    if pid_dir:
        Path(pid_dir, str(os.getpid())).touch()
    time.sleep(float(os.environ.get("MSDKIT_TEST_DELAY_S", "0.3")))
    return fake_process(input_path, cfg, stack_dir, stack_name=stack_name, progress=progress)


def crashing_fake_process(input_path, cfg, stack_dir, *, stack_name, progress=None):
    """Kill the worker process (as a segfault or the out-of-memory killer would) for inputs named crash*."""
    if Path(input_path).name.startswith("crash"):
        os._exit(77)
    return fake_process(input_path, cfg, stack_dir, stack_name=stack_name, progress=progress)


def worker_thread_env(task, report=None):
    """Return the math-library thread settings a worker process sees (for the executor test)."""
    return {k: os.environ.get(k) for k in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")}
