"""Batch throughput with 1 and 2 worker processes, and peak memory of one long, large stack.

1. Throughput: renders a batch of simulated movies (default 20 stacks of 200 frames, 128 x 128 px, 2D
   Brownian beads; cached in the work folder) and runs the real pipeline on them with the local-process
   executor, first with 1 worker, then with 2, in the same run. Prints frames/s for each (wall clock,
   worker start-up included), the scaling ratio (2 workers / 1 worker; target >= 1.7) and whether both
   runs gave identical batch tables.
2. Memory: renders one 2,000-frame 512 x 512 movie (1 GB of uint16) and processes it in a fresh worker
   process, reading it in chunks of ``detection.chunk_frames`` frames; prints the worker's peak resident
   memory (``ru_maxrss``; target < 1.5 GB) beside the size of the movie itself.

The machine's load average and the workers' CPU time are printed too: other processes on the same cores
lower the scaling ratio; equal worker CPU time in both runs shows that the work itself does not grow.

Run: python benchmarks/batch.py [--workdir DIR] [--n-stacks 20] [--frames 200] [--size 128] [--repeats 1]
                                [--memory-frames 2000] [--memory-size 512] [--chunk-frames N]
                                [--skip-throughput] [--skip-memory]
"""

from __future__ import annotations

import argparse
import os
import resource
import tempfile
import time
from pathlib import Path

import pandas as pd

from msdkit.batch import run_batch
from msdkit.config import config_from_dict
from msdkit.pipeline import process_input
from msdkit.simulate.recipe import recipe_from_dict
from msdkit.simulate.scene import write_scene


def process_and_measure_memory(input_path, cfg, stack_dir, *, stack_name, progress=None):
    """The real pipeline, plus this worker process's peak resident memory in the outcome."""
    import dataclasses

    outcome = process_input(input_path, cfg, stack_dir, stack_name=stack_name, progress=progress)
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kB on Linux
    return dataclasses.replace(outcome, extra={**outcome.extra, "peak_rss_mb": peak_mb})


def _children_cpu_s() -> float:
    ru = resource.getrusage(resource.RUSAGE_CHILDREN)
    return ru.ru_utime + ru.ru_stime


def _recipe(name: str, seed: int, *, n_frames: int, size_px: int, count: float):
    return recipe_from_dict({
        "name": name, "seed": seed, "width_px": size_px, "height_px": size_px, "n_frames": n_frames,
        "pixel_size_um": 0.1, "frame_interval_s": 0.05, "exposure_s": 0.01, "optics": {"n_dims": 2},
        "populations": [{"count_in_view": count, "diameter_nm": 200, "photons": 2000}],
    })


def _render(folder: Path, recipes) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    movies = []
    for rec in recipes:
        movie = folder / f"{rec.name}.ome.tif"
        if not movie.exists():
            write_scene(rec, folder)
        movies.append(movie)
    return movies


def _cfg(base: Path, pattern: str, n_workers: int, chunk_frames: int | None = None):
    data = {"inputs": [pattern], "executor": {"kind": "local", "n_workers": n_workers}}
    if chunk_frames:
        data["detection"] = {"chunk_frames": chunk_frames}
    return config_from_dict(data, base_dir=base)


def throughput(work: Path, n_stacks: int, n_frames: int, size_px: int, repeats: int = 1) -> None:
    movies_dir = work / f"movies_{n_stacks}x{n_frames}x{size_px}"
    count = 20 * (size_px / 128) ** 2
    t0 = time.perf_counter()
    _render(movies_dir, [_recipe(f"beads_{i:03d}", i, n_frames=n_frames, size_px=size_px, count=count)
                         for i in range(n_stacks)])
    print(f"movies: {n_stacks} x {n_frames} frames of {size_px} x {size_px} px in {movies_dir} "
          f"(ready in {time.perf_counter() - t0:.1f} s)")
    total_frames = n_stacks * n_frames
    best: dict[int, tuple] = {}
    for rep in range(repeats):
        for n_workers in (1, 2):
            cfg = _cfg(movies_dir, "beads_*.ome.tif", n_workers)
            out = work / f"out_throughput_{n_workers}w"
            load = os.getloadavg()[0]
            cpu0 = _children_cpu_s()
            t0 = time.perf_counter()
            res = run_batch(cfg, output_dir=out, force=True, progress="off")
            wall = time.perf_counter() - t0
            cpu = _children_cpu_s() - cpu0  # CPU time of the worker processes (ended and reaped)
            busy = sum(r.run_s for r in res.rows)
            if n_workers not in best or wall < best[n_workers][1]:
                best[n_workers] = (res, wall)
            print(f"  run {rep + 1}, {n_workers} worker(s): {wall:7.1f} s wall, {total_frames / wall:7.1f} "
                  f"frames/s ({res.n_ok}/{len(res.rows)} ok; time inside the pipeline {busy:.1f} s, workers "
                  f"busy {100 * busy / (wall * n_workers):.0f} % of the wall time, worker CPU {cpu:.1f} s; "
                  f"load average before {load:.1f})")
    (r1, w1), (r2, w2) = best[1], best[2]
    print(f"  best of {repeats}: 1 worker {total_frames / w1:.1f} frames/s, 2 workers "
          f"{total_frames / w2:.1f} frames/s; scaling ratio (2 workers / 1 worker): {w1 / w2:.2f}  "
          "(target >= 1.7 on 2 free cores)")
    t1 = r1.table().drop(columns=["run_s", "input", "resumed"])
    t2 = r2.table().drop(columns=["run_s", "input", "resumed"])
    try:
        pd.testing.assert_frame_equal(t1, t2, check_exact=True)
        same = "identical"
    except AssertionError as exc:
        same = f"DIFFERENT: {str(exc).splitlines()[0]}"
    print(f"  batch tables with 1 and 2 workers: {same}")


def memory(work: Path, n_frames: int, size_px: int, chunk_frames: int | None) -> None:
    folder = work / f"memory_{n_frames}x{size_px}"
    rec = _recipe("long_stack", 7, n_frames=n_frames, size_px=size_px, count=30)
    t0 = time.perf_counter()
    movie = _render(folder, [rec])[0]
    size_gb = movie.stat().st_size / 1e9
    print(f"movie: {n_frames} frames of {size_px} x {size_px} px, {size_gb:.2f} GB on disk "
          f"(ready in {time.perf_counter() - t0:.1f} s)")
    cfg = _cfg(folder, movie.name, 1, chunk_frames)
    t0 = time.perf_counter()
    res = run_batch(cfg, output_dir=work / "out_memory", force=True, progress="off",
                    process=process_and_measure_memory)
    wall = time.perf_counter() - t0
    row = res.rows[0]
    if row.status != "ok":
        print(f"  FAILED: {row.error}")
        return
    peak_gb = row.extra["peak_rss_mb"] / 1024
    n_px = n_frames * size_px * size_px
    print(f"  processed in {wall:.1f} s ({n_frames / wall:.1f} frames/s), chunks of "
          f"{cfg.detection.chunk_frames} frames, {row.n_tracks} tracks")
    print(f"  worker peak resident memory: {peak_gb:.2f} GB  (target < 1.5 GB; the movie as uint16 is "
          f"{n_px * 2 / 1e9:.2f} GB, as float64 {n_px * 8 / 1e9:.1f} GB)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--workdir", type=Path, default=Path(tempfile.gettempdir()) / "msdkit_bench_batch")
    ap.add_argument("--n-stacks", type=int, default=20)
    ap.add_argument("--frames", type=int, default=200)
    ap.add_argument("--size", type=int, default=128)
    ap.add_argument("--repeats", type=int, default=1, help="alternate 1- and 2-worker runs; keep the best")
    ap.add_argument("--memory-frames", type=int, default=2000)
    ap.add_argument("--memory-size", type=int, default=512)
    ap.add_argument("--chunk-frames", type=int, default=None, help="detection.chunk_frames (default: config)")
    ap.add_argument("--skip-throughput", action="store_true")
    ap.add_argument("--skip-memory", action="store_true")
    args = ap.parse_args()
    args.workdir.mkdir(parents=True, exist_ok=True)
    print(f"cores available: {len(os.sched_getaffinity(0))}; load average: "
          f"{', '.join(f'{v:.1f}' for v in os.getloadavg())}")
    if not args.skip_throughput:
        throughput(args.workdir, args.n_stacks, args.frames, args.size, args.repeats)
    if not args.skip_memory:
        memory(args.workdir, args.memory_frames, args.memory_size, args.chunk_frames)


if __name__ == "__main__":
    main()
