"""Compiled loops of the MSD engine and of the other track-level stages (numba); imported lazily.

Every kernel releases the GIL (``nogil=True``), so stages that only read the tracks can run side by side in
threads (:func:`msdkit.pipeline.analyze_tracks`); the flag does not change a kernel's arithmetic.

Each kernel makes one pass over a block so that the engine's cost stays close to that of its FFTs. The
selection kernels (:func:`median`, :func:`median_abs_deviation`) give exactly what :func:`numpy.median` gives
(the middle value, or the mean of the two middle values), in a few linear passes instead of a partition.
"""

from __future__ import annotations

import numba
import numpy as np


@numba.njit(cache=True, nogil=True)
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


@numba.njit(cache=True, nogil=True)
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


@numba.njit(cache=True, nogil=True, fastmath=True)
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


@numba.njit(cache=True, nogil=True, fastmath=True)
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


@numba.njit(cache=True, nogil=True)
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


@numba.njit(cache=True, nogil=True, fastmath=True)
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


@numba.njit(cache=True, nogil=True, fastmath=True)
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


@numba.njit(cache=True, nogil=True)
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


@numba.njit(cache=True, nogil=True)
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


# ------------------------------------------------------------------------------------------- selection
_SELECT_BINS = 4096
_SELECT_SMALL = 4096


@numba.njit(cache=True, nogil=True)
def _bucket_select(buf, k):  # pragma: no cover - compiled
    """Values of rank k and k + 1 (0-based, ascending; rank k + 1 clipped to the last) of buf (overwritten).

    Bucket selection: count the values into equal-width bins between their extremes, keep the bin that holds
    rank k and repeat on it; the bin index is a non-decreasing function of the value, so ranks stay inside
    their bins (when ranks k and k + 1 fall in different bins, they are the largest value of the first and
    the smallest of the second). A small remainder is sorted.
    """
    m = buf.size
    k2 = min(k + 1, m - 1)
    while True:
        lo = np.inf
        hi = -np.inf
        for i in range(m):
            lo = min(lo, buf[i])
            hi = max(hi, buf[i])
        width = hi - lo
        if lo == hi:
            return lo, lo
        if m <= _SELECT_SMALL or not np.isfinite(width):
            tmp = np.sort(buf[:m])
            return tmp[k], tmp[k2]
        scale = _SELECT_BINS / width
        counts = np.zeros(_SELECT_BINS + 1, np.int64)
        for i in range(m):
            b = min(int((buf[i] - lo) * scale), _SELECT_BINS - 1)
            counts[b + 1] += 1
        for b in range(_SELECT_BINS):
            counts[b + 1] += counts[b]
        b1 = 0
        while counts[b1 + 1] <= k:
            b1 += 1
        b2 = b1
        while counts[b2 + 1] <= k2:
            b2 += 1
        if b2 != b1:
            top = -np.inf
            bottom = np.inf
            for i in range(m):
                v = buf[i]
                b = min(int((v - lo) * scale), _SELECT_BINS - 1)
                if b == b1 and v > top:
                    top = v
                elif b == b2 and v < bottom:
                    bottom = v
            return top, bottom
        j = 0
        for i in range(m):  # in place: j never passes i
            v = buf[i]
            buf[j] = v
            j += min(int((v - lo) * scale), _SELECT_BINS - 1) == b1
        k -= counts[b1]
        k2 -= counts[b1]
        m = j


@numba.njit(cache=True, nogil=True)
def _select_pair(x, center, use_center, k):  # pragma: no cover - compiled
    """Values of rank k and k + 1 (0-based, ascending; k + 1 clipped to the last) of v = x or |x - center|.

    A strided sample brackets the two ranks (Floyd & Rivest 1975, Commun. ACM 18, 165); one pass counts the
    values below the bracket and gathers those inside it, and :func:`_bucket_select` finishes on the few
    gathered. If the bracket misses (unlucky sample), the whole array goes to :func:`_bucket_select`.
    """
    n = x.size
    k2 = min(k + 1, n - 1)
    if n > 4 * _SELECT_SMALL:
        m = min(max(int(4.0 * np.sqrt(n)), 1024), 65536)
        stride = n // m
        smp = np.empty(m)
        for i in range(m):
            smp[i] = abs(x[i * stride] - center) if use_center else x[i * stride]
        smp.sort()
        half = 4.0 * np.sqrt(m)
        ia = int(k / n * m - half)
        ib = int(k2 / n * m + half) + 1
        a = smp[ia] if ia >= 0 else -np.inf
        b = smp[ib] if ib < m else np.inf
        cap = min(n, int(n * (ib - ia + 1) / m * 2.0) + 1024)
        buf = np.empty(cap + 1)
        below = 0
        j = 0
        for i in range(n):  # branch-free: the comparisons are unpredictable
            v = abs(x[i] - center) if use_center else x[i]
            below += v < a
            buf[min(j, cap)] = v
            j += (v >= a) & (v <= b)
        if j <= cap and below <= k and k2 < below + j:
            return _bucket_select(buf[:j], k - below)
    buf = np.empty(n)
    for i in range(n):
        buf[i] = abs(x[i] - center) if use_center else x[i]
    return _bucket_select(buf, k)


@numba.njit(cache=True, nogil=True)
def median(x):  # pragma: no cover - compiled
    """Median of a 1-D array of finite values, as numpy.median computes it (NaN when empty)."""
    n = x.size
    if n == 0:
        return np.nan
    a, b = _select_pair(x, 0.0, False, (n - 1) // 2)
    return a if n % 2 else (a + b) / 2.0


@numba.njit(cache=True, nogil=True)
def median_abs_deviation(x, center):  # pragma: no cover - compiled
    """Median of |x - center| (not scaled), as numpy.median(numpy.abs(x - center)) computes it."""
    n = x.size
    if n == 0:
        return np.nan
    a, b = _select_pair(x, center, True, (n - 1) // 2)
    return a if n % 2 else (a + b) / 2.0


# ----------------------------------------------------------------------------------------------- drift
@numba.njit(cache=True, nogil=True)
def drift_steps(track, frame, c0, c1, c2, n_dims):  # pragma: no cover - compiled
    """Collect the steps between consecutive rows of a track (rows sorted by track, frame; NaN rows skipped).

    Returns tid (index of the track among the tracks with a finite row), f0 (start frame), gap (frames) and
    d (n_steps, n_dims) displacement, as ``msdkit.drift._steps`` defines them.
    """
    n = track.size
    cap = max(n - 1, 0)
    tid = np.empty(cap, np.int64)
    f0 = np.empty(cap, np.int64)
    gap = np.empty(cap, np.int64)
    disp = np.empty((cap, n_dims))
    k = 0
    t = -1
    prev = -1
    for i in range(n):
        good = np.isfinite(c0[i])
        if n_dims > 1:
            good = good and np.isfinite(c1[i])
        if n_dims > 2:
            good = good and np.isfinite(c2[i])
        if not good:
            continue
        if prev < 0 or track[i] != track[prev]:
            t += 1
        elif frame[i] > frame[prev]:
            tid[k] = t
            f0[k] = frame[prev]
            gap[k] = frame[i] - frame[prev]
            disp[k, 0] = c0[i] - c0[prev]
            if n_dims > 1:
                disp[k, 1] = c1[i] - c1[prev]
            if n_dims > 2:
                disp[k, 2] = c2[i] - c2[prev]
            k += 1
        prev = i
    return tid[:k], f0[:k], gap[:k], disp[:k]


@numba.njit(cache=True, nogil=True)
def track_sums(tid, gap, d, n_tr, f0, first, n_frames):  # pragma: no cover - compiled
    """Per track: summed displacement S (n_tr, n_dims) and summed gap G; per frame: one-frame steps from it.

    The sums run in row order, as numpy.bincount adds its weights.
    """
    nd = d.shape[1]
    S = np.zeros((n_tr, nd))
    G = np.zeros(n_tr)
    n_one = np.zeros(n_frames, np.int64)
    for i in range(tid.size):
        t = tid[i]
        for c in range(nd):
            S[t, c] += d[i, c]
        G[t] += gap[i]
        if gap[i] == 1:
            j = f0[i] - first
            if 0 <= j < n_frames:
                n_one[j] += 1
    return S, G, n_one


@numba.njit(cache=True, nogil=True)
def group_by_block(f0, edges, tid, gap, d):  # pragma: no cover - compiled
    """Regroup steps by block of start frames, keeping their order within a block (a counting sort).

    The block of a step is ``clip(searchsorted(edges, f0, side="right") - 1, 0, n_blocks - 1)``. Returns
    bounds (n_blocks + 1), gap and d in block order, and per block the number of distinct tracks (counted as
    changes of tid, which is non-decreasing within a block when it is non-decreasing overall).
    """
    n = f0.size
    nd = d.shape[1]
    n_blocks = edges.size - 1
    blk = np.empty(n, np.int64)
    bounds = np.zeros(n_blocks + 1, np.int64)
    for i in range(n):
        v = f0[i]
        lo = 0
        hi = edges.size
        while lo < hi:  # first edge > v
            mid = (lo + hi) >> 1
            if edges[mid] <= v:
                lo = mid + 1
            else:
                hi = mid
        b = min(max(lo - 1, 0), n_blocks - 1)
        blk[i] = b
        bounds[b + 1] += 1
    for b in range(n_blocks):
        bounds[b + 1] += bounds[b]
    pos = bounds[:-1].copy()
    last = np.full(n_blocks, -1, np.int64)
    n_distinct = np.zeros(n_blocks, np.int64)
    gap_s = np.empty(n, np.int64)
    d_s = np.empty((n, nd))
    for i in range(n):
        b = blk[i]
        j = pos[b]
        pos[b] += 1
        if tid[i] != last[b]:
            n_distinct[b] += 1
            last[b] = tid[i]
        gap_s[j] = gap[i]
        for c in range(nd):
            d_s[j, c] = d[i, c]
    return bounds, gap_s, d_s, n_distinct


@numba.njit(cache=True, nogil=True)
def huber_block_sums(d, gap, med, cutoff):  # pragma: no cover - compiled
    """Sum w d and w gap per axis, with Huber weights w = min(1, cutoff / |d - med|) per value."""
    nd = d.shape[1]
    num = np.zeros(nd)
    den = np.zeros(nd)
    for i in range(d.shape[0]):
        for c in range(nd):
            r = abs(d[i, c] - med[c])
            w = min(1.0, cutoff / max(r, 1e-300))
            num[c] += w * d[i, c]
            den[c] += w * gap[i]
    return num, den


# ------------------------------------------------------------------------------------ sample-level MSD
@numba.njit(cache=True, nogil=True, fastmath=True)
def lag_square_sums(Q, n_lags):  # pragma: no cover - compiled
    """Sum over i and axes of (Q[g, i + n] - Q[g, i])^2 for lags n = 1..n_lags, per track g: (G, n_lags).

    Q is (G, L, n_axes) positions of equal-length tracks without gaps; n_lags < L.
    """
    G, L, nd = Q.shape
    out = np.zeros((G, n_lags))
    x = np.empty(L)
    for g in range(G):
        for d in range(nd):
            for i in range(L):
                x[i] = Q[g, i, d]
            for n in range(1, n_lags + 1):
                s = 0.0
                for i in range(L - n):
                    v = x[i + n] - x[i]
                    s += v * v
                out[g, n - 1] += s
    return out


# ------------------------------------------------------------------------------------------ step-model grid
@numba.njit(cache=True, nogil=True)
def best_noise_ratio(sc, norm, rank, idx, v3):  # pragma: no cover - compiled
    """Best noise ratio of each track and shape on the likelihood grid, and the scales around it.

    ``sc`` (c, S*R) holds the raw products P @ Qt of :func:`msdkit.motion_models._profile_grid` for c tracks,
    S shapes and R noise ratios. The scale is max(sc / norm, 1e-300); the index of the smallest
    scale x rank over R (the first one, or the first NaN, as :func:`numpy.argmin`) goes to ``idx`` (c, S) and
    the scales at that index and its two neighbours (clipped at the grid ends) to ``v3`` (c, S, 3): the same
    operations in the same order as the numpy version, so the same numbers bit for bit.
    """
    c = sc.shape[0]
    S, R = rank.shape
    for t in range(c):
        for s in range(S):
            base = s * R
            best = 0.0
            bi = 0
            for r in range(R):
                v = sc[t, base + r] / norm
                if v < 1e-300:
                    v = 1e-300
                q = v * rank[s, r]
                if q != q:  # NaN: numpy.argmin returns the first one
                    bi = r
                    break
                if r == 0 or q < best:
                    best = q
                    bi = r
            idx[t, s] = bi
            for j in range(3):
                r = min(max(bi + j - 1, 0), R - 1)
                v = sc[t, base + r] / norm
                if v < 1e-300:
                    v = 1e-300
                v3[t, s, j] = v


@numba.njit(cache=True, nogil=True)
def sum_middle_axis(x):  # pragma: no cover - compiled
    """Sum of x (c, n, d) over its middle axis, (c, d), term after term in order.

    numpy.sum(x, axis=1) adds along a non-contiguous axis in the same order.
    """
    c, n, d = x.shape
    out = np.zeros((c, d))
    for t in range(c):
        for a in range(d):
            s = 0.0
            for i in range(n):
                s += x[t, i, a]
            out[t, a] = s
    return out


@numba.njit(cache=True, nogil=True)
def power_with_free_mean(F, mean, H, P, Pd):  # pragma: no cover - compiled
    """Periodograms summed over axes of transforms F (c, d, K) and of F − mean x H, into P and Pd (c, K).

    F − mean x H is the transform of the centred series (H: the taper's transform). re² + im² per axis, axes
    added in order (as numpy.sum along the axis of length d).
    """
    c, d, K = F.shape
    for t in range(c):
        for k in range(K):
            s = 0.0
            sd = 0.0
            for a in range(d):
                z = F[t, a, k]
                re = z.real
                im = z.imag
                sq = re * re
                sq += im * im
                s = sq if a == 0 else s + sq
                m = mean[t, a]
                re = re - m * H[k].real
                im = im - m * H[k].imag
                sq = re * re
                sq += im * im
                sd = sq if a == 0 else sd + sq
            P[t, k] = s
            Pd[t, k] = sd


# ------------------------------------------------------------------------------------- track step statistics
@numba.njit(cache=True, nogil=True)
def planar_step_statistics(X, out):  # pragma: no cover - compiled
    """Lag-1 step correlation, non-Gaussian parameter, straightness, gyration asymmetry of 2D tracks.

    X (g, n, 2) equal-length tracks, n ≥ 5; results into out (g, 4). The formulas of
    ``classify._step_statistics_group`` with each sum taken term after term.
    """
    g, n, nd = X.shape
    m = n - 1
    inv_m = 1.0 / m
    kk = 1.0 + 2.0 / nd
    for t in range(g):
        mx = 0.0
        my = 0.0
        px = 0.0
        py = 0.0
        for i in range(n):
            px += X[t, i, 0]
            py += X[t, i, 1]
        for i in range(m):
            mx += X[t, i + 1, 0] - X[t, i, 0]
            my += X[t, i + 1, 1] - X[t, i, 1]
        mx /= m
        my /= m
        px /= n
        py /= n
        num = 0.0
        den = 0.0
        s2 = 0.0
        s4 = 0.0
        path = 0.0
        qx = 0.0
        qy = 0.0
        for i in range(m):
            dx = X[t, i + 1, 0] - X[t, i, 0]
            dy = X[t, i + 1, 1] - X[t, i, 1]
            cx = dx - mx
            cy = dy - my
            den += cx * cx + cy * cy
            if i > 0:
                num += cx * qx + cy * qy
            qx = cx
            qy = cy
            r2 = dx * dx + dy * dy
            s2 += r2 * inv_m
            s4 += r2 * r2
            path += np.sqrt(r2)
        m4 = s4 / m
        ex = X[t, n - 1, 0] - X[t, 0, 0]
        ey = X[t, n - 1, 1] - X[t, 0, 1]
        end = np.sqrt(ex * ex + ey * ey)
        a = 0.0
        b = 0.0
        e = 0.0
        for i in range(n):
            x = X[t, i, 0] - px
            y = X[t, i, 1] - py
            a += x * x
            b += x * y
            e += y * y
        a /= m
        b /= m
        e /= m
        out[t, 0] = num / den if den > 0 else np.nan
        out[t, 1] = m4 / (kk * s2 * s2) - 1.0 if s2 > 0 else np.nan
        out[t, 2] = end / path if path > 0 else np.nan
        evs = a + e
        out[t, 3] = ((a - e) ** 2 + 4.0 * b * b) / (evs * evs) if evs > 0 else np.nan


# ---------------------------------------------------------------------------- batched small quadratic forms
# Generalised least squares on stacks of small matrices (per-track power-law fits). numpy.einsum without
# optimisation sums these term after term, multiplying left to right; the loops below do the same, so they
# give the same numbers bit for bit (tested against numpy.einsum), without einsum's per-element overhead
# and without first copying the rows of C that a subset of tracks needs.
@numba.njit(cache=True, nogil=True)
def rows_quadratic_form(r, C, rows):  # pragma: no cover - compiled
    """out[i] = Σ_l Σ_m r[i, l] C[rows[i], l, m] r[i, m] (as numpy.einsum("nl,nlm,nm->n", r, C[rows], r))."""
    n, L = r.shape
    out = np.empty(n)
    for i in range(n):
        k = rows[i]
        s = 0.0
        for l in range(L):
            for m in range(L):
                s += r[i, l] * C[k, l, m] * r[i, m]
        out[i] = s
    return out


@numba.njit(cache=True, nogil=True)
def rows_jt_c(J, C, rows):  # pragma: no cover - compiled
    """out[i, p, m] = Σ_l J[i, l, p] C[rows[i], l, m] (as numpy.einsum("nlp,nlm->npm", J, C[rows]))."""
    n, L, P = J.shape
    M = C.shape[2]
    out = np.zeros((n, P, M))
    for i in range(n):
        k = rows[i]
        for l in range(L):
            for p in range(P):
                a = J[i, l, p]
                for m in range(M):
                    out[i, p, m] += a * C[k, l, m]
    return out


@numba.njit(cache=True, nogil=True)
def sandwich(J, C):  # pragma: no cover - compiled
    """out[i, p, q] = Σ_l Σ_m J[i, l, p] C[i, l, m] J[i, m, q] (numpy.einsum("nlp,nlm,nmq->npq", J, C, J))."""
    n, L, P = J.shape
    out = np.empty((n, P, P))
    for i in range(n):
        for p in range(P):
            for q in range(P):
                s = 0.0
                for l in range(L):
                    for m in range(L):
                        s += J[i, l, p] * C[i, l, m] * J[i, m, q]
                out[i, p, q] = s
    return out


# ------------------------------------------------------------------------------------------ bootstrap counts
@numba.njit(cache=True, nogil=True)
def count_draws(draws, n):  # pragma: no cover - compiled
    """(b, n) float counts of each value 0..n-1 in each row of draws (b, k): numpy.bincount row by row."""
    b, k = draws.shape
    out = np.zeros((b, n))
    for i in range(b):
        for j in range(k):
            out[i, draws[i, j]] += 1.0
    return out


# ------------------------------------------------------------------------------- numpy's summation order
@numba.njit(cache=True, nogil=True)
def _numpy_block_sum(a, lo, n):  # pragma: no cover - compiled
    """Sum of at most 128 terms a[lo : lo + n] in numpy's order (see :func:`numpy_sum`)."""
    if n < 8:
        res = 0.0
        for i in range(lo, lo + n):
            res += a[i]
        return res
    r0 = a[lo]
    r1 = a[lo + 1]
    r2 = a[lo + 2]
    r3 = a[lo + 3]
    r4 = a[lo + 4]
    r5 = a[lo + 5]
    r6 = a[lo + 6]
    r7 = a[lo + 7]
    i = 8
    stop = n - (n % 8)
    while i < stop:
        r0 += a[lo + i]
        r1 += a[lo + i + 1]
        r2 += a[lo + i + 2]
        r3 += a[lo + i + 3]
        r4 += a[lo + i + 4]
        r5 += a[lo + i + 5]
        r6 += a[lo + i + 6]
        r7 += a[lo + i + 7]
        i += 8
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while i < n:
        res += a[lo + i]
        i += 1
    return res


@numba.njit(cache=True, nogil=True)
def numpy_sum(a, lo, n):  # pragma: no cover - compiled
    """Sum of a[lo : lo + n] in the order numpy.sum uses along a contiguous axis (pairwise, 8 accumulators).

    Fewer than 8 terms: one after another; up to 128: eight running sums over the multiples of 8, combined
    as ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7)), then the rest; more: the two halves (the first a
    multiple of 8 long) summed so and added. Same numbers as numpy.sum bit for bit (tested). The halving is
    walked with an explicit stack (numba's cache does not load self-recursive functions reliably).
    """
    if n <= 128:
        return _numpy_block_sum(a, lo, n)
    s_lo = np.empty(64, np.int64)
    s_n = np.empty(64, np.int64)
    s_state = np.empty(64, np.int64)
    vals = np.empty(64)
    top = 0
    nv = 0
    s_lo[0] = lo
    s_n[0] = n
    s_state[0] = 0
    while top >= 0:
        m = s_n[top]
        if m <= 128:
            vals[nv] = _numpy_block_sum(a, s_lo[top], m)
            nv += 1
            top -= 1
            continue
        m2 = m // 2
        m2 -= m2 % 8
        if s_state[top] == 0:  # the first half
            s_state[top] = 1
            s_lo[top + 1] = s_lo[top]
            s_n[top + 1] = m2
            s_state[top + 1] = 0
            top += 1
        elif s_state[top] == 1:  # the second half
            s_state[top] = 2
            s_lo[top + 1] = s_lo[top] + m2
            s_n[top + 1] = m - m2
            s_state[top + 1] = 0
            top += 1
        else:  # both done: first + second
            vals[nv - 2] = vals[nv - 2] + vals[nv - 1]
            nv -= 1
            top -= 1
    return vals[0]


@numba.njit(cache=True, nogil=True)
def em_mixing_weights(L, prior, n_iter, tol):  # pragma: no cover - compiled
    """EM steps towards the mixing weights of likelihood rows L (n, A), from ``prior``; see classify.

    Each step: post = L x prior, rows divided by max(row sum, 1e-300), new prior = column means; stop after
    the step whose largest change is below ``tol`` (NaN: no stop). numpy's operations in numpy's order (row
    sums pairwise, column sums row after row, then / n), without the (n, A) temporaries.
    """
    n, A = L.shape
    row = np.empty(A)
    acc = np.zeros(A)
    prior = prior.copy()
    for _ in range(n_iter):
        for i in range(n):
            for j in range(A):
                row[j] = L[i, j] * prior[j]
            s = numpy_sum(row, 0, A)
            if s < 1e-300:
                s = 1e-300
            for j in range(A):
                v = row[j] / s
                if i == 0:
                    acc[j] = v
                else:
                    acc[j] += v
        done = True
        for j in range(A):
            new = acc[j] / n
            if not abs(new - prior[j]) < tol:
                done = False
            prior[j] = new
        if done:
            break
    return prior


@numba.njit(cache=True, nogil=True)
def amplitude_information(P, w, shape, noise, r, r_fallback, n_axes, W, n_steps, taper4):  # pragma: no cover
    """Amplitude of a fixed power-law shape per track and the variance of its logarithm (Whittle information).

    For ``motion_models.amplitude_at_alpha``: per row of P (T, F), the noise ratio r (r_fallback where the
    spectrum shape + r noise falls below half the shape anywhere), spec = max(shape + r noise, 1e-300),
    A = max(Σ w P / spec / (n_axes W), 1e-300) and, from the information matrix of (log A, noise),
    var = F22 / det (1 / F11 when det ≤ 0) x n_steps x taper4. numpy's operations in numpy's order (sums
    pairwise, :func:`numpy_sum`), so the same numbers; returns (A, var), the logarithm and root left to numpy.
    """
    T, F = P.shape
    spec = np.empty(F)
    q = np.empty(F)
    q11 = np.empty(F)
    q12 = np.empty(F)
    q22 = np.empty(F)
    A_out = np.empty(T)
    var_out = np.empty(T)
    for t in range(T):
        rt = r[t]
        for f in range(F):
            if shape[f] + rt * noise[f] < 0.5 * shape[f]:
                rt = r_fallback[t]
                break
        for f in range(F):
            v = shape[f] + rt * noise[f]
            if v < 1e-300:
                v = 1e-300
            spec[f] = v
            q[f] = w[f] * P[t, f] / v
        A = numpy_sum(q, 0, F) / (n_axes * W)
        if A < 1e-300:
            A = 1e-300
        for f in range(F):
            S = A * spec[f]
            g1 = A * shape[f] / S
            g2 = noise[f] / S
            q11[f] = w[f] * g1 * g1
            q12[f] = w[f] * g1 * g2
            q22[f] = w[f] * g2 * g2
        F11 = n_axes * numpy_sum(q11, 0, F)
        F12 = n_axes * numpy_sum(q12, 0, F)
        F22 = n_axes * numpy_sum(q22, 0, F)
        det = F11 * F22 - F12 * F12
        var = F22 / det if det > 0 else 1.0 / F11
        A_out[t] = A
        var_out[t] = var * n_steps * taper4
    return A_out, var_out


# ------------------------------------------------------------------------------------------ fit-cache key
@numba.njit(cache=True, nogil=True)
def column_sums(v, w_in, c_out):  # pragma: no cover - compiled
    """Plain sum and position-weighted sums of one column (the fit-cache key of classify), in one pass.

    Rows go in blocks of w_in.size: block k is weighted by w_in within the block and by 1 + 0.5 cos(k c_out)
    as a whole (returned as the second sum); the rows after the last full block by w_in (the third sum).
    """
    B = w_in.size
    n = v.size
    k_full = n // B
    s1 = 0.0
    s2 = 0.0
    for k in range(k_full):
        inner = 0.0
        for i in range(B):
            x = float(v[k * B + i])
            s1 += x
            inner += x * w_in[i]
        s2 += inner * (1.0 + 0.5 * np.cos(k * c_out))
    s3 = 0.0
    for i in range(n - k_full * B):
        x = float(v[k_full * B + i])
        s1 += x
        s3 += x * w_in[i]
    return s1, s2, s3


# ------------------------------------------------------------------------------------------ ensemble MSD
@numba.njit(cache=True, nogil=True)
def ensemble_sums(lag, y, w, n):  # pragma: no cover - compiled
    """Per lag: tracks, summed pairs, summed pairs x TA-MSD, summed TA-MSD (row order, as numpy.bincount)."""
    n_tr = np.zeros(n, np.int64)
    sw = np.zeros(n)
    swy = np.zeros(n)
    sy = np.zeros(n)
    for i in range(lag.size):
        k = lag[i]
        n_tr[k] += 1
        sw[k] += w[i]
        swy[k] += w[i] * y[i]
        sy[k] += y[i]
    return n_tr, sw, swy, sy


@numba.njit(cache=True, nogil=True)
def ensemble_spread(lag, y, w, mean, n):  # pragma: no cover - compiled
    """Per lag: sum of (pairs x (TA-MSD - mean))^2 over tracks (row order, as numpy.bincount)."""
    ss = np.zeros(n)
    for i in range(lag.size):
        k = lag[i]
        r = w[i] * (y[i] - mean[k])
        ss[k] += r * r
    return ss


# ------------------------------------------------------------------------------------------ size-switch path
# error_model="numpy": no zero-division check (theta > 0), so divisions vectorise
@numba.njit(cache=True, nogil=True, error_model="numpy")
def viterbi_switches(y, starts, lengths, run_row, k, theta, c, log_w, log_p, log_q, out):  # pragma: no cover
    """Mark in ``out`` the steps at which each run's most probable state path (Viterbi) jumps to a new state.

    Rank-one switch term. ``k, theta, c`` (rows: ``run_row[r]``) give each state's
    gamma log density ``(k - 1) ln y - y / theta + c``. Same recursion, arithmetic and tie rule (first
    maximum) as :func:`msdkit._size_fit._switch_points_numpy`: each run's rows of ``k - 1``, ``theta`` and
    ``c`` are copied out once, and the per-state update has no branch so that it runs on vector lanes (the
    same IEEE operations in the same order, so the same numbers).
    """
    K = log_w.size
    delta = np.empty(K)
    km1 = np.empty(K)
    th = np.empty(K)
    cc = np.empty(K)
    n_max = 0
    for r in range(starts.size):
        n_max = max(n_max, lengths[r])
    sw = np.zeros((max(n_max, 1), K), dtype=np.bool_)
    pbest = np.zeros(max(n_max, 1), dtype=np.int64)
    for r in range(starts.size):
        n = lengths[r]
        if n < 2:
            continue
        s0 = starts[r]
        row = run_row[r]
        for q in range(K):
            km1[q] = k[row, q] - 1.0
            th[q] = theta[row, q]
            cc[q] = c[row, q]
        yy = y[s0]
        ly = np.log(max(yy, 1e-300))
        for q in range(K):
            delta[q] = log_w[q] + km1[q] * ly - yy / th[q] + cc[q]
        for j in range(1, n):
            pb = 0
            best = delta[0]
            for q in range(1, K):
                if delta[q] > best:
                    best = delta[q]
                    pb = q
            pbest[j] = pb
            yy = y[s0 + j]
            ly = np.log(max(yy, 1e-300))
            jb = log_p + best
            swj = sw[j]
            for q in range(K):
                stay = delta[q] + log_q
                jump = jb + log_w[q]
                up = jump > stay
                swj[q] = up
                delta[q] = km1[q] * ly - yy / th[q] + cc[q] + (jump if up else stay)
        state = 0
        best = delta[0]
        for q in range(1, K):
            if delta[q] > best:
                best = delta[q]
                state = q
        for j in range(n - 1, 0, -1):
            if sw[j, state]:
                out[s0 + j] = True
                state = pbest[j]


# ------------------------------------------------------------------------------------------ lag-1 step sums
@numba.njit(cache=True, nogil=True)
def lag1_step_sums(code, frame, c0, c1, c2, n_dims, off0, off1, off2):  # pragma: no cover - compiled
    """Per-track sums of lag-1 steps in one pass over a table in (track, frame) order.

    ``code`` is equal within a track (runs). A step joins rows i, i+1 of one track with frame difference 1
    and finite coordinates. Returns (first row, n_points, n_steps, n_adjacent, sum of squared steps, sum of
    products of neighbouring steps) with the positions shifted by ``off*`` before differencing, and the two
    sums once more from the unshifted positions. Each sum adds in row order from 0.0, as
    :func:`numpy.bincount` with weights does, and each squared step and product adds its axes in order, as
    ``numpy.sum(..., axis=1)`` does, so the sums equal those of the array computation bit for bit.
    """
    n = code.size
    n_tr = 1 if n else 0
    for i in range(1, n):
        if code[i] != code[i - 1]:
            n_tr += 1
    first = np.empty(n_tr, np.int64)
    n_points = np.zeros(n_tr, np.int64)
    n_steps = np.zeros(n_tr, np.int64)
    n_adj = np.zeros(n_tr, np.int64)
    sq_c = np.zeros(n_tr)
    pr_c = np.zeros(n_tr)
    sq_r = np.zeros(n_tr)
    pr_r = np.zeros(n_tr)
    t = -1
    prev_ok = False
    pc0 = pc1 = pc2 = pr0 = pr1 = pr2 = 0.0
    for i in range(n):
        if i == 0 or code[i] != code[i - 1]:
            t += 1
            first[t] = i
            prev_ok = False
        n_points[t] += 1
        ok = False
        if i + 1 < n and code[i + 1] == code[i] and frame[i + 1] - frame[i] == 1:
            r0 = c0[i + 1] - c0[i]
            e0 = (c0[i + 1] - off0) - (c0[i] - off0)
            r1 = r2 = e1 = e2 = 0.0
            if n_dims > 1:
                r1 = c1[i + 1] - c1[i]
                e1 = (c1[i + 1] - off1) - (c1[i] - off1)
            if n_dims > 2:
                r2 = c2[i + 1] - c2[i]
                e2 = (c2[i + 1] - off2) - (c2[i] - off2)
            ok = (np.isfinite(r0) and np.isfinite(r1) and np.isfinite(r2)
                  and np.isfinite(e0) and np.isfinite(e1) and np.isfinite(e2))
            if ok:
                n_steps[t] += 1
                s = e0 * e0
                u = r0 * r0
                if n_dims > 1:
                    s = s + e1 * e1
                    u = u + r1 * r1
                if n_dims > 2:
                    s = s + e2 * e2
                    u = u + r2 * r2
                sq_c[t] += s
                sq_r[t] += u
                if prev_ok:
                    n_adj[t] += 1
                    s = pc0 * e0
                    u = pr0 * r0
                    if n_dims > 1:
                        s = s + pc1 * e1
                        u = u + pr1 * r1
                    if n_dims > 2:
                        s = s + pc2 * e2
                        u = u + pr2 * r2
                    pr_c[t] += s
                    pr_r[t] += u
                pc0, pc1, pc2, pr0, pr1, pr2 = e0, e1, e2, r0, r1, r2
        prev_ok = ok
    return first, n_points, n_steps, n_adj, sq_c, pr_c, sq_r, pr_r


@numba.njit(cache=True, nogil=True)
def lag1_steps(code, frame, c0, c1, c2, n_dims):  # pragma: no cover - compiled
    """Return the valid lag-1 steps of a table in (track, frame) order (as in :func:`lag1_step_sums`).

    Per step: its per-axis mean squared length (from the unshifted positions, axes summed in order, divided
    by ``n_dims``), the run index of its track, and the row where it starts.
    """
    n = code.size
    m = max(n - 1, 0)
    y = np.empty(m)
    owner = np.empty(m, np.int64)
    start = np.empty(m, np.int64)
    t = -1
    k = 0
    for i in range(n):
        if i == 0 or code[i] != code[i - 1]:
            t += 1
        if i + 1 < n and code[i + 1] == code[i] and frame[i + 1] - frame[i] == 1:
            r0 = c0[i + 1] - c0[i]
            r1 = c1[i + 1] - c1[i] if n_dims > 1 else 0.0
            r2 = c2[i + 1] - c2[i] if n_dims > 2 else 0.0
            if np.isfinite(r0) and np.isfinite(r1) and np.isfinite(r2):
                u = r0 * r0
                if n_dims > 1:
                    u = u + r1 * r1
                if n_dims > 2:
                    u = u + r2 * r2
                y[k] = u / n_dims
                owner[k] = t
                start[k] = i
                k += 1
    return y[:k], owner[:k], start[:k]


# ---------------------------------------------------------------------------------- size-fit mixture products
@numba.njit(cache=True, nogil=True)
def mixture_density(LT, w, floor, out):  # pragma: no cover - compiled
    """out[i] = max(sum_k LT[k, i] w[k], floor) (L @ w for LT = L.T, C-ordered (K, n)), NaN kept; returns out.

    Each sum runs over k in order, whatever the machine or thread count (a threaded BLAS splits and orders
    its sums by its thread count); the loop over i runs on vector lanes.
    """
    K, n = LT.shape
    for i in range(n):
        out[i] = 0.0
    for k in range(K):
        wk = w[k]
        for i in range(n):
            out[i] += LT[k, i] * wk
    for i in range(n):
        s = out[i]
        out[i] = s if (s >= floor or s != s) else floor
    return out


@numba.njit(cache=True, nogil=True)
def row_weighted_sums(L, r, out):  # pragma: no cover - compiled
    """out[k] = sum_i r[i] L[i, k] (L.T @ r) for a C-ordered L (n, K), rows added in order; returns out."""
    n, K = L.shape
    for k in range(K):
        out[k] = 0.0
    for i in range(n):
        ri = r[i]
        for k in range(K):
            out[k] += L[i, k] * ri
    return out
