"""Motion models with known truth: Brownian, fractional Brownian, confined and directed motion.

Every generator returns positions of shape ``(n_tracks, n_points, n_dims)`` in µm as observed by a camera:
averaged over the exposure (motion blur) and with Gaussian localisation noise added. ``positions_to_tracks``
turns them into a track table (see :mod:`msdkit.schema`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import expected_got


def _rng(rng) -> np.random.Generator:
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


def _check(frame_interval_s: float, exposure_s: float, localization_sd_um: float, n_points: int) -> None:
    if not frame_interval_s > 0:
        raise ValueError(expected_got("frame_interval_s", "> 0", frame_interval_s, "Give seconds per frame."))
    if not 0 <= exposure_s <= frame_interval_s:
        raise ValueError(
            expected_got("exposure_s", f"between 0 and frame_interval_s={frame_interval_s}", exposure_s,
                         "The exposure cannot exceed the frame interval.")
        )
    if localization_sd_um < 0:
        raise ValueError(expected_got("localization_sd_um", ">= 0", localization_sd_um, "Give an SD in µm."))
    if n_points < 2:
        raise ValueError(expected_got("n_points", ">= 2", n_points, "A track needs two positions."))


def _per_track(value, n_tracks: int, name: str) -> np.ndarray:
    arr = np.broadcast_to(np.asarray(value, dtype=float), (n_tracks,)).copy()
    if np.any(~np.isfinite(arr)) or np.any(arr < 0):
        raise ValueError(expected_got(name, "finite and >= 0", value, "Check the motion parameters."))
    return arr


def brownian_positions(
    n_tracks: int,
    n_points: int,
    *,
    D_um2_s,
    frame_interval_s: float,
    exposure_s: float = 0.0,
    localization_sd_um: float = 0.0,
    n_dims: int = 2,
    drift_um_s=None,
    rng=None,
) -> np.ndarray:
    """Brownian motion observed with uniform exposure, exact (no time discretisation).

    Parameters
    ----------
    n_tracks, n_points : int
    D_um2_s : float or array of shape (n_tracks,), µm²/s
    frame_interval_s : float, s
    exposure_s : float, s, default=0
        Shutter-open time per frame; positions are averaged over it (motion blur). 0 gives instantaneous
        samples.
    localization_sd_um : float, µm, default=0
        SD of Gaussian localisation noise per axis.
    n_dims : int, default=2
    drift_um_s : array of shape (n_dims,), optional
        Constant drift velocity added to every track.
    rng : int, Generator or None

    Notes
    -----
    Within one exposure of length T starting at W_k, the end displacement b and the mean offset Y of a
    Brownian path are jointly Gaussian per axis with Var b = 2DT, Var Y = 2DT/3, Cov = DT, so
    Y = b/2 + sqrt(DT/6) z. The observed MSD is then 2d[D Δt (n - 2R) + σ²] with R = T/(6Δt)
    (Berglund 2010, Phys. Rev. E 82:011917).
    """
    _check(frame_interval_s, exposure_s, localization_sd_um, n_points)
    g = _rng(rng)
    D = _per_track(D_um2_s, n_tracks, "D_um2_s")[:, None, None]
    T, dt = float(exposure_s), float(frame_interval_s)
    shape = (n_tracks, n_points, n_dims)
    b = np.sqrt(2 * D * T) * g.standard_normal(shape)
    y = 0.5 * b + np.sqrt(D * T / 6.0) * g.standard_normal(shape)
    gap = np.sqrt(2 * D * (dt - T)) * g.standard_normal(shape)
    steps = b + gap
    start = np.concatenate([np.zeros((n_tracks, 1, n_dims)), np.cumsum(steps[:, :-1], axis=1)], axis=1)
    pos = start + y
    if drift_um_s is not None:
        v = np.asarray(drift_um_s, dtype=float).reshape(1, 1, n_dims)
        t_mid = np.arange(n_points)[None, :, None] * dt + T / 2
        pos = pos + v * t_mid
    if localization_sd_um > 0:
        pos = pos + localization_sd_um * g.standard_normal(shape)
    return pos


def fgn_increments(n_series: int, n_steps: int, *, hurst: float, rng=None) -> np.ndarray:
    """Fractional Gaussian noise with unit variance per step, by circulant embedding (Davies & Harte 1987).

    Returns an array of shape (n_series, n_steps) whose cumulative sum is fractional Brownian motion
    with Var = k^(2H) after k steps.

    References
    ----------
    R. B. Davies & D. S. Harte, Biometrika 74, 95 (1987), doi:10.1093/biomet/74.1.95.
    """
    if not 0 < hurst < 1:
        raise ValueError(expected_got("hurst", "in (0, 1) (alpha in (0, 2))", hurst, "Check alpha."))
    g = _rng(rng)
    n = int(n_steps)
    k = np.arange(n + 1, dtype=float)
    two_h = 2 * hurst
    gamma = 0.5 * (np.abs(k + 1) ** two_h - 2 * np.abs(k) ** two_h + np.abs(k - 1) ** two_h)
    row = np.concatenate([gamma, gamma[-2:0:-1]])  # length 2n
    lam = np.fft.fft(row).real
    lam = np.clip(lam, 0, None)  # tiny negative values from round-off
    m = row.size
    z = g.standard_normal((n_series, m)) + 1j * g.standard_normal((n_series, m))
    w = np.fft.fft(np.sqrt(lam / m) * z, axis=1)
    return w.real[:, :n]


def fbm_positions(
    n_tracks: int,
    n_points: int,
    *,
    alpha: float,
    K_um2_s_alpha: float,
    frame_interval_s: float,
    exposure_s: float = 0.0,
    localization_sd_um: float = 0.0,
    n_dims: int = 2,
    n_substeps: int = 10,
    rng=None,
) -> np.ndarray:
    """Fractional Brownian motion with MSD = 2 d K t^alpha (per axis 2 K t^alpha).

    Motion blur averages ``n_substeps`` sub-frame positions over the exposure (only when exposure_s > 0).

    References
    ----------
    B. B. Mandelbrot & J. W. Van Ness, SIAM Rev. 10, 422 (1968); R. Metzler & J. Klafter, Phys. Rep. 339, 1
    (2000).
    """
    _check(frame_interval_s, exposure_s, localization_sd_um, n_points)
    g = _rng(rng)
    sub = int(n_substeps) if exposure_s > 0 else 1
    dt_fine = frame_interval_s / sub
    n_fine = (n_points - 1) * sub + sub
    incr = fgn_increments(n_tracks * n_dims, n_fine, hurst=alpha / 2.0, rng=g)
    incr *= np.sqrt(2 * K_um2_s_alpha * dt_fine**alpha)
    path = np.concatenate([np.zeros((incr.shape[0], 1)), np.cumsum(incr, axis=1)], axis=1)
    path = path.reshape(n_tracks, n_dims, -1).transpose(0, 2, 1)  # (tracks, fine points, dims)
    if sub == 1:
        pos = path[:, :n_points]
    else:
        n_exp = max(1, int(round(exposure_s / dt_fine)))
        idx = np.arange(n_points)[:, None] * sub + np.arange(n_exp + 1)[None, :]
        pos = path[:, idx].mean(axis=2)
    if localization_sd_um > 0:
        pos = pos + localization_sd_um * g.standard_normal(pos.shape)
    return pos


def _reflect(x: np.ndarray, side: float) -> np.ndarray:
    """Fold free positions into [0, side] by mirror reflection (exact for reflected Brownian motion)."""
    y = np.mod(x, 2 * side)
    return np.where(y > side, 2 * side - y, y)


def confined_positions(
    n_tracks: int,
    n_points: int,
    *,
    D_um2_s,
    box_um: float,
    frame_interval_s: float,
    exposure_s: float = 0.0,
    localization_sd_um: float = 0.0,
    n_dims: int = 2,
    n_substeps: int = 10,
    rng=None,
) -> np.ndarray:
    """Brownian motion reflected inside a square (cube) of side ``box_um``, starting uniformly inside.

    Long-time MSD plateau per axis is box²/6 (Saxton & Jacobson 1997, Annu. Rev. Biophys. Biomol. Struct.
    26:373).
    """
    _check(frame_interval_s, exposure_s, localization_sd_um, n_points)
    g = _rng(rng)
    sub = int(n_substeps) if exposure_s > 0 else 1
    D = _per_track(D_um2_s, n_tracks, "D_um2_s")[:, None, None]
    dt_fine = frame_interval_s / sub
    n_fine = (n_points - 1) * sub + sub
    steps = np.sqrt(2 * D * dt_fine) * g.standard_normal((n_tracks, n_fine, n_dims))
    start = g.uniform(0, box_um, (n_tracks, 1, n_dims))
    free = np.concatenate([start, start + np.cumsum(steps, axis=1)], axis=1)
    path = _reflect(free, box_um)
    if sub == 1:
        pos = path[:, :n_points]
    else:
        n_exp = max(1, int(round(exposure_s / dt_fine)))
        idx = np.arange(n_points)[:, None] * sub + np.arange(n_exp + 1)[None, :]
        pos = path[:, idx].mean(axis=2)
    pos = pos - box_um / 2
    if localization_sd_um > 0:
        pos = pos + localization_sd_um * g.standard_normal(pos.shape)
    return pos


def directed_positions(
    n_tracks: int,
    n_points: int,
    *,
    D_um2_s,
    speed_um_s,
    frame_interval_s: float,
    exposure_s: float = 0.0,
    localization_sd_um: float = 0.0,
    n_dims: int = 2,
    rng=None,
) -> np.ndarray:
    """Brownian motion plus a constant velocity of given speed in a random direction per track.

    MSD = 2 d D t + v² t² (common practice; Saxton & Jacobson 1997).
    """
    g = _rng(rng)
    pos = brownian_positions(
        n_tracks, n_points, D_um2_s=D_um2_s, frame_interval_s=frame_interval_s, exposure_s=exposure_s,
        localization_sd_um=localization_sd_um, n_dims=n_dims, rng=g,
    )
    v = g.standard_normal((n_tracks, n_dims))
    v /= np.linalg.norm(v, axis=1, keepdims=True)
    v *= _per_track(speed_um_s, n_tracks, "speed_um_s")[:, None]
    t = np.arange(n_points) * frame_interval_s + exposure_s / 2
    return pos + v[:, None, :] * t[None, :, None]


def positions_to_tracks(
    positions: np.ndarray,
    *,
    frame_interval_s: float,
    lengths=None,
    first_frames=None,
    first_track_id: int = 0,
) -> pd.DataFrame:
    """Turn an array of positions (n_tracks, n_points, n_dims) into a track table.

    Parameters
    ----------
    positions : ndarray, µm
    frame_interval_s : float
    lengths : array of int, optional
        Keep only the first ``lengths[i]`` points of track i (variable-length tracks).
    first_frames : array of int, optional
        Frame number of each track's first point (default 0).

    Returns
    -------
    DataFrame with columns track, frame, time_s, x_um, y_um (and z_um in 3D).
    """
    n_tracks, n_points, n_dims = positions.shape
    lengths = (np.full(n_tracks, n_points) if lengths is None
               else np.minimum(np.asarray(lengths, int), n_points))
    first = np.zeros(n_tracks, int) if first_frames is None else np.asarray(first_frames, int)
    keep = np.arange(n_points)[None, :] < lengths[:, None]
    track = np.broadcast_to(np.arange(n_tracks)[:, None] + first_track_id, keep.shape)[keep]
    frame = (np.arange(n_points)[None, :] + first[:, None])[keep]
    data = {
        "track": track.astype(np.int64),
        "frame": frame.astype(np.int64),
        "time_s": frame * float(frame_interval_s),
        "x_um": positions[..., 0][keep],
        "y_um": positions[..., 1][keep],
    }
    if n_dims > 2:
        data["z_um"] = positions[..., 2][keep]
    return pd.DataFrame(data)
