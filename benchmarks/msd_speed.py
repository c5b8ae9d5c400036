"""Speed and memory of the time-averaged MSD engine on 20,000 tracks x 500 points.

Three timings in the same run, each the best of several repeats (interleaved, so machine load hits all alike):

* engine: msdkit.msd.time_averaged_msd on the track table, every lag (499 per track, 10 million output rows);
* floor: one batched real FFT over the same positions array, scipy.fft.rfft(positions, n=nfft, axis=1) with
  the zero-padded length an exact FFT autocorrelation needs (nfft >= 2N - 1) - the bare cost of touching the
  data once with an FFT;
* direct: the O(N^2) definition, vectorised over tracks with numpy (for each lag, mean over all pairs of all
  tracks at once), timed on a subset of tracks and scaled to the full set - the strongest plain-numpy
  baseline; and the same sum written the common way, one track and one lag at a time (smaller subset).

Also: agreement of engine and direct on the subset, and the engine's peak memory (tracemalloc) relative to
the positions array (n_tracks x n_points x 2 float64). Targets: >= 50 x faster than direct, <= 1.5 x the
floor, peak memory <= 4 x the positions array. A second table with 10 % of frames missed (gaps) is printed
for information.

Usage: python benchmarks/msd_speed.py [--tracks 20000] [--points 500] [--repeats 5]
"""

from __future__ import annotations

import argparse
import gc
import time
import tracemalloc

import numpy as np
import pandas as pd
import scipy.fft

from msdkit.msd import time_averaged_msd


def direct_msd(pos: np.ndarray) -> np.ndarray:
    """(n_tracks, N-1) TA-MSD by the defining sum over pairs, all lags."""
    n, N, _ = pos.shape
    out = np.empty((n, N - 1))
    for lag in range(1, N):
        d = pos[:, lag:] - pos[:, :-lag]
        out[:, lag - 1] = np.einsum("tpd,tpd->t", d, d) / (N - lag)
    return out


def direct_msd_per_track(pos: np.ndarray) -> list:
    """The same sum written the common way: one track and one lag at a time."""
    out = []
    for xy in pos:
        N = xy.shape[0]
        out.append([np.mean(np.sum((xy[lag:] - xy[:-lag]) ** 2, axis=1)) for lag in range(1, N)])
    return out


def best(fn, repeats):
    times = []
    for _ in range(repeats):
        gc.collect()
        t0 = time.perf_counter()
        r = fn()
        times.append(time.perf_counter() - t0)
        del r
    return min(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--tracks", type=int, default=20000)
    ap.add_argument("--points", type=int, default=500)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--direct-subset", type=int, default=400)
    args = ap.parse_args()
    n, N = args.tracks, args.points
    rng = np.random.default_rng(0)
    pos = np.cumsum(rng.normal(0.0, 0.05, (n, N, 2)), axis=1) + rng.uniform(0, 100, (n, 1, 2))
    tracks = pd.DataFrame({
        "track": np.repeat(np.arange(n, dtype=np.int64), N),
        "frame": np.tile(np.arange(N, dtype=np.int64), n),
        "x_um": pos[..., 0].ravel(),
        "y_um": pos[..., 1].ravel(),
    })
    nfft = scipy.fft.next_fast_len(2 * N - 1, real=True)

    time_averaged_msd(tracks.iloc[: 10 * N])  # compile the kernels once (cached afterwards)
    t_engine, t_floor = [], []
    for _ in range(args.repeats):
        t_engine.append(best(lambda: time_averaged_msd(tracks), 1))
        t_floor.append(best(lambda: scipy.fft.rfft(pos, n=nfft, axis=1), 1))
    engine, floor = min(t_engine), min(t_floor)

    k = args.direct_subset
    sub = pos[:k]
    t_direct_sub = best(lambda: direct_msd(sub), 2)
    direct = t_direct_sub * n / k
    k2 = max(1, k // 10)
    t_loop = best(lambda: direct_msd_per_track(pos[:k2]), 1) * n / k2
    ref = direct_msd(sub)
    got = time_averaged_msd(tracks.iloc[: k * N])["msd_um2"].to_numpy().reshape(k, N - 1)
    agree = float(np.max(np.abs(got - ref) / ref))

    gc.collect()
    tracemalloc.start()
    ta = time_averaged_msd(tracks)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    out_bytes = sum(ta[c].to_numpy().nbytes for c in ta.columns)
    del ta

    print(f"{n} tracks x {N} points, every lag ({n * (N - 1):,} rows); "
          f"positions array {pos.nbytes / 1e6:.0f} MB")
    print("| quantity | value |")
    print("|---|---|")
    print(f"| engine (time_averaged_msd) | {engine:.3f} s |")
    print(f"| floor: one batched rfft, n={nfft} | {floor:.3f} s |")
    print(f"| engine / floor | {engine / floor:.2f} (target <= 1.5) |")
    print(f"| direct O(N^2), numpy over tracks ({k} tracks x {n // k}) | {direct:.1f} s |")
    print(f"| direct / engine | {direct / engine:.0f} x (target >= 50) |")
    print(f"| direct, one track and lag at a time ({k2} tracks x {n // k2}) | {t_loop:.0f} s = "
          f"{t_loop / engine:.0f} x engine |")
    print(f"| max relative difference engine vs direct | {agree:.1e} |")
    print(f"| peak memory (tracemalloc) / positions array | {peak / pos.nbytes:.2f} (target <= 4; "
          f"the output table alone is {out_bytes / pos.nbytes:.2f}) |")
    print(f"| all engine repeats (s) | {', '.join(f'{t:.3f}' for t in t_engine)} |")
    print(f"| all floor repeats (s) | {', '.join(f'{t:.3f}' for t in t_floor)} |")

    keep = rng.random(len(tracks)) >= 0.1
    gappy = tracks[keep].reset_index(drop=True)
    time_averaged_msd(gappy.iloc[:5000])
    t_gap = best(lambda: time_averaged_msd(gappy), max(2, args.repeats // 2))
    print(f"| with 10 % of frames missed (gaps, masked FFT path) | {t_gap:.3f} s = "
          f"{t_gap / floor:.2f} x floor |")


if __name__ == "__main__":
    main()
