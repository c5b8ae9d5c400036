"""End-to-end analysis time of a large track table, against reading it and one batched FFT (the floor).

Table: 20,000 Brownian tracks x 500 points (10 million rows), simulated in four blocks of 5,000 tracks
(D = 1 um^2/s, 50 ms frames, 20 ms exposure, 30 nm localisation error) and written once to a Parquet file
(default /tmp/big/big.parquet; reused when it exists).

Timings in the same run:

* read: msdkit.io.tables.read_track_table of the Parquet file (median of 3);
* floor: one batched real FFT over the positions array (n_tracks, n_points, 2), scipy.fft.rfft with the
  zero-padded length an exact FFT autocorrelation needs (nfft >= 2N - 1) - the bare cost of touching the
  data once with an FFT (median of 3);
* the stages of msdkit.pipeline.analyze_tracks called one after another as the pipeline calls them
  (drift, per-track fits, sample fit, ensemble MSD, motion classes, sample motion, per-track size inputs and
  the size distribution of the tracks), then analyze_tracks as a whole and the overview figure;
* with --run, ``msdkit run`` of the working tree on the table in a fresh process (read, analysis,
  tracks.parquet, track_fits.csv, figures, report), twice (the first run also compiles the numba kernels
  when their cache is cold): wall time, the input's own time from its log line, and peak resident memory.

Printed: seconds per stage and each time as a ratio to the floor and to read + floor; the same for CPU time
(all threads of the process: on a machine shared with other jobs it moves much less with their load than the
wall time does); and the peak resident memory of this process (and of the ``msdkit run`` process). Target:
the whole analysis within 5 x read + floor.

Memory: analyze_tracks keeps freed memory mapped for reuse and leaves numpy's huge-page advice off while it
runs (msdkit._memory; MSDKIT_KEEP_FREED_MEMORY=0 switches that off); each stage row runs the same way.

Threads: analyze_tracks runs independent stages side by side in a second thread (and fit_tracks its per-track
alpha beside its per-track D) when the process may use more than one thread and the machine has a CPU free
(msdkit._threads.analysis_threads, decided from the 1-minute load average when the analysis starts; printed
at the start and beside "analyze_tracks (whole)"). The stage rows time each stage alone, one after another;
"analyze_tracks (whole)" is the wall time of the analysis as the pipeline runs it, so with two threads it is
less than the sum of the stages, and its CPU time (all threads) can exceed its wall time. Parallel runs only
pay off when the machine has a free core: the load averages at the start and end of the run are printed
beside the figures.

Also a small table (150 tracks of 20-80 points) timed the same way, best of --repeats runs, to check small
inputs do not get slower. The machine may be shared: compare the ratios, which are measured in the same run,
not the seconds.

Usage: python benchmarks/end_to_end_speed.py [--table PATH] [--repeats 3] [--skip-big] [--run]
"""

from __future__ import annotations

import argparse
import gc
import os
import re
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import scipy.fft

from msdkit import classify, drift, fit, msd, sizing
from msdkit.io.tables import read_track_table
from msdkit.pipeline import analyze_tracks
from msdkit.simulate import brownian_positions, positions_to_tracks

DT, EXPOSURE = 0.05, 0.02
REPO = Path(__file__).resolve().parents[1]


def make_big_table(path: Path) -> None:
    import pandas as pd

    parts = []
    for i in range(4):
        pos = brownian_positions(5000, 500, D_um2_s=1.0, frame_interval_s=DT, exposure_s=EXPOSURE,
                                 localization_sd_um=0.03, rng=i)
        parts.append(positions_to_tracks(pos, frame_interval_s=DT, first_track_id=i * 5000))
    path.parent.mkdir(parents=True, exist_ok=True)
    pd.concat(parts, ignore_index=True).to_parquet(path)


def small_table(seed: int = 0):
    g = np.random.default_rng(seed)
    pos = brownian_positions(150, 80, D_um2_s=1.0, frame_interval_s=DT, exposure_s=EXPOSURE,
                             localization_sd_um=0.03, rng=seed)
    return positions_to_tracks(pos, frame_interval_s=DT, lengths=g.integers(20, 81, 150))


def timed(fn, *a, **k):
    """(result, wall seconds, CPU seconds of all threads of this process)."""
    gc.collect()
    c0 = time.process_time()
    t0 = time.perf_counter()
    out = fn(*a, **k)
    return out, time.perf_counter() - t0, time.process_time() - c0


LAST_THREADS: list = []


def _memory_kept():
    """msdkit._memory.freed_memory_kept (what analyze_tracks runs in), or nothing for code from before it."""
    try:
        from msdkit._memory import freed_memory_kept
    except ImportError:
        import contextlib

        return contextlib.nullcontext()
    return freed_memory_kept()


def _threads_now() -> str:
    try:
        from msdkit._threads import analysis_threads
    except ImportError:  # code from before the stages ran in threads
        return "1 (no msdkit._threads)"
    return str(analysis_threads())


def stages(tracks) -> dict[str, tuple[float, float]]:
    """(wall, CPU) seconds of each analysis stage, called as msdkit.pipeline.analyze_tracks calls them."""
    kw = dict(frame_interval_s=DT, exposure_s=EXPOSURE, n_dims=2)
    t: dict[str, tuple[float, float]] = {}

    def run(key, fn, *a, **k):
        with _memory_kept():  # as inside analyze_tracks (which keeps it itself)
            out, wall, cpu = timed(fn, *a, **k)
        t[key] = (wall, cpu)
        return out

    classify._FIT_CACHE.clear()
    tracks = tracks.sort_values(["track", "frame"], kind="stable").reset_index(drop=True)
    d = run("drift", drift.estimate_drift, tracks, frame_interval_s=DT)
    shared = fit._Shared(tracks, 2)  # as the pipeline shares steps and TA-MSDs between the two fits
    tf = run("fit_tracks", fit.fit_tracks, tracks, _shared=shared, **kw)
    sf = run("fit_sample", fit.fit_sample, tracks, tf, rng=0, _shared=shared, **kw)
    del shared
    run("ensemble_msd", msd.ensemble_msd, tracks, frame_interval_s=DT)
    cl = run("classify_tracks", classify.classify_tracks, tracks, frame_interval_s=DT, exposure_s=EXPOSURE,
             sigma_um=sf.sigma_um)
    run("sample_motion", classify.sample_motion, tracks, cl, sf, d, frame_interval_s=DT, exposure_s=EXPOSURE)
    run("size_inputs", sizing.lag1_track_estimates, tracks, localization_sd_um=sf.D_sigma_um, **kw)
    run("size_distribution", sizing.size_distribution_of_tracks, tracks, temperature_c=25.0,
        viscosity_mpa_s=0.89, rng=0, **kw)
    classify._FIT_CACHE.clear()
    LAST_THREADS[:] = [_threads_now(), os.getloadavg()[0]]  # what analyze_tracks is about to decide
    res = run("analyze_tracks (whole)", analyze_tracks, tracks, frame_interval_s=DT, exposure_s=EXPOSURE)
    from msdkit.report.figures import write_stack_figures

    with tempfile.TemporaryDirectory() as tmp:
        run("overview figure", write_stack_figures, Path(tmp), res)
    return t


def peak_rss_mb(who=resource.RUSAGE_SELF) -> float:
    """Peak resident memory in MB (Linux reports ru_maxrss in kB)."""
    return resource.getrusage(who).ru_maxrss / 1024.0


def run_cli(table: Path) -> tuple[float, float, float, str]:
    """``msdkit run`` on the table in a fresh process: wall, the input's own time (its log line), CPU time
    and the parts its log gives (read; analysis, with any wait for imports; outputs; the rest is start-up,
    report and exit).

    Peak memory: RUSAGE_CHILDREN after it.
    """
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    with tempfile.TemporaryDirectory() as tmp:
        cfg = Path(tmp) / "run.yaml"
        cfg.write_text(f"inputs: [{table}]\noutput_dir: {tmp}/out\n"
                       f"acquisition: {{frame_interval_s: {DT}, exposure_s: {EXPOSURE}}}\n"
                       "sample: {temperature_c: 25.0}\nexecutor: {kind: serial}\n")
        # the working tree's msdkit, also when an installed copy is on the path (a fresh process imports it
        # and loads the compiled kernels from numba's cache beside the sources)
        path = os.pathsep.join(filter(None, [str(REPO), os.environ.get("PYTHONPATH")]))
        t0 = time.perf_counter()
        cmd = [sys.executable, "-m", "msdkit", "run", str(cfg)]
        done = subprocess.run(cmd, check=True, capture_output=True, text=True, cwd=tmp,
                              env={**os.environ, "PYTHONPATH": path})
        wall = time.perf_counter() - t0
        # the log line of the input ends with its own time (read, analysis, outputs): "... (25.9 s)"
        found = re.findall(r"big: ok.*\(([0-9.]+) s\)", done.stdout + done.stderr)
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        cpu = (after.ru_utime + after.ru_stime) - (before.ru_utime + before.ru_stime)
        log = (Path(tmp) / "out" / "msdkit.log").read_text(encoding="utf-8")
        parts = {key: re.findall(pattern, log) for key, pattern in (
            ("read", r"big: read \d+ positions in ([0-9.]+) s"),
            ("analysed", r"big: analysed in ([0-9.]+) s"),
            ("outputs", r"big: outputs written in ([0-9.]+) s"))}
        shown = ", ".join(f"{k} {float(v[-1]):.2f} s" for k, v in parts.items() if v)
        if all(parts.values()):
            rest = wall - sum(float(v[-1]) for v in parts.values())
            shown += f", the rest (start-up, summary, report, exit) {rest:.2f} s"
        return wall, (float(found[-1]) if found else float("nan")), cpu, shown


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--table", default="/tmp/big/big.parquet")
    ap.add_argument("--repeats", type=int, default=3, help="repeats of the small-table timing (best kept)")
    ap.add_argument("--skip-big", action="store_true")
    ap.add_argument("--run", action="store_true", help="also time `msdkit run` on the table")
    args = ap.parse_args()

    path = Path(args.table)
    print(f"analysis threads {_threads_now()}; CPUs {os.cpu_count()}; load average at start "
          + " ".join(f"{v:.2f}" for v in os.getloadavg()))
    if not args.skip_big and not path.exists():
        print("writing", path)
        make_big_table(path)
    runs: list[tuple[float, float, float, str]] = []
    rss_run = None
    if args.run and not args.skip_big:
        # first, while this process is small: a forked child's peak memory counts the parent's at the fork.
        # Twice: the first run compiles the kernels when numba's cache is cold (after an edit of their module)
        runs = [run_cli(path) for _ in range(2)]
        rss_run = peak_rss_mb(resource.RUSAGE_CHILDREN)

    small = small_table()
    best: dict[str, float] = {}
    for _ in range(max(1, args.repeats)):
        for k, (v, _cpu) in stages(small).items():
            best[k] = min(best.get(k, np.inf), v)
    print("small table: 150 tracks x 20-80 points, best of", args.repeats)
    for k, v in best.items():
        print(f"  {k:<24s} {v:7.3f} s")

    if args.skip_big:
        return
    # the baseline three times each, median kept (the machine may be shared; the stages run once each)
    reads, reads_cpu = [], []
    for _ in range(3):
        tracks, t, c = timed(read_track_table, str(path), frame_interval_s=DT)
        reads.append(t)
        reads_cpu.append(c)
    rss_read = peak_rss_mb()
    n_tr = tracks["track"].nunique()
    N = len(tracks) // n_tr
    pos = np.stack([tracks["x_um"].to_numpy(float), tracks["y_um"].to_numpy(float)], axis=1)
    pos = pos.reshape(n_tr, N, 2)
    nfft = scipy.fft.next_fast_len(2 * N - 1, real=True)
    ffts = [timed(scipy.fft.rfft, pos, n=nfft, axis=1) for _ in range(3)]
    ffts_cpu = [f[2] for f in ffts]
    ffts = [f[1] for f in ffts]
    del pos
    t_read, t_fft = float(np.median(reads)), float(np.median(ffts))
    base = t_read + t_fft
    base_cpu = float(np.median(reads_cpu)) + float(np.median(ffts_cpu))
    print(f"\nbig table: {n_tr} tracks x {N} points ({len(tracks)} rows)")
    print(f"  read                     {t_read:7.2f} s  (median of 3: {min(reads):.2f}-{max(reads):.2f})")
    print(f"  floor (batched rfft)     {t_fft:7.2f} s  (median of 3: {min(ffts):.2f}-{max(ffts):.2f})")
    print(f"  read + floor, CPU time   {base_cpu:7.2f} s")
    head = f"  {'stage':<24s} {'s':>7s}  {'/floor':>7s}  {'/(read+floor)':>13s}"
    print(head + f"  {'CPU s':>7s}  {'CPU ratio':>9s}")
    for k, (v, c) in stages(tracks).items():
        print(f"  {k:<24s} {v:7.2f}  {v / t_fft:7.1f}  {v / base:13.1f}  {c:7.2f}  {c / base_cpu:9.1f}")
    print(f"  (analyze_tracks (whole) with {LAST_THREADS[0]} thread(s): 1-minute load average "
          f"{LAST_THREADS[1]:.2f} when it started)")
    print(f"  peak resident memory: {rss_read:.0f} MB after reading, {peak_rss_mb():.0f} MB after the stages "
          f"(table {tracks.memory_usage(deep=True).sum() / 2**20:.0f} MB)")
    for label, (wall, own, cpu, parts) in zip(("first", "second"), runs, strict=False):
        print(f"  msdkit run, {label} (fresh process, all outputs) {wall:7.2f} s  {wall / base:5.1f} x "
              f"(read+floor); the input itself (read, analysis, outputs) {own:.2f} s, the rest (start-up, "
              f"imports, compiled-kernel cache, checksums, report) {wall - own:.2f} s; CPU {cpu:.2f} s = "
              f"{cpu / base_cpu:.1f} x (read+floor CPU)")
        print(f"    its log: {parts}")
    if runs:
        print(f"  msdkit run peak resident memory {rss_run:.0f} MB")
    print("load average at the end " + " ".join(f"{v:.2f}" for v in os.getloadavg()))


if __name__ == "__main__":
    main()
