"""End-to-end analysis time of a large track table, against reading it and one batched FFT (the floor).

Table: 20,000 Brownian tracks x 500 points (10 million rows), simulated in four blocks of 5,000 tracks
(D = 1 um^2/s, 50 ms frames, 20 ms exposure, 30 nm localisation error) and written once to a Parquet file
(default /tmp/big/big.parquet; reused when it exists).

Timings in the same run:

* read: msdkit.io.tables.read_track_table of the Parquet file;
* floor: one batched real FFT over the positions array (n_tracks, n_points, 2), scipy.fft.rfft with the
  zero-padded length an exact FFT autocorrelation needs (nfft >= 2N - 1) - the bare cost of touching the
  data once with an FFT;
* the stages of msdkit.pipeline.analyze_tracks called one after another as the pipeline calls them
  (drift, per-track fits, sample fit, ensemble MSD, motion classes, sample motion, size inputs and size
  distribution), then analyze_tracks as a whole and the overview figure.

Printed: seconds per stage and each time as a ratio to the floor and to read + floor. Target: the whole
analysis within a small multiple of read + floor (<= 30 s on the reference 2-core machine, which is about
6 x read + floor there). Also a small table (150 tracks of 20-80 points) timed the same way, best of
--repeats runs, to check small inputs do not get slower.

Usage: python benchmarks/end_to_end_speed.py [--table PATH] [--repeats 3] [--skip-big]
"""

from __future__ import annotations

import argparse
import gc
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
    gc.collect()
    t0 = time.perf_counter()
    out = fn(*a, **k)
    return out, time.perf_counter() - t0


def stages(tracks) -> dict[str, float]:
    """Seconds of each analysis stage, called as msdkit.pipeline.analyze_tracks calls them."""
    kw = dict(frame_interval_s=DT, exposure_s=EXPOSURE, n_dims=2)
    classify._FIT_CACHE.clear()
    t = {}
    tracks = tracks.sort_values(["track", "frame"], kind="stable").reset_index(drop=True)
    d, t["drift"] = timed(drift.estimate_drift, tracks, frame_interval_s=DT)
    tf, t["fit_tracks"] = timed(fit.fit_tracks, tracks, **kw)
    sf, t["fit_sample"] = timed(fit.fit_sample, tracks, tf, rng=0, **kw)
    _, t["ensemble_msd"] = timed(msd.ensemble_msd, tracks, frame_interval_s=DT)
    cl, t["classify_tracks"] = timed(classify.classify_tracks, tracks, frame_interval_s=DT, exposure_s=EXPOSURE,
                                     sigma_um=sf.sigma_um)
    _, t["sample_motion"] = timed(classify.sample_motion, tracks, cl, sf, d, frame_interval_s=DT,
                                  exposure_s=EXPOSURE)
    si, t["size_inputs"] = timed(sizing.lag1_track_estimates, tracks, localization_sd_um=sf.D_sigma_um, **kw)
    _, t["size_distribution"] = timed(sizing.size_distribution, si, temperature_c=25.0, viscosity_mpa_s=0.89,
                                      rng=0, **kw)
    classify._FIT_CACHE.clear()
    res, t["analyze_tracks (whole)"] = timed(analyze_tracks, tracks, frame_interval_s=DT, exposure_s=EXPOSURE)
    from msdkit.report.figures import write_stack_figures

    with tempfile.TemporaryDirectory() as tmp:
        _, t["overview figure"] = timed(write_stack_figures, Path(tmp), res)
    return t


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--table", default="/tmp/big/big.parquet")
    ap.add_argument("--repeats", type=int, default=3, help="repeats of the small-table timing (best kept)")
    ap.add_argument("--skip-big", action="store_true")
    args = ap.parse_args()

    small = small_table()
    best: dict[str, float] = {}
    for _ in range(max(1, args.repeats)):
        for k, v in stages(small).items():
            best[k] = min(best.get(k, np.inf), v)
    print("small table: 150 tracks x 20-80 points, best of", args.repeats)
    for k, v in best.items():
        print(f"  {k:<24s} {v:7.3f} s")

    if args.skip_big:
        return
    path = Path(args.table)
    if not path.exists():
        print("writing", path)
        make_big_table(path)
    tracks, t_read = timed(read_track_table, str(path), frame_interval_s=DT)
    n_tr = tracks["track"].nunique()
    N = len(tracks) // n_tr
    pos = np.stack([tracks["x_um"].to_numpy(float), tracks["y_um"].to_numpy(float)], axis=1).reshape(n_tr, N, 2)
    nfft = scipy.fft.next_fast_len(2 * N - 1, real=True)
    _, t_fft = timed(scipy.fft.rfft, pos, n=nfft, axis=1)
    del pos
    base = t_read + t_fft
    print(f"\nbig table: {n_tr} tracks x {N} points ({len(tracks)} rows)")
    print(f"  read                     {t_read:7.2f} s")
    print(f"  floor (batched rfft)     {t_fft:7.2f} s")
    print(f"  {'stage':<24s} {'s':>7s}  {'/floor':>7s}  {'/(read+floor)':>13s}")
    for k, v in stages(tracks).items():
        print(f"  {k:<24s} {v:7.2f}  {v / t_fft:7.1f}  {v / base:13.1f}")


if __name__ == "__main__":
    main()
