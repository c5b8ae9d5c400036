"""Memory and speed of chunked stack reading, against reading the whole movie in the same run.

Writes a multi-page TIFF (default 400 frames of 256 x 256 uint16, 52 MB) to a temporary folder, then prints
the peak memory allocated (tracemalloc, numpy arrays included) and the time for

* ``read_frames(0, n)``: the whole movie as float32 at once;
* ``iter_chunks(k)``: the same frames k at a time (only one chunk alive at a time);

and the ratio of the two peaks. Also for an OME-TIFF written by the simulator's writer settings and for a
zlib-compressed TIFF.

Run: python benchmarks/stack_reading.py [--frames 400] [--size 256] [--chunk 20]
"""

from __future__ import annotations

import argparse
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
import tifffile

from msdkit.io.stacks import open_stack


def measure(path: Path, chunk: int) -> tuple[float, float, float, float]:
    tracemalloc.start()
    t0 = time.perf_counter()
    with open_stack(path) as s:
        whole = s.read_frames(0, s.n_frames)
        total = float(whole.sum())
        del whole
    t_whole = time.perf_counter() - t0
    peak_whole = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()

    tracemalloc.start()
    t0 = time.perf_counter()
    acc = 0.0
    with open_stack(path) as s:
        for _, frames in s.iter_chunks(chunk):
            acc += float(frames.sum())
    t_chunk = time.perf_counter() - t0
    peak_chunk = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert abs(acc - total) <= 1e-6 * abs(total)
    return peak_whole / 1e6, t_whole, peak_chunk / 1e6, t_chunk


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--frames", type=int, default=400)
    ap.add_argument("--size", type=int, default=256)
    ap.add_argument("--chunk", type=int, default=20)
    args = ap.parse_args()
    data = np.random.default_rng(0).integers(0, 4000, (args.frames, args.size, args.size)).astype(np.uint16)
    with tempfile.TemporaryDirectory() as tmp:
        files = {
            "tiff": (Path(tmp) / "plain.tif", {}),
            "ome-tiff": (Path(tmp) / "movie.ome.tif", {"ome": True, "metadata": {"axes": "TYX"}}),
            "zlib tiff": (Path(tmp) / "zlib.tif", {"compression": "zlib"}),
        }
        print(
            f"{args.frames} frames {args.size}x{args.size} uint16 ({data.nbytes / 1e6:.0f} MB on disk "
            f"uncompressed), chunks of {args.chunk} frames"
        )
        print(
            f"{'file':<10} {'whole: peak MB':>15} {'s':>6} {'chunked: peak MB':>17} {'s':>6} "
            f"{'peak ratio':>11}"
        )
        for name, (path, kw) in files.items():
            tifffile.imwrite(path, data, photometric="minisblack", **kw)
            pw, tw, pc, tc = measure(path, args.chunk)
            print(f"{name:<10} {pw:15.1f} {tw:6.2f} {pc:17.1f} {tc:6.2f} {pw / pc:10.1f}x")


if __name__ == "__main__":
    main()
