"""Fits of the anomalous exponent to a table of tracks, per track and for the ensemble.

Helpers of :mod:`msdkit.fit`: the TA-MSD matrix of all tracks, the ensemble power-law fit with a bootstrap
over tracks, and the per-track generalised least-squares fits weighted by the fitted model's own TA-MSD
covariance. The model and its covariance are in :mod:`msdkit.estimators.anomalous`.
"""

from __future__ import annotations

import numpy as np

from ..msd import time_averaged_msd
from . import anomalous as an
from .increments import Steps

#: Largest lag and number of lags for fits of the anomalous exponent.
ALPHA_MAX_LAG = 50
ALPHA_N_LAGS = 10


def _msd_matrix(tracks, st: Steps, max_lag: int, n_dims: int):
    """Per-axis TA-MSD (n_tracks, max_lag) and pair counts, NaN where a lag has no pair."""
    ta = time_averaged_msd(tracks, max_lag_frames=max_lag, n_dims=n_dims)
    row = np.searchsorted(st.ids, ta["track"].to_numpy())
    col = ta["lag_frames"].to_numpy() - 1
    y = np.full((st.ids.size, max_lag), np.nan)
    npairs = np.zeros((st.ids.size, max_lag))
    y[row, col] = ta["msd_um2"].to_numpy() / n_dims
    npairs[row, col] = ta["n_pairs"].to_numpy()
    return y, npairs


def _alpha_lag_count(n_steps):
    return np.clip(np.asarray(n_steps) // 3, 3, ALPHA_MAX_LAG)


def _sample_power_law(y, npairs, *, dt, exposure_s, n_dims, rng, n_boot, lags):
    """Ensemble fit of (K, alpha, s) with a bootstrap over tracks. Returns dict of results."""
    cols = lags - 1
    W = npairs[:, cols]
    Y = np.where(W > 0, y[:, cols], 0.0)
    keep = W.sum(1) > 0
    W, Y = W[keep], Y[keep]
    T = W.shape[0]
    sw = W.sum(0)
    if T == 0 or np.any(sw == 0):
        return None
    ens = (W * Y).sum(0) / sw
    if T >= 3 * lags.size:
        infl = W * (Y - ens) / sw  # influence of each track on the ensemble MSD
        C = infl.T @ infl * (T / (T - 1))
        d = np.sqrt(np.maximum(np.diag(C), np.finfo(float).tiny))
        corr = C / np.outer(d, d)
        corr = 0.8 * corr + 0.2 * np.eye(corr.shape[0])  # shrink toward independence: C is estimated
        Cinv = np.linalg.pinv(corr) / np.outer(d, d)
    else:  # too few tracks to estimate the covariance: relative least squares
        Cinv = np.diag(1.0 / ens**2)
    t = lags * dt
    theta, cov, ok = an.gls_power_law(ens[None, :], t, Cinv, exposure_s=exposure_s, s=None)
    out = {"theta": theta[0], "cov": cov[0], "ok": bool(ok[0]), "ens": ens, "n_tracks": T}
    if T >= 2 and n_boot > 0:
        g = np.random.default_rng(rng)
        reps = []
        per = _boot_chunk(T)
        for s0 in range(0, n_boot, per):
            nb = min(per, n_boot - s0)
            cnt = _boot_counts(g, T, nb)
            ens_b = (cnt @ (W * Y)) / np.maximum(cnt @ W, 1e-300)
            th_b, _, _ = an.gls_power_law(ens_b, t, Cinv, exposure_s=exposure_s, s=None,
                                           theta0=np.repeat(theta, nb, axis=0))
            reps.append(th_b)
        out["boot"] = np.concatenate(reps)
    return out


def _track_alpha(y, st: Steps, s_shared, *, dt, exposure_s, R, n_dims):
    """Per-track fit of (K, alpha) with the localisation variance fixed at s_shared.

    Generalised least squares weighted first by the TA-MSD covariance of Brownian motion with the track's
    mean slope, then (twice) by the covariance of the fitted power law itself (fractional Brownian motion
    with blur and noise, :func:`msdkit.estimators.anomalous.power_law_msd_covariance`), which also gives
    alpha's standard error.
    """
    n_tr = st.ids.size
    alpha = np.full(n_tr, np.nan)
    se = np.full(n_tr, np.nan)
    K = np.full(n_tr, np.nan)
    n_a = _alpha_lag_count(st.n_steps)
    usable = (st.n_steps >= 4) & np.isfinite(s_shared)
    blur = exposure_s / dt
    for na in np.unique(n_a[usable]):
        lags = an.log_lags(int(na), ALPHA_N_LAGS)
        for idx in np.array_split(np.flatnonzero(usable & (n_a == na)),
                                  max(1, int(np.sum(usable & (n_a == na))) // 20000 + 1)):
            _fit_alpha_block(y, st, idx, lags, s_shared, alpha, se, K, dt=dt, exposure_s=exposure_s, R=R,
                             n_dims=n_dims, blur=blur)
    return alpha, se, K


def _fit_alpha_block(y, st, idx, lags, s_shared, alpha, se, K, *, dt, exposure_s, R, n_dims, blur):
    """Per-track alpha for one block of tracks sharing their lags (results written into alpha, se, K)."""
    from .._msd_kernels import sandwich

    Y = y[idx][:, lags - 1]
    good = np.all(np.isfinite(Y), axis=1)
    idx, Y = idx[good], Y[good]
    if idx.size == 0:
        return
    ns = np.maximum(st.n_steps[idx], int(lags[-1]))
    s_arr = np.full(idx.size, s_shared)
    b_t = np.maximum((Y[:, -1] - Y[:, 0]) / max(lags[-1] - lags[0], 1), 1e-12 * np.abs(Y).max(1) + 1e-300)
    C = np.empty((idx.size, lags.size, lags.size))
    for N in np.unique(ns):
        sel = ns == N
        C[sel] = an.brownian_msd_covariance(int(N), lags, b_t[sel], s_shared - R * b_t[sel], n_dims)
    theta, _, ok = an.gls_power_law(Y, lags * dt, _stable_inverse(C), exposure_s=exposure_s, s=s_arr,
                                    n_iter=20)
    for _pass in range(3):
        th_a = np.clip(theta[:, 1], *an.ALPHA_BOUNDS)
        K_frame = np.exp(theta[:, 0]) * dt**th_a
        for N in np.unique(ns):
            sel = ns == N
            C[sel] = an.power_law_msd_covariance(int(N), lags, K_frame[sel], th_a[sel], s_shared,
                                                 blur=blur, n_dims=n_dims)
        Cinv = _stable_inverse(C)
        if _pass < 2:
            theta, _, ok = an.gls_power_law(Y, lags * dt, Cinv, exposure_s=exposure_s, s=s_arr,
                                            theta0=theta, n_iter=20)
    _, J = an._model(theta, an._Lags(lags * dt, exposure_s), s_arr[:, None])
    H = sandwich(J, Cinv)  # numpy.einsum("nlp,nlm,nmq->npq", J, Cinv, J), the same numbers (compiled)
    with np.errstate(divide="ignore", invalid="ignore"):
        var_alpha = H[:, 0, 0] / (H[:, 0, 0] * H[:, 1, 1] - H[:, 0, 1] ** 2)
    alpha[idx] = np.where(ok, theta[:, 1], np.nan)
    se[idx] = np.where(ok & (var_alpha > 0), np.sqrt(np.abs(var_alpha)), np.nan)
    K[idx] = np.where(ok, np.exp(theta[:, 0]), np.nan)


def _ensemble_lags(n_steps):
    """Lags for the ensemble power-law fit: log-spaced up to a third of the median track (4 to 50 frames).

    None when the tracks span fewer than 4 lags, too few to fit K, alpha and the localisation offset.
    """
    if n_steps.size == 0:
        return None
    n_max = int(min(np.clip(np.median(n_steps) // 3, 4, ALPHA_MAX_LAG), n_steps.max()))
    return an.log_lags(n_max, ALPHA_N_LAGS) if n_max >= 4 else None


def _alpha_columns(tracks, st: Steps, usable, sigma_um, *, dt, t_e, R, n_dims, msd_matrix=None):
    """Per-track alpha, its interval and K, with the shared localisation variance (given or fitted).

    ``msd_matrix`` (default :func:`_msd_matrix`) gives the TA-MSD matrix; callers that already hold one pass
    theirs.
    """
    lags = _ensemble_lags(st.n_steps[usable]) if sigma_um is None else None
    need = _alpha_lag_count(st.n_steps[usable]).max(initial=1)
    get_msd = msd_matrix or _msd_matrix
    y_a, np_a = get_msd(tracks, st, int(max(need, 1 if lags is None else lags[-1])), n_dims)
    if sigma_um is None:
        res = None if lags is None else _sample_power_law(y_a[usable], np_a[usable], dt=dt, exposure_s=t_e,
                                                          n_dims=n_dims, rng=0, n_boot=0, lags=lags)
        s_shared = float(res["theta"][2]) if res is not None and res["ok"] else np.nan
    else:
        s_shared = float(sigma_um) ** 2
    alpha, a_se, K = _track_alpha(y_a, st, s_shared, dt=dt, exposure_s=t_e, R=R, n_dims=n_dims)
    a_lo, a_hi = an.alpha_interval(alpha, a_se)
    return alpha, a_lo, a_hi, K


def _stable_inverse(C):
    """Inverse of a stack of covariance matrices, regularised by a relative 1e-10 ridge."""
    ridge = 1e-10 * np.trace(C, axis1=1, axis2=2) / C.shape[1]
    C = C + ridge[:, None, None] * np.eye(C.shape[1])[None]
    return np.linalg.inv(C)


# ----------------------------------------------------------------------------------------------------------


def _boot_chunk(n_tracks: int) -> int:
    """Bootstrap replicates per chunk, so that a chunk's (replicates x tracks) counts stay near 4 million."""
    return int(np.clip((1 << 22) // max(n_tracks, 1), 1, 200))


def _boot_counts(g, T, nb):
    """(nb, T) counts of each track in nb resamples of T tracks with replacement."""
    from .._msd_kernels import count_draws

    # the same draws as before; counted in one compiled pass instead of offset + bincount + astype
    return count_draws(g.integers(0, T, (nb, T)), T)
