"""Spots → tracks: frame-to-frame linking, gap closing and a largest step chosen from the data.

Coordinates follow the convention of :mod:`msdkit.schema` (x = column, y = row, origin at the centre of pixel
(0, 0)).

Steps of :func:`link_spots`

1. **Step size from the data.** For every spot, the distance to the nearest spot of the next frame is
   either its own displacement (a 2-D Gaussian step, per-axis SD ``step_sd_px``) or, if that is farther or
   the particle is gone, the distance to an unrelated spot (spots scattered at the observed density). The
   per-axis step SD and the fraction of spots with a partner are fitted by maximum likelihood to these
   distances; a constant drift (the median displacement of the close pairs) is removed first and
   re-estimated.
2. **Largest step** ``max_step_px = 5 * step_sd_px`` (a 2-D Gaussian step exceeds it with probability
   e^-12.5 = 4e-6; at 4 SD it would be 3e-4, a split every ~3000 steps), but at most the median distance
   between neighbouring spots in a frame: a longer "step" is more likely a neighbour than the particle itself.
   A tighter cap (half the spacing) was tried and rejected: on crowded simulated movies it cut so many real
   steps that D came out 35 % low, while wrong joins hardly fell (benchmarks/detection.py).
3. **Frame-to-frame linking** with trackpy (minimum total squared displacement within each group of competing
   spots; the search shrinks for groups too large to solve), on drift-corrected positions.
4. **Gap closing**: a track end and a track start ``g`` frames later (``2 <= g <= max_gap_frames + 1``) are
   joined when their distance is below ``max_step_px * sqrt(g)``; conflicting candidates are resolved by a
   global assignment that minimises the summed negative log-likelihood of the joins. Missing frames stay
   missing (no positions are invented).
5. Tracks with fewer than ``min_track_points`` positions are dropped; track ids are 0, 1, 2, … in order of
   their first frame.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import optimize, sparse
from scipy.optimize import linear_sum_assignment
from scipy.spatial import cKDTree

from .errors import InputError, expected_got

__all__ = ["LinkSettings", "link_spots", "estimate_step_sd_px"]

_STEP_FACTOR = 5.0
_SPACING_FRACTION = 1.0


@dataclass(frozen=True)
class LinkSettings:
    """Settings used to link one movie and what came of it (written to the resolved config).

    Attributes
    ----------
    max_step_px : float, px
        Largest frame-to-frame displacement accepted.
    chosen_automatically : bool
        Whether ``max_step_px`` was chosen from the data.
    step_sd_px : float, px
        Estimated per-axis SD of frame-to-frame displacements (NaN when too few spots).
    spot_spacing_px : float, px
        Median distance from a spot to its nearest neighbour in the same frame (NaN when too few).
    limited_by_spacing : bool
        True when ``max_step_px`` had to be cut to the spot spacing: the longest steps are then lost (tracks
        split) and D may be underestimated by a few per cent; lower the particle density or the frame
        interval.
    drift_px_per_frame : tuple of float
        Constant drift (x, y) removed before linking (positions in the output are not changed).
    max_gap_frames : int
        Longest run of missing frames bridged inside a track.
    min_track_points : int
        Shortest track kept.
    n_spots : int
        Spots given.
    n_spots_in_tracks : int
        Spots in kept tracks.
    fraction_linked : float
        ``n_spots_in_tracks / n_spots``.
    n_tracks : int
        Tracks kept.
    n_gaps_closed : int
        Joins across missing frames in the kept tracks.
    """

    max_step_px: float
    chosen_automatically: bool
    step_sd_px: float
    spot_spacing_px: float
    limited_by_spacing: bool
    drift_px_per_frame: tuple[float, float]
    max_gap_frames: int
    min_track_points: int
    n_spots: int
    n_spots_in_tracks: int
    fraction_linked: float
    n_tracks: int
    n_gaps_closed: int


# ----------------------------------------------------------------------------------------------------
# step size from nearest-neighbour distances


def _frame_groups(frames: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return the unique frames, the start index of each in the frame-sorted order, and that order."""
    order = np.argsort(frames, kind="stable")
    f_sorted = frames[order]
    uniq, starts = np.unique(f_sorted, return_index=True)
    return uniq, np.append(starts, len(order)), order


def _spacing(xy: np.ndarray, frames: np.ndarray) -> float:
    uniq, starts, order = _frame_groups(frames)
    d = []
    for i in range(len(uniq)):
        idx = order[starts[i] : starts[i + 1]]
        if idx.size >= 2:
            dist, _ = cKDTree(xy[idx]).query(xy[idx], k=2)
            d.append(dist[:, 1])
    return float(np.median(np.concatenate(d))) if d else float("nan")


def _next_frame_neighbours(xy, frames, drift, max_pairs=50_000, rng=None):
    """Distances and displacement vectors from spots to the nearest spot of the next frame, with densities."""
    uniq, starts, order = _frame_groups(frames)
    lo, hi = xy.min(axis=0), xy.max(axis=0)
    area = float(max(hi[0] - lo[0], 1.0) * max(hi[1] - lo[1], 1.0))
    dist, vec, dens = [], [], []
    for i in range(len(uniq) - 1):
        if uniq[i + 1] != uniq[i] + 1:
            continue
        a = order[starts[i] : starts[i + 1]]
        b = order[starts[i + 1] : starts[i + 2]]
        d, j = cKDTree(xy[b]).query(xy[a] + drift)
        dist.append(d)
        vec.append(xy[b][j] - xy[a])
        dens.append(np.full(len(a), len(b) / area))
    if not dist:
        return np.zeros(0), np.zeros((0, 2)), np.zeros(0)
    dist, vec, dens = np.concatenate(dist), np.concatenate(vec), np.concatenate(dens)
    if dist.size > max_pairs:
        pick = np.random.default_rng(rng).choice(dist.size, max_pairs, replace=False)
        dist, vec, dens = dist[pick], vec[pick], dens[pick]
    return dist, vec, dens


def _fit_mixture(r: np.ndarray, rho: np.ndarray, sigma0: float) -> tuple[float, float]:
    """Maximum-likelihood per-axis step SD and partner fraction from nearest-neighbour distances.

    Survival of the nearest distance: S(r) = [1 - f (1 - exp(-r^2 / 2 s^2))] exp(-pi rho r^2).
    """
    r = np.maximum(r, 1e-9)

    def nll(theta):
        s = math.exp(theta[0])
        f = 1.0 / (1.0 + math.exp(-theta[1]))
        g = np.exp(-r * r / (2 * s * s))
        poisson = np.exp(-math.pi * rho * r * r)
        pdf = (f * r / (s * s) * g + (1.0 - f * (1.0 - g)) * 2 * math.pi * rho * r) * poisson
        return -float(np.sum(np.log(np.maximum(pdf, 1e-300))))

    best = None
    for f0 in (0.5, 0.9):
        for s0 in (0.5 * sigma0, sigma0, 2.0 * sigma0):
            res = optimize.minimize(
                nll,
                [math.log(max(s0, 1e-3)), math.log(f0 / (1 - f0))],
                method="Nelder-Mead",
                options={"xatol": 1e-4, "fatol": 1e-6, "maxiter": 2000},
            )
            if best is None or res.fun < best.fun:
                best = res
    return math.exp(best.x[0]), 1.0 / (1.0 + math.exp(-best.x[1]))


def estimate_step_sd_px(
    spots: pd.DataFrame, *, rng: int | np.random.Generator | None = 0
) -> tuple[float, tuple[float, float]]:
    """Per-axis SD of frame-to-frame displacements and the drift, from nearest-neighbour distances.

    Parameters
    ----------
    spots : DataFrame with columns frame, x_px, y_px
    rng : int, Generator or None, default=0
        Used only to subsample very large spot tables.

    Returns
    -------
    step_sd_px : float, px (NaN when fewer than 20 pairs of spots in consecutive frames)
    drift_px_per_frame : (float, float)

    Notes
    -----
    The nearest spot of the next frame is either the spot's own successor, displaced by a 2-D Gaussian step of
    per-axis SD s, or an unrelated spot of a uniform scatter of density rho (the observed spots per area), so
    the distance r has survival S(r) = [1 - f (1 - e^{-r^2/2s^2})] e^{-pi rho r^2}, with f the fraction of
    spots whose successor is detected. s and f are fitted by maximum likelihood. The drift is the median
    displacement
    of pairs closer than 3 s, and the fit is repeated on drift-corrected positions.
    """
    xy = spots[["x_px", "y_px"]].to_numpy(float)
    frames = spots["frame"].to_numpy(np.int64)
    drift = np.zeros(2)
    r, vec, rho = _next_frame_neighbours(xy, frames, drift, rng=rng)
    if r.size < 20:
        return float("nan"), (0.0, 0.0)
    s0 = float(np.median(r)) / math.sqrt(2 * math.log(2))  # Rayleigh median
    s, _ = _fit_mixture(r, rho, s0)
    for _ in range(2):
        close = r < 3.0 * s
        if close.sum() < 10:
            break
        drift = np.median(vec[close], axis=0)  # vec are the raw displacements
        r, vec, rho = _next_frame_neighbours(xy, frames, drift, rng=rng)
        s, _ = _fit_mixture(r, rho, s)
    return float(s), (float(drift[0]), float(drift[1]))


# ----------------------------------------------------------------------------------------------------
# linking


def _link_frames(df: pd.DataFrame, max_step: float, drift: np.ndarray) -> np.ndarray:
    """Frame-to-frame segments (no gaps) by trackpy on drift-corrected positions; returns a label per spot."""
    import trackpy

    trackpy.quiet(True)
    logging.getLogger("trackpy").setLevel(logging.WARNING)
    work = pd.DataFrame(
        {
            "x": df["x_px"].to_numpy(float) - drift[0] * df["frame"].to_numpy(float),
            "y": df["y_px"].to_numpy(float) - drift[1] * df["frame"].to_numpy(float),
            "frame": df["frame"].to_numpy(np.int64),
        }
    )
    linked = trackpy.link(
        work,
        max_step,
        pos_columns=["x", "y"],
        t_column="frame",
        memory=0,
        adaptive_stop=max(0.05, 0.2 * max_step),
        adaptive_step=0.9,
    )
    return linked["particle"].reindex(work.index).to_numpy(np.int64)  # trackpy may reorder rows


def _close_gaps(seg: pd.DataFrame, *, max_step: float, max_gap: int, step_sd: float, drift) -> dict[int, int]:
    """Join segment ends to later segment starts across up to ``max_gap`` missing frames.

    Returns a map from a segment to the segment that continues it.
    """
    first = seg.groupby("seg", sort=True).head(1)
    last = seg.groupby("seg", sort=True).tail(1)
    if max_gap < 1 or len(first) < 2:
        return {}
    s_xy = first[["x_px", "y_px"]].to_numpy(float)
    s_f = first["frame"].to_numpy(np.int64)
    s_id = first["seg"].to_numpy(np.int64)
    e_xy = last[["x_px", "y_px"]].to_numpy(float)
    e_f = last["frame"].to_numpy(np.int64)
    e_id = last["seg"].to_numpy(np.int64)
    sd = step_sd if np.isfinite(step_sd) and step_sd > 0 else max_step / 4.0
    rows, cols, costs = [], [], []
    by_frame: dict[int, np.ndarray] = {}
    for f in np.unique(s_f):
        by_frame[int(f)] = np.nonzero(s_f == f)[0]
    trees = {f: cKDTree(s_xy[idx]) for f, idx in by_frame.items()}
    for g in range(2, max_gap + 2):  # frame difference: g - 1 frames missing
        radius = max_step * math.sqrt(g)
        for f_end in np.unique(e_f):
            target = int(f_end) + g
            if target not in trees:
                continue
            ends = np.nonzero(e_f == f_end)[0]
            pred = e_xy[ends] + np.asarray(drift) * g
            hits = trees[target].query_ball_point(pred, radius)
            for k, hit in zip(ends, hits, strict=True):
                for j in hit:
                    start = by_frame[target][j]
                    if s_id[start] == e_id[k]:
                        continue
                    d2 = float(np.sum((s_xy[start] - e_xy[k] - np.asarray(drift) * g) ** 2))
                    # negative log-likelihood of a 2-D Gaussian step over g frames (constant dropped)
                    costs.append(d2 / (2 * sd * sd * g) + math.log(g))
                    rows.append(k)
                    cols.append(start)
    if not rows:
        return {}
    rows_a, cols_a, cost_a = np.array(rows), np.array(cols), np.array(costs)
    n_e, n_s = len(e_id), len(s_id)
    # connected groups of competing ends and starts, each solved as a small assignment with a "no join" option
    graph = sparse.coo_matrix((np.ones(len(rows_a)), (rows_a, n_e + cols_a)), shape=(n_e + n_s, n_e + n_s))
    _, label = sparse.csgraph.connected_components(graph, directed=False)
    # not joining costs 2 * no_join (the end and the start both stay), more than any admissible join
    no_join = (max_step / sd) ** 2 / 4.0 + math.log(max_gap + 1) / 2.0 + 0.5
    joins: dict[int, int] = {}
    comp = label[rows_a]
    for c in np.unique(comp):
        m = comp == c
        r_u, r_inv = np.unique(rows_a[m], return_inverse=True)
        c_u, c_inv = np.unique(cols_a[m], return_inverse=True)
        if len(r_u) == 1 and len(c_u) == 1:
            joins[int(e_id[r_u[0]])] = int(s_id[c_u[0]])
            continue
        nr, nc = len(r_u), len(c_u)
        big = 1e9
        mat = np.full((nr + nc, nc + nr), big)
        mat[r_inv, c_inv] = cost_a[m]
        mat[np.arange(nr), nc + np.arange(nr)] = no_join  # end stays an end
        mat[nr + np.arange(nc), np.arange(nc)] = no_join  # start stays a start
        mat[nr:, nc:] = 0.0
        ri, ci = linear_sum_assignment(mat)
        for a, b in zip(ri, ci, strict=True):
            if a < nr and b < nc and mat[a, b] < big:
                joins[int(e_id[r_u[a]])] = int(s_id[c_u[b]])
    return joins


def link_spots(
    spots: pd.DataFrame,
    *,
    max_step_px: float | None = None,
    max_gap_frames: int = 2,
    min_track_points: int = 10,
    frame_interval_s: float | None = None,
) -> tuple[pd.DataFrame, LinkSettings]:
    """Join spots of consecutive frames into tracks.

    Parameters
    ----------
    spots : DataFrame
        At least columns ``frame``, ``x_px``, ``y_px`` (as from :func:`msdkit.detect.locate_spots`); other
        columns are carried into the tracks.
    max_step_px : float, px, optional
        Largest frame-to-frame displacement. Default: 5 x the per-axis step SD estimated from the data, at
        most
        the median distance between neighbouring spots of a frame.
    max_gap_frames : int, default=2
        Longest run of missing frames bridged inside a track (0: no gap closing).
    min_track_points : int, default=10
        Tracks with fewer positions are dropped.
    frame_interval_s : float, s, optional
        When given, a ``time_s`` column is added.

    Returns
    -------
    tracks : DataFrame
        ``track, frame, x_px, y_px`` then the other spot columns (and ``time_s``), sorted by track and frame;
        track ids are 0 … n_tracks - 1 in order of first frame.
    settings : LinkSettings

    References
    ----------
    Crocker & Grier (1996), Methods of digital video microscopy for colloidal studies, J. Colloid Interface
    Sci.
    179:298, doi:10.1006/jcis.1996.0217 (frame-to-frame linking, as implemented in trackpy).
    Jaqaman et al. (2008), Robust single-particle tracking in live-cell time-lapse sequences, Nat. Methods
    5:695,
    doi:10.1038/nmeth.1237 (gap closing as a global assignment with "no join" alternatives).
    """
    _check_spots(spots)
    if max_step_px is not None and not (np.isfinite(max_step_px) and max_step_px > 0):
        raise InputError(
            expected_got(
                "max_step_px",
                "a positive number of pixels or None (automatic)",
                max_step_px,
                "Remove linking.max_step_px to choose it from the data.",
            )
        )
    if int(max_gap_frames) != max_gap_frames or max_gap_frames < 0:
        raise InputError(
            expected_got(
                "max_gap_frames",
                "an integer >= 0",
                max_gap_frames,
                "Give the longest run of missing frames to bridge, e.g. 2.",
            )
        )
    if int(min_track_points) != min_track_points or min_track_points < 2:
        raise InputError(
            expected_got(
                "min_track_points",
                "an integer >= 2",
                min_track_points,
                "A track needs at least two positions.",
            )
        )
    max_gap_frames, min_track_points = int(max_gap_frames), int(min_track_points)
    df = spots.sort_values("frame", kind="stable").reset_index(drop=True)
    n_spots = len(df)
    xy = df[["x_px", "y_px"]].to_numpy(float) if n_spots else np.zeros((0, 2))
    frames = df["frame"].to_numpy(np.int64) if n_spots else np.zeros(0, np.int64)

    step_sd, drift = estimate_step_sd_px(df) if n_spots else (float("nan"), (0.0, 0.0))
    spacing = _spacing(xy, frames) if n_spots else float("nan")
    limited = False
    if max_step_px is None:
        auto = True
        if np.isfinite(step_sd):
            step = _STEP_FACTOR * step_sd
            if np.isfinite(spacing) and step > _SPACING_FRACTION * spacing:
                step, limited = _SPACING_FRACTION * spacing, True
        elif np.isfinite(spacing):
            step = _SPACING_FRACTION * spacing
        else:
            step = 5.0
        step = float(max(step, 1.0))
    else:
        auto, step = False, float(max_step_px)
    if not np.isfinite(step_sd):
        step_sd = step / _STEP_FACTOR

    tracks = _empty_tracks(df)
    n_gaps = 0
    if n_spots:
        seg_label = _link_frames(df, step, np.asarray(drift))
        work = df.assign(seg=seg_label)
        joins = _close_gaps(
            work.sort_values(["seg", "frame"]),
            max_step=step,
            max_gap=max_gap_frames,
            step_sd=step_sd,
            drift=drift,
        )
        # follow the joins: every chain of segments becomes one track
        seg_ids = np.unique(seg_label)
        has_pred = set(joins.values())
        root = {}
        for s in seg_ids:
            if int(s) in has_pred:
                continue
            cur = int(s)
            root[cur] = cur
            while cur in joins:
                cur = joins[cur]
                root[cur] = int(s)
        work["track"] = np.array([root[int(s)] for s in seg_label], dtype=np.int64)
        counts = work.groupby("track")["frame"].transform("size")
        work = work[counts >= min_track_points].sort_values(["track", "frame"], kind="stable")
        if len(work):
            first_frame = work.groupby("track")["frame"].transform("min")
            first_x = work.groupby("track")["x_px"].transform("first")
            order = pd.DataFrame({"f": first_frame, "x": first_x, "t": work["track"]}).drop_duplicates("t")
            order = order.sort_values(["f", "x"])
            new_id = dict(zip(order["t"].to_numpy(), np.arange(len(order)), strict=True))
            work["track"] = work["track"].map(new_id).astype(np.int64)
            work = work.sort_values(["track", "frame"], kind="stable")
            n_gaps = int((work.groupby("track")["frame"].diff() > 1).sum())
            cols = ["track", "frame", "x_px", "y_px"] + [
                c for c in df.columns if c not in ("frame", "x_px", "y_px")
            ]
            tracks = work[cols].reset_index(drop=True)
            tracks["frame"] = tracks["frame"].astype(np.int64)
    if frame_interval_s is not None:
        tracks["time_s"] = tracks["frame"].to_numpy(float) * float(frame_interval_s)
    n_tracks = int(tracks["track"].nunique()) if len(tracks) else 0
    settings = LinkSettings(
        max_step_px=float(step),
        chosen_automatically=auto,
        step_sd_px=float(step_sd),
        spot_spacing_px=float(spacing),
        limited_by_spacing=bool(limited),
        drift_px_per_frame=(float(drift[0]), float(drift[1])),
        max_gap_frames=max_gap_frames,
        min_track_points=min_track_points,
        n_spots=int(n_spots),
        n_spots_in_tracks=int(len(tracks)),
        fraction_linked=float(len(tracks) / n_spots) if n_spots else 0.0,
        n_tracks=n_tracks,
        n_gaps_closed=n_gaps,
    )
    return tracks, settings


def _check_spots(spots) -> None:
    if not isinstance(spots, pd.DataFrame):
        raise InputError(
            expected_got(
                "spots",
                "a pandas DataFrame",
                type(spots).__name__,
                "Pass the table returned by locate_spots.",
            )
        )
    missing = [c for c in ("frame", "x_px", "y_px") if c not in spots.columns]
    if missing:
        raise InputError(
            expected_got(
                "spots",
                "columns frame, x_px, y_px",
                f"no column(s) {', '.join(missing)}",
                "Rename the position columns (x = image column, y = image row, in pixels).",
            )
        )
    if len(spots):
        xy = spots[["x_px", "y_px"]].to_numpy(float)
        if not np.all(np.isfinite(xy)):
            raise InputError(
                expected_got(
                    "spots x_px, y_px",
                    "finite numbers",
                    "NaN or inf",
                    "Drop spots without a position before linking.",
                )
            )
        f = spots["frame"].to_numpy()
        if not np.all(np.isfinite(f)) or np.any(f < 0) or np.any(np.asarray(f, float) != np.round(f)):
            raise InputError(
                expected_got("spots frame", "integers >= 0", "other values", "Number the frames 0, 1, 2, …")
            )


def _empty_tracks(df: pd.DataFrame) -> pd.DataFrame:
    out = pd.DataFrame(
        {
            "track": pd.Series(dtype="int64"),
            "frame": pd.Series(dtype="int64"),
            "x_px": pd.Series(dtype="float64"),
            "y_px": pd.Series(dtype="float64"),
        }
    )
    for c in df.columns:
        if c not in out.columns:
            out[c] = pd.Series(dtype=df[c].dtype)
    return out
