"""Frames → spots: sub-pixel positions, brightness and a localisation-precision estimate per spot.

Coordinate convention (as everywhere in msdkit, see :mod:`msdkit.schema`): x is the image column, y the image
row, and the origin is the centre of pixel (0, 0).

How a frame is processed (:func:`locate_spots`)

1. A smooth background map is estimated (bright pixels clipped, block-averaged, Gaussian-smoothed).
2. The background-subtracted frame is correlated with the spot's own profile (a pixel-integrated Gaussian of
   width ``spot_sigma_px``: the matched filter). At every pixel this gives the least-squares brightness of a
   spot
   centred there, in camera counts, with a known noise SD.
3. Local maxima whose brightness reaches ``min_mass`` are candidates.
4. Each candidate is refined by a weighted Levenberg–Marquardt fit of a pixel-integrated Gaussian with free
   centre, width, brightness and background (weights from a noise model: read/background variance plus shot
   noise proportional to the signal). The pixel-integrated model makes the positions free of pixel-locking.
5. Spots that are badly localised (``precision_px > max_precision_px``) or far wider than an in-focus spot
   (``sigma_px > max_sigma_px``, i.e. far out of focus) are dropped. Both limits are loose by default:
   shape filters also select on motion during the exposure (see :func:`choose_detection_settings`).

:func:`choose_detection_settings` finds every setting from a sample of the movie: the spot width from fits to
the
brightest spots, the noise from robust statistics of the background, the shot-noise factor from the fit
residuals, and the brightness threshold from the expected number of noise maxima above it (Gaussian random
field theory), checked against the noise maxima of the negated movie and corrected for skewed (Poisson) noise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import ndimage, optimize, special

from . import schema
from .errors import InputError, expected_got

__all__ = [
    "DetectionSettings",
    "choose_detection_settings",
    "locate_spots",
    "expected_localization_sd_px",
]

_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
_SQRT2 = math.sqrt(2.0)
_DEFAULT_SIGMA_PX = 1.0  # used only when a movie shows no spot bright enough to measure
_N_PARAMS = 5  # x, y, mass, background, width


@dataclass(frozen=True)
class DetectionSettings:
    """Every setting detection uses, as chosen for one movie (written to the resolved config).

    Attributes
    ----------
    spot_sigma_px : float, px
        Gaussian SD of an in-focus spot (optics plus the typical motion blur), before pixel integration.
    spot_diameter_px : float, px
        Full width at half maximum of the spot, ``2.3548 * spot_sigma_px``.
    window_half_width_px : int, px
        Pixels on each side of a spot's centre used to fit it (``ceil(3 * spot_sigma_px)``, at least 3).
    background_scale_px : float, px
        Smoothing scale of the background map.
    noise_sd : float, camera counts
        SD of the pixel noise in the background (robust estimate).
    noise_skewness : float
        Skewness of the pixel noise (0 for Gaussian read noise, 1/sqrt(mean photons) for Poisson noise).
    shot_noise_factor : float, counts
        Extra pixel variance per count of spot signal (1 for a photon-counting camera, the gain for an
        amplified one, about 2 x the gain for an EMCCD).
    mass_noise_sd : float, camera counts
        SD of the matched-filter brightness estimate in pure noise.
    min_mass : float, camera counts
        Candidates whose matched-filter brightness is below this are not spots.
    min_snr : float
        ``min_mass / mass_noise_sd``.
    false_spots_per_frame : float
        Expected number of noise maxima per frame passing ``min_mass`` (the target used to choose it).
    max_precision_px : float, px
        Spots whose estimated localisation SD per axis exceeds this are dropped.
    max_sigma_px : float, px
        Spots whose fitted Gaussian SD exceeds this (far out of focus) are dropped.
    n_spots_measured : int
        Number of bright spots whose fits gave ``spot_sigma_px`` and ``shot_noise_factor`` (0: defaults used).
    chosen_automatically : tuple of str
        Names of the settings above that were chosen from the movie rather than given.
    """

    spot_sigma_px: float
    spot_diameter_px: float
    window_half_width_px: int
    background_scale_px: float
    noise_sd: float
    noise_skewness: float
    shot_noise_factor: float
    mass_noise_sd: float
    min_mass: float
    min_snr: float
    false_spots_per_frame: float
    max_precision_px: float
    max_sigma_px: float
    n_spots_measured: int
    chosen_automatically: tuple[str, ...] = ()


# ----------------------------------------------------------------------------------------------------
# input checks


def _as_frames(frames, name: str = "frames") -> np.ndarray:
    arr = np.asarray(frames)
    if arr.ndim == 2:
        arr = arr[None]
    if arr.ndim != 3:
        raise InputError(
            expected_got(
                f"{name}",
                "a 3-D array (frame, row, column) or a single 2-D frame",
                f"shape {arr.shape}",
                "Pass a movie as a stack of 2-D grey-level frames (split colour channels first).",
            )
        )
    if arr.shape[1] < 5 or arr.shape[2] < 5:
        raise InputError(
            expected_got(
                f"{name} frame size",
                "at least 5 x 5 pixels",
                f"{arr.shape[1]} x {arr.shape[2]}",
                "Check that the movie was read with the right axis order.",
            )
        )
    if not (np.issubdtype(arr.dtype, np.integer) or np.issubdtype(arr.dtype, np.floating)):
        raise InputError(expected_got(f"{name} dtype", "integer or float", arr.dtype, "Convert the frames."))
    arr = arr.astype(np.float64, copy=False)
    if not np.all(np.isfinite(arr)):
        raise InputError(
            expected_got(
                f"{name}",
                "finite numbers",
                "NaN or inf values",
                "Replace missing pixels (e.g. by the frame median) before detection.",
            )
        )
    return arr


# ----------------------------------------------------------------------------------------------------
# background, noise and the matched filter


def _spot_kernel_1d(sigma_px: float) -> np.ndarray:
    """Pixel-integrated Gaussian profile, normalised to sum 1, over ±ceil(4 sigma) pixels."""
    h = max(1, int(math.ceil(4.0 * sigma_px)))
    u = np.arange(-h, h + 1, dtype=float)
    k = special.ndtr((u + 0.5) / sigma_px) - special.ndtr((u - 0.5) / sigma_px)
    return k / k.sum()


def _background_map(frame: np.ndarray, noise_sd: float, scale_px: float) -> np.ndarray:
    """Smooth background: median-anchored, bright pixels clipped, block-averaged then Gaussian-smoothed."""
    med = float(np.median(frame))
    clipped = np.minimum(frame, med + 2.0 * noise_sd)
    b = max(1, int(scale_px // 3))
    ny, nx = frame.shape
    if b > 1 and ny >= 2 * b and nx >= 2 * b:
        py, px = (-ny) % b, (-nx) % b
        padded = np.pad(clipped, ((0, py), (0, px)), mode="reflect")
        blocks = padded.reshape(padded.shape[0] // b, b, padded.shape[1] // b, b).mean(axis=(1, 3))
        smooth = ndimage.gaussian_filter(blocks, scale_px / b, mode="reflect")
        # block centres sit at (i + 0.5) b - 0.5 in pixel coordinates; interpolate linearly back
        yy = (np.arange(ny) + 0.5) / b - 0.5
        xx = (np.arange(nx) + 0.5) / b - 0.5
        return ndimage.map_coordinates(smooth, np.meshgrid(yy, xx, indexing="ij"), order=1, mode="nearest")
    return ndimage.gaussian_filter(clipped, scale_px, mode="reflect")


def _clipped_sd(values: np.ndarray) -> float:
    """SD from iterative ±3 SD clipping (robust to spots, unlike the plain SD; exact for integer data)."""
    v = values.ravel()
    centre = float(np.median(v))
    sd = 1.4826 * float(np.median(np.abs(v - centre)))
    if sd <= 0:
        sd = float(np.std(v))
    for _ in range(8):
        keep = v[np.abs(v - centre) < 3.0 * sd] if sd > 0 else v
        if keep.size < 10:
            break
        centre = float(np.mean(keep))
        new = float(np.std(keep)) / 0.98658  # SD of a normal truncated at ±3 SD is 0.98658 SD
        if sd > 0 and abs(new - sd) < 1e-4 * sd:
            sd = new
            break
        sd = new
    return sd


def _matched_filter(residual: np.ndarray, kernel: np.ndarray) -> np.ndarray:
    out = ndimage.correlate1d(residual, kernel, axis=0, mode="constant")
    return ndimage.correlate1d(out, kernel, axis=1, mode="constant")


def _local_maxima(img: np.ndarray, level: float, radius: int) -> tuple[np.ndarray, np.ndarray]:
    size = 2 * radius + 1
    peaks = (img == ndimage.maximum_filter(img, size=size, mode="constant", cval=-np.inf)) & (img >= level)
    rows, cols = np.nonzero(peaks)
    return rows, cols


# ----------------------------------------------------------------------------------------------------
# spot fitting


def _profiles(u: np.ndarray, d: np.ndarray, s: np.ndarray):
    """Pixel-integrated 1-D Gaussian, its derivative by the centre and by the width.

    u: (w,) pixel offsets; d, s: (n,) centre offsets and widths. Returns three (n, w) arrays.
    """
    hi = (u[None, :] + 0.5 - d[:, None]) / s[:, None]
    lo = (u[None, :] - 0.5 - d[:, None]) / s[:, None]
    e = special.ndtr(hi) - special.ndtr(lo)
    g_hi = np.exp(-0.5 * hi * hi) / (math.sqrt(2 * math.pi) * s[:, None])
    g_lo = np.exp(-0.5 * lo * lo) / (math.sqrt(2 * math.pi) * s[:, None])
    de_dd = -(g_hi - g_lo)
    de_ds = -(hi * g_hi - lo * g_lo)
    return e, de_dd, de_ds


def _model_and_jacobian(p: np.ndarray, u: np.ndarray):
    """Spot model b + m * Ey * Ex on a (w, w) window and its Jacobian (n, w*w, 5)."""
    dx, dy, m, b, s = p.T
    ex, ex_d, ex_s = _profiles(u, dx, s)
    ey, ey_d, ey_s = _profiles(u, dy, s)
    shape = ey[:, :, None] * ex[:, None, :]
    n, w = ex.shape
    model = b[:, None, None] + m[:, None, None] * shape
    jac = np.empty((n, w, w, _N_PARAMS))
    jac[..., 0] = m[:, None, None] * ey[:, :, None] * ex_d[:, None, :]
    jac[..., 1] = m[:, None, None] * ey_d[:, :, None] * ex[:, None, :]
    jac[..., 2] = shape
    jac[..., 3] = 1.0
    jac[..., 4] = m[:, None, None] * (ey_s[:, :, None] * ex[:, None, :] + ey[:, :, None] * ex_s[:, None, :])
    return model.reshape(n, w * w), jac.reshape(n, w * w, _N_PARAMS)


def _fit_windows(
    windows: np.ndarray,
    valid: np.ndarray,
    p0: np.ndarray,
    *,
    noise_var: float,
    shot_factor: float,
    half_width: int,
    n_iter: int = 25,
):
    """Weighted Levenberg–Marquardt fit of pixel-integrated Gaussians to many windows at once.

    Parameters: (dx, dy, mass, background, sigma), dx/dy relative to the window's centre pixel. Weights are
    1 / (noise_var + shot_factor * max(model - background, 0)), re-evaluated each iteration (iteratively
    reweighted least squares, the Gaussian approximation of the Poisson likelihood).
    Returns fitted parameters (n, 5), their covariance (n, 5, 5), the final model (n, w*w) and an ok mask.
    """
    n = windows.shape[0]
    w = 2 * half_width + 1
    u = np.arange(-half_width, half_width + 1, dtype=float)
    data = windows.reshape(n, w * w)
    vmask = valid.reshape(n, w * w).astype(float)
    p = p0.copy()
    lam = np.full(n, 1e-2)
    s_lo, s_hi = 0.3, 2.0 * half_width
    lim = float(half_width)

    def evaluate(params):
        model, jac = _model_and_jacobian(params, u)
        var = noise_var + shot_factor * np.maximum(model - params[:, 3:4], 0.0)
        return model, jac, vmask / var

    model, jac, wts = evaluate(p)
    cost = np.sum(wts * (data - model) ** 2, axis=1)
    active = np.ones(n, dtype=bool)
    eye = np.eye(_N_PARAMS)
    for _ in range(n_iter):
        idx = np.nonzero(active)[0]
        if idx.size == 0:
            break
        jw = jac[idx] * wts[idx, :, None]
        jwt = jw.transpose(0, 2, 1)
        hess = jwt @ jac[idx]
        grad = (jwt @ (data[idx] - model[idx])[..., None])[..., 0]
        diag = np.diagonal(hess, axis1=1, axis2=2)
        a = hess + lam[idx, None, None] * diag[:, :, None] * eye
        try:
            step = np.linalg.solve(a, grad[..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = np.stack([np.linalg.lstsq(ai, gi, rcond=None)[0] for ai, gi in zip(a, grad, strict=True)])
        trial = p[idx] + step
        trial[:, 0:2] = np.clip(trial[:, 0:2], -lim, lim)
        trial[:, 4] = np.clip(trial[:, 4], s_lo, s_hi)
        t_model, t_jac = _model_and_jacobian(trial, u)
        # compare costs under the current weights so the accept test is consistent
        t_cost = np.sum(wts[idx] * (data[idx] - t_model) ** 2, axis=1)
        better = t_cost <= cost[idx]
        acc = idx[better]
        p[acc] = trial[better]
        lam[acc] = np.maximum(lam[acc] / 3.0, 1e-7)
        lam[idx[~better]] *= 4.0
        if acc.size:
            model[acc] = t_model[better]
            jac[acc] = t_jac[better]
            var = noise_var + shot_factor * np.maximum(model[acc] - p[acc, 3:4], 0.0)
            wts[acc] = vmask[acc] / var
            cost[acc] = np.sum(wts[acc] * (data[acc] - model[acc]) ** 2, axis=1)
        rel = np.abs(step[:, 0:2]).max(axis=1)
        done = (better & (rel < 1e-4)) | (lam[idx] > 1e6)
        active[idx[done]] = False
    hess = (jac * wts[:, :, None]).transpose(0, 2, 1) @ jac
    ok = np.isfinite(p).all(axis=1) & (p[:, 2] > 0)
    cov = np.full((n, _N_PARAMS, _N_PARAMS), np.nan)
    det = np.linalg.det(hess)
    good = ok & np.isfinite(det) & (np.abs(det) > 0)
    if good.any():
        cov[good] = np.linalg.inv(hess[good])
    ok &= np.isfinite(cov[:, 0, 0]) & (cov[:, 0, 0] > 0) & (cov[:, 1, 1] > 0)
    return p, cov, model, ok


def _cut_windows(frame: np.ndarray, rows: np.ndarray, cols: np.ndarray, h: int):
    """Windows of (2h+1)^2 pixels around (rows, cols); pixels outside the frame are flagged invalid."""
    padded = np.pad(frame, h, mode="constant")
    inside = np.pad(np.ones(frame.shape, dtype=bool), h, mode="constant")
    off = np.arange(-h, h + 1)
    rr = rows[:, None, None] + h + off[None, :, None]
    cc = cols[:, None, None] + h + off[None, None, :]
    return padded[rr, cc], inside[rr, cc]


def _initial_guess(windows, valid, background, sigma_px, h):
    w = 2 * h + 1
    n = windows.shape[0]
    b0 = background.copy()
    resid = np.where(valid, windows - b0[:, None, None], 0.0)
    core = np.zeros((w, w), dtype=bool)
    r = max(1, int(round(2 * sigma_px)))
    core[h - r : h + r + 1, h - r : h + r + 1] = True
    m0 = np.maximum(resid[:, core].sum(axis=1), 1e-3)
    p0 = np.zeros((n, _N_PARAMS))
    # one centroid step over the 3 x 3 core gives a start within a fraction of a pixel
    c3 = np.clip(resid[:, h - 1 : h + 2, h - 1 : h + 2], 0, None)
    tot = c3.sum(axis=(1, 2))
    tot = np.where(tot > 0, tot, 1.0)
    p0[:, 0] = (c3.sum(axis=1) * np.array([-1.0, 0.0, 1.0])).sum(axis=1) / tot
    p0[:, 1] = (c3.sum(axis=2) * np.array([-1.0, 0.0, 1.0])).sum(axis=1) / tot
    p0[:, 2] = m0
    p0[:, 3] = b0
    p0[:, 4] = sigma_px
    return p0


# ----------------------------------------------------------------------------------------------------
# one frame


@dataclass(frozen=True)
class _Frame:
    rows: np.ndarray
    cols: np.ndarray
    mass: np.ndarray  # matched-filter brightness at the candidate pixel
    background: np.ndarray


def _candidates(frame, *, sigma_px, noise_sd, bg_scale, level_mass, invert=False) -> _Frame:
    bg = _background_map(frame if not invert else -frame, noise_sd, bg_scale)
    resid = (frame if not invert else -frame) - bg
    k = _spot_kernel_1d(sigma_px)
    sum_p2 = float(np.sum(k * k) ** 2)
    mass_img = _matched_filter(resid, k) / sum_p2
    rows, cols = _local_maxima(mass_img, level_mass, max(1, int(math.ceil(sigma_px))))
    return _Frame(rows, cols, mass_img[rows, cols], bg[rows, cols])


def _mass_noise_sd(noise_sd: float, sigma_px: float) -> float:
    k = _spot_kernel_1d(sigma_px)
    return noise_sd / float(np.sum(k * k))  # noise_sd / sqrt(sum p^2) with sum p^2 = (sum k^2)^2


def _fit_candidates(frame, cand: _Frame, *, sigma_px, noise_sd, shot_factor, h):
    windows, valid = _cut_windows(frame, cand.rows, cand.cols, h)
    p0 = _initial_guess(windows, valid, cand.background, sigma_px, h)
    return _fit_prepared(windows, valid, p0, noise_sd=noise_sd, shot_factor=shot_factor, h=h)


def _fit_batch(windows, valid, background, *, sigma_px, noise_sd, shot_factor, h):
    p0 = _initial_guess(windows, valid, background, sigma_px, h)
    p, c, _, ok, _, _ = _fit_prepared(windows, valid, p0, noise_sd=noise_sd, shot_factor=shot_factor, h=h)
    return p, c, ok


def _fit_prepared(windows, valid, p0, *, noise_sd, shot_factor, h):
    out_p = np.empty_like(p0)
    out_c = np.empty((len(p0), _N_PARAMS, _N_PARAMS))
    out_ok = np.empty(len(p0), dtype=bool)
    out_m = np.empty((len(p0), (2 * h + 1) ** 2))
    step = max(1, 200_000 // (2 * h + 1) ** 2)  # bound the memory of one batch of Jacobians
    for i in range(0, len(p0), step):
        sl = slice(i, i + step)
        p, c, m, ok = _fit_windows(
            windows[sl], valid[sl], p0[sl], noise_var=noise_sd**2, shot_factor=shot_factor, half_width=h
        )
        out_p[sl], out_c[sl], out_m[sl], out_ok[sl] = p, c, m, ok
    return out_p, out_c, out_m, out_ok, windows, valid


# ----------------------------------------------------------------------------------------------------
# threshold from Gaussian random field theory


def _expected_noise_maxima(u: float, *, sigma_px: float, shape: tuple[int, int]) -> float:
    """Return the expected number of noise maxima above u SDs in one frame (Euler characteristic).

    Gaussian white noise filtered by a Gaussian of variance s^2 = sigma^2 + 1/12 (the pixel-integrated kernel)
    has gradient variance lambda = 1 / (2 s^2) per axis; the expected Euler characteristic of the set above u
    in     a rectangle of area A and half-perimeter P is (1 - Phi(u)) + P sqrt(lambda) e^{-u^2/2} / (2 pi)
    + A lambda u e^{-u^2/2} / (2 pi)^{3/2} (Adler 1981, The Geometry of Random Fields; Worsley et al. 1996,
    Hum. Brain Mapp. 4:58, doi:10.1002/(SICI)1097-0193(1996)4:1<58::AID-HBM4>3.0.CO;2-O).
    """
    lam = 1.0 / (2.0 * (sigma_px**2 + 1.0 / 12.0))
    area = float(shape[0] * shape[1])
    half_perimeter = float(shape[0] + shape[1])
    e = math.exp(-0.5 * u * u)
    return (
        float(special.ndtr(-u))
        + half_perimeter * math.sqrt(lam) * e / (2 * math.pi)
        + area * lam * u * e / (2 * math.pi) ** 1.5
    )


def _threshold_snr(target: float, *, sigma_px: float, shape, calibration: float) -> float:
    """Smallest u with calibration * expected maxima above u <= target (Gaussian noise)."""

    def f(u: float) -> float:
        n = calibration * _expected_noise_maxima(u, sigma_px=sigma_px, shape=shape)
        return math.log(max(n, 1e-300)) - math.log(target)

    lo, hi = 1.5, 30.0
    if f(lo) <= 0:
        return lo
    return float(optimize.brentq(f, lo, hi))


def _kernel_skew_factor(sigma_px: float) -> float:
    """Skewness of the matched-filter output per unit pixel skewness: sum p^3 / (sum p^2)^(3/2)."""
    k = _spot_kernel_1d(sigma_px)
    return float(np.sum(k**3) ** 2 / np.sum(k**2) ** 3)


# ----------------------------------------------------------------------------------------------------
# public API


def choose_detection_settings(
    frames_sample,
    *,
    spot_diameter_px: float | None = None,
    min_mass: float | None = None,
    false_spots_per_frame: float = 0.01,
    max_precision_px: float | None = None,
    max_sigma_px: float | None = None,
) -> DetectionSettings:
    """Choose every detection setting from a sample of the movie's frames.

    Parameters
    ----------
    frames_sample : array of shape (n_frames, n_rows, n_columns) or (n_rows, n_columns)
        A few frames spread over the movie (10–50 is plenty).
    spot_diameter_px : float, px, optional
        Full width at half maximum of an in-focus spot. Default: measured from Gaussian fits to the brightest
        spots (median width).
    min_mass : float, camera counts, optional
        Smallest matched-filter brightness of a spot. Default: the brightness that noise alone reaches at
        ``false_spots_per_frame`` maxima per frame.
    false_spots_per_frame : float, default=0.01
        Target for the automatic ``min_mass``: expected number of noise maxima per frame taken for spots.
    max_precision_px : float, px, optional
        Spots with a larger estimated localisation SD are dropped. Default: the spot SD (an in-focus spot at
        the threshold is localised to about a quarter of its SD, so this drops only spots that carry almost no
        position information).
    max_sigma_px : float, px, optional
        Spots whose fitted Gaussian SD exceeds this are dropped (far out of focus). Default: 4 x the spot SD.

    Returns
    -------
    DetectionSettings

    Notes
    -----
    Noise: pixel SD of the background-subtracted frames by iterative 3-SD clipping; its skewness from the
    pixels
    away from any candidate. The matched-filter brightness of pure noise has SD
    ``noise_sd / sqrt(sum p_i^2)`` (p the spot profile), so the threshold is a number of SDs ``u`` solved from
    the expected number of noise maxima above ``u`` per frame (Gaussian random-field theory, see
    ``_expected_noise_maxima``). That count is calibrated against the maxima actually found in the negated
    sample frames at a low level (3 SD), which corrects for correlated camera noise, and ``u`` is then shifted
    by the Cornish–Fisher term ``gamma (u^2 - 1) / 6`` for the skewness ``gamma`` of the filtered noise
    (Poisson noise has a heavier upper tail than the negated frames show; Cornish & Fisher 1938, Rev. Inst.
    Int. Stat. 5:307, doi:10.2307/1400905).

    The shot-noise factor is the slope of the squared fit residuals against the fitted signal, over the pixels
    of the brightest spots.

    Every filter on a spot's shape also selects on its motion during the exposure: a particle that moved
    more while the shutter was open makes a wider, dimmer, less precisely localised spot, so dropping such
    spots removes longer steps and biases D low. The width and precision limits therefore default to values
    that only drop spots useless for positions (far out of focus).
    """
    frames = _as_frames(frames_sample, "frames_sample")
    if not (false_spots_per_frame > 0):
        raise InputError(
            expected_got(
                "false_spots_per_frame",
                "> 0",
                false_spots_per_frame,
                "Give the tolerated expected number of noise spots per frame, e.g. 0.01.",
            )
        )
    if min_mass is not None and not (np.isfinite(min_mass) and min_mass >= 0):
        raise InputError(
            expected_got(
                "min_mass",
                "a number >= 0 or None (automatic)",
                min_mass,
                "Remove detection.min_mass from the config to choose it automatically.",
            )
        )
    for name, val in (
        ("spot_diameter_px", spot_diameter_px),
        ("max_precision_px", max_precision_px),
        ("max_sigma_px", max_sigma_px),
    ):
        if val is not None and not (np.isfinite(val) and val > 0):
            raise InputError(
                expected_got(
                    name,
                    "a positive number or None (automatic)",
                    val,
                    f"Remove detection.{name} from the config to choose it automatically.",
                )
            )
    shape = frames.shape[1:]
    auto: list[str] = []

    # 1. noise level (scale of the background map does not depend on the spot much; refined below)
    sigma = spot_diameter_px / _FWHM_PER_SIGMA if spot_diameter_px is not None else 1.5
    noise_sd = _pooled_noise(frames, sigma)

    # 2. spot width from fits to the brightest spots (two or three rounds until the width settles)
    n_measured = 0
    shot = _fallback_shot_factor(frames, noise_sd)
    if spot_diameter_px is None:
        auto.append("spot_sigma_px")
        found = False
        for _ in range(4):
            res = _measure_bright_spots(frames, sigma=sigma, noise_sd=noise_sd, shot=shot)
            if res is None:
                break
            new_sigma, n_measured, shot_est = res
            found = True
            if shot_est is not None:
                shot = shot_est
            change = abs(new_sigma - sigma) / sigma
            sigma = new_sigma
            if change < 0.03:
                break
        if not found:
            sigma = _DEFAULT_SIGMA_PX
        noise_sd = _pooled_noise(frames, sigma)
    else:
        res = _measure_bright_spots(frames, sigma=sigma, noise_sd=noise_sd, shot=shot)
        if res is not None:
            n_measured = res[1]
            if res[2] is not None:
                shot = res[2]
    h = max(3, int(math.ceil(3.0 * sigma)))
    bg_scale = max(8.0, 6.0 * sigma)
    mass_sd = _mass_noise_sd(noise_sd, sigma)

    # 3. threshold
    skew = _pooled_skewness(frames, sigma=sigma, noise_sd=noise_sd, bg_scale=bg_scale, mass_sd=mass_sd)
    gamma = skew * _kernel_skew_factor(sigma)
    if min_mass is None:
        auto.append("min_mass")
        u0 = 3.0
        n_obs = sum(
            len(
                _candidates(
                    f,
                    sigma_px=sigma,
                    noise_sd=noise_sd,
                    bg_scale=bg_scale,
                    level_mass=u0 * mass_sd,
                    invert=True,
                ).rows
            )
            for f in frames
        )
        # the negated noise has skewness -gamma: its maxima above u0 behave like Gaussian maxima above u0_g
        u0_g = u0 + gamma * (u0 * u0 - 1.0) / 6.0
        n_exp = len(frames) * _expected_noise_maxima(u0_g, sigma_px=sigma, shape=shape)
        calibration = max(1.0, n_obs / n_exp) if n_exp > 0 else 1.0
        u = _threshold_snr(false_spots_per_frame, sigma_px=sigma, shape=shape, calibration=calibration)
        u = u + max(gamma, 0.0) * (u * u - 1.0) / 6.0
        min_mass_val = u * mass_sd
    else:
        min_mass_val = float(min_mass)
        u = min_mass_val / mass_sd
    if max_precision_px is None:
        auto.append("max_precision_px")
        max_precision_px = 1.0 * sigma
    if max_sigma_px is None:
        auto.append("max_sigma_px")
        max_sigma_px = 4.0 * sigma
    return DetectionSettings(
        spot_sigma_px=float(sigma),
        spot_diameter_px=float(sigma * _FWHM_PER_SIGMA),
        window_half_width_px=int(h),
        background_scale_px=float(bg_scale),
        noise_sd=float(noise_sd),
        noise_skewness=float(skew),
        shot_noise_factor=float(shot),
        mass_noise_sd=float(mass_sd),
        min_mass=float(min_mass_val),
        min_snr=float(u),
        false_spots_per_frame=float(false_spots_per_frame),
        max_precision_px=float(max_precision_px),
        max_sigma_px=float(max_sigma_px),
        n_spots_measured=int(n_measured),
        chosen_automatically=tuple(auto),
    )


def _pooled_noise(frames: np.ndarray, sigma: float) -> float:
    """Pixel noise SD: clipped SD of the background-subtracted pixels away from any likely spot."""
    scale = max(8.0, 6.0 * sigma)
    h = max(3, int(math.ceil(3.0 * sigma)))
    k = _spot_kernel_1d(sigma)
    sds = []
    for f in frames:
        rough = _clipped_sd(f)
        resid = f - _background_map(f, rough, scale)
        rough = _clipped_sd(resid)
        mimg = _matched_filter(resid, k) / float(np.sum(k * k) ** 2)
        near = ndimage.binary_dilation(mimg > 4.0 * _mass_noise_sd(rough, sigma), iterations=h)
        rest = resid[~near]
        sds.append(_clipped_sd(rest if rest.size >= 100 else resid))
    sd = float(np.median(sds))
    if not sd > 0:
        raise InputError(
            expected_got(
                "frames_sample",
                "frames with some pixel noise",
                "constant frames",
                "Check that the movie is not blank or saturated.",
            )
        )
    return sd


def _fallback_shot_factor(frames: np.ndarray, noise_sd: float) -> float:
    # Poisson noise without offset: variance = gain * mean. Used only when no bright spot is available.
    level = float(np.median(frames))
    return float(min(max(noise_sd**2 / level, 0.0), 1e3)) if level > 0 else 1.0


def _pooled_skewness(frames, *, sigma, noise_sd, bg_scale, mass_sd) -> float:
    h = max(3, int(math.ceil(3.0 * sigma)))
    vals = []
    for f in frames:
        bg = _background_map(f, noise_sd, bg_scale)
        resid = f - bg
        k = _spot_kernel_1d(sigma)
        mimg = _matched_filter(resid, k) / float(np.sum(k * k) ** 2)
        near = ndimage.binary_dilation(np.abs(mimg) > 3.0 * mass_sd, iterations=h)
        v = resid[~near]
        v = v[np.abs(v) < 8.0 * noise_sd]
        vals.append(v)
    v = np.concatenate(vals) if vals else np.zeros(0)
    if v.size < 1000:
        return 0.0
    c = v - v.mean()
    return float(np.mean(c**3) / np.mean(c**2) ** 1.5)


def _measure_bright_spots(frames, *, sigma, noise_sd, shot):
    """Fit the brightest isolated spots; return (median sigma, n spots, shot-noise factor or None)."""
    h = max(3, int(math.ceil(3.0 * sigma)))
    bg_scale = max(8.0, 6.0 * sigma)
    mass_sd = _mass_noise_sd(noise_sd, sigma)
    widths, resid2, signal = [], [], []
    for f in frames:
        cand = _candidates(f, sigma_px=sigma, noise_sd=noise_sd, bg_scale=bg_scale, level_mass=20.0 * mass_sd)
        if len(cand.rows) == 0:
            continue
        # isolated: no other candidate within two windows
        pts = np.column_stack([cand.rows, cand.cols]).astype(float)
        if len(pts) > 1:
            d = np.sqrt(((pts[:, None, :] - pts[None, :, :]) ** 2).sum(-1))
            np.fill_diagonal(d, np.inf)
            iso = d.min(axis=1) > 2 * h
        else:
            iso = np.ones(1, dtype=bool)
        edge = (
            (cand.rows >= h) & (cand.rows < f.shape[0] - h) & (cand.cols >= h) & (cand.cols < f.shape[1] - h)
        )
        keep = iso & edge
        if not keep.any():
            continue
        sub = _Frame(cand.rows[keep], cand.cols[keep], cand.mass[keep], cand.background[keep])
        p, cov, model, ok, windows, valid = _fit_candidates(
            f, sub, sigma_px=sigma, noise_sd=noise_sd, shot_factor=shot, h=h
        )
        ok &= (p[:, 4] > 0.31) & (p[:, 4] < 2.0 * h - 0.01)
        widths.append(p[ok, 4])
        if not ok.any():
            continue
        # leverage of each pixel under the weighted fit: E[r_i^2] = (1 - h_ii) var_i
        u = np.arange(-h, h + 1, dtype=float)
        _, jac = _model_and_jacobian(p[ok], u)
        q = np.maximum(model[ok] - p[ok, 3:4], 0.0)
        wts = valid.reshape(len(p), -1)[ok] / (noise_sd**2 + shot * q)
        lev = wts * np.einsum("npi,nij,npj->np", jac, cov[ok], jac)
        r = (windows.reshape(len(p), -1) - model)[ok]
        use = valid.reshape(len(p), -1)[ok] & (lev < 0.9)
        resid2.append((r**2 / (1.0 - np.where(use, lev, 0.0)))[use])
        signal.append(q[use])
    if not widths:
        return None
    wid = np.concatenate(widths)
    if wid.size < 3:
        return None
    new_sigma = float(np.median(wid))
    r2 = np.concatenate(resid2) if resid2 else np.zeros(0)
    q = np.concatenate(signal) if signal else np.zeros(0)
    shot_est = None
    sq = float(np.sum(q * q))
    if sq > 0 and wid.size >= 5:
        shot_est = float(np.sum(q * (r2 - noise_sd**2)) / sq)
        shot_est = max(shot_est, 0.0)
    return new_sigma, int(wid.size), shot_est


def _duplicates(x, y, mass, keep, radius):
    """Flag spots whose fit converged within ``radius`` of a brighter kept spot (two maxima on one streak)."""
    dup = np.zeros(len(x), dtype=bool)
    idx = np.nonzero(keep)[0]
    if idx.size < 2:
        return dup
    from scipy.spatial import cKDTree

    tree = cKDTree(np.column_stack([x[idx], y[idx]]))
    for i, j in tree.query_pairs(radius):
        a, b = idx[i], idx[j]
        dup[b if mass[a] >= mass[b] else a] = True
    return dup


def locate_spots(frames, *, settings: DetectionSettings, first_frame: int = 0) -> pd.DataFrame:
    """Find spots in each frame and localise them to sub-pixel precision.

    Parameters
    ----------
    frames : array of shape (n_frames, n_rows, n_columns) or (n_rows, n_columns)
        A movie or a chunk of it.
    settings : DetectionSettings
        From :func:`choose_detection_settings`.
    first_frame : int, default=0
        Frame number of ``frames[0]`` in the whole movie (for streaming a movie in chunks).

    Returns
    -------
    DataFrame
        Columns of :data:`msdkit.schema.SPOT_COLUMNS`, then ``sigma_px`` (fitted Gaussian SD), ``background``
        (counts per pixel), ``total_mass`` (fitted integrated counts) and ``snr`` (``mass / mass_noise_sd``).
        ``mass`` is the matched-filter brightness at the spot's brightest pixel (counts above background;
        equals
        the integrated counts for an in-focus spot); ``signal`` the fitted peak pixel above background;
        ``size_px`` the radius of gyration ``sqrt(2) * sigma_px``; ``precision_px`` the localisation SD per
        axis
        from the inverse Fisher information of the fit under the noise model (pixel variance
        ``noise_sd^2 + shot_noise_factor * signal``). For Poisson noise this is the Cramér–Rao bound of
        Mortensen et al. (2010), which the weighted fit attains. Positions follow the coordinate convention of
        :mod:`msdkit.schema`.

    References
    ----------
    Mortensen, Churchman, Spudich & Flyvbjerg (2010), Optimized localization analysis for single-molecule
    tracking and super-resolution microscopy, Nat. Methods 7:377, doi:10.1038/nmeth.1447.
    """
    if not isinstance(settings, DetectionSettings):
        raise InputError(
            expected_got(
                "settings",
                "a DetectionSettings",
                type(settings).__name__,
                "Make it with choose_detection_settings(frames_sample).",
            )
        )
    arr = _as_frames(frames)
    first_frame = int(first_frame)
    s = settings
    h = s.window_half_width_px
    # candidates frame by frame, then one batch of fits for the whole chunk
    cands, wins, vals, frame_of = [], [], [], []
    for i, f in enumerate(arr):
        cand = _candidates(
            f,
            sigma_px=s.spot_sigma_px,
            noise_sd=s.noise_sd,
            bg_scale=s.background_scale_px,
            level_mass=s.min_mass,
        )
        if len(cand.rows) == 0:
            continue
        w, v = _cut_windows(f, cand.rows, cand.cols, h)
        cands.append(cand)
        wins.append(w)
        vals.append(v)
        frame_of.append(np.full(len(cand.rows), i))
    parts = []
    if cands:
        rows = np.concatenate([c.rows for c in cands])
        cols = np.concatenate([c.cols for c in cands])
        mass = np.concatenate([c.mass for c in cands])
        bgr = np.concatenate([c.background for c in cands])
        fidx = np.concatenate(frame_of)
        windows, valid = np.concatenate(wins), np.concatenate(vals)
        p, cov, ok = _fit_batch(
            windows,
            valid,
            bgr,
            sigma_px=s.spot_sigma_px,
            noise_sd=s.noise_sd,
            shot_factor=s.shot_noise_factor,
            h=h,
        )
        with np.errstate(invalid="ignore"):
            prec = np.sqrt(0.5 * (cov[:, 0, 0] + cov[:, 1, 1]))
        # the fit must stay inside its window (a streak's centre may lie a few pixels from its brightest
        # pixel;
        # a tighter limit would drop the spots of particles that moved most during the exposure)
        lim = h - 1.0
        keep = ok & (np.abs(p[:, 0]) <= lim) & (np.abs(p[:, 1]) <= lim)
        keep &= (p[:, 4] <= s.max_sigma_px) & (prec <= s.max_precision_px)
        x, y = cols + p[:, 0], rows + p[:, 1]
        for i in np.unique(fidx):
            sel = fidx == i
            keep[sel] &= ~_duplicates(x[sel], y[sel], mass[sel], keep[sel], s.spot_sigma_px)
        if keep.any():
            pk = p[keep]
            peak = pk[:, 2] * (special.erf(0.5 / (_SQRT2 * pk[:, 4])) ** 2)  # centre pixel of a centred spot
            parts.append(
                pd.DataFrame(
                    {
                        "frame": (first_frame + fidx[keep]).astype(np.int64),
                        "x_px": x[keep],
                        "y_px": y[keep],
                        "mass": mass[keep],
                        "signal": peak,
                        "size_px": _SQRT2 * pk[:, 4],
                        "precision_px": prec[keep],
                        "sigma_px": pk[:, 4],
                        "background": pk[:, 3],
                        "total_mass": pk[:, 2],
                        "snr": mass[keep] / s.mass_noise_sd,
                    }
                )
            )
    if not parts:
        out = schema.empty_frame(schema.SPOT_COLUMNS)
        for c in ("sigma_px", "background", "total_mass", "snr"):
            out[c] = pd.Series(dtype="float64")
        return out
    out = pd.concat(parts, ignore_index=True)
    return schema.coerce(out, schema.SPOT_COLUMNS)


def expected_localization_sd_px(
    photons: float,
    *,
    psf_sigma_px: float,
    background_photons_per_px: float = 0.0,
    method: str = "likelihood",
    excess_noise_factor: float = 1.0,
) -> float:
    """Return the expected localisation SD per axis of a Gaussian spot on a pixel camera (Mortensen 2010).

    Parameters
    ----------
    photons : float
        Photons in the spot, N.
    psf_sigma_px : float, px
        Gaussian SD of the spot s, in pixels (lengths are in units of the pixel size a = 1).
    background_photons_per_px : float, default=0
        Expected background photons per pixel, b^2 in the paper's notation.
    method : {"likelihood", "least_squares"}, default="likelihood"
    excess_noise_factor : float, default=1
        F = 2 for an EMCCD at high gain, 1 otherwise.

    Returns
    -------
    float, px

    Notes
    -----
    With s_a^2 = s^2 + a^2/12 and tau = 2 pi s_a^2 b^2 / (N a^2):
    maximum likelihood, Eq. (5): Var = F s_a^2 / N [1 + int_0^1 ln t / (1 + t / tau) dt]^{-1};
    least squares, Eq. (6): Var = F s_a^2 / N (16/9 + 8 pi s_a^2 b^2 / (N a^2)).

    References
    ----------
    Mortensen, Churchman, Spudich & Flyvbjerg (2010), Nat. Methods 7:377, doi:10.1038/nmeth.1447.
    """
    if not (photons > 0 and psf_sigma_px > 0 and background_photons_per_px >= 0):
        raise ValueError(
            expected_got(
                "photons, psf_sigma_px, background_photons_per_px",
                "> 0, > 0 and >= 0",
                (photons, psf_sigma_px, background_photons_per_px),
                "Give the spot's photon count, width and background.",
            )
        )
    sa2 = psf_sigma_px**2 + 1.0 / 12.0
    b2 = float(background_photons_per_px)
    if method == "least_squares":
        var = excess_noise_factor * sa2 / photons * (16.0 / 9.0 + 8.0 * math.pi * sa2 * b2 / photons)
    elif method == "likelihood":
        tau = 2.0 * math.pi * sa2 * b2 / photons
        if tau == 0:
            integral = 0.0
        else:
            from scipy.integrate import quad

            integral = quad(lambda t: math.log(t) / (1.0 + t / tau) if t > 0 else 0.0, 0.0, 1.0, limit=200)[0]
        var = excess_noise_factor * sa2 / photons / (1.0 + integral)
    else:
        raise ValueError(
            expected_got(
                "method",
                "'likelihood' or 'least_squares'",
                repr(method),
                "Choose one of the two estimators of the paper.",
            )
        )
    return math.sqrt(var)
