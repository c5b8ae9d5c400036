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
def finish_block(G, f1, csum, count, n_lag, scale, rows, offsets, out_lag, out_msd,
                 out_pairs):  # pragma: no cover - compiled
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


@numba.njit(cache=True, fastmath=True)
def fill_gapped(c0, c1, c2, n_dims, frame, start, count, first, stack):  # pragma: no cover - compiled
    """Place tracks with gaps on the frame grid.

    stack[d] gets centred coordinates, stack[n_dims] the mask of observed frames and stack[n_dims + 1] the
    squared distance from the track's mean (zeros elsewhere).
    """
    b = start.size
    stack[:] = 0.0
    for r in range(b):
        s = start[r]
        L = count[r]
        f0 = first[r]
        for i in range(L):
            col = frame[s + i] - f0
            stack[n_dims, r, col] = 1.0
        for d in range(n_dims):
            c = c0 if d == 0 else (c1 if d == 1 else c2)
            m = 0.0
            for i in range(L):
                m += c[s + i]
            m /= L
            for i in range(L):
                col = frame[s + i] - f0
                v = c[s + i] - m
                stack[d, r, col] = v
                stack[n_dims + 1, r, col] += v * v


@numba.njit(cache=True, fastmath=True)
def gapped_prepare(spec, n_dims, sin_t, cos_t, g, f1):  # pragma: no cover - compiled
    """Fold the numerator and pair-count spectra for a DCT-I by a half-length real FFT.

    Numerator 2 Re(conj(M) Q) - 2 sum_d |X_d|^2 and pair count |M|^2 (both real and even) go to g[0] and g[1]
    (see :func:`dct1_prepare`).
    """
    b = spec.shape[1]
    half = g.shape[2]
    pn = np.empty(half + 1)
    pc = np.empty(half + 1)
    for r in range(b):
        mz = spec[n_dims, r].view(np.float64)
        qz = spec[n_dims + 1, r].view(np.float64)
        for k in range(half + 1):
            mr, mi = mz[2 * k], mz[2 * k + 1]
            pn[k] = 2.0 * (mr * qz[2 * k] + mi * qz[2 * k + 1])
            pc[k] = mr * mr + mi * mi
        for d in range(n_dims):
            z = spec[d, r].view(np.float64)
            for k in range(half + 1):
                pn[k] -= 2.0 * (z[2 * k] * z[2 * k] + z[2 * k + 1] * z[2 * k + 1])
        for which in range(2):
            p = pn if which == 0 else pc
            out = g[which, r]
            out[0] = 0.5 * (p[0] + p[half])
            acc = 0.5 * (p[0] - p[half])
            for j in range(1, half // 2 + 1):
                k = half - j
                sym = 0.5 * (p[j] + p[k])
                dif = p[j] - p[k]
                out[j] = sym - sin_t[j] * dif
                out[k] = sym + sin_t[j] * dif
                acc += cos_t[j] * dif
            f1[which, r] = acc


@numba.njit(cache=True)
def gapped_finish(G, f1, n_lag, scale, msd, pairs):  # pragma: no cover - compiled
    """Numerator and pair count per lag from the half-length FFTs; msd = numerator / pairs (NaN if none)."""
    b = G.shape[1]
    for r in range(b):
        odd_n = f1[0, r]
        odd_c = f1[1, r]
        for n in range(1, n_lag[r] + 1):
            m = n >> 1
            if n & 1:
                if m > 0:
                    odd_n -= G[0, r, m].imag
                    odd_c -= G[1, r, m].imag
                fn = odd_n
                fc = odd_c
            else:
                fn = G[0, r, m].real
                fc = G[1, r, m].real
            cnt = np.int64(np.rint(scale * fc))
            pairs[r, n] = cnt
            msd[r, n] = scale * fn / cnt if cnt > 0 else np.nan


@numba.njit(cache=True)
def step_statistics(c0, c1, c2, n_dims, frame, start, count):  # pragma: no cover - compiled
    """Collect the steps between consecutive frames of every track and their per-track sums.

    Returns steps (n_steps_total, n_dims), step_track, seg_start, seg_len (runs of adjacent steps), and per
    track: n_steps, n_pairs (adjacent step pairs), sum_sq (sum over steps and axes of squares) and sum_cross
    (sum over adjacent pairs and axes of products).
    """
    n_tr = start.size
    total = 0
    n_seg = 0
    for t in range(n_tr):
        s = start[t]
        prev_ok = False
        for i in range(s, s + count[t] - 1):
            ok = frame[i + 1] - frame[i] == 1
            if ok:
                total += 1
                if not prev_ok:
                    n_seg += 1
            prev_ok = ok
    steps = np.empty((total, n_dims))
    step_track = np.empty(total, np.int64)
    seg_start = np.empty(n_seg, np.int64)
    seg_len = np.zeros(n_seg, np.int64)
    n_steps = np.zeros(n_tr, np.int64)
    n_pairs = np.zeros(n_tr, np.int64)
    sum_sq = np.zeros(n_tr)
    sum_cross = np.zeros(n_tr)
    k = 0
    g = -1
    for t in range(n_tr):
        s = start[t]
        prev_ok = False
        for i in range(s, s + count[t] - 1):
            ok = frame[i + 1] - frame[i] == 1
            if ok:
                if not prev_ok:
                    g += 1
                    seg_start[g] = k
                seg_len[g] += 1
                sq = 0.0
                cr = 0.0
                for d in range(n_dims):
                    c = c0 if d == 0 else (c1 if d == 1 else c2)
                    v = c[i + 1] - c[i]
                    steps[k, d] = v
                    sq += v * v
                    if prev_ok:
                        cr += v * steps[k - 1, d]
                step_track[k] = t
                n_steps[t] += 1
                sum_sq[t] += sq
                if prev_ok:
                    n_pairs[t] += 1
                    sum_cross[t] += cr
                k += 1
            prev_ok = ok
    return steps, step_track, seg_start, seg_len, n_steps, n_pairs, sum_sq, sum_cross
