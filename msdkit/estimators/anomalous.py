"""Anomalous exponent: the blurred power-law MSD model and its fits per track and per sample.

Model, per axis: MSD(t) = 2 K g_alpha(t; t_E) + 2 s, where g_alpha is the power law t^alpha averaged over two
exposures of length t_E (motion blur) and s = sigma^2 the static localisation variance. For alpha = 1 it
reduces to 2 K (t - t_E/3) + 2 s (Savin & Doyle 2005; Berglund 2010), so localisation noise and blur are not
mistaken for subdiffusion (apparent alpha ~ n / (n + x) otherwise).

References
----------
R. Metzler & J. Klafter, Phys. Rep. 339, 1 (2000), doi:10.1016/S0370-1573(00)00070-3.
T. Savin & P. S. Doyle, Biophys. J. 88, 623 (2005), doi:10.1529/biophysj.104.042457.
"""

from __future__ import annotations

import numpy as np

from .diffusion import Z95, msd_covariance_terms

ALPHA_BOUNDS = (0.01, 2.5)


def blurred_power_law(t_s, alpha, exposure_s: float):
    """g_alpha(t; t_E): t^alpha averaged over two exposures of length t_E, for t >= t_E (lags of >= 1 frame).

    g = [(t + T)^(a+2) + (t - T)^(a+2) - 2 t^(a+2)] / (T^2 (a+1)(a+2)) - 2 T^a / ((a+1)(a+2)), T = t_E,
    from MSD_blur(t) = int_{-T}^{T} (T - |u|)/T^2 [V(t + u) - V(u)] du with V = 2K|t|^a (computed). A series in
    T/t is used when T/t < 0.01 to avoid cancellation.
    """
    t = np.asarray(t_s, float)
    a = np.asarray(alpha, float)
    T = float(exposure_s)
    if T <= 0:
        return t**a
    u = T / t
    c = (a + 1.0) * (a + 2.0)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        direct = ((t + T) ** (a + 2) + np.abs(t - T) ** (a + 2) - 2.0 * t ** (a + 2)) / (T * T * c)
        series = t**a * (1.0 + a * (a - 1) * u * u / 12.0 + a * (a - 1) * (a - 2) * (a - 3) * u**4 / 360.0)
    return np.where(u < 0.01, series, direct) - 2.0 * T**a / c


def log_lags(n_max: int, n_lags: int = 12) -> np.ndarray:
    """About n_lags lags from 1 to n_max, spaced evenly in log (all lags when there are few)."""
    n_max = max(int(n_max), 1)
    return np.unique(np.round(np.geomspace(1, n_max, min(n_lags, n_max))).astype(int))


def _model(theta, t, s, exposure_s):
    """Per-axis MSD and its Jacobian in (ln K, alpha[, s]) for rows of theta."""
    lnK, alpha = theta[:, 0:1], theta[:, 1:2]
    g = blurred_power_law(t[None, :] if t.ndim == 1 else t, alpha, exposure_s)
    h = 1e-5
    dg = (blurred_power_law(t, alpha + h, exposure_s) - blurred_power_law(t, alpha - h, exposure_s)) / (2 * h)
    K = np.exp(lnK)
    mu = 2 * K * g + 2 * s
    J = [2 * K * g, 2 * K * dg]
    if theta.shape[1] == 3:
        J.append(np.full_like(mu, 2.0))
    return mu, np.stack(J, axis=2)


def gls_power_law(y, t, Cinv, *, exposure_s: float, s=None, theta0=None, n_iter: int = 30):
    """Generalised least squares fit of MSD = 2 K g_alpha(t) + 2 s, vectorised over rows.

    Parameters
    ----------
    y : (n_rows, n_lags) per-axis MSD, µm²
    t : (n_lags,) lag times, s
    Cinv : (n_rows, n_lags, n_lags) or (n_lags, n_lags) inverse covariance (weights)
    s : (n_rows,) known localisation variance, µm²; None fits it as a third parameter.
    theta0 : starting values (n_rows, 2 or 3); default from a log-log fit.

    Returns
    -------
    theta : (n_rows, 2 or 3) ln K, alpha[, s];  cov : inverse of J^T C^-1 J;  ok : finite and converged.
    """
    y = np.asarray(y, float)
    n = y.shape[0]
    fit_s = s is None
    if Cinv.ndim == 2:
        Cinv = np.broadcast_to(Cinv, (n, *Cinv.shape))
    if theta0 is None:
        base = np.zeros(n) if fit_s else np.asarray(s, float)
        z = np.log(np.maximum(y - 2 * base[:, None], 1e-12 * np.abs(y).max(axis=1, keepdims=True) + 1e-300))
        lt = np.log(t)
        ltc = lt - lt.mean()
        alpha0 = np.clip((z * ltc).sum(1) / (ltc * ltc).sum(), 0.1, 1.9)
        lnK0 = (z.mean(1) - alpha0 * lt.mean()) - np.log(2.0)
        theta = np.stack([lnK0, alpha0] + ([np.maximum(y[:, 0] * 0.0, 0.0)] if fit_s else []), 1)
    else:
        theta = np.array(theta0, float)
    s_row = None if fit_s else np.asarray(s, float)[:, None]
    ok = np.zeros(n, bool)
    for _ in range(n_iter):
        mu, J = _model(theta, t, theta[:, 2:3] if fit_s else s_row, exposure_s)
        r = y - mu
        JtW = np.einsum("nlp,nlm->npm", J, Cinv)
        H = JtW @ J
        grad = np.einsum("npm,nm->np", JtW, r)
        try:
            step = np.linalg.solve(H + 1e-12 * np.eye(H.shape[1]) * np.abs(H).max(axis=(1, 2))[:, None, None],
                                   grad[..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = np.zeros_like(theta)
        step = np.where(np.isfinite(step), step, 0.0)
        step[:, 0] = np.clip(step[:, 0], -2.0, 2.0)
        step[:, 1] = np.clip(step[:, 1], -0.5, 0.5)
        new = theta + step
        new[:, 1] = np.clip(new[:, 1], *ALPHA_BOUNDS)
        # keep the step only if the weighted residual does not grow (halve otherwise)
        def cost(th):
            m, _ = _model(th, t, th[:, 2:3] if fit_s else s_row, exposure_s)
            rr = y - m
            return np.einsum("nl,nlm,nm->n", rr, Cinv, rr)
        c0, c1 = cost(theta), cost(new)
        for _h in range(10):
            worse = ~(c1 <= c0 * (1 + 1e-12))
            if not worse.any():
                break
            new[worse] = 0.5 * (new[worse] + theta[worse])
            c1[worse] = cost(new)[worse]
        worse = ~(c1 <= c0 * (1 + 1e-12))
        new[worse] = theta[worse]
        done = np.all(np.abs(new - theta) <= 1e-8 * (1 + np.abs(theta)), axis=1)
        theta = new
        ok |= done
        if done.all():
            break
    mu, J = _model(theta, t, theta[:, 2:3] if fit_s else s_row, exposure_s)
    H = np.einsum("nlp,nlm,nmq->npq", J, Cinv, J)
    with np.errstate(invalid="ignore"):
        try:
            cov = np.linalg.inv(H)
        except np.linalg.LinAlgError:
            cov = np.full_like(H, np.nan)
    ok &= np.all(np.isfinite(theta), axis=1)
    return theta, cov, ok


def brownian_msd_covariance(n_steps, lags, b, a, n_dims: int):
    """Covariance of the per-axis-averaged TA-MSD at the given lags for Brownian motion with (b, a)."""
    P = int(np.max(lags))
    Qbb, Qab, Qaa = msd_covariance_terms(int(n_steps), P)
    idx = np.minimum(np.asarray(lags) - 1, Qbb.shape[0] - 1)
    sub = np.ix_(idx, idx)
    b, a = np.asarray(b, float)[:, None, None], np.asarray(a, float)[:, None, None]
    return (b * b * Qbb[sub] + 2 * a * b * Qab[sub] + a * a * Qaa[sub]) / n_dims


def alpha_interval(alpha, se, z: float = Z95):
    """Normal-theory interval alpha +- z se (NaN where se is not finite)."""
    return alpha - z * se, alpha + z * se
