"""Compiled loops of the MSD engine (numba); imported lazily by :mod:`msdkit.msd`.

Each kernel makes one pass over a block so that the engine's cost stays close to that of its FFTs.
"""

from __future__ import annotations

import numba
import numpy as np


@numba.njit(cache=True)
def scan_order(track, frame):  # pragma: no cover - compiled
    """Return (0 = sorted by track then frame, 1 = not sorted, 2 = a (track, frame) pair repeats, index)."""
    n = track.size
    for i in range(1, n):
        if track[i] < track[i - 1]:
            return 1, i
        if track[i] == track[i - 1]:
            if frame[i] < frame[i - 1]:
                return 1, i
            if frame[i] == frame[i - 1]:
                return 2, i
    return 0, 0


@numba.njit(cache=True)
def track_starts(track):  # pragma: no cover - compiled
    """Index of the first row of each track in a table sorted by track."""
    n = track.size
    k = 1 if n else 0
    for i in range(1, n):
        if track[i] != track[i - 1]:
            k += 1
    out = np.empty(k, np.int64)
    if n:
        out[0] = 0
        k = 1
        for i in range(1, n):
            if track[i] != track[i - 1]:
                out[k] = i
                k += 1
    return out


@numba.njit(cache=True, fastmath=True)
def fill_block(c0, c1, c2, n_dims, start, count, grid, csum):  # pragma: no cover - compiled
    """Centre each track's coordinates into grid[d, row, :L] (zeros after) and running sums of |r|^2."""
    b = start.size
    width = grid.shape[2]
    sq = np.empty(width)
    for r in range(b):
        s = start[r]
        L = count[r]
        sq[:L] = 0.0
        for d in range(n_dims):
            c = c0 if d == 0 else (c1 if d == 1 else c2)
            src = c[s:s + L]
            m = 0.0
            for i in range(L):
                m += src[i]
            m /= L
            row = grid[d, r]
            for i in range(L):
                v = src[i] - m
                row[i] = v
                sq[i] += v * v
            row[L:] = 0.0
        acc = 0.0
        out = csum[r]
        out[0] = 0.0
        for i in range(L):
            acc += sq[i]
            out[i + 1] = acc


@numba.njit(cache=True, fastmath=True)
def dct1_prepare(spec, n_dims, sin_t, cos_t, g, f1):  # pragma: no cover - compiled
    """Power spectrum P_k = sum_d |spec[d, row, k]|^2 folded for a DCT-I by a half-length real FFT.

    g_j = (P_j + P_{N-j})/2 - sin(pi j/N) (P_j - P_{N-j}), j < N;  f1 = sum_k w_k P_k cos(pi k/N)
    (w_0 = w_N = 1/2), the first odd output, which seeds the recurrence in :func:`finish_block`.
    """
    b = spec.shape[1]
    half = g.shape[1]
    p = np.empty(half + 1)
    for r in range(b):
        z = spec[0, r].view(np.float64)
        for k in range(half + 1):
            p[k] = z[2 * k] * z[2 * k] + z[2 * k + 1] * z[2 * k + 1]
        for d in range(1, n_dims):
            z = spec[d, r].view(np.float64)
            for k in range(half + 1):
                p[k] += z[2 * k] * z[2 * k] + z[2 * k + 1] * z[2 * k + 1]
        out = g[r]
        out[0] = 0.5 * (p[0] + p[half])
        acc = 0.5 * (p[0] - p[half])
        for j in range(1, half // 2 + 1):
            k = half - j
            sym = 0.5 * (p[j] + p[k])
            dif = p[j] - p[k]
            out[j] = sym - sin_t[j] * dif
            out[k] = sym + sin_t[j] * dif
            acc += cos_t[j] * dif
        f1[r] = acc


@numba.njit(cache=True)
def finish_block(G, f1, csum, count, n_lag, scale, rows, offsets, out_lag, out_msd, out_pairs):  # pragma: no cover
    """Autocorrelation from the half-length FFT, MSD = (S1 - 2 S2)/(L - n), written into the output."""
    b = G.shape[0]
    for r in range(b):
        L = count[r]
        total = csum[r, L]
        o = offsets[rows[r]] - 1
        odd = f1[r]
        for n in range(1, n_lag[r] + 1):
            m = n >> 1
            if n & 1:
                if m > 0:
                    odd -= G[r, m].imag
                f = odd
            else:
                f = G[r, m].real
            s1 = csum[r, L - n] + total - csum[r, n]
            out_lag[o + n] = n
            out_msd[o + n] = (s1 - 2.0 * scale * f) / (L - n)
            out_pairs[o + n] = L - n
