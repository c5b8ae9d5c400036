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

from functools import lru_cache

import numpy as np

from .diffusion import Z95, msd_covariance_terms

ALPHA_BOUNDS = (0.01, 2.5)


def blurred_power_law(t_s, alpha, exposure_s: float):
    """g_alpha(t; t_E): t^alpha averaged over two exposures of length t_E, for t >= t_E (lags of >= 1 frame).

    g = [(t + T)^(a+2) + (t - T)^(a+2) - 2 t^(a+2)] / (T^2 (a+1)(a+2)) - 2 T^a / ((a+1)(a+2)), T = t_E,
    from MSD_blur(t) = int_{-T}^{T} (T - |u|)/T^2 [V(t + u) - V(u)] du with V = 2K|t|^a (computed). A series
    in T/t is used when T/t < 0.01 to avoid cancellation.
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


class _Lags:
    """Logarithms of the lag times (and of t +- t_E) computed once per set of lags."""

    def __init__(self, t, exposure_s: float):
        self.t = np.asarray(t, float)
        self.T = float(exposure_s)
        self.lt = np.log(self.t)
        if self.T > 0:
            self.u = self.T / self.t
            self.series = self.u < 0.01
            self.lp = np.log(self.t + self.T)
            diff = self.t - self.T
            self.zero = diff <= 0
            self.lm = np.log(np.where(self.zero, 1.0, diff))
            self.lT = np.log(self.T)
            # which branches the lags need (the other one's values would only be masked out)
            self.any_series, self.all_series = bool(self.series.any()), bool(self.series.all())
            self.any_zero = bool(self.zero.any())

    def g_dg(self, alpha):
        """g_alpha(t) and d g / d alpha for alpha of shape (n_rows, 1).

        Each value is computed by the same operations in the same order whichever branches the lags need;
        a branch no lag takes (the short-exposure series, lags within the exposure) is not evaluated.
        """
        a = alpha
        ta = np.exp(a * self.lt)
        if self.T <= 0:
            return ta, ta * self.lt
        T, u = self.T, self.u
        c = (a + 1.0) * (a + 2.0)
        dc = 2.0 * a + 3.0
        Ta = np.exp(a * self.lT)
        tail = 2.0 * Ta / c
        d_tail = tail * self.lT - tail * dc / c
        if not self.all_series:
            a2 = a + 2.0
            pp = np.exp(a2 * self.lp)
            p0 = np.exp(a2 * self.lt)
            if self.any_zero:
                pm = np.where(self.zero, 0.0, np.exp(a2 * self.lm))
                num = pp + pm - 2.0 * p0
                dnum = pp * self.lp + np.where(self.zero, 0.0, pm * self.lm) - 2.0 * p0 * self.lt
            else:
                pm = np.exp(a2 * self.lm)
                num = pp + pm - 2.0 * p0
                dnum = pp * self.lp + pm * self.lm - 2.0 * p0 * self.lt
            TTc = T * T * c
            direct = num / TTc
            d_direct = dnum / TTc - direct * dc / c
            if not self.any_series:
                return direct - tail, d_direct - d_tail
        A = a * (a - 1) / 12.0
        B = a * (a - 1) * (a - 2) * (a - 3) / 360.0
        dA = (2 * a - 1) / 12.0
        dB = (4 * a**3 - 18 * a**2 + 22 * a - 6) / 360.0
        ser = ta * (1.0 + A * u * u + B * u**4)
        d_ser = ser * self.lt + ta * (dA * u * u + dB * u**4)
        if self.all_series:
            return ser - tail, d_ser - d_tail
        g = np.where(self.series, ser, direct) - tail
        dg = np.where(self.series, d_ser, d_direct) - d_tail
        return g, dg


def _model(theta, lags: _Lags, s):
    """Per-axis MSD and its Jacobian in (ln K, alpha[, s]) for rows of theta."""
    g, dg = lags.g_dg(theta[:, 1:2])
    K = np.exp(theta[:, 0:1])
    Kg = 2 * K * g
    mu = Kg + 2 * s
    J = [Kg, 2 * K * dg]
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
    theta : (n_rows, 2 or 3) ln K, alpha[, s];  cov : inverse of J^T C^-1 J;  ok : finite and converged
    (relative steps below 1e-6, or below 1e-3 when the iterations ran out).

    Notes
    -----
    Gauss-Newton with step halving on the generalised residual sum of squares; alpha is kept in
    :data:`ALPHA_BOUNDS`.
    """
    y = np.asarray(y, float)
    n = y.shape[0]
    fit_s = s is None
    lags = _Lags(t, exposure_s)
    Cinv = np.broadcast_to(Cinv, (n, *Cinv.shape[-2:])) if Cinv.ndim == 2 else Cinv
    if theta0 is None:
        base = np.zeros(n) if fit_s else np.asarray(s, float)
        floor = 1e-12 * np.abs(y).max(axis=1, keepdims=True) + 1e-300
        z = np.log(np.maximum(y - 2 * base[:, None], floor))
        lt = np.log(t)
        ltc = lt - lt.mean()
        alpha0 = np.clip((z * ltc).sum(1) / (ltc * ltc).sum(), 0.1, 1.9)
        lnK0 = (z.mean(1) - alpha0 * lt.mean()) - np.log(2.0)
        theta = np.stack([lnK0, alpha0] + ([np.zeros(n)] if fit_s else []), 1)
    else:
        theta = np.array(theta0, float)
    s_all = None if fit_s else np.asarray(s, float)[:, None]

    def mu_J(th, rows):
        return _model(th, lags, th[:, 2:3] if fit_s else s_all[rows])

    # compiled batched products, bit for bit numpy.einsum's (msdkit._msd_kernels; no copies of Cinv's rows)
    from .._msd_kernels import rows_jt_c, rows_quadratic_form, sandwich

    def cost(th, rows):
        m, _ = mu_J(th, rows)
        r = y[rows] - m
        return rows_quadratic_form(r, Cinv, rows)  # einsum("nl,nlm,nm->n", r, Cinv[rows], r)

    ok = np.zeros(n, bool)
    last_step = np.zeros(n)
    active = np.arange(n)
    for _ in range(n_iter):
        if active.size == 0:
            break
        th = theta[active]
        mu, J = mu_J(th, active)
        r = y[active] - mu
        JtW = rows_jt_c(J, Cinv, active)  # einsum("nlp,nlm->npm", J, Cinv[active])
        H = JtW @ J
        grad = np.einsum("npm,nm->np", JtW, r)
        H = H + np.eye(H.shape[1]) * (1e-12 * np.abs(H).max(axis=(1, 2)) + 1e-300)[:, None, None]
        try:
            step = np.linalg.solve(H, grad[..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = np.zeros_like(th)
        step = np.where(np.isfinite(step), step, 0.0)
        step[:, 0] = np.clip(step[:, 0], -2.0, 2.0)
        step[:, 1] = np.clip(step[:, 1], -0.5, 0.5)
        new = th + step
        new[:, 1] = np.clip(new[:, 1], *ALPHA_BOUNDS)
        c0 = rows_quadratic_form(r, Cinv, active)
        c1 = cost(new, active)
        for _h in range(12):
            worse = np.flatnonzero(~(c1 <= c0 * (1 + 1e-12)))
            if worse.size == 0:
                break
            new[worse] = 0.5 * (new[worse] + th[worse])
            c1[worse] = cost(new[worse], active[worse])
        worse = ~(c1 <= c0 * (1 + 1e-12))
        new[worse] = th[worse]
        change = np.max(np.abs(new - th) / (1 + np.abs(th)), axis=1)
        done = (change <= 1e-6) | worse
        last_step[active] = change
        theta[active] = new
        ok[active[done]] = True
        active = active[~done]
    _, J = mu_J(theta, np.arange(n))
    H = sandwich(J, Cinv)  # einsum("nlp,nlm,nmq->npq", J, Cinv, J)
    cov = np.full_like(H, np.nan)
    good = np.all(np.isfinite(H), axis=(1, 2)) & (np.abs(np.linalg.det(H)) > 0)
    if good.any():
        cov[good] = np.linalg.inv(H[good])
    ok |= last_step < 1e-3  # still creeping along a flat valley: the estimate is settled to 1e-3
    ok &= np.all(np.isfinite(theta), axis=1)
    return theta, cov, ok


_ALPHA_GRID = np.round(np.arange(0.0, 2.55, 0.1), 10)


@lru_cache(maxsize=8192)
def _power_law_cov_terms(n_steps: int, lags: tuple, blur: float, grid_index: int):
    """TA-MSD covariance terms at lags for V(t) = 2 K g_alpha(t) + 2 s, in frame units, alpha on a grid.

    Returns (A, B): per axis Cov(M_n, M_m) = K^2 A + 2 K s B + s^2 Q_aa (Q_aa from
    :func:`msdkit.estimators.diffusion.msd_covariance_terms`). Uses C(delta) = [V(n - delta) + V(delta + m)
    - V(n - m - delta) - V(delta)]/2 over every offset delta (fractional Brownian motion has long-range
    correlations) and Cov = 2/(K_n K_m) sum_delta count(delta) C^2 for Gaussian data with stationary
    increments.
    """
    alpha = max(_ALPHA_GRID[grid_index], 1e-3)
    L = np.asarray(lags)
    Kw = n_steps - L + 1
    k = np.arange(0, n_steps + int(L.max()) + 2)
    G = np.zeros(k.size)
    if k.size > 1:
        G[1:] = 2.0 * _Lags(k[1:].astype(float), blur).g_dg(np.array([[alpha]]))[0][0]
    delta = np.arange(-(n_steps + 1), n_steps + 2)
    nn, mm, dd = L[:, None, None], L[None, :, None], delta[None, None, :]

    def V(tau):
        return G[np.abs(tau)]

    def S(tau):
        return (tau != 0).astype(float) * 2.0

    Cg = 0.5 * (V(nn - dd) + V(dd + mm) - V(nn - mm - dd) - V(dd))
    Cs = 0.5 * (S(nn - dd) + S(dd + mm) - S(nn - mm - dd) - S(dd))
    Kn, Km = Kw[:, None, None], Kw[None, :, None]
    count = np.maximum(0, np.minimum(Kn, Km - dd) - np.maximum(0, -dd)).astype(float)
    scale = 2.0 / (Kw[:, None] * Kw[None, :])
    return scale * np.sum(count * Cg * Cg, axis=2), scale * np.sum(count * Cg * Cs, axis=2)


def power_law_msd_covariance(n_steps: int, lags, K_frame, alpha, s, *, blur: float, n_dims: int):
    """Covariance of the per-axis-averaged TA-MSD at lags for fractional Brownian motion with blur and noise.

    K_frame is K dt^alpha (frame units); alpha is interpolated linearly on a 0.1 grid. Returns an array
    (n_rows, n_lags, n_lags).
    """
    lags_t = tuple(int(v) for v in lags)
    _, _, Qaa = msd_covariance_terms(int(n_steps), int(max(lags_t)))
    idx = np.asarray(lags_t) - 1
    Qs = Qaa[np.ix_(idx, idx)]
    pos = np.clip(np.asarray(alpha, float), 0.0, 2.5) / 0.1
    i0 = np.clip(np.floor(pos).astype(int), 0, _ALPHA_GRID.size - 2)
    f = (pos - i0)[:, None, None]
    out = np.empty((pos.size, len(lags_t), len(lags_t)))
    for i in np.unique(i0):
        sel = i0 == i
        A0, B0 = _power_law_cov_terms(int(n_steps), lags_t, float(blur), int(i))
        A1, B1 = _power_law_cov_terms(int(n_steps), lags_t, float(blur), int(i) + 1)
        A = (1 - f[sel]) * A0 + f[sel] * A1
        B = (1 - f[sel]) * B0 + f[sel] * B1
        Kf = np.asarray(K_frame, float)[sel][:, None, None]
        ss = np.broadcast_to(np.asarray(s, float), pos.shape)[sel][:, None, None]
        out[sel] = (Kf * Kf * A + 2 * Kf * ss * B + ss * ss * Qs) / n_dims
    return out


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
