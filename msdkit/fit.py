"""Diffusion coefficient, localisation error and anomalous exponent per track and per sample.

Estimators of D (all corrected for localisation error and motion blur, R = t_E / (6 dt)):

``"covariance"``
    Covariance-based estimator (Vestergaard, Blainey & Flyvbjerg 2014): unbiased, closed form, near the
    Cramér-Rao bound when the reduced localisation error x = sigma^2 / (D dt) is small.
``"likelihood"``
    Maximum likelihood on each track's steps, whose covariance the discrete sine transform diagonalises
    (Berglund 2010; Vestergaard et al. 2014): at the bound for any x once tracks have ~50 points; on
    20-point tracks with x ~ 10 it reads a few per cent high and 1.15 x the bound (small-sample behaviour).
``"one_step_likelihood"``
    One Fisher-scoring step of each track's likelihood from the pooled maximum-likelihood fit of all tracks
    given (Le Cam's one-step estimator): a weighted least-squares fit of the track's sine modes with weights
    set by the sample's noise ratio. Exactly unbiased, at the bound when tracks share x, and free of the
    small-sample bias of a fully iterated likelihood on short, noisy tracks.
``"msd_fit"``
    Unweighted fit of the time-averaged MSD on lags 1..p with p optimal for the estimated x (Michalet 2010),
    the iteration on x run on the pooled tracks.
``"auto"``
    ``"covariance"`` when the pooled estimate of x over all tracks given is at most :data:`AUTO_X_SWITCH`,
    ``"one_step_likelihood"`` otherwise (see benchmarks/estimators.py). The choice is made once per call from
    pooled data, so tracks are not selected by their own noisy estimates (which would bias averages).

Gaps: only steps between consecutive frames are used; a track with missed frames is a set of independent
segments (see :mod:`msdkit.estimators.increments`). Single-track estimates of D can be negative and are never
clipped; sample estimates pool the steps of all tracks.

References
----------
X. Michalet, Phys. Rev. E 82, 041914 (2010), doi:10.1103/PhysRevE.82.041914.
A. J. Berglund, Phys. Rev. E 82, 011917 (2010), doi:10.1103/PhysRevE.82.011917.
C. L. Vestergaard, P. C. Blainey & H. Flyvbjerg, Phys. Rev. E 89, 022726 (2014),
doi:10.1103/PhysRevE.89.022726.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import partial

import numpy as np
import pandas as pd

from ._threads import Beside
from .errors import FitError, expected_got
from .estimators import diffusion as dif
from .estimators.alpha_fits import (
    _alpha_columns,
    _boot_chunk,
    _boot_counts,
    _ensemble_lags,
    _msd_matrix,
    _sample_power_law,
)
from .estimators.increments import Steps, collect_steps, sine_modes

__all__ = ["fit_tracks", "fit_sample", "SampleFit", "cramer_rao_relative_sd", "METHODS", "AUTO_X_SWITCH",
           "TRACK_FIT_COLUMNS"]

METHODS = ("auto", "covariance", "likelihood", "one_step_likelihood", "msd_fit")
#: Pooled reduced error above which ``auto`` uses the one-step likelihood instead of the covariance estimator.
AUTO_X_SWITCH = 0.3
#: Largest lag for the optimal-lag MSD fit.
MSD_FIT_MAX_LAG = 40
#: Elements (tracks x modes) per chunk of the vectorised likelihood fit.
_CHUNK = 1 << 21

TRACK_FIT_COLUMNS = (
    "track", "n_points", "D_um2_s", "D_ci95_lo_um2_s", "D_ci95_hi_um2_s", "sigma_um", "sigma2_um2",
    "x_reduced", "alpha", "alpha_ci95_lo", "alpha_ci95_hi", "K_um2_s_alpha", "method", "fit_status",
)
_TRACK_FIT_DTYPES = {c: ("int64" if c in ("track", "n_points") else "object" if c in ("method", "fit_status")
                         else "float64") for c in TRACK_FIT_COLUMNS}


def _check_common(frame_interval_s, exposure_s, n_dims, method):
    if not (np.isfinite(frame_interval_s) and frame_interval_s > 0):
        raise ValueError(expected_got("frame_interval_s", "> 0", frame_interval_s, "Give seconds per frame."))
    if exposure_s is None:
        exposure_s = frame_interval_s
    if not (0 <= exposure_s <= frame_interval_s):
        raise ValueError(expected_got("exposure_s", f"between 0 and frame_interval_s={frame_interval_s}",
                                      exposure_s, "The shutter cannot stay open longer than a frame."))
    if n_dims not in (1, 2, 3):
        raise ValueError(expected_got("n_dims", "1, 2 or 3", n_dims, "Count the tracked coordinates."))
    if method not in METHODS:
        raise ValueError(expected_got("method", " or ".join(repr(m) for m in METHODS), repr(method),
                                      "Pick one of the estimators listed."))
    return float(frame_interval_s), float(exposure_s)


def cramer_rao_relative_sd(n_points: int, x_reduced: float, *, blur_R: float = 0.0, n_dims: int = 2,
                           sigma_known: bool = False) -> float:
    """Cramér-Rao bound on SD(D_hat)/D for one track of n_points positions without gaps.

    Parameters
    ----------
    n_points : int
    x_reduced : float
        sigma^2 / (D dt).
    blur_R : float, default=0
        t_E / (6 dt).
    n_dims : int, default=2
    sigma_known : bool, default=False
        True: sigma is known, only D is estimated.

    Notes
    -----
    Exact Fisher information of the Gaussian step model in its DST-diagonal form (Berglund 2010;
    Vestergaard et al. 2014). For n_points = 100 in 2D: 10.1 % (sigma = 0 known), 18.0 % (x = 0.1), 21.4 %
    (x = 1), 32.7 % (x = 10).
    """
    b = 2.0
    a = x_reduced - blur_R * b
    return float(np.sqrt(dif.cramer_rao_var_b(int(n_points) - 1, b, a, n_dims=n_dims, R=blur_R,
                                              s_known=sigma_known)) / b)


# ----------------------------------------------------------------------------------------------------------
# helpers
# ----------------------------------------------------------------------------------------------------------

def _resolve_method(method: str, st: Steps, R: float) -> tuple[str, float]:
    """Pooled covariance estimate of x and the estimator ``auto`` picks from it."""
    b, a = dif.covariance_estimate(st.sum_sq.sum(), st.n_steps.sum(), st.sum_cross.sum(), st.n_pairs.sum(),
                                   n_dims=st.n_dims, R=R)
    s = a + R * b
    x = float(2.0 * s / b) if b > 0 else np.inf
    if method != "auto":
        return method, x
    return ("covariance" if x <= AUTO_X_SWITCH else "one_step_likelihood"), x


def _padded_groups(n_modes: np.ndarray, ratio: float = 1.25):
    """Tracks grouped by number of modes (padding waste <= ratio), chunked to bound memory."""
    order = np.argsort(n_modes, kind="stable")
    nm = n_modes[order]
    i = 0
    while i < order.size:
        hi_val = max(int(nm[i] * ratio), int(nm[i]))
        j = int(np.searchsorted(nm, hi_val, side="right"))
        K = int(nm[j - 1])
        per = max(1, _CHUNK // max(K, 1))
        for s in range(i, j, per):
            yield order[s:min(j, s + per)], K
        i = j


def _fill_padded(idx, K, first, n_modes, *arrays):
    """(len(idx), K) arrays of each flat per-mode array for tracks idx, plus a 0/1 weight array."""
    s0 = int(first[idx[0]]) if idx.size else 0
    if idx.size and np.all(n_modes[idx] == K) and np.array_equal(first[idx], s0 + K * np.arange(idx.size)):
        # tracks of K modes each, back to back: rows of a reshaped slice (a view: callers only read them)
        rows = slice(s0, s0 + K * idx.size)
        return np.ones((idx.size, K)), [arr[rows].reshape(idx.size, K) for arr in arrays]
    cols = np.arange(K)
    w = (cols[None, :] < n_modes[idx][:, None]).astype(float)
    last = first[idx][:, None] + np.maximum(n_modes[idx], 1)[:, None] - 1
    src = np.minimum(first[idx][:, None] + cols[None, :], last)
    out = [np.where(w > 0, arr[src], (1.0 if k == 0 else 0.0)) for k, arr in enumerate(arrays)]
    return w, out


def _pooled_modes(modes, usable: np.ndarray):
    """Sine modes of the usable tracks: lam, power and the index (0..n_usable-1) of their track."""
    lam, power, mode_track = modes
    idx = np.flatnonzero(usable)
    keep = usable[mode_track]
    return lam[keep], power[keep], np.searchsorted(idx, mode_track[keep])


def _pooled_ml(st: Steps, modes, usable: np.ndarray, n_dims: int):
    """Maximum likelihood (b, a) shared by all modes of the usable tracks.

    Modes with the same segment length m and index k have the same lambda, so the likelihood only needs
    their count and summed power per (m, k): the fit runs on at most (number of distinct lengths) x m values
    instead of every step.
    """
    lam, power, mode_track = modes
    keep = usable[mode_track].astype(float)
    m = np.repeat(st.seg_len, st.seg_len)
    k = np.arange(m.size) - np.repeat(st.seg_start, st.seg_len)
    lens = np.unique(st.seg_len)
    off = np.zeros(int(lens.max(initial=0)) + 1, np.int64)
    off[lens] = np.concatenate([[0], np.cumsum(lens)[:-1]])
    code = off[m] + k
    n_codes = int(lens.sum())
    cnt = np.bincount(code, weights=keep, minlength=n_codes)
    tot = np.bincount(code, weights=keep * power, minlength=n_codes)
    lam_c = np.zeros(n_codes)
    lam_c[code] = lam
    sel = cnt > 0
    bb, aa, _, _ = dif.ml_fit(lam_c[sel][None], (tot[sel] / cnt[sel])[None], cnt[sel][None], n_dims=n_dims)
    return float(bb[0]), float(aa[0])


def _weighted_mode_tracks(st: Steps, usable: np.ndarray, kind: str, *, n_dims: int, R: float):
    """Per-track estimators that are fixed-weight sums of the sine modes, with skewness-aware intervals.

    kind = "one_step": weights of one likelihood-scoring step from the pooled fit (weighted least squares at
    the sample's noise ratio). kind = "covariance": the covariance-based estimator, which is the same kind of
    sum because its step moments are diagonal in the sine basis: sum_k dx_k^2 = sum_k P_k^2 and
    sum_k dx_k dx_(k+1) = sum_k cos(pi k/(m+1)) P_k^2 within a segment of m steps. kind = "likelihood": each
    track's own maximum likelihood, which is the weighted least-squares fit at its own fitted noise ratio
    (the fixed point of the scoring iteration); its interval treats those weights as fixed.

    The intervals need the localisation variance s. Each track's own estimate is noisy at small N, the
    pooled one is wrong for tracks whose localisation error differs (brightness); the interval uses an
    empirical-Bayes blend, s_t = s_pool + w_t (s_hat_t - s_pool) with w_t = tau^2 / (tau^2 + v_t), where v_t
    is the sampling variance of s_hat_t and tau^2 the between-track variance of s left after subtracting it
    (method of moments). A sample with one localisation error gets tau^2 ~ 0 and the pooled value.
    """
    modes = sine_modes(st)
    lam, power, _ = modes
    rho = 0.0
    if kind in ("one_step", "likelihood"):
        b0, a0 = _pooled_ml(st, modes, usable, n_dims)
        rho = a0 / b0 if b0 > 0 else 0.0
    else:
        b0, a0 = dif.covariance_estimate(st.sum_sq[usable].sum(), st.n_steps[usable].sum(),
                                         st.sum_cross[usable].sum(), st.n_pairs[usable].sum(),
                                         n_dims=n_dims, R=R)
    s_pool = max(float(a0 + R * b0), 0.0) if np.isfinite(a0 + R * b0) else 0.0
    n_tr = st.ids.size
    out = {k: np.full(n_tr, np.nan) for k in ("b", "a", "lo", "hi", "v")}
    conv = np.ones(n_tr, bool)
    m2_all = np.zeros((n_tr, 3))
    m3_all = np.zeros((n_tr, 4))
    first = np.concatenate([[0], np.cumsum(st.n_steps)[:-1]])
    idx_all = np.flatnonzero(usable)
    for grp, K in _padded_groups(st.n_steps[idx_all]):
        idx = idx_all[grp]
        w, (L, S) = _fill_padded(idx, K, first, st.n_steps, lam, power)
        if kind == "one_step":
            b, a, _, _, _, c, ca = dif.gls_fixed_ratio(L, S, w, rho, n_dims=n_dims)
        elif kind == "likelihood":
            b, a, _, conv[idx] = dif.ml_fit(L, S, w, n_dims=n_dims)
            rho_t = np.where(b > 0, a / np.where(b > 0, b, 1.0), rho)[:, None]
            _, _, _, _, _, c, ca = dif.gls_fixed_ratio(L, S, w, rho_t, n_dims=n_dims)
        else:
            n1 = st.n_steps[idx][:, None].astype(float)
            n2 = st.n_pairs[idx][:, None].astype(float)
            c = w * (1.0 / n1 + (2.0 - L) / n2)
            ca = -w * (1.0 - L / 2.0) / n2
            b = (c * S).sum(1) / n_dims
            a = (ca * S).sum(1) / n_dims
        m2_all[idx], m3_all[idx] = dif.weighted_chi2_moments(c, L, w, R=R)
        # sampling variance of s_hat = sum (ca + R c) S / d at (max(b, 0), s_pool)
        psi = np.maximum(b, 0.0)[:, None] * (1.0 - R * L) + s_pool * L
        cs = (ca + R * c) * (w > 0)
        out["v"][idx] = (2.0 / n_dims) * np.einsum("ij,ij->i", cs * psi, cs * psi)
        out["b"][idx], out["a"][idx] = b, a
    i = idx_all
    s_hat = out["a"][i] + R * out["b"][i]
    v = out["v"][i]
    tau2 = max(float(np.mean((s_hat - s_pool) ** 2) - np.mean(v)), 0.0) if i.size > 1 else 0.0
    with np.errstate(invalid="ignore", divide="ignore"):
        wt = np.where(tau2 > 0, tau2 / (tau2 + v), 0.0)
    s_used = np.maximum(s_pool + wt * (s_hat - s_pool), 0.0)
    if i.size:
        out["lo"][i], out["hi"][i] = dif.skewed_interval(out["b"][i], s_used, m2_all[i], m3_all[i],
                                                         n_dims=n_dims)
    return out["b"], out["a"], out["lo"], out["hi"], conv


class _Shared:
    """Intermediates of one table that :func:`fit_tracks` and :func:`fit_sample` both need.

    The pipeline fits tracks and then the sample on the same table; passing one ``_Shared(tracks, n_dims)``
    to both collects the steps and computes each TA-MSD matrix once. It holds the table, so the identity
    checks below cannot be fooled by a recycled object id; any other table is computed afresh.
    """

    def __init__(self, tracks: pd.DataFrame, n_dims: int):
        self.tracks = tracks
        self.n_dims = n_dims
        self._steps: Steps | None = None
        self._msd: dict[int, tuple[np.ndarray, np.ndarray]] = {}

    def steps(self, tracks: pd.DataFrame, n_dims: int) -> Steps:
        if tracks is not self.tracks or n_dims != self.n_dims:
            return collect_steps(tracks, n_dims)
        if self._steps is None:
            self._steps = collect_steps(tracks, n_dims)
        return self._steps

    def msd_matrix(self, tracks: pd.DataFrame, st: Steps, max_lag: int, n_dims: int):
        if tracks is not self.tracks or st is not self._steps or n_dims != self.n_dims:
            return _msd_matrix(tracks, st, max_lag, n_dims)
        if max_lag not in self._msd:
            self._msd[max_lag] = _msd_matrix(tracks, st, max_lag, n_dims)
        y, npairs = self._msd[max_lag]
        return y.copy(), npairs.copy()  # callers may write into theirs


# public API
# ----------------------------------------------------------------------------------------------------------

def fit_tracks(
    tracks: pd.DataFrame,
    *,
    frame_interval_s: float,
    exposure_s: float | None,
    n_dims: int = 2,
    method: str = "auto",
    sigma_um: float | None = None,
    fit_alpha: bool = True,
    _shared: _Shared | None = None,
) -> pd.DataFrame:
    """Fit D, the localisation error and the anomalous exponent of every track.

    Parameters
    ----------
    tracks : DataFrame
        Columns ``track, frame, x_um, y_um`` (``z_um`` in 3D); frames may have gaps.
    frame_interval_s : float, s
    exposure_s : float, s
        Shutter-open time per frame (0 = instantaneous; None = the frame interval).
    n_dims : int, default=2
    method : {"auto", "covariance", "likelihood", "one_step_likelihood", "msd_fit"}, default="auto"
        Estimator of D (see the module notes).
    sigma_um : float, optional, µm
        The sample's shared localisation error, used to stabilise each track's anomalous exponent. By
        default it is estimated from the ensemble MSD of the tracks given (power-law fit with offset). It does
        not enter the per-track D, which carries its own localisation error.
    fit_alpha : bool, default=True
        False skips the anomalous exponent (its columns are NaN), which saves most of the time.

    Returns
    -------
    DataFrame, one row per track
        ``track, n_points, D_um2_s, D_ci95_lo_um2_s, D_ci95_hi_um2_s, sigma_um, sigma2_um2, x_reduced, alpha,
        alpha_ci95_lo, alpha_ci95_hi, K_um2_s_alpha, method, fit_status``. ``sigma2_um2`` is the (possibly
        negative) estimate of sigma^2, ``sigma_um`` its square root clipped at 0; ``x_reduced`` =
        sigma^2/(D dt). ``fit_status`` is ``ok`` or the reason D could not be estimated
        (``too_short``: fewer than two consecutive steps; ``not_converged``).

    Notes
    -----
    D intervals are 95 % intervals that invert the estimator's known distribution at each hypothesised D:
    for the covariance and one-step estimators, which are fixed-weight sums of independent chi-square
    modes, the exact first three cumulants give a skewness-aware (shifted gamma) quantile, with the
    localisation variance blended between the track's own and the sample's pooled value (empirical Bayes,
    so samples whose tracks differ in brightness keep their coverage); for the MSD fit and the full
    likelihood a score-type interval from the exact MSD covariance or the Fisher information. The upper
    end is +inf when a track is too short and noisy to bound D.

    The anomalous exponent is fitted to the TA-MSD at up to ten log-spaced lags (1 to N/3, at most 50) with
    the model 2d [K g_alpha(t) + sigma^2] including blur
    (:func:`msdkit.estimators.anomalous.blurred_power_law`) by generalised least squares weighted by the
    model's own TA-MSD covariance, with sigma fixed at the shared value.

    Examples
    --------
    >>> from msdkit.simulate import brownian_positions, positions_to_tracks
    >>> pos = brownian_positions(20, 100, D_um2_s=1.0, frame_interval_s=0.01, exposure_s=0.01,
    ...                          localization_sd_um=0.03, rng=2)
    >>> fits = fit_tracks(positions_to_tracks(pos, frame_interval_s=0.01), frame_interval_s=0.01,
    ...                   exposure_s=0.01)
    >>> bool(abs(fits["D_um2_s"].mean() - 1.0) < 0.2)
    True
    """
    dt, t_e = _check_common(frame_interval_s, exposure_s, n_dims, method)
    if sigma_um is not None and not (np.isfinite(sigma_um) and sigma_um >= 0):
        raise ValueError(expected_got("sigma_um", "a finite number >= 0 or None", sigma_um,
                                      "Give the localisation error in µm, or leave it out."))
    R = dif.blur_coefficient(dt, t_e)
    st = collect_steps(tracks, n_dims) if _shared is None else _shared.steps(tracks, n_dims)
    n_tr = st.ids.size
    if n_tr == 0:
        return pd.DataFrame({c: pd.Series(dtype=t) for c, t in _TRACK_FIT_DTYPES.items()})
    chosen, _ = _resolve_method(method, st, R)
    usable = (st.n_steps >= 2) & (st.n_pairs >= 1)
    status = np.where(usable, "ok", "too_short").astype(object)

    alpha_columns = (_alpha_columns if _shared is None
                     else partial(_alpha_columns, msd_matrix=_shared.msd_matrix))
    alpha_kw = dict(dt=dt, t_e=t_e, R=R, n_dims=n_dims)
    alpha_job = None
    if chosen in ("covariance", "one_step_likelihood", "likelihood"):
        kind = {"covariance": "covariance", "one_step_likelihood": "one_step"}.get(chosen, "likelihood")
        with Beside(rows=len(tracks)) as beside:
            # per-track alpha (TA-MSD power-law fits) does not depend on D (sine modes): it runs in a second
            # thread when the process may use two (msdkit._threads); the same numbers either way
            if fit_alpha:
                alpha_job = beside.submit(alpha_columns, tracks, st, usable.copy(), sigma_um, **alpha_kw)
            b, a, lo, hi, conv = _weighted_mode_tracks(st, usable, kind, n_dims=n_dims, R=R)
        status[usable & ~conv] = "not_converged"
    else:  # msd_fit
        p_max = int(min(MSD_FIT_MAX_LAG, max(2, st.n_steps.max(initial=2))))
        y, npairs = (_msd_matrix if _shared is None else _shared.msd_matrix)(tracks, st, p_max, n_dims)
        y[~usable] = np.nan
        npairs[~usable] = 0
        b, a, p, k = dif.optimal_lags_pooled(y, npairs, np.maximum(st.n_steps, 2), p_max=p_max)
        s = a + R * b
        lo, hi = dif.quadratic_interval(b, np.maximum(s, 0.0), k[:, 0] / n_dims, k[:, 1] / n_dims,
                                        k[:, 2] / n_dims, R=R)
        usable &= np.isfinite(b)
        status[~usable] = "too_short"

    s = a + R * b
    to_D = 1.0 / (2.0 * dt)
    D = np.where(usable, b * to_D, np.nan)

    # anomalous exponent with a shared localisation variance
    if not fit_alpha:
        alpha = a_lo = a_hi = K = np.full(n_tr, np.nan)
    elif alpha_job is not None:
        alpha, a_lo, a_hi, K = alpha_job.result()
    else:  # msd_fit: the tracks its D could not fit are left out of alpha too
        alpha, a_lo, a_hi, K = alpha_columns(tracks, st, usable, sigma_um, **alpha_kw)

    with np.errstate(invalid="ignore", divide="ignore"):
        x_red = np.where(usable, 2.0 * s / b, np.nan)
    return pd.DataFrame({
        "track": st.ids,
        "n_points": st.n_points,
        "D_um2_s": D,
        "D_ci95_lo_um2_s": np.where(usable, lo * to_D, np.nan),
        "D_ci95_hi_um2_s": np.where(usable, hi * to_D, np.nan),
        "sigma_um": np.where(usable, np.sqrt(np.maximum(s, 0.0)), np.nan),
        "sigma2_um2": np.where(usable, s, np.nan),
        "x_reduced": x_red,
        "alpha": alpha,
        "alpha_ci95_lo": a_lo,
        "alpha_ci95_hi": a_hi,
        "K_um2_s_alpha": K,
        "method": np.full(n_tr, chosen, dtype=object),
        "fit_status": status,
    })


@dataclass(frozen=True)
class SampleFit:
    """Sample-level estimates (pooled over tracks) with 95 % intervals from a bootstrap over tracks.

    Attributes
    ----------
    D_um2_s, D_ci95_um2_s, D_se_um2_s : pooled D, its interval (lo, hi) and bootstrap SD.
    sigma_um : the sample's localisation error, from the ensemble power-law fit with blur, which holds for
        normal and anomalous motion alike (the D estimator's value when alpha could not be fitted). Pass it
        as ``fit_tracks(..., sigma_um=...)`` to reuse it for per-track alpha.
    D_sigma_um, sigma2_um2 : localisation error from the estimator of D (Brownian step model; sigma2 may be
        negative). For anomalous motion it absorbs the steps' own correlation and is not a localisation error.
    x_reduced : sigma^2 / (D dt) of the estimator of D.
    alpha, alpha_ci95, alpha_se, K_um2_s_alpha, alpha_sigma_um : anomalous exponent from the ensemble MSD
        with the localisation and blur offset, its interval, SD, prefactor and the localisation error fitted
        with it.
    alpha_lags_frames : lags used for alpha.
    method : estimator of D used; n_tracks, n_steps : tracks and consecutive-frame steps used.
    n_boot : bootstrap replicates; fit_status : ``ok`` or the reason.
    """

    D_um2_s: float
    D_ci95_um2_s: tuple[float, float]
    alpha: float
    alpha_ci95: tuple[float, float]
    sigma_um: float
    x_reduced: float
    method: str
    n_tracks: int
    n_steps: int
    D_se_um2_s: float = np.nan
    sigma2_um2: float = np.nan
    D_sigma_um: float = np.nan
    alpha_se: float = np.nan
    K_um2_s_alpha: float = np.nan
    alpha_sigma_um: float = np.nan
    alpha_lags_frames: tuple[int, ...] = ()
    n_boot: int = 0
    fit_status: str = "ok"


def fit_sample(
    tracks: pd.DataFrame,
    track_fits: pd.DataFrame | None = None,
    *,
    frame_interval_s: float,
    exposure_s: float | None,
    n_dims: int = 2,
    method: str = "auto",
    rng=0,
    n_boot: int = 1000,
    _shared: _Shared | None = None,
) -> SampleFit:
    """Pooled D and anomalous exponent of a sample, with 95 % intervals by a bootstrap over tracks.

    Parameters
    ----------
    tracks : DataFrame
        Track table (see :func:`fit_tracks`).
    track_fits : DataFrame, optional
        Output of :func:`fit_tracks`; when given, only its tracks with ``fit_status == "ok"`` are used and its
        estimator is kept when ``method="auto"``.
    frame_interval_s, exposure_s, n_dims, method
        As in :func:`fit_tracks`.
    rng : int, Generator or None, default=0
        Seed of the bootstrap (fixed by default, so results are reproducible).
    n_boot : int, default=1000

    Returns
    -------
    SampleFit

    Notes
    -----
    D pools the steps of all tracks with one shared (D, sigma): summed squares and cross-products for the
    covariance estimator, one joint likelihood for maximum likelihood, the pair-weighted ensemble MSD for the
    MSD fit. Tracks are resampled with replacement for the interval (percentile bootstrap), so heterogeneity
    between tracks widens it; for maximum likelihood each replicate takes one Fisher-scoring step from the
    pooled estimate with the resampled tracks' scores and information (one-step bootstrap).
    alpha comes from a generalised least-squares fit of 2d [K g_alpha(t) + sigma^2] (blur included) to the
    ensemble MSD at log-spaced lags, weighted by the between-track covariance of the ensemble MSD, with the
    same bootstrap; localisation noise therefore does not pull alpha below 1.

    Examples
    --------
    >>> from msdkit.simulate import brownian_positions, positions_to_tracks
    >>> pos = brownian_positions(100, 50, D_um2_s=0.5, frame_interval_s=0.02, exposure_s=0.02,
    ...                          localization_sd_um=0.05, rng=3)
    >>> s = fit_sample(positions_to_tracks(pos, frame_interval_s=0.02), frame_interval_s=0.02,
    ...                exposure_s=0.02, n_boot=200)
    >>> bool(s.D_ci95_um2_s[0] < 0.5 < s.D_ci95_um2_s[1]), bool(s.alpha_ci95[0] < 1.0 < s.alpha_ci95[1])
    (True, True)
    """
    dt, t_e = _check_common(frame_interval_s, exposure_s, n_dims, method)
    if track_fits is not None:
        ok_ids = track_fits.loc[track_fits["fit_status"] == "ok", "track"].to_numpy()
        keep = tracks["track"].isin(ok_ids).to_numpy()
        if not keep.all():  # (no copy of the table when every track is kept)
            tracks = tracks[keep]
        if method == "auto" and len(track_fits) and "method" in track_fits.columns:
            m = track_fits.loc[track_fits["fit_status"] == "ok", "method"]
            if len(m):
                method = str(m.iloc[0])
    R = dif.blur_coefficient(dt, t_e)
    st = collect_steps(tracks, n_dims) if _shared is None else _shared.steps(tracks, n_dims)
    msd_matrix = _msd_matrix if _shared is None else _shared.msd_matrix
    usable = (st.n_steps >= 2) & (st.n_pairs >= 1)
    if not usable.any():
        raise FitError(expected_got("tracks", "at least one track with two steps between consecutive frames",
                                    f"{st.ids.size} tracks without such steps",
                                    "Check linking (gaps) or lower the minimum track length."))
    chosen, _ = _resolve_method(method, st, R)
    g = np.random.default_rng(rng)
    idx = np.flatnonzero(usable)
    T = idx.size
    d = n_dims
    n_steps_total = int(st.n_steps[idx].sum())

    if chosen == "covariance":
        per = np.stack([st.sum_sq[idx], st.n_steps[idx], st.sum_cross[idx], st.n_pairs[idx]], 1).astype(float)
        tot = per.sum(0)
        b, a = dif.covariance_estimate(*tot, n_dims=d, R=R)
        b, a = float(b), float(a)

        def boot_b(cnt):
            sums = cnt @ per
            return dif.covariance_estimate(*sums.T, n_dims=d, R=R)[0]
    elif chosen in ("likelihood", "one_step_likelihood"):
        modes = sine_modes(st)
        lam, power, mode_track = _pooled_modes(modes, usable)
        b, a = _pooled_ml(st, modes, usable, d)
        psi = b + a * lam
        res = power / d - psi
        r = 1.0 / psi**2
        # per-track score and expected information in (b, a), up to the common factor d/2
        U = np.stack([np.bincount(mode_track, r * res, T), np.bincount(mode_track, r * res * lam, T)], 1)
        Iq = np.stack([np.bincount(mode_track, r, T), np.bincount(mode_track, r * lam, T),
                       np.bincount(mode_track, r * lam * lam, T)], 1)

        def boot_b(cnt):
            u = cnt @ U
            q = cnt @ Iq
            det = q[:, 0] * q[:, 2] - q[:, 1] ** 2
            return b + (q[:, 2] * u[:, 0] - q[:, 1] * u[:, 1]) / det
    else:
        p_max = int(min(MSD_FIT_MAX_LAG, max(2, np.median(st.n_steps[idx]))))
        y, npairs = msd_matrix(tracks, st, p_max, d)
        y, npairs = y[idx], npairs[idx]
        wy = np.where(npairs > 0, npairs * y, 0.0)
        # pooled (b, a) from the covariance estimator sets p; the fit itself uses the ensemble MSD
        b0, a0 = dif.covariance_estimate(st.sum_sq[idx].sum(), st.n_steps[idx].sum(), st.sum_cross[idx].sum(),
                                         st.n_pairs[idx].sum(), n_dims=d, R=R)
        terms = dif.slope_variance_terms(int(np.median(st.n_steps[idx])), p_max)
        bpos = max(float(b0), 1e-300)
        var = terms[:, 0] * bpos**2 + 2 * terms[:, 1] * a0 * bpos + terms[:, 2] * a0**2
        p = int(np.nanargmin(np.where(np.isfinite(var), var, np.inf))) if np.isfinite(var).any() else 2
        lagv = np.arange(1, p + 1, dtype=float)
        wslope = (lagv - lagv.mean()) / np.sum((lagv - lagv.mean()) ** 2)

        def fit_lin(WY, NP):
            ens = WY[:, :p] / np.maximum(NP[:, :p], 1e-300)
            bs = ens @ wslope
            return bs, (ens.mean(1) - bs * lagv.mean()) / 2.0

        bb, aa = fit_lin(wy.sum(0)[None], npairs.sum(0)[None])
        b, a = float(bb[0]), float(aa[0])

        def boot_b(cnt):
            return fit_lin(cnt @ wy, cnt @ npairs)[0]

    boots = []
    if T >= 2 and n_boot > 0:
        chunk = _boot_chunk(T)
        for s0 in range(0, n_boot, chunk):
            boots.append(boot_b(_boot_counts(g, T, min(chunk, n_boot - s0))))
        bs = np.concatenate(boots)
        lo, hi = np.nanpercentile(bs, [2.5, 97.5])
        se = float(np.nanstd(bs, ddof=1))
    else:
        lo = hi = se = np.nan
    s = a + R * b
    to_D = 1.0 / (2.0 * dt)

    # anomalous exponent from the ensemble MSD
    lags = _ensemble_lags(st.n_steps[idx])
    pl = None
    if lags is not None:
        y_a, np_a = msd_matrix(tracks, st, int(lags[-1]), d)
        pl = _sample_power_law(y_a[idx], np_a[idx], dt=dt, exposure_s=t_e, n_dims=d, rng=g, n_boot=n_boot,
                               lags=lags)
    if pl is not None and pl["ok"]:
        alpha = float(pl["theta"][1])
        K = float(np.exp(pl["theta"][0]))
        s_alpha = float(pl["theta"][2])
        if "boot" in pl:
            a_lo, a_hi = np.nanpercentile(pl["boot"][:, 1], [2.5, 97.5])
            a_se = float(np.nanstd(pl["boot"][:, 1], ddof=1))
        else:
            a_lo = a_hi = a_se = np.nan
        status = "ok"
    else:
        alpha = K = s_alpha = a_lo = a_hi = a_se = np.nan
        status = "alpha_not_fitted"
    return SampleFit(
        D_um2_s=b * to_D,
        D_ci95_um2_s=(float(lo * to_D), float(hi * to_D)),
        alpha=alpha,
        alpha_ci95=(float(a_lo), float(a_hi)),
        sigma_um=float(np.sqrt(max(s_alpha, 0.0))) if np.isfinite(s_alpha) else float(np.sqrt(max(s, 0.0))),
        x_reduced=float(2.0 * s / b) if b != 0 else np.nan,
        method=chosen,
        n_tracks=int(T),
        n_steps=n_steps_total,
        D_se_um2_s=se * to_D,
        sigma2_um2=float(s),
        D_sigma_um=float(np.sqrt(max(s, 0.0))),
        alpha_se=a_se,
        K_um2_s_alpha=K,
        alpha_sigma_um=float(np.sqrt(max(s_alpha, 0.0))) if np.isfinite(s_alpha) else np.nan,
        alpha_lags_frames=() if lags is None else tuple(int(v) for v in lags),
        n_boot=int(n_boot if T >= 2 else 0),
        fit_status=status,
    )
