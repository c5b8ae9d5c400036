"""Engine of :func:`msdkit.sizing.size_distribution`: the per-track kernel and penalised maximum likelihood.

Private module; see the sizing module docstring for the model.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from .errors import expected_got

_N_FOLDS = 5
# Penalty strengths per unit track weight, tried by cross-validation from strong to weak in decades; below
# _STRENGTH_MIN only while the weakest is still clearly the best, down to _STRENGTH_FLOOR.
_STRENGTH_MAX, _STRENGTH_MIN, _STRENGTH_FLOOR = 10.0, 1e-6, 1e-8
_MIN_TRACKS_CV = 50
_MAX_TRACKS_CV = 5000  # larger samples choose the strength on a random subset (a slightly stronger one)


# ----------------------------------------------------------------------------------------------------------
# Kernel
# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Tracks:
    """Per-track data the kernel needs (arrays of equal length)."""

    y: np.ndarray  # mean squared lag-1 step per axis, µm²
    n: np.ndarray  # lag-1 steps
    m: np.ndarray  # neighbouring step pairs
    s2: np.ndarray  # σ², µm²
    D: np.ndarray  # D̂, µm²/s
    weight: np.ndarray
    n_points: np.ndarray


def _gamma_shape_scale(D, tr: _Tracks, dt, R, n_dims):
    """Shape and scale of the Gamma law of y for true D (broadcast: D over columns, tracks over rows)."""
    a = 2 * D * dt * (1 - 2 * R) + 2 * tr.s2[:, None]
    b = 2 * D * dt * R - tr.s2[:, None]
    n = tr.n[:, None]
    var = 2 * (n * a**2 + 2 * tr.m[:, None] * b**2) / (n_dims * n**2)
    return a**2 / var, var / a


def _log_kernel(D_grid, tr: _Tracks, dt, R, n_dims) -> np.ndarray:
    """Log p(y_i | D_k): rows tracks, columns grid."""
    k, theta = _gamma_shape_scale(D_grid[None, :], tr, dt, R, n_dims)
    y = tr.y[:, None]
    return (k - 1) * np.log(y) - y / theta - k * np.log(theta) - special.gammaln(k)


def _tracks_from_fits(track_fits, dt, R, n_dims, localization_sd_um, weighting) -> tuple[_Tracks, str, int]:
    if "D_um2_s" not in track_fits.columns:
        raise ValueError(
            expected_got(
                "track_fits",
                "a D_um2_s column",
                list(track_fits.columns),
                "Pass the table from lag1_track_estimates (or fit_tracks).",
            )
        )
    if "n_steps" in track_fits.columns:
        n = track_fits["n_steps"].to_numpy(float)
    elif "n_points" in track_fits.columns:
        n = track_fits["n_points"].to_numpy(float) - 1
    else:
        raise ValueError(
            expected_got(
                "track_fits",
                "an n_steps or n_points column",
                list(track_fits.columns),
                "Pass the table from lag1_track_estimates.",
            )
        )
    n_points = track_fits["n_points"].to_numpy(float) if "n_points" in track_fits.columns else n + 1
    m = track_fits["n_adjacent_steps"].to_numpy(float) if "n_adjacent_steps" in track_fits.columns else n - 1
    exact = "mean_sq_step_um2" in track_fits.columns
    if localization_sd_um is not None:
        s = np.full(len(track_fits), float(localization_sd_um))
    elif "sigma_um" in track_fits.columns:
        s = track_fits["sigma_um"].to_numpy(float)
        med = np.nanmedian(np.where(np.isfinite(s) & (s >= 0), s, np.nan)) if np.any(np.isfinite(s)) else 0.0
        s = np.where(np.isfinite(s) & (s >= 0), s, med if np.isfinite(med) else 0.0)
    else:
        s = np.zeros(len(track_fits))
    s2 = s**2
    D = track_fits["D_um2_s"].to_numpy(float)
    y = track_fits["mean_sq_step_um2"].to_numpy(float) if exact else 2 * dt * (1 - 2 * R) * D + 2 * s2
    if weighting == "time":
        w = n_points.copy()
    elif weighting == "track":
        w = np.ones_like(n)
    else:
        raise ValueError(
            expected_got(
                "weighting",
                "'time' or 'track'",
                weighting,
                "'time' counts particles as seen at any instant (default).",
            )
        )
    ok = np.isfinite(y) & (y > 0) & np.isfinite(n) & (n >= 1) & np.isfinite(D) & np.isfinite(s2)
    n_dropped = int(np.sum(~ok))
    m = np.clip(np.where(np.isfinite(m), m, n - 1), 0, None)
    tr = _Tracks(y=y[ok], n=n[ok], m=m[ok], s2=s2[ok], D=D[ok], weight=w[ok], n_points=n_points[ok])
    kernel = "lag1 gamma (exact moments)" if exact else "lag1 gamma (D_um2_s taken as a lag-1 estimate)"
    return tr, kernel, n_dropped


# ----------------------------------------------------------------------------------------------------------
# Penalised maximum likelihood on a log grid
# ----------------------------------------------------------------------------------------------------------
class _Basis:
    """θ(u) = −(u − μ)²/(2 s²) + B c on the grid u = ln d.

    B spans the complement of the quadratics (the null space of the third-difference penalty), in the
    eigenbasis of the penalty, so the penalty is Σ_j Λ_j c_j² exactly and every log-normal costs nothing.
    """

    def __init__(self, u: np.ndarray):
        K = u.size
        step = float(np.mean(np.diff(u)))
        ut = (u - u.mean()) / (u.max() - u.min())
        q, _ = np.linalg.qr(np.stack([np.ones(K), ut, ut**2], axis=1), mode="complete")
        comp = q[:, 3:]
        d3 = np.diff(np.eye(K), n=3, axis=0) @ comp
        lam, vec = np.linalg.eigh(d3.T @ d3)
        self.u = u
        self.penalty = (
            np.clip(lam, 0.0, None) / step**5
        )  # integral of the squared third derivative per unit c²
        self.B = comp @ vec

    def theta(self, mu, log_s, c):
        return -0.5 * (self.u - mu) ** 2 * np.exp(-2 * log_s) + self.B @ c


def _lbfgs(fun, x0, *, max_iter=400, tol=1e-10, memory=10):
    """Minimise a smooth function with limited-memory BFGS and backtracking (Nocedal & Wright 2006, alg. 7.5).

    Kept in numpy on purpose: tiny problems, no threaded linear-algebra calls per iteration.
    """
    x = np.asarray(x0, dtype=float).copy()
    f, g = fun(x)
    S: list[np.ndarray] = []
    Y: list[np.ndarray] = []
    small = 0
    for _ in range(max_iter):
        q = g.copy()
        alphas = []
        for s_, y_ in zip(reversed(S), reversed(Y), strict=True):
            a = (s_ @ q) / (y_ @ s_)
            alphas.append(a)
            q -= a * y_
        if S:
            q *= (S[-1] @ Y[-1]) / (Y[-1] @ Y[-1])
        for (s_, y_), a in zip(zip(S, Y, strict=True), reversed(alphas), strict=True):
            q += s_ * (a - (y_ @ q) / (y_ @ s_))
        d = -q
        slope = g @ d
        if not slope < 0:
            d, slope = -g, -(g @ g)
            S.clear()
            Y.clear()
        t = 1.0
        while True:
            x_new = x + t * d
            f_new, g_new = fun(x_new)
            if np.isfinite(f_new) and f_new <= f + 1e-4 * t * slope:
                break
            t *= 0.5
            if t < 1e-12:
                return x
        s_, y_ = x_new - x, g_new - g
        if s_ @ y_ > 1e-12 * np.sqrt((s_ @ s_) * (y_ @ y_)):
            S.append(s_)
            Y.append(y_)
            if len(S) > memory:
                S.pop(0)
                Y.pop(0)
        small = small + 1 if f - f_new <= tol * max(1.0, abs(f)) else 0
        x, f, g = x_new, f_new, g_new
        if small >= 3 or np.max(np.abs(g)) < 1e-9:
            break
    return x


def _softmax(theta):
    z = np.exp(theta - theta.max())
    return z / z.sum()


def _fit_penalised(L, weight, basis: _Basis, strength, params0, *, max_iter=400):
    """Maximise (1/W) Σ_i ω_i log Σ_k L_ik w_k − (λ/2) Σ_j Λ_j c_j², w = softmax(θ(μ, ln s, c)).

    c is preconditioned by √(1 + λΛ_j) so that every direction has unit-order curvature. Parameters in and out
    are (μ, ln s, c) in natural units.
    """
    W = weight.sum()
    u, B, lam = basis.u, basis.B, basis.penalty
    scale = 1.0 / np.sqrt(1.0 + strength * lam)

    def fun(x):
        mu, log_s, c = x[0], x[1], x[2:] * scale
        inv_s2 = np.exp(-2 * log_s)
        th = -0.5 * (u - mu) ** 2 * inv_s2 + B @ c
        w = _softmax(th)
        s = np.maximum(L @ w, 1e-300)
        gk = L.T @ (weight / s) / W
        f = -np.sum(weight * np.log(s)) / W + 0.5 * strength * np.sum(lam * c * c)
        gth = -w * (gk - 1.0)
        grad = np.empty_like(x)
        grad[0] = gth @ ((u - mu) * inv_s2)
        grad[1] = gth @ ((u - mu) ** 2 * inv_s2)
        grad[2:] = (B.T @ gth + strength * lam * c) * scale
        return f, grad

    x0 = np.concatenate([params0[:2], params0[2:] / scale])
    x = _lbfgs(fun, x0, max_iter=max_iter, tol=1e-5 / W)  # stop when the total log-likelihood gains < 1e-5
    return np.concatenate([x[:2], x[2:] * scale])


def _theta_of(basis: _Basis, params):
    return basis.theta(params[0], params[1], params[2:])


def _heldout_scores(L, row_max, weight, theta):
    w = _softmax(theta)
    return weight * (np.log(np.maximum(L @ w, 1e-300)) + row_max)


def _lognormal_start(n_grid, tr: _Tracks, D_to_u, step):
    """Start from a log-normal (μ, ln s, c = 0): moments of ln size over tracks less the kernel's variance."""
    pos = tr.D > 0
    with np.errstate(invalid="ignore"):
        u = D_to_u(tr.D[pos])
    ok = np.isfinite(u)
    u, k, w = u[ok], tr.n[pos][ok] * 1.0, tr.weight[pos][ok]  # k: Gamma shape for d = 2, Var ln D̂ = ψ'(k)
    mu = float(np.average(u, weights=w))
    var = float(np.average((u - mu) ** 2, weights=w) - np.average(special.polygamma(1, k)))
    var = max(var, (2 * step) ** 2)
    return np.concatenate([[mu, 0.5 * np.log(var)], np.zeros(n_grid - 3)])


def choose_and_fit(L, row_max, weight, basis: _Basis, params0, *, rng=0):
    """Choose the penalty strength by cross-validation and fit all tracks with it.

    Returns θ on the grid and a dict describing the choice (strength, rule, cross-validated log-likelihoods).
    """
    n_all = L.shape[0]
    method: dict = {}
    if n_all >= _MIN_TRACKS_CV:
        g = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
        cv = slice(None)
        if n_all > _MAX_TRACKS_CV:
            cv = np.sort(g.choice(n_all, _MAX_TRACKS_CV, replace=False))
        Lc, rc, wc = L[cv], row_max[cv], weight[cv]
        n_used = Lc.shape[0]
        fold = g.permutation(n_used) % _N_FOLDS
        fold_params = [params0] * _N_FOLDS
        strengths: list[float] = []
        rows: list[np.ndarray] = []
        lam = _STRENGTH_MAX
        while True:  # strongest first, warm starts towards weaker penalties
            row = np.empty(n_used)
            for f in range(_N_FOLDS):
                train, test = fold != f, fold == f
                fold_params[f] = _fit_penalised(Lc[train], wc[train], basis, lam, fold_params[f])
                row[test] = _heldout_scores(Lc[test], rc[test], wc[test], _theta_of(basis, fold_params[f]))
            strengths.append(lam)
            rows.append(row)
            lam /= 10.0
            if lam < _STRENGTH_MIN * (1 - 1e-9):
                # go on only while the weakest penalty is still clearly the best (sharp, separate modes)
                gain = rows[-1] - rows[-2]
                if not (lam >= _STRENGTH_FLOOR * (1 - 1e-9) and gain.sum() > np.sqrt(n_used * np.var(gain))):
                    break
        scores = np.array(rows)
        scores = np.where(np.isfinite(scores), scores, -1e12)
        total = scores.sum(axis=1)
        best = int(np.argmax(total))
        diff_se = np.sqrt(n_used * np.var(scores - scores[best], axis=1))
        chosen = int(np.min(np.flatnonzero(total >= total[best] - diff_se)))
        rule = f"{_N_FOLDS}-fold cross-validation, one-SE rule"
        if n_all > _MAX_TRACKS_CV:
            rule += f" (on {_MAX_TRACKS_CV} random tracks)"
        method["cv_log_likelihood"] = [float(v) for v in total]
        method["cv_strengths"] = strengths
    else:
        strengths, chosen = [_STRENGTH_MAX], 0
        rule = f"best log-normal (fewer than {_MIN_TRACKS_CV} tracks)"
    params = params0
    for lam in strengths[: chosen + 1]:
        params = _fit_penalised(L, weight, basis, lam, params)
    method.update({"regularization_strength": float(strengths[chosen]), "regularization_rule": rule})
    return _theta_of(basis, params), method
