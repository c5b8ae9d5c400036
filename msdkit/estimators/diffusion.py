"""Estimators of the diffusion coefficient with localisation error and motion blur, and their precision.

Notation (per axis, frame interval dt, exposure t_E, blur coefficient R = t_E / (6 dt), static localisation
variance s = sigma^2): steps of consecutive frames have variance b + 2a and lag-one covariance -a with

    b = 2 D dt,    a = s - R b,

so the observed MSD per axis is MSD_n = b n + 2a (Berglund 2010, Phys. Rev. E 82:011917). Everything below
works in (b, a) and converts at the end: D = b / (2 dt), s = a + R b.

References
----------
A. J. Berglund, Phys. Rev. E 82, 011917 (2010), doi:10.1103/PhysRevE.82.011917.
X. Michalet, Phys. Rev. E 82, 041914 (2010), doi:10.1103/PhysRevE.82.041914.
C. L. Vestergaard, P. C. Blainey & H. Flyvbjerg, Phys. Rev. E 89, 022726 (2014),
doi:10.1103/PhysRevE.89.022726.
H. Qian, M. P. Sheetz & E. L. Elson, Biophys. J. 60, 910 (1991), doi:10.1016/S0006-3495(91)82125-7.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy import special

#: Two-sided 95 % standard-normal quantile.
Z95 = 1.959963984540054


def blur_coefficient(frame_interval_s: float, exposure_s: float) -> float:
    """Motion-blur coefficient R = t_E / (6 dt), uniform illumination during the exposure (Berglund 2010)."""
    return float(exposure_s) / (6.0 * float(frame_interval_s))


# ----------------------------------------------------------------------------------------------------------
# Covariance-based estimator
# ----------------------------------------------------------------------------------------------------------

def covariance_estimate(sum_sq, n_steps, sum_cross, n_pairs, *, n_dims: int, R: float):
    """Covariance-based estimator (Vestergaard, Blainey & Flyvbjerg 2014) in (b, a) form.

    Parameters
    ----------
    sum_sq, n_steps : arrays
        Sum over steps and axes of squared steps, and the number of steps.
    sum_cross, n_pairs : arrays
        Sum over adjacent step pairs and axes of their product, and the number of such pairs.

    Returns
    -------
    b, a : arrays (NaN where a track has no adjacent pair of steps)

    Notes
    -----
    With m = <dx_k^2> and c = <dx_k dx_(k+1)> per axis: b = 2 dt D = m + 2c and s = R m + (2R - 1) c, so
    a = s - R b = -c. Both are unbiased for any x, with or without blur.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        m = np.asarray(sum_sq, float) / (n_dims * np.asarray(n_steps, float))
        c = np.asarray(sum_cross, float) / (n_dims * np.asarray(n_pairs, float))
    return m + 2.0 * c, -c


def covariance_variance_coefficients(n_steps, *, n_dims: int):
    """Var(b_hat) = k_bb b^2 + 2 k_ab a b + k_aa a^2 for the covariance-based estimator.

    From Var(D)/D^2 = [(6 + 4 eps + 2 eps^2)/N + 4 (1 + eps)^2 / N^2] / d with eps = x - 2R = 2a/b
    (Vestergaard, Blainey & Flyvbjerg 2014, eq. for the variance of the estimator).
    """
    N = np.asarray(n_steps, float)
    kbb = (6.0 / N + 4.0 / N**2) / n_dims
    kab = (4.0 / N + 8.0 / N**2) / n_dims
    kaa = (8.0 / N + 16.0 / N**2) / n_dims
    return kbb, kab, kaa


def quadratic_interval(b_hat, s_hat, kbb, kab, kaa, *, R: float, z: float = Z95):
    """Score-type interval {b : (b_hat - b)^2 <= z^2 Var(b)} for Var quadratic in (b, a), a = s_hat - R b.

    The variance is evaluated at the hypothesised b rather than at the estimate (as in Wilson's interval), so
    the interval is asymmetric where the estimator's spread grows with D. Returns (lo, hi); hi is +inf when
    the relative precision is too poor to bound b from above.
    """
    b_hat, s_hat = np.asarray(b_hat, float), np.asarray(s_hat, float)
    # Var(b) with a = s - R b:  q2 b^2 + q1 b + q0
    q2 = kbb - 2 * R * kab + R * R * kaa
    q1 = 2 * s_hat * kab - 2 * R * s_hat * kaa
    q0 = kaa * s_hat * s_hat
    z2 = z * z
    A = 1.0 - z2 * q2
    B = -(2.0 * b_hat + z2 * q1)
    C = b_hat * b_hat - z2 * q0
    disc = B * B - 4 * A * C
    with np.errstate(invalid="ignore", divide="ignore"):
        root = np.sqrt(np.maximum(disc, 0.0))
        lo = np.where(A > 0, (-B - root) / (2 * A), np.where(A < 0, (-B + root) / (2 * A), C / -B))
        hi = np.where(A > 0, (-B + root) / (2 * A), np.inf)
    # Wald fallback where the quadratic has no real roots (only through round-off)
    se = np.sqrt(np.maximum(q2 * b_hat**2 + q1 * b_hat + q0, 0.0))
    bad = ~(disc >= 0) | ~np.isfinite(lo)
    lo = np.where(bad, b_hat - z * se, lo)
    hi = np.where(bad & np.isfinite(hi), b_hat + z * se, hi)
    return lo, hi


# ----------------------------------------------------------------------------------------------------------
# Maximum likelihood on the DST modes of the steps
# ----------------------------------------------------------------------------------------------------------

_RHO_GRID = np.array([-0.24, -0.2, -0.15, -0.1, -0.05, 0.0, 0.03, 0.07, 0.12, 0.2, 0.3, 0.45, 0.7, 1.0, 1.5,
                      2.2, 3.3, 5.0, 7.5, 11.0, 17.0, 25.0, 40.0, 60.0, 100.0, 200.0, 500.0, 1000.0])


def _loglik(b, a, lam, S, w, d):
    psi = b[:, None] + a[:, None] * lam
    ok = np.all((psi > 0) | (w == 0), axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = np.where(w > 0, psi, 1.0)
        ll = -0.5 * np.sum(w * (d * np.log(p) + S / p), axis=1)
    return np.where(ok, ll, -np.inf)


def ml_fit(lam, S, w, *, n_dims: int, R: float = 0.0, s_known=None, max_iter: int = 60):
    """Maximum-likelihood (b, a) of padded groups of DST modes, one row per track (or per sample).

    Parameters
    ----------
    lam, S, w : (n_rows, n_modes) arrays
        Eigenvalue factors lambda_k, summed squared DST coefficients over the axes, and weights (1 for a
        real mode, 0 for padding; bootstrap counts also work).
    n_dims : int
    R : float
        Blur coefficient; used only when the localisation variance is known.
    s_known : array of shape (n_rows,), optional
        Known static localisation variance per row (µm²): then only b is fitted, with a = s - R b.

    Returns
    -------
    b, a : arrays
    var_b : array
        Inverse expected Fisher information for b (a profiled out, or known).
    converged : bool array

    Notes
    -----
    Modes are independent N(0, psi_k) per axis with psi_k = b + a lambda_k (Berglund 2010; Vestergaard et al.
    2014). The log-likelihood -1/2 sum_k w_k [d ln psi_k + S_k / psi_k] is maximised by Fisher scoring, which
    for variances linear in the parameters is iteratively reweighted least squares of S_k/d on (1, lambda_k)
    with weights 1/psi_k^2, with step halving to keep every psi_k > 0 and the likelihood increasing. b is not
    restricted to positive values (only psi_k > 0 is required), so single-track estimates of D can be
    negative and averages over tracks are not biased by clipping. Starting values come from a grid of the
    profile likelihood in rho = a/b.
    """
    lam, S, w = np.asarray(lam, float), np.asarray(S, float), np.asarray(w, float)
    d = float(n_dims)
    n = lam.shape[0]
    W = w.sum(axis=1)
    y = S / d
    if s_known is not None:
        s = np.broadcast_to(np.asarray(s_known, float), (n,))
        u = 1.0 - R * lam
        off = s[:, None] * lam
        b = np.maximum(np.sum(w * (y - off), axis=1) / np.maximum(np.sum(w * u, axis=1), 1e-300), 1e-300)
        b = np.where(np.isfinite(b), b, 1.0)
        conv = np.zeros(n, bool)
        for _ in range(max_iter):
            psi = b[:, None] * u + off
            r = w / psi**2
            den = np.sum(r * u * u, axis=1)
            b_new = np.sum(r * u * (y - off), axis=1) / den
            b_new = _halve(b, b_new, lambda bb: _loglik(bb, s - R * bb, lam, S, w, d))
            conv = np.abs(b_new - b) <= 1e-10 * np.abs(b) + 1e-300
            b = b_new
            if conv.all():
                break
        psi = b[:, None] * u + off
        var_b = 2.0 / (d * np.sum(w * u * u / psi**2, axis=1))
        return b, s - R * b, var_b, conv

    # starting values: profile likelihood over rho = a / b on a grid (b > 0 there)
    best = np.full(n, -np.inf)
    b = np.ones(n)
    a = np.zeros(n)
    for rho in _RHO_GRID:
        q = 1.0 + rho * lam
        bh = np.sum(w * S / q, axis=1) / (d * W)
        with np.errstate(divide="ignore", invalid="ignore"):
            ll = -0.5 * d * (W * np.log(bh) + np.sum(w * np.log(q), axis=1))
        better = ll > best
        best = np.where(better, ll, best)
        b = np.where(better, bh, b)
        a = np.where(better, rho * bh, a)
    conv = np.zeros(n, bool)
    last = np.full(n, np.inf)
    active = np.ones(n, bool)
    for _ in range(max_iter):
        i = np.flatnonzero(active)
        if i.size == 0:
            break
        L, Y, Wt = lam[i], y[i], w[i]
        psi = b[i, None] + a[i, None] * L
        r = Wt / psi**2
        s0, s1, s2 = r.sum(1), (r * L).sum(1), (r * L * L).sum(1)
        t0, t1 = (r * Y).sum(1), (r * L * Y).sum(1)
        det = s0 * s2 - s1 * s1
        with np.errstate(divide="ignore", invalid="ignore"):
            bn = (s2 * t0 - s1 * t1) / det
            an = (s0 * t1 - s1 * t0) / det
        bad = ~np.isfinite(bn) | ~np.isfinite(an)
        bn, an = np.where(bad, b[i], bn), np.where(bad, a[i], an)
        theta = np.stack([b[i], a[i]], 1)
        new = _halve(theta, np.stack([bn, an], 1),
                     lambda th, i=i: _loglik(th[:, 0], th[:, 1], lam[i], S[i], w[i], d))
        scale = np.abs(a[i]) + np.abs(b[i]) + 1e-300
        change = np.maximum(np.abs(new[:, 0] - b[i]), np.abs(new[:, 1] - a[i])) / scale
        done = change <= 1e-9
        last[i] = change
        b[i], a[i] = new[:, 0], new[:, 1]
        conv[i[done]] = True
        active[i[done]] = False
    conv |= last <= 1e-5  # still creeping along a flat ridge: settled to 1e-5 of the scale
    psi = b[:, None] + a[:, None] * lam
    r = w / psi**2
    s0, s1, s2 = r.sum(1), (r * lam).sum(1), (r * lam * lam).sum(1)
    with np.errstate(divide="ignore", invalid="ignore"):
        var_b = (2.0 / d) * s2 / (s0 * s2 - s1 * s1)
    return b, a, var_b, conv


def _halve(old, new, loglik, n_halvings: int = 40):
    """Step halving: move from old toward new until the log-likelihood does not decrease."""
    ll0 = loglik(old)
    cand = new.copy()
    ll = loglik(cand)
    for _ in range(n_halvings):
        worse = ~(ll >= ll0 - 1e-12 * np.abs(ll0))
        if not worse.any():
            break
        cand[worse] = 0.5 * (cand[worse] + old[worse])
        ll[worse] = loglik(cand)[worse]
    worse = ~(ll >= ll0 - 1e-12 * np.abs(ll0))
    cand[worse] = old[worse]
    return cand


def gls_fixed_ratio(lam, S, w, rho, *, n_dims: int):
    """One Fisher-scoring step of the likelihood from a shared noise ratio rho = a/b (weighted least squares).

    Parameters
    ----------
    lam, S, w : (n_rows, n_modes) arrays as in :func:`ml_fit`.
    rho : float
        a/b at which the weights 1/psi_k^2 are evaluated (e.g. from the pooled fit of a sample).

    Returns
    -------
    b, a : arrays
    kbb, kab, kaa : arrays
        Exact variance coefficients, Var(b_hat) = kbb b^2 + 2 kab a b + kaa a^2 at the true (b, a).
    c, ca : (n_rows, n_modes) arrays
        The weights, b_hat = sum_k c_k S_k / d and a_hat = sum_k ca_k S_k / d.

    Notes
    -----
    Because psi_k = b + a lambda_k is linear in (b, a), a scoring step from any (b0, a0) is the weighted
    least-squares fit of S_k/d on (1, lambda_k) with weights (1 + rho lambda_k)^-2, rho = a0/b0. With
    weights that do not depend on the track's own data the estimate is exactly unbiased, and its variance
    equals the Cramér-Rao bound when the track's true ratio is rho (Le Cam's one-step estimator; Gaussian
    model of Berglund 2010 and Vestergaard et al. 2014). Var(S_k/d) = 2 psi_k^2 / d gives the variance.
    """
    lam, S, w = np.asarray(lam, float), np.asarray(S, float), np.asarray(w, float)
    r = w / (1.0 + rho * lam) ** 2
    y = S / n_dims
    s0, s1, s2 = r.sum(1), (r * lam).sum(1), (r * lam * lam).sum(1)
    t0, t1 = (r * y).sum(1), (r * lam * y).sum(1)
    with np.errstate(divide="ignore", invalid="ignore"):
        det = s0 * s2 - s1 * s1
        b = (s2 * t0 - s1 * t1) / det
        a = (s0 * t1 - s1 * t0) / det
        c = r * (s2[:, None] - s1[:, None] * lam) / det[:, None]
        ca = r * (s0[:, None] * lam - s1[:, None]) / det[:, None]
    c2 = c * c * (w > 0)
    f = 2.0 / n_dims
    return b, a, f * c2.sum(1), f * (c2 * lam).sum(1), f * (c2 * lam * lam).sum(1), c, ca


def weighted_chi2_moments(c, lam, w, *, R: float):
    """Polynomial coefficients in b of the 2nd and 3rd cumulants of b_hat = sum_k c_k S_k / d.

    With psi_k = b u_k + s lambda_k (u_k = 1 - R lambda_k) and S_k/d ~ psi_k chi^2_d / d independent:
    kappa2 = (2/d) sum (c psi)^2, kappa3 = (8/d^2) sum (c psi)^3. Returns m2 (n, 3) and m3 (n, 4) so that
    sum (c psi)^2 = m2 . (b^2, b s, s^2) and sum (c psi)^3 = m3 . (b^3, b^2 s, b s^2, s^3) (binomial factors
    included).
    """
    c = np.where(w > 0, c, 0.0)
    c2 = c * c
    c3 = c2 * c
    lam2 = lam * lam
    dot = lambda a, b: np.einsum("ij,ij->i", a, b)  # noqa: E731
    if R == 0:
        m2 = np.stack([c2.sum(1), 2 * dot(c2, lam), dot(c2, lam2)], 1)
        m3 = np.stack([c3.sum(1), 3 * dot(c3, lam), 3 * dot(c3, lam2), dot(c3 * lam, lam2)], 1)
        return m2, m3
    u = 1.0 - R * lam
    cu2 = c2 * u
    cu3 = c3 * u
    m2 = np.stack([dot(cu2, u), 2 * dot(cu2, lam), dot(c2, lam2)], 1)
    m3 = np.stack([dot(cu3 * u, u), 3 * dot(cu3 * u, lam), 3 * dot(cu3, lam2), dot(c3 * lam, lam2)], 1)
    return m2, m3


def _gamma_quantile(mean, k2, k3, p, exact_below: float = 20.0):
    """Quantile p of the shifted gamma law with the given mean, variance k2 and third cumulant k3.

    The standardised gamma quantile uses the Wilson-Hilferty cube-root approximation for shape >=
    exact_below (relative error below 1e-3 in the 2.5 % tails at shape 20) and the exact inverse incomplete
    gamma function otherwise.
    """
    sd = np.sqrt(np.maximum(k2, 1e-300))
    skew = k3 / sd**3
    z = special.ndtri(p)
    small = np.abs(skew) < 1e-3
    sk = np.where(small, 1.0, skew)
    shape = 4.0 / (sk * sk)
    sign = np.sign(sk)
    zz = np.where(sign > 0, z, -z)
    g = shape * (1.0 - 1.0 / (9.0 * shape) + zz / (3.0 * np.sqrt(shape))) ** 3
    exact = shape < exact_below
    if exact.any():
        pp = np.where(sign > 0, p, 1.0 - p)
        with np.errstate(over="ignore", invalid="ignore"):
            g[exact] = special.gammaincinv(shape[exact], pp[exact])
    q = mean + sign * sd * (g - shape) / np.sqrt(shape)
    return np.where(small, mean + z * sd, q)


def skewed_interval(b_hat, s, m2, m3, *, n_dims: int, z: float = Z95, n_iter: int = 26):
    """95 % interval for b > 0 by inverting quantiles of a weighted chi-square sum at each hypothesised b.

    b is in the interval when b_hat lies between the 2.5 % and 97.5 % quantiles of its distribution under
    (b, s), approximated by a shifted gamma law with the exact first three cumulants (Pearson type III). This
    keeps the right skew of short, noisy tracks; for long tracks it reduces to the score-type interval. The
    upper end is +inf when even an arbitrarily large b leaves b_hat above its lower quantile (a 20-point
    track with x = 10 cannot bound D from above at 95 %).
    """
    b_hat = np.asarray(b_hat, float)
    s = np.broadcast_to(np.asarray(s, float), b_hat.shape)
    p_lo, p_hi = special.ndtr(-z), special.ndtr(z)

    def quant(b, p, exact_below=20.0):
        k2 = (2.0 / n_dims) * (m2[:, 0] * b * b + m2[:, 1] * b * s + m2[:, 2] * s * s)
        k3 = (8.0 / n_dims**2) * (m3[:, 0] * b**3 + m3[:, 1] * b * b * s + m3[:, 2] * b * s * s
                                  + m3[:, 3] * s**3)
        return _gamma_quantile(b, k2, k3, p, exact_below)

    def bisect(lo_b, hi_b, p, n, exact_below):
        for _ in range(n):
            mid = 0.5 * (lo_b + hi_b)
            up = quant(np.exp(mid), p, exact_below) - b_hat > 0
            hi_b = np.where(up, mid, hi_b)
            lo_b = np.where(up, lo_b, mid)
        return lo_b, hi_b

    scale = np.maximum(np.abs(b_hat), np.sqrt(np.maximum(m2[:, 2] * s * s, 0.0))) + 1e-300
    out = []
    for p, side in ((p_hi, "lo"), (p_lo, "hi")):
        # f(b) = quantile_p(b) - b_hat is increasing in b; find its root on a log scale in b, first with the
        # cheap Wilson-Hilferty quantile everywhere, then exactly within +-10 % of that root
        lo_b = np.log(scale * 1e-4)
        hi_b = np.log(scale * 1e4)
        f_lo = quant(np.exp(lo_b), p) - b_hat
        f_hi = quant(np.exp(hi_b), p) - b_hat
        lo_b, hi_b = bisect(lo_b, hi_b, p, n_iter, 0.0)
        mid = 0.5 * (lo_b + hi_b)
        lo_e, hi_e = mid - 0.1, mid + 0.1
        ok = (quant(np.exp(lo_e), p) - b_hat <= 0) & (quant(np.exp(hi_e), p) - b_hat > 0)
        lo_e = np.where(ok, lo_e, np.log(scale * 1e-4))
        hi_e = np.where(ok, hi_e, np.log(scale * 1e4))
        lo_b, hi_b = bisect(lo_e, hi_e, p, 14 + np.where(ok, 0, 12).max(initial=0), 20.0)
        root = np.exp(0.5 * (lo_b + hi_b))
        if side == "lo":
            out.append(np.where(f_lo >= 0, 0.0, np.where(f_hi < 0, np.inf, root)))
        else:
            out.append(np.where(f_hi <= 0, np.inf, np.where(f_lo > 0, 0.0, root)))
    return out[0], out[1]


def cramer_rao_var_b(n_steps: int, b: float, a: float, *, n_dims: int = 2, R: float = 0.0,
                     s_known: bool = False) -> float:
    """Cramér-Rao bound on Var(b_hat) for one track of n_steps steps without gaps.

    Exact for the Gaussian model: Fisher information of the independent DST modes,
    I = d/2 sum_k grad psi_k grad psi_k^T / psi_k^2 with psi_k = b + a lambda_k (Berglund 2010; Vestergaard et
    al. 2014). With ``s_known`` the localisation variance is known and a = s - R b moves with b.
    """
    k = np.arange(1, n_steps + 1)
    lam = 2.0 * (1.0 - np.cos(np.pi * k / (n_steps + 1)))
    psi = b + a * lam
    if s_known:
        u = 1.0 - R * lam
        return float(2.0 / (n_dims * np.sum(u * u / psi**2)))
    s0, s1, s2 = np.sum(1 / psi**2), np.sum(lam / psi**2), np.sum(lam**2 / psi**2)
    return float((2.0 / n_dims) * s2 / (s0 * s2 - s1 * s1))


# ----------------------------------------------------------------------------------------------------------
# MSD fit with the optimal number of lags
# ----------------------------------------------------------------------------------------------------------

@lru_cache(maxsize=4096)
def msd_covariance_terms(n_steps: int, n_lags: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Covariance of one axis' time-averaged MSD at lags 1..n_lags as Q_bb b^2 + 2 Q_ab a b + Q_aa a^2.

    Notes
    -----
    For positions with stationary increments and structure function V(t) = E (X_(i+t) - X_i)^2 =
    b |t| + 2a [t != 0], displacements n and m frames long starting delta frames apart have covariance
    C = [V(n - delta) + V(delta + m) - V(n - m - delta) - V(delta)] / 2, and for Gaussian data
    Cov(M_n, M_m) = 2 / (K_n K_m) sum_delta count(delta) C(delta)^2 with K_n = N - n + 1 windows
    (the construction behind Qian, Sheetz & Elson 1991 and Michalet 2010, here with the blur-aware V).
    """
    P = min(n_lags, n_steps)
    n = np.arange(1, P + 1)
    K = n_steps - n + 1
    delta = np.arange(-P, P + 1)
    nn, mm, dd = n[:, None, None], n[None, :, None], delta[None, None, :]

    def parts(t):
        t = np.abs(t)
        return t, (t != 0).astype(float) * 2.0

    vb = [parts(x) for x in (nn - dd, dd + mm, nn - mm - dd, dd)]
    Cb = 0.5 * (vb[0][0] + vb[1][0] - vb[2][0] - vb[3][0])
    Ca = 0.5 * (vb[0][1] + vb[1][1] - vb[2][1] - vb[3][1])
    Kn, Km = K[:, None, None], K[None, :, None]
    count = np.maximum(0, np.minimum(Kn, Km - dd) - np.maximum(0, -dd)).astype(float)
    scale = 2.0 / (K[:, None] * K[None, :])
    Qbb = scale * np.sum(count * Cb * Cb, axis=2)
    Qab = scale * np.sum(count * Cb * Ca, axis=2)
    Qaa = scale * np.sum(count * Ca * Ca, axis=2)
    return Qbb, Qab, Qaa


@lru_cache(maxsize=4096)
def slope_variance_terms(n_steps: int, p_max: int) -> np.ndarray:
    """(p_max + 1, 3) coefficients (k_bb, k_ab, k_aa) of Var(slope) of a fit on lags 1..p, per axis.

    Rows p < 2 are NaN. Var(b_hat) = k_bb b^2 + 2 k_ab a b + k_aa a^2.
    """
    Qbb, Qab, Qaa = msd_covariance_terms(n_steps, p_max)
    P = Qbb.shape[0]
    out = np.full((p_max + 1, 3), np.nan)
    for p in range(2, P + 1):
        n = np.arange(1, p + 1, dtype=float)
        w = (n - n.mean()) / np.sum((n - n.mean()) ** 2)
        out[p] = [w @ Q[:p, :p] @ w for Q in (Qbb, Qab, Qaa)]
    return out


def optimal_lags_pooled(y, npairs, n_steps, *, p_max: int, n_iter: int = 10):
    """Optimal-lag MSD fit with the lag count chosen from the pooled tracks' reduced error.

    The iteration of Michalet (2010) runs on the pair-weighted ensemble MSD (fit on lags 1..p, estimate
    x = 2a/b, choose p minimising the predicted variance for the median track length, repeat); each track
    is then fitted on lags 1..p_t with p_t optimal for its own length at the pooled x. The choice of p does
    not depend on a track's own data, so each track's slope is an exactly unbiased estimate of b (a
    per-track choice of p correlates p with the data and biases D at high x). For a single track this is
    Michalet's per-track iteration.

    Parameters
    ----------
    y, npairs : (n_tracks, p_max) per-axis TA-MSD (NaN where missing) and pair counts.
    n_steps : (n_tracks,) steps per track.

    Returns
    -------
    b, a, p, k : per-track slope, half intercept, lag count and variance coefficients (n_tracks, 3).
    """
    T = y.shape[0]
    ns = np.maximum(np.asarray(n_steps, int), 2)
    wy = np.where(npairs > 0, npairs * np.nan_to_num(y), 0.0).sum(0)
    wn = npairs.sum(0)
    with np.errstate(divide="ignore", invalid="ignore"):
        ens = wy / wn
    n_avail = int(np.argmin(np.append(np.isfinite(ens), False)))  # leading lags with data
    n_med = int(np.median(ns))
    p = min(2, n_avail)
    b = a = np.nan
    for _ in range(n_iter):
        if p < 2:
            break
        lag = np.arange(1, p + 1, dtype=float)
        wts = (lag - lag.mean()) / np.sum((lag - lag.mean()) ** 2)
        b = float(ens[:p] @ wts)
        a = float((ens[:p].mean() - b * lag.mean()) / 2.0)
        p_new = _best_p(slope_variance_terms(n_med, p_max), b, a, min(n_avail, p_max, n_med))
        if p_new == p:
            break
        p = p_new
    # per-track lag counts at the pooled (b, a)
    p_t = np.full(T, 2)
    for N in np.unique(ns):
        p_t[ns == N] = _best_p(slope_variance_terms(int(N), p_max), b, a, min(int(N), p_max))
    lagm = np.arange(1, p_max + 1, dtype=float)
    use = (lagm[None, :] <= p_t[:, None]) & np.isfinite(y)
    cnt = use.sum(1)
    mn = (use * lagm).sum(1) / cnt
    dev = np.where(use, lagm - mn[:, None], 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        bt = (dev * np.where(use, y, 0.0)).sum(1) / (dev * dev).sum(1)
        at = ((np.where(use, y, 0.0)).sum(1) / cnt - bt * mn) / 2.0
    enough = cnt >= 2  # a missing lag (gaps) leaves the fit on the lags that have pairs
    bt = np.where(enough, bt, np.nan)
    at = np.where(enough, at, np.nan)
    k = np.full((T, 3), np.nan)
    for N in np.unique(ns):
        sel = ns == N
        k[sel] = slope_variance_terms(int(N), p_max)[p_t[sel]]
    return bt, at, p_t, k


def _best_p(terms, b, a, p_lim):
    if not (np.isfinite(b) and np.isfinite(a)):
        return 2
    bb = b if b > 0 else max(abs(a), 1e-300) * 1e-6
    var = terms[:, 0] * bb * bb + 2 * terms[:, 1] * a * bb + terms[:, 2] * a * a
    var[: 2] = np.inf
    var[p_lim + 1:] = np.inf
    var = np.where(np.isfinite(var), var, np.inf)
    return int(np.argmin(var)) if np.isfinite(var).any() else 2
