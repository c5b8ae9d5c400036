"""Size distributions from per-track diffusion coefficients, free of the spread that short tracks fake.

A track of N_s steps measures D with a relative SD of about 1/√(d N_s / 2), so a histogram of per-track
sizes of identical particles is wide (10 steps: d10/d50/d90 = 0.70/1.03/1.61 × the true size).
:func:`size_distribution` removes that spread: it finds the number distribution of sizes on a log-spaced
grid whose predicted distribution of per-track estimates, track by track (each with its own number of steps,
localisation error and the camera's motion blur), best explains the measured ones, by penalised maximum
likelihood.

Per-track estimator (the kernel is exact for it): :func:`lag1_track_estimates` computes, for each track, the
mean squared lag-1 step per axis m = ⟨Δx²⟩ and D̂ = (m − 2σ²) / (2Δt (1 − 2R)), R = t_E / (6 Δt), with the
localisation SD σ known (given, or pooled over the sample by the covariance formula of Vestergaard et al.
2014). The increments are Gaussian with an MA(1) covariance (variance a = 2DΔt(1 − 2R) + 2σ², neighbour
covariance b = 2DΔtR − σ²; Berglund 2010), so m is a quadratic form with mean a and variance 2(N_s a² + 2
N_adj b²)/(d N_s²), N_adj the number of neighbouring step pairs. Its law is a weighted sum of χ² variables
that differs from the Gamma law with the same mean and variance only in the third moment; that Gamma is the
kernel.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import special

from . import hydro
from ._size_fit import (
    StepLimits,
    _Basis,
    _gamma_shape_scale,
    _log_kernel,
    _lognormal_start,
    _softmax,
    _Tracks,
    _tracks_from_fits,
    choose_and_fit,
    switch_points,
)
from .errors import expected_got

#: Columns of the per-track table from :func:`lag1_track_estimates`.
LAG1_COLUMNS = ("track", "n_points", "n_steps", "n_adjacent_steps", "mean_sq_step_um2", "sigma_um", "D_um2_s")
#: Columns of size_distribution.csv.
SIZE_TABLE_COLUMNS = (
    "diameter_nm",
    "D_um2_s",
    "raw_number_fraction",
    "number_fraction",
    "volume_fraction",
    "intensity_fraction",
    "cumulative_number_fraction",
)
_QUANTILES = (0.1, 0.5, 0.9)
_GRID_STEP_LN = 0.03  # grid spacing in ln d (3 %)
_MODE_PROMINENCE = 0.05  # a mode must rise 5 % of the highest density above the valleys beside it
_MODE_MIN_FRACTION = 0.02


def blur_coefficient(frame_interval_s: float, exposure_s: float) -> float:
    """Motion-blur coefficient R = t_E / (6 Δt) for uniform illumination (Berglund 2010)."""
    return float(exposure_s) / (6.0 * float(frame_interval_s))


def _check_timing(frame_interval_s, exposure_s, n_dims):
    if not (np.isfinite(frame_interval_s) and frame_interval_s > 0):
        raise ValueError(expected_got("frame_interval_s", "> 0", frame_interval_s, "Give seconds per frame."))
    if not (np.isfinite(exposure_s) and 0 <= exposure_s <= frame_interval_s * (1 + 1e-9)):
        raise ValueError(
            expected_got(
                "exposure_s",
                f"between 0 and frame_interval_s={frame_interval_s}",
                exposure_s,
                "Give the shutter-open time per frame.",
            )
        )
    if n_dims not in (1, 2, 3):
        raise ValueError(expected_got("n_dims", "1, 2 or 3", n_dims, "Use 2 for xy tracking."))


# ----------------------------------------------------------------------------------------------------------
# Per-track estimates
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class TrackStepSums:
    """Per-track sums of the lag-1 steps of one track table, from one pass over it (:func:`track_step_sums`).

    Arrays are per track, in the order of ``ids`` (ascending, as :func:`numpy.unique` gives them). A step
    joins consecutive frames of a track with finite coordinates; neighbouring steps share a position.
    ``sum_sq_um2``/``sum_prod_um2`` (squared steps; products of neighbouring steps, summed over axes) come
    from the positions centred on their mean, as :func:`lag1_track_estimates` uses them; the ``uncentred_``
    pair from the positions as given, as :func:`robust_localization_sd_um` uses them. The two differ by
    rounding only; both are kept so that each estimate is what its own pass over the table gives.
    """

    n_rows: int
    n_dims: int
    ids: np.ndarray
    n_points: np.ndarray
    n_steps: np.ndarray
    n_adjacent_steps: np.ndarray
    sum_sq_um2: np.ndarray
    sum_prod_um2: np.ndarray
    uncentred_sum_sq_um2: np.ndarray
    uncentred_sum_prod_um2: np.ndarray


def _position_columns(tracks: pd.DataFrame, n_dims: int) -> list[str]:
    cols = ["x_um", "y_um", "z_um"][:n_dims]
    missing = [c for c in ("track", "frame", *cols) if c not in tracks.columns]
    if missing:
        raise ValueError(
            expected_got(
                "the track table",
                f"columns track, frame, {', '.join(cols)}",
                f"no {missing}",
                "Convert positions to µm first.",
            )
        )
    return cols


def _ordered_runs(tracks: pd.DataFrame) -> tuple[pd.DataFrame, np.ndarray]:
    """Return the table in (track, frame) order and an integer array equal exactly within each track's rows.

    The table is not copied when it is already in order; the array is the track column itself when that is
    of integers.
    """
    from ._msd_kernels import scan_order

    t_all, f_all = tracks["track"].to_numpy(), tracks["frame"].to_numpy()
    if t_all.size == 0:
        return tracks, np.zeros(0, dtype=np.int64)
    if t_all.dtype.kind in "iu" and f_all.dtype.kind in "iu":
        in_order = scan_order(t_all, f_all)[0] == 0
    else:
        new_track = t_all[1:] != t_all[:-1]
        in_order = bool(np.all(t_all[1:] >= t_all[:-1]) and np.all(new_track | (f_all[1:] > f_all[:-1])))
    df = tracks if in_order else tracks.sort_values(["track", "frame"], kind="stable")
    codes = df["track"].to_numpy()
    if codes.dtype.kind not in "iu":
        codes = np.unique(codes, return_inverse=True)[1].reshape(-1)
    return df, codes


def track_step_sums(tracks: pd.DataFrame, *, n_dims: int = 2) -> TrackStepSums:
    """Per-track counts and sums of lag-1 steps in one compiled pass (shared by the sizing estimators).

    Give the result to :func:`lag1_track_estimates`, :func:`robust_localization_sd_um` and
    :func:`size_distribution_of_tracks` of the same table to pass over it once; each returns what it returns
    without it. The sums add in row order, as :func:`numpy.bincount` with weights does.
    """
    from ._msd_kernels import lag1_step_sums

    if n_dims not in (1, 2, 3):
        raise ValueError(expected_got("n_dims", "1, 2 or 3", n_dims, "Use 2 for xy tracking."))
    cols = _position_columns(tracks, n_dims)
    df, codes = _ordered_runs(tracks)
    pos = df[cols].to_numpy(float)
    # centred: float64, no large offsets. numpy.nanmean sums a NaN-free copy with the same reduction that
    # numpy.mean uses, so without NaNs numpy.mean gives the same numbers without the copy
    if not pos.size:
        off = np.zeros(n_dims)
    elif np.isnan(pos).any():
        off = np.nanmean(pos, axis=0)
    else:
        off = np.mean(pos, axis=0)
    c = [pos[:, i] for i in range(n_dims)] + [pos[:, 0]] * (3 - n_dims)
    o = [float(v) for v in off] + [0.0] * (3 - n_dims)
    first, n_points, n_steps, n_adj, sq_c, pr_c, sq_r, pr_r = lag1_step_sums(
        codes, df["frame"].to_numpy(np.int64), c[0], c[1], c[2], n_dims, o[0], o[1], o[2]
    )
    return TrackStepSums(
        n_rows=len(tracks),
        n_dims=n_dims,
        ids=df["track"].to_numpy()[first],
        n_points=n_points,
        n_steps=n_steps,
        n_adjacent_steps=n_adj,
        sum_sq_um2=sq_c,
        sum_prod_um2=pr_c,
        uncentred_sum_sq_um2=sq_r,
        uncentred_sum_prod_um2=pr_r,
    )


def _check_step_sums(step_sums: TrackStepSums, tracks: pd.DataFrame, n_dims: int) -> None:
    if step_sums.n_rows != len(tracks) or step_sums.n_dims != n_dims:
        raise ValueError(
            expected_got(
                "step_sums",
                f"sums of this table ({len(tracks)} rows, n_dims={n_dims})",
                f"sums of {step_sums.n_rows} rows, n_dims={step_sums.n_dims}",
                "Compute them with track_step_sums of the same table, or leave step_sums out.",
            )
        )


def lag1_track_estimates(
    tracks: pd.DataFrame,
    *,
    frame_interval_s: float,
    exposure_s: float,
    n_dims: int = 2,
    localization_sd_um=None,
    step_sums: TrackStepSums | None = None,
) -> pd.DataFrame:
    """Per-track D from the mean squared lag-1 step with the localisation offset and blur removed.

    Parameters
    ----------
    tracks : DataFrame
        Columns track, frame, x_um, y_um (z_um for n_dims=3); an optional column localization_sd_um gives the
        per-position localisation SD. Only steps between consecutive frames are used (gaps split the steps).
    frame_interval_s : float, s
    exposure_s : float, s
        Shutter-open time (0 = instantaneous); sets R = t_E/(6Δt).
    n_dims : int, default=2
    localization_sd_um : float, Series (indexed by track) or dict, µm, optional
        Static localisation SD per axis. When not given (and not in the table) it is estimated once for the
        whole sample from all tracks, σ̂² = R⟨Δx²⟩ + (2R − 1)⟨Δx_k Δx_k+1⟩ (Vestergaard et al. 2014), which is
        unbiased whatever each track's D.
    step_sums : TrackStepSums, optional
        :func:`track_step_sums` of this table, when already computed (the result is the same).

    Returns
    -------
    DataFrame
        Columns track, n_points, n_steps, n_adjacent_steps, mean_sq_step_um2 (per axis), sigma_um, D_um2_s.
        ``.attrs["sigma_source"]`` says where σ came from. D̂ can be negative for tiny D; keep it.

    Notes
    -----
    D̂ = (⟨Δx²⟩ − 2σ²) / (2Δt(1 − 2R)) is unbiased (E⟨Δx²⟩ = 2DΔt(1 − 2R) + 2σ², Berglund 2010) and, for
    σ² ≪ DΔt, within a few % of the Cramér–Rao bound; its distribution is known exactly, which is what the
    deconvolution in :func:`size_distribution` needs.

    References
    ----------
    A. J. Berglund, Phys. Rev. E 82, 011917 (2010), doi:10.1103/PhysRevE.82.011917.
    C. L. Vestergaard, P. C. Blainey & H. Flyvbjerg, Phys. Rev. E 89, 022726 (2014),
    doi:10.1103/PhysRevE.89.022726.
    """
    _check_timing(frame_interval_s, exposure_s, n_dims)
    if step_sums is None:
        step_sums = track_step_sums(tracks, n_dims=n_dims)
    _check_step_sums(step_sums, tracks, n_dims)
    ids, n_tr = step_sums.ids, step_sums.ids.size
    n_points, n_steps, n_adj = step_sums.n_points, step_sums.n_steps, step_sums.n_adjacent_steps
    with np.errstate(invalid="ignore", divide="ignore"):
        m0 = step_sums.sum_sq_um2 / (n_dims * n_steps)
        m1 = step_sums.sum_prod_um2 / (n_dims * n_adj)
    R = blur_coefficient(frame_interval_s, exposure_s)

    sigma2 = np.full(n_tr, np.nan)
    source = "pooled"
    if localization_sd_um is not None:
        if np.isscalar(localization_sd_um):
            sigma2[:] = float(localization_sd_um) ** 2
        else:
            mapped = pd.Series(localization_sd_um).reindex(ids).to_numpy(float)
            sigma2 = mapped**2
        source = "given"
    elif "localization_sd_um" in tracks.columns:
        df, _ = _ordered_runs(tracks)
        inv = np.repeat(np.arange(n_tr), n_points)
        s2 = df["localization_sd_um"].to_numpy(float) ** 2
        good = np.isfinite(s2)
        sigma2 = np.bincount(inv[good], weights=s2[good], minlength=n_tr) / np.maximum(
            np.bincount(inv[good], minlength=n_tr), 1
        )
        sigma2[np.bincount(inv[good], minlength=n_tr) == 0] = np.nan
        source = "table"
    missing_sigma = ~np.isfinite(sigma2)
    if np.any(missing_sigma):
        use = (n_adj > 0) & (n_steps > 0)
        if np.any(use):
            per_track = R * m0[use] + (2 * R - 1) * m1[use]
            pooled = max(float(np.sum(n_steps[use] * per_track) / np.sum(n_steps[use])), 0.0)
        else:
            pooled = 0.0
        sigma2[missing_sigma] = pooled
        if source != "pooled":
            source += "+pooled"
    with np.errstate(invalid="ignore"):
        D = (m0 - 2 * sigma2) / (2 * frame_interval_s * (1 - 2 * R))
    out = pd.DataFrame(
        {
            "track": ids,
            "n_points": n_points.astype(np.int64),
            "n_steps": n_steps.astype(np.int64),
            "n_adjacent_steps": n_adj.astype(np.int64),
            "mean_sq_step_um2": m0,
            "sigma_um": np.sqrt(sigma2),
            "D_um2_s": D,
        }
    )
    out.attrs["sigma_source"] = source
    return out


def apparent_size_quantiles(n_steps: int, *, n_dims: int = 2, quantiles=_QUANTILES) -> np.ndarray:
    """Quantiles of per-track sizes of identical particles, in units of the true size ("fake polydispersity").

    Without localisation noise or blur, D̂ from N_s lag-1 steps is Gamma(shape d N_s / 2, scale 2D/(d N_s))
    (Saxton 1997), so the size d̂ = d D / D̂ has quantile q at d / G_{1−q}.

    Examples
    --------
    >>> [round(float(v), 3) for v in apparent_size_quantiles(10)]
    [0.704, 1.034, 1.607]
    """
    k = n_dims * n_steps / 2.0
    # the Gamma(k, scale 1/k) quantile: the regularised incomplete gamma function inverted, times the scale
    # (what scipy.stats.gamma(a=k, scale=1/k).ppf computes, without importing scipy.stats)
    return 1.0 / (special.gammaincinv(k, 1.0 - np.asarray(quantiles, dtype=float)) * (1.0 / k))


# ----------------------------------------------------------------------------------------------------------
# Summaries of a distribution on a grid
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class SizeStatistics:
    """Summary of one weighting of a size distribution (number, volume, intensity or the raw histogram)."""

    modes_nm: tuple[float, ...]
    mode_fractions: tuple[float, ...]
    mean_nm: float
    d10_nm: float
    d50_nm: float
    d90_nm: float
    span: float

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (non-finite numbers become None)."""
        return {k: _clean(getattr(self, k)) for k in self.__dataclass_fields__}


def _clean(v):
    if isinstance(v, (tuple, list, np.ndarray)):
        return [_clean(x) for x in v]
    if isinstance(v, (float, np.floating)):
        return float(v) if math.isfinite(v) else None
    if isinstance(v, np.integer):
        return int(v)
    return v


_NAN_STATS = SizeStatistics((), (), math.nan, math.nan, math.nan, math.nan, math.nan)


def grid_quantiles_nm(diameter_nm, fractions, quantiles=_QUANTILES) -> np.ndarray:
    """Quantiles of a distribution given as fractions on a log-spaced diameter grid.

    Each grid cell spreads its fraction uniformly in ln d between the midpoints to its neighbours; the CDF is
    interpolated linearly in ln d.
    """
    u = np.log(np.asarray(diameter_nm, dtype=float))
    f = np.asarray(fractions, dtype=float)
    f = f / f.sum()
    edges = np.concatenate([[1.5 * u[0] - 0.5 * u[1]], 0.5 * (u[1:] + u[:-1]), [1.5 * u[-1] - 0.5 * u[-2]]])
    cdf = np.concatenate([[0.0], np.cumsum(f)])
    keep = np.concatenate([[True], np.diff(cdf) > 0])  # strictly increasing for interpolation
    return np.exp(np.interp(np.asarray(quantiles, dtype=float), cdf[keep], edges[keep]))


def weighted_fractions(diameter_nm, number_fraction, power: int) -> np.ndarray:
    """Convert number fractions to d^power weighting (3: volume, 6: Rayleigh intensity; ISO 9276-1)."""
    d = np.asarray(diameter_nm, dtype=float)
    q = np.asarray(number_fraction, dtype=float) * (d / d.max()) ** power
    return q / q.sum()


def _prominent_peaks(x: np.ndarray, min_prominence: float) -> np.ndarray:
    """Return the local maxima of ``x`` (indices) whose topographic prominence is at least ``min_prominence``.

    A maximum is a sample higher than its left neighbour and than the first different sample to its right (a
    flat top counts once, at its middle, rounded down; the end samples are never maxima). Its prominence is
    its height above the higher of the lowest points on either side before the signal rises above it or
    ends. These are the definitions of ``scipy.signal.find_peaks`` with ``prominence`` (the reference of the
    tests), written out for the ~160-point size grids so that a run need not import scipy.signal.
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    peaks = []
    i = 1
    while i < n - 1:
        if x[i - 1] < x[i]:
            ahead = i + 1
            while ahead < n - 1 and x[ahead] == x[i]:
                ahead += 1
            if x[ahead] < x[i]:
                peaks.append((i + ahead - 1) // 2)
                i = ahead
        i += 1
    keep = []
    for p in peaks:
        top = x[p]
        left_min = top
        j = p
        while j >= 0 and x[j] <= top:
            left_min = min(left_min, x[j])
            j -= 1
        right_min = top
        j = p
        while j < n and x[j] <= top:
            right_min = min(right_min, x[j])
            j += 1
        if top - max(left_min, right_min) >= min_prominence:
            keep.append(p)
    return np.asarray(keep, dtype=np.intp)


def _modes(diameter_nm, fractions):
    f = np.asarray(fractions, dtype=float)
    if f.size < 3 or not np.any(f > 0):
        return (), ()
    padded = np.concatenate([[0.0], f, [0.0]])
    peaks = _prominent_peaks(padded, _MODE_PROMINENCE * f.max())
    peaks = peaks - 1
    if peaks.size == 0:
        peaks = np.array([int(np.argmax(f))])
    # split the mass at the lowest point between neighbouring peaks
    bounds = [0]
    for p, q in zip(peaks[:-1], peaks[1:], strict=True):
        bounds.append(p + int(np.argmin(f[p : q + 1])))
    bounds.append(f.size)
    masses = np.array([f[bounds[i] : bounds[i + 1]].sum() for i in range(peaks.size)])
    keep = masses >= _MODE_MIN_FRACTION
    if not np.any(keep):
        keep = masses == masses.max()
    peaks, masses = peaks[keep], masses[keep]
    masses = masses / masses.sum()
    d = np.asarray(diameter_nm, dtype=float)
    return tuple(float(d[p]) for p in peaks), tuple(float(x) for x in masses)


def size_statistics(diameter_nm, fractions) -> SizeStatistics:
    """Modes, mean, D10/D50/D90 and span of a distribution given as fractions on a log diameter grid."""
    d = np.asarray(diameter_nm, dtype=float)
    f = np.asarray(fractions, dtype=float)
    if f.sum() <= 0:
        return _NAN_STATS
    f = f / f.sum()
    d10, d50, d90 = grid_quantiles_nm(d, f)
    modes, mode_fractions = _modes(d, f)
    return SizeStatistics(
        modes_nm=modes,
        mode_fractions=mode_fractions,
        mean_nm=float(np.sum(f * d)),
        d10_nm=float(d10),
        d50_nm=float(d50),
        d90_nm=float(d90),
        span=float((d90 - d10) / d50),
    )


def _weighted_quantile(values, weights, quantiles):
    order = np.argsort(values)
    v, w = values[order], weights[order]
    cdf = (np.cumsum(w) - 0.5 * w) / w.sum()
    return np.interp(quantiles, cdf, v)


# ----------------------------------------------------------------------------------------------------------
# The public result and entry point
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class SizeDistribution:
    """Hydrodynamic size distribution of a sample.

    ``number`` is the deconvolved number-weighted distribution; ``volume`` (∝ d³ q₀) and ``intensity``
    (∝ d⁶ q₀, Rayleigh scattering) are conversions of it (ISO 9276-1); ``raw`` summarises the histogram of
    per-track sizes (what a naive tool shows). ``table`` is size_distribution.csv. The sample size
    (``sample_diameter_nm``) is Stokes–Einstein of the pooled D over all steps, not a mean of sizes.
    """

    status: str  # ok | too_few_tracks
    n_tracks: int
    n_tracks_used: int
    sample_D_um2_s: float
    sample_D_ci95_um2_s: tuple[float, float]
    sample_diameter_nm: float
    sample_diameter_ci95_nm: tuple[float, float]
    number: SizeStatistics
    volume: SizeStatistics
    intensity: SizeStatistics
    raw: SizeStatistics
    table: pd.DataFrame
    method: dict[str, Any] = field(default_factory=dict)

    @property
    def modes_nm(self) -> tuple[float, ...]:
        """Modes of the number distribution, nm."""
        return self.number.modes_nm

    @property
    def mean_nm(self) -> float:
        """Number-weighted mean diameter, nm."""
        return self.number.mean_nm

    @property
    def d10_nm(self) -> float:
        """Number-weighted D10, nm."""
        return self.number.d10_nm

    @property
    def d50_nm(self) -> float:
        """Number-weighted D50 (median), nm."""
        return self.number.d50_nm

    @property
    def d90_nm(self) -> float:
        """Number-weighted D90, nm."""
        return self.number.d90_nm

    @property
    def span(self) -> float:
        """(D90 − D10) / D50 of the number distribution."""
        return self.number.span

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (for summary.json); the grid itself is in ``table``."""
        return {
            "status": self.status,
            "n_tracks": self.n_tracks,
            "n_tracks_used": self.n_tracks_used,
            "sample_D_um2_s": _clean(self.sample_D_um2_s),
            "sample_D_ci95_um2_s": _clean(self.sample_D_ci95_um2_s),
            "sample_diameter_nm": _clean(self.sample_diameter_nm),
            "sample_diameter_ci95_nm": _clean(self.sample_diameter_ci95_nm),
            "number": self.number.to_dict(),
            "volume": self.volume.to_dict(),
            "intensity": self.intensity.to_dict(),
            "raw_per_track": self.raw.to_dict(),
            "method": {k: _clean(v) for k, v in self.method.items()},
        }


def _empty_table() -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype="float64") for c in SIZE_TABLE_COLUMNS})


def size_distribution(
    track_fits: pd.DataFrame,
    *,
    temperature_c: float,
    viscosity_mpa_s: float,
    frame_interval_s: float,
    exposure_s: float,
    n_dims: int = 2,
    localization_sd_um: float | None = None,
    wall_distance_um: float | None = None,
    weighting: str = "time",
    diameter_grid_nm: np.ndarray | None = None,
    max_step_um: float | None = None,
    step_loss_per_um2: float = 0.0,
    rng=0,
) -> SizeDistribution:
    """Deconvolve per-track estimates into the number, volume and intensity size distributions of a sample.

    Parameters
    ----------
    track_fits : DataFrame
        One row per track, best the table of :func:`lag1_track_estimates` (columns n_steps, n_adjacent_steps,
        mean_sq_step_um2, sigma_um, D_um2_s, n_points): the kernel is then exact. Any table with D_um2_s and
        n_points (and sigma_um) works, its D being treated as a lag-1 estimate (too-narrow kernel, and so some
        residual spread, if it came from a noisier estimator).
    temperature_c : float, °C
    viscosity_mpa_s : float, mPa·s
    frame_interval_s, exposure_s : float, s
    n_dims : int, default=2
    localization_sd_um : float, µm, optional
        Overrides the table's sigma_um.
    wall_distance_um : float, µm, optional
        Distance of the particle centres from the coverslip: the grid maps size to measured D with Faxén's
        parallel factor.
    weighting : {"time", "track"}, default="time"
        "time" weights each track by its number of positions: the count of particles seen at any instant,
        which does not favour particles that cross the field (or lose their track) more often — small, fast
        ones. "track" counts every track once.
    diameter_grid_nm : array, nm, optional
        Log-spaced grid; by default 3 % steps spanning the per-track estimates with margins.
    max_step_um : float, µm, optional
        Joining radius of the linking that made the tracks (2-D): no kept step is longer, so the kernel
        uses steps truncated there. None: no limit (tracks not from msdkit's linking, or simulated).
    step_loss_per_um2 : float, 1/µm², default=0
        λ of the linking's step loss: a true step of squared length r² is kept with probability ∝
        exp(−λ r²), because a nearer spot can take the join (see :func:`linking_step_limits`). Fast
        particles lose relatively more of their steps, so without it they read slow (large).
    rng : int, Generator or None, default=0
        Assigns tracks to the cross-validation folds.

    Returns
    -------
    SizeDistribution

    Notes
    -----
    The number fractions w_k on the grid maximise Σ_i ω_i log Σ_k w_k p(y_i | D_k, N_i, σ_i, R) − (λW/2)
    ∫ (d³ ln w / du³)² du, u = ln d, with the Gamma kernel of the module docstring. The penalty is zero for
    every log-normal (ln w quadratic in u), so strong penalties fit the best log-normal and weak ones allow
    several modes. λ is chosen by 5-fold cross-validation on held-out tracks' log-likelihood, over decades
    from 10 down to 1e-6 (on to 1e-8 while the weakest keeps winning clearly), with the one-SE rule (the
    strongest penalty within one SE of the best score; Hastie, Tibshirani & Friedman 2009, §7.10). Below
    50 tracks the best log-normal is used. The objective is the mixture likelihood that
    expectation–maximisation (Dempster et al. 1977) maximises; here by quasi-Newton steps on θ = ln w.

    Modes are maxima of the density on the ln d axis (a log-normal peaks at its median there) that rise at
    least 5 % of the highest density above the valleys beside them and hold at least 2 % of the number;
    ``mode_fractions`` split the distribution at the lowest point between neighbouring modes.

    References
    ----------
    A. P. Dempster, N. M. Laird & D. B. Rubin, J. R. Stat. Soc. B 39, 1 (1977).
    P. Saveyn et al., J. Colloid Interface Sci. 352, 593 (2010), doi:10.1016/j.jcis.2010.09.006.
    K. S. Silmore, X. Gong, M. S. Strano & J. W. Swan, ACS Nano 13, 3940 (2019), doi:10.1021/acsnano.8b07215.
    ISO 9276-1:1998, Representation of results of particle size analysis.
    """
    _check_timing(frame_interval_s, exposure_s, n_dims)
    dt = float(frame_interval_s)
    R = blur_coefficient(dt, exposure_s)
    se_kw = dict(temperature_c=temperature_c, viscosity_mpa_s=viscosity_mpa_s)
    tr, kernel, n_dropped = _tracks_from_fits(track_fits, dt, R, n_dims, localization_sd_um, weighting)
    n_total = len(track_fits)
    n_used = int(tr.y.size)
    method: dict[str, Any] = {
        "kernel": kernel,
        "weighting": weighting,
        "n_dims": n_dims,
        "blur_coefficient": R,
        "localization_sd_um": float(np.sqrt(np.median(tr.s2))) if n_used else math.nan,
        "tracks_without_estimate": n_dropped,
        "wall_distance_um": wall_distance_um,
        "max_step_um": max_step_um,
        "step_loss_per_um2": float(step_loss_per_um2),
    }

    def to_bulk(D):
        if wall_distance_um is None:
            return np.asarray(D, dtype=float)
        return np.asarray(hydro.wall_corrected_D_um2_s(D, wall_distance_um=wall_distance_um, **se_kw))

    # sample D: pooled over all steps, with a sandwich SE across tracks
    if n_used >= 2:
        Dbar = float(np.sum(tr.n * tr.D) / np.sum(tr.n))
        se = float(np.sqrt(np.sum(tr.n**2 * (tr.D - Dbar) ** 2) / np.sum(tr.n) ** 2 * n_used / (n_used - 1)))
        D_ci = (Dbar - hydro.Z95 * se, Dbar + hydro.Z95 * se)
    else:
        Dbar, D_ci = (float(tr.D[0]) if n_used else math.nan), (math.nan, math.nan)
    bulk = to_bulk([Dbar, D_ci[1], D_ci[0]])
    with np.errstate(invalid="ignore"):
        diam = np.asarray(hydro.stokes_einstein_diameter_nm(bulk, **se_kw), dtype=float)
    sample_d, sample_ci = float(diam[0]), (float(diam[1]), float(diam[2]) if D_ci[0] > 0 else math.inf)

    if n_used < 3 or np.sum(tr.D > 0) < 2:
        return SizeDistribution(
            status="too_few_tracks",
            n_tracks=n_total,
            n_tracks_used=n_used,
            sample_D_um2_s=Dbar,
            sample_D_ci95_um2_s=D_ci,
            sample_diameter_nm=sample_d,
            sample_diameter_ci95_nm=sample_ci,
            number=_NAN_STATS,
            volume=_NAN_STATS,
            intensity=_NAN_STATS,
            raw=_NAN_STATS,
            table=_empty_table(),
            method=method,
        )

    # per-track naive sizes (for the raw histogram)
    pos = tr.D > 0
    raw_d = np.full(n_used, np.nan)
    with np.errstate(invalid="ignore"):
        raw_d[pos] = hydro.stokes_einstein_diameter_nm(to_bulk(tr.D[pos]), **se_kw)
    raw_ok = np.isfinite(raw_d)

    # grid
    if diameter_grid_nm is None:
        # range from tracks long enough to locate sizes (1–4-step estimates scatter by factors of several)
        informative = pos & (tr.n >= 5)
        qlo, qhi = np.quantile(tr.D[informative if np.sum(informative) >= 20 else pos], [0.005, 0.995])
        d_small = float(hydro.stokes_einstein_diameter_nm(3.0 * qhi, **se_kw))
        d_large = float(hydro.stokes_einstein_diameter_nm(qlo / 3.0, **se_kw))
        if wall_distance_um is not None:
            d_small *= 0.5
            d_large = min(d_large, 2e3 * wall_distance_um * 0.9)
        n_grid = int(np.clip(np.ceil(np.log(d_large / d_small) / _GRID_STEP_LN) + 1, 40, 400))
        grid = np.exp(np.linspace(np.log(d_small), np.log(d_large), n_grid))
    else:
        grid = np.sort(np.asarray(diameter_grid_nm, dtype=float))
    u = np.log(grid)
    step = float(np.mean(np.diff(u)))
    D_grid = np.asarray(hydro.stokes_einstein_D_um2_s(grid / 2, **se_kw), dtype=float)
    if wall_distance_um is not None:
        D_grid = D_grid * np.asarray(hydro.faxen_parallel_factor(wall_distance_um * 1e3 / (grid / 2)))

    limits = StepLimits(max_step_um=max_step_um, loss_per_um2=float(step_loss_per_um2))
    logk = _log_kernel(D_grid, tr, dt, R, n_dims, limits)
    row_max = logk.max(axis=1)
    L = np.exp(logk - row_max[:, None])
    weight = tr.weight / tr.weight.mean()
    basis = _Basis(u)
    params0 = _lognormal_start(
        grid.size, tr, lambda D: np.log(hydro.stokes_einstein_diameter_nm(to_bulk(D), **se_kw)), step
    )

    theta, cv_info = choose_and_fit(L, row_max, weight, basis, params0, rng=rng)
    method.update(cv_info)
    number = _softmax(theta)
    method.update({"grid_step_ln": step, "n_grid": int(grid.size)})

    # raw histogram on the same cells
    edges = np.concatenate([[u[0] - step / 2], 0.5 * (u[1:] + u[:-1]), [u[-1] + step / 2]])
    idx = np.clip(np.searchsorted(edges, np.log(raw_d[raw_ok])) - 1, 0, grid.size - 1)
    raw_hist = np.bincount(idx, weights=tr.weight[raw_ok], minlength=grid.size)
    raw_hist = raw_hist / raw_hist.sum()

    volume = weighted_fractions(grid, number, 3)
    intensity = weighted_fractions(grid, number, 6)
    table = pd.DataFrame(
        {
            "diameter_nm": grid,
            "D_um2_s": D_grid,
            "raw_number_fraction": raw_hist,
            "number_fraction": number,
            "volume_fraction": volume,
            "intensity_fraction": intensity,
            "cumulative_number_fraction": np.cumsum(number),
        }
    )
    rq = _weighted_quantile(raw_d[raw_ok], tr.weight[raw_ok], np.array(_QUANTILES))
    raw_modes = _modes(grid, raw_hist)
    raw = SizeStatistics(
        modes_nm=raw_modes[0],
        mode_fractions=raw_modes[1],
        mean_nm=float(np.average(raw_d[raw_ok], weights=tr.weight[raw_ok])),
        d10_nm=float(rq[0]),
        d50_nm=float(rq[1]),
        d90_nm=float(rq[2]),
        span=float((rq[2] - rq[0]) / rq[1]),
    )
    return SizeDistribution(
        status="ok",
        n_tracks=n_total,
        n_tracks_used=n_used,
        sample_D_um2_s=Dbar,
        sample_D_ci95_um2_s=D_ci,
        sample_diameter_nm=sample_d,
        sample_diameter_ci95_nm=sample_ci,
        number=size_statistics(grid, number),
        volume=size_statistics(grid, volume),
        intensity=size_statistics(grid, intensity),
        raw=raw,
        table=table,
        method=method,
    )


#: Share of the spot density that competes for a track's next position (λ = this × π × spots per µm² per
#: frame); calibrated on simulated movies with known truth (benchmarks/movie_sizing.py).
COMPETING_SPOT_SHARE = 0.15
#: Rounds of cutting tracks at size changes and refitting (each uses the previous round's distribution).
_SPLIT_ROUNDS = 2


def linking_step_limits(*, max_step_um: float | None, spots_per_um2: float | None) -> dict[str, Any]:
    """Kernel settings that describe what frame-to-frame linking does to the steps it keeps (2-D).

    A linker joins a track end to one spot of the next frame and cannot join beyond its radius
    ``max_step_um``. A true step of length r is also lost when another spot nearer than r takes the join;
    with competitors scattered like a Poisson process of density ρ_c, the chance that none lies within r
    is exp(−π ρ_c r²) (nearest-neighbour law of a Poisson process; Chandrasekhar 1943, Rev. Mod. Phys.
    15:1, §7 — from memory). Kept steps of a particle with per-axis step variance a are then exponential in
    r² with mean 1/(1/(2a) + λ), λ = π ρ_c, truncated at ``max_step_um``²: fast particles lose relatively
    more, so untreated they read slow. ρ_c = COMPETING_SPOT_SHARE × the spot density, calibrated on
    simulated movies (benchmarks/movie_sizing.py): not every spot competes, most are claimed by their own
    predecessor.

    Returns
    -------
    dict with ``max_step_um`` and ``step_loss_per_um2`` for :func:`size_distribution`.
    """
    lam = 0.0
    if spots_per_um2 is not None and np.isfinite(spots_per_um2) and spots_per_um2 > 0:
        lam = COMPETING_SPOT_SHARE * math.pi * float(spots_per_um2)
    ok = max_step_um is not None and np.isfinite(max_step_um) and max_step_um > 0
    return {"max_step_um": float(max_step_um) if ok else None, "step_loss_per_um2": lam}


def robust_localization_sd_um(
    tracks: pd.DataFrame,
    *,
    frame_interval_s: float,
    exposure_s: float,
    n_dims: int = 2,
    min_adjacent_steps: int = 10,
    step_sums: TrackStepSums | None = None,
) -> float:
    """Localisation SD per axis as the median over tracks of each track's covariance-based estimate.

    Each track gives σ̂² = R⟨Δx²⟩ + (2R − 1)⟨Δx_k Δx_k+1⟩ (Vestergaard et al. 2014); the median over tracks
    with at least ``min_adjacent_steps`` neighbouring step pairs, each weighted by that number, is robust to
    the few tracks whose neighbouring steps are anti-correlated by a linker's back-and-forth joins between two
    nearby particles (the pooled estimate reads up to ~40 % high on simulated 80 + 250 nm movies). Falls back
    to the pooled estimate over all tracks when fewer than 20 tracks are that long. ``step_sums``:
    :func:`track_step_sums` of this table, when already computed.

    References
    ----------
    C. L. Vestergaard, P. C. Blainey & H. Flyvbjerg, Phys. Rev. E 89, 022726 (2014).
    """
    s2, step_sums = _covariance_sigma2(tracks, step_sums, frame_interval_s, exposure_s, n_dims)
    n, m = step_sums.n_steps, step_sums.n_adjacent_steps
    use = m >= min_adjacent_steps
    if np.sum(use) < 20:
        some = (m > 0) & (n > 0)
        return math.sqrt(max(float(np.sum(n[some] * s2[some]) / max(np.sum(n[some]), 1)), 0.0))
    return math.sqrt(max(_weighted_median(s2[use], m[use]), 0.0))


def _covariance_sigma2(tracks, step_sums, frame_interval_s, exposure_s, n_dims):
    """Each track's covariance-based σ̂² = R⟨Δx²⟩ + (2R − 1)⟨Δx_k Δx_k+1⟩, and the table's step sums.

    Checks the timing and ``step_sums`` (computed here when None) against the table.
    """
    _check_timing(frame_interval_s, exposure_s, n_dims)
    if step_sums is None:
        step_sums = track_step_sums(tracks, n_dims=n_dims)
    _check_step_sums(step_sums, tracks, n_dims)
    n, m = step_sums.n_steps, step_sums.n_adjacent_steps
    m0 = step_sums.uncentred_sum_sq_um2 / (n_dims * np.maximum(n, 1))
    m1 = step_sums.uncentred_sum_prod_um2 / (n_dims * np.maximum(m, 1))
    R = blur_coefficient(frame_interval_s, exposure_s)
    return R * m0 + (2 * R - 1) * m1, step_sums


def precision_scaled_sd_um(
    tracks: pd.DataFrame,
    *,
    frame_interval_s: float,
    exposure_s: float,
    n_dims: int = 2,
    min_adjacent_steps: int = 10,
    precision_column: str = "precision_um",
    step_sums: TrackStepSums | None = None,
) -> pd.Series | None:
    """Per-track localisation SD: each track's spot-fit precision, scaled to the level its steps show.

    A movie's particles differ in brightness (size, labelling, height in the focal depth), and so in how well
    they are localised; one σ for every track over-corrects the bright ones (too small a D, too large a size)
    and under-corrects the dim ones. The spot fit's precision (photon statistics) ranks the tracks but misses
    what else moves a spot (motion blur of its shape, neighbours, background), which the steps measure. With
    p_i² the mean squared precision of track i's spots and σ̂_i² its covariance-based estimate (as in
    :func:`robust_localization_sd_um`; Vestergaard et al. 2014), each track gets

        σ_i = c p_i,   c² = median over tracks of σ̂_i² / p_i²,

    the median taken over tracks of at least ``min_adjacent_steps`` neighbouring step pairs, weighted by
    their numbers of step pairs. Each ratio estimates c² without bias whatever the track's brightness, so c is
    right for any mix of bright and dim particles (a median of σ̂² over a mix lands between the groups).
    Tracks without a precision get c × the median precision. On simulated 80 + 250 nm mixtures the 250 nm
    mode moves from −1…+13 % to +2…+5 % of the truth (README, "Sizing on movies").

    Returns
    -------
    Series indexed by track (µm), or None when the table has no usable ``precision_column`` or fewer than 20
    tracks that long (then use :func:`robust_localization_sd_um`).

    References
    ----------
    C. L. Vestergaard, P. C. Blainey & H. Flyvbjerg, Phys. Rev. E 89, 022726 (2014).
    """
    if precision_column not in tracks.columns:
        return None
    s2, step_sums = _covariance_sigma2(tracks, step_sums, frame_interval_s, exposure_s, n_dims)
    m = step_sums.n_adjacent_steps
    p2 = pd.Series(tracks[precision_column].to_numpy(float) ** 2, index=tracks["track"].to_numpy())
    p2 = p2[np.isfinite(p2.to_numpy()) & (p2.to_numpy() > 0)].groupby(level=0).mean()
    p2 = p2.reindex(step_sums.ids).to_numpy(float)
    use = (m >= min_adjacent_steps) & np.isfinite(p2)
    if np.sum(use) < 20:
        return None
    w = m[use].astype(float)
    c2 = _weighted_median(s2[use] / p2[use], w)
    if not c2 > 0:
        return None
    p2 = np.where(np.isfinite(p2), p2, _weighted_median(p2[use], w))
    return pd.Series(np.sqrt(c2 * p2), index=step_sums.ids)


def _weighted_median(x: np.ndarray, w: np.ndarray) -> float:
    """Return the value at which the cumulative weight of the sorted values first reaches half."""
    order = np.argsort(x)
    cum = np.cumsum(w[order]) / np.sum(w)
    return float(x[order][np.searchsorted(cum, 0.5)])


def _segment_table(tracks, per_track, cut_at_position, order_cols):
    """Tracks cut into segments: a new segment starts at each flagged position (shared with the old one)."""
    df = tracks
    new_track = np.r_[True, df["track"].to_numpy()[1:] != df["track"].to_numpy()[:-1]]
    seg = np.cumsum(new_track | cut_at_position) - 1
    out = df[order_cols].copy()
    out["source_track"] = df["track"].to_numpy()
    out["track"] = seg
    dup = out[cut_at_position].copy()
    dup["track"] = dup["track"] - 1
    both = pd.concat([out, dup], ignore_index=True).sort_values(["track", "frame"], kind="stable")
    return both.reset_index(drop=True)


#: Fewest cuts, as a share of the tracks, for which size_distribution_of_tracks refits on the cut segments.
_MIN_CUT_SHARE = 0.005


def size_distribution_of_tracks(
    tracks: pd.DataFrame,
    *,
    temperature_c: float,
    viscosity_mpa_s: float,
    frame_interval_s: float,
    exposure_s: float,
    n_dims: int = 2,
    localization_sd_um=None,
    wall_distance_um: float | None = None,
    weighting: str = "time",
    max_step_um: float | None = None,
    step_loss_per_um2: float = 0.0,
    split_wrong_joins: bool = True,
    switch_probability: float = 0.05,
    rng=0,
    step_sums: TrackStepSums | None = None,
) -> tuple[SizeDistribution, pd.DataFrame]:
    """Size distribution of a sample straight from its tracks, robust to wrong joins between particles.

    1. :func:`lag1_track_estimates` per track and :func:`size_distribution` of them.
    2. When ``split_wrong_joins``: each track is cut where its most probable sequence of particle sizes
       changes (:func:`msdkit._size_fit.switch_points`, a hidden-state model in which a linker continues a
       track with another particle with probability ``switch_probability`` per step, the new particle's size
       drawn from the distribution of step 1), and the distribution is fitted again on the pieces. Repeated
       once with the refined distribution. A track that holds a small and a large particle otherwise counts
       as one particle of intermediate size and merges the modes of a mixture. In a sample of one size a
       change of particle changes nothing and no cut is made.

    Parameters
    ----------
    tracks : DataFrame
        Columns track, frame, x_um, y_um. Use every track of two or more positions: short tracks are mostly
        small, fast particles, and the kernel takes each track's own number of steps.
    localization_sd_um : float, µm, optional
        Default: :func:`robust_localization_sd_um` of the tracks.
    max_step_um, step_loss_per_um2 : see :func:`size_distribution` and :func:`linking_step_limits`.
    step_sums : TrackStepSums, optional
        :func:`track_step_sums` of this table, when already computed (computed once here otherwise).
    Other parameters: as :func:`size_distribution` and :func:`lag1_track_estimates`.

    Returns
    -------
    (SizeDistribution, DataFrame)
        The distribution and the per-track table of :func:`lag1_track_estimates` (whole tracks, for
        per-track sizes). ``method`` records ``n_segments`` and ``n_cuts``.
    """
    kw = dict(frame_interval_s=frame_interval_s, exposure_s=exposure_s, n_dims=n_dims)
    dist_kw = dict(
        temperature_c=temperature_c,
        viscosity_mpa_s=viscosity_mpa_s,
        wall_distance_um=wall_distance_um,
        weighting=weighting,
        max_step_um=max_step_um,
        step_loss_per_um2=step_loss_per_um2,
        rng=rng,
        **kw,
    )
    if step_sums is None:
        step_sums = track_step_sums(tracks, n_dims=n_dims)
    if localization_sd_um is None:
        localization_sd_um = robust_localization_sd_um(tracks, step_sums=step_sums, **kw)
    per_track = lag1_track_estimates(tracks, localization_sd_um=localization_sd_um, step_sums=step_sums, **kw)
    dist = size_distribution(per_track, **dist_kw)
    method_extra: dict[str, Any] = {"split_wrong_joins": bool(split_wrong_joins), "n_cuts": 0}
    if not split_wrong_joins or dist.status != "ok" or len(dist.modes_nm) == 0:
        return _with_method(dist, method_extra), per_track
    if not 0 < switch_probability < 0.5:
        raise ValueError(
            expected_got("switch_probability", "between 0 and 0.5", switch_probability, "Use about 0.05.")
        )
    from ._msd_kernels import lag1_steps

    cols = ["x_um", "y_um", "z_um"][:n_dims]
    df, codes = _ordered_runs(tracks)
    ids = step_sums.ids
    c = [df[col].to_numpy(float) for col in cols]
    c += [c[0]] * (3 - n_dims)
    # each valid step: per-axis mean square, index of its track in ids, row where it starts
    y, step_track, step_start = lag1_steps(codes, df["frame"].to_numpy(np.int64), c[0], c[1], c[2], n_dims)
    sigma = per_track["sigma_um"].to_numpy(float)  # per_track rows are in the order of ids
    s2 = np.nan_to_num(sigma, nan=0.0) ** 2
    dt = float(frame_interval_s)
    R = blur_coefficient(dt, exposure_s)
    limits = StepLimits(max_step_um=max_step_um, loss_per_um2=float(step_loss_per_um2))
    sigma_by_source = pd.Series(sigma, index=ids)
    n_cuts_prev = -1
    for _ in range(_SPLIT_ROUNDS):
        table = dist.table
        D_all = table["D_um2_s"].to_numpy(float)
        w_all = table["number_fraction"].to_numpy(float)
        n_coarse = int(np.ceil(D_all.size / 2))
        D_states = np.array([D_all[2 * i : 2 * i + 2].mean() for i in range(n_coarse)])
        w_states = np.array([w_all[2 * i : 2 * i + 2].sum() for i in range(n_coarse)])
        cut_step = switch_points(
            y,
            step_track,
            s2,
            D_states,
            w_states,
            dt=dt,
            R=R,
            n_dims=n_dims,
            limits=limits,
            p_switch=switch_probability,
        )
        n_cuts = int(cut_step.sum())
        # a cut in fewer than 1 in 200 tracks cannot move the distribution (clean tracks of one size give
        # a few cuts from chance alone): keep the fit as it is
        if n_cuts == 0 or n_cuts == n_cuts_prev or n_cuts < _MIN_CUT_SHARE * ids.size:
            break
        cut_at_position = np.zeros(len(df), dtype=bool)
        cut_at_position[step_start[cut_step]] = True
        seg = _segment_table(df.reset_index(drop=True), per_track, cut_at_position, ["track", "frame", *cols])
        seg_sigma = seg.groupby("track")["source_track"].first().map(sigma_by_source)
        seg_est = lag1_track_estimates(seg, localization_sd_um=seg_sigma, **kw)
        dist = size_distribution(seg_est, **dist_kw)
        method_extra.update({"n_cuts": n_cuts, "n_segments": int(len(seg_est))})
        n_cuts_prev = n_cuts
        if dist.status != "ok":
            break
    method_extra["switch_probability"] = float(switch_probability)
    return _with_method(dist, method_extra), per_track


def _with_method(dist: SizeDistribution, extra: dict[str, Any]) -> SizeDistribution:
    import dataclasses

    return dataclasses.replace(dist, method={**dist.method, **extra})


def track_sizes_nm(
    track_fits: pd.DataFrame,
    *,
    temperature_c: float,
    viscosity_mpa_s: float,
    frame_interval_s: float,
    exposure_s: float,
    n_dims: int = 2,
    localization_sd_um: float | None = None,
    wall_distance_um: float | None = None,
) -> pd.DataFrame:
    """Per-track diameters with the short-track bias removed.

    1/D̂ of a Gamma(k) estimate is biased high by k/(k − 1) (k = d N_s/2 without noise), so a single track's
    naive size d(D̂) is too large by that factor on average; ``diameter_nm`` multiplies it by (k − 1)/k, k from
    the kernel at D̂ (NaN when k ≤ 1 or D̂ ≤ 0). For samples use the pooled D or :func:`size_distribution`.

    Returns
    -------
    DataFrame with columns track, diameter_nm, radius_nm, naive_diameter_nm (in the row order of track_fits).
    """
    _check_timing(frame_interval_s, exposure_s, n_dims)
    dt = float(frame_interval_s)
    R = blur_coefficient(dt, exposure_s)
    n = (track_fits["n_steps"] if "n_steps" in track_fits.columns else track_fits["n_points"] - 1).to_numpy(
        float
    )
    m = track_fits["n_adjacent_steps"].to_numpy(float) if "n_adjacent_steps" in track_fits.columns else n - 1
    if localization_sd_um is not None:
        s2 = np.full(n.size, float(localization_sd_um) ** 2)
    elif "sigma_um" in track_fits.columns:
        s2 = np.nan_to_num(track_fits["sigma_um"].to_numpy(float), nan=0.0) ** 2
    else:
        s2 = np.zeros(n.size)
    D = track_fits["D_um2_s"].to_numpy(float)
    tr = _Tracks(
        y=np.ones(n.size),
        n=np.maximum(n, 1),
        m=np.clip(m, 0, None),
        s2=s2,
        D=D,
        weight=np.ones(n.size),
        n_points=n + 1,
    )
    with np.errstate(invalid="ignore", divide="ignore"):
        k, _ = _gamma_shape_scale(np.where(D > 0, D, np.nan)[:, None], tr, dt, R, n_dims)
        k = k[:, 0]
        D0 = np.where(D > 0, D, np.nan)
        if wall_distance_um is not None:
            D0 = np.asarray(
                hydro.wall_corrected_D_um2_s(
                    D0,
                    wall_distance_um=wall_distance_um,
                    temperature_c=temperature_c,
                    viscosity_mpa_s=viscosity_mpa_s,
                )
            )
        naive = np.asarray(
            hydro.stokes_einstein_diameter_nm(
                D0, temperature_c=temperature_c, viscosity_mpa_s=viscosity_mpa_s
            ),
            dtype=float,
        )
        corrected = np.where((k > 1) & (n >= 1), naive * (k - 1) / k, np.nan)
    track_ids = track_fits["track"].to_numpy() if "track" in track_fits.columns else np.arange(n.size)
    return pd.DataFrame(
        {"track": track_ids, "diameter_nm": corrected, "radius_nm": corrected / 2, "naive_diameter_nm": naive}
    )
