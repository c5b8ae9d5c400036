"""Mean squared displacement: time-averaged per track (FFT, gap-aware, batched) and ensemble.

Tracks are tables with columns ``track, frame, x_um, y_um`` (``z_um`` too when ``n_dims=3``); see
:mod:`msdkit.schema` for the coordinate convention. Frames need not be contiguous: a missed frame is a gap on
the frame grid, and a lag counts only the pairs of positions that were both observed.

The engine groups tracks into blocks of similar length and computes every track of a block with one batched
real FFT, so the cost is a small multiple of a single FFT over all positions and the memory held at any time
is one block plus the output.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.fft

from .errors import InputError, expected_got
from .schema import ENSEMBLE_MSD_COLUMNS, TA_MSD_COLUMNS, empty_frame

__all__ = ["time_averaged_msd", "ensemble_msd", "coordinate_columns"]

#: Elements (tracks x FFT length) handled per batched FFT; keeps one block's arrays near the CPU caches.
_BLOCK_ELEMENTS = 1 << 17


def coordinate_columns(n_dims: int) -> tuple[str, ...]:
    """Names of the position columns used for ``n_dims`` dimensions (x, y and, in 3D, z)."""
    if n_dims not in (1, 2, 3):
        raise ValueError(expected_got("n_dims", "1, 2 or 3", n_dims, "Positions are x_um, y_um[, z_um]."))
    return ("x_um", "y_um", "z_um")[:n_dims]


class _Tracks:
    """Tracks sorted by (track, frame) as flat arrays plus per-track start, count and frame span."""

    __slots__ = ("ids", "frame", "coords", "start", "count", "first", "span")

    def __init__(self, tracks: pd.DataFrame, n_dims: int, what: str = "tracks"):
        cols = coordinate_columns(n_dims)
        if not isinstance(tracks, pd.DataFrame):
            raise InputError(expected_got(what, "a DataFrame with columns track, frame, " + ", ".join(cols),
                                          type(tracks).__name__, "Pass a track table."))
        missing = [c for c in ("track", "frame", *cols) if c not in tracks.columns]
        if missing:
            raise InputError(expected_got(f"{what} columns", "track, frame, " + ", ".join(cols),
                                          list(tracks.columns),
                                          f"Add the missing column(s) {missing} (positions in µm)."))
        track = tracks["track"].to_numpy()
        frame = tracks["frame"].to_numpy()
        if track.dtype.kind not in "iu" or frame.dtype.kind not in "iu":
            raise InputError(expected_got(f"{what} track and frame", "integer columns",
                                          f"{track.dtype} and {frame.dtype}",
                                          "Convert track ids and frame numbers to integers."))
        coords = [np.asarray(tracks[c].to_numpy(), dtype=np.float64) for c in cols]
        finite = np.ones(track.size, bool)
        for c in coords:
            finite &= np.isfinite(c)
        if not finite.all():  # a position that is not a number is a missed frame
            track, frame = track[finite], frame[finite]
            coords = [c[finite] for c in coords]
        from . import _msd_kernels as k

        state, i = k.scan_order(track, frame)
        if state == 1:
            order = np.lexsort((frame, track))
            track, frame = track[order], frame[order]
            coords = [c[order] for c in coords]
            state, i = k.scan_order(track, frame)
        if state == 2:
            raise InputError(expected_got(f"{what}: (track, frame) pairs", "unique",
                                          f"track {track[i]} has frame {frame[i]} twice",
                                          "Keep one position per track and frame."))
        start = k.track_starts(track)
        count = np.diff(np.append(start, track.size))
        self.ids = track[start].astype(np.int64)
        self.frame = frame
        self.coords = coords
        self.start = start.astype(np.int64)
        self.count = count.astype(np.int64)
        self.first = frame[start].astype(np.int64) if track.size else np.zeros(0, np.int64)
        last = frame[start + count - 1] if track.size else np.zeros(0, np.int64)
        self.span = (last - self.first + 1).astype(np.int64)


def _fft_size_ladder(n_max: int) -> np.ndarray:
    """FFT lengths 2h with h a fast real-FFT length, growing by about 10 %.

    Tracks are grouped by the smallest length that fits; the half length h is what the DCT-I step of the
    engine transforms.
    """
    sizes, h = [], 4
    while True:
        f = scipy.fft.next_fast_len(h, real=True)
        sizes.append(2 * f)
        if 2 * f >= n_max:
            break
        h = max(f + 1, int(f * 1.1))
    return np.unique(np.asarray(sizes, np.int64))


def _blocks(need: np.ndarray, length: np.ndarray):
    """Yield (indices, nfft) blocks: tracks grouped by FFT length, at most ~_BLOCK_ELEMENTS each.

    Within an FFT length, tracks are ordered by their own length, so a block of equal-length tracks that
    are neighbours in the table can be read as a reshaped view (the common case of uniform tracks).
    """
    if need.size == 0:
        return
    ladder = _fft_size_ladder(int(need.max()))
    klass = np.searchsorted(ladder, need)
    order = np.lexsort((length, klass))
    bounds = np.flatnonzero(np.diff(klass[order])) + 1
    for grp in np.split(order, bounds):
        nfft = int(ladder[klass[grp[0]]])
        per = max(1, _BLOCK_ELEMENTS // nfft)
        for s in range(0, grp.size, per):
            yield grp[s:s + per], nfft


class _Workspace:
    """Scratch arrays reused from block to block (fresh memory for every block costs page faults)."""

    def __init__(self):
        self._buf: dict[str, np.ndarray] = {}

    def get(self, name: str, shape: tuple[int, ...]) -> np.ndarray:
        size = int(np.prod(shape))
        buf = self._buf.get(name)
        if buf is None or buf.size < size:
            buf = self._buf[name] = np.empty(size)
        return buf[:size].reshape(shape)


def _contiguous_into(tr: _Tracks, idx: np.ndarray, nfft: int, n_lag: np.ndarray, offsets: np.ndarray,
                     out_lag: np.ndarray, out_msd: np.ndarray, out_pairs: np.ndarray,
                     work: _Workspace) -> None:
    """TA-MSD of a block of tracks without gaps, written straight into the output arrays.

    S1 by running sums and S2 = sum_i r_i . r_{i+n} from the power spectrum (Calandrini et al. 2011). The
    power spectrum is real and even, so its inverse transform is a DCT-I, evaluated with a real FFT of half
    the length plus a running sum (Press et al., Numerical Recipes, 2nd ed., section 12.3, "cosft1").
    """
    from . import _msd_kernels as k

    b = idx.size
    n_dims = len(tr.coords)
    half = nfft // 2
    grid = work.get("grid", (n_dims, b, nfft))
    csum = work.get("csum", (b, nfft + 1))
    c = tr.coords + [tr.coords[0]] * (3 - n_dims)
    k.fill_block(c[0], c[1], c[2], n_dims, tr.start[idx], tr.count[idx], grid, csum)
    spec = scipy.fft.rfft(grid, axis=2)
    j = np.arange(half // 2 + 1)
    g = work.get("g", (b, half))
    f1 = np.empty(b)
    k.dct1_prepare(spec, n_dims, np.sin(np.pi * j / half), np.cos(np.pi * j / half), g, f1)
    del spec
    G = scipy.fft.rfft(g, axis=1)
    k.finish_block(G, f1, csum, tr.count[idx], n_lag[idx], 2.0 / nfft, idx, offsets, out_lag, out_msd,
                   out_pairs)


def _block_gapped(tr: _Tracks, idx: np.ndarray, nfft: int, n_lag: np.ndarray):
    """TA-MSD of tracks with missed frames: masked correlations on the frame grid, pairs counted by FFT.

    With m the mask of observed frames and q = m |r|^2, sum over pairs of |r_(i+n) - r_i|^2 is
    corr(m, q)(n) + corr(q, m)(n) - 2 corr(r, r)(n); its spectrum and that of the pair count corr(m, m) are
    real and even, so both inverse transforms are DCT-Is done with half-length real FFTs.
    """
    from . import _msd_kernels as k

    b = idx.size
    n_dims = len(tr.coords)
    half = nfft // 2
    w = int(n_lag.max()) + 1
    stack = np.empty((n_dims + 2, b, nfft))
    c = tr.coords + [tr.coords[0]] * (3 - n_dims)
    k.fill_gapped(c[0], c[1], c[2], n_dims, tr.frame, tr.start[idx], tr.count[idx], tr.first[idx], stack)
    spec = scipy.fft.rfft(stack, axis=2)
    del stack
    j = np.arange(half // 2 + 1)
    g = np.empty((2, b, half))
    f1 = np.empty((2, b))
    k.gapped_prepare(spec, n_dims, np.sin(np.pi * j / half), np.cos(np.pi * j / half), g, f1)
    del spec
    G = scipy.fft.rfft(g, axis=2)
    msd = np.full((b, w), np.nan)
    pairs = np.zeros((b, w), np.int64)
    k.gapped_finish(G, f1, n_lag, 2.0 / nfft, msd, pairs)
    return msd, pairs


def time_averaged_msd(
    tracks: pd.DataFrame, *, max_lag_frames: int | None = None, n_dims: int = 2
) -> pd.DataFrame:
    """Time-averaged mean squared displacement of every track.

    Parameters
    ----------
    tracks : DataFrame
        Columns ``track`` (int), ``frame`` (int), ``x_um``, ``y_um`` (and ``z_um`` when ``n_dims=3``), µm.
        Rows may come in any order; frames may have gaps; non-finite positions count as missed frames.
    max_lag_frames : int, optional
        Largest lag in frames (default: every lag a track spans).
    n_dims : int, default=2
        Number of coordinates summed in the MSD.

    Returns
    -------
    DataFrame
        Columns ``track, lag_frames, msd_um2, n_pairs`` (see :data:`msdkit.schema.TA_MSD_COLUMNS`), sorted by
        track and lag. ``msd_um2`` is summed over the coordinates; lags at which a track has no pair of
        observed positions are left out. Tracks with fewer than two positions have no rows.

    Notes
    -----
    For a track r_0 .. r_{L-1} observed at every frame,
    MSD(n) = [S1(n) - 2 S2(n)] / (L - n) with S2(n) = sum_i r_i . r_{i+n} computed as an autocorrelation by a
    zero-padded real FFT and S1(n) = sum_{i<L-n} |r_i|^2 + sum_{i>=n} |r_i|^2 by running sums (Calandrini et
    al. 2011). Positions are centred on each track's mean and kept in float64, so large coordinate offsets
    do not cost precision. With gaps, positions sit on the frame grid with a mask m (1 = observed) and
    MSD(n) = [corr(m, q)(n) + corr(q, m)(n) - 2 corr(r, r)(n)] / corr(m, m)(n), q = m |r|^2, where the
    denominator is the number of pairs of observed positions n frames apart.

    Tracks are grouped by the FFT length they need and processed in blocks, so no Python loop runs per
    track and the working memory is one block plus the output table.

    References
    ----------
    V. Calandrini, E. Pellegrini, P. Calligari, K. Hinsen & G. R. Kneller, Collection SFN 12, 201 (2011),
    doi:10.1051/sfn/201112010.

    Examples
    --------
    >>> from msdkit.simulate import brownian_positions, positions_to_tracks
    >>> pos = brownian_positions(3, 50, D_um2_s=1.0, frame_interval_s=0.01, rng=1)
    >>> ta = time_averaged_msd(positions_to_tracks(pos, frame_interval_s=0.01), max_lag_frames=5)
    >>> list(ta.columns)
    ['track', 'lag_frames', 'msd_um2', 'n_pairs']
    """
    if max_lag_frames is not None and (int(max_lag_frames) != max_lag_frames or max_lag_frames < 1):
        raise ValueError(expected_got("max_lag_frames", "a positive integer or None", max_lag_frames,
                                      "Give the largest lag in frames."))
    tr = _Tracks(tracks, n_dims)
    cap = np.iinfo(np.int64).max if max_lag_frames is None else int(max_lag_frames)
    n_lag = np.minimum(tr.span - 1, cap)
    gapped = (tr.span != tr.count) & (n_lag > 0)
    plain = (~gapped) & (n_lag > 0)

    # Tracks with gaps first: their rows are known only once the pairs are counted.
    gap_parts = []
    n_rows = np.where(plain, n_lag, 0)
    g_idx = np.flatnonzero(gapped)
    for blk, nfft in _blocks(tr.span[g_idx] + n_lag[g_idx], tr.span[g_idx]):
        idx = g_idx[blk]
        msd, pairs = _block_gapped(tr, idx, nfft, n_lag[idx])
        w = msd.shape[1]
        sel = (np.arange(1, w)[None, :] <= n_lag[idx][:, None]) & (pairs[:, 1:] > 0)
        n_rows[idx] = sel.sum(axis=1)
        owner = np.broadcast_to(idx[:, None], sel.shape)[sel]
        lags = np.broadcast_to(np.arange(1, w), sel.shape)[sel]
        gap_parts.append((owner, lags, msd[:, 1:][sel], pairs[:, 1:][sel]))

    offsets = np.concatenate([[0], np.cumsum(n_rows)])
    total = int(offsets[-1])
    if total == 0:
        return empty_frame(TA_MSD_COLUMNS)
    out_track = np.repeat(tr.ids, n_rows)
    out_lag = np.empty(total, np.int64)
    out_msd = np.empty(total, np.float64)
    out_pairs = np.empty(total, np.int64)
    for owner, lags, msd, pairs in gap_parts:
        first = np.flatnonzero(np.r_[True, owner[1:] != owner[:-1]])
        rank = np.arange(owner.size) - np.repeat(first, np.diff(np.r_[first, owner.size]))
        dest = offsets[owner] + rank
        out_lag[dest] = lags
        out_msd[dest] = msd
        out_pairs[dest] = pairs

    p_idx = np.flatnonzero(plain)
    work = _Workspace()
    for blk, nfft in _blocks(tr.count[p_idx] + n_lag[p_idx], tr.count[p_idx]):
        _contiguous_into(tr, p_idx[blk], nfft, n_lag, offsets, out_lag, out_msd, out_pairs, work)
    return pd.DataFrame(
        {"track": out_track, "lag_frames": out_lag, "msd_um2": out_msd, "n_pairs": out_pairs}, copy=False
    )


def ensemble_msd(
    tracks: pd.DataFrame,
    *,
    frame_interval_s: float,
    max_lag_frames: int | None = None,
    n_dims: int = 2,
    ta_msd: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Ensemble MSD of a sample: every displacement pair of every track, averaged per lag.

    Parameters
    ----------
    tracks : DataFrame
        Track table (see :func:`time_averaged_msd`). Ignored when ``ta_msd`` is given.
    frame_interval_s : float, s
    max_lag_frames : int, optional
        Largest lag in frames (default: every lag present).
    n_dims : int, default=2
    ta_msd : DataFrame, optional
        Output of :func:`time_averaged_msd` for these tracks, to avoid computing it twice.

    Returns
    -------
    DataFrame
        One row per lag: ``lag_s, msd_um2, sem_um2, n_tracks, lag_frames, n_pairs, ta_msd_um2``.

    Notes
    -----
    ``msd_um2`` is the pair-weighted mean  sum_t n_t(n) TA_t(n) / sum_t n_t(n)  over tracks t with n_t(n)
    pairs at lag n, i.e. the mean over all displacement pairs of all tracks (the ensemble average of
    time averages). ``sem_um2`` is its standard error with tracks as the independent units (the ratio-
    estimator variance  T/(T-1) sum_t n_t^2 (TA_t - msd)^2 / (sum_t n_t)^2), so heterogeneity between tracks
    and the correlation of pairs within a track are included; it is NaN with fewer than two tracks.
    ``ta_msd_um2`` is the unweighted mean of the tracks' TA-MSDs (each track counts once).
    """
    if not frame_interval_s > 0:
        raise ValueError(expected_got("frame_interval_s", "> 0", frame_interval_s, "Give seconds per frame."))
    ta = time_averaged_msd(tracks, max_lag_frames=max_lag_frames, n_dims=n_dims) if ta_msd is None else ta_msd
    if max_lag_frames is not None and ta_msd is not None:
        ta = ta[ta["lag_frames"] <= max_lag_frames]
    if len(ta) == 0:
        return empty_frame(ENSEMBLE_MSD_COLUMNS)
    lag = ta["lag_frames"].to_numpy()
    y = ta["msd_um2"].to_numpy()
    w = ta["n_pairs"].to_numpy().astype(np.float64)
    n = int(lag.max()) + 1
    from . import _msd_kernels as k

    # per-lag sums in one compiled pass each (the same sums, in the same order, as numpy.bincount)
    lag, y = lag.astype(np.int64, copy=False), y.astype(np.float64, copy=False)
    n_tr, sw, swy, sy = k.ensemble_sums(lag, y, w, n)
    present = np.flatnonzero(n_tr > 0)
    mean = np.zeros(n)
    mean[present] = swy[present] / sw[present]
    ss = k.ensemble_spread(lag, y, w, mean, n)
    sem = np.full(n, np.nan)
    many = n_tr > 1
    sem[many] = np.sqrt(n_tr[many] / (n_tr[many] - 1.0) * ss[many]) / sw[many]
    out = pd.DataFrame(
        {
            "lag_s": present * float(frame_interval_s),
            "msd_um2": mean[present],
            "sem_um2": sem[present],
            "n_tracks": n_tr[present].astype(np.int64),
            "lag_frames": present.astype(np.int64),
            "n_pairs": sw[present].astype(np.int64),
            "ta_msd_um2": sy[present] / n_tr[present],
        }
    )
    return out
