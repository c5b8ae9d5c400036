"""Ensemble drift: estimate the motion that all particles share, and remove it.

A stage or sample that moves during the recording adds the same displacement to every particle between two
frames. Averaged over many independent particles, diffusion cancels and the mean displacement per frame
estimates that common drift without bias, whatever the kind of motion (Brownian, anomalous, confined), as long
as the particles' own motions are independent of each other (common practice in single-particle tracking).

Two drift models are offered:

* ``"linear"``: a constant velocity, estimated from the sum of each track's steps (its end-to-end
  displacement)
  pooled over tracks with robust (Huber) weights, so a few particles that are carried along by something else
  (active transport, linking errors) do not pull the estimate. Its standard error is the cluster-robust
  ("sandwich") error with tracks as clusters, valid for any motion of the particles.
* ``"path"``: a smooth per-frame path: the robust mean step of all particles present at each frame, smoothed
  over a few frames (weighted by the number of particles), and summed up.

``model="auto"`` uses the linear model unless the velocity measured in blocks of frames changes significantly
over the recording, in which case the smooth path is used.

Tracks are tables with columns ``track, frame, x_um, y_um`` (``z_um`` is used when present); see
:mod:`msdkit.schema` for the coordinate convention.

References
----------
P. J. Huber, Ann. Math. Stat. 35, 73 (1964), doi:10.1214/aoms/1177703732 (robust location).
H. White, Econometrica 48, 817 (1980), doi:10.2307/1912934 (sandwich covariance); clustered by track.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import ndimage, special

from .errors import InputError, expected_got
from .schema import check_track_table

__all__ = ["DriftEstimate", "estimate_drift", "remove_drift"]

#: Huber tuning constant (95 % efficiency for Gaussian data).
_HUBER_K = 1.345


@dataclass(frozen=True)
class DriftEstimate:
    """Common drift of a sample.

    Attributes
    ----------
    velocity_um_s : tuple of float, µm/s
        Mean drift velocity (vx, vy[, vz]) over the recording (the linear model's velocity, also reported
        when the path model is used).
    velocity_se_um_s : tuple of float, µm/s
        Standard error of each component (cluster-robust, tracks as clusters).
    path : DataFrame
        Per-frame cumulative drift of the chosen model: ``frame, time_s, drift_x_um, drift_y_um[, drift_z_um],
        drift_x_se_um, drift_y_se_um[, ...], n_tracks`` (``n_tracks`` = particles with a step from that frame
        to the next). Drift is zero at the first frame.
    model : str
        ``"linear"`` or ``"path"`` (the model :func:`remove_drift` subtracts).
    n_tracks : int
        Tracks with at least one step.
    n_tracks_sharing : int
        Tracks whose own drift agrees with the common one (robust weight ≥ 0.5).
    significant : bool
        The drift differs from zero at the chosen level (``p_value < significance_level``).
    p_value : float
        Bonferroni-combined p-value of the tests "no drift" (constant velocity, F test on the cluster-robust
        covariance) and "no drift in any block of frames" (chi-square over blocks).
    linear_p_value : float
        p-value of the test "the velocity is the same in every block of frames" (small: the path model fits
        better).
    safe_to_subtract : bool
        Enough particles share the drift for it to be removed: at least ``min_tracks`` tracks and half of all
        tracks agree with it.
    frame_interval_s : float, s
    reason : str
        Plain words on why the drift is or is not safe to subtract.
    """

    velocity_um_s: tuple[float, ...]
    velocity_se_um_s: tuple[float, ...]
    path: pd.DataFrame = field(repr=False)
    model: str
    n_tracks: int
    n_tracks_sharing: int
    significant: bool
    p_value: float
    linear_p_value: float
    safe_to_subtract: bool
    frame_interval_s: float
    reason: str = ""

    @property
    def speed_um_s(self) -> float:
        """Magnitude of the mean drift velocity, µm/s."""
        return float(np.hypot.reduce(np.asarray(self.velocity_um_s, float)))

    @property
    def worth_subtracting(self) -> bool:
        """Significant and safe to subtract."""
        return bool(self.significant and self.safe_to_subtract)


def _validate(tracks: pd.DataFrame, frame_interval_s: float) -> tuple[str, ...]:
    return check_track_table(tracks, frame_interval_s)


def _steps(tracks: pd.DataFrame, cols: tuple[str, ...]):
    """Consecutive-position steps: track index, start frame, gap (frames), displacement (n, d).

    Rows with a non-finite coordinate are left out; a step joins two rows of one track with increasing
    frames, and the track index counts the distinct tracks (with a finite row) before it.
    """
    from . import _msd_kernels as k

    t = tracks["track"].to_numpy()
    f = tracks["frame"].to_numpy().astype(np.int64, copy=False)
    xyz = [np.ascontiguousarray(tracks[c].to_numpy(float)) for c in cols]
    if t.dtype.kind not in "iu":
        t = pd.factorize(t, sort=True)[0]
    state, _ = k.scan_order(t, f)
    if state != 0:
        order = np.lexsort((f, t))
        t, f, xyz = t[order], f[order], [c[order] for c in xyz]
    c = xyz + [xyz[0]] * (3 - len(xyz))
    return k.drift_steps(t, f, c[0], c[1], c[2], len(cols))


def _kern():
    from . import _msd_kernels

    return _msd_kernels


def _median(x: np.ndarray) -> float:
    """numpy.median of a 1-D array of finite values, by compiled selection (no partition, no copy)."""
    from . import _msd_kernels as k

    return float(k.median(x))


def _robust_scale(x: np.ndarray) -> float:
    """Normalised median absolute deviation from the median (Gaussian SD for Gaussian data)."""
    from . import _msd_kernels as k

    if x.size == 0:
        return 0.0
    return float(1.4826 * k.median_abs_deviation(x, k.median(x)))


def _winsorise(d: np.ndarray, k: float = 6.0, return_scales: bool = False, in_place: bool = False):
    """Clip each axis at median ± k robust SD (guards against linking errors; no effect on Gaussian steps).

    With ``return_scales``, also the robust SD of each axis, which clipping at k > 1 robust SD leaves
    unchanged (median and median absolute deviation are order statistics inside the clip bounds), so it is
    the robust SD of the clipped steps too. With ``in_place``, ``d`` itself is clipped (each axis after its
    own median and scale are taken) and returned.
    """
    from . import _msd_kernels as kern

    out = d if in_place else d.copy()
    scales = np.zeros(d.shape[1])
    for j in range(d.shape[1]):
        x = d[:, j]
        if x.size == 0:
            continue
        m = float(kern.median(x))
        s = float(1.4826 * kern.median_abs_deviation(x, m))
        scales[j] = s
        if s > 0:
            np.clip(out[:, j], m - k * s, m + k * s, out=out[:, j])
    return (out, scales) if return_scales else out


def _linear_fit(S: np.ndarray, G: np.ndarray, dt: float, n_iter: int = 30):
    """Huber-weighted velocity from per-track step sums S (n, d) over G frames; sandwich covariance."""
    time = G * dt
    v = S.sum(0) / time.sum()
    w = np.ones(S.shape[0])
    for _ in range(n_iter):
        resid = S - v[None, :] * time[:, None]
        e = np.sqrt(np.sum(resid**2, axis=1) / np.maximum(G, 1))  # per-step RMS residual of each track
        scale = _robust_scale(np.concatenate([e, -e])) or float(np.median(e)) or 1.0
        u = e / scale
        w = np.minimum(1.0, _HUBER_K * np.sqrt(S.shape[1]) / np.maximum(u, 1e-300))
        v_new = (w[:, None] * S).sum(0) / (w * time).sum()
        if np.allclose(v_new, v, rtol=1e-10, atol=1e-15):
            v = v_new
            break
        v = v_new
    resid = S - v[None, :] * time[:, None]
    n = S.shape[0]
    denom = (w * time).sum()
    wr = w[:, None] * resid
    cov = wr.T @ wr / denom**2 * (n / max(n - 1, 1))
    return v, cov, w


def _block_velocities(tid, f0, gap, d, dt, n_blocks, inflation, axis_scales=None):
    """Velocity per block of frames and its variance.

    The variance is the white-step variance (pooled robust step variance × frames / duration²) times
    ``inflation``, the ratio of the cluster-robust to the white-step variance of the whole-recording
    velocity (≥ 1), so correlated steps are accounted for without relying on a few clusters per block.
    """
    from . import _msd_kernels as k

    lo, hi = int(f0.min()), int((f0 + gap).max())
    edges = np.linspace(lo, hi, n_blocks + 1)
    if axis_scales is None:
        step_var = np.array([_robust_scale(np.ascontiguousarray(d[:, j])) ** 2 for j in range(d.shape[1])])
    else:
        step_var = np.asarray(axis_scales, float) ** 2
    # steps grouped by block, keeping their order within a block (a counting sort); tid is non-decreasing
    # (steps come track by track from _steps), so distinct tracks per block are counted as changes of tid
    bounds, gap_s, d_s, n_distinct = k.group_by_block(f0, edges, tid, gap, d)
    out_v, out_var = [], []
    for b in range(n_blocks):
        a, z = bounds[b], bounds[b + 1]
        if n_distinct[b] < 3:
            continue
        dd = d_s[a:z]
        s = _robust_scale(dd.ravel())
        med = np.array([_median(dd[:, j]) for j in range(dd.shape[1])])
        num, den = k.huber_block_sums(dd, gap_s[a:z], med, _HUBER_K * 3.0 * s)
        out_v.append(num / den / dt)
        out_var.append(step_var / float(gap_s[a:z].sum()) / dt**2 * inflation)
    return np.array(out_v), np.array(out_var)


def _huber_mean_by_frame(frame_idx, d, n_frames, scale):
    """Robust mean step per frame (a few Huber iterations around the per-frame mean)."""
    n = np.bincount(frame_idx, minlength=n_frames).astype(float)
    mu = np.stack([np.bincount(frame_idx, d[:, j], n_frames) for j in range(d.shape[1])], 1)
    mu = np.divide(mu, n[:, None], out=np.zeros_like(mu), where=n[:, None] > 0)
    for _ in range(5):
        r = d - mu[frame_idx]
        w = np.minimum(1.0, _HUBER_K * scale / np.maximum(np.abs(r), 1e-300))
        num = np.stack([np.bincount(frame_idx, w[:, j] * d[:, j], n_frames) for j in range(d.shape[1])], 1)
        den = np.stack([np.bincount(frame_idx, w[:, j], n_frames) for j in range(d.shape[1])], 1)
        mu = np.divide(num, den, out=mu.copy(), where=den > 0)
    return mu, n


def estimate_drift(
    tracks: pd.DataFrame,
    *,
    frame_interval_s: float,
    min_tracks: int = 10,
    model: str = "auto",
    smoothing_frames: float | None = None,
    significance_level: float = 0.001,
) -> DriftEstimate:
    r"""Estimate the drift that all particles share from their mean displacement between frames.

    Parameters
    ----------
    tracks : DataFrame
        Columns ``track, frame, x_um, y_um`` (and ``z_um`` for 3D), positions in µm.
    frame_interval_s : float, s
    min_tracks : int, default=10
        Fewest tracks that must agree with the drift for it to be safe to subtract.
    model : {"auto", "linear", "path"}, default="auto"
        Constant velocity, smooth per-frame path, or the path only when the velocity changes significantly
        between blocks of frames.
    smoothing_frames : float, frames, optional
        SD of the Gaussian smoothing of the per-frame path; default: about 2 % of the recording, at least 3
        frames.
    significance_level : float, default=0.001
        Level of the tests "no drift" and "constant velocity".

    Returns
    -------
    DriftEstimate

    Notes
    -----
    With steps :math:`\Delta r_{ik}` of track *i*, the linear model solves
    :math:`\hat v = \sum_i w_i S_i / \sum_i w_i T_i` with :math:`S_i = \sum_k \Delta r_{ik}` (the track's
    end-to-end displacement) and :math:`T_i` its duration, with Huber weights :math:`w_i` on the per-step RMS
    residual. The covariance of :math:`\hat v` is the cluster-robust sandwich
    :math:`\sum_i w_i^2 (S_i - \hat v T_i)(S_i - \hat v T_i)^T / (\sum_i w_i T_i)^2`, which holds for any
    kind of motion of independent particles, including correlated steps from localisation noise.

    References
    ----------
    P. J. Huber, Ann. Math. Stat. 35, 73 (1964), doi:10.1214/aoms/1177703732.

    Examples
    --------
    >>> from msdkit.simulate import brownian_positions, positions_to_tracks
    >>> pos = brownian_positions(50, 100, D_um2_s=0.5, frame_interval_s=0.05, drift_um_s=[0.4, 0.0], rng=1)
    >>> est = estimate_drift(positions_to_tracks(pos, frame_interval_s=0.05), frame_interval_s=0.05)
    >>> bool(est.significant), round(est.velocity_um_s[0], 1)
    (True, 0.4)
    """
    cols = _validate(tracks, frame_interval_s)
    if model not in ("auto", "linear", "path"):
        raise ValueError(
            expected_got("model", "'auto', 'linear' or 'path'", repr(model), "Choose a drift model.")
        )
    if not 0 < significance_level < 1:
        raise ValueError(
            expected_got("significance_level", "in (0, 1)", significance_level, "Use e.g. 0.001.")
        )
    dt = float(frame_interval_s)
    nd = len(cols)
    tid, f0, gap, d = _steps(tracks, cols)
    names = ["x", "y", "z"][:nd]
    frames_col = tracks["frame"].to_numpy().astype(np.int64)
    frames_all = np.array([frames_col.min(), frames_col.max()]) if frames_col.size else frames_col
    if tid.size == 0:
        first = int(frames_all[0]) if frames_all.size else 0
        path = _path_table(
            np.array([first]), np.zeros((1, nd)), np.zeros((1, nd)), np.zeros(1, int), dt, names
        )
        return DriftEstimate(
            tuple([0.0] * nd),
            tuple([np.inf] * nd),
            path,
            "linear",
            0,
            0,
            False,
            1.0,
            1.0,
            False,
            dt,
            "no track has two positions",
        )
    d, axis_scales = _winsorise(d, return_scales=True, in_place=True)  # d is this call's own array
    n_tr = int(tid[-1]) + 1  # tid is non-decreasing
    first = int(frames_all[0])
    last = int(frames_all[-1])
    frames = np.arange(first, last + 1)
    S, G, n_one = _kern().track_sums(tid, gap, d, n_tr, f0, first, frames.size)
    v, cov, w = _linear_fit(S, G, dt)
    n_sharing = int(np.sum(w >= 0.5))

    # "no drift": Hotelling-type F test on the cluster-robust covariance
    try:
        t2 = (
            float(v @ np.linalg.solve(cov, v)) if np.all(np.isfinite(cov)) and np.linalg.det(cov) > 0 else 0.0
        )
    except np.linalg.LinAlgError:
        t2 = 0.0
    if n_tr > nd:
        F = t2 * (n_tr - nd) / (nd * (n_tr - 1))
        p_lin = float(special.fdtrc(nd, n_tr - nd, F))  # F-distribution survival function
    else:
        p_lin = 1.0

    # velocity per block of frames: constant velocity? any drift at all?
    span = int((f0 + gap).max() - f0.min())
    n_blocks = int(np.clip(span // 10, 1, 20))
    p_const, p_blocks = 1.0, 1.0
    if n_blocks >= 3:
        white = axis_scales**2 / G.sum() / dt**2
        inflation = float(np.clip(np.max(np.diag(cov) / np.maximum(white, 1e-300)), 1.0, 100.0))
        vb, varb = _block_velocities(tid, f0, gap, d, dt, n_blocks, inflation, axis_scales)
        if vb.shape[0] >= 3:
            good = np.all(varb > 0, axis=1)
            vb, varb = vb[good], varb[good]
            if vb.shape[0] >= 3:
                wb = 1.0 / varb
                vbar = (wb * vb).sum(0) / wb.sum(0)
                chi_const = float(np.sum((vb - vbar) ** 2 * wb))
                p_const = float(special.chdtrc(nd * (vb.shape[0] - 1), chi_const))
                chi_zero = float(np.sum(vb**2 * wb))
                p_blocks = float(special.chdtrc(nd * vb.shape[0], chi_zero))
    p_value = min(1.0, 2.0 * min(p_lin, p_blocks))  # Bonferroni over the two tests
    significant = bool(p_value < significance_level)
    use_path = model == "path" or (model == "auto" and significant and p_const < significance_level)

    if use_path:
        one = gap == 1
        fi = (f0[one] - first).astype(np.int64)
        scale = max(_robust_scale(d[one].ravel()), 1e-300)
        mu, n_f = _huber_mean_by_frame(fi, d[one], frames.size, scale)
        var_f = np.where(n_f > 0, scale**2 / np.maximum(n_f, 1), np.inf)
        sm = smoothing_frames if smoothing_frames is not None else max(3.0, 0.02 * frames.size)
        wts = ndimage.gaussian_filter1d(n_f, sm, mode="nearest")
        step = np.empty((frames.size, nd))
        for j in range(nd):
            num = ndimage.gaussian_filter1d(n_f * mu[:, j], sm, mode="nearest")
            step[:, j] = np.where(wts > 1e-12, num / np.maximum(wts, 1e-300), v[j] * dt)
        cum = np.vstack([np.zeros((1, nd)), np.cumsum(step[:-1], axis=0)])
        se_step = np.sqrt(np.where(np.isfinite(var_f), var_f, 0.0))
        cum_se = np.sqrt(np.concatenate([[0.0], np.cumsum(se_step[:-1] ** 2)]))[:, None] * np.ones((1, nd))
        n_col = n_f.astype(int)
    else:
        el = (frames - first) * dt
        cum = el[:, None] * v[None, :]
        cum_se = el[:, None] * np.sqrt(np.clip(np.diag(cov), 0, None))[None, :]
        n_col = n_one
    path = _path_table(frames, cum, cum_se, n_col, dt, names)

    safe = bool(n_sharing >= min_tracks and n_sharing >= 0.5 * n_tr)
    if n_tr < min_tracks:
        reason = f"only {n_tr} tracks (at least {min_tracks} needed to estimate a common drift)"
    elif not safe:
        reason = (
            f"only {n_sharing} of {n_tr} tracks move with the common drift (need at least {min_tracks} "
            "and half of them)"
        )
    else:
        reason = f"{n_sharing} of {n_tr} tracks share the drift"
    return DriftEstimate(
        velocity_um_s=tuple(float(x) for x in v),
        velocity_se_um_s=tuple(float(x) for x in np.sqrt(np.clip(np.diag(cov), 0, None))),
        path=path,
        model="path" if use_path else "linear",
        n_tracks=n_tr,
        n_tracks_sharing=n_sharing,
        significant=significant,
        p_value=p_value,
        linear_p_value=p_const,
        safe_to_subtract=safe,
        frame_interval_s=dt,
        reason=reason,
    )


def _path_table(frames, cum, cum_se, n_col, dt, names) -> pd.DataFrame:
    data = {"frame": frames.astype(np.int64), "time_s": frames * dt}
    for j, nm in enumerate(names):
        data[f"drift_{nm}_um"] = cum[:, j]
    for j, nm in enumerate(names):
        data[f"drift_{nm}_se_um"] = cum_se[:, j]
    data["n_tracks"] = np.asarray(n_col, np.int64)
    return pd.DataFrame(data)


def remove_drift(tracks: pd.DataFrame, drift: DriftEstimate) -> pd.DataFrame:
    """Subtract an estimated drift from every position.

    Parameters
    ----------
    tracks : DataFrame
        Columns ``track, frame, x_um, y_um`` (``z_um``); other columns are kept.
    drift : DriftEstimate
        From :func:`estimate_drift` on the same recording.

    Returns
    -------
    DataFrame
        A copy with the cumulative drift at each position's frame subtracted (frames outside the estimated
        range use the linear velocity).
    """
    if not isinstance(drift, DriftEstimate):
        raise InputError(
            expected_got(
                "drift", "a DriftEstimate", type(drift).__name__, "Pass the result of estimate_drift."
            )
        )
    cols = _validate(tracks, drift.frame_interval_s)
    out = tracks.copy()
    frame = out["frame"].to_numpy().astype(np.int64)
    pf = drift.path["frame"].to_numpy()
    v = np.asarray(drift.velocity_um_s, float)
    for j, c in enumerate(cols):
        if j >= v.size:
            break
        nm = "xyz"[j]
        cum = drift.path[f"drift_{nm}_um"].to_numpy()
        val = np.interp(frame, pf, cum)
        # beyond the estimated range: continue with the mean velocity
        val = np.where(frame < pf[0], cum[0] + (frame - pf[0]) * drift.frame_interval_s * v[j], val)
        val = np.where(frame > pf[-1], cum[-1] + (frame - pf[-1]) * drift.frame_interval_s * v[j], val)
        out[c] = out[c].to_numpy(float) - val
    return out
